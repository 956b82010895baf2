//! CV+ prediction intervals (Barber, Candès, Ramdas & Tibshirani, Ann.
//! Statist. 2021) from the K fold models and their out-of-fold residuals,
//! with Mondrian bands by domain verdict.

use serde::{Deserialize, Serialize};

/// A prediction interval; a `None` side is unbounded at that confidence.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Interval {
    pub lower: Option<f64>,
    pub upper: Option<f64>,
    /// Which residuals calibrated it.
    pub calibration: Calibration,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Calibration {
    /// The band of the candidate's own verdict.
    Band(crate::domain::Verdict),
    /// All residuals: the verdict's band had too few points.
    Pooled,
}

/// CV+ calibration (placeholder until the conformal module lands).
#[derive(Clone, Debug)]
pub struct CvPlus {}
