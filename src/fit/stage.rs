//! The fit stage entry points: [`run_stage`] (called by the runner),
//! [`fit_run`] (the library call) and [`inspect_text`] (`inspect RUN fit`).
//!
//! Files in `RUN/fit/`: `model.json` (shape, standardisation, splits),
//! `semi.safetensors` and `labelled-only.safetensors` (parameters),
//! `<model>.log.csv` (one row per step), `checkpoints/<model>.safetensors`
//! (resumable training state) and `metrics.json` (the comparison table).

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::FitError;
use super::checkpoint::Identity;
use super::data::{Dataset, Split, SplitCounts};
use super::fitted::{self, ClipSplit, FittedModel, LABELLED_ONLY, MODEL_FILE, ModelInfo, SEMI};
use super::metrics::{self, Evaluator, Metrics};
use super::train::{self, TrainSpec};
use crate::spec::Spec;
use crate::store::{ClipStatus, StageManifest};

/// File name of the metrics table in `RUN/fit/`.
pub const METRICS_FILE: &str = "metrics.json";

/// One trained model's run.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct ModelRun {
    /// Model name.
    pub name: String,
    /// Total steps.
    pub steps: u32,
    /// Step the run resumed from.
    pub resumed_from: Option<u32>,
    /// Seconds spent in this call.
    pub seconds: f64,
    /// Frame pairs per second (forward + backward + update) in this call.
    pub pairs_per_second: f64,
}

/// What the fit stage reports (manifest summary and `metrics.json`).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct FitSummary {
    /// Labelled clips per split.
    pub splits: SplitCounts,
    /// Labelled train transitions.
    pub labelled_transitions: usize,
    /// Unlabelled transitions.
    pub unlabelled_transitions: usize,
    /// Action dimension names.
    pub action_dims: Vec<String>,
    /// Dimensions that are constant over the labelled train transitions
    /// (standardised with scale 1; their R^2 is undefined).
    pub constant_dims: Vec<String>,
    /// Models trained.
    pub models: Vec<ModelRun>,
    /// Evaluation tables: holdout clips, then each unlabelled set with a truth folder.
    pub metrics: Vec<Metrics>,
    /// The same tables flattened, one row per (evaluation set, model), for readers.
    pub comparison: Vec<ComparisonRow>,
    /// Sets whose evaluation-only truth folder was read (never used for training).
    pub eval_truth_used: Vec<String>,
    /// Worker threads.
    pub threads: usize,
}

/// One row of the comparison: a model on an evaluation set.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct ComparisonRow {
    /// Model (`semi`, `labelled-only`, `mean-baseline`).
    pub model: String,
    /// Evaluation set (`holdout`, `unlabelled:<set>`).
    pub eval: String,
    /// Mean R^2 over the dimensions where it is defined.
    pub mean_r2: Option<f64>,
    /// Per dimension: `r2`, `mae`, `nll`.
    pub dims: std::collections::BTreeMap<String, super::metrics::DimMetrics>,
}

/// Where and how to fit.
pub struct FitInputs<'a> {
    /// The resolved spec.
    pub spec: &'a Spec,
    /// The run folder.
    pub run_dir: PathBuf,
    /// `RUN/fit/`.
    pub stage_dir: PathBuf,
    /// Worker threads.
    pub threads: usize,
    /// Stage key (settings + inputs); checkpoints carry it.
    pub key: String,
    /// Show progress bars (on a terminal).
    pub progress: bool,
}

/// Runs the stage for the runner.
pub fn run_stage(ctx: &crate::runner::StageContext<'_>) -> Result<StageManifest, FitError> {
    let summary = fit_run(&FitInputs {
        spec: ctx.spec,
        run_dir: ctx.run_dir.clone(),
        stage_dir: ctx.stage_dir.clone(),
        threads: ctx.threads,
        key: ctx.key.clone(),
        progress: true,
    })?;
    let mut m = StageManifest::default();
    m.counts
        .insert("train_clips".into(), summary.splits.train as u64);
    m.counts
        .insert("calib_clips".into(), summary.splits.calib as u64);
    m.counts
        .insert("holdout_clips".into(), summary.splits.holdout as u64);
    m.counts.insert(
        "labelled_transitions".into(),
        summary.labelled_transitions as u64,
    );
    m.counts.insert(
        "unlabelled_transitions".into(),
        summary.unlabelled_transitions as u64,
    );
    m.counts.insert(
        "eval_truth_sets".into(),
        summary.eval_truth_used.len() as u64,
    );
    for r in &summary.models {
        m.timings.insert(format!("{}_s", r.name), r.seconds);
    }
    let info_path = ctx.stage_dir.join(MODEL_FILE);
    if let Ok(info) = crate::store::read_json::<ModelInfo>(&info_path) {
        m.clips = info
            .splits
            .iter()
            .map(|c| ClipStatus {
                id: c.id.clone(),
                set: c.set.clone(),
                status: "ok".into(),
                reason: None,
            })
            .collect();
    }
    m.summary = serde_json::to_value(&summary).unwrap_or_default();
    Ok(m)
}

/// Fits the models of `inputs.spec` on the aligned clips of `inputs.run_dir`.
pub fn fit_run(inputs: &FitInputs<'_>) -> Result<FitSummary, FitError> {
    super::tune_allocator();
    let pool = crate::util::thread_pool(inputs.threads);
    pool.install(|| fit_in_pool(inputs))
}

fn fit_in_pool(inputs: &FitInputs<'_>) -> Result<FitSummary, FitError> {
    let spec = inputs.spec;
    let opts = &spec.fit;
    let dir = &inputs.stage_dir;
    std::fs::create_dir_all(dir).map_err(FitError::io(dir))?;
    let mut ds = Dataset::open(
        &inputs.run_dir,
        &spec.actions,
        spec.seed,
        opts.calib_fraction,
        opts.holdout_fraction,
        opts.split_by,
        &opts.held_out_sets,
    )?;
    let std = ds.standardisation.clone();
    let cfg = opts.network(ds.width, ds.height, ds.action_dims());
    let info = ModelInfo {
        network: cfg.clone(),
        network_hash: fitted::network_hash(&cfg),
        settings_hash: inputs.key.clone(),
        standardisation: std.clone(),
        models: if opts.compare {
            vec![SEMI.into(), LABELLED_ONLY.into()]
        } else {
            vec![SEMI.into()]
        },
        splits: ds
            .clips
            .iter()
            .map(|c| ClipSplit {
                set: c.set.clone(),
                id: c.id.clone(),
                split: c.split,
            })
            .collect(),
    };
    let mut runs = Vec::new();
    let mut fitted_models = Vec::new();
    for name in info.models.clone() {
        let name: &'static str = if name == SEMI { SEMI } else { LABELLED_ONLY };
        let identity: Identity = info.identity(name);
        let trained = train::train(
            &mut ds,
            &TrainSpec {
                name,
                opts,
                cfg: &cfg,
                seed: spec.seed,
                identity,
                stage_dir: dir,
                use_unlabelled: name == SEMI,
                progress: inputs.progress,
            },
        )?;
        runs.push(ModelRun {
            name: name.to_string(),
            steps: opts.steps,
            resumed_from: trained.resumed_from,
            seconds: trained.seconds,
            pairs_per_second: if trained.seconds > 0.0 {
                f64::from(trained.steps_run) * opts.batch as f64 / trained.seconds
            } else {
                0.0
            },
        });
        fitted_models.push(FittedModel::from_parts(
            info.clone(),
            trained.net,
            trained.map,
        ));
    }

    // Written once the model files exist, so `model.json` always describes them.
    let info_path = dir.join(MODEL_FILE);
    crate::store::write_json_atomic(&info_path, &info).map_err(FitError::io(&info_path))?;

    // Evaluation on the decode grid, in action units.
    ds.view().release();
    let names: Vec<&str> = info.models.iter().map(String::as_str).collect();
    let refs: Vec<&FittedModel> = fitted_models.iter().collect();
    let rules = ds.view().rules().to_vec();
    let dims = std.dims.clone();
    let mut tables = Vec::new();
    let mut holdout = Evaluator::new(&dims, &names);
    for c in ds
        .clips
        .iter()
        .filter(|c| c.labelled && c.split == Split::Holdout)
    {
        let clip = ds.clip(c);
        let Some(truth) = clip.decode_actions() else {
            continue;
        };
        let preds = metrics::decode_grid_predictions(&refs, clip, &rules)?;
        clip.release();
        holdout.add_clip(&c.id, truth, &preds, &std);
    }
    tables.push(holdout.finish("holdout"));
    let mut truth_used = Vec::new();
    for set in spec.sets.iter().filter(|s| !s.labelled) {
        let Some(truth_dir) = &set.eval_truth else {
            continue;
        };
        truth_used.push(set.name.clone());
        let mut ev = Evaluator::new(&dims, &names);
        let mut missing = Vec::new();
        for c in ds.clips.iter().filter(|c| c.set == set.name) {
            let path = truth_dir.join(format!("{}.actions.csv", c.id));
            if !path.exists() {
                missing.push(c.id.clone());
                continue;
            }
            let clip = ds.clip(c);
            let rows = metrics::read_truth(&path, &dims)?;
            let n = clip.decode_len().saturating_sub(1);
            if rows.len() < n {
                return Err(FitError::Corrupt {
                    path,
                    reason: format!("{} rows, the decoded clip has {n} transitions", rows.len()),
                });
            }
            let preds = metrics::decode_grid_predictions(&refs, clip, &rules)?;
            clip.release();
            ev.add_clip(&c.id, &rows[..n], &preds, &std);
        }
        let mut table = ev.finish(&format!("unlabelled:{}", set.name));
        table.truth = Some(truth_dir.clone());
        table.missing_truth = missing;
        tables.push(table);
    }
    let comparison = tables
        .iter()
        .flat_map(|t| {
            t.models.iter().map(|(model, m)| ComparisonRow {
                model: model.clone(),
                eval: t.name.clone(),
                mean_r2: m.mean_r2,
                dims: m.dims.clone(),
            })
        })
        .collect();
    let summary = FitSummary {
        splits: ds.counts,
        labelled_transitions: ds.labelled_len(),
        unlabelled_transitions: ds.unlabelled_len(),
        action_dims: dims.clone(),
        constant_dims: dims
            .iter()
            .zip(&std.constant)
            .filter(|(_, c)| **c)
            .map(|(d, _)| d.clone())
            .collect(),
        models: runs,
        metrics: tables,
        comparison,
        eval_truth_used: truth_used,
        threads: inputs.threads,
    };
    let path = dir.join(METRICS_FILE);
    crate::store::write_json_atomic(&path, &summary).map_err(FitError::io(&path))?;
    Ok(summary)
}

fn fmt_opt(v: Option<f64>) -> String {
    v.map_or_else(|| "-".to_string(), |v| format!("{v:.3}"))
}

/// The `inspect RUN fit` text: splits, training runs and the comparison table.
pub fn inspect_text(run_dir: &Path) -> Result<String, FitError> {
    let path = run_dir.join("fit").join(METRICS_FILE);
    let s: FitSummary = crate::store::read_json(&path).map_err(FitError::io(&path))?;
    let mut out = String::new();
    let _ = writeln!(
        out,
        "labelled clips: {} train, {} calib, {} holdout; {} labelled and {} unlabelled train transitions",
        s.splits.train,
        s.splits.calib,
        s.splits.holdout,
        s.labelled_transitions,
        s.unlabelled_transitions
    );
    if !s.constant_dims.is_empty() {
        let _ = writeln!(
            out,
            "constant action dimensions (R^2 undefined): {}",
            s.constant_dims.join(", ")
        );
    }
    for r in &s.models {
        let resumed = r
            .resumed_from
            .map_or(String::new(), |f| format!(", resumed at step {f}"));
        let _ = writeln!(
            out,
            "model {}: {} steps, {:.1} s, {:.0} pairs/s on {} threads{resumed}",
            r.name, r.steps, r.seconds, r.pairs_per_second, s.threads
        );
    }
    if !s.eval_truth_used.is_empty() {
        let _ = writeln!(
            out,
            "evaluation-only truth used for: {} (never for training)",
            s.eval_truth_used.join(", ")
        );
    }
    for t in &s.metrics {
        let _ = writeln!(
            out,
            "\n{} ({} clips, {} transitions)",
            t.name, t.clips, t.transitions
        );
        let mut header = format!("{:<15} {:>8}", "model", "mean R2");
        for d in &s.action_dims {
            let _ = write!(
                header,
                " | {:>8} {:>8} {:>8}",
                format!("{d} R2"),
                "MAE",
                "NLL"
            );
        }
        let _ = writeln!(out, "{header}");
        for (name, m) in &t.models {
            let mut line = format!("{:<15} {:>8}", name, fmt_opt(m.mean_r2));
            for d in &s.action_dims {
                if let Some(dm) = m.dims.get(d) {
                    let _ = write!(
                        line,
                        " | {:>8} {:>8.4} {:>8.3}",
                        fmt_opt(dm.r2),
                        dm.mae,
                        dm.nll
                    );
                }
            }
            let _ = writeln!(out, "{line}");
        }
        if !t.missing_truth.is_empty() {
            let _ = writeln!(out, "no truth file for: {}", t.missing_truth.join(", "));
        }
    }
    Ok(out)
}
