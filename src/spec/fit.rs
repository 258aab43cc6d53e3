//! `[fit]` keys: raw serde struct and its resolution into
//! [`crate::fit::FitOptions`]. Owned by the fit stage.
//!
//! ```toml
//! [fit]
//! latent = 8                  # latent action size
//! widths = [64, 64, 64]       # channels of the encoder levels (each after the first halves the size)
//! hidden = 128                # flat feature width
//! head-hidden = 64            # hidden width of each action head
//! heads = 5                   # ensemble size (bootstrap resamples)
//! steps = 2000                # training steps per model
//! batch = 64                  # frame pairs per step
//! learning-rate = 0.002       # AdamW, cosine decay to a tenth
//! labelled-share = 0.5        # share of labelled pairs in each batch, in (0, 1); labelled-only trains on that many
//! action-weight = 100.0       # weight of the action loss (see head-loss)
//! align-weight = 100.0        # weight of the MMD^2 alignment penalty (0 = off)
//! shared-variance = "closed-form"   # or "learned"
//! head-loss = "faithful"      # or "nll" (plain Gaussian NLL)
//! posterior-positions = false # posterior also sees the deepest map, not only global maxima
//! checkpoint-every = 100      # steps between checkpoints
//! calib-fraction = 0.2        # labelled clips for calibration
//! holdout-fraction = 0.2      # labelled clips for holdout evaluation
//! split-by = "motion"         # or "random": how labelled clips are dealt into the splits
//! compare = true              # also train on labelled clips alone, for comparison
//! ```

use std::fmt;
use std::ops::Range;

use serde::Deserialize;
use serde::de::{self, Deserializer, Visitor};
use toml::Spanned;

use super::error::Problems;
use crate::fit::{FitOptions, SplitBy};
use crate::model::{HeadLoss, SharedVariance};

/// A number written as an integer or a float.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Number(pub f64);

impl<'de> Deserialize<'de> for Number {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl Visitor<'_> for V {
            type Value = Number;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a number")
            }
            fn visit_f64<E: de::Error>(self, v: f64) -> Result<Number, E> {
                Ok(Number(v))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> Result<Number, E> {
                Ok(Number(v as f64))
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> Result<Number, E> {
                Ok(Number(v as f64))
            }
        }
        d.deserialize_any(V)
    }
}

/// `shared-variance` values.
#[derive(Debug, Clone, Copy, PartialEq, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum RawSharedVariance {
    /// The batch MSE in closed form.
    ClosedForm,
    /// A learned parameter.
    Learned,
}

/// `[fit]` as written in the spec.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawFit {
    /// Latent size.
    pub latent: Option<Spanned<i64>>,
    /// Encoder level widths.
    pub widths: Option<Spanned<Vec<i64>>>,
    /// Flat feature width.
    pub hidden: Option<Spanned<i64>>,
    /// Head hidden width.
    pub head_hidden: Option<Spanned<i64>>,
    /// Ensemble size.
    pub heads: Option<Spanned<i64>>,
    /// Steps per model.
    pub steps: Option<Spanned<i64>>,
    /// Pairs per batch.
    pub batch: Option<Spanned<i64>>,
    /// Learning rate.
    pub learning_rate: Option<Spanned<Number>>,
    /// Labelled share of each batch.
    pub labelled_share: Option<Spanned<Number>>,
    /// Action NLL weight.
    pub action_weight: Option<Spanned<Number>>,
    /// Alignment weight.
    pub align_weight: Option<Spanned<Number>>,
    /// Shared variance mode.
    pub shared_variance: Option<RawSharedVariance>,
    /// Action-head loss.
    pub head_loss: Option<HeadLoss>,
    /// Posterior sees the deepest map too.
    pub posterior_positions: Option<bool>,
    /// Checkpoint interval.
    pub checkpoint_every: Option<Spanned<i64>>,
    /// Calibration fraction.
    pub calib_fraction: Option<Spanned<Number>>,
    /// Holdout fraction.
    pub holdout_fraction: Option<Spanned<Number>>,
    /// How labelled clips are dealt into the splits.
    pub split_by: Option<SplitBy>,
    /// Train the labelled-only comparison.
    pub compare: Option<bool>,
}

fn int(
    key: &str,
    v: &Option<Spanned<i64>>,
    lo: i64,
    hi: i64,
    problems: &mut Problems<'_>,
) -> Option<i64> {
    let s = v.as_ref()?;
    let x = *s.get_ref();
    if (lo..=hi).contains(&x) {
        Some(x)
    } else {
        problems.at(
            &format!("fit.{key}"),
            s.span(),
            format!("must be a whole number from {lo} to {hi} (got {x})"),
        );
        None
    }
}

fn num(
    key: &str,
    v: &Option<Spanned<Number>>,
    ok: impl Fn(f64) -> bool,
    what: &str,
    problems: &mut Problems<'_>,
) -> Option<f64> {
    let s = v.as_ref()?;
    let x = s.get_ref().0;
    if x.is_finite() && ok(x) {
        Some(x)
    } else {
        problems.at(
            &format!("fit.{key}"),
            s.span(),
            format!("must be {what} (got {x})"),
        );
        None
    }
}

fn span_of<T>(s: &Spanned<T>) -> Range<usize> {
    s.span()
}

/// Resolves `[fit]`, recording problems.
pub fn resolve(raw: &RawFit, problems: &mut Problems<'_>) -> FitOptions {
    let RawFit {
        latent,
        widths,
        hidden,
        head_hidden,
        heads,
        steps,
        batch,
        learning_rate,
        labelled_share,
        action_weight,
        align_weight,
        shared_variance,
        head_loss,
        posterior_positions,
        checkpoint_every,
        calib_fraction,
        holdout_fraction,
        split_by,
        compare,
    } = raw;
    let mut o = FitOptions::default();
    let size = |v: i64| v as usize;
    if let Some(v) = int("latent", latent, 1, 1024, problems) {
        o.latent = size(v);
    }
    if let Some(w) = widths {
        let list = w.get_ref();
        if list.is_empty() || list.len() > 6 || list.iter().any(|&c| !(1..=1024).contains(&c)) {
            problems.at(
                "fit.widths",
                span_of(w),
                "must list 1 to 6 widths, each from 1 to 1024",
            );
        } else {
            o.widths = list.iter().map(|&c| c as usize).collect();
        }
    }
    if let Some(v) = int("hidden", hidden, 1, 8192, problems) {
        o.hidden = size(v);
    }
    if let Some(v) = int("head-hidden", head_hidden, 1, 8192, problems) {
        o.head_hidden = size(v);
    }
    if let Some(v) = int("heads", heads, 1, 64, problems) {
        o.heads = size(v);
    }
    if let Some(v) = int("steps", steps, 1, i64::from(u32::MAX), problems) {
        o.steps = v as u32;
    }
    if let Some(v) = int("batch", batch, 4, 65_536, problems) {
        o.batch = size(v);
    }
    if let Some(v) = num(
        "learning-rate",
        learning_rate,
        |x| x > 0.0,
        "a positive number",
        problems,
    ) {
        o.learning_rate = v;
    }
    if let Some(v) = num(
        "labelled-share",
        labelled_share,
        |x| x > 0.0 && x < 1.0,
        "a number between 0 and 1 (exclusive)",
        problems,
    ) {
        o.labelled_share = v;
    }
    if let Some(v) = num(
        "action-weight",
        action_weight,
        |x| x > 0.0,
        "a positive number",
        problems,
    ) {
        o.action_weight = v;
    }
    if let Some(v) = num(
        "align-weight",
        align_weight,
        |x| x >= 0.0,
        "a number >= 0",
        problems,
    ) {
        o.align_weight = v;
    }
    if let Some(v) = shared_variance {
        o.shared_variance = match v {
            RawSharedVariance::ClosedForm => SharedVariance::ClosedForm,
            RawSharedVariance::Learned => SharedVariance::Learned,
        };
    }
    if let Some(v) = head_loss {
        o.head_loss = *v;
    }
    if let Some(v) = posterior_positions {
        o.posterior_positions = *v;
    }
    if let Some(v) = split_by {
        o.split_by = *v;
    }
    if let Some(v) = int(
        "checkpoint-every",
        checkpoint_every,
        1,
        i64::from(u32::MAX),
        problems,
    ) {
        o.checkpoint_every = v as u32;
    }
    let frac = |x: f64| (0.0..1.0).contains(&x);
    if let Some(v) = num(
        "calib-fraction",
        calib_fraction,
        frac,
        "a fraction from 0 to below 1",
        problems,
    ) {
        o.calib_fraction = v;
    }
    if let Some(v) = num(
        "holdout-fraction",
        holdout_fraction,
        frac,
        "a fraction from 0 to below 1",
        problems,
    ) {
        o.holdout_fraction = v;
    }
    if o.calib_fraction + o.holdout_fraction >= 1.0 {
        let at = holdout_fraction
            .as_ref()
            .or(calib_fraction.as_ref())
            .map(span_of);
        let msg = "calib-fraction + holdout-fraction must be below 1 (some clips must train)";
        match at {
            Some(span) => problems.at("fit.holdout-fraction", span, msg),
            None => problems.missing("fit.holdout-fraction", msg),
        }
    }
    if let Some(c) = compare {
        o.compare = *c;
    }
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str) -> (FitOptions, usize) {
        let raw: RawFit = toml::from_str(text).unwrap();
        let mut p = Problems::new(text);
        let o = resolve(&raw, &mut p);
        (o, p.list.len())
    }

    #[test]
    fn empty_table_gives_defaults() {
        assert_eq!(parse(""), (FitOptions::default(), 0));
    }

    #[test]
    fn keys_resolve_and_ranges_are_checked() {
        let (o, n) = parse(
            "latent = 4\nwidths = [8, 16]\nsteps = 10\nbatch = 8\nlearning-rate = 1\n\
             labelled-share = 0.25\nalign-weight = 0\nshared-variance = \"learned\"\ncompare = false\n\
             head-loss = \"nll\"\nposterior-positions = true\nsplit-by = \"random\"\n",
        );
        assert_eq!(n, 0);
        assert_eq!(
            (o.latent, o.widths.clone(), o.steps, o.batch),
            (4, vec![8, 16], 10, 8)
        );
        assert_eq!(
            (o.learning_rate, o.labelled_share, o.align_weight),
            (1.0, 0.25, 0.0)
        );
        assert_eq!(o.shared_variance, SharedVariance::Learned);
        assert!(!o.compare);
        assert_eq!(o.head_loss, HeadLoss::Nll);
        assert!(o.posterior_positions);
        assert_eq!(o.split_by, SplitBy::Random);
        assert!(toml::from_str::<RawFit>("split-by = \"speed\"").is_err());
        assert!(toml::from_str::<RawFit>("head-loss = \"mse\"").is_err());
        assert_eq!(parse("latent = 0\nlabelled-share = 1.0\nbatch = 2\n").1, 3);
        assert_eq!(parse("calib-fraction = 0.5\nholdout-fraction = 0.5\n").1, 1);
        assert!(toml::from_str::<RawFit>("epochs = 3").is_err());
    }
}
