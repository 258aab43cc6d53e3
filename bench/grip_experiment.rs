//! Experiment (not a test, not part of the pipeline): can the posterior
//! network plus one action head learn the demo's actions, grip included, from
//! labelled robot pairs alone, with the action loss only (no decoder)?
//!
//! Usage: cargo run --release --example grip_experiment -- RUN CLIPS LOSS STEPS [GMAX]
//!   LOSS: nll (the fit's Gaussian NLL) | mse | beta (beta-NLL, beta = 0.5,
//!   Seitzer et al. 2022)
//! Reads RUN/decode/clips/robot/*.frames and CLIPS/robot/*.actions.csv; clips
//! 0-15 train, 16-19 are scored. Prints R^2 per dimension on both.

use candle_core::{DType, Device, Tensor};
use candle_nn::VarMap;

use actuary::fit::shift_frame;
use actuary::model::{self, AdamW, AdamWParams, Config, Net, Rng, SeededInit};

struct Clip {
    frames: Vec<u8>,
    n: usize,
    actions: Vec<[f32; 3]>,
}

fn load(run: &str, clips: &str) -> Vec<Clip> {
    let mut paths: Vec<_> = std::fs::read_dir(format!("{run}/decode/clips/robot"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "frames"))
        .collect();
    paths.sort();
    paths
        .iter()
        .map(|p| {
            let raw = std::fs::read(p).unwrap();
            let u = |o: usize| u32::from_le_bytes(raw[o..o + 4].try_into().unwrap()) as usize;
            let (w, h, n) = (u(12), u(16), u(20));
            assert_eq!((w, h), (64, 64));
            let stem = p.file_stem().unwrap().to_string_lossy().to_string();
            let csv = std::fs::read_to_string(format!("{clips}/robot/{stem}.actions.csv")).unwrap();
            let rows: Vec<Vec<f64>> = csv
                .lines()
                .skip(1)
                .map(|l| l.split(',').map(|v| v.parse().unwrap()).collect())
                .collect();
            let ratio = rows.len() / n;
            let actions = (0..n - 1)
                .map(|k| {
                    let r = &rows[k * ratio..(k + 1) * ratio];
                    let dx: f64 = r.iter().map(|x| x[1]).sum();
                    let dy: f64 = r.iter().map(|x| x[2]).sum();
                    [dx as f32, dy as f32, r[0][3] as f32]
                })
                .collect();
            Clip {
                frames: raw[64..].to_vec(),
                n,
                actions,
            }
        })
        .collect()
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let (run, clips, loss, steps) = (
        &args[1],
        &args[2],
        args[3].as_str(),
        args[4].parse::<u32>().unwrap(),
    );
    let flat = args.get(5).map(|s| s == "1").unwrap_or(true);
    let shift = args.get(6).map(|s| s.parse::<i64>().unwrap()).unwrap_or(0);
    let data = load(run, clips);
    let fb = 64 * 64 * 3;
    let train: Vec<(usize, usize)> = (0..16)
        .flat_map(|c| (0..data[c].n - 1).map(move |k| (c, k)))
        .collect();
    let test: Vec<(usize, usize)> = (16..data.len())
        .flat_map(|c| (0..data[c].n - 1).map(move |k| (c, k)))
        .collect();
    let mut mean = [0f64; 3];
    let mut sd = [0f64; 3];
    for &(c, k) in &train {
        for a in 0..3 {
            mean[a] += data[c].actions[k][a] as f64 / train.len() as f64;
        }
    }
    for &(c, k) in &train {
        for a in 0..3 {
            sd[a] += (data[c].actions[k][a] as f64 - mean[a]).powi(2) / train.len() as f64;
        }
    }
    let sd = sd.map(f64::sqrt);
    println!(
        "train {} test {} pairs; mean {mean:?} sd {sd:?}",
        train.len(),
        test.len()
    );
    let cfg = Config {
        width: 64,
        height: 64,
        action_dims: 3,
        heads: 1,
        posterior_flat: flat,
        stem: std::env::var("EXP_STEM")
            .ok()
            .and_then(|v| v.parse().ok())
            .unwrap_or(2),
        ..Config::default()
    };
    let map = VarMap::new();
    let seed: u64 = std::env::var("EXP_SEED")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(1);
    let vb = SeededInit::var_builder(&map, seed, DType::F32, &Device::Cpu);
    let net = Net::new(&cfg, vb).unwrap();
    let vars: Vec<_> = map
        .data()
        .lock()
        .unwrap()
        .iter()
        .filter(|(k, _)| k.starts_with("posterior") || k.starts_with("heads"))
        .map(|(k, v)| (k.clone(), v.clone()))
        .collect();
    let mut opt = AdamW::new(
        vars,
        AdamWParams {
            lr: 0.002,
            ..AdamWParams::default()
        },
    );
    let mut rng = Rng::for_name(seed, "grip");
    let batch_of = |pairs: &[(usize, usize)], shifts: &[(i64, i64)]| {
        let mut a = Vec::with_capacity(pairs.len() * fb);
        let mut b = Vec::with_capacity(pairs.len() * fb);
        let mut y = Vec::with_capacity(pairs.len() * 3);
        let mut tmp = vec![0u8; fb];
        for (i, &(c, k)) in pairs.iter().enumerate() {
            let (dy, dx) = shifts.get(i).copied().unwrap_or((0, 0));
            shift_frame(
                &data[c].frames[k * fb..(k + 1) * fb],
                &mut tmp,
                64,
                64,
                dy,
                dx,
            );
            a.extend_from_slice(&tmp);
            shift_frame(
                &data[c].frames[(k + 1) * fb..(k + 2) * fb],
                &mut tmp,
                64,
                64,
                dy,
                dx,
            );
            b.extend_from_slice(&tmp);
            for d in 0..3 {
                y.push(((data[c].actions[k][d] as f64 - mean[d]) / sd[d]) as f32);
            }
        }
        let n = pairs.len();
        let dev = Device::Cpu;
        (
            model::frames_to_tensor(a, n, 64, 64, DType::F32, &dev).unwrap(),
            model::frames_to_tensor(b, n, 64, 64, DType::F32, &dev).unwrap(),
            Tensor::from_vec(y, (n, 3), &dev).unwrap(),
        )
    };
    let lr0: f64 = std::env::var("EXP_LR")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(0.002);
    let t0 = std::time::Instant::now();
    for step in 1..=steps {
        let p = f64::from(step - 1) / f64::from(steps);
        let lr = lr0 * (0.1 + 0.45 * (1.0 + (std::f64::consts::PI * p).cos()));
        opt.set_lr(lr);
        let pick: Vec<_> = (0..32)
            .map(|_| train[rng.below(train.len() as u64) as usize])
            .collect();
        let shifts: Vec<(i64, i64)> = (0..32)
            .map(|_| {
                let r = 2 * shift as u64 + 1;
                (rng.below(r) as i64 - shift, rng.below(r) as i64 - shift)
            })
            .collect();
        let (xt, xt1, y) = batch_of(&pick, &shifts);
        let inf = net.infer(&xt, &xt1).unwrap();
        let (m, lv) = &inf.heads[0];
        let l = match loss {
            "mse" => (m - &y).unwrap().sqr().unwrap().mean_all().unwrap(),
            "faithful" => {
                let (_, lv2) = net.heads()[0].forward(&inf.mu.detach()).unwrap();
                let mse = ((m - &y).unwrap().sqr().unwrap() * 0.5)
                    .unwrap()
                    .mean_all()
                    .unwrap();
                let nll = model::losses::gaussian_nll(&y, &m.detach(), &lv2)
                    .unwrap()
                    .mean_all()
                    .unwrap();
                (mse + nll).unwrap()
            }
            "nll" => model::losses::gaussian_nll(&y, m, lv)
                .unwrap()
                .mean_all()
                .unwrap(),
            b if b.starts_with("beta") => {
                let beta: f64 = b[4..].parse().unwrap_or(0.5);
                let w = (lv * beta).unwrap().exp().unwrap().detach();
                (model::losses::gaussian_nll(&y, m, lv).unwrap() * w)
                    .unwrap()
                    .mean_all()
                    .unwrap()
            }
            other => panic!("loss {other}"),
        };
        opt.backward_step(&l).unwrap();
        if step % 100 == 0 {
            println!(
                "step {step} loss {:.4} ({:.0} s)",
                l.to_scalar::<f32>().unwrap(),
                t0.elapsed().as_secs_f64()
            );
        }
    }
    for (name, set) in [("train", &train), ("test", &test)] {
        let mut se = [0f64; 3];
        let mut ss = [0f64; 3];
        let mut mu = [0f64; 3];
        let mut ys = Vec::new();
        let mut ps = Vec::new();
        for chunk in set.chunks(128) {
            let (xt, xt1, y) = batch_of(chunk, &[]);
            let inf = net.infer(&xt, &xt1).unwrap();
            ps.extend(
                inf.heads[0]
                    .0
                    .flatten_all()
                    .unwrap()
                    .to_vec1::<f32>()
                    .unwrap(),
            );
            ys.extend(y.flatten_all().unwrap().to_vec1::<f32>().unwrap());
        }
        let n = ys.len() / 3;
        for i in 0..n {
            for d in 0..3 {
                mu[d] += ys[i * 3 + d] as f64 / n as f64;
            }
        }
        for i in 0..n {
            for d in 0..3 {
                se[d] += (ys[i * 3 + d] - ps[i * 3 + d]).powi(2) as f64;
                ss[d] += (ys[i * 3 + d] as f64 - mu[d]).powi(2);
            }
        }
        let r2: Vec<String> = (0..3)
            .map(|d| format!("{:.3}", 1.0 - se[d] / ss[d]))
            .collect();
        println!("{name}: R^2 dx dy grip = {}", r2.join(" "));
    }
}
