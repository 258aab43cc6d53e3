//! Label checks against the outside: k-means inertia against scikit-learn's
//! `KMeans(init="k-means++", n_init=10)`, split conformal coverage against
//! theorem 1 of Angelopoulos & Bates (2021, "A Gentle Introduction to
//! Conformal Prediction and Distribution-Free Uncertainty Quantification")
//! and its quantile against NumPy's `quantile(..., method="inverted_cdf")`, plus the
//! label stage end to end on a small fake run (fake model, known noise).
//!
//! The fake run ([`fake_run`]) is shared with the shard tests.

use std::collections::BTreeMap;
use std::path::Path;

use actuary::actions::MapRule;
use actuary::align::AlignedRun;
use actuary::label::conformal;
use actuary::label::kmeans::{KMeans, KMeansSettings};
use actuary::label::{
    ClipLabels, FitOutputs, LabelJob, LabelOptions, Split, Standardisation, TransitionBatch,
    TransitionModel, label_run,
};
use actuary::model::Rng;
use actuary::spec::{ActionsOptions, Offset};
use actuary::store::{ClipRecord, FrameWriter, SourceInfo, write_json_atomic};

use crate::util;

/// Frame size of the fake run (not square, to catch transposed PNGs).
pub const W: u32 = 16;
/// Frame height of the fake run.
pub const H: u32 = 12;
/// Action dimensions of the fake run.
pub const DIMS: [&str; 2] = ["dx", "grip"];
const MEAN: [f64; 2] = [0.5, -1.0];
const STD: [f64; 2] = [2.0, 0.5];
/// True noise std (standardised units) around the model's mean.
const NOISE: f64 = 0.5;

/// A model that reads its "prediction" off the first pixels of frame t: head
/// means `(px - 128) / 64 + small per-head offsets`, log-variance of a std of
/// 0.3 (too small: the true noise is 0.5, so conformal must widen it).
pub struct FakeModel {
    st: Standardisation,
}

impl FakeModel {
    /// The fake model.
    pub fn new() -> Self {
        Self {
            st: Standardisation {
                dims: DIMS.iter().map(|s| s.to_string()).collect(),
                mean: MEAN.to_vec(),
                std: STD.to_vec(),
            },
        }
    }
    fn signal(frame: &[u8], d: usize) -> f64 {
        (frame[d] as f64 - 128.0) / 64.0
    }
}

impl TransitionModel for FakeModel {
    fn latent_dims(&self) -> usize {
        2
    }
    fn heads(&self) -> usize {
        3
    }
    fn standardisation(&self) -> &Standardisation {
        &self.st
    }
    fn infer(
        &self,
        pairs: &[(&[u8], &[u8])],
    ) -> Result<TransitionBatch, actuary::label::model::ModelFailure> {
        let mut b = TransitionBatch::default();
        for (x, _) in pairs {
            for d in 0..2 {
                b.latent.push(Self::signal(x, d) as f32);
            }
            for h in 0..3 {
                for d in 0..2 {
                    b.head_mean
                        .push((Self::signal(x, d) + 0.05 * (h as f64 - 1.0)) as f32);
                    b.head_logvar.push((0.3f64 * 0.3).ln() as f32);
                }
            }
        }
        Ok(b)
    }
}

fn record(set: &str, id: &str, frames: u32, actions: Option<Vec<Vec<f32>>>) -> ClipRecord {
    ClipRecord {
        id: id.into(),
        set: set.into(),
        labelled: actions.is_some(),
        frames,
        fps: 10.0,
        width: W,
        height: H,
        dropped: 0,
        repeated: 0,
        source: SourceInfo {
            path: format!("/nowhere/{id}.mp4").into(),
            codec: "h264".into(),
            width: W,
            height: H,
            fps: 10.0,
            duration_s: frames as f64 / 10.0,
            frames: frames as u64,
            rotation: 0,
            matrix: "bt601".into(),
            range: "limited".into(),
            untagged: true,
        },
        fingerprint: "0".repeat(64),
        key: "fake".into(),
        action_dims: if actions.is_some() {
            DIMS.iter().map(|s| s.to_string()).collect()
        } else {
            Vec::new()
        },
        actions,
        sidecar: None,
        sidecar_fingerprint: None,
    }
}

/// Writes a fake decode stage into `run`: `robot` (labelled: `robot`
/// clips, 60 frames each) and `human` (unlabelled, 3 clips of 40 frames,
/// ids with a sub-folder); returns the splits (robot clip i: i % 4 == 1 calib,
/// == 2 holdout, else train).
pub fn fake_decode(run: &Path, robot: usize, seed: u64) -> BTreeMap<(String, String), Split> {
    let decode = run.join("decode");
    let mut rng = Rng::new(seed);
    let mut splits = BTreeMap::new();
    let mut clips: Vec<(String, String, u32, bool)> = (0..robot)
        .map(|i| ("robot".to_string(), format!("pick-{i:02}"), 60, true))
        .collect();
    clips.extend((0..3).map(|i| ("human".to_string(), format!("day2/reach-{i}"), 40, false)));
    for (i, (set, id, frames, labelled)) in clips.into_iter().enumerate() {
        let path = ClipRecord::frames_path(&decode, &set, &id);
        let mut w = FrameWriter::create(&path, W, H).unwrap();
        let mut store = Vec::new();
        for _ in 0..frames {
            let f: Vec<u8> = (0..W * H * 3).map(|_| rng.below(256) as u8).collect();
            w.push(&f).unwrap();
            store.push(f);
        }
        w.finish().unwrap();
        let actions = labelled.then(|| {
            (0..frames as usize - 1)
                .map(|t| {
                    (0..2)
                        .map(|d| {
                            ((FakeModel::signal(&store[t], d) + NOISE * rng.normal()) * STD[d]
                                + MEAN[d]) as f32
                        })
                        .collect()
                })
                .collect()
        });
        if labelled {
            let split = match i % 4 {
                1 => Split::Calib,
                2 => Split::Holdout,
                _ => Split::Train,
            };
            splits.insert((set.clone(), id.clone()), split);
        }
        let rec = record(&set, &id, frames, actions);
        write_json_atomic(&ClipRecord::record_path(&decode, &set, &id), &rec).unwrap();
    }
    splits
}

/// Writes a fake decode stage and runs the label stage on it with the fake model.
pub fn fake_run(run: &Path, robot: usize, seed: u64) -> actuary::label::LabelSummary {
    let splits = fake_decode(run, robot, seed);
    label(run, splits, 2)
}

fn label(
    run: &Path,
    splits: BTreeMap<(String, String), Split>,
    threads: usize,
) -> actuary::label::LabelSummary {
    let opts = LabelOptions {
        codes: 6,
        batch: 16,
        ..LabelOptions::default()
    };
    let fit = FitOutputs {
        model: Box::new(FakeModel::new()),
        splits,
    };
    let label_dir = run.join("label");
    let job = LabelJob {
        run_dir: run,
        label_dir: &label_dir,
        key: "fake-label-key",
        opts: &opts,
        seed: 7,
        threads,
        frame_pngs: true,
    };
    label_run(&job, &fit, &view(run)).unwrap_or_else(|e| panic!("label: {e}"))
}

/// `[actions]` of the fake run: `dx` a delta (`sum`), `grip` a level (`mean`).
pub fn actions_opts() -> ActionsOptions {
    let mut map = BTreeMap::new();
    map.insert("dx".to_string(), MapRule::Sum);
    map.insert("grip".to_string(), MapRule::Mean);
    ActionsOptions {
        map,
        default_rule: MapRule::Sum,
        offset: Offset::Seconds(0.0),
        offset_window_s: 1.0,
        offset_min_correlation: 0.3,
    }
}

/// The aligned view of a fake run, opened as the label stage's `run_stage`
/// opens it (`RUN/align/alignment.json` when written, else the identity view).
pub fn view(run: &Path) -> AlignedRun {
    AlignedRun::open_or_passthrough(run, &actions_opts()).unwrap_or_else(|e| panic!("view: {e}"))
}

/// Points for the k-means comparison: 5 Gaussian blobs of different spreads
/// and sizes in 3-D, partly overlapping (seeded).
fn blobs() -> Vec<f64> {
    let mut rng = Rng::new(11);
    let centres = [
        [0.0, 0.0, 0.0],
        [3.0, 0.5, 0.0],
        [0.0, 4.0, 1.0],
        [2.0, 2.0, 3.0],
        [-3.0, 1.0, -1.0],
    ];
    let spread = [0.5, 0.8, 0.3, 1.0, 0.6];
    let mut pts = Vec::new();
    for (c, (centre, s)) in centres.iter().zip(spread).enumerate() {
        for _ in 0..(80 + 40 * c) {
            for x in centre {
                pts.push(x + s * rng.normal());
            }
        }
    }
    pts
}

#[test]
fn kmeans_inertia_within_two_percent_of_scikit_learn() {
    if !util::require_python(&["numpy", "sklearn"]) {
        return;
    }
    let pts = blobs();
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("points.csv");
    let text: String = pts
        .chunks(3)
        .map(|r| format!("{:?},{:?},{:?}\n", r[0], r[1], r[2]))
        .collect();
    std::fs::write(&csv, text).unwrap();
    for k in [4usize, 8] {
        let ours = KMeans::fit(
            &pts,
            3,
            KMeansSettings {
                k,
                restarts: 10,
                max_iterations: 300,
                seed: 7,
            },
        )
        .unwrap();
        // Reference: scikit-learn KMeans(init="k-means++", n_init=10).inertia_.
        let code = "import sys, numpy as np\nfrom sklearn.cluster import KMeans\nX = np.loadtxt(sys.argv[1], delimiter=',')\nprint(repr(KMeans(n_clusters=int(sys.argv[2]), init='k-means++', n_init=10, random_state=0).fit(X).inertia_))";
        let theirs: f64 = util::python(code, &[util::s(&csv), &k.to_string()])
            .trim()
            .parse()
            .unwrap();
        let rel = (ours.inertia - theirs).abs() / theirs;
        assert!(
            rel <= 0.02,
            "k {k}: inertia {} vs scikit-learn {theirs} ({:.2}%)",
            ours.inertia,
            rel * 100.0
        );
    }
}

#[test]
fn split_conformal_coverage_follows_theorem_one() {
    // Angelopoulos & Bates (2021), theorem 1: with n exchangeable calibration
    // points, P(Y_test in C(X_test)) lies in [1 - alpha, 1 - alpha + 1/(n + 1)].
    // Each trial draws a fresh calibration set and one test point, so the
    // covered count over R trials is Binomial(R, coverage); we allow 3 SE.
    let (alpha, n, trials) = (0.1, 99usize, 20_000usize);
    let mut rng = Rng::new(5);
    let mut covered = 0usize;
    for _ in 0..trials {
        // Heteroscedastic Gaussian data; the "model" knows the mean and states
        // a std off by a factor 2 (conformal must correct it).
        let mut draw = || {
            let x = rng.uniform() * 4.0 - 2.0;
            let sd = 0.5 + 0.25 * x.abs();
            let y = x + sd * rng.normal();
            (y, x, sd * 0.5)
        };
        let scores: Vec<f64> = (0..n)
            .map(|_| {
                let (y, m, s) = draw();
                conformal::score(y, m, s)
            })
            .collect();
        let q = conformal::quantile(&scores, alpha).q;
        let (y, m, s) = draw();
        // The stored form: action_std = q * s / z, covered iff |y - m| <= z * action_std.
        let z = actuary::label::stats::normal_quantile(1.0 - alpha / 2.0);
        let action_std = q * s / z;
        if (y - m).abs() <= z * action_std * (1.0 + 1e-12) {
            covered += 1;
        }
    }
    let p = covered as f64 / trials as f64;
    let se = (0.9 * 0.1 / trials as f64).sqrt();
    let (lo, hi) = (
        1.0 - alpha - 3.0 * se,
        1.0 - alpha + 1.0 / (n as f64 + 1.0) + 3.0 * se,
    );
    assert!(p >= lo && p <= hi, "coverage {p} outside [{lo}, {hi}]");
}

#[test]
fn conformal_quantile_matches_numpy_empirical_quantile() {
    if !util::require_python(&["numpy"]) {
        return;
    }
    let mut rng = Rng::new(9);
    for n in [9usize, 50, 257] {
        let scores: Vec<f64> = (0..n).map(|_| rng.normal().abs()).collect();
        let q = conformal::quantile(&scores, 0.1);
        // Reference: the paper's own snippet, np.quantile(scores, ceil((n+1)(1-alpha))/n, method="inverted_cdf"), the empirical quantile inf{s: F_n(s) >= level} that the paper's definition uses (its code listing writes method="higher", which indexes (n-1)*level and can pick one rank above).
        let list = scores
            .iter()
            .map(|v| format!("{v:?}"))
            .collect::<Vec<_>>()
            .join(",");
        let code = format!(
            "import numpy as np, math\ns = np.array([{list}])\nn = len(s)\nprint(repr(float(np.quantile(s, math.ceil((n+1)*0.9)/n, method='inverted_cdf'))))"
        );
        let theirs: f64 = util::python(&code, &[]).trim().parse().unwrap();
        assert_eq!(q.q, theirs, "n {n}");
    }
}

#[test]
fn label_stage_calibrates_and_resumes() {
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path();
    let summary = fake_run(run, 24, 3);
    let cal = &summary.calibration;
    assert_eq!(summary.clips_labelled, 27);
    assert_eq!(summary.transitions, 24 * 59 + 3 * 39);
    // Coverage of the 90 % interval on holdout clips (6 clips, 354
    // transitions): binomial SE 0.016, so 0.06 is well over 3 SE.
    for d in &cal.dims {
        let cov = d.holdout_coverage.unwrap();
        assert!(
            (cov - 0.9).abs() < 0.06,
            "{}: holdout coverage {cov}",
            d.dim
        );
        assert!(
            d.calib_coverage >= 0.9,
            "{}: calib coverage {}",
            d.dim,
            d.calib_coverage
        );
        // The stated std 0.3 is too small for the true 0.5: q must exceed z.
        assert!(d.quantile.q > cal.z, "{}: q {}", d.dim, d.quantile.q);
    }
    assert!(
        cal.holdout_reliability.ece < 0.15,
        "ECE {}",
        cal.holdout_reliability.ece
    );
    assert_eq!(cal.holdout_reliability.bins.len(), 10);
    assert!((cal.z - 1.6448536269514715).abs() < 1e-9);
    // Codes table: counts cover every transition.
    let codes: actuary::label::CodesTable =
        actuary::store::read_json(&run.join("label/codes.json")).unwrap();
    assert_eq!(codes.codes.len(), 6);
    assert_eq!(
        codes.codes.iter().map(|c| c.count).sum::<u64>(),
        summary.transitions
    );
    // Per-clip outputs: one entry per transition; ids with folders work.
    let human = ClipLabels::read(&run.join("label"), "human", "day2/reach-1").unwrap();
    assert_eq!(human.action_est.len(), 39);
    assert_eq!(human.split, Split::Train);
    assert!(human.confidence.iter().all(|c| (0.0..=1.0).contains(c)));
    // Resume: a second run reuses everything and changes nothing.
    let before = std::fs::read(ClipLabels::path(&run.join("label"), "robot", "pick-05")).unwrap();
    std::fs::remove_file(ClipLabels::path(&run.join("label"), "robot", "pick-05")).unwrap();
    let splits = fake_decode_splits(24);
    let again = label(run, splits, 1);
    assert!(again.state_reused);
    assert_eq!((again.clips_labelled, again.clips_reused), (1, 26));
    let after = std::fs::read(ClipLabels::path(&run.join("label"), "robot", "pick-05")).unwrap();
    assert_eq!(
        before, after,
        "relabelled clip is byte-identical (1 vs 2 threads)"
    );
}

#[test]
fn calib_motion_range_flags_the_clips_that_move_more() {
    // Definition (no outside source: ours): a clip's motion size is its mean
    // |action_est| per dimension; the range is the largest among calib clips;
    // a clip beyond it in any dimension is counted and, on holdout, excluded
    // from the in-range coverage. Recomputed here from the per-clip files.
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path();
    let summary = fake_run(run, 24, 5);
    let cal = &summary.calibration;
    let label_dir = run.join("label");
    let size = |set: &str, id: &str| {
        let l = ClipLabels::read(&label_dir, set, id).unwrap();
        (0..DIMS.len())
            .map(|d| {
                l.action_est
                    .iter()
                    .map(|r| (r[d] as f64).abs())
                    .sum::<f64>()
                    / l.action_est.len() as f64
            })
            .collect::<Vec<f64>>()
    };
    let splits = fake_decode_splits(24);
    let mut range = vec![0.0f64; DIMS.len()];
    for ((set, id), split) in &splits {
        if *split == Split::Calib {
            for (r, s) in range.iter_mut().zip(size(set, id)) {
                *r = r.max(s);
            }
        }
    }
    assert_eq!(cal.calib_motion_range.len(), DIMS.len());
    // The stage measures the estimates as the files store them (f32), in
    // the same order: exactly equal.
    assert_eq!(cal.calib_motion_range, range);
    let beyond = |s: &[f64]| s.iter().zip(&range).any(|(s, r)| s > r);
    let holdout_beyond: Vec<String> = splits
        .iter()
        .filter(|(_, sp)| **sp == Split::Holdout)
        .filter(|((set, id), _)| beyond(&size(set, id)))
        .map(|((_, id), _)| id.clone())
        .collect();
    assert_eq!(cal.holdout_beyond_range, holdout_beyond);
    let robot_beyond = splits
        .keys()
        .filter(|(set, id)| beyond(&size(set, id)))
        .count() as u64;
    assert_eq!(summary.sets["robot"].beyond_calib_range, robot_beyond);
    // Calib clips never lie beyond their own range.
    assert!(
        splits
            .iter()
            .filter(|(_, sp)| **sp == Split::Calib)
            .all(|((set, id), _)| !beyond(&size(set, id)))
    );
    for d in &cal.dims {
        let in_range = d.holdout_coverage_in_range;
        if holdout_beyond.is_empty() {
            assert_eq!(in_range, d.holdout_coverage, "{}", d.dim);
        } else {
            assert!(
                in_range.is_some_and(|c| (0.0..=1.0).contains(&c)),
                "{}",
                d.dim
            );
        }
    }
}

/// The splits `fake_decode` assigns, without writing anything.
fn fake_decode_splits(robot: usize) -> BTreeMap<(String, String), Split> {
    (0..robot)
        .map(|i| {
            let split = match i % 4 {
                1 => Split::Calib,
                2 => Split::Holdout,
                _ => Split::Train,
            };
            (("robot".to_string(), format!("pick-{i:02}")), split)
        })
        .collect()
}

/// Writes `RUN/align/alignment.json` for the fake run: `human` resampled by
/// `factor` (model frames per decode frame), `robot` left as decoded, no
/// colour normalisation; rules as [`actions_opts`].
fn write_alignment(run: &Path, factor: f64) {
    let records = actuary::align::view::list_decoded(run).unwrap();
    let alignment = actuary::align::Alignment {
        version: actuary::align::view::ALIGNMENT_VERSION,
        fps: 10.0,
        width: W,
        height: H,
        action_dims: DIMS.iter().map(|s| s.to_string()).collect(),
        rules: vec![MapRule::Sum, MapRule::Mean],
        resample: actuary::align::Resample::Blend,
        copy_frames: false,
        clips: records
            .iter()
            .map(|r| actuary::align::ClipAlignment {
                set: r.set.clone(),
                id: r.id.clone(),
                labelled: r.labelled,
                frames: r.frames,
                speed_factor: if r.labelled { 1.0 } else { factor },
                motion_rate: None,
                photometric: None,
                offset: None,
                actions: None,
            })
            .collect(),
    };
    write_json_atomic(&actuary::align::view::alignment_path(run), &alignment).unwrap();
}

/// Rewrites the `human` clips' frames with even bytes, so that a half-way blend
/// of two frames is an exact integer (no rounding convention involved).
fn make_human_bytes_even(run: &Path) {
    let decode = run.join("decode");
    for i in 0..3 {
        let path = ClipRecord::frames_path(&decode, "human", &format!("day2/reach-{i}"));
        let frames: Vec<Vec<u8>> = {
            let r = actuary::store::FrameReader::open(&path).unwrap();
            (0..r.len())
                .map(|k| r.frame(k).iter().map(|b| b & !1).collect())
                .collect()
        };
        let mut w = FrameWriter::create(&path, W, H).unwrap();
        for f in &frames {
            w.push(f).unwrap();
        }
        w.finish().unwrap();
    }
}

#[test]
fn label_stage_infers_speed_resampled_clips_in_model_time() {
    // Reference: a worked example by hand of the documented align view and
    // interval rules (src/align.rs, src/actions/mapping.rs): at speed factor 2
    // model frame i sits at decode position i / 2, so model frame 2k is
    // decoded frame k and model frame 2k + 1 the half-way blend of frames k
    // and k + 1; decode transition k = [k, k + 1) / fps is covered exactly by
    // model transitions 2k and 2k + 1, so `sum` adds their two estimates and
    // `mean` averages them. The uncalibrated variance of a sum of independent
    // errors is the sum of their variances (textbook), and the `mean` rule
    // averages variances (`to_decode_grid_std`). The fake model reads its
    // estimate and latent off frame t of each pair. Labelling on decode-grid
    // pairs (the old behaviour) gives est(frame k) for both dimensions and fails.
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path();
    let splits = fake_decode(run, 24, 3);
    make_human_bytes_even(run);
    write_alignment(run, 2.0);
    let summary = label(run, splits, 2);
    let label_dir = run.join("label");
    assert_eq!(
        summary.transitions,
        24 * 59 + 3 * 39,
        "rows stay on the decode grid"
    );
    let codes: actuary::label::CodesTable =
        actuary::store::read_json(&label_dir.join("codes.json")).unwrap();
    let est = |px: &[f64], d: usize| ((px[d] - 128.0) / 64.0) * STD[d] + MEAN[d];
    let robot = ClipLabels::read(&label_dir, "robot", "pick-00").unwrap();
    let decode = run.join("decode");
    let frames =
        actuary::store::FrameReader::open(&ClipRecord::frames_path(&decode, "robot", "pick-00"))
            .unwrap();
    // Identity view: the estimate of decode transition k is est(frame k).
    for k in 0..59 {
        let px: Vec<f64> = frames.frame(k)[..2].iter().map(|b| *b as f64).collect();
        for d in 0..2 {
            let want = est(&px, d);
            let got = robot.action_est[k][d] as f64;
            assert!(
                (got - want).abs() < 1e-4,
                "robot t {k} dim {d}: {got} vs {want}"
            );
        }
    }
    for i in 0..3 {
        let id = format!("day2/reach-{i}");
        let l = ClipLabels::read(&label_dir, "human", &id).unwrap();
        assert_eq!(l.action_est.len(), 39);
        let frames =
            actuary::store::FrameReader::open(&ClipRecord::frames_path(&decode, "human", &id))
                .unwrap();
        for k in 0..39 {
            let a: Vec<f64> = frames.frame(k)[..2].iter().map(|b| *b as f64).collect();
            let b: Vec<f64> = frames.frame(k + 1)[..2].iter().map(|b| *b as f64).collect();
            let mid: Vec<f64> = a.iter().zip(&b).map(|(x, y)| (x + y) / 2.0).collect();
            let want = [est(&a, 0) + est(&mid, 0), (est(&a, 1) + est(&mid, 1)) / 2.0];
            for (d, want) in want.iter().enumerate() {
                let got = l.action_est[k][d] as f64;
                assert!(
                    (got - want).abs() < 1e-4,
                    "{id} t {k} dim {d}: action_est {got}, model time mapped back {want}"
                );
            }
            // The fake model's stated std is the same on every transition:
            // dx (sum of two) sqrt(2) times the robot's, grip (mean) equal.
            let (sr, sh) = (&robot.action_std[0], &l.action_std[k]);
            let ratio = [std::f64::consts::SQRT_2, 1.0];
            for d in 0..2 {
                let want = sr[d] as f64 * ratio[d];
                assert!(
                    (sh[d] as f64 - want).abs() < 1e-5 * want,
                    "{id} t {k} dim {d}: action_std {} vs {want}",
                    sh[d]
                );
            }
            // Disagreement (constant spread) is unchanged by the mean rule.
            assert!((l.disagreement[k] - robot.disagreement[0]).abs() < 1e-6);
            // The code is the centroid nearest the mean of the two model-time latents.
            let latent: Vec<f64> = (0..2)
                .map(|d| ((a[d] - 128.0) / 64.0 + (mid[d] - 128.0) / 64.0) / 2.0)
                .collect();
            let dist =
                |c: &[f64]| -> f64 { c.iter().zip(&latent).map(|(x, y)| (x - y).powi(2)).sum() };
            let best = codes
                .codes
                .iter()
                .map(|c| dist(&c.centroid))
                .fold(f64::INFINITY, f64::min);
            let got = dist(&codes.codes[l.code[k] as usize].centroid);
            assert!(
                got <= best + 1e-6,
                "{id} t {k}: code {} at {got}, nearest at {best}",
                l.code[k]
            );
        }
    }
    // k-means was fitted on the model-time train transitions.
    // Robot clips 0..24: i % 4 == 1 calib, 2 holdout, else train (12 clips of
    // 59 transitions); human clips: 40 frames -> 79 model frames, 78 model
    // transitions each, every one sampled (the sample limit is 20 000).
    let state: actuary::label::output::LabelState =
        actuary::store::read_json(&label_dir.join(actuary::label::output::STATE_FILE)).unwrap();
    assert_eq!(state.train_transitions, 12 * 59 + 3 * 78);
    assert_eq!(state.kmeans_points, 12 * 59 + 3 * 78);
}

/// Every labelled clip's decode-grid actions moved one transition earlier
/// (`a_k <- a_{k+1}`, the last kept), as a re-mapping with an estimated clock
/// offset of one frame interval would move them, written into the align
/// stage's `alignment.json`. Returns the re-mapped actions by clip id.
fn remap_actions_in_alignment(run: &Path) -> BTreeMap<String, Vec<Vec<f32>>> {
    let path = actuary::align::view::alignment_path(run);
    let mut alignment: actuary::align::Alignment = actuary::store::read_json(&path).unwrap();
    let decode = run.join("decode");
    let mut out = BTreeMap::new();
    for c in alignment.clips.iter_mut().filter(|c| c.labelled) {
        let rec: ClipRecord =
            actuary::store::read_json(&ClipRecord::record_path(&decode, &c.set, &c.id)).unwrap();
        let orig = rec.actions.unwrap();
        let mut moved = orig[1..].to_vec();
        moved.push(orig.last().unwrap().clone());
        out.insert(c.id.clone(), moved.clone());
        c.actions = Some(moved);
    }
    write_json_atomic(&path, &alignment).unwrap();
    out
}

#[test]
fn offset_corrected_actions_reach_calibration_and_the_shards() {
    // The align stage re-maps a clip's log with an estimated clock offset and
    // later stages read the re-mapped actions (the design's clock-offset rule).
    // Label: the fake model's estimates follow the decoded actions, so
    // calibrating against actions moved by a frame must widen the conformal
    // quantile. Shard: the `action` column, read back with pyarrow (Apache
    // Arrow's Python library), holds the re-mapped actions.
    if !util::require_python(&["pyarrow"]) {
        return;
    }
    let quantiles = |run: &Path| -> Vec<f64> {
        let cal: actuary::label::CalibrationFigures =
            actuary::store::read_json(&run.join("label/calibration.json")).unwrap();
        cal.dims.iter().map(|d| d.quantile.q).collect()
    };
    let plain = tempfile::tempdir().unwrap();
    let splits = fake_decode(plain.path(), 24, 3);
    write_alignment(plain.path(), 1.0);
    label(plain.path(), splits, 2);

    let dir = tempfile::tempdir().unwrap();
    let run = dir.path();
    let splits = fake_decode(run, 24, 3);
    write_alignment(run, 1.0);
    let moved = remap_actions_in_alignment(run);
    label(run, splits, 2);
    let (q_plain, q_moved) = (quantiles(plain.path()), quantiles(run));
    assert!(
        q_moved[0] > q_plain[0] * 1.2,
        "dx quantile with moved actions {q_moved:?}, as decoded {q_plain:?}"
    );

    let opts = actuary::shard::ShardOptions::default();
    let shard_dir = run.join("shard");
    actuary::shard::write_shards(&actuary::shard::ShardJob {
        run_dir: run,
        shard_dir: &shard_dir,
        opts: &opts,
        seed: 7,
        threads: 2,
    })
    .unwrap();
    let out = util::python(
        "import sys, glob, json, pyarrow.parquet as pq\n\
         t = pq.read_table(sorted(glob.glob(sys.argv[1] + '/*.parquet')), columns=['clip', 'frame', 'action'])\n\
         rows = sorted((r['frame'], r['action']) for r in t.to_pylist() if r['clip'] == 'pick-00')\n\
         print(json.dumps([a for _, a in rows]))\n",
        &[util::s(&shard_dir)],
    );
    let got: Vec<Option<Vec<f32>>> = serde_json::from_str(out.trim()).unwrap();
    let want = &moved["pick-00"];
    assert_eq!(got.len(), want.len() + 1, "one row per frame");
    for (k, w) in want.iter().enumerate() {
        assert_eq!(got[k].as_ref(), Some(w), "frame {k}");
    }
    assert_eq!(got[want.len()], None, "the last frame has no action");
}
