//! `[fit]` keys: raw serde struct and its resolution into
//! [`crate::fit::FitOptions`]. Owned by the fit stage.

use serde::Deserialize;

use super::error::Problems;
use crate::fit::FitOptions;

/// `[fit]` as written in the spec.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawFit {}

/// Resolves `[fit]`, recording problems.
pub fn resolve(raw: &RawFit, _problems: &mut Problems<'_>) -> FitOptions {
    let RawFit {} = raw;
    FitOptions::default()
}
