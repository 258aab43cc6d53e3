//! The decode stage: every clip of every set is probed, decoded into
//! `RUN/decode/clips/<set>/<id>.frames` and described by
//! `RUN/decode/clips/<set>/<id>.clip.json` (written last, atomically: a clip
//! is done when its record exists). Labelled clips get their sidecar mapped
//! onto the decoded frame intervals.
//!
//! Clips decode in parallel on a pool of `threads` workers, so at most that
//! many are in flight and memory does not grow with the number of clips. Each
//! record carries a per-clip key (decode settings, clip and sidecar sha256):
//! a rerun reuses every clip whose key matches and so resumes where an
//! interrupted run stopped. A bad clip is skipped and listed with its reason
//! (`on-error = "skip"`), or stops the stage before anything more is written
//! under a final name (`"stop"`). Records of clips that are no longer inputs
//! or no longer decode are removed, so later stages see only current clips.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use super::commit::{Committed, Pending, with_committer};
use super::{DecodeOptions, OnError, decode_clip, probe_checked};
use crate::actions::{self, MapRule};
use crate::runner::StageContext;
use crate::store::{
    ClipRecord, ClipStatus, FrameReader, FrameWriter, SourceInfo, StageManifest, read_json,
};

/// Errors of the decode stage as a whole (a bad clip under `skip` is not one).
#[derive(Debug, thiserror::Error)]
pub enum DecodeStageError {
    /// A clip failed and `on-error = "stop"`.
    #[error("clip `{id}` of set `{set}` failed (on-error = \"stop\"): {reason}")]
    Stopped {
        /// Set name.
        set: String,
        /// Clip id.
        id: String,
        /// What went wrong (names the file).
        reason: String,
    },
    /// Writing a record or cleaning the stage folder failed.
    #[error("decode stage: {path}: {source}")]
    Io {
        /// The file or folder.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
}

/// One clip to decode.
#[derive(Debug, Clone)]
pub struct ClipJob {
    /// Set name.
    pub set: String,
    /// Whether the set is labelled.
    pub labelled: bool,
    /// Clip id.
    pub id: String,
    /// The clip file.
    pub path: PathBuf,
    /// The sidecar, if any.
    pub sidecar: Option<PathBuf>,
    /// sha256 of the clip file.
    pub sha256: String,
    /// sha256 of the sidecar.
    pub sidecar_sha256: Option<String>,
}

/// How recorded actions are mapped onto frames.
#[derive(Debug, Clone)]
pub struct ActionMapping {
    /// Rule per named dimension.
    pub map: BTreeMap<String, MapRule>,
    /// Rule for dimensions not in `map`.
    pub default_rule: MapRule,
    /// Seconds added to log times to get video times.
    pub offset_s: f64,
}

/// Everything the decode stage needs, independent of the spec types.
#[derive(Debug, Clone)]
pub struct DecodeParams {
    /// Clips in a stable order.
    pub clips: Vec<ClipJob>,
    /// Decode settings.
    pub opts: DecodeOptions,
    /// Action mapping for labelled sets.
    pub actions: ActionMapping,
    /// Worker threads (clips in flight).
    pub threads: usize,
    /// `RUN/decode/`.
    pub decode_dir: PathBuf,
    /// Hash of the stage settings (part of each clip's key).
    pub settings_hash: String,
}

/// One clip's line in the stage summary.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct ClipSummary {
    /// Set name.
    pub set: String,
    /// Clip id.
    pub id: String,
    /// `ok`, `reused` or `skipped`.
    pub status: String,
    /// Output frames.
    pub frames: u32,
    /// Output duration in seconds (`frames / fps`).
    pub duration_s: f64,
    /// Source frames dropped by resampling.
    pub dropped: u64,
    /// Output frames repeating a source frame.
    pub repeated: u64,
    /// The source, when it could be probed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub source: Option<SourceInfo>,
    /// Why the clip was skipped.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reason: Option<String>,
}

/// The decode stage's `summary` in its manifest (also what `inspect` shows).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq, Default)]
pub struct DecodeSummary {
    /// Output fps.
    pub fps: f64,
    /// Output size (width, height).
    pub size: (u32, u32),
    /// Per clip, in (set, id) order.
    pub clips: Vec<ClipSummary>,
}

/// Runs the decode stage for the runner.
pub fn run_stage(ctx: &StageContext<'_>) -> Result<StageManifest, DecodeStageError> {
    let spec = ctx.spec;
    let offset_s = match spec.actions.offset {
        crate::spec::Offset::Seconds(s) => s,
        // Estimated later by the align stage; decode maps with no offset.
        crate::spec::Offset::Estimate => 0.0,
    };
    let params = DecodeParams {
        clips: ctx
            .clips
            .iter()
            .map(|c| ClipJob {
                set: c.input.set.clone(),
                labelled: c.input.labelled,
                id: c.input.id.clone(),
                path: c.input.path.clone(),
                sidecar: c.input.sidecar.clone(),
                sha256: c.sha256.clone(),
                sidecar_sha256: c.sidecar_sha256.clone(),
            })
            .collect(),
        opts: spec.decode.clone(),
        actions: ActionMapping {
            map: spec.actions.map.clone(),
            default_rule: spec.actions.default_rule,
            offset_s,
        },
        threads: ctx.threads,
        decode_dir: ctx.stage_dir.clone(),
        settings_hash: ctx.settings_hash.clone(),
    };
    crate::storage::configure_scratch(
        spec.cluster.scratch.as_deref(),
        spec.cluster.scratch_limit_bytes,
    );
    // A part of a partitioned run decodes only its own clips (see `crate::cluster`).
    decode_part(&params, &|job: &ClipJob| ctx.includes(&job.set, &job.id))
}

/// The outcome of one clip.
enum Outcome {
    Done(Box<ClipRecord>, bool),
    Skipped(Option<SourceInfo>, String),
    /// Not started or abandoned because another clip stopped the stage.
    Cancelled,
}

/// Decodes every clip of `params` (the stage proper, without the spec types).
pub fn decode_all(params: &DecodeParams) -> Result<StageManifest, DecodeStageError> {
    decode_part(params, &|_| true)
}

/// Decodes the clips of `params` that `include` accepts; the others are left
/// as they are (their outputs belong to other parts of a partitioned run).
/// Sidecar headers are still taken from all clips, so every part checks
/// against the same header as a whole run.
pub fn decode_part(
    params: &DecodeParams,
    include: &(dyn Fn(&ClipJob) -> bool + Sync),
) -> Result<StageManifest, DecodeStageError> {
    let started = Instant::now();
    let headers = set_headers(&params.clips);
    let selected: Vec<&ClipJob> = params.clips.iter().filter(|j| include(j)).collect();
    let stop = AtomicBool::new(false);
    let first_error: std::sync::Mutex<Option<(String, String, String)>> = Default::default();
    let progress = crate::util::Progress::new("decode", selected.len() as u64);
    let pool = crate::util::thread_pool(params.threads);
    let record_failure = |set: &str, id: &str, reason: &str| {
        if params.opts.on_error == OnError::Stop {
            stop.store(true, Ordering::SeqCst);
            let mut first = first_error.lock().unwrap();
            if first.is_none() {
                *first = Some((set.to_string(), id.to_string(), reason.to_string()));
            }
        }
    };
    let commit_failed = |index: usize, reason: &str| {
        let job = selected[index];
        record_failure(&job.set, &job.id, reason);
    };
    // Workers decode; one thread syncs and renames finished clips behind them.
    let (mut outcomes, committed): (Vec<Outcome>, _) =
        with_committer(&stop, &commit_failed, |committer| {
            pool.install(|| {
                selected
                    .par_iter()
                    .enumerate()
                    .with_max_len(1)
                    .map(|(index, &job)| {
                        if stop.load(Ordering::SeqCst) {
                            return Outcome::Cancelled;
                        }
                        let header = headers.get(&job.set).map(Vec::as_slice);
                        let outcome = match decode_one(job, header, params, &stop) {
                            Ok(Some(Decoded::Reused(record))) => Outcome::Done(record, true),
                            Ok(Some(Decoded::Finished(writer, record))) => {
                                let record_path =
                                    ClipRecord::record_path(&params.decode_dir, &job.set, &job.id);
                                let done = Outcome::Done(record.clone(), false);
                                let pending = Pending {
                                    index,
                                    writer,
                                    record: *record,
                                    record_path,
                                };
                                match committer.send(pending) {
                                    Ok(()) => done,
                                    Err(_) => Outcome::Cancelled,
                                }
                            }
                            Ok(None) => Outcome::Cancelled,
                            Err(failure) => {
                                let (source, reason) = *failure;
                                record_failure(&job.set, &job.id, &reason);
                                Outcome::Skipped(source, reason)
                            }
                        };
                        progress.inc(1);
                        outcome
                    })
                    .collect()
            })
        });
    for (index, result) in committed {
        match result {
            Committed::Done => {}
            Committed::Cancelled => outcomes[index] = Outcome::Cancelled,
            Committed::Failed(reason) => {
                let source = match &outcomes[index] {
                    Outcome::Done(record, _) => Some(record.source.clone()),
                    _ => None,
                };
                outcomes[index] = Outcome::Skipped(source, reason);
            }
        }
    }
    progress.finish();
    if let Some((set, id, reason)) = first_error.into_inner().unwrap() {
        return Err(DecodeStageError::Stopped { set, id, reason });
    }

    let mut manifest = StageManifest {
        stage: "decode".into(),
        tool_version: crate::VERSION.into(),
        ..StageManifest::default()
    };
    let mut summary = DecodeSummary {
        fps: params.opts.fps,
        size: (params.opts.width, params.opts.height),
        clips: Vec::new(),
    };
    let mut keep = BTreeSet::new();
    for job in params.clips.iter().filter(|j| !include(j)) {
        keep.insert(ClipRecord::record_path(
            &params.decode_dir,
            &job.set,
            &job.id,
        ));
        keep.insert(ClipRecord::frames_path(
            &params.decode_dir,
            &job.set,
            &job.id,
        ));
    }
    let (mut decoded, mut reused, mut skipped) = (0u64, 0u64, 0u64);
    let (mut frames, mut dropped, mut repeated) = (0u64, 0u64, 0u64);
    for (job, outcome) in selected.iter().zip(outcomes) {
        manifest
            .inputs
            .insert(format!("{}/{}", job.set, job.id), job.sha256.clone());
        let (status, line) = match outcome {
            Outcome::Done(r, was_reused) => {
                keep.insert(ClipRecord::record_path(
                    &params.decode_dir,
                    &job.set,
                    &job.id,
                ));
                keep.insert(ClipRecord::frames_path(
                    &params.decode_dir,
                    &job.set,
                    &job.id,
                ));
                if was_reused {
                    reused += 1;
                } else {
                    decoded += 1;
                }
                frames += r.frames as u64;
                dropped += r.dropped;
                repeated += r.repeated;
                let status = if was_reused { "reused" } else { "ok" };
                (
                    ClipStatus {
                        id: job.id.clone(),
                        set: job.set.clone(),
                        status: status.into(),
                        reason: None,
                    },
                    ClipSummary {
                        set: job.set.clone(),
                        id: job.id.clone(),
                        status: status.into(),
                        frames: r.frames,
                        duration_s: r.frames as f64 / r.fps,
                        dropped: r.dropped,
                        repeated: r.repeated,
                        source: Some(r.source.clone()),
                        reason: None,
                    },
                )
            }
            Outcome::Skipped(source, reason) => {
                skipped += 1;
                (
                    ClipStatus {
                        id: job.id.clone(),
                        set: job.set.clone(),
                        status: "skipped".into(),
                        reason: Some(reason.clone()),
                    },
                    ClipSummary {
                        set: job.set.clone(),
                        id: job.id.clone(),
                        status: "skipped".into(),
                        frames: 0,
                        duration_s: 0.0,
                        dropped: 0,
                        repeated: 0,
                        source,
                        reason: Some(reason),
                    },
                )
            }
            Outcome::Cancelled => unreachable!("cancelled only when the stage stops"),
        };
        manifest.clips.push(status);
        summary.clips.push(line);
    }
    sweep(&params.decode_dir.join("clips"), &keep)?;
    let counts = [
        ("clips", selected.len() as u64),
        ("decoded", decoded),
        ("reused", reused),
        ("skipped", skipped),
        ("frames", frames),
        ("dropped", dropped),
        ("repeated", repeated),
    ];
    for (k, v) in counts {
        manifest.counts.insert(k.into(), v);
    }
    manifest
        .timings
        .insert("decode_s".into(), started.elapsed().as_secs_f64());
    manifest.summary = serde_json::to_value(&summary).expect("summary serialises");
    Ok(manifest)
}

/// The expected sidecar header of each labelled set: that of its first clip
/// (in clip order) whose sidecar reads.
fn set_headers(clips: &[ClipJob]) -> BTreeMap<String, Vec<String>> {
    let mut headers = BTreeMap::new();
    for c in clips.iter().filter(|c| c.labelled) {
        if headers.contains_key(&c.set) {
            continue;
        }
        let local = c
            .sidecar
            .as_deref()
            .and_then(|p| crate::storage::local_copy(p).ok());
        if let Some(Ok(s)) = local.as_ref().map(|l| actions::read_sidecar(l.path())) {
            headers.insert(c.set.clone(), s.dims);
        }
    }
    headers
}

/// The per-clip key: decode settings plus the clip's and sidecar's content.
fn clip_key(job: &ClipJob, params: &DecodeParams) -> String {
    crate::util::sha256_json(&(
        crate::VERSION,
        &params.settings_hash,
        &params.opts,
        &job.set,
        &job.id,
        &job.sha256,
        &job.sidecar_sha256,
        params.actions.offset_s,
    ))
}

/// An existing record made with `key` whose frame store is intact.
fn reusable(decode_dir: &Path, job: &ClipJob, key: &str) -> Option<ClipRecord> {
    let record: ClipRecord =
        read_json(&ClipRecord::record_path(decode_dir, &job.set, &job.id)).ok()?;
    if record.key != key {
        return None;
    }
    let frames = FrameReader::open(&ClipRecord::frames_path(decode_dir, &job.set, &job.id)).ok()?;
    (frames.len() == record.frames as usize).then_some(record)
}

/// Why a clip failed: its source (when probed) and the reason.
type ClipFailure = Box<(Option<SourceInfo>, String)>;

/// A clip [`decode_one`] is done with.
enum Decoded {
    /// Its record and frames from an earlier run are current.
    Reused(Box<ClipRecord>),
    /// Decoded now: all frames written to the (still temporary) frame store,
    /// and the record to write once the frames are in place.
    Finished(FrameWriter, Box<ClipRecord>),
}

/// Decodes one clip into its frame store and builds its record; `Ok(None)`
/// when the stage was stopped by another clip meanwhile. The caller commits
/// a finished clip (see [`super::commit`]).
fn decode_one(
    job: &ClipJob,
    header: Option<&[String]>,
    params: &DecodeParams,
    stop: &AtomicBool,
) -> Result<Option<Decoded>, ClipFailure> {
    let key = clip_key(job, params);
    if let Some(record) = reusable(&params.decode_dir, job, &key) {
        return Ok(Some(Decoded::Reused(Box::new(record))));
    }
    if job.sha256.is_empty() && !job.path.is_file() {
        return Err(Box::new((
            None,
            format!("{}: the clip file cannot be read", job.path.display()),
        )));
    }
    let opts = &params.opts;
    // A clip in object storage is fetched to node-local scratch and removed after.
    let local =
        crate::storage::local_copy(&job.path).map_err(|e| Box::new((None, e.to_string())))?;
    let mut source =
        probe_checked(local.path(), opts).map_err(|e| Box::new((None, e.to_string())))?;
    source.path = job.path.clone();
    let fail = |reason: String| Box::new((Some(source.clone()), reason));
    // Read the sidecar before decoding, so a bad one costs no decode time.
    let sidecar = if job.labelled {
        let Some(path) = job.sidecar.as_deref() else {
            return Err(fail(format!(
                "{}: labelled clip has no sidecar (expected {})",
                job.path.display(),
                job.path.with_extension("actions.csv").display()
            )));
        };
        let local_sidecar = crate::storage::local_copy(path).map_err(|e| fail(e.to_string()))?;
        let s = actions::read_sidecar(local_sidecar.path()).map_err(|e| fail(e.to_string()))?;
        if let Some(expected) = header {
            s.expect_dims(expected).map_err(|e| fail(e.to_string()))?;
        }
        let rules = actions::rules_for(&s.dims, &params.actions.map, params.actions.default_rule)
            .map_err(|e| fail(format!("{}: {e}", path.display())))?;
        Some((s, rules))
    } else {
        None
    };

    let frames_path = ClipRecord::frames_path(&params.decode_dir, &job.set, &job.id);
    let mut writer = FrameWriter::create(&frames_path, opts.width, opts.height)
        .map_err(|e| fail(e.to_string()))?;
    let mut stats =
        decode_clip(local.path(), opts, &mut writer).map_err(|e| fail(e.to_string()))?;
    stats.source.path = job.path.clone();
    drop(local);
    let actions_mapped = match &sidecar {
        Some((s, rules)) => Some(
            actions::map_to_frames(s, rules, opts.fps, stats.frames, params.actions.offset_s)
                .map_err(|e| fail(e.to_string()))?,
        ),
        None => None,
    };
    if stop.load(Ordering::SeqCst) {
        // Dropping the writer removes its temporary file.
        return Ok(None);
    }
    let record = ClipRecord {
        id: job.id.clone(),
        set: job.set.clone(),
        labelled: job.labelled,
        frames: stats.frames,
        fps: opts.fps,
        width: opts.width,
        height: opts.height,
        dropped: stats.dropped,
        repeated: stats.repeated,
        source: stats.source,
        fingerprint: job.sha256.clone(),
        key,
        action_dims: sidecar
            .as_ref()
            .map(|(s, _)| s.dims.clone())
            .unwrap_or_default(),
        actions: actions_mapped,
        sidecar: job.sidecar.clone().filter(|_| job.labelled),
        sidecar_fingerprint: job.sidecar_sha256.clone().filter(|_| job.labelled),
    };
    Ok(Some(Decoded::Finished(writer, Box::new(record))))
}

/// Removes frame stores and records under `root` that are not in `keep`
/// (clips no longer in the inputs, or skipped this time).
fn sweep(root: &Path, keep: &BTreeSet<PathBuf>) -> Result<(), DecodeStageError> {
    let io = |path: &Path| {
        let path = path.to_path_buf();
        move |source| DecodeStageError::Io { path, source }
    };
    let Ok(entries) = std::fs::read_dir(root) else {
        return Ok(());
    };
    for entry in entries {
        let entry = entry.map_err(io(root))?;
        let path = entry.path();
        if entry.file_type().map_err(io(&path))?.is_dir() {
            sweep(&path, keep)?;
            continue;
        }
        let name = path.file_name().and_then(|n| n.to_str()).unwrap_or("");
        let ours = name.ends_with(".clip.json") || name.ends_with(".frames");
        if ours && !keep.contains(&path) {
            std::fs::remove_file(&path).map_err(io(&path))?;
        }
    }
    Ok(())
}

/// What `inspect` shows for the decode stage: totals and one line per clip.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct DecodeInspect {
    /// Output fps.
    pub fps: f64,
    /// Output size (width, height).
    pub size: (u32, u32),
    /// Clips listed.
    pub clips: u64,
    /// Clips decoded (this run or reused).
    pub decoded: u64,
    /// Clips skipped.
    pub skipped: u64,
    /// Output frames over all clips.
    pub frames: u64,
    /// Output duration over all clips, seconds.
    pub duration_s: f64,
    /// Dropped source frames over all clips.
    pub dropped: u64,
    /// Repeated output frames over all clips.
    pub repeated: u64,
    /// Per clip (source fps, size, codec; skipped ones with their reason).
    pub per_clip: Vec<ClipSummary>,
}

/// Builds the decode `inspect` data from a decode manifest.
pub fn inspect(manifest: &StageManifest) -> Result<DecodeInspect, serde_json::Error> {
    let summary: DecodeSummary = serde_json::from_value(manifest.summary.clone())?;
    let done = |c: &&ClipSummary| c.status != "skipped";
    Ok(DecodeInspect {
        fps: summary.fps,
        size: summary.size,
        clips: summary.clips.len() as u64,
        decoded: summary.clips.iter().filter(done).count() as u64,
        skipped: summary
            .clips
            .iter()
            .filter(|c| c.status == "skipped")
            .count() as u64,
        frames: summary.clips.iter().map(|c| c.frames as u64).sum(),
        duration_s: summary.clips.iter().map(|c| c.duration_s).sum(),
        dropped: summary.clips.iter().map(|c| c.dropped).sum(),
        repeated: summary.clips.iter().map(|c| c.repeated).sum(),
        per_clip: summary.clips,
    })
}

/// Reads `RUN/decode/manifest.json` and builds the decode `inspect` data.
pub fn inspect_run(run_dir: &Path) -> std::io::Result<DecodeInspect> {
    let manifest = StageManifest::read(run_dir, "decode")?.ok_or_else(|| {
        std::io::Error::new(
            std::io::ErrorKind::NotFound,
            format!(
                "{}: no decode manifest (run the decode stage first)",
                run_dir.display()
            ),
        )
    })?;
    inspect(&manifest).map_err(|e| std::io::Error::new(std::io::ErrorKind::InvalidData, e))
}
