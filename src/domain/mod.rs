//! The applicability-domain guard: how far a candidate lies from the
//! training data, measured by several signals and summed up in a verdict.

use serde::{Deserialize, Serialize};

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

/// The fitted guard (placeholder until the domain module lands).
#[derive(Clone, Debug)]
pub struct DomainGuard {}
