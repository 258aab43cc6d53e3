//! `[align]` keys: raw serde struct and its resolution into
//! [`crate::align::AlignOptions`]. Owned by the align stage.
//!
//! ```toml
//! [align]
//! photometric = "per-set"     # "off", "per-set" or "per-clip"
//! speed = "auto"              # "auto" or "off"
//! speed-threshold = 1.15      # motion-rate ratio (>= 1) above which the faster domain is resampled
//! resample = "blend"          # "blend" or "nearest"
//! copy-frames = false         # write the aligned frames as a second copy
//! gap-sample = 2000           # frames sampled per set for statistics and the gap figure
//! ```

use serde::Deserialize;
use toml::Spanned;

use super::error::Problems;
use crate::align::{AlignOptions, Photometric, Resample, Speed};

/// `[align]` as written in the spec.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawAlign {
    /// `off`, `per-set` or `per-clip`.
    pub photometric: Option<Photometric>,
    /// `auto` or `off`.
    pub speed: Option<Speed>,
    /// Motion-rate ratio threshold, >= 1.
    pub speed_threshold: Option<Spanned<f64>>,
    /// `blend` or `nearest`.
    pub resample: Option<Resample>,
    /// Write a second copy of the aligned frames.
    pub copy_frames: Option<bool>,
    /// Frames sampled per set, >= 2.
    pub gap_sample: Option<Spanned<i64>>,
}

/// Resolves `[align]`, recording problems.
pub fn resolve(raw: &RawAlign, problems: &mut Problems<'_>) -> AlignOptions {
    let RawAlign {
        photometric,
        speed,
        speed_threshold,
        resample,
        copy_frames,
        gap_sample,
    } = raw;
    let mut o = AlignOptions::default();
    if let Some(p) = photometric {
        o.photometric = *p;
    }
    if let Some(s) = speed {
        o.speed = *s;
    }
    if let Some(t) = speed_threshold {
        let v = *t.get_ref();
        if v.is_finite() && v >= 1.0 {
            o.speed_threshold = v;
        } else {
            problems.at(
                "align.speed-threshold",
                t.span(),
                format!("must be a number >= 1 (got {v})"),
            );
        }
    }
    if let Some(r) = resample {
        o.resample = *r;
    }
    if let Some(c) = copy_frames {
        o.copy_frames = *c;
    }
    if let Some(g) = gap_sample {
        let v = *g.get_ref();
        if (2..=i64::from(u32::MAX)).contains(&v) {
            o.gap_sample = v as u32;
        } else {
            problems.at(
                "align.gap-sample",
                g.span(),
                format!("must be a whole number >= 2 (got {v})"),
            );
        }
    }
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str) -> (AlignOptions, usize) {
        let raw: RawAlign = toml::from_str(text).unwrap();
        let mut p = Problems::new(text);
        let o = resolve(&raw, &mut p);
        (o, p.list.len())
    }

    #[test]
    fn empty_table_gives_defaults() {
        assert_eq!(parse(""), (AlignOptions::default(), 0));
    }

    #[test]
    fn keys_resolve_and_ranges_are_checked() {
        let (o, n) = parse(
            "photometric = \"per-clip\"\nspeed = \"off\"\nspeed-threshold = 1.3\nresample = \"nearest\"\ncopy-frames = true\ngap-sample = 50\n",
        );
        assert_eq!(n, 0);
        assert_eq!(o.photometric, Photometric::PerClip);
        assert_eq!(o.speed, Speed::Off);
        assert_eq!(o.speed_threshold, 1.3);
        assert_eq!(o.resample, Resample::Nearest);
        assert!(o.copy_frames);
        assert_eq!(o.gap_sample, 50);
        assert_eq!(parse("speed-threshold = 0.5\ngap-sample = 1\n").1, 2);
        assert!(toml::from_str::<RawAlign>("colour = 1").is_err());
    }
}
