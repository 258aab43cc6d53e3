//! `[label]` keys: raw serde struct and its resolution into
//! [`crate::label::LabelOptions`]. Owned by the label stage.

use serde::Deserialize;
use toml::Spanned;

use super::checks::int_in;
use super::error::Problems;
use crate::label::{
    DEFAULT_ALPHA, DEFAULT_BATCH, DEFAULT_CODES, DEFAULT_KMEANS_ITERATIONS,
    DEFAULT_KMEANS_RESTARTS, DEFAULT_KMEANS_SAMPLE, DEFAULT_TOLERANCE, LabelOptions,
};

/// `[label]` as written in the spec.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawLabel {
    /// Miscoverage rate of the calibrated intervals, in (0, 1).
    #[serde(default)]
    pub alpha: Option<Spanned<f64>>,
    /// Error tolerance per dimension, as a fraction of the labelled std.
    #[serde(default)]
    pub tolerance: Option<Spanned<f64>>,
    /// Number of discrete action codes (k of k-means).
    #[serde(default)]
    pub codes: Option<Spanned<i64>>,
    /// Most train transitions k-means is fitted on.
    #[serde(default)]
    pub kmeans_sample: Option<Spanned<i64>>,
    /// k-means++ restarts; the lowest inertia wins.
    #[serde(default)]
    pub kmeans_restarts: Option<Spanned<i64>>,
    /// Most Lloyd iterations per restart.
    #[serde(default)]
    pub kmeans_iterations: Option<Spanned<i64>>,
    /// Transitions per inference batch.
    #[serde(default)]
    pub batch: Option<Spanned<i64>>,
}

/// Resolves `[label]`, recording problems.
pub fn resolve(raw: &RawLabel, problems: &mut Problems<'_>) -> LabelOptions {
    let RawLabel {
        alpha,
        tolerance,
        codes,
        kmeans_sample,
        kmeans_restarts,
        kmeans_iterations,
        batch,
    } = raw;
    let alpha = match alpha {
        None => DEFAULT_ALPHA,
        Some(s) if !(*s.get_ref() > 0.0 && *s.get_ref() < 1.0) => {
            problems.at(
                "label.alpha",
                s.span(),
                format!("must be between 0 and 1, exclusive (got {})", s.get_ref()),
            );
            DEFAULT_ALPHA
        }
        Some(s) => *s.get_ref(),
    };
    let tolerance = match tolerance {
        None => DEFAULT_TOLERANCE,
        Some(s) if !(s.get_ref().is_finite() && *s.get_ref() > 0.0) => {
            problems.at(
                "label.tolerance",
                s.span(),
                format!("must be a positive number (got {})", s.get_ref()),
            );
            DEFAULT_TOLERANCE
        }
        Some(s) => *s.get_ref(),
    };
    let codes = int_in(
        "label.codes",
        codes,
        DEFAULT_CODES,
        u16::MAX as u32,
        problems,
    );
    let kmeans_sample = int_in(
        "label.kmeans-sample",
        kmeans_sample,
        DEFAULT_KMEANS_SAMPLE,
        100_000_000,
        problems,
    );
    if let Some(s) = raw.kmeans_sample.as_ref().filter(|_| kmeans_sample < codes) {
        problems.at(
            "label.kmeans-sample",
            s.span(),
            format!("must be at least `codes` ({codes}) (got {kmeans_sample})"),
        );
    }
    LabelOptions {
        alpha,
        tolerance,
        codes,
        kmeans_sample: kmeans_sample.max(codes),
        kmeans_restarts: int_in(
            "label.kmeans-restarts",
            kmeans_restarts,
            DEFAULT_KMEANS_RESTARTS,
            1000,
            problems,
        ),
        kmeans_iterations: int_in(
            "label.kmeans-iterations",
            kmeans_iterations,
            DEFAULT_KMEANS_ITERATIONS,
            100_000,
            problems,
        ),
        batch: int_in("label.batch", batch, DEFAULT_BATCH, 65_536, problems),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn resolve_text(text: &str) -> (LabelOptions, Vec<String>) {
        crate::spec::checks::resolve_text::<RawLabel, _>(text, resolve)
    }

    #[test]
    fn defaults_when_empty() {
        let (o, problems) = resolve_text("");
        assert!(problems.is_empty());
        assert_eq!(o, LabelOptions::default());
        assert_eq!(o.alpha, 0.1);
        assert_eq!(o.codes, 16);
    }

    #[test]
    fn every_key_parses() {
        let (o, problems) = resolve_text(
            "alpha = 0.2\ntolerance = 0.5\ncodes = 8\nkmeans-sample = 500\nkmeans-restarts = 3\nkmeans-iterations = 50\nbatch = 64\n",
        );
        assert!(problems.is_empty(), "{problems:?}");
        assert_eq!(
            o,
            LabelOptions {
                alpha: 0.2,
                tolerance: 0.5,
                codes: 8,
                kmeans_sample: 500,
                kmeans_restarts: 3,
                kmeans_iterations: 50,
                batch: 64
            }
        );
    }

    #[test]
    fn out_of_range_values_name_line_and_key() {
        let (_, problems) = resolve_text("alpha = 1.5\ncodes = 0\nkmeans-sample = 2\n");
        assert_eq!(problems.len(), 3, "{problems:?}");
        assert!(problems[0].contains("line 1") && problems[0].contains("label.alpha"));
        assert!(problems[1].contains("line 2") && problems[1].contains("label.codes"));
        assert!(problems[2].contains("line 3") && problems[2].contains("at least `codes`"));
    }

    #[test]
    fn unknown_key_is_refused() {
        assert!(toml::from_str::<RawLabel>("alpah = 0.1").is_err());
    }
}
