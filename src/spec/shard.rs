//! `[shard]` keys: raw serde struct and its resolution into
//! [`crate::shard::ShardOptions`]. Owned by the shard stage.

use serde::Deserialize;

use super::error::Problems;
use crate::shard::ShardOptions;

/// `[shard]` as written in the spec.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawShard {}

/// Resolves `[shard]`, recording problems.
pub fn resolve(raw: &RawShard, _problems: &mut Problems<'_>) -> ShardOptions {
    let RawShard {} = raw;
    ShardOptions::default()
}
