//! The HTML report page: one self-contained file (inline CSS, inline SVG
//! plots, PNG pictures as data URIs, no script, no network), built from the
//! gathered figures. This file holds the page frame, the run summary, the
//! decode and shard sections and the HTML helpers; [`super::html_stages`]
//! holds align, fit, label and the contact sheet.

use std::fmt::Write as _;

use super::collect::Gathered;
use super::figures::{RunFigures, Section};
use super::svg::{PALETTE, Plot, esc};

const CSS: &str = r#"
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,Helvetica,Arial,sans-serif;margin:0;background:#f2f3f5;color:#1d2125;line-height:1.4}
main{max-width:1180px;margin:0 auto;padding:12px 20px 40px}
h1{font-size:1.55em;margin:.6em 0 .2em}h2{font-size:1.25em;margin:1.6em 0 .4em;border-bottom:2px solid #2f6db5;padding-bottom:2px}
h3{font-size:1.02em;margin:1em 0 .3em}
section{background:#fff;border-radius:6px;padding:4px 16px 14px;margin:14px 0;box-shadow:0 1px 2px #0002}
table{border-collapse:collapse;margin:.4em 0;font-size:.88em}td,th{border:1px solid #d4d7db;padding:3px 8px;text-align:left;vertical-align:top}
th{background:#eef1f4}td.n{text-align:right;font-variant-numeric:tabular-nums}
.caution{background:#fff4d6;border-left:5px solid #d9822b;padding:8px 14px;margin:10px 0}
.missing{background:#f4f4f4;border-left:5px solid #999;padding:6px 12px;color:#444}
.bad{color:#b8424b;font-weight:600}.good{color:#2f7a45;font-weight:600}
.plots{display:flex;flex-wrap:wrap;gap:10px}.plots svg{max-width:100%;height:auto;border:1px solid #e4e4e4}
.pt{font:600 13px sans-serif}.tk{font:10px sans-serif;fill:#333}.al{font:11px sans-serif;fill:#222}.lg{font:10px sans-serif}.pn{font:12px sans-serif;fill:#777}
.tiles{display:flex;flex-wrap:wrap;gap:8px}figure{margin:0;background:#fafafa;border:1px solid #ddd;padding:3px;font-size:.74em;text-align:center}
figure img{display:block;image-rendering:pixelated}img.strip{max-width:100%;image-rendering:pixelated}
.meta{color:#555;font-size:.85em}code{background:#eef1f4;padding:0 3px;border-radius:3px}
nav a{margin-right:12px}
"#;

/// Renders the whole page.
pub fn page(g: &Gathered) -> String {
    let f = &g.figures;
    let mut h = String::with_capacity(1 << 20);
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"><title>actuary report: {}</title><style>{CSS}</style></head><body><main>",
        esc(&f.run)
    );
    let _ = write!(
        h,
        "<h1>actuary run report</h1><p class=\"meta\">run folder <code>{}</code> · report by actuary {}</p>",
        esc(&f.run),
        esc(&f.tool_version)
    );
    h.push_str("<nav><a href=\"#summary\">summary</a><a href=\"#decode\">decode</a><a href=\"#align\">align</a><a href=\"#fit\">fit</a><a href=\"#label\">label</a><a href=\"#unlabelled\">unlabelled frames</a><a href=\"#shard\">shards</a></nav>");
    for c in &f.cautions {
        let _ = write!(h, "<div class=\"caution\"><b>Caution.</b> {}</div>", esc(c));
    }
    summary(&mut h, f);
    decode(&mut h, g);
    super::html_stages::align(&mut h, g);
    super::html_stages::fit(&mut h, g);
    super::html_stages::label(&mut h, g);
    super::html_stages::unlabelled(&mut h, g);
    shard(&mut h, f);
    // The figures this page was drawn from, as data (not script): `inspect --json` prints the same.
    let json = serde_json::to_string(f)
        .unwrap_or_default()
        .replace("</", "<\\/");
    let _ = write!(
        h,
        "<script type=\"application/json\" id=\"actuary-figures\">{json}</script>"
    );
    h.push_str("</main></body></html>\n");
    h
}

/// Opens a section with its heading.
pub fn open(h: &mut String, id: &str, title: &str) {
    let _ = write!(h, "<section id=\"{id}\"><h2>{}</h2>", esc(title));
}

/// Writes the "missing" note of a section.
pub fn missing(h: &mut String, note: &str) {
    let _ = write!(h, "<p class=\"missing\">Not available: {}</p>", esc(note));
}

/// A table from a header and rows of already-escaped HTML cells; cells that
/// look numeric are right-aligned.
pub fn table(h: &mut String, head: &[&str], rows: &[Vec<String>]) {
    h.push_str("<table><tr>");
    for c in head {
        let _ = write!(h, "<th>{}</th>", esc(c));
    }
    h.push_str("</tr>");
    for r in rows {
        h.push_str("<tr>");
        for c in r {
            let numeric = !c.is_empty()
                && c.trim_start_matches(['-', '+'])
                    .chars()
                    .all(|ch| ch.is_ascii_digit() || ".e%x ".contains(ch));
            let _ = write!(
                h,
                "<td{}>{c}</td>",
                if numeric { " class=\"n\"" } else { "" }
            );
        }
        h.push_str("</tr>");
    }
    h.push_str("</table>");
}

/// A number with `d` decimals, `-` when absent or not finite.
pub fn num(v: Option<f64>, d: usize) -> String {
    match v {
        Some(x) if x.is_finite() => format!("{x:.d$}"),
        _ => "-".to_string(),
    }
}

/// A row of plots.
pub fn plots(h: &mut String, plots: &[Plot]) {
    h.push_str("<div class=\"plots\">");
    for p in plots {
        h.push_str(&p.to_svg());
    }
    h.push_str("</div>");
}

/// Bytes in human units (10^6 = MB).
pub fn bytes(n: u64) -> String {
    match n {
        n if n >= 1_000_000_000 => format!("{:.2} GB", n as f64 / 1e9),
        n if n >= 1_000_000 => format!("{:.2} MB", n as f64 / 1e6),
        n if n >= 1_000 => format!("{:.1} kB", n as f64 / 1e3),
        n => format!("{n} B"),
    }
}

fn summary(h: &mut String, f: &RunFigures) {
    open(h, "summary", "Run summary");
    let _ = write!(
        h,
        "<p>Spec: <code>{}</code> · spec sha256 <code>{}</code></p>",
        esc(f.spec.path.as_deref().unwrap_or("not recorded by this run")),
        esc(f.spec.sha256.as_deref().unwrap_or("not recorded"))
    );
    h.push_str("<h3>Stages</h3>");
    let rows: Vec<Vec<String>> = f
        .stages
        .iter()
        .map(|s| {
            let timings = s
                .timings
                .iter()
                .filter(|(k, _)| k.as_str() != "total_s")
                .map(|(k, v)| format!("{} {v:.1} s", esc(k)))
                .collect::<Vec<_>>()
                .join(", ");
            vec![
                esc(&s.stage),
                if s.present {
                    "<span class=\"good\">done</span>".into()
                } else {
                    format!(
                        "<span class=\"bad\">missing</span> {}",
                        esc(s.note.as_deref().unwrap_or(""))
                    )
                },
                esc(s.tool_version.as_deref().unwrap_or("-")),
                esc(s.key.as_deref().unwrap_or("-")),
                num(s.timings.get("total_s").copied(), 1),
                timings,
            ]
        })
        .collect();
    table(
        h,
        &[
            "stage",
            "status",
            "tool version",
            "key",
            "total (s)",
            "parts",
        ],
        &rows,
    );
    let timed: Vec<(usize, &str, f64)> = f
        .stages
        .iter()
        .enumerate()
        .filter_map(|(i, s)| s.timings.get("total_s").map(|t| (i, s.stage.as_str(), *t)))
        .collect();
    if !timed.is_empty() {
        let names = f.stages.iter().map(|s| s.stage.clone()).collect();
        let bars = timed
            .iter()
            .map(|&(i, _, t)| (i as f64 - 0.4, i as f64 + 0.4, t))
            .collect();
        plots(
            h,
            &[Plot::new("Stage timings", "stage", "wall time (s)")
                .categories(names)
                .bars("", bars, PALETTE[0], 0.8)],
        );
    }
    match &f.decode {
        Section::Ok(d) => {
            h.push_str("<h3>Clips and frames per set</h3>");
            let rows: Vec<Vec<String>> = d
                .sets
                .iter()
                .map(|s| {
                    vec![
                        esc(&s.set),
                        if s.labelled { "labelled" } else { "unlabelled" }.into(),
                        s.clips.to_string(),
                        s.frames.to_string(),
                        s.skipped.to_string(),
                    ]
                })
                .collect();
            table(h, &["set", "kind", "clips", "frames", "skipped"], &rows);
            skipped(h, d);
        }
        Section::Missing(note) => missing(h, note),
    }
    h.push_str("</section>");
}

fn skipped(h: &mut String, d: &super::figures::DecodeFigures) {
    if d.skipped.is_empty() {
        h.push_str("<p>No clip was skipped.</p>");
        return;
    }
    let _ = write!(h, "<h3>Skipped clips ({})</h3>", d.skipped.len());
    let rows: Vec<Vec<String>> = d
        .skipped
        .iter()
        .map(|k| vec![esc(&k.set), esc(&k.id), esc(&k.reason)])
        .collect();
    table(h, &["set", "clip", "reason"], &rows);
}

fn decode(h: &mut String, g: &Gathered) {
    open(h, "decode", "Decode");
    let d = match &g.figures.decode {
        Section::Ok(d) => d,
        Section::Missing(note) => {
            missing(h, note);
            h.push_str("</section>");
            return;
        }
    };
    let _ = write!(
        h,
        "<p>Output: {} fps, {} pixels. Resampling by timestamps dropped <b>{}</b> source frame(s) and repeated <b>{}</b> output frame(s) in all.</p>",
        num(d.fps, 3),
        d.size.map_or("-".into(), |(w, hh)| format!("{w}x{hh}")),
        d.dropped,
        d.repeated
    );
    let fmt_rows: Vec<Vec<String>> = d
        .formats
        .iter()
        .map(|(k, v)| vec![esc(k), v.to_string()])
        .collect();
    table(h, &["source format (container/codec)", "clips"], &fmt_rows);
    let fps: Vec<f64> = d.clips.iter().map(|c| c.source_fps).collect();
    let (lo, hi) = fps
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
            (a.min(v), b.max(v))
        });
    let (edges, counts) =
        super::svg::histogram(&fps, lo.floor(), hi.ceil().max(lo.floor() + 1.0), 12);
    let mut sizes: std::collections::BTreeMap<&str, f64> = Default::default();
    for c in &d.clips {
        *sizes.entry(c.source_size.as_str()).or_default() += 1.0;
    }
    let size_bars = sizes
        .values()
        .enumerate()
        .map(|(i, &v)| (i as f64 - 0.4, i as f64 + 0.4, v))
        .collect();
    let per_clip: Vec<(f64, f64)> = d
        .clips
        .iter()
        .enumerate()
        .map(|(i, c)| (i as f64, c.dropped as f64))
        .collect();
    let per_clip_rep: Vec<(f64, f64)> = d
        .clips
        .iter()
        .enumerate()
        .map(|(i, c)| (i as f64, c.repeated as f64))
        .collect();
    plots(
        h,
        &[
            Plot::new("Source frame rates", "source fps (frames/s)", "clips")
                .histogram("", &edges, &counts, PALETTE[0], 0.8),
            Plot::new("Source frame sizes", "width x height (pixels)", "clips")
                .categories(sizes.keys().map(|s| s.to_string()).collect())
                .bars("", size_bars, PALETTE[2], 0.8),
            Plot::new(
                "Dropped and repeated frames",
                "clip (index in table order)",
                "frames",
            )
            .scatter("dropped", per_clip, PALETTE[3])
            .scatter("repeated", per_clip_rep, PALETTE[1]),
        ],
    );
    let mut worst: Vec<&super::figures::DecodedClip> = d
        .clips
        .iter()
        .filter(|c| c.dropped + c.repeated > 0)
        .collect();
    worst.sort_by(|a, b| (b.dropped + b.repeated).cmp(&(a.dropped + a.repeated)));
    let rows: Vec<Vec<String>> = worst
        .iter()
        .take(12)
        .map(|c| {
            vec![
                esc(&c.set),
                esc(&c.id),
                esc(&c.format),
                format!("{:.3}", c.source_fps),
                esc(&c.source_size),
                format!("{:.2}", c.duration_s),
                c.frames.to_string(),
                c.dropped.to_string(),
                c.repeated.to_string(),
                esc(&c.colour),
            ]
        })
        .collect();
    if rows.is_empty() {
        h.push_str("<p>No clip needed dropped or repeated frames.</p>");
    } else {
        h.push_str("<h3>Clips with the most dropped or repeated frames</h3>");
        table(
            h,
            &[
                "set",
                "clip",
                "format",
                "fps",
                "size",
                "duration (s)",
                "frames",
                "dropped",
                "repeated",
                "colour",
            ],
            &rows,
        );
    }
    if !d.unreadable.is_empty() {
        let _ = write!(
            h,
            "<p class=\"bad\">{} clip record(s) could not be read: {}</p>",
            d.unreadable.len(),
            esc(&d.unreadable.join("; "))
        );
    }
    h.push_str("</section>");
}

fn shard(h: &mut String, f: &RunFigures) {
    open(h, "shard", "Shards");
    let s = match &f.shard {
        Section::Ok(s) => s,
        Section::Missing(note) => {
            missing(h, note);
            h.push_str("</section>");
            return;
        }
    };
    let verdict = match s.all_ok {
        Some(true) => "<span class=\"good\">every checksum and row count verified</span>",
        Some(false) => "<span class=\"bad\">verification FAILED for at least one file</span>",
        None => "not verified",
    };
    let _ = write!(
        h,
        "<p>{} file(s), {} rows, {} on disk: {verdict}.</p>",
        s.files.len(),
        s.rows,
        bytes(s.bytes)
    );
    let rows: Vec<Vec<String>> = s
        .files
        .iter()
        .map(|x| {
            vec![
                esc(&x.file),
                x.bytes.map_or("missing".into(), bytes),
                x.rows.map_or("-".into(), |r| r.to_string()),
                x.footer_rows.map_or("-".into(), |r| r.to_string()),
                format!("<code>{}</code>", esc(x.sha256.as_deref().unwrap_or("-"))),
                match x.verified {
                    Some(true) => "<span class=\"good\">ok</span>".into(),
                    Some(false) => "<span class=\"bad\">MISMATCH</span>".into(),
                    None => "-".into(),
                },
            ]
        })
        .collect();
    table(
        h,
        &[
            "file",
            "size",
            "rows (manifest)",
            "rows (footer)",
            "sha256 (manifest)",
            "checksum",
        ],
        &rows,
    );
    if !s.rows_per_set.is_empty() {
        let rows: Vec<Vec<String>> = s
            .rows_per_set
            .iter()
            .map(|(k, v)| vec![esc(k), v.to_string()])
            .collect();
        table(h, &["set", "rows"], &rows);
    }
    if !s.extra_files.is_empty() {
        let _ = write!(
            h,
            "<p class=\"bad\">Unexpected file(s) in the shard folder: {}</p>",
            esc(&s.extra_files.join(", "))
        );
    }
    if !s.columns.is_empty() {
        let _ = write!(
            h,
            "<p class=\"meta\">Columns: {}</p>",
            esc(&s.columns.join(", "))
        );
    }
    h.push_str("</section>");
}
