//! Unit tests of sidecar parsing, rule selection and mapping.

use std::collections::BTreeMap;
use std::path::Path;
use std::sync::Arc;

use arrow_array::{ArrayRef, Float64Array, Int32Array, RecordBatch, StringArray};
use parquet::arrow::ArrowWriter;

use super::*;

fn write(dir: &Path, name: &str, text: &str) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

fn write_parquet(path: &Path, columns: Vec<(&str, ArrayRef)>) {
    let batch = RecordBatch::try_from_iter(columns).unwrap();
    let file = std::fs::File::create(path).unwrap();
    let mut w = ArrowWriter::try_new(file, batch.schema(), None).unwrap();
    w.write(&batch).unwrap();
    w.close().unwrap();
}

#[test]
fn map_rule_parses_lower_case_names() {
    #[derive(serde::Deserialize)]
    struct M {
        map: BTreeMap<String, MapRule>,
    }
    let m: M = toml::from_str(r#"map = { dx = "sum", dy = "mean", grip = "hold" }"#).unwrap();
    assert_eq!(m.map["dx"], MapRule::Sum);
    assert_eq!(m.map["dy"], MapRule::Mean);
    assert_eq!(m.map["grip"], MapRule::Hold);
    assert!(toml::from_str::<M>(r#"map = { dx = "Sum" }"#).is_err());
    assert_eq!(MapRule::Sum.to_string(), "sum");
}

#[test]
fn rules_follow_header_order_and_default() {
    let dims: Vec<String> = ["dx", "dy", "grip"].map(String::from).to_vec();
    let map = BTreeMap::from([("grip".to_string(), MapRule::Hold)]);
    assert_eq!(
        rules_for(&dims, &map, MapRule::Sum).unwrap(),
        vec![MapRule::Sum, MapRule::Sum, MapRule::Hold]
    );
    let bad = BTreeMap::from([
        ("dz".to_string(), MapRule::Hold),
        ("dw".to_string(), MapRule::Sum),
    ]);
    let msg = rules_for(&dims, &bad, MapRule::Sum)
        .unwrap_err()
        .to_string();
    assert!(
        msg.contains("dw, dz") && msg.contains("dx, dy, grip"),
        "{msg}"
    );
}

#[test]
fn sidecar_for_prefers_csv_then_parquet() {
    let dir = tempfile::tempdir().unwrap();
    let clip = dir.path().join("pick.v2.mp4");
    assert_eq!(sidecar_for(&clip), None);
    let pq = write(dir.path(), "pick.v2.actions.parquet", "");
    assert_eq!(sidecar_for(&clip), Some(pq));
    let csv = write(dir.path(), "pick.v2.actions.csv", "");
    assert_eq!(sidecar_for(&clip), Some(csv));
}

#[test]
fn csv_with_bom_crlf_quotes_and_trailing_blank_lines_parses() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        dir.path(),
        "a.actions.csv",
        "\u{feff}t, \"dx\" ,grip\r\n0, 1.5, 0\r\n0.02,-2e-3,1\r\n\r\n\n",
    );
    let s = read_sidecar(&p).unwrap();
    assert_eq!(s.dims, vec!["dx", "grip"]);
    assert_eq!(s.t, vec![0.0, 0.02]);
    assert_eq!(s.values, vec![1.5, 0.0, -2e-3, 1.0]);
    assert_eq!(s.row(1), &[-2e-3, 1.0]);
    assert!(s.expect_dims(&s.dims.clone()).is_ok());
    let msg = s.expect_dims(&["dy".into()]).unwrap_err().to_string();
    assert!(
        msg.contains("a.actions.csv") && msg.contains("dx, grip"),
        "{msg}"
    );
}

#[test]
fn single_row_log_holds_for_one_frame_interval() {
    let s = Sidecar {
        path: "x.actions.csv".into(),
        dims: vec!["dx".into()],
        t: vec![0.0],
        values: vec![3.0],
    };
    let out = map_to_frames(&s, &[MapRule::Sum], 10.0, 3, 0.05).unwrap();
    // Span [0.05, 0.15): half in frame interval 0, half in 1.
    assert_eq!(out, vec![vec![1.5], vec![1.5]]);
    assert!(
        map_to_frames(&s, &[MapRule::Sum], 10.0, 1, 0.0)
            .unwrap()
            .is_empty()
    );
}

#[test]
fn map_to_frames_errors_name_the_file() {
    let s = Sidecar {
        path: "x.actions.csv".into(),
        dims: vec!["dx".into()],
        t: vec![0.0],
        values: vec![3.0],
    };
    for err in [
        map_to_frames(&s, &[], 10.0, 3, 0.0).unwrap_err(),
        map_to_frames(&s, &[MapRule::Hold], 0.0, 3, 0.0).unwrap_err(),
        map_to_frames(&s, &[MapRule::Hold], 10.0, 3, f64::NAN).unwrap_err(),
    ] {
        assert!(err.to_string().contains("x.actions.csv"), "{err}");
    }
}

#[test]
fn parquet_errors_name_file_and_row() {
    let dir = tempfile::tempdir().unwrap();
    let cases: Vec<(&str, Vec<(&str, ArrayRef)>, &str)> = vec![
        (
            "nan.actions.parquet",
            vec![
                (
                    "t",
                    Arc::new(Float64Array::from(vec![0.0, 0.1, 0.2])) as ArrayRef,
                ),
                ("dx", Arc::new(Float64Array::from(vec![0.0, 1.0, f64::NAN]))),
            ],
            "row 3",
        ),
        (
            "order.actions.parquet",
            vec![
                (
                    "t",
                    Arc::new(Float64Array::from(vec![0.0, 0.1, 0.1])) as ArrayRef,
                ),
                ("dx", Arc::new(Int32Array::from(vec![0, 1, 2]))),
            ],
            "row 3",
        ),
        (
            "null.actions.parquet",
            vec![
                (
                    "t",
                    Arc::new(Float64Array::from(vec![0.0, 0.1])) as ArrayRef,
                ),
                ("dx", Arc::new(Float64Array::from(vec![Some(1.0), None]))),
            ],
            "row 2",
        ),
        (
            "type.actions.parquet",
            vec![
                ("t", Arc::new(Float64Array::from(vec![0.0])) as ArrayRef),
                ("dx", Arc::new(StringArray::from(vec!["a"]))),
            ],
            "schema",
        ),
        (
            "header.actions.parquet",
            vec![
                ("time", Arc::new(Float64Array::from(vec![0.0])) as ArrayRef),
                ("dx", Arc::new(Float64Array::from(vec![1.0]))),
            ],
            "schema",
        ),
        (
            "empty.actions.parquet",
            vec![
                (
                    "t",
                    Arc::new(Float64Array::from(Vec::<f64>::new())) as ArrayRef,
                ),
                ("dx", Arc::new(Float64Array::from(Vec::<f64>::new()))),
            ],
            "row 1",
        ),
    ];
    for (name, columns, place) in cases {
        let p = dir.path().join(name);
        write_parquet(&p, columns);
        let msg = read_sidecar(&p).unwrap_err().to_string();
        assert!(
            msg.contains(&p.display().to_string()) && msg.contains(place),
            "{name}: {msg}"
        );
    }
}

#[test]
fn parquet_integer_columns_read_as_float() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("ok.actions.parquet");
    write_parquet(
        &p,
        vec![
            (
                "t",
                Arc::new(Float64Array::from(vec![0.0, 0.5])) as ArrayRef,
            ),
            ("grip", Arc::new(Int32Array::from(vec![0, 1]))),
        ],
    );
    let s = read_sidecar(&p).unwrap();
    assert_eq!(
        (s.dims, s.t, s.values),
        (vec!["grip".to_string()], vec![0.0, 0.5], vec![0.0, 1.0])
    );
}
