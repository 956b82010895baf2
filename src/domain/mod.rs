//! The applicability-domain guard: how far a candidate lies from the
//! training data, measured by several signals and summed up in a verdict.
//!
//! # Signals
//! All but the range check are measured in the PCA space of the
//! standardised descriptors (`space::pca`), with p kept components fitted
//! on the n training rows.
//! - **k-NN distance** d: mean Euclidean distance to the k nearest training
//!   points (a kiddo k-d tree over the scores, as wide as the kept
//!   components).
//! - **Typicality** p = (1 + #{i: Dᵢ ≥ d})/(n + 1), where Dᵢ is training row
//!   i's mean distance to its k nearest *other* training rows (left out by
//!   index, so duplicate rows are neighbours at distance 0): the conformal
//!   p-value of d. A training point typically gets a large p; p is never
//!   below 1/(n + 1).
//! - **Z-rule**: d beyond D̄ + Z·σ, with D̄ and σ the mean and the standard
//!   deviation (n − 1 denominator) of the Dᵢ (Tropsha, Mol. Inf. 2010).
//! - **Leverage** h = 1/n + Σⱼ tⱼ²/((n − 1)λⱼ) on the scores t, λⱼ the
//!   variance of component j: the hat-matrix diagonal of the design
//!   [1, scores]. Warning level h* = 3(p + 1)/n (Gramatica, QSAR Comb. Sci.
//!   2007); when h* ≥ 1 it is meaningless, recorded as such and not used.
//! - **PCA residual** Q: squared norm of the part of the standardised row
//!   that the kept components do not explain, against the 95% and 99%
//!   quantiles of the training rows' Q (common practice). The training Q are
//!   in-sample, so new points exceed these limits more often than 5% and 1%:
//!   measured out-of-fold on the diabetes data (442 rows, 5 folds), 5.5% of
//!   rows exceeded the 95% limit and 2.3% the 99% limit. When the components
//!   explain all training variance, Q is not used.
//! - **Range**: each descriptor against its training minimum and maximum,
//!   in raw units; every violation is listed with its value, min and max.
//!
//! # Verdict rules
//! - **outside** if typicality < `typicality_outside` (0.01), or Q is above
//!   the `residual_outside_quantile` (0.99) limit;
//! - otherwise **border** if the k-NN distance is beyond the Z-rule
//!   threshold, typicality < `typicality_border` (0.05), leverage > h*
//!   (when meaningful), Q is above the `residual_border_quantile` (0.95)
//!   limit, or any descriptor is outside its training range;
//! - otherwise **inside**.
//!
//! The notes of a verdict say in words every rule that fired.
//!
//! # Calibration
//! [`out_of_fold`] measures each training row against a guard fitted
//! without its fold, exactly as a query is measured against the full set,
//! so residual size can be related to domain signals honestly and the
//! conformal bands (Mondrian by verdict) are calibrated on verdicts that
//! new candidates will actually get.

mod guard;
mod knn;
mod rules;
mod settings;

use serde::{Deserialize, Serialize};

pub use guard::{
    DomainGuard, DomainState, DomainThresholds, leverage, out_of_fold, quantile, typicality,
};
pub use knn::{NeighbourIndex, Point, ScanScratch, TREE_DIM, pad};
pub use settings::DomainSettings;

/// The domain verdict of one candidate.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Verdict {
    Inside,
    Border,
    Outside,
}

impl Verdict {
    pub const ALL: [Verdict; 3] = [Verdict::Inside, Verdict::Border, Verdict::Outside];
    pub fn name(self) -> &'static str {
        match self {
            Verdict::Inside => "inside",
            Verdict::Border => "border",
            Verdict::Outside => "outside",
        }
    }
}

/// A descriptor outside the training range.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct OutOfRange {
    pub descriptor: usize,
    pub value: f64,
    pub min: f64,
    pub max: f64,
}

/// Every domain signal of one candidate, and the verdict they give.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct DomainSignals {
    pub knn_distance: f64,
    pub typicality: f64,
    pub beyond_z_threshold: bool,
    pub leverage: f64,
    pub pca_residual: f64,
    pub out_of_range: Vec<OutOfRange>,
    pub verdict: Verdict,
    /// Why the verdict is what it is.
    pub notes: Vec<String>,
}

/// Errors of fitting, calibrating or rebuilding a domain guard.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum Error {
    #[error("domain setting {name} = {value} is invalid: expected {expected}")]
    Setting {
        name: &'static str,
        value: String,
        expected: &'static str,
    },
    #[error(
        "the domain guard needs at least {needed} training rows (k = {k} neighbours plus the row \
         itself), got {rows}; add rows or lower domain.k"
    )]
    TooFewRows {
        rows: usize,
        needed: usize,
        k: usize,
    },
    #[error(
        "standardised descriptors are {standardised:?} (rows, columns) but raw descriptors are \
         {raw:?}; pass the same rows in both"
    )]
    ShapeMismatch {
        standardised: (usize, usize),
        raw: (usize, usize),
    },
    #[error(
        "the {matrix} descriptors have a non-finite value {value} at row {row}, column {column}; \
         drop or fix incomplete rows first"
    )]
    NonFinite {
        matrix: &'static str,
        row: usize,
        column: usize,
        value: f64,
    },
    #[error("the fold design assigns {assigned} rows but there are {rows}")]
    FoldDesign { rows: usize, assigned: usize },
    #[error("row {row} is assigned to fold {fold}, but there are only {k} folds")]
    FoldIndex { row: usize, fold: usize, k: usize },
    #[error("the domain guard of fold {fold} (fitted without that fold's rows) failed: {source}")]
    Fold { fold: usize, source: Box<Error> },
    #[error(
        "stored domain guard is inconsistent: {problem}; the model file is damaged or from another version"
    )]
    State { problem: String },
    #[error(transparent)]
    Pca(#[from] crate::space::pca::Error),
    #[error(transparent)]
    Tree(#[from] knn::TreeError),
}
