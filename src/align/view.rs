//! The aligned view of a run: what the fit and label stages read instead of the decode store.
//! See the interface notes at the top of [`crate::align`].
//!
//! On disk: `RUN/align/alignment.json` (an [`Alignment`]); with `copy-frames = true` also
//! `RUN/align/clips/<set>/<id>.frames` holding the model-time frames.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::color::LabTransform;
use super::offset::OffsetEstimate;
use super::{AlignError, Resample};
use crate::actions::{Interval, MapRule, Series, map_series, rules_for};
use crate::spec::ActionsOptions;
use crate::store::{ClipRecord, FrameReader, read_json};

/// Version of the alignment file format.
pub const ALIGNMENT_VERSION: u32 = 1;

/// Colour normalisation of one clip (alias kept for the re-export name).
pub type Photometric = LabTransform;

/// The alignment of one clip.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ClipAlignment {
    /// Clip-set name.
    pub set: String,
    /// Clip id.
    pub id: String,
    /// Whether the set is labelled.
    pub labelled: bool,
    /// Decoded frames.
    pub frames: u32,
    /// Model frames per decode frame interval (1 = no resampling; 1.5 = 50% more frames).
    pub speed_factor: f64,
    /// Measured motion rate, pixels per decode frame.
    pub motion_rate: Option<f64>,
    /// CIELAB map applied when a frame is read.
    pub photometric: Option<LabTransform>,
    /// Clock offset estimate (only with `[actions] offset = "estimate"`).
    pub offset: Option<OffsetEstimate>,
    /// Decode-grid actions re-mapped with the estimated offset (else the decode stage's).
    pub actions: Option<Vec<Vec<f32>>>,
}

/// `RUN/align/alignment.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Alignment {
    /// File format version.
    pub version: u32,
    /// Decode fps.
    pub fps: f64,
    /// Frame width.
    pub width: u32,
    /// Frame height.
    pub height: u32,
    /// Action dimension names.
    pub action_dims: Vec<String>,
    /// One rule per dimension.
    pub rules: Vec<MapRule>,
    /// Fractional-position resampling.
    pub resample: Resample,
    /// Whether model-time frames were written under `RUN/align/clips/`.
    pub copy_frames: bool,
    /// Per clip, sorted by (set, id).
    pub clips: Vec<ClipAlignment>,
}

/// One clip as the model sees it.
pub struct AlignedClip {
    /// The clip's alignment.
    pub info: ClipAlignment,
    fps: f64,
    width: u32,
    height: u32,
    resample: Resample,
    frames: FrameReader,
    copy: Option<FrameReader>,
    positions: Vec<f64>,
    decode_actions: Option<Vec<Vec<f32>>>,
    model_actions: Option<Vec<Vec<f32>>>,
}

/// Decode-frame positions of the model-time frames: `p_i = min(i / f, n - 1)`.
pub fn model_positions(frames: u32, factor: f64) -> Vec<f64> {
    let last = f64::from(frames.saturating_sub(1));
    if frames == 0 {
        return Vec::new();
    }
    if (factor - 1.0).abs() < 1e-12 {
        return (0..frames).map(f64::from).collect();
    }
    let m = (last * factor - 1e-9).ceil().max(0.0) as usize + 1;
    (0..m).map(|i| (i as f64 / factor).min(last)).collect()
}

impl AlignedClip {
    fn new(
        info: ClipAlignment,
        alignment: &Alignment,
        decode_dir: &Path,
        align_dir: &Path,
        rules: &[MapRule],
    ) -> Result<Self, AlignError> {
        let frames = FrameReader::open(&ClipRecord::frames_path(decode_dir, &info.set, &info.id))?;
        let record_path = ClipRecord::record_path(decode_dir, &info.set, &info.id);
        let record: ClipRecord = read_json(&record_path).map_err(AlignError::io(&record_path))?;
        let decode_actions = info.actions.clone().or(record.actions);
        let positions = model_positions(frames.len() as u32, info.speed_factor);
        let copy = if alignment.copy_frames {
            Some(FrameReader::open(&ClipRecord::frames_path(
                align_dir, &info.set, &info.id,
            ))?)
        } else {
            None
        };
        let mut clip = Self {
            fps: alignment.fps,
            width: frames.width(),
            height: frames.height(),
            resample: alignment.resample,
            info,
            frames,
            copy,
            positions,
            decode_actions,
            model_actions: None,
        };
        clip.model_actions = match &clip.decode_actions {
            Some(a) if clip.is_identity() => Some(a.clone()),
            Some(a) if !a.is_empty() => Some(clip.decode_to_model(a, rules)?),
            Some(a) => Some(a.clone()),
            None => None,
        };
        Ok(clip)
    }

    /// Whether the clip's model time is its decode time (speed factor 1): model frame `i` is
    /// decoded frame `i` (colour-normalised) and [`Self::to_decode_grid`] returns its input.
    pub fn is_identity(&self) -> bool {
        (self.info.speed_factor - 1.0).abs() < 1e-12
    }

    /// Clip-set name.
    pub fn set(&self) -> &str {
        &self.info.set
    }
    /// Clip id.
    pub fn id(&self) -> &str {
        &self.info.id
    }
    /// Whether the clip's set is labelled.
    pub fn labelled(&self) -> bool {
        self.info.labelled
    }
    /// Decode fps.
    pub fn fps(&self) -> f64 {
        self.fps
    }
    /// Frame width.
    pub fn width(&self) -> u32 {
        self.width
    }
    /// Frame height.
    pub fn height(&self) -> u32 {
        self.height
    }
    /// Bytes of one RGB8 frame.
    pub fn frame_bytes(&self) -> usize {
        self.width as usize * self.height as usize * 3
    }
    /// Model-time frames.
    pub fn len(&self) -> usize {
        self.positions.len()
    }
    /// Whether the clip has no frames.
    pub fn is_empty(&self) -> bool {
        self.positions.is_empty()
    }
    /// Decoded frames (= shard rows).
    pub fn decode_len(&self) -> usize {
        self.frames.len()
    }
    /// Model frames per decode frame interval.
    pub fn speed_factor(&self) -> f64 {
        self.info.speed_factor
    }
    /// Decode-frame position of model frame `i`.
    pub fn position(&self, i: usize) -> f64 {
        self.positions[i]
    }
    /// Releases the pages of this clip's frame files read so far (see
    /// [`FrameReader::release`]).
    pub fn release(&self) {
        self.frames.release();
        if let Some(copy) = &self.copy {
            copy.release();
        }
    }

    /// Decoded frame `k` as stored (RGB8, before colour normalisation).
    pub fn decode_frame(&self, k: usize) -> &[u8] {
        self.frames.frame(k)
    }

    /// Model-time frame `i` into `out` (`frame_bytes()` bytes): resampled, colour-normalised.
    pub fn frame(&self, i: usize, out: &mut [u8]) -> Result<(), AlignError> {
        if i >= self.len() {
            return Err(AlignError::FrameIndex {
                set: self.info.set.clone(),
                id: self.info.id.clone(),
                index: i,
                len: self.len(),
            });
        }
        if out.len() != self.frame_bytes() {
            return Err(AlignError::BufferSize {
                set: self.info.set.clone(),
                id: self.info.id.clone(),
                got: out.len(),
                expected: self.frame_bytes(),
            });
        }
        if let Some(copy) = &self.copy {
            copy.read_into(i, out)?;
            return Ok(());
        }
        self.raw_model_frame(i, out)?;
        if let Some(t) = &self.info.photometric {
            t.apply(out);
        }
        Ok(())
    }

    /// Model-time frame `i` without colour normalisation (resampled only),
    /// read with positioned reads ([`FrameReader::read_into`]).
    pub(crate) fn raw_model_frame(&self, i: usize, out: &mut [u8]) -> Result<(), AlignError> {
        let p = self.positions[i];
        let k0 = p.floor() as usize;
        let w = p - k0 as f64;
        if w < 1e-6 || k0 + 1 >= self.frames.len() {
            self.frames.read_into(k0, out)?;
        } else if self.resample == Resample::Nearest {
            self.frames
                .read_into(if w < 0.5 { k0 } else { k0 + 1 }, out)?;
        } else {
            let mut b = vec![0u8; out.len()];
            self.frames.read_into(k0, out)?;
            self.frames.read_into(k0 + 1, &mut b)?;
            let (wa, wb) = ((1.0 - w) as f32, w as f32);
            for (o, &y) in out.iter_mut().zip(&b) {
                *o = (wa * f32::from(*o) + wb * f32::from(y))
                    .round()
                    .clamp(0.0, 255.0) as u8;
            }
        }
        Ok(())
    }

    /// Recorded actions per model-time transition (`len() - 1` rows) for labelled clips,
    /// re-mapped with the estimated clock offset when there is one.
    pub fn actions(&self) -> Option<&[Vec<f32>]> {
        self.model_actions.as_deref()
    }

    /// Recorded actions per decode transition (`decode_len() - 1` rows), re-mapped with the
    /// estimated offset when there is one.
    pub fn decode_actions(&self) -> Option<&[Vec<f32>]> {
        self.decode_actions.as_deref()
    }

    /// Model-time transition intervals in decode-time seconds.
    pub fn model_intervals(&self) -> Vec<Interval> {
        self.positions
            .windows(2)
            .map(|w| Interval {
                start: w[0] / self.fps,
                end: w[1] / self.fps,
            })
            .collect()
    }

    fn decode_to_model(
        &self,
        values: &[Vec<f32>],
        rules: &[MapRule],
    ) -> Result<Vec<Vec<f32>>, AlignError> {
        let n = values.len();
        let start: Vec<f64> = (0..n).map(|k| k as f64 / self.fps).collect();
        let end: Vec<f64> = (0..n).map(|k| (k + 1) as f64 / self.fps).collect();
        self.map(values, &start, &end, rules, &self.model_intervals())
    }

    fn map(
        &self,
        values: &[Vec<f32>],
        start: &[f64],
        end: &[f64],
        rules: &[MapRule],
        targets: &[Interval],
    ) -> Result<Vec<Vec<f32>>, AlignError> {
        let dims = rules.len();
        let flat: Vec<f64> = values
            .iter()
            .flat_map(|r| r.iter().map(|&v| f64::from(v)))
            .collect();
        let series = Series {
            start,
            end,
            values: &flat,
            dims,
        };
        map_series(&series, rules, targets).map_err(|source| AlignError::Actions {
            set: self.info.set.clone(),
            id: self.info.id.clone(),
            source: Box::new(source),
        })
    }

    /// Maps per-model-transition values (`len() - 1` rows, one value per rule) onto the decode
    /// transitions (`decode_len() - 1` rows) with the hold / mean / sum rules.
    pub fn to_decode_grid(
        &self,
        values: &[Vec<f32>],
        rules: &[MapRule],
    ) -> Result<Vec<Vec<f32>>, AlignError> {
        let expected = self.len().saturating_sub(1);
        if values.len() != expected {
            return Err(AlignError::SeriesLength {
                set: self.info.set.clone(),
                id: self.info.id.clone(),
                got: values.len(),
                expected,
            });
        }
        if self.is_identity() || values.is_empty() {
            return Ok(values.to_vec());
        }
        let iv = self.model_intervals();
        let start: Vec<f64> = iv.iter().map(|i| i.start).collect();
        let end: Vec<f64> = iv.iter().map(|i| i.end).collect();
        let targets = crate::actions::frame_intervals(self.fps, self.decode_len() as u32);
        self.map(values, &start, &end, rules, &targets)
    }

    /// Like [`Self::to_decode_grid`] for standard deviations: variances are mapped with the
    /// same rules (errors of different model transitions taken as independent) and the
    /// square root is returned.
    pub fn to_decode_grid_std(
        &self,
        std: &[Vec<f32>],
        rules: &[MapRule],
    ) -> Result<Vec<Vec<f32>>, AlignError> {
        let var: Vec<Vec<f32>> = std
            .iter()
            .map(|r| r.iter().map(|s| s * s).collect())
            .collect();
        Ok(self
            .to_decode_grid(&var, rules)?
            .into_iter()
            .map(|r| r.into_iter().map(|v| v.max(0.0).sqrt()).collect())
            .collect())
    }
}

/// Every decoded clip as the model sees it.
pub struct AlignedRun {
    alignment: Alignment,
    clips: Vec<AlignedClip>,
}

impl AlignedRun {
    /// Releases the pages of every clip's frame files read so far.
    pub fn release(&self) {
        for clip in &self.clips {
            clip.release();
        }
    }

    /// Opens `RUN/align/alignment.json` and the decode store it refers to.
    pub fn open(run_dir: &Path) -> Result<Self, AlignError> {
        let path = alignment_path(run_dir);
        let alignment: Alignment = read_json(&path).map_err(AlignError::io(&path))?;
        Self::from_alignment(run_dir, alignment)
    }

    /// The identity view over `RUN/decode/`: no colour change, no resampling, the decode
    /// stage's actions; `actions` gives the mapping rules.
    pub fn passthrough(run_dir: &Path, actions: &ActionsOptions) -> Result<Self, AlignError> {
        let records = list_decoded(run_dir)?;
        let alignment = identity_alignment(&records, actions)?;
        Self::from_alignment(run_dir, alignment)
    }

    /// [`Self::open`] when the align stage has written its file, else [`Self::passthrough`].
    pub fn open_or_passthrough(
        run_dir: &Path,
        actions: &ActionsOptions,
    ) -> Result<Self, AlignError> {
        if alignment_path(run_dir).exists() {
            Self::open(run_dir)
        } else {
            Self::passthrough(run_dir, actions)
        }
    }

    pub(crate) fn from_alignment(run_dir: &Path, alignment: Alignment) -> Result<Self, AlignError> {
        let decode_dir = run_dir.join("decode");
        let align_dir = run_dir.join("align");
        let rules = alignment.rules.clone();
        let clips = alignment
            .clips
            .iter()
            .map(|c| {
                if !ClipRecord::record_path(&decode_dir, &c.set, &c.id).exists() {
                    return Err(AlignError::MissingClip {
                        path: alignment_path(run_dir),
                        set: c.set.clone(),
                        id: c.id.clone(),
                    });
                }
                AlignedClip::new(c.clone(), &alignment, &decode_dir, &align_dir, &rules)
            })
            .collect::<Result<Vec<_>, _>>()?;
        Ok(Self { alignment, clips })
    }

    /// The clips, sorted by (set, id).
    pub fn clips(&self) -> &[AlignedClip] {
        &self.clips
    }
    /// The clip `id` of set `set`.
    pub fn clip(&self, set: &str, id: &str) -> Option<&AlignedClip> {
        self.clips.iter().find(|c| c.set() == set && c.id() == id)
    }
    /// The alignment record.
    pub fn alignment(&self) -> &Alignment {
        &self.alignment
    }
    /// Action dimension names.
    pub fn action_dims(&self) -> &[String] {
        &self.alignment.action_dims
    }
    /// One mapping rule per action dimension.
    pub fn rules(&self) -> &[MapRule] {
        &self.alignment.rules
    }
    /// Decode fps.
    pub fn fps(&self) -> f64 {
        self.alignment.fps
    }
}

/// `RUN/align/alignment.json`.
pub fn alignment_path(run_dir: &Path) -> PathBuf {
    run_dir.join("align").join(super::ALIGNMENT_FILE)
}

/// Every decode record under `RUN/decode/clips/`, sorted by (set, id).
pub fn list_decoded(run_dir: &Path) -> Result<Vec<ClipRecord>, AlignError> {
    let root = run_dir.join("decode").join("clips");
    let mut files = Vec::new();
    walk(&root, &mut files)?;
    let mut records = Vec::new();
    for f in files {
        let r: ClipRecord = read_json(&f).map_err(AlignError::io(&f))?;
        records.push(r);
    }
    records.sort_by(|a, b| (&a.set, &a.id).cmp(&(&b.set, &b.id)));
    if records.is_empty() {
        return Err(AlignError::NoClips { dir: root });
    }
    Ok(records)
}

fn walk(dir: &Path, out: &mut Vec<PathBuf>) -> Result<(), AlignError> {
    if !dir.is_dir() {
        return Ok(());
    }
    let entries = std::fs::read_dir(dir).map_err(AlignError::io(dir))?;
    for e in entries {
        let e = e.map_err(AlignError::io(dir))?;
        let p = e.path();
        if p.is_dir() {
            walk(&p, out)?;
        } else if p.to_string_lossy().ends_with(".clip.json") {
            out.push(p);
        }
    }
    Ok(())
}

/// The rules for the decoded clips' action dimensions.
pub(crate) fn rules_of(
    records: &[ClipRecord],
    actions: &ActionsOptions,
) -> Result<(Vec<String>, Vec<MapRule>), AlignError> {
    let Some(first) = records
        .iter()
        .find(|r| r.labelled && !r.action_dims.is_empty())
    else {
        return Ok((Vec::new(), Vec::new()));
    };
    let rules =
        rules_for(&first.action_dims, &actions.map, actions.default_rule).map_err(|source| {
            AlignError::Actions {
                set: first.set.clone(),
                id: first.id.clone(),
                source: Box::new(source),
            }
        })?;
    Ok((first.action_dims.clone(), rules))
}

/// An alignment that changes nothing.
pub(crate) fn identity_alignment(
    records: &[ClipRecord],
    actions: &ActionsOptions,
) -> Result<Alignment, AlignError> {
    let (action_dims, rules) = rules_of(records, actions)?;
    let first = &records[0];
    for r in records {
        if r.width != first.width || r.height != first.height || (r.fps - first.fps).abs() > 1e-9 {
            return Err(AlignError::Mismatch {
                set: r.set.clone(),
                id: r.id.clone(),
                width: r.width,
                height: r.height,
                fps: r.fps,
                want_width: first.width,
                want_height: first.height,
                want_fps: first.fps,
            });
        }
    }
    Ok(Alignment {
        version: ALIGNMENT_VERSION,
        fps: first.fps,
        width: first.width,
        height: first.height,
        action_dims,
        rules,
        resample: Resample::Blend,
        copy_frames: false,
        clips: records
            .iter()
            .map(|r| ClipAlignment {
                set: r.set.clone(),
                id: r.id.clone(),
                labelled: r.labelled,
                frames: r.frames,
                speed_factor: 1.0,
                motion_rate: None,
                photometric: None,
                offset: None,
                actions: None,
            })
            .collect(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn positions_cover_the_clip() {
        assert_eq!(model_positions(4, 1.0), vec![0.0, 1.0, 2.0, 3.0]);
        let p = model_positions(4, 2.0);
        assert_eq!(p, vec![0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0]);
        let p = model_positions(4, 1.4);
        assert_eq!(*p.last().unwrap(), 3.0);
        assert!(p.windows(2).all(|w| w[1] > w[0]));
    }
}
