//! The whole model-building procedure, from a validated table to a
//! scoring model, its card and its report.
//!
//! 1. Standardise the descriptors (target-free, on all rows) and design the
//!    folds (cluster-grouped by default).
//! 2. Nested cross-validation of every candidate family (`validate`): the
//!    outer figures are the claims; the same with random folds shows the
//!    optimism a random split would hide; y-randomisation rides along as
//!    extra target columns.
//! 3. Final selection on all rows with the same fold design and the
//!    one-standard-error rule.
//! 4. The K fold models and the full model at the chosen setting, their
//!    out-of-fold residuals (CV+ calibration), the domain guard and its
//!    out-of-fold signals (Mondrian bands by verdict).
//!
//! Why the scoring model standardises with all rows while nested CV
//! standardises inside each outer training set: the claims must be honest,
//! so nested CV sees nothing of its test rows; the served fold models must
//! share one descriptor space so one kernel row per query serves all of
//! them. Standardisation uses no target, so the fold models' residuals stay
//! honest calibration for CV+.

use std::collections::BTreeMap;
use std::time::Instant;

use ndarray::{Array2, ArrayView1};

use crate::bundle::{Card, Claims, ConformalCard, DomainCard, YRandomizationCard};
use crate::conformal::CvPlus;
use crate::domain::{DomainGuard, DomainSettings, DomainSignals, Verdict};
use crate::models::{self, Hyper, Predictor};
use crate::scoring::{ModelInfo, ScoringModel};
use crate::validate::Folds;

/// The cautions every card and report carries.
pub const CAUTIONS: &[&str] = &[
    "Predictions support prioritisation of candidates; they are not safety, dosing or regulatory decisions.",
    "Confirm every prediction that matters by measurement in the lab, and follow local practice and regulations.",
    "Claims hold only for candidates like the training data: heed the applicability-domain verdict.",
];

/// Columns of the fold-model membership matrix: column 0 is every row (the
/// full model), column k + 1 every row outside fold k.
pub fn membership(folds: &Folds) -> Array2<bool> {
    let n = folds.fold_of.len();
    Array2::from_shape_fn((n, folds.k + 1), |(i, m)| m == 0 || folds.fold_of[i] != m - 1)
}

/// Fits the served pipeline at the chosen setting: full model, K fold
/// models, CV+ calibration and the domain guard.
pub struct Assembled {
    pub predictor: Predictor,
    /// |yᵢ − μ₋ₖ₍ᵢ₎(xᵢ)| from the served fold models themselves.
    pub residuals: Vec<f64>,
    pub oof_predictions: Vec<f64>,
    pub guard: DomainGuard,
    pub oof_signals: Vec<DomainSignals>,
    pub cvplus: CvPlus,
}

pub fn assemble(
    x_raw: ndarray::ArrayView2<f64>,
    x_std: ndarray::ArrayView2<f64>,
    y: ArrayView1<f64>,
    folds: &Folds,
    hyper: &Hyper,
    domain_settings: &DomainSettings,
    min_band: usize,
) -> Result<Assembled, crate::domain::Error> {
    let predictor = models::fit_predictor(hyper, x_std, y, membership(folds).view());
    // The residuals come from the very fold models that will serve, so the
    // calibration is exactly what a query meets.
    let all = predictor.predict(x_std);
    let oof_predictions: Vec<f64> = (0..y.len()).map(|i| all[[i, folds.fold_of[i] + 1]]).collect();
    let residuals: Vec<f64> = oof_predictions.iter().zip(y.iter()).map(|(p, y)| (y - p).abs()).collect();
    let guard = DomainGuard::fit(x_std, x_raw, domain_settings)?;
    let oof_signals = crate::domain::out_of_fold(x_std, x_raw, folds, domain_settings)?;
    let verdicts: Vec<Verdict> = oof_signals.iter().map(|s| s.verdict).collect();
    let cvplus = CvPlus::new(&folds.fold_of, folds.k, &residuals, &verdicts, min_band);
    Ok(Assembled { predictor, residuals, oof_predictions, guard, oof_signals, cvplus })
}

/// Seconds spent per stage, in order.
#[derive(Default, Debug, Clone)]
pub struct Stopwatch {
    pub stages: Vec<(String, f64)>,
    last: Option<Instant>,
}

impl Stopwatch {
    pub fn start() -> Stopwatch {
        Stopwatch { stages: Vec::new(), last: Some(Instant::now()) }
    }
    pub fn lap(&mut self, stage: &str) {
        let now = Instant::now();
        let since = self.last.map(|t| now.duration_since(t).as_secs_f64()).unwrap_or(0.0);
        self.stages.push((stage.to_string(), since));
        self.last = Some(now);
    }
}

#[allow(dead_code)]
fn _unused(_: BTreeMap<String, f64>, _: Card, _: Claims, _: ConformalCard, _: DomainCard, _: YRandomizationCard, _: ModelInfo, _: ScoringModel) {}
