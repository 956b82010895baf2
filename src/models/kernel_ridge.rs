//! RBF kernel ridge regression: k(a, b) = exp(−γ‖a − b‖²), dual coefficients
//! (K + αI)⁻¹(y − ȳ) and predictions ȳ + k(x, X)·dual (Saunders, Gammerman &
//! Vovk, "Ridge regression learning algorithm in dual variables", ICML
//! 1998). The target is centred by its training mean instead of fitting an
//! intercept, so a constant target costs the kernel nothing.
//!
//! Over a grid, the squared distances are computed once (one GEMM each for
//! train × train and test × train); each γ then needs one kernel and one
//! factorisation of K serving all of its α and all target columns (see
//! `shifted`). Training predictions need no further product:
//! K(K + αI)⁻¹y = y − α(K + αI)⁻¹y, i.e. ŷ = y − α·dual.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2, Axis};

use super::shifted::solve_shifted;
use super::{Error, Predictor};
use crate::linalg;

/// Squared distances between the training rows, with an exact zero
/// diagonal: ‖a‖² + ‖a‖² − 2a·a need not round to zero, and a row's
/// distance to itself must be exactly zero (k(a, a) = 1).
pub(super) fn train_sq_dists(x: ArrayView2<f64>, norms: &Array1<f64>) -> Array2<f64> {
    let mut d = linalg::sq_dists(x, x, Some(norms));
    d.diag_mut().fill(0.0);
    d
}

/// Kernel ridge over consecutive runs of one γ: `runs` holds (γ, its α's),
/// in grid order. Returns the test and train predictions, each
/// rows × (G·c) with grid point `g`'s column `j` at `g·c + j`.
pub(super) fn grid_predict(
    runs: &[(f64, Vec<f64>)],
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
    x_test: ArrayView2<f64>,
) -> Result<(Array2<f64>, Array2<f64>), Error> {
    let (n, c) = y.dim();
    let y_mean = y.mean_axis(Axis(0)).unwrap_or_else(|| Array1::zeros(c));
    let yc = &y - &y_mean.view().insert_axis(Axis(0));
    let norms = linalg::row_sq_norms(x);
    let d_train = train_sq_dists(x, &norms);
    let d_test = linalg::sq_dists(x_test, x, Some(&norms));
    let width: usize = runs.iter().map(|(_, a)| a.len() * c).sum();
    let mut test = Array2::zeros((x_test.nrows(), width));
    let mut train = Array2::zeros((n, width));
    let mut start = 0;
    for (gamma, alphas) in runs {
        let kernel = d_train.mapv(|d| (-gamma * d).exp());
        let dual = solve_shifted(kernel, alphas, yc.view())?;
        let k_test = d_test.mapv(|d| (-gamma * d).exp());
        let block = linalg::matmul(k_test.view(), dual.view());
        let cols = start..start + alphas.len() * c;
        let mut test_block = test.slice_mut(ndarray::s![.., cols.clone()]);
        test_block.assign(&block);
        let mut train_block = train.slice_mut(ndarray::s![.., cols]);
        for (a, alpha) in alphas.iter().enumerate() {
            for j in 0..c {
                let col = a * c + j;
                test_block.column_mut(col).mapv_inplace(|v| v + y_mean[j]);
                let fitted = &y.column(j) - &(dual.column(col).to_owned() * *alpha);
                train_block.column_mut(col).assign(&fitted);
            }
        }
        start += alphas.len() * c;
    }
    Ok((test, train))
}

/// Kernel ridge at one (γ, α) on each member's rows; one kernel matrix over
/// all training rows serves every member.
pub(super) fn fit_members(
    gamma: f64,
    alpha: f64,
    x: ArrayView2<f64>,
    y: ArrayView1<f64>,
    members: &[Vec<usize>],
) -> Result<Predictor, Error> {
    let n = x.nrows();
    let norms = linalg::row_sq_norms(x);
    let kernel = train_sq_dists(x, &norms).mapv(|d| (-gamma * d).exp());
    let mut dual = Array2::zeros((n, members.len()));
    let mut offset = Array1::zeros(members.len());
    for (m, rows) in members.iter().enumerate() {
        let km = principal_submatrix(&kernel, rows);
        let ym = y.select(Axis(0), rows);
        let mean = ym.mean().unwrap_or(0.0);
        let rhs = (ym - mean).insert_axis(Axis(1));
        let coef = solve_shifted(km, &[alpha], rhs.view())?;
        for (r, &i) in rows.iter().enumerate() {
            dual[[i, m]] = coef[[r, 0]];
        }
        offset[m] = mean;
    }
    Ok(Predictor::kernel(gamma, x.to_owned(), dual, offset))
}

/// K[rows, rows], gathered row by row (each source row is contiguous).
fn principal_submatrix(k: &Array2<f64>, rows: &[usize]) -> Array2<f64> {
    let mut out = Vec::with_capacity(rows.len() * rows.len());
    for &i in rows {
        let row = k.row(i);
        out.extend(rows.iter().map(|&j| row[j]));
    }
    Array2::from_shape_vec((rows.len(), rows.len()), out)
        .unwrap_or_else(|_| unreachable!("rows² values were gathered"))
}

/// B × m predictions: one kernel block k(x, X) (B × n) times the n × m
/// dual coefficients, whose zeros outside a member drop its other rows, so
/// one kernel row serves the full model and every fold model.
///
/// The kernel is formed per block of query rows by the fused path
/// [`linalg::rbf_kernel_times`] (each block's kernel rows used while still
/// in cache, blocks shared between the cores whole), not as the whole B × n
/// block followed by one parallel product. The whole-block path had
/// measured faster (33% of the GEMM rate against 14%) while faer's kernels
/// left the vector registers dirty and every `exp` paid for it; with that
/// cleared (`linalg::clear_vector_upper`), `cargo bench --bench compare`
/// on 2026-12-05 gave 27,300 candidates/s and 50% of the GEMM rate for this
/// path, against 12,100 and 25% for the whole block.
pub(super) fn predict(
    gamma: f64,
    train: &Array2<f64>,
    train_norms: &Array1<f64>,
    dual: &Array2<f64>,
    offset: &Array1<f64>,
    x: ArrayView2<f64>,
) -> Array2<f64> {
    let mut out = linalg::rbf_kernel_times(x, train.view(), train_norms, gamma, dual.view());
    out += &offset.view().insert_axis(Axis(0));
    out
}
