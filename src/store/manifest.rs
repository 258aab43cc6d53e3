//! The `manifest.json` every stage writes into `RUN/<stage>/`: what it was
//! made from (settings hash, input fingerprints), what it made (counts,
//! per-clip status) and how long it took. The runner compares `key` to decide
//! whether a stage can be skipped.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

/// File name of a stage manifest inside `RUN/<stage>/`.
pub const MANIFEST_FILE: &str = "manifest.json";

/// Outcome for one clip in a stage.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct ClipStatus {
    /// Clip id.
    pub id: String,
    /// Clip-set name.
    pub set: String,
    /// `ok`, `reused` (done by an earlier run with the same key) or `skipped`.
    pub status: String,
    /// Why the clip was skipped.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reason: Option<String>,
}

/// A stage manifest.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq, Default)]
pub struct StageManifest {
    /// Stage name.
    pub stage: String,
    /// actuary version that wrote it.
    pub tool_version: String,
    /// sha256 of the stage's settings and its inputs' fingerprints: equal key, same output.
    pub key: String,
    /// sha256 of the stage's settings alone.
    pub settings_hash: String,
    /// Fingerprints (sha256, lowercase hex) of the inputs, by name.
    pub inputs: BTreeMap<String, String>,
    /// Counts (clips, frames, skipped, ...).
    pub counts: BTreeMap<String, u64>,
    /// Timings in seconds.
    pub timings: BTreeMap<String, f64>,
    /// Per-clip outcome.
    pub clips: Vec<ClipStatus>,
    /// Stage-specific summary.
    pub summary: serde_json::Value,
}

impl StageManifest {
    /// Path of the manifest of `stage` in `run_dir`.
    pub fn path(run_dir: &Path, stage: &str) -> PathBuf {
        run_dir.join(stage).join(MANIFEST_FILE)
    }

    /// Reads the manifest of `stage` in `run_dir`, if it exists.
    pub fn read(run_dir: &Path, stage: &str) -> std::io::Result<Option<Self>> {
        let path = Self::path(run_dir, stage);
        if !path.exists() {
            return Ok(None);
        }
        super::atomic::read_json(&path).map(Some)
    }

    /// Writes the manifest atomically.
    pub fn write(&self, run_dir: &Path) -> std::io::Result<()> {
        super::atomic::write_json_atomic(&Self::path(run_dir, &self.stage), self)
    }
}
