//! Normal-distribution helpers: the error function and the standard normal
//! quantile, in plain `f64` so calibration needs no statistics crate.
//!
//! - `erf(x)` by the all-positive Maclaurin series
//!   `erf(x) = 2/sqrt(pi) * exp(-x^2) * sum_n 2^n x^(2n+1) / (1*3*...*(2n+1))`
//!   (Abramowitz & Stegun 7.1.6), which has no cancellation; for `|x| > 6`
//!   `erf` is 1 to double precision.
//! - `normal_quantile(p)` by Acklam's rational approximation (relative error
//!   about 1e-9) refined with one Halley step on `Phi(x) - p`.

use std::f64::consts::{PI, SQRT_2};

/// The error function.
pub fn erf(x: f64) -> f64 {
    if x.is_nan() {
        return f64::NAN;
    }
    let ax = x.abs();
    if ax > 6.0 {
        return x.signum();
    }
    let x2 = ax * ax;
    let mut term = ax;
    let mut sum = ax;
    let mut n = 0.0;
    while term > sum * 1e-17 {
        n += 1.0;
        term *= 2.0 * x2 / (2.0 * n + 1.0);
        sum += term;
    }
    let v = 2.0 / PI.sqrt() * (-x2).exp() * sum;
    v.min(1.0).copysign(x)
}

/// The complementary error function `1 - erf(x)`, accurate in relative
/// terms in the upper tail (continued fraction of Abramowitz & Stegun 7.1.14
/// for `x >= 3`, evaluated backwards).
pub fn erfc(x: f64) -> f64 {
    if x < 3.0 {
        return 1.0 - erf(x);
    }
    let mut t = x;
    for n in (1..=60).rev() {
        t = x + (n as f64 / 2.0) / t;
    }
    (-x * x).exp() / (PI.sqrt() * t)
}

/// The standard normal cumulative distribution function.
pub fn normal_cdf(x: f64) -> f64 {
    if x < 0.0 {
        0.5 * erfc(-x / SQRT_2)
    } else {
        0.5 * (1.0 + erf(x / SQRT_2))
    }
}

/// `P(|e| <= tol)` for `e ~ N(0, sd^2)`; 1 when `sd` is 0 and `tol >= 0`.
pub fn prob_within(tol: f64, sd: f64) -> f64 {
    if sd <= 0.0 {
        return if tol >= 0.0 { 1.0 } else { 0.0 };
    }
    erf(tol / (SQRT_2 * sd))
}

/// The standard normal quantile `Phi^-1(p)` for `p` in (0, 1).
pub fn normal_quantile(p: f64) -> f64 {
    if p <= 0.0 {
        return f64::NEG_INFINITY;
    }
    if p >= 1.0 {
        return f64::INFINITY;
    }
    const A: [f64; 6] = [
        -3.969683028665376e1,
        2.209460984245205e2,
        -2.759285104469687e2,
        1.383577518672690e2,
        -3.066479806614716e1,
        2.506628277459239,
    ];
    const B: [f64; 5] = [
        -5.447609879822406e1,
        1.615858368580409e2,
        -1.556989798598866e2,
        6.680131188771972e1,
        -1.328068155288572e1,
    ];
    const C: [f64; 6] = [
        -7.784894002430293e-3,
        -3.223964580411365e-1,
        -2.400758277161838,
        -2.549732539343734,
        4.374664141464968,
        2.938163982698783,
    ];
    const D: [f64; 4] = [
        7.784695709041462e-3,
        3.224671290700398e-1,
        2.445134137142996,
        3.754408661907416,
    ];
    const P_LOW: f64 = 0.02425;
    let tail = |q: f64| {
        (((((C[0] * q + C[1]) * q + C[2]) * q + C[3]) * q + C[4]) * q + C[5])
            / ((((D[0] * q + D[1]) * q + D[2]) * q + D[3]) * q + 1.0)
    };
    let mut x = if p < P_LOW {
        tail((-2.0 * p.ln()).sqrt())
    } else if p <= 1.0 - P_LOW {
        let q = p - 0.5;
        let r = q * q;
        (((((A[0] * r + A[1]) * r + A[2]) * r + A[3]) * r + A[4]) * r + A[5]) * q
            / (((((B[0] * r + B[1]) * r + B[2]) * r + B[3]) * r + B[4]) * r + 1.0)
    } else {
        -tail((-2.0 * (1.0 - p).ln()).sqrt())
    };
    // One Halley step (Acklam's refinement); only where Phi is resolvable.
    if (1e-300..=1.0 - 1e-16).contains(&p) {
        let e = normal_cdf(x) - p;
        let u = e * (2.0 * PI).sqrt() * (x * x / 2.0).exp();
        x -= u / (1.0 + x * u / 2.0);
    }
    x
}

#[cfg(test)]
mod tests {
    use super::*;

    // Reference values: Python's standard library, `math.erf` and
    // `statistics.NormalDist().inv_cdf` (Wichura's AS241), printed with repr().
    #[test]
    fn erf_matches_python_math() {
        for (x, want) in [
            (0.5, 0.5204998778130465),
            (2.5, 0.999593047982555),
            (4.0, 0.9999999845827421),
        ] {
            assert!((erf(x) - want).abs() < 1e-14, "erf({x}) = {}", erf(x));
            assert!((erf(-x) + want).abs() < 1e-14);
        }
        assert_eq!(erf(0.0), 0.0);
        // math.erfc(5.0) = 1.5374597944280351e-12 (Python standard library)
        assert!((erfc(5.0) / 1.5374597944280351e-12 - 1.0).abs() < 1e-12);
    }

    #[test]
    fn quantile_matches_python_statistics() {
        for (p, want) in [
            (0.95, 1.6448536269514715),
            (0.975, 1.9599639845400536),
            (0.9, 1.2815515655446008),
            (0.5, 0.0),
            (0.01, -2.3263478740408408),
            (1e-10, -6.361340902404056),
            (0.999999, 4.753424308817089),
        ] {
            let got = normal_quantile(p);
            assert!(
                (got - want).abs() < 1e-9 * want.abs().max(1.0),
                "p {p}: {got} vs {want}"
            );
        }
    }
}
