//! Action sidecars: parsing, bad input, and interval mapping against a NumPy reference.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use actuary::actions::{MapRule, Sidecar, map_to_frames, read_sidecar};

use crate::util::{python, require_python, s};

/// Reference mapping written independently of actuary's code, with NumPy:
/// `sum` and `mean` by `np.interp` of a cumulative integral, `hold` by `np.searchsorted`.
/// Prints `{"hold": [...], "mean": [...], "sum": [...]}` (rows = frame transitions).
const NUMPY_REFERENCE: &str = r#"
import sys, json
import numpy as np
path, fps, frames, off = sys.argv[1], float(sys.argv[2]), int(sys.argv[3]), float(sys.argv[4])
data = np.loadtxt(path, delimiter=',', skiprows=1, ndmin=2)
t = data[:, 0] + off
v = data[:, 1:]
step = np.median(np.diff(data[:, 0]))           # the last row holds one median interval
k = np.arange(frames - 1)
a = k / fps
b = (k + 1) / fps
out = {}
# hold: last row at or before the frame time (+1 ms), else the first row
idx = np.searchsorted(t, a + 1e-3, side='right') - 1
out['hold'] = v[np.clip(idx, 0, None)].tolist()
# mean: integral of the step signal (first row extended back, last row forward)
lo = min(a.min(), t[0]) - 1.0
hi = max(b.max(), t[-1]) + 1.0
knots = np.concatenate([[lo], t, [hi]])
seg = np.vstack([v[:1], v])                      # value on [knots[i], knots[i+1])
C = np.vstack([np.zeros((1, v.shape[1])), np.cumsum(seg * np.diff(knots)[:, None], axis=0)])
mean = np.column_stack([(np.interp(b, knots, C[:, d]) - np.interp(a, knots, C[:, d])) / (b - a)
                        for d in range(v.shape[1])])
out['mean'] = mean.tolist()
# sum: cumulative delta, linear inside each row's hold span (pro rata), flat outside the log
sk = np.concatenate([t, [t[-1] + step]])
D = np.vstack([np.zeros((1, v.shape[1])), np.cumsum(v, axis=0)])
total = np.column_stack([np.interp(b, sk, D[:, d]) - np.interp(a, sk, D[:, d])
                         for d in range(v.shape[1])])
out['sum'] = total.tolist()
print(json.dumps(out))
"#;

/// Write a `t,dx,dy,grip` CSV with the given times and irregular values.
fn write_log(dir: &Path, name: &str, t: &[f64]) -> PathBuf {
    let mut text = String::from("t,dx,dy,grip\n");
    for (i, &ti) in t.iter().enumerate() {
        let x = i as f64;
        let dx = 0.01 * (1.7 * x).sin() + 0.001 * ((i * 37) % 11) as f64;
        let dy = -0.004 * (0.61 * x).cos() + 0.0007 * ((i * 13) % 7) as f64;
        let grip = if (i / 23) % 2 == 0 { 0.0 } else { 1.0 };
        writeln!(text, "{ti},{dx},{dy},{grip}").unwrap();
    }
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

/// Compare actuary's mapping of `path` with the NumPy reference for every rule.
fn check_against_numpy(path: &Path, fps: f64, frames: u32, offset: f64) {
    let reference = python(
        NUMPY_REFERENCE,
        &[
            s(path),
            &fps.to_string(),
            &frames.to_string(),
            &offset.to_string(),
        ],
    );
    let reference: serde_json::Value = serde_json::from_str(&reference).unwrap();
    let sidecar = read_sidecar(path).unwrap();
    for rule in [MapRule::Hold, MapRule::Mean, MapRule::Sum] {
        let rules = vec![rule; sidecar.dims.len()];
        let ours = map_to_frames(&sidecar, &rules, fps, frames, offset).unwrap();
        let theirs = reference[rule.to_string()].as_array().unwrap();
        assert_eq!(ours.len(), frames as usize - 1);
        assert_eq!(theirs.len(), ours.len());
        for (k, (row, ref_row)) in ours.iter().zip(theirs).enumerate() {
            for (d, (&got, want)) in row.iter().zip(ref_row.as_array().unwrap()).enumerate() {
                let want = want.as_f64().unwrap();
                // Tolerance: 1e-5 relative (plus 1e-9 absolute for values near zero).
                assert!(
                    (f64::from(got) - want).abs() <= 1e-5 * want.abs() + 1e-9,
                    "{rule} fps {fps} offset {offset}: frame {k} dim {d}: {got} vs NumPy {want}"
                );
            }
        }
    }
}

#[test]
fn sidecar_50hz_on_10fps_matches_numpy_with_offset() {
    if !require_python(&["numpy"]) {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    // 3.1 s of 50 Hz log; 34 frames at 10 fps run past the log's end.
    let t: Vec<f64> = (0..155).map(|i| f64::from(i) / 50.0).collect();
    let p = write_log(dir.path(), "a.actions.csv", &t);
    // Source: NumPy (reference script above). Offset 0.013 s gives partial overlaps.
    check_against_numpy(&p, 10.0, 34, 0.013);
    check_against_numpy(&p, 10.0, 30, 0.0);
}

#[test]
fn sidecar_50hz_on_29_97fps_matches_numpy() {
    if !require_python(&["numpy"]) {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let t: Vec<f64> = (0..155).map(|i| f64::from(i) / 50.0).collect();
    let p = write_log(dir.path(), "b.actions.csv", &t);
    // Source: NumPy. Non-integer ratio of log rate to frame rate, negative offset.
    check_against_numpy(&p, 29.97, 95, -0.0071);
}

#[test]
fn irregular_rate_sidecar_matches_numpy() {
    if !require_python(&["numpy"]) {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    // About 50 Hz with deterministic jitter of up to +-6 ms: "any rate" logs.
    let t: Vec<f64> = (0..150)
        .map(|i| f64::from(i) * 0.02 + 0.006 * (f64::from(i) * 2.3).sin())
        .collect();
    assert!(t.windows(2).all(|w| w[1] > w[0]));
    let p = write_log(dir.path(), "c.actions.csv", &t);
    // Source: NumPy.
    check_against_numpy(&p, 10.0, 31, 0.013);
}

#[test]
fn one_row_per_frame_log_maps_row_k_to_frame_k_under_hold() {
    let dir = tempfile::tempdir().unwrap();
    for fps in [10.0, 29.97, 30.0] {
        // Times as a logger would print them (6 decimals), some a little late or early.
        let mut text = String::from("t,a\n");
        let frames = 120u32;
        for k in 0..frames {
            let jitter = [0.0, 4e-4, -3e-4][k as usize % 3];
            writeln!(text, "{:.6},{k}", f64::from(k) / fps + jitter).unwrap();
        }
        let p = dir.path().join("frames.actions.csv");
        std::fs::write(&p, text).unwrap();
        let sidecar = read_sidecar(&p).unwrap();
        let out = map_to_frames(&sidecar, &[MapRule::Hold], fps, frames, 0.0).unwrap();
        let got: Vec<f32> = out.iter().map(|r| r[0]).collect();
        let want: Vec<f32> = (0..frames - 1).map(|k| k as f32).collect();
        assert_eq!(got, want, "fps {fps}");
    }
}

#[test]
fn bad_sidecars_name_file_and_line() {
    let dir = tempfile::tempdir().unwrap();
    // (file name, content, line named, words the message must hold)
    let cases: &[(&str, &str, u64, &str)] = &[
        ("empty", "", 1, "empty file"),
        ("header-only", "t,dx\n", 2, "no data rows"),
        (
            "no-header",
            "0.0,1.0\n0.1,2.0\n",
            1,
            "first column must be `t`",
        ),
        (
            "bad-first-column",
            "time,dx\n0,1\n",
            1,
            "first column must be `t`",
        ),
        ("only-t", "t\n0\n", 1, "no action dimensions"),
        (
            "duplicate-dim",
            "t,dx,dy,dx\n0,1,2,3\n",
            1,
            "`dx` appears twice",
        ),
        ("dim-named-t", "t,t\n0,1\n", 1, "`t` appears twice"),
        ("empty-dim-name", "t,dx,,dy\n0,1,2,3\n", 1, "no name"),
        ("nan", "t,dx,dy\n0,1,2\n0.02,NaN,2\n", 3, "`dx` is NaN"),
        (
            "inf",
            "t,dx,dy\n0,1,2\n0.02,1,2\n0.04,1,-inf\n",
            4,
            "`dy` is -inf",
        ),
        ("nan-t", "t,dx\n0,1\nnan,1\n", 3, "`t` is NaN"),
        (
            "repeated-t",
            "t,dx\n0,1\n0.02,1\n0.02,2\n",
            4,
            "does not increase",
        ),
        (
            "decreasing-t",
            "t,dx\n0,1\n0.04,1\n0.02,2\n",
            4,
            "does not increase",
        ),
        (
            "too-few-columns",
            "t,dx,dy\n0,1,2\n0.02,1\n",
            3,
            "expected 3 columns",
        ),
        ("too-many-columns", "t,dx\n0,1\n0.02,1,5\n", 3, "found 3"),
        (
            "non-numeric",
            "t,dx,grip\n0,1,open\n",
            2,
            "`open` is not a number",
        ),
        ("empty-cell", "t,dx\n0,\n", 2, "column `dx`"),
        ("blank-line", "t,dx\n0,1\n\n0.02,1\n", 3, "blank line"),
    ];
    for (name, content, line, words) in cases {
        let p = dir.path().join(format!("{name}.actions.csv"));
        std::fs::write(&p, content).unwrap();
        let msg = read_sidecar(&p).unwrap_err().to_string();
        assert!(
            msg.contains(&p.display().to_string()),
            "{name}: message does not name the file: {msg}"
        );
        assert!(
            msg.contains(&format!("line {line}:")),
            "{name}: message does not name line {line}: {msg}"
        );
        assert!(
            msg.contains(words),
            "{name}: message lacks `{words}`: {msg}"
        );
    }
    // A missing file names the file too.
    let missing = dir.path().join("missing.actions.csv");
    let msg = read_sidecar(&missing).unwrap_err().to_string();
    assert!(msg.contains(&missing.display().to_string()), "{msg}");
}

#[test]
fn parquet_sidecar_written_by_pyarrow_reads_like_the_csv() {
    if !require_python(&["pyarrow"]) {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("p.actions.csv");
    let pq = dir.path().join("p.actions.parquet");
    // Values exact in float32 and int64, so both files hold the same numbers.
    std::fs::write(
        &csv,
        "t,dx,dy,grip\n0,0.5,-3,0\n0.02,0.25,7,1\n0.04,-0.125,0,1\n0.07,1.75,12,0\n",
    )
    .unwrap();
    // Source: pyarrow (writes the Parquet file; float32, int64 and float64 columns, with
    // pyarrow's default snappy compression, hence the parquet crate's `snap` feature).
    python(
        r#"
import sys
import pyarrow as pa, pyarrow.parquet as pq
table = pa.table({
    't': pa.array([0.0, 0.02, 0.04, 0.07], pa.float64()),
    'dx': pa.array([0.5, 0.25, -0.125, 1.75], pa.float32()),
    'dy': pa.array([-3, 7, 0, 12], pa.int64()),
    'grip': pa.array([0.0, 1.0, 1.0, 0.0], pa.float64()),
})
pq.write_table(table, sys.argv[1], row_group_size=3)
"#,
        &[s(&pq)],
    );
    let from_csv = read_sidecar(&csv).unwrap();
    let from_pq = read_sidecar(&pq).unwrap();
    assert_eq!(from_pq.path, pq);
    let strip = |s: Sidecar| (s.dims, s.t, s.values);
    assert_eq!(strip(from_pq), strip(from_csv));
}

#[test]
fn bad_parquet_sidecar_written_by_pyarrow_names_file_and_row() {
    if !require_python(&["pyarrow"]) {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let pq = dir.path().join("bad.actions.parquet");
    // Source: pyarrow (writes the file). Row 4 repeats row 3's t, across a row-group boundary.
    python(
        r#"
import sys
import pyarrow as pa, pyarrow.parquet as pq
pq.write_table(pa.table({'t': [0.0, 0.1, 0.2, 0.2], 'dx': [1.0, 2.0, 3.0, 4.0]}),
               sys.argv[1], row_group_size=2)
"#,
        &[s(&pq)],
    );
    let msg = read_sidecar(&pq).unwrap_err().to_string();
    assert!(
        msg.contains(&pq.display().to_string()) && msg.contains("row 4:"),
        "{msg}"
    );
}
