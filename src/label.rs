//! The label stage: for every transition of every decoded clip, an inferred
//! action (`action_est`, the ensemble mean in action units), a calibrated
//! per-dimension standard deviation (`action_std`: aleatoric + epistemic,
//! then split conformal on the `calib` clips, stored as `q * std / z`), a
//! calibrated `confidence`, an `ood` flag and a discrete `code`.
//!
//! Data flow: `RUN/decode/clips/**` (records with recorded actions; frames
//! read through the align stage's model-time view, [`crate::align::AlignedRun`],
//! as the fit stage trains and evaluates on them) and the fit stage's model
//! and clip splits ([`model::FitOutputs`]) in; `RUN/label/` out (see
//! [`output`]), one row per decode transition: model-time outputs are mapped
//! back with the `[actions]` rules ([`stage::decode_grid`]). The maths lives
//! in [`conformal`], [`reliability`], [`kmeans`] and [`stats`]; [`stage`] runs
//! the two passes.

pub mod conformal;
pub mod fitted;
pub mod kmeans;
pub mod model;
pub mod motion_range;
pub mod output;
pub mod reliability;
pub mod stage;
pub mod stats;

use std::path::PathBuf;

use serde::Serialize;

pub use model::{FitOutputs, Split, Splits, Standardisation, TransitionBatch, TransitionModel};
pub use output::{CalibrationFigures, ClipLabels, CodesTable};
pub use stage::{LabelJob, LabelSummary, label_run};

/// Default miscoverage rate of the calibrated intervals.
pub const DEFAULT_ALPHA: f64 = 0.1;
/// Default error tolerance, as a fraction of each dimension's labelled std.
pub const DEFAULT_TOLERANCE: f64 = 0.25;
/// Default number of discrete action codes.
pub const DEFAULT_CODES: u32 = 16;
/// Default most train transitions k-means is fitted on.
pub const DEFAULT_KMEANS_SAMPLE: u32 = 20_000;
/// Default k-means++ restarts.
pub const DEFAULT_KMEANS_RESTARTS: u32 = 10;
/// Default most Lloyd iterations per restart.
pub const DEFAULT_KMEANS_ITERATIONS: u32 = 300;
/// Default transitions per inference batch.
pub const DEFAULT_BATCH: u32 = 256;
/// Equal-width bins of the reliability figures (expected calibration error).
pub const RELIABILITY_BINS: usize = 10;

/// Resolved `[label]` settings.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct LabelOptions {
    /// Miscoverage rate: `action_est +- z * action_std` covers 1 - alpha.
    pub alpha: f64,
    /// Tolerance of `confidence`, as a fraction of each dimension's labelled std.
    pub tolerance: f64,
    /// Number of codes (k of k-means).
    pub codes: u32,
    /// Most train transitions k-means is fitted on (a seeded sample beyond).
    pub kmeans_sample: u32,
    /// k-means++ restarts.
    pub kmeans_restarts: u32,
    /// Most Lloyd iterations per restart.
    pub kmeans_iterations: u32,
    /// Transitions per inference batch.
    pub batch: u32,
}

impl Default for LabelOptions {
    fn default() -> Self {
        Self {
            alpha: DEFAULT_ALPHA,
            tolerance: DEFAULT_TOLERANCE,
            codes: DEFAULT_CODES,
            kmeans_sample: DEFAULT_KMEANS_SAMPLE,
            kmeans_restarts: DEFAULT_KMEANS_RESTARTS,
            kmeans_iterations: DEFAULT_KMEANS_ITERATIONS,
            batch: DEFAULT_BATCH,
        }
    }
}

/// Errors of the label stage.
#[derive(Debug, thiserror::Error)]
pub enum LabelError {
    /// A file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file or folder.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// A decoded clip's frames could not be read.
    #[error(transparent)]
    Frames(#[from] crate::store::FrameStoreError),
    /// A clip's PNG frame store could not be written.
    #[error(transparent)]
    PngFrames(#[from] crate::store::png_frames::PngStoreError),
    /// The align stage's view could not be opened, read or mapped back.
    #[error(transparent)]
    Align(#[from] crate::align::AlignError),
    /// A decoded clip is missing from the align stage's view.
    #[error("clip {set}/{id} is decoded but not in the aligned view ({})", path.display())]
    NotAligned {
        /// `RUN/align/alignment.json`.
        path: PathBuf,
        /// Set.
        set: String,
        /// Clip id.
        id: String,
    },
    /// The frame store (as the aligned view opened it) and the clip record disagree.
    #[error("frame store {path} holds {store} frames, its record says {record}")]
    FrameCount {
        /// The frame store.
        path: PathBuf,
        /// Frames in the record.
        record: u32,
        /// Frames in the store.
        store: usize,
    },
    /// The fit stage's outputs are not there or cannot be loaded.
    #[error("cannot load the fitted model from {dir}: {reason}")]
    FitUnavailable {
        /// `RUN/fit/`.
        dir: PathBuf,
        /// Why.
        reason: String,
    },
    /// The model failed on a batch.
    #[error(
        "model inference failed on clip {set}/{id} at model-time transition {first_transition}"
    )]
    Model {
        /// Set.
        set: String,
        /// Clip id.
        id: String,
        /// First model-time transition of the batch (the decode transition
        /// when the clip is not resampled).
        first_transition: usize,
        /// The cause.
        #[source]
        source: model::ModelFailure,
    },
    /// The model returned the wrong number of values.
    #[error("model output for clip {set}/{id}: {reason}")]
    ModelOutput {
        /// Set.
        set: String,
        /// Clip id.
        id: String,
        /// What is wrong.
        reason: String,
    },
    /// A labelled clip has no (or the wrong number of) recorded actions.
    #[error("labelled clip {set}/{id} has {rows} action rows for {transitions} transitions")]
    MissingActions {
        /// Set.
        set: String,
        /// Clip id.
        id: String,
        /// Rows found.
        rows: usize,
        /// Transitions of the clip.
        transitions: usize,
    },
    /// Too few calibration transitions for a finite conformal quantile.
    #[error("calib clips hold {transitions} transitions; alpha {alpha} needs at least {needed}")]
    TooFewCalib {
        /// Calib transitions.
        transitions: usize,
        /// Needed.
        needed: usize,
        /// Alpha.
        alpha: f64,
    },
    /// k-means could not be fitted.
    #[error("fitting the action codes: {0}")]
    KMeans(#[from] kmeans::KMeansError),
}

/// Loads the fit stage's model and splits from `RUN/fit/` (the one place
/// label depends on fit's API).
pub fn load_fit(run_dir: &std::path::Path) -> Result<FitOutputs, LabelError> {
    fitted::load_fit_outputs(run_dir)
}

/// Runs the label stage.
pub fn run_stage(
    ctx: &crate::runner::StageContext<'_>,
) -> Result<crate::store::StageManifest, LabelError> {
    let fit = load_fit(&ctx.run_dir)?;
    // The same view the fit stage trained and evaluated on.
    let view = crate::align::AlignedRun::open_or_passthrough(&ctx.run_dir, &ctx.spec.actions)?;
    let job = LabelJob {
        run_dir: &ctx.run_dir,
        label_dir: &ctx.stage_dir,
        key: &ctx.key,
        opts: &ctx.spec.label,
        seed: ctx.spec.seed,
        threads: ctx.threads,
        frame_pngs: ctx.spec.shard.image == crate::shard::ImageEncoding::Png,
    };
    // A part of a partitioned run labels only its own clips (see `crate::cluster`).
    let include = |set: &str, id: &str| ctx.includes(set, id);
    let part: Option<stage::PartFilter<'_>> =
        ctx.partition.map(|_| &include as stage::PartFilter<'_>);
    let summary = stage::label_run_part(&job, &fit, &view, part)?;
    Ok(manifest_of(&summary))
}

/// The stage manifest of a label run (the runner fills key and timings).
pub fn manifest_of(summary: &LabelSummary) -> crate::store::StageManifest {
    let mut m = crate::store::StageManifest::default();
    m.counts.insert(
        "clips".into(),
        summary.clips_labelled + summary.clips_reused,
    );
    m.counts.insert("clips_reused".into(), summary.clips_reused);
    m.counts.insert("transitions".into(), summary.transitions);
    m.counts
        .insert("transitions_inferred".into(), summary.transitions_inferred);
    m.counts.insert("codes_used".into(), summary.codes_used);
    m.timings.insert("fit_pass_s".into(), summary.seconds.0);
    m.timings.insert("label_pass_s".into(), summary.seconds.1);
    m.summary = serde_json::to_value(summary).unwrap_or_default();
    m
}

/// One line per clip set with clips beyond the calib clips' motion range
/// ([`motion_range`]), read from the label stage's manifest under `run_dir`;
/// none when the stage has not run or every clip lies inside the range.
pub fn motion_range_notes(run_dir: &std::path::Path) -> Vec<String> {
    let sets: std::collections::BTreeMap<String, stage::SetSummary> =
        crate::store::StageManifest::read(run_dir, "label")
            .ok()
            .flatten()
            .and_then(|m| m.summary.get("sets").cloned())
            .and_then(|v| serde_json::from_value(v).ok())
            .unwrap_or_default();
    sets.iter()
        .filter(|(_, s)| s.beyond_calib_range > 0)
        .map(|(name, s)| {
            format!(
                "label: {} of {} `{name}` clips move more than every calibration clip in some action dimension; their intervals may cover less than nominal (actuary inspect {} label)",
                s.beyond_calib_range,
                s.clips,
                run_dir.display()
            )
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn motion_range_notes_name_the_sets_with_clips_beyond() {
        let dir = tempfile::tempdir().unwrap();
        assert!(
            motion_range_notes(dir.path()).is_empty(),
            "no label stage yet"
        );
        let sets = std::collections::BTreeMap::from([
            (
                "human".to_string(),
                stage::SetSummary {
                    clips: 12,
                    beyond_calib_range: 5,
                    ..Default::default()
                },
            ),
            (
                "robot".to_string(),
                stage::SetSummary {
                    clips: 4,
                    ..Default::default()
                },
            ),
        ]);
        let mut m = crate::store::StageManifest {
            stage: "label".into(),
            ..Default::default()
        };
        m.summary = serde_json::json!({ "sets": sets });
        m.write(dir.path()).unwrap();
        let notes = motion_range_notes(dir.path());
        assert_eq!(notes.len(), 1, "{notes:?}");
        assert!(
            notes[0].starts_with("label: 5 of 12 `human` clips"),
            "{}",
            notes[0]
        );
    }
}
