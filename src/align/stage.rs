//! The align stage proper: offsets, motion rates and speed factors, colour statistics,
//! the gap figure before and after, `RUN/align/alignment.json` and the manifest summary.

use std::path::Path;

use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use super::color::{HistogramAccumulator, LabAccumulator, LabHistogram, LabStats, LabTransform};
use super::gap::{FEATURES, frame_features, gap};
use super::motion::{ClipMotion, clip_motion, difference_energy, luma, median};
use super::offset::{OffsetEstimate, estimate_offset};
use super::view::{AlignedRun, Alignment, alignment_path, identity_alignment, list_decoded};
use super::{AlignError, AlignOptions, Photometric, Speed};
use crate::actions::{map_to_frames, read_sidecar};
use crate::spec::{ActionsOptions, Offset};
use crate::store::{
    ClipRecord, ClipStatus, FrameReader, FrameWriter, StageManifest, write_json_atomic,
};

/// File name of the alignment inside `RUN/align/`.
pub const ALIGNMENT_FILE: &str = "alignment.json";
/// Frame pairs measured per clip for its motion rate.
pub const MOTION_PAIRS: usize = 200;
/// Frames read per clip for per-clip colour statistics.
pub const CLIP_STATS_FRAMES: usize = 200;
/// What the gap figure measures (recorded in the summary).
pub const GAP_METHOD: &str = "squared Frechet distance between Gaussian fits of 17 per-frame features: CIELAB mean per 2x2 quadrant, CIELAB std, mean |grad L*| at full and half resolution";

/// One set's figures.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SetSummary {
    /// Set name.
    pub name: String,
    /// Whether labelled.
    pub labelled: bool,
    /// Clips.
    pub clips: u32,
    /// Decoded frames.
    pub frames: u64,
    /// Model-time frames.
    pub model_frames: u64,
    /// Pooled median pair motion, pixels per decode frame.
    pub motion_rate_before: Option<f64>,
    /// The same measured on the model-time frames.
    pub motion_rate_after: Option<f64>,
    /// Model frames per decode frame interval.
    pub speed_factor: f64,
    /// CIELAB statistics of sampled frames before and after.
    pub lab_before: Option<LabStats>,
    /// After alignment.
    pub lab_after: Option<LabStats>,
    /// The set-level colour map (`photometric = "per-set"`).
    pub photometric: Option<LabTransform>,
    /// CIELAB histograms before.
    pub histogram_before: LabHistogram,
    /// CIELAB histograms after.
    pub histogram_after: LabHistogram,
    /// Gap figure against the pooled labelled frames, before (unlabelled sets only).
    pub gap_before: Option<f64>,
    /// After.
    pub gap_after: Option<f64>,
}

/// One labelled clip's clock offset.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ClipOffset {
    /// Set.
    pub set: String,
    /// Clip id.
    pub id: String,
    /// The estimate.
    #[serde(flatten)]
    pub estimate: OffsetEstimate,
}

/// The stage summary written into the manifest.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AlignSummary {
    /// What the gap figure is.
    pub gap_method: String,
    /// Pooled unlabelled vs pooled labelled, before.
    pub gap_before: f64,
    /// After.
    pub gap_after: f64,
    /// Pooled motion rate of the labelled domain (pixels per frame).
    pub labelled_motion_rate: Option<f64>,
    /// Of the unlabelled domain.
    pub unlabelled_motion_rate: Option<f64>,
    /// `unlabelled / labelled`.
    pub motion_ratio: Option<f64>,
    /// Which domain was resampled (`labelled`, `unlabelled` or none).
    pub resampled: Option<String>,
    /// The settings.
    pub options: AlignOptions,
    /// Per set.
    pub sets: Vec<SetSummary>,
    /// Per labelled clip (only with `offset = "estimate"`).
    pub offsets: Vec<ClipOffset>,
}

/// Runs the align stage of a run (see [`align_run`]) and builds its manifest.
pub fn run_stage(ctx: &crate::runner::StageContext<'_>) -> Result<StageManifest, AlignError> {
    let (alignment, summary) = align_run(
        &ctx.run_dir,
        &ctx.spec.align,
        &ctx.spec.actions,
        ctx.threads,
    )?;
    let mut m = StageManifest::default();
    m.counts
        .insert("clips".into(), alignment.clips.len() as u64);
    m.counts.insert(
        "frames".into(),
        alignment.clips.iter().map(|c| u64::from(c.frames)).sum(),
    );
    m.counts.insert(
        "model_frames".into(),
        summary.sets.iter().map(|s| s.model_frames).sum(),
    );
    let flagged = summary
        .offsets
        .iter()
        .filter(|o| !o.estimate.trusted)
        .count();
    m.counts
        .insert("offsets_estimated".into(), summary.offsets.len() as u64);
    m.counts.insert("offsets_untrusted".into(), flagged as u64);
    m.clips = alignment
        .clips
        .iter()
        .map(|c| ClipStatus {
            id: c.id.clone(),
            set: c.set.clone(),
            status: "ok".into(),
            reason: c.offset.filter(|o| !o.trusted).map(|o| {
                format!(
                    "clock offset not trusted (best correlation {:.3} at {:+.3} s), offset 0 kept",
                    o.correlation, o.estimated_s
                )
            }),
        })
        .collect();
    m.summary = serde_json::to_value(&summary).unwrap_or_default();
    Ok(m)
}

struct Clip {
    rec: ClipRecord,
    frames: FrameReader,
}

/// Evenly spread `(clip, frame)` picks over clips of the given lengths, at most `take`.
fn spread(lengths: &[(usize, usize)], take: usize) -> Vec<(usize, usize)> {
    let total: usize = lengths.iter().map(|l| l.1).sum();
    let take = take.min(total);
    let mut out = Vec::with_capacity(take);
    for j in 0..take {
        let mut g = j * total / take.max(1);
        for &(clip, len) in lengths {
            if g < len {
                out.push((clip, g));
                break;
            }
            g -= len;
        }
    }
    out
}

/// Aligns the decoded clips of `run_dir`: writes `RUN/align/alignment.json` (and model-time
/// frames when asked) and returns the alignment and the summary.
pub fn align_run(
    run_dir: &Path,
    opts: &AlignOptions,
    actions: &ActionsOptions,
    threads: usize,
) -> Result<(Alignment, AlignSummary), AlignError> {
    let records = list_decoded(run_dir)?;
    let mut alignment = identity_alignment(&records, actions)?;
    alignment.resample = opts.resample;
    let decode_dir = run_dir.join("decode");
    let clips: Vec<Clip> = records
        .into_iter()
        .map(|rec| {
            let frames =
                FrameReader::open(&ClipRecord::frames_path(&decode_dir, &rec.set, &rec.id))?;
            Ok(Clip { rec, frames })
        })
        .collect::<Result<_, AlignError>>()?;
    let (w, h) = (alignment.width as usize, alignment.height as usize);
    let fps = alignment.fps;
    let rules = alignment.rules.clone();
    let pool = crate::util::thread_pool(threads);

    // 1. Clock offsets.
    let estimate = actions.offset == Offset::Estimate && !rules.is_empty();
    let offsets: Vec<Option<(OffsetEstimate, Vec<Vec<f32>>)>> = pool.install(|| {
        clips
            .par_iter()
            .map(|c| {
                if !estimate || !c.rec.labelled || c.frames.len() < 3 {
                    return Ok(None);
                }
                let Some(side) = &c.rec.sidecar else {
                    return Ok(None);
                };
                let wrap = |source| AlignError::Actions {
                    set: c.rec.set.clone(),
                    id: c.rec.id.clone(),
                    source: Box::new(source),
                };
                let sidecar = read_sidecar(side).map_err(wrap)?;
                let energy = motion_energy(&c.frames);
                let n = c.frames.len() as u32;
                let est = estimate_offset(
                    &energy,
                    &sidecar,
                    &rules,
                    fps,
                    n,
                    actions.offset_window_s,
                    actions.offset_min_correlation,
                )
                .map_err(wrap)?;
                let acts = map_to_frames(&sidecar, &rules, fps, n, est.offset_s).map_err(wrap)?;
                Ok(Some((est, acts)))
            })
            .collect::<Result<_, AlignError>>()
    })?;

    // 2. Motion rates.
    let motions: Vec<ClipMotion> = pool.install(|| {
        clips
            .par_iter()
            .map(|c| {
                clip_motion(c.frames.len(), w, h, MOTION_PAIRS, |i| {
                    c.frames.frame(i).to_vec()
                })
            })
            .collect()
    });
    let mut set_names: Vec<(String, bool)> = clips
        .iter()
        .map(|c| (c.rec.set.clone(), c.rec.labelled))
        .collect();
    set_names.dedup();
    let pooled = |filter: &dyn Fn(&Clip) -> bool| {
        let mut v: Vec<f64> = clips
            .iter()
            .zip(&motions)
            .filter(|(c, _)| filter(c))
            .flat_map(|(_, m)| m.samples.iter().copied())
            .collect();
        median(&mut v)
    };
    // Held-out labelled sets are evaluation data: no pooled statistic sees them.
    let fitted_labelled = |c: &Clip| c.rec.labelled && !opts.held_out_sets.contains(&c.rec.set);
    let lab_rate = pooled(&fitted_labelled);
    let unl_rate = pooled(&|c| !c.rec.labelled);
    let set_rate: Vec<Option<f64>> = set_names
        .iter()
        .map(|(s, _)| pooled(&|c| &c.rec.set == s))
        .collect();
    let mut set_factor = vec![1.0; set_names.len()];
    let mut resampled = None;
    if let (Speed::Auto, Some(l), Some(u)) = (opts.speed, lab_rate, unl_rate)
        && l > 0.0
        && u > 0.0
    {
        let faster_labelled = if u / l > opts.speed_threshold {
            Some(false)
        } else if l / u > opts.speed_threshold {
            Some(true)
        } else {
            None
        };
        if let Some(fl) = faster_labelled {
            let other = if fl { u } else { l };
            for (i, (_, labelled)) in set_names.iter().enumerate() {
                if *labelled == fl {
                    set_factor[i] = set_rate[i].map_or(1.0, |r| (r / other).max(1.0));
                }
            }
            resampled = Some(if fl { "labelled" } else { "unlabelled" }.to_string());
        }
    }

    // 3. Colour statistics.
    let lab_stats = |picks: &[(usize, usize)]| -> Option<LabStats> {
        let acc = pool.install(|| {
            picks
                .par_iter()
                .fold(LabAccumulator::default, |mut a, &(c, k)| {
                    a.add_frame(clips[c].frames.frame(k));
                    a
                })
                .reduce(LabAccumulator::default, |mut a, b| {
                    a.merge(&b);
                    a
                })
        });
        acc.stats()
    };
    let lengths_where = |f: &dyn Fn(&Clip) -> bool| -> Vec<(usize, usize)> {
        clips
            .iter()
            .enumerate()
            .filter(|(_, c)| f(c))
            .map(|(i, c)| (i, c.frames.len()))
            .collect()
    };
    let take = opts.gap_sample as usize;
    let labelled_picks = spread(&lengths_where(&fitted_labelled), take);
    let target = lab_stats(&labelled_picks);
    let set_picks: Vec<Vec<(usize, usize)>> = set_names
        .iter()
        .map(|(s, _)| spread(&lengths_where(&|c| &c.rec.set == s), take))
        .collect();
    let set_before: Vec<Option<LabStats>> = set_picks.iter().map(|p| lab_stats(p)).collect();
    let mut set_transform: Vec<Option<LabTransform>> = vec![None; set_names.len()];
    if let Some(dst) = target
        && opts.photometric == Photometric::PerSet
    {
        for (i, (_, labelled)) in set_names.iter().enumerate() {
            if !labelled {
                set_transform[i] = set_before[i].map(|src| LabTransform { src, dst });
            }
        }
    }

    // 4. The alignment.
    for (i, ca) in alignment.clips.iter_mut().enumerate() {
        let si = set_names
            .iter()
            .position(|(s, _)| *s == ca.set)
            .expect("set listed");
        ca.speed_factor = set_factor[si];
        ca.motion_rate = motions[i].rate;
        if let Some((est, acts)) = &offsets[i] {
            ca.offset = Some(*est);
            ca.actions = Some(acts.clone());
        }
        ca.photometric = match (opts.photometric, ca.labelled, target) {
            (Photometric::PerSet, false, _) => set_transform[si],
            (Photometric::PerClip, false, Some(dst)) => {
                let picks = spread(&[(i, clips[i].frames.len())], CLIP_STATS_FRAMES);
                lab_stats(&picks).map(|src| LabTransform { src, dst })
            }
            _ => None,
        };
    }
    let view = AlignedRun::from_alignment(run_dir, alignment.clone())?;

    // 5. Model-time frames, when asked.
    if opts.copy_frames {
        let align_dir = run_dir.join("align");
        pool.install(|| {
            view.clips().par_iter().try_for_each(|c| {
                let path = ClipRecord::frames_path(&align_dir, c.set(), c.id());
                let mut wr = FrameWriter::create(&path, c.width(), c.height())?;
                let mut buf = vec![0u8; c.frame_bytes()];
                for i in 0..c.len() {
                    c.frame(i, &mut buf)?;
                    wr.push(&buf)?;
                }
                wr.finish()?;
                Ok::<_, AlignError>(())
            })
        })?;
        alignment.copy_frames = true;
    }

    // 6. Figures before and after.
    let features_before = |picks: &[(usize, usize)]| -> Vec<[f64; FEATURES]> {
        pool.install(|| {
            picks
                .par_iter()
                .map(|&(c, k)| frame_features(clips[c].frames.frame(k), w, h))
                .collect()
        })
    };
    let aligned_picks = |f: &dyn Fn(&Clip) -> bool| -> Vec<(usize, usize)> {
        let lengths: Vec<(usize, usize)> = clips
            .iter()
            .enumerate()
            .filter(|(_, c)| f(c))
            .map(|(i, _)| (i, view.clips()[i].len()))
            .collect();
        spread(&lengths, take)
    };
    let aligned_frame = |c: usize, k: usize| -> Vec<u8> {
        let clip = &view.clips()[c];
        let mut buf = vec![0u8; clip.frame_bytes()];
        clip.frame(k, &mut buf).expect("index within the clip");
        buf
    };
    let features_after = |picks: &[(usize, usize)]| -> Vec<[f64; FEATURES]> {
        pool.install(|| {
            picks
                .par_iter()
                .map(|&(c, k)| frame_features(&aligned_frame(c, k), w, h))
                .collect()
        })
    };
    let lab_f_before = features_before(&labelled_picks);
    let lab_f_after = features_after(&aligned_picks(&fitted_labelled));
    let unl_f_before = features_before(&spread(&lengths_where(&|c| !c.rec.labelled), take));
    let unl_f_after = features_after(&aligned_picks(&|c| !c.rec.labelled));
    let gap_before = gap(&lab_f_before, &unl_f_before);
    let gap_after = gap(&lab_f_after, &unl_f_after);

    let mut sets = Vec::new();
    for (si, (name, labelled)) in set_names.iter().enumerate() {
        let members: Vec<usize> = (0..clips.len())
            .filter(|&i| &clips[i].rec.set == name)
            .collect();
        let after_picks = aligned_picks(&|c| &c.rec.set == name);
        let mut hb = HistogramAccumulator::default();
        for &(c, k) in &set_picks[si] {
            hb.add_frame(clips[c].frames.frame(k));
        }
        let mut ha = HistogramAccumulator::default();
        let mut la = LabAccumulator::default();
        for &(c, k) in &after_picks {
            let f = aligned_frame(c, k);
            ha.add_frame(&f);
            la.add_frame(&f);
        }
        let motion_after = if (set_factor[si] - 1.0).abs() < 1e-12 {
            set_rate[si]
        } else {
            let ms: Vec<ClipMotion> = pool.install(|| {
                members
                    .par_iter()
                    .map(|&i| {
                        let c = &view.clips()[i];
                        clip_motion(c.len(), w, h, MOTION_PAIRS, |k| aligned_frame(i, k))
                    })
                    .collect()
            });
            median(
                &mut ms
                    .iter()
                    .flat_map(|m| m.samples.iter().copied())
                    .collect::<Vec<_>>(),
            )
        };
        let (gb, ga) = if *labelled {
            (None, None)
        } else {
            (
                Some(gap(&lab_f_before, &features_before(&set_picks[si]))),
                Some(gap(&lab_f_after, &features_after(&after_picks))),
            )
        };
        sets.push(SetSummary {
            name: name.clone(),
            labelled: *labelled,
            clips: members.len() as u32,
            frames: members.iter().map(|&i| clips[i].frames.len() as u64).sum(),
            model_frames: members.iter().map(|&i| view.clips()[i].len() as u64).sum(),
            motion_rate_before: set_rate[si],
            motion_rate_after: motion_after,
            speed_factor: set_factor[si],
            lab_before: set_before[si],
            lab_after: la.stats(),
            photometric: set_transform[si],
            histogram_before: hb.finish(),
            histogram_after: ha.finish(),
            gap_before: gb,
            gap_after: ga,
        });
    }
    let offsets_summary = alignment
        .clips
        .iter()
        .filter_map(|c| {
            c.offset.map(|estimate| ClipOffset {
                set: c.set.clone(),
                id: c.id.clone(),
                estimate,
            })
        })
        .collect();
    let path = alignment_path(run_dir);
    write_json_atomic(&path, &alignment).map_err(AlignError::io(&path))?;
    let summary = AlignSummary {
        gap_method: GAP_METHOD.into(),
        gap_before,
        gap_after,
        labelled_motion_rate: lab_rate,
        unlabelled_motion_rate: unl_rate,
        motion_ratio: match (lab_rate, unl_rate) {
            (Some(l), Some(u)) if l > 0.0 => Some(u / l),
            _ => None,
        },
        resampled,
        options: opts.clone(),
        sets,
        offsets: offsets_summary,
    };
    Ok((alignment, summary))
}

/// Frame-difference motion energy per transition of a clip.
pub fn motion_energy(frames: &FrameReader) -> Vec<f64> {
    let n = frames.len();
    let mut out = Vec::with_capacity(n.saturating_sub(1));
    let mut prev = if n > 0 {
        luma(frames.frame(0))
    } else {
        Vec::new()
    };
    for k in 1..n {
        let cur = luma(frames.frame(k));
        out.push(difference_energy(&prev, &cur));
        prev = cur;
    }
    out
}

/// A short text summary for `inspect RUN align`, from the manifest's summary.
pub fn inspect_text(summary: &serde_json::Value) -> String {
    use std::fmt::Write as _;
    let Ok(s) = serde_json::from_value::<AlignSummary>(summary.clone()) else {
        return String::new();
    };
    let mut out = String::new();
    let _ = writeln!(
        out,
        "  domain gap (squared Frechet, colour/texture features): {:.2} -> {:.2}",
        s.gap_before, s.gap_after
    );
    let opt = |v: Option<f64>| v.map_or("-".to_string(), |x| format!("{x:.2}"));
    let _ = writeln!(
        out,
        "  motion rate px/frame: labelled {}, unlabelled {}, ratio {}; resampled: {}",
        opt(s.labelled_motion_rate),
        opt(s.unlabelled_motion_rate),
        opt(s.motion_ratio),
        s.resampled.as_deref().unwrap_or("none")
    );
    for set in &s.sets {
        let _ = writeln!(
            out,
            "  set {:<12} {} clips {:>4} frames {:>7} model frames {:>7} speed x{:.2} motion {} -> {} gap {} -> {}",
            set.name,
            if set.labelled {
                "labelled  "
            } else {
                "unlabelled"
            },
            set.clips,
            set.frames,
            set.model_frames,
            set.speed_factor,
            opt(set.motion_rate_before),
            opt(set.motion_rate_after),
            opt(set.gap_before),
            opt(set.gap_after)
        );
    }
    for o in s.offsets.iter() {
        let _ = writeln!(
            out,
            "  offset {}/{}: {:+.3} s (r = {:.3}){}",
            o.set,
            o.id,
            o.estimate.estimated_s,
            o.estimate.correlation,
            if o.estimate.trusted {
                ""
            } else {
                "  NOT TRUSTED, 0 used"
            }
        );
    }
    out
}
