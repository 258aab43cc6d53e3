//! Shard checks against the outside: Apache Arrow's Python library (pyarrow)
//! reads every shard with the design's schema, the manifest's row counts and
//! checksums; DuckDB's `count(*)` / `avg(confidence)` equal the tool's own
//! figures; Polars `scan_parquet` reads them; Pillow decodes each PNG to the
//! decode stage's frame byte for byte; and the output is deterministic.

use std::path::Path;

use actuary::shard::{ImageEncoding, ShardJob, ShardOptions, ShardSummary, write_shards};

use crate::label::{H, W, fake_run};
use crate::util;

fn shard(run: &Path, opts: &ShardOptions, threads: usize) -> ShardSummary {
    let dir = run.join("shard");
    let job = ShardJob {
        run_dir: run,
        shard_dir: &dir,
        opts,
        seed: 7,
        threads,
    };
    let summary = write_shards(&job).unwrap_or_else(|e| panic!("shard: {e}"));
    // The stage manifest as the runner would write it.
    let mut m = actuary::shard::manifest_of(&summary);
    m.stage = "shard".into();
    m.write(run).unwrap();
    summary
}

/// Small shards: 16-row groups, rolled at 40 kB.
fn small() -> ShardOptions {
    ShardOptions {
        row_group_rows: 16,
        target_size_mb: 0.04,
        ..ShardOptions::default()
    }
}

/// The Python side: reads the manifest and checks the shards with pyarrow
/// (schema against the design's table, row counts, row-group sizes, zstd,
/// sha256), the null pattern of the last frames, and the images with Pillow
/// against the frame store files.
const PYARROW_CHECK: &str = r#"
import sys, json, hashlib, io
import pyarrow as pa, pyarrow.parquet as pq, numpy as np
from PIL import Image
run = sys.argv[1]; encoding = sys.argv[2]; width, height = int(sys.argv[3]), int(sys.argv[4])
m = json.load(open(f"{run}/shard/manifest.json"))["summary"]
L = pa.list_(pa.float32())
# The design's "Shard rows" table.
want = pa.schema([
    pa.field("clip", pa.utf8(), False), pa.field("set", pa.utf8(), False),
    pa.field("labelled", pa.bool_(), False), pa.field("frame", pa.uint32(), False),
    pa.field("t", pa.float64(), False), pa.field("image", pa.binary(), False),
    pa.field("action", L), pa.field("action_est", L), pa.field("action_std", L),
    pa.field("confidence", pa.float32()), pa.field("ood", pa.bool_()),
    pa.field("code", pa.uint16()), pa.field("split", pa.utf8(), False)])
tables = []
for s in m["shards"]:
    path = f"{run}/shard/{s['file']}"
    assert hashlib.sha256(open(path, "rb").read()).hexdigest() == s["sha256"], s["file"]
    f = pq.ParquetFile(path)
    assert f.schema_arrow.equals(want, check_metadata=False), (f.schema_arrow, want)
    assert f.metadata.num_rows == s["rows"], (f.metadata.num_rows, s)
    assert f.metadata.num_row_groups == s["row_groups"]
    for g in range(f.metadata.num_row_groups):
        rg = f.metadata.row_group(g)
        assert rg.num_rows <= m["row_group_rows"]
        assert all(rg.column(c).compression == "ZSTD" for c in range(rg.num_columns))
    tables.append(f.read())
t = pa.concat_tables(tables)
assert t.num_rows == m["rows"]
rows = t.to_pylist()
by_clip = {}
for r in rows:
    by_clip.setdefault((r["set"], r["clip"]), []).append(r)
frames_checked = 0
for (setname, clip), rs in by_clip.items():
    rs.sort(key=lambda r: r["frame"])
    n = len(rs)
    assert [r["frame"] for r in rs] == list(range(n))
    store = open(f"{run}/decode/clips/{setname}/{clip}.frames", "rb").read()
    assert int.from_bytes(store[20:24], "little") == n
    fb = width * height * 3
    for r in rs:
        k = r["frame"]
        assert abs(r["t"] - k / m["fps"]) < 1e-12
        last = k == n - 1
        for col in ("action_est", "action_std", "confidence", "ood", "code"):
            assert (r[col] is None) == last, (clip, k, col)
        assert (r["action"] is None) == (last or not r["labelled"]), (clip, k)
        if not last:
            assert len(r["action_est"]) == len(m["action_dims"])
        raw = store[64 + k * fb: 64 + (k + 1) * fb]
        if encoding == "png":
            im = Image.open(io.BytesIO(r["image"]))
            assert im.format == "PNG" and im.mode == "RGB" and im.size == (width, height), (im.format, im.mode, im.size)
            assert im.tobytes() == raw, (clip, k)
        else:
            assert r["image"] == raw
        frames_checked += 1
print(frames_checked)
"#;

#[test]
fn shards_match_the_design_schema_in_pyarrow_and_pillow() {
    if !util::require_python(&["pyarrow", "numpy", "PIL"]) {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path();
    fake_run(run, 8, 1);
    for (encoding, name) in [(ImageEncoding::Png, "png"), (ImageEncoding::Raw, "raw")] {
        let opts = ShardOptions {
            image: encoding,
            ..small()
        };
        let summary = shard(run, &opts, 2);
        assert!(summary.shards.len() > 1, "rolled into several shards");
        assert_eq!(summary.rows, 8 * 60 + 3 * 40);
        assert_eq!(
            summary.shards.iter().map(|s| s.rows).sum::<u64>(),
            summary.rows
        );
        let out = util::python(
            PYARROW_CHECK,
            &[util::s(run), name, &W.to_string(), &H.to_string()],
        );
        assert_eq!(out.trim(), summary.rows.to_string(), "{name}");
    }
}

#[test]
fn duckdb_and_polars_agree_with_the_manifest() {
    if !util::require_python(&["duckdb", "polars"]) {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path();
    fake_run(run, 8, 2);
    let summary = shard(
        run,
        &ShardOptions {
            shuffle: true,
            ..small()
        },
        2,
    );
    // Reference: DuckDB's Parquet reader.
    let code = "import sys, duckdb\nc, a = duckdb.connect().execute(f\"SELECT count(*), avg(confidence) FROM '{sys.argv[1]}/shard/*.parquet'\").fetchone()\nprint(c, repr(a))";
    let out = util::python(code, &[util::s(run)]);
    let mut it = out.split_whitespace();
    let count: u64 = it.next().unwrap().parse().unwrap();
    let avg: f64 = it.next().unwrap().parse().unwrap();
    assert_eq!(count, summary.rows);
    assert!(
        (avg - summary.confidence.mean).abs() < 1e-9,
        "{avg} vs {}",
        summary.confidence.mean
    );
    // Reference: Polars' lazy Parquet scan.
    let code = "import sys, polars as pl\nlf = pl.scan_parquet(f'{sys.argv[1]}/shard/*.parquet')\ndf = lf.select(pl.len(), pl.col('confidence').null_count(), pl.col('code').max()).collect()\nprint(*df.row(0))";
    let out = util::python(code, &[util::s(run)]);
    let v: Vec<u64> = out.split_whitespace().map(|x| x.parse().unwrap()).collect();
    assert_eq!(v[0], summary.rows);
    assert_eq!(
        v[1], summary.clips,
        "one null confidence per clip (its last frame)"
    );
    assert!(v[2] < 6);
}

#[test]
fn png_frames_come_from_the_label_stage_and_a_missing_store_is_named() {
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path();
    let first = fake_run(run, 6, 4);
    let label_dir = run.join("label");
    let (set, id) = ("robot", "pick-03");
    let store = actuary::label::output::png_frames_path(&label_dir, set, id);
    // The label stage wrote one PNG per decoded frame, each the encoder's
    // bytes for that frame (Pillow checks the pixels in another test).
    let pngs = actuary::store::png_frames::PngFrameReader::open(&store).unwrap();
    let rec: actuary::store::ClipRecord = actuary::store::read_json(
        &actuary::store::ClipRecord::record_path(&run.join("decode"), set, id),
    )
    .unwrap();
    assert_eq!(pngs.len(), rec.frames as usize);
    drop(pngs);

    std::fs::remove_file(&store).unwrap();
    let job = ShardJob {
        run_dir: run,
        shard_dir: &run.join("shard"),
        opts: &small(),
        seed: 7,
        threads: 2,
    };
    let err = write_shards(&job).unwrap_err().to_string();
    assert!(
        err.contains("pick-03.png-frames") && err.contains("label stage"),
        "{err}"
    );
    // Raw images do not need it.
    let raw = ShardOptions {
        image: ImageEncoding::Raw,
        ..small()
    };
    shard(run, &raw, 2);
    // Labelling again redoes only the clip whose store is missing.
    let again = fake_run(run, 6, 4);
    assert_eq!(
        (again.clips_labelled, again.clips_reused),
        (1, first.clips_labelled - 1)
    );
    assert!(store.is_file());
    // A damaged store is refused with its path.
    let bytes = std::fs::read(&store).unwrap();
    std::fs::write(&store, &bytes[..bytes.len() / 2]).unwrap();
    let err = write_shards(&job).unwrap_err().to_string();
    assert!(err.contains("pick-03.png-frames"), "{err}");
}

#[test]
fn two_fresh_runs_are_byte_identical_and_reruns_rewrite_nothing() {
    let a = tempfile::tempdir().unwrap();
    let b = tempfile::tempdir().unwrap();
    fake_run(a.path(), 6, 4);
    fake_run(b.path(), 6, 4);
    let opts = ShardOptions {
        shuffle: true,
        ..small()
    };
    let sa = shard(a.path(), &opts, 2);
    let sb = shard(b.path(), &opts, 2);
    assert_eq!(sa.shards, sb.shards);
    for s in &sa.shards {
        let x = std::fs::read(a.path().join("shard").join(&s.file)).unwrap();
        let y = std::fs::read(b.path().join("shard").join(&s.file)).unwrap();
        assert!(x == y, "{} differs", s.file);
        assert_eq!(actuary::util::sha256_hex(&x), s.sha256);
    }
    // Another thread count gives the same bytes too.
    let c = tempfile::tempdir().unwrap();
    fake_run(c.path(), 6, 4);
    assert_eq!(shard(c.path(), &opts, 1).shards, sa.shards);
    // A rerun with unchanged inputs leaves every file untouched.
    let times = |dir: &Path| -> Vec<_> {
        sa.shards
            .iter()
            .map(|s| {
                std::fs::metadata(dir.join("shard").join(&s.file))
                    .unwrap()
                    .modified()
                    .unwrap()
            })
            .collect()
    };
    let before = times(a.path());
    std::thread::sleep(std::time::Duration::from_millis(20));
    let again = shard(a.path(), &opts, 2);
    assert_eq!(again.shards, sa.shards);
    assert_eq!(again.unchanged, sa.shards.len() as u64);
    assert_eq!(times(a.path()), before);
    // Only shards and the manifest are in the folder; --verify agrees.
    let names: Vec<String> = std::fs::read_dir(a.path().join("shard"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    assert_eq!(names.len(), sa.shards.len() + 1, "{names:?}");
    let inspection = actuary::shard::inspect_shards(a.path(), true).unwrap();
    assert!(inspection.ok());
    // A damaged shard is caught by the verification.
    let first = a.path().join("shard").join(&sa.shards[0].file);
    let mut bytes = std::fs::read(&first).unwrap();
    bytes[100] ^= 1;
    std::fs::write(&first, bytes).unwrap();
    assert!(!actuary::shard::inspect_shards(a.path(), true).unwrap().ok());
}

#[test]
fn shuffle_changes_the_order_but_not_the_rows() {
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path();
    fake_run(run, 4, 5);
    let plain = shard(run, &small(), 2);
    let mixed = shard(
        run,
        &ShardOptions {
            shuffle: true,
            ..small()
        },
        2,
    );
    assert_eq!(plain.rows, mixed.rows);
    assert_eq!(plain.rows_per_set, mixed.rows_per_set);
    assert_ne!(plain.shards[0].sha256, mixed.shards[0].sha256);
    assert_eq!(mixed.shuffle_seed, Some(7));
}

/// The fenced block of `lang` in README.md's "Reading the shards" section.
fn readme_block(lang: &str) -> String {
    let readme = std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("README.md"))
        .expect("README.md exists (with the \"Reading the shards\" section)");
    let start = readme
        .find("## Reading the shards")
        .expect("README.md has a \"Reading the shards\" section");
    let section = &readme[start..];
    let fence = format!("```{lang}\n");
    let from = section
        .find(&fence)
        .unwrap_or_else(|| panic!("no {lang} block in the section"))
        + fence.len();
    let len = section[from..].find("```").expect("closed block");
    section[from..from + len].to_string()
}

#[test]
fn readme_snippets_read_the_shards() {
    if !util::require_python(&["pyarrow", "numpy", "PIL", "duckdb"]) {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path();
    fake_run(run, 8, 6);
    let summary = shard(run, &small(), 2);
    // The tool's own count of rows at or above the threshold.
    let threshold = 0.15f32;
    let want: usize = ["robot", "human"]
        .iter()
        .flat_map(|set| {
            let d = run.join("label/clips").join(set);
            walk_labels(&d)
        })
        .map(|l| l.confidence.iter().filter(|c| **c >= threshold).count())
        .sum();
    let code = readme_block("python");
    let out = std::process::Command::new("python3")
        .args(["-c", &code])
        .env("RUN", run)
        .env("MIN_CONFIDENCE", threshold.to_string())
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(
        String::from_utf8_lossy(&out.stdout).trim(),
        format!("rows {want}")
    );
    // The DuckDB query, pointed at this run (reference: DuckDB).
    let sql = readme_block("sql").replace("runs/tabletop", util::s(run));
    let code = "import sys, duckdb\nprint(sum(r[2] for r in duckdb.connect().execute(sys.argv[1]).fetchall()))";
    assert_eq!(util::python(code, &[&sql]).trim(), summary.rows.to_string());
}

fn walk_labels(dir: &Path) -> Vec<actuary::label::ClipLabels> {
    let mut out = Vec::new();
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            out.extend(walk_labels(&p));
        } else if p.to_string_lossy().ends_with(".labels.json") {
            out.push(actuary::store::read_json(&p).unwrap());
        }
    }
    out
}

/// Benchmarks (not run by default; `bench/shard_bench.sh` runs them in release
/// mode and compares with pyarrow). They print JSON lines and assert nothing
/// about time.
mod bench {
    use std::path::Path;
    use std::time::Instant;

    use actuary::label::{
        FitOutputs, LabelJob, LabelOptions, Split, Standardisation, TransitionBatch,
        TransitionModel,
    };
    use actuary::model::{Config, Net, SeededInit};
    use actuary::shard::{ImageEncoding, ShardOptions};
    use actuary::store::png_frames::write_png_frames;
    use actuary::store::{ClipRecord, FrameReader, FrameWriter, write_json_atomic};
    use candle_core::{DType, Device};

    const SIZE: u32 = 64;

    /// A fake run of smooth synthetic 64x64 frames (gradients and a moving
    /// square, so PNG sizes are realistic) with labels from the fake model.
    fn smooth_run(run: &Path, clips: usize, frames: u32) {
        let splits = crate::label::fake_decode(run, 0, 1);
        assert!(splits.is_empty());
        let decode = run.join("decode");
        let _ = std::fs::remove_dir_all(decode.join("clips/human"));
        let mut splits = std::collections::BTreeMap::new();
        let mut rng = actuary::model::Rng::new(3);
        for c in 0..clips {
            let (set, id) = ("robot", format!("pick-{c:03}"));
            let path = ClipRecord::frames_path(&decode, set, &id);
            let mut w = FrameWriter::create(&path, SIZE, SIZE).unwrap();
            for t in 0..frames {
                let mut f = vec![0u8; (SIZE * SIZE * 3) as usize];
                for y in 0..SIZE {
                    for x in 0..SIZE {
                        let i = ((y * SIZE + x) * 3) as usize;
                        let inside = (x + t + c as u32) % SIZE < 12 && (y + 2 * t) % SIZE < 12;
                        // Sensor-like noise of a few levels keeps PNG sizes realistic.
                        let mut noise = |k: u32| (rng.below(9) as u32 + k) as u8;
                        f[i] = ((x * 3 + c as u32) as u8).wrapping_add(noise(0));
                        f[i + 1] =
                            if inside { 230 } else { (y * 2 + t) as u8 }.wrapping_add(noise(0));
                        f[i + 2] = (((x + y) * 2) as u8).wrapping_add(noise(0));
                    }
                }
                w.push(&f).unwrap();
            }
            w.finish().unwrap();
            let actions: Vec<Vec<f32>> = (0..frames - 1)
                .map(|t| vec![(t % 7) as f32 * 0.1, (c % 2) as f32])
                .collect();
            let mut rec: ClipRecord =
                serde_json::from_value(serde_json::to_value(record_template(&id, frames)).unwrap())
                    .unwrap();
            rec.actions = Some(actions);
            write_json_atomic(&ClipRecord::record_path(&decode, set, &id), &rec).unwrap();
            let split = [Split::Train, Split::Calib, Split::Holdout][c % 3];
            splits.insert((set.to_string(), id), split);
        }
        let opts = LabelOptions {
            codes: 8,
            ..LabelOptions::default()
        };
        let fit = FitOutputs {
            model: Box::new(crate::label::FakeModel::new()),
            splits,
        };
        let label_dir = run.join("label");
        let job = LabelJob {
            run_dir: run,
            label_dir: &label_dir,
            key: "bench",
            opts: &opts,
            seed: 1,
            threads: 2,
            frame_pngs: true,
        };
        actuary::label::label_run(&job, &fit, &crate::label::view(run)).unwrap();
    }

    fn record_template(id: &str, frames: u32) -> serde_json::Value {
        serde_json::json!({
            "id": id, "set": "robot", "labelled": true, "frames": frames, "fps": 10.0,
            "width": SIZE, "height": SIZE, "dropped": 0, "repeated": 0,
            "source": {"path": "/nowhere.mp4", "codec": "h264", "width": SIZE, "height": SIZE, "fps": 10.0,
                       "duration_s": frames as f64 / 10.0, "frames": frames, "rotation": 0,
                       "matrix": "bt601", "range": "limited", "untagged": true},
            "fingerprint": "0", "key": "bench", "action_dims": ["dx", "grip"], "actions": null,
            "sidecar": null, "sidecar_fingerprint": null
        })
    }

    #[test]
    #[ignore = "benchmark: run bench/shard_bench.sh"]
    fn bench_shard_stage() {
        let run = std::path::PathBuf::from(
            std::env::var("ACTUARY_BENCH_RUN").expect("ACTUARY_BENCH_RUN"),
        );
        let _ = std::fs::remove_dir_all(&run);
        // ACTUARY_BENCH_CLIPS: fewer clips for a profile under callgrind.
        let clips = std::env::var("ACTUARY_BENCH_CLIPS")
            .ok()
            .and_then(|v| v.parse().ok())
            .unwrap_or(200);
        smooth_run(&run, clips, 100);
        // The PNG encoding the label stage does for these rows (it writes a
        // PNG frame store per clip), timed alone on 2 threads: the shard
        // stage's PNG figures below only copy those bytes.
        let scratch = run.join("png-encode");
        let decode = run.join("decode");
        let pool = actuary::util::thread_pool(2);
        let (t0, c0) = (Instant::now(), process_cpu_seconds());
        let mut rows = 0;
        for c in 0..clips {
            let id = format!("pick-{c:03}");
            let frames =
                FrameReader::open(&ClipRecord::frames_path(&decode, "robot", &id)).unwrap();
            let out = scratch.join(format!("{id}.png-frames"));
            rows += pool.install(|| write_png_frames(&frames, &out)).unwrap();
        }
        let secs = t0.elapsed().as_secs_f64();
        println!(
            "BENCH {{\"what\":\"png-encode\",\"threads\":2,\"rows\":{rows},\"seconds\":{secs},\"cpu_seconds\":{:.3},\"rows_per_s\":{}}}",
            process_cpu_seconds() - c0,
            rows as f64 / secs
        );
        let _ = std::fs::remove_dir_all(&scratch);
        for (threads, image, name) in [
            (1usize, ImageEncoding::Png, "png"),
            (2, ImageEncoding::Png, "png"),
            (2, ImageEncoding::Raw, "raw"),
        ] {
            let opts = ShardOptions {
                image,
                ..ShardOptions::default()
            };
            let dir = run.join(format!("shard-{name}"));
            // The best of ACTUARY_BENCH_REPEAT fresh writes (default 3): the
            // machine is shared, and the fastest run is the least disturbed.
            let repeat: usize = std::env::var("ACTUARY_BENCH_REPEAT")
                .ok()
                .and_then(|v| v.parse().ok())
                .unwrap_or(3);
            let (mut best, mut cpu) = (f64::INFINITY, 0.0);
            let mut summary = None;
            for _ in 0..repeat.max(1) {
                let _ = std::fs::remove_dir_all(&dir);
                let job = actuary::shard::ShardJob {
                    run_dir: &run,
                    shard_dir: &dir,
                    opts: &opts,
                    seed: 7,
                    threads,
                };
                let (t0, c0) = (Instant::now(), process_cpu_seconds());
                let s = actuary::shard::write_shards(&job).unwrap();
                let secs = t0.elapsed().as_secs_f64();
                if secs < best {
                    (best, cpu) = (secs, process_cpu_seconds() - c0);
                }
                summary = Some(s);
            }
            let s = summary.expect("at least one run");
            let bytes: u64 = s.shards.iter().map(|f| f.bytes).sum();
            println!(
                "BENCH {{\"what\":\"shard\",\"image\":\"{name}\",\"threads\":{threads},\"rows\":{},\"bytes\":{bytes},\"runs\":{},\"seconds\":{best},\"cpu_seconds\":{cpu:.3},\"mb_per_s\":{}}}",
                s.rows,
                repeat.max(1),
                bytes as f64 / 1e6 / best
            );
        }
    }

    /// User plus system CPU time of this process so far (Linux `/proc`).
    fn process_cpu_seconds() -> f64 {
        let stat = std::fs::read_to_string("/proc/self/stat").unwrap_or_default();
        // After the command name: state, then ..., utime and stime (fields 14
        // and 15 of proc(5)) at positions 11 and 12.
        let rest = stat.rsplit_once(')').map_or("", |(_, r)| r);
        let f: Vec<&str> = rest.split_whitespace().collect();
        let field = |i: usize| f.get(i).and_then(|v| v.parse::<f64>().ok()).unwrap_or(0.0);
        let ticks = 100.0; // USER_HZ on Linux (proc(5); from memory)
        (field(11) + field(12)) / ticks
    }

    /// The fit stage's network (default shape, seeded weights: inference costs
    /// the same trained or not) as the label stage's model.
    struct NetModel {
        net: Net,
        _map: candle_nn::VarMap,
        st: Standardisation,
        cfg: Config,
    }

    impl TransitionModel for NetModel {
        fn latent_dims(&self) -> usize {
            self.cfg.latent
        }
        fn heads(&self) -> usize {
            self.cfg.heads
        }
        fn standardisation(&self) -> &Standardisation {
            &self.st
        }
        fn infer(
            &self,
            pairs: &[(&[u8], &[u8])],
        ) -> Result<TransitionBatch, actuary::label::model::ModelFailure> {
            let n = pairs.len();
            let (h, w) = (self.cfg.height, self.cfg.width);
            let cat = |second: bool| {
                pairs
                    .iter()
                    .flat_map(|p| if second { p.1 } else { p.0 }.iter().copied())
                    .collect::<Vec<u8>>()
            };
            let xt =
                actuary::model::frames_to_tensor(cat(false), n, h, w, DType::F32, &Device::Cpu)?;
            let xt1 =
                actuary::model::frames_to_tensor(cat(true), n, h, w, DType::F32, &Device::Cpu)?;
            let out = self.net.infer(&xt, &xt1)?;
            let a = self.st.dims.len();
            let heads: Vec<(Vec<f32>, Vec<f32>)> = out
                .heads
                .iter()
                .map(|(m, lv)| Ok((m.flatten_all()?.to_vec1()?, lv.flatten_all()?.to_vec1()?)))
                .collect::<Result<_, candle_core::Error>>()?;
            let mut b = TransitionBatch {
                latent: out.mu.flatten_all()?.to_vec1()?,
                ..Default::default()
            };
            for i in 0..n {
                for (m, lv) in &heads {
                    b.head_mean.extend_from_slice(&m[i * a..(i + 1) * a]);
                    b.head_logvar.extend_from_slice(&lv[i * a..(i + 1) * a]);
                }
            }
            Ok(b)
        }
    }

    #[test]
    #[ignore = "benchmark: run bench/shard_bench.sh"]
    fn bench_label_throughput() {
        let run = std::path::PathBuf::from(
            std::env::var("ACTUARY_BENCH_RUN").expect("ACTUARY_BENCH_RUN"),
        );
        let _ = std::fs::remove_dir_all(&run);
        smooth_run(&run, 30, 100);
        let cfg = Config {
            action_dims: 2,
            ..Config::default()
        };
        let map = candle_nn::VarMap::new();
        let vb = SeededInit::var_builder(&map, 1, DType::F32, &Device::Cpu);
        let net = Net::new(&cfg, vb).unwrap();
        let st = Standardisation {
            dims: vec!["dx".into(), "grip".into()],
            mean: vec![0.0; 2],
            std: vec![1.0; 2],
        };
        let splits = (0..30)
            .map(|c| {
                (
                    ("robot".to_string(), format!("pick-{c:03}")),
                    [Split::Train, Split::Calib, Split::Holdout][c % 3],
                )
            })
            .collect();
        let fit = FitOutputs {
            model: Box::new(NetModel {
                net,
                _map: map,
                st,
                cfg,
            }),
            splits,
        };
        let label_dir = run.join("label-net");
        let opts = LabelOptions {
            codes: 8,
            ..LabelOptions::default()
        };
        let job = LabelJob {
            run_dir: &run,
            label_dir: &label_dir,
            key: "bench-net",
            opts: &opts,
            seed: 1,
            threads: 2,
            frame_pngs: true,
        };
        let t0 = Instant::now();
        let s = actuary::label::label_run(&job, &fit, &crate::label::view(&run)).unwrap();
        let secs = t0.elapsed().as_secs_f64();
        println!(
            "BENCH {{\"what\":\"label\",\"threads\":2,\"transitions\":{},\"inferred\":{},\"seconds\":{secs},\"transitions_per_s\":{}}}",
            s.transitions,
            s.transitions_inferred,
            s.transitions_inferred as f64 / secs
        );
    }
}
