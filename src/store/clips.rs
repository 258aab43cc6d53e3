//! Per-clip records written by the decode stage next to each clip's frame
//! store, and the typed reader later stages use to list decoded clips.
//!
//! Layout under `RUN/decode/`: `clips/<set>/<clip-id>.frames` (see
//! [`super::frames`]) and `clips/<set>/<clip-id>.clip.json` (a [`ClipRecord`]).
//! The record is written last, atomically: a clip is done when its record exists.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

/// What FFmpeg said about the source file.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct SourceInfo {
    /// The clip file.
    pub path: PathBuf,
    /// Codec name, e.g. `h264`.
    pub codec: String,
    /// Coded width in pixels (before rotation).
    pub width: u32,
    /// Coded height in pixels (before rotation).
    pub height: u32,
    /// Average frame rate as reported by the container.
    pub fps: f64,
    /// Duration in seconds (last frame's end).
    pub duration_s: f64,
    /// Frames decoded from the source.
    pub frames: u64,
    /// Rotation applied to display the clip upright, in degrees clockwise (0, 90, 180, 270).
    pub rotation: i32,
    /// Colour matrix used for YUV to RGB (`bt601` or `bt709`; `rgb` for RGB sources).
    pub matrix: String,
    /// Colour range used (`limited` or `full`).
    pub range: String,
    /// Whether the matrix or range was guessed because the clip was untagged.
    pub untagged: bool,
}

/// One decoded clip: where its frames are and what they hold.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct ClipRecord {
    /// Clip id: path relative to its set's folder, without extension.
    pub id: String,
    /// Clip-set name from the spec.
    pub set: String,
    /// Whether the set has recorded actions.
    pub labelled: bool,
    /// Output frames at the spec fps.
    pub frames: u32,
    /// Output fps.
    pub fps: f64,
    /// Output width.
    pub width: u32,
    /// Output height.
    pub height: u32,
    /// Source frames that the resampling dropped.
    pub dropped: u64,
    /// Output frames that repeat a source frame.
    pub repeated: u64,
    /// The source.
    pub source: SourceInfo,
    /// sha256 (lowercase hex) of the clip file.
    pub fingerprint: String,
    /// Hash of the decode settings and the clip fingerprint this record was made with.
    pub key: String,
    /// Action dimension names (sidecar header order); empty for unlabelled clips.
    pub action_dims: Vec<String>,
    /// One action vector per transition (`frames - 1` rows) for labelled clips.
    pub actions: Option<Vec<Vec<f32>>>,
    /// The sidecar file the actions came from.
    pub sidecar: Option<PathBuf>,
    /// sha256 of the sidecar.
    pub sidecar_fingerprint: Option<String>,
}

impl ClipRecord {
    /// `clips/<set>/<id>` relative to the decode folder, without extension.
    pub fn stem(set: &str, id: &str) -> PathBuf {
        Path::new("clips").join(set).join(id)
    }

    /// Path of the record file under `decode_dir`.
    pub fn record_path(decode_dir: &Path, set: &str, id: &str) -> PathBuf {
        with_suffix(&decode_dir.join(Self::stem(set, id)), ".clip.json")
    }

    /// Path of the frame store file under `decode_dir`.
    pub fn frames_path(decode_dir: &Path, set: &str, id: &str) -> PathBuf {
        with_suffix(&decode_dir.join(Self::stem(set, id)), ".frames")
    }

    /// Seconds since the clip's first frame of output frame `k`.
    pub fn time_of(&self, k: u32) -> f64 {
        k as f64 / self.fps
    }
}

/// Appends `suffix` to the file name of `path` (ids may contain dots).
pub fn with_suffix(path: &Path, suffix: &str) -> PathBuf {
    let mut s = path.as_os_str().to_os_string();
    s.push(suffix);
    PathBuf::from(s)
}
