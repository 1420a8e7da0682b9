//! How alike two bundles' embedding spaces are, row for row: linear CKA
//! (Kornblith et al. 2019, "Similarity of Neural Network Representations
//! Revisited", eq. for linear CKA), which works across dimensions, and the
//! orthogonal Procrustes residual (Schonemann 1966), when dimensions agree.

use ndarray::{Array2, Axis};
use serde::{Deserialize, Serialize};

use super::svd::svd_square;

/// Linear CKA of `x` (n x d1) and `y` (n x d2), rows paired:
/// ||Y^T X||_F^2 / (||X^T X||_F ||Y^T Y||_F) after centring every column.
///
/// 1 for spaces equal up to rotation and isotropic scaling, 0 for orthogonal
/// ones. `None` when either matrix is constant (nothing left after centring).
pub fn linear_cka(x: &Array2<f64>, y: &Array2<f64>) -> Option<f64> {
    assert_eq!(
        x.nrows(),
        y.nrows(),
        "linear_cka of matrices with different row counts"
    );
    let xc = centred(x);
    let yc = centred(y);
    let (num, dx, dy) = if x.nrows() < x.ncols().max(y.ncols()) {
        // Fewer rows than columns: the n x n Gram matrices are smaller, and
        // ||Y^T X||_F^2 = <XX^T, YY^T>_F, ||X^T X||_F = ||XX^T||_F.
        let kx = xc.dot(&xc.t());
        let ky = yc.dot(&yc.t());
        ((&kx * &ky).sum(), frobenius(&kx), frobenius(&ky))
    } else {
        let yx = yc.t().dot(&xc);
        (
            yx.iter().map(|v| v * v).sum(),
            frobenius(&xc.t().dot(&xc)),
            frobenius(&yc.t().dot(&yc)),
        )
    };
    if dx == 0.0 || dy == 0.0 {
        return None;
    }
    Some(num / (dx * dy))
}

fn centred(m: &Array2<f64>) -> Array2<f64> {
    match m.mean_axis(Axis(0)) {
        Some(mean) => m - &mean,
        None => m.clone(),
    }
}

fn frobenius(m: &Array2<f64>) -> f64 {
    m.iter().map(|v| v * v).sum::<f64>().sqrt()
}

/// The orthogonal Procrustes fit of one set of rows onto another.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct ProcrustesFit {
    /// ||A R - B||_F for the orthogonal R minimising it (rows not centred:
    /// a cosine is about the origin).
    pub residual: f64,
    /// residual / ||B||_F: 0 when B is a rotation of A; about sqrt(2) for
    /// unrelated unit rows.
    pub normalised_residual: f64,
}

/// Orthogonal Procrustes of `a` onto `b` (both n x d): R = U V^T from the SVD
/// A^T B = U S V^T, as `scipy.linalg.orthogonal_procrustes(a, b)`. `None`
/// when the dimensions differ or an entry is not finite.
pub fn procrustes(a: &Array2<f64>, b: &Array2<f64>) -> Option<ProcrustesFit> {
    assert_eq!(
        a.nrows(),
        b.nrows(),
        "procrustes of matrices with different row counts"
    );
    if a.ncols() != b.ncols() {
        return None;
    }
    let rotation = procrustes_rotation(a, b)?;
    let residual = frobenius(&(a.dot(&rotation) - b));
    let scale = frobenius(b);
    Some(ProcrustesFit {
        residual,
        normalised_residual: if scale > 0.0 { residual / scale } else { 0.0 },
    })
}

/// The orthogonal R minimising ||A R - B||_F; `None` for non-finite input.
pub fn procrustes_rotation(a: &Array2<f64>, b: &Array2<f64>) -> Option<Array2<f64>> {
    let svd = svd_square(&a.t().dot(b))?;
    Some(svd.u.dot(&svd.vt))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pseudo_random(rows: usize, cols: usize, seed: u64) -> Array2<f64> {
        let mut state = seed;
        Array2::from_shape_simple_fn((rows, cols), || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            ((state >> 11) as f64 / (1u64 << 53) as f64) * 2.0 - 1.0
        })
    }

    /// A rotation of R^d: the orthogonal factor of a random matrix.
    fn rotation(d: usize, seed: u64) -> Array2<f64> {
        let svd = svd_square(&pseudo_random(d, d, seed)).unwrap();
        svd.u.dot(&svd.vt)
    }

    #[test]
    fn cka_of_a_matrix_with_itself_and_its_rotation_is_one() {
        // Kornblith et al. 2019, section 3: linear CKA is invariant to
        // orthogonal transforms and isotropic scaling.
        let x = pseudo_random(40, 6, 1);
        assert!((linear_cka(&x, &x).unwrap() - 1.0).abs() < 1e-12);
        let xr = x.dot(&rotation(6, 2)) * 3.0;
        assert!((linear_cka(&x, &xr).unwrap() - 1.0).abs() < 1e-12);
    }

    #[test]
    fn cka_gram_and_feature_forms_agree_across_dimensions() {
        // 5 rows, 8 and 3 columns takes the Gram form; 30 rows the feature form.
        let (x, y) = (pseudo_random(5, 8, 3), pseudo_random(5, 3, 4));
        let gram = linear_cka(&x, &y).unwrap();
        let (x2, y2) = (pseudo_random(30, 8, 3), pseudo_random(30, 3, 4));
        let feature = linear_cka(&x2, &y2).unwrap();
        // Recompute both directly from the definition.
        let direct = |x: &Array2<f64>, y: &Array2<f64>| {
            let (xc, yc) = (centred(x), centred(y));
            let yx = yc.t().dot(&xc);
            yx.iter().map(|v| v * v).sum::<f64>()
                / (frobenius(&xc.t().dot(&xc)) * frobenius(&yc.t().dot(&yc)))
        };
        assert!((gram - direct(&x, &y)).abs() < 1e-12);
        assert!((feature - direct(&x2, &y2)).abs() < 1e-12);
        assert!(gram > 0.0 && gram < 1.0);
    }

    #[test]
    fn cka_of_a_constant_matrix_is_undefined() {
        let x = Array2::from_elem((4, 3), 0.5);
        assert_eq!(linear_cka(&x, &pseudo_random(4, 3, 5)), None);
    }

    #[test]
    fn procrustes_recovers_a_rotation() {
        let a = pseudo_random(50, 7, 9);
        let r = rotation(7, 10);
        let b = a.dot(&r);
        let fit = procrustes(&a, &b).unwrap();
        assert!(fit.residual < 1e-10, "{}", fit.residual);
        let found = procrustes_rotation(&a, &b).unwrap();
        assert!((&found - &r).mapv(f64::abs).sum() < 1e-9);
    }

    #[test]
    fn procrustes_with_fewer_rows_than_dimensions_still_fits_exactly() {
        // 3 rows in R^6: A^T B has rank 3, R is not unique but the residual is 0.
        let a = pseudo_random(3, 6, 11);
        let b = a.dot(&rotation(6, 12));
        let fit = procrustes(&a, &b).unwrap();
        assert!(fit.residual < 1e-10, "{}", fit.residual);
    }

    #[test]
    fn procrustes_residual_of_a_stretch_worked_by_hand() {
        // A = [[1, 0], [0, 1]], B = [[1, 0], [0, 2]]: A^T B = B, whose SVD is
        // the identity, so R = I and the residual is ||A - B||_F = 1;
        // ||B||_F = sqrt(5), normalised 1/sqrt(5).
        let a = Array2::<f64>::eye(2);
        let b = ndarray::array![[1.0, 0.0], [0.0, 2.0]];
        let fit = procrustes(&a, &b).unwrap();
        assert!((fit.residual - 1.0).abs() < 1e-12);
        assert!((fit.normalised_residual - 1.0 / 5f64.sqrt()).abs() < 1e-12);
        assert_eq!(
            procrustes(&a, &Array2::eye(2).slice(ndarray::s![.., ..1]).to_owned()),
            None
        );
    }
}
