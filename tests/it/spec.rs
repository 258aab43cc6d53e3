//! Spec parsing: every bundled spec loads; unknown keys, wrong types and
//! out-of-range values are errors naming the key, line and column.

use std::path::Path;

use actuary::spec::{Spec, SpecError};

fn write_spec(dir: &Path, body: &str) -> std::path::PathBuf {
    std::fs::create_dir_all(dir.join("clips")).unwrap();
    let path = dir.join("spec.toml");
    std::fs::write(&path, body).unwrap();
    path
}

const MINIMAL: &str = "out = \"run\"\n[sets.robot]\ndir = \"clips\"\nlabelled = true\n";

#[test]
fn every_bundled_spec_parses() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("pipeline-specs");
    let mut n = 0;
    for entry in std::fs::read_dir(&dir).unwrap() {
        let path = entry.unwrap().path();
        if path.extension().is_some_and(|e| e == "toml") {
            Spec::load(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
            n += 1;
        }
    }
    assert!(n >= 1, "no specs found in {}", dir.display());
}

#[test]
fn minimal_spec_takes_defaults_and_resolves_paths() {
    let tmp = tempfile::tempdir().unwrap();
    let path = write_spec(tmp.path(), MINIMAL);
    let spec = Spec::load(&path).unwrap();
    assert_eq!(spec.seed, 7);
    assert_eq!(spec.decode.fps, 10.0);
    assert_eq!((spec.decode.width, spec.decode.height), (64, 64));
    assert!(spec.out.is_absolute());
    assert!(spec.out.ends_with("run"));
    assert!(spec.sets[0].dir.ends_with("clips"));
}

#[test]
fn fps_accepts_29_97() {
    let tmp = tempfile::tempdir().unwrap();
    let path = write_spec(tmp.path(), &format!("{MINIMAL}[decode]\nfps = 29.97\n"));
    assert_eq!(Spec::load(&path).unwrap().decode.fps, 29.97);
}

fn error_of(body: &str) -> String {
    let tmp = tempfile::tempdir().unwrap();
    let path = write_spec(tmp.path(), body);
    match Spec::load(&path) {
        Ok(_) => panic!("spec should be refused:\n{body}"),
        Err(e) => {
            let text = e.to_string();
            assert!(
                text.contains("spec.toml"),
                "error must name the file: {text}"
            );
            text
        }
    }
}

#[test]
fn unknown_key_names_key_and_line() {
    let e = error_of(&format!("{MINIMAL}[decode]\nfsp = 10\n"));
    assert!(e.contains("fsp"), "{e}");
    assert!(e.contains("line 6"), "{e}");
}

#[test]
fn wrong_type_names_key_and_line() {
    let e = error_of(&format!("{MINIMAL}[decode]\nfps = \"ten\"\n"));
    assert!(e.contains("line 6"), "{e}");
    assert!(e.to_lowercase().contains("fps") || e.contains("f64"), "{e}");
}

#[test]
fn out_of_range_values_are_all_listed_with_line_and_column() {
    let e = error_of(&format!(
        "{MINIMAL}[decode]\nfps = -3\nsize = [64]\n[actions]\noffset-min-correlation = 2.0\n"
    ));
    assert!(e.contains("3 problem(s)"), "{e}");
    assert!(
        e.contains("line 6, column 7") && e.contains("decode.fps"),
        "{e}"
    );
    assert!(e.contains("line 7") && e.contains("decode.size"), "{e}");
    assert!(
        e.contains("line 9") && e.contains("actions.offset-min-correlation"),
        "{e}"
    );
}

#[test]
fn offset_takes_number_or_estimate_only() {
    let tmp = tempfile::tempdir().unwrap();
    let path = write_spec(
        tmp.path(),
        &format!("{MINIMAL}[actions]\noffset = \"estimate\"\n"),
    );
    assert_eq!(
        Spec::load(&path).unwrap().actions.offset,
        actuary::spec::Offset::Estimate
    );
    let e = error_of(&format!("{MINIMAL}[actions]\noffset = \"guess\"\n"));
    assert!(e.contains("estimate") && e.contains("line 6"), "{e}");
}

#[test]
fn crop_box_and_names() {
    let tmp = tempfile::tempdir().unwrap();
    let path = write_spec(
        tmp.path(),
        &format!("{MINIMAL}[decode]\ncrop = [0, 10, 320, 240]\n"),
    );
    assert_eq!(
        Spec::load(&path).unwrap().decode.crop,
        actuary::decode::Crop::Box {
            x: 0,
            y: 10,
            w: 320,
            h: 240
        }
    );
    let e = error_of(&format!("{MINIMAL}[decode]\ncrop = \"middle\"\n"));
    assert!(e.contains("center") && e.contains("line 6"), "{e}");
}

#[test]
fn missing_folder_is_named() {
    let e = error_of("out = \"run\"\n[sets.robot]\ndir = \"nowhere\"\nlabelled = true\n");
    assert!(
        e.contains("sets.robot.dir") && e.contains("nowhere") && e.contains("line 3"),
        "{e}"
    );
}

#[test]
fn missing_required_keys_are_errors() {
    let e = error_of("[sets.robot]\ndir = \"clips\"\nlabelled = true\n");
    assert!(e.contains("out"), "{e}");
    let e = error_of("out = \"run\"\n[sets.robot]\ndir = \"clips\"\n");
    assert!(e.contains("labelled"), "{e}");
}

#[test]
fn unreadable_spec_is_a_read_error() {
    let err = Spec::load(Path::new("/nonexistent/spec.toml")).unwrap_err();
    assert!(matches!(err, SpecError::Read { .. }));
    assert!(err.to_string().contains("/nonexistent/spec.toml"));
}

#[test]
fn held_out_needs_a_labelled_set_and_a_trainable_one_left() {
    // Only labelled clips can be dealt into calib and holdout.
    let e = error_of(&format!(
        "{MINIMAL}[sets.human]\ndir = \"clips\"\nlabelled = false\nheld-out = true\n"
    ));
    assert!(
        e.contains("sets.human.held-out") && e.contains("line 8"),
        "{e}"
    );
    // Every labelled set held out leaves the model nothing to train on.
    let e = error_of(
        "out = \"run\"\n[sets.robot]\ndir = \"clips\"\nlabelled = true\nheld-out = true\n",
    );
    assert!(e.contains("must not be `held-out`"), "{e}");
    // A held-out labelled set beside a trainable one is accepted and reaches
    // align and fit, which keep it out of what they fit.
    let tmp = tempfile::tempdir().unwrap();
    let path = write_spec(
        tmp.path(),
        &format!(
            "{MINIMAL}[sets.robot-check]\ndir = \"clips\"\nlabelled = true\nheld-out = true\n"
        ),
    );
    let spec = Spec::load(&path).unwrap();
    let check = spec.set("robot-check").unwrap();
    assert!(check.held_out && check.labelled);
    assert!(!spec.set("robot").unwrap().held_out);
    assert_eq!(spec.align.held_out_sets, ["robot-check"]);
    assert_eq!(spec.fit.held_out_sets, ["robot-check"]);
}
