//! On-disk formats shared between stages: the frame store, per-clip records,
//! stage manifests and atomic writes. Stages talk only through these.

pub mod atomic;
pub mod clips;
pub mod frames;
pub mod manifest;
pub mod png_frames;

pub use atomic::{AtomicFile, read_json, write_atomic, write_json_atomic};
pub use clips::{ClipRecord, SourceInfo};
pub use frames::{FrameReader, FrameStoreError, FrameWriter};
pub use manifest::{ClipStatus, StageManifest};
