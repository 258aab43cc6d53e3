//! The fit stage end to end on a tiny synthetic demo: resumption after
//! SIGKILL, NaN stops, refused checkpoints, a constant action dimension,
//! per-clip R² sums against scikit-learn.

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use crate::util::{actuary, s};

/// A tiny network and short schedule (fast on one thread).
const TINY_FIT: &str = "[fit]\nlatent = 4\nwidths = [8, 8, 8]\nhidden = 16\nhead-hidden = 8\nheads = 2\n\
                        steps = 120\nbatch = 8\ncheckpoint-every = 10\n";

/// Generates a small demo (4 robot, 2 human clips) into `dir/clips`.
fn demo(dir: &Path) -> PathBuf {
    demo_with(dir, 4, 2, 0)
}

/// Generates `robot`, `human` and `check` (held-out robot) demo clips into `dir/clips`.
fn demo_with(dir: &Path, robot: u32, human: u32, check: u32) -> PathBuf {
    let clips = dir.join("clips");
    let (code, _, err) = actuary(&[
        "demo-clips",
        s(&clips),
        "--robot-clips",
        &robot.to_string(),
        "--human-clips",
        &human.to_string(),
        "--check-clips",
        &check.to_string(),
    ]);
    assert_eq!(code, 0, "{err}");
    clips
}

/// Writes a spec for the clips in `clips` with output `out` and `[fit]` text.
fn spec(dir: &Path, name: &str, clips: &Path, out: &str, fit: &str) -> PathBuf {
    let text = format!(
        "out = \"{out}\"\nseed = 3\n\n[sets.robot]\ndir = \"{robot}\"\nlabelled = true\n\n\
         [sets.human]\ndir = \"{human}\"\nlabelled = false\neval-truth = \"{truth}\"\n\n\
         [decode]\nfps = 10\nsize = [32, 32]\n\n[actions]\nmap = {{ dx = \"sum\", dy = \"sum\", grip = \"hold\" }}\n\n{fit}",
        robot = s(&clips.join("robot")),
        human = s(&clips.join("human")),
        truth = s(&clips.join("human-truth")),
    );
    let path = dir.join(name);
    std::fs::write(&path, text).unwrap();
    path
}

fn run_fit(spec: &Path) -> (i32, String) {
    let (code, _, err) = actuary(&["run", s(spec), "--until", "fit", "-j", "1"]);
    (code, err)
}

fn metrics(run: &Path) -> serde_json::Value {
    let text = std::fs::read_to_string(run.join("fit").join("metrics.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

#[test]
fn killed_fit_resumes_to_identical_metrics_and_foreign_checkpoints_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let clips = demo(dir.path());
    // Uninterrupted reference run.
    let a = spec(dir.path(), "a.toml", &clips, "run-a", TINY_FIT);
    let (code, err) = run_fit(&a);
    assert_eq!(code, 0, "{err}");
    let reference = metrics(&dir.path().join("run-a"));

    // Same spec, other folder: killed with SIGKILL once a checkpoint exists
    // (not on a timer), then run again.
    let b = spec(dir.path(), "b.toml", &clips, "run-b", TINY_FIT);
    let run_b = dir.path().join("run-b");
    let ckpt = run_b
        .join("fit")
        .join("checkpoints")
        .join("semi.safetensors");
    let mut child = Command::new(env!("CARGO_BIN_EXE_actuary"))
        .args(["run", s(&b), "--until", "fit", "-j", "1"])
        .env("ACTUARY_QUIET", "1")
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let started = Instant::now();
    while !ckpt.exists() {
        assert!(
            child.try_wait().unwrap().is_none(),
            "fit ended before a checkpoint appeared"
        );
        assert!(
            started.elapsed() < Duration::from_secs(300),
            "no checkpoint appeared"
        );
        std::thread::sleep(Duration::from_millis(5));
    }
    child.kill().unwrap(); // SIGKILL on Unix
    child.wait().unwrap();
    assert!(
        !run_b.join("fit").join("manifest.json").exists(),
        "the fit finished before the kill; the test did not interrupt it"
    );
    let (code, err) = run_fit(&b);
    assert_eq!(code, 0, "{err}");
    let resumed = metrics(&run_b);
    assert!(
        resumed["models"][0]["resumed_from"]
            .as_u64()
            .is_some_and(|s| s > 0),
        "{}",
        resumed["models"]
    );
    // Same thread count: the holdout and unlabelled metrics are identical.
    assert_eq!(resumed["metrics"], reference["metrics"]);
    // The per-step log has every step exactly once.
    let log = std::fs::read_to_string(run_b.join("fit").join("semi.log.csv")).unwrap();
    let steps: Vec<u32> = log
        .lines()
        .skip(1)
        .map(|l| l.split(',').next().unwrap().parse().unwrap())
        .collect();
    assert_eq!(steps, (1..=120).collect::<Vec<_>>());
    // The evaluation-only truth folder is reported as used.
    assert_eq!(resumed["eval_truth_used"], serde_json::json!(["human"]));
    let holdout = &resumed["metrics"][0];
    assert_eq!(holdout["name"], "holdout");
    for model in ["semi", "labelled-only", "mean-baseline"] {
        assert!(
            holdout["models"][model]["dims"]["dx"]["mae"].is_number(),
            "{holdout}"
        );
    }

    // A checkpoint from another network shape is refused, never loaded.
    std::fs::remove_file(run_b.join("fit").join("manifest.json")).unwrap();
    std::fs::copy(&ckpt, dir.path().join("keep.safetensors")).unwrap();
    let other_shape = spec(
        dir.path(),
        "b.toml",
        &clips,
        "run-b",
        &TINY_FIT.replace("hidden = 16", "hidden = 12"),
    );
    let (code, err) = run_fit(&other_shape);
    assert_ne!(code, 0);
    assert!(
        err.contains("different network shape") && err.contains("semi.safetensors"),
        "{err}"
    );
    // ... and one from other settings too.
    let other_settings = spec(
        dir.path(),
        "b.toml",
        &clips,
        "run-b",
        &TINY_FIT.replace("steps = 120", "steps = 130"),
    );
    let (code, err) = run_fit(&other_settings);
    assert_ne!(code, 0);
    assert!(err.contains("different settings"), "{err}");
    // The refused checkpoint is untouched.
    assert_eq!(
        std::fs::read(&ckpt).unwrap(),
        std::fs::read(dir.path().join("keep.safetensors")).unwrap()
    );
}

#[test]
fn non_finite_loss_stops_naming_step_and_part() {
    let dir = tempfile::tempdir().unwrap();
    let clips = demo(dir.path());
    let fit = TINY_FIT.replace("checkpoint-every = 10", "checkpoint-every = 1")
        + "learning-rate = 1e12\n";
    let path = spec(dir.path(), "nan.toml", &clips, "run", &fit);
    let (code, err) = run_fit(&path);
    assert_ne!(code, 0);
    assert!(err.contains("loss is") && err.contains("at step"), "{err}");
    assert!(err.contains("NaN") || err.contains("inf"), "{err}");
    // The last good checkpoint is kept.
    assert!(
        dir.path()
            .join("run/fit/checkpoints/semi.safetensors")
            .exists()
    );
}

#[test]
fn constant_action_dimension_is_reported_and_handled() {
    let dir = tempfile::tempdir().unwrap();
    let clips = demo(dir.path());
    // The gripper command never changes in the robot logs.
    for entry in std::fs::read_dir(clips.join("robot")).unwrap() {
        let path = entry.unwrap().path();
        if path.to_string_lossy().ends_with(".actions.csv") {
            let text = std::fs::read_to_string(&path).unwrap();
            let mut out = String::new();
            for (i, line) in text.lines().enumerate() {
                if i == 0 {
                    out.push_str(line);
                } else {
                    let mut f: Vec<&str> = line.split(',').collect();
                    *f.last_mut().unwrap() = "1";
                    out.push_str(&f.join(","));
                }
                out.push('\n');
            }
            std::fs::write(&path, out).unwrap();
        }
    }
    let fit = TINY_FIT.replace("steps = 120", "steps = 20") + "compare = false\n";
    let path = spec(dir.path(), "const.toml", &clips, "run", &fit);
    let (code, err) = run_fit(&path);
    assert_eq!(code, 0, "{err}");
    let m = metrics(&dir.path().join("run"));
    assert_eq!(m["constant_dims"], serde_json::json!(["grip"]));
    let grip = &m["metrics"][0]["models"]["semi"]["dims"]["grip"];
    assert!(grip["r2"].is_null(), "{grip}");
    assert!(grip["mae"].as_f64().unwrap().is_finite(), "{grip}");
    let (_, out, _) = actuary(&["inspect", s(&dir.path().join("run")), "fit"]);
    assert!(!out.is_empty());
}

/// Per-clip sums in `metrics.json` against scikit-learn's `r2_score` on the
/// shards' `action_est` and the truth files, over a subset of the human clips
/// (reference: scikit-learn, `sklearn.metrics.r2_score`,
/// `multioutput="raw_values"`).
#[test]
fn per_clip_sums_give_scikit_learn_r2_on_a_subset_of_clips() {
    if !crate::util::require_python(&["numpy", "pyarrow", "sklearn"]) {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let clips = demo_with(dir.path(), 5, 3, 0);
    let fit = TINY_FIT.replace("steps = 120", "steps = 20") + "compare = false\n";
    let path = spec(dir.path(), "sub.toml", &clips, "run", &fit);
    let (code, _, err) = actuary(&["run", s(&path), "-j", "1"]);
    assert_eq!(code, 0, "{err}");
    let run = dir.path().join("run");
    let m = metrics(&run);
    let human = m["metrics"]
        .as_array()
        .unwrap()
        .iter()
        .find(|t| t["name"] == "unlabelled:human")
        .expect("human truth table");
    let per_clip = human["per_clip"].as_array().unwrap();
    assert_eq!(per_clip.len(), 3, "{human}");
    // Our figure: R^2 over the first two clips from their sums.
    let subset: Vec<&str> = per_clip[..2]
        .iter()
        .map(|c| c["clip"].as_str().unwrap())
        .collect();
    let ours: Vec<f64> = ["dx", "dy", "grip"]
        .iter()
        .map(|d| {
            let (mut n, mut sse, mut sy, mut sy2) = (0.0, 0.0, 0.0, 0.0);
            for c in &per_clip[..2] {
                let v = &c["models"]["semi"][*d];
                n += c["n"].as_f64().unwrap();
                sse += v["sse"].as_f64().unwrap();
                sy += v["sum_y"].as_f64().unwrap();
                sy2 += v["sum_y2"].as_f64().unwrap();
            }
            1.0 - sse / (sy2 - sy * sy / n)
        })
        .collect();
    let code = "import sys, glob, os, numpy as np, pyarrow.parquet as pq\n\
                from sklearn.metrics import r2_score\n\
                run, truth, clips = sys.argv[1], sys.argv[2], sys.argv[3].split(',')\n\
                t = pq.ParquetDataset(sorted(glob.glob(os.path.join(run, 'shard', '*.parquet')))).read(columns=['clip', 'set', 'frame', 'action_est'])\n\
                pred, true = [], []\n\
                for clip, st, frame, est in zip(*(t.column(c).to_pylist() for c in ['clip', 'set', 'frame', 'action_est'])):\n\
                \x20   if st != 'human' or clip not in clips or est is None:\n\
                \x20       continue\n\
                \x20   rows = np.loadtxt(os.path.join(truth, clip + '.actions.csv'), delimiter=',', skiprows=1, ndmin=2)\n\
                \x20   pred.append(est); true.append(rows[frame, 1:])\n\
                print(' '.join(repr(float(v)) for v in r2_score(np.array(true), np.array(pred), multioutput='raw_values')))";
    let out = crate::util::python(
        code,
        &[s(&run), s(&clips.join("human-truth")), &subset.join(",")],
    );
    let theirs: Vec<f64> = out.split_whitespace().map(|v| v.parse().unwrap()).collect();
    assert_eq!(theirs.len(), 3, "{out}");
    for (d, (a, b)) in ours.iter().zip(&theirs).enumerate() {
        // action_est is stored as float32 in the shards: agree to 1e-4.
        assert!(
            (a - b).abs() < 1e-4,
            "dimension {d}: ours {a}, scikit-learn {b}"
        );
    }
}

/// A held-out labelled set (`held-out = true`) adds calib and holdout clips
/// and nothing else: the same clips train, align's pooled statistics do not
/// move, and the trained weights are byte-identical to a run without it.
#[test]
fn a_held_out_set_only_adds_calib_and_holdout_clips() {
    let dir = tempfile::tempdir().unwrap();
    let clips = demo_with(dir.path(), 4, 2, 4);
    let fit = TINY_FIT.replace("steps = 120", "steps = 20") + "compare = false\n";
    let plain = spec(dir.path(), "plain.toml", &clips, "run-plain", &fit);
    let text = std::fs::read_to_string(&plain)
        .unwrap()
        .replace("run-plain", "run-held")
        + &format!(
            "\n[sets.robot-check]\ndir = \"{}\"\nlabelled = true\nheld-out = true\n",
            s(&clips.join("robot-check"))
        );
    let held = dir.path().join("held.toml");
    std::fs::write(&held, text).unwrap();
    for path in [&plain, &held] {
        let (code, err) = run_fit(path);
        assert_eq!(code, 0, "{err}");
    }
    let read = |run: &str, file: &str| -> serde_json::Value {
        let text = std::fs::read_to_string(dir.path().join(run).join(file)).unwrap();
        serde_json::from_str(&text).unwrap()
    };
    let splits = |run: &str| -> Vec<(String, String, String)> {
        read(run, "fit/model.json")["splits"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| {
                let f = |k: &str| c[k].as_str().unwrap().to_string();
                (f("set"), f("id"), f("split"))
            })
            .collect()
    };
    let (a, b) = (splits("run-plain"), splits("run-held"));
    let checks: Vec<&(String, String, String)> =
        b.iter().filter(|c| c.0 == "robot-check").collect();
    assert_eq!(checks.len(), 4, "{b:?}");
    let count = |s: &str| checks.iter().filter(|c| c.2 == s).count();
    assert_eq!((count("calib"), count("holdout")), (2, 2), "{b:?}");
    // The fit manifest counts them among calib and holdout.
    let counts = &read("run-held", "fit/manifest.json")["counts"];
    assert_eq!(
        (
            &counts["train_clips"],
            &counts["calib_clips"],
            &counts["holdout_clips"]
        ),
        (
            &serde_json::json!(2),
            &serde_json::json!(3),
            &serde_json::json!(3)
        ),
        "{counts}"
    );
    let others: Vec<_> = b.iter().filter(|c| c.0 != "robot-check").cloned().collect();
    assert_eq!(a, others, "the other clips' splits moved");
    // Align: every clip of the plain run aligned exactly as before.
    let clip_map = |run: &str| -> std::collections::BTreeMap<String, serde_json::Value> {
        read(run, "align/alignment.json")["clips"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| (format!("{}/{}", c["set"], c["id"]), c.clone()))
            .collect()
    };
    let (ca, cb) = (clip_map("run-plain"), clip_map("run-held"));
    for (k, v) in &ca {
        assert_eq!(Some(v), cb.get(k), "{k}");
    }
    // The model: byte-identical weights (the files' metadata differ: they
    // carry the stage key, which names the held-out set).
    let weights =
        |run: &str| std::fs::read(dir.path().join(run).join("fit/semi.safetensors")).unwrap();
    let (wa, wb) = (weights("run-plain"), weights("run-held"));
    let (ta, tb) = (
        safetensors::SafeTensors::deserialize(&wa).unwrap(),
        safetensors::SafeTensors::deserialize(&wb).unwrap(),
    );
    let mut names = ta.names();
    names.sort();
    let mut names_b = tb.names();
    names_b.sort();
    assert_eq!(names, names_b);
    assert!(!names.is_empty());
    for name in names {
        assert!(
            ta.tensor(name).unwrap().data() == tb.tensor(name).unwrap().data(),
            "the held-out set changed the trained weights of {name}"
        );
    }
}
