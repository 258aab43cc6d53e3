//! The integration test binary: one module per area.

mod util;

mod actions;
mod align;
mod decode;
mod fit;
mod spec;
mod cli;
mod label;
mod pipeline;
mod report;
mod demo;
mod shard;
mod cluster;
mod storage;
