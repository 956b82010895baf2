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

/// k-nearest-neighbour regression by brute force: the mean target of the
/// `k` training rows nearest in Euclidean distance (ties by row order).
/// Training rows are predicted with themselves included, as scikit-learn's
/// `KNeighborsRegressor.predict` does on its own training set.
pub fn knn_predict(
    grid: &Grid,
    x_train: ArrayView2<f64>,
    y_train: ArrayView2<f64>,
    x_test: ArrayView2<f64>,
) -> GridPredictions {
    let (g, c) = (grid.points.len(), y_train.ncols());
    let predict_rows = |x: ArrayView2<f64>| {
        let mut out = Array3::zeros((g, x.nrows(), c));
        for (i, row) in x.axis_iter(Axis(0)).enumerate() {
            let mut order: Vec<(f64, usize)> = x_train
                .axis_iter(Axis(0))
                .enumerate()
                .map(|(j, t)| ((&t - &row).mapv(|d| d * d).sum(), j))
                .collect();
            order.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
            for (gi, point) in grid.points.iter().enumerate() {
                let Hyper::Knn { k } = *point else {
                    panic!("the reference k-NN model only takes k-NN settings");
                };
                let k = k.min(order.len());
                for ci in 0..c {
                    let sum: f64 = order[..k].iter().map(|&(_, j)| y_train[[j, ci]]).sum();
                    out[[gi, i, ci]] = sum / k as f64;
                }
            }
        }
        out
    };
    GridPredictions {
        test: predict_rows(x_test),
        train: predict_rows(x_train),
    }
}

pub fn knn_grid(ks: &[usize]) -> Grid {
    Grid {
        family: Family::Knn,
        points: ks.iter().map(|&k| Hyper::Knn { k }).collect(),
    }
}

/// A ridge grid from 10⁴ down to 10⁻², simplest (largest penalty) first.
pub fn default_ridge_grid() -> Grid {
    ridge_grid(
        &(0..13)
            .map(|i| 10f64.powf(4.0 - 0.5 * i as f64))
            .collect::<Vec<_>>(),
    )
}

/// Seeded standard-normal-ish noise (a sum of uniforms: Irwin–Hall with 12
/// terms, mean 0, variance 1), enough for tests that need no exact law.
pub fn noise(rows: usize, cols: usize, seed: u64) -> Array2<f64> {
    use rand::{Rng, SeedableRng};
    let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(seed);
    Array2::from_shape_fn((rows, cols), |_| {
        (0..12).map(|_| rng.gen_range(0.0..1.0)).sum::<f64>() - 6.0
    })
}
