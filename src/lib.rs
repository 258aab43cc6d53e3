//! actuary: turn folders of robot clips (with recorded actions) and human clips
//! (without) into training-ready Parquet shards in which every frame carries an
//! inferred action, a discrete action code and a calibrated confidence.
//!
//! Data flow (each stage reads the previous stage's outputs from disk only):
//!
//! ```text
//! spec (TOML) -> check -> decode -> align -> fit -> label -> shard
//!                             \________ RUN/<stage>/manifest.json ______/ -> inspect / report
//! ```
//!
//! - [`spec`]: the TOML pipeline file, parsed strictly and resolved into options.
//! - [`store`]: on-disk formats shared between stages (frame store, manifests, atomic writes).
//! - [`clip_hashes`]: clip content hashes remembered in the run folder.
//! - [`runner`]: the only module that knows the stage order, hashing, skipping and resuming.
//! - [`decode`]: FFmpeg decoding, resampling, colour conversion, crop and resize.
//! - [`actions`]: action sidecar parsing and mapping onto frame intervals.
//! - [`align`]: domain-gap measurement and reduction, clock offset estimation.
//! - [`model`]: candle networks and losses (no I/O).
//! - [`fit`]: training loop, splits, checkpoints, comparison with labelled-only.
//! - [`label`]: estimates, conformal calibration, confidence, codes.
//! - [`shard`]: Parquet shard writer and manifest.
//! - [`report`]: `inspect` summaries and the HTML report.
//! - [`demo`]: the synthetic tabletop demo clip generator.

pub mod actions;
pub mod align;
pub mod check;
pub mod cli;
pub mod clip_hashes;
pub mod cluster;
pub mod decode;
pub mod demo;
pub mod error;
pub mod export;
pub mod fit;
pub mod inputs;
pub mod label;
pub mod model;
pub mod report;
pub mod runner;
pub mod shard;
pub mod spec;
pub mod storage;
pub mod store;
pub mod util;

/// The tool's version, recorded in every manifest.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");
