//! Nearest-neighbour search in PCA space: a kiddo immutable k-d tree over the
//! training scores, one tree type per number of kept components (1..=16).
//!
//! Why the immutable tree: the mutable one panics when more than a bucket's
//! worth of points share a coordinate, and descriptor tables often hold
//! duplicate rows.
//!
//! Why one tree type per dimension rather than zero-padding every score
//! vector to 16: kiddo splits on the dimensions in turn, level by level, so
//! splits on padding dimensions separate nothing and the search cannot prune
//! below them. Measured on 1,000 queries (k = 6, shared 2-core machine):
//! with 3 components and 20,000 points a padded 16-dimensional tree took
//! 206 µs per query against 3.3 µs for a 3-dimensional one; with 8
//! components and 2,000 points, 26 µs against 14 µs.

use std::num::NonZeroUsize;

use kiddo::{ImmutableKdTree, SquaredEuclidean};
use ndarray::{ArrayView1, ArrayView2};

use crate::space::pca::MAX_COMPONENTS;

/// The largest tree dimension: PCA never keeps more components than this.
pub const TREE_DIM: usize = MAX_COMPONENTS;

/// A PCA score vector in a fixed-size buffer; a tree of dimension p reads
/// only the first p entries.
pub type Point = [f64; TREE_DIM];

/// Why the tree could not be built.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum TreeError {
    #[error("a score row has {dims} components; the k-d tree takes 1 to {TREE_DIM}")]
    TooManyComponents { dims: usize },
    #[error("the k-d tree cannot hold {rows} training rows: {reason}")]
    Construction { rows: usize, reason: String },
}

/// Copies one score row into a point buffer.
pub fn pad(row: ArrayView1<f64>) -> Result<Point, TreeError> {
    if row.len() > TREE_DIM {
        return Err(TreeError::TooManyComponents { dims: row.len() });
    }
    let mut point = [0.0; TREE_DIM];
    point.iter_mut().zip(row.iter()).for_each(|(p, v)| *p = *v);
    Ok(point)
}

fn exact_point<const K: usize>(point: &Point) -> [f64; K] {
    std::array::from_fn(|j| point[j])
}

fn build<const K: usize>(points: &[Point]) -> Result<ImmutableKdTree<f64, K>, TreeError> {
    let exact: Vec<[f64; K]> = points.iter().map(exact_point::<K>).collect();
    ImmutableKdTree::new_from_slice(&exact).map_err(|e| TreeError::Construction {
        rows: points.len(),
        reason: e.to_string(),
    })
}

fn query<const K: usize>(
    tree: &ImmutableKdTree<f64, K>,
    point: &Point,
    k: NonZeroUsize,
) -> Vec<(usize, f64)> {
    tree.query(&exact_point::<K>(point))
        .nearest_n::<SquaredEuclidean<f64>>(k)
        .execute()
        .into_iter()
        .map(|hit| (hit.item as usize, hit.distance.max(0.0).sqrt()))
        .collect()
}

/// One variant per tree dimension, so each tree is exactly as wide as the
/// kept components.
macro_rules! trees {
    ($($variant:ident = $dim:literal),* $(,)?) => {
        #[derive(Debug)]
        enum Tree {
            $($variant(ImmutableKdTree<f64, $dim>)),*
        }

        impl Tree {
            fn build(points: &[Point], dims: usize) -> Result<Tree, TreeError> {
                match dims {
                    $($dim => Ok(Tree::$variant(build::<$dim>(points)?)),)*
                    _ => Err(TreeError::TooManyComponents { dims }),
                }
            }

            fn nearest(&self, point: &Point, k: NonZeroUsize) -> Vec<(usize, f64)> {
                match self {
                    $(Tree::$variant(tree) => query::<$dim>(tree, point, k)),*
                }
            }
        }
    };
}

trees!(
    D1 = 1,
    D2 = 2,
    D3 = 3,
    D4 = 4,
    D5 = 5,
    D6 = 6,
    D7 = 7,
    D8 = 8,
    D9 = 9,
    D10 = 10,
    D11 = 11,
    D12 = 12,
    D13 = 13,
    D14 = 14,
    D15 = 15,
    D16 = 16,
);

/// The training points of one guard, searchable by distance.
/// Not `Clone` (kiddo's arena storage is not); guards share it by `Arc`.
#[derive(Debug)]
pub struct NeighbourIndex {
    tree: Tree,
    n: usize,
}

impl NeighbourIndex {
    /// Builds the tree over the rows of `scores` (n × p, 1 ≤ p ≤ 16); row i
    /// is item i.
    pub fn build(scores: ArrayView2<f64>) -> Result<NeighbourIndex, TreeError> {
        let points = scores
            .rows()
            .into_iter()
            .map(pad)
            .collect::<Result<Vec<_>, _>>()?;
        let tree = Tree::build(&points, scores.ncols())?;
        Ok(NeighbourIndex {
            tree,
            n: points.len(),
        })
    }

    /// The `k` nearest training rows (fewer if the tree holds fewer) as
    /// (row index, Euclidean distance), nearest first. Ties come in the
    /// tree's order.
    pub fn nearest(&self, point: &Point, k: usize) -> Vec<(usize, f64)> {
        match NonZeroUsize::new(k.min(self.n)) {
            Some(k) => self.tree.nearest(point, k),
            None => Vec::new(),
        }
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
