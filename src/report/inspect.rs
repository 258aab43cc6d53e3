//! `actuary inspect RUN [STAGE]`: print what each stage produced, as a table
//! or as JSON (`--json`), from the stage manifests.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use crate::runner::Stage;
use crate::store::StageManifest;

/// Errors inspecting a run.
#[derive(Debug, thiserror::Error)]
pub enum InspectError {
    /// The manifest could not be read.
    #[error("cannot read manifest {path}: {source}")]
    Manifest {
        /// The file.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// The run has no output for the stage.
    #[error("{run} has no {stage} stage output (no {stage}/manifest.json)")]
    Missing {
        /// The run folder.
        run: PathBuf,
        /// The stage.
        stage: Stage,
    },
    /// Not built yet.
    #[error("`{0}` is not available in this build yet")]
    NotBuilt(&'static str),
    /// JSON encoding failed.
    #[error("encoding JSON: {0}")]
    Json(#[from] serde_json::Error),
}

/// Renders the summary of one stage (or every stage present) of `run`.
pub fn inspect(run: &Path, stage: Option<Stage>, json: bool, _verify: bool) -> Result<String, InspectError> {
    let stages: Vec<Stage> = match stage {
        Some(s) => vec![s],
        None => Stage::ALL
            .into_iter()
            .filter(|s| StageManifest::path(run, s.name()).exists())
            .collect(),
    };
    let mut manifests = Vec::new();
    for s in stages {
        let m = StageManifest::read(run, s.name())
            .map_err(|source| InspectError::Manifest {
                path: StageManifest::path(run, s.name()),
                source,
            })?
            .ok_or(InspectError::Missing {
                run: run.to_path_buf(),
                stage: s,
            })?;
        manifests.push((s, m));
    }
    if json {
        let value: serde_json::Map<String, serde_json::Value> = manifests
            .iter()
            .map(|(s, m)| Ok((s.name().to_string(), serde_json::to_value(m)?)))
            .collect::<Result<_, serde_json::Error>>()?;
        return Ok(serde_json::to_string_pretty(&value)? + "\n");
    }
    let mut out = String::new();
    for (s, m) in &manifests {
        let _ = writeln!(out, "== {s} (tool {}, key {})", m.tool_version, &m.key[..12.min(m.key.len())]);
        for (k, v) in &m.counts {
            let _ = writeln!(out, "  {k:<24} {v}");
        }
        for (k, v) in &m.timings {
            let _ = writeln!(out, "  {k:<24} {v:.2} s");
        }
        for c in m.clips.iter().filter(|c| c.status == "skipped") {
            let _ = writeln!(out, "  skipped {}/{}: {}", c.set, c.id, c.reason.as_deref().unwrap_or(""));
        }
    }
    Ok(out)
}
