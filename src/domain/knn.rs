//! Nearest-neighbour search in PCA space: a kiddo immutable k-d tree over the
//! training scores, padded with zeros to one const dimension so that one tree
//! type serves every number of kept components.
//!
//! Why the immutable tree: the mutable one panics when more than a bucket's
//! worth of points share a coordinate, and descriptor tables often hold
//! duplicate rows. Padding coordinates are zero for every point, so they add
//! nothing to any distance.

use std::num::NonZeroUsize;

use kiddo::{ImmutableKdTree, SquaredEuclidean};
use ndarray::{ArrayView1, ArrayView2};

use crate::space::pca::MAX_COMPONENTS;

/// The tree's one dimension: PCA never keeps more components than this.
pub const TREE_DIM: usize = MAX_COMPONENTS;

/// A PCA score vector padded to the tree dimension.
pub type Point = [f64; TREE_DIM];

/// The training points of one guard, searchable by distance.
/// Not `Clone` (kiddo's arena storage is not); guards share it by `Arc`.
#[derive(Debug)]
pub struct NeighbourIndex {
    tree: ImmutableKdTree<f64, TREE_DIM>,
    n: usize,
}

/// Why the tree could not be built.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum TreeError {
    #[error("a score row has {dims} components, more than the tree dimension {TREE_DIM}")]
    TooManyComponents { dims: usize },
    #[error("the k-d tree cannot hold {rows} training rows: {reason}")]
    Construction { rows: usize, reason: String },
}

/// Pads one score row with zeros to the tree dimension.
pub fn pad(row: ArrayView1<f64>) -> Result<Point, TreeError> {
    if row.len() > TREE_DIM {
        return Err(TreeError::TooManyComponents { dims: row.len() });
    }
    let mut point = [0.0; TREE_DIM];
    point.iter_mut().zip(row.iter()).for_each(|(p, v)| *p = *v);
    Ok(point)
}

impl NeighbourIndex {
    /// Builds the tree over the rows of `scores` (n × p, p ≤ 16); row i is
    /// item i.
    pub fn build(scores: ArrayView2<f64>) -> Result<NeighbourIndex, TreeError> {
        let points = scores
            .rows()
            .into_iter()
            .map(pad)
            .collect::<Result<Vec<_>, _>>()?;
        let tree =
            ImmutableKdTree::new_from_slice(&points).map_err(|e| TreeError::Construction {
                rows: points.len(),
                reason: e.to_string(),
            })?;
        Ok(NeighbourIndex {
            tree,
            n: points.len(),
        })
    }

    /// The `k` nearest training rows (fewer if the tree holds fewer) as
    /// (row index, Euclidean distance), nearest first. Ties come in the
    /// tree's order.
    pub fn nearest(&self, point: &Point, k: usize) -> Vec<(usize, f64)> {
        let Some(k) = NonZeroUsize::new(k.min(self.n)) else {
            return Vec::new();
        };
        self.tree
            .query(point)
            .nearest_n::<SquaredEuclidean<f64>>(k)
            .execute()
            .into_iter()
            .map(|hit| (hit.item as usize, hit.distance.max(0.0).sqrt()))
            .collect()
    }

    /// Mean Euclidean distance from `point` to its `k` nearest training rows.
    pub fn mean_distance(&self, point: &Point, k: usize) -> f64 {
        mean_of(
            self.nearest(point, k).iter().map(|&(_, d)| d),
            k.min(self.n),
        )
    }

    /// Mean distance from training row `row` (at `point`) to its `k`
    /// nearest OTHER training rows. The row is left out by index, not by
    /// distance, so its duplicates count as neighbours at distance 0. If the
    /// row is not among the k + 1 hits, more than k rows sit at distance 0
    /// from it and the first k hits are exactly its k nearest others.
    pub fn leave_one_out_distance(&self, row: usize, point: &Point, k: usize) -> f64 {
        let hits = self.nearest(point, k + 1);
        let others = hits.iter().filter(|&&(i, _)| i != row).take(k);
        mean_of(others.map(|&(_, d)| d), k.min(self.n.saturating_sub(1)))
    }
}

fn mean_of(values: impl Iterator<Item = f64>, count: usize) -> f64 {
    if count == 0 {
        return f64::NAN;
    }
    values.sum::<f64>() / count as f64
}
