//! Solving (G + αI) X = B for a symmetric positive semi-definite G and a
//! whole list of penalties α: the linear algebra under ridge (G = XᵀX or
//! XXᵀ) and kernel ridge (G = K) over a penalty grid.
//!
//! Two routes, chosen by how many penalties share one G:
//! - few penalties: one Cholesky factorisation of G + αI per α (n³/3 flops
//!   each);
//! - more: one orthogonal reduction to tridiagonal form, G = Q T Qᵀ
//!   (Householder; Golub & Van Loan, *Matrix Computations*, 4th ed., §8.3.1),
//!   after which (G + αI)⁻¹B = Q (T + αI)⁻¹ QᵀB costs O(n) per column for the
//!   tridiagonal solve plus one blocked application of Q to every α's
//!   columns at once.
//!
//! Why tridiagonal rather than the full eigendecomposition G = VΛVᵀ that
//! also serves every α: the reduction is the first (and cheaper) half of
//! the eigendecomposition, and the eigenvectors are never needed because
//! (T + αI) is solved directly. Measured with faer on a 1,280 × 1,280 RBF
//! kernel on 2 cores: eigendecomposition 0.57 s, tridiagonal reduction
//! 0.25 s, one Cholesky 0.07–0.09 s; so one reduction beats Cholesky from
//! about 3–4 penalties on, and beats the eigendecomposition always.
//! Measured again with the machine shared (load average 4–5 on 2 cores),
//! as the nested grid search runs it: the reduction, whose symmetric
//! matrix–vector half is bound by memory bandwidth, took 0.84 s and five
//! Choleskys (level-3, compute-bound) 0.58 s; a profile of the nested 5 × 5
//! search showed the reduction at half of all time. So Cholesky is kept up
//! to the five penalties of the default kernel grid.
//!
//! Rounding can leave G with eigenvalues slightly below zero. T + αI is
//! factorised as LDLᵀ and accepted only when every pivot is positive (then
//! it is numerically positive definite and the factorisation is stable);
//! otherwise that α is solved spectrally through T's eigendecomposition with
//! the eigenvalues clamped at zero before α is added, so a penalty at the
//! rounding level can never flip the sign of a direction.

use faer::dyn_stack::{MemBuffer, MemStack, StackReq};
use faer::linalg::cholesky::llt;
use faer::linalg::evd::tridiag;
use faer::linalg::householder;
use faer::linalg::qr::no_pivoting::factor::recommended_block_size;
use faer::{Conj, Mat, MatMut, MatRef, Par};
use ndarray::{Array1, Array2, ArrayView2};

use crate::linalg;

/// Up to this many penalties per G, one Cholesky factorisation per penalty
/// is cheaper than one tridiagonal reduction (see the module header).
const MAX_ALPHAS_FOR_CHOLESKY: usize = 5;

/// Parallelism: the global rayon pool when the work is worth sharing.
fn par_for(flops: usize) -> Par {
    if flops < 1 << 22 {
        Par::Seq
    } else {
        Par::rayon(0)
    }
}

/// Solves (G + αI) X = B for every α: the result is n × (A·c) with the
/// solution for `alphas[a]` in columns `a·c .. (a+1)·c`. `g` is consumed
/// (the tridiagonal route overwrites it). Every α must be positive and
/// finite, and G symmetric positive semi-definite up to rounding; only one
/// triangle is read.
pub(crate) fn solve_shifted(
    g: Array2<f64>,
    alphas: &[f64],
    b: ArrayView2<f64>,
) -> Result<Array2<f64>, linalg::Error> {
    let n = g.nrows();
    debug_assert_eq!(g.ncols(), n);
    debug_assert_eq!(b.nrows(), n);
    debug_assert!(alphas.iter().all(|a| a.is_finite() && *a > 0.0));
    // G's row-major buffer read as a column-major matrix is Gᵀ = G: faer
    // works on it without a copy.
    let mut buffer = if g.is_standard_layout() {
        g.into_raw_vec_and_offset().0
    } else {
        g.iter().copied().collect()
    };
    let rhs = Mat::from_fn(n, b.ncols(), |i, j| b[[i, j]]);
    if alphas.len() <= MAX_ALPHAS_FOR_CHOLESKY {
        let g = MatRef::from_column_major_slice(&buffer, n, n);
        if let Some(x) = solve_by_cholesky(g, alphas, rhs.as_ref()) {
            return Ok(to_ndarray(x.as_ref()));
        }
    }
    let g = MatMut::from_column_major_slice_mut(&mut buffer, n, n);
    solve_by_tridiagonal(g, alphas, rhs.as_ref()).map(|x| to_ndarray(x.as_ref()))
}

fn to_ndarray(a: MatRef<'_, f64>) -> Array2<f64> {
    Array2::from_shape_fn((a.nrows(), a.ncols()), |(i, j)| a[(i, j)])
}

/// One Cholesky factorisation per α; `None` when one of them fails (G + αI
/// not numerically positive definite), so the caller takes the route that
/// can clamp.
fn solve_by_cholesky(g: MatRef<'_, f64>, alphas: &[f64], b: MatRef<'_, f64>) -> Option<Mat<f64>> {
    let (n, c) = (g.nrows(), b.ncols());
    let par = par_for(n * n * n);
    let mut mem = MemBuffer::new(StackReq::any_of(&[
        llt::factor::cholesky_in_place_scratch::<f64>(n, par, Default::default()),
        llt::solve::solve_in_place_scratch::<f64>(n, c, par),
    ]));
    let stack = MemStack::new(&mut mem);
    let mut out = Mat::<f64>::zeros(n, alphas.len() * c);
    let mut factor = Mat::<f64>::zeros(n, n);
    for (a, &alpha) in alphas.iter().enumerate() {
        factor.copy_from_triangular_lower(g);
        for i in 0..n {
            factor[(i, i)] += alpha;
        }
        let factored = llt::factor::cholesky_in_place(
            factor.as_mut(),
            Default::default(),
            par,
            stack,
            Default::default(),
        );
        if factored.is_err() {
            linalg::clear_vector_upper(par);
            return None;
        }
        let mut x = out.subcols_mut(a * c, c);
        x.copy_from(b);
        llt::solve::solve_in_place_with_conj(factor.as_ref(), Conj::No, x, par, stack);
    }
    // The scalar code from here on must not pay for faer's dirty registers.
    linalg::clear_vector_upper(par);
    let finite = out.col_iter().all(|col| col.iter().all(|v| v.is_finite()));
    finite.then_some(out)
}

/// The tridiagonal route of the module header.
fn solve_by_tridiagonal(
    mut g: MatMut<'_, f64>,
    alphas: &[f64],
    b: MatRef<'_, f64>,
) -> Result<Mat<f64>, linalg::Error> {
    let (n, c) = (g.nrows(), b.ncols());
    let width = alphas.len() * c;
    let par = par_for(n * n * n);
    let block = recommended_block_size::<f64>(n, n);
    let mut factor = Mat::<f64>::zeros(block, n.saturating_sub(1));
    let mut mem =
        MemBuffer::new(StackReq::any_of(&[
            tridiag::tridiag_in_place_scratch::<f64>(n, par, Default::default()),
            householder::apply_block_householder_sequence_transpose_on_the_left_in_place_scratch::<
                f64,
            >(n.saturating_sub(1), block, c),
            householder::apply_block_householder_sequence_on_the_left_in_place_scratch::<f64>(
                n.saturating_sub(1),
                block,
                width,
            ),
        ]));
    let stack = MemStack::new(&mut mem);
    // G = Q T Qᵀ with Q = diag(1, H₁⋯Hₙ₋₂): the reflectors act on rows 1.., as
    // in faer's own eigensolver.
    tridiag::tridiag_in_place(g.as_mut(), factor.as_mut(), par, stack, Default::default());
    let diag: Vec<f64> = (0..n).map(|i| g[(i, i)]).collect();
    let sub: Vec<f64> = (1..n).map(|i| g[(i, i - 1)]).collect();

    let mut qtb = b.to_owned();
    if n > 1 {
        householder::apply_block_householder_sequence_transpose_on_the_left_in_place_with_conj(
            g.as_ref().submatrix(1, 0, n - 1, n - 1),
            factor.as_ref(),
            Conj::No,
            qtb.as_mut().subrows_mut(1, n - 1),
            par,
            stack,
        );
    }
    // The tridiagonal solves below are scalar code.
    linalg::clear_vector_upper(par);

    let mut out = Mat::<f64>::zeros(n, width);
    let mut spectral: Option<Spectral> = None;
    for (a, &alpha) in alphas.iter().enumerate() {
        match TridiagonalLdlt::new(&diag, &sub, alpha) {
            Some(ldlt) => {
                for j in 0..c {
                    let col = out.col_as_slice_mut(a * c + j);
                    col.copy_from_slice(qtb.col_as_slice(j));
                    ldlt.solve_in_place(col);
                }
            }
            None => {
                if spectral.is_none() {
                    spectral = Some(Spectral::of_tridiagonal(&diag, &sub)?);
                }
                if let Some(s) = &spectral {
                    let x = s.solve(alpha, qtb.as_ref());
                    out.subcols_mut(a * c, c).copy_from(&x);
                }
            }
        }
    }

    if n > 1 {
        householder::apply_block_householder_sequence_on_the_left_in_place_with_conj(
            g.as_ref().submatrix(1, 0, n - 1, n - 1),
            factor.as_ref(),
            Conj::No,
            out.as_mut().subrows_mut(1, n - 1),
            par,
            stack,
        );
    }
    linalg::clear_vector_upper(par);
    Ok(out)
}

/// LDLᵀ of the symmetric tridiagonal T + αI (diagonal `d`, sub-diagonal
/// `e`): L is unit lower bidiagonal with multipliers `l`, D = `pivots`.
#[derive(Debug)]
pub(crate) struct TridiagonalLdlt {
    l: Vec<f64>,
    pivots: Vec<f64>,
}

impl TridiagonalLdlt {
    /// `None` unless every pivot is positive and finite, i.e. T + αI is
    /// numerically positive definite (Sylvester's law of inertia).
    pub(crate) fn new(d: &[f64], e: &[f64], alpha: f64) -> Option<TridiagonalLdlt> {
        let n = d.len();
        let mut l = vec![0.0; n];
        let mut pivots = vec![0.0; n];
        for i in 0..n {
            let mut p = d[i] + alpha;
            if i > 0 {
                l[i] = e[i - 1] / pivots[i - 1];
                p -= l[i] * e[i - 1];
            }
            if !(p > 0.0 && p.is_finite()) {
                return None;
            }
            pivots[i] = p;
        }
        Some(TridiagonalLdlt { l, pivots })
    }

    /// Overwrites `x` (the right-hand side) with the solution.
    pub(crate) fn solve_in_place(&self, x: &mut [f64]) {
        let n = x.len();
        for i in 1..n {
            x[i] -= self.l[i] * x[i - 1];
        }
        for (v, p) in x.iter_mut().zip(&self.pivots) {
            *v /= p;
        }
        for i in (0..n.saturating_sub(1)).rev() {
            x[i] -= self.l[i + 1] * x[i + 1];
        }
    }
}

/// T = VΛVᵀ with Λ clamped at zero: the fallback for penalties at the
/// rounding level of G's smallest eigenvalues.
struct Spectral {
    values: Array1<f64>,
    vectors: Array2<f64>,
}

impl Spectral {
    fn of_tridiagonal(d: &[f64], e: &[f64]) -> Result<Spectral, linalg::Error> {
        let n = d.len();
        let t = Array2::from_shape_fn((n, n), |(i, j)| match i.abs_diff(j) {
            0 => d[i],
            1 => e[i.min(j)],
            _ => 0.0,
        });
        let (values, vectors) = linalg::sym_eigen(t.view())?;
        Ok(Spectral {
            values: values.mapv(|v| v.max(0.0)),
            vectors,
        })
    }

    /// V (Λ + αI)⁻¹ Vᵀ b.
    fn solve(&self, alpha: f64, b: MatRef<'_, f64>) -> Mat<f64> {
        let b = to_ndarray(b);
        let mut coords = linalg::matmul(self.vectors.t(), b.view());
        for (mut row, lambda) in coords.rows_mut().into_iter().zip(&self.values) {
            row /= lambda + alpha;
        }
        let x = linalg::matmul(self.vectors.view(), coords.view());
        Mat::from_fn(x.nrows(), x.ncols(), |i, j| x[[i, j]])
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use faer::linalg::solvers::Solve;
    use rand::{Rng, SeedableRng};
    use rand_xoshiro::Xoshiro256PlusPlus;

    fn random(rows: usize, cols: usize, seed: u64) -> Array2<f64> {
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
        Array2::from_shape_fn((rows, cols), |_| rng.gen_range(-1.0..1.0))
    }

    /// (G + αI)⁻¹B by faer's partially pivoted LU: a solver that shares
    /// nothing with either route under test.
    fn lu_solve(g: &Array2<f64>, alpha: f64, b: &Array2<f64>) -> Array2<f64> {
        let n = g.nrows();
        let shifted = Mat::from_fn(n, n, |i, j| g[[i, j]] + if i == j { alpha } else { 0.0 });
        to_ndarray(shifted.partial_piv_lu().solve(to_faer(b.view())).as_ref())
    }

    fn to_faer(a: ArrayView2<f64>) -> Mat<f64> {
        Mat::from_fn(a.nrows(), a.ncols(), |i, j| a[[i, j]])
    }

    fn assert_close(a: &Array2<f64>, b: &Array2<f64>, rel: f64) {
        assert_eq!(a.dim(), b.dim());
        let scale = b.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        for (x, y) in a.iter().zip(b.iter()) {
            assert!((x - y).abs() <= rel * scale, "{x} vs {y} (scale {scale})");
        }
    }

    #[test]
    fn both_routes_agree_with_an_lu_solve() {
        let x = random(40, 25, 11);
        let g = linalg::matmul(x.t(), x.view());
        let b = random(25, 3, 12);
        // More penalties than the Cholesky route takes: the tridiagonal one.
        let alphas = [10.0, 1.0, 0.1, 0.01, 1e-3, 1e-4];
        assert!(alphas.len() > MAX_ALPHAS_FOR_CHOLESKY);
        let tri = solve_shifted(g.clone(), &alphas, b.view()).unwrap();
        assert_eq!(tri.dim(), (25, 18));
        for (a, &alpha) in alphas.iter().enumerate() {
            let reference = lu_solve(&g, alpha, &b);
            let block = tri.slice(ndarray::s![.., a * 3..(a + 1) * 3]).to_owned();
            assert_close(&block, &reference, 1e-10);
            // One α at a time takes the Cholesky route.
            let chol = solve_shifted(g.clone(), &[alpha], b.view()).unwrap();
            assert_close(&chol, &reference, 1e-10);
        }
    }

    #[test]
    fn one_by_one_and_empty_systems() {
        let g = ndarray::array![[3.0]];
        let b = ndarray::array![[2.0, 4.0]];
        let x = solve_shifted(g, &[1.0, 3.0, 5.0], b.view()).unwrap();
        let expected = ndarray::array![[0.5, 1.0, 1.0 / 3.0, 2.0 / 3.0, 0.25, 0.5]];
        assert_close(&x, &expected, 1e-15);
        let empty = solve_shifted(
            Array2::zeros((0, 0)),
            &[1.0, 2.0, 3.0],
            Array2::zeros((0, 2)).view(),
        )
        .unwrap();
        assert_eq!(empty.dim(), (0, 6));
    }

    #[test]
    fn ldlt_refuses_an_indefinite_tridiagonal() {
        // diag(1, −1) + 0.5·I has eigenvalues 1.5 and −0.5.
        assert!(TridiagonalLdlt::new(&[1.0, -1.0], &[0.0], 0.5).is_none());
        // [[2, 1], [1, 2]] + 0 is positive definite (eigenvalues 1 and 3).
        let f = TridiagonalLdlt::new(&[2.0, 2.0], &[1.0], 0.0).unwrap();
        let mut x = [3.0, 3.0];
        f.solve_in_place(&mut x);
        // By hand: [[2,1],[1,2]]·[1,1] = [3,3].
        assert!((x[0] - 1.0).abs() < 1e-15 && (x[1] - 1.0).abs() < 1e-15);
    }

    #[test]
    fn a_penalty_below_rounding_level_is_solved_with_clamped_eigenvalues() {
        // G = V diag(λ) Vᵀ with one eigenvalue −1e−9 (a rounding artefact
        // made visible) and α = 1e−12: without the clamp, (λ + α) < 0 would
        // flip that direction's sign.
        let (_, v) =
            linalg::sym_eigen(linalg::matmul(random(8, 6, 3).t(), random(8, 6, 3).view()).view())
                .unwrap();
        let lambda = ndarray::array![-1e-9, 0.5, 1.0, 2.0, 3.0, 4.0];
        let g = linalg::matmul(
            (v.clone() * lambda.view().insert_axis(ndarray::Axis(0))).view(),
            v.t(),
        );
        let b = random(6, 2, 4);
        let alphas = [1e-12, 1e-12, 1e-12];
        let x = solve_shifted(g, &alphas, b.view()).unwrap();
        let clamped = lambda.mapv(|l: f64| 1.0 / (l.max(0.0) + 1e-12));
        let coords = linalg::matmul(v.t(), b.view()) * clamped.view().insert_axis(ndarray::Axis(1));
        let expected = linalg::matmul(v.view(), coords.view());
        let first = x.slice(ndarray::s![.., 0..2]).to_owned();
        // The clamped direction carries 1/α = 1e12 times its coordinate, so
        // the comparison is relative to that scale; rounding in T's
        // eigenvectors limits it to about 1e−6.
        assert_close(&first, &expected, 1e-6);
    }
}
