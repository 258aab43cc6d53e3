//! Gathering [`RunFigures`] from a run folder, stage by stage, through the
//! stages' typed readers (clip records, the align summary, the label stage's
//! per-clip labels, calibration figures and codes table, the shard manifest).
//! A stage whose output is missing or unreadable gives a
//! [`Section::Missing`] note; nothing here fails the whole gathering.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use super::figures::*;
use crate::label::motion_range;
use crate::label::output::{
    CALIBRATION_FILE, CODES_FILE, CalibrationFigures, ClipLabels, CodesTable,
};
use crate::runner::Stage;
use crate::store::{ClipRecord, StageManifest};

/// The personal-data caution (the second half of [`crate::error::CAUTION`], on its own).
pub const PERSONAL_DATA: &str = "Video of people is personal data: have the consent of the people filmed and follow the data-protection law that applies to you.";
/// The safety caution.
pub const ESTIMATES: &str = "Inferred actions are estimates. Try a policy trained on them in simulation first, then on hardware with speed and force limits and an emergency stop, under your lab's own safety rules.";

/// Most example transitions shown per code.
pub const CODE_EXAMPLES: usize = 8;
/// Codes shown with example strips.
pub const TOP_CODES: usize = 6;
/// Tiles of the unlabelled contact sheet.
pub const CONTACT_TILES: usize = 24;
/// Clips in the "hand-label these first" list.
pub const LOWEST_CLIPS: usize = 15;

/// Everything read from a run once: the figures and what the pictures need.
pub struct Gathered {
    /// The figures.
    pub figures: RunFigures,
    /// Decoded clip records, sorted by (set, id).
    pub records: Vec<ClipRecord>,
    /// Per-clip labels keyed by (set, id).
    pub labels: BTreeMap<(String, String), ClipLabels>,
    /// Recorded actions on the decode grid of labelled clips, as later stages use them.
    pub recorded: BTreeMap<(String, String), Vec<Vec<f32>>>,
}

/// Reads a stage manifest, turning any failure into a note.
pub fn manifest(run: &Path, stage: Stage) -> Result<StageManifest, String> {
    match StageManifest::read(run, stage.name()) {
        Ok(Some(m)) => Ok(m),
        Ok(None) => Err(format!(
            "the {stage} stage has not run (no {stage}/manifest.json)"
        )),
        Err(e) => Err(format!(
            "{}: {e}",
            StageManifest::path(run, stage.name()).display()
        )),
    }
}

/// Gathers every figure of `run`; `verify` re-hashes the shards.
pub fn gather(run: &Path, verify: bool) -> Gathered {
    let manifests: Vec<(Stage, Result<StageManifest, String>)> = Stage::ALL
        .into_iter()
        .map(|s| (s, manifest(run, s)))
        .collect();
    let stages = manifests
        .iter()
        .map(|(s, m)| match m {
            Ok(m) => StageRow {
                stage: s.name().into(),
                present: true,
                tool_version: Some(m.tool_version.clone()),
                key: Some(m.key.chars().take(12).collect()),
                timings: m.timings.clone(),
                counts: m.counts.clone(),
                note: None,
            },
            Err(note) => StageRow {
                stage: s.name().into(),
                present: false,
                tool_version: None,
                key: None,
                timings: BTreeMap::new(),
                counts: BTreeMap::new(),
                note: Some(note.clone()),
            },
        })
        .collect();
    let get = |s: Stage| {
        manifests
            .iter()
            .find(|(x, _)| *x == s)
            .map(|(_, m)| m.clone())
            .unwrap()
    };
    let (records, unreadable) = read_records(run);
    let recorded = recorded_actions(run, &records);
    let (label, labels) = label_section(run, &get(Stage::Label), &records);
    let figures = RunFigures {
        run: run.display().to_string(),
        tool_version: crate::VERSION.to_string(),
        spec: spec_ref(&manifests),
        stages,
        cautions: vec![ESTIMATES.to_string(), PERSONAL_DATA.to_string()],
        decode: decode_section(&get(Stage::Decode), &records, unreadable),
        align: align_section(&get(Stage::Align)),
        fit: fit_section(run, &get(Stage::Fit), &records, &labels, &recorded),
        label,
        shard: shard_section(run, &get(Stage::Shard), verify),
    };
    Gathered {
        figures,
        records,
        labels,
        recorded,
    }
}

fn spec_ref(manifests: &[(Stage, Result<StageManifest, String>)]) -> SpecRef {
    let mut r = SpecRef {
        path: None,
        sha256: None,
    };
    for m in manifests.iter().filter_map(|(_, m)| m.as_ref().ok()) {
        for key in ["spec", "spec-sha256", "spec_sha256"] {
            if r.sha256.is_none() {
                r.sha256 = m.inputs.get(key).cloned();
            }
        }
        if r.path.is_none() {
            r.path = m.inputs.get("spec-path").cloned().or_else(|| {
                m.summary
                    .get("spec")
                    .and_then(|s| s.get("path").or(Some(s)))
                    .and_then(|v| v.as_str())
                    .map(String::from)
            });
        }
    }
    r
}

/// Every readable clip record under `RUN/decode/clips/`, and the files that were not.
pub fn read_records(run: &Path) -> (Vec<ClipRecord>, Vec<String>) {
    let mut files = Vec::new();
    walk(&run.join("decode").join("clips"), ".clip.json", &mut files);
    let mut records = Vec::new();
    let mut bad = Vec::new();
    for f in files {
        match crate::store::read_json::<ClipRecord>(&f) {
            Ok(r) => records.push(r),
            Err(e) => bad.push(format!("{}: {e}", f.display())),
        }
    }
    records.sort_by(|a, b| (&a.set, &a.id).cmp(&(&b.set, &b.id)));
    (records, bad)
}

fn walk(dir: &Path, suffix: &str, out: &mut Vec<PathBuf>) {
    let Ok(rd) = std::fs::read_dir(dir) else {
        return;
    };
    let mut entries: Vec<PathBuf> = rd.filter_map(|e| e.ok()).map(|e| e.path()).collect();
    entries.sort();
    for path in entries {
        if path.is_dir() {
            walk(&path, suffix, out);
        } else if path.to_string_lossy().ends_with(suffix) {
            out.push(path);
        }
    }
}

fn decode_section(
    m: &Result<StageManifest, String>,
    records: &[ClipRecord],
    unreadable: Vec<String>,
) -> Section<DecodeFigures> {
    let m = match m {
        Ok(m) => m,
        Err(note) if records.is_empty() => return Section::Missing(note.clone()),
        // Clips decoded by an interrupted decode stage are still worth showing.
        Err(_) => &StageManifest::default(),
    };
    let skipped: Vec<SkippedClip> = m
        .clips
        .iter()
        .filter(|c| c.status == "skipped")
        .map(|c| SkippedClip {
            set: c.set.clone(),
            id: c.id.clone(),
            reason: c.reason.clone().unwrap_or_default(),
        })
        .collect();
    let mut sets: BTreeMap<String, SetCount> = BTreeMap::new();
    let mut formats = BTreeMap::new();
    let mut clips = Vec::new();
    for r in records {
        let s = sets.entry(r.set.clone()).or_insert_with(|| SetCount {
            set: r.set.clone(),
            labelled: r.labelled,
            clips: 0,
            frames: 0,
            skipped: 0,
        });
        s.clips += 1;
        s.frames += r.frames as u64;
        let ext = r
            .source
            .path
            .extension()
            .map(|e| e.to_string_lossy().to_ascii_lowercase())
            .unwrap_or_default();
        let format = format!("{ext}/{}", r.source.codec);
        *formats.entry(format.clone()).or_insert(0) += 1;
        clips.push(DecodedClip {
            set: r.set.clone(),
            id: r.id.clone(),
            frames: r.frames,
            format,
            source_fps: r.source.fps,
            source_size: format!("{}x{}", r.source.width, r.source.height),
            duration_s: r.source.duration_s,
            dropped: r.dropped,
            repeated: r.repeated,
            colour: format!(
                "{}/{}{}",
                r.source.matrix,
                r.source.range,
                if r.source.untagged { "?" } else { "" }
            ),
        });
    }
    for k in &skipped {
        sets.entry(k.set.clone())
            .or_insert_with(|| SetCount {
                set: k.set.clone(),
                labelled: false,
                clips: 0,
                frames: 0,
                skipped: 0,
            })
            .skipped += 1;
    }
    Section::Ok(DecodeFigures {
        fps: records.first().map(|r| r.fps),
        size: records.first().map(|r| (r.width, r.height)),
        sets: sets.into_values().collect(),
        formats,
        dropped: records.iter().map(|r| r.dropped).sum(),
        repeated: records.iter().map(|r| r.repeated).sum(),
        clips,
        skipped,
        unreadable,
    })
}

fn align_section(m: &Result<StageManifest, String>) -> Section<AlignFigures> {
    match m {
        Err(note) => Section::Missing(note.clone()),
        Ok(m) => match serde_json::from_value(m.summary.clone()) {
            Ok(figures) => Section::Ok(figures),
            Err(e) => Section::Missing(format!(
                "align/manifest.json: summary not understood by this build: {e}"
            )),
        },
    }
}

/// Recorded actions on the decode grid (re-mapped by align when it estimated offsets).
fn recorded_actions(
    run: &Path,
    records: &[ClipRecord],
) -> BTreeMap<(String, String), Vec<Vec<f32>>> {
    let mut out = BTreeMap::new();
    let aligned = crate::align::AlignedRun::open(run).ok();
    for r in records.iter().filter(|r| r.labelled) {
        let from_align = aligned
            .as_ref()
            .and_then(|a| a.clip(&r.set, &r.id))
            .and_then(|c| c.decode_actions().map(<[Vec<f32>]>::to_vec));
        if let Some(a) = from_align.or_else(|| r.actions.clone()) {
            out.insert((r.set.clone(), r.id.clone()), a);
        }
    }
    out
}

fn fit_section(
    run: &Path,
    m: &Result<StageManifest, String>,
    records: &[ClipRecord],
    labels: &BTreeMap<(String, String), ClipLabels>,
    recorded: &BTreeMap<(String, String), Vec<Vec<f32>>>,
) -> Section<FitFigures> {
    let m = match m {
        Ok(m) => m,
        Err(note) => return Section::Missing(note.clone()),
    };
    let fit_dir = run.join("fit");
    let (log_file, log) = super::fitlog::find_log(&fit_dir);
    let log_columns = log
        .as_ref()
        .map(|l| {
            l.columns
                .iter()
                .enumerate()
                .map(|(i, name)| LogSeries {
                    name: name.clone(),
                    last: l.rows.iter().rev().map(|r| r[i]).find(|v| v.is_finite()),
                })
                .collect()
        })
        .unwrap_or_default();
    let metrics = crate::store::read_json::<serde_json::Value>(&fit_dir.join("metrics.json")).ok();
    let comparison = super::fitlog::comparison_rows(metrics.as_ref().unwrap_or(&m.summary));
    let eval_truth_used = [metrics.as_ref(), Some(&m.summary)]
        .into_iter()
        .flatten()
        .find_map(|v| {
            v.get("eval_truth_used")
                .or_else(|| v.get("truth_used"))
                .and_then(|b| b.as_bool())
        });
    let dims = records
        .iter()
        .find(|r| r.labelled && !r.action_dims.is_empty())
        .map(|r| r.action_dims.clone())
        .unwrap_or_default();
    Section::Ok(FitFigures {
        log_file,
        log_rows: log.as_ref().map_or(0, |l| l.rows.len() as u64),
        log_columns,
        comparison,
        eval_truth_used,
        holdout: holdout_dims(&dims, labels, recorded),
        summary: m.summary.clone(),
    })
}

/// (estimated, recorded) pairs per dimension on holdout clips.
pub fn holdout_pairs(
    ndims: usize,
    labels: &BTreeMap<(String, String), ClipLabels>,
    recorded: &BTreeMap<(String, String), Vec<Vec<f32>>>,
) -> Vec<Vec<(f64, f64)>> {
    let mut out = vec![Vec::new(); ndims];
    for (key, l) in labels
        .iter()
        .filter(|(_, l)| l.split == crate::label::model::Split::Holdout)
    {
        let Some(rec) = recorded.get(key) else {
            continue;
        };
        for (est, act) in l.action_est.iter().zip(rec) {
            for d in 0..ndims.min(est.len()).min(act.len()) {
                out[d].push((act[d] as f64, est[d] as f64));
            }
        }
    }
    out
}

fn holdout_dims(
    dims: &[String],
    labels: &BTreeMap<(String, String), ClipLabels>,
    recorded: &BTreeMap<(String, String), Vec<Vec<f32>>>,
) -> Vec<HoldoutDim> {
    holdout_pairs(dims.len(), labels, recorded)
        .iter()
        .zip(dims)
        .map(|(pairs, dim)| {
            let n = pairs.len();
            let (r2, mae) = if n == 0 {
                (None, None)
            } else {
                let mean = pairs.iter().map(|p| p.0).sum::<f64>() / n as f64;
                let ss_tot: f64 = pairs.iter().map(|p| (p.0 - mean).powi(2)).sum();
                let ss_res: f64 = pairs.iter().map(|p| (p.0 - p.1).powi(2)).sum();
                let mae = pairs.iter().map(|p| (p.0 - p.1).abs()).sum::<f64>() / n as f64;
                ((ss_tot > 0.0).then(|| 1.0 - ss_res / ss_tot), Some(mae))
            };
            HoldoutDim {
                dim: dim.clone(),
                n: n as u64,
                r2,
                mae,
            }
        })
        .collect()
}

fn label_section(
    run: &Path,
    m: &Result<StageManifest, String>,
    records: &[ClipRecord],
) -> (
    Section<LabelFigures>,
    BTreeMap<(String, String), ClipLabels>,
) {
    let mut labels = BTreeMap::new();
    if let Err(note) = m {
        return (Section::Missing(note.clone()), labels);
    }
    let dir = run.join("label");
    let calib: CalibrationFigures = match crate::store::read_json(&dir.join(CALIBRATION_FILE)) {
        Ok(c) => c,
        Err(e) => {
            return (
                Section::Missing(format!("{}: {e}", dir.join(CALIBRATION_FILE).display())),
                labels,
            );
        }
    };
    let codes: Option<CodesTable> = crate::store::read_json(&dir.join(CODES_FILE)).ok();
    let mut unreadable = Vec::new();
    for r in records {
        match ClipLabels::read(&dir, &r.set, &r.id) {
            Ok(l) => {
                labels.insert((r.set.clone(), r.id.clone()), l);
            }
            Err(e) => unreadable.push(format!(
                "{}: {e}",
                ClipLabels::path(&dir, &r.set, &r.id).display()
            )),
        }
    }
    let mut sets: BTreeMap<String, (LabelSet, f64, u64)> = BTreeMap::new();
    let mut ranked = Vec::new();
    for l in labels.values() {
        let entry = sets.entry(l.set.clone()).or_insert_with(|| {
            (
                LabelSet {
                    set: l.set.clone(),
                    labelled: l.labelled,
                    clips: 0,
                    transitions: 0,
                    mean_confidence: None,
                    ood_share: None,
                    confidence_hist: vec![0; 10],
                    beyond_calib_range: 0,
                },
                0.0,
                0,
            )
        });
        entry.0.clips += 1;
        entry.0.transitions += l.confidence.len() as u64;
        let size = motion_range::motion_size(
            l.action_est.iter().map(Vec::as_slice),
            calib.calib_motion_range.len(),
        );
        if !motion_range::beyond(&size, &calib.calib_motion_range).is_empty() {
            entry.0.beyond_calib_range += 1;
        }
        for &c in &l.confidence {
            entry.1 += c as f64;
            entry.0.confidence_hist[((c.clamp(0.0, 1.0) * 10.0) as usize).min(9)] += 1;
        }
        let ood = l.ood.iter().filter(|&&o| o).count() as u64;
        entry.2 += ood;
        if !l.labelled && !l.confidence.is_empty() {
            let n = l.confidence.len() as f64;
            ranked.push(ClipConfidence {
                set: l.set.clone(),
                id: l.id.clone(),
                transitions: l.confidence.len() as u64,
                mean_confidence: l.confidence.iter().map(|&c| c as f64).sum::<f64>() / n,
                ood_share: ood as f64 / n,
            });
        }
    }
    let sets = sets
        .into_values()
        .map(|(mut s, sum, ood)| {
            if s.transitions > 0 {
                s.mean_confidence = Some(sum / s.transitions as f64);
                s.ood_share = Some(ood as f64 / s.transitions as f64);
            }
            s
        })
        .collect();
    ranked.sort_by(|a, b| {
        a.mean_confidence
            .total_cmp(&b.mean_confidence)
            .then((&a.set, &a.id).cmp(&(&b.set, &b.id)))
    });
    ranked.truncate(LOWEST_CLIPS);
    let codes_use: Vec<CodeUse> = codes
        .as_ref()
        .map(|t| {
            t.codes
                .iter()
                .map(|c| CodeUse {
                    code: c.code,
                    count: c.count,
                    count_labelled: c.count_labelled,
                    mean_action: c.mean_action.clone(),
                })
                .collect()
        })
        .unwrap_or_default();
    let mut top: Vec<&CodeUse> = codes_use.iter().filter(|c| c.count > 0).collect();
    top.sort_by(|a, b| b.count.cmp(&a.count).then(a.code.cmp(&b.code)));
    let code_examples = top
        .iter()
        .take(TOP_CODES)
        .map(|c| {
            (
                c.code,
                examples(&labels, |l, k| l.code[k] == c.code, CODE_EXAMPLES),
            )
        })
        .collect();
    let contact_sheet = examples(&labels, |l, _| !l.labelled, CONTACT_TILES);
    let dims = calib.standardisation.dims.clone();
    let figures = LabelFigures {
        dims,
        alpha: calib.alpha,
        nominal_coverage: 1.0 - calib.alpha,
        coverage: calib
            .dims
            .iter()
            .map(|d| CoverageDim {
                dim: d.dim.clone(),
                holdout: d.holdout_coverage,
                calib: d.calib_coverage,
                quantile: Some(d.quantile.q).filter(|q| q.is_finite()),
                holdout_in_range: d.holdout_coverage_in_range,
            })
            .collect(),
        confidence_method: calib.confidence_method.clone(),
        reliability: calib.holdout_reliability.clone(),
        holdout_ood_share: calib.holdout_ood_rate,
        calib_motion_range: calib.calib_motion_range.clone(),
        holdout_beyond_range: calib.holdout_beyond_range.clone(),
        sets,
        codes: codes_use,
        code_examples,
        contact_sheet,
        lowest_confidence: ranked,
        unreadable,
    };
    (Section::Ok(figures), labels)
}

/// Up to `n` transitions matching `pick`, spread over the clips: round-robin,
/// taking from each clip the matching transitions nearest its middle first.
fn examples(
    labels: &BTreeMap<(String, String), ClipLabels>,
    pick: impl Fn(&ClipLabels, usize) -> bool,
    n: usize,
) -> Vec<FrameRef> {
    let mut per_clip: Vec<(&ClipLabels, Vec<usize>)> = labels
        .values()
        .map(|l| {
            let len = l
                .confidence
                .len()
                .min(l.code.len())
                .min(l.action_est.len())
                .min(l.ood.len());
            let mid = len / 2;
            let mut ks: Vec<usize> = (0..len).filter(|&k| pick(l, k)).collect();
            ks.sort_by_key(|&k| (k as i64 - mid as i64).abs());
            (l, ks)
        })
        .filter(|(_, ks)| !ks.is_empty())
        .collect();
    let mut out = Vec::new();
    let mut round = 0;
    while out.len() < n && per_clip.iter().any(|(_, ks)| ks.len() > round) {
        for (l, ks) in per_clip.iter_mut() {
            if out.len() >= n {
                break;
            }
            if let Some(&k) = ks.get(round) {
                out.push(FrameRef {
                    set: l.set.clone(),
                    id: l.id.clone(),
                    frame: k as u32,
                    action_est: l.action_est[k].iter().map(|&v| short(v)).collect(),
                    confidence: short(l.confidence[k]),
                    ood: l.ood[k],
                });
            }
        }
        round += 1;
    }
    out
}

/// An `f32` as the `f64` of its shortest decimal form (`0.91`, not
/// `0.9099999666213989`), so JSON shows and re-reads it exactly.
fn short(v: f32) -> f64 {
    if v.is_finite() {
        v.to_string().parse().unwrap_or(v as f64)
    } else {
        v as f64
    }
}

fn shard_section(
    run: &Path,
    m: &Result<StageManifest, String>,
    verify: bool,
) -> Section<ShardFigures> {
    let m = match m {
        Ok(m) => m,
        Err(note) => return Section::Missing(note.clone()),
    };
    super::shards::figures(&run.join("shard"), &m.summary, verify)
}
