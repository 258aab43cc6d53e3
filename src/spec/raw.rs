//! Serde structs that mirror the spec file one to one. Every table denies
//! unknown keys; values that need checks after parsing keep their byte span
//! (`toml::Spanned`) so problems can name the line and column.

use std::collections::BTreeMap;

use serde::Deserialize;
use toml::Spanned;

use super::sections::{RawAlign, RawCluster, RawFit, RawLabel, RawShard};
use super::values::{CropValue, OffsetValue};
use crate::actions::MapRule;

/// The whole spec file.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawSpec {
    /// Run folder.
    pub out: Spanned<String>,
    /// Seed for every random choice.
    #[serde(default)]
    pub seed: Option<Spanned<i64>>,
    /// Clip sets by name.
    pub sets: Spanned<BTreeMap<String, RawSet>>,
    /// `[decode]`.
    #[serde(default)]
    pub decode: RawDecode,
    /// `[actions]`.
    #[serde(default)]
    pub actions: RawActions,
    /// `[align]`.
    #[serde(default)]
    pub align: RawAlign,
    /// `[fit]`.
    #[serde(default)]
    pub fit: RawFit,
    /// `[label]`.
    #[serde(default)]
    pub label: RawLabel,
    /// `[shard]`.
    #[serde(default)]
    pub shard: RawShard,
    /// `[cluster]`.
    #[serde(default)]
    pub cluster: RawCluster,
}

/// `[sets.NAME]`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawSet {
    /// Folder of clips.
    pub dir: Spanned<String>,
    /// Whether clips have action sidecars.
    pub labelled: bool,
    /// Evaluation-only folder of true actions (`NAME.actions.csv`, one row per decoded frame).
    #[serde(default)]
    pub eval_truth: Option<Spanned<String>>,
    /// Labelled clips kept out of everything fitted (align's pooled
    /// statistics, the model); dealt into calib and holdout only.
    #[serde(default)]
    pub held_out: Option<Spanned<bool>>,
}

/// `[decode]`.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawDecode {
    /// Output fps.
    pub fps: Option<Spanned<f64>>,
    /// Output `[width, height]`.
    pub size: Option<Spanned<Vec<i64>>>,
    /// `center`, `none` or `[x, y, w, h]`.
    pub crop: Option<Spanned<CropValue>>,
    /// `area`, `bilinear` or `bicubic`.
    pub scaler: Option<crate::decode::Scaler>,
    /// `skip` or `stop`.
    pub on_error: Option<crate::decode::OnError>,
    /// Largest accepted source width.
    pub max_width: Option<Spanned<i64>>,
    /// Largest accepted source height.
    pub max_height: Option<Spanned<i64>>,
    /// Longest accepted clip, seconds.
    pub max_duration: Option<Spanned<f64>>,
}

/// `[actions]`.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawActions {
    /// Rule per dimension.
    #[serde(default)]
    pub map: BTreeMap<String, MapRule>,
    /// Rule for dimensions not named in `map`.
    pub default_rule: Option<MapRule>,
    /// Seconds, or `"estimate"`.
    pub offset: Option<Spanned<OffsetValue>>,
    /// Search window for `offset = "estimate"`, seconds either side.
    pub offset_window: Option<Spanned<f64>>,
    /// Weakest correlation trusted by the estimate.
    pub offset_min_correlation: Option<Spanned<f64>>,
}
