//! Honest validation: fold designs, nested cross-validation with the
//! one-standard-error rule, metrics and y-randomisation.

use serde::{Deserialize, Serialize};

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
