//! `inspect RUN shard`: shard sizes, rows per set, confidence, and with
//! `--verify` a re-hash of every shard against the manifest (and a check that
//! the folder holds nothing else).

use std::fmt::Write as _;
use std::path::Path;

use serde::Serialize;

use super::writer::ShardSummary;
use crate::store::StageManifest;
use crate::store::manifest::MANIFEST_FILE;

/// One shard's verification.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ShardCheck {
    /// File name.
    pub file: String,
    /// Whether the file exists.
    pub exists: bool,
    /// Its sha256 now (empty when unreadable).
    pub sha256: String,
    /// Whether it equals the manifest's.
    pub ok: bool,
}

/// What `inspect RUN shard` reports.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ShardInspection {
    /// The manifest's summary.
    pub summary: ShardSummary,
    /// Total bytes.
    pub bytes: u64,
    /// Per shard, when verified.
    pub verified: Option<Vec<ShardCheck>>,
    /// Files in `RUN/shard/` that are neither shards nor the manifest (when verified).
    pub extra_files: Vec<String>,
}

impl ShardInspection {
    /// Whether every check passed (true when not verified).
    pub fn ok(&self) -> bool {
        self.verified
            .as_ref()
            .is_none_or(|v| v.iter().all(|c| c.ok))
            && self.extra_files.is_empty()
    }

    /// A plain-text rendering.
    pub fn render(&self) -> String {
        let s = &self.summary;
        let mut out = String::new();
        let _ = writeln!(
            out,
            "  rows {} in {} shard(s), {:.1} MB, {} clips, {} fps, image {} {}x{}",
            s.rows,
            s.shards.len(),
            self.bytes as f64 / 1e6,
            s.clips,
            s.fps,
            match s.image.encoding {
                super::ImageEncoding::Png => "png",
                super::ImageEncoding::Raw => "raw",
            },
            s.image.width,
            s.image.height
        );
        for (set, n) in &s.rows_per_set {
            let _ = writeln!(out, "  set {set:<20} {n} rows");
        }
        let _ = writeln!(
            out,
            "  confidence: {} rows, mean {:.4}; action dims {:?}",
            s.confidence.rows, s.confidence.mean, s.action_dims
        );
        for f in &s.shards {
            let check = self
                .verified
                .as_ref()
                .and_then(|v| v.iter().find(|c| c.file == f.file));
            let mark = match check {
                None => "",
                Some(c) if c.ok => "  verified",
                Some(c) if !c.exists => "  MISSING",
                Some(_) => "  CHECKSUM MISMATCH",
            };
            let _ = writeln!(
                out,
                "  {} {:>8} rows {:>4} groups {:>10} B  {}{mark}",
                f.file, f.rows, f.row_groups, f.bytes, f.sha256
            );
        }
        for e in &self.extra_files {
            let _ = writeln!(out, "  unexpected file in shard folder: {e}");
        }
        out
    }
}

/// Reads `RUN/shard/manifest.json`; with `verify`, re-hashes every shard.
pub fn inspect_shards(run_dir: &Path, verify: bool) -> std::io::Result<ShardInspection> {
    let m = StageManifest::read(run_dir, "shard")?.ok_or_else(|| {
        std::io::Error::new(
            std::io::ErrorKind::NotFound,
            format!("{} has no shard manifest", run_dir.display()),
        )
    })?;
    let summary: ShardSummary = serde_json::from_value(m.summary)
        .map_err(|e| std::io::Error::new(std::io::ErrorKind::InvalidData, e))?;
    let dir = run_dir.join("shard");
    let mut extra_files = Vec::new();
    let verified = if verify {
        let checks = summary
            .shards
            .iter()
            .map(|f| {
                let path = dir.join(&f.file);
                let sha256 = crate::util::sha256_file(&path).unwrap_or_default();
                ShardCheck {
                    file: f.file.clone(),
                    exists: path.exists(),
                    ok: sha256 == f.sha256,
                    sha256,
                }
            })
            .collect();
        for entry in std::fs::read_dir(&dir)? {
            let name = entry?.file_name().to_string_lossy().into_owned();
            if name != MANIFEST_FILE && !summary.shards.iter().any(|s| s.file == name) {
                extra_files.push(name);
            }
        }
        extra_files.sort();
        Some(checks)
    } else {
        None
    };
    Ok(ShardInspection {
        bytes: summary.shards.iter().map(|s| s.bytes).sum(),
        summary,
        verified,
        extra_files,
    })
}
