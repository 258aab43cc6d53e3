//! `[cluster]` keys (Slurm partitions); resolved into [`ClusterOptions`].

use serde::{Deserialize, Serialize};

use super::error::Problems;

/// `[cluster]` as written in the spec.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawCluster {}

/// Resolved cluster settings.
#[derive(Debug, Clone, Default, Serialize, PartialEq)]
pub struct ClusterOptions {}

/// Resolves `[cluster]`, recording problems.
pub fn resolve(raw: &RawCluster, _problems: &mut Problems<'_>) -> ClusterOptions {
    let RawCluster {} = raw;
    ClusterOptions::default()
}
