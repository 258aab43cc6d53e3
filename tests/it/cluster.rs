//! Partitioned runs: parts of the decode stage merged into the stage manifest
//! give the same frames, records and manifest key as a single-machine run;
//! merges refuse missing or stale parts; `submit` writes chained sbatch
//! scripts; and, through a real single-node Slurm (`.ci/slurm.sh start`), a
//! job array of 4 parts matches the single-machine run and a failed part is
//! completed by resubmitting only that index.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use crate::util::{actuary, allow_skip, make_clip, make_sidecar, require_ffmpeg, s};

/// Clip folders shared by two specs that differ only in `out`.
pub struct Fixture {
    _tmp: tempfile::TempDir,
    /// The temp root.
    pub root: PathBuf,
}

/// `robot` labelled and `human` unlabelled clips under a temp folder.
pub fn fixture(robot: u32, human: u32) -> Fixture {
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path().to_path_buf();
    std::fs::create_dir_all(root.join("clips/robot")).unwrap();
    std::fs::create_dir_all(root.join("clips/human/day2")).unwrap();
    for i in 0..robot {
        make_clip(&root.join(format!("clips/robot/r{i}.mp4")), 12, i);
        make_sidecar(
            &root.join(format!("clips/robot/r{i}.actions.csv")),
            12,
            1.0 + i as f64,
        );
    }
    for i in 0..human {
        let sub = if i % 2 == 0 { "" } else { "day2/" };
        make_clip(&root.join(format!("clips/human/{sub}h{i}.mp4")), 12, 5 + i);
    }
    Fixture { _tmp: tmp, root }
}

/// Writes a spec with run folder `out` and extra text; returns its path.
pub fn write_spec(root: &Path, name: &str, out: &str, extra: &str) -> PathBuf {
    let spec = root.join(name);
    std::fs::write(
        &spec,
        format!(
            "out = \"{out}\"\n[sets.robot]\ndir = \"clips/robot\"\nlabelled = true\n[sets.human]\ndir = \"clips/human\"\nlabelled = false\n\
             [decode]\nfps = 10\nsize = [32, 32]\n[actions]\nmap = {{ dx = \"sum\", dy = \"sum\", grip = \"hold\" }}\n{extra}"
        ),
    )
    .unwrap();
    spec
}

fn manifest(run: &Path, stage: &str) -> serde_json::Value {
    let text = std::fs::read_to_string(run.join(stage).join("manifest.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

/// Every file under `dir` (relative path, bytes), sorted, skipping `skip` folders.
fn files(dir: &Path, skip: &[&str]) -> Vec<(String, Vec<u8>)> {
    fn walk(base: &Path, dir: &Path, skip: &[&str], out: &mut Vec<(String, Vec<u8>)>) {
        for e in std::fs::read_dir(dir).unwrap() {
            let p = e.unwrap().path();
            let rel = p.strip_prefix(base).unwrap().to_string_lossy().into_owned();
            if p.is_dir() {
                if !skip.contains(&rel.as_str()) {
                    walk(base, &p, skip, out);
                }
            } else if rel != "manifest.json" {
                out.push((rel, std::fs::read(&p).unwrap()));
            }
        }
    }
    let mut out = Vec::new();
    walk(dir, dir, skip, &mut out);
    out.sort();
    out
}

/// Asserts RUN_B's decode stage equals RUN_A's: every frame store and clip
/// record byte for byte, and the manifest's key, clips, counts and summary.
pub fn assert_same_decode(a: &Path, b: &Path) {
    let fa = files(&a.join("decode"), &["parts"]);
    let fb = files(&b.join("decode"), &["parts"]);
    assert!(!fa.is_empty());
    assert_eq!(
        fa.iter().map(|f| &f.0).collect::<Vec<_>>(),
        fb.iter().map(|f| &f.0).collect::<Vec<_>>()
    );
    for (x, y) in fa.iter().zip(&fb) {
        assert!(
            x.1 == y.1,
            "{} differs between the single-machine and the partitioned run",
            x.0
        );
    }
    let (mut ma, mut mb) = (manifest(a, "decode"), manifest(b, "decode"));
    // The spec's own hash and path differ (the two specs name different run folders).
    for m in [&mut ma, &mut mb] {
        let inputs = m["inputs"].as_object_mut().unwrap();
        assert!(inputs.remove("spec").is_some() && inputs.remove("spec-path").is_some());
    }
    for field in [
        "key",
        "settings_hash",
        "inputs",
        "clips",
        "counts",
        "summary",
        "stage",
    ] {
        assert_eq!(ma[field], mb[field], "manifest field {field}");
    }
}

fn ok(out: &(i32, String, String)) {
    assert_eq!(out.0, 0, "stdout: {}\nstderr: {}", out.1, out.2);
}

#[test]
fn partitioned_decode_merges_to_the_single_machine_result() {
    if !require_ffmpeg() {
        return;
    }
    let fx = fixture(3, 4);
    let single = write_spec(&fx.root, "single.toml", "run-single", "");
    let parted = write_spec(&fx.root, "parted.toml", "run-parts", "");
    ok(&actuary(&[
        "run",
        s(&single),
        "--until",
        "decode",
        "-j",
        "2",
    ]));

    // Merging before any part ran is refused and names every missing part.
    let early = actuary(&["merge", s(&parted), "--stage", "decode", "--parts", "4"]);
    assert_ne!(early.0, 0);
    assert!(
        early.2.contains("part(s) 0, 1, 2, 3 of 4 missing"),
        "{}",
        early.2
    );

    let part = |k: u32| {
        let part = format!("{k}/4");
        actuary(&[
            "run",
            s(&parted),
            "--stage",
            "decode",
            "--part",
            &part,
            "-j",
            "2",
        ])
    };
    let merged = fx.root.join("run-parts/decode/manifest.json");
    for k in 0..3 {
        let out = part(k);
        ok(&out);
        assert!(out.1.contains("done"), "{}", out.1);
        assert!(
            fx.root
                .join(format!("run-parts/decode/parts/{k}-of-4.json"))
                .is_file()
        );
    }
    // Rerunning a finished part does nothing, and with a part missing nothing merges.
    let again = part(2);
    assert!(again.1.contains("already done"), "{}", again.1);
    assert!(!merged.exists());

    // The last part merges the stage itself, unless another process holds
    // the merge lock; `actuary merge` does not look at the lock.
    let lock = fx.root.join("run-parts/decode/parts/merging");
    std::fs::write(&lock, b"").unwrap();
    let last = part(3);
    ok(&last);
    assert!(!last.1.contains("merged"), "{}", last.1);
    assert!(!merged.exists(), "merged despite the lock");
    std::fs::remove_file(&lock).unwrap();
    let last = part(3);
    ok(&last);
    assert!(
        last.1.contains("already done") && last.1.contains("all 4 part(s) done, merged"),
        "{}",
        last.1
    );
    assert!(merged.is_file());
    assert!(!lock.exists(), "the lock is removed after the merge");
    let merge = actuary(&["merge", s(&parted), "--stage", "decode", "--parts", "4"]);
    ok(&merge);
    assert!(merge.1.contains("already merged"), "{}", merge.1);
    assert_same_decode(&fx.root.join("run-single"), &fx.root.join("run-parts"));

    // The merged manifest carries the single-machine key, so `run` skips decode.
    let run = actuary(&["run", s(&parted), "--until", "decode"]);
    ok(&run);
    assert!(run.2.contains("decode: up to date, skipped"), "{}", run.2);

    // Parts made under other settings are refused by the merge.
    let changed = write_spec(&fx.root, "parted.toml", "run-parts", "");
    let text = std::fs::read_to_string(&changed)
        .unwrap()
        .replace("size = [32, 32]", "size = [16, 16]");
    std::fs::write(&changed, text).unwrap();
    let stale = actuary(&["merge", s(&changed), "--stage", "decode", "--parts", "4"]);
    assert_ne!(stale.0, 0);
    assert!(stale.2.contains("other settings or inputs"), "{}", stale.2);

    // Bad arguments are clear.
    let bad = actuary(&["run", s(&parted), "--stage", "decode", "--part", "4/4"]);
    assert!(bad.0 != 0 && bad.2.contains("expected K/N"), "{}", bad.2);
    let bad = actuary(&["run", s(&parted), "--stage", "fit", "--part", "0/4"]);
    assert!(
        bad.0 != 0 && bad.2.contains("does not run in parts"),
        "{}",
        bad.2
    );
}

#[test]
fn submit_dry_run_writes_chained_scripts_with_spec_resources() {
    if !require_ffmpeg() {
        return;
    }
    let fx = fixture(1, 1);
    let spec = write_spec(
        &fx.root,
        "spec.toml",
        "run",
        "[cluster]\nparts = 3\n[cluster.jobs.default]\nmem = \"2G\"\ntime = \"30\"\npartition = \"cpu\"\n\
         [cluster.jobs.decode]\ncpus-per-task = 6\nextra = [\"--account=lab\"]\n",
    );
    let out = actuary(&["submit", s(&spec), "--dry-run"]);
    ok(&out);
    let dir = fx.root.join("run/cluster");
    let decode = std::fs::read_to_string(dir.join("1-decode.sbatch")).unwrap();
    for line in [
        "#SBATCH --array=0-2",
        "#SBATCH --cpus-per-task=6",
        "#SBATCH --mem=2G",
        "#SBATCH --time=30",
        "#SBATCH --partition=cpu",
        "#SBATCH --account=lab",
        "--stage decode --part \"${SLURM_ARRAY_TASK_ID}/3\"",
    ] {
        assert!(decode.contains(line), "missing `{line}` in\n{decode}");
    }
    let merge = std::fs::read_to_string(dir.join("2-merge-decode.sbatch")).unwrap();
    assert!(
        merge.contains("merge")
            && merge.contains("--parts 3")
            && merge.contains("--cpus-per-task=4"),
        "{merge}"
    );
    let later = std::fs::read_to_string(dir.join("3-align-fit.sbatch")).unwrap();
    assert!(later.contains("--until fit"), "{later}");
    assert!(dir.join("4-label.sbatch").is_file() && dir.join("5-merge-label.sbatch").is_file());
    assert!(
        std::fs::read_to_string(dir.join("6-shard.sbatch"))
            .unwrap()
            .contains("--until shard")
    );
    assert!(out.1.contains("dry run"), "{}", out.1);
}

/// Whether a Slurm controller answers with a node that takes work (idle, or
/// busy with another test's job: mixed, allocated, completing); panics unless
/// skipping is allowed.
fn require_slurm() -> bool {
    let up = Command::new("sinfo")
        .args(["-h", "-N", "-o", "%T"])
        .output()
        .is_ok_and(|o| {
            o.status.success()
                && String::from_utf8_lossy(&o.stdout).lines().any(|state| {
                    // A trailing `*` (not responding) or `~` (powered off) does not count.
                    let state = state.trim().trim_end_matches(['$', '-']);
                    matches!(state, "idle" | "mixed" | "allocated" | "completing")
                })
        });
    if !up {
        if allow_skip() {
            eprintln!("skipping: no Slurm node up (start one with `bash .ci/slurm.sh start`)");
            return false;
        }
        panic!(
            "a running Slurm is required for this test: `bash .ci/slurm.sh start` (or ACTUARY_ALLOW_SKIP=1)"
        );
    }
    true
}

/// The job ids printed by `submit` (lines `NAME job ID ...`).
fn job_ids(stdout: &str) -> Vec<String> {
    stdout
        .lines()
        .filter_map(|l| {
            let mut w = l.split_whitespace();
            w.next()?;
            (w.next()? == "job")
                .then(|| w.next().map(str::to_string))
                .flatten()
        })
        .collect()
}

/// Waits until none of `ids` is queued or running.
fn wait_for(ids: &[String]) {
    let started = Instant::now();
    loop {
        let out = Command::new("squeue")
            .args(["-h", "-o", "%i", "-j", &ids.join(",")])
            .output()
            .expect("squeue runs");
        let text = String::from_utf8_lossy(&out.stdout);
        if text.trim().is_empty() {
            return;
        }
        assert!(
            started.elapsed() < Duration::from_secs(300),
            "jobs still queued: {text}"
        );
        std::thread::sleep(Duration::from_millis(300));
    }
}

fn submit(spec: &Path, fail_part: Option<&str>) -> (i32, String, String) {
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_actuary"));
    cmd.args(["submit", s(spec), "--parts", "4", "--until", "decode"])
        .env("ACTUARY_QUIET", "1");
    match fail_part {
        Some(k) => cmd.env("ACTUARY_FAIL_PART", k),
        None => cmd.env_remove("ACTUARY_FAIL_PART"),
    };
    let out = cmd.output().expect("actuary runs");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn slurm_array_matches_single_machine_and_a_failed_part_is_resubmitted_alone() {
    if !require_ffmpeg() || !require_slurm() {
        return;
    }
    let fx = fixture(3, 5);
    let resources = "[cluster.jobs.default]\ncpus-per-task = 1\nmem = \"200M\"\ntime = \"10:00\"\n";
    let single = write_spec(&fx.root, "single.toml", "run-single", "");
    let slurm = write_spec(&fx.root, "slurm.toml", "run-slurm", resources);
    ok(&actuary(&[
        "run",
        s(&single),
        "--until",
        "decode",
        "-j",
        "1",
    ]));

    // First submission: part 1 fails on purpose, so the merge is cancelled.
    let first = submit(&slurm, Some("1"));
    ok(&first);
    assert!(
        first.1.contains("(array 0-3)") && first.1.contains("squeue -j"),
        "{}",
        first.1
    );
    let ids = job_ids(&first.1);
    assert_eq!(ids.len(), 2, "{}", first.1);
    wait_for(&ids);
    let parts = fx.root.join("run-slurm/decode/parts");
    for k in [0, 2, 3] {
        assert!(
            parts.join(format!("{k}-of-4.json")).is_file(),
            "part {k} did not finish"
        );
    }
    assert!(!parts.join("1-of-4.json").exists());
    assert!(
        !fx.root.join("run-slurm/decode/manifest.json").exists(),
        "merge ran despite a failed part"
    );
    let log = std::fs::read_dir(fx.root.join("run-slurm/cluster/logs"))
        .unwrap()
        .map(|e| std::fs::read_to_string(e.unwrap().path()).unwrap_or_default())
        .collect::<String>();
    assert!(
        log.contains("ACTUARY_FAIL_PART"),
        "the failed task's log names the cause:\n{log}"
    );

    // Resubmitting sends only index 1 (the rest is done), then the merge.
    let second = submit(&slurm, None);
    ok(&second);
    assert!(second.1.contains("(array 1)"), "{}", second.1);
    let ids = job_ids(&second.1);
    wait_for(&ids);
    assert_same_decode(&fx.root.join("run-single"), &fx.root.join("run-slurm"));
    let again = submit(&slurm, None);
    assert!(again.1.contains("nothing to submit"), "{}", again.1);
}

/// A tiny full-pipeline spec over the demo generator's clips (our own synthetic scenario).
const FULL: &str = "[fit]\nlatent = 4\nwidths = [8, 8, 8]\nhidden = 16\nhead-hidden = 8\nheads = 2\nsteps = 20\n\
                    batch = 8\ncheckpoint-every = 10\ncompare = false\n[label]\ncodes = 4\n[shard]\ntarget-size-mb = 0.05\n";

fn full_spec(root: &Path, name: &str, out: &str, extra: &str) -> PathBuf {
    let spec = root.join(name);
    std::fs::write(
        &spec,
        format!(
            "out = \"{out}\"\n[sets.robot]\ndir = \"d/robot\"\nlabelled = true\n[sets.human]\ndir = \"d/human\"\nlabelled = false\n\
             [decode]\nfps = 10\nsize = [32, 32]\n[actions]\nmap = {{ dx = \"sum\", dy = \"sum\", grip = \"hold\" }}\n{FULL}{extra}"
        ),
    )
    .unwrap();
    spec
}

#[test]
fn slurm_run_of_every_stage_gives_byte_identical_shards() {
    if !require_ffmpeg() || !require_slurm() {
        return;
    }
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    ok(&actuary(&[
        "demo-clips",
        s(&root.join("d")),
        "--robot-clips",
        "6",
        "--human-clips",
        "4",
        "--check-clips",
        "0",
    ]));
    let resources = "[cluster]\nparts = 4\n[cluster.jobs.default]\ncpus-per-task = 1\nmem = \"500M\"\ntime = \"10:00\"\n";
    let single = full_spec(root, "single.toml", "run-single", "");
    let slurm = full_spec(root, "slurm.toml", "run-slurm", resources);
    ok(&actuary(&["run", s(&single), "-j", "1"]));
    let out = actuary(&["submit", s(&slurm)]);
    ok(&out);
    // decode array, its merge, align+fit, label array, its merge, shard.
    let ids = job_ids(&out.1);
    assert_eq!(ids.len(), 6, "{}", out.1);
    wait_for(&ids);
    let a = files(&root.join("run-single/shard"), &[]);
    let b = files(&root.join("run-slurm/shard"), &[]);
    assert!(!a.is_empty() && a.iter().all(|f| f.0.ends_with(".parquet")));
    assert_eq!(a.len(), b.len(), "shard files differ in number");
    for (x, y) in a.iter().zip(&b) {
        assert!(x.0 == y.0 && x.1 == y.1, "{} is not byte-identical", x.0);
    }
    assert_eq!(
        manifest(&root.join("run-single"), "shard")["key"],
        manifest(&root.join("run-slurm"), "shard")["key"]
    );
}
