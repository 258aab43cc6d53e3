//! Training-throughput benchmark of the fit stage's network (candle, CPU):
//! frame pairs per second for forward + backward + AdamW update, at the demo
//! spec's image size (64x64) and batch (64, half labelled), on a rayon pool
//! of `--threads` workers. `bench/train_torch.py` runs the same network and
//! step in PyTorch; `bench/train_bench.sh` runs both and prints the ratio.
//!
//! Usage: `cargo run --release --example train_bench -- [--threads N] [--steps N]`
//! Prints one JSON line.

use std::time::Instant;

use actuary::model::{self, AdamW, AdamWParams, Batch, Config, LossOptions, Rng, SeededInit};
use candle_core::{DType, Device, Tensor};
use candle_nn::VarMap;

fn arg(name: &str, default: usize) -> usize {
    let args: Vec<String> = std::env::args().collect();
    args.iter()
        .position(|a| a == name)
        .and_then(|i| args.get(i + 1))
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

fn main() {
    let threads = arg("--threads", 2);
    let steps = arg("--steps", 30);
    let batch = arg("--batch", 64);
    if std::env::var("ACTUARY_BENCH_DEFAULT_MALLOC").is_err() {
        actuary::fit::tune_allocator();
    }
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .unwrap();
    pool.install(|| run(threads, steps, batch));
}

fn run(threads: usize, steps: usize, b: usize) {
    let cfg = Config::default();
    let dev = Device::Cpu;
    let map = VarMap::new();
    let net = model::Net::new(&cfg, SeededInit::var_builder(&map, 1, DType::F32, &dev)).unwrap();
    let mut vars: Vec<_> = map
        .data()
        .lock()
        .unwrap()
        .iter()
        .map(|(k, v)| (k.clone(), v.clone()))
        .collect();
    vars.sort_by(|a, b| a.0.cmp(&b.0));
    let params: usize = vars.iter().map(|(_, v)| v.elem_count()).sum();
    let mut opt = AdamW::new(vars, AdamWParams::default());
    let mut rng = Rng::new(5);
    let n_l = b / 2;
    let fb = cfg.width * cfg.height * 3;
    // Smooth random frames (a moving gradient) so activations are not degenerate.
    let make = |rng: &mut Rng| -> Batch {
        let mut frames = |shift: f64| -> Vec<u8> {
            (0..b * fb)
                .map(|i| ((i % fb) as f64 * 0.01 + shift + 20.0 * rng.uniform()) as u8)
                .collect()
        };
        let (x0, x1) = (frames(0.0), frames(1.0));
        let actions: Vec<f32> = rng
            .normals(n_l * cfg.action_dims)
            .into_iter()
            .map(|v| v as f32)
            .collect();
        let boot: Vec<f32> = (0..cfg.heads * n_l).map(|_| rng.below(3) as f32).collect();
        let eps: Vec<f32> = rng
            .normals(b * cfg.latent)
            .into_iter()
            .map(|v| v as f32)
            .collect();
        Batch {
            x_t: model::frames_to_tensor(x0, b, cfg.height, cfg.width, DType::F32, &dev).unwrap(),
            x_t1: model::frames_to_tensor(x1, b, cfg.height, cfg.width, DType::F32, &dev).unwrap(),
            n_labelled: n_l,
            actions: Some(Tensor::from_vec(actions, (n_l, cfg.action_dims), &dev).unwrap()),
            boot: Some(Tensor::from_vec(boot, (cfg.heads, n_l), &dev).unwrap()),
            eps: Tensor::from_vec(eps, (b, cfg.latent), &dev).unwrap(),
        }
    };
    let opts = LossOptions::default();
    let batches: Vec<Batch> = (0..4).map(|_| make(&mut rng)).collect();
    for batch in batches.iter().take(2) {
        let l = net.loss(batch, &opts).unwrap();
        opt.backward_step(&l.total).unwrap();
    }
    let (mut fwd, mut bwd) = (0.0, 0.0);
    let t0 = Instant::now();
    for s in 0..steps {
        let t = Instant::now();
        let l = net.loss(&batches[s % batches.len()], &opts).unwrap();
        let _ = l.total.to_scalar::<f32>().unwrap();
        fwd += t.elapsed().as_secs_f64();
        let t = Instant::now();
        opt.backward_step(&l.total).unwrap();
        bwd += t.elapsed().as_secs_f64();
    }
    let secs = t0.elapsed().as_secs_f64();
    println!(
        "{{\"impl\":\"candle\",\"threads\":{threads},\"batch\":{b},\"steps\":{steps},\"params\":{params},\
         \"pairs_per_s\":{:.1},\"forward_s\":{fwd:.3},\"backward_update_s\":{bwd:.3}}}",
        (steps * b) as f64 / secs
    );
}
