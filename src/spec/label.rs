//! `[label]` keys: raw serde struct and its resolution into
//! [`crate::label::LabelOptions`]. Owned by the label stage.

use serde::Deserialize;

use super::error::Problems;
use crate::label::LabelOptions;

/// `[label]` as written in the spec.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawLabel {}

/// Resolves `[label]`, recording problems.
pub fn resolve(raw: &RawLabel, _problems: &mut Problems<'_>) -> LabelOptions {
    let RawLabel {} = raw;
    LabelOptions::default()
}
