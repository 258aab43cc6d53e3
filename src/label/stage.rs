//! The label stage's two passes.
//!
//! The model runs where it was trained and where the fit stage evaluates it:
//! on the align stage's model-time frame pairs ([`AlignedRun`]; resampled in
//! time for a speed-normalised set, colour-normalised). Per-model-transition
//! outputs are then mapped onto the clip's decode transitions, the rows of
//! every output ([`decode_grid`]): `action_est` with the `[actions]` rules
//! ([`AlignedClip::to_decode_grid`]), the uncalibrated std as variances
//! ([`AlignedClip::to_decode_grid_std`]), the ensemble disagreement as a
//! variance with the `mean` rule and the posterior mean with the `mean` rule
//! per latent dimension. Calibration, confidence, ood and the nearest code
//! are applied on the decode grid. A clip whose view is the identity (speed
//! factor 1) skips the mapping.
//!
//! 1. Fit (skipped when `state.json` has the stage key): infer every
//!    transition of the `calib` and `holdout` clips and a seeded sample of the
//!    model-time train transitions (every unlabelled clip is train); fit the
//!    per-dimension conformal quantiles, the confidence map and the ood
//!    threshold on calib against the recorded decode-grid actions, measure them
//!    on holdout, fit k-means on the sampled model-time posterior means.
//! 2. Label: every clip in (set, id) order, resuming at the first clip whose
//!    labels file is missing or was made under another key; then the codes
//!    table and the calibration figures.

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

use serde::Serialize;

use super::conformal::{self, ConformalQuantile};
use super::kmeans::{KMeans, KMeansSettings};
use super::model::{FitOutputs, Split, Standardisation, TransitionModel};
use super::motion_range;
use super::output::{
    CALIBRATION_FILE, CODES_FILE, CalibrationFigures, ClipLabels, CodeRow, CodesTable,
    DimCalibration, LabelState, STATE_FILE, decoded_clips, png_frames_path,
};
use super::reliability::{self, Isotonic, METHOD};
use super::stats::{normal_quantile, prob_within};
use super::{LabelError, LabelOptions, RELIABILITY_BINS};
use crate::actions::MapRule;
use crate::align::{AlignError, AlignedClip, AlignedRun};
use crate::model::Rng;
use crate::store::ClipRecord;
use crate::store::png_frames::{PngFrameReader, write_png_frames};

/// One transition's model outputs in action units.
#[derive(Debug, Clone)]
pub struct RawTransition {
    /// Ensemble mean per dimension.
    pub est: Vec<f64>,
    /// sqrt(aleatoric + epistemic variance) per dimension, before calibration.
    pub std: Vec<f64>,
    /// RMS over dimensions of the heads' spread, standardised units.
    pub disagreement: f64,
    /// Posterior mean.
    pub latent: Vec<f64>,
}

/// Settings of one label run, independent of the runner.
pub struct LabelJob<'a> {
    /// The run folder (reads `decode/`).
    pub run_dir: &'a Path,
    /// Where outputs go (`RUN/label/`).
    pub label_dir: &'a Path,
    /// Stage key stamped on every output.
    pub key: &'a str,
    /// Settings.
    pub opts: &'a LabelOptions,
    /// Spec seed.
    pub seed: u64,
    /// Worker threads.
    pub threads: usize,
    /// Also PNG-encode every decoded frame of each clip into
    /// `clips/<set>/<id>.png-frames` for the shard stage (`[shard] image = "png"`).
    pub frame_pngs: bool,
}

/// Confidence and ood figures of one clip set.
#[derive(Debug, Clone, Default, Serialize, serde::Deserialize, PartialEq)]
pub struct SetSummary {
    /// Clips.
    pub clips: u64,
    /// Transitions.
    pub transitions: u64,
    /// Mean confidence.
    pub mean_confidence: f64,
    /// Fraction flagged ood.
    pub ood_rate: f64,
    /// Clips that move more than every calib clip in some dimension (their
    /// intervals may cover less than nominal; see [`super::motion_range`]).
    #[serde(default)]
    pub beyond_calib_range: u64,
}

/// What a label run did.
#[derive(Debug, Clone, Serialize)]
pub struct LabelSummary {
    /// Clips labelled now.
    pub clips_labelled: u64,
    /// Clips whose labels were reused.
    pub clips_reused: u64,
    /// Transitions in all.
    pub transitions: u64,
    /// Model-time transitions inferred now (including the fit pass).
    pub transitions_inferred: u64,
    /// Whether the fitted state was reused.
    pub state_reused: bool,
    /// Per set.
    pub sets: BTreeMap<String, SetSummary>,
    /// The calibration figures.
    pub calibration: CalibrationFigures,
    /// Codes used (count > 0) out of k.
    pub codes_used: u64,
    /// Seconds in the fit pass and in the label pass.
    pub seconds: (f64, f64),
}

fn io_at(path: &Path) -> impl FnOnce(std::io::Error) -> LabelError + '_ {
    move |source| LabelError::Io {
        path: path.to_path_buf(),
        source,
    }
}

struct Clip<'v> {
    rec: ClipRecord,
    split: Split,
    /// The clip as the model sees it.
    view: &'v AlignedClip,
}

impl Clip<'_> {
    /// Decode transitions (the rows of the clip's labels).
    fn transitions(&self) -> usize {
        self.rec.frames.saturating_sub(1) as usize
    }
    /// Model-time transitions (the pairs the model is run on).
    fn model_transitions(&self) -> usize {
        self.view.len().saturating_sub(1)
    }
}

/// Runs the label stage with the given fit outputs on the aligned view of the
/// run (the one the fit stage trained on: open it with
/// [`AlignedRun::open_or_passthrough`]).
pub fn label_run(
    job: &LabelJob<'_>,
    fit: &FitOutputs,
    view: &AlignedRun,
) -> Result<LabelSummary, LabelError> {
    label_run_part(job, fit, view, None)
}

/// Clip filter of one part of a partitioned run: `(set, id)` -> whether the part labels it.
pub type PartFilter<'a> = &'a (dyn Fn(&str, &str) -> bool + Sync);

/// Like [`label_run`], but with `part` set, labels only the clips it accepts
/// (the fitted state still comes from every clip, so it equals a whole run's)
/// and leaves the run-wide codes table and calibration files to the merge.
pub fn label_run_part(
    job: &LabelJob<'_>,
    fit: &FitOutputs,
    view: &AlignedRun,
    part: Option<PartFilter<'_>>,
) -> Result<LabelSummary, LabelError> {
    let decode_dir = job.run_dir.join("decode");
    let records = decoded_clips(job.run_dir).map_err(io_at(&decode_dir))?;
    let views: BTreeMap<(&str, &str), &AlignedClip> = view
        .clips()
        .iter()
        .map(|c| ((c.set(), c.id()), c))
        .collect();
    let clips: Vec<Clip<'_>> = records
        .into_iter()
        .map(|rec| {
            let Some(&clip_view) = views.get(&(rec.set.as_str(), rec.id.as_str())) else {
                return Err(LabelError::NotAligned {
                    path: crate::align::view::alignment_path(job.run_dir),
                    set: rec.set.clone(),
                    id: rec.id.clone(),
                });
            };
            if clip_view.decode_len() != rec.frames as usize {
                return Err(LabelError::FrameCount {
                    path: ClipRecord::frames_path(&decode_dir, &rec.set, &rec.id),
                    record: rec.frames,
                    store: clip_view.decode_len(),
                });
            }
            let split = if rec.labelled {
                *fit.splits
                    .get(&(rec.set.clone(), rec.id.clone()))
                    .unwrap_or(&Split::Train)
            } else {
                Split::Train
            };
            Ok(Clip {
                rec,
                split,
                view: clip_view,
            })
        })
        .collect::<Result<_, _>>()?;
    let pool = crate::util::thread_pool(job.threads);
    pool.install(|| run_passes(job, fit.model.as_ref(), view.rules(), &clips, part))
}

fn run_passes(
    job: &LabelJob<'_>,
    model: &dyn TransitionModel,
    rules: &[MapRule],
    clips: &[Clip<'_>],
    part: Option<PartFilter<'_>>,
) -> Result<LabelSummary, LabelError> {
    let started = std::time::Instant::now();
    let state_path = job.label_dir.join(STATE_FILE);
    let mut inferred = 0u64;
    let existing: Option<LabelState> = crate::store::read_json(&state_path).ok();
    let (state, state_reused) = match existing.filter(|s| s.key == job.key) {
        Some(s) => (s, true),
        None => {
            let (s, n) = fit_state(job, model, rules, clips)?;
            inferred += n;
            crate::store::write_json_atomic(&state_path, &s).map_err(io_at(&state_path))?;
            (s, false)
        }
    };
    let fit_seconds = started.elapsed().as_secs_f64();
    let started = std::time::Instant::now();
    let std = &state.calibration.standardisation;
    let a = std.dims.len();
    let k = state.kmeans.k();
    let mut count = vec![0u64; k];
    let mut count_labelled = vec![0u64; k];
    let mut sum_action = vec![vec![0.0f64; a]; k];
    let mut sets: BTreeMap<String, SetSummary> = BTreeMap::new();
    let (mut labelled_now, mut reused, mut transitions) = (0u64, 0u64, 0u64);
    for clip in clips {
        if part.is_some_and(|f| !f(&clip.rec.set, &clip.rec.id)) {
            continue;
        }
        let path = ClipLabels::path(job.label_dir, &clip.rec.set, &clip.rec.id);
        let pngs = png_frames_path(job.label_dir, &clip.rec.set, &clip.rec.id);
        let old: Option<ClipLabels> = crate::store::read_json(&path).ok();
        let pngs_ok = || {
            !job.frame_pngs
                || PngFrameReader::open(&pngs).is_ok_and(|r| r.len() == clip.rec.frames as usize)
        };
        let labels =
            match old.filter(|l| l.key == job.key && l.frames == clip.rec.frames && pngs_ok()) {
                Some(l) => {
                    reused += 1;
                    l
                }
                None => {
                    // The PNG frame store is encoded and synced while the
                    // clip is inferred; both are done before the labels file
                    // is written, since a clip is done when that exists.
                    let (inferred_clip, pngs_written) = rayon::join(
                        || infer_decode(job, model, rules, clip),
                        || write_clip_pngs(job, clip, &pngs),
                    );
                    let (raw, n) = inferred_clip?;
                    pngs_written?;
                    inferred += n as u64;
                    let l = finish_clip(job, clip, &state, &raw);
                    crate::store::write_json_atomic(&path, &l).map_err(io_at(&path))?;
                    labelled_now += 1;
                    l
                }
            };
        let s = sets.entry(clip.rec.set.clone()).or_default();
        s.clips += 1;
        let size = motion_range::motion_size(labels.action_est.iter().map(Vec::as_slice), a);
        if !motion_range::beyond(&size, &state.calibration.calib_motion_range).is_empty() {
            s.beyond_calib_range += 1;
        }
        for i in 0..labels.code.len() {
            let c = labels.code[i] as usize;
            count[c] += 1;
            if clip.rec.labelled {
                count_labelled[c] += 1;
            }
            for (acc, v) in sum_action[c].iter_mut().zip(&labels.action_est[i]) {
                *acc += *v as f64;
            }
            s.transitions += 1;
            s.mean_confidence += labels.confidence[i] as f64;
            s.ood_rate += if labels.ood[i] { 1.0 } else { 0.0 };
        }
        transitions += labels.code.len() as u64;
    }
    for s in sets.values_mut() {
        let n = (s.transitions as f64).max(1.0);
        s.mean_confidence /= n;
        s.ood_rate /= n;
    }
    let table = CodesTable {
        dims: std.dims.clone(),
        latent_dims: state.kmeans.dim,
        inertia: state.kmeans.inertia,
        fitted_points: state.kmeans_points,
        codes: (0..k)
            .map(|c| CodeRow {
                code: c as u16,
                centroid: state.kmeans.centroids[c].clone(),
                count: count[c],
                count_labelled: count_labelled[c],
                mean_action: if count[c] > 0 {
                    sum_action[c].iter().map(|s| s / count[c] as f64).collect()
                } else {
                    Vec::new()
                },
            })
            .collect(),
    };
    if part.is_none() {
        let codes_path = job.label_dir.join(CODES_FILE);
        crate::store::write_json_atomic(&codes_path, &table).map_err(io_at(&codes_path))?;
        let cal_path = job.label_dir.join(CALIBRATION_FILE);
        crate::store::write_json_atomic(&cal_path, &state.calibration).map_err(io_at(&cal_path))?;
    }
    Ok(LabelSummary {
        clips_labelled: labelled_now,
        clips_reused: reused,
        transitions,
        transitions_inferred: inferred,
        state_reused,
        sets,
        calibration: state.calibration.clone(),
        codes_used: count.iter().filter(|c| **c > 0).count() as u64,
        seconds: (fit_seconds, started.elapsed().as_secs_f64()),
    })
}

/// Every transition of `clip` on the decode grid: inferred on the model-time
/// pairs, then mapped back ([`decode_grid`]); the clip's frame pages are
/// released. Also returns the number of model-time transitions inferred.
fn infer_decode(
    job: &LabelJob<'_>,
    model: &dyn TransitionModel,
    rules: &[MapRule],
    clip: &Clip<'_>,
) -> Result<(Vec<RawTransition>, usize), LabelError> {
    let all: Vec<usize> = (0..clip.model_transitions()).collect();
    let raw = infer_clip(job, model, clip, &all);
    clip.view.release();
    let raw = raw?;
    let n = raw.len();
    Ok((decode_grid(clip.view, rules, raw)?, n))
}

/// Maps one clip's per-model-transition outputs (`len() - 1` rows) onto its
/// decode transitions (`decode_len() - 1` rows): estimates with the action
/// `rules`, standard deviations as variances with the same rules, the
/// disagreement as a variance with the `mean` rule, the posterior mean with
/// the `mean` rule per latent dimension. The identity view returns `raw` as it is.
pub fn decode_grid(
    view: &AlignedClip,
    rules: &[MapRule],
    raw: Vec<RawTransition>,
) -> Result<Vec<RawTransition>, AlignError> {
    if view.is_identity() {
        return Ok(raw);
    }
    let rows = |f: fn(&RawTransition) -> &[f64]| -> Vec<Vec<f32>> {
        raw.iter()
            .map(|r| f(r).iter().map(|v| *v as f32).collect())
            .collect()
    };
    let est = view.to_decode_grid(&rows(|r| &r.est), rules)?;
    let std = view.to_decode_grid_std(&rows(|r| &r.std), rules)?;
    let spread: Vec<f64> = raw.iter().map(|r| r.disagreement).collect();
    let disagreement = spread_to_decode_grid(view, &spread)?;
    let k = raw.first().map_or(0, |r| r.latent.len());
    let latent = view.to_decode_grid(&rows(|r| &r.latent), &vec![MapRule::Mean; k])?;
    let f64s = |r: Vec<f32>| -> Vec<f64> { r.into_iter().map(f64::from).collect() };
    Ok(est
        .into_iter()
        .zip(std)
        .zip(disagreement)
        .zip(latent)
        .map(|(((est, std), disagreement), latent)| RawTransition {
            est: f64s(est),
            std: f64s(std),
            disagreement,
            latent: f64s(latent),
        })
        .collect())
}

/// Maps a per-model-transition spread (a standard deviation, one value per
/// transition) onto the decode grid as a variance with the `mean` rule.
fn spread_to_decode_grid(view: &AlignedClip, spread: &[f64]) -> Result<Vec<f64>, AlignError> {
    let rows: Vec<Vec<f32>> = spread.iter().map(|s| vec![*s as f32]).collect();
    Ok(view
        .to_decode_grid_std(&rows, &[MapRule::Mean])?
        .into_iter()
        .map(|r| f64::from(r[0]))
        .collect())
}

/// Model-time frame `i` of `view` (resampled, colour-normalised).
fn model_frame(view: &AlignedClip, i: usize) -> Result<Vec<u8>, AlignError> {
    let mut buf = vec![0u8; view.frame_bytes()];
    view.frame(i, &mut buf)?;
    Ok(buf)
}

/// Infers model-time transitions `which` (sorted) of `clip` in batches.
fn infer_clip(
    job: &LabelJob<'_>,
    model: &dyn TransitionModel,
    clip: &Clip<'_>,
    which: &[usize],
) -> Result<Vec<RawTransition>, LabelError> {
    if which.is_empty() {
        return Ok(Vec::new());
    }
    let mut out = Vec::with_capacity(which.len());
    for chunk in which.chunks(job.opts.batch.max(1) as usize) {
        // Frames t and t + 1 of each transition; a frame that ends one
        // transition and starts the next is read once.
        let mut frames: Vec<Vec<u8>> = Vec::with_capacity(chunk.len() + 1);
        let mut at = Vec::with_capacity(chunk.len());
        let mut last = None;
        for &t in chunk {
            if last != Some(t) {
                frames.push(model_frame(clip.view, t)?);
            }
            frames.push(model_frame(clip.view, t + 1)?);
            last = Some(t + 1);
            at.push(frames.len() - 2);
        }
        let pairs: Vec<(&[u8], &[u8])> = at
            .iter()
            .map(|&j| (&frames[j][..], &frames[j + 1][..]))
            .collect();
        let batch = model.infer(&pairs).map_err(|source| LabelError::Model {
            set: clip.rec.set.clone(),
            id: clip.rec.id.clone(),
            first_transition: chunk[0],
            source,
        })?;
        out.extend(
            raw_transitions(model, &batch, chunk.len()).map_err(|reason| {
                LabelError::ModelOutput {
                    set: clip.rec.set.clone(),
                    id: clip.rec.id.clone(),
                    reason,
                }
            })?,
        );
    }
    Ok(out)
}

/// Turns a model batch (standardised units) into action-unit estimates.
pub fn raw_transitions(
    model: &dyn TransitionModel,
    batch: &super::model::TransitionBatch,
    b: usize,
) -> Result<Vec<RawTransition>, String> {
    let st = model.standardisation();
    let (a, m, k) = (st.dims.len(), model.heads(), model.latent_dims());
    if batch.latent.len() != b * k
        || batch.head_mean.len() != b * m * a
        || batch.head_logvar.len() != b * m * a
    {
        return Err(format!(
            "batch of {b}: got {} latent, {} head mean and {} head log-variance values, expected {}, {} and {}",
            batch.latent.len(),
            batch.head_mean.len(),
            batch.head_logvar.len(),
            b * k,
            b * m * a,
            b * m * a
        ));
    }
    Ok((0..b)
        .map(|i| {
            let mut est = vec![0.0; a];
            let mut std = vec![0.0; a];
            let mut dis = 0.0;
            for d in 0..a {
                let (sd, mu) = (st.std[d], st.mean[d]);
                let heads = (0..m).map(|h| (i * m + h) * a + d);
                let means: Vec<f64> = heads.clone().map(|j| batch.head_mean[j] as f64).collect();
                let mean_s = means.iter().sum::<f64>() / m as f64;
                let alea_s = heads
                    .map(|j| (batch.head_logvar[j] as f64).exp())
                    .sum::<f64>()
                    / m as f64;
                let epi_s = means
                    .iter()
                    .map(|x| (x - mean_s) * (x - mean_s))
                    .sum::<f64>()
                    / m as f64;
                est[d] = mean_s * sd + mu;
                std[d] = ((alea_s + epi_s) * sd * sd).sqrt();
                dis += epi_s;
            }
            RawTransition {
                est,
                std,
                disagreement: (dis / a.max(1) as f64).sqrt(),
                latent: batch.latent[i * k..(i + 1) * k]
                    .iter()
                    .map(|v| *v as f64)
                    .collect(),
            }
        })
        .collect())
}

/// The final labels of one transition under a fitted state.
struct Final {
    est: Vec<f64>,
    std: Vec<f64>,
    raw_conf: f64,
    confidence: f64,
    ood: bool,
}

fn finalise(raw: &RawTransition, cal: &CalibrationFigures, q: &[f64], iso: &Isotonic) -> Final {
    let std: Vec<f64> = raw.std.iter().zip(q).map(|(s, q)| q * s / cal.z).collect();
    let raw_conf: f64 = std
        .iter()
        .zip(&cal.dims)
        .map(|(s, d)| prob_within(d.tolerance, *s))
        .product();
    Final {
        est: raw.est.clone(),
        std,
        raw_conf,
        confidence: iso.apply(raw_conf),
        ood: raw.disagreement > cal.ood_threshold,
    }
}

/// Writes the clip's PNG frame store when the job asks for one.
fn write_clip_pngs(job: &LabelJob<'_>, clip: &Clip, path: &Path) -> Result<(), LabelError> {
    if job.frame_pngs {
        let decode_dir = job.run_dir.join("decode");
        let frames_path = ClipRecord::frames_path(&decode_dir, &clip.rec.set, &clip.rec.id);
        let frames = crate::store::FrameReader::open(&frames_path)?;
        write_png_frames(&frames, path)?;
    }
    Ok(())
}

fn finish_clip(
    job: &LabelJob<'_>,
    clip: &Clip,
    state: &LabelState,
    raw: &[RawTransition],
) -> ClipLabels {
    let q: Vec<f64> = state
        .calibration
        .dims
        .iter()
        .map(|d| d.quantile.q)
        .collect();
    let mut l = ClipLabels {
        id: clip.rec.id.clone(),
        set: clip.rec.set.clone(),
        labelled: clip.rec.labelled,
        split: clip.split,
        key: job.key.to_string(),
        frames: clip.rec.frames,
        action_est: Vec::with_capacity(raw.len()),
        action_std: Vec::with_capacity(raw.len()),
        confidence: Vec::with_capacity(raw.len()),
        ood: Vec::with_capacity(raw.len()),
        code: Vec::with_capacity(raw.len()),
        disagreement: Vec::with_capacity(raw.len()),
    };
    for r in raw {
        let f = finalise(r, &state.calibration, &q, &state.isotonic);
        l.action_est.push(f.est.iter().map(|v| *v as f32).collect());
        l.action_std.push(f.std.iter().map(|v| *v as f32).collect());
        l.confidence.push(f.confidence as f32);
        l.ood.push(f.ood);
        l.code.push(state.kmeans.nearest(&r.latent).0 as u16);
        l.disagreement.push(r.disagreement as f32);
    }
    l
}

/// The clip's recorded actions on the decode grid, as the align stage left
/// them: re-mapped with the estimated clock offset when it estimated one
/// (`offset = "estimate"`), else as decoded.
fn actions_of<'c>(clip: &'c Clip<'_>) -> Result<&'c [Vec<f32>], LabelError> {
    match clip.view.decode_actions() {
        Some(a) if a.len() == clip.transitions() => Ok(a),
        other => Err(LabelError::MissingActions {
            set: clip.rec.set.clone(),
            id: clip.rec.id.clone(),
            rows: other.map_or(0, <[Vec<f32>]>::len),
            transitions: clip.transitions(),
        }),
    }
}

/// Decode-grid outputs, each with the recorded action of its transition.
type Scored = Vec<(RawTransition, Vec<f64>)>;

/// Decode-grid outputs and recorded actions of every transition of `split`
/// clips, each clip's id and row count (in order), and the number of
/// model-time transitions inferred.
fn labelled_split(
    job: &LabelJob<'_>,
    model: &dyn TransitionModel,
    rules: &[MapRule],
    clips: &[Clip<'_>],
    split: Split,
) -> Result<(Scored, Vec<(String, usize)>, u64), LabelError> {
    let mut out = Vec::new();
    let mut rows = Vec::new();
    let mut inferred = 0u64;
    for clip in clips.iter().filter(|c| c.rec.labelled && c.split == split) {
        let actions = actions_of(clip)?;
        let (raw, n) = infer_decode(job, model, rules, clip)?;
        inferred += n as u64;
        rows.push((clip.rec.id.clone(), raw.len()));
        out.extend(
            raw.into_iter()
                .zip(actions)
                .map(|(r, a)| (r, a.iter().map(|v| *v as f64).collect())),
        );
    }
    Ok((out, rows, inferred))
}

/// Each clip's motion size ([`motion_range::motion_size`]) from its rows of
/// `scored`, in order, measured on the estimates as the labels files store
/// them (`f32`), so that a clip's size is the same here and when the label
/// pass reads it back.
fn clip_sizes(scored: &Scored, rows: &[(String, usize)], dims: usize) -> Vec<Vec<f64>> {
    let mut start = 0;
    rows.iter()
        .map(|(_, n)| {
            let stored: Vec<Vec<f32>> = scored[start..start + n]
                .iter()
                .map(|(r, _)| r.est.iter().map(|v| *v as f32).collect())
                .collect();
            let size = motion_range::motion_size(stored.iter().map(Vec::as_slice), dims);
            start += n;
            size
        })
        .collect()
}

/// Fits quantiles, the confidence map, the ood threshold and the codes.
fn fit_state(
    job: &LabelJob<'_>,
    model: &dyn TransitionModel,
    rules: &[MapRule],
    clips: &[Clip<'_>],
) -> Result<(LabelState, u64), LabelError> {
    let opts = job.opts;
    let st: Standardisation = model.standardisation().clone();
    let a = st.dims.len();
    let (calib, calib_rows, calib_inferred) =
        labelled_split(job, model, rules, clips, Split::Calib)?;
    let needed = conformal::min_points(opts.alpha);
    if calib.len() < needed {
        return Err(LabelError::TooFewCalib {
            transitions: calib.len(),
            needed,
            alpha: opts.alpha,
        });
    }
    let (holdout, holdout_rows, holdout_inferred) =
        labelled_split(job, model, rules, clips, Split::Holdout)?;
    let motion_range = motion_range::range_of(&clip_sizes(&calib, &calib_rows, a), a);
    // Holdout rows of clips inside the calib clips' motion range.
    let mut in_range = Vec::with_capacity(holdout.len());
    let mut holdout_beyond_range = Vec::new();
    for ((id, n), size) in holdout_rows
        .iter()
        .zip(clip_sizes(&holdout, &holdout_rows, a))
    {
        let inside = motion_range::beyond(&size, &motion_range).is_empty();
        if !inside {
            holdout_beyond_range.push(id.clone());
        }
        in_range.extend(std::iter::repeat_n(inside, *n));
    }
    let z = normal_quantile(1.0 - opts.alpha / 2.0);
    let quantiles: Vec<ConformalQuantile> = (0..a)
        .map(|d| {
            let scores: Vec<f64> = calib
                .iter()
                .map(|(r, act)| conformal::score(act[d], r.est[d], r.std[d]))
                .collect();
            conformal::quantile(&scores, opts.alpha)
        })
        .collect();
    let tolerance: Vec<f64> = st.std.iter().map(|s| opts.tolerance * s).collect();
    let mut cal = CalibrationFigures {
        alpha: opts.alpha,
        z,
        tolerance_fraction: opts.tolerance,
        standardisation: st.clone(),
        dims: (0..a)
            .map(|d| DimCalibration {
                dim: st.dims[d].clone(),
                quantile: quantiles[d].clone(),
                tolerance: tolerance[d],
                holdout_coverage: None,
                calib_coverage: 0.0,
                holdout_mean_std: None,
                holdout_coverage_in_range: None,
            })
            .collect(),
        calib_transitions: calib.len() as u64,
        holdout_transitions: holdout.len() as u64,
        confidence_method: METHOD.to_string(),
        holdout_reliability: Default::default(),
        holdout_reliability_raw: Default::default(),
        ood_threshold: calib
            .iter()
            .map(|(r, _)| r.disagreement)
            .fold(0.0, f64::max),
        holdout_ood_rate: None,
        calib_motion_range: motion_range,
        holdout_beyond_range,
    };
    let q: Vec<f64> = quantiles.iter().map(|x| x.q).collect();
    let within = |f: &Final, act: &[f64]| (0..a).all(|d| (act[d] - f.est[d]).abs() <= tolerance[d]);
    let covered = |f: &Final, act: &[f64], d: usize| {
        (act[d] - f.est[d]).abs() <= z * f.std[d] * (1.0 + 1e-12)
    };
    // Confidence map on calib.
    let identity = Isotonic::default();
    let calib_final: Vec<Final> = calib
        .iter()
        .map(|(r, _)| finalise(r, &cal, &q, &identity))
        .collect();
    let calib_hits: Vec<bool> = calib_final
        .iter()
        .zip(&calib)
        .map(|(f, (_, act))| within(f, act))
        .collect();
    let iso = Isotonic::fit(
        &calib_final.iter().map(|f| f.raw_conf).collect::<Vec<_>>(),
        &calib_hits,
    );
    for d in 0..a {
        let c = calib_final
            .iter()
            .zip(&calib)
            .filter(|(f, (_, act))| covered(f, act, d))
            .count();
        cal.dims[d].calib_coverage = c as f64 / calib.len() as f64;
    }
    // Holdout figures.
    if !holdout.is_empty() {
        let n = holdout.len() as f64;
        let fin: Vec<Final> = holdout
            .iter()
            .map(|(r, _)| finalise(r, &cal, &q, &iso))
            .collect();
        let hits: Vec<bool> = fin
            .iter()
            .zip(&holdout)
            .map(|(f, (_, act))| within(f, act))
            .collect();
        for d in 0..a {
            let c = fin
                .iter()
                .zip(&holdout)
                .filter(|(f, (_, act))| covered(f, act, d))
                .count();
            cal.dims[d].holdout_coverage = Some(c as f64 / n);
            let (mut hits_in, mut rows_in) = (0usize, 0usize);
            for ((f, (_, act)), inside) in fin.iter().zip(&holdout).zip(&in_range) {
                if *inside {
                    rows_in += 1;
                    hits_in += covered(f, act, d) as usize;
                }
            }
            cal.dims[d].holdout_coverage_in_range =
                (rows_in > 0).then(|| hits_in as f64 / rows_in as f64);
            cal.dims[d].holdout_mean_std = Some(fin.iter().map(|f| f.std[d]).sum::<f64>() / n);
        }
        let conf: Vec<f64> = fin.iter().map(|f| f.confidence).collect();
        let raw_conf: Vec<f64> = fin.iter().map(|f| f.raw_conf).collect();
        cal.holdout_reliability = reliability::reliability(&conf, &hits, RELIABILITY_BINS);
        cal.holdout_reliability_raw = reliability::reliability(&raw_conf, &hits, RELIABILITY_BINS);
        cal.holdout_ood_rate = Some(fin.iter().filter(|f| f.ood).count() as f64 / n);
    }
    // Codes on a seeded sample of the model-time train transitions.
    let train: Vec<&Clip<'_>> = clips.iter().filter(|c| c.split == Split::Train).collect();
    let total: u64 = train.iter().map(|c| c.model_transitions() as u64).sum();
    let sample = sample_indices(total, opts.kmeans_sample as u64, job.seed);
    let mut latents = Vec::with_capacity(sample.len() * model.latent_dims());
    let mut offset = 0u64;
    let mut it = sample.iter().peekable();
    for clip in &train {
        let n = clip.model_transitions() as u64;
        let mut which = Vec::new();
        while let Some(&&g) = it.peek() {
            if g >= offset + n {
                break;
            }
            which.push((g - offset) as usize);
            it.next();
        }
        offset += n;
        let raw = infer_clip(job, model, clip, &which);
        clip.view.release();
        for r in raw? {
            latents.extend(r.latent);
        }
    }
    let kmeans = KMeans::fit(
        &latents,
        model.latent_dims(),
        KMeansSettings {
            k: opts.codes as usize,
            restarts: opts.kmeans_restarts as usize,
            max_iterations: opts.kmeans_iterations as usize,
            seed: job.seed,
        },
    )?;
    let inferred = calib_inferred + holdout_inferred + sample.len() as u64;
    Ok((
        LabelState {
            key: job.key.to_string(),
            calibration: cal,
            isotonic: iso,
            kmeans,
            kmeans_points: sample.len() as u64,
            train_transitions: total,
        },
        inferred,
    ))
}

/// `min(m, n)` distinct indices of `0..n`, sorted: all of them when `n <= m`,
/// else a seeded uniform sample (Floyd's algorithm).
pub fn sample_indices(n: u64, m: u64, seed: u64) -> Vec<u64> {
    if n <= m {
        return (0..n).collect();
    }
    let mut rng = Rng::for_name(seed, "label.kmeans.sample");
    let mut chosen = BTreeSet::new();
    for j in (n - m)..n {
        let t = rng.below(j + 1);
        if !chosen.insert(t) {
            chosen.insert(j);
        }
    }
    chosen.into_iter().collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sample_is_distinct_sorted_and_seeded() {
        let s = sample_indices(1000, 100, 3);
        assert_eq!(s.len(), 100);
        assert!(s.windows(2).all(|w| w[0] < w[1]));
        assert_eq!(s, sample_indices(1000, 100, 3));
        assert_ne!(s, sample_indices(1000, 100, 4));
        assert_eq!(sample_indices(5, 100, 3), vec![0, 1, 2, 3, 4]);
    }
}
