//! Re-exports of the per-stage raw sections, one file each.

pub use super::align::RawAlign;
pub use super::cluster::RawCluster;
pub use super::fit::RawFit;
pub use super::label::RawLabel;
pub use super::shard::RawShard;
