//! The align stage: measure the gap between the labelled (robot) and unlabelled (human)
//! domains and reduce it for the model, and estimate action-log clock offsets.
//!
//! # Interface for the fit and label stages
//!
//! Later stages read decoded clips **through [`AlignedRun`]**, never the decode store
//! directly, so that colour normalisation, time resampling and re-mapped actions apply:
//!
//! ```ignore
//! use actuary::align::{AlignedRun, AlignedClip};
//! let run = AlignedRun::open_or_passthrough(&run_dir)?; // RUN/align/alignment.json, else identity view
//! for clip in run.clips() {                              // sorted by (set, id)
//!     let n = clip.len();                                // model-time frames
//!     let mut buf = vec![0u8; clip.frame_bytes()];       // width * height * 3, RGB8
//!     clip.frame(i, &mut buf)?;                          // colour-normalised, time-resampled frame i
//!     clip.actions();                                    // Option<&[Vec<f32>]>: n - 1 model-time transitions
//!                                                        // (labelled clips; re-mapped with the estimated offset)
//!     clip.decode_actions();                             // Option<&[Vec<f32>]>: decode-grid transitions
//!     clip.to_decode_grid(&est, run.rules())?;           // model-time per-transition values -> decode grid
//!     clip.to_decode_grid_std(&std, run.rules())?;       // the same for standard deviations (variances mapped)
//! }
//! ```
//!
//! - [`AlignedRun::open`] reads `RUN/align/alignment.json` (written by [`run_stage`]);
//!   [`AlignedRun::passthrough`] is the identity view over `RUN/decode/` (no colour change,
//!   no resampling, the decode stage's actions) for runs where align is not run.
//! - [`AlignedClip`] exposes `set`, `id`, `labelled`, `fps` (decode fps), `width`, `height`,
//!   `decode_len()` (decoded frames, = shard rows), `speed_factor()` (model frames per decode
//!   frame interval; 1 = identity), `position(i)` (decode-frame position of model frame `i`),
//!   `decode_frame(k)` (raw decoded RGB, as shards store it) and the calls above.
//! - Model-time frame `i` sits at decode position `p_i = min(i / f, n - 1)` (`f` = speed factor,
//!   `n` = decoded frames); a fractional position is a linear blend of its two neighbours
//!   (`resample = "blend"`) or the nearest frame (`resample = "nearest"`). Model transition `i`
//!   covers decode time `[p_i, p_{i+1}) / fps`; `to_decode_grid` maps a per-transition series on
//!   those intervals onto the decode transitions `[k, k+1) / fps` with the spec's hold / mean /
//!   sum rules ([`crate::actions::map_series`]), in the same units as the recorded actions.
//! - `run.action_dims()` and `run.rules()` give the action dimension names and one
//!   [`crate::actions::MapRule`] per dimension.
//!
//! # What the stage does
//!
//! 1. Photometric normalisation ([`color`]): CIELAB (D65) per-channel mean / standard deviation
//!    of the unlabelled frames matched to the pooled labelled statistics, per set or per clip,
//!    applied when a frame is read (no second copy unless `copy-frames = true`).
//! 2. Motion-speed normalisation ([`motion`]): each clip's motion rate is the median over frame
//!    pairs of the median block-matching displacement (pixels per frame, integer search refined
//!    by Lucas-Kanade steps) of its moving blocks; a
//!    set faster than the other domain by more than `speed-threshold` has its time base stretched
//!    by the ratio.
//! 3. Domain gap ([`gap`]): Fréchet distance between Gaussian fits of per-frame colour/texture
//!    features, before and after, plus CIELAB histograms and motion rates per set.
//! 4. Clock offsets ([`offset`]) for `[actions] offset = "estimate"`.

pub mod color;
pub mod gap;
pub mod linalg;
pub mod motion;
pub mod offset;
mod stage;
pub mod view;

use std::path::PathBuf;

use serde::{Deserialize, Serialize};

pub use offset::OffsetEstimate;
pub use stage::{ALIGNMENT_FILE, AlignSummary, align_run, inspect_text, run_stage};
pub use view::{AlignedClip, AlignedRun, Alignment, ClipAlignment};

/// Default photometric normalisation mode.
pub const DEFAULT_PHOTOMETRIC: Photometric = Photometric::PerSet;
/// Default motion-speed normalisation mode.
pub const DEFAULT_SPEED: Speed = Speed::Auto;
/// Default ratio between the two domains' motion rates above which the faster one is resampled.
pub const DEFAULT_SPEED_THRESHOLD: f64 = 1.15;
/// Default resampling of fractional frame positions.
pub const DEFAULT_RESAMPLE: Resample = Resample::Blend;
/// Default: no second copy of the frames.
pub const DEFAULT_COPY_FRAMES: bool = false;
/// Default number of frames sampled per set for statistics and the gap figure.
pub const DEFAULT_GAP_SAMPLE: u32 = 2000;

/// `[align] photometric`: where the colour statistics of unlabelled frames come from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Photometric {
    /// No colour change.
    Off,
    /// One transform per unlabelled set (pooled statistics).
    #[default]
    PerSet,
    /// One transform per unlabelled clip.
    PerClip,
}

/// `[align] speed`: motion-speed normalisation.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Speed {
    /// Measure and report motion rates, never resample.
    Off,
    /// Resample the faster domain when the ratio exceeds `speed-threshold`.
    #[default]
    Auto,
}

/// `[align] resample`: how a frame at a fractional decode position is made.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Resample {
    /// Linear blend of the two neighbouring decoded frames.
    #[default]
    Blend,
    /// The nearest decoded frame.
    Nearest,
}

/// Resolved `[align]` settings.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct AlignOptions {
    /// Photometric normalisation mode.
    pub photometric: Photometric,
    /// Motion-speed normalisation mode.
    pub speed: Speed,
    /// Motion-rate ratio (>= 1) above which the faster domain is resampled.
    pub speed_threshold: f64,
    /// Fractional-position resampling.
    pub resample: Resample,
    /// Write the aligned frames as a second frame store under `RUN/align/clips/`.
    pub copy_frames: bool,
    /// Frames sampled per set for colour statistics and the gap figure.
    pub gap_sample: u32,
    /// Labelled sets kept out of the pooled labelled statistics (motion rate,
    /// colour target, gap figure); from `[sets.NAME] held-out = true`.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub held_out_sets: Vec<String>,
}

impl Default for AlignOptions {
    fn default() -> Self {
        Self {
            photometric: DEFAULT_PHOTOMETRIC,
            speed: DEFAULT_SPEED,
            speed_threshold: DEFAULT_SPEED_THRESHOLD,
            resample: DEFAULT_RESAMPLE,
            copy_frames: DEFAULT_COPY_FRAMES,
            gap_sample: DEFAULT_GAP_SAMPLE,
            held_out_sets: Vec::new(),
        }
    }
}

/// Errors of the align stage and of the aligned view.
#[derive(Debug, thiserror::Error)]
pub enum AlignError {
    /// A file could not be read or written.
    #[error("align: {}: {source}", path.display())]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// A frame store could not be read or written.
    #[error(transparent)]
    Frames(#[from] crate::store::FrameStoreError),
    /// A sidecar could not be read or mapped.
    #[error("align: clip {set}/{id}: {source}")]
    Actions {
        /// Clip-set name.
        set: String,
        /// Clip id.
        id: String,
        /// The cause.
        #[source]
        source: Box<crate::actions::ActionsError>,
    },
    /// The decode stage has produced no clip.
    #[error("align: no decoded clips under {}", dir.display())]
    NoClips {
        /// `RUN/decode/clips`.
        dir: PathBuf,
    },
    /// Decoded clips of different frame sizes or rates.
    #[error(
        "align: clip {set}/{id} is {width}x{height} at {fps} fps, other clips are {want_width}x{want_height} at {want_fps} fps"
    )]
    Mismatch {
        /// Clip-set name.
        set: String,
        /// Clip id.
        id: String,
        /// Its width.
        width: u32,
        /// Its height.
        height: u32,
        /// Its fps.
        fps: f64,
        /// The first clip's width.
        want_width: u32,
        /// The first clip's height.
        want_height: u32,
        /// The first clip's fps.
        want_fps: f64,
    },
    /// A frame index out of range.
    #[error("align: clip {set}/{id}: frame {index} out of range ({len} model-time frames)")]
    FrameIndex {
        /// Clip-set name.
        set: String,
        /// Clip id.
        id: String,
        /// Requested index.
        index: usize,
        /// Model-time frames.
        len: usize,
    },
    /// A buffer of the wrong size.
    #[error("align: clip {set}/{id}: frame buffer has {got} bytes, expected {expected}")]
    BufferSize {
        /// Clip-set name.
        set: String,
        /// Clip id.
        id: String,
        /// Bytes given.
        got: usize,
        /// Bytes expected.
        expected: usize,
    },
    /// A model-time series of the wrong length.
    #[error("align: clip {set}/{id}: {got} model-time transitions given, expected {expected}")]
    SeriesLength {
        /// Clip-set name.
        set: String,
        /// Clip id.
        id: String,
        /// Rows given.
        got: usize,
        /// Rows expected.
        expected: usize,
    },
    /// The alignment file names a clip the decode store lacks.
    #[error("align: {} lists clip {set}/{id}, which the decode store lacks", path.display())]
    MissingClip {
        /// The alignment file.
        path: PathBuf,
        /// Clip-set name.
        set: String,
        /// Clip id.
        id: String,
    },
}

impl AlignError {
    pub(crate) fn io(path: &std::path::Path) -> impl FnOnce(std::io::Error) -> AlignError + '_ {
        move |source| AlignError::Io {
            path: path.to_path_buf(),
            source,
        }
    }
}
