//! Honest validation: fold designs, nested cross-validation with the
//! one-standard-error rule, metrics and y-randomisation.
//!
//! # Layout
//! - `folds`: random, cluster-grouped (k-means), group-column and time-order
//!   folds, and [`FoldDesign`], which splits any subset of rows the same way
//!   (the inner level reuses the outer rows' cluster or group labels).
//! - `metrics`: MSE, RMSE, MAE, R², Pearson, Spearman, and mean ± SE over folds.
//! - `search`: cross-validation of a whole grid and the one-SE rule.
//! - `nested`: nested CV per family, the family choice, the random-split
//!   comparison, y-randomisation in the same pass, the final selection.
//! - `yrand`: the permuted targets and the permutation p-value.

mod folds;
mod metrics;
mod nested;
mod search;
mod yrand;

use serde::{Deserialize, Serialize};

pub use folds::{FoldDesign, default_n_clusters, derive_seed};
pub use metrics::{MetricEstimates, average_ranks, estimate, metrics, pearson, spearman};
pub use nested::{
    FamilyNested, FinalSelection, NestedSettings, OuterFold, Progress, Validation, validate,
    validate_with_models,
};
pub use search::{GridCv, GridPredictFn, argmin_finite, grid_cv, one_se_choice};
pub use yrand::{YRandomization, permutation_p_value, permuted_targets};

/// A K-fold design: `fold_of[i]` is the test fold of row `i`.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Folds {
    pub k: usize,
    pub fold_of: Vec<usize>,
}

impl Folds {
    pub fn test_rows(&self, fold: usize) -> Vec<usize> {
        (0..self.fold_of.len())
            .filter(|&i| self.fold_of[i] == fold)
            .collect()
    }
    pub fn train_rows(&self, fold: usize) -> Vec<usize> {
        (0..self.fold_of.len())
            .filter(|&i| self.fold_of[i] != fold)
            .collect()
    }
}

/// Regression metrics of one set of predictions.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Metrics {
    pub mse: f64,
    pub rmse: f64,
    pub mae: f64,
    /// 1 − SSE/SST with SST about the observed mean (q² when out-of-fold).
    pub r2: f64,
    pub pearson: f64,
    pub spearman: f64,
}

/// A metric as mean ± standard error over outer folds.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Estimate {
    pub mean: f64,
    pub se: f64,
}

/// Errors of validation: fold designs that cannot be made, and grid
/// predictors that misbehave.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum Error {
    #[error("{k} folds requested; cross-validation needs at least 2")]
    TooFewFolds { k: usize },
    #[error("{k} folds requested for {n} rows; use at most {n} folds, or add rows")]
    MoreFoldsThanRows { k: usize, n: usize },
    #[error(
        "only {groups} {what} for {folds} folds: whole {what} go to one fold, so at least \
         as many as folds are needed; use fewer folds{}",
        if *what == "clusters" { " or more clusters" } else { " or a finer group column" }
    )]
    TooFewGroups {
        groups: usize,
        folds: usize,
        what: &'static str,
    },
    #[error("{clusters} clusters requested for {n} rows; use at most {n}")]
    MoreClustersThanRows { clusters: usize, n: usize },
    #[error(
        "cannot cut the rows into {folds} time blocks without splitting equal times \
         ({distinct} distinct times); use fewer folds or a finer time column"
    )]
    TooFewDistinctTimes { distinct: usize, folds: usize },
    #[error("the inner folds of outer fold {outer_fold} cannot be made: {source}")]
    InnerFolds {
        outer_fold: usize,
        source: Box<Error>,
    },
    #[error("k-means clustering failed: {message}; try another seed or --split random")]
    KMeans { message: String },
    #[error("inconsistent shapes: {what}")]
    Shape { what: String },
    #[error("non-finite value in {what} at row {row}; the table reader should have caught it")]
    NonFiniteInput { what: &'static str, row: usize },
    #[error("no model family to validate; give at least one grid")]
    NoFamilies,
    #[error("the {family} grid is empty; give it at least one setting")]
    EmptyGrid { family: &'static str },
    #[error("fold {fold} of {k} has no test or no training rows; use fewer folds")]
    EmptyFold { fold: usize, k: usize },
    #[error("the {family} grid predictor returned {found}, expected {expected}")]
    PredictorShape {
        family: &'static str,
        expected: String,
        found: String,
    },
    #[error(
        "no {family} setting gave finite predictions (target column {column}); \
         check the grid for extreme values"
    )]
    NothingFitted { family: &'static str, column: usize },
    #[error(
        "{family} setting {setting} gave non-finite predictions in the {stage}; \
         narrow the grid away from that setting"
    )]
    NonFinitePredictions {
        family: &'static str,
        setting: String,
        stage: String,
    },
}
