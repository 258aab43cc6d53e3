//! The integration test binary: one module per area.

mod util;

mod actions;
mod align;
mod cli;
mod cluster;
mod decode;
mod demo;
mod fit;
mod label;
mod pipeline;
mod report;
mod shard;
mod spec;
mod storage;
