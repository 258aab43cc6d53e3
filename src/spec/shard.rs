//! `[shard]` keys: raw serde struct and its resolution into
//! [`crate::shard::ShardOptions`]. Owned by the shard stage.

use serde::Deserialize;
use toml::Spanned;

use super::error::Problems;
use crate::shard::{
    DEFAULT_ROW_GROUP_ROWS, DEFAULT_SHUFFLE, DEFAULT_TARGET_SIZE_MB, DEFAULT_ZSTD_LEVEL,
    ImageEncoding, ShardOptions,
};

/// `[shard]` as written in the spec.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawShard {
    /// Rows per Parquet row group.
    #[serde(default)]
    pub row_group_rows: Option<Spanned<i64>>,
    /// A shard is closed once it reaches this many megabytes (10^6 bytes).
    #[serde(default)]
    pub target_size_mb: Option<Spanned<f64>>,
    /// `png` (default) or `raw` (RGB bytes, row-major).
    #[serde(default)]
    pub image: Option<ImageEncoding>,
    /// Shuffle rows across shards (seeded by the spec's `seed`).
    #[serde(default)]
    pub shuffle: Option<bool>,
    /// zstd compression level, 1 to 22.
    #[serde(default)]
    pub zstd_level: Option<Spanned<i64>>,
}

/// Resolves `[shard]`, recording problems.
pub fn resolve(raw: &RawShard, problems: &mut Problems<'_>) -> ShardOptions {
    let RawShard {
        row_group_rows,
        target_size_mb,
        image,
        shuffle,
        zstd_level,
    } = raw;
    let row_group_rows = match row_group_rows {
        None => DEFAULT_ROW_GROUP_ROWS,
        Some(s) if *s.get_ref() < 1 || *s.get_ref() > 1 << 24 => {
            problems.at(
                "shard.row-group-rows",
                s.span(),
                format!(
                    "must be an integer from 1 to {} (got {})",
                    1 << 24,
                    s.get_ref()
                ),
            );
            DEFAULT_ROW_GROUP_ROWS
        }
        Some(s) => *s.get_ref() as u32,
    };
    let target_size_mb = match target_size_mb {
        None => DEFAULT_TARGET_SIZE_MB,
        Some(s) if !(s.get_ref().is_finite() && *s.get_ref() > 0.0) => {
            problems.at(
                "shard.target-size-mb",
                s.span(),
                format!("must be a positive number (got {})", s.get_ref()),
            );
            DEFAULT_TARGET_SIZE_MB
        }
        Some(s) => *s.get_ref(),
    };
    let zstd_level = match zstd_level {
        None => DEFAULT_ZSTD_LEVEL,
        Some(s) if !(1..=22).contains(s.get_ref()) => {
            problems.at(
                "shard.zstd-level",
                s.span(),
                format!("must be an integer from 1 to 22 (got {})", s.get_ref()),
            );
            DEFAULT_ZSTD_LEVEL
        }
        Some(s) => *s.get_ref() as i32,
    };
    ShardOptions {
        row_group_rows,
        target_size_mb,
        image: image.unwrap_or_default(),
        shuffle: shuffle.unwrap_or(DEFAULT_SHUFFLE),
        zstd_level,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn resolve_text(text: &str) -> (ShardOptions, Vec<String>) {
        crate::spec::checks::resolve_text::<RawShard, _>(text, resolve)
    }

    #[test]
    fn defaults_when_empty() {
        let (o, problems) = resolve_text("");
        assert!(problems.is_empty());
        assert_eq!(o, ShardOptions::default());
        assert_eq!(o.row_group_rows, 1024);
        assert_eq!(o.target_size_mb, 256.0);
        assert_eq!(o.image, ImageEncoding::Png);
    }

    #[test]
    fn every_key_parses() {
        let (o, problems) = resolve_text(
            "row-group-rows = 64\ntarget-size-mb = 1.5\nimage = \"raw\"\nshuffle = true\nzstd-level = 9\n",
        );
        assert!(problems.is_empty(), "{problems:?}");
        assert_eq!(
            o,
            ShardOptions {
                row_group_rows: 64,
                target_size_mb: 1.5,
                image: ImageEncoding::Raw,
                shuffle: true,
                zstd_level: 9
            }
        );
    }

    #[test]
    fn bad_values_are_reported() {
        let (_, problems) =
            resolve_text("row-group-rows = 0\ntarget-size-mb = -1.0\nzstd-level = 30\n");
        assert_eq!(problems.len(), 3, "{problems:?}");
        assert!(problems[1].contains("line 2") && problems[1].contains("shard.target-size-mb"));
        assert!(toml::from_str::<RawShard>("image = \"jpeg\"").is_err());
        assert!(toml::from_str::<RawShard>("rowgroup = 3").is_err());
    }
}
