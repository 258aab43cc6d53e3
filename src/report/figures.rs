//! The figures of a run, gathered once from `RUN/` and shared by `inspect`
//! (text and `--json`) and the HTML report, so the two always agree.
//!
//! Every stage section is a [`Section`]: the stage's figures, or a note that
//! says why they are missing (the stage has not run, or its files could not
//! be read). Gathering never fails because one stage's output is absent or
//! damaged; the section says so instead.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

/// A stage section: its figures, or why there are none.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "status", content = "figures", rename_all = "lowercase")]
pub enum Section<T> {
    /// The stage's output was read.
    Ok(T),
    /// The stage's output is absent or unreadable.
    Missing(String),
}

impl<T> Section<T> {
    /// The figures, when present.
    pub fn get(&self) -> Option<&T> {
        match self {
            Section::Ok(t) => Some(t),
            Section::Missing(_) => None,
        }
    }
}

/// Where the run's spec came from.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SpecRef {
    /// The spec file as recorded by the run (may be absent in older runs).
    pub path: Option<String>,
    /// sha256 of the spec text.
    pub sha256: Option<String>,
}

/// One row of the stage table.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StageRow {
    /// Stage name.
    pub stage: String,
    /// Whether `RUN/<stage>/manifest.json` exists and parsed.
    pub present: bool,
    /// Version of actuary that wrote it.
    pub tool_version: Option<String>,
    /// Stage key (first 12 hex digits).
    pub key: Option<String>,
    /// Timings in seconds (`total_s` and the stage's own).
    pub timings: BTreeMap<String, f64>,
    /// The manifest's counts.
    pub counts: BTreeMap<String, u64>,
    /// Why it is missing or unreadable.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
}

/// Every figure of a run.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RunFigures {
    /// The run folder.
    pub run: String,
    /// Version of actuary that gathered these figures.
    pub tool_version: String,
    /// The spec, as recorded by the stages.
    pub spec: SpecRef,
    /// One row per stage, in pipeline order.
    pub stages: Vec<StageRow>,
    /// The cautions shown with every report.
    pub cautions: Vec<String>,
    /// Decode figures.
    pub decode: Section<DecodeFigures>,
    /// Align figures.
    pub align: Section<AlignFigures>,
    /// Fit figures.
    pub fit: Section<FitFigures>,
    /// Label figures.
    pub label: Section<LabelFigures>,
    /// Shard figures.
    pub shard: Section<ShardFigures>,
}

/// Clips and frames of one set.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SetCount {
    /// Set name.
    pub set: String,
    /// Whether the set has recorded actions.
    pub labelled: bool,
    /// Decoded clips.
    pub clips: u64,
    /// Decoded frames at the output fps.
    pub frames: u64,
    /// Clips the decode stage skipped.
    pub skipped: u64,
}

/// A clip the decode stage skipped.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SkippedClip {
    /// Set.
    pub set: String,
    /// Clip id.
    pub id: String,
    /// Why.
    pub reason: String,
}

/// One decoded clip's source and resampling figures.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DecodedClip {
    /// Set.
    pub set: String,
    /// Clip id.
    pub id: String,
    /// Output frames.
    pub frames: u32,
    /// Container (file extension) and codec, e.g. `mp4/h264`.
    pub format: String,
    /// Source fps.
    pub source_fps: f64,
    /// Source width x height (coded).
    pub source_size: String,
    /// Source duration in seconds.
    pub duration_s: f64,
    /// Source frames dropped by the resampling.
    pub dropped: u64,
    /// Output frames repeating a source frame.
    pub repeated: u64,
    /// Colour matrix / range used, with `?` when guessed (untagged clip).
    pub colour: String,
}

/// Decode stage figures.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DecodeFigures {
    /// Output fps.
    pub fps: Option<f64>,
    /// Output width and height.
    pub size: Option<(u32, u32)>,
    /// Per set.
    pub sets: Vec<SetCount>,
    /// Clips per source format.
    pub formats: BTreeMap<String, u64>,
    /// Source frames dropped, all clips.
    pub dropped: u64,
    /// Output frames repeated, all clips.
    pub repeated: u64,
    /// Every decoded clip.
    pub clips: Vec<DecodedClip>,
    /// Skipped clips with reasons.
    pub skipped: Vec<SkippedClip>,
    /// Clip records that could not be read.
    pub unreadable: Vec<String>,
}

/// One set's align figures (the fields of the align stage's per-set summary
/// the report shows; unknown fields are ignored, missing ones default).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(default)]
pub struct AlignSet {
    /// Set name.
    pub name: String,
    /// Whether labelled.
    pub labelled: bool,
    /// Clips.
    pub clips: u64,
    /// Decoded frames.
    pub frames: u64,
    /// Model-time frames.
    pub model_frames: u64,
    /// Motion rate before, pixels per decode frame.
    pub motion_rate_before: Option<f64>,
    /// Motion rate after (model time).
    pub motion_rate_after: Option<f64>,
    /// Model frames per decode frame interval.
    pub speed_factor: f64,
    /// CIELAB histograms before.
    pub histogram_before: Option<crate::align::color::LabHistogram>,
    /// CIELAB histograms after.
    pub histogram_after: Option<crate::align::color::LabHistogram>,
    /// Gap figure against the labelled frames, before.
    pub gap_before: Option<f64>,
    /// After.
    pub gap_after: Option<f64>,
}

/// One labelled clip's clock offset.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(default)]
pub struct AlignOffset {
    /// Set.
    pub set: String,
    /// Clip id.
    pub id: String,
    /// Offset applied, seconds.
    pub offset_s: f64,
    /// Lag with the highest correlation, seconds.
    pub estimated_s: f64,
    /// Its Pearson correlation.
    pub correlation: f64,
    /// Whether it was trusted.
    pub trusted: bool,
}

/// Align stage figures (read from the align stage's manifest summary).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(default)]
pub struct AlignFigures {
    /// What the gap figure measures.
    pub gap_method: String,
    /// Pooled unlabelled vs labelled gap, before.
    pub gap_before: Option<f64>,
    /// After.
    pub gap_after: Option<f64>,
    /// Labelled motion rate, pixels per frame.
    pub labelled_motion_rate: Option<f64>,
    /// Unlabelled motion rate.
    pub unlabelled_motion_rate: Option<f64>,
    /// Unlabelled / labelled.
    pub motion_ratio: Option<f64>,
    /// Which domain was resampled.
    pub resampled: Option<String>,
    /// Per set.
    pub sets: Vec<AlignSet>,
    /// Per labelled clip (with estimated offsets).
    pub offsets: Vec<AlignOffset>,
}

/// One column of the training log.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LogSeries {
    /// Column name.
    pub name: String,
    /// Value at the last logged step.
    pub last: Option<f64>,
}

/// One row of the comparison table (a model on an evaluation set).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ComparisonRow {
    /// The model (`semi-supervised`, `labelled-only`, `train mean`...).
    pub model: String,
    /// The evaluation set (`holdout`, a truth set...).
    pub eval: String,
    /// Per action dimension: figure name -> value (`r2`, `mae`, `nll`).
    pub dims: BTreeMap<String, BTreeMap<String, f64>>,
}

/// Estimated against recorded action on holdout clips, one dimension.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HoldoutDim {
    /// Dimension name.
    pub dim: String,
    /// Transitions compared.
    pub n: u64,
    /// Coefficient of determination.
    pub r2: Option<f64>,
    /// Mean absolute error, action units.
    pub mae: Option<f64>,
}

/// Fit stage figures.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FitFigures {
    /// The training log file (relative to `RUN/fit/`).
    pub log_file: Option<String>,
    /// Logged steps.
    pub log_rows: u64,
    /// Logged columns and their last values.
    pub log_columns: Vec<LogSeries>,
    /// The comparison table.
    pub comparison: Vec<ComparisonRow>,
    /// Whether an evaluation truth folder was used.
    pub eval_truth_used: Option<bool>,
    /// Estimated vs recorded on holdout clips (from the label stage's estimates).
    pub holdout: Vec<HoldoutDim>,
    /// The fit manifest's summary, as written.
    pub summary: serde_json::Value,
}

/// One set's label figures.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LabelSet {
    /// Set.
    pub set: String,
    /// Whether labelled.
    pub labelled: bool,
    /// Clips.
    pub clips: u64,
    /// Transitions.
    pub transitions: u64,
    /// Mean confidence.
    pub mean_confidence: Option<f64>,
    /// Share of transitions flagged out of distribution.
    pub ood_share: Option<f64>,
    /// Confidence histogram: counts in 10 equal bins over [0, 1].
    pub confidence_hist: Vec<u64>,
    /// Clips that move more than every calib clip in some dimension
    /// (`crate::label::motion_range`).
    #[serde(default)]
    pub beyond_calib_range: u64,
}

/// Coverage of one dimension's interval.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CoverageDim {
    /// Dimension.
    pub dim: String,
    /// Holdout coverage.
    pub holdout: Option<f64>,
    /// Calib coverage.
    pub calib: f64,
    /// Conformal quantile (none when not finite: too few calib points).
    pub quantile: Option<f64>,
    /// Holdout coverage on the clips inside the calib clips' motion range.
    #[serde(default)]
    pub holdout_in_range: Option<f64>,
}

/// A code's use.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CodeUse {
    /// Code.
    pub code: u16,
    /// Transitions with it.
    pub count: u64,
    /// Of which labelled.
    pub count_labelled: u64,
    /// Mean inferred action.
    pub mean_action: Vec<f64>,
}

/// A transition shown in a picture.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FrameRef {
    /// Set.
    pub set: String,
    /// Clip.
    pub id: String,
    /// Frame index (the transition from it to the next frame).
    pub frame: u32,
    /// Inferred action.
    pub action_est: Vec<f64>,
    /// Confidence.
    pub confidence: f64,
    /// Out of distribution.
    pub ood: bool,
}

/// An unlabelled clip ranked by mean confidence.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ClipConfidence {
    /// Set.
    pub set: String,
    /// Clip.
    pub id: String,
    /// Transitions.
    pub transitions: u64,
    /// Mean confidence.
    pub mean_confidence: f64,
    /// Share flagged out of distribution.
    pub ood_share: f64,
}

/// Label stage figures.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LabelFigures {
    /// Action dimension names.
    pub dims: Vec<String>,
    /// Miscoverage rate.
    pub alpha: f64,
    /// Nominal coverage `1 - alpha`.
    pub nominal_coverage: f64,
    /// Per-dimension coverage.
    pub coverage: Vec<CoverageDim>,
    /// How confidence was calibrated.
    pub confidence_method: String,
    /// Reliability of confidence on holdout clips.
    pub reliability: crate::label::reliability::Reliability,
    /// Holdout share flagged out of distribution.
    pub holdout_ood_share: Option<f64>,
    /// Per dimension, the largest mean |action_est| of a calib clip.
    #[serde(default)]
    pub calib_motion_range: Vec<f64>,
    /// Holdout clips beyond that range.
    #[serde(default)]
    pub holdout_beyond_range: Vec<String>,
    /// Per set.
    pub sets: Vec<LabelSet>,
    /// Every code, by code number.
    pub codes: Vec<CodeUse>,
    /// For the most-used codes: example transitions.
    pub code_examples: Vec<(u16, Vec<FrameRef>)>,
    /// Contact sheet of unlabelled transitions.
    pub contact_sheet: Vec<FrameRef>,
    /// Unlabelled clips with the lowest mean confidence, lowest first.
    pub lowest_confidence: Vec<ClipConfidence>,
    /// Clips whose labels could not be read.
    pub unreadable: Vec<String>,
}

/// One shard file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShardFile {
    /// File name inside `RUN/shard/`.
    pub file: String,
    /// Size in bytes on disk (none when missing).
    pub bytes: Option<u64>,
    /// Rows according to the manifest.
    pub rows: Option<u64>,
    /// Rows according to the file's Parquet footer.
    pub footer_rows: Option<u64>,
    /// sha256 from the manifest.
    pub sha256: Option<String>,
    /// Whether re-hashing matched (none when not verified).
    pub verified: Option<bool>,
}

/// Shard stage figures.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShardFigures {
    /// The files.
    pub files: Vec<ShardFile>,
    /// Rows in all (manifest).
    pub rows: u64,
    /// Bytes in all (disk).
    pub bytes: u64,
    /// Whether every file was re-hashed.
    pub verified: bool,
    /// Every re-hashed file matched, every row count agreed.
    pub all_ok: Option<bool>,
    /// Column names of the schema (from the first file's footer).
    pub columns: Vec<String>,
    /// Rows per clip set (manifest).
    pub rows_per_set: BTreeMap<String, u64>,
    /// Files in `RUN/shard/` that are neither listed shards nor the manifest.
    pub extra_files: Vec<String>,
}
