//! Small dense linear algebra for least squares, a leaf: the normal equations of every
//! fit in subwatch (a PSF on its stamp, an affine registration, a TAN+SIP plate
//! solution) are symmetric positive definite, and are solved by one Cholesky
//! decomposition (Golub & Van Loan 2013, "Matrix Computations", §4.2), which also gives
//! their inverse (a fit's covariance). Not a general solver: a matrix that is not
//! positive definite is refused, never pivoted.
//!
//! Sizes known when compiling ([`Cholesky`]) keep the arrays on the stack, where the
//! PSF fit's loops unroll; [`CholeskyDyn`] takes a size known at run time (the plate
//! solution's polynomial terms). Both run the same arithmetic, in the same order.
//!
//! Another method (Gaussian elimination, Cramer's rule) agrees to rounding only: on the
//! demo's night a registration's transform differs by at most 3e-12 and a plate
//! solution's CD matrix by 1e-11 relative, which changes no verdict, count or anomaly.

/// The factor L of A = L·Lᵀ for an N×N matrix.
#[derive(Debug, Clone, Copy)]
pub struct Cholesky<const N: usize> {
    l: [[f64; N]; N],
}

impl<const N: usize> Cholesky<N> {
    /// `None` unless A is symmetric positive definite as far as the arithmetic can tell
    /// (a pivot that is not positive and finite). Only the lower triangle of A is read.
    pub fn new(a: &[[f64; N]; N]) -> Option<Self> {
        let mut l = [[0.0; N]; N];
        factor(a.as_flattened(), l.as_flattened_mut(), N).then_some(Cholesky { l })
    }

    /// x with A·x = b.
    pub fn solve(&self, b: &[f64; N]) -> [f64; N] {
        let mut x = [0.0; N];
        substitute(self.l.as_flattened(), b, &mut x, N);
        x
    }

    /// A⁻¹, one column at a time.
    pub fn inverse(&self) -> [[f64; N]; N] {
        let mut inv = [[0.0; N]; N];
        for col in 0..N {
            let mut e = [0.0; N];
            e[col] = 1.0;
            let x = self.solve(&e);
            for row in 0..N {
                inv[row][col] = x[row];
            }
        }
        inv
    }
}

/// Solve A·x = b for a symmetric positive-definite A; `None` when A is not.
pub fn solve<const N: usize>(a: &[[f64; N]; N], b: &[f64; N]) -> Option<[f64; N]> {
    Cholesky::new(a).map(|c| c.solve(b))
}

/// The factor L of A = L·Lᵀ for a matrix whose size is known at run time.
#[derive(Debug, Clone)]
pub struct CholeskyDyn {
    n: usize,
    /// L, row by row.
    l: Vec<f64>,
}

impl CholeskyDyn {
    /// As [`Cholesky::new`]; `a` holds the n×n matrix row by row.
    pub fn new(a: &[f64], n: usize) -> Option<Self> {
        assert_eq!(a.len(), n * n, "an n×n matrix, row by row");
        let mut l = vec![0.0; n * n];
        factor(a, &mut l, n).then_some(CholeskyDyn { n, l })
    }

    /// x with A·x = b.
    pub fn solve(&self, b: &[f64]) -> Vec<f64> {
        let mut x = vec![0.0; self.n];
        substitute(&self.l, b, &mut x, self.n);
        x
    }
}

/// L of A = L·Lᵀ into `l` (both n×n, row by row); false when a pivot is not positive
/// and finite.
#[inline]
fn factor(a: &[f64], l: &mut [f64], n: usize) -> bool {
    for i in 0..n {
        for j in 0..=i {
            let mut s = a[i * n + j];
            for k in 0..j {
                s -= l[i * n + k] * l[j * n + k];
            }
            if i == j {
                if s <= 0.0 || !s.is_finite() {
                    return false;
                }
                l[i * n + i] = s.sqrt();
            } else {
                l[i * n + j] = s / l[j * n + j];
            }
        }
    }
    true
}

/// x with L·Lᵀ·x = b: forward substitution for L·y = b, then back for Lᵀ·x = y.
#[inline]
fn substitute(l: &[f64], b: &[f64], x: &mut [f64], n: usize) {
    assert!(b.len() == n && x.len() == n, "vectors of the matrix's size");
    for i in 0..n {
        let mut s = b[i];
        for k in 0..i {
            s -= l[i * n + k] * x[k];
        }
        x[i] = s / l[i * n + i];
    }
    for i in (0..n).rev() {
        let mut s = x[i];
        for k in i + 1..n {
            s -= l[k * n + i] * x[k];
        }
        x[i] = s / l[i * n + i];
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The 3×3 example of Golub & Van Loan (2013, §4.2): A = L·Lᵀ with
    /// L = [[2, 0, 0], [6, 1, 0], [-8, 5, 3]].
    const A: [[f64; 3]; 3] = [
        [4.0, 12.0, -16.0],
        [12.0, 37.0, -43.0],
        [-16.0, -43.0, 98.0],
    ];

    #[test]
    fn factors_a_worked_example_exactly() {
        let c = Cholesky::new(&A).unwrap();
        assert_eq!(c.l, [[2.0, 0.0, 0.0], [6.0, 1.0, 0.0], [-8.0, 5.0, 3.0]]);
    }

    #[test]
    fn solves_and_inverts_against_a_product_worked_by_hand() {
        // b = A·(1, −2, 0.5).
        let b = [4.0 - 24.0 - 8.0, 12.0 - 74.0 - 21.5, -16.0 + 86.0 + 49.0];
        let x = solve(&A, &b).unwrap();
        for (got, want) in x.iter().zip([1.0, -2.0, 0.5]) {
            assert!((got - want).abs() < 1e-12, "{x:?}");
        }
        let inv = Cholesky::new(&A).unwrap().inverse();
        for i in 0..3 {
            for j in 0..3 {
                let p: f64 = (0..3).map(|k| A[i][k] * inv[k][j]).sum();
                assert!((p - f64::from(u8::from(i == j))).abs() < 1e-12);
            }
        }
    }

    #[test]
    fn the_run_time_size_gives_the_same_bits() {
        let b = [1.0, 2.0, 3.0];
        let fixed = solve(&A, &b).unwrap();
        let dynamic = CholeskyDyn::new(A.as_flattened(), 3).unwrap().solve(&b);
        assert_eq!(fixed.to_vec(), dynamic);
    }

    #[test]
    fn refuses_what_is_not_positive_definite() {
        assert!(Cholesky::new(&[[1.0, 2.0], [2.0, 1.0]]).is_none());
        assert!(Cholesky::new(&[[1.0, 1.0], [1.0, 1.0]]).is_none());
        assert!(CholeskyDyn::new(&[f64::NAN], 1).is_none());
    }
}
