//! Ridge regression with an unpenalised intercept (Hoerl & Kennard,
//! Technometrics 12, 1970): centre X and y by the training means, then
//! β = (XᵀX + αI)⁻¹Xᵀy and intercept ȳ − x̄ᵀβ.
//!
//! When there are more descriptors than rows the same coefficients come
//! from the n × n dual system, β = Xᵀ(XXᵀ + αI)⁻¹y (push-through identity),
//! so the factorised matrix is always the smaller of the two Gram matrices.
//! Either way one factorisation serves every α and every target column.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2, Axis};

use super::shifted::solve_shifted;
use super::{Error, Predictor};
use crate::linalg;

/// Ridge fitted on one training set for a list of penalties.
pub(super) struct RidgePath {
    pub x_mean: Array1<f64>,
    /// c target means.
    pub y_mean: Array1<f64>,
    /// p × (A·c): penalty `a`'s coefficients for target column `j` in
    /// column `a·c + j`.
    pub coef: Array2<f64>,
}

/// Columns minus their means.
fn centred(a: ArrayView2<f64>) -> (Array2<f64>, Array1<f64>) {
    let mean = a
        .mean_axis(Axis(0))
        .unwrap_or_else(|| Array1::zeros(a.ncols()));
    (&a - &mean.view().insert_axis(Axis(0)), mean)
}

pub(super) fn fit_path(
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
    alphas: &[f64],
) -> Result<RidgePath, Error> {
    let (xc, x_mean) = centred(x);
    let (yc, y_mean) = centred(y);
    let (n, p) = xc.dim();
    let coef = if p <= n {
        let gram = linalg::matmul(xc.t(), xc.view());
        let xty = linalg::matmul(xc.t(), yc.view());
        solve_shifted(gram, alphas, xty.view())?
    } else {
        let gram = linalg::matmul_t(xc.view(), xc.view());
        let dual = solve_shifted(gram, alphas, yc.view())?;
        linalg::matmul(xc.t(), dual.view())
    };
    Ok(RidgePath {
        x_mean,
        y_mean,
        coef,
    })
}

impl RidgePath {
    /// Predictions for the rows of `x`, n × (A·c) in the layout of `coef`.
    pub fn predict(&self, x: ArrayView2<f64>) -> Array2<f64> {
        let xc = &x - &self.x_mean.view().insert_axis(Axis(0));
        let mut out = linalg::matmul(xc.view(), self.coef.view());
        let c = self.y_mean.len();
        for mut row in out.rows_mut() {
            for (j, v) in row.iter_mut().enumerate() {
                *v += self.y_mean[j % c];
            }
        }
        out
    }
}

/// Ridge at one penalty on each member's rows: p × m coefficients and m
/// intercepts.
pub(super) fn fit_members(
    alpha: f64,
    x: ArrayView2<f64>,
    y: ArrayView1<f64>,
    members: &[Vec<usize>],
) -> Result<Predictor, Error> {
    let p = x.ncols();
    let mut coef = Array2::zeros((p, members.len()));
    let mut intercept = Array1::zeros(members.len());
    for (m, rows) in members.iter().enumerate() {
        let xm = x.select(Axis(0), rows);
        let ym = y.select(Axis(0), rows).insert_axis(Axis(1));
        let path = fit_path(xm.view(), ym.view(), &[alpha])?;
        let beta = path.coef.column(0);
        coef.column_mut(m).assign(&beta);
        intercept[m] = path.y_mean[0] - path.x_mean.dot(&beta);
    }
    Ok(Predictor::Linear { coef, intercept })
}

/// B × m predictions of a fitted linear predictor.
pub(super) fn predict(
    coef: &Array2<f64>,
    intercept: &Array1<f64>,
    x: ArrayView2<f64>,
) -> Array2<f64> {
    let mut out = linalg::matmul(x, coef.view());
    out += &intercept.view().insert_axis(Axis(0));
    out
}
