//! Cholesky factorisation of a covariance matrix with bounded, escalating diagonal jitter.
//!
//! Kernel matrices are positive definite in exact arithmetic but can be numerically singular
//! (smooth kernels, near-duplicate days, no noise term). The usual remedy is to add a small
//! multiple of the identity ("jitter", i.e. a tiny extra noise variance; Rasmussen & Williams
//! 2006, §3.4.3 and Neal 1997) and to give up loudly when even a non-negligible jitter does not
//! help, instead of producing NaNs downstream.

use nalgebra::{Cholesky, DMatrix, Dyn};

use super::{GpError, Result};

/// Jitters tried, as fractions of the mean diagonal (written out so each is the exact literal).
const JITTER_REL: [f64; 7] = [1e-10, 1e-9, 1e-8, 1e-7, 1e-6, 1e-5, 1e-4];

/// Factorises a symmetric matrix `K = L Lᵀ` (only the lower triangle is read), adding jitter
/// to the diagonal if needed, and returns the factor and the jitter used (0 when none).
///
/// ```text
/// try  K                                   (no jitter)
/// then K + j I,  j = 1e-10 · m, 1e-9 · m, …, 1e-4 · m,   m = mean(diag K)
/// ```
///
/// The jitter is relative to the mean diagonal so that it means the same thing whatever the
/// units of `y`. The largest value, `1e-4 · m`, is an extra noise standard deviation of 1 % of
/// the prior standard deviation: beyond that the matrix is not "numerically" singular any more
/// and jittering would hide a modelling error.
///
/// A factorisation counts as successful only when every pivot satisfies
/// `L_jj² > n · ε · max(diag K)` (ε = machine epsilon); smaller pivots are rounding noise of a
/// singular matrix (e.g. two noise-free observations on the same day) and would give a factor
/// with a meaningless inverse.
///
/// # Errors
/// - [`GpError::Shape`] if `k` is not square;
/// - [`GpError::NonFinite`] if an entry is NaN or infinite;
/// - [`GpError::NotPositiveDefinite`] naming the largest jitter tried (0 when the mean
///   diagonal is not positive, since no positive definite matrix has one).
pub fn cholesky_with_jitter(k: DMatrix<f64>) -> Result<(Cholesky<f64, Dyn>, f64)> {
    let (n, n_cols) = k.shape();
    if n != n_cols {
        return Err(GpError::Shape(format!(
            "covariance matrix must be square, got {n}x{n_cols}"
        )));
    }
    if let Some(idx) = k.as_slice().iter().position(|v| !v.is_finite()) {
        // Column-major storage: index = row + col * n.
        return Err(GpError::NonFinite(format!(
            "covariance entry ({}, {}) = {}",
            idx % n,
            idx / n,
            k[idx]
        )));
    }
    if n == 0 {
        return Ok((Cholesky::pack_dirty(k), 0.0));
    }
    if let Some(chol) = try_factor(k.clone()) {
        return Ok((chol, 0.0));
    }
    let mean_diag = k.diagonal().mean();
    if mean_diag <= 0.0 {
        return Err(GpError::NotPositiveDefinite { n, max_jitter: 0.0 });
    }
    let mut jitter = 0.0;
    for rel in JITTER_REL {
        jitter = rel * mean_diag;
        let mut jittered = k.clone();
        for i in 0..n {
            jittered[(i, i)] += jitter;
        }
        if let Some(chol) = try_factor(jittered) {
            return Ok((chol, jitter));
        }
    }
    Err(GpError::NotPositiveDefinite {
        n,
        max_jitter: jitter,
    })
}

/// One factorisation attempt with the pivot-size guard described on [`cholesky_with_jitter`].
fn try_factor(m: DMatrix<f64>) -> Option<Cholesky<f64, Dyn>> {
    let n = m.nrows();
    let max_diag = m.diagonal().max();
    let min_pivot_sq = n as f64 * f64::EPSILON * max_diag;
    let chol = Cholesky::new(m)?;
    let l = chol.l_dirty();
    (0..n)
        .all(|j| l[(j, j)] * l[(j, j)] > min_pivot_sq)
        .then_some(chol)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn well_conditioned_matrix_needs_no_jitter_and_reconstructs() {
        let k = DMatrix::from_row_slice(3, 3, &[4.0, 2.0, 0.6, 2.0, 5.0, 1.0, 0.6, 1.0, 3.0]);
        let (chol, jitter) = cholesky_with_jitter(k.clone()).unwrap();
        assert_eq!(jitter, 0.0);
        let l = chol.l();
        assert!((&l * l.transpose() - &k).abs().max() < 1e-14);
    }

    /// Two noise-free observations on the same day give a rank-deficient matrix (rank 2 of 3):
    /// the plain attempt fails and the first jitters, relative to the mean diagonal, fix it.
    #[test]
    fn duplicate_days_without_noise_are_rescued_by_jitter() {
        let t = [0.0, 1.0, 1.0];
        let k = DMatrix::from_fn(3, 3, |i, j| {
            let d: f64 = t[i] - t[j];
            (-0.5 * d * d).exp()
        });
        assert!(try_factor(k.clone()).is_none());
        let (chol, jitter) = cholesky_with_jitter(k.clone()).unwrap();
        assert!((1e-10..=1e-4).contains(&jitter), "jitter {jitter:e}");
        let l = chol.l();
        let mut expected = k;
        for i in 0..3 {
            expected[(i, i)] += jitter;
        }
        assert!((&l * l.transpose() - expected).abs().max() < 1e-12);
    }

    /// Eigenvalues 3 and -1: no jitter up to 1e-4 · mean(diag) = 1e-4 can help, and the error
    /// names that largest jitter.
    #[test]
    fn indefinite_matrix_reports_largest_jitter() {
        let k = DMatrix::from_row_slice(2, 2, &[1.0, 2.0, 2.0, 1.0]);
        let err = cholesky_with_jitter(k).unwrap_err();
        match &err {
            GpError::NotPositiveDefinite { n, max_jitter } => {
                assert_eq!(*n, 2);
                assert!((max_jitter - 1e-4).abs() < 1e-18, "{max_jitter:e}");
            }
            other => panic!("unexpected error {other:?}"),
        }
        assert!(err.to_string().contains("1e-4"), "{err}");
    }

    #[test]
    fn rejects_non_finite_and_non_square() {
        let mut k = DMatrix::identity(2, 2);
        k[(1, 0)] = f64::NAN;
        assert!(matches!(
            cholesky_with_jitter(k),
            Err(GpError::NonFinite(m)) if m.contains("(1, 0)")
        ));
        assert!(matches!(
            cholesky_with_jitter(DMatrix::zeros(2, 3)),
            Err(GpError::Shape(_))
        ));
        assert!(matches!(
            cholesky_with_jitter(DMatrix::from_element(2, 2, -1.0)),
            Err(GpError::NotPositiveDefinite { max_jitter, .. }) if max_jitter == 0.0
        ));
    }
}
