//! The decode stage: probe each clip, decode it with FFmpeg, resample to the
//! spec fps by presentation timestamps, honour rotation, convert colour with the
//! clip's own matrix and range, crop and resize, and stream the frames into the
//! frame store (see [`crate::store::frames`]). FFmpeg types never leave
//! this module's private files (`probe`, `convert`, [`video`]); [`stage`] runs
//! the stage over every clip.

mod commit;
mod convert;
mod error;
mod probe;
pub mod stage;
pub mod video;

pub use convert::cli_flags;
pub use probe::{check_limits, probe_checked, upright_size};
pub use stage::{
    ClipSummary, DecodeInspect, DecodeParams, DecodeStageError, DecodeSummary, decode_all, inspect,
    inspect_run, run_stage,
};
pub use video::{DecodeError, DecodeStats, decode_clip, probe};

use serde::{Deserialize, Serialize};

/// Default output fps.
pub const DEFAULT_FPS: f64 = 10.0;
/// Default output size (width, height).
pub const DEFAULT_SIZE: (u32, u32) = (64, 64);
/// Default largest accepted source width.
pub const DEFAULT_MAX_WIDTH: u32 = 4096;
/// Default largest accepted source height.
pub const DEFAULT_MAX_HEIGHT: u32 = 4096;
/// Default longest accepted clip duration in seconds.
pub const DEFAULT_MAX_DURATION_S: f64 = 4.0 * 3600.0;

/// How the source picture is fitted to the output aspect ratio.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Crop {
    /// Crop the largest centred region with the output aspect ratio.
    #[default]
    Center,
    /// Keep the whole picture and pad (black) to the output aspect ratio.
    None,
    /// A fixed box in upright source pixels.
    Box {
        /// Left edge.
        x: u32,
        /// Top edge.
        y: u32,
        /// Width.
        w: u32,
        /// Height.
        h: u32,
    },
}

/// The resampling filter used for resizing.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Scaler {
    /// Area averaging (best for downscaling; FFmpeg `area`).
    #[default]
    Area,
    /// Bilinear (FFmpeg `bilinear`).
    Bilinear,
    /// Bicubic (FFmpeg `bicubic`).
    Bicubic,
}

/// What to do with a clip that cannot be decoded.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum OnError {
    /// Report it, skip it and go on.
    #[default]
    Skip,
    /// Stop the run before writing anything under a final name.
    Stop,
}

/// Resolved decode settings (serde only for hashing and manifests).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DecodeOptions {
    /// Output frames per second.
    pub fps: f64,
    /// Output width.
    pub width: u32,
    /// Output height.
    pub height: u32,
    /// Aspect-ratio handling.
    pub crop: Crop,
    /// Resize filter.
    pub scaler: Scaler,
    /// Bad-clip policy.
    pub on_error: OnError,
    /// Largest accepted source width (after rotation); larger clips are refused.
    pub max_width: u32,
    /// Largest accepted source height (after rotation).
    pub max_height: u32,
    /// Longest accepted clip in seconds.
    pub max_duration_s: f64,
}

impl Default for DecodeOptions {
    fn default() -> Self {
        Self {
            fps: DEFAULT_FPS,
            width: DEFAULT_SIZE.0,
            height: DEFAULT_SIZE.1,
            crop: Crop::Center,
            scaler: Scaler::Area,
            on_error: OnError::Skip,
            max_width: DEFAULT_MAX_WIDTH,
            max_height: DEFAULT_MAX_HEIGHT,
            max_duration_s: DEFAULT_MAX_DURATION_S,
        }
    }
}
