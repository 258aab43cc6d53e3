//! Report sections for align, fit, label and the unlabelled contact sheet:
//! plots from the gathered figures and pictures from the frame store.

use std::fmt::Write as _;

use super::collect::{Gathered, holdout_pairs};
use super::figures::{FrameRef, Section};
use super::html::{missing, num, open, plots, table};
use super::picture::{ARROW, Canvas, planar_dims};
use super::svg::{PALETTE, Plot, esc, reliability};
use crate::store::{ClipRecord, FrameReader};

/// Integer scale of frames in pictures.
const SCALE: u32 = 2;

fn reader(g: &Gathered, set: &str, id: &str) -> Option<FrameReader> {
    let run = std::path::Path::new(&g.figures.run);
    FrameReader::open(&ClipRecord::frames_path(&run.join("decode"), set, id)).ok()
}

fn img(h: &mut String, c: &Canvas, alt: &str, class: &str) {
    if let Some(uri) = c.data_uri() {
        let _ = write!(
            h,
            "<img class=\"{class}\" src=\"{uri}\" width=\"{}\" height=\"{}\" alt=\"{}\">",
            c.width,
            c.height,
            esc(alt)
        );
    }
}

/// Align: gap, motion, colour histograms, before/after frames, offsets.
pub fn align(h: &mut String, g: &Gathered) {
    open(h, "align", "Align: the gap between the domains");
    let a = match &g.figures.align {
        Section::Ok(a) => a,
        Section::Missing(note) => {
            missing(h, note);
            h.push_str("</section>");
            return;
        }
    };
    let _ = write!(
        h,
        "<p>Domain gap (unlabelled against labelled frames): <b>{}</b> before, <b>{}</b> after. <span class=\"meta\">({})</span></p>",
        num(a.gap_before, 3),
        num(a.gap_after, 3),
        esc(&a.gap_method)
    );
    let _ = write!(
        h,
        "<p>Motion rate (pixels per frame): labelled {}, unlabelled {}, ratio {}; resampled domain: {}.</p>",
        num(a.labelled_motion_rate, 3),
        num(a.unlabelled_motion_rate, 3),
        num(a.motion_ratio, 3),
        esc(a.resampled.as_deref().unwrap_or("none"))
    );
    let rows: Vec<Vec<String>> = a
        .sets
        .iter()
        .map(|s| {
            vec![
                esc(&s.name),
                if s.labelled { "labelled" } else { "unlabelled" }.into(),
                s.clips.to_string(),
                s.frames.to_string(),
                s.model_frames.to_string(),
                format!("{:.3}", s.speed_factor),
                num(s.motion_rate_before, 3),
                num(s.motion_rate_after, 3),
                num(s.gap_before, 3),
                num(s.gap_after, 3),
            ]
        })
        .collect();
    table(
        h,
        &[
            "set",
            "kind",
            "clips",
            "frames",
            "model frames",
            "speed factor",
            "motion before (px/frame)",
            "motion after",
            "gap before",
            "gap after",
        ],
        &rows,
    );
    let mut figs = Vec::new();
    let names: Vec<String> = a.sets.iter().map(|s| s.name.clone()).collect();
    let bars_of = |f: &dyn Fn(&super::figures::AlignSet) -> Option<f64>,
                   shift: f64|
     -> Vec<(f64, f64, f64)> {
        a.sets
            .iter()
            .enumerate()
            .filter_map(|(i, s)| f(s).map(|v| (i as f64 + shift - 0.2, i as f64 + shift + 0.2, v)))
            .collect()
    };
    figs.push(
        Plot::new("Motion rate per set", "set", "motion (pixels per frame)")
            .categories(names.clone())
            .bars(
                "before",
                bars_of(&|s| s.motion_rate_before, -0.2),
                PALETTE[5],
                0.8,
            )
            .bars(
                "after",
                bars_of(&|s| s.motion_rate_after, 0.2),
                PALETTE[0],
                0.8,
            ),
    );
    if a.sets.iter().any(|s| s.gap_before.is_some()) {
        figs.push(
            Plot::new(
                "Domain gap per unlabelled set",
                "set",
                "gap (squared Fréchet distance)",
            )
            .categories(names)
            .bars("before", bars_of(&|s| s.gap_before, -0.2), PALETTE[5], 0.8)
            .bars("after", bars_of(&|s| s.gap_after, 0.2), PALETTE[0], 0.8),
        );
    }
    for (ch, lo, hi, title) in [
        (0usize, 0.0, 100.0, "L* (lightness)"),
        (1, -128.0, 128.0, "a* (green–red)"),
        (2, -128.0, 128.0, "b* (blue–yellow)"),
    ] {
        let mut p = Plot::new(
            &format!("Colour histogram, {title}"),
            &format!("{title}, CIELAB units"),
            "share of pixels",
        );
        for (i, s) in a.sets.iter().enumerate() {
            let col = PALETTE[i % PALETTE.len()];
            for (hist, after) in [(&s.histogram_before, false), (&s.histogram_after, true)] {
                let Some(hist) = hist else { continue };
                let v = match ch {
                    0 => &hist.l,
                    1 => &hist.a,
                    _ => &hist.b,
                };
                let n = v.len().max(1) as f64;
                let pts = v
                    .iter()
                    .enumerate()
                    .map(|(k, &y)| (lo + (hi - lo) * (k as f64 + 0.5) / n, y))
                    .collect();
                if after {
                    p = p.line(&format!("{} after", s.name), pts, col);
                } else {
                    p = p.dashed(&format!("{} before", s.name), pts, col);
                }
            }
        }
        figs.push(p);
    }
    plots(h, &figs);
    before_after(h, g);
    if a.offsets.is_empty() {
        h.push_str("<p>Clock offsets were not estimated (the spec gives a fixed offset).</p>");
    } else {
        let pts: Vec<(f64, f64)> = a
            .offsets
            .iter()
            .map(|o| (o.estimated_s, o.correlation))
            .collect();
        let untrusted: Vec<(f64, f64)> = a
            .offsets
            .iter()
            .filter(|o| !o.trusted)
            .map(|o| (o.estimated_s, o.correlation))
            .collect();
        plots(
            h,
            &[Plot::new(
                "Estimated clock offsets",
                "offset (s, added to log times)",
                "correlation (Pearson r)",
            )
            .scatter("clips", pts, PALETTE[0])
            .scatter("not trusted (0 used)", untrusted, PALETTE[3])],
        );
        let rows: Vec<Vec<String>> = a
            .offsets
            .iter()
            .map(|o| {
                vec![
                    esc(&o.set),
                    esc(&o.id),
                    format!("{:+.3}", o.estimated_s),
                    format!("{:.3}", o.correlation),
                    format!("{:+.3}", o.offset_s),
                    if o.trusted {
                        "yes".into()
                    } else {
                        "<span class=\"bad\">no</span>".into()
                    },
                ]
            })
            .collect();
        table(
            h,
            &[
                "set",
                "clip",
                "estimated (s)",
                "correlation",
                "applied (s)",
                "trusted",
            ],
            &rows,
        );
    }
    h.push_str("</section>");
}

fn before_after(h: &mut String, g: &Gathered) {
    let run = std::path::Path::new(&g.figures.run);
    let Ok(aligned) = crate::align::AlignedRun::open(run) else {
        h.push_str("<p class=\"missing\">Sample frames: the align stage's alignment file could not be opened.</p>");
        return;
    };
    let mut sets: Vec<&str> = aligned.clips().iter().map(|c| c.set()).collect();
    sets.dedup();
    h.push_str(
        "<h3>Sample frames: decoded (left) and as the model sees them after align (right)</h3>",
    );
    for set in sets {
        let clips: Vec<_> = aligned
            .clips()
            .iter()
            .filter(|c| c.set() == set && !c.is_empty())
            .collect();
        let picks: Vec<_> = (0..4.min(clips.len()))
            .map(|i| clips[i * clips.len() / 4.min(clips.len())])
            .collect();
        let Some(first) = picks.first() else { continue };
        let (w, hh) = (first.width(), first.height());
        let tile = w * SCALE + 4;
        let mut c = Canvas::new(
            tile * picks.len() as u32 * 2 + 12,
            hh * SCALE + 4,
            [255, 255, 255],
        );
        let mut buf = vec![0u8; first.frame_bytes()];
        for (j, clip) in picks.iter().enumerate() {
            let k = clip.decode_len() / 2;
            let i = ((k as f64 * clip.speed_factor()).round() as usize).min(clip.len() - 1);
            c.blit(clip.decode_frame(k), w, hh, j as u32 * tile + 2, 2, SCALE);
            if clip.frame(i, &mut buf).is_ok() {
                c.blit(
                    &buf,
                    w,
                    hh,
                    (picks.len() + j) as u32 * tile + 12 + 2,
                    2,
                    SCALE,
                );
            }
        }
        let _ = write!(h, "<p class=\"meta\">set <b>{}</b></p>", esc(set));
        img(
            h,
            &c,
            &format!("frames of set {set} before and after align"),
            "strip",
        );
    }
}

/// Fit: training curves, comparison table, holdout scatter.
pub fn fit(h: &mut String, g: &Gathered) {
    open(h, "fit", "Fit: the inverse-dynamics model");
    let f = match &g.figures.fit {
        Section::Ok(f) => f,
        Section::Missing(note) => {
            missing(h, note);
            h.push_str("</section>");
            return;
        }
    };
    let run = std::path::Path::new(&g.figures.run);
    let (_, log) = super::fitlog::find_log(&run.join("fit"));
    match log {
        Some(log) if !log.rows.is_empty() => {
            let (xname, xs) = log.steps();
            let _ = write!(
                h,
                "<p>Training log <code>{}</code>: {} rows.</p>",
                esc(f.log_file.as_deref().unwrap_or("")),
                f.log_rows
            );
            let mut figs = Vec::new();
            for (i, name) in log.columns.iter().enumerate().filter(|(_, n)| **n != xname) {
                let pts: Vec<(f64, f64)> =
                    xs.iter().zip(&log.rows).map(|(&x, r)| (x, r[i])).collect();
                if pts.iter().all(|p| !p.1.is_finite()) {
                    continue;
                }
                figs.push(
                    Plot::new(name, &format!("training {xname}"), name)
                        .line("", pts, PALETTE[figs.len() % PALETTE.len()])
                        .size(360.0, 240.0),
                );
            }
            plots(h, &figs);
        }
        _ => missing(h, "no training log (a .csv under fit/) was found"),
    }
    if f.comparison.is_empty() {
        missing(
            h,
            "the fit stage wrote no comparison table this build understands",
        );
    } else {
        h.push_str("<h3>Comparison on held-out data</h3>");
        let figs: Vec<String> = {
            let mut v: Vec<String> = f
                .comparison
                .iter()
                .flat_map(|r| r.dims.values().flat_map(|m| m.keys().cloned()))
                .collect();
            v.sort();
            v.dedup();
            v
        };
        let mut rows = Vec::new();
        for r in &f.comparison {
            for (dim, m) in &r.dims {
                let mut row = vec![esc(&r.model), esc(&r.eval), esc(dim)];
                row.extend(figs.iter().map(|k| num(m.get(k).copied(), 3)));
                rows.push(row);
            }
        }
        let mut head = vec!["model", "evaluated on", "dimension"];
        head.extend(figs.iter().map(String::as_str));
        table(h, &head, &rows);
        if let Some(used) = f.eval_truth_used {
            let _ = write!(
                h,
                "<p class=\"meta\">Evaluation truth folder used: {}</p>",
                if used { "yes (evaluation only)" } else { "no" }
            );
        }
    }
    let dims: Vec<String> = f.holdout.iter().map(|d| d.dim.clone()).collect();
    let pairs = holdout_pairs(dims.len(), &g.labels, &g.recorded);
    if pairs.iter().all(Vec::is_empty) {
        missing(h, "no holdout estimates yet (the label stage writes them)");
    } else {
        h.push_str("<h3>Estimated against recorded action, holdout clips</h3>");
        let figs: Vec<Plot> = f
            .holdout
            .iter()
            .zip(&pairs)
            .map(|(d, p)| {
                let (lo, hi) = p
                    .iter()
                    .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &(x, y)| {
                        (a.min(x).min(y), b.max(x).max(y))
                    });
                Plot::new(
                    &format!(
                        "{}: R² {} · MAE {} (n = {})",
                        d.dim,
                        num(d.r2, 3),
                        num(d.mae, 3),
                        d.n
                    ),
                    &format!("recorded {} (action units)", d.dim),
                    &format!("estimated {}", d.dim),
                )
                .scatter("", p.clone(), PALETTE[0])
                .dashed("y = x", vec![(lo, lo), (hi, hi)], "#555555")
                .size(340.0, 300.0)
            })
            .collect();
        plots(h, &figs);
    }
    h.push_str("</section>");
}

/// Label: reliability, coverage, confidence per set, ood, codes and their strips.
pub fn label(h: &mut String, g: &Gathered) {
    open(h, "label", "Label: can the inferred actions be trusted?");
    let l = match &g.figures.label {
        Section::Ok(l) => l,
        Section::Missing(note) => {
            missing(h, note);
            h.push_str("</section>");
            return;
        }
    };
    let r = &l.reliability;
    let _ = write!(
        h,
        "<p>Confidence on holdout clips: expected calibration error <b>{}</b> over {} transitions (mean confidence {}, observed share within tolerance {}). Method: {}.</p>",
        num(Some(r.ece), 3),
        r.n,
        num(Some(r.mean_confidence), 3),
        num(Some(r.accuracy), 3),
        esc(&l.confidence_method)
    );
    let bins: Vec<(f64, f64, f64, f64, u64)> = r
        .bins
        .iter()
        .map(|b| (b.lo, b.hi, b.mean_confidence, b.accuracy, b.count))
        .collect();
    let n = l.coverage.len();
    let cov_names: Vec<String> = l.coverage.iter().map(|c| c.dim.clone()).collect();
    let cov_bars: Vec<(f64, f64, f64)> = l
        .coverage
        .iter()
        .enumerate()
        .filter_map(|(i, c)| c.holdout.map(|v| (i as f64 - 0.35, i as f64 + 0.35, v)))
        .collect();
    let nominal = l.nominal_coverage;
    let set_names: Vec<String> = l.sets.iter().map(|s| s.set.clone()).collect();
    let ood_bars: Vec<(f64, f64, f64)> = l
        .sets
        .iter()
        .enumerate()
        .filter_map(|(i, s)| s.ood_share.map(|v| (i as f64 - 0.35, i as f64 + 0.35, v)))
        .collect();
    let mut figs = vec![
        reliability("Reliability of confidence (holdout)", &bins),
        Plot::new(
            &format!("Interval coverage vs nominal {:.0}%", nominal * 100.0),
            "action dimension",
            "holdout coverage",
        )
        .categories(cov_names)
        .y_range(0.0, 1.0)
        .bars("holdout coverage", cov_bars, PALETTE[0], 0.8)
        .dashed(
            "nominal",
            vec![(-0.5, nominal), (n.max(1) as f64 - 0.5, nominal)],
            PALETTE[3],
        ),
        Plot::new(
            "Out-of-distribution share per set",
            "set",
            "share of transitions flagged",
        )
        .categories(set_names)
        .bars("", ood_bars, PALETTE[3], 0.8),
    ];
    let mut conf = Plot::new(
        "Confidence per set",
        "confidence",
        "share of the set's transitions",
    )
    .x_range(0.0, 1.0);
    for (i, s) in l.sets.iter().enumerate() {
        let total: u64 = s.confidence_hist.iter().sum::<u64>().max(1);
        let pts = s
            .confidence_hist
            .iter()
            .enumerate()
            .map(|(k, &c)| (k as f64 * 0.1 + 0.05, c as f64 / total as f64))
            .collect();
        conf = conf.line(&s.set, pts, PALETTE[i % PALETTE.len()]);
    }
    figs.push(conf);
    let codes: Vec<String> = l.codes.iter().map(|c| c.code.to_string()).collect();
    let code_bars = l
        .codes
        .iter()
        .enumerate()
        .map(|(i, c)| (i as f64 - 0.4, i as f64 + 0.4, c.count as f64))
        .collect();
    let code_lab = l
        .codes
        .iter()
        .enumerate()
        .map(|(i, c)| (i as f64 - 0.4, i as f64 + 0.4, c.count_labelled as f64))
        .collect();
    figs.push(
        Plot::new("Code usage", "action code", "transitions")
            .categories(codes)
            .bars("all clips", code_bars, PALETTE[0], 0.8)
            .bars("labelled clips", code_lab, PALETTE[1], 0.9),
    );
    plots(h, &figs);
    let rows: Vec<Vec<String>> = l
        .coverage
        .iter()
        .map(|c| {
            vec![
                esc(&c.dim),
                num(c.holdout, 3),
                num(c.holdout_in_range, 3),
                num(Some(c.calib), 3),
                num(Some(nominal), 3),
                num(c.quantile, 3),
            ]
        })
        .collect();
    table(
        h,
        &[
            "dimension",
            "holdout coverage",
            "holdout, clips in calib motion range",
            "calib coverage",
            "nominal",
            "conformal quantile",
        ],
        &rows,
    );
    let rows: Vec<Vec<String>> = l
        .sets
        .iter()
        .map(|s| {
            vec![
                esc(&s.set),
                if s.labelled { "labelled" } else { "unlabelled" }.into(),
                s.clips.to_string(),
                s.transitions.to_string(),
                num(s.mean_confidence, 3),
                num(s.ood_share, 3),
                s.beyond_calib_range.to_string(),
            ]
        })
        .collect();
    table(
        h,
        &[
            "set",
            "kind",
            "clips",
            "transitions",
            "mean confidence",
            "ood share",
            "clips beyond calib motion range",
        ],
        &rows,
    );
    code_strips(h, g, l);
    h.push_str("</section>");
}

/// Arrow length in pixels per action unit so the largest of `actions` spans `max_px`.
fn arrow_scale(actions: impl Iterator<Item = (f64, f64)>, max_px: f64) -> f64 {
    let m = actions
        .map(|(x, y)| (x * x + y * y).sqrt())
        .filter(|v| v.is_finite())
        .fold(0.0, f64::max);
    if m > 0.0 { max_px / m } else { 0.0 }
}

fn code_strips(h: &mut String, g: &Gathered, l: &super::figures::LabelFigures) {
    let Some((ix, iy)) = planar_dims(&l.dims) else {
        return;
    };
    if l.code_examples.is_empty() {
        return;
    }
    let means: Vec<(f64, f64)> = l
        .code_examples
        .iter()
        .filter_map(|(code, _)| l.codes.iter().find(|c| c.code == *code))
        .filter(|c| c.mean_action.len() > ix.max(iy))
        .map(|c| (c.mean_action[ix], c.mean_action[iy]))
        .collect();
    let Some(size) = g.records.first().map(|r| (r.width, r.height)) else {
        return;
    };
    let scale = arrow_scale(
        means.iter().copied(),
        size.0.min(size.1) as f64 * SCALE as f64 * 0.42,
    );
    let _ = write!(
        h,
        "<h3>Most-used codes</h3><p class=\"meta\">Each strip shows frames whose transition got the code; the arrow is the code's mean inferred ({}, {}), drawn from the frame centre in image axes (y down), scaled so the longest arrow on this page section spans 42% of a frame.</p>",
        esc(&l.dims[ix]),
        esc(&l.dims[iy])
    );
    for (code, refs) in &l.code_examples {
        let Some(c) = l.codes.iter().find(|c| c.code == *code) else {
            continue;
        };
        let (mx, my) = (
            c.mean_action.get(ix).copied().unwrap_or(0.0),
            c.mean_action.get(iy).copied().unwrap_or(0.0),
        );
        let strip = strip(g, refs, |_| Some((mx, my)), scale);
        let mean = c
            .mean_action
            .iter()
            .map(|v| format!("{v:+.3}"))
            .collect::<Vec<_>>()
            .join(", ");
        let _ = write!(
            h,
            "<p class=\"meta\">code <b>{code}</b>: {} transitions ({} labelled); mean action ({})</p>",
            c.count,
            c.count_labelled,
            esc(&mean)
        );
        if let Some(s) = strip {
            img(h, &s, &format!("frames with code {code}"), "strip");
        }
    }
}

/// Frames of `refs` side by side, each with the arrow `arrow(ref)` (action units).
fn strip(
    g: &Gathered,
    refs: &[FrameRef],
    arrow: impl Fn(&FrameRef) -> Option<(f64, f64)>,
    scale: f64,
) -> Option<Canvas> {
    let (w, hh) = g.records.first().map(|r| (r.width, r.height))?;
    let tile = w * SCALE + 4;
    let mut c = Canvas::new(
        tile * refs.len().max(1) as u32,
        hh * SCALE + 4,
        [255, 255, 255],
    );
    let mut any = false;
    for (j, r) in refs.iter().enumerate() {
        let Some(fr) = reader(g, &r.set, &r.id) else {
            continue;
        };
        if (r.frame as usize) >= fr.len() || fr.width() != w || fr.height() != hh {
            continue;
        }
        let x = j as u32 * tile + 2;
        c.blit(fr.frame(r.frame as usize), w, hh, x, 2, SCALE);
        if let Some((dx, dy)) = arrow(r) {
            let (cx, cy) = (
                x as f64 + (w * SCALE) as f64 / 2.0,
                2.0 + (hh * SCALE) as f64 / 2.0,
            );
            c.arrow(cx, cy, dx * scale, dy * scale, ARROW);
        }
        any = true;
    }
    any.then_some(c)
}

/// The unlabelled contact sheet and the "hand-label these first" list.
pub fn unlabelled(h: &mut String, g: &Gathered) {
    open(h, "unlabelled", "Unlabelled frames with inferred actions");
    let l = match &g.figures.label {
        Section::Ok(l) => l,
        Section::Missing(note) => {
            missing(h, note);
            h.push_str("</section>");
            return;
        }
    };
    match planar_dims(&l.dims) {
        Some((ix, iy)) if !l.contact_sheet.is_empty() => {
            let scale = arrow_scale(
                l.contact_sheet
                    .iter()
                    .filter(|r| r.action_est.len() > ix.max(iy))
                    .map(|r| (r.action_est[ix], r.action_est[iy])),
                g.records
                    .first()
                    .map_or(64.0, |r| r.width.min(r.height) as f64)
                    * SCALE as f64
                    * 0.42,
            );
            let _ = write!(
                h,
                "<p class=\"meta\">Arrow: inferred ({}, {}) from the frame to the next, from the frame centre, image axes (y down), longest arrow = 42% of a frame. Caption: calibrated confidence; <span class=\"bad\">ood</span> marks transitions beyond what the labelled clips showed.</p><div class=\"tiles\">",
                esc(&l.dims[ix]),
                esc(&l.dims[iy])
            );
            for r in &l.contact_sheet {
                let Some(c) = strip(
                    g,
                    std::slice::from_ref(r),
                    |r| {
                        r.action_est
                            .get(ix)
                            .zip(r.action_est.get(iy))
                            .map(|(&x, &y)| (x, y))
                    },
                    scale,
                ) else {
                    continue;
                };
                h.push_str("<figure>");
                img(h, &c, &format!("{}/{} frame {}", r.set, r.id, r.frame), "");
                let _ = write!(
                    h,
                    "<figcaption>conf {:.2}{}<br>{} #{}</figcaption></figure>",
                    r.confidence,
                    if r.ood {
                        " <span class=\"bad\">ood</span>"
                    } else {
                        ""
                    },
                    esc(&r.id),
                    r.frame
                );
            }
            h.push_str("</div>");
        }
        _ => missing(
            h,
            "no unlabelled transitions with at least two action dimensions to draw",
        ),
    }
    h.push_str("<h3>Hand-label these first: unlabelled clips with the lowest mean confidence</h3>");
    let rows: Vec<Vec<String>> = l
        .lowest_confidence
        .iter()
        .enumerate()
        .map(|(i, c)| {
            vec![
                (i + 1).to_string(),
                esc(&c.set),
                esc(&c.id),
                c.transitions.to_string(),
                format!("{:.3}", c.mean_confidence),
                format!("{:.3}", c.ood_share),
            ]
        })
        .collect();
    if rows.is_empty() {
        h.push_str("<p>No unlabelled clip has labels.</p>");
    } else {
        table(
            h,
            &[
                "rank",
                "set",
                "clip",
                "transitions",
                "mean confidence",
                "ood share",
            ],
            &rows,
        );
    }
    h.push_str("</section>");
}
