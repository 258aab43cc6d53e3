//! End-to-end behaviour of `check` and `run` on small inputs made here with the
//! FFmpeg CLI: every problem listed at once, skipping unchanged stages,
//! re-running what changed, bad clips under `on-error`, export-frames.

use std::path::{Path, PathBuf};

use crate::util::{actuary, make_clip, make_sidecar, require_ffmpeg, s};

struct Fixture {
    _tmp: tempfile::TempDir,
    root: PathBuf,
    spec: PathBuf,
}

fn fixture(robot: u32, human: u32, extra_decode: &str) -> Fixture {
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path().to_path_buf();
    std::fs::create_dir_all(root.join("robot")).unwrap();
    std::fs::create_dir_all(root.join("human")).unwrap();
    for i in 0..robot {
        make_clip(&root.join(format!("robot/r{i}.mp4")), 20, i);
        make_sidecar(
            &root.join(format!("robot/r{i}.actions.csv")),
            20,
            1.0 + i as f64,
        );
    }
    for i in 0..human {
        make_clip(&root.join(format!("human/h{i}.mp4")), 20, 5 + i);
    }
    let spec = root.join("spec.toml");
    std::fs::write(
        &spec,
        format!(
            "out = \"run\"\n[sets.robot]\ndir = \"robot\"\nlabelled = true\n[sets.human]\ndir = \"human\"\nlabelled = false\n\
             [decode]\nfps = 10\nsize = [32, 32]\n{extra_decode}\n[actions]\nmap = {{ dx = \"sum\", dy = \"sum\", grip = \"hold\" }}\n"
        ),
    )
    .unwrap();
    Fixture {
        _tmp: tmp,
        root,
        spec,
    }
}

fn manifest(run: &Path, stage: &str) -> serde_json::Value {
    let text = std::fs::read_to_string(run.join(stage).join("manifest.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

#[test]
fn check_passes_on_good_inputs() {
    if !require_ffmpeg() {
        return;
    }
    let f = fixture(3, 1, "");
    let (code, out, err) = actuary(&["check", s(&f.spec)]);
    assert_eq!(code, 0, "stdout:\n{out}\nstderr:\n{err}");
    assert!(
        out.contains("set robot: 3 clip(s)") && out.contains("set human: 1 clip(s)"),
        "{out}"
    );
    assert!(out.contains("sidecars parsed: 3"), "{out}");
}

#[test]
fn check_says_how_many_labelled_clips_the_splits_need() {
    if !require_ffmpeg() {
        return;
    }
    // Two labelled clips cannot be split by clip into train, calib and holdout.
    let f = fixture(2, 1, "");
    let (code, out, _) = actuary(&["check", s(&f.spec)]);
    assert_eq!(code, 1, "{out}");
    let line = out
        .lines()
        .find(|l| l.starts_with("problem:") && l.contains("spec.toml"))
        .unwrap_or_default();
    assert!(
        line.contains('3'),
        "the problem must say 3 clips are needed: {out}"
    );
}

#[test]
fn check_lists_every_problem_at_once() {
    if !require_ffmpeg() {
        return;
    }
    let f = fixture(2, 1, "");
    let r = f.root.join("robot");
    std::fs::write(r.join("empty.mp4"), b"").unwrap();
    std::fs::write(r.join("empty.actions.csv"), "t,dx,dy,grip\n0,0,0,0\n").unwrap();
    std::fs::write(r.join("text.mp4"), b"this is not a video\n").unwrap();
    std::fs::write(r.join("text.actions.csv"), "t,dx,dy,grip\n0,0,0,0\n").unwrap();
    make_clip(&r.join("nosidecar.mp4"), 10, 0);
    make_clip(&r.join("nan.mp4"), 10, 0);
    std::fs::write(
        r.join("nan.actions.csv"),
        "t,dx,dy,grip\n0,0,0,0\n0.1,NaN,0,0\n",
    )
    .unwrap();
    make_clip(&r.join("order.mp4"), 10, 0);
    std::fs::write(
        r.join("order.actions.csv"),
        "t,dx,dy,grip\n0,0,0,0\n0.2,0,0,0\n0.1,0,0,0\n",
    )
    .unwrap();
    make_clip(&r.join("cols.mp4"), 10, 0);
    std::fs::write(
        r.join("cols.actions.csv"),
        "t,dx,dy,grip\n0,0,0,0\n0.1,0,0\n",
    )
    .unwrap();
    let (code, out, _) = actuary(&["check", s(&f.spec)]);
    assert_eq!(code, 1, "{out}");
    for name in [
        "empty.mp4",
        "text.mp4",
        "nosidecar.mp4",
        "nan.actions.csv",
        "order.actions.csv",
        "cols.actions.csv",
    ] {
        assert!(
            out.lines()
                .any(|l| l.starts_with("problem:") && l.contains(name)),
            "{name} not reported:\n{out}"
        );
    }
    // Text files are reported with their line (source: the files written above).
    assert!(
        out.lines()
            .any(|l| l.contains("nan.actions.csv") && l.contains("line 3")),
        "{out}"
    );
    assert!(
        out.lines()
            .any(|l| l.contains("order.actions.csv") && l.contains("line 4")),
        "{out}"
    );
    assert!(
        out.lines()
            .any(|l| l.contains("cols.actions.csv") && l.contains("line 3")),
        "{out}"
    );
    assert!(out.contains("6 problem(s) found"), "{out}");
}

#[test]
fn run_skips_unchanged_and_reruns_changed() {
    if !require_ffmpeg() {
        return;
    }
    let f = fixture(2, 1, "");
    let run = f.root.join("run");
    let (code, _, err) = actuary(&["run", s(&f.spec), "--until", "decode", "-j", "2"]);
    assert_eq!(code, 0, "{err}");
    let m1 = manifest(&run, "decode");
    assert_eq!(m1["counts"]["clips"], 3, "{m1}");
    let frames = run.join("decode/clips/robot/r0.frames");
    let mtime = std::fs::metadata(&frames).unwrap().modified().unwrap();

    let (code, _, err) = actuary(&["run", s(&f.spec), "--until", "decode"]);
    assert_eq!(code, 0, "{err}");
    assert!(err.contains("decode: up to date, skipped"), "{err}");
    assert_eq!(manifest(&run, "decode")["key"], m1["key"]);

    // Change one sidecar: decode re-runs, the other clips' frames are reused untouched.
    make_sidecar(&f.root.join("robot/r1.actions.csv"), 20, 9.0);
    let (code, _, err) = actuary(&["run", s(&f.spec), "--until", "decode"]);
    assert_eq!(code, 0, "{err}");
    assert!(!err.contains("up to date"), "{err}");
    let m2 = manifest(&run, "decode");
    assert_ne!(m2["key"], m1["key"]);
    assert_eq!(
        std::fs::metadata(&frames).unwrap().modified().unwrap(),
        mtime,
        "r0 must be reused"
    );
    let statuses: Vec<(String, String)> = m2["clips"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| {
            (
                c["id"].as_str().unwrap().to_string(),
                c["status"].as_str().unwrap().to_string(),
            )
        })
        .collect();
    assert!(
        statuses.contains(&("r0".into(), "reused".into())),
        "{statuses:?}"
    );
    assert!(
        statuses.contains(&("r1".into(), "ok".into())),
        "{statuses:?}"
    );
}

/// `sha256sum FILE` (GNU coreutils): the reference for a file's content hash.
fn sha256sum(path: &Path) -> String {
    let out = crate::util::run_stdout("sha256sum", &[s(path)]);
    String::from_utf8(out).unwrap()[..64].to_string()
}

#[test]
fn remembered_clip_hashes_match_sha256sum_and_a_rewritten_file_is_read_again() {
    if !require_ffmpeg() {
        return;
    }
    let f = fixture(2, 1, "");
    let run = f.root.join("run");
    // Only files left alone for a while are remembered.
    std::thread::sleep(std::time::Duration::from_secs_f64(
        ::actuary::clip_hashes::SETTLED_S + 0.2,
    ));
    let (code, _, err) = actuary(&["run", s(&f.spec), "--until", "decode"]);
    assert_eq!(code, 0, "{err}");
    let remembered = |path: &Path| -> String {
        let text = std::fs::read_to_string(run.join("clip-hashes.json")).unwrap();
        let v: serde_json::Value = serde_json::from_str(&text).unwrap();
        v["files"][s(path)]["sha256"]
            .as_str()
            .unwrap_or_default()
            .to_string()
    };
    let clips = walk(&f.root.join("robot"))
        .into_iter()
        .chain(walk(&f.root.join("human")))
        .collect::<Vec<_>>();
    assert_eq!(clips.len(), 5, "3 clips and 2 sidecars: {clips:?}");
    for path in &clips {
        assert_eq!(remembered(path), sha256sum(path), "{}", path.display());
    }

    // Rewrite a sidecar in place with the same length and put its
    // modification time back: its change time still tells, so it is read
    // again and decode reruns.
    let sidecar = f.root.join("robot/r1.actions.csv");
    let modified = std::fs::metadata(&sidecar).unwrap().modified().unwrap();
    let text = std::fs::read_to_string(&sidecar).unwrap();
    let changed = text.replacen(",0.0000,", ",0.0001,", 1);
    assert!(changed != text && changed.len() == text.len());
    std::thread::sleep(std::time::Duration::from_millis(50));
    std::fs::write(&sidecar, &changed).unwrap();
    std::fs::File::options()
        .write(true)
        .open(&sidecar)
        .unwrap()
        .set_modified(modified)
        .unwrap();
    let (code, _, err) = actuary(&["run", s(&f.spec), "--until", "decode"]);
    assert_eq!(code, 0, "{err}");
    assert!(!err.contains("decode: up to date"), "{err}");
    let record: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(run.join("decode/clips/robot/r1.clip.json")).unwrap(),
    )
    .unwrap();
    assert_eq!(record["sidecar_fingerprint"], sha256sum(&sidecar).as_str());
}

#[test]
fn bad_clip_is_skipped_or_stops_per_policy() {
    if !require_ffmpeg() {
        return;
    }
    let f = fixture(2, 1, "on-error = \"skip\"");
    std::fs::write(f.root.join("human/broken.mp4"), b"not a video").unwrap();
    let run = f.root.join("run");
    let (code, _, err) = actuary(&["run", s(&f.spec), "--until", "decode"]);
    assert_eq!(code, 0, "{err}");
    let m = manifest(&run, "decode");
    let skipped: Vec<&serde_json::Value> = m["clips"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|c| c["status"] == "skipped")
        .collect();
    assert_eq!(skipped.len(), 1, "{m}");
    assert_eq!(skipped[0]["id"], "broken");
    assert!(
        skipped[0]["reason"]
            .as_str()
            .unwrap()
            .contains("broken.mp4"),
        "{m}"
    );

    // Same inputs with on-error = "stop": the run fails, names the clip, and the
    // earlier run's outputs are intact.
    let text = std::fs::read_to_string(&f.spec)
        .unwrap()
        .replace("on-error = \"skip\"", "on-error = \"stop\"");
    std::fs::write(&f.spec, text).unwrap();
    let before = std::fs::read(run.join("decode/clips/robot/r0.frames")).unwrap();
    let (code, _, err) = actuary(&["run", s(&f.spec), "--until", "decode"]);
    assert_eq!(code, 1, "{err}");
    assert!(err.contains("broken.mp4"), "{err}");
    assert!(!run.join("decode/clips/human/broken.frames").exists());
    assert_eq!(
        std::fs::read(run.join("decode/clips/robot/r0.frames")).unwrap(),
        before
    );
    let leftovers: Vec<_> = walk(&run)
        .into_iter()
        .filter(|p| s(p).ends_with(".tmp"))
        .collect();
    assert!(leftovers.is_empty(), "temporary files left: {leftovers:?}");
}

#[test]
fn export_frames_writes_numbered_pngs_equal_to_the_store() {
    if !require_ffmpeg() {
        return;
    }
    let f = fixture(1, 1, "");
    let run = f.root.join("run");
    let (code, _, err) = actuary(&["run", s(&f.spec), "--until", "decode"]);
    assert_eq!(code, 0, "{err}");
    let out = f.root.join("export/deep/dir");
    let (code, stdout, err) = actuary(&["export-frames", s(&run), "h0", s(&out)]);
    assert_eq!(code, 0, "{err}");
    assert!(stdout.contains("wrote 20 frame(s)"), "{stdout}");
    let reader =
        actuary::store::FrameReader::open(&run.join("decode/clips/human/h0.frames")).unwrap();
    for k in [0usize, 7, 19] {
        let png = image::open(out.join(format!("{k:06}.png")))
            .unwrap()
            .to_rgb8();
        assert_eq!(png.as_raw().as_slice(), reader.frame(k), "frame {k}");
    }
    assert!(!out.join("000020.png").exists());
    let (code, _, err) = actuary(&["export-frames", s(&run), "nope", s(&out)]);
    assert_eq!(code, 1);
    assert!(err.contains("nope"), "{err}");
}

fn walk(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    if let Ok(rd) = std::fs::read_dir(dir) {
        for e in rd.flatten() {
            let p = e.path();
            if p.is_dir() {
                out.extend(walk(&p));
            } else {
                out.push(p);
            }
        }
    }
    out
}

/// Runs `actuary ARGS` under bash with `ulimit ULIMIT_ARGS` first.
fn actuary_under_ulimit(ulimit: &str, args: &[&str]) -> (i32, String) {
    let out = std::process::Command::new("bash")
        .arg("-c")
        .arg(format!("ulimit {ulimit} && exec \"$0\" \"$@\""))
        .arg(env!("CARGO_BIN_EXE_actuary"))
        .args(args)
        .env("ACTUARY_QUIET", "1")
        .output()
        .expect("bash runs");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn more_clips_than_the_soft_open_file_limit_run_and_a_hard_limit_is_named() {
    if !require_ffmpeg() {
        return;
    }
    // 2 robot clips and 70 human clips (copies of one) against a limit of 48
    // open files: align opens every clip's frame store and keeps it open.
    let f = fixture(2, 1, "");
    for i in 1..70 {
        std::fs::copy(
            f.root.join("human/h0.mp4"),
            f.root.join(format!("human/h0-copy{i}.mp4")),
        )
        .unwrap();
    }
    let args = [s(&f.spec), "--until", "align"];
    // The soft limit (what `ulimit -n` shows on most desktops: 1024) is raised
    // to the hard one at start-up, so the run goes through.
    let (code, err) = actuary_under_ulimit("-Sn 48", &[&["run"][..], &args].concat());
    assert_eq!(code, 0, "{err}");
    assert!(f.root.join("run/align/manifest.json").is_file());
    // A hard limit below the clip count stops the run with the cause and a hint.
    std::fs::remove_dir_all(f.root.join("run")).unwrap();
    let (code, err) = actuary_under_ulimit("-n 48", &[&["run"][..], &args].concat());
    assert_ne!(code, 0);
    assert!(
        err.contains("Too many open files") && err.contains("ulimit -Hn") && err.contains("48"),
        "{err}"
    );
}
