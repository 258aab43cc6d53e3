//! Turns a [`RawSpec`] into a checked [`Spec`]: fills defaults, makes paths
//! absolute (relative to the spec file), and checks ranges, recording every
//! problem with its line and column before failing once.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use super::checks::{int_in as positive_u32, positive_f64};
use super::error::Problems;
use super::raw::{RawActions, RawDecode, RawSet, RawSpec};
use super::values::{CropValue, OffsetValue};
use super::{ActionsOptions, Offset, SetSpec, Spec};
use crate::actions::MapRule;
use crate::decode::{self, Crop, DecodeOptions};

/// Default seed.
pub const DEFAULT_SEED: u64 = 7;
/// Default `[actions] offset-window`, seconds either side.
pub const DEFAULT_OFFSET_WINDOW_S: f64 = 1.0;
/// Default `[actions] offset-min-correlation`.
pub const DEFAULT_OFFSET_MIN_CORRELATION: f64 = 0.3;

/// Resolves the raw spec; `base` is the spec file's folder.
pub(crate) fn resolve(raw: RawSpec, path: &Path, base: &Path, p: &mut Problems<'_>) -> Spec {
    let RawSpec {
        out,
        seed,
        sets,
        decode,
        actions,
        align,
        fit,
        label,
        shard,
        cluster,
    } = raw;
    let out_path = absolute(base, out.get_ref());
    if out.get_ref().trim().is_empty() {
        p.at("out", out.span(), "must name a folder");
    }
    let seed = match seed {
        None => DEFAULT_SEED,
        Some(s) if *s.get_ref() < 0 => {
            p.at(
                "seed",
                s.span(),
                format!("must be >= 0 (got {})", s.get_ref()),
            );
            DEFAULT_SEED
        }
        Some(s) => *s.get_ref() as u64,
    };
    let sets_span = sets.span();
    let sets = resolve_sets(sets.into_inner(), sets_span, base, p);
    // Align and fit keep held-out sets out of what they fit; the names are
    // part of their settings (and so of their keys).
    let held_out: Vec<String> = sets
        .iter()
        .filter(|s| s.held_out)
        .map(|s| s.name.clone())
        .collect();
    let mut align = super::align::resolve(&align, p);
    align.held_out_sets = held_out.clone();
    let mut fit = super::fit::resolve(&fit, p);
    fit.held_out_sets = held_out;
    Spec {
        path: path.to_path_buf(),
        out: out_path,
        seed,
        sets,
        decode: resolve_decode(decode, p),
        actions: resolve_actions(actions, p),
        align,
        fit,
        label: super::label::resolve(&label, p),
        shard: super::shard::resolve(&shard, p),
        cluster: super::cluster::resolve(&cluster, p),
        text_hash: String::new(),
    }
}

/// `base/rel`, or `rel` when it is absolute.
pub fn absolute(base: &Path, rel: &str) -> PathBuf {
    let rel = Path::new(rel);
    if rel.is_absolute() {
        rel.to_path_buf()
    } else {
        base.join(rel)
    }
}

fn resolve_sets(
    sets: BTreeMap<String, RawSet>,
    span: std::ops::Range<usize>,
    base: &Path,
    p: &mut Problems<'_>,
) -> Vec<SetSpec> {
    if sets.is_empty() {
        p.at("sets", span.clone(), "at least one clip set is needed");
    }
    let mut out = Vec::new();
    for (name, set) in sets {
        let RawSet {
            dir,
            labelled,
            eval_truth,
            held_out,
        } = set;
        let key = format!("sets.{name}");
        if !name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_')
        {
            p.at(
                &key,
                dir.span(),
                "set names may hold only letters, digits, `-` and `_`",
            );
        }
        // An object store URL (s3://, gs://, az://, file://) is listed remotely.
        let remote = super::cluster::is_store_url(dir.get_ref());
        let dir_path = if remote {
            PathBuf::from(dir.get_ref().trim_end_matches('/'))
        } else {
            absolute(base, dir.get_ref())
        };
        if !remote && !dir_path.is_dir() {
            p.at(
                &format!("{key}.dir"),
                dir.span(),
                format!("folder {} does not exist", dir_path.display()),
            );
        }
        let eval_truth = eval_truth.map(|t| {
            let tp = absolute(base, t.get_ref());
            if !tp.is_dir() {
                p.at(
                    &format!("{key}.eval-truth"),
                    t.span(),
                    format!("folder {} does not exist", tp.display()),
                );
            }
            tp
        });
        let held_out = match held_out {
            Some(h) if *h.get_ref() && !labelled => {
                p.at(
                    &format!("{key}.held-out"),
                    h.span(),
                    "only a labelled set can be held out (it is dealt into calib and holdout)",
                );
                false
            }
            Some(h) => *h.get_ref(),
            None => false,
        };
        out.push(SetSpec {
            name,
            dir: dir_path,
            labelled,
            eval_truth,
            held_out,
        });
    }
    if !out.iter().any(|s| s.labelled) && !out.is_empty() {
        p.at("sets", span, "at least one set must have `labelled = true`");
    } else if !out.is_empty() && !out.iter().any(|s| s.labelled && !s.held_out) {
        p.at(
            "sets",
            span,
            "at least one labelled set must not be `held-out` (the model trains on it)",
        );
    }
    out
}

fn resolve_decode(raw: RawDecode, p: &mut Problems<'_>) -> DecodeOptions {
    let RawDecode {
        fps,
        size,
        crop,
        scaler,
        on_error,
        max_width,
        max_height,
        max_duration,
    } = raw;
    let d = DecodeOptions::default();
    let fps = positive_f64("decode.fps", &fps, decode::DEFAULT_FPS, p);
    if fps > 1000.0 {
        p.missing("decode.fps", format!("must be at most 1000 (got {fps})"));
    }
    let (width, height) = match size {
        None => decode::DEFAULT_SIZE,
        Some(s) => match s.get_ref().as_slice() {
            [w, h]
                if (2..=4096).contains(w) && (2..=4096).contains(h) && w % 2 == 0 && h % 2 == 0 =>
            {
                (*w as u32, *h as u32)
            }
            other => {
                p.at(
                    "decode.size",
                    s.span(),
                    format!(
                        "must be [width, height], even integers from 2 to 4096 (got {other:?})"
                    ),
                );
                decode::DEFAULT_SIZE
            }
        },
    };
    let crop = match crop {
        None => Crop::Center,
        Some(c) => match *c.get_ref() {
            CropValue::Center => Crop::Center,
            CropValue::None => Crop::None,
            CropValue::Box([x, y, w, h]) => {
                if x < 0 || y < 0 || w < 2 || h < 2 || [x, y, w, h].iter().any(|v| *v > 65536) {
                    p.at(
                        "decode.crop",
                        c.span(),
                        "a box is [x, y, width, height] with x, y >= 0 and width, height >= 2",
                    );
                }
                Crop::Box {
                    x: x.max(0) as u32,
                    y: y.max(0) as u32,
                    w: w.max(2) as u32,
                    h: h.max(2) as u32,
                }
            }
        },
    };
    DecodeOptions {
        fps,
        width,
        height,
        crop,
        scaler: scaler.unwrap_or(d.scaler),
        on_error: on_error.unwrap_or(d.on_error),
        max_width: positive_u32("decode.max-width", &max_width, d.max_width, 65536, p),
        max_height: positive_u32("decode.max-height", &max_height, d.max_height, 65536, p),
        max_duration_s: positive_f64("decode.max-duration", &max_duration, d.max_duration_s, p),
    }
}

fn resolve_actions(raw: RawActions, p: &mut Problems<'_>) -> ActionsOptions {
    let RawActions {
        map,
        default_rule,
        offset,
        offset_window,
        offset_min_correlation,
    } = raw;
    let offset = match offset {
        None => Offset::Seconds(0.0),
        Some(o) => match *o.get_ref() {
            OffsetValue::Estimate => Offset::Estimate,
            OffsetValue::Seconds(s) if s.is_finite() && s.abs() <= 3600.0 => Offset::Seconds(s),
            OffsetValue::Seconds(s) => {
                p.at(
                    "actions.offset",
                    o.span(),
                    format!("must be within +-3600 s (got {s})"),
                );
                Offset::Seconds(0.0)
            }
        },
    };
    let window = positive_f64(
        "actions.offset-window",
        &offset_window,
        DEFAULT_OFFSET_WINDOW_S,
        p,
    );
    let min_corr = match offset_min_correlation {
        None => DEFAULT_OFFSET_MIN_CORRELATION,
        Some(c) if !(0.0..=1.0).contains(c.get_ref()) => {
            p.at(
                "actions.offset-min-correlation",
                c.span(),
                format!("must be from 0 to 1 (got {})", c.get_ref()),
            );
            DEFAULT_OFFSET_MIN_CORRELATION
        }
        Some(c) => *c.get_ref(),
    };
    ActionsOptions {
        map,
        default_rule: default_rule.unwrap_or(MapRule::Hold),
        offset,
        offset_window_s: window,
        offset_min_correlation: min_corr,
    }
}
