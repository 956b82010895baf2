//! The fitted domain guard: PCA of the training rows, a k-d tree over their
//! scores, the thresholds every signal is judged against, and the
//! per-descriptor training ranges; plus its out-of-fold calibration.

use std::ops::Range;
use std::sync::Arc;

use ndarray::{Array2, ArrayView1, ArrayView2, Axis};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use super::knn::{self, NeighbourIndex, ScanScratch};
use super::rules::{self, Measured};
use super::{DomainSettings, DomainSignals, Error, OutOfRange};
use crate::space::pca::Pca;
use crate::validate::Folds;

/// Batches smaller than this are assessed on the calling thread.
const PARALLEL_ROWS: usize = 16;

/// The limits a guard judges candidates against, all taken from its
/// training rows.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct DomainThresholds {
    /// D̄: mean of the training leave-one-out k-NN distances.
    pub knn_mean: f64,
    /// σ: their standard deviation with the n − 1 denominator.
    pub knn_sd: f64,
    /// D̄ + Z·σ (Tropsha's Z-rule).
    pub z_threshold: f64,
    /// h* = leverage_factor·(p + 1)/n.
    pub leverage_warning: f64,
    /// False when h* ≥ 1: no leverage can exceed it meaningfully, so it is
    /// not used.
    pub leverage_meaningful: bool,
    /// The `residual_border_quantile` of the training Q values.
    pub residual_border_limit: f64,
    /// The `residual_outside_quantile` of the training Q values.
    pub residual_outside_limit: f64,
    /// False when the kept components explain all the training variance
    /// (training Q is zero up to rounding): any limit would be rounding
    /// noise, so Q is not used.
    pub residual_meaningful: bool,
}

/// Everything a guard is, as plain data: what a model file stores.
/// [`DomainGuard::from_state`] validates it and rebuilds the tree.
#[derive(Clone, Debug, PartialEq)]
pub struct DomainState {
    pub settings: DomainSettings,
    pub pca: Pca,
    /// PCA scores of the training rows (n × p), row i = tree item i.
    pub training_scores: Array2<f64>,
    /// Leave-one-out k-NN distances of the training rows, ascending.
    pub loo_distances: Vec<f64>,
    pub thresholds: DomainThresholds,
    /// Per-descriptor training minimum and maximum in raw units.
    pub range_min: Vec<f64>,
    pub range_max: Vec<f64>,
    /// Number of training rows.
    pub n: usize,
}

/// The fitted applicability-domain guard.
#[derive(Clone, Debug)]
pub struct DomainGuard {
    state: DomainState,
    index: Arc<NeighbourIndex>,
}

impl DomainGuard {
    /// Fits the guard on training rows given both standardised (`x_std`,
    /// for PCA and distances) and raw (`x_raw`, for the ranges, in the
    /// units people read).
    pub fn fit(
        x_std: ArrayView2<f64>,
        x_raw: ArrayView2<f64>,
        settings: &DomainSettings,
    ) -> Result<DomainGuard, Error> {
        settings.check()?;
        check_training(x_std, x_raw, settings.k)?;
        let pca = Pca::fit(x_std, settings.variance_fraction, settings.max_components)?;
        let (scores, residuals) = pca.scores_and_residuals(x_std);
        let index = NeighbourIndex::build(scores.view())?;
        let mut loo = leave_one_out_distances(&index, scores.view(), settings.k)?;
        loo.sort_by(f64::total_cmp);
        let thresholds = thresholds(&pca, &loo, residuals.to_vec(), settings);
        let (range_min, range_max) = ranges(x_raw);
        let state = DomainState {
            settings: settings.clone(),
            pca,
            training_scores: scores,
            loo_distances: loo,
            thresholds,
            range_min,
            range_max,
            n: x_std.nrows(),
        };
        Ok(DomainGuard {
            state,
            index: Arc::new(index),
        })
    }

    /// Measures and judges a batch of candidates: one PCA projection (a
    /// GEMM) for the batch, one neighbour search per row.
    ///
    /// # Panics
    /// If either array's column count differs from the training
    /// descriptors, or the two arrays differ in rows: a caller's contract,
    /// checked against [`DomainGuard::n_descriptors`] before scoring.
    /// A row with a non-finite value gets the verdict `outside` with NaN
    /// signals and a note saying so.
    pub fn assess(&self, x_std: ArrayView2<f64>, x_raw: ArrayView2<f64>) -> Vec<DomainSignals> {
        let d = self.n_descriptors();
        assert_eq!(
            x_std.ncols(),
            d,
            "assess: standardised rows have the wrong length"
        );
        assert_eq!(x_raw.ncols(), d, "assess: raw rows have the wrong length");
        assert_eq!(x_std.nrows(), x_raw.nrows(), "assess: row counts differ");
        let (scores, residuals) = self.state.pca.scores_and_residuals(x_std);
        // The rows in `rows`: one neighbour search for all their points
        // (the scan shares each read of the training points between
        // several queries), then each row judged.
        let judge_rows = |rows: Range<usize>, scratch: &mut ScanScratch| -> Vec<DomainSignals> {
            let points: Vec<Option<knn::Point>> = rows
                .clone()
                .map(|i| {
                    let finite = x_std
                        .row(i)
                        .iter()
                        .chain(x_raw.row(i))
                        .all(|v| v.is_finite());
                    knn::pad(scores.row(i)).ok().filter(|_| finite)
                })
                .collect();
            let placed: Vec<knn::Point> = points.iter().flatten().copied().collect();
            let distances = self
                .index
                .fast_mean_distances(&placed, self.state.settings.k, scratch);
            let mut next = 0;
            rows.zip(&points)
                .map(|(i, point)| match point {
                    Some(_) => {
                        // One distance per placed point, in their order.
                        let d = distances[next];
                        next += 1;
                        self.judge(d, scores.row(i), residuals[i], x_raw.row(i))
                    }
                    None => rules::unplaceable(),
                })
                .collect()
        };
        // Rows are independent neighbour scans of a few microseconds each:
        // a batch is shared between the cores in chunks, each worker
        // reusing one scratch buffer; a handful of rows is not worth a
        // thread hand-off.
        let n = x_std.nrows();
        if n < PARALLEL_ROWS {
            return judge_rows(0..n, &mut ScanScratch::default());
        }
        let chunk = PARALLEL_ROWS / 2;
        let judged: Vec<Vec<DomainSignals>> = (0..n.div_ceil(chunk))
            .into_par_iter()
            .map_init(ScanScratch::default, |scratch, c| {
                judge_rows(c * chunk..n.min((c + 1) * chunk), scratch)
            })
            .collect();
        judged.into_iter().flatten().collect()
    }

    fn judge(
        &self,
        knn_distance: f64,
        scores: ArrayView1<f64>,
        residual: f64,
        raw: ArrayView1<f64>,
    ) -> DomainSignals {
        let s = &self.state;
        let measured = Measured {
            knn_distance,
            typicality: typicality(&s.loo_distances, knn_distance),
            leverage: leverage(&s.pca, s.n, scores),
            pca_residual: residual,
            out_of_range: out_of_range(raw, &s.range_min, &s.range_max),
        };
        rules::judge(measured, &s.thresholds, &s.settings)
    }

    /// The `k` nearest training rows of one standardised candidate, as
    /// (training row index, Euclidean distance in PCA space), nearest first;
    /// fewer when the training set is smaller, none for a row of the wrong
    /// length or with a non-finite value.
    pub fn neighbours(&self, x_std_row: ArrayView1<f64>, k: usize) -> Vec<(usize, f64)> {
        if x_std_row.len() != self.n_descriptors() || x_std_row.iter().any(|v| !v.is_finite()) {
            return Vec::new();
        }
        let row = x_std_row.insert_axis(Axis(0));
        let scores = self.state.pca.scores(row);
        match knn::pad(scores.row(0)) {
            Ok(point) => self.index.nearest(&point, k),
            Err(_) => Vec::new(),
        }
    }

    /// Each training row's leave-one-out k-NN distance, in row order (the
    /// state keeps them sorted).
    pub fn training_loo_distances(&self) -> Vec<f64> {
        let s = &self.state;
        leave_one_out_distances(&self.index, s.training_scores.view(), s.settings.k)
            .unwrap_or_default()
    }

    pub fn n_descriptors(&self) -> usize {
        self.state.pca.n_features()
    }

    pub fn n_training(&self) -> usize {
        self.state.n
    }

    pub fn settings(&self) -> &DomainSettings {
        &self.state.settings
    }

    pub fn thresholds(&self) -> &DomainThresholds {
        &self.state.thresholds
    }

    pub fn pca(&self) -> &Pca {
        &self.state.pca
    }

    pub fn state(&self) -> &DomainState {
        &self.state
    }

    /// Rebuilds a guard from stored state, refusing an inconsistent one.
    pub fn from_state(state: DomainState) -> Result<DomainGuard, Error> {
        check_state(&state)?;
        let index = NeighbourIndex::build(state.training_scores.view())?;
        Ok(DomainGuard {
            state,
            index: Arc::new(index),
        })
    }
}

/// Out-of-fold domain signals: for each fold, a guard (PCA, tree,
/// thresholds, ranges) is fitted on the other folds' rows and the fold's
/// rows are assessed against it exactly as a query is assessed against the
/// full training set. Row i of the answer belongs to row i of the input.
/// The standardisation is the caller's (fitted on all rows): its effect on
/// distances is a rescaling shared by every fold, which is why the guard
/// does not refit it.
pub fn out_of_fold(
    x_std: ArrayView2<f64>,
    x_raw: ArrayView2<f64>,
    folds: &Folds,
    settings: &DomainSettings,
) -> Result<Vec<DomainSignals>, Error> {
    settings.check()?;
    check_shapes(x_std, x_raw)?;
    check_folds(folds, x_std.nrows())?;
    let mut signals: Vec<Option<DomainSignals>> = vec![None; x_std.nrows()];
    for fold in 0..folds.k {
        let test = folds.test_rows(fold);
        if test.is_empty() {
            continue;
        }
        let train = folds.train_rows(fold);
        let guard = DomainGuard::fit(
            x_std.select(Axis(0), &train).view(),
            x_raw.select(Axis(0), &train).view(),
            settings,
        )
        .map_err(|source| Error::Fold {
            fold,
            source: Box::new(source),
        })?;
        let assessed = guard.assess(
            x_std.select(Axis(0), &test).view(),
            x_raw.select(Axis(0), &test).view(),
        );
        for (row, s) in test.into_iter().zip(assessed) {
            signals[row] = Some(s);
        }
    }
    // check_folds guarantees every row is in some fold's test rows.
    Ok(signals.into_iter().flatten().collect())
}

/// Typicality p = (1 + #{i: Dᵢ ≥ d})/(n + 1) against the sorted training
/// leave-one-out distances: the conformal p-value of the candidate's k-NN
/// distance (Vovk, Gammerman & Shafer, *Algorithmic Learning in a Random
/// World*, 2005, with the k-NN distance as nonconformity score).
pub fn typicality(sorted_loo: &[f64], distance: f64) -> f64 {
    let n = sorted_loo.len();
    let below = sorted_loo.partition_point(|&d| d < distance);
    (1 + n - below) as f64 / (n + 1) as f64
}

/// Leverage of one score vector: h = 1/n + Σⱼ tⱼ²/((n − 1)λⱼ). This is the
/// hat-matrix diagonal x(XᵀX)⁻¹xᵀ for the design X = [1, T] of the training
/// scores: the score columns are centred and mutually orthogonal with
/// TᵀT = (n − 1)Λ, so (XᵀX)⁻¹ is diagonal.
pub fn leverage(pca: &Pca, n: usize, scores: ArrayView1<f64>) -> f64 {
    let denom = (n - 1) as f64;
    1.0 / n as f64
        + scores
            .iter()
            .zip(pca.eigenvalues.iter())
            .map(|(t, l)| t * t / (denom * l))
            .sum::<f64>()
}

/// The q-quantile with linear interpolation between order statistics
/// (Hyndman & Fan 1996 type 7, numpy's default).
pub fn quantile(sorted: &[f64], q: f64) -> f64 {
    match sorted.len() {
        0 => f64::NAN,
        1 => sorted[0],
        n => {
            let h = (n - 1) as f64 * q.clamp(0.0, 1.0);
            let lo = h.floor() as usize;
            let hi = (lo + 1).min(n - 1);
            sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
        }
    }
}

fn leave_one_out_distances(
    index: &NeighbourIndex,
    scores: ArrayView2<f64>,
    k: usize,
) -> Result<Vec<f64>, Error> {
    scores
        .rows()
        .into_iter()
        .enumerate()
        .map(|(i, row)| Ok(index.leave_one_out_distance(i, &knn::pad(row)?, k)))
        .collect()
}

fn thresholds(
    pca: &Pca,
    sorted_loo: &[f64],
    mut residuals: Vec<f64>,
    s: &DomainSettings,
) -> DomainThresholds {
    let n = sorted_loo.len();
    let knn_mean = sorted_loo.iter().sum::<f64>() / n as f64;
    let ss: f64 = sorted_loo.iter().map(|d| (d - knn_mean).powi(2)).sum();
    let knn_sd = (ss / (n - 1) as f64).sqrt();
    let leverage_warning = s.leverage_factor * (pca.n_components() + 1) as f64 / n as f64;
    residuals.sort_by(f64::total_cmp);
    let unexplained = pca.total_variance - pca.eigenvalues.sum();
    DomainThresholds {
        knn_mean,
        knn_sd,
        z_threshold: knn_mean + s.z * knn_sd,
        leverage_warning,
        leverage_meaningful: leverage_warning < 1.0,
        residual_border_limit: quantile(&residuals, s.residual_border_quantile),
        residual_outside_limit: quantile(&residuals, s.residual_outside_quantile),
        residual_meaningful: unexplained > 1e-9 * pca.total_variance,
    }
}

fn ranges(x_raw: ArrayView2<f64>) -> (Vec<f64>, Vec<f64>) {
    x_raw
        .axis_iter(Axis(1))
        .map(|col| {
            let lo = col.iter().copied().fold(f64::INFINITY, f64::min);
            let hi = col.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            (lo, hi)
        })
        .unzip()
}

fn out_of_range(raw: ArrayView1<f64>, min: &[f64], max: &[f64]) -> Vec<OutOfRange> {
    raw.iter()
        .zip(min.iter().zip(max))
        .enumerate()
        .filter(|(_, (v, (lo, hi)))| *v < *lo || *v > *hi)
        .map(|(descriptor, (&value, (&min, &max)))| OutOfRange {
            descriptor,
            value,
            min,
            max,
        })
        .collect()
}

fn check_shapes(x_std: ArrayView2<f64>, x_raw: ArrayView2<f64>) -> Result<(), Error> {
    if x_std.dim() != x_raw.dim() {
        return Err(Error::ShapeMismatch {
            standardised: x_std.dim(),
            raw: x_raw.dim(),
        });
    }
    Ok(())
}

fn check_training(x_std: ArrayView2<f64>, x_raw: ArrayView2<f64>, k: usize) -> Result<(), Error> {
    check_shapes(x_std, x_raw)?;
    let rows = x_std.nrows();
    if rows < k + 1 {
        return Err(Error::TooFewRows {
            rows,
            needed: k + 1,
            k,
        });
    }
    first_non_finite(x_std, "standardised")?;
    first_non_finite(x_raw, "raw")
}

fn first_non_finite(x: ArrayView2<f64>, matrix: &'static str) -> Result<(), Error> {
    match x.indexed_iter().find(|(_, v)| !v.is_finite()) {
        Some(((row, column), &value)) => Err(Error::NonFinite {
            matrix,
            row,
            column,
            value,
        }),
        None => Ok(()),
    }
}

fn check_folds(folds: &Folds, rows: usize) -> Result<(), Error> {
    if folds.fold_of.len() != rows {
        return Err(Error::FoldDesign {
            rows,
            assigned: folds.fold_of.len(),
        });
    }
    if let Some((row, &fold)) = folds
        .fold_of
        .iter()
        .enumerate()
        .find(|(_, f)| **f >= folds.k)
    {
        return Err(Error::FoldIndex {
            row,
            fold,
            k: folds.k,
        });
    }
    Ok(())
}

fn check_state(s: &DomainState) -> Result<(), Error> {
    let bad = |problem: String| Err(Error::State { problem });
    s.settings.check()?;
    s.pca.check()?;
    let (d, p) = (s.pca.n_features(), s.pca.n_components());
    if s.n != s.pca.n_samples || s.n < s.settings.k + 1 {
        return bad(format!(
            "{} training rows, PCA fitted on {}, k = {}",
            s.n, s.pca.n_samples, s.settings.k
        ));
    }
    if s.training_scores.dim() != (s.n, p) {
        return bad(format!(
            "training scores are {:?}, expected ({}, {p})",
            s.training_scores.dim(),
            s.n
        ));
    }
    if s.training_scores.iter().any(|v| !v.is_finite()) {
        return bad("a training score is not finite".into());
    }
    let loo = &s.loo_distances;
    if loo.len() != s.n || loo.iter().any(|d| !(d.is_finite() && *d >= 0.0)) {
        return bad(format!(
            "{} leave-one-out distances for {} rows, or one is not a distance",
            loo.len(),
            s.n
        ));
    }
    if loo.windows(2).any(|w| w[0] > w[1]) {
        return bad("leave-one-out distances are not sorted".into());
    }
    if s.range_min.len() != d || s.range_max.len() != d {
        return bad(format!(
            "{} range minima and {} maxima for {d} descriptors",
            s.range_min.len(),
            s.range_max.len()
        ));
    }
    let ranges_ok = s
        .range_min
        .iter()
        .zip(&s.range_max)
        .all(|(lo, hi)| lo.is_finite() && hi.is_finite() && lo <= hi);
    if !ranges_ok {
        return bad("a descriptor range is not finite or has min > max".into());
    }
    let t = &s.thresholds;
    let all = [
        t.knn_mean,
        t.knn_sd,
        t.z_threshold,
        t.leverage_warning,
        t.residual_border_limit,
        t.residual_outside_limit,
    ];
    if all.iter().any(|v| !v.is_finite()) {
        return bad("a threshold is not finite".into());
    }
    Ok(())
}
