//! Shared helpers for the integration tests: external tools (the FFmpeg CLI,
//! python3 with reference libraries) that must be present unless
//! `ACTUARY_ALLOW_SKIP=1` is set.

#![allow(dead_code)]

use std::path::Path;
use std::process::Command;

/// Whether a missing external tool may skip a test instead of failing it.
pub fn allow_skip() -> bool {
    std::env::var("ACTUARY_ALLOW_SKIP").is_ok_and(|v| v == "1")
}

/// Whether `program --version`-style probing works; panics (fails the test)
/// when it does not and skipping is not allowed. Returns false to skip.
pub fn require_tool(program: &str, probe_args: &[&str]) -> bool {
    let ok = Command::new(program)
        .args(probe_args)
        .output()
        .is_ok_and(|o| o.status.success());
    if !ok {
        if allow_skip() {
            eprintln!("skipping: {program} is not available (ACTUARY_ALLOW_SKIP=1)");
            return false;
        }
        panic!("{program} is required for this test (set ACTUARY_ALLOW_SKIP=1 to skip)");
    }
    true
}

/// Requires the FFmpeg CLI (`ffmpeg` and `ffprobe`).
pub fn require_ffmpeg() -> bool {
    require_tool("ffmpeg", &["-version"]) && require_tool("ffprobe", &["-version"])
}

/// Requires python3 able to import every module in `modules`.
pub fn require_python(modules: &[&str]) -> bool {
    let code = modules
        .iter()
        .map(|m| format!("import {m}"))
        .collect::<Vec<_>>()
        .join("; ");
    require_tool("python3", &["-c", &code])
}

/// Runs `ffmpeg -y -loglevel error ARGS`, panicking with its stderr on failure.
pub fn ffmpeg(args: &[&str]) {
    let out = Command::new("ffmpeg")
        .args(["-y", "-hide_banner", "-loglevel", "error"])
        .args(args)
        .output()
        .expect("ffmpeg runs");
    assert!(
        out.status.success(),
        "ffmpeg {args:?} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
}

/// Runs a command and returns its stdout, panicking with stderr on failure.
pub fn run_stdout(program: &str, args: &[&str]) -> Vec<u8> {
    let out = Command::new(program)
        .args(args)
        .output()
        .expect("command runs");
    assert!(
        out.status.success(),
        "{program} {args:?} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    out.stdout
}

/// Runs `python3 -c CODE ARGS...`, returning stdout.
pub fn python(code: &str, args: &[&str]) -> String {
    let mut all = vec!["-c", code];
    all.extend_from_slice(args);
    String::from_utf8(run_stdout("python3", &all)).expect("python prints UTF-8")
}

/// A path as a `&str` (test paths are UTF-8).
pub fn s(p: &Path) -> &str {
    p.to_str().expect("utf-8 path")
}

/// Runs the `actuary` binary with `args`; returns (exit code, stdout, stderr).
pub fn actuary(args: &[&str]) -> (i32, String, String) {
    actuary_with_env(args, &[])
}

/// [`actuary`] with extra environment variables (credentials, endpoints).
pub fn actuary_with_env(args: &[&str], env: &[(&str, &str)]) -> (i32, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_actuary"))
        .args(args)
        .env("ACTUARY_QUIET", "1")
        .envs(env.iter().copied())
        .output()
        .expect("actuary runs");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// Makes `n` frames of 64x64 testsrc2 H.264 at 10 fps (source: the FFmpeg CLI's test pattern).
pub fn make_clip(path: &Path, frames: u32, offset_s: u32) {
    let src = format!("testsrc2=size=64x64:rate=10,trim=start={offset_s}");
    ffmpeg(&[
        "-f",
        "lavfi",
        "-i",
        &src,
        "-frames:v",
        &frames.to_string(),
        "-c:v",
        "libx264",
        "-pix_fmt",
        "yuv420p",
        s(path),
    ]);
}

/// A 50 Hz sidecar covering `frames` frames at 10 fps: t, dx, dy, grip.
pub fn make_sidecar(path: &Path, frames: u32, scale: f64) {
    let mut text = String::from("t,dx,dy,grip\n");
    for i in 0..frames * 5 {
        let t = i as f64 / 50.0;
        text += &format!(
            "{t:.3},{:.4},{:.4},{}\n",
            scale * (t * 3.0).sin(),
            scale * (t * 2.0).cos(),
            (i / 25) % 2
        );
    }
    std::fs::write(path, text).unwrap();
}
