//! Errors of the fit stage.

use std::path::PathBuf;

/// What can go wrong fitting or loading a model.
#[derive(Debug, thiserror::Error)]
pub enum FitError {
    /// The aligned view of the run could not be opened or read.
    #[error(transparent)]
    Align(#[from] crate::align::AlignError),
    /// An I/O error on the named file.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// A file the stage wrote or reads back is not what it should be.
    #[error("{path}: {reason}")]
    Corrupt {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        reason: String,
    },
    /// Too few labelled clips for the split fractions.
    #[error(
        "{labelled} labelled clip(s) cannot be split into train, calibration and holdout clips: \
         at least {needed} are needed with calib-fraction {calib} and holdout-fraction {holdout}"
    )]
    TooFewClips {
        /// Labelled clips available.
        labelled: usize,
        /// Clips needed.
        needed: usize,
        /// Calibration fraction.
        calib: f64,
        /// Holdout fraction.
        holdout: f64,
    },
    /// No labelled transitions (or no frames) to train on.
    #[error("no {what} to train on")]
    NoData {
        /// What is missing.
        what: &'static str,
    },
    /// Clips of different frame sizes or action dimensions.
    #[error("clip {set}/{id}: {reason}")]
    Inconsistent {
        /// Set.
        set: String,
        /// Clip id.
        id: String,
        /// What differs.
        reason: String,
    },
    /// A loss part became NaN or infinite.
    #[error(
        "model {model}: the {part} loss is {value} at step {step}; training stopped \
         (the last good checkpoint is kept; try a lower learning-rate)"
    )]
    NonFinite {
        /// Which model.
        model: String,
        /// 1-based step.
        step: u32,
        /// Loss part (`total`, `recon`, `kl`, `action`, `align`, `variance`).
        part: &'static str,
        /// Its value.
        value: f64,
    },
    /// A checkpoint made with other settings or another network shape.
    #[error(
        "checkpoint {path} was made with {what} (recorded {recorded}, now {current}); \
         it is not loaded: delete it to start this fit afresh"
    )]
    CheckpointMismatch {
        /// The checkpoint file.
        path: PathBuf,
        /// `different settings` or `a different network shape`.
        what: &'static str,
        /// Recorded hash.
        recorded: String,
        /// Current hash.
        current: String,
    },
    /// The network could not be built.
    #[error(transparent)]
    Model(#[from] crate::model::ModelError),
    /// A tensor operation failed.
    #[error("tensor operation failed: {0}")]
    Candle(#[from] candle_core::Error),
}

impl FitError {
    pub(crate) fn io(path: &std::path::Path) -> impl FnOnce(std::io::Error) -> FitError + '_ {
        move |source| FitError::Io {
            path: path.to_path_buf(),
            source,
        }
    }
}
