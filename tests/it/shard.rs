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
        let opts = ShardOptions { image: encoding, ..small() };
        let summary = shard(run, &opts, 2);
        assert!(summary.shards.len() > 1, "rolled into several shards");
        assert_eq!(summary.rows, 8 * 60 + 3 * 40);
        assert_eq!(summary.shards.iter().map(|s| s.rows).sum::<u64>(), summary.rows);
        let out = util::python(PYARROW_CHECK, &[util::s(run), name, &W.to_string(), &H.to_string()]);
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
    let summary = shard(run, &ShardOptions { shuffle: true, ..small() }, 2);
    // Reference: DuckDB's Parquet reader.
    let code = "import sys, duckdb\nc, a = duckdb.connect().execute(f\"SELECT count(*), avg(confidence) FROM '{sys.argv[1]}/shard/*.parquet'\").fetchone()\nprint(c, repr(a))";
    let out = util::python(code, &[util::s(run)]);
    let mut it = out.split_whitespace();
    let count: u64 = it.next().unwrap().parse().unwrap();
    let avg: f64 = it.next().unwrap().parse().unwrap();
    assert_eq!(count, summary.rows);
    assert!((avg - summary.confidence.mean).abs() < 1e-9, "{avg} vs {}", summary.confidence.mean);
    // Reference: Polars' lazy Parquet scan.
    let code = "import sys, polars as pl\nlf = pl.scan_parquet(f'{sys.argv[1]}/shard/*.parquet')\ndf = lf.select(pl.len(), pl.col('confidence').null_count(), pl.col('code').max()).collect()\nprint(*df.row(0))";
    let out = util::python(code, &[util::s(run)]);
    let v: Vec<u64> = out.split_whitespace().map(|x| x.parse().unwrap()).collect();
    assert_eq!(v[0], summary.rows);
    assert_eq!(v[1], summary.clips, "one null confidence per clip (its last frame)");
    assert!(v[2] < 6);
}

#[test]
fn two_fresh_runs_are_byte_identical_and_reruns_rewrite_nothing() {
    let a = tempfile::tempdir().unwrap();
    let b = tempfile::tempdir().unwrap();
    fake_run(a.path(), 6, 4);
    fake_run(b.path(), 6, 4);
    let opts = ShardOptions { shuffle: true, ..small() };
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
            .map(|s| std::fs::metadata(dir.join("shard").join(&s.file)).unwrap().modified().unwrap())
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
    let mixed = shard(run, &ShardOptions { shuffle: true, ..small() }, 2);
    assert_eq!(plain.rows, mixed.rows);
    assert_eq!(plain.rows_per_set, mixed.rows_per_set);
    assert_ne!(plain.shards[0].sha256, mixed.shards[0].sha256);
    assert_eq!(mixed.shuffle_seed, Some(7));
}
