//! The command line: every command's `--help` explains each option and its
//! default; unknown stages are clear errors.

use crate::util::actuary;

#[test]
fn every_command_has_help_with_defaults() {
    for cmd in [
        "check",
        "run",
        "inspect",
        "export-frames",
        "report",
        "demo-clips",
    ] {
        let (code, out, err) = actuary(&[cmd, "--help"]);
        assert_eq!(code, 0, "{cmd}: {err}");
        assert!(out.contains("Usage: actuary"), "{cmd}: {out}");
    }
    let (_, out, _) = actuary(&["run", "--help"]);
    assert!(
        out.contains("--until") && out.contains("[default: shard]"),
        "{out}"
    );
    assert!(
        out.contains("--jobs") && out.contains("[default: number of CPUs]"),
        "{out}"
    );
    let (_, out, _) = actuary(&["--help"]);
    assert!(
        out.contains("estimates"),
        "top-level help carries the caution: {out}"
    );
}

#[test]
fn unknown_stage_is_named() {
    let (code, _, err) = actuary(&["run", "nowhere.toml", "--until", "decoed"]);
    assert_eq!(code, 1);
    assert!(err.contains("decoed") && err.contains("allowed"), "{err}");
}
