//! Regression model families: ridge, RBF kernel ridge and k-NN regression.
//!
//! Two entry points serve two needs:
//! - [`grid_predict`] fits one family over its whole hyperparameter grid on a
//!   training set and predicts a test set, for several target columns at once
//!   (the real target plus y-randomisation permutations). Kernel ridge
//!   factorises the kernel matrix once per γ (an orthogonal reduction to
//!   tridiagonal form, the cheaper half of an eigendecomposition); every α
//!   and every target column then costs O(n²).
//! - [`fit_predictor`] fits one hyperparameter setting on several row subsets
//!   at once (the full training set and the K fold-training sets of CV+) and
//!   returns a [`Predictor`] that predicts all of them from one kernel row or
//!   distance row per query.
//!
//! Inputs are standardised descriptors; targets are centred inside the
//! models (unpenalised intercept).
//!
//! Grids are always sorted simplest first (see [`Grid`] for the order and
//! why no separate complexity rank exists). The fixed-signature entry
//! points panic on inputs that break their documented preconditions; the
//! `try_` forms return the same conditions as [`Error`] values.

mod grid;
mod kernel_ridge;
mod knn;
mod ridge;
mod shifted;
#[cfg(test)]
mod tests;

use std::fmt;

use ndarray::{Array2, Array3, ArrayView1, ArrayView2, Axis};
use serde::{Deserialize, Serialize};

pub use grid::{default_grid, parse_grid};

/// A model family.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Family {
    Ridge,
    KernelRidge,
    Knn,
}

impl Family {
    /// Families from simplest to most flexible; `--model auto` prefers the
    /// earliest family within one standard error of the best.
    pub const BY_SIMPLICITY: [Family; 3] = [Family::Ridge, Family::KernelRidge, Family::Knn];

    pub fn name(self) -> &'static str {
        match self {
            Family::Ridge => "ridge",
            Family::KernelRidge => "kernel-ridge",
            Family::Knn => "knn",
        }
    }
}

/// One hyperparameter setting.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "family", rename_all = "kebab-case")]
pub enum Hyper {
    /// Ridge with penalty `alpha` on the coefficients (not the intercept).
    Ridge { alpha: f64 },
    /// Kernel ridge with k(a, b) = exp(−γ‖a − b‖²) and penalty `alpha`.
    KernelRidge { gamma: f64, alpha: f64 },
    /// Mean of the `k` nearest training targets (Euclidean, uniform weights).
    Knn { k: usize },
}

impl Hyper {
    pub fn family(&self) -> Family {
        match self {
            Hyper::Ridge { .. } => Family::Ridge,
            Hyper::KernelRidge { .. } => Family::KernelRidge,
            Hyper::Knn { .. } => Family::Knn,
        }
    }
}

/// A family's hyperparameter grid, ordered from the simplest setting to the
/// most flexible (largest penalty, smallest γ, largest k first), the order
/// the one-standard-error rule needs.
///
/// Invariant: every grid built by [`default_grid`], [`parse_grid`] or
/// [`Grid::new`] is in this order, and [`grid_predict`] refuses one that is
/// not ([`Grid::check`]). The one-standard-error rule (Hastie, Tibshirani &
/// Friedman, *The Elements of Statistical Learning*, 2nd ed., §7.10) then
/// takes the first index within one SE of the best, and no separate
/// complexity rank is needed. Simpler means: ridge, larger α; kernel ridge,
/// smaller γ (a wider, smoother kernel), then larger α within one γ; k-NN,
/// larger k.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Grid {
    pub family: Family,
    pub points: Vec<Hyper>,
}

/// Predictions of a whole grid: `test[[g, i, c]]` is grid point `g`'s
/// prediction of test row `i` for target column `c`; `train` likewise for the
/// training rows (for the train-error curve).
#[derive(Clone, Debug)]
pub struct GridPredictions {
    pub test: Array3<f64>,
    pub train: Array3<f64>,
}

/// A fitted setting over several row subsets ("members") of one training
/// set: column `m` of [`Predictor::predict`] is the model fitted on the rows
/// with `membership[[i, m]] == true`.
#[derive(Clone, Debug, PartialEq)]
pub enum Predictor {
    Linear {
        /// p × m coefficients.
        coef: Array2<f64>,
        /// m intercepts.
        intercept: ndarray::Array1<f64>,
    },
    Kernel {
        gamma: f64,
        /// n × p standardised training rows.
        train: Array2<f64>,
        /// n × m dual coefficients, zero for rows outside a member.
        dual: Array2<f64>,
        /// m target means added back.
        offset: ndarray::Array1<f64>,
        /// The squared norms of `train`'s rows, derived once by
        /// [`Predictor::kernel`] (never stored): every scoring call needs
        /// them, and at 5,000 × 200 they took 280 µs a call against 780 µs
        /// for a single candidate's kernel product (this machine, 2026-12-05).
        train_norms: ndarray::Array1<f64>,
    },
    Neighbours {
        k: usize,
        train: Array2<f64>,
        y: ndarray::Array1<f64>,
        /// n × m membership.
        membership: Array2<bool>,
    },
}

/// Errors of the model layer: bad grids and settings, and inputs that break
/// the preconditions of fitting and prediction.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum Error {
    #[error("{parameter}={value} must be a positive finite number (e.g. 10, 0.1 or 1e-3)")]
    NotPositive {
        parameter: &'static str,
        value: String,
    },
    #[error("k={value} must be a whole number of neighbours of at least 1 (e.g. k=10,5,3)")]
    NotACount { value: String },
    #[error("{parameter}={value} is not a number; write values like 10, 0.1 or 1e-3")]
    NotANumber {
        parameter: &'static str,
        value: String,
    },
    #[error(
        "grid part {part:?} is malformed: expected name=v1,v2,… separated by ';', e.g. {example}"
    )]
    MalformedSpec { part: String, example: &'static str },
    #[error(
        "the {family} grid has no parameter '{parameter}'; it takes {expected}, e.g. {example}"
    )]
    UnknownParameter {
        family: &'static str,
        parameter: String,
        expected: String,
        example: &'static str,
    },
    #[error("the {family} grid needs {parameter}=…, e.g. {example}")]
    MissingParameter {
        family: &'static str,
        parameter: &'static str,
        example: &'static str,
    },
    #[error(
        "{parameter} is given twice in the grid; list all its values once, separated by commas"
    )]
    RepeatedParameter { parameter: &'static str },
    #[error("the setting {setting} is listed twice in the grid; list each value once")]
    DuplicateSetting { setting: Hyper },
    #[error("the {family} grid is empty; give at least one setting")]
    EmptyGrid { family: &'static str },
    #[error("the {family} grid holds a setting of another family: {setting}")]
    WrongFamily {
        family: &'static str,
        setting: Hyper,
    },
    #[error(
        "grid point {index} ({setting}) is simpler than the one before it ({previous}); \
         build grids with Grid::new, default_grid or parse_grid, which sort them simplest first"
    )]
    NotInSimplicityOrder {
        index: usize,
        setting: Hyper,
        previous: Hyper,
    },
    #[error("{what} is {found} but must be {expected}")]
    Shape {
        what: &'static str,
        expected: String,
        found: String,
    },
    #[error(
        "{what} holds {value} at row {row}, column {column}; reject or drop incomplete rows before fitting"
    )]
    NonFinite {
        what: &'static str,
        row: usize,
        column: usize,
        value: f64,
    },
    #[error("no training rows: a model needs at least one")]
    EmptyTrainingSet,
    #[error(
        "member {member} has no training rows: every membership column needs at least one true"
    )]
    EmptyMember { member: usize },
    #[error("{0}; the descriptors may be degenerate or badly scaled: standardise them first")]
    Linalg(#[from] crate::linalg::Error),
}

impl fmt::Display for Hyper {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Hyper::Ridge { alpha } => write!(f, "ridge alpha={alpha}"),
            Hyper::KernelRidge { gamma, alpha } => {
                write!(f, "kernel-ridge gamma={gamma} alpha={alpha}")
            }
            Hyper::Knn { k } => write!(f, "knn k={k}"),
        }
    }
}

/// The first non-finite entry of `a`, as an error naming `what`.
fn check_finite(what: &'static str, a: ArrayView2<f64>) -> Result<(), Error> {
    match a.indexed_iter().find(|(_, v)| !v.is_finite()) {
        Some(((row, column), &value)) => Err(Error::NonFinite {
            what,
            row,
            column,
            value,
        }),
        None => Ok(()),
    }
}

fn check_len(what: &'static str, found: usize, expected: usize, unit: &str) -> Result<(), Error> {
    if found == expected {
        Ok(())
    } else {
        Err(Error::Shape {
            what,
            expected: format!("{expected} {unit}"),
            found: format!("{found} {unit}"),
        })
    }
}

/// [`grid_predict`], with its preconditions reported as errors: a valid
/// grid ([`Grid::check`]), at least one training row, `y_train` with one row
/// per training row, `x_test` with the training rows' width, and every value
/// finite.
pub fn try_grid_predict(
    grid: &Grid,
    x_train: ArrayView2<f64>,
    y_train: ArrayView2<f64>,
    x_test: ArrayView2<f64>,
) -> Result<GridPredictions, Error> {
    grid.check()?;
    if x_train.nrows() == 0 {
        return Err(Error::EmptyTrainingSet);
    }
    check_len(
        "the number of target rows",
        y_train.nrows(),
        x_train.nrows(),
        "rows",
    )?;
    check_len(
        "the test rows' width",
        x_test.ncols(),
        x_train.ncols(),
        "descriptors",
    )?;
    check_finite("x_train", x_train)?;
    check_finite("y_train", y_train)?;
    check_finite("x_test", x_test)?;
    let (test, train) = match grid.family {
        Family::Ridge => {
            let alphas: Vec<f64> = grid
                .points
                .iter()
                .filter_map(|h| match h {
                    Hyper::Ridge { alpha } => Some(*alpha),
                    _ => None,
                })
                .collect();
            let path = ridge::fit_path(x_train, y_train, &alphas)?;
            (path.predict(x_test), path.predict(x_train))
        }
        Family::KernelRidge => {
            kernel_ridge::grid_predict(&gamma_runs(&grid.points), x_train, y_train, x_test)?
        }
        Family::Knn => {
            let ks: Vec<usize> = grid
                .points
                .iter()
                .filter_map(|h| match h {
                    Hyper::Knn { k } => Some(*k),
                    _ => None,
                })
                .collect();
            knn::grid_predict(&ks, x_train, y_train, x_test)
        }
    };
    let g = grid.points.len();
    Ok(GridPredictions {
        test: by_grid_point(test, g, y_train.ncols()),
        train: by_grid_point(train, g, y_train.ncols()),
    })
}

/// Kernel grid points grouped into runs of one γ (contiguous in a sorted
/// grid), each with its α's in grid order.
fn gamma_runs(points: &[Hyper]) -> Vec<(f64, Vec<f64>)> {
    let mut runs: Vec<(f64, Vec<f64>)> = Vec::new();
    for h in points {
        if let Hyper::KernelRidge { gamma, alpha } = *h {
            match runs.last_mut() {
                Some((g, alphas)) if *g == gamma => alphas.push(alpha),
                _ => runs.push((gamma, vec![alpha])),
            }
        }
    }
    runs
}

/// rows × (G·c), grid point `g`'s column `j` at `g·c + j`, as [g, row, j].
fn by_grid_point(flat: Array2<f64>, g: usize, c: usize) -> Array3<f64> {
    let rows = flat.nrows();
    Array3::from_shape_fn((g, rows, c), |(gi, i, j)| flat[[i, gi * c + j]])
}

/// Fits a whole grid on one training set and predicts a test set, for
/// every target column of `y_train` (n × c) at once: `test[[g, i, c]]` and
/// `train[[g, i, c]]`. One factorisation per γ (kernel ridge), one per call
/// (ridge) or one distance matrix (k-NN) serves every grid point and every
/// column. `x_train` and `x_test` must already be standardised.
///
/// # Panics
/// When a precondition of [`try_grid_predict`] fails; grids from
/// [`default_grid`] or [`parse_grid`] and data that passed the data module's
/// checks always meet them.
pub fn grid_predict(
    grid: &Grid,
    x_train: ArrayView2<f64>,
    y_train: ArrayView2<f64>,
    x_test: ArrayView2<f64>,
) -> GridPredictions {
    try_grid_predict(grid, x_train, y_train, x_test).unwrap_or_else(|e| panic!("grid_predict: {e}"))
}

/// [`fit_predictor`], with its preconditions reported as errors: a valid
/// setting, at least one training row, one target and one membership row per
/// training row, no empty member, and every value finite.
pub fn try_fit_predictor(
    hyper: &Hyper,
    x: ArrayView2<f64>,
    y: ArrayView1<f64>,
    membership: ArrayView2<bool>,
) -> Result<Predictor, Error> {
    hyper.check()?;
    if x.nrows() == 0 {
        return Err(Error::EmptyTrainingSet);
    }
    check_len("the number of targets", y.len(), x.nrows(), "rows")?;
    check_len("the membership rows", membership.nrows(), x.nrows(), "rows")?;
    check_finite("x", x)?;
    check_finite("y", y.insert_axis(Axis(1)))?;
    let members = member_rows(membership)?;
    match *hyper {
        Hyper::Ridge { alpha } => ridge::fit_members(alpha, x, y, &members),
        Hyper::KernelRidge { gamma, alpha } => {
            kernel_ridge::fit_members(gamma, alpha, x, y, &members)
        }
        Hyper::Knn { k } => Ok(Predictor::Neighbours {
            k,
            train: x.to_owned(),
            y: y.to_owned(),
            membership: membership.to_owned(),
        }),
    }
}

/// The training rows of each member, ascending.
fn member_rows(membership: ArrayView2<bool>) -> Result<Vec<Vec<usize>>, Error> {
    membership
        .columns()
        .into_iter()
        .enumerate()
        .map(|(member, col)| {
            let rows: Vec<usize> = col
                .iter()
                .enumerate()
                .filter_map(|(i, &b)| b.then_some(i))
                .collect();
            if rows.is_empty() {
                Err(Error::EmptyMember { member })
            } else {
                Ok(rows)
            }
        })
        .collect()
}

/// Fits one setting on several row subsets of one training set at once:
/// column `m` of the predictor's output is the model fitted on the rows
/// where `membership[[i, m]]` is true (e.g. the full set and the K fold
/// training sets of CV+). `x` must already be standardised.
///
/// # Panics
/// When a precondition of [`try_fit_predictor`] fails.
pub fn fit_predictor(
    hyper: &Hyper,
    x: ArrayView2<f64>,
    y: ndarray::ArrayView1<f64>,
    membership: ndarray::ArrayView2<bool>,
) -> Predictor {
    try_fit_predictor(hyper, x, y, membership).unwrap_or_else(|e| panic!("fit_predictor: {e}"))
}

impl Predictor {
    /// A kernel predictor, with its training rows' norms derived.
    pub fn kernel(
        gamma: f64,
        train: Array2<f64>,
        dual: Array2<f64>,
        offset: ndarray::Array1<f64>,
    ) -> Predictor {
        Predictor::Kernel {
            gamma,
            train_norms: crate::linalg::row_sq_norms(train.view()),
            train,
            dual,
            offset,
        }
    }

    /// The number of members (columns of [`Predictor::predict`]).
    pub fn n_members(&self) -> usize {
        match self {
            Predictor::Linear { intercept, .. } => intercept.len(),
            Predictor::Kernel { offset, .. } => offset.len(),
            Predictor::Neighbours { membership, .. } => membership.ncols(),
        }
    }

    /// The number of descriptors a query row must have.
    pub fn n_descriptors(&self) -> usize {
        match self {
            Predictor::Linear { coef, .. } => coef.nrows(),
            Predictor::Kernel { train, .. } | Predictor::Neighbours { train, .. } => train.ncols(),
        }
    }

    /// Checks that the arrays fit together and hold finite values, and the
    /// setting is valid: for a predictor read back from storage.
    pub fn check(&self) -> Result<(), Error> {
        let m = self.n_members();
        match self {
            Predictor::Linear { coef, intercept } => {
                check_len("the coefficient columns", coef.ncols(), m, "members")?;
                check_finite("coef", coef.view())?;
                check_finite("intercept", intercept.view().insert_axis(Axis(1)))
            }
            Predictor::Kernel {
                gamma,
                train,
                dual,
                offset,
                train_norms,
            } => {
                check_len(
                    "the training row norms",
                    train_norms.len(),
                    train.nrows(),
                    "rows",
                )?;
                Hyper::KernelRidge {
                    gamma: *gamma,
                    alpha: 1.0,
                }
                .check()?;
                check_len(
                    "the dual coefficient rows",
                    dual.nrows(),
                    train.nrows(),
                    "rows",
                )?;
                check_len("the dual coefficient columns", dual.ncols(), m, "members")?;
                check_finite("train", train.view())?;
                check_finite("dual", dual.view())?;
                check_finite("offset", offset.view().insert_axis(Axis(1)))
            }
            Predictor::Neighbours {
                k,
                train,
                y,
                membership,
            } => {
                Hyper::Knn { k: *k }.check()?;
                check_len("the number of targets", y.len(), train.nrows(), "rows")?;
                check_len(
                    "the membership rows",
                    membership.nrows(),
                    train.nrows(),
                    "rows",
                )?;
                check_finite("train", train.view())?;
                check_finite("y", y.view().insert_axis(Axis(1)))?;
                member_rows(membership.view()).map(|_| ())
            }
        }
    }

    /// [`Predictor::predict`], refusing rows of the wrong width or with a
    /// non-finite value.
    pub fn try_predict(&self, x: ArrayView2<f64>) -> Result<Array2<f64>, Error> {
        check_len(
            "the query rows' width",
            x.ncols(),
            self.n_descriptors(),
            "descriptors",
        )?;
        check_finite("the query rows", x)?;
        Ok(match self {
            Predictor::Linear { coef, intercept } => ridge::predict(coef, intercept, x),
            Predictor::Kernel {
                gamma,
                train,
                dual,
                offset,
                train_norms,
            } => kernel_ridge::predict(*gamma, train, train_norms, dual, offset, x),
            Predictor::Neighbours {
                k,
                train,
                y,
                membership,
            } => knn::predict(*k, train, y, membership, x),
        })
    }

    /// B × m predictions for B standardised query rows.
    ///
    /// # Panics
    /// When a row has the wrong width or a non-finite value: callers reject
    /// such candidates first (see [`Predictor::try_predict`]).
    pub fn predict(&self, x: ArrayView2<f64>) -> Array2<f64> {
        self.try_predict(x)
            .unwrap_or_else(|e| panic!("Predictor::predict: {e}"))
    }
}
