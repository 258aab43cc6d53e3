//! Training data for the fit stage: clip splits, action standardisation,
//! bootstrap counts and seeded batch sampling of frame pairs.
//!
//! Frames are read one pair at a time from the aligned view (memory-mapped
//! frame stores), so memory does not grow with the number of clips; the pages
//! read so far are released every [`RELEASE_EVERY`] batches (mapped pages
//! count towards the resident set size, see `FrameReader::release`).

use std::path::Path;

use serde::{Deserialize, Serialize};

use super::FitError;
use crate::align::{AlignedClip, AlignedRun};
use crate::model::Rng;

/// Batches between releases of the frame pages read (at 64 KiB of
/// fault-around per frame read, about 33 MiB of mapped pages at most).
pub const RELEASE_EVERY: u32 = 4;

/// Largest random shift of training pairs, as a fraction of the frame's
/// shorter side (4 pixels at 64x64). Random-shift augmentation (Kostrikov et
/// al. 2020, "Image Augmentation Is All You Need", DrQ; Laskin et al. 2020,
/// RAD): both frames of a pair move by the same whole-pixel offset, with the
/// edge pixels replicated into the gap, so the motion between them (and the
/// recorded action) is unchanged while the absolute layout the network could
/// memorise per clip is not.
pub const SHIFT_FRACTION: f64 = 1.0 / 16.0;

/// Shifts a `height x width x 3` frame by `(dy, dx)` pixels in place of
/// `out`, replicating edge pixels (`src` and `out` do not overlap).
pub fn shift_frame(src: &[u8], out: &mut [u8], width: usize, height: usize, dy: i64, dx: i64) {
    let clamp = |v: i64, n: usize| v.clamp(0, n as i64 - 1) as usize;
    for y in 0..height {
        let sy = clamp(y as i64 - dy, height);
        for x in 0..width {
            let sx = clamp(x as i64 - dx, width);
            let (o, s) = ((y * width + x) * 3, (sy * width + sx) * 3);
            out[o..o + 3].copy_from_slice(&src[s..s + 3]);
        }
    }
}

/// Which split a clip belongs to (by clip, never by frame); also the shards'
/// `split` column.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Split {
    /// Training clips (every unlabelled clip is `train`).
    Train,
    /// Calibration clips (labelled only).
    Calib,
    /// Holdout clips (labelled only).
    Holdout,
}

impl Split {
    /// The split's name as written in tables.
    pub fn name(self) -> &'static str {
        match self {
            Split::Train => "train",
            Split::Calib => "calib",
            Split::Holdout => "holdout",
        }
    }
}

/// Clips per split.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct SplitCounts {
    /// Train clips.
    pub train: usize,
    /// Calibration clips.
    pub calib: usize,
    /// Holdout clips.
    pub holdout: usize,
}

/// How `labelled` clips split: `max(1, round(f * n))` calibration and holdout
/// clips, the rest train (at least one). Errors say how many clips are needed.
pub fn split_counts(labelled: usize, calib: f64, holdout: f64) -> Result<SplitCounts, FitError> {
    let part = |n: usize, f: f64| ((f * n as f64).round() as usize).max(1);
    let fits = |n: usize| part(n, calib) + part(n, holdout) < n;
    if fits(labelled) {
        let (c, h) = (part(labelled, calib), part(labelled, holdout));
        return Ok(SplitCounts {
            train: labelled - c - h,
            calib: c,
            holdout: h,
        });
    }
    let needed = (labelled + 1..labelled + 10_000)
        .find(|&n| fits(n))
        .unwrap_or(usize::MAX);
    Err(FitError::TooFewClips {
        labelled,
        needed,
        calib,
        holdout,
    })
}

/// Per-dimension action standardisation from the labelled train transitions.
/// A constant dimension (standard deviation 0) keeps standard deviation 1, so
/// nothing divides by zero; it is flagged in `constant`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Standardisation {
    /// Dimension names.
    pub dims: Vec<String>,
    /// Train mean per dimension.
    pub mean: Vec<f64>,
    /// Train standard deviation per dimension (1 for constant dimensions).
    pub std: Vec<f64>,
    /// Dimensions that were constant over the train transitions.
    pub constant: Vec<bool>,
}

impl Standardisation {
    /// Statistics of `rows` (population variance).
    pub fn fit(dims: &[String], rows: impl Iterator<Item = Vec<f32>> + Clone) -> Self {
        let a = dims.len();
        let (mut n, mut sum) = (0usize, vec![0f64; a]);
        for r in rows.clone() {
            n += 1;
            for d in 0..a {
                sum[d] += f64::from(r[d]);
            }
        }
        let mean: Vec<f64> = sum.iter().map(|s| s / n.max(1) as f64).collect();
        let mut ss = vec![0f64; a];
        for r in rows {
            for d in 0..a {
                ss[d] += (f64::from(r[d]) - mean[d]).powi(2);
            }
        }
        let mut std = Vec::with_capacity(a);
        let mut constant = Vec::with_capacity(a);
        for d in 0..a {
            let s = (ss[d] / n.max(1) as f64).sqrt();
            // Relative threshold: float noise on a constant column is not variation.
            let is_const = !(s > 1e-9 * mean[d].abs().max(1e-9)) || !s.is_finite();
            constant.push(is_const);
            std.push(if is_const { 1.0 } else { s });
        }
        Self {
            dims: dims.to_vec(),
            mean,
            std,
            constant,
        }
    }

    /// Standardised copy of one action vector.
    pub fn apply(&self, a: &[f32]) -> Vec<f32> {
        a.iter()
            .enumerate()
            .map(|(d, &v)| ((f64::from(v) - self.mean[d]) / self.std[d]) as f32)
            .collect()
    }

    /// Action units from a standardised mean of dimension `d`.
    pub fn unapply_mean(&self, d: usize, v: f64) -> f64 {
        v * self.std[d] + self.mean[d]
    }

    /// Action units from a standardised variance of dimension `d`.
    pub fn unapply_var(&self, d: usize, v: f64) -> f64 {
        v * self.std[d] * self.std[d]
    }
}

/// A clip as the fit stage sees it.
#[derive(Debug, Clone)]
pub struct ClipInfo {
    /// Index into the aligned view's clips.
    pub index: usize,
    /// Set name.
    pub set: String,
    /// Clip id.
    pub id: String,
    /// Whether the clip has recorded actions.
    pub labelled: bool,
    /// Its split.
    pub split: Split,
    /// Model-time transitions (frames - 1).
    pub transitions: usize,
}

/// A pool of transitions to sample from: clips and cumulative counts.
#[derive(Debug, Clone, Default)]
struct Pool {
    clips: Vec<usize>,
    ends: Vec<usize>,
}

impl Pool {
    fn new(clips: Vec<usize>, infos: &[ClipInfo]) -> Self {
        let mut ends = Vec::with_capacity(clips.len());
        let mut total = 0;
        for &c in &clips {
            total += infos[c].transitions;
            ends.push(total);
        }
        Self { clips, ends }
    }
    fn len(&self) -> usize {
        self.ends.last().copied().unwrap_or(0)
    }
    /// (clip info index, transition) of pooled transition `g`.
    fn locate(&self, g: usize) -> (usize, usize) {
        let k = self.ends.partition_point(|&e| e <= g);
        let start = if k == 0 { 0 } else { self.ends[k - 1] };
        (self.clips[k], g - start)
    }
}

/// The training data: the aligned view, splits and standardisation.
pub struct Dataset {
    run: AlignedRun,
    /// Every clip, in the view's (set, id) order.
    pub clips: Vec<ClipInfo>,
    labelled_train: Pool,
    unlabelled: Pool,
    /// Action standardisation.
    pub standardisation: Standardisation,
    /// Frame width.
    pub width: usize,
    /// Frame height.
    pub height: usize,
    /// Split sizes.
    pub counts: SplitCounts,
}

/// One sampled batch (raw bytes and standardised actions).
pub struct RawBatch {
    /// Frames t, `n * H * W * 3` bytes.
    pub x_t: Vec<u8>,
    /// Frames t + 1.
    pub x_t1: Vec<u8>,
    /// Rows.
    pub n: usize,
    /// Leading labelled rows.
    pub n_labelled: usize,
    /// Standardised actions of the labelled rows, row-major.
    pub actions: Vec<f32>,
    /// Bootstrap counts `[heads][n_labelled]`, row-major.
    pub boot: Vec<f32>,
}

impl Dataset {
    /// Opens the aligned view of `run_dir` and assigns splits from `seed`.
    pub fn open(
        run_dir: &Path,
        actions_opts: &crate::spec::ActionsOptions,
        seed: u64,
        calib: f64,
        holdout: f64,
        split_by: super::SplitBy,
        held_out_sets: &[String],
    ) -> Result<Self, FitError> {
        let run = AlignedRun::open_or_passthrough(run_dir, actions_opts)?;
        let views = run.clips();
        let Some(first) = views.first() else {
            return Err(FitError::NoData {
                what: "decoded clips",
            });
        };
        let (width, height) = (first.width() as usize, first.height() as usize);
        let dims = run.action_dims().to_vec();
        let mut clips = Vec::with_capacity(views.len());
        for (index, v) in views.iter().enumerate() {
            if (v.width() as usize, v.height() as usize) != (width, height) {
                return Err(inconsistent(
                    v,
                    format!(
                        "frames are {}x{}, other clips {width}x{height}",
                        v.width(),
                        v.height()
                    ),
                ));
            }
            if v.labelled() {
                match v.actions() {
                    Some(a) if a.iter().all(|r| r.len() == dims.len()) => {}
                    _ => {
                        return Err(inconsistent(
                            v,
                            format!("actions do not have the {} dimensions {dims:?}", dims.len()),
                        ));
                    }
                }
            }
            clips.push(ClipInfo {
                index,
                set: v.set().to_string(),
                id: v.id().to_string(),
                labelled: v.labelled(),
                split: Split::Train,
                transitions: v.len().saturating_sub(1),
            });
        }
        // Splits: labelled clips in (set, id) order, dealt by `split_by`;
        // held-out sets' clips separately, into calib and holdout only, so
        // that adding them leaves the other clips' splits as they were.
        let (reserved, labelled): (Vec<usize>, Vec<usize>) = (0..clips.len())
            .filter(|&i| clips[i].labelled)
            .partition(|&i| held_out_sets.contains(&clips[i].set));
        let scores_of = |members: &[usize]| {
            let rows: Vec<&[Vec<f32>]> = members
                .iter()
                .map(|&i| views[clips[i].index].actions().unwrap_or(&[]))
                .collect();
            super::splits::motion_scores(&rows, &dims)
        };
        let groups = [
            (
                scores_of(&labelled),
                split_counts(labelled.len(), calib, holdout)?,
                "fit.splits",
                labelled,
            ),
            (
                scores_of(&reserved),
                super::splits::held_out_counts(reserved.len(), calib, holdout),
                "fit.splits.held-out",
                reserved,
            ),
        ];
        for (scores, counts, stream, members) in groups {
            let dealt = super::splits::assign(&scores, counts, split_by, seed, stream);
            for (i, split) in members.into_iter().zip(dealt) {
                clips[i].split = split;
            }
        }
        let train_l: Vec<usize> = (0..clips.len())
            .filter(|&i| clips[i].labelled && clips[i].split == Split::Train)
            .collect();
        let unl: Vec<usize> = (0..clips.len()).filter(|&i| !clips[i].labelled).collect();
        let labelled_train = Pool::new(train_l, &clips);
        let unlabelled = Pool::new(unl, &clips);
        if labelled_train.len() == 0 {
            return Err(FitError::NoData {
                what: "labelled train transitions",
            });
        }
        let rows = labelled_train.clips.iter().flat_map(|&c| {
            views[clips[c].index]
                .actions()
                .unwrap_or(&[])
                .iter()
                .cloned()
        });
        let standardisation = Standardisation::fit(&dims, rows);
        // Clips per split, held-out sets' clips included.
        let tally = |s: Split| clips.iter().filter(|c| c.labelled && c.split == s).count();
        let counts = SplitCounts {
            train: tally(Split::Train),
            calib: tally(Split::Calib),
            holdout: tally(Split::Holdout),
        };
        Ok(Self {
            run,
            clips,
            labelled_train,
            unlabelled,
            standardisation,
            width,
            height,
            counts,
        })
    }

    /// The aligned view.
    pub fn view(&self) -> &AlignedRun {
        &self.run
    }

    /// The aligned clip behind `info`.
    pub fn clip(&self, info: &ClipInfo) -> &AlignedClip {
        &self.run.clips()[info.index]
    }

    /// Labelled train transitions.
    pub fn labelled_len(&self) -> usize {
        self.labelled_train.len()
    }

    /// Unlabelled transitions.
    pub fn unlabelled_len(&self) -> usize {
        self.unlabelled.len()
    }

    /// Action dimensions.
    pub fn action_dims(&self) -> usize {
        self.standardisation.dims.len()
    }

    /// Per head, the integer count of each labelled train transition in a
    /// bootstrap resample of the same size (Efron 1979).
    pub fn bootstrap(&self, heads: usize, seed: u64) -> Vec<Vec<u16>> {
        let n = self.labelled_len();
        (0..heads)
            .map(|m| {
                let mut rng = Rng::for_name(seed, &format!("fit.bootstrap.{m}"));
                let mut counts = vec![0u16; n];
                for _ in 0..n {
                    let j = rng.below(n as u64) as usize;
                    counts[j] = counts[j].saturating_add(1);
                }
                counts
            })
            .collect()
    }

    /// Reads the frame pair of transition `i` of clip `info` into `a`, `b`.
    pub fn pair(
        &self,
        info: &ClipInfo,
        i: usize,
        a: &mut [u8],
        b: &mut [u8],
    ) -> Result<(), FitError> {
        let clip = self.clip(info);
        clip.frame(i, a)?;
        clip.frame(i + 1, b)?;
        Ok(())
    }

    /// Samples `n_l` labelled train and `n_u` unlabelled transitions.
    pub fn sample(
        &self,
        rng: &mut Rng,
        n_l: usize,
        n_u: usize,
        boot: &[Vec<u16>],
    ) -> Result<RawBatch, FitError> {
        let n = n_l + n_u;
        let fb = self.width * self.height * 3;
        let mut x_t = vec![0u8; n * fb];
        let mut x_t1 = vec![0u8; n * fb];
        let mut actions = Vec::with_capacity(n_l * self.action_dims());
        let mut picks = Vec::with_capacity(n_l);
        let max_shift = (self.width.min(self.height) as f64 * SHIFT_FRACTION).floor() as u64;
        let (mut tmp_a, mut tmp_b) = (vec![0u8; fb], vec![0u8; fb]);
        for r in 0..n {
            let (pool, labelled) = if r < n_l {
                (&self.labelled_train, true)
            } else {
                (&self.unlabelled, false)
            };
            let g = rng.below(pool.len() as u64) as usize;
            let (c, i) = pool.locate(g);
            let info = &self.clips[c];
            if max_shift > 0 {
                let dy = rng.below(2 * max_shift + 1) as i64 - max_shift as i64;
                let dx = rng.below(2 * max_shift + 1) as i64 - max_shift as i64;
                self.pair(info, i, &mut tmp_a, &mut tmp_b)?;
                let (w, h) = (self.width, self.height);
                shift_frame(&tmp_a, &mut x_t[r * fb..(r + 1) * fb], w, h, dy, dx);
                shift_frame(&tmp_b, &mut x_t1[r * fb..(r + 1) * fb], w, h, dy, dx);
            } else {
                self.pair(
                    info,
                    i,
                    &mut x_t[r * fb..(r + 1) * fb],
                    &mut x_t1[r * fb..(r + 1) * fb],
                )?;
            }
            if labelled {
                let row = &self
                    .clip(info)
                    .actions()
                    .expect("labelled clip has actions")[i];
                actions.extend(self.standardisation.apply(row));
                picks.push(g);
            }
        }
        let boot = boot
            .iter()
            .flat_map(|counts| picks.iter().map(|&g| f32::from(counts[g])))
            .collect();
        Ok(RawBatch {
            x_t,
            x_t1,
            n,
            n_labelled: n_l,
            actions,
            boot,
        })
    }
}

fn inconsistent(v: &AlignedClip, reason: String) -> FitError {
    FitError::Inconsistent {
        set: v.set().to_string(),
        id: v.id().to_string(),
        reason,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn split_counts_and_needed_clips() {
        let c = split_counts(20, 0.2, 0.2).unwrap();
        assert_eq!((c.train, c.calib, c.holdout), (12, 4, 4));
        let c = split_counts(3, 0.2, 0.2).unwrap();
        assert_eq!((c.train, c.calib, c.holdout), (1, 1, 1));
        let err = split_counts(2, 0.2, 0.2).unwrap_err().to_string();
        assert!(err.contains("at least 3 are needed"), "{err}");
        let err = split_counts(4, 0.4, 0.4).unwrap_err().to_string();
        assert!(err.contains("at least 5 are needed"), "{err}");
    }

    #[test]
    fn shift_moves_pixels_and_replicates_edges() {
        // 3x2 frame, pixel value = index; shift right by one.
        let src: Vec<u8> = (0..18).collect();
        let mut out = vec![0u8; 18];
        shift_frame(&src, &mut out, 3, 2, 0, 1);
        assert_eq!(&out[0..9], &[0, 1, 2, 0, 1, 2, 3, 4, 5]);
        shift_frame(&src, &mut out, 3, 2, 0, 0);
        assert_eq!(out, src);
    }

    #[test]
    fn constant_dimension_keeps_unit_scale() {
        let dims = vec!["a".to_string(), "b".to_string()];
        let rows = vec![vec![1.0f32, 5.0], vec![3.0, 5.0]];
        let s = Standardisation::fit(&dims, rows.into_iter());
        assert_eq!(s.constant, vec![false, true]);
        assert_eq!(s.std[1], 1.0);
        assert_eq!(s.apply(&[3.0, 5.0]), vec![1.0, 0.0]);
    }
}
