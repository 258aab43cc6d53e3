//! Action sidecars: parsing recorded action logs and mapping them onto frame intervals.
//!
//! A labelled clip `NAME.mp4` has a sidecar `NAME.actions.csv` (or `NAME.actions.parquet`)
//! next to it ([`sidecar_for`]). Its header is `t,<dim>,<dim>,...`: `t` is seconds since the
//! clip's first frame on the log's clock, rows are strictly increasing in `t`, at any rate,
//! and every value is finite. [`read_sidecar`] parses and validates one into a [`Sidecar`];
//! every error names the file and the line (CSV, 1-based, header = line 1) or the data row
//! (Parquet, 1-based).
//!
//! [`map_to_frames`] turns a sidecar into one action vector per transition `k -> k+1` of a
//! clip decoded at `fps` (`frames - 1` rows). Semantics:
//!
//! - Each row is a command that holds until the next row; the last row holds for one median
//!   row interval (a single-row log: one frame interval, `1/fps`).
//! - Video time of a log row is `t + offset_s`: a positive offset means the log's clock reads
//!   `offset_s` seconds less than the video's at the same instant.
//! - Frame `k`'s interval is `[k/fps, (k+1)/fps)` in video time.
//! - Per dimension ([`MapRule`]): `hold` takes the command in force at `k/fps` (a row within
//!   [`HOLD_TOLERANCE_S`] = 1 ms after it counts as at it, so a one-row-per-frame log maps row
//!   `k` to frame `k`; before the first row, the first row); `mean` is the time-weighted mean
//!   of the command over the interval (the first row extends back before the log, the last
//!   row forward after it); `sum` treats each row's value as the delta over its own hold span
//!   and adds the rows' values weighted by the fraction of that span inside the interval
//!   (time outside the log contributes nothing).
//!
//! The mapping core ([`map_series`]) works on any piecewise-constant [`Series`] with explicit
//! row ends and any target [`Interval`]s, so later stages reuse it to map estimates from a
//! resampled time base back onto the decode grid.

mod csv_reader;
mod mapping;
mod parquet_reader;

use std::collections::{BTreeMap, HashSet};
use std::fmt;
use std::path::{Path, PathBuf};

use arrow_schema::{ArrowError, DataType};
use parquet::errors::ParquetError;
use serde::{Deserialize, Serialize};

pub use mapping::{
    HOLD_TOLERANCE_S, Interval, Series, contiguous_ends, frame_intervals, map_series, median_step,
};

/// How a log dimension maps onto a frame interval.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum MapRule {
    /// The command in force at the frame's time.
    Hold,
    /// Time-weighted mean over the interval.
    Mean,
    /// Integrated deltas over the interval (pro rata for partial overlaps).
    Sum,
}

impl fmt::Display for MapRule {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            MapRule::Hold => "hold",
            MapRule::Mean => "mean",
            MapRule::Sum => "sum",
        })
    }
}

/// Where in a sidecar a problem is.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Place {
    /// A CSV line, 1-based (the header is line 1).
    Line(u64),
    /// A Parquet data row, 1-based.
    Row(u64),
    /// A Parquet file's schema (its column names and types).
    Schema,
}

impl fmt::Display for Place {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Place::Line(n) => write!(f, "line {n}"),
            Place::Row(n) => write!(f, "row {n}"),
            Place::Schema => f.write_str("schema"),
        }
    }
}

fn join(names: &[String]) -> String {
    names.join(", ")
}

/// Errors from reading sidecars and mapping series.
#[derive(Debug, thiserror::Error)]
pub enum ActionsError {
    /// The file could not be opened or read.
    #[error("cannot read action sidecar {}: {source}", path.display())]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    /// A CSV line is not UTF-8.
    #[error("action sidecar {}, {at}: not UTF-8 text", path.display())]
    NotUtf8 { path: PathBuf, at: Place },
    /// The file has no header.
    #[error("action sidecar {}, {at}: empty file, expected a header `t,<dim>,...`", path.display())]
    MissingHeader { path: PathBuf, at: Place },
    /// The first column is not `t`.
    #[error("action sidecar {}, {at}: first column must be `t`, found `{found}`", path.display())]
    FirstColumn {
        path: PathBuf,
        at: Place,
        found: String,
    },
    /// The header names no action dimension.
    #[error("action sidecar {}, {at}: header has no action dimensions after `t`", path.display())]
    NoDims { path: PathBuf, at: Place },
    /// A header column has an empty name.
    #[error("action sidecar {}, {at}: column {column} of the header has no name", path.display())]
    EmptyName {
        path: PathBuf,
        at: Place,
        column: usize,
    },
    /// Two header columns share a name.
    #[error("action sidecar {}, {at}: column name `{name}` appears twice in the header", path.display())]
    DuplicateDim {
        path: PathBuf,
        at: Place,
        name: String,
    },
    /// The header is followed by no data row.
    #[error("action sidecar {}, {at}: no data rows (a sidecar needs at least one)", path.display())]
    NoRows { path: PathBuf, at: Place },
    /// A blank line before the end of the file.
    #[error("action sidecar {}, {at}: blank line before the end of the file", path.display())]
    BlankLine { path: PathBuf, at: Place },
    /// A row has the wrong number of cells.
    #[error("action sidecar {}, {at}: expected {expected} columns as in the header, found {found}", path.display())]
    ColumnCount {
        path: PathBuf,
        at: Place,
        expected: usize,
        found: usize,
    },
    /// A cell is not a number.
    #[error("action sidecar {}, {at}: column `{column}`: `{cell}` is not a number", path.display())]
    NotNumber {
        path: PathBuf,
        at: Place,
        column: String,
        cell: String,
    },
    /// A cell is NaN or infinite.
    #[error("action sidecar {}, {at}: column `{column}` is {value} (values must be finite)", path.display())]
    NotFinite {
        path: PathBuf,
        at: Place,
        column: String,
        value: f64,
    },
    /// `t` does not increase strictly.
    #[error("action sidecar {}, {at}: t = {t} does not increase (previous row t = {previous}); rows must be strictly increasing in t", path.display())]
    NotIncreasing {
        path: PathBuf,
        at: Place,
        t: f64,
        previous: f64,
    },
    /// A Parquet column has an unsupported type.
    #[error("action sidecar {}, schema: column `{column}` has type {found}; expected float64, float32 or an integer type", path.display())]
    ColumnType {
        path: PathBuf,
        column: String,
        found: DataType,
    },
    /// A Parquet cell is null.
    #[error("action sidecar {}, {at}: column `{column}` is null", path.display())]
    Null {
        path: PathBuf,
        at: Place,
        column: String,
    },
    /// The Parquet reader failed.
    #[error("cannot read Parquet action sidecar {}: {source}", path.display())]
    Parquet { path: PathBuf, source: ParquetError },
    /// Decoding a Parquet record batch failed.
    #[error("cannot decode Parquet action sidecar {}: {source}", path.display())]
    Arrow { path: PathBuf, source: ArrowError },
    /// A sidecar's dimensions differ from the set's.
    #[error("action sidecar {}: dimensions [{}] differ from the set's [{}] (every sidecar of a set has the same header)", path.display(), join(found), join(expected))]
    HeaderMismatch {
        path: PathBuf,
        expected: Vec<String>,
        found: Vec<String>,
    },
    /// The spec's map names dimensions the header lacks.
    #[error(
        "`actions.map` names dimension(s) [{}] that the sidecar header lacks (it has [{}])",
        join(names),
        join(header)
    )]
    UnknownMapDim {
        names: Vec<String>,
        header: Vec<String>,
    },
    /// Mapping a sidecar failed.
    #[error("action sidecar {}: {source}", path.display())]
    Map {
        path: PathBuf,
        source: Box<ActionsError>,
    },
    /// The number of rules differs from the number of dimensions.
    #[error("{rules} mapping rules for {dims} action dimensions")]
    RuleCount { rules: usize, dims: usize },
    /// A frame rate that is not a positive finite number.
    #[error("fps must be a positive finite number, got {fps}")]
    BadFps { fps: f64 },
    /// A clock offset that is not finite.
    #[error("clock offset must be a finite number of seconds, got {offset}")]
    BadOffset { offset: f64 },
    /// A series without rows.
    #[error("series has no rows")]
    EmptySeries,
    /// A series whose slices disagree in length.
    #[error("series shape mismatch: {rows} starts, {ends} ends, {values} values for {dims} dims")]
    SeriesShape {
        rows: usize,
        ends: usize,
        values: usize,
        dims: usize,
    },
    /// A series row that is not finite or not ordered.
    #[error(
        "series row {row} (start {start}, end {end}) is not finite, ends before it starts, or overlaps the next row"
    )]
    BadSeriesRow { row: usize, start: f64, end: f64 },
    /// A target interval that is not finite or empty.
    #[error("target interval {index} [{start}, {end}) is not finite or empty")]
    BadInterval { index: usize, start: f64, end: f64 },
}

/// A parsed, validated action sidecar: finite values, `t` strictly increasing, at least one
/// row and one dimension, unique dimension names.
#[derive(Debug, Clone, PartialEq)]
pub struct Sidecar {
    /// The file it was read from.
    pub path: PathBuf,
    /// Dimension names in header order (without `t`).
    pub dims: Vec<String>,
    /// Row times, seconds since the clip's first frame (log clock).
    pub t: Vec<f64>,
    /// Row-major values, `t.len() x dims.len()`.
    pub values: Vec<f64>,
}

impl Sidecar {
    /// Number of rows.
    pub fn rows(&self) -> usize {
        self.t.len()
    }

    /// Values of row `i`.
    pub fn row(&self, i: usize) -> &[f64] {
        let d = self.dims.len();
        &self.values[i * d..(i + 1) * d]
    }

    /// Error unless this sidecar's dimensions are `expected`, in that order.
    pub fn expect_dims(&self, expected: &[String]) -> Result<(), ActionsError> {
        if self.dims == expected {
            return Ok(());
        }
        Err(ActionsError::HeaderMismatch {
            path: self.path.clone(),
            expected: expected.to_vec(),
            found: self.dims.clone(),
        })
    }
}

/// The sidecar of a clip: `NAME.actions.csv`, else `NAME.actions.parquet`, next to `NAME.<ext>`;
/// `None` when neither exists. The CSV wins when both exist.
pub fn sidecar_for(clip_path: &Path) -> Option<PathBuf> {
    ["actions.csv", "actions.parquet"]
        .iter()
        .map(|ext| clip_path.with_extension(ext))
        .find(|p| p.is_file())
}

/// Read and validate a sidecar; Parquet when the extension is `.parquet`, else CSV.
pub fn read_sidecar(path: &Path) -> Result<Sidecar, ActionsError> {
    let is_parquet = path
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("parquet"));
    if is_parquet {
        parquet_reader::read_parquet(path)
    } else {
        csv_reader::read_csv(path)
    }
}

/// One rule per dimension: the spec's `map` entry, else `default`. Errors when `map` names a
/// dimension that `dims` lacks (all such names at once).
pub fn rules_for(
    dims: &[String],
    map: &BTreeMap<String, MapRule>,
    default: MapRule,
) -> Result<Vec<MapRule>, ActionsError> {
    let unknown: Vec<String> = map.keys().filter(|k| !dims.contains(k)).cloned().collect();
    if !unknown.is_empty() {
        return Err(ActionsError::UnknownMapDim {
            names: unknown,
            header: dims.to_vec(),
        });
    }
    Ok(dims
        .iter()
        .map(|d| map.get(d).copied().unwrap_or(default))
        .collect())
}

/// Map a sidecar onto the `frames - 1` transitions of a clip decoded at `fps`; `offset_s` is
/// added to log times to get video times. See the module docs for the semantics.
pub fn map_to_frames(
    s: &Sidecar,
    rules: &[MapRule],
    fps: f64,
    frames: u32,
    offset_s: f64,
) -> Result<Vec<Vec<f32>>, ActionsError> {
    let wrap = |e| ActionsError::Map {
        path: s.path.clone(),
        source: Box::new(e),
    };
    if !(fps.is_finite() && fps > 0.0) {
        return Err(wrap(ActionsError::BadFps { fps }));
    }
    if !offset_s.is_finite() {
        return Err(wrap(ActionsError::BadOffset { offset: offset_s }));
    }
    let start: Vec<f64> = s.t.iter().map(|t| t + offset_s).collect();
    let last_span = median_step(&s.t).unwrap_or(1.0 / fps);
    let end = contiguous_ends(&start, last_span);
    let series = Series {
        start: &start,
        end: &end,
        values: &s.values,
        dims: s.dims.len(),
    };
    map_series(&series, rules, &frame_intervals(fps, frames)).map_err(wrap)
}

/// Validate a header (`t` first, at least one dimension, names non-empty and unique) and
/// return the dimension names.
fn check_header(path: &Path, at: Place, names: &[String]) -> Result<Vec<String>, ActionsError> {
    let path_buf = || path.to_path_buf();
    match names.first() {
        Some(first) if first == "t" => {}
        Some(first) => {
            return Err(ActionsError::FirstColumn {
                path: path_buf(),
                at,
                found: first.clone(),
            });
        }
        None => {
            return Err(ActionsError::MissingHeader {
                path: path_buf(),
                at,
            });
        }
    }
    if names.len() < 2 {
        return Err(ActionsError::NoDims {
            path: path_buf(),
            at,
        });
    }
    let mut seen = HashSet::new();
    for (i, name) in names.iter().enumerate() {
        if name.is_empty() {
            return Err(ActionsError::EmptyName {
                path: path_buf(),
                at,
                column: i + 1,
            });
        }
        if !seen.insert(name.as_str()) {
            return Err(ActionsError::DuplicateDim {
                path: path_buf(),
                at,
                name: name.clone(),
            });
        }
    }
    Ok(names[1..].to_vec())
}

/// Accumulates validated rows: finite values, strictly increasing `t`.
struct RowChecker {
    path: PathBuf,
    dims: Vec<String>,
    t: Vec<f64>,
    values: Vec<f64>,
}

impl RowChecker {
    fn new(path: &Path, dims: Vec<String>) -> Self {
        Self {
            path: path.to_path_buf(),
            dims,
            t: Vec::new(),
            values: Vec::new(),
        }
    }

    fn dims(&self) -> usize {
        self.dims.len()
    }

    /// Name of column `i` (0 is `t`).
    fn column_name(&self, i: usize) -> &str {
        if i == 0 { "t" } else { &self.dims[i - 1] }
    }

    fn push(&mut self, at: Place, t: f64, values: &[f64]) -> Result<(), ActionsError> {
        for (i, &v) in std::iter::once(&t).chain(values).enumerate() {
            if !v.is_finite() {
                return Err(ActionsError::NotFinite {
                    path: self.path.clone(),
                    at,
                    column: self.column_name(i).to_string(),
                    value: v,
                });
            }
        }
        if let Some(&previous) = self.t.last()
            && t <= previous
        {
            return Err(ActionsError::NotIncreasing {
                path: self.path.clone(),
                at,
                t,
                previous,
            });
        }
        self.t.push(t);
        self.values.extend_from_slice(values);
        Ok(())
    }

    /// The sidecar, or [`ActionsError::NoRows`] at `first_row` when there is no row.
    fn finish(self, first_row: Place) -> Result<Sidecar, ActionsError> {
        if self.t.is_empty() {
            return Err(ActionsError::NoRows {
                path: self.path,
                at: first_row,
            });
        }
        Ok(Sidecar {
            path: self.path,
            dims: self.dims,
            t: self.t,
            values: self.values,
        })
    }
}

#[cfg(test)]
mod tests;
