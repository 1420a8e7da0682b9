//! Singular value decomposition of a square matrix by one-sided Jacobi
//! rotations (Hestenes 1958; Demmel and Veselic 1992), for orthogonal
//! Procrustes between two bundles' spaces (d x d, d up to ~1024).
//!
//! Written here rather than taken from a LAPACK binding so that befit builds
//! with no system libraries; one-sided Jacobi is short, needs no
//! bidiagonalisation and is accurate to working precision even for small
//! singular values. Cost: about 2 d^3 flops per sweep, some 6 to 12 sweeps.

use ndarray::Array2;

/// Most sweeps over all column pairs before giving up; Jacobi converges
/// quadratically, so this is only a guard against a NaN input looping.
const MAX_SWEEPS: usize = 60;

/// M = U diag(s) V^T, singular values descending, U and V orthogonal.
#[derive(Debug, Clone)]
pub struct Svd {
    /// Left singular vectors, as columns.
    pub u: Array2<f64>,
    /// Singular values, largest first.
    pub s: Vec<f64>,
    /// Right singular vectors, as rows (V transposed).
    pub vt: Array2<f64>,
}

/// Singular value decomposition of the square matrix `m`.
///
/// Columns of U for (numerically) zero singular values are completed to an
/// orthonormal basis, so U is orthogonal even when `m` is rank deficient (as
/// A^T B is when the probe has fewer images than dimensions).
pub fn svd_square(m: &Array2<f64>) -> Svd {
    let n = m.nrows();
    assert_eq!(n, m.ncols(), "svd_square of a non-square matrix");
    // Row j of `w` is column j of the working matrix M V; row j of `v` is
    // column j of V. Rows are contiguous, so rotations stream through memory.
    let mut w: Vec<f64> = m.t().iter().copied().collect();
    let mut v: Vec<f64> = vec![0.0; n * n];
    for j in 0..n {
        v[j * n + j] = 1.0;
    }
    for _ in 0..MAX_SWEEPS {
        let mut rotated = false;
        for p in 0..n {
            for q in p + 1..n {
                let (alpha, beta, gamma) = {
                    let (wp, wq) = (&w[p * n..(p + 1) * n], &w[q * n..(q + 1) * n]);
                    let mut a = 0.0;
                    let mut b = 0.0;
                    let mut g = 0.0;
                    for k in 0..n {
                        a += wp[k] * wp[k];
                        b += wq[k] * wq[k];
                        g += wp[k] * wq[k];
                    }
                    (a, b, g)
                };
                if gamma == 0.0 || gamma.abs() <= f64::EPSILON * (alpha * beta).sqrt() {
                    continue;
                }
                rotated = true;
                // The rotation that zeroes the (p, q) entry of W^T W.
                let zeta = (beta - alpha) / (2.0 * gamma);
                let t = zeta.signum() / (zeta.abs() + (1.0 + zeta * zeta).sqrt());
                let c = 1.0 / (1.0 + t * t).sqrt();
                let s = c * t;
                rotate_rows(&mut w, n, p, q, c, s);
                rotate_rows(&mut v, n, p, q, c, s);
            }
        }
        if !rotated {
            break;
        }
    }

    let norms: Vec<f64> = (0..n)
        .map(|j| {
            w[j * n..(j + 1) * n]
                .iter()
                .map(|x| x * x)
                .sum::<f64>()
                .sqrt()
        })
        .collect();
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| norms[b].total_cmp(&norms[a]));
    let largest = order.first().map_or(0.0, |&j| norms[j]);
    let negligible = largest * n as f64 * f64::EPSILON;

    let mut u = Array2::zeros((n, n));
    let mut vt = Array2::zeros((n, n));
    let mut s = Vec::with_capacity(n);
    let mut null_columns = Vec::new();
    for (col, &j) in order.iter().enumerate() {
        let sigma = norms[j];
        s.push(sigma);
        for k in 0..n {
            vt[[col, k]] = v[j * n + k];
        }
        if sigma > negligible {
            for k in 0..n {
                u[[k, col]] = w[j * n + k] / sigma;
            }
        } else {
            null_columns.push(col);
        }
    }
    complete_orthonormal(&mut u, &null_columns);
    Svd { u, s, vt }
}

/// Applies the plane rotation (c, s) to rows p and q of the n x n row-major `a`.
fn rotate_rows(a: &mut [f64], n: usize, p: usize, q: usize, c: f64, s: f64) {
    let (head, tail) = a.split_at_mut(q * n);
    let rp = &mut head[p * n..(p + 1) * n];
    let rq = &mut tail[..n];
    for (x, y) in rp.iter_mut().zip(rq.iter_mut()) {
        let (xp, xq) = (*x, *y);
        *x = c * xp - s * xq;
        *y = s * xp + c * xq;
    }
}

/// Fills the columns `missing` of `u` (all others orthonormal) so that `u` is
/// orthogonal: for each, the standard basis vector farthest from the span so
/// far, orthogonalised by Gram-Schmidt (done twice for accuracy). While the
/// span has dimension m < n, the farthest basis vector is at least
/// sqrt((n - m) / n) >= 1 / sqrt(n) away from it, so a column is always found.
fn complete_orthonormal(u: &mut Array2<f64>, missing: &[usize]) {
    let n = u.nrows();
    let mut filled: Vec<usize> = (0..n).filter(|c| !missing.contains(c)).collect();
    for &col in missing {
        let mut best: Option<(f64, Vec<f64>)> = None;
        for candidate in 0..n {
            let mut x = vec![0.0; n];
            x[candidate] = 1.0;
            for _ in 0..2 {
                for &f in &filled {
                    let dot: f64 = (0..n).map(|k| u[[k, f]] * x[k]).sum();
                    for (k, xk) in x.iter_mut().enumerate() {
                        *xk -= dot * u[[k, f]];
                    }
                }
            }
            let norm = x.iter().map(|v| v * v).sum::<f64>().sqrt();
            if best.as_ref().is_none_or(|(b, _)| norm > *b) {
                best = Some((norm, x));
            }
        }
        if let Some((norm, x)) = best.filter(|(norm, _)| *norm > 0.0) {
            for (k, xk) in x.iter().enumerate() {
                u[[k, col]] = xk / norm;
            }
            filled.push(col);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    fn assert_orthogonal(q: &Array2<f64>) {
        let eye = Array2::<f64>::eye(q.nrows());
        let err = (q.t().dot(q) - &eye)
            .mapv(f64::abs)
            .fold(0.0f64, |a, &b| a.max(b));
        assert!(err < 1e-12, "not orthogonal: {err}");
    }

    #[test]
    fn rank_deficient_matrices_still_give_an_orthogonal_u() {
        // A^T B of 20 rows in 64 dimensions has rank <= 20: 44 columns of U must be completed.
        let a = Array2::from_shape_fn((20, 64), |(i, j)| ((i * 7 + j * 3) % 11) as f64 - 5.0);
        let b = Array2::from_shape_fn((20, 64), |(i, j)| ((i * 5 + j * 2) % 13) as f64 - 6.0);
        let svd = svd_square(&a.t().dot(&b));
        assert_orthogonal(&svd.u);
        assert_orthogonal(&svd.vt);
        let back = reconstruct(&svd);
        let err = (back - a.t().dot(&b))
            .mapv(f64::abs)
            .fold(0.0f64, |x, &y| x.max(y));
        assert!(err < 1e-8, "reconstruction error {err}");
    }

    fn reconstruct(svd: &Svd) -> Array2<f64> {
        let sigma = Array2::from_diag(&ndarray::Array1::from(svd.s.clone()));
        svd.u.dot(&sigma).dot(&svd.vt)
    }

    fn pseudo_random(n: usize, seed: u64) -> Array2<f64> {
        let mut state = seed;
        Array2::from_shape_simple_fn((n, n), || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            ((state >> 11) as f64 / (1u64 << 53) as f64) * 2.0 - 1.0
        })
    }

    #[test]
    fn two_by_two_worked_by_hand() {
        // M = [[3, 0], [4, 5]]: M^T M = [[25, 20], [20, 25]], eigenvalues 45 and 5,
        // so the singular values are sqrt(45) = 3 sqrt(5) and sqrt(5).
        let m = array![[3.0, 0.0], [4.0, 5.0]];
        let svd = svd_square(&m);
        assert!((svd.s[0] - 45f64.sqrt()).abs() < 1e-12);
        assert!((svd.s[1] - 5f64.sqrt()).abs() < 1e-12);
        assert_orthogonal(&svd.u);
        assert_orthogonal(&svd.vt);
        let err = (reconstruct(&svd) - &m).mapv(f64::abs).sum();
        assert!(err < 1e-12);
    }

    #[test]
    fn random_matrix_is_reconstructed() {
        let m = pseudo_random(12, 7);
        let svd = svd_square(&m);
        assert!(svd.s.windows(2).all(|w| w[0] >= w[1]));
        assert_orthogonal(&svd.u);
        assert_orthogonal(&svd.vt);
        let err = (reconstruct(&svd) - &m)
            .mapv(f64::abs)
            .fold(0.0f64, |a, &b| a.max(b));
        assert!(err < 1e-12, "{err}");
    }

    #[test]
    fn rank_deficient_matrix_gets_a_full_orthogonal_u() {
        // Rank 2 in R^5: the outer products of two vector pairs.
        let a = pseudo_random(5, 3);
        let mut m = Array2::zeros((5, 5));
        for r in 0..2 {
            let x = a.row(r);
            let y = a.row(r + 2);
            for i in 0..5 {
                for j in 0..5 {
                    m[[i, j]] += x[i] * y[j];
                }
            }
        }
        let svd = svd_square(&m);
        assert!(svd.s[2] < 1e-12 && svd.s[1] > 1e-3);
        assert_orthogonal(&svd.u);
        assert_orthogonal(&svd.vt);
        let err = (reconstruct(&svd) - &m)
            .mapv(f64::abs)
            .fold(0.0f64, |a, &b| a.max(b));
        assert!(err < 1e-12, "{err}");
    }

    #[test]
    fn zero_matrix_has_zero_singular_values_and_orthogonal_factors() {
        let svd = svd_square(&Array2::zeros((3, 3)));
        assert_eq!(svd.s, vec![0.0; 3]);
        assert_orthogonal(&svd.u);
    }
}
