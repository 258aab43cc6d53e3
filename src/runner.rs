//! The stage runner: the only module that knows the stage order, how a stage's
//! key is computed (its settings, the seed, the previous stage's key and, for
//! decode, the content hash of every input), when a stage can be skipped and
//! how its manifest is written.
//!
//! A stage is skipped when `RUN/<stage>/manifest.json` exists with the same
//! key. Otherwise it runs; stages resume work themselves (decode and label
//! reuse per-clip outputs made with the same key, fit restarts from its last
//! checkpoint).

use std::path::{Path, PathBuf};
use std::time::Instant;

use rayon::prelude::*;
use serde::Serialize;

use crate::clip_hashes::ClipHashes;
use crate::inputs::{self, ClipInput};
use crate::spec::Spec;
use crate::store::StageManifest;
use crate::util;

/// The stages in pipeline order.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Stage {
    /// Decode clips into the frame store and map recorded actions.
    Decode,
    /// Measure and reduce the domain gap; estimate clock offsets.
    Align,
    /// Fit the variational inverse-dynamics model.
    Fit,
    /// Infer actions, codes and calibrated confidence.
    Label,
    /// Write Parquet shards.
    Shard,
}

impl Stage {
    /// Every stage, in order.
    pub const ALL: [Stage; 5] = [
        Stage::Decode,
        Stage::Align,
        Stage::Fit,
        Stage::Label,
        Stage::Shard,
    ];

    /// The stage's folder name under `RUN/`.
    pub fn name(self) -> &'static str {
        match self {
            Stage::Decode => "decode",
            Stage::Align => "align",
            Stage::Fit => "fit",
            Stage::Label => "label",
            Stage::Shard => "shard",
        }
    }

    /// Parses a stage name.
    pub fn parse(name: &str) -> Option<Stage> {
        Stage::ALL.into_iter().find(|s| s.name() == name)
    }

    /// The stage before this one.
    pub fn previous(self) -> Option<Stage> {
        let i = Stage::ALL.iter().position(|s| *s == self)?;
        i.checked_sub(1).map(|j| Stage::ALL[j])
    }
}

impl std::fmt::Display for Stage {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.name())
    }
}

/// Everything a stage needs to run.
pub struct StageContext<'a> {
    /// The resolved spec.
    pub spec: &'a Spec,
    /// The run folder (`spec.out`).
    pub run_dir: PathBuf,
    /// `RUN/<stage>/`.
    pub stage_dir: PathBuf,
    /// Worker threads the stage may use.
    pub threads: usize,
    /// The stage key (settings + inputs); per-item outputs made with it may be reused.
    pub key: String,
    /// Hash of the stage's settings alone.
    pub settings_hash: String,
    /// Every clip of every set, with fingerprints.
    pub clips: &'a [FingerprintedClip],
    /// When set, a map stage handles only the clips of this partition.
    pub partition: Option<Partition>,
}

impl StageContext<'_> {
    /// Whether clip `id` of `set` belongs to this run's partition (always true
    /// when the stage runs whole).
    pub fn includes(&self, set: &str, id: &str) -> bool {
        self.partition.is_none_or(|p| p.includes(set, id))
    }
}

/// Partition `index` of `count` (0-based): a clip belongs to the partition
/// given by a stable hash of its set and id, so reruns never move clips.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct Partition {
    /// 0-based partition index.
    pub index: u32,
    /// Number of partitions.
    pub count: u32,
}

impl Partition {
    /// Whether clip `id` of `set` falls in this partition.
    pub fn includes(self, set: &str, id: &str) -> bool {
        partition_of(set, id, self.count) == self.index
    }
}

/// The partition (of `count`) that clip `id` of `set` belongs to: the first
/// eight bytes of sha256("set/id") modulo `count`.
pub fn partition_of(set: &str, id: &str, count: u32) -> u32 {
    use sha2::Digest;
    let digest = sha2::Sha256::digest(format!("{set}/{id}").as_bytes());
    let head = u64::from_be_bytes(digest[..8].try_into().expect("8 bytes"));
    (head % count.max(1) as u64) as u32
}

/// A clip and the content hashes of its file and sidecar.
#[derive(Debug, Clone, Serialize)]
pub struct FingerprintedClip {
    /// The clip.
    pub input: ClipInput,
    /// sha256 of the clip file (empty when unreadable).
    pub sha256: String,
    /// sha256 of the sidecar.
    pub sidecar_sha256: Option<String>,
}

/// Errors running the pipeline.
#[derive(Debug, thiserror::Error)]
pub enum RunError {
    /// The clip folders could not be listed.
    #[error(transparent)]
    Inputs(#[from] inputs::InputsError),
    /// A stage failed.
    #[error("{stage} stage failed")]
    Stage {
        /// Which stage.
        stage: Stage,
        /// Why.
        #[source]
        source: Box<dyn std::error::Error + Send + Sync>,
    },
    /// A manifest could not be read or written.
    #[error("manifest {path}: {source}")]
    Manifest {
        /// The file.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// The stage is not part of this build yet.
    #[error("the {0} stage is not available in this build yet")]
    NotBuilt(Stage),
}

/// What happened to one stage in a run.
#[derive(Debug, Clone, Serialize)]
pub struct StageOutcome {
    /// The stage.
    pub stage: Stage,
    /// True when its manifest already matched and nothing ran.
    pub skipped: bool,
    /// Seconds spent.
    pub seconds: f64,
}

/// Options of one `run`.
#[derive(Debug, Clone)]
pub struct RunOptions {
    /// Last stage to run (inclusive).
    pub until: Stage,
    /// Worker threads.
    pub threads: usize,
}

/// Runs (or resumes) the stages of `spec` up to `opts.until`.
pub fn run(spec: &Spec, opts: &RunOptions) -> Result<Vec<StageOutcome>, RunError> {
    let threads = opts.threads.max(1);
    let clips = fingerprint(&inputs::list_all(spec)?, threads, &spec.out);
    let mut outcomes = Vec::new();
    let mut previous_key = String::new();
    for stage in Stage::ALL.into_iter().filter(|s| *s <= opts.until) {
        let settings_hash = settings_hash(spec, stage);
        let key = stage_key(stage, &settings_hash, &previous_key, &clips);
        let existing =
            StageManifest::read(&spec.out, stage.name()).map_err(|source| RunError::Manifest {
                path: StageManifest::path(&spec.out, stage.name()),
                source,
            })?;
        let started = Instant::now();
        if existing.as_ref().is_some_and(|m| m.key == key) {
            eprintln!("{stage}: up to date, skipped");
            outcomes.push(StageOutcome {
                stage,
                skipped: true,
                seconds: 0.0,
            });
            previous_key = key;
            continue;
        }
        eprintln!("{stage}: running");
        let ctx = StageContext {
            spec,
            run_dir: spec.out.clone(),
            stage_dir: spec.out.join(stage.name()),
            threads,
            key: key.clone(),
            settings_hash: settings_hash.clone(),
            clips: &clips,
            partition: None,
        };
        std::fs::create_dir_all(&ctx.stage_dir).map_err(|source| RunError::Manifest {
            path: ctx.stage_dir.clone(),
            source,
        })?;
        let mut manifest = run_stage(stage, &ctx)?;
        manifest.stage = stage.name().to_string();
        manifest.tool_version = crate::VERSION.to_string();
        manifest.key = key.clone();
        manifest.settings_hash = settings_hash;
        // The spec's text hash and path, for `inspect` and the report.
        manifest
            .inputs
            .insert("spec".into(), spec.text_hash.clone());
        manifest
            .inputs
            .insert("spec-path".into(), spec.path.display().to_string());
        if !previous_key.is_empty() {
            manifest.inputs.insert(
                format!("{}-stage-key", stage.previous().map_or("", Stage::name)),
                previous_key.clone(),
            );
        }
        let seconds = started.elapsed().as_secs_f64();
        manifest.timings.insert("total_s".into(), seconds);
        manifest
            .write(&spec.out)
            .map_err(|source| RunError::Manifest {
                path: StageManifest::path(&spec.out, stage.name()),
                source,
            })?;
        eprintln!("{stage}: done in {seconds:.1} s");
        outcomes.push(StageOutcome {
            stage,
            skipped: false,
            seconds,
        });
        previous_key = key;
    }
    Ok(outcomes)
}

/// Runs one stage's code for `ctx` (no skipping, no manifest written); also
/// used by [`crate::cluster`] for one part of a partitioned stage.
pub fn run_stage(stage: Stage, ctx: &StageContext<'_>) -> Result<StageManifest, RunError> {
    let boxed = |e: Box<dyn std::error::Error + Send + Sync>| RunError::Stage { stage, source: e };
    match stage {
        Stage::Decode => crate::decode::run_stage(ctx).map_err(|e| boxed(Box::new(e))),
        Stage::Align => crate::align::run_stage(ctx).map_err(|e| boxed(Box::new(e))),
        Stage::Fit => crate::fit::run_stage(ctx).map_err(|e| boxed(Box::new(e))),
        Stage::Label => crate::label::run_stage(ctx).map_err(|e| boxed(Box::new(e))),
        Stage::Shard => crate::shard::run_stage(ctx).map_err(|e| boxed(Box::new(e))),
    }
}

/// Content hashes of every clip and sidecar, computed in parallel. Hashes of
/// local files are remembered in `run_dir` (see [`crate::clip_hashes`]), so
/// an unchanged file is read once, not on every run, part and merge.
pub fn fingerprint(clips: &[ClipInput], threads: usize, run_dir: &Path) -> Vec<FingerprintedClip> {
    let hashes = ClipHashes::open(run_dir);
    let out = util::thread_pool(threads).install(|| {
        clips
            .par_iter()
            .map(|c| FingerprintedClip {
                input: c.clone(),
                sha256: content_hash(&hashes, &c.path).unwrap_or_default(),
                sidecar_sha256: c.sidecar.as_deref().and_then(|p| content_hash(&hashes, p)),
            })
            .collect()
    });
    if let Err(e) = hashes.save() {
        // Only a speed-up is lost: the next run reads the clips again.
        eprintln!(
            "warning: cannot remember clip hashes in {}: {e}",
            run_dir.join(crate::clip_hashes::FILE_NAME).display()
        );
    }
    out
}

/// sha256 of a local file, or the listing fingerprint of an object store URL
/// (see [`crate::storage`]).
fn content_hash(hashes: &ClipHashes, path: &Path) -> Option<String> {
    if crate::storage::path_is_url(path) {
        crate::storage::fingerprint(&path.to_string_lossy())
    } else {
        hashes.sha256(path).ok()
    }
}

/// Hash of the settings that shape `stage`'s output.
pub fn settings_hash(spec: &Spec, stage: Stage) -> String {
    #[derive(Serialize)]
    struct Sets<'a> {
        name: &'a str,
        labelled: bool,
    }
    let sets: Vec<Sets> = spec
        .sets
        .iter()
        .map(|s| Sets {
            name: &s.name,
            labelled: s.labelled,
        })
        .collect();
    match stage {
        Stage::Decode => util::sha256_json(&(stage, &spec.decode, &spec.actions, &sets)),
        Stage::Align => util::sha256_json(&(stage, &spec.align, &spec.actions, spec.seed)),
        Stage::Fit => {
            let truths: Vec<_> = spec.sets.iter().map(|s| &s.eval_truth).collect();
            util::sha256_json(&(stage, &spec.fit, spec.seed, truths))
        }
        // The shard stage's image encoding too: with PNG images, label also
        // writes each clip's frames as PNG (see `crate::store::png_frames`).
        Stage::Label => util::sha256_json(&(stage, &spec.label, spec.seed, &spec.shard.image)),
        Stage::Shard => util::sha256_json(&(stage, &spec.shard, spec.seed)),
    }
}

/// The key of `stage` from its settings hash, the previous stage's key and
/// (for decode) every clip's fingerprints.
pub fn stage_key(
    stage: Stage,
    settings: &str,
    previous: &str,
    clips: &[FingerprintedClip],
) -> String {
    let inputs: Vec<(&str, &str, &str, Option<&str>)> = if stage == Stage::Decode {
        clips
            .iter()
            .map(|c| {
                (
                    c.input.set.as_str(),
                    c.input.id.as_str(),
                    c.sha256.as_str(),
                    c.sidecar_sha256.as_deref(),
                )
            })
            .collect()
    } else {
        Vec::new()
    };
    util::sha256_json(&(stage, settings, previous, inputs))
}

/// `RUN/<stage>/` for a run folder.
pub fn stage_dir(run_dir: &Path, stage: Stage) -> PathBuf {
    run_dir.join(stage.name())
}
