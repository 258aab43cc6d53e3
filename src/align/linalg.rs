//! Small dense symmetric-matrix helpers for the gap figure: cyclic Jacobi eigen-decomposition
//! and the matrix square root of a symmetric positive semi-definite matrix.

/// A square matrix stored row-major.
#[derive(Debug, Clone, PartialEq)]
pub struct Mat {
    /// Rows (= columns).
    pub n: usize,
    /// Row-major entries.
    pub a: Vec<f64>,
}

impl Mat {
    /// The `n x n` zero matrix.
    pub fn zeros(n: usize) -> Self {
        Self {
            n,
            a: vec![0.0; n * n],
        }
    }

    /// Entry `(i, j)`.
    pub fn at(&self, i: usize, j: usize) -> f64 {
        self.a[i * self.n + j]
    }

    /// Mutable entry `(i, j)`.
    pub fn at_mut(&mut self, i: usize, j: usize) -> &mut f64 {
        &mut self.a[i * self.n + j]
    }

    /// Matrix product.
    pub fn mul(&self, o: &Mat) -> Mat {
        let n = self.n;
        let mut r = Mat::zeros(n);
        for i in 0..n {
            for k in 0..n {
                let v = self.at(i, k);
                if v == 0.0 {
                    continue;
                }
                for j in 0..n {
                    r.a[i * n + j] += v * o.a[k * n + j];
                }
            }
        }
        r
    }

    /// Trace.
    pub fn trace(&self) -> f64 {
        (0..self.n).map(|i| self.at(i, i)).sum()
    }

    /// `(self + selfᵀ) / 2`.
    pub fn symmetrised(&self) -> Mat {
        let n = self.n;
        let mut r = Mat::zeros(n);
        for i in 0..n {
            for j in 0..n {
                r.a[i * n + j] = 0.5 * (self.at(i, j) + self.at(j, i));
            }
        }
        r
    }
}

/// Eigenvalues and eigenvectors (columns of the returned matrix) of a symmetric matrix, by
/// cyclic Jacobi rotations (Golub & Van Loan, "Matrix Computations", sec. 8.5).
pub fn sym_eigen(m: &Mat) -> (Vec<f64>, Mat) {
    let n = m.n;
    let mut a = m.symmetrised();
    let mut v = Mat::zeros(n);
    for i in 0..n {
        *v.at_mut(i, i) = 1.0;
    }
    for _sweep in 0..100 {
        let off: f64 = (0..n)
            .flat_map(|i| (0..n).filter(move |&j| j != i).map(move |j| (i, j)))
            .map(|(i, j)| a.at(i, j) * a.at(i, j))
            .sum();
        let scale: f64 = a.a.iter().map(|x| x * x).sum::<f64>().max(1e-300);
        if off <= 1e-28 * scale {
            break;
        }
        for p in 0..n {
            for q in p + 1..n {
                let apq = a.at(p, q);
                if apq.abs() < 1e-300 {
                    continue;
                }
                let theta = (a.at(q, q) - a.at(p, p)) / (2.0 * apq);
                let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
                let t = if theta == 0.0 { 1.0 } else { t };
                let c = 1.0 / (t * t + 1.0).sqrt();
                let s = t * c;
                for k in 0..n {
                    let akp = a.at(k, p);
                    let akq = a.at(k, q);
                    *a.at_mut(k, p) = c * akp - s * akq;
                    *a.at_mut(k, q) = s * akp + c * akq;
                }
                for k in 0..n {
                    let apk = a.at(p, k);
                    let aqk = a.at(q, k);
                    *a.at_mut(p, k) = c * apk - s * aqk;
                    *a.at_mut(q, k) = s * apk + c * aqk;
                }
                for k in 0..n {
                    let vkp = v.at(k, p);
                    let vkq = v.at(k, q);
                    *v.at_mut(k, p) = c * vkp - s * vkq;
                    *v.at_mut(k, q) = s * vkp + c * vkq;
                }
            }
        }
    }
    ((0..n).map(|i| a.at(i, i)).collect(), v)
}

/// The symmetric square root of a symmetric positive semi-definite matrix (negative
/// eigenvalues from rounding are taken as zero).
pub fn sqrt_psd(m: &Mat) -> Mat {
    let n = m.n;
    let (w, v) = sym_eigen(m);
    let mut r = Mat::zeros(n);
    for (k, wk) in w.iter().enumerate() {
        let s = wk.max(0.0).sqrt();
        if s == 0.0 {
            continue;
        }
        for i in 0..n {
            let vik = v.at(i, k) * s;
            for j in 0..n {
                r.a[i * n + j] += vik * v.at(j, k);
            }
        }
    }
    r
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sqrt_squares_back() {
        let m = Mat {
            n: 3,
            a: vec![4.0, 1.0, 0.5, 1.0, 3.0, 0.2, 0.5, 0.2, 2.0],
        };
        let r = sqrt_psd(&m);
        let back = r.mul(&r);
        for (x, y) in back.a.iter().zip(&m.a) {
            assert!((x - y).abs() < 1e-9, "{back:?}");
        }
    }
}
