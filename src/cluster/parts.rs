//! One part of a partitioned stage, and the merge of all parts.
//!
//! `run_part` runs the stage for the clips of part `K` of `N` and writes
//! `RUN/<stage>/parts/K-of-N.json` (a [`PartManifest`]: the stage manifest of
//! that part plus the part's clips) atomically. `merge` checks that every part
//! exists with the current stage key and folds them into
//! `RUN/<stage>/manifest.json` with that same key. `merge_if_complete` lets
//! the part that finishes last do the merge at once, so the stage is done
//! without waiting for the scheduler to start the merge job (which then finds
//! the stage merged and stops).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::Instant;

use serde::{Deserialize, Serialize};

use super::{ClusterError, io_err, is_partitioned};
use crate::runner::{self, FingerprintedClip, Partition, Stage, StageContext};
use crate::spec::Spec;
use crate::store::{StageManifest, read_json, write_json_atomic};

/// Environment variable naming a part index that fails on purpose (for tests
/// of resubmission).
pub const FAIL_PART_ENV: &str = "ACTUARY_FAIL_PART";

/// What one part wrote.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct PartManifest {
    /// Stage name.
    pub stage: String,
    /// Part index (0-based).
    pub index: u32,
    /// Number of parts.
    pub count: u32,
    /// The stage key the part was made under.
    pub key: String,
    /// The part's clips, as `set/id`, in pipeline order.
    pub clips: Vec<String>,
    /// The stage manifest of this part alone.
    pub manifest: StageManifest,
}

/// What `run_part` did.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum PartOutcome {
    /// The part ran and wrote its manifest.
    Done,
    /// The part was already done with the current key.
    AlreadyDone,
    /// The whole stage is already merged with the current key.
    AlreadyMerged,
}

/// What `merge` did.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum MergeOutcome {
    /// The stage manifest was written.
    Merged,
    /// The stage manifest already had the current key.
    AlreadyMerged,
}

/// Parses `K/N`.
pub fn parse_part(text: &str) -> Result<Partition, ClusterError> {
    let bad = || ClusterError::BadPart(text.to_string());
    let (k, n) = text.split_once('/').ok_or_else(bad)?;
    let index: u32 = k.trim().parse().map_err(|_| bad())?;
    let count: u32 = n.trim().parse().map_err(|_| bad())?;
    if count == 0 || index >= count {
        return Err(bad());
    }
    Ok(Partition { index, count })
}

/// `RUN/<stage>/parts/`.
pub fn parts_dir(run_dir: &Path, stage: Stage) -> PathBuf {
    runner::stage_dir(run_dir, stage).join("parts")
}

/// `RUN/<stage>/parts/K-of-N.json`.
pub fn part_path(run_dir: &Path, stage: Stage, part: Partition) -> PathBuf {
    parts_dir(run_dir, stage).join(format!("{}-of-{}.json", part.index, part.count))
}

/// The settings hash and key of every stage, in order, for the current inputs.
pub fn chain(spec: &Spec, clips: &[FingerprintedClip]) -> BTreeMap<Stage, (String, String)> {
    let mut out = BTreeMap::new();
    let mut previous = String::new();
    for stage in Stage::ALL {
        let settings = runner::settings_hash(spec, stage);
        let key = runner::stage_key(stage, &settings, &previous, clips);
        previous = key.clone();
        out.insert(stage, (settings, key));
    }
    out
}

/// Lists and fingerprints the spec's clips.
pub fn fingerprinted(spec: &Spec, threads: usize) -> Result<Vec<FingerprintedClip>, ClusterError> {
    Ok(runner::fingerprint(
        &crate::inputs::list_all(spec)?,
        threads,
        &spec.out,
    ))
}

fn manifest_key(run_dir: &Path, stage: Stage) -> Result<Option<String>, ClusterError> {
    let path = StageManifest::path(run_dir, stage.name());
    Ok(StageManifest::read(run_dir, stage.name())
        .map_err(io_err(&path))?
        .map(|m| m.key))
}

/// Whether part `part` of `stage` is done under `key`.
pub fn part_done(run_dir: &Path, stage: Stage, part: Partition, key: &str) -> bool {
    read_json::<PartManifest>(&part_path(run_dir, stage, part)).is_ok_and(|m| m.key == key)
}

/// Runs part `part` of `stage` (decode or label); the previous stage must be done.
pub fn run_part(
    spec: &Spec,
    stage: Stage,
    part: Partition,
    threads: usize,
) -> Result<PartOutcome, ClusterError> {
    if !is_partitioned(stage) {
        return Err(ClusterError::NotPartitioned(stage));
    }
    let threads = threads.max(1);
    let clips = fingerprinted(spec, threads)?;
    let keys = chain(spec, &clips);
    let (settings, key) = keys[&stage].clone();
    let previous_key = match stage.previous() {
        None => String::new(),
        Some(prev) => {
            let want = &keys[&prev].1;
            if manifest_key(&spec.out, prev)?.as_ref() != Some(want) {
                return Err(ClusterError::PreviousMissing {
                    stage,
                    previous: prev,
                    path: StageManifest::path(&spec.out, prev.name()),
                });
            }
            want.clone()
        }
    };
    if manifest_key(&spec.out, stage)?.as_deref() == Some(key.as_str()) {
        return Ok(PartOutcome::AlreadyMerged);
    }
    if part_done(&spec.out, stage, part, &key) {
        return Ok(PartOutcome::AlreadyDone);
    }
    if std::env::var(FAIL_PART_ENV).is_ok_and(|v| v.trim() == part.index.to_string()) {
        return Err(ClusterError::FailedOnPurpose(part.index));
    }
    let started = Instant::now();
    let ctx = StageContext {
        spec,
        run_dir: spec.out.clone(),
        stage_dir: runner::stage_dir(&spec.out, stage),
        threads,
        key: key.clone(),
        settings_hash: settings.clone(),
        clips: &clips,
        partition: Some(part),
    };
    std::fs::create_dir_all(&ctx.stage_dir).map_err(io_err(&ctx.stage_dir))?;
    let mut manifest = runner::run_stage(stage, &ctx)?;
    manifest.stage = stage.name().to_string();
    manifest.tool_version = crate::VERSION.to_string();
    manifest.key = key.clone();
    manifest.settings_hash = settings;
    if let Some(prev) = stage.previous() {
        manifest
            .inputs
            .insert(format!("{}-stage-key", prev.name()), previous_key);
    }
    manifest
        .timings
        .insert("total_s".into(), started.elapsed().as_secs_f64());
    let record = PartManifest {
        stage: stage.name().to_string(),
        index: part.index,
        count: part.count,
        key,
        clips: clips
            .iter()
            .filter(|c| part.includes(&c.input.set, &c.input.id))
            .map(|c| format!("{}/{}", c.input.set, c.input.id))
            .collect(),
        manifest,
    };
    let path = part_path(&spec.out, stage, part);
    write_json_atomic(&path, &record).map_err(io_err(&path))?;
    Ok(PartOutcome::Done)
}

/// Folds the `count` parts of `stage` into its stage manifest, refusing when
/// a part is missing or was made from other settings or inputs.
pub fn merge(
    spec: &Spec,
    stage: Stage,
    count: u32,
    threads: usize,
) -> Result<MergeOutcome, ClusterError> {
    if !is_partitioned(stage) {
        return Err(ClusterError::NotPartitioned(stage));
    }
    let started = Instant::now();
    let clips = fingerprinted(spec, threads.max(1))?;
    let keys = chain(spec, &clips);
    let key = keys[&stage].1.clone();
    if manifest_key(&spec.out, stage)?.as_deref() == Some(key.as_str()) {
        return Ok(MergeOutcome::AlreadyMerged);
    }
    let mut parts = Vec::new();
    let mut missing = Vec::new();
    for index in 0..count.max(1) {
        let part = Partition { index, count };
        let path = part_path(&spec.out, stage, part);
        if !path.exists() {
            missing.push(index);
            continue;
        }
        let m: PartManifest = read_json(&path).map_err(io_err(&path))?;
        if m.key != key || m.index != index || m.count != count {
            return Err(ClusterError::PartStale {
                stage,
                path,
                found: m.key,
                expected: key,
            });
        }
        parts.push(m);
    }
    if !missing.is_empty() {
        return Err(ClusterError::PartsMissing {
            stage,
            missing,
            count,
            dir: parts_dir(&spec.out, stage),
        });
    }
    let mut manifest = match stage {
        Stage::Decode => fold_decode(&parts, &clips),
        // Label keeps run-wide figures (codes table, calibration): rerunning the
        // whole stage reuses every part's per-clip outputs and only aggregates.
        _ => {
            let (settings, key) = keys[&stage].clone();
            let ctx = StageContext {
                spec,
                run_dir: spec.out.clone(),
                stage_dir: runner::stage_dir(&spec.out, stage),
                threads: threads.max(1),
                key,
                settings_hash: settings,
                clips: &clips,
                partition: None,
            };
            let mut m = runner::run_stage(stage, &ctx)?;
            if let Some(prev) = stage.previous() {
                m.inputs
                    .insert(format!("{}-stage-key", prev.name()), keys[&prev].1.clone());
            }
            m
        }
    };
    manifest.stage = stage.name().to_string();
    manifest.tool_version = crate::VERSION.to_string();
    manifest
        .inputs
        .insert("spec".into(), spec.text_hash.clone());
    manifest
        .inputs
        .insert("spec-path".into(), spec.path.display().to_string());
    manifest.key = key;
    manifest.settings_hash = keys[&stage].0.clone();
    manifest.timings.insert("parts".into(), count as f64);
    manifest
        .timings
        .insert("merge_s".into(), started.elapsed().as_secs_f64());
    let path = StageManifest::path(&spec.out, stage.name());
    manifest.write(&spec.out).map_err(io_err(&path))?;
    Ok(MergeOutcome::Merged)
}

/// The lock file a part holds while it merges: `RUN/<stage>/parts/merging`.
fn merge_lock_path(run_dir: &Path, stage: Stage) -> PathBuf {
    parts_dir(run_dir, stage).join("merging")
}

/// Removes the merge lock when dropped.
struct MergeLock(PathBuf);

impl Drop for MergeLock {
    fn drop(&mut self) {
        let _ = std::fs::remove_file(&self.0);
    }
}

/// Merges the stage when all `count` part manifests exist and no other
/// process is merging it (checked with a lock file created exclusively);
/// `None` when it did not try. Called by each part when it finishes, so the
/// last one merges. A lock left by a killed process only stops this shortcut:
/// `merge` itself does not look at the lock.
pub fn merge_if_complete(
    spec: &Spec,
    stage: Stage,
    count: u32,
    threads: usize,
) -> Result<Option<MergeOutcome>, ClusterError> {
    let all_there =
        (0..count).all(|index| part_path(&spec.out, stage, Partition { index, count }).is_file());
    if !all_there {
        return Ok(None);
    }
    let lock = merge_lock_path(&spec.out, stage);
    let _held = match std::fs::OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(&lock)
    {
        Ok(_) => MergeLock(lock),
        Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => return Ok(None),
        Err(e) => return Err(io_err(&lock)(e)),
    };
    merge(spec, stage, count, threads).map(Some)
}

/// Folds decode parts: per-clip lines in pipeline order, counts and timings summed.
fn fold_decode(parts: &[PartManifest], clips: &[FingerprintedClip]) -> StageManifest {
    let order: BTreeMap<(String, String), usize> = clips
        .iter()
        .enumerate()
        .map(|(i, c)| ((c.input.set.clone(), c.input.id.clone()), i))
        .collect();
    let rank = |set: &str, id: &str| {
        order
            .get(&(set.to_string(), id.to_string()))
            .copied()
            .unwrap_or(usize::MAX)
    };
    let mut out = StageManifest::default();
    let mut lines: Vec<serde_json::Value> = Vec::new();
    let mut summary = serde_json::Map::new();
    let mut part_max = 0.0f64;
    for p in parts {
        let m = &p.manifest;
        out.inputs.extend(m.inputs.clone());
        out.clips.extend(m.clips.iter().cloned());
        for (k, v) in &m.counts {
            *out.counts.entry(k.clone()).or_default() += v;
        }
        for (k, v) in &m.timings {
            if k != "total_s" {
                *out.timings.entry(k.clone()).or_default() += v;
            }
        }
        part_max = part_max.max(m.timings.get("total_s").copied().unwrap_or(0.0));
        if let serde_json::Value::Object(s) = &m.summary {
            for (k, v) in s {
                if k == "clips" {
                    lines.extend(v.as_array().cloned().unwrap_or_default());
                } else {
                    summary.insert(k.clone(), v.clone());
                }
            }
        }
    }
    out.clips.sort_by_key(|c| rank(&c.set, &c.id));
    let field = |v: &serde_json::Value, f: &str| {
        v.get(f).and_then(|x| x.as_str()).unwrap_or("").to_string()
    };
    lines.sort_by_key(|l| rank(&field(l, "set"), &field(l, "id")));
    summary.insert("clips".into(), serde_json::Value::Array(lines));
    out.summary = serde_json::Value::Object(summary);
    out.timings.insert("slowest_part_s".into(), part_max);
    out
}
