//! Clock-offset estimation between a clip and its action log.
//!
//! For each candidate offset `o` on a grid of a quarter frame interval over `±window`, the
//! sidecar is mapped onto the clip's transitions with [`crate::actions::map_to_frames`]
//! (video time = log time + `o`), turned into an *action magnitude* per transition and
//! correlated (Pearson) with the clip's frame-difference motion energy. The offset with the
//! highest correlation wins (refined by a parabola through its neighbours). Magnitude: per
//! dimension, `|value|` for `sum` and `mean` dimensions (deltas and rates: motion itself) and
//! `|value_k − value_{k−1}|` for `hold` dimensions (a change of command moves something); each
//! dimension is scaled by its standard deviation and the dimensions are added. A best
//! correlation below the spec's minimum is not trusted: the clip keeps offset 0 and is flagged.

use serde::{Deserialize, Serialize};

use crate::actions::{ActionsError, MapRule, Sidecar, map_to_frames};

/// One clip's offset estimate.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct OffsetEstimate {
    /// The offset applied (seconds added to log times): the estimate, or 0 when untrusted.
    pub offset_s: f64,
    /// The lag with the highest correlation.
    pub estimated_s: f64,
    /// Its Pearson correlation.
    pub correlation: f64,
    /// Whether the correlation reached the spec's minimum.
    pub trusted: bool,
}

/// Action magnitude per transition (see the module docs).
pub fn action_magnitude(actions: &[Vec<f32>], rules: &[MapRule]) -> Vec<f64> {
    let n = actions.len();
    let mut total = vec![0.0; n];
    for (d, rule) in rules.iter().enumerate() {
        let col: Vec<f64> = (0..n)
            .map(|k| {
                let v = f64::from(actions[k][d]);
                match rule {
                    MapRule::Hold => {
                        if k == 0 {
                            0.0
                        } else {
                            (v - f64::from(actions[k - 1][d])).abs()
                        }
                    }
                    MapRule::Mean | MapRule::Sum => v.abs(),
                }
            })
            .collect();
        let mean = col.iter().sum::<f64>() / n.max(1) as f64;
        let sd =
            (col.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / n.max(1) as f64).sqrt();
        if sd > 1e-12 {
            for (t, x) in total.iter_mut().zip(&col) {
                *t += x / sd;
            }
        }
    }
    total
}

/// Pearson correlation; 0 when either series is constant.
pub fn pearson(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len().min(b.len());
    if n < 2 {
        return 0.0;
    }
    let ma = a[..n].iter().sum::<f64>() / n as f64;
    let mb = b[..n].iter().sum::<f64>() / n as f64;
    let (mut sab, mut saa, mut sbb) = (0.0, 0.0, 0.0);
    for i in 0..n {
        let (x, y) = (a[i] - ma, b[i] - mb);
        sab += x * y;
        saa += x * x;
        sbb += y * y;
    }
    if saa <= 1e-18 || sbb <= 1e-18 {
        0.0
    } else {
        sab / (saa * sbb).sqrt()
    }
}

/// Estimates the offset of `sidecar` against a clip of `frames` frames at `fps` whose
/// frame-difference energy per transition is `energy` (`frames - 1` values).
pub fn estimate_offset(
    energy: &[f64],
    sidecar: &Sidecar,
    rules: &[MapRule],
    fps: f64,
    frames: u32,
    window_s: f64,
    min_correlation: f64,
) -> Result<OffsetEstimate, ActionsError> {
    let step = 0.25 / fps;
    let k = (window_s / step).floor().max(0.0) as i64;
    let mut scores = Vec::with_capacity((2 * k + 1) as usize);
    for j in -k..=k {
        let o = j as f64 * step;
        let acts = map_to_frames(sidecar, rules, fps, frames, o)?;
        scores.push((o, pearson(energy, &action_magnitude(&acts, rules))));
    }
    let (bi, &(bo, br)) = scores
        .iter()
        .enumerate()
        .max_by(|a, b| {
            a.1.1
                .total_cmp(&b.1.1)
                .then(b.1.0.abs().total_cmp(&a.1.0.abs()))
        })
        .expect("at least one candidate");
    let mut estimated = bo;
    if bi > 0 && bi + 1 < scores.len() {
        let (m, c, p) = (scores[bi - 1].1, br, scores[bi + 1].1);
        let den = m - 2.0 * c + p;
        if den < -1e-12 {
            estimated += (0.5 * (m - p) / den).clamp(-0.5, 0.5) * step;
        }
    }
    let trusted = br >= min_correlation;
    Ok(OffsetEstimate {
        offset_s: if trusted { estimated } else { 0.0 },
        estimated_s: estimated,
        correlation: br,
        trusted,
    })
}
