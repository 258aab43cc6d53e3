//! The HTML report and `inspect`: a run folder built in a temp dir (stage
//! manifests, clip records, frame stores, alignment, fit log and metrics,
//! labels, calibration figures, codes table and one Parquet shard, all through
//! the crate's own types) is rendered after each stage; `inspect --json`
//! round-trips through serde_json and equals the figures the report embeds;
//! the page is opened in headless Chromium over the W3C WebDriver protocol.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use actuary::actions::MapRule;
use actuary::align::{Alignment, ClipAlignment};
use actuary::label::conformal::ConformalQuantile;
use actuary::label::output::{CodeRow, DimCalibration};
use actuary::label::reliability::{Reliability, ReliabilityBin};
use actuary::label::{CalibrationFigures, ClipLabels, CodesTable, Split, Standardisation};
use actuary::report::figures::RunFigures;
use actuary::store::{
    ClipRecord, ClipStatus, FrameWriter, SourceInfo, StageManifest, write_json_atomic,
};

use crate::util::{actuary, s};

const W: u32 = 32;
const H: u32 = 32;
const FRAMES: u32 = 12;
const DIMS: [&str; 3] = ["dx", "dy", "grip"];
const STAGES: [&str; 5] = ["decode", "align", "fit", "label", "shard"];

/// The clips of the fake run: (set, id, labelled, split).
fn clips() -> Vec<(&'static str, &'static str, bool, Split)> {
    vec![
        ("human", "h-01", false, Split::Train),
        ("human", "h-02", false, Split::Train),
        ("human", "h-03", false, Split::Train),
        ("human", "h-04", false, Split::Train),
        ("robot", "r-01", true, Split::Train),
        ("robot", "r-02", true, Split::Calib),
        ("robot", "r-03", true, Split::Holdout),
    ]
}

/// A frame: a colour gradient and a square that moves with `k`.
fn frame(seed: u32, k: u32) -> Vec<u8> {
    let mut f = Vec::with_capacity((W * H * 3) as usize);
    for y in 0..H {
        for x in 0..W {
            let inside = x.abs_diff(4 + k + seed % 5) < 4 && y.abs_diff(10 + seed % 7) < 4;
            if inside {
                f.extend_from_slice(&[230, 60, 40]);
            } else {
                f.extend_from_slice(&[
                    (x * 6 + seed * 20) as u8,
                    (y * 6) as u8,
                    (120 + seed * 10) as u8,
                ]);
            }
        }
    }
    f
}

fn action(i: usize, k: u32) -> Vec<f32> {
    vec![
        0.5 + 0.1 * i as f32 + 0.02 * k as f32,
        -0.2 + 0.05 * k as f32,
        if k % 4 < 2 { 1.0 } else { 0.0 },
    ]
}

fn manifest(
    stage: &str,
    counts: &[(&str, u64)],
    clips: Vec<ClipStatus>,
    summary: serde_json::Value,
) -> StageManifest {
    StageManifest {
        stage: stage.into(),
        tool_version: actuary::VERSION.into(),
        key: format!("{stage:0>64}"),
        settings_hash: "0".repeat(64),
        inputs: BTreeMap::from([
            ("spec".to_string(), "ab".repeat(32)),
            ("spec-path".to_string(), "/specs/tiny.toml".to_string()),
        ]),
        counts: counts.iter().map(|(k, v)| (k.to_string(), *v)).collect(),
        timings: BTreeMap::from([("total_s".to_string(), 1.5)]),
        clips,
        summary,
    }
}

/// Builds a run folder with the first `stages` stages done.
fn fake_run(run: &Path, stages: usize) {
    let decode_dir = run.join("decode");
    let mut statuses = Vec::new();
    for (i, (set, id, labelled, _)) in clips().into_iter().enumerate() {
        let mut w =
            FrameWriter::create(&ClipRecord::frames_path(&decode_dir, set, id), W, H).unwrap();
        for k in 0..FRAMES {
            w.push(&frame(i as u32, k)).unwrap();
        }
        w.finish().unwrap();
        let rec = ClipRecord {
            id: id.into(),
            set: set.into(),
            labelled,
            frames: FRAMES,
            fps: 10.0,
            width: W,
            height: H,
            dropped: i as u64 % 3,
            repeated: (i as u64 + 1) % 2,
            source: SourceInfo {
                path: PathBuf::from(format!(
                    "/clips/{set}/{id}.{}",
                    if i % 2 == 0 { "mp4" } else { "mkv" }
                )),
                codec: "h264".into(),
                width: if labelled { 96 } else { 128 },
                height: 96,
                fps: if labelled { 10.0 } else { 29.97 },
                duration_s: 1.2,
                frames: 12,
                rotation: 0,
                matrix: "bt601".into(),
                range: "limited".into(),
                untagged: true,
            },
            fingerprint: "cd".repeat(32),
            key: "k".into(),
            action_dims: if labelled {
                DIMS.iter().map(|d| d.to_string()).collect()
            } else {
                Vec::new()
            },
            actions: labelled.then(|| (0..FRAMES - 1).map(|k| action(i, k)).collect()),
            sidecar: None,
            sidecar_fingerprint: None,
        };
        write_json_atomic(&ClipRecord::record_path(&decode_dir, set, id), &rec).unwrap();
        statuses.push(ClipStatus {
            id: id.into(),
            set: set.into(),
            status: "ok".into(),
            reason: None,
        });
    }
    statuses.push(ClipStatus {
        id: "broken".into(),
        set: "human".into(),
        status: "skipped".into(),
        reason: Some("/clips/human/broken.mp4: invalid data found when processing input".into()),
    });
    manifest(
        "decode",
        &[("clips", 7), ("frames", 84), ("skipped", 1)],
        statuses,
        serde_json::json!({}),
    )
    .write(run)
    .unwrap();
    if stages < 2 {
        return;
    }
    let hist = |shift: usize| {
        let v: Vec<f64> = (0..32)
            .map(|i| if i == 10 + shift { 0.6 } else { 0.4 / 31.0 })
            .collect();
        serde_json::json!({"l": v, "a": v, "b": v})
    };
    let set_summary = |name: &str, labelled: bool, gap: Option<f64>| {
        serde_json::json!({
            "name": name, "labelled": labelled, "clips": if labelled {3} else {4}, "frames": 12 * if labelled {3} else {4},
            "model_frames": 12 * if labelled {3} else {4}, "motion_rate_before": if labelled {1.2} else {2.5},
            "motion_rate_after": 1.2, "speed_factor": if labelled {1.0} else {1.0}, "lab_before": null, "lab_after": null,
            "photometric": null, "histogram_before": hist(if labelled {0} else {8}), "histogram_after": hist(0),
            "gap_before": gap, "gap_after": gap.map(|g| g / 4.0)
        })
    };
    let align_summary = serde_json::json!({
        "gap_method": "squared Frechet distance (test)", "gap_before": 12.5, "gap_after": 3.125,
        "labelled_motion_rate": 1.2, "unlabelled_motion_rate": 2.5, "motion_ratio": 2.0833, "resampled": null,
        "options": {}, "sets": [set_summary("human", false, Some(12.5)), set_summary("robot", true, None)],
        "offsets": [
            {"set": "robot", "id": "r-01", "offset_s": 0.1, "estimated_s": 0.1, "correlation": 0.82, "trusted": true},
            {"set": "robot", "id": "r-02", "offset_s": 0.0, "estimated_s": -0.4, "correlation": 0.12, "trusted": false}
        ]
    });
    manifest("align", &[("clips", 7)], Vec::new(), align_summary)
        .write(run)
        .unwrap();
    let alignment = Alignment {
        version: actuary::align::view::ALIGNMENT_VERSION,
        fps: 10.0,
        width: W,
        height: H,
        action_dims: DIMS.iter().map(|d| d.to_string()).collect(),
        rules: vec![MapRule::Sum, MapRule::Sum, MapRule::Hold],
        resample: actuary::align::Resample::Blend,
        copy_frames: false,
        clips: clips()
            .into_iter()
            .enumerate()
            .map(|(i, (set, id, labelled, _))| ClipAlignment {
                set: set.into(),
                id: id.into(),
                labelled,
                frames: FRAMES,
                speed_factor: 1.0,
                motion_rate: Some(1.0),
                photometric: None,
                offset: None,
                actions: labelled.then(|| (0..FRAMES - 1).map(|k| action(i, k)).collect()),
            })
            .collect(),
    };
    write_json_atomic(
        &run.join("align").join(actuary::align::ALIGNMENT_FILE),
        &alignment,
    )
    .unwrap();
    if stages < 3 {
        return;
    }
    let mut log = String::from("step,elbo,recon,kl,shared_var,action_nll,mmd\n");
    for step in 0..50 {
        let t = step as f64;
        log += &format!(
            "{step},{},{},{},{},{},{}\n",
            900.0 / (t + 1.0),
            800.0 / (t + 1.0),
            5.0 + t * 0.1,
            0.05 + 0.5 / (t + 1.0),
            2.0 - t * 0.03,
            0.2 / (t + 1.0)
        );
    }
    std::fs::create_dir_all(run.join("fit")).unwrap();
    std::fs::write(run.join("fit").join("train_log.csv"), log).unwrap();
    let metrics = serde_json::json!({
        "eval_truth_used": false,
        "comparison": [
            {"model": "semi-supervised", "eval": "holdout", "dims": {"dx": {"r2": 0.91, "mae": 0.05, "nll": -1.2}, "dy": {"r2": 0.85, "mae": 0.07, "nll": -0.9}}},
            {"model": "labelled-only", "eval": "holdout", "dims": {"dx": {"r2": 0.88, "mae": 0.06, "nll": -1.0}}},
            {"model": "train mean", "eval": "holdout", "dims": {"dx": {"r2": 0.0, "mae": 0.3, "nll": 0.4}}}
        ]
    });
    write_json_atomic(&run.join("fit").join("metrics.json"), &metrics).unwrap();
    manifest(
        "fit",
        &[("steps", 50)],
        Vec::new(),
        serde_json::json!({"steps": 50}),
    )
    .write(run)
    .unwrap();
    if stages < 4 {
        return;
    }
    let label_dir = run.join("label");
    for (i, (set, id, labelled, split)) in clips().into_iter().enumerate() {
        let n = (FRAMES - 1) as usize;
        let labels = ClipLabels {
            id: id.into(),
            set: set.into(),
            labelled,
            split,
            key: "k".into(),
            frames: FRAMES,
            action_est: (0..n as u32)
                .map(|k| action(i, k).iter().map(|v| v * 0.9 + 0.01).collect())
                .collect(),
            action_std: vec![vec![0.1; 3]; n],
            confidence: (0..n)
                .map(|k| ((i * 13 + k * 7) % 100) as f32 / 100.0)
                .collect(),
            ood: (0..n).map(|k| !labelled && k % 5 == 0).collect(),
            code: (0..n).map(|k| ((i + k) % 4) as u16).collect(),
            disagreement: vec![0.1; n],
        };
        write_json_atomic(&ClipLabels::path(&label_dir, set, id), &labels).unwrap();
    }
    let bins: Vec<ReliabilityBin> = (0..10)
        .map(|b| ReliabilityBin {
            lo: b as f64 / 10.0,
            hi: (b + 1) as f64 / 10.0,
            count: if b == 0 { 0 } else { 3 + b },
            mean_confidence: b as f64 / 10.0 + 0.05,
            accuracy: (b as f64 / 10.0 + 0.02).min(1.0),
        })
        .collect();
    let calibration = CalibrationFigures {
        alpha: 0.1,
        z: 1.6448536269514722,
        tolerance_fraction: 0.25,
        standardisation: Standardisation {
            dims: DIMS.iter().map(|d| d.to_string()).collect(),
            mean: vec![0.6, 0.1, 0.5],
            std: vec![0.2, 0.3, 0.5],
        },
        dims: DIMS
            .iter()
            .enumerate()
            .map(|(d, name)| DimCalibration {
                dim: name.to_string(),
                quantile: ConformalQuantile {
                    q: 1.4 + d as f64 * 0.1,
                    n: 11,
                    rank: 11,
                },
                tolerance: 0.05,
                holdout_coverage: Some(0.88 + d as f64 * 0.02),
                calib_coverage: 0.909,
                holdout_mean_std: Some(0.1),
                holdout_coverage_in_range: Some(0.89 + d as f64 * 0.02),
            })
            .collect(),
        calib_transitions: 11,
        holdout_transitions: 11,
        confidence_method: "isotonic (test)".into(),
        holdout_reliability: Reliability {
            n: 75,
            ece: 0.0421,
            mean_confidence: 0.52,
            accuracy: 0.49,
            bins: bins.clone(),
        },
        holdout_reliability_raw: Reliability::default(),
        ood_threshold: 0.3,
        holdout_ood_rate: Some(0.0),
        calib_motion_range: vec![0.5, 0.5, 1.0],
        holdout_beyond_range: vec![],
    };
    write_json_atomic(&label_dir.join("calibration.json"), &calibration).unwrap();
    let codes = CodesTable {
        dims: DIMS.iter().map(|d| d.to_string()).collect(),
        latent_dims: 2,
        inertia: 1.0,
        fitted_points: 77,
        codes: (0..5u16)
            .map(|c| CodeRow {
                code: c,
                centroid: vec![c as f64, 0.0],
                count: if c == 4 { 0 } else { 20 - c as u64 },
                count_labelled: 8,
                mean_action: if c == 4 {
                    Vec::new()
                } else {
                    vec![0.5 - c as f64 * 0.3, 0.2 * c as f64 - 0.3, 1.0]
                },
            })
            .collect(),
    };
    write_json_atomic(&label_dir.join("codes.json"), &codes).unwrap();
    manifest(
        "label",
        &[("clips", 7), ("transitions", 77)],
        Vec::new(),
        serde_json::json!({}),
    )
    .write(run)
    .unwrap();
    if stages < 5 {
        return;
    }
    let shard = run.join("shard").join("shard-00000.parquet");
    std::fs::create_dir_all(run.join("shard")).unwrap();
    write_parquet(&shard, 84);
    let sha = actuary::util::sha256_file(&shard).unwrap();
    let bytes = std::fs::metadata(&shard).unwrap().len();
    let summary = serde_json::json!({
        "rows": 84, "rows_per_set": {"human": 48, "robot": 36},
        "shards": [{"file": "shard-00000.parquet", "rows": 84, "row_groups": 1, "bytes": bytes, "sha256": sha}]
    });
    manifest("shard", &[("rows", 84), ("shards", 1)], Vec::new(), summary)
        .write(run)
        .unwrap();
}

fn write_parquet(path: &Path, rows: u32) {
    use arrow_array::{ArrayRef, RecordBatch, UInt32Array};
    let col: ArrayRef = Arc::new(UInt32Array::from_iter_values(0..rows));
    let batch = RecordBatch::try_from_iter([("frame", col)]).unwrap();
    let file = std::fs::File::create(path).unwrap();
    let mut w = parquet::arrow::ArrowWriter::try_new(file, batch.schema(), None).unwrap();
    w.write(&batch).unwrap();
    w.close().unwrap();
}

/// The figures a report page embeds (`<script type="application/json" id="actuary-figures">`).
fn embedded_figures(html: &str) -> serde_json::Value {
    let start_tag = "<script type=\"application/json\" id=\"actuary-figures\">";
    let start = html.find(start_tag).expect("report embeds its figures") + start_tag.len();
    let end = start + html[start..].find("</script>").unwrap();
    serde_json::from_str(&html[start..end]).expect("embedded figures are JSON")
}

/// The first JSON path where `a` and `b` differ, with both values.
fn first_difference(a: &serde_json::Value, b: &serde_json::Value, at: &str) -> Option<String> {
    use serde_json::Value::{Array, Object};
    match (a, b) {
        (Object(x), Object(y)) => {
            for k in x.keys().chain(y.keys()) {
                match (x.get(k), y.get(k)) {
                    (Some(p), Some(q)) => {
                        if let Some(d) = first_difference(p, q, &format!("{at}.{k}")) {
                            return Some(d);
                        }
                    }
                    (p, q) => return Some(format!("{at}.{k}: {p:?} vs {q:?}")),
                }
            }
            None
        }
        (Array(x), Array(y)) if x.len() == y.len() => x
            .iter()
            .zip(y)
            .enumerate()
            .find_map(|(i, (p, q))| first_difference(p, q, &format!("{at}[{i}]"))),
        (p, q) if p == q => None,
        // serde_json's default float parser may land one ulp off on 17-digit numbers.
        (serde_json::Value::Number(p), serde_json::Value::Number(q))
            if p.as_f64()
                .zip(q.as_f64())
                .is_some_and(|(x, y)| (x - y).abs() <= 1e-12 * x.abs().max(y.abs())) =>
        {
            None
        }
        (p, q) => Some(format!("{at}: {p} vs {q}")),
    }
}

#[test]
fn report_renders_for_a_run_stopped_after_each_stage() {
    for done in 1..=5 {
        let dir = tempfile::tempdir().unwrap();
        let run = dir.path().join("run");
        fake_run(&run, done);
        let html = actuary::report::render_report(&run).unwrap();
        for id in [
            "summary",
            "decode",
            "align",
            "fit",
            "label",
            "unlabelled",
            "shard",
        ] {
            assert!(
                html.contains(&format!("<section id=\"{id}\">")),
                "section {id} after {done} stage(s)"
            );
        }
        // Every stage not run says so in its own section (label's note shows in two sections).
        let missing = html
            .matches("<p class=\"missing\">Not available: the ")
            .count();
        let expected = match done {
            5 => 0,
            4 => 1,
            d => (5 - d) + 1,
        };
        assert_eq!(missing, expected, "after {done} stage(s)");
        assert!(html.contains("personal data") && html.contains("emergency stop"));
        assert!(
            html.contains("invalid data found when processing input"),
            "skipped clip reason is shown"
        );
        assert!(
            !html.contains("http://")
                || html.matches("http://").count()
                    == html.matches("http://www.w3.org/2000/svg").count(),
            "no network references"
        );
        let text = actuary::report::inspect(&run, None, false, false).unwrap();
        assert!(text.contains("== decode"));
        for stage in &STAGES[done..] {
            assert!(
                text.contains(&format!("== {stage}: the {stage} stage has not run")),
                "{text}"
            );
            let (code, _, err) = actuary(&["inspect", s(&run), stage]);
            assert_eq!(code, 1, "inspect of a missing stage fails");
            assert!(err.contains("no") && err.contains(stage), "{err}");
        }
    }
}

#[test]
fn report_of_an_empty_folder_says_every_stage_is_missing() {
    let dir = tempfile::tempdir().unwrap();
    let html = actuary::report::render_report(dir.path()).unwrap();
    // Five stage sections, the unlabelled section and the summary's clip table.
    assert_eq!(
        html.matches("<p class=\"missing\">Not available").count(),
        7
    );
    let (code, _, err) = actuary(&["report", s(&dir.path().join("nope"))]);
    assert_eq!(code, 1);
    assert!(err.contains("not a run folder"), "{err}");
}

#[test]
fn inspect_json_round_trips_and_matches_the_report() {
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path().join("run");
    fake_run(&run, 5);
    let out = dir.path().join("report.html");
    let (code, stdout, err) = actuary(&["report", s(&run), "-o", s(&out)]);
    assert_eq!(code, 0, "{err}");
    assert!(stdout.contains("report.html"));
    let html = std::fs::read_to_string(&out).unwrap();
    let embedded = embedded_figures(&html);

    // The whole figure set round-trips through serde_json into the typed value and back.
    let (code, all, err) = actuary(&["inspect", s(&run), "--json", "--verify"]);
    assert_eq!(code, 0, "{err}");
    let value: serde_json::Value = serde_json::from_str(&all).unwrap();
    let typed: RunFigures =
        serde_json::from_value(value.clone()).expect("inspect --json parses as RunFigures");
    assert_eq!(
        first_difference(&serde_json::to_value(&typed).unwrap(), &value, "$"),
        None
    );
    assert_eq!(
        first_difference(&value, &embedded, "$"),
        None,
        "inspect --json --verify equals the report's figures"
    );

    // Each stage's JSON equals the report's section for it.
    for stage in STAGES {
        let (code, one, err) = actuary(&["inspect", s(&run), stage, "--json", "--verify"]);
        assert_eq!(code, 0, "{err}");
        let v: serde_json::Value = serde_json::from_str(&one).unwrap();
        assert_eq!(v[stage], embedded[stage], "stage {stage}");
        assert_eq!(v[stage]["status"], "ok", "stage {stage}: {}", v[stage]);
        assert_eq!(v["stages"].as_array().unwrap().len(), 1);
        for other in STAGES.iter().filter(|o| **o != stage) {
            assert!(v.get(*other).is_none());
        }
        let (code, text, _) = actuary(&["inspect", s(&run), stage]);
        assert_eq!(code, 0);
        assert!(text.starts_with(&format!("== {stage} (tool ")), "{text}");
    }

    // The figures the page prints are the JSON's, formatted as the page formats them.
    let f = &typed;
    let label = f.label.get().unwrap();
    let ece = format!("{:.3}", label.reliability.ece);
    assert!(html.contains(&format!("expected calibration error <b>{ece}</b>")));
    let align = f.align.get().unwrap();
    assert!(html.contains(&format!(
        "<b>{:.3}</b> before, <b>{:.3}</b> after",
        align.gap_before.unwrap(),
        align.gap_after.unwrap()
    )));
    let shard = f.shard.get().unwrap();
    assert_eq!(shard.all_ok, Some(true));
    assert!(
        html.contains(&format!("{} rows", shard.rows))
            && html.contains("every checksum and row count verified")
    );
    let decode = f.decode.get().unwrap();
    assert_eq!(decode.sets.iter().map(|s| s.frames).sum::<u64>(), 84);
    assert_eq!((decode.dropped, decode.repeated), (6, 4));
    assert!(html.contains(&format!("dropped <b>{}</b>", decode.dropped)));
    for c in &label.lowest_confidence {
        assert!(
            html.contains(&format!("<td>{}</td>", c.id))
                && html.contains(&format!("{:.3}", c.mean_confidence))
        );
    }
    // Lowest mean confidence first, unlabelled clips only.
    let means: Vec<f64> = label
        .lowest_confidence
        .iter()
        .map(|c| c.mean_confidence)
        .collect();
    assert!(
        means.windows(2).all(|w| w[0] <= w[1])
            && label.lowest_confidence.iter().all(|c| c.set == "human")
    );
    // Holdout R² computed from the labels and recorded actions, checked by hand:
    // est = 0.9 a + 0.01 per dimension, so R² = 1 - sum((0.1 a - 0.01)^2) / sum((a - mean)^2).
    let fit = f.fit.get().unwrap();
    let dx: Vec<f64> = (0..FRAMES - 1).map(|k| action(6, k)[0] as f64).collect();
    let mean = dx.iter().sum::<f64>() / dx.len() as f64;
    let ss_tot: f64 = dx.iter().map(|a| (a - mean).powi(2)).sum();
    let ss_res: f64 = dx.iter().map(|a| (0.1 * a - 0.01).powi(2)).sum();
    let r2 = fit.holdout[0].r2.unwrap();
    assert!((r2 - (1.0 - ss_res / ss_tot)).abs() < 1e-4, "{r2}");
    assert_eq!(fit.comparison.len(), 3);
    assert_eq!(fit.log_rows, 50);
    // Images are PNG data URIs (no external files).
    assert!(html.matches("<img").count() >= 10);
    assert_eq!(
        html.matches("<img").count(),
        html.matches("src=\"data:image/png;base64,").count()
    );
}

#[test]
fn shard_verification_reports_a_changed_file() {
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path().join("run");
    fake_run(&run, 5);
    let shard = run.join("shard").join("shard-00000.parquet");
    let mut bytes = std::fs::read(&shard).unwrap();
    let mid = bytes.len() / 2;
    bytes[mid] ^= 0xff;
    std::fs::write(&shard, bytes).unwrap();
    std::fs::write(run.join("shard").join("stray.txt"), "x").unwrap();
    let (code, text, _) = actuary(&["inspect", s(&run), "shard", "--verify"]);
    assert_eq!(code, 0);
    assert!(
        text.contains("MISMATCH")
            && text.contains("VERIFICATION FAILED")
            && text.contains("stray.txt"),
        "{text}"
    );
    let (_, text, _) = actuary(&["inspect", s(&run), "shard"]);
    assert!(text.contains("not verified"), "{text}");
    let html = actuary::report::render_report(&run).unwrap();
    assert!(html.contains("verification FAILED"));
}

#[test]
fn report_opens_in_headless_chromium() {
    let Some(browser) = browser::Browser::find() else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path().join("run");
    fake_run(&run, 5);
    let artefacts = PathBuf::from(env!("CARGO_TARGET_TMPDIR"))
        .join("..")
        .join("test-artefacts");
    std::fs::create_dir_all(&artefacts).unwrap();
    let page = artefacts.join("report.html");
    actuary::report::write_report(&run, &page).unwrap();
    let png = open_and_check(&browser, &page);
    let out = artefacts.join("report.png");
    std::fs::write(&out, &png).unwrap();
    eprintln!("screenshot kept at {}", out.display());
}

/// Renders the report of a real (tiny) pipeline run over demo-generator clips
/// and opens it in Chromium, as the engineer would in the morning.
#[test]
fn report_of_a_real_tiny_run_opens_in_headless_chromium() {
    if !crate::util::require_ffmpeg() {
        return;
    }
    let Some(browser) = browser::Browser::find() else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let opts = actuary::demo::DemoOptions {
        robot_clips: 5,
        human_clips: 3,
        check_clips: 0,
        min_frames: 20,
        max_frames: 30,
        ..Default::default()
    };
    actuary::demo::generate(&dir.path().join("d"), &opts).unwrap();
    let spec = dir.path().join("spec.toml");
    std::fs::write(
        &spec,
        "out = \"run\"\n[sets.robot]\ndir = \"d/robot\"\nlabelled = true\n[sets.human]\ndir = \"d/human\"\nlabelled = false\n\
         eval-truth = \"d/human-truth\"\n[decode]\nfps = 10\nsize = [32, 32]\n[actions]\nmap = { dx = \"sum\", dy = \"sum\", grip = \"hold\" }\n\
         [fit]\nlatent = 4\nwidths = [8, 8, 8]\nhidden = 16\nhead-hidden = 8\nheads = 2\nsteps = 20\nbatch = 8\ncheckpoint-every = 10\n\
         [label]\ncodes = 4\n",
    )
    .unwrap();
    let (code, _, err) = crate::util::actuary(&["run", spec.to_str().unwrap(), "-j", "2"]);
    assert_eq!(code, 0, "{err}");
    let run = dir.path().join("run");
    let page = run.join("report.html");
    let (code, _, err) = crate::util::actuary(&["report", run.to_str().unwrap()]);
    assert_eq!(code, 0, "{err}");
    let html = std::fs::read_to_string(&page).unwrap();
    for section in ["Run summary", "Decode", "Align", "Fit", "Label", "Shards"] {
        assert!(html.contains(section), "report lacks {section}");
    }
    assert!(
        !html.contains("Not available"),
        "every stage ran, so no section may be missing"
    );
    let png = open_and_check(&browser, &page);
    let artefacts = PathBuf::from(env!("CARGO_TARGET_TMPDIR"))
        .join("..")
        .join("test-artefacts");
    std::fs::create_dir_all(&artefacts).unwrap();
    std::fs::write(artefacts.join("report-real.png"), &png).unwrap();
    if std::env::var("ACTUARY_UPDATE_DOCS").is_ok_and(|v| v == "1") {
        let docs = Path::new(env!("CARGO_MANIFEST_DIR")).join("docs");
        std::fs::create_dir_all(&docs).unwrap();
        std::fs::write(docs.join("report.png"), &png).unwrap();
    }
}

/// Opens `page` in Chromium and checks it loaded cleanly: no console errors,
/// every image decoded, laptop width, a screenshot that is not blank.
fn open_and_check(browser: &browser::Browser, page: &Path) -> Vec<u8> {
    let profile = tempfile::tempdir().unwrap();
    let session = browser
        .start(profile.path())
        .unwrap_or_else(|e| panic!("Chromium itself failed to start (not a page problem): {e}"));
    let result = session.check_page(page);
    let shot = session.screenshot();
    drop(session);
    let report = result.unwrap_or_else(|e| panic!("the report page failed in Chromium: {e}"));
    assert!(
        report.console_errors.is_empty(),
        "console errors: {:?}",
        report.console_errors
    );
    assert!(report.images > 0, "the page has images");
    assert!(
        report.undecoded.is_empty(),
        "images that did not decode (naturalWidth 0): {:?}",
        report.undecoded
    );
    assert!(
        report.scroll_width <= 1400,
        "the page fits a laptop-width window (scrollWidth {})",
        report.scroll_width
    );
    let png = shot.unwrap_or_else(|e| panic!("screenshot failed: {e}"));
    let img = image::load_from_memory_with_format(&png, image::ImageFormat::Png)
        .expect("screenshot is a PNG")
        .to_rgb8();
    let mut colours = std::collections::HashSet::new();
    for p in img.pixels().step_by(7) {
        colours.insert(p.0);
    }
    assert!(
        colours.len() > 50,
        "screenshot looks blank ({} distinct colours)",
        colours.len()
    );
    png
}

/// A minimal W3C WebDriver client for chromedriver (HTTP/1.1 over a TCP socket).
mod browser {
    use std::io::{Read, Write};
    use std::net::{TcpListener, TcpStream};
    use std::path::{Path, PathBuf};
    use std::process::{Child, Command, Stdio};
    use std::time::{Duration, Instant};

    use serde_json::{Value, json};

    /// How long chromedriver and Chromium may take to start on a busy machine.
    const START_TIMEOUT: Duration = Duration::from_secs(120);

    pub struct Browser {
        chromium: PathBuf,
        driver: PathBuf,
    }

    pub struct Session {
        driver: Child,
        port: u16,
        id: String,
    }

    pub struct PageReport {
        pub console_errors: Vec<String>,
        pub images: usize,
        pub undecoded: Vec<String>,
        pub scroll_width: u64,
    }

    fn which(names: &[&str]) -> Option<PathBuf> {
        let path = std::env::var_os("PATH")?;
        names.iter().find_map(|n| {
            std::env::split_paths(&path)
                .map(|d| d.join(n))
                .find(|p| p.is_file())
        })
    }

    impl Browser {
        /// Finds Chromium and chromedriver; fails the test when missing unless skipping is allowed.
        pub fn find() -> Option<Self> {
            match (
                which(&["chromium", "chromium-browser"]),
                which(&["chromedriver"]),
            ) {
                (Some(chromium), Some(driver)) => Some(Self { chromium, driver }),
                _ if crate::util::allow_skip() => {
                    eprintln!(
                        "skipping: chromium / chromedriver not installed (ACTUARY_ALLOW_SKIP=1)"
                    );
                    None
                }
                _ => panic!(
                    "chromium and chromedriver are required (Debian packages `chromium` and `chromium-driver`; set ACTUARY_ALLOW_SKIP=1 to skip)"
                ),
            }
        }

        /// Starts chromedriver and a headless Chromium session with a fresh profile.
        pub fn start(&self, profile: &Path) -> Result<Session, String> {
            let port = TcpListener::bind("127.0.0.1:0")
                .and_then(|l| l.local_addr())
                .map_err(|e| e.to_string())?
                .port();
            let driver = Command::new(&self.driver)
                .arg(format!("--port={port}"))
                .stdout(Stdio::null())
                .stderr(Stdio::null())
                .spawn()
                .map_err(|e| {
                    format!("chromedriver {} did not start: {e}", self.driver.display())
                })?;
            let mut session = Session {
                driver,
                port,
                id: String::new(),
            };
            let started = Instant::now();
            loop {
                if let Ok(v) = session.http("GET", "/status", None) {
                    if v["value"]["ready"].as_bool() == Some(true) {
                        break;
                    }
                }
                if let Ok(Some(status)) = session.driver.try_wait() {
                    return Err(format!("chromedriver exited at start-up ({status})"));
                }
                if started.elapsed() > START_TIMEOUT {
                    return Err(format!(
                        "chromedriver not ready after {} s",
                        START_TIMEOUT.as_secs()
                    ));
                }
                std::thread::sleep(Duration::from_millis(200));
            }
            let caps = json!({"capabilities": {"alwaysMatch": {
                "browserName": "chrome",
                "goog:loggingPrefs": {"browser": "ALL"},
                "goog:chromeOptions": {"binary": self.chromium, "args": [
                    "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                    "--disable-background-networking", "--disable-component-update", "--disable-sync",
                    "--disable-quic", "--allow-file-access-from-files", "--hide-scrollbars",
                    "--window-size=1280,1600", format!("--user-data-dir={}", profile.display())
                ]}
            }}});
            let v = session.http("POST", "/session", Some(&caps))?;
            match v["value"]["sessionId"].as_str() {
                Some(id) => session.id = id.to_string(),
                None => return Err(format!("Chromium session was not created: {}", v["value"])),
            }
            Ok(session)
        }
    }

    impl Session {
        fn http(&self, method: &str, path: &str, body: Option<&Value>) -> Result<Value, String> {
            let body = body.map(|b| b.to_string()).unwrap_or_default();
            let mut stream = TcpStream::connect_timeout(
                &([127, 0, 0, 1], self.port).into(),
                Duration::from_secs(5),
            )
            .map_err(|e| e.to_string())?;
            stream
                .set_read_timeout(Some(START_TIMEOUT))
                .map_err(|e| e.to_string())?;
            let req = format!(
                "{method} {path} HTTP/1.1\r\nHost: 127.0.0.1:{}\r\nContent-Type: application/json; charset=utf-8\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
                self.port,
                body.len()
            );
            stream
                .write_all(req.as_bytes())
                .map_err(|e| e.to_string())?;
            // chromedriver may keep the connection open: read the header, then
            // exactly Content-Length bytes (or to the end when chunked / unsized).
            let mut raw = Vec::new();
            let mut buf = [0u8; 65536];
            let split = loop {
                if let Some(p) = raw.windows(4).position(|w| w == b"\r\n\r\n") {
                    break p;
                }
                let n = stream
                    .read(&mut buf)
                    .map_err(|e| format!("{method} {path}: {e}"))?;
                if n == 0 {
                    return Err(format!(
                        "{method} {path}: connection closed before the reply header"
                    ));
                }
                raw.extend_from_slice(&buf[..n]);
            };
            let head = String::from_utf8_lossy(&raw[..split]).to_ascii_lowercase();
            let length = head.lines().find_map(|l| {
                l.strip_prefix("content-length:")
                    .and_then(|v| v.trim().parse::<usize>().ok())
            });
            let mut payload = raw[split + 4..].to_vec();
            match length {
                Some(len) => {
                    while payload.len() < len {
                        let n = stream
                            .read(&mut buf)
                            .map_err(|e| format!("{method} {path}: {e}"))?;
                        if n == 0 {
                            break;
                        }
                        payload.extend_from_slice(&buf[..n]);
                    }
                    payload.truncate(len);
                }
                None => {
                    stream
                        .read_to_end(&mut payload)
                        .map_err(|e| format!("{method} {path}: {e}"))?;
                    if head.contains("transfer-encoding: chunked") {
                        payload = dechunk(&payload);
                    }
                }
            }
            serde_json::from_slice(&payload)
                .map_err(|e| format!("{method} {path}: bad JSON reply: {e}"))
        }

        fn cmd(&self, method: &str, path: &str, body: Option<&Value>) -> Result<Value, String> {
            let v = self.http(method, &format!("/session/{}{path}", self.id), body)?;
            if let Some(err) = v["value"]["error"].as_str() {
                return Err(format!("{path}: {err}: {}", v["value"]["message"]));
            }
            Ok(v["value"].clone())
        }

        /// Loads `page` and reports console errors and image decoding.
        pub fn check_page(&self, page: &Path) -> Result<PageReport, String> {
            let url = format!(
                "file://{}",
                std::path::absolute(page)
                    .map_err(|e| e.to_string())?
                    .display()
            );
            self.cmd("POST", "/url", Some(&json!({"url": url})))?;
            let state = self.cmd(
                "POST",
                "/execute/sync",
                Some(&json!({"script": "return document.readyState", "args": []})),
            )?;
            if state != "complete" {
                return Err(format!("document.readyState is {state}"));
            }
            let imgs = self.cmd(
                "POST",
                "/execute/sync",
                Some(&json!({"script": "return Array.from(document.images).map(i => [i.alt, i.complete, i.naturalWidth])", "args": []})),
            )?;
            let imgs = imgs.as_array().cloned().unwrap_or_default();
            let undecoded = imgs
                .iter()
                .filter(|i| !(i[1].as_bool() == Some(true) && i[2].as_u64().unwrap_or(0) > 0))
                .map(|i| i[0].to_string())
                .collect();
            let scroll_width = self
                .cmd("POST", "/execute/sync", Some(&json!({"script": "return document.documentElement.scrollWidth", "args": []})))?
                .as_u64()
                .unwrap_or(0);
            let logs = self
                .cmd("POST", "/se/log", Some(&json!({"type": "browser"})))
                .or_else(|_| self.cmd("POST", "/log", Some(&json!({"type": "browser"}))))?;
            let console_errors = logs
                .as_array()
                .into_iter()
                .flatten()
                .filter(|l| l["level"] == "SEVERE")
                .map(|l| l["message"].to_string())
                .collect();
            Ok(PageReport {
                console_errors,
                images: imgs.len(),
                undecoded,
                scroll_width,
            })
        }

        /// A PNG screenshot of the window.
        pub fn screenshot(&self) -> Result<Vec<u8>, String> {
            let v = self.cmd("GET", "/screenshot", None)?;
            let b64 = v.as_str().ok_or("screenshot reply is not a string")?;
            decode_base64(b64)
        }
    }

    impl Drop for Session {
        fn drop(&mut self) {
            if !self.id.is_empty() {
                let _ = self.http("DELETE", &format!("/session/{}", self.id), None);
            }
            let _ = self.driver.kill();
            let _ = self.driver.wait();
        }
    }

    fn dechunk(mut b: &[u8]) -> Vec<u8> {
        let mut out = Vec::new();
        while let Some(line_end) = b.windows(2).position(|w| w == b"\r\n") {
            let size = usize::from_str_radix(String::from_utf8_lossy(&b[..line_end]).trim(), 16)
                .unwrap_or(0);
            if size == 0 {
                break;
            }
            let start = line_end + 2;
            out.extend_from_slice(&b[start..(start + size).min(b.len())]);
            b = &b[(start + size + 2).min(b.len())..];
        }
        out
    }

    fn decode_base64(s: &str) -> Result<Vec<u8>, String> {
        let val = |c: u8| -> Result<u32, String> {
            Ok(match c {
                b'A'..=b'Z' => c - b'A',
                b'a'..=b'z' => c - b'a' + 26,
                b'0'..=b'9' => c - b'0' + 52,
                b'+' => 62,
                b'/' => 63,
                _ => return Err(format!("bad base64 byte {c}")),
            } as u32)
        };
        let clean: Vec<u8> = s
            .bytes()
            .filter(|c| !c.is_ascii_whitespace() && *c != b'=')
            .collect();
        let mut out = Vec::with_capacity(clean.len() * 3 / 4);
        for chunk in clean.chunks(4) {
            let mut n = 0u32;
            for (i, &c) in chunk.iter().enumerate() {
                n |= val(c)? << (18 - 6 * i);
            }
            out.push((n >> 16) as u8);
            if chunk.len() > 2 {
                out.push((n >> 8) as u8);
            }
            if chunk.len() > 3 {
                out.push(n as u8);
            }
        }
        Ok(out)
    }
}
