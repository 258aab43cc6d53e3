//! The shard schema: one row per decoded frame, exactly the columns of the
//! design's "Shard rows" table, in that order.

use std::sync::Arc;

use arrow_schema::{DataType, Field, Schema, SchemaRef};
use serde::{Deserialize, Serialize};

/// A column as recorded in the manifest.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ColumnInfo {
    /// Column name.
    pub name: String,
    /// Type, e.g. `utf8`, `list<float32>`.
    #[serde(rename = "type")]
    pub data_type: String,
    /// Whether the column may hold nulls.
    pub nullable: bool,
}

fn list_f32() -> DataType {
    DataType::List(Arc::new(Field::new("item", DataType::Float32, true)))
}

/// The Arrow schema of every shard.
pub fn schema() -> SchemaRef {
    Arc::new(Schema::new(vec![
        Field::new("clip", DataType::Utf8, false),
        Field::new("set", DataType::Utf8, false),
        Field::new("labelled", DataType::Boolean, false),
        Field::new("frame", DataType::UInt32, false),
        Field::new("t", DataType::Float64, false),
        Field::new("image", DataType::Binary, false),
        Field::new("action", list_f32(), true),
        Field::new("action_est", list_f32(), true),
        Field::new("action_std", list_f32(), true),
        Field::new("confidence", DataType::Float32, true),
        Field::new("ood", DataType::Boolean, true),
        Field::new("code", DataType::UInt16, true),
        Field::new("split", DataType::Utf8, false),
    ]))
}

fn type_name(t: &DataType) -> String {
    match t {
        DataType::Utf8 => "utf8".into(),
        DataType::Boolean => "bool".into(),
        DataType::UInt32 => "uint32".into(),
        DataType::UInt16 => "uint16".into(),
        DataType::Float32 => "float32".into(),
        DataType::Float64 => "float64".into(),
        DataType::Binary => "binary".into(),
        DataType::List(f) => format!("list<{}>", type_name(f.data_type())),
        other => other.to_string().to_lowercase(),
    }
}

/// The schema as the manifest records it.
pub fn columns() -> Vec<ColumnInfo> {
    schema()
        .fields()
        .iter()
        .map(|f| ColumnInfo {
            name: f.name().clone(),
            data_type: type_name(f.data_type()),
            nullable: f.is_nullable(),
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn columns_follow_the_design_table() {
        let c = columns();
        let names: Vec<&str> = c.iter().map(|c| c.name.as_str()).collect();
        assert_eq!(
            names,
            [
                "clip",
                "set",
                "labelled",
                "frame",
                "t",
                "image",
                "action",
                "action_est",
                "action_std",
                "confidence",
                "ood",
                "code",
                "split"
            ]
        );
        assert_eq!(c[6].data_type, "list<float32>");
        assert!(c[6].nullable && !c[5].nullable);
    }
}
