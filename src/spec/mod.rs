//! The pipeline spec: a TOML file parsed strictly ([`raw`]) and resolved into
//! checked options ([`resolve`]) that the stages take. Paths are relative to
//! the spec file. Errors name the file, the key, the line and the column.

pub mod align;
pub mod checks;
pub mod cluster;
pub mod error;
pub mod fit;
pub mod label;
pub mod raw;
pub mod resolve;
pub mod sections;
pub mod shard;
pub mod values;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::Serialize;

pub use cluster::ClusterOptions;
pub use error::{Problems, SpecError, SpecProblem};

use crate::actions::MapRule;
use crate::align::AlignOptions;
use crate::decode::DecodeOptions;
use crate::fit::FitOptions;
use crate::label::LabelOptions;
use crate::shard::ShardOptions;

/// One clip set.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct SetSpec {
    /// Set name (`[sets.NAME]`).
    pub name: String,
    /// Absolute folder of clips.
    pub dir: PathBuf,
    /// Whether the clips carry action sidecars.
    pub labelled: bool,
    /// Evaluation-only folder of true actions; never a training input.
    pub eval_truth: Option<PathBuf>,
    /// A labelled set kept out of everything fitted: align's pooled statistics
    /// and the model never see it; its clips go to calib and holdout only.
    pub held_out: bool,
}

/// The clock offset between a clip and its action log.
#[derive(Debug, Clone, Copy, Serialize, PartialEq)]
#[serde(rename_all = "kebab-case")]
pub enum Offset {
    /// Seconds added to log timestamps to get video time.
    Seconds(f64),
    /// Estimated per clip by the align stage.
    Estimate,
}

/// Resolved `[actions]`.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ActionsOptions {
    /// Rule per named dimension.
    pub map: BTreeMap<String, MapRule>,
    /// Rule for dimensions not in `map`.
    pub default_rule: MapRule,
    /// Clock offset.
    pub offset: Offset,
    /// Search window for estimated offsets, seconds either side.
    pub offset_window_s: f64,
    /// Weakest cross-correlation trusted for an estimated offset.
    pub offset_min_correlation: f64,
}

/// A checked spec.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Spec {
    /// The spec file.
    pub path: PathBuf,
    /// The run folder.
    pub out: PathBuf,
    /// Seed for every random choice.
    pub seed: u64,
    /// Clip sets, in name order.
    pub sets: Vec<SetSpec>,
    /// `[decode]`.
    pub decode: DecodeOptions,
    /// `[actions]`.
    pub actions: ActionsOptions,
    /// `[align]`.
    pub align: AlignOptions,
    /// `[fit]`.
    pub fit: FitOptions,
    /// `[label]`.
    pub label: LabelOptions,
    /// `[shard]`.
    pub shard: ShardOptions,
    /// `[cluster]`.
    pub cluster: ClusterOptions,
    /// sha256 of the spec file's text.
    pub text_hash: String,
}

impl Spec {
    /// Reads, parses and resolves the spec at `path`.
    pub fn load(path: &Path) -> Result<Self, SpecError> {
        let text = std::fs::read_to_string(path).map_err(|source| SpecError::Read {
            path: path.to_path_buf(),
            source,
        })?;
        Self::from_str_at(&text, path)
    }

    /// Parses and resolves spec `text` as if read from `path`.
    pub fn from_str_at(text: &str, path: &Path) -> Result<Self, SpecError> {
        let raw: raw::RawSpec = toml::from_str(text).map_err(|source| SpecError::Parse {
            path: path.to_path_buf(),
            source: Box::new(source),
        })?;
        let abs = std::path::absolute(path).unwrap_or_else(|_| path.to_path_buf());
        let base = abs.parent().map(Path::to_path_buf).unwrap_or_default();
        let mut problems = Problems::new(text);
        let mut spec = resolve::resolve(raw, &abs, &base, &mut problems);
        problems.finish(path)?;
        spec.text_hash = crate::util::sha256_hex(text.as_bytes());
        Ok(spec)
    }

    /// The set called `name`.
    pub fn set(&self, name: &str) -> Option<&SetSpec> {
        self.sets.iter().find(|s| s.name == name)
    }
}
