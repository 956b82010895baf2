//! k-nearest-neighbour regression: the mean target of the k training rows
//! nearest in Euclidean distance (Fix & Hodges 1951; uniform weights). Ties
//! in distance go to the lower training index, so results never depend on
//! the order a selection algorithm happens to visit rows. k is capped at
//! the number of training rows.
//!
//! Distances come from one GEMM per call (`linalg::sq_dists`); the k-d tree
//! belongs to the applicability domain, whose PCA space is small, whereas
//! here the full descriptor space may have hundreds of dimensions, where
//! brute force wins.

use std::cmp::Ordering;

use ndarray::{Array1, Array2, ArrayView1, ArrayView2};

use super::kernel_ridge::train_sq_dists;
use crate::linalg;

/// Orders training rows by (distance, index).
fn by_distance(row: ArrayView1<'_, f64>) -> impl Fn(&usize, &usize) -> Ordering + '_ {
    move |&a, &b| row[a].total_cmp(&row[b]).then(a.cmp(&b))
}

/// Indices of the `limit` training rows nearest to one query (given its
/// distance row), nearest first.
fn nearest(row: ArrayView1<'_, f64>, limit: usize) -> Vec<usize> {
    let mut idx: Vec<usize> = (0..row.len()).collect();
    let limit = limit.min(idx.len());
    if limit == 0 {
        return Vec::new();
    }
    let order = by_distance(row);
    if limit < idx.len() {
        idx.select_nth_unstable_by(limit - 1, &order);
        idx.truncate(limit);
    }
    idx.sort_unstable_by(&order);
    idx
}

/// Predictions for every k (descending, as in the grid) from one distance
/// matrix: rows × (K·c) with k number `g`'s column `j` at `g·c + j`. The
/// neighbours of each query are sorted once; each k is then a prefix mean.
fn prefix_means(dists: &Array2<f64>, ks: &[usize], y: ArrayView2<f64>) -> Array2<f64> {
    let (n, c) = y.dim();
    let k_max = ks.iter().copied().max().unwrap_or(1).min(n);
    let mut out = Array2::zeros((dists.nrows(), ks.len() * c));
    let mut sums = Array2::<f64>::zeros((k_max + 1, c));
    for (q, row) in dists.rows().into_iter().enumerate() {
        let neighbours = nearest(row, k_max);
        for (r, &i) in neighbours.iter().enumerate() {
            for j in 0..c {
                sums[[r + 1, j]] = sums[[r, j]] + y[[i, j]];
            }
        }
        for (g, &k) in ks.iter().enumerate() {
            let k = k.min(n);
            for j in 0..c {
                out[[q, g * c + j]] = sums[[k, j]] / k as f64;
            }
        }
    }
    out
}

/// Test and train predictions for every k, in the layout of
/// [`prefix_means`]. A training row counts as its own nearest neighbour
/// (distance 0): the training predictions are the model's fit, as a train
/// error curve needs.
pub(super) fn grid_predict(
    ks: &[usize],
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
    x_test: ArrayView2<f64>,
) -> (Array2<f64>, Array2<f64>) {
    let norms = linalg::row_sq_norms(x);
    let test = prefix_means(&linalg::sq_dists(x_test, x, Some(&norms)), ks, y);
    let train = prefix_means(&train_sq_dists(x, &norms), ks, y);
    (test, train)
}

/// B × m predictions: per query one distance row, per member the k nearest
/// of its rows.
pub(super) fn predict(
    k: usize,
    train: &Array2<f64>,
    y: &Array1<f64>,
    membership: &Array2<bool>,
    x: ArrayView2<f64>,
) -> Array2<f64> {
    let (n, m) = membership.dim();
    let sizes: Vec<usize> = membership
        .columns()
        .into_iter()
        .map(|col| col.iter().filter(|&&b| b).count())
        .collect();
    let dists = linalg::sq_dists(x, train.view(), None);
    let mut out = Array2::zeros((x.nrows(), m));
    // Members are usually most of the rows (the full set and the CV+ fold
    // training sets), so a short sorted prefix almost always holds k of each;
    // when it does not, the whole row is sorted.
    let prefix = (2 * k + 16).min(n);
    for (q, row) in dists.rows().into_iter().enumerate() {
        let mut order = nearest(row, prefix);
        for member in 0..m {
            let want = k.min(sizes[member]);
            let mut mean = mean_of_first(&order, want, member, membership, y);
            if mean.is_none() && order.len() < n {
                order = nearest(row, n);
                mean = mean_of_first(&order, want, member, membership, y);
            }
            out[[q, member]] = mean.unwrap_or(f64::NAN);
        }
    }
    out
}

/// Mean target of the first `want` rows of `order` that belong to `member`;
/// `None` when `order` holds fewer of them.
fn mean_of_first(
    order: &[usize],
    want: usize,
    member: usize,
    membership: &Array2<bool>,
    y: &Array1<f64>,
) -> Option<f64> {
    let mut sum = 0.0;
    let mut found = 0;
    for &i in order {
        if found == want {
            break;
        }
        if membership[[i, member]] {
            sum += y[i];
            found += 1;
        }
    }
    (found == want && want > 0).then(|| sum / want as f64)
}
