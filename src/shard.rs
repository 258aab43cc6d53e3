//! The shard stage: Parquet files in `RUN/shard/` with one row per decoded
//! frame (the columns of [`schema()`]), zstd-compressed, in row groups of
//! `row-group-rows`, rolled to a new file at `target-size-mb`, optionally
//! shuffled across files (seeded), plus the stage `manifest.json` whose
//! summary is a [`ShardSummary`].
//!
//! Data flow: `RUN/decode/clips/**` (records, frames, recorded actions) and
//! `RUN/label/` (per-clip labels, calibration figures, codes table) in;
//! `RUN/shard/shard-NNNNN.parquet` out. Every file is written under a
//! temporary name and renamed into place; a file whose new bytes equal the
//! file already there is left untouched.

pub mod inspect;
pub mod schema;
pub mod writer;

pub use inspect::{ShardInspection, inspect_shards};
pub use schema::schema;
pub use writer::{ShardFile, ShardJob, ShardSummary, write_shards};

use std::path::PathBuf;

use serde::{Deserialize, Serialize};

/// Default rows per Parquet row group.
pub const DEFAULT_ROW_GROUP_ROWS: u32 = 1024;
/// Default size (megabytes, 10^6 bytes) at which a shard file is closed.
pub const DEFAULT_TARGET_SIZE_MB: f64 = 256.0;
/// Default: rows stay in clip order.
pub const DEFAULT_SHUFFLE: bool = false;
/// Default zstd level (zstd's own default).
pub const DEFAULT_ZSTD_LEVEL: i32 = 3;

/// How the `image` column holds a frame.
#[derive(Debug, Clone, Copy, Default, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum ImageEncoding {
    /// PNG (lossless, deterministic encoder settings).
    #[default]
    Png,
    /// Raw RGB bytes, row-major, `width * height * 3`.
    Raw,
}

/// Resolved `[shard]` settings.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ShardOptions {
    /// Rows per row group.
    pub row_group_rows: u32,
    /// A shard is closed once its size reaches this many megabytes.
    pub target_size_mb: f64,
    /// Image encoding.
    pub image: ImageEncoding,
    /// Shuffle rows across shards (seeded by the spec seed).
    pub shuffle: bool,
    /// zstd level.
    pub zstd_level: i32,
}

impl Default for ShardOptions {
    fn default() -> Self {
        Self {
            row_group_rows: DEFAULT_ROW_GROUP_ROWS,
            target_size_mb: DEFAULT_TARGET_SIZE_MB,
            image: ImageEncoding::Png,
            shuffle: DEFAULT_SHUFFLE,
            zstd_level: DEFAULT_ZSTD_LEVEL,
        }
    }
}

/// Errors of the shard stage.
#[derive(Debug, thiserror::Error)]
pub enum ShardError {
    /// A file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file or folder.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// A frame store could not be read.
    #[error(transparent)]
    Frames(#[from] crate::store::FrameStoreError),
    /// A clip's labels are missing or do not match its record.
    #[error("labels of clip {set}/{id} ({path}): {reason}")]
    Labels {
        /// Set.
        set: String,
        /// Clip id.
        id: String,
        /// The labels file.
        path: PathBuf,
        /// What is wrong.
        reason: String,
    },
    /// Clips disagree on frame size, fps or action dimensions.
    #[error("clip {set}/{id}: {reason}")]
    Inconsistent {
        /// Set.
        set: String,
        /// Clip id.
        id: String,
        /// What differs.
        reason: String,
    },
    /// A clip's PNG frame store (written by the label stage) is unreadable.
    #[error(transparent)]
    PngFrames(#[from] crate::store::png_frames::PngStoreError),
    /// A clip's PNG frame store is missing.
    #[error(
        "{path} is missing: the label stage writes it when [shard] image = \"png\"; run the label stage again (delete RUN/label/manifest.json, then `actuary run`)"
    )]
    PngFramesMissing {
        /// The file expected.
        path: PathBuf,
    },
    /// Arrow or Parquet failed while writing a shard.
    #[error("writing shard {path}: {message}")]
    Parquet {
        /// The shard.
        path: PathBuf,
        /// The writer's message.
        message: String,
    },
    /// A row group's images would overflow the binary column's 32-bit offsets.
    #[error(
        "row group {group} holds {bytes} image bytes, more than a binary column allows; lower `shard.row-group-rows`"
    )]
    ImageBytes {
        /// Row group index (global).
        group: usize,
        /// Bytes.
        bytes: usize,
    },
}

/// Runs the shard stage.
pub fn run_stage(
    ctx: &crate::runner::StageContext<'_>,
) -> Result<crate::store::StageManifest, ShardError> {
    let job = ShardJob {
        run_dir: &ctx.run_dir,
        shard_dir: &ctx.stage_dir,
        opts: &ctx.spec.shard,
        seed: ctx.spec.seed,
        threads: ctx.threads,
    };
    let started = std::time::Instant::now();
    let summary = write_shards(&job)?;
    let mut m = manifest_of(&summary);
    m.timings
        .insert("write_s".into(), started.elapsed().as_secs_f64());
    Ok(m)
}

/// The stage manifest of a shard run (the runner fills key and timings).
pub fn manifest_of(summary: &ShardSummary) -> crate::store::StageManifest {
    let mut m = crate::store::StageManifest::default();
    m.counts.insert("rows".into(), summary.rows);
    m.counts
        .insert("shards".into(), summary.shards.len() as u64);
    m.counts.insert("clips".into(), summary.clips);
    m.counts
        .insert("shards_unchanged".into(), summary.unchanged);
    m.counts
        .insert("bytes".into(), summary.shards.iter().map(|s| s.bytes).sum());
    m.summary = serde_json::to_value(summary).unwrap_or_default();
    m
}
