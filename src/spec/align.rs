//! `[align]` keys: raw serde struct and its resolution into
//! [`crate::align::AlignOptions`]. Owned by the align stage.

use serde::Deserialize;

use super::error::Problems;
use crate::align::AlignOptions;

/// `[align]` as written in the spec.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawAlign {}

/// Resolves `[align]`, recording problems.
pub fn resolve(raw: &RawAlign, _problems: &mut Problems<'_>) -> AlignOptions {
    let RawAlign {} = raw;
    AlignOptions::default()
}
