//! Cross-validation of a whole hyperparameter grid on one fold design, and
//! the one-standard-error rule that picks a setting from it.

use ndarray::{Array2, Array3, ArrayView2, Axis, concatenate, s};
use rayon::prelude::*;

use super::metrics::estimate;
use super::{Error, Estimate, Folds};
use crate::models::{Grid, GridPredictions};

/// A grid predictor: fits every point of `grid` on `(x_train, y_train)`
/// (n × c targets, fitted column by column) and predicts `x_test`, as
/// [`crate::models::grid_predict`] does. A parameter so that tests can pass
/// a small reference model.
pub type GridPredictFn<'a> =
    dyn Fn(&Grid, ArrayView2<f64>, ArrayView2<f64>, ArrayView2<f64>) -> GridPredictions + Sync + 'a;

/// The one-standard-error rule (Hastie, Tibshirani & Friedman, *The
/// Elements of Statistical Learning*, 2nd ed., §7.10): the first index
/// whose mean error is within one standard error of the best mean,
/// `mean ≤ best_mean + se_of_best`. The grid must be ordered from the
/// simplest setting to the most flexible, so the first such index is the
/// simplest model the data cannot tell apart from the best.
///
/// Non-finite means (a setting that could not be fitted) are never chosen;
/// a non-finite SE of the best counts as zero (the best itself is taken).
/// When no mean is finite the answer is 0, the simplest setting; callers
/// that must know check first ([`GridCv::choose`] does).
pub fn one_se_choice(mean_err: &[f64], se_err: &[f64]) -> usize {
    assert_eq!(
        mean_err.len(),
        se_err.len(),
        "one_se_choice: lengths differ"
    );
    let Some(best) = argmin_finite(mean_err) else {
        return 0;
    };
    let se = if se_err[best].is_finite() {
        se_err[best]
    } else {
        0.0
    };
    let threshold = mean_err[best] + se;
    mean_err
        .iter()
        .position(|&m| m.is_finite() && m <= threshold)
        .unwrap_or(best)
}

/// The index of the smallest finite value (the first on ties).
pub fn argmin_finite(values: &[f64]) -> Option<usize> {
    values
        .iter()
        .enumerate()
        .filter(|(_, v)| v.is_finite())
        .fold(None, |best: Option<(usize, f64)>, (i, &v)| match best {
            Some((_, b)) if b <= v => best,
            _ => Some((i, v)),
        })
        .map(|(i, _)| i)
}

/// Cross-validation of a grid: per grid point `g` and target column `c`,
/// mean ± SE over folds of the test and train MSE and of the test R², the
/// pooled out-of-fold predictions, and each fold model's predictions of
/// the extra rows (for the real target, column 0).
#[derive(Clone, Debug)]
pub struct GridCv {
    pub grid: Grid,
    pub folds: Folds,
    /// `test_mse[[g, c]]`.
    pub test_mse: Array2<Estimate>,
    pub train_mse: Array2<Estimate>,
    /// Test R² per fold, averaged (q² per fold, as the outer claims are).
    pub test_r2: Array2<Estimate>,
    /// `oof[[g, i, c]]`: row `i`'s prediction by the model of the fold that
    /// held it out.
    pub oof: Array3<f64>,
    /// `extra[[fold, g, j]]`: fold model's prediction of extra row `j`,
    /// target column 0; empty in the last axis when no extra rows were given.
    pub extra: Array3<f64>,
}

impl GridCv {
    /// The one-SE choice on test MSE for target column `c`; an error when no
    /// grid point gave finite predictions.
    pub fn choose(&self, c: usize) -> Result<usize, Error> {
        let (means, ses) = self.test_mse_column(c);
        if argmin_finite(&means).is_none() {
            return Err(Error::NothingFitted {
                family: self.grid.family.name(),
                column: c,
            });
        }
        Ok(one_se_choice(&means, &ses))
    }

    /// The grid point with the lowest mean test MSE for column `c`: what a
    /// plain (non-nested) grid search would pick, and whose score is
    /// optimistic because it was picked on the same folds it is scored on.
    pub fn best(&self, c: usize) -> Option<usize> {
        argmin_finite(&self.test_mse_column(c).0)
    }

    pub fn test_mse_column(&self, c: usize) -> (Vec<f64>, Vec<f64>) {
        let col = self.test_mse.column(c);
        (
            col.iter().map(|e| e.mean).collect(),
            col.iter().map(|e| e.se).collect(),
        )
    }
}

/// What one fold contributes to a [`GridCv`].
struct FoldOutcome {
    test_rows: Vec<usize>,
    /// [g, i, c] on the fold's test rows.
    test_pred: Array3<f64>,
    /// [g, j] on the extra rows, target column 0.
    extra_pred: Array2<f64>,
    /// [g, c].
    test_mse: Array2<f64>,
    train_mse: Array2<f64>,
    test_r2: Array2<f64>,
}

/// Cross-validates every point of `grid` on `folds` for every column of `y`
/// (n × c). `extra` rows, when given, are predicted by every fold model
/// within the same call (no extra fit). Folds run in parallel on the rayon
/// pool.
pub fn grid_cv(
    grid: &Grid,
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
    folds: &Folds,
    extra: Option<ArrayView2<f64>>,
    predict: &GridPredictFn,
) -> Result<GridCv, Error> {
    let (n, c) = y.dim();
    if x.nrows() != n || folds.fold_of.len() != n {
        return Err(Error::Shape {
            what: format!(
                "x has {} rows, y {n}, the folds {}",
                x.nrows(),
                folds.fold_of.len()
            ),
        });
    }
    if grid.points.is_empty() {
        return Err(Error::EmptyGrid {
            family: grid.family.name(),
        });
    }
    let outcomes: Vec<FoldOutcome> = (0..folds.k)
        .into_par_iter()
        .map(|fold| fold_outcome(grid, x, y, folds, fold, extra, predict))
        .collect::<Result<_, _>>()?;
    let g = grid.points.len();
    let m_extra = extra.map_or(0, |e| e.nrows());
    let mut oof = Array3::from_elem((g, n, c), f64::NAN);
    let mut extra_out = Array3::zeros((folds.k, g, m_extra));
    for (fold, o) in outcomes.iter().enumerate() {
        for (i, &row) in o.test_rows.iter().enumerate() {
            oof.slice_mut(s![.., row, ..])
                .assign(&o.test_pred.slice(s![.., i, ..]));
        }
        extra_out
            .index_axis_mut(Axis(0), fold)
            .assign(&o.extra_pred);
    }
    let over_folds = |pick: fn(&FoldOutcome) -> &Array2<f64>| {
        Array2::from_shape_fn((g, c), |(gi, ci)| {
            estimate(
                &outcomes
                    .iter()
                    .map(|o| pick(o)[[gi, ci]])
                    .collect::<Vec<_>>(),
            )
        })
    };
    Ok(GridCv {
        grid: grid.clone(),
        folds: folds.clone(),
        test_mse: over_folds(|o| &o.test_mse),
        train_mse: over_folds(|o| &o.train_mse),
        test_r2: over_folds(|o| &o.test_r2),
        oof,
        extra: extra_out,
    })
}

fn fold_outcome(
    grid: &Grid,
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
    folds: &Folds,
    fold: usize,
    extra: Option<ArrayView2<f64>>,
    predict: &GridPredictFn,
) -> Result<FoldOutcome, Error> {
    let (train_rows, test_rows) = (folds.train_rows(fold), folds.test_rows(fold));
    if train_rows.is_empty() || test_rows.is_empty() {
        return Err(Error::EmptyFold { fold, k: folds.k });
    }
    let x_train = x.select(Axis(0), &train_rows);
    let y_train = y.select(Axis(0), &train_rows);
    let y_test = y.select(Axis(0), &test_rows);
    let mut x_test = x.select(Axis(0), &test_rows);
    if let Some(e) = extra {
        x_test = concatenate(Axis(0), &[x_test.view(), e.view()]).map_err(|_| Error::Shape {
            what: format!("extra rows have {} columns, x has {}", e.ncols(), x.ncols()),
        })?;
    }
    let p = predict(grid, x_train.view(), y_train.view(), x_test.view());
    let (g, c, m) = (grid.points.len(), y.ncols(), test_rows.len());
    check_shape(grid, &p, (g, x_test.nrows(), c), (g, train_rows.len(), c))?;
    let test_pred = p.test.slice(s![.., ..m, ..]).to_owned();
    let extra_pred = p.test.slice(s![.., m.., 0]).to_owned();
    let mut test_mse = Array2::zeros((g, c));
    let mut train_mse = Array2::zeros((g, c));
    let mut test_r2 = Array2::zeros((g, c));
    for gi in 0..g {
        for ci in 0..c {
            let (yt, pt) = (y_test.column(ci), test_pred.slice(s![gi, .., ci]));
            let fold_metrics = mse_and_r2(yt, pt);
            test_mse[[gi, ci]] = fold_metrics.0;
            test_r2[[gi, ci]] = fold_metrics.1;
            train_mse[[gi, ci]] = mse_and_r2(y_train.column(ci), p.train.slice(s![gi, .., ci])).0;
        }
    }
    warn_unfitted(grid, &test_mse, fold);
    Ok(FoldOutcome {
        test_rows,
        test_pred,
        extra_pred,
        test_mse,
        train_mse,
        test_r2,
    })
}

/// MSE and R² of one column; NaN predictions give NaN (the setting is then
/// never chosen).
fn mse_and_r2(y: ndarray::ArrayView1<f64>, pred: ndarray::ArrayView1<f64>) -> (f64, f64) {
    let n = y.len() as f64;
    let sse: f64 = y
        .iter()
        .zip(pred.iter())
        .map(|(a, b)| (a - b).powi(2))
        .sum();
    let mean = y.sum() / n;
    let sst: f64 = y.iter().map(|v| (v - mean).powi(2)).sum();
    let r2 = if sst > 0.0 { 1.0 - sse / sst } else { f64::NAN };
    let mse = sse / n;
    if mse.is_finite() {
        (mse, r2)
    } else {
        (f64::NAN, f64::NAN)
    }
}

fn check_shape(
    grid: &Grid,
    p: &GridPredictions,
    test: (usize, usize, usize),
    train: (usize, usize, usize),
) -> Result<(), Error> {
    if p.test.dim() != test || p.train.dim() != train {
        return Err(Error::PredictorShape {
            family: grid.family.name(),
            expected: format!("test {test:?}, train {train:?}"),
            found: format!("test {:?}, train {:?}", p.test.dim(), p.train.dim()),
        });
    }
    Ok(())
}

fn warn_unfitted(grid: &Grid, test_mse: &Array2<f64>, fold: usize) {
    for (gi, row) in test_mse.axis_iter(Axis(0)).enumerate() {
        if row.iter().any(|v| !v.is_finite()) {
            tracing::warn!(
                family = grid.family.name(),
                setting = ?grid.points[gi],
                fold,
                "non-finite predictions; this setting will not be chosen"
            );
        }
    }
}
