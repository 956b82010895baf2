//! Regression metrics of one set of predictions, rank and product-moment
//! correlation, and a metric's mean ± standard error over folds.

use ndarray::ArrayView1;
use serde::{Deserialize, Serialize};

use super::{Estimate, Metrics};

/// MSE, RMSE, MAE, R² (1 − SSE/SST, SST about the mean of `y`: scikit-learn's
/// `r2_score`, which is q² when `pred` is out-of-fold), Pearson and Spearman.
/// A figure that is undefined (R² of a constant `y`, a correlation with a
/// constant side, any figure of an empty set) is NaN, never a made-up value.
pub fn metrics(y: ArrayView1<f64>, pred: ArrayView1<f64>) -> Metrics {
    assert_eq!(y.len(), pred.len(), "metrics: y and pred differ in length");
    let n = y.len() as f64;
    let (mut sse, mut sae) = (0.0, 0.0);
    for (a, b) in y.iter().zip(pred.iter()) {
        sse += (a - b).powi(2);
        sae += (a - b).abs();
    }
    let mean = y.sum() / n;
    let sst: f64 = y.iter().map(|v| (v - mean).powi(2)).sum();
    let mse = sse / n;
    Metrics {
        mse,
        rmse: mse.sqrt(),
        mae: sae / n,
        r2: if sst > 0.0 { 1.0 - sse / sst } else { f64::NAN },
        pearson: pearson(y, pred),
        spearman: spearman(y, pred),
    }
}

/// Pearson's product-moment correlation (two-pass, about the means), NaN
/// when either side is constant.
pub fn pearson(x: ArrayView1<f64>, y: ArrayView1<f64>) -> f64 {
    assert_eq!(x.len(), y.len(), "pearson: x and y differ in length");
    let n = x.len() as f64;
    if x.is_empty() {
        return f64::NAN;
    }
    let (mx, my) = (x.sum() / n, y.sum() / n);
    let (mut sxy, mut sxx, mut syy) = (0.0, 0.0, 0.0);
    for (a, b) in x.iter().zip(y.iter()) {
        let (da, db) = (a - mx, b - my);
        sxy += da * db;
        sxx += da * da;
        syy += db * db;
    }
    if sxx == 0.0 || syy == 0.0 {
        return f64::NAN;
    }
    (sxy / (sxx.sqrt() * syy.sqrt())).clamp(-1.0, 1.0)
}

/// Spearman's rank correlation: Pearson's on the ranks, tied values sharing
/// the average of their ranks (as `scipy.stats.spearmanr`).
pub fn spearman(x: ArrayView1<f64>, y: ArrayView1<f64>) -> f64 {
    let (rx, ry) = (average_ranks(x), average_ranks(y));
    pearson(
        ArrayView1::from(rx.as_slice()),
        ArrayView1::from(ry.as_slice()),
    )
}

/// 1-based ranks, ties given the mean of the ranks they span.
pub fn average_ranks(x: ArrayView1<f64>) -> Vec<f64> {
    let mut order: Vec<usize> = (0..x.len()).collect();
    order.sort_by(|&a, &b| x[a].total_cmp(&x[b]));
    let mut ranks = vec![0.0; x.len()];
    let mut start = 0;
    while start < order.len() {
        let mut end = start + 1;
        while end < order.len() && x[order[end]] == x[order[start]] {
            end += 1;
        }
        // Ranks start+1 ..= end share their mean.
        let rank = (start + 1 + end) as f64 / 2.0;
        for &i in &order[start..end] {
            ranks[i] = rank;
        }
        start = end;
    }
    ranks
}

/// Mean ± standard error of a figure over K folds: SE = s/√K with the
/// sample standard deviation s (n − 1 in the denominator), as
/// `scipy.stats.sem`. One value has no spread: its SE is NaN. A NaN value
/// makes the estimate NaN (an undefined fold makes the average undefined).
pub fn estimate(values: &[f64]) -> Estimate {
    let k = values.len() as f64;
    if values.is_empty() {
        return Estimate {
            mean: f64::NAN,
            se: f64::NAN,
        };
    }
    let mean = values.iter().sum::<f64>() / k;
    let se = if values.len() < 2 {
        f64::NAN
    } else {
        let ss: f64 = values.iter().map(|v| (v - mean).powi(2)).sum();
        (ss / (k - 1.0)).sqrt() / k.sqrt()
    };
    Estimate { mean, se }
}

/// Every metric as mean ± SE over folds. RMSE is the mean of the folds'
/// RMSEs (not the root of the mean MSE), so each figure is averaged alike.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct MetricEstimates {
    pub mse: Estimate,
    pub rmse: Estimate,
    pub mae: Estimate,
    /// q² when the folds are outer test folds.
    pub r2: Estimate,
    pub pearson: Estimate,
    pub spearman: Estimate,
}

impl MetricEstimates {
    pub fn over_folds(per_fold: &[Metrics]) -> MetricEstimates {
        let of = |f: fn(&Metrics) -> f64| estimate(&per_fold.iter().map(f).collect::<Vec<_>>());
        MetricEstimates {
            mse: of(|m| m.mse),
            rmse: of(|m| m.rmse),
            mae: of(|m| m.mae),
            r2: of(|m| m.r2),
            pearson: of(|m| m.pearson),
            spearman: of(|m| m.spearman),
        }
    }
}
