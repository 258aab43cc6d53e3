//! Scale-out on a Slurm cluster: the map stages (decode, label) run as N
//! independent parts ([`parts`]), a merge folds the parts' manifests into the
//! stage manifest, and [`sbatch`] writes and submits the chained job scripts.
//!
//! A clip belongs to part `K` of `N` by a stable hash of its set and id
//! ([`crate::runner::partition_of`]), so a rerun never moves clips. A part
//! writes only its own clips' outputs and `RUN/<stage>/parts/K-of-N.json`
//! (atomically); the merge refuses when a part is missing or was made from
//! other settings or inputs, and records the same stage key a single-machine
//! run records, so later `run` calls skip the stage. `RUN` must be on a
//! filesystem every node shares.

pub mod parts;
pub mod sbatch;

pub use parts::{
    MergeOutcome, PartManifest, PartOutcome, merge, merge_if_complete, parse_part, run_part,
};
pub use sbatch::{JobPlan, SubmitOptions, SubmitReport, plan, submit};

use std::path::PathBuf;

use crate::runner::Stage;

/// Errors of partitioned runs, merges and submission.
#[derive(Debug, thiserror::Error)]
pub enum ClusterError {
    /// The stage cannot run as parts.
    #[error("the {0} stage does not run in parts (only decode and label do)")]
    NotPartitioned(Stage),
    /// `K/N` did not parse or is out of range.
    #[error("bad part `{0}`: expected K/N with 0 <= K < N, e.g. 0/4")]
    BadPart(String),
    /// The previous stage has not finished with the current settings.
    #[error(
        "the {stage} stage needs the {previous} stage finished first ({path} is missing or was made from other settings or inputs)"
    )]
    PreviousMissing {
        /// The stage to run.
        stage: Stage,
        /// The stage it needs.
        previous: Stage,
        /// Its manifest.
        path: PathBuf,
    },
    /// Some parts have not finished.
    #[error("cannot merge the {stage} stage: part(s) {} of {count} missing in {dir} (rerun them with `actuary run SPEC --stage {stage} --part K/{count}`)", missing.iter().map(|k| k.to_string()).collect::<Vec<_>>().join(", "))]
    PartsMissing {
        /// The stage.
        stage: Stage,
        /// Missing part indices.
        missing: Vec<u32>,
        /// Number of parts.
        count: u32,
        /// `RUN/<stage>/parts/`.
        dir: PathBuf,
    },
    /// A part was made from other settings or inputs.
    #[error(
        "cannot merge the {stage} stage: {path} was made from other settings or inputs (key {found}, expected {expected}); rerun that part"
    )]
    PartStale {
        /// The stage.
        stage: Stage,
        /// The part manifest.
        path: PathBuf,
        /// Its key.
        found: String,
        /// The current key.
        expected: String,
    },
    /// A part failed on purpose (the `ACTUARY_FAIL_PART` test hook).
    #[error("part {0} failed on purpose: ACTUARY_FAIL_PART={0} is set")]
    FailedOnPurpose(u32),
    /// The pipeline itself failed.
    #[error(transparent)]
    Run(#[from] crate::runner::RunError),
    /// Listing the inputs failed.
    #[error(transparent)]
    Inputs(#[from] crate::inputs::InputsError),
    /// A file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// `sbatch` could not be run or refused a script.
    #[error("sbatch {script}: {reason}")]
    Sbatch {
        /// The script.
        script: PathBuf,
        /// What went wrong (sbatch's stderr).
        reason: String,
    },
}

/// The stages that run in parts.
pub const PARTITIONED: [Stage; 2] = [Stage::Decode, Stage::Label];

/// Whether `stage` runs in parts on a cluster.
pub fn is_partitioned(stage: Stage) -> bool {
    PARTITIONED.contains(&stage)
}

pub(crate) fn io_err(path: &std::path::Path) -> impl FnOnce(std::io::Error) -> ClusterError + '_ {
    move |source| ClusterError::Io {
        path: path.to_path_buf(),
        source,
    }
}
