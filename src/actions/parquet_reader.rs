//! Parquet sidecar reader: columns `t` then one per dimension, read through the arrow reader.
//!
//! Accepted column types: float64, float32 and the signed and unsigned integer types (read as
//! float64). Nulls are refused. Errors name the file and the 1-based data row.

use std::fs::File;
use std::path::Path;

use arrow_array::cast::AsArray;
use arrow_array::types::{
    Float32Type, Float64Type, Int8Type, Int16Type, Int32Type, Int64Type, UInt8Type, UInt16Type,
    UInt32Type, UInt64Type,
};
use arrow_array::{Array, RecordBatch};
use arrow_schema::DataType;
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;

use super::{ActionsError, Place, RowChecker, Sidecar, check_header};

/// Read and validate a Parquet sidecar.
pub(crate) fn read_parquet(path: &Path) -> Result<Sidecar, ActionsError> {
    let file = File::open(path).map_err(|source| ActionsError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let parquet_err = |source| ActionsError::Parquet {
        path: path.to_path_buf(),
        source,
    };
    let builder = ParquetRecordBatchReaderBuilder::try_new(file).map_err(parquet_err)?;
    let schema = builder.schema().clone();
    let names: Vec<String> = schema.fields().iter().map(|f| f.name().clone()).collect();
    let dims = check_header(path, Place::Schema, &names)?;
    for field in schema.fields() {
        if !supported(field.data_type()) {
            return Err(ActionsError::ColumnType {
                path: path.to_path_buf(),
                column: field.name().clone(),
                found: field.data_type().clone(),
            });
        }
    }
    let mut check = RowChecker::new(path, dims);
    let mut row_base: u64 = 0;
    let mut cells = Vec::new();
    for batch in builder.build().map_err(parquet_err)? {
        let batch = batch.map_err(|source| ActionsError::Arrow {
            path: path.to_path_buf(),
            source,
        })?;
        let columns = columns_f64(path, &batch, &names, row_base)?;
        for r in 0..batch.num_rows() {
            cells.clear();
            cells.extend(columns.iter().map(|c| c[r]));
            check.push(Place::Row(row_base + r as u64 + 1), cells[0], &cells[1..])?;
        }
        row_base += batch.num_rows() as u64;
    }
    check.finish(Place::Row(1))
}

fn supported(dt: &DataType) -> bool {
    matches!(
        dt,
        DataType::Float64
            | DataType::Float32
            | DataType::Int8
            | DataType::Int16
            | DataType::Int32
            | DataType::Int64
            | DataType::UInt8
            | DataType::UInt16
            | DataType::UInt32
            | DataType::UInt64
    )
}

/// Every column of `batch` as float64, refusing nulls.
fn columns_f64(
    path: &Path,
    batch: &RecordBatch,
    names: &[String],
    row_base: u64,
) -> Result<Vec<Vec<f64>>, ActionsError> {
    batch
        .columns()
        .iter()
        .zip(names)
        .map(|(col, name)| {
            if let Some(i) = (0..col.len()).find(|&i| col.is_null(i)) {
                return Err(ActionsError::Null {
                    path: path.to_path_buf(),
                    at: Place::Row(row_base + i as u64 + 1),
                    column: name.clone(),
                });
            }
            macro_rules! conv {
                ($t:ty) => {
                    col.as_primitive::<$t>()
                        .values()
                        .iter()
                        .map(|&v| v as f64)
                        .collect()
                };
            }
            Ok(match col.data_type() {
                DataType::Float64 => conv!(Float64Type),
                DataType::Float32 => conv!(Float32Type),
                DataType::Int8 => conv!(Int8Type),
                DataType::Int16 => conv!(Int16Type),
                DataType::Int32 => conv!(Int32Type),
                DataType::Int64 => conv!(Int64Type),
                DataType::UInt8 => conv!(UInt8Type),
                DataType::UInt16 => conv!(UInt16Type),
                DataType::UInt32 => conv!(UInt32Type),
                DataType::UInt64 => conv!(UInt64Type),
                other => {
                    return Err(ActionsError::ColumnType {
                        path: path.to_path_buf(),
                        column: name.clone(),
                        found: other.clone(),
                    });
                }
            })
        })
        .collect()
}
