//! sRGB <-> CIELAB (D65) and per-channel mean / standard-deviation matching in CIELAB.
//!
//! Formulas: the sRGB transfer function and primaries of IEC 61966-2-1 (linear RGB to XYZ
//! with the D65 white point), and CIE 15:2004 for XYZ to L*a*b* (`f(t) = t^(1/3)` above
//! `(6/29)^3`, else `t / (3 (6/29)^2) + 4/29`). The white point is D65, `(0.95047, 1, 1.08883)`.

use std::sync::OnceLock;

use serde::{Deserialize, Serialize};

/// D65 reference white, XYZ with `Y = 1`.
pub const D65: [f64; 3] = [0.95047, 1.0, 1.08883];

/// Linear sRGB to XYZ (IEC 61966-2-1, D65).
const RGB_TO_XYZ: [[f64; 3]; 3] = [
    [0.412_456_4, 0.357_576_1, 0.180_437_5],
    [0.212_672_9, 0.715_152_2, 0.072_175_0],
    [0.019_333_9, 0.119_192_0, 0.950_304_1],
];

/// XYZ to linear sRGB (the inverse of [`RGB_TO_XYZ`]).
const XYZ_TO_RGB: [[f64; 3]; 3] = [
    [3.240_454_2, -1.537_138_5, -0.498_531_4],
    [-0.969_266_0, 1.876_010_8, 0.041_556_0],
    [0.055_643_4, -0.204_025_9, 1.057_225_2],
];

const DELTA: f64 = 6.0 / 29.0;

/// sRGB decoding (8-bit code to linear light), as a table.
fn decode_lut() -> &'static [f64; 256] {
    static LUT: OnceLock<[f64; 256]> = OnceLock::new();
    LUT.get_or_init(|| {
        let mut t = [0.0; 256];
        for (i, v) in t.iter_mut().enumerate() {
            *v = srgb_to_linear(i as f64 / 255.0);
        }
        t
    })
}

/// Linear light in [0, 1] to 8-bit sRGB, via a 65 536-entry table.
fn encode_lut() -> &'static [u8] {
    static LUT: OnceLock<Vec<u8>> = OnceLock::new();
    LUT.get_or_init(|| {
        (0..=u16::MAX)
            .map(|i| {
                (linear_to_srgb(f64::from(i) / 65535.0) * 255.0)
                    .round()
                    .clamp(0.0, 255.0) as u8
            })
            .collect()
    })
}

/// The sRGB decoding function (IEC 61966-2-1): non-linear `c` in [0, 1] to linear light.
pub fn srgb_to_linear(c: f64) -> f64 {
    if c <= 0.04045 {
        c / 12.92
    } else {
        ((c + 0.055) / 1.055).powf(2.4)
    }
}

/// The sRGB encoding function (IEC 61966-2-1): linear light to non-linear.
pub fn linear_to_srgb(c: f64) -> f64 {
    if c <= 0.003_130_8 {
        12.92 * c
    } else {
        1.055 * c.powf(1.0 / 2.4) - 0.055
    }
}

fn lab_f(t: f64) -> f64 {
    if t > DELTA * DELTA * DELTA {
        t.cbrt()
    } else {
        t / (3.0 * DELTA * DELTA) + 4.0 / 29.0
    }
}

fn lab_f_inv(t: f64) -> f64 {
    if t > DELTA {
        t * t * t
    } else {
        3.0 * DELTA * DELTA * (t - 4.0 / 29.0)
    }
}

/// 8-bit sRGB to CIELAB (D65).
pub fn rgb_to_lab(rgb: [u8; 3]) -> [f64; 3] {
    let lut = decode_lut();
    let lin = [
        lut[rgb[0] as usize],
        lut[rgb[1] as usize],
        lut[rgb[2] as usize],
    ];
    linear_to_lab(lin)
}

/// Linear sRGB to CIELAB (D65).
pub fn linear_to_lab(lin: [f64; 3]) -> [f64; 3] {
    let xyz = mat(&RGB_TO_XYZ, lin);
    let fx = lab_f(xyz[0] / D65[0]);
    let fy = lab_f(xyz[1] / D65[1]);
    let fz = lab_f(xyz[2] / D65[2]);
    [116.0 * fy - 16.0, 500.0 * (fx - fy), 200.0 * (fy - fz)]
}

/// CIELAB (D65) to linear sRGB (unclamped).
pub fn lab_to_linear(lab: [f64; 3]) -> [f64; 3] {
    let fy = (lab[0] + 16.0) / 116.0;
    let fx = fy + lab[1] / 500.0;
    let fz = fy - lab[2] / 200.0;
    let xyz = [
        D65[0] * lab_f_inv(fx),
        D65[1] * lab_f_inv(fy),
        D65[2] * lab_f_inv(fz),
    ];
    mat(&XYZ_TO_RGB, xyz)
}

/// CIELAB (D65) to 8-bit sRGB, clamped to the gamut.
pub fn lab_to_rgb(lab: [f64; 3]) -> [u8; 3] {
    let lin = lab_to_linear(lab);
    let lut = encode_lut();
    let code = |c: f64| lut[(c.clamp(0.0, 1.0) * 65535.0).round() as usize];
    [code(lin[0]), code(lin[1]), code(lin[2])]
}

fn mat(m: &[[f64; 3]; 3], v: [f64; 3]) -> [f64; 3] {
    [
        m[0][0] * v[0] + m[0][1] * v[1] + m[0][2] * v[2],
        m[1][0] * v[0] + m[1][1] * v[1] + m[1][2] * v[2],
        m[2][0] * v[0] + m[2][1] * v[1] + m[2][2] * v[2],
    ]
}

/// Running per-channel CIELAB statistics.
#[derive(Debug, Clone, Default)]
pub struct LabAccumulator {
    n: u64,
    sum: [f64; 3],
    sum_sq: [f64; 3],
}

impl LabAccumulator {
    /// Adds every pixel of an RGB8 frame.
    pub fn add_frame(&mut self, rgb: &[u8]) {
        for px in rgb.chunks_exact(3) {
            let lab = rgb_to_lab([px[0], px[1], px[2]]);
            for (c, v) in lab.iter().enumerate() {
                self.sum[c] += v;
                self.sum_sq[c] += v * v;
            }
            self.n += 1;
        }
    }

    /// Merges another accumulator.
    pub fn merge(&mut self, other: &LabAccumulator) {
        self.n += other.n;
        for c in 0..3 {
            self.sum[c] += other.sum[c];
            self.sum_sq[c] += other.sum_sq[c];
        }
    }

    /// Mean and (population) standard deviation per channel; `None` without pixels.
    pub fn stats(&self) -> Option<LabStats> {
        if self.n == 0 {
            return None;
        }
        let n = self.n as f64;
        let mut mean = [0.0; 3];
        let mut std = [0.0; 3];
        for c in 0..3 {
            mean[c] = self.sum[c] / n;
            std[c] = (self.sum_sq[c] / n - mean[c] * mean[c]).max(0.0).sqrt();
        }
        Some(LabStats { mean, std })
    }
}

/// Per-channel CIELAB mean and standard deviation (L*, a*, b*).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct LabStats {
    /// Mean per channel.
    pub mean: [f64; 3],
    /// Standard deviation per channel.
    pub std: [f64; 3],
}

/// Smallest standard deviation used as a divisor (CIELAB units).
const MIN_STD: f64 = 0.5;
/// Largest gain applied to a channel's spread (either way).
const MAX_GAIN: f64 = 4.0;

/// A per-channel affine map in CIELAB: `lab' = (lab - src.mean) * gain + dst.mean`, with
/// `gain = dst.std / src.std` (limited to `[1/4, 4]`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct LabTransform {
    /// Statistics of the frames the map applies to.
    pub src: LabStats,
    /// Statistics to match (the labelled domain's).
    pub dst: LabStats,
}

impl LabTransform {
    /// Gain per channel.
    pub fn gain(&self) -> [f64; 3] {
        let mut g = [1.0; 3];
        for (c, g) in g.iter_mut().enumerate() {
            *g = (self.dst.std[c].max(MIN_STD) / self.src.std[c].max(MIN_STD))
                .clamp(1.0 / MAX_GAIN, MAX_GAIN);
        }
        g
    }

    /// Applies the map to an RGB8 frame in place.
    pub fn apply(&self, rgb: &mut [u8]) {
        let g = self.gain();
        for px in rgb.chunks_exact_mut(3) {
            let lab = rgb_to_lab([px[0], px[1], px[2]]);
            let mut out = [0.0; 3];
            for c in 0..3 {
                out[c] = (lab[c] - self.src.mean[c]) * g[c] + self.dst.mean[c];
            }
            out[0] = out[0].clamp(0.0, 100.0);
            px.copy_from_slice(&lab_to_rgb(out));
        }
    }
}

/// Bins per channel of the CIELAB histograms.
pub const HIST_BINS: usize = 16;
/// Histogram range of a* and b* (L* spans 0..100).
pub const HIST_AB_RANGE: f64 = 100.0;

/// Normalised CIELAB histograms: `HIST_BINS` bins of L* over [0, 100] and of a*, b* over
/// [-100, 100] (values outside go to the end bins).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LabHistogram {
    /// L*, a*, b* bin fractions.
    pub l: Vec<f64>,
    /// a* bin fractions.
    pub a: Vec<f64>,
    /// b* bin fractions.
    pub b: Vec<f64>,
}

/// Accumulates [`LabHistogram`] counts.
#[derive(Debug, Clone)]
pub struct HistogramAccumulator {
    counts: [[u64; HIST_BINS]; 3],
}

impl Default for HistogramAccumulator {
    fn default() -> Self {
        Self {
            counts: [[0; HIST_BINS]; 3],
        }
    }
}

impl HistogramAccumulator {
    /// Adds every pixel of an RGB8 frame.
    pub fn add_frame(&mut self, rgb: &[u8]) {
        let bin = |v: f64, lo: f64, hi: f64| {
            (((v - lo) / (hi - lo) * HIST_BINS as f64).floor().max(0.0) as usize).min(HIST_BINS - 1)
        };
        for px in rgb.chunks_exact(3) {
            let lab = rgb_to_lab([px[0], px[1], px[2]]);
            self.counts[0][bin(lab[0], 0.0, 100.0)] += 1;
            self.counts[1][bin(lab[1], -HIST_AB_RANGE, HIST_AB_RANGE)] += 1;
            self.counts[2][bin(lab[2], -HIST_AB_RANGE, HIST_AB_RANGE)] += 1;
        }
    }

    /// The normalised histogram.
    pub fn finish(&self) -> LabHistogram {
        let norm = |c: &[u64; HIST_BINS]| {
            let total: u64 = c.iter().sum();
            c.iter()
                .map(|&v| {
                    if total == 0 {
                        0.0
                    } else {
                        v as f64 / total as f64
                    }
                })
                .collect()
        };
        LabHistogram {
            l: norm(&self.counts[0]),
            a: norm(&self.counts[1]),
            b: norm(&self.counts[2]),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn white_is_l100_and_black_is_l0() {
        // CIE 15:2004: the reference white has L* = 100, a* = b* = 0.
        let w = rgb_to_lab([255, 255, 255]);
        assert!(
            (w[0] - 100.0).abs() < 0.01 && w[1].abs() < 0.01 && w[2].abs() < 0.01,
            "{w:?}"
        );
        let k = rgb_to_lab([0, 0, 0]);
        assert!(k[0].abs() < 1e-9, "{k:?}");
    }

    #[test]
    fn lab_round_trip_is_exact_on_codes() {
        for r in (0..=255).step_by(15) {
            for g in (0..=255).step_by(17) {
                for b in (0..=255).step_by(51) {
                    let c = [r as u8, g as u8, b as u8];
                    assert_eq!(lab_to_rgb(rgb_to_lab(c)), c);
                }
            }
        }
    }

    #[test]
    fn identity_transform_keeps_frames() {
        let s = LabStats {
            mean: [50.0, 1.0, -2.0],
            std: [10.0, 5.0, 5.0],
        };
        let t = LabTransform { src: s, dst: s };
        let mut f = vec![10u8, 200, 30, 128, 128, 128];
        let orig = f.clone();
        t.apply(&mut f);
        assert_eq!(f, orig);
    }
}
