//! Motion measures on frame pairs.
//!
//! - [`pair_motion`]: how far the moving parts of the picture travel between two frames, in
//!   pixels, by block matching. The frame is cut into square blocks; a block is *moving* when
//!   it changed between the frames (mean absolute luma difference above [`MIN_CHANGE`]) and is
//!   textured (luma standard deviation above [`MIN_TEXTURE`]); its displacement is the integer
//!   offset within `±search` pixels minimising the sum of squared differences, refined to
//!   sub-pixel precision by Lucas-Kanade steps (bilinear sampling). A block whose refined
//!   match is not clearly better than no motion (below half the zero-offset sum) is left
//!   out, so compression noise on still parts does not count. The pair's motion is the median displacement length of the kept blocks.
//!   This scales linearly with speed (a clip played twice as fast moves twice as far per
//!   frame), unlike frame-difference energy, which saturates.
//! - [`clip_motion`]: a clip's motion rate, the median pair motion over frame pairs that move.
//! - [`difference_energy`]: the mean absolute luma difference of two frames (used for clock
//!   offsets, where only the timing of motion matters).
//!
//! Luma uses the BT.601 weights (0.299, 0.587, 0.114) on the stored RGB values.

use serde::{Deserialize, Serialize};

/// Mean absolute luma change (0..255) above which a block counts as changed.
pub const MIN_CHANGE: f32 = 2.0;
/// Luma standard deviation (0..255) below which a block is too flat to match.
pub const MIN_TEXTURE: f32 = 3.0;

/// Luma (BT.601 weights) of an RGB8 frame.
pub fn luma(rgb: &[u8]) -> Vec<f32> {
    rgb.chunks_exact(3)
        .map(|p| 0.299 * f32::from(p[0]) + 0.587 * f32::from(p[1]) + 0.114 * f32::from(p[2]))
        .collect()
}

/// Mean absolute difference of two luma frames.
pub fn difference_energy(a: &[f32], b: &[f32]) -> f64 {
    if a.is_empty() {
        return 0.0;
    }
    a.iter()
        .zip(b)
        .map(|(x, y)| f64::from((x - y).abs()))
        .sum::<f64>()
        / a.len() as f64
}

/// Block size and search range for frames of `width x height`.
pub fn block_params(width: usize, height: usize) -> (usize, usize) {
    let side = width.min(height);
    ((side / 8).max(4), (side / 6).max(2))
}

#[expect(clippy::too_many_arguments, reason = "two block origins in two frames")]
fn ssd(
    a: &[f32],
    b: &[f32],
    w: usize,
    ax: usize,
    ay: usize,
    bx: usize,
    by: usize,
    size: usize,
) -> f32 {
    let mut s = 0.0;
    for r in 0..size {
        let ra = &a[(ay + r) * w + ax..(ay + r) * w + ax + size];
        let rb = &b[(by + r) * w + bx..(by + r) * w + bx + size];
        for (x, y) in ra.iter().zip(rb) {
            let d = x - y;
            s += d * d;
        }
    }
    s
}

/// The median displacement (pixels) of the moving blocks between luma frames `a` and `b`;
/// `None` when no block moves.
pub fn pair_motion(a: &[f32], b: &[f32], width: usize, height: usize) -> Option<f64> {
    let (size, search) = block_params(width, height);
    let (w, h) = (width, height);
    let area = (size * size) as f32;
    let mut lengths = Vec::new();
    let mut by0 = 0;
    while by0 + size <= h {
        let mut bx0 = 0;
        while bx0 + size <= w {
            if let Some(d) = block_displacement(a, b, w, h, bx0, by0, size, search, area) {
                lengths.push(d);
            }
            bx0 += size;
        }
        by0 += size;
    }
    median(&mut lengths)
}

#[expect(
    clippy::too_many_arguments,
    reason = "a block and its search, kept flat for speed"
)]
fn block_displacement(
    a: &[f32],
    b: &[f32],
    w: usize,
    h: usize,
    x0: usize,
    y0: usize,
    size: usize,
    search: usize,
    area: f32,
) -> Option<f64> {
    let mut sum = 0.0;
    let mut sum_sq = 0.0;
    let mut change = 0.0;
    for r in 0..size {
        for c in 0..size {
            let i = (y0 + r) * w + x0 + c;
            sum += a[i];
            sum_sq += a[i] * a[i];
            change += (a[i] - b[i]).abs();
        }
    }
    let mean = sum / area;
    let std = (sum_sq / area - mean * mean).max(0.0).sqrt();
    if change / area < MIN_CHANGE || std < MIN_TEXTURE {
        return None;
    }
    let s = search as isize;
    let span = 2 * search + 1;
    let mut table = vec![f32::INFINITY; span * span];
    let mut best = (f32::INFINITY, 0isize, 0isize);
    for dy in -s..=s {
        for dx in -s..=s {
            let (bx, by) = (x0 as isize + dx, y0 as isize + dy);
            if bx < 0 || by < 0 || bx as usize + size > w || by as usize + size > h {
                continue;
            }
            let v = ssd(a, b, w, x0, y0, bx as usize, by as usize, size);
            table[(dy + s) as usize * span + (dx + s) as usize] = v;
            if v < best.0 {
                best = (v, dx, dy);
            }
        }
    }
    let zero = table[search * span + search];
    let (_, dx, dy) = best;
    // Sub-pixel refinement: Lucas-Kanade steps on the residual b(x + d) - a(x), with the
    // gradient of `a`, sampling `b` bilinearly.
    let (mut ux, mut uy) = (dx as f32, dy as f32);
    let mut grads = Vec::with_capacity(size * size);
    let (mut gxx, mut gxy, mut gyy) = (0.0f32, 0.0f32, 0.0f32);
    for r in 0..size {
        for c in 0..size {
            let (x, y) = (x0 + c, y0 + r);
            let gx = 0.5 * (a[y * w + (x + 1).min(w - 1)] - a[y * w + x.saturating_sub(1)]);
            let gy = 0.5 * (a[(y + 1).min(h - 1) * w + x] - a[y.saturating_sub(1) * w + x]);
            grads.push((gx, gy));
            gxx += gx * gx;
            gxy += gx * gy;
            gyy += gy * gy;
        }
    }
    let det = gxx * gyy - gxy * gxy;
    if det > 1e-3 * (gxx + gyy).powi(2).max(1e-6) {
        for _ in 0..4 {
            let (mut bx, mut by) = (0.0f32, 0.0f32);
            for r in 0..size {
                for c in 0..size {
                    let (x, y) = (x0 + c, y0 + r);
                    let res = bilinear(b, w, h, x as f32 + ux, y as f32 + uy) - a[y * w + x];
                    let (gx, gy) = grads[r * size + c];
                    bx += gx * res;
                    by += gy * res;
                }
            }
            let sx = -(gyy * bx - gxy * by) / det;
            let sy = -(-gxy * bx + gxx * by) / det;
            ux += sx.clamp(-1.0, 1.0);
            uy += sy.clamp(-1.0, 1.0);
            if sx.abs() < 0.01 && sy.abs() < 0.01 {
                break;
            }
        }
        if (ux - dx as f32).abs() > 1.5 || (uy - dy as f32).abs() > 1.5 {
            (ux, uy) = (dx as f32, dy as f32);
        }
    }
    let mut fin = 0.0f32;
    for r in 0..size {
        for c in 0..size {
            let (x, y) = (x0 + c, y0 + r);
            let d = bilinear(b, w, h, x as f32 + ux, y as f32 + uy) - a[y * w + x];
            fin += d * d;
        }
    }
    let fin = fin.min(best.0);
    if fin.is_nan() || fin >= 0.5 * zero {
        return None;
    }
    let (x, y) = (f64::from(ux), f64::from(uy));
    Some((x * x + y * y).sqrt())
}

/// `img` sampled bilinearly at `(x, y)`, coordinates clamped to the image.
fn bilinear(img: &[f32], w: usize, h: usize, x: f32, y: f32) -> f32 {
    let x = x.clamp(0.0, (w - 1) as f32);
    let y = y.clamp(0.0, (h - 1) as f32);
    let (x0, y0) = (x.floor() as usize, y.floor() as usize);
    let (x1, y1) = ((x0 + 1).min(w - 1), (y0 + 1).min(h - 1));
    let (fx, fy) = (x - x0 as f32, y - y0 as f32);
    let top = img[y0 * w + x0] * (1.0 - fx) + img[y0 * w + x1] * fx;
    let bot = img[y1 * w + x0] * (1.0 - fx) + img[y1 * w + x1] * fx;
    top * (1.0 - fy) + bot * fy
}

/// The median of `v` (mean of the two middle values for an even count); `None` when empty.
pub fn median(v: &mut [f64]) -> Option<f64> {
    if v.is_empty() {
        return None;
    }
    v.sort_by(f64::total_cmp);
    let n = v.len();
    Some(if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    })
}

/// Motion of one clip.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ClipMotion {
    /// Median pair motion over moving pairs, pixels per frame; `None` when nothing moved.
    pub rate: Option<f64>,
    /// Frame pairs measured.
    pub pairs: u32,
    /// Pairs in which some block moved.
    pub moving_pairs: u32,
    /// Pair motions of the moving pairs (for pooling into a set's rate).
    #[serde(skip)]
    pub samples: Vec<f64>,
}

/// Measures a clip's motion over up to `max_pairs` evenly spread pairs of consecutive frames
/// (`frame(i)` gives frame `i` of `n` as RGB8).
pub fn clip_motion(
    n: usize,
    width: usize,
    height: usize,
    max_pairs: usize,
    mut frame: impl FnMut(usize) -> Vec<u8>,
) -> ClipMotion {
    let total = n.saturating_sub(1);
    let take = total.min(max_pairs.max(1));
    let mut samples = Vec::new();
    for j in 0..take {
        let i = if take == total { j } else { j * total / take };
        let a = luma(&frame(i));
        let b = luma(&frame(i + 1));
        if let Some(m) = pair_motion(&a, &b, width, height) {
            samples.push(m);
        }
    }
    let mut sorted = samples.clone();
    ClipMotion {
        rate: median(&mut sorted),
        pairs: take as u32,
        moving_pairs: samples.len() as u32,
        samples,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn texture(x: f64, y: f64) -> f32 {
        (128.0 + 50.0 * (0.37 * x).sin() * (0.29 * y).cos() + 30.0 * (0.61 * x + 0.23 * y).sin())
            as f32
    }

    fn shifted(w: usize, h: usize, dx: f64) -> Vec<f32> {
        let mut f = vec![0.0; w * h];
        for y in 0..h {
            for x in 0..w {
                f[y * w + x] = texture(x as f64 - dx, y as f64);
            }
        }
        f
    }

    #[test]
    fn global_translation_is_measured_sub_pixel() {
        // Ground truth: the known synthetic shift.
        for &d in &[0.4, 0.7, 1.3, 2.6, 4.4] {
            let m = pair_motion(&shifted(64, 64, 0.0), &shifted(64, 64, d), 64, 64).unwrap();
            assert!((m - d).abs() < 0.05 + 0.03 * d, "shift {d}: measured {m}");
        }
    }
}
