//! The synthetic tabletop demo clip generator (`actuary demo-clips DIR`).
//!
//! A top-down camera looks at a table on which square blocks get pushed
//! around, either by a robot gripper (the labelled set, with a recorded action
//! log) or by a human hand (the unlabelled set; its true actions are written
//! apart, for evaluation only). Everything is a pure function of
//! [`DemoOptions`]: the same options give the same files.
//!
//! ```text
//! DIR/robot/robot-NN.mp4 + robot-NN.actions.csv   log at `log_rate` Hz: t,dx,dy,grip
//! DIR/human/human-NN.mp4                          no sidecar
//! DIR/human-truth/human-NN.actions.csv            one row per frame at `fps`: t,dx,dy,grip
//! ```
//!
//! Actions: `dx`, `dy` are the effector's displacement in table centimetres
//! over the row's interval (`x` to the image's right, `y` to its bottom; map
//! them with `sum`), `grip` is the gripper command, 1 closed and 0 open (map it
//! with `hold`). A robot log row at `t` holds from `t` to the next row's `t`.
//! Human-truth row `k` (`t = k / fps`) is the action from frame `k` to frame
//! `k + 1`, already summed over that interval; the last row covers the last
//! frame's display interval (the simulation runs one interval past the last
//! frame), which no decoded frame pair shows, so a pipeline that drops the last
//! frame's action loses nothing.
//!
//! What the frames show is exactly what the actions say: the effector moves
//! between frame `k` and `k + 1` by the summed deltas times the camera scale
//! (robot 3 px/cm, human 2.4 px/cm at 96 px), and frame `k + 1` shows the
//! gripper or hand in the state commanded over interval `k` (grip commands
//! change only at frame times). The human moves [`scene::HUMAN_SPEED`] times
//! faster in cm/s (1.44 times in pixels per frame, given its wider view).
//!
//! Modules: `rng` (seeded SplitMix64), `scene` (simulation on the log grid),
//! `render` (anti-aliased rasteriser), `encode` (RGB → BT.601 limited Y'CbCr →
//! libx264 → MP4).

mod encode;
mod render;
mod rng;
mod scene;

use std::fmt::Write as _;
use std::fs;
use std::io;
use std::path::{Path, PathBuf};

use rayon::prelude::*;

use encode::{EncodeSettings, Mp4Writer};
use render::{Look, Renderer};
use rng::Rng;
use scene::{Embodiment, Kind, MICRO_PER_CM, Simulation};

/// Seed of the committed demo set.
pub const DEFAULT_SEED: u64 = 7;
/// Robot clips in the committed demo set.
pub const DEFAULT_ROBOT_CLIPS: usize = 40;
/// Human clips in the committed demo set.
pub const DEFAULT_HUMAN_CLIPS: usize = 120;
/// Number of held-out robot clips (`robot-check/`, for calibration and
/// evaluation only), in the committed demo set.
pub const DEFAULT_CHECK_CLIPS: usize = 48;
/// Video frame rate of the demo clips.
pub const DEFAULT_FPS: f64 = 10.0;
/// Width and height of the demo clips in pixels.
pub const DEFAULT_SIZE: u32 = 96;
/// Rate of the robot action log, Hz.
pub const DEFAULT_LOG_RATE: f64 = 50.0;
/// Shortest clip, frames.
pub const DEFAULT_MIN_FRAMES: usize = 80;
/// Longest clip, frames.
pub const DEFAULT_MAX_FRAMES: usize = 150;
/// x264 constant rate factor (lower is better quality, larger files).
pub const DEFAULT_CRF: u32 = 20;

/// What to generate. `Default` gives the committed demo set.
#[derive(Debug, Clone, PartialEq)]
pub struct DemoOptions {
    /// Seed: the same options give byte-identical files.
    pub seed: u64,
    /// Number of robot clips (with action logs).
    pub robot_clips: usize,
    /// Number of human clips (truth written to `human-truth/`).
    pub human_clips: usize,
    /// Number of further robot clips in `robot-check/` (with action logs), for
    /// a held-out set; drawn like the robot clips from their own streams, so
    /// adding them changes no other clip.
    pub check_clips: usize,
    /// Video frame rate.
    pub fps: f64,
    /// Frame width and height, pixels (even).
    pub size: u32,
    /// Robot log rate, Hz; a whole multiple of `fps`.
    pub log_rate: f64,
    /// Clip length range in frames (inclusive), drawn per clip.
    pub min_frames: usize,
    /// See `min_frames`.
    pub max_frames: usize,
    /// x264 constant rate factor, 0..=51.
    pub crf: u32,
    /// Worker threads; 0 uses rayon's global pool. Output does not depend on it.
    pub threads: usize,
}

impl Default for DemoOptions {
    fn default() -> Self {
        Self {
            seed: DEFAULT_SEED,
            robot_clips: DEFAULT_ROBOT_CLIPS,
            human_clips: DEFAULT_HUMAN_CLIPS,
            check_clips: DEFAULT_CHECK_CLIPS,
            fps: DEFAULT_FPS,
            size: DEFAULT_SIZE,
            log_rate: DEFAULT_LOG_RATE,
            min_frames: DEFAULT_MIN_FRAMES,
            max_frames: DEFAULT_MAX_FRAMES,
            crf: DEFAULT_CRF,
            threads: 0,
        }
    }
}

/// What [`generate`] wrote.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DemoSummary {
    pub robot_clips: usize,
    pub human_clips: usize,
    pub check_clips: usize,
    /// Total size of all files written, bytes.
    pub bytes: u64,
}

/// Why generating the demo set failed.
#[derive(Debug, thiserror::Error)]
pub enum DemoError {
    /// An option is out of range.
    #[error("invalid demo option `{name}`: {allowed}")]
    Option {
        name: &'static str,
        allowed: &'static str,
    },
    /// A folder could not be created or listed.
    #[error("failed to prepare folder {path}")]
    Folder {
        path: PathBuf,
        #[source]
        source: io::Error,
    },
    /// A file could not be written.
    #[error("failed to write {path}")]
    Write {
        path: PathBuf,
        #[source]
        source: io::Error,
    },
    /// The encoder or muxer failed.
    #[error("failed to encode {path} at frame {frame}")]
    Encode {
        path: PathBuf,
        frame: usize,
        #[source]
        source: EncodeError,
    },
    /// `clip` is not a clip id of these options.
    #[error("no demo clip named `{clip}`")]
    UnknownClip { clip: String },
}

/// An FFmpeg encoding failure (FFmpeg's own message).
#[derive(Debug)]
pub struct EncodeError(ffmpeg_next::Error);

impl std::fmt::Display for EncodeError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "ffmpeg: {}", self.0)
    }
}

impl std::error::Error for EncodeError {}

impl DemoOptions {
    /// Checks ranges and that the log rate is a whole multiple of the frame rate.
    pub fn validate(&self) -> Result<(), DemoError> {
        let bad = |name, allowed| Err(DemoError::Option { name, allowed });
        if !(self.fps.is_finite() && self.fps > 0.0 && self.fps <= 240.0) {
            return bad("fps", "a number in (0, 240]");
        }
        if !(self.size >= 32 && self.size <= 1024 && self.size % 2 == 0) {
            return bad("size", "an even number of pixels from 32 to 1024");
        }
        let ratio = self.log_rate / self.fps;
        if !(self.log_rate.is_finite() && ratio >= 1.0 && (ratio - ratio.round()).abs() < 1e-9) {
            return bad("log_rate", "a whole multiple (1 or more) of fps");
        }
        if !(4 <= self.min_frames
            && self.min_frames <= self.max_frames
            && self.max_frames <= 100_000)
        {
            return bad(
                "min_frames/max_frames",
                "4 <= min_frames <= max_frames <= 100000",
            );
        }
        if self.crf > 51 {
            return bad("crf", "0 to 51");
        }
        Ok(())
    }

    fn ratio(&self) -> usize {
        (self.log_rate / self.fps).round() as usize
    }
}

/// One clip of the set, before it is simulated.
#[derive(Debug, Clone)]
struct ClipPlan {
    kind: Kind,
    /// Random stream family: 1 robot, 2 human, 3 held-out robot.
    family: u64,
    index: usize,
    id: String,
    /// Folder of the video (and of the robot's log; human truth goes to `human-truth/`).
    folder: &'static str,
}

fn plans(opts: &DemoOptions) -> Vec<ClipPlan> {
    let mut out = Vec::new();
    for (kind, family, count, prefix, folder) in [
        (Kind::Robot, 1, opts.robot_clips, "robot", "robot"),
        (Kind::Human, 2, opts.human_clips, "human", "human"),
        (Kind::Robot, 3, opts.check_clips, "check", CHECK_FOLDER),
    ] {
        let width = count.saturating_sub(1).to_string().len().max(2);
        for index in 0..count {
            out.push(ClipPlan {
                kind,
                family,
                index,
                id: format!("{prefix}-{index:0width$}"),
                folder,
            });
        }
    }
    out
}

/// Folder of the held-out robot clips.
const CHECK_FOLDER: &str = "robot-check";

struct Built {
    sim: Simulation,
    renderer: Renderer,
}

/// Simulates a clip; its random stream depends only on the seed, family and index.
fn build(opts: &DemoOptions, plan: &ClipPlan) -> Built {
    let stream = (plan.family << 32) | plan.index as u64;
    let mut rng = Rng::derive(opts.seed, stream);
    let frames = rng.int(opts.min_frames as u64, opts.max_frames as u64) as usize;
    let body = Embodiment::of(plan.kind);
    let look = Look::sample(plan.kind, &mut rng);
    let sim = scene::simulate(&body, frames, opts.ratio(), opts.log_rate, &mut rng);
    let renderer = Renderer::new(&body, opts.size, look);
    Built { sim, renderer }
}

/// Generates the demo set under `dir` (creating `robot/`, `human/` and
/// `human-truth/`), replacing earlier demo files there and removing demo clips
/// that the options no longer produce.
pub fn generate(dir: &Path, opts: &DemoOptions) -> Result<DemoSummary, DemoError> {
    opts.validate()?;
    let folders = ["robot", "human", "human-truth", CHECK_FOLDER].map(|s| dir.join(s));
    // robot-check/ only when there are held-out clips to write.
    for f in folders
        .iter()
        .filter(|f| opts.check_clips > 0 || !f.ends_with(CHECK_FOLDER))
    {
        fs::create_dir_all(f).map_err(|source| DemoError::Folder {
            path: f.clone(),
            source,
        })?;
    }
    let plans = plans(opts);
    let work = || -> Result<Vec<u64>, DemoError> {
        plans.par_iter().map(|p| write_clip(dir, opts, p)).collect()
    };
    let sizes = if opts.threads == 0 {
        work()?
    } else {
        rayon::ThreadPoolBuilder::new()
            .num_threads(opts.threads)
            .build()
            .expect("thread pool")
            .install(work)?
    };
    remove_stale(&folders, &plans)?;
    let readme = dir.join("README.md");
    let text = readme_text(opts);
    write_file(&readme, text.as_bytes())?;
    Ok(DemoSummary {
        robot_clips: opts.robot_clips,
        human_clips: opts.human_clips,
        check_clips: opts.check_clips,
        bytes: sizes.iter().sum::<u64>() + text.len() as u64,
    })
}

/// The RGB24 frames of clip `clip` exactly as they were handed to the
/// encoder (for tests that compare decoded video with the source).
#[doc(hidden)]
pub fn source_frames(opts: &DemoOptions, clip: &str) -> Result<Vec<Vec<u8>>, DemoError> {
    opts.validate()?;
    let plan = plans(opts)
        .into_iter()
        .find(|p| p.id == clip)
        .ok_or_else(|| DemoError::UnknownClip {
            clip: clip.to_string(),
        })?;
    let b = build(opts, &plan);
    Ok(b.sim
        .frames
        .iter()
        .map(|f| b.renderer.render(f, &b.sim.blocks))
        .collect())
}

/// Writes one clip's MP4 and its sidecar (robot) or truth (human); returns bytes written.
fn write_clip(dir: &Path, opts: &DemoOptions, plan: &ClipPlan) -> Result<u64, DemoError> {
    let b = build(opts, plan);
    let (video, table) = match plan.kind {
        Kind::Robot => (
            dir.join(plan.folder).join(format!("{}.mp4", plan.id)),
            dir.join(plan.folder)
                .join(format!("{}.actions.csv", plan.id)),
        ),
        Kind::Human => (
            dir.join(plan.folder).join(format!("{}.mp4", plan.id)),
            dir.join("human-truth")
                .join(format!("{}.actions.csv", plan.id)),
        ),
    };
    let settings = EncodeSettings {
        size: opts.size,
        fps: opts.fps,
        crf: opts.crf,
        gop: (opts.fps * 5.0).round().max(1.0) as u32,
    };
    let tmp = temp_path(&video);
    let encoded = (|| {
        let fail = |frame: usize| {
            let path = video.clone();
            move |e| DemoError::Encode {
                path,
                frame,
                source: EncodeError(e),
            }
        };
        let mut w = Mp4Writer::create(&tmp, &settings).map_err(fail(0))?;
        for (k, f) in b.sim.frames.iter().enumerate() {
            let rgb = b.renderer.render(f, &b.sim.blocks);
            w.push_rgb(&rgb).map_err(fail(k))?;
        }
        w.finish().map_err(fail(b.sim.frames.len()))?;
        fs::rename(&tmp, &video).map_err(|source| DemoError::Write {
            path: video.clone(),
            source,
        })
    })();
    if encoded.is_err() {
        let _ = fs::remove_file(&tmp);
    }
    encoded?;
    let csv = match plan.kind {
        Kind::Robot => log_csv(&b.sim, opts.log_rate),
        Kind::Human => truth_csv(&b.sim, opts.ratio(), opts.fps),
    };
    write_file(&table, csv.as_bytes())?;
    let video_bytes = fs::metadata(&video)
        .map_err(|source| DemoError::Write {
            path: video.clone(),
            source,
        })?
        .len();
    Ok(video_bytes + csv.len() as u64)
}

/// The robot's log: one row per tick, `t = i / log_rate`.
fn log_csv(sim: &Simulation, log_rate: f64) -> String {
    let mut s = String::from("t,dx,dy,grip\n");
    for (i, (d, g)) in sim.deltas.iter().zip(&sim.grip).enumerate() {
        let _ = writeln!(s, "{},{},{},{}", i as f64 / log_rate, cm(d[0]), cm(d[1]), g);
    }
    s
}

/// The human truth: one row per frame, deltas summed over the frame interval,
/// grip as held over it (commands change only at frame times).
fn truth_csv(sim: &Simulation, ratio: usize, fps: f64) -> String {
    let mut s = String::from("t,dx,dy,grip\n");
    for (k, chunk) in sim.deltas.chunks(ratio).enumerate() {
        let sum = chunk
            .iter()
            .fold([0i64; 2], |a, d| [a[0] + d[0], a[1] + d[1]]);
        let g = sim.grip[k * ratio];
        let _ = writeln!(s, "{},{},{},{}", k as f64 / fps, cm(sum[0]), cm(sum[1]), g);
    }
    s
}

/// Integer 1e-4 cm units as a decimal string with four decimals.
fn cm(micro: i64) -> String {
    let sign = if micro < 0 { "-" } else { "" };
    let a = micro.unsigned_abs();
    let m = MICRO_PER_CM as u64;
    format!("{sign}{}.{:04}", a / m, a % m)
}

/// Removes `robot-N` / `human-N` / `check-N` files that this run did not produce.
fn remove_stale(folders: &[PathBuf; 4], plans: &[ClipPlan]) -> Result<(), DemoError> {
    let keep: std::collections::HashSet<&str> = plans.iter().map(|p| p.id.as_str()).collect();
    for folder in folders {
        if !folder.exists() {
            continue;
        }
        let entries = fs::read_dir(folder).map_err(|source| DemoError::Folder {
            path: folder.clone(),
            source,
        })?;
        for entry in entries.flatten() {
            let name = entry.file_name();
            let Some(name) = name.to_str() else { continue };
            let stem = name
                .strip_suffix(".actions.csv")
                .or_else(|| name.strip_suffix(".mp4"));
            let Some(stem) = stem else { continue };
            let ours = ["robot-", "human-", "check-"].iter().any(|p| {
                stem.strip_prefix(p)
                    .is_some_and(|n| !n.is_empty() && n.bytes().all(|c| c.is_ascii_digit()))
            });
            if ours && !keep.contains(stem) {
                let path = entry.path();
                fs::remove_file(&path).map_err(|source| DemoError::Write { path, source })?;
            }
        }
    }
    Ok(())
}

fn temp_path(path: &Path) -> PathBuf {
    let mut name = path.file_name().unwrap_or_default().to_os_string();
    name.push(format!(".{}.tmp", std::process::id()));
    path.with_file_name(name)
}

/// Writes a file under a temporary name, then renames it into place.
fn write_file(path: &Path, bytes: &[u8]) -> Result<(), DemoError> {
    let tmp = temp_path(path);
    let r = fs::write(&tmp, bytes).and_then(|()| fs::rename(&tmp, path));
    if r.is_err() {
        let _ = fs::remove_file(&tmp);
    }
    r.map_err(|source| DemoError::Write {
        path: path.to_path_buf(),
        source,
    })
}

fn readme_text(opts: &DemoOptions) -> String {
    let robot_scale = opts.size as f64 / scene::ROBOT_VIEW_CM;
    let human_scale = opts.size as f64 / scene::HUMAN_VIEW_CM;
    format!(
        "# actuary demo clips (synthetic)\n\
         \n\
         Generated by `actuary demo-clips DIR` (seed {seed}); regenerate rather than edit.\n\
         A top-down camera over a table where square blocks are pushed around.\n\
         \n\
         - `robot/`: {rc} clips of a robot gripper, {size}x{size} px, {fps} fps, H.264\n\
         \x20 (BT.601, limited range), each with `NAME.actions.csv`: a {log} Hz log\n\
         \x20 `t,dx,dy,grip` (t from 0 on an exact grid; a row holds until the next).\n\
         - `robot-check/`: {cc} more robot clips made the same way, for a held-out set\n\
         \x20 (`held-out = true` in the demo spec: calibration and evaluation only).\n\
         - `human/`: {hc} clips of a human hand doing the same kind of pushing, no sidecars.\n\
         - `human-truth/`: the human clips' true actions, for evaluation only: one row per\n\
         \x20 frame, `t = k / {fps}`, row k = the action from frame k to frame k+1, dx and dy\n\
         \x20 summed over the interval; the last row covers the last frame's display interval.\n\
         \n\
         `dx`, `dy`: effector displacement in table centimetres (x to the image's right, y to\n\
         its bottom), map with `sum`. `grip`: 1 closed, 0 open, map with `hold`; it changes only\n\
         at frame times and the next frame shows the new state.\n\
         \n\
         Camera scale: robot {robot_scale} px/cm ({rv} cm across), human {human_scale} px/cm\n\
         ({hv} cm across). The human moves {speed}x faster in cm/s, so about {px:.2}x faster in\n\
         pixels per frame. Clips have {min}-{max} frames. No real people or places are shown.\n",
        seed = opts.seed,
        rc = opts.robot_clips,
        hc = opts.human_clips,
        cc = opts.check_clips,
        size = opts.size,
        fps = opts.fps,
        log = opts.log_rate,
        rv = scene::ROBOT_VIEW_CM,
        hv = scene::HUMAN_VIEW_CM,
        speed = scene::HUMAN_SPEED,
        px = scene::HUMAN_SPEED * human_scale / robot_scale,
        min = opts.min_frames,
        max = opts.max_frames,
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cm_formats_integer_units() {
        assert_eq!(cm(0), "0.0000");
        assert_eq!(cm(12_345), "1.2345");
        assert_eq!(cm(-5), "-0.0005");
        assert_eq!(cm(-20_000), "-2.0000");
    }

    #[test]
    fn ids_are_unique_and_padded() {
        let opts = DemoOptions {
            robot_clips: 3,
            human_clips: 120,
            check_clips: 2,
            ..DemoOptions::default()
        };
        let p = plans(&opts);
        assert_eq!(p[0].id, "robot-00");
        assert_eq!(p[3].id, "human-000");
        assert_eq!(
            (p[123].id.as_str(), p[123].folder),
            ("check-00", "robot-check")
        );
        let ids: std::collections::HashSet<_> = p.iter().map(|p| &p.id).collect();
        assert_eq!(ids.len(), 125);
    }

    #[test]
    fn truth_sums_the_log() {
        let opts = DemoOptions {
            min_frames: 12,
            max_frames: 12,
            ..DemoOptions::default()
        };
        let plan = &plans(&opts)[0];
        let b = build(&opts, plan);
        let log = log_csv(&b.sim, 50.0);
        let truth = truth_csv(&b.sim, 5, 10.0);
        assert_eq!(log.lines().count(), 1 + 60);
        assert_eq!(truth.lines().count(), 1 + 12);
        let parse = |l: &str| -> Vec<f64> { l.split(',').map(|x| x.parse().unwrap()).collect() };
        let log_rows: Vec<Vec<f64>> = log.lines().skip(1).map(parse).collect();
        for (k, row) in truth.lines().skip(1).map(parse).enumerate() {
            let dx: f64 = log_rows[k * 5..k * 5 + 5].iter().map(|r| r[1]).sum();
            assert!((row[1] - dx).abs() < 1e-9);
            assert!((row[0] - k as f64 / 10.0).abs() < 1e-12);
        }
    }

    #[test]
    fn bad_options_are_refused() {
        let o = DemoOptions {
            log_rate: 25.0,
            ..DemoOptions::default()
        };
        assert!(matches!(
            o.validate(),
            Err(DemoError::Option {
                name: "log_rate",
                ..
            })
        ));
        let o = DemoOptions {
            size: 95,
            ..DemoOptions::default()
        };
        assert!(o.validate().is_err());
    }
}
