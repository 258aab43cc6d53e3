//! `actuary inspect RUN [STAGE] [--json] [--verify]`: what each stage
//! produced, as text or JSON, from the same gathered figures the HTML report
//! draws (see [`super::collect`]). `--json` prints [`RunFigures`] (only the
//! asked stage's section and stage row when a stage is given); `--verify`
//! re-hashes every shard file.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use super::collect::{Gathered, gather};
use super::figures::{RunFigures, Section, StageRow};
use super::html::{bytes, num};
use crate::runner::Stage;

/// Errors inspecting a run or writing its report.
#[derive(Debug, thiserror::Error)]
pub enum InspectError {
    /// The run folder does not exist.
    #[error("{run} is not a run folder (it does not exist or is not a folder)")]
    NoRun {
        /// The run folder.
        run: PathBuf,
    },
    /// The manifest could not be read.
    #[error("cannot read manifest {path}: {source}")]
    Manifest {
        /// The file.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// The run has no output for the stage.
    #[error("{run} has no {stage} stage output (no {stage}/manifest.json)")]
    Missing {
        /// The run folder.
        run: PathBuf,
        /// The stage.
        stage: Stage,
    },
    /// Not built yet.
    #[error("`{0}` is not available in this build yet")]
    NotBuilt(&'static str),
    /// JSON encoding failed.
    #[error("encoding JSON: {0}")]
    Json(#[from] serde_json::Error),
    /// The report could not be written.
    #[error("writing report {path}: {source}")]
    Write {
        /// The file.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
}

/// Renders the summary of one stage (or every stage) of `run`.
pub fn inspect(
    run: &Path,
    stage: Option<Stage>,
    json: bool,
    verify: bool,
) -> Result<String, InspectError> {
    if !run.is_dir() {
        return Err(InspectError::NoRun {
            run: run.to_path_buf(),
        });
    }
    if let Some(s) = stage {
        let path = crate::store::StageManifest::path(run, s.name());
        match crate::store::StageManifest::read(run, s.name()) {
            Ok(Some(_)) => {}
            Ok(None) => {
                return Err(InspectError::Missing {
                    run: run.to_path_buf(),
                    stage: s,
                });
            }
            Err(source) => return Err(InspectError::Manifest { path, source }),
        }
    }
    let g = gather(run, verify);
    if json {
        return Ok(serde_json::to_string_pretty(&json_value(&g.figures, stage)?)? + "\n");
    }
    Ok(text(&g, stage))
}

/// The `--json` value: every figure, or only `stage`'s section and row.
pub fn json_value(
    f: &RunFigures,
    stage: Option<Stage>,
) -> Result<serde_json::Value, serde_json::Error> {
    let mut v = serde_json::to_value(f)?;
    if let (Some(s), Some(obj)) = (stage, v.as_object_mut()) {
        for other in Stage::ALL.into_iter().filter(|o| *o != s) {
            obj.remove(other.name());
        }
        obj.insert(
            "stages".into(),
            serde_json::to_value(
                f.stages
                    .iter()
                    .filter(|r| r.stage == s.name())
                    .collect::<Vec<&StageRow>>(),
            )?,
        );
    }
    Ok(v)
}

fn text(g: &Gathered, stage: Option<Stage>) -> String {
    let f = &g.figures;
    let mut o = String::new();
    if stage.is_none() {
        let _ = writeln!(o, "run {}", f.run);
        let _ = writeln!(
            o,
            "spec {} (sha256 {})",
            f.spec.path.as_deref().unwrap_or("not recorded"),
            f.spec.sha256.as_deref().unwrap_or("not recorded")
        );
    }
    for row in f
        .stages
        .iter()
        .filter(|r| stage.is_none_or(|s| s.name() == r.stage))
    {
        let s = Stage::parse(&row.stage).expect("stage rows are named by Stage::name");
        match &row.note {
            Some(note) => {
                let _ = writeln!(o, "== {}: {note}", row.stage);
                continue;
            }
            None => {
                let _ = writeln!(
                    o,
                    "== {} (tool {}, key {}, {} s)",
                    row.stage,
                    row.tool_version.as_deref().unwrap_or("?"),
                    row.key.as_deref().unwrap_or("?"),
                    num(row.timings.get("total_s").copied(), 2)
                );
            }
        }
        for (k, v) in &row.counts {
            let _ = writeln!(o, "  {k:<24} {v}");
        }
        for (k, v) in row.timings.iter().filter(|(k, _)| k.as_str() != "total_s") {
            let _ = writeln!(o, "  {k:<24} {v:.2} s");
        }
        match s {
            Stage::Decode => decode(&mut o, f),
            Stage::Align => align(&mut o, f),
            Stage::Fit => fit(&mut o, f),
            Stage::Label => label(&mut o, f),
            Stage::Shard => shard(&mut o, f),
        }
    }
    if stage.is_none() {
        for c in &f.cautions {
            let _ = writeln!(o, "caution: {c}");
        }
    }
    o
}

fn note<T>(o: &mut String, s: &Section<T>) -> bool {
    if let Section::Missing(n) = s {
        let _ = writeln!(o, "  not available: {n}");
        return true;
    }
    false
}

fn decode(o: &mut String, f: &RunFigures) {
    if note(o, &f.decode) {
        return;
    }
    let d = f.decode.get().expect("checked");
    let _ = writeln!(
        o,
        "  output {} fps, {}; dropped {} repeated {}",
        num(d.fps, 3),
        d.size.map_or("-".into(), |(w, h)| format!("{w}x{h}")),
        d.dropped,
        d.repeated
    );
    for s in &d.sets {
        let _ = writeln!(
            o,
            "  set {:<12} {:<10} clips {:>5} frames {:>8} skipped {}",
            s.set,
            if s.labelled { "labelled" } else { "unlabelled" },
            s.clips,
            s.frames,
            s.skipped
        );
    }
    for (k, v) in &d.formats {
        let _ = writeln!(o, "  format {k:<20} {v} clip(s)");
    }
    let _ = writeln!(
        o,
        "  {:<12} {:<24} {:>6} {:>8} {:>10} {:>9} {:>5} {:>5} colour",
        "set", "clip", "frames", "src fps", "src size", "dur (s)", "drop", "rep"
    );
    for c in &d.clips {
        let _ = writeln!(
            o,
            "  {:<12} {:<24} {:>6} {:>8.3} {:>10} {:>9.2} {:>5} {:>5} {}",
            c.set,
            c.id,
            c.frames,
            c.source_fps,
            c.source_size,
            c.duration_s,
            c.dropped,
            c.repeated,
            c.colour
        );
    }
    for k in &d.skipped {
        let _ = writeln!(o, "  skipped {}/{}: {}", k.set, k.id, k.reason);
    }
    for u in &d.unreadable {
        let _ = writeln!(o, "  unreadable record {u}");
    }
}

fn align(o: &mut String, f: &RunFigures) {
    if note(o, &f.align) {
        return;
    }
    let a = f.align.get().expect("checked");
    let _ = writeln!(
        o,
        "  domain gap {} -> {} ({})",
        num(a.gap_before, 3),
        num(a.gap_after, 3),
        a.gap_method
    );
    let _ = writeln!(
        o,
        "  motion px/frame: labelled {}, unlabelled {}, ratio {}; resampled: {}",
        num(a.labelled_motion_rate, 3),
        num(a.unlabelled_motion_rate, 3),
        num(a.motion_ratio, 3),
        a.resampled.as_deref().unwrap_or("none")
    );
    for s in &a.sets {
        let _ = writeln!(
            o,
            "  set {:<12} clips {:>4} frames {:>7} model frames {:>7} speed x{:.3} motion {} -> {} gap {} -> {}",
            s.name,
            s.clips,
            s.frames,
            s.model_frames,
            s.speed_factor,
            num(s.motion_rate_before, 3),
            num(s.motion_rate_after, 3),
            num(s.gap_before, 3),
            num(s.gap_after, 3)
        );
    }
    for x in &a.offsets {
        let _ = writeln!(
            o,
            "  offset {}/{}: estimated {:+.3} s, r = {:.3}, applied {:+.3} s{}",
            x.set,
            x.id,
            x.estimated_s,
            x.correlation,
            x.offset_s,
            if x.trusted { "" } else { " (not trusted)" }
        );
    }
}

fn fit(o: &mut String, f: &RunFigures) {
    if note(o, &f.fit) {
        return;
    }
    let x = f.fit.get().expect("checked");
    let _ = writeln!(
        o,
        "  training log {} ({} rows)",
        x.log_file.as_deref().unwrap_or("none"),
        x.log_rows
    );
    for c in &x.log_columns {
        let _ = writeln!(o, "    last {:<22} {}", c.name, num(c.last, 4));
    }
    if x.comparison.is_empty() {
        let _ = writeln!(o, "  comparison table: not available");
    }
    for r in &x.comparison {
        for (dim, m) in &r.dims {
            let figs = m
                .iter()
                .map(|(k, v)| format!("{k} {v:.3}"))
                .collect::<Vec<_>>()
                .join("  ");
            let _ = writeln!(o, "  {:<18} on {:<12} {:<8} {figs}", r.model, r.eval, dim);
        }
    }
    if let Some(u) = x.eval_truth_used {
        let _ = writeln!(
            o,
            "  evaluation truth used: {}",
            if u { "yes" } else { "no" }
        );
    }
    for d in &x.holdout {
        let _ = writeln!(
            o,
            "  holdout {:<8} n {:>6} R2 {} MAE {}",
            d.dim,
            d.n,
            num(d.r2, 3),
            num(d.mae, 3)
        );
    }
}

fn label(o: &mut String, f: &RunFigures) {
    if note(o, &f.label) {
        return;
    }
    let l = f.label.get().expect("checked");
    let _ = writeln!(
        o,
        "  alpha {:.3} (nominal coverage {:.3})",
        l.alpha, l.nominal_coverage
    );
    for c in &l.coverage {
        let _ = writeln!(
            o,
            "  coverage {:<8} holdout {} (clips in calib motion range {}) calib {:.3} quantile {}",
            c.dim,
            num(c.holdout, 3),
            num(c.holdout_in_range, 3),
            c.calib,
            num(c.quantile, 3)
        );
    }
    if !l.calib_motion_range.is_empty() {
        let range: Vec<String> = l
            .dims
            .iter()
            .zip(&l.calib_motion_range)
            .map(|(d, r)| format!("{d} {r:.3}"))
            .collect();
        let _ = writeln!(
            o,
            "  calib motion range (largest clip mean |action_est|): {}; holdout clips beyond it: {}",
            range.join(", "),
            if l.holdout_beyond_range.is_empty() {
                "none".to_string()
            } else {
                l.holdout_beyond_range.join(", ")
            }
        );
    }
    let r = &l.reliability;
    let _ = writeln!(
        o,
        "  confidence (holdout, n {}): ECE {:.3}, mean {:.3}, observed {:.3}; holdout ood share {}",
        r.n,
        r.ece,
        r.mean_confidence,
        r.accuracy,
        num(l.holdout_ood_share, 3)
    );
    for b in r.bins.iter().filter(|b| b.count > 0) {
        let _ = writeln!(
            o,
            "    bin [{:.1}, {:.1}) n {:>6} mean conf {:.3} observed {:.3}",
            b.lo, b.hi, b.count, b.mean_confidence, b.accuracy
        );
    }
    for s in &l.sets {
        let _ = writeln!(
            o,
            "  set {:<12} clips {:>4} transitions {:>7} mean confidence {} ood share {} beyond calib motion range {} clips",
            s.set,
            s.clips,
            s.transitions,
            num(s.mean_confidence, 3),
            num(s.ood_share, 3),
            s.beyond_calib_range
        );
    }
    let used = l.codes.iter().filter(|c| c.count > 0).count();
    let _ = writeln!(o, "  codes used {used} of {}", l.codes.len());
    let mut top: Vec<_> = l.codes.iter().filter(|c| c.count > 0).collect();
    top.sort_by(|a, b| b.count.cmp(&a.count).then(a.code.cmp(&b.code)));
    for c in top.iter().take(10) {
        let mean = c
            .mean_action
            .iter()
            .map(|v| format!("{v:+.3}"))
            .collect::<Vec<_>>()
            .join(", ");
        let _ = writeln!(
            o,
            "    code {:>3} count {:>7} labelled {:>6} mean action ({mean})",
            c.code, c.count, c.count_labelled
        );
    }
    let _ = writeln!(o, "  hand-label these first (lowest mean confidence):");
    for (i, c) in l.lowest_confidence.iter().enumerate() {
        let _ = writeln!(
            o,
            "    {:>2}. {}/{} mean confidence {:.3} ood share {:.3}",
            i + 1,
            c.set,
            c.id,
            c.mean_confidence,
            c.ood_share
        );
    }
    for u in &l.unreadable {
        let _ = writeln!(o, "  unreadable labels {u}");
    }
}

fn shard(o: &mut String, f: &RunFigures) {
    if note(o, &f.shard) {
        return;
    }
    let s = f.shard.get().expect("checked");
    let _ = writeln!(
        o,
        "  {} file(s), {} rows, {}",
        s.files.len(),
        s.rows,
        bytes(s.bytes)
    );
    for x in &s.files {
        let _ = writeln!(
            o,
            "  {:<28} {:>10} rows {:>8} footer {:>8} sha256 {} {}",
            x.file,
            x.bytes.map_or("missing".into(), bytes),
            x.rows.map_or("-".into(), |r| r.to_string()),
            x.footer_rows.map_or("-".into(), |r| r.to_string()),
            x.sha256.as_deref().unwrap_or("-"),
            match x.verified {
                Some(true) => "verified",
                Some(false) => "MISMATCH",
                None => "",
            }
        );
    }
    for (set, n) in &s.rows_per_set {
        let _ = writeln!(o, "  set {set:<12} {n} rows");
    }
    for e in &s.extra_files {
        let _ = writeln!(o, "  unexpected file in the shard folder: {e}");
    }
    match s.all_ok {
        Some(true) => o.push_str("  every checksum and row count verified\n"),
        Some(false) => o.push_str("  VERIFICATION FAILED\n"),
        None => o.push_str("  not verified (use --verify to re-hash every shard)\n"),
    }
    if !s.columns.is_empty() {
        let _ = writeln!(o, "  columns: {}", s.columns.join(", "));
    }
}
