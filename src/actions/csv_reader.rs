//! CSV sidecar reader: header `t,<dim>,...`, one numeric row per log entry.
//!
//! The file is streamed line by line (no whole-file buffer). Cells are trimmed; header names
//! may be wrapped in double quotes. A UTF-8 byte-order mark and CRLF line ends are accepted.
//! Blank lines are accepted only at the end of the file.

use std::fs::File;
use std::io::{BufRead, BufReader};
use std::path::Path;

use super::{ActionsError, Place, RowChecker, Sidecar, check_header};

/// Read and validate a CSV sidecar.
pub(crate) fn read_csv(path: &Path) -> Result<Sidecar, ActionsError> {
    let io_err = |source| ActionsError::Io {
        path: path.to_path_buf(),
        source,
    };
    let mut reader = BufReader::new(File::open(path).map_err(io_err)?);
    let mut buf = Vec::new();
    let mut line_no: u64 = 0;
    let mut checker: Option<RowChecker> = None;
    let mut first_blank: Option<u64> = None;
    let mut cells: Vec<f64> = Vec::new();
    loop {
        buf.clear();
        if reader.read_until(b'\n', &mut buf).map_err(io_err)? == 0 {
            break;
        }
        line_no += 1;
        let at = Place::Line(line_no);
        let mut text = std::str::from_utf8(&buf).map_err(|_| ActionsError::NotUtf8 {
            path: path.to_path_buf(),
            at,
        })?;
        if line_no == 1 {
            text = text.strip_prefix('\u{feff}').unwrap_or(text);
        }
        let text = text.trim_end_matches(['\n', '\r']);
        if text.trim().is_empty() {
            first_blank.get_or_insert(line_no);
            continue;
        }
        if let Some(blank) = first_blank {
            return Err(ActionsError::BlankLine {
                path: path.to_path_buf(),
                at: Place::Line(blank),
            });
        }
        let Some(check) = checker.as_mut() else {
            let names: Vec<String> = text
                .split(',')
                .map(|c| {
                    let c = c.trim();
                    c.strip_prefix('"')
                        .and_then(|c| c.strip_suffix('"'))
                        .unwrap_or(c)
                        .to_string()
                })
                .collect();
            checker = Some(RowChecker::new(path, check_header(path, at, &names)?));
            continue;
        };
        let texts: Vec<&str> = text.split(',').map(str::trim).collect();
        let expected = check.dims() + 1;
        if texts.len() != expected {
            return Err(ActionsError::ColumnCount {
                path: path.to_path_buf(),
                at,
                expected,
                found: texts.len(),
            });
        }
        cells.clear();
        for (i, cell) in texts.into_iter().enumerate() {
            let value: f64 = cell.parse().map_err(|_| ActionsError::NotNumber {
                path: path.to_path_buf(),
                at,
                column: check.column_name(i).to_string(),
                cell: cell.to_string(),
            })?;
            cells.push(value);
        }
        check.push(at, cells[0], &cells[1..])?;
    }
    match checker {
        None => Err(ActionsError::MissingHeader {
            path: path.to_path_buf(),
            at: Place::Line(first_blank.unwrap_or(1)),
        }),
        // The first data row would have been on the line after the header.
        Some(check) => check.finish(Place::Line(2)),
    }
}
