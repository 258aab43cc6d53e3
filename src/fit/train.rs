//! The training loop of one model: seeded batches, AdamW with a cosine
//! learning-rate decay, a per-step CSV log, checkpoints and resumption.
//!
//! Resumption is exact: a checkpoint stores the parameters, the optimiser
//! moments and step count, and the sampler's RNG state, so a fit killed after
//! checkpoint `s` and resumed computes the same steps `s+1..` as an
//! uninterrupted run (bit-identical when the thread count is the same, since
//! the matrix products split their work by thread count). The log is cut back
//! to step `s` on resumption.

use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::time::Instant;

use candle_core::{DType, Device, Tensor};
use candle_nn::VarMap;

use super::FitError;
use super::FitOptions;
use super::checkpoint::{self, Identity};
use super::data::{Dataset, RELEASE_EVERY};
use crate::model::{self, AdamW, AdamWParams, Bandwidth, Batch, LossOptions, Net, Rng, SeededInit};

/// Header of the per-step log.
pub const LOG_HEADER: &str = "step,total,recon,kl,action,align,variance,sigma,lr";

/// What to train.
pub struct TrainSpec<'a> {
    /// Model name (`semi`, `labelled-only`); names files and RNG streams.
    pub name: &'static str,
    /// Stage options.
    pub opts: &'a FitOptions,
    /// Network shape.
    pub cfg: &'a model::Config,
    /// Run seed.
    pub seed: u64,
    /// Settings and network hashes, checked against checkpoints.
    pub identity: Identity,
    /// `RUN/fit/`.
    pub stage_dir: &'a Path,
    /// Mix unlabelled transitions into batches (with the alignment term).
    pub use_unlabelled: bool,
    /// Show a progress bar (on a terminal).
    pub progress: bool,
}

/// A trained model.
pub struct Trained {
    /// Its parameters.
    pub map: VarMap,
    /// The network.
    pub net: Net,
    /// Step the run resumed from, if it did.
    pub resumed_from: Option<u32>,
    /// Steps run in this call.
    pub steps_run: u32,
    /// Seconds spent training in this call.
    pub seconds: f64,
}

/// `RUN/fit/checkpoints/<name>.safetensors`.
pub fn checkpoint_path(stage_dir: &Path, name: &str) -> PathBuf {
    stage_dir
        .join("checkpoints")
        .join(format!("{name}.safetensors"))
}

/// `RUN/fit/<name>.log.csv`.
pub fn log_path(stage_dir: &Path, name: &str) -> PathBuf {
    stage_dir.join(format!("{name}.log.csv"))
}

/// `RUN/fit/<name>.safetensors`.
pub fn model_path(stage_dir: &Path, name: &str) -> PathBuf {
    stage_dir.join(format!("{name}.safetensors"))
}

/// Learning rate at 1-based `step` of `steps`: cosine decay from `lr` to `lr / 10`.
pub fn learning_rate(lr: f64, step: u32, steps: u32) -> f64 {
    let p = f64::from(step.saturating_sub(1)) / f64::from(steps.max(1));
    lr * (0.1 + 0.9 * 0.5 * (1.0 + (std::f64::consts::PI * p).cos()))
}

/// Builds a network with seeded initial parameters.
pub fn build(cfg: &model::Config, seed: u64, name: &str) -> Result<(VarMap, Net), FitError> {
    let map = VarMap::new();
    let init_seed = Rng::for_name(seed, &format!("fit.init.{name}")).next_u64();
    let vb = SeededInit::var_builder(&map, init_seed, DType::F32, &Device::Cpu);
    let net = Net::new(cfg, vb)?;
    Ok((map, net))
}

/// Keeps the header and the rows of steps `<= step` of an existing log.
fn cut_log(path: &Path, step: u32) -> Result<(), FitError> {
    let text = std::fs::read_to_string(path).unwrap_or_default();
    let mut out = String::from(LOG_HEADER);
    out.push('\n');
    for line in text.lines().skip(1) {
        let s: Option<u32> = line.split(',').next().and_then(|v| v.parse().ok());
        if s.is_some_and(|s| s <= step) {
            out.push_str(line);
            out.push('\n');
        }
    }
    crate::store::write_atomic(path, out.as_bytes()).map_err(FitError::io(path))
}

fn progress_bar(steps: u32, name: &str, show: bool) -> indicatif::ProgressBar {
    if !show {
        return indicatif::ProgressBar::hidden();
    }
    let pb = indicatif::ProgressBar::with_draw_target(
        Some(u64::from(steps)),
        indicatif::ProgressDrawTarget::stderr(),
    );
    if let Ok(style) = indicatif::ProgressStyle::with_template(
        "{prefix:>14} [{bar:30}] {pos}/{len} {msg} (eta {eta})",
    ) {
        pb.set_style(style.progress_chars("=> "));
    }
    pb.set_prefix(format!("fit {name}"));
    pb
}

/// Trains (or resumes training) one model. Call inside the stage's rayon pool.
pub fn train(ds: &mut Dataset, spec: &TrainSpec<'_>) -> Result<Trained, FitError> {
    let opts = spec.opts;
    let (map, net) = build(spec.cfg, spec.seed, spec.name)?;
    let vars = checkpoint::sorted_vars(&map);
    let network_json = serde_json::to_string(spec.cfg).expect("config serialises");
    let mut opt = AdamW::new(
        vars.clone(),
        AdamWParams {
            lr: opts.learning_rate,
            ..AdamWParams::default()
        },
    );
    let mut rng = Rng::for_name(spec.seed, &format!("fit.sampler.{}", spec.name));
    let boot = ds.bootstrap(spec.cfg.heads, spec.seed);
    let ckpt = checkpoint_path(spec.stage_dir, spec.name);
    let log = log_path(spec.stage_dir, spec.name);
    let mut start = 0u32;
    let mut resumed_from = None;
    if ckpt.exists() {
        let restored = checkpoint::load_checkpoint(&ckpt, &spec.identity, &vars)?;
        opt.restore(u64::from(restored.step), restored.moments)?;
        rng = Rng::from_state(restored.rng);
        start = restored.step.min(opts.steps);
        resumed_from = Some(start);
        cut_log(&log, start)?;
    } else {
        crate::store::write_atomic(&log, format!("{LOG_HEADER}\n").as_bytes())
            .map_err(FitError::io(&log))?;
    }
    let mut log_file = std::fs::OpenOptions::new()
        .append(true)
        .open(&log)
        .map_err(FitError::io(&log))?;

    let batch = opts.batch.max(4);
    // The labelled-only model gets the same labelled rows per step as the
    // semi-supervised one (the unlabelled rows are left out, not replaced), so
    // the two differ only in what the unlabelled clips add.
    let share_l = ((batch as f64 * opts.labelled_share).round() as usize).clamp(2, batch - 2);
    let (n_l, n_u) = if spec.use_unlabelled && ds.unlabelled_len() > 0 {
        (share_l, batch - share_l)
    } else if spec.use_unlabelled {
        (batch, 0)
    } else {
        (share_l, 0)
    };
    let loss_opts = LossOptions {
        action_weight: opts.action_weight,
        align_weight: if n_u > 0 { opts.align_weight } else { 0.0 },
        bandwidth: Bandwidth::Median,
        head_loss: opts.head_loss,
    };
    let (w, h, a, k, heads) = (
        ds.width,
        ds.height,
        ds.action_dims(),
        spec.cfg.latent,
        spec.cfg.heads,
    );
    let dev = Device::Cpu;
    let pb = progress_bar(opts.steps, spec.name, spec.progress);
    pb.set_position(u64::from(start));
    let started = Instant::now();
    for step in start + 1..=opts.steps {
        if step % RELEASE_EVERY == 0 {
            ds.view().release();
        }
        let lr = learning_rate(opts.learning_rate, step, opts.steps);
        opt.set_lr(lr);
        let raw = ds.sample(&mut rng, n_l, n_u, &boot)?;
        let eps: Vec<f32> = rng
            .normals(raw.n * k)
            .into_iter()
            .map(|v| v as f32)
            .collect();
        let batch = Batch {
            x_t: model::frames_to_tensor(raw.x_t, raw.n, h, w, DType::F32, &dev)?,
            x_t1: model::frames_to_tensor(raw.x_t1, raw.n, h, w, DType::F32, &dev)?,
            n_labelled: raw.n_labelled,
            actions: Some(Tensor::from_vec(raw.actions, (raw.n_labelled, a), &dev)?),
            boot: Some(Tensor::from_vec(raw.boot, (heads, raw.n_labelled), &dev)?),
            eps: Tensor::from_vec(eps, (raw.n, k), &dev)?,
        };
        let parts = net.loss(&batch, &loss_opts)?;
        let mut vals = [0f64; 6];
        let names = ["total", "recon", "kl", "action", "align", "variance"];
        for (i, t) in [
            &parts.total,
            &parts.recon,
            &parts.kl,
            &parts.action,
            &parts.align,
            &parts.variance,
        ]
        .into_iter()
        .enumerate()
        {
            vals[i] = f64::from(t.to_dtype(DType::F32)?.to_scalar::<f32>()?);
        }
        // Report the first bad part in loss order (the total is bad whenever a part is).
        if let Some(i) = (1..6).chain([0]).find(|&i| !vals[i].is_finite()) {
            pb.abandon();
            return Err(FitError::NonFinite {
                model: spec.name.to_string(),
                step,
                part: names[i],
                value: vals[i],
            });
        }
        opt.backward_step(&parts.total)?;
        let sigma = if parts.sigma.is_finite() {
            format!("{:.6}", parts.sigma)
        } else {
            String::new()
        };
        writeln!(
            log_file,
            "{step},{:.6},{:.6},{:.6},{:.6},{:.6},{:.8},{sigma},{lr:.6}",
            vals[0], vals[1], vals[2], vals[3], vals[4], vals[5]
        )
        .map_err(FitError::io(&log))?;
        pb.set_position(u64::from(step));
        pb.set_message(format!("loss {:.1} action {:.3}", vals[0], vals[3]));
        if step % opts.checkpoint_every.max(1) == 0 || step == opts.steps {
            log_file.flush().map_err(FitError::io(&log))?;
            let (_, moments) = opt.state();
            checkpoint::save_checkpoint(
                &ckpt,
                &spec.identity,
                &network_json,
                &vars,
                step,
                rng.state(),
                &moments,
            )?;
        }
    }
    pb.finish_and_clear();
    let steps_run = opts.steps - start;
    checkpoint::save_model(
        &model_path(spec.stage_dir, spec.name),
        &spec.identity,
        &network_json,
        &vars,
    )?;
    Ok(Trained {
        map,
        net,
        resumed_from,
        steps_run,
        seconds: started.elapsed().as_secs_f64(),
    })
}
