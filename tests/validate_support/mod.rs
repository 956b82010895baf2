//! Small reference models and helpers for the validation tests: ridge
//! regression solved directly, a "predict the training mean" model, and the
//! fixture reader. Written here, independently of `plumbline::models`, so
//! the validation machinery can be checked before and apart from it.
#![allow(dead_code)]

use ndarray::{Array1, Array2, Array3, ArrayView2, Axis};
use plumbline::models::{Family, Grid, GridPredictions, Hyper};

/// The stats reference fixture written by `tests/reference/stats_ref.py`.
pub fn fixture() -> serde_json::Value {
    let text = std::fs::read_to_string("tests/fixtures/stats_reference.json")
        .expect("run tests/reference/stats_ref.py to write the fixture");
    serde_json::from_str(&text).expect("the fixture is JSON")
}

pub fn floats(v: &serde_json::Value) -> Vec<f64> {
    v.as_array()
        .expect("an array")
        .iter()
        .map(|x| x.as_f64().expect("a number"))
        .collect()
}

pub fn matrix(v: &serde_json::Value) -> Array2<f64> {
    let rows: Vec<Vec<f64>> = v.as_array().expect("rows").iter().map(floats).collect();
    let (n, p) = (rows.len(), rows.first().map_or(0, Vec::len));
    Array2::from_shape_vec((n, p), rows.concat()).expect("rectangular")
}

pub fn usizes(v: &serde_json::Value) -> Vec<usize> {
    v.as_array()
        .expect("an array")
        .iter()
        .map(|x| x.as_u64().expect("an integer") as usize)
        .collect()
}

/// Relative-or-absolute closeness: |a − b| ≤ tol · max(1, |b|).
pub fn close(a: f64, b: f64, tol: f64) -> bool {
    (a - b).abs() <= tol * b.abs().max(1.0)
}

pub fn ridge_grid(alphas: &[f64]) -> Grid {
    Grid {
        family: Family::Ridge,
        points: alphas.iter().map(|&alpha| Hyper::Ridge { alpha }).collect(),
    }
}

/// Ridge with an unpenalised intercept, min ‖y − Xw − b‖² + α‖w‖² (the
/// objective of scikit-learn's `Ridge`): centre on the training means, then
/// w = (XcᵀXc + αI)⁻¹Xcᵀyc through one eigendecomposition of XcᵀXc, which
/// serves every α of the grid.
pub fn ridge_predict(
    grid: &Grid,
    x_train: ArrayView2<f64>,
    y_train: ArrayView2<f64>,
    x_test: ArrayView2<f64>,
) -> GridPredictions {
    let x_mean = x_train.mean_axis(Axis(0)).expect("training rows");
    let y_mean = y_train.mean_axis(Axis(0)).expect("training rows");
    let xc = &x_train - &x_mean;
    let yc = &y_train - &y_mean;
    let gram = xc.t().dot(&xc);
    let (values, vectors) = plumbline::linalg::sym_eigen(gram.view()).expect("symmetric");
    let qt_xty = vectors.t().dot(&xc.t().dot(&yc)); // p × c
    let (g, c) = (grid.points.len(), y_train.ncols());
    let mut test = Array3::zeros((g, x_test.nrows(), c));
    let mut train = Array3::zeros((g, x_train.nrows(), c));
    for (gi, point) in grid.points.iter().enumerate() {
        let Hyper::Ridge { alpha } = *point else {
            panic!("the reference ridge model only takes ridge settings");
        };
        let shrink = Array1::from_iter(values.iter().map(|&l| 1.0 / (l + alpha)));
        let w = vectors.dot(&(&qt_xty * &shrink.view().insert_axis(Axis(1))));
        let intercept = &y_mean - &x_mean.dot(&w);
        test.index_axis_mut(Axis(0), gi)
            .assign(&(x_test.dot(&w) + &intercept));
        train
            .index_axis_mut(Axis(0), gi)
            .assign(&(x_train.dot(&w) + &intercept));
    }
    GridPredictions { test, train }
}

/// Predicts every row as the mean of the training targets, whatever the
/// setting: a model with no skill by construction.
pub fn mean_predict(
    grid: &Grid,
    x_train: ArrayView2<f64>,
    y_train: ArrayView2<f64>,
    x_test: ArrayView2<f64>,
) -> GridPredictions {
    let y_mean = y_train.mean_axis(Axis(0)).expect("training rows");
    let (g, c) = (grid.points.len(), y_train.ncols());
    let fill = |m: usize| {
        let mut a = Array3::zeros((g, m, c));
        for mut plane in a.axis_iter_mut(Axis(0)) {
            for mut row in plane.axis_iter_mut(Axis(0)) {
                row.assign(&y_mean);
            }
        }
        a
    };
    GridPredictions {
        test: fill(x_test.nrows()),
        train: fill(x_train.nrows()),
    }
}

/// A progress callback that ignores its reports.
pub fn quiet(_stage: &str, _done: usize, _total: usize) {}
