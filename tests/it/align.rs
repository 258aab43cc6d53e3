//! The align stage: motion rate against the FFmpeg CLI's timestamp filter, CIELAB against
//! scikit-image, the gap figure against SciPy and on known colour shifts / blurs, and clock
//! offsets recovered from a known shift. Inputs are made here: synthetic frames written
//! straight into a decode store (the decode stage is tested in `decode.rs`).

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use actuary::actions::{MapRule, map_to_frames, read_sidecar};
use actuary::align::color::rgb_to_lab;
use actuary::align::gap::{FEATURES, frame_features, gap};
use actuary::align::motion::clip_motion;
use actuary::align::{AlignOptions, AlignedRun, Photometric, Speed, align_run};
use actuary::spec::{ActionsOptions, Offset};
use actuary::store::{ClipRecord, FrameWriter, SourceInfo, write_json_atomic};

use crate::util::{ffmpeg, python, require_ffmpeg, require_python, run_stdout, s};

const W: usize = 64;
const H: usize = 64;

/// A small deterministic generator (64-bit LCG, Knuth's MMIX constants).
struct Lcg(u64);
impl Lcg {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// A smooth texture on the plane (sums of sines), RGB in 0..255.
fn texture(x: f64, y: f64) -> [f64; 3] {
    let v = 128.0
        + 45.0 * (0.37 * x).sin() * (0.29 * y).cos()
        + 30.0 * (0.61 * x + 0.23 * y).sin()
        + 15.0 * (0.13 * x - 0.41 * y).cos();
    [v, 0.8 * v + 20.0, 0.6 * v + 40.0]
}

/// The texture panned by `(dx, dy)`, with a per-channel colour gain and offset.
fn pan_frame(dx: f64, dy: f64, gain: [f64; 3], add: [f64; 3]) -> Vec<u8> {
    let mut f = Vec::with_capacity(W * H * 3);
    for y in 0..H {
        for x in 0..W {
            let c = texture(x as f64 + dx, y as f64 + dy);
            for k in 0..3 {
                f.push((c[k] * gain[k] + add[k]).round().clamp(0.0, 255.0) as u8);
            }
        }
    }
    f
}

fn actions_opts(offset: Offset) -> ActionsOptions {
    let mut map = BTreeMap::new();
    map.insert("dx".to_string(), MapRule::Sum);
    map.insert("dy".to_string(), MapRule::Sum);
    map.insert("grip".to_string(), MapRule::Hold);
    ActionsOptions {
        map,
        default_rule: MapRule::Sum,
        offset,
        offset_window_s: 1.0,
        offset_min_correlation: 0.3,
    }
}

/// Writes one clip into `RUN/decode/clips/<set>/<id>.{frames,clip.json}` as the decode stage would.
fn write_clip(
    run: &Path,
    set: &str,
    id: &str,
    frames: &[Vec<u8>],
    fps: f64,
    actions: Option<Vec<Vec<f32>>>,
    sidecar: Option<PathBuf>,
) {
    let decode = run.join("decode");
    let mut w = FrameWriter::create(
        &ClipRecord::frames_path(&decode, set, id),
        W as u32,
        H as u32,
    )
    .unwrap();
    for f in frames {
        w.push(f).unwrap();
    }
    w.finish().unwrap();
    let labelled = actions.is_some();
    let rec = ClipRecord {
        id: id.into(),
        set: set.into(),
        labelled,
        frames: frames.len() as u32,
        fps,
        width: W as u32,
        height: H as u32,
        dropped: 0,
        repeated: 0,
        source: SourceInfo {
            path: PathBuf::from(format!("{id}.mp4")),
            codec: "h264".into(),
            width: W as u32,
            height: H as u32,
            fps,
            duration_s: frames.len() as f64 / fps,
            frames: frames.len() as u64,
            rotation: 0,
            matrix: "bt601".into(),
            range: "limited".into(),
            untagged: true,
        },
        fingerprint: String::new(),
        key: String::new(),
        action_dims: if labelled {
            vec!["dx".into(), "dy".into(), "grip".into()]
        } else {
            vec![]
        },
        actions,
        sidecar,
        sidecar_fingerprint: None,
    };
    write_json_atomic(&ClipRecord::record_path(&decode, set, id), &rec).unwrap();
}

/// Decodes `path` with the FFmpeg CLI to 64x64 RGB frames at 10 fps.
fn ffmpeg_frames(path: &Path) -> Vec<Vec<u8>> {
    let raw = run_stdout(
        "ffmpeg",
        &[
            "-hide_banner",
            "-loglevel",
            "error",
            "-i",
            s(path),
            "-vf",
            "fps=10",
            "-f",
            "rawvideo",
            "-pix_fmt",
            "rgb24",
            "-",
        ],
    );
    raw.chunks_exact(W * H * 3).map(<[u8]>::to_vec).collect()
}

#[test]
fn clip_sped_up_by_ffmpeg_setpts_reads_as_twice_the_motion_rate() {
    // Reference: the FFmpeg CLI's `setpts=0.5*PTS` filter plays the clip twice as fast.
    // (Frames are decoded with the FFmpeg CLI at 10 fps; the decode stage is checked
    // against the same CLI in decode.rs.)
    if !require_ffmpeg() {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let raw: Vec<u8> = (0..80)
        .flat_map(|i| pan_frame(0.65 * i as f64, 0.4 * i as f64, [1.0; 3], [0.0; 3]))
        .collect();
    let raw_path = dir.path().join("pan.rgb");
    std::fs::write(&raw_path, raw).unwrap();
    let orig = dir.path().join("orig.mp4");
    let fast = dir.path().join("fast.mp4");
    ffmpeg(&[
        "-f",
        "rawvideo",
        "-pix_fmt",
        "rgb24",
        "-s",
        "64x64",
        "-r",
        "20",
        "-i",
        s(&raw_path),
        "-c:v",
        "libx264",
        "-crf",
        "12",
        "-pix_fmt",
        "yuv420p",
        s(&orig),
    ]);
    ffmpeg(&[
        "-i",
        s(&orig),
        "-vf",
        "setpts=0.5*PTS",
        "-c:v",
        "libx264",
        "-crf",
        "12",
        s(&fast),
    ]);
    let rate = |frames: &[Vec<u8>]| {
        clip_motion(frames.len(), W, H, 500, |i| frames[i].clone())
            .rate
            .unwrap()
    };
    let a = ffmpeg_frames(&orig);
    let b = ffmpeg_frames(&fast);
    let (ra, rb) = (rate(&a), rate(&b));
    let ratio = rb / ra;
    eprintln!("motion rate original {ra:.3}, setpts=0.5 {rb:.3} px/frame, ratio {ratio:.3}");
    assert!(
        (ratio - 2.0).abs() <= 0.1,
        "motion rates {ra:.3} and {rb:.3} px/frame: ratio {ratio:.3}, want 2.0 +- 0.1"
    );
}

/// scikit-image's `rgb2lab` (D65, 2-degree observer) on the grid r, g, b in 0, 17, ..., 255.
const SKIMAGE_LAB: &str = r#"
import json
import numpy as np
from skimage.color import rgb2lab
v = np.arange(0, 256, 17)
grid = np.array(np.meshgrid(v, v, v, indexing='ij')).reshape(3, -1).T
lab = rgb2lab((grid / 255.0).reshape(1, -1, 3), illuminant='D65', observer='2').reshape(-1, 3)
print(json.dumps(lab.tolist()))
"#;

#[test]
fn rgb_to_cielab_matches_scikit_image_within_half_a_delta_e() {
    // Reference: scikit-image `skimage.color.rgb2lab` (sRGB, D65, CIE 15:2004 formulas).
    if !require_python(&["numpy", "skimage"]) {
        return;
    }
    let reference: Vec<[f64; 3]> = serde_json::from_str(&python(SKIMAGE_LAB, &[])).unwrap();
    let mut i = 0;
    let mut worst = 0.0f64;
    for r in (0..=255).step_by(17) {
        for g in (0..=255).step_by(17) {
            for b in (0..=255).step_by(17) {
                let ours = rgb_to_lab([r as u8, g as u8, b as u8]);
                let de = ((ours[0] - reference[i][0]).powi(2)
                    + (ours[1] - reference[i][1]).powi(2)
                    + (ours[2] - reference[i][2]).powi(2))
                .sqrt();
                worst = worst.max(de);
                i += 1;
            }
        }
    }
    assert_eq!(i, reference.len());
    assert!(
        worst < 0.5,
        "largest CIE76 Delta-E against scikit-image: {worst}"
    );
}

/// Synthetic scenes: a textured background with a few coloured discs at random places.
fn scenes(n: usize, seed: u64) -> Vec<Vec<u8>> {
    let mut rng = Lcg(seed);
    (0..n)
        .map(|_| {
            let mut f = pan_frame(
                rng.next() * 200.0,
                rng.next() * 200.0,
                [0.8, 0.8, 0.8],
                [10.0, 0.0, 5.0],
            );
            for _ in 0..3 {
                let (cx, cy, r) = (rng.next() * 64.0, rng.next() * 64.0, 4.0 + rng.next() * 8.0);
                let col = [rng.next() * 255.0, rng.next() * 255.0, rng.next() * 255.0];
                for y in 0..H {
                    for x in 0..W {
                        if (x as f64 - cx).powi(2) + (y as f64 - cy).powi(2) < r * r {
                            for k in 0..3 {
                                f[(y * W + x) * 3 + k] = col[k] as u8;
                            }
                        }
                    }
                }
            }
            f
        })
        .collect()
}

fn shift_colour(f: &[u8], amount: f64) -> Vec<u8> {
    f.chunks_exact(3)
        .flat_map(|p| {
            [
                (f64::from(p[0]) + amount).clamp(0.0, 255.0) as u8,
                (f64::from(p[1]) + 0.3 * amount).clamp(0.0, 255.0) as u8,
                (f64::from(p[2]) - 0.5 * amount).clamp(0.0, 255.0) as u8,
            ]
        })
        .collect()
}

fn box_blur(f: &[u8], radius: usize) -> Vec<u8> {
    let mut out = f.to_vec();
    let r = radius as isize;
    for y in 0..H as isize {
        for x in 0..W as isize {
            for k in 0..3 {
                let (mut s, mut n) = (0u32, 0u32);
                for dy in -r..=r {
                    for dx in -r..=r {
                        let (xx, yy) = (x + dx, y + dy);
                        if xx >= 0 && yy >= 0 && (xx as usize) < W && (yy as usize) < H {
                            s += u32::from(f[(yy as usize * W + xx as usize) * 3 + k]);
                            n += 1;
                        }
                    }
                }
                out[(y as usize * W + x as usize) * 3 + k] = (s as f32 / n as f32).round() as u8;
            }
        }
    }
    out
}

fn feats(frames: &[Vec<u8>]) -> Vec<[f64; FEATURES]> {
    frames.iter().map(|f| frame_features(f, W, H)).collect()
}

#[test]
fn gap_is_zero_against_itself_and_grows_with_colour_shift_and_blur() {
    // Definition of the Fréchet distance (Dowson & Landau 1982): 0 for identical Gaussians.
    let set = scenes(120, 1);
    let base = feats(&set);
    assert!(gap(&base, &base) < 1e-6, "self gap {}", gap(&base, &base));
    // Two independent draws of the same scene distribution: small next to a real shift.
    let other = feats(&scenes(120, 2));
    let noise = gap(&base, &other);
    let mut last = 0.0;
    for amount in [5.0, 10.0, 20.0, 40.0] {
        let g = gap(
            &base,
            &feats(
                &set.iter()
                    .map(|f| shift_colour(f, amount))
                    .collect::<Vec<_>>(),
            ),
        );
        assert!(g > last, "colour shift {amount}: gap {g} not above {last}");
        last = g;
    }
    assert!(
        noise < 0.25 * last,
        "sampling noise {noise} vs shifted gap {last}"
    );
    let mut last = 0.0;
    for radius in [1, 2, 3] {
        let g = gap(
            &base,
            &feats(&set.iter().map(|f| box_blur(f, radius)).collect::<Vec<_>>()),
        );
        assert!(g > last, "blur radius {radius}: gap {g} not above {last}");
        last = g;
    }
}

/// Fréchet distance between Gaussian fits with SciPy's `sqrtm` (the usual FID formula).
const SCIPY_FRECHET: &str = r#"
import sys
import numpy as np
from scipy import linalg
a = np.loadtxt(sys.argv[1], delimiter=',')
b = np.loadtxt(sys.argv[2], delimiter=',')
ma, mb = a.mean(0), b.mean(0)
ca, cb = np.cov(a, rowvar=False, bias=True), np.cov(b, rowvar=False, bias=True)
cross = linalg.sqrtm(ca @ cb).real
print(float(((ma - mb) ** 2).sum() + np.trace(ca + cb - 2 * cross)))
"#;

#[test]
fn gap_figure_matches_scipy_frechet_distance() {
    // Reference: SciPy `scipy.linalg.sqrtm` in the Fréchet distance between Gaussians.
    if !require_python(&["numpy", "scipy"]) {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let a = feats(&scenes(80, 3));
    let b = feats(
        &scenes(80, 4)
            .iter()
            .map(|f| shift_colour(&box_blur(f, 1), 12.0))
            .collect::<Vec<_>>(),
    );
    let write = |name: &str, rows: &[[f64; FEATURES]]| {
        let mut t = String::new();
        for r in rows {
            let line: Vec<String> = r.iter().map(|v| format!("{v:.17e}")).collect();
            writeln!(t, "{}", line.join(",")).unwrap();
        }
        let p = dir.path().join(name);
        std::fs::write(&p, t).unwrap();
        p
    };
    let (pa, pb) = (write("a.csv", &a), write("b.csv", &b));
    let reference: f64 = python(SCIPY_FRECHET, &[s(&pa), s(&pb)])
        .trim()
        .parse()
        .unwrap();
    let ours = gap(&a, &b);
    assert!(
        (ours - reference).abs() <= 1e-6 * reference.max(1.0),
        "ours {ours}, scipy {reference}"
    );
}

/// A blob moving in bursts at 10 fps for 20 s, with its 50 Hz action log (dx, dy deltas in
/// pixels, a gripper flag). Returns (frames, log rows (t_true, dx, dy, grip)).
fn bursty_clip(seed: u64) -> (Vec<Vec<u8>>, Vec<[f64; 4]>) {
    let mut rng = Lcg(seed);
    let (tick, fps, secs) = (0.02, 10.0, 20.0);
    let ticks = (secs / tick) as usize;
    let (mut x, mut y) = (32.0f64, 32.0f64);
    let (mut vx, mut vy, mut left, mut grip) = (0.0, 0.0, 0usize, 0.0);
    let mut path = Vec::with_capacity(ticks + 1);
    let mut log = Vec::with_capacity(ticks);
    for k in 0..ticks {
        if left == 0 {
            left = 10 + (rng.next() * 60.0) as usize;
            let moving = rng.next() < 0.6;
            let sp = if moving { 5.0 + rng.next() * 20.0 } else { 0.0 };
            let ang = rng.next() * std::f64::consts::TAU;
            (vx, vy) = (sp * ang.cos(), sp * ang.sin());
            if rng.next() < 0.3 {
                grip = 1.0 - grip;
            }
        }
        left -= 1;
        path.push((x, y));
        let (mut dx, mut dy) = (vx * tick, vy * tick);
        if !(12.0..52.0).contains(&(x + dx)) {
            vx = -vx;
            dx = -dx;
        }
        if !(12.0..52.0).contains(&(y + dy)) {
            vy = -vy;
            dy = -dy;
        }
        log.push([k as f64 * tick, dx, dy, grip]);
        x += dx;
        y += dy;
    }
    path.push((x, y));
    let frames = (0..(secs * fps) as usize)
        .map(|i| {
            let (cx, cy) = path[((i as f64 / fps) / tick).round() as usize];
            let mut f = Vec::with_capacity(W * H * 3);
            for py in 0..H {
                for px in 0..W {
                    let d2 = (px as f64 - cx).powi(2) + (py as f64 - cy).powi(2);
                    let v = 60.0 + 150.0 * (-d2 / (2.0 * 9.0)).exp();
                    f.extend_from_slice(&[v as u8, (0.9 * v) as u8, (0.5 * v) as u8]);
                }
            }
            f
        })
        .collect();
    (frames, log)
}

fn write_log(path: &Path, rows: &[[f64; 4]], shift_s: f64) {
    let mut t = String::from("t,dx,dy,grip\n");
    for r in rows {
        writeln!(t, "{:.4},{:.6},{:.6},{}", r[0] + shift_s, r[1], r[2], r[3]).unwrap();
    }
    std::fs::write(path, t).unwrap();
}

#[test]
fn sidecar_shifted_by_0_3_s_is_estimated_back_within_one_frame_interval() {
    // Ground truth: the log is written with its clock 0.3 s late (t_log = t_video + 0.3), so
    // video time = log time - 0.3 and the offset to find is -0.3 s.
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path().join("run");
    let (frames, log) = bursty_clip(11);
    let side = dir.path().join("c1.actions.csv");
    write_log(&side, &log, 0.3);
    let fps = 10.0;
    let rules = [MapRule::Sum, MapRule::Sum, MapRule::Hold];
    let sidecar = read_sidecar(&side).unwrap();
    let at_zero = map_to_frames(&sidecar, &rules, fps, frames.len() as u32, 0.0).unwrap();
    write_clip(
        &run,
        "robot",
        "c1",
        &frames,
        fps,
        Some(at_zero.clone()),
        Some(side.clone()),
    );
    // An unrelated log (noise) must not be trusted.
    let mut rng = Lcg(5);
    let noise: Vec<[f64; 4]> = log
        .iter()
        .map(|r| [r[0], rng.next() - 0.5, rng.next() - 0.5, 0.0])
        .collect();
    let side2 = dir.path().join("c2.actions.csv");
    write_log(&side2, &noise, 0.0);
    let (frames2, _) = bursty_clip(12);
    let s2 = read_sidecar(&side2).unwrap();
    write_clip(
        &run,
        "robot",
        "c2",
        &frames2,
        fps,
        Some(map_to_frames(&s2, &rules, fps, 200, 0.0).unwrap()),
        Some(side2),
    );
    let opts = AlignOptions {
        photometric: Photometric::Off,
        speed: Speed::Off,
        ..AlignOptions::default()
    };
    let (alignment, summary) = align_run(&run, &opts, &actions_opts(Offset::Estimate), 2).unwrap();
    let c1 = alignment.clips.iter().find(|c| c.id == "c1").unwrap();
    let est = c1.offset.unwrap();
    eprintln!("offset estimate {est:?}");
    assert!(est.trusted, "{est:?}");
    assert!(
        (est.offset_s - -0.3).abs() <= 1.0 / fps,
        "estimated {est:?}, want -0.3 +- 0.1"
    );
    let c2 = alignment
        .clips
        .iter()
        .find(|c| c.id == "c2")
        .unwrap()
        .offset
        .unwrap();
    assert!(!c2.trusted && c2.offset_s == 0.0, "noise log: {c2:?}");
    assert_eq!(summary.offsets.len(), 2);
    // Later stages read the re-mapped actions; the decode record keeps the originals.
    let view = AlignedRun::open(&run).unwrap();
    let clip = view.clip("robot", "c1").unwrap();
    let remapped = map_to_frames(&sidecar, &rules, fps, frames.len() as u32, est.offset_s).unwrap();
    assert_eq!(clip.actions().unwrap(), &remapped[..]);
    assert_ne!(clip.actions().unwrap(), &at_zero[..]);
}

#[test]
fn faster_set_is_resampled_colour_matched_and_mapped_back_to_the_decode_grid() {
    // Ground truth: synthetic pans at known speeds (1.0 and 2.0 px per frame) and a known tint.
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path().join("run");
    let fps = 10.0;
    for c in 0..3 {
        let o = 40.0 * c as f64;
        let robot: Vec<Vec<u8>> = (0..40)
            .map(|i| pan_frame(o + 0.8 * i as f64, 0.6 * i as f64, [1.0; 3], [0.0; 3]))
            .collect();
        let acts = vec![vec![0.8f32, 0.6, 0.0]; 39];
        write_clip(
            &run,
            "robot",
            &format!("r{c}"),
            &robot,
            fps,
            Some(acts),
            None,
        );
        let human: Vec<Vec<u8>> = (0..40)
            .map(|i| {
                pan_frame(
                    o + 1.6 * i as f64,
                    1.2 * i as f64,
                    [0.8, 0.9, 1.1],
                    [30.0, 10.0, -20.0],
                )
            })
            .collect();
        write_clip(&run, "human", &format!("h{c}"), &human, fps, None, None);
    }
    let (alignment, summary) = align_run(
        &run,
        &AlignOptions::default(),
        &actions_opts(Offset::Seconds(0.0)),
        2,
    )
    .unwrap();
    let human = summary.sets.iter().find(|s| s.name == "human").unwrap();
    eprintln!(
        "gap {} -> {}, speed factor {}",
        summary.gap_before, summary.gap_after, human.speed_factor
    );
    assert!(
        (human.speed_factor - 2.0).abs() < 0.15,
        "speed factor {}",
        human.speed_factor
    );
    let robot_rate = summary.labelled_motion_rate.unwrap();
    let after = human.motion_rate_after.unwrap();
    assert!(
        (after / robot_rate - 1.0).abs() < 0.15,
        "after resampling {after} vs robot {robot_rate}"
    );
    assert!(
        summary.gap_after <= 0.5 * summary.gap_before,
        "gap {} -> {}",
        summary.gap_before,
        summary.gap_after
    );
    assert_eq!(summary.resampled.as_deref(), Some("unlabelled"));
    assert!(
        alignment
            .clips
            .iter()
            .filter(|c| c.set == "robot")
            .all(|c| c.speed_factor == 1.0)
    );

    let view = AlignedRun::open(&run).unwrap();
    let h0 = view.clip("human", "h0").unwrap();
    assert!(h0.len() > 70, "model frames {}", h0.len());
    let mut buf = vec![0u8; h0.frame_bytes()];
    h0.frame(h0.len() - 1, &mut buf).unwrap();
    // A constant per-model-transition delta of 1 maps to ~2 per decode transition (sum), a
    // constant command stays itself (hold).
    let ones = vec![vec![1.0f32, 5.0]; h0.len() - 1];
    let back = h0
        .to_decode_grid(&ones, &[MapRule::Sum, MapRule::Hold])
        .unwrap();
    assert_eq!(back.len(), h0.decode_len() - 1);
    for (k, r) in back.iter().enumerate() {
        // Every decode interval but the last covers exactly `speed_factor` model intervals.
        if k + 1 < back.len() {
            assert!(
                (r[0] - h0.speed_factor() as f32).abs() < 1e-3,
                "row {k}: {r:?}"
            );
        }
        assert_eq!(r[1], 5.0);
    }
    let total: f32 = back.iter().map(|r| r[0]).sum();
    assert!(
        (total - (h0.len() - 1) as f32).abs() < 1e-3,
        "sum rule keeps the total: {total}"
    );
    // Identity for the labelled clips, and the passthrough view.
    let r0 = view.clip("robot", "r0").unwrap();
    assert_eq!(r0.len(), r0.decode_len());
    assert_eq!(r0.actions().unwrap().len(), 39);
    let pass = AlignedRun::passthrough(&run, &actions_opts(Offset::Seconds(0.0))).unwrap();
    let p0 = pass.clip("human", "h0").unwrap();
    assert_eq!(p0.len(), p0.decode_len());
    p0.frame(3, &mut buf).unwrap();
    assert_eq!(&buf[..], p0.decode_frame(3));
}
