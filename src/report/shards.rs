//! Shard figures for the report and `inspect`: the files the shard manifest
//! lists (read leniently: a list under `shards` or `files` of objects with
//! a file name, rows, bytes and sha256), every `.parquet` actually in
//! `RUN/shard/`, row counts from each file's Parquet footer, and, when asked,
//! each file's sha256 recomputed and compared.

use std::collections::BTreeMap;
use std::path::Path;

use parquet::file::reader::{FileReader, SerializedFileReader};

use super::figures::{Section, ShardFigures, ShardFile};

/// Gathers the shard figures of `shard_dir` from the manifest `summary`.
pub fn figures(
    shard_dir: &Path,
    summary: &serde_json::Value,
    verify: bool,
) -> Section<ShardFigures> {
    let listed = summary
        .get("shards")
        .or_else(|| summary.get("files"))
        .and_then(|v| v.as_array())
        .cloned()
        .unwrap_or_default();
    let mut files: BTreeMap<String, ShardFile> = BTreeMap::new();
    for entry in &listed {
        let name = ["file", "name", "path"]
            .iter()
            .find_map(|k| entry.get(*k).and_then(|v| v.as_str()))
            .map(|p| {
                Path::new(p)
                    .file_name()
                    .map_or(p.to_string(), |n| n.to_string_lossy().into_owned())
            });
        let Some(name) = name else { continue };
        files.insert(
            name.clone(),
            ShardFile {
                file: name,
                bytes: None,
                rows: ["rows", "row_count", "num_rows"]
                    .iter()
                    .find_map(|k| entry.get(*k).and_then(|v| v.as_u64())),
                footer_rows: None,
                sha256: entry
                    .get("sha256")
                    .and_then(|v| v.as_str())
                    .map(String::from),
                verified: None,
            },
        );
    }
    if let Ok(rd) = std::fs::read_dir(shard_dir) {
        for e in rd.filter_map(|e| e.ok()) {
            let name = e.file_name().to_string_lossy().into_owned();
            if name.ends_with(".parquet") {
                files.entry(name.clone()).or_insert(ShardFile {
                    file: name,
                    bytes: None,
                    rows: None,
                    footer_rows: None,
                    sha256: None,
                    verified: None,
                });
            }
        }
    }
    if files.is_empty() {
        return Section::Missing(format!(
            "{} lists no shard files and holds none",
            shard_dir.display()
        ));
    }
    let mut columns = Vec::new();
    for f in files.values_mut() {
        let path = shard_dir.join(&f.file);
        f.bytes = std::fs::metadata(&path).ok().map(|m| m.len());
        if let Some(reader) = std::fs::File::open(&path)
            .ok()
            .and_then(|h| SerializedFileReader::new(h).ok())
        {
            let meta = reader.metadata().file_metadata();
            f.footer_rows = u64::try_from(meta.num_rows()).ok();
            if columns.is_empty() {
                columns = meta
                    .schema_descr()
                    .root_schema()
                    .get_fields()
                    .iter()
                    .map(|c| c.name().to_string())
                    .collect();
            }
        }
        if verify {
            f.verified = Some(match (&f.sha256, crate::util::sha256_file(&path)) {
                (Some(want), Ok(got)) => *want == got,
                _ => false,
            });
        }
    }
    let mut extra_files: Vec<String> = std::fs::read_dir(shard_dir)
        .map(|rd| {
            rd.filter_map(|e| e.ok())
                .map(|e| e.file_name().to_string_lossy().into_owned())
                .filter(|n| {
                    n != crate::store::manifest::MANIFEST_FILE
                        && !files.get(n).is_some_and(|f| f.sha256.is_some())
                })
                .collect()
        })
        .unwrap_or_default();
    extra_files.sort();
    let rows_per_set = summary
        .get("rows_per_set")
        .and_then(|v| v.as_object())
        .map(|m| {
            m.iter()
                .filter_map(|(k, v)| v.as_u64().map(|n| (k.clone(), n)))
                .collect()
        })
        .unwrap_or_default();
    let files: Vec<ShardFile> = files.into_values().collect();
    let all_ok = verify.then(|| {
        files
            .iter()
            .all(|f| f.verified == Some(true) && f.rows.is_some() && f.rows == f.footer_rows)
            && extra_files.is_empty()
    });
    Section::Ok(ShardFigures {
        rows: files
            .iter()
            .map(|f| f.rows.or(f.footer_rows).unwrap_or(0))
            .sum(),
        bytes: files.iter().filter_map(|f| f.bytes).sum(),
        verified: verify,
        all_ok,
        columns,
        files,
        rows_per_set,
        extra_files,
    })
}
