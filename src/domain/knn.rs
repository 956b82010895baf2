//! Nearest-neighbour search in PCA space: a kiddo immutable k-d tree over the
//! training scores, one tree type per number of kept components (1..=16),
//! and a brute-force scan over the same points for batch scoring.
//!
//! Why a scan beside the tree: at the service's sizes (5,000 training rows,
//! 10 components, k = 5) the tree prunes little, because with n/32 leaves
//! it splits on only the first log₂(n/32) ≈ 7 dimensions; measured on 1,000
//! queries (`cargo bench --bench domain_conformal`), the scan below is
//! about twice as fast at 10 dimensions and four times at 16 (figures at
//! [`SCAN_FROM_DIMS`]). A batch scans several queries a pass over the
//! training points, which shares each load between them. The scan
//! computes every squared distance by exactly the expression kiddo uses
//! (Σⱼ (tⱼ − qⱼ)² in dimension order, no fused multiply-add), keeps the k
//! smallest, and sums their square roots nearest first as the tree path
//! does, so the k-NN distance signal is the same to the last bit; the test
//! `every_scan_kernel_equals_the_tree_to_the_bit` checks it. Ties cannot
//! change that sum: tied neighbours have equal distances, whichever of
//! them is kept.
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

/// From this many dimensions on, batch queries scan instead of using the
/// tree. Measured on 1,000 queries among 5,000 uniform points (k = 5,
/// 2-core Intel Xeon machine with AVX-512, quiet, 2026-12-02; the "5-NN
/// distance" lines of `cargo bench --bench domain_conformal`), tree against
/// one-query scan against batched scan, per query: 3 dims 0.6, 3.7 and
/// 3.3 µs; 8 dims 4.7, 5.9 and 4.8 µs; 10 dims 11.2, 6.9 and 5.5 µs;
/// 16 dims 31.3, 9.8 and 7.3 µs. With only AVX (the AVX-512 kernel
/// switched off on the same machine) the batched scan took 7.2 µs at 10
/// dims against 9.0 µs one query at a time. On descriptors driven by 8
/// or 3 latent factors (8 or 3 components, below the threshold) the tree's
/// lead over the scan is larger than on uniform points.
/// Beyond about 10 dimensions k-d trees prune poorly in general (common
/// practice).
const SCAN_FROM_DIMS: usize = 10;

/// Training points per block of the scan: their running squared distances
/// stay in registers (four 4-wide AVX or two 8-wide AVX-512 registers per
/// query) while the block's coordinates stream past.
const SCAN_LANES: usize = 16;

/// The training points of one guard, searchable by distance.
/// Not `Clone` (kiddo's arena storage is not); guards share it by `Arc`.
#[derive(Debug)]
pub struct NeighbourIndex {
    tree: Tree,
    n: usize,
    dims: usize,
    /// The points again, for the scan, in blocks of [`SCAN_LANES`] points:
    /// `blocks[b * dims + j]` holds coordinate j of points
    /// b·SCAN_LANES .. (b + 1)·SCAN_LANES. The last block is padded with
    /// +∞, whose distance +∞ is never kept before a finite one.
    blocks: Vec<[f64; SCAN_LANES]>,
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
        let dims = scores.ncols();
        let tree = Tree::build(&points, dims)?;
        let n_blocks = points.len().div_ceil(SCAN_LANES);
        let mut blocks = vec![[f64::INFINITY; SCAN_LANES]; n_blocks * dims];
        for (i, point) in points.iter().enumerate() {
            let (b, lane) = (i / SCAN_LANES, i % SCAN_LANES);
            for (j, &v) in point[..dims].iter().enumerate() {
                blocks[b * dims + j][lane] = v;
            }
        }
        Ok(NeighbourIndex {
            tree,
            n: points.len(),
            dims,
            blocks,
        })
    }

    /// Mean Euclidean distance from each point to its `k` nearest training
    /// rows by whichever search is faster at this many dimensions (see
    /// [`SCAN_FROM_DIMS`]); both give the same bits. `scratch` is reused
    /// across calls so a batch allocates nothing per candidate.
    pub fn fast_mean_distances(
        &self,
        points: &[Point],
        k: usize,
        scratch: &mut Vec<f64>,
    ) -> Vec<f64> {
        if self.dims >= SCAN_FROM_DIMS {
            self.scan_mean_distances(points, k, scratch)
        } else {
            points.iter().map(|p| self.mean_distance(p, k)).collect()
        }
    }

    /// Mean Euclidean distance from `point` to its `k` nearest training
    /// rows, by scanning every row: the same value as
    /// [`NeighbourIndex::mean_distance`], bit for bit (see the module
    /// documentation).
    pub fn scan_mean_distance(&self, point: &Point, k: usize, scratch: &mut Vec<f64>) -> f64 {
        self.scan_mean_distances(std::slice::from_ref(point), k, scratch)[0]
    }

    /// [`NeighbourIndex::scan_mean_distance`] of each point, several
    /// points a pass over the training rows where the CPU allows.
    pub fn scan_mean_distances(
        &self,
        points: &[Point],
        k: usize,
        scratch: &mut Vec<f64>,
    ) -> Vec<f64> {
        self.scan_mean_distances_by(Kernel::detect(), points, k, scratch)
    }

    fn scan_mean_distances_by(
        &self,
        kernel: Kernel,
        points: &[Point],
        k: usize,
        best: &mut Vec<f64>,
    ) -> Vec<f64> {
        let k = k.min(self.n);
        if k == 0 {
            return vec![f64::NAN; points.len()];
        }
        best.resize(points.len() * k, f64::INFINITY);
        kernel.scan(&self.blocks, self.dims, points, k, best);
        // Each run ascending, as the tree returns them; the sum runs in
        // that order.
        best.chunks_exact(k)
            .map(|run| run.iter().map(|d| d.max(0.0).sqrt()).sum::<f64>() / k as f64)
            .collect()
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

    /// Mean Euclidean distance from `point` to its `k` nearest training
    /// rows, by the tree; [`NeighbourIndex::scan_mean_distance`] gives the
    /// same bits.
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

/// The scan's kernels, each keeping in `best` (ascending, full length) the
/// smallest squared distances from a query to every point of the blocks.
/// Every kernel performs the same IEEE operations on each point in the same
/// order, so all give the same bits; the test
/// `every_scan_kernel_equals_the_tree_to_the_bit` checks each one this CPU
/// runs.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Kernel {
    #[cfg(target_arch = "x86_64")]
    Avx512,
    #[cfg(target_arch = "x86_64")]
    Avx,
    Portable,
}

impl Kernel {
    const WIDEST_FIRST: &[Kernel] = &[
        #[cfg(target_arch = "x86_64")]
        Kernel::Avx512,
        #[cfg(target_arch = "x86_64")]
        Kernel::Avx,
        Kernel::Portable,
    ];

    /// The widest kernel this CPU supports (the standard library caches
    /// the feature checks, so this is cheap per query).
    fn detect() -> Kernel {
        Kernel::WIDEST_FIRST
            .iter()
            .copied()
            .find(|k| k.supported())
            .unwrap_or(Kernel::Portable)
    }

    fn supported(self) -> bool {
        match self {
            #[cfg(target_arch = "x86_64")]
            Kernel::Avx512 => std::arch::is_x86_feature_detected!("avx512f"),
            #[cfg(target_arch = "x86_64")]
            Kernel::Avx => std::arch::is_x86_feature_detected!("avx"),
            Kernel::Portable => true,
        }
    }

    /// Fills `best` with `k` ascending squared distances per query, query
    /// after query: the `k` smallest from each query to every point of the
    /// blocks.
    fn scan(
        self,
        blocks: &[[f64; SCAN_LANES]],
        dims: usize,
        queries: &[Point],
        k: usize,
        best: &mut [f64],
    ) {
        assert_eq!(best.len(), queries.len() * k, "scan: one k-run per query");
        best.fill(f64::INFINITY);
        match self {
            #[cfg(target_arch = "x86_64")]
            Kernel::Avx512 => {
                assert!(self.supported(), "AVX-512F scan on a CPU without it");
                // SAFETY: the CPU supports AVX-512F, checked just above.
                unsafe { scan_avx512(blocks, dims, queries, k, best) }
            }
            #[cfg(target_arch = "x86_64")]
            Kernel::Avx => {
                assert!(self.supported(), "AVX scan on a CPU without it");
                // SAFETY: the CPU supports AVX, checked just above.
                unsafe { scan_avx(blocks, dims, queries, k, best) }
            }
            Kernel::Portable => scan_queries::<1>(blocks, dims, queries, k, best),
        }
    }
}

/// The scan compiled for AVX-512F, four queries a pass: their running sums
/// (eight 8-wide registers) share each load of a block. Eight queries a
/// pass ran three times slower (the sums no longer fit in registers), two
/// slightly slower than four. Only AVX-512F, not FMA: a fused multiply-add
/// rounds once where kiddo rounds twice, and the distances must be kiddo's
/// to the bit.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
fn scan_avx512(
    blocks: &[[f64; SCAN_LANES]],
    dims: usize,
    queries: &[Point],
    k: usize,
    best: &mut [f64],
) {
    scan_queries::<QUERIES_AVX512>(blocks, dims, queries, k, best);
}

/// The scan compiled for AVX, two queries a pass (eight 4-wide running
/// sums; three were no faster). Only AVX, not FMA, for the reason given at
/// [`scan_avx512`].
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx")]
fn scan_avx(
    blocks: &[[f64; SCAN_LANES]],
    dims: usize,
    queries: &[Point],
    k: usize,
    best: &mut [f64],
) {
    scan_queries::<QUERIES_AVX>(blocks, dims, queries, k, best);
}

const QUERIES_AVX512: usize = 4;
const QUERIES_AVX: usize = 2;

/// The scan, `Q` queries a pass over the blocks, then the queries left
/// over one a pass. A pair's squared distance is the same operations
/// whichever pass computes it.
#[inline(always)]
fn scan_queries<const Q: usize>(
    blocks: &[[f64; SCAN_LANES]],
    dims: usize,
    queries: &[Point],
    k: usize,
    best: &mut [f64],
) {
    let (groups, rest) = queries.as_chunks::<Q>();
    let (best_grouped, best_rest) = best.split_at_mut(groups.len() * Q * k);
    for (group, best) in groups.iter().zip(best_grouped.chunks_exact_mut(Q * k)) {
        scan_pass::<Q>(blocks, dims, group, k, best);
    }
    for (query, best) in rest.iter().zip(best_rest.chunks_exact_mut(k)) {
        scan_pass::<1>(blocks, dims, std::array::from_ref(query), k, best);
    }
}

/// One pass over the blocks for `Q` queries, each keeping its `k` smallest
/// in its own run of `best`.
#[inline(always)]
fn scan_pass<const Q: usize>(
    blocks: &[[f64; SCAN_LANES]],
    dims: usize,
    queries: &[Point; Q],
    k: usize,
    best: &mut [f64],
) {
    for block in blocks.chunks_exact(dims) {
        let mut acc = [[0.0f64; SCAN_LANES]; Q];
        for (j, coords) in block.iter().enumerate() {
            for (acc, query) in acc.iter_mut().zip(queries) {
                add_squares(acc, coords, query[j]);
            }
        }
        for (acc, best) in acc.iter().zip(best.chunks_exact_mut(k)) {
            keep_smallest(acc, best);
        }
    }
}

/// One dimension's term of every lane's squared distance.
#[inline(always)]
fn add_squares(acc: &mut [f64; SCAN_LANES], coords: &[f64; SCAN_LANES], q: f64) {
    for (a, &t) in acc.iter_mut().zip(coords) {
        // kiddo's SquaredEuclidean: (a − b)², added in dimension order.
        let d = t - q;
        *a += d * d;
    }
}

/// Merges a block's squared distances into `best` (ascending, full length).
#[inline(always)]
fn keep_smallest(acc: &[f64; SCAN_LANES], best: &mut [f64]) {
    let last = best.len() - 1;
    // Most blocks hold no new neighbour: one pass of comparisons, without
    // the early exit of `any`, so it compiles to a few vector compares
    // rather than a branch per lane.
    let bound = best[last];
    if !acc.iter().fold(false, |found, &v| found | (v < bound)) {
        return;
    }
    for &v in acc {
        if v < best[last] {
            let at = best.partition_point(|&b| b <= v);
            best.copy_within(at..last, at + 1);
            best[at] = v;
        }
    }
}

fn mean_of(values: impl Iterator<Item = f64>, count: usize) -> f64 {
    if count == 0 {
        return f64::NAN;
    }
    values.sum::<f64>() / count as f64
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array2, Axis, concatenate};
    use rand::{Rng, SeedableRng};
    use rand_xoshiro::Xoshiro256PlusPlus;

    /// Twin of the fast path: the scan must give the tree's k-NN distance
    /// to the bit, over every tree dimension, k larger than n, duplicate
    /// rows (more than a tree bucket share one point), queries that sit on
    /// training points (ties at distance 0) and coordinates on a coarse
    /// grid (many exact ties at the k-th distance).
    #[test]
    fn every_scan_kernel_equals_the_tree_to_the_bit() {
        let kernels: Vec<Kernel> = Kernel::WIDEST_FIRST
            .iter()
            .copied()
            .filter(|k| k.supported())
            .collect();
        // Say which ran: a kernel this CPU lacks goes untested here.
        eprintln!("scan kernels checked on this CPU: {kernels:?}");
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(11);
        let mut best = Vec::new();
        for case in 0..120 {
            let dims = 1 + case % TREE_DIM;
            let n = rng.gen_range(1..300);
            let coarse = case % 3 == 0;
            let draw = |rng: &mut Xoshiro256PlusPlus| {
                let v: f64 = rng.gen_range(-3.0..3.0);
                if coarse { v.round() } else { v }
            };
            let base = Array2::from_shape_fn((n, dims), |_| draw(&mut rng));
            let copies = base.select(Axis(0), &vec![0; rng.gen_range(0..40)]);
            let train = concatenate(Axis(0), &[base.view(), copies.view()]).unwrap();
            let index = NeighbourIndex::build(train.view()).unwrap();
            let queries: Vec<Point> = (0..30)
                .map(|q| {
                    if q % 5 == 0 {
                        pad(train.row(rng.gen_range(0..train.nrows()))).unwrap()
                    } else {
                        let row: Vec<f64> = (0..dims).map(|_| draw(&mut rng)).collect();
                        pad(ndarray::ArrayView1::from(&row)).unwrap()
                    }
                })
                .collect();
            for k in [1, 3, 5, 10, 400] {
                let tree: Vec<f64> = queries.iter().map(|q| index.mean_distance(q, k)).collect();
                for &kernel in &kernels {
                    // Whole batches and short ones, so every kernel's
                    // several-query passes and its one-query remainder run.
                    for batch in [30, 29, 3, 1] {
                        let scan =
                            index.scan_mean_distances_by(kernel, &queries[..batch], k, &mut best);
                        assert_eq!(scan.len(), batch, "one distance per query");
                        for (q, (t, s)) in tree.iter().zip(&scan).enumerate() {
                            assert_eq!(
                                t.to_bits(),
                                s.to_bits(),
                                "case {case} (n {}, dims {dims}), query {q} of {batch}, k {k}, \
                                 {kernel:?}: tree {t}, scan {s}",
                                train.nrows()
                            );
                        }
                    }
                }
            }
        }
    }

    #[test]
    fn scan_of_an_empty_request_is_nan() {
        let train = Array2::from_shape_fn((4, 2), |(i, j)| (i + j) as f64);
        let index = NeighbourIndex::build(train.view()).unwrap();
        let mut best = Vec::new();
        assert!(
            index
                .scan_mean_distance(&[0.0; TREE_DIM], 0, &mut best)
                .is_nan()
        );
        // By hand: from the origin, the nearest of (0,1), (1,2), (2,3), (3,4) is at distance 1.
        assert_eq!(
            index.scan_mean_distance(&[0.0; TREE_DIM], 1, &mut best),
            1.0
        );
    }
}
