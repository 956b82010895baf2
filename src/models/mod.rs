//! Regression model families: ridge, RBF kernel ridge and k-NN regression.
//!
//! Two entry points serve two needs:
//! - [`grid_predict`] fits one family over its whole hyperparameter grid on a
//!   training set and predicts a test set, for several target columns at once
//!   (the real target plus y-randomisation permutations). Kernel ridge
//!   eigendecomposes the kernel matrix once per γ; every α (and every target
//!   column) then costs O(n²).
//! - [`fit_predictor`] fits one hyperparameter setting on several row subsets
//!   at once (the full training set and the K fold-training sets of CV+) and
//!   returns a [`Predictor`] that predicts all of them from one kernel row or
//!   distance row per query.
//!
//! Inputs are standardised descriptors; targets are centred inside the
//! models (unpenalised intercept).

use ndarray::{Array2, Array3, ArrayView2};
use serde::{Deserialize, Serialize};

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
    },
    Neighbours {
        k: usize,
        train: Array2<f64>,
        y: ndarray::Array1<f64>,
        /// n × m membership.
        membership: Array2<bool>,
    },
}

pub fn default_grid(_family: Family, _n_descriptors: usize) -> Grid {
    todo!()
}

pub fn grid_predict(
    _grid: &Grid,
    _x_train: ArrayView2<f64>,
    _y_train: ArrayView2<f64>,
    _x_test: ArrayView2<f64>,
) -> GridPredictions {
    todo!()
}

pub fn fit_predictor(
    _hyper: &Hyper,
    _x: ArrayView2<f64>,
    _y: ndarray::ArrayView1<f64>,
    _membership: ndarray::ArrayView2<bool>,
) -> Predictor {
    todo!()
}

impl Predictor {
    /// B × m predictions for B standardised query rows.
    pub fn predict(&self, _x: ArrayView2<f64>) -> Array2<f64> {
        todo!()
    }
}
