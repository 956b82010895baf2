//! Dense linear algebra on `ndarray` arrays, backed by faer: the symmetric
//! eigendecomposition (PCA, ridge, kernel ridge over a penalty grid), GEMM
//! and squared Euclidean distances computed as ‖a‖² + ‖b‖² − 2a·b.
//!
//! Why faer: it is pure Rust (no system BLAS/LAPACK to install), its GEMM
//! and symmetric eigensolver are competitive with OpenBLAS/LAPACK, and it
//! parallelises on the rayon pool itself.

use faer::{Accum, MatMut, MatRef, Par, Side};
use ndarray::{Array1, Array2, ArrayView2, Axis, CowArray, Ix2};

/// Errors of the dense kernels.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum Error {
    #[error("the eigendecomposition of a {n}×{n} matrix did not converge")]
    NoConvergence { n: usize },
    #[error("matrix is not square: {rows}×{cols}")]
    NotSquare { rows: usize, cols: usize },
    #[error("matrix contains a non-finite value")]
    NonFinite,
}

/// Parallelism for large kernels: the global rayon pool, sequential where
/// the work is too small to share. The threshold is 16.8 million
/// multiply-adds, about a millisecond on one core: below it a split
/// saves less than its synchronisation costs whenever the service is
/// busy with other requests, which is when speed matters. In the serve
/// bench (batches of 1,000, 200 descriptors, ridge) the products through
/// the PCA and the fold models, 3.2 million at most, fall below; larger
/// batches, wider descriptor sets, kernel ridge's kernel rows and the
/// fit's Gram matrices pass it and stay parallel.
const PARALLEL_FLOPS: usize = 1 << 24;

fn par_for(flops: usize) -> Par {
    if flops < PARALLEL_FLOPS {
        Par::Seq
    } else {
        Par::rayon(0)
    }
}

/// Clears the upper halves of the vector registers after a faer call, on
/// the calling thread and, when the call was shared out from outside the
/// rayon pool, on every thread of the pool (from a pool thread, on that
/// thread alone: see below).
///
/// faer's x86 GEMM micro-kernels are written in AVX and AVX-512 assembly and
/// return without `vzeroupper`, leaving the registers' upper halves in use.
/// Until something clears them, every legacy-SSE instruction on that thread
/// pays a transition penalty, and that is all of this crate's scalar
/// floating point, glibc's `exp` and the SHA-NI hash: on this project's
/// 2-vCPU Intel Xeon (AVX-512) an `exp` took 127 ns after one faer product
/// against 4.6 ns before it and 4.9 ns after a `vzeroupper`, so kernel ridge
/// scoring, whose kernel is an `exp` per training row, ran at a fifth of its
/// speed. The penalty is the AVX–SSE transition cost Intel documents;
/// other numerical libraries fixed it the same way, with a `vzeroupper` on
/// leaving the library. Compilers insert `vzeroupper` themselves when a
/// function that uses wide registers returns; hand-written assembly must do
/// it by hand. A CPU without AVX has nothing to clear.
pub(crate) fn clear_vector_upper(par: Par) {
    #[cfg(target_arch = "x86_64")]
    {
        if !std::arch::is_x86_feature_detected!("avx") {
            return;
        }
        // SAFETY: the CPU has AVX, checked above.
        unsafe { zero_upper() };
        // Only a caller outside the pool broadcasts. A pool thread that
        // blocked on a broadcast would steal other tasks while it waits:
        // in the fit, whose cross-validation tasks run on the pool, that
        // tripled peak memory (170 to 570 MiB, `cargo bench --bench fit`)
        // by holding more tasks' matrices at once, and the fit took 19–21 s
        // against 6.5–7.2 s with the calling thread alone cleared.
        if matches!(par, Par::Rayon(_)) && rayon::current_thread_index().is_none() {
            // SAFETY: every thread runs on the same CPU model.
            rayon::broadcast(|_| unsafe { zero_upper() });
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = par;
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx")]
fn zero_upper() {
    std::arch::x86_64::_mm256_zeroupper();
}

/// A faer view of an array in standard (row-major) layout: the transpose of
/// a column-major view, so no copy is made.
fn view<'a>(a: &'a CowArray<'_, f64, Ix2>) -> MatRef<'a, f64> {
    // Cannot fail: every caller passes `as_standard_layout()`, which is
    // contiguous and row-major by construction.
    #[allow(clippy::expect_used)]
    let slice = a.as_slice().expect("standard layout arrays are contiguous");
    MatRef::from_row_major_slice(slice, a.nrows(), a.ncols())
}

/// Eigendecomposition of a symmetric matrix: eigenvalues ascending and the
/// eigenvectors as the columns of the second array.
pub fn sym_eigen(a: ArrayView2<f64>) -> Result<(Array1<f64>, Array2<f64>), Error> {
    let (rows, cols) = a.dim();
    if rows != cols {
        return Err(Error::NotSquare { rows, cols });
    }
    if a.iter().any(|v| !v.is_finite()) {
        return Err(Error::NonFinite);
    }
    let a = a.as_standard_layout();
    // A row-major view of A is a column-major view of Aᵀ = A, so either
    // triangle holds the same values for a symmetric input.
    let evd = view(&a)
        .self_adjoint_eigen(Side::Lower)
        .map_err(|_| Error::NoConvergence { n: rows });
    clear_vector_upper(Par::rayon(0));
    let evd = evd?;
    let s = evd.S().column_vector();
    let values = Array1::from_iter((0..rows).map(|i| s[i]));
    let u = evd.U();
    let vectors = Array2::from_shape_fn((rows, rows), |(i, j)| u[(i, j)]);
    Ok((values, vectors))
}

/// C = A·B.
pub fn matmul(a: ArrayView2<f64>, b: ArrayView2<f64>) -> Array2<f64> {
    assert_eq!(a.ncols(), b.nrows(), "matmul: inner dimensions differ");
    let (a, b) = (a.as_standard_layout(), b.as_standard_layout());
    matmul_faer(view(&a), view(&b))
}

/// C = A·Bᵀ, the shape every kernel row and distance computation takes.
pub fn matmul_t(a: ArrayView2<f64>, b: ArrayView2<f64>) -> Array2<f64> {
    assert_eq!(a.ncols(), b.ncols(), "matmul_t: row lengths differ");
    let (a, b) = (a.as_standard_layout(), b.as_standard_layout());
    matmul_faer(view(&a), view(&b).transpose())
}

// The one `expect` cannot fail: `out` is allocated with m·n elements here.
#[allow(clippy::expect_used)]
fn matmul_faer(a: MatRef<'_, f64>, b: MatRef<'_, f64>) -> Array2<f64> {
    let (m, k, n) = (a.nrows(), a.ncols(), b.ncols());
    let mut out = vec![0.0f64; m * n];
    matmul_into(a, b, &mut out, par_for(m * n * k));
    Array2::from_shape_vec((m, n), out).expect("buffer has m·n elements")
}

/// A·B written into `out`, row-major m × n.
fn matmul_into(a: MatRef<'_, f64>, b: MatRef<'_, f64>, out: &mut [f64], par: Par) {
    let (m, n) = (a.nrows(), b.ncols());
    if m == 1 && a.ncols() > 0 {
        // faer takes a matrix–vector route for a single row, which sums a
        // long inner dimension in another order than its GEMM: a kernel
        // ridge candidate scored alone, or left alone in the last block of
        // a batch, got other last bits than in a batch. Two copies of the
        // row take the GEMM route, whose rows do not depend on their
        // neighbours (`a_row_does_not_depend_on_the_rows_around_it`).
        let twice: Vec<f64> = (0..2 * a.ncols()).map(|j| a[(0, j % a.ncols())]).collect();
        let mut both = vec![0.0f64; 2 * n];
        matmul_into(
            MatRef::from_row_major_slice(&twice, 2, a.ncols()),
            b,
            &mut both,
            par,
        );
        out[..n].copy_from_slice(&both[..n]);
        return;
    }
    // Written as the transpose (Cᵀ = Bᵀ·Aᵀ) into a column-major buffer, which
    // is exactly the row-major layout ndarray wants: no copy back.
    let ct = MatMut::from_column_major_slice_mut(out, n, m);
    faer::linalg::matmul::matmul(ct, Accum::Replace, b.transpose(), a.transpose(), 1.0, par);
    clear_vector_upper(par);
}

/// Query rows per block of [`rbf_kernel_times`]: the block's kernel rows
/// (rows × n) are used while still in cache, and blocks are shared between
/// the cores whole, so each GEMM runs on one core without synchronisation.
const KERNEL_BLOCK_ROWS: usize = 128;

/// k(a, B)·C for the RBF kernel k(a, b) = exp(−γ‖a − b‖²) without forming
/// the whole |a| × |B| kernel: for each block of rows of `a`, one GEMM for
/// the cross products a·Bᵀ, the distance-to-kernel transform in place,
/// and one GEMM with `c` (|B| × m). Blocks run in parallel on the rayon
/// pool. `b_norms` are the squared row norms of `b`.
///
/// This is the whole of kernel ridge batch scoring: one kernel row per
/// query serves every column of `c` (the full model and the fold models).
// The one `expect` cannot fail: `out` is allocated with rows·m elements here.
#[allow(clippy::expect_used)]
pub fn rbf_kernel_times(
    a: ArrayView2<f64>,
    b: ArrayView2<f64>,
    b_norms: &Array1<f64>,
    gamma: f64,
    c: ArrayView2<f64>,
) -> Array2<f64> {
    use rayon::prelude::*;
    assert_eq!(a.ncols(), b.ncols(), "rbf_kernel_times: row lengths differ");
    assert_eq!(
        b.nrows(),
        c.nrows(),
        "rbf_kernel_times: B and C differ in rows"
    );
    assert_eq!(
        b.nrows(),
        b_norms.len(),
        "rbf_kernel_times: one norm per row of B"
    );
    let (rows, n, m) = (a.nrows(), b.nrows(), c.ncols());
    if n == 0 {
        // No training rows: every kernel row is empty, every sum zero.
        return Array2::zeros((rows, m));
    }
    // The same norms as `sq_dists`, so a kernel value has the bits of the
    // one the fit computed for the same pair of rows.
    let a_norms = row_sq_norms(a);
    let (a, b, c) = (
        a.as_standard_layout(),
        b.as_standard_layout(),
        c.as_standard_layout(),
    );
    let (a, bt, c) = (view(&a), view(&b).transpose(), view(&c));
    let block = |kernel: &mut Vec<f64>, (index, out): (usize, &mut [f64])| {
        let start = index * KERNEL_BLOCK_ROWS;
        let len = (rows - start).min(KERNEL_BLOCK_ROWS);
        kernel.resize(len * n, 0.0);
        matmul_into(a.subrows(start, len), bt, kernel, Par::Seq);
        for (i, row) in kernel.chunks_exact_mut(n).enumerate() {
            let ai = a_norms[start + i];
            for (v, bj) in row.iter_mut().zip(b_norms.iter()) {
                *v = (-gamma * (ai + bj - 2.0 * *v).max(0.0)).exp();
            }
        }
        let k = MatRef::from_row_major_slice(kernel, len, n);
        matmul_into(k, c, out, Par::Seq);
    };
    let mut out = vec![0.0f64; rows * m];
    let chunk = KERNEL_BLOCK_ROWS * m.max(1);
    if rows <= KERNEL_BLOCK_ROWS {
        // One block (a single candidate, say): on the calling thread, not
        // handed to the pool and queued behind other requests' blocks.
        block(&mut Vec::new(), (0, &mut out));
    } else {
        out.par_chunks_mut(chunk)
            .enumerate()
            .for_each_init(Vec::new, block);
    }
    Array2::from_shape_vec((rows, m), out).expect("buffer has rows·m elements")
}

/// Squared row norms.
pub fn row_sq_norms(a: ArrayView2<f64>) -> Array1<f64> {
    a.map_axis(Axis(1), |r| r.dot(&r))
}

/// Squared Euclidean distances between the rows of `a` and the rows of `b`,
/// ‖a‖² + ‖b‖² − 2a·b by one GEMM, clamped at zero against rounding.
/// `b_norms` may be passed when the same `b` serves many calls.
pub fn sq_dists(
    a: ArrayView2<f64>,
    b: ArrayView2<f64>,
    b_norms: Option<&Array1<f64>>,
) -> Array2<f64> {
    let an = row_sq_norms(a);
    let computed;
    let bn = match b_norms {
        Some(n) => n,
        None => {
            computed = row_sq_norms(b);
            &computed
        }
    };
    let mut d = matmul_t(a, b);
    for (i, mut row) in d.axis_iter_mut(Axis(0)).enumerate() {
        let ai = an[i];
        for (j, v) in row.iter_mut().enumerate() {
            *v = (ai + bn[j] - 2.0 * *v).max(0.0);
        }
    }
    d
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;
    use rand::{Rng, SeedableRng};
    use rand_xoshiro::Xoshiro256PlusPlus;

    fn random(rows: usize, cols: usize, seed: u64) -> Array2<f64> {
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
        Array2::from_shape_fn((rows, cols), |_| rng.gen_range(-1.0..1.0))
    }

    /// A row's product, and its kernel ridge sum, have the same bits
    /// whatever rows come with it: alone, first or last of a batch, or in a
    /// last kernel block of one row. faer's one-row route summed a long
    /// inner dimension in another order, so without the two-row detour in
    /// `matmul_into` the single rows here differ (tried). The fused kernel
    /// also has the bits of the kernel formed whole from `sq_dists`, as the
    /// fit forms it.
    #[test]
    fn a_row_does_not_depend_on_the_rows_around_it() {
        let same = |a: ArrayView2<f64>, b: ArrayView2<f64>| {
            a.iter()
                .zip(b.iter())
                .all(|(x, y)| x.to_bits() == y.to_bits())
        };
        // Shapes of the serving path: descriptors times fold weights, the
        // PCA, and the kernel block times the dual coefficients.
        for (k, n) in [(200, 6), (200, 10), (5000, 6), (3, 2)] {
            let w = random(k, n, 7);
            let x = random(300, k, 8);
            let whole = matmul(x.view(), w.view());
            for rows in [1, 2, 3, 17, 129, 299] {
                for start in [0, 300 - rows] {
                    let part = x.slice(ndarray::s![start..start + rows, ..]);
                    let p = matmul(part, w.view());
                    let expected = whole.slice(ndarray::s![start..start + rows, ..]);
                    assert!(
                        same(p.view(), expected),
                        "k {k}, n {n}, rows {start}..+{rows}"
                    );
                }
            }
        }
        let (train, dual) = (random(2000, 50, 9), random(2000, 3, 10));
        let norms = row_sq_norms(train.view());
        let x = random(300, 50, 11);
        let mut formed = sq_dists(x.view(), train.view(), Some(&norms));
        formed.mapv_inplace(|d| (-0.02 * d).exp());
        let whole = matmul(formed.view(), dual.view());
        assert!(same(
            rbf_kernel_times(x.view(), train.view(), &norms, 0.02, dual.view()).view(),
            whole.view()
        ));
        for rows in [1, 2, 127, 128, 129, 257] {
            for start in [0, 300 - rows] {
                let part = x.slice(ndarray::s![start..start + rows, ..]);
                let p = rbf_kernel_times(part, train.view(), &norms, 0.02, dual.view());
                let expected = whole.slice(ndarray::s![start..start + rows, ..]);
                assert!(same(p.view(), expected), "kernel rows {start}..+{rows}");
            }
        }
    }

    #[test]
    fn matmul_matches_naive_triple_loop() {
        let a = random(37, 19, 1);
        let b = random(19, 23, 2);
        let c = matmul(a.view(), b.view());
        let naive = a.dot(&b);
        for (x, y) in c.iter().zip(naive.iter()) {
            assert!((x - y).abs() < 1e-12, "{x} vs {y}");
        }
        let ct = matmul_t(a.view(), b.t().as_standard_layout().view());
        for (x, y) in ct.iter().zip(naive.iter()) {
            assert!((x - y).abs() < 1e-12);
        }
    }

    #[test]
    fn eigen_reconstructs_and_matches_a_known_spectrum() {
        // The 2×2 matrix [[2,1],[1,2]] has eigenvalues 1 and 3 (by hand).
        let (vals, vecs) = sym_eigen(array![[2.0, 1.0], [1.0, 2.0]].view()).unwrap();
        assert!((vals[0] - 1.0).abs() < 1e-12 && (vals[1] - 3.0).abs() < 1e-12);
        let r = random(30, 12, 3);
        let s = r.t().dot(&r);
        let (vals, vecs2) = sym_eigen(s.view()).unwrap();
        let recon = vecs2.dot(&Array2::from_diag(&vals)).dot(&vecs2.t());
        for (x, y) in recon.iter().zip(s.iter()) {
            assert!((x - y).abs() < 1e-10);
        }
        assert!(vals.windows(2).into_iter().all(|w| w[0] <= w[1]));
        assert_eq!(vecs.dim(), (2, 2));
    }

    /// Brute-force twin of the blocked path: the kernel from explicit
    /// loops, times C by explicit loops, over more rows than one block and
    /// a ragged last block.
    #[test]
    fn rbf_kernel_times_matches_explicit_loops() {
        let (rows, n, p, m) = (2 * KERNEL_BLOCK_ROWS + 37, 53, 9, 4);
        let a = random(rows, p, 6);
        let b = random(n, p, 7);
        let c = random(n, m, 8);
        let gamma = 0.3;
        let got = rbf_kernel_times(a.view(), b.view(), &row_sq_norms(b.view()), gamma, c.view());
        assert_eq!(got.dim(), (rows, m));
        for i in 0..rows {
            for j in 0..m {
                let brute: f64 = (0..n)
                    .map(|r| {
                        let d: f64 = (0..p).map(|q| (a[[i, q]] - b[[r, q]]).powi(2)).sum();
                        (-gamma * d).exp() * c[[r, j]]
                    })
                    .sum();
                assert!(
                    (got[[i, j]] - brute).abs() < 1e-12,
                    "{i},{j}: {} vs {brute}",
                    got[[i, j]]
                );
            }
        }
        let empty = rbf_kernel_times(
            Array2::zeros((0, p)).view(),
            b.view(),
            &row_sq_norms(b.view()),
            gamma,
            c.view(),
        );
        assert_eq!(empty.dim(), (0, m));
    }

    #[test]
    fn sq_dists_match_brute_force() {
        let a = random(11, 7, 4);
        let b = random(13, 7, 5);
        let d = sq_dists(a.view(), b.view(), None);
        for i in 0..11 {
            for j in 0..13 {
                let brute: f64 = (0..7).map(|c| (a[[i, c]] - b[[j, c]]).powi(2)).sum();
                assert!((d[[i, j]] - brute).abs() < 1e-12);
            }
        }
    }
}
