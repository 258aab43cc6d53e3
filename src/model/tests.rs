//! Unit tests of the model's maths against outside references (SciPy/NumPy
//! via `python3`, Monte-Carlo estimates, finite differences).

use candle_core::{DType, Device, Tensor, Var};
use candle_nn::VarMap;

use super::losses::{
    Bandwidth, gaussian_nll, head_loss, kl_diag_gaussians, kl_std_normal, median_bandwidth,
    mmd2_unbiased, shared_variance_nll,
};
use super::*;

/// Runs a Python script with `input` on stdin and returns its stdout. A
/// missing `python3` or package fails the test unless `ACTUARY_ALLOW_SKIP=1`,
/// in which case `None` is returned.
fn python(script: &str, input: &str) -> Option<String> {
    use std::io::Write;
    use std::process::{Command, Stdio};
    let allow_skip = std::env::var("ACTUARY_ALLOW_SKIP").as_deref() == Ok("1");
    let child = Command::new("python3")
        .arg("-c")
        .arg(script)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn();
    let mut child = match child {
        Ok(c) => c,
        Err(e) if allow_skip => {
            eprintln!("skipping: python3 not runnable: {e}");
            return None;
        }
        Err(e) => panic!("python3 not runnable ({e}); set ACTUARY_ALLOW_SKIP=1 to skip"),
    };
    child
        .stdin
        .take()
        .unwrap()
        .write_all(input.as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    if !out.status.success() {
        if allow_skip && stderr.contains("ModuleNotFoundError") {
            eprintln!("skipping: {stderr}");
            return None;
        }
        panic!("python3 failed (pip install numpy scipy): {stderr}");
    }
    Some(String::from_utf8(out.stdout).unwrap())
}

fn floats(s: &str) -> Vec<f64> {
    s.split_whitespace().map(|v| v.parse().unwrap()).collect()
}

fn t64(v: &[f64], shape: &[usize]) -> Tensor {
    Tensor::from_slice(v, shape, &Device::Cpu).unwrap()
}

fn scalar(t: &Tensor) -> f64 {
    t.to_dtype(DType::F64).unwrap().to_scalar::<f64>().unwrap()
}

#[test]
fn kl_diag_gaussians_matches_monte_carlo_and_scipy_quadrature() {
    // Closed form: Kingma & Welling 2014, "Auto-Encoding Variational Bayes",
    // appendix B (generalised to a non-standard second Gaussian).
    let m1 = [0.3, -1.2, 2.0, 0.0];
    let l1 = [-0.5, 0.4, -2.0, 0.0];
    let m2 = [0.0, 0.5, 1.5, -0.7];
    let l2 = [0.2, -0.3, 0.0, 1.0];
    let kl = scalar(
        &kl_diag_gaussians(
            &t64(&m1, &[4]),
            &t64(&l1, &[4]),
            &t64(&m2, &[4]),
            &t64(&l2, &[4]),
        )
        .unwrap(),
    );
    // Against the standard normal, the general form and the special case agree.
    let z = [0.0; 4];
    let a = scalar(&kl_std_normal(&t64(&m1, &[4]), &t64(&l1, &[4])).unwrap());
    let b = scalar(
        &kl_diag_gaussians(
            &t64(&m1, &[4]),
            &t64(&l1, &[4]),
            &t64(&z, &[4]),
            &t64(&z, &[4]),
        )
        .unwrap(),
    );
    assert!((a - b).abs() < 1e-12, "{a} vs {b}");

    // Monte-Carlo: mean of log q(x) - log p(x) over x ~ q; 5 standard errors.
    let mut rng = Rng::new(11);
    let n = 200_000;
    let (mut sum, mut sum2) = (0.0, 0.0);
    for _ in 0..n {
        let mut d = 0.0;
        for j in 0..4 {
            let s1 = (0.5 * l1[j]).exp();
            let x = m1[j] + s1 * rng.normal();
            let lq = -0.5 * (losses::LN_2PI + l1[j] + (x - m1[j]).powi(2) / l1[j].exp());
            let lp = -0.5 * (losses::LN_2PI + l2[j] + (x - m2[j]).powi(2) / l2[j].exp());
            d += lq - lp;
        }
        sum += d;
        sum2 += d * d;
    }
    let mean = sum / n as f64;
    let se = ((sum2 / n as f64 - mean * mean) / n as f64).sqrt();
    assert!(
        (mean - kl).abs() < 5.0 * se,
        "closed {kl}, MC {mean} +- {se}"
    );

    // SciPy: numerical integration of q (log q - log p) per dimension with
    // scipy.integrate.quad and scipy.stats.norm.logpdf.
    let script = r#"
import sys, numpy as np
from scipy import integrate, stats
v = [float(x) for x in sys.stdin.read().split()]
m1, l1, m2, l2 = (np.array(v[i*4:(i+1)*4]) for i in range(4))
tot = 0.0
for j in range(4):
    s1, s2 = np.exp(0.5*l1[j]), np.exp(0.5*l2[j])
    f = lambda x: stats.norm.pdf(x, m1[j], s1) * (stats.norm.logpdf(x, m1[j], s1) - stats.norm.logpdf(x, m2[j], s2))
    val, _ = integrate.quad(f, m1[j] - 40*s1, m1[j] + 40*s1, limit=200, epsabs=1e-13, epsrel=1e-12)
    tot += val
print(repr(tot))
"#;
    let input: Vec<String> = [m1, l1, m2, l2]
        .concat()
        .iter()
        .map(|v| v.to_string())
        .collect();
    if let Some(out) = python(script, &input.join(" ")) {
        let reference = floats(&out)[0];
        assert!(
            (kl - reference).abs() < 1e-8,
            "closed {kl}, scipy {reference}"
        );
    }
}

#[test]
fn gaussian_nll_matches_scipy_norm_logpdf() {
    // Reference: -scipy.stats.norm.logpdf(x, mu, exp(lv / 2)).
    let x = [0.0, 1.5, -2.0, 3.25, 0.1, -0.7];
    let mu = [0.0, 1.0, 0.5, -1.0, 0.1, 2.0];
    let lv = [0.0, -1.0, 2.0, 0.3, -8.0, 1.5];
    let ours: Vec<f64> = gaussian_nll(&t64(&x, &[6]), &t64(&mu, &[6]), &t64(&lv, &[6]))
        .unwrap()
        .to_vec1()
        .unwrap();
    let script = r#"
import sys, numpy as np
from scipy import stats
v = np.array([float(x) for x in sys.stdin.read().split()]).reshape(3, -1)
print(" ".join(repr(float(t)) for t in -stats.norm.logpdf(v[0], v[1], np.exp(0.5*v[2]))))
"#;
    let input: Vec<String> = [x, mu, lv].concat().iter().map(|v| v.to_string()).collect();
    if let Some(out) = python(script, &input.join(" ")) {
        for (a, b) in ours.iter().zip(floats(&out)) {
            assert!(
                (a - b).abs() < 1e-10 * b.abs().max(1.0),
                "ours {a}, scipy {b}"
            );
        }
    }
}

#[test]
fn faithful_head_loss_gives_the_mean_a_squared_error_gradient() {
    // Closed forms (textbook calculus of the Gaussian NLL
    // 0.5 (ln 2pi + lv + (a - m)^2 e^-lv)): d/dm = (m - a) e^-lv and
    // d/dlv = 0.5 (1 - (a - m)^2 e^-lv). The faithful loss (Stirn et al. 2023)
    // must give the mean the squared-error gradient m - a whatever the
    // variance, no gradient to the undetached log-variance, and the NLL's
    // log-variance gradient to the detached one; its value is
    // 0.5 (a - m)^2 + NLL (checked against scipy in the test above).
    let a = [0.5, -1.0, 2.0];
    let m0 = [0.0, 0.5, -1.0];
    let lv0 = [3.0, -2.0, 0.7];
    let var = |v: &[f64]| Var::from_tensor(&t64(v, &[3])).unwrap();
    let (m, lv, lvd) = (var(&m0), var(&lv0), var(&lv0));
    for kind in [HeadLoss::Faithful, HeadLoss::Nll] {
        let loss = head_loss(kind, &t64(&a, &[3]), &m, &lv, &lvd).unwrap();
        let g = loss.sum_all().unwrap().backward().unwrap();
        let grad = |v: &Var| -> Vec<f64> {
            g.get(v)
                .map(|t| t.to_vec1().unwrap())
                .unwrap_or_else(|| vec![0.0; 3])
        };
        let vals: Vec<f64> = loss.to_vec1().unwrap();
        for i in 0..3 {
            let r = a[i] - m0[i];
            let nll = 0.5 * (losses::LN_2PI + lv0[i] + r * r * (-lv0[i]).exp());
            let dlv = 0.5 * (1.0 - r * r * (-lv0[i]).exp());
            let (want_val, want_m, want_lv, want_lvd) = match kind {
                HeadLoss::Faithful => (0.5 * r * r + nll, -r, 0.0, dlv),
                HeadLoss::Nll => (nll, -r * (-lv0[i]).exp(), dlv, 0.0),
            };
            let close = |x: f64, y: f64| (x - y).abs() < 1e-12 * y.abs().max(1.0);
            assert!(
                close(vals[i], want_val),
                "{kind:?} value {} vs {want_val}",
                vals[i]
            );
            assert!(
                close(grad(&m)[i], want_m),
                "{kind:?} d/dm {} vs {want_m}",
                grad(&m)[i]
            );
            assert!(
                close(grad(&lv)[i], want_lv),
                "{kind:?} d/dlv {}",
                grad(&lv)[i]
            );
            assert!(
                close(grad(&lvd)[i], want_lvd),
                "{kind:?} d/dlv_d {}",
                grad(&lvd)[i]
            );
        }
    }
}

fn tiny_config(variance: SharedVariance) -> Config {
    Config {
        width: 8,
        height: 8,
        latent: 3,
        action_dims: 2,
        stem: 1,
        levels: 2,
        widths: vec![4, 5],
        hidden: 6,
        head_hidden: 4,
        heads: 2,
        recon_level: 1,
        variance,
        global_max: true,
        posterior_flat: true,
    }
}

/// A deterministic batch of `b` frame pairs (`n_l` labelled) for `cfg`.
fn tiny_batch(cfg: &Config, b: usize, n_l: usize, dtype: DType, seed: u64) -> Batch {
    let dev = Device::Cpu;
    let mut rng = Rng::new(seed);
    let px = cfg.width * cfg.height * 3;
    let mut frame = |n: usize| -> Tensor {
        let v: Vec<f64> = (0..n * px).map(|_| rng.uniform()).collect();
        Tensor::from_vec(v, (n, cfg.height, cfg.width, 3), &dev)
            .unwrap()
            .to_dtype(dtype)
            .unwrap()
    };
    let (x_t, x_t1) = (frame(b), frame(b));
    let mut rng = Rng::new(seed + 1);
    let mut normals = |shape: (usize, usize)| -> Tensor {
        Tensor::from_vec(rng.normals(shape.0 * shape.1), shape, &dev)
            .unwrap()
            .to_dtype(dtype)
            .unwrap()
    };
    let actions = normals((n_l, cfg.action_dims));
    let eps = normals((b, cfg.latent));
    let boot: Vec<f64> = (0..cfg.heads * n_l).map(|i| (i % 3) as f64).collect();
    Batch {
        x_t,
        x_t1,
        n_labelled: n_l,
        actions: Some(actions),
        boot: Some(
            Tensor::from_vec(boot, (cfg.heads, n_l), &dev)
                .unwrap()
                .to_dtype(dtype)
                .unwrap(),
        ),
        eps,
    }
}

#[test]
fn closed_form_shared_variance_is_the_mse() {
    // Gaussian ML variance = mean squared error (textbook; e.g. any
    // statistics handbook on the normal MLE).
    let pred = t64(&[0.1, 0.2, 0.3, 0.4, 0.5, 0.6], &[2, 3]);
    let target = t64(&[0.0, 0.4, 0.3, 0.1, 0.5, 1.0], &[2, 3]);
    let (_, s2) = shared_variance_nll(&pred, &target, None).unwrap();
    let mse = (0.01 + 0.04 + 0.0 + 0.09 + 0.0 + 0.16) / 6.0;
    assert!((scalar(&s2) - mse).abs() < 1e-12);
}

#[test]
fn learned_shared_variance_converges_to_reconstruction_mse() {
    // Only `decoder.log_var` is optimised on a fixed batch: its optimum is the
    // Gaussian maximum-likelihood variance, the reconstruction MSE (textbook
    // property of the normal MLE).
    let cfg = tiny_config(SharedVariance::Learned);
    let map = VarMap::new();
    let vb = SeededInit::var_builder(&map, 3, DType::F64, &Device::Cpu);
    let net = Net::new(&cfg, vb).unwrap();
    let batch = tiny_batch(&cfg, 6, 3, DType::F64, 5);
    let log_var = map.data().lock().unwrap()["decoder.log_var"].clone();
    let opts = LossOptions::default();
    let mut sgd = candle_nn::SGD::new(vec![log_var.clone()], 0.5 / (4 * 4 * 3) as f64).unwrap();
    use candle_nn::Optimizer;
    for _ in 0..400 {
        let parts = net.loss(&batch, &opts).unwrap();
        sgd.backward_step(&parts.recon).unwrap();
    }
    let parts = net.loss(&batch, &opts).unwrap();
    // The MSE of the (fixed) network's prediction.
    let (mu, lv) = net.posterior().forward(&batch.x_t, &batch.x_t1).unwrap();
    let zz = (&mu + (&lv * 0.5).unwrap().exp().unwrap().mul(&batch.eps).unwrap()).unwrap();
    let pred = net.decode(&batch.x_t, &zz).unwrap();
    let mse = scalar(
        &(pred - net.target(&batch.x_t1).unwrap())
            .unwrap()
            .sqr()
            .unwrap()
            .mean_all()
            .unwrap(),
    );
    let learned = scalar(&parts.variance);
    assert!(
        (learned - mse).abs() < 1e-6 * mse.max(1e-12) + 1e-9,
        "learned {learned}, mse {mse}"
    );
    assert!(
        (learned.ln() - super::INITIAL_LOG_VARIANCE).abs() > 0.1,
        "variance did not move"
    );
}

/// NumPy reference of the unbiased MMD^2 (Gretton et al. 2012, JMLR, eq. 3)
/// with the median-heuristic Gaussian kernel, written independently.
const NUMPY_MMD: &str = r#"
import sys, numpy as np
v = sys.stdin.read().split()
m, n, k = int(v[0]), int(v[1]), int(v[2])
a = np.array([float(t) for t in v[3:]])
x = a[:m*k].reshape(m, k); y = a[m*k:].reshape(n, k)
z = np.vstack([x, y])
d = np.sqrt(((z[:, None, :] - z[None, :, :])**2).sum(-1))
iu = np.triu_indices(m + n, 1)
sigma = np.sort(d[iu])[(len(iu[0]) - 1) // 2]
kern = lambda p, q: np.exp(-((p[:, None, :] - q[None, :, :])**2).sum(-1) / (2*sigma**2))
kxx, kyy, kxy = kern(x, x), kern(y, y), kern(x, y)
mmd = (kxx.sum() - np.trace(kxx)) / (m*(m-1)) + (kyy.sum() - np.trace(kyy)) / (n*(n-1)) - 2*kxy.mean()
print(repr(float(mmd)), repr(float(sigma)))
"#;

#[test]
fn unbiased_mmd2_matches_numpy_and_vanishes_for_one_distribution() {
    let (m, n, k) = (7, 9, 3);
    let mut rng = Rng::new(21);
    let xs: Vec<f64> = (0..m * k).map(|_| rng.normal()).collect();
    let ys: Vec<f64> = (0..n * k).map(|_| 0.8 + 1.5 * rng.normal()).collect();
    let (x, y) = (t64(&xs, &[m, k]), t64(&ys, &[n, k]));
    let (mmd, sigma) = mmd2_unbiased(&x, &y, Bandwidth::Median).unwrap();
    let mmd = scalar(&mmd);
    let input = format!(
        "{m} {n} {k} {}",
        xs.iter()
            .chain(&ys)
            .map(|v| v.to_string())
            .collect::<Vec<_>>()
            .join(" ")
    );
    if let Some(out) = python(NUMPY_MMD, &input) {
        let r = floats(&out);
        assert!((mmd - r[0]).abs() < 1e-12, "ours {mmd}, numpy {}", r[0]);
        assert!((sigma - r[1]).abs() < 1e-12, "ours {sigma}, numpy {}", r[1]);
    }
    assert!((median_bandwidth(&x, &y).unwrap() - sigma).abs() < 1e-15);

    // Zero in expectation for two samples of one distribution (the estimator
    // is unbiased, Gretton et al. 2012, lemma 6): the mean over repeats is
    // within 4 standard errors of 0, and clearly positive for shifted samples.
    let reps = 200;
    let (mut same, mut shifted) = (Vec::new(), Vec::new());
    for _ in 0..reps {
        let mut draw = |shift: f64, rows: usize| {
            let v: Vec<f64> = (0..rows * 2).map(|_| shift + rng.normal()).collect();
            t64(&v, &[rows, 2])
        };
        let (a, b, c) = (draw(0.0, 20), draw(0.0, 20), draw(1.0, 20));
        same.push(scalar(
            &mmd2_unbiased(&a, &b, Bandwidth::Fixed(1.0)).unwrap().0,
        ));
        shifted.push(scalar(
            &mmd2_unbiased(&a, &c, Bandwidth::Fixed(1.0)).unwrap().0,
        ));
    }
    let stats = |v: &[f64]| {
        let mean = v.iter().sum::<f64>() / v.len() as f64;
        let var = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (v.len() - 1) as f64;
        (mean, (var / v.len() as f64).sqrt())
    };
    let (ms, ses) = stats(&same);
    assert!(
        ms.abs() < 4.0 * ses,
        "same-distribution MMD^2 mean {ms} +- {ses}"
    );
    let (mx, sex) = stats(&shifted);
    assert!(mx > 10.0 * sex, "shifted MMD^2 mean {mx} +- {sex}");
}

#[test]
fn loss_gradient_matches_finite_differences() {
    // Central differences in f64 against candle's backward pass, on a tiny
    // network with every loss term active (fixed MMD bandwidth, fixed noise).
    let cfg = tiny_config(SharedVariance::Learned);
    let map = VarMap::new();
    let vb = SeededInit::var_builder(&map, 9, DType::F64, &Device::Cpu);
    let net = Net::new(&cfg, vb).unwrap();
    // The zero-initialised output layer would hide the decoder's other
    // gradients; give every parameter a random nonzero value.
    let mut rng = Rng::new(4);
    let mut vars: Vec<(String, Var)> = map
        .data()
        .lock()
        .unwrap()
        .iter()
        .map(|(k, v)| (k.clone(), v.clone()))
        .collect();
    vars.sort_by(|a, b| a.0.cmp(&b.0));
    for (_, v) in &vars {
        let vals: Vec<f64> = (0..v.elem_count()).map(|_| 0.4 * rng.normal()).collect();
        v.set(&Tensor::from_vec(vals, v.shape(), &Device::Cpu).unwrap())
            .unwrap();
    }
    let batch = tiny_batch(&cfg, 6, 3, DType::F64, 8);
    let opts = LossOptions {
        action_weight: 2.0,
        align_weight: 3.0,
        bandwidth: Bandwidth::Fixed(0.7),
        // The faithful head loss detaches parts of its graph on purpose, so
        // its backward pass is not the derivative of its value.
        head_loss: HeadLoss::Nll,
    };
    let loss = |net: &Net| scalar(&net.loss(&batch, &opts).unwrap().total);
    let grads = net.loss(&batch, &opts).unwrap().total.backward().unwrap();
    let h = 1e-6;
    let mut checked = 0;
    for (name, var) in &vars {
        let g: Vec<f64> = grads
            .get(var.as_tensor())
            .unwrap_or_else(|| panic!("no gradient for {name}"))
            .flatten_all()
            .unwrap()
            .to_vec1()
            .unwrap();
        let base: Vec<f64> = var.as_tensor().flatten_all().unwrap().to_vec1().unwrap();
        // A few elements per tensor, spread over it.
        for idx in [0, base.len() / 2, base.len() - 1] {
            let set = |delta: f64| {
                let mut v = base.clone();
                v[idx] += delta;
                var.set(&Tensor::from_vec(v, var.shape(), &Device::Cpu).unwrap())
                    .unwrap();
            };
            set(h);
            let up = loss(&net);
            set(-h);
            let down = loss(&net);
            set(0.0);
            let fd = (up - down) / (2.0 * h);
            let tol = 1e-5 * fd.abs().max(g[idx].abs()).max(1.0);
            assert!(
                (fd - g[idx]).abs() < tol,
                "{name}[{idx}]: backward {} vs fd {fd}",
                g[idx]
            );
            checked += 1;
        }
    }
    assert!(checked > 30, "{checked}");
}

#[test]
fn network_shapes_and_parameter_names() {
    let cfg = Config::default();
    let map = VarMap::new();
    let vb = SeededInit::var_builder(&map, 1, DType::F32, &Device::Cpu);
    let net = Net::new(&cfg, vb).unwrap();
    let names: Vec<String> = map.data().lock().unwrap().keys().cloned().collect();
    for prefix in ["encoder.", "posterior.", "decoder.", "heads.0.", "heads.4."] {
        assert!(
            names.iter().any(|n| n.starts_with(prefix)),
            "{prefix} in {names:?}"
        );
    }
    let batch = tiny_batch(&cfg, 4, 2, DType::F32, 2);
    let parts = net.loss(&batch, &LossOptions::default()).unwrap();
    assert!(scalar(&parts.total).is_finite());
    let inf = net.infer(&batch.x_t, &batch.x_t1).unwrap();
    assert_eq!(inf.mu.dims(), &[4, cfg.latent]);
    assert_eq!(inf.heads.len(), cfg.heads);
    assert_eq!(inf.heads[0].0.dims(), &[4, cfg.action_dims]);
    // The zero-initialised residual predicts the pooled current frame.
    let pred = net.decode(&batch.x_t, &inf.mu).unwrap();
    assert_eq!(pred.dims(), &[4, 32, 32, 3]);
    // Same seed, same initial parameters; other seed, others.
    let again = VarMap::new();
    let _ = Net::new(
        &cfg,
        SeededInit::var_builder(&again, 1, DType::F32, &Device::Cpu),
    )
    .unwrap();
    let other = VarMap::new();
    let _ = Net::new(
        &cfg,
        SeededInit::var_builder(&other, 2, DType::F32, &Device::Cpu),
    )
    .unwrap();
    let get = |m: &VarMap| -> Vec<f32> {
        m.data().lock().unwrap()["posterior.mu.weight"]
            .as_tensor()
            .flatten_all()
            .unwrap()
            .to_vec1()
            .unwrap()
    };
    assert_eq!(get(&map), get(&again));
    assert_ne!(get(&map), get(&other));
    // A frame size the pyramid cannot halve is refused.
    let bad = Config {
        width: 60,
        ..Config::default()
    };
    let err = Net::new(
        &bad,
        SeededInit::var_builder(&VarMap::new(), 1, DType::F32, &Device::Cpu),
    )
    .err()
    .unwrap()
    .to_string();
    assert!(err.contains("not divisible by 16"), "{err}");
}
