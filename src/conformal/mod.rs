//! CV+ prediction intervals (Barber, Candès, Ramdas & Tibshirani, Ann.
//! Statist. 2021) from the K fold models and their out-of-fold residuals,
//! with Mondrian bands by domain verdict.
//!
//! # CV+
//! Row i of the n calibration rows was predicted out-of-fold by the model
//! μ₋ₖ₍ᵢ₎ fitted without its fold; Rᵢ = |yᵢ − μ₋ₖ₍ᵢ₎(xᵢ)|. For a candidate x
//! and α = 1 − confidence:
//! - lower = the ⌊α(n + 1)⌋-th smallest of μ₋ₖ₍ᵢ₎(x) − Rᵢ,
//! - upper = the ⌈(1 − α)(n + 1)⌉-th smallest of μ₋ₖ₍ᵢ₎(x) + Rᵢ.
//!
//! A rank outside 1..n means that side is unbounded at that confidence
//! (too few calibration rows) and the interval says so with `None`: it is
//! never clamped. Theory guarantees coverage of at least 1 − 2α minus a
//! small term; in practice it is close to 1 − α.
//!
//! Because μ₋ₖ(x) takes only K values, each fold's residuals are kept
//! sorted once, shared by every candidate, and a rank of the union of the K
//! shifted arrays is found in O(K² log n) reads (`select`), not O(n).
//!
//! # Mondrian bands
//! Calibration rows are also grouped by their out-of-fold domain verdict
//! (Vovk et al., *Algorithmic Learning in a Random World*, 2005, on
//! Mondrian conformal prediction): a candidate is calibrated on the rows of
//! its own verdict when that band has at least `min_band` rows AND enough
//! rows for both ranks to be bounded at the requested confidence
//! (⌊α(n_band + 1)⌋ ≥ 1, i.e. n_band ≥ 1/α − 1); otherwise on all rows
//! (pooled). `Interval::calibration` says which.

mod select;

use ndarray::ArrayView2;
use serde::{Deserialize, Serialize};

use crate::domain::Verdict;
use select::{Shifted, rank_of_union};

/// A band needs at least this many rows to calibrate on its own, unless
/// the caller says otherwise (common practice: enough that the 95% ranks
/// are bounded with room to spare).
pub const DEFAULT_MIN_BAND: usize = 50;

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

/// Errors of building CV+ calibration or measuring coverage.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum Error {
    #[error("CV+ needs at least one fold, got k = 0")]
    NoFolds,
    #[error("CV+ needs at least one calibration residual, got none")]
    NoResiduals,
    #[error("{what} has {len} entries but there are {expected} rows; pass one per row")]
    Length {
        what: &'static str,
        len: usize,
        expected: usize,
    },
    #[error("row {row} is assigned to fold {fold}, but there are only {k} folds")]
    FoldIndex { row: usize, fold: usize, k: usize },
    #[error("residual {value} of row {row} is not a finite absolute error (|y − ŷ| ≥ 0)")]
    BadResidual { row: usize, value: f64 },
    #[error("confidence {value} is outside [0.5, 0.99]; ask for e.g. 0.8 or 0.9")]
    Confidence { value: f64 },
    #[error("row {row} has {len} fold predictions, but the calibration has {k} fold models")]
    FoldPredictions { row: usize, len: usize, k: usize },
}

/// Checks a confidence a caller asked for: CV+ is offered on [0.5, 0.99].
pub fn check_confidence(confidence: f64) -> Result<(), Error> {
    if (0.5..=0.99).contains(&confidence) {
        Ok(())
    } else {
        Err(Error::Confidence { value: confidence })
    }
}

/// The CV+ ranks (1-based) for n calibration rows at a confidence:
/// (⌊α(n + 1)⌋, ⌈(1 − α)(n + 1)⌉) with α = 1 − confidence, each `None`
/// when outside 1..=n (unbounded side). Integer arithmetic: α(n + 1) is
/// rounded to 1e-9 before the floor, so a confidence like 0.9 = 1 − 0.1
/// that f64 cannot hold exactly still gives the exact rank at boundary
/// cases (n = 9: α(n + 1) = 1), and ⌈(n + 1) − a⌉ = (n + 1) − ⌊a⌋.
/// A confidence outside (0, 1) has no bounded side.
pub fn ranks(n: usize, confidence: f64) -> (Option<usize>, Option<usize>) {
    if !(confidence > 0.0 && confidence < 1.0) {
        return (None, None);
    }
    let alpha = 1.0 - confidence;
    let scaled = (alpha * (n as f64 + 1.0) * 1e9).round();
    let lower = (scaled / 1e9).floor() as usize;
    let within = |r: usize| (1..=n).contains(&r).then_some(r);
    let upper = (n + 1).checked_sub(lower).and_then(within);
    (within(lower), upper)
}

/// Out-of-fold residuals grouped by fold, each fold's sorted ascending.
#[derive(Clone, Debug, PartialEq)]
struct FoldResiduals {
    by_fold: Vec<Vec<f64>>,
    n: usize,
}

impl FoldResiduals {
    fn new(k: usize, rows: impl Iterator<Item = (usize, f64)>) -> FoldResiduals {
        let mut by_fold = vec![Vec::new(); k];
        let mut n = 0;
        for (fold, r) in rows {
            by_fold[fold].push(r);
            n += 1;
        }
        by_fold.iter_mut().for_each(|f| f.sort_by(f64::total_cmp));
        FoldResiduals { by_fold, n }
    }

    fn interval(&self, fold_predictions: &[f64], confidence: f64) -> (Option<f64>, Option<f64>) {
        let (lower_rank, upper_rank) = ranks(self.n, confidence);
        // The K shifted views live on the stack for the usual K (≤ 16):
        // a batch of candidates allocates nothing here.
        const STACK_FOLDS: usize = 16;
        let side = |minus: bool, rank: Option<usize>| {
            let rank = rank?;
            let k = fold_predictions.len().min(self.by_fold.len());
            if k <= STACK_FOLDS {
                let mut arrays = [Shifted {
                    prediction: 0.0,
                    residuals: &[],
                    minus,
                }; STACK_FOLDS];
                for (slot, (&prediction, residuals)) in arrays
                    .iter_mut()
                    .zip(fold_predictions.iter().zip(&self.by_fold))
                {
                    *slot = Shifted {
                        prediction,
                        residuals,
                        minus,
                    };
                }
                rank_of_union(&arrays[..k], rank)
            } else {
                let arrays: Vec<Shifted<'_>> = fold_predictions
                    .iter()
                    .zip(&self.by_fold)
                    .map(|(&prediction, residuals)| Shifted {
                        prediction,
                        residuals,
                        minus,
                    })
                    .collect();
                rank_of_union(&arrays, rank)
            }
        };
        (side(true, lower_rank), side(false, upper_rank))
    }
}

/// CV+ calibration as plain data: what a model file stores.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CvPlusState {
    /// Number of folds (fold models).
    pub k: usize,
    pub min_band: usize,
    /// Fold of each calibration row.
    pub fold_of: Vec<usize>,
    /// Out-of-fold absolute residuals |yᵢ − μ₋ₖ₍ᵢ₎(xᵢ)|.
    pub residuals: Vec<f64>,
    /// Out-of-fold domain verdict of each row.
    pub verdicts: Vec<Verdict>,
}

/// Coverage of intervals at one nominal confidence.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Coverage {
    pub nominal: f64,
    /// Rows whose observed value lay inside its interval.
    pub covered: usize,
    /// Rows evaluated.
    pub n: usize,
    /// covered / n (NaN when n = 0).
    pub empirical: f64,
    /// Rows whose interval had an unbounded side.
    pub unbounded: usize,
}

impl Coverage {
    /// Adds up coverage measured on disjoint sets of rows (e.g. the outer
    /// folds of nested CV), nominal level by nominal level.
    pub fn pool(parts: &[Vec<Coverage>]) -> Vec<Coverage> {
        let Some(first) = parts.first() else {
            return Vec::new();
        };
        first
            .iter()
            .enumerate()
            .map(|(j, c)| {
                let (covered, n, unbounded) = parts
                    .iter()
                    .filter_map(|p| p.get(j))
                    .fold((0, 0, 0), |(a, b, u), x| {
                        (a + x.covered, b + x.n, u + x.unbounded)
                    });
                Coverage {
                    nominal: c.nominal,
                    covered,
                    n,
                    empirical: covered as f64 / n as f64,
                    unbounded,
                }
            })
            .collect()
    }
}

/// CV+ calibration: per-fold sorted residuals, pooled and per verdict band.
#[derive(Clone, Debug, PartialEq)]
pub struct CvPlus {
    state: CvPlusState,
    pooled: FoldResiduals,
    /// In `Verdict::ALL` order.
    bands: [FoldResiduals; 3],
}

fn band_index(v: Verdict) -> usize {
    match v {
        Verdict::Inside => 0,
        Verdict::Border => 1,
        Verdict::Outside => 2,
    }
}

impl CvPlus {
    /// Calibration from the out-of-fold residuals of n rows: `fold_of[i]`
    /// is row i's fold (< k), `residuals[i]` its absolute out-of-fold
    /// error, `verdicts[i]` its out-of-fold domain verdict.
    pub fn new(
        fold_of: &[usize],
        k: usize,
        residuals: &[f64],
        verdicts: &[Verdict],
        min_band: usize,
    ) -> Result<CvPlus, Error> {
        CvPlus::from_state(CvPlusState {
            k,
            min_band,
            fold_of: fold_of.to_vec(),
            residuals: residuals.to_vec(),
            verdicts: verdicts.to_vec(),
        })
    }

    /// Rebuilds the calibration from stored state, refusing an
    /// inconsistent one.
    pub fn from_state(state: CvPlusState) -> Result<CvPlus, Error> {
        check_state(&state)?;
        let rows = || {
            state
                .fold_of
                .iter()
                .copied()
                .zip(state.residuals.iter().copied())
        };
        let pooled = FoldResiduals::new(state.k, rows());
        let bands = Verdict::ALL.map(|v| {
            let of_band = rows()
                .zip(&state.verdicts)
                .filter(|&(_, &w)| w == v)
                .map(|(row, _)| row);
            FoldResiduals::new(state.k, of_band)
        });
        Ok(CvPlus {
            state,
            pooled,
            bands,
        })
    }

    pub fn state(&self) -> &CvPlusState {
        &self.state
    }

    /// Number of fold models the interval expects predictions from.
    pub fn k(&self) -> usize {
        self.state.k
    }

    /// Number of calibration rows.
    pub fn n(&self) -> usize {
        self.pooled.n
    }

    /// Calibration rows per verdict band, in `Verdict::ALL` order.
    pub fn band_sizes(&self) -> Vec<(Verdict, usize)> {
        Verdict::ALL
            .iter()
            .map(|&v| (v, self.bands[band_index(v)].n))
            .collect()
    }

    /// Whether a candidate of this verdict is calibrated on its own band at
    /// this confidence (see the module documentation for the rule).
    pub fn band_used(&self, verdict: Verdict, confidence: f64) -> bool {
        let n = self.bands[band_index(verdict)].n;
        let (lower, upper) = ranks(n, confidence);
        n >= self.state.min_band && lower.is_some() && upper.is_some()
    }

    /// The CV+ interval of one candidate from its K fold-model predictions
    /// (fold order) at a confidence, calibrated on its verdict's band when
    /// that band is usable, else pooled.
    ///
    /// Callers validate the confidence with [`check_confidence`]; any value
    /// outside (0, 1), or a non-finite fold prediction, gives an interval
    /// with both sides unbounded rather than a made-up bound.
    ///
    /// # Panics
    /// If `fold_predictions` does not hold exactly K values: the fold
    /// models and the calibration come from the same fit.
    pub fn interval(
        &self,
        fold_predictions: &[f64],
        confidence: f64,
        verdict: Verdict,
    ) -> Interval {
        assert_eq!(
            fold_predictions.len(),
            self.state.k,
            "CV+ needs one prediction per fold model"
        );
        let (calibration, residuals) = if self.band_used(verdict, confidence) {
            (Calibration::Band(verdict), &self.bands[band_index(verdict)])
        } else {
            (Calibration::Pooled, &self.pooled)
        };
        let (lower, upper) = if fold_predictions.iter().all(|p| p.is_finite()) {
            residuals.interval(fold_predictions, confidence)
        } else {
            (None, None)
        };
        Interval {
            lower,
            upper,
            calibration,
        }
    }

    /// Empirical coverage of this calibration's intervals on evaluation
    /// rows not used to calibrate it: row i has its K fold predictions in
    /// row i of `fold_predictions`, its observed value and its verdict. An
    /// unbounded side covers everything on that side.
    pub fn empirical_coverage(
        &self,
        fold_predictions: ArrayView2<f64>,
        observed: &[f64],
        verdicts: &[Verdict],
        nominal: &[f64],
    ) -> Result<Vec<Coverage>, Error> {
        let rows = fold_predictions.nrows();
        for (what, len) in [("observed", observed.len()), ("verdicts", verdicts.len())] {
            if len != rows {
                return Err(Error::Length {
                    what,
                    len,
                    expected: rows,
                });
            }
        }
        if fold_predictions.ncols() != self.state.k {
            return Err(Error::FoldPredictions {
                row: 0,
                len: fold_predictions.ncols(),
                k: self.state.k,
            });
        }
        nominal.iter().try_for_each(|&c| check_confidence(c))?;
        let mut predictions = vec![0.0; self.state.k];
        Ok(nominal
            .iter()
            .map(|&confidence| {
                let (mut covered, mut unbounded) = (0, 0);
                for (i, row) in fold_predictions.rows().into_iter().enumerate() {
                    predictions.iter_mut().zip(row).for_each(|(p, v)| *p = *v);
                    let iv = self.interval(&predictions, confidence, verdicts[i]);
                    let y = observed[i];
                    covered += usize::from(
                        iv.lower.is_none_or(|l| l <= y) && iv.upper.is_none_or(|u| y <= u),
                    );
                    unbounded += usize::from(iv.lower.is_none() || iv.upper.is_none());
                }
                Coverage {
                    nominal: confidence,
                    covered,
                    n: rows,
                    empirical: covered as f64 / rows as f64,
                    unbounded,
                }
            })
            .collect())
    }
}

fn check_state(s: &CvPlusState) -> Result<(), Error> {
    if s.k == 0 {
        return Err(Error::NoFolds);
    }
    let n = s.fold_of.len();
    if n == 0 {
        return Err(Error::NoResiduals);
    }
    for (what, len) in [
        ("residuals", s.residuals.len()),
        ("verdicts", s.verdicts.len()),
    ] {
        if len != n {
            return Err(Error::Length {
                what,
                len,
                expected: n,
            });
        }
    }
    if let Some((row, &fold)) = s.fold_of.iter().enumerate().find(|(_, f)| **f >= s.k) {
        return Err(Error::FoldIndex { row, fold, k: s.k });
    }
    if let Some((row, &value)) = s
        .residuals
        .iter()
        .enumerate()
        .find(|(_, r)| !(r.is_finite() && **r >= 0.0))
    {
        return Err(Error::BadResidual { row, value });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ranks_at_exact_boundaries() {
        // α(n + 1) exactly an integer, by hand: 0.1·10 = 1, 0.05·20 = 1,
        // 0.2·5 = 1, 0.01·100 = 1, 0.1·20 = 2.
        assert_eq!(ranks(9, 0.9), (Some(1), Some(9)));
        assert_eq!(ranks(19, 0.95), (Some(1), Some(19)));
        assert_eq!(ranks(4, 0.8), (Some(1), Some(4)));
        assert_eq!(ranks(99, 0.99), (Some(1), Some(99)));
        assert_eq!(ranks(19, 0.9), (Some(2), Some(18)));
        // One row fewer and the rank ⌊α(n + 1)⌋ drops to 0: unbounded.
        assert_eq!(ranks(8, 0.9), (None, None));
        assert_eq!(ranks(18, 0.95), (None, None));
        assert_eq!(ranks(98, 0.99), (None, None));
        // Off the boundary: 0.1·201 = 20.1 → 20, and ⌈0.9·201⌉ = ⌈180.9⌉ = 181.
        assert_eq!(ranks(200, 0.9), (Some(20), Some(181)));
        // 0.5·(3 + 1) = 2 → ranks 2 and 2.
        assert_eq!(ranks(3, 0.5), (Some(2), Some(2)));
        assert_eq!(ranks(10, 1.0), (None, None));
        assert_eq!(ranks(10, f64::NAN), (None, None));
    }

    #[test]
    fn bad_calibration_inputs_are_refused() {
        let v = [Verdict::Inside; 3];
        assert_eq!(
            CvPlus::new(&[0, 1, 2], 2, &[0.1, 0.2, 0.3], &v, 1),
            Err(Error::FoldIndex {
                row: 2,
                fold: 2,
                k: 2
            })
        );
        assert!(matches!(
            CvPlus::new(&[0, 1, 0], 2, &[0.1, -0.2, 0.3], &v, 1),
            Err(Error::BadResidual { row: 1, .. })
        ));
        assert!(matches!(
            CvPlus::new(&[0, 1], 2, &[0.1, 0.2, 0.3], &v, 1),
            Err(Error::Length {
                what: "residuals",
                ..
            })
        ));
        assert_eq!(CvPlus::new(&[], 2, &[], &[], 1), Err(Error::NoResiduals));
        assert_eq!(
            check_confidence(0.995),
            Err(Error::Confidence { value: 0.995 })
        );
        assert_eq!(check_confidence(0.9), Ok(()));
    }
}
