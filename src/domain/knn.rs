//! Nearest-neighbour search in PCA space: a kiddo immutable k-d tree over the
//! training scores, one tree type per number of kept components (1..=16),
//! and a brute-force scan over the same points for batch scoring.
//!
//! Why a scan beside the tree: at the service's sizes (5,000 training rows,
//! 10 components, k = 5) the tree prunes little, because with n/32 leaves
//! it splits on only the first log₂(n/32) ≈ 7 dimensions; measured on 1,000
//! queries (`cargo bench --bench domain_conformal`), the scan below is
//! about twice as fast at 10 dimensions and six times at 16 (figures at
//! [`SCAN_FROM_DIMS`]). A batch scans several queries a pass over the
//! training points, which shares each load between them.
//!
//! The scan first sieves in f32, twice the lanes of f64 a vector register,
//! keeping as candidates the rows whose rough distance is within a proven
//! error margin of the k-th smallest (the bound is derived at
//! `NeighbourIndex::sieve_error_bound`, the margin at
//! `NeighbourIndex::sieve_margin`). The rough distance is expanded as
//! ‖t‖² + ‖q‖² − 2t·q, one multiply-add a dimension, with the norms
//! computed once per training row and once per query. It then computes each candidate's
//! squared distance by exactly the expression kiddo uses (Σⱼ (tⱼ − qⱼ)² in
//! f64, dimension order, no fused multiply-add), keeps the k smallest, and
//! sums their square roots nearest first as the tree path does, so the
//! k-NN distance signal is the same to the last bit; the test
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
/// tree. Measured on 1,000 queries among 5,000 uniform points (k = 5; the
/// "5-NN distance" lines of `cargo bench --bench domain_conformal`), tree
/// against one-query scan against batched scan, per query:
///
/// - f32 sieve, 2-core AMD EPYC with AVX but not AVX-512, 2026-12-03,
///   host fairly busy (load 1.8): 3 dims 1.1, 5.9 and 6.1 µs; 8 dims 9.3,
///   8.2 and 8.2 µs; 9 dims 15.3, 8.5 and 7.9 µs; 10 dims 18.5, 9.5 and
///   8.3 µs; 16 dims 81.5, 12.6 and 8.4 µs. On the same machine the f64
///   scan this replaced took 14.1 µs batched at 10 dims, 16.6 µs at 16.
/// - The f64 scan, 2-core Intel Xeon with AVX-512, quiet, 2026-12-02:
///   3 dims 0.6, 3.7 and 3.3 µs; 8 dims 4.7, 5.9 and 4.8 µs; 10 dims
///   11.2, 6.9 and 5.5 µs; 16 dims 31.3, 9.8 and 7.3 µs.
///
/// The scan now wins at 9 dimensions on uniform points too, but on
/// descriptors driven by 8 or 3 latent factors the tree's lead over the
/// scan is larger than on uniform points, so the threshold stays where
/// k-d trees are known to prune poorly in general: beyond about 10
/// dimensions (common practice).
const SCAN_FROM_DIMS: usize = 10;

/// Training points per block of the sieve: their running f32 squared
/// distances stay in registers (two 8-wide AVX or one 16-wide AVX-512
/// register per query) while the block's coordinates stream past.
const SIEVE_LANES: usize = 16;

/// The sieve computes in f32 only where every coordinate, product and
/// norm stays far inside f32's range (about 3.4e38): with coordinates
/// below 1e18, a norm of 16 of them is under 1.6e37 and the expansion's
/// partial sums stay under 7e37. A query or an index with a
/// coordinate beyond this goes to the exact scan of every row.
const SIEVE_MAX_ABS: f64 = 1e18;

/// The unit roundoff of f32, 2⁻²⁴.
const F32_UNIT_ROUNDOFF: f64 = 1.0 / 16_777_216.0;

/// The training points of one guard, searchable by distance.
/// Not `Clone` (kiddo's arena storage is not); guards share it by `Arc`.
#[derive(Debug)]
pub struct NeighbourIndex {
    tree: Tree,
    n: usize,
    dims: usize,
    /// The points again, row after row (`rows[i * dims + j]`), for the
    /// scan's exact distances.
    rows: Vec<f64>,
    /// The points rounded to f32, in blocks of [`SIEVE_LANES`] points:
    /// `blocks[b * dims + j]` holds coordinate j of points
    /// b·SIEVE_LANES .. (b + 1)·SIEVE_LANES. The last block is padded with
    /// zeros; the sieve skips those lanes by row number.
    blocks: Vec<[f32; SIEVE_LANES]>,
    /// The squared norm of each f32 point, block by block (`norms[b]`
    /// for the points of block b), as [`rounded_norm2`] computes it; +∞
    /// in the padding lanes.
    norms: Vec<[f32; SIEVE_LANES]>,
    /// The largest squared norm of a training point: the sieve's error
    /// bound grows with it.
    max_norm2: f64,
    /// Every training coordinate is within [`SIEVE_MAX_ABS`].
    sieve_fits: bool,
}

/// Buffers a scan reuses from call to call, so a batch allocates nothing
/// per candidate.
#[derive(Debug, Default)]
pub struct ScanScratch {
    /// The k smallest exact squared distances of each query, run after run.
    best: Vec<f64>,
    /// The k smallest f32 squared distances of each sieved query.
    rough: Vec<f32>,
    /// The sieved queries rounded to f32 and multiplied by −2 (exact).
    queries: Vec<[f32; TREE_DIM]>,
    /// Their squared norms by [`rounded_norm2`].
    query_norms: Vec<f32>,
    /// Their error margins.
    margins: Vec<f64>,
    /// Where each sieved query sits among the caller's points.
    sieved: Vec<usize>,
    /// Each sieved query's candidates: (row, f32 squared distance).
    found: Vec<Vec<(u32, f32)>>,
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
        if u32::try_from(points.len()).is_err() {
            return Err(TreeError::Construction {
                rows: points.len(),
                reason: format!("the scan numbers rows up to {}", u32::MAX),
            });
        }
        let tree = Tree::build(&points, dims)?;
        let n_blocks = points.len().div_ceil(SIEVE_LANES);
        let mut blocks = vec![[0.0f32; SIEVE_LANES]; n_blocks * dims];
        let mut norms = vec![[f32::INFINITY; SIEVE_LANES]; n_blocks];
        let mut rows = Vec::with_capacity(points.len() * dims);
        for (i, point) in points.iter().enumerate() {
            let (b, lane) = (i / SIEVE_LANES, i % SIEVE_LANES);
            for (j, &v) in point[..dims].iter().enumerate() {
                blocks[b * dims + j][lane] = v as f32;
            }
            norms[b][lane] = rounded_norm2(&point[..dims]);
            rows.extend_from_slice(&point[..dims]);
        }
        let max_norm2 = points
            .iter()
            .map(|p| p[..dims].iter().map(|v| v * v).sum::<f64>())
            .fold(0.0, f64::max);
        let sieve_fits = rows.iter().all(|v| v.abs() <= SIEVE_MAX_ABS);
        Ok(NeighbourIndex {
            tree,
            n: points.len(),
            dims,
            rows,
            blocks,
            norms,
            max_norm2,
            sieve_fits,
        })
    }

    /// Mean Euclidean distance from each point to its `k` nearest training
    /// rows by whichever search is faster at this many dimensions (see
    /// [`SCAN_FROM_DIMS`]); both give the same bits.
    pub fn fast_mean_distances(
        &self,
        points: &[Point],
        k: usize,
        scratch: &mut ScanScratch,
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
    pub fn scan_mean_distance(&self, point: &Point, k: usize, scratch: &mut ScanScratch) -> f64 {
        self.scan_mean_distances(std::slice::from_ref(point), k, scratch)[0]
    }

    /// [`NeighbourIndex::scan_mean_distance`] of each point, several
    /// points a pass over the training rows where the CPU allows.
    pub fn scan_mean_distances(
        &self,
        points: &[Point],
        k: usize,
        scratch: &mut ScanScratch,
    ) -> Vec<f64> {
        self.scan_mean_distances_by(Kernel::detect(), points, k, scratch)
    }

    /// The scan in two steps. The sieve computes every squared distance in
    /// f32, where a vector register holds twice as many lanes, and keeps
    /// as candidates the rows within a proven error margin of its k-th
    /// smallest. The exact step computes each candidate's distance in f64
    /// as kiddo does and keeps the k smallest. Every row the exact k
    /// smallest could come from is a candidate (see [`Self::sieve_margin`]),
    /// so the result is the exact one whatever the f32 rounding did.
    fn scan_mean_distances_by(
        &self,
        kernel: Kernel,
        points: &[Point],
        k: usize,
        scratch: &mut ScanScratch,
    ) -> Vec<f64> {
        let k = k.min(self.n);
        if k == 0 {
            return vec![f64::NAN; points.len()];
        }
        let ScanScratch {
            best,
            rough,
            queries,
            query_norms,
            margins,
            sieved,
            found,
        } = scratch;
        best.clear();
        best.resize(points.len() * k, f64::INFINITY);
        queries.clear();
        query_norms.clear();
        margins.clear();
        sieved.clear();
        for (at, point) in points.iter().enumerate() {
            let point = &point[..self.dims];
            if self.sieve_fits && point.iter().all(|v| v.abs() <= SIEVE_MAX_ABS) {
                queries.push(std::array::from_fn(|j| {
                    point.get(j).map_or(0.0, |&v| -2.0 * v as f32)
                }));
                query_norms.push(rounded_norm2(point));
                margins.push(self.sieve_margin(point));
                sieved.push(at);
            }
        }
        if found.len() < sieved.len() {
            found.resize_with(sieved.len(), Vec::new);
        }
        found.iter_mut().for_each(Vec::clear);
        rough.clear();
        rough.resize(sieved.len() * k, f32::INFINITY);
        let sieve = Sieve {
            blocks: &self.blocks,
            norms: &self.norms,
            dims: self.dims,
            n: self.n,
            k,
        };
        let queries = Queries {
            scaled: queries,
            norms: query_norms,
            margins,
        };
        kernel.sieve(&sieve, queries, rough, &mut found[..sieved.len()]);

        let mut next = sieved.iter().enumerate().peekable();
        for (at, (point, run)) in points.iter().zip(best.chunks_exact_mut(k)).enumerate() {
            let sieved_here = next.next_if(|&(_, &s)| s == at);
            // The k-th smallest f32 distance plus the margin bounds the f32
            // distance of every row that can be among the exact k nearest.
            let limit = sieved_here.map(|(s, _)| rough[s * k + k - 1] as f64 + margins[s]);
            match (sieved_here, limit) {
                (Some((s, _)), Some(limit)) if limit.is_finite() => {
                    for &(row, _) in found[s].iter().filter(|&&(_, d)| d as f64 <= limit) {
                        keep_if_smaller(run, self.squared_distance(row as usize, point));
                    }
                }
                _ => {
                    for row in 0..self.n {
                        keep_if_smaller(run, self.squared_distance(row, point));
                    }
                }
            }
        }
        // Each run ascending, as the tree returns them; the sum runs in
        // that order.
        best.chunks_exact(k)
            .map(|run| run.iter().map(|d| d.max(0.0).sqrt()).sum::<f64>() / k as f64)
            .collect()
    }

    /// The squared distance from training row `row` to `point` by exactly
    /// kiddo's `SquaredEuclidean`: Σⱼ (tⱼ − qⱼ)² in dimension order, each
    /// square and sum rounded on its own (no fused multiply-add).
    fn squared_distance(&self, row: usize, point: &Point) -> f64 {
        let row = &self.rows[row * self.dims..(row + 1) * self.dims];
        row.iter().zip(point).fold(0.0, |sum, (&t, &q)| {
            let d = t - q;
            sum + d * d
        })
    }

    /// A bound on |d̃ − d|, where d is a squared distance from the query
    /// `q` to any training point t and d̃ the sieve's f32 value of it.
    ///
    /// The sieve computes d̃ = fl(‖t̂‖² + ‖q̂‖²) + Σⱼ t̂ⱼ·(−2q̂ⱼ), summed in
    /// f32 in dimension order, where t̂ and q̂ are the points rounded to
    /// f32 and each norm is summed in f64 from them and rounded to f32
    /// once ([`rounded_norm2`]); −2q̂ⱼ is exact.
    ///
    /// The bound (standard floating-point error analysis, as in Higham,
    /// *Accuracy and Stability of Numerical Algorithms*, 2nd ed., §2.2 and
    /// §3.1, section numbers from memory; u = 2⁻²⁴ is the unit roundoff of
    /// f32; sⱼ = |tⱼ| + |qⱼ|):
    /// - rounding the points moves each difference aⱼ = tⱼ − qⱼ by at
    ///   most u·sⱼ, so ‖t̂ − q̂‖² is within (2 + u)u·Σ sⱼ² of d;
    /// - each rounded norm is within 1.01u of ‖t̂‖² or ‖q̂‖², and their sum
    ///   rounds once more: 2.01u(‖t̂‖² + ‖q̂‖²) at most;
    /// - adding the p products to that start, each by a fused
    ///   multiply-add or by a rounded product and a rounded sum, adds at
    ///   most γₚ₊₂ times the start plus Σ 2|t̂ⱼq̂ⱼ| ≤ ‖t̂‖² + ‖q̂‖², that is
    ///   2.01(p + 2)u(‖t̂‖² + ‖q̂‖²).
    ///
    /// With Σ sⱼ² ≤ 2(‖t‖² + ‖q‖²) and ‖t̂‖² ≤ (1 + u)²‖t‖², that is
    /// |d̃ − d| ≤ (2.01p + 10.1)u(‖t‖² + ‖q‖²), inside the 2(p + 6)u(‖t‖² +
    /// ‖q‖²) used here (which also held for the difference form the
    /// sieve computed before). Below f32's smallest normal number the
    /// relative bounds fail: a value rounded there is off by at most
    /// 2⁻¹⁵⁰; where that matters against the spare 1.7u·(‖t‖² + ‖q‖²) the
    /// coordinates are so small that all of it stays below the last term,
    /// p times that number. The test
    /// `the_sieve_error_stays_within_its_proven_bound` checks each kernel
    /// against f64 arithmetic.
    fn sieve_error_bound(&self, q: &[f64]) -> f64 {
        let q_norm2: f64 = q.iter().map(|v| v * v).sum();
        let p = self.dims as f64;
        2.0 * (p + 6.0) * F32_UNIT_ROUNDOFF * (self.max_norm2 + q_norm2)
            + p * f64::from(f32::MIN_POSITIVE)
    }

    /// How far above the k-th smallest f32 distance a row stays a
    /// candidate: twice the error bound is enough, and twice that again
    /// is kept for safety (a wider margin only costs a few more exact
    /// distances).
    ///
    /// Why twice the bound: the k rows with the smallest d̃ all have
    /// d ≤ d̃ₖ + bound, so the exact k-th smallest dₖ is at most that, and
    /// every row with d ≤ dₖ has d̃ ≤ d + bound ≤ d̃ₖ + 2·bound. Here d is
    /// the real distance; the ranking to reproduce is by kiddo's f64 value
    /// of it, off by at most γₚ(f64)·d, some 10⁻⁹ of the bound, which the
    /// second factor of two covers many times over.
    fn sieve_margin(&self, q: &[f64]) -> f64 {
        4.0 * self.sieve_error_bound(q)
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

/// Inserts `v` into `best` (ascending, full length) if it is smaller than
/// the largest there, dropping that one; says whether it did.
#[inline(always)]
fn keep_if_smaller<T: PartialOrd + Copy>(best: &mut [T], v: T) -> bool {
    let last = best.len() - 1;
    let smaller = v < best[last];
    if smaller {
        // Shifted one by one from the top: k is a handful, and a block copy
        // here was a library call per insert.
        let mut at = last;
        while at > 0 && v < best[at - 1] {
            best[at] = best[at - 1];
            at -= 1;
        }
        best[at] = v;
    }
    smaller
}

/// What the sieve reads: the index's f32 blocks and the run length.
struct Sieve<'a> {
    blocks: &'a [[f32; SIEVE_LANES]],
    norms: &'a [[f32; SIEVE_LANES]],
    dims: usize,
    n: usize,
    k: usize,
}

/// The queries a sieve takes, one entry each.
#[derive(Clone, Copy)]
struct Queries<'a> {
    /// The f32 query times −2.
    scaled: &'a [[f32; TREE_DIM]],
    /// Its squared norm by [`rounded_norm2`].
    norms: &'a [f32],
    /// How far above the k-th smallest f32 distance a row stays a
    /// candidate ([`NeighbourIndex::sieve_margin`]).
    margins: &'a [f64],
}

/// The sieve's kernels. Each keeps, per query, the `k` smallest f32
/// squared distances in its run of `rough` and as candidates every row
/// whose f32 distance was within the query's margin of the k-th smallest
/// seen so far. Kernels may round differently from each other (the
/// margin covers fused and separate multiply-adds alike); the exact step
/// after them makes the result the same bits whichever ran, and the test
/// `every_scan_kernel_equals_the_tree_to_the_bit` checks each one this CPU
/// runs.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Kernel {
    #[cfg(target_arch = "x86_64")]
    Avx512,
    #[cfg(target_arch = "x86_64")]
    AvxFma,
    #[cfg(target_arch = "x86_64")]
    Avx,
    Portable,
    /// The AVX-512 kernel's grouping (eight queries a pass, the rest
    /// four, two and one) and rounding (fused multiply-adds) through the
    /// same generic pass in portable lanes, so both are tested on every
    /// CPU. Listed after `Portable`, so never detected.
    #[cfg(test)]
    PortableAsAvx512,
}

impl Kernel {
    const WIDEST_FIRST: &[Kernel] = &[
        #[cfg(target_arch = "x86_64")]
        Kernel::Avx512,
        #[cfg(target_arch = "x86_64")]
        Kernel::AvxFma,
        #[cfg(target_arch = "x86_64")]
        Kernel::Avx,
        Kernel::Portable,
        #[cfg(test)]
        Kernel::PortableAsAvx512,
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
            // Every feature `avx512f` turns on in the compiler (it implies
            // AVX2, FMA and F16C), so the kernel's code runs only where
            // all of them are.
            Kernel::Avx512 => {
                std::arch::is_x86_feature_detected!("avx512f")
                    && std::arch::is_x86_feature_detected!("avx2")
                    && std::arch::is_x86_feature_detected!("fma")
                    && std::arch::is_x86_feature_detected!("f16c")
            }
            #[cfg(target_arch = "x86_64")]
            Kernel::AvxFma => {
                std::arch::is_x86_feature_detected!("avx")
                    && std::arch::is_x86_feature_detected!("fma")
            }
            #[cfg(target_arch = "x86_64")]
            Kernel::Avx => std::arch::is_x86_feature_detected!("avx"),
            Kernel::Portable => true,
            #[cfg(test)]
            Kernel::PortableAsAvx512 => true,
        }
    }

    fn sieve(
        self,
        sieve: &Sieve,
        queries: Queries,
        rough: &mut [f32],
        found: &mut [Vec<(u32, f32)>],
    ) {
        let n = queries.scaled.len();
        assert_eq!(rough.len(), n * sieve.k, "sieve: one k-run per query");
        assert_eq!(found.len(), n, "sieve: one candidate list per query");
        assert_eq!(queries.norms.len(), n, "sieve: one norm per query");
        assert_eq!(queries.margins.len(), n, "sieve: one margin per query");
        match self {
            #[cfg(target_arch = "x86_64")]
            Kernel::Avx512 => {
                assert!(self.supported(), "AVX-512F sieve on a CPU without it");
                // SAFETY: the CPU supports AVX-512F, AVX2, FMA and F16C,
                // checked just above.
                unsafe { sieve_avx512(sieve, queries, rough, found) }
            }
            #[cfg(target_arch = "x86_64")]
            Kernel::AvxFma => {
                assert!(self.supported(), "AVX and FMA sieve on a CPU without them");
                // SAFETY: the CPU supports AVX and FMA, checked just above.
                unsafe { sieve_avx_fma(sieve, queries, rough, found) }
            }
            #[cfg(target_arch = "x86_64")]
            Kernel::Avx => {
                assert!(self.supported(), "AVX sieve on a CPU without it");
                // SAFETY: the CPU supports AVX, checked just above.
                unsafe { sieve_avx(sieve, queries, rough, found) }
            }
            // SAFETY: the portable lanes use no instruction beyond the
            // baseline.
            Kernel::Portable => unsafe {
                sieve_queries::<Plain<false>, QUERIES_PORTABLE>(sieve, queries, rough, found)
            },
            #[cfg(test)]
            // SAFETY: as for `Portable`.
            Kernel::PortableAsAvx512 => unsafe {
                sieve_queries::<Plain<true>, QUERIES_AVX512>(sieve, queries, rough, found)
            },
        }
    }
}

/// The sieve in AVX-512F intrinsics, eight queries a pass: one 16-wide
/// register of running sums each.
///
/// Why intrinsics: written as plain loops over arrays, the same pass was
/// compiled by LLVM into code whose speed had nothing to do with the
/// arithmetic. With eight queries it vectorised the loop over the queries
/// instead of the lanes, a gather and a scatter for every lane's sum
/// (`vgatherqps`, `vscatterqps`); with four queries and the norm-expanded
/// distance it vectorised one query and did the other three lane by lane
/// in scalar registers spilled to the stack. Both ran the batched scan
/// four to six times slower than one query at a time (domain bench,
/// 2-vCPU Xeon with AVX-512; machine code read with `objdump`).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,fma")]
fn sieve_avx512(sieve: &Sieve, queries: Queries, rough: &mut [f32], found: &mut [Vec<(u32, f32)>]) {
    // SAFETY: `Zmm` uses AVX-512F only, which this function's caller
    // has checked the CPU for.
    unsafe { sieve_queries::<x86::Zmm, QUERIES_AVX512>(sieve, queries, rough, found) }
}

/// The sieve in AVX intrinsics, four queries a pass (two 8-wide registers
/// of running sums each), multiply and add rounded apart.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx")]
fn sieve_avx(sieve: &Sieve, queries: Queries, rough: &mut [f32], found: &mut [Vec<(u32, f32)>]) {
    // SAFETY: `Ymm2<false>` uses AVX only, which this function's caller
    // has checked the CPU for.
    unsafe { sieve_queries::<x86::Ymm2<false>, QUERIES_AVX>(sieve, queries, rough, found) }
}

/// The sieve in AVX intrinsics with fused multiply-adds.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx,fma")]
fn sieve_avx_fma(
    sieve: &Sieve,
    queries: Queries,
    rough: &mut [f32],
    found: &mut [Vec<(u32, f32)>],
) {
    // SAFETY: `Ymm2<true>` uses AVX and FMA only, which this function's
    // caller has checked the CPU for.
    unsafe { sieve_queries::<x86::Ymm2<true>, QUERIES_AVX>(sieve, queries, rough, found) }
}

/// Eight and four queries a pass measured the same within the noise
/// (domain bench, 10 components: 3.4–3.7 against 2.9–3.8 µs a query);
/// eight is one pass for each eight-row share of a batch the domain guard
/// hands a worker.
const QUERIES_AVX512: usize = 8;
const QUERIES_AVX: usize = 4;
const QUERIES_PORTABLE: usize = 2;

/// The sixteen running sums of one block of training points, held in a
/// kernel's registers: the sieve pass is written once over this.
///
/// A value is proof that the CPU has the instructions the type uses:
/// the only ways to make one, [`Lanes::load`] and [`Lanes::splat`], are
/// `unsafe` with that precondition, so the other methods can be safe.
///
/// # Safety
/// An implementation must give no other way to make a value (no public
/// field, no safe constructor), and its methods may use only the
/// instructions its documentation names.
unsafe trait Lanes: Copy {
    /// # Safety
    /// The CPU has every instruction the implementation uses.
    unsafe fn load(values: &[f32; SIEVE_LANES]) -> Self;
    /// # Safety
    /// As for [`Lanes::load`].
    unsafe fn splat(value: f32) -> Self;
    fn add(self, other: Self) -> Self;
    /// `self + a·b`, fused into one rounding where the kernel has FMA.
    fn add_product(self, a: Self, b: Self) -> Self;
    /// A bit per lane (lane i is bit i) whose sum is at or below `bound`.
    fn at_or_below(self, bound: f32) -> u32;
    fn to_array(self) -> [f32; SIEVE_LANES];
}

/// The portable lanes: plain arrays, fused or not by `FMA`.
#[derive(Clone, Copy)]
struct Plain<const FMA: bool>([f32; SIEVE_LANES]);

// SAFETY: plain arithmetic, no instruction beyond the baseline; the
// field is private to this module.
unsafe impl<const FMA: bool> Lanes for Plain<FMA> {
    #[inline(always)]
    unsafe fn load(values: &[f32; SIEVE_LANES]) -> Self {
        Plain(*values)
    }
    #[inline(always)]
    unsafe fn splat(value: f32) -> Self {
        Plain([value; SIEVE_LANES])
    }
    #[inline(always)]
    fn add(self, other: Self) -> Self {
        Plain(std::array::from_fn(|i| self.0[i] + other.0[i]))
    }
    #[inline(always)]
    fn add_product(self, a: Self, b: Self) -> Self {
        // Fused only in the test twin of the AVX-512 kernel: the
        // portable kernel leaves `mul_add` out, since on a CPU without
        // FMA it is a slow library call.
        Plain(std::array::from_fn(|i| {
            if FMA {
                a.0[i].mul_add(b.0[i], self.0[i])
            } else {
                self.0[i] + a.0[i] * b.0[i]
            }
        }))
    }
    #[inline(always)]
    fn at_or_below(self, bound: f32) -> u32 {
        self.0
            .iter()
            .enumerate()
            .fold(0, |bits, (lane, &v)| bits | (u32::from(v <= bound) << lane))
    }
    #[inline(always)]
    fn to_array(self) -> [f32; SIEVE_LANES] {
        self.0
    }
}

#[cfg(target_arch = "x86_64")]
mod x86 {
    use super::{Lanes, SIEVE_LANES};
    use std::arch::x86_64::*;

    /// Sixteen lanes in one AVX-512 register.
    #[derive(Clone, Copy)]
    pub(super) struct Zmm(__m512);

    // SAFETY: AVX-512F only (its fused multiply-add included); the field
    // is private to this module. The loads and stores are unaligned and
    // exactly 16 f32s, the size of the arrays they read and write. The
    // safe methods run only on a value `load` or `splat` made, whose
    // callers promised the CPU has AVX-512F.
    unsafe impl Lanes for Zmm {
        #[inline(always)]
        unsafe fn load(values: &[f32; SIEVE_LANES]) -> Self {
            Zmm(unsafe { _mm512_loadu_ps(values.as_ptr()) })
        }
        #[inline(always)]
        unsafe fn splat(value: f32) -> Self {
            Zmm(unsafe { _mm512_set1_ps(value) })
        }
        #[inline(always)]
        fn add(self, other: Self) -> Self {
            Zmm(unsafe { _mm512_add_ps(self.0, other.0) })
        }
        #[inline(always)]
        fn add_product(self, a: Self, b: Self) -> Self {
            Zmm(unsafe { _mm512_fmadd_ps(a.0, b.0, self.0) })
        }
        #[inline(always)]
        fn at_or_below(self, bound: f32) -> u32 {
            u32::from(unsafe { _mm512_cmp_ps_mask::<_CMP_LE_OQ>(self.0, _mm512_set1_ps(bound)) })
        }
        #[inline(always)]
        fn to_array(self) -> [f32; SIEVE_LANES] {
            let mut out = [0.0; SIEVE_LANES];
            unsafe { _mm512_storeu_ps(out.as_mut_ptr(), self.0) };
            out
        }
    }

    /// Sixteen lanes in two AVX registers, fused multiply-adds by `FMA`.
    #[derive(Clone, Copy)]
    pub(super) struct Ymm2<const FMA: bool>(__m256, __m256);

    // SAFETY: AVX, and FMA only when `FMA` is set; the fields are
    // private to this module. The loads and stores are unaligned and 8
    // f32s at offsets 0 and 8 of 16-f32 arrays. The safe methods run only
    // on a value `load` or `splat` made, whose callers promised the CPU
    // has those features.
    unsafe impl<const FMA: bool> Lanes for Ymm2<FMA> {
        #[inline(always)]
        unsafe fn load(values: &[f32; SIEVE_LANES]) -> Self {
            let p = values.as_ptr();
            unsafe { Ymm2(_mm256_loadu_ps(p), _mm256_loadu_ps(p.add(8))) }
        }
        #[inline(always)]
        unsafe fn splat(value: f32) -> Self {
            let v = unsafe { _mm256_set1_ps(value) };
            Ymm2(v, v)
        }
        #[inline(always)]
        fn add(self, other: Self) -> Self {
            unsafe {
                Ymm2(
                    _mm256_add_ps(self.0, other.0),
                    _mm256_add_ps(self.1, other.1),
                )
            }
        }
        #[inline(always)]
        fn add_product(self, a: Self, b: Self) -> Self {
            unsafe {
                if FMA {
                    Ymm2(
                        _mm256_fmadd_ps(a.0, b.0, self.0),
                        _mm256_fmadd_ps(a.1, b.1, self.1),
                    )
                } else {
                    Ymm2(
                        _mm256_add_ps(self.0, _mm256_mul_ps(a.0, b.0)),
                        _mm256_add_ps(self.1, _mm256_mul_ps(a.1, b.1)),
                    )
                }
            }
        }
        #[inline(always)]
        fn at_or_below(self, bound: f32) -> u32 {
            unsafe {
                let b = _mm256_set1_ps(bound);
                let lo = _mm256_movemask_ps(_mm256_cmp_ps::<_CMP_LE_OQ>(self.0, b)) as u32;
                let hi = _mm256_movemask_ps(_mm256_cmp_ps::<_CMP_LE_OQ>(self.1, b)) as u32;
                lo | (hi << 8)
            }
        }
        #[inline(always)]
        fn to_array(self) -> [f32; SIEVE_LANES] {
            let mut out = [0.0; SIEVE_LANES];
            let p = out.as_mut_ptr();
            unsafe {
                _mm256_storeu_ps(p, self.0);
                _mm256_storeu_ps(p.add(8), self.1);
            }
            out
        }
    }
}

/// The sieve, `Q` queries a pass over the blocks; the queries left over
/// go four, two and one a pass (seven left take three passes, not
/// seven).
///
/// # Safety
/// The CPU has every instruction `L` uses.
#[inline(always)]
unsafe fn sieve_queries<L: Lanes, const Q: usize>(
    sieve: &Sieve,
    queries: Queries,
    rough: &mut [f32],
    found: &mut [Vec<(u32, f32)>],
) {
    // SAFETY (every call): passed on from this function's caller.
    let mut done = unsafe { sieve_groups::<L, Q>(sieve, queries, 0, rough, found) };
    if Q > 4 {
        done += unsafe { sieve_groups::<L, 4>(sieve, queries, done, rough, found) };
    }
    if Q > 2 {
        done += unsafe { sieve_groups::<L, 2>(sieve, queries, done, rough, found) };
    }
    if Q > 1 {
        done += unsafe { sieve_groups::<L, 1>(sieve, queries, done, rough, found) };
    }
    debug_assert_eq!(done, queries.scaled.len(), "sieve: a query left out");
}

/// One pass for each whole group of `Q` queries from `from` on; says how
/// many queries that covered.
///
/// # Safety
/// As for [`sieve_queries`].
#[inline(always)]
unsafe fn sieve_groups<L: Lanes, const Q: usize>(
    sieve: &Sieve,
    queries: Queries,
    from: usize,
    rough: &mut [f32],
    found: &mut [Vec<(u32, f32)>],
) -> usize {
    let k = sieve.k;
    let (groups, _) = queries.scaled[from..].as_chunks::<Q>();
    for (g, ((group, rough), found)) in groups
        .iter()
        .zip(rough[from * k..].chunks_exact_mut(Q * k))
        .zip(found[from..].chunks_exact_mut(Q))
        .enumerate()
    {
        let first = from + g * Q;
        let norms = std::array::from_fn(|q| queries.norms[first + q]);
        let margins = &queries.margins[first..first + Q];
        // SAFETY: passed on from this function's caller.
        unsafe { sieve_pass::<L, Q>(sieve, group, norms, margins, rough, found) };
    }
    groups.len() * Q
}

/// One pass over the blocks for `Q` queries. Each lane's f32 squared
/// distance is the expansion ‖t‖² + ‖q‖² + Σⱼ tⱼ·(−2qⱼ): one multiply-add
/// a dimension, where the difference form (tⱼ − qⱼ)² takes a subtraction
/// as well. Its error is within the same bound
/// ([`NeighbourIndex::sieve_error_bound`]).
///
/// # Safety
/// As for [`sieve_queries`].
#[inline(always)]
unsafe fn sieve_pass<L: Lanes, const Q: usize>(
    sieve: &Sieve,
    queries: &[[f32; TREE_DIM]; Q],
    norms: [f32; Q],
    margins: &[f64],
    rough: &mut [f32],
    found: &mut [Vec<(u32, f32)>],
) {
    let k = sieve.k;
    // Below this a block's f32 distance is a candidate: the k-th smallest
    // so far plus the margin, rounded up. It only falls as the pass goes
    // on, so every row within the final bound was taken when it was seen.
    let mut bounds = [f32::INFINITY; Q];
    for (b, (block, block_norms)) in sieve
        .blocks
        .chunks_exact(sieve.dims)
        .zip(sieve.norms)
        .enumerate()
    {
        // SAFETY (every `load` and `splat`): passed on from this
        // function's caller.
        let start = unsafe { L::load(block_norms) };
        let mut acc: [L; Q] = std::array::from_fn(|q| start.add(unsafe { L::splat(norms[q]) }));
        for (j, coords) in block.iter().enumerate() {
            let t = unsafe { L::load(coords) };
            for (acc, query) in acc.iter_mut().zip(queries) {
                *acc = acc.add_product(t, unsafe { L::splat(query[j]) });
            }
        }
        // Most blocks hold no candidate: one compare a query.
        for (q, acc) in acc.iter().enumerate() {
            let hits = acc.at_or_below(bounds[q]);
            if hits != 0 {
                take_hits(
                    &acc.to_array(),
                    hits,
                    b * SIEVE_LANES,
                    sieve.n,
                    (&mut bounds[q], margins[q]),
                    &mut rough[q * k..(q + 1) * k],
                    &mut found[q],
                );
            }
        }
    }
}

/// The lanes of one block's sums whose bit is set in `hits`: each still
/// within the query's bound (it may have fallen since the bits were
/// taken) and a real row (below `n`) becomes a candidate, joins the run of
/// the k smallest if it is smaller than the largest there, and then
/// lowers the bound to the new k-th smallest plus the margin.
#[inline(always)]
fn take_hits(
    lanes: &[f32; SIEVE_LANES],
    mut hits: u32,
    first_row: usize,
    n: usize,
    (bound, margin): (&mut f32, f64),
    run: &mut [f32],
    found: &mut Vec<(u32, f32)>,
) {
    let k = run.len();
    while hits != 0 {
        let lane = hits.trailing_zeros() as usize;
        hits &= hits - 1;
        let (row, v) = (first_row + lane, lanes[lane]);
        if v <= *bound && row < n {
            found.push((row as u32, v));
            if keep_if_smaller(run, v) {
                *bound = round_up_f32(f64::from(run[k - 1]) + margin);
            }
        }
    }
}

/// The squared norm of a point rounded to f32, as the sieve's
/// expansion adds it: the f32 coordinates squared and summed in f64,
/// then rounded to f32.
fn rounded_norm2(point: &[f64]) -> f32 {
    point
        .iter()
        .map(|&v| f64::from(v as f32))
        .map(|v| v * v)
        .sum::<f64>() as f32
}

/// The smallest f32 at or above `x`.
fn round_up_f32(x: f64) -> f32 {
    let r = x as f32;
    if f64::from(r) < x { r.next_up() } else { r }
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
    use ndarray::{Array2, ArrayView1, Axis, concatenate};
    use rand::{Rng, SeedableRng};
    use rand_xoshiro::Xoshiro256PlusPlus;

    /// Every scan kernel this CPU runs.
    fn kernels_here() -> Vec<Kernel> {
        Kernel::WIDEST_FIRST
            .iter()
            .copied()
            .filter(|k| k.supported())
            .collect()
    }

    /// Twin of the fast path: the scan must give the tree's k-NN distance
    /// to the bit, over every tree dimension, k larger than n, duplicate
    /// rows (more than a tree bucket share one point), queries that sit on
    /// training points (ties at distance 0), coordinates on a coarse grid
    /// (many exact ties at the k-th distance), points packed closer than
    /// f32 can tell apart (the sieve's margin must keep every row that
    /// could be nearest), and queries far away or beyond the sieve's range
    /// (the exact scan of every row).
    #[test]
    fn every_scan_kernel_equals_the_tree_to_the_bit() {
        let kernels = kernels_here();
        // Say which ran: a kernel this CPU lacks goes untested here.
        eprintln!("scan kernels checked on this CPU: {kernels:?}");
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(11);
        let mut best = ScanScratch::default();
        for case in 0..120 {
            let dims = 1 + case % TREE_DIM;
            // The first cases hold exactly 1, 15, 16 and 17 rows: less
            // than one block of the sieve, one, and one and a row.
            let (n, n_copies) = match case {
                0..4 => ([1, 15, 16, 17][case], 0),
                _ => (rng.gen_range(1..300), rng.gen_range(0..40)),
            };
            // Case 0 mod 4: a coarse grid; 1 mod 4: points 1e-4 apart
            // around 1,000, where one f32 step is 6.1e-5; 3 mod 8: every
            // point beyond the sieve's range, so the index scans exactly.
            let draw = |rng: &mut Xoshiro256PlusPlus| {
                let v: f64 = rng.gen_range(-3.0..3.0);
                match (case % 4, case % 8) {
                    (0, _) => v.round(),
                    (1, _) => 1000.0 + v * 1e-4,
                    (_, 3) => v * 1e19,
                    _ => v,
                }
            };
            let base = Array2::from_shape_fn((n, dims), |_| draw(&mut rng));
            let copies = base.select(Axis(0), &vec![0; n_copies]);
            let train = concatenate(Axis(0), &[base.view(), copies.view()]).unwrap();
            let index = NeighbourIndex::build(train.view()).unwrap();
            let queries: Vec<Point> = (0..30)
                .map(|q| {
                    if q % 5 == 0 {
                        pad(train.row(rng.gen_range(0..train.nrows()))).unwrap()
                    } else if q == 7 || q == 13 {
                        // Far out, then beyond the f32 sieve's range.
                        let scale = if q == 7 { 1e5 } else { 1e19 };
                        let row: Vec<f64> = (0..dims).map(|_| draw(&mut rng) * scale).collect();
                        pad(ndarray::ArrayView1::from(&row)).unwrap()
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

    /// The error bound the sieve's margin rests on (derived at
    /// `NeighbourIndex::sieve_error_bound`), checked against f64
    /// arithmetic, whose own error is some 10⁻⁹ of the bound: points at
    /// scales from 1e-30 (where f32 squares underflow) to 1e17 (near the
    /// sieve's range, [`SIEVE_MAX_ABS`]), in every
    /// tree dimension, with queries far from the point, on it, or a
    /// millionth of the scale away from it far from the origin (where the
    /// difference cancels).
    #[test]
    fn the_sieve_error_stays_within_its_proven_bound() {
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(12);
        let kernels = kernels_here();
        let mut scratch = ScanScratch::default();
        let mut tightest: f64 = 0.0;
        for case in 0..20_000 {
            let dims = 1 + case % TREE_DIM;
            let scale = 10f64.powi(rng.gen_range(-30..=17));
            // Every coordinate within the sieve's range, as it requires.
            let centre = if case % 2 == 0 || scale > 1e14 {
                0.0
            } else {
                1e3 * scale
            };
            let t: Vec<f64> = (0..dims)
                .map(|_| centre + rng.gen_range(-1.0..1.0) * scale)
                .collect();
            let q: Vec<f64> = match case % 3 {
                0 => t
                    .iter()
                    .map(|v| v + rng.gen_range(-1.0..1.0) * scale * 1e-6)
                    .collect(),
                1 => t.clone(),
                _ => (0..dims)
                    .map(|_| rng.gen_range(-1.0..1.0) * scale)
                    .collect(),
            };
            let index =
                NeighbourIndex::build(Array2::from_shape_vec((1, dims), t.clone()).unwrap().view())
                    .unwrap();
            let exact: f64 = t.iter().zip(&q).map(|(a, b)| (a - b) * (a - b)).sum();
            let bound = index.sieve_error_bound(&q);
            // Each kernel this CPU runs, on the one row: the f32 distance
            // it kept is its k = 1 run. The kernels add a term by rounding
            // the product and the sum each, or once by a fused multiply-add.
            let query = pad(ArrayView1::from(&q)).unwrap();
            for &kernel in &kernels {
                index.scan_mean_distances_by(kernel, &[query], 1, &mut scratch);
                let rough = scratch.rough[0];
                let error = (f64::from(rough) - exact).abs();
                assert!(
                    error <= bound,
                    "case {case} (dims {dims}, scale {scale:e}, {kernel:?}): f32 {rough} \
                     against {exact:e}, error {error:e} over the bound {bound:e}"
                );
                tightest = tightest.max(error / bound);
            }
        }
        // Say how much of the bound the worst case used.
        eprintln!("largest error seen: {tightest:.3} of the bound");
    }

    /// Rows the exact step computes for the one query of the last scan:
    /// the candidates within its final limit.
    fn rechecked(scratch: &ScanScratch, k: usize) -> usize {
        let limit = f64::from(scratch.rough[k - 1]) + scratch.margins[0];
        scratch.found[0]
            .iter()
            .filter(|&&(_, d)| f64::from(d) <= limit)
            .count()
    }

    /// The sieve's filter at work. Fifty rows on a shell round the query
    /// whose radii differ by 1e-9, far below what f32 resolves, must all
    /// be rechecked, so the exact nearest among them wins; 500 rows
    /// beyond twice the radius must not be. And on uniform points the
    /// exact step sees a small share of the rows. Every answer is the
    /// tree's to the bit.
    #[test]
    fn the_sieve_rechecks_every_near_tie_and_little_else() {
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(13);
        let kernels = kernels_here();
        let mut scratch = ScanScratch::default();
        let k = 5;
        for dims in [2, 10, 16] {
            let q: Vec<f64> = (0..dims).map(|_| rng.gen_range(-1.0..1.0)).collect();
            let direction = |rng: &mut Xoshiro256PlusPlus| {
                let u: Vec<f64> = (0..dims).map(|_| rng.gen_range(-1.0..1.0)).collect();
                let norm = u.iter().map(|v| v * v).sum::<f64>().sqrt();
                u.into_iter().map(move |v| v / norm)
            };
            let mut rows = Vec::new();
            for i in 0..550 {
                let radius = if i < 50 {
                    1.0 + i as f64 * 1e-9
                } else {
                    2.0 + rng.gen_range(0.0..1.0)
                };
                let u: Vec<f64> = direction(&mut rng).collect();
                rows.extend(q.iter().zip(u).map(|(c, u)| c + radius * u));
            }
            // Shuffled, so the near ties are not all seen first.
            let mut order: Vec<usize> = (0..550).collect();
            for i in (1..order.len()).rev() {
                order.swap(i, rng.gen_range(0..=i));
            }
            let train = Array2::from_shape_fn((550, dims), |(i, j)| rows[order[i] * dims + j]);
            let index = NeighbourIndex::build(train.view()).unwrap();
            let query = pad(ArrayView1::from(&q)).unwrap();
            let tree = index.mean_distance(&query, k);
            for &kernel in &kernels {
                let scan = index.scan_mean_distances_by(kernel, &[query], k, &mut scratch)[0];
                assert_eq!(tree.to_bits(), scan.to_bits(), "{dims} dims, {kernel:?}");
                assert_eq!(rechecked(&scratch, k), 50, "{dims} dims, {kernel:?}");
            }
        }
        let train = Array2::from_shape_fn((2000, 10), |_| rng.gen_range(-1.0..1.0));
        let index = NeighbourIndex::build(train.view()).unwrap();
        for _ in 0..20 {
            let q: Vec<f64> = (0..10).map(|_| rng.gen_range(-1.0..1.0)).collect();
            let query = pad(ArrayView1::from(&q)).unwrap();
            let tree = index.mean_distance(&query, k);
            for &kernel in &kernels {
                let scan = index.scan_mean_distances_by(kernel, &[query], k, &mut scratch)[0];
                assert_eq!(tree.to_bits(), scan.to_bits(), "uniform, {kernel:?}");
                let seen = rechecked(&scratch, k);
                assert!(
                    (k..100).contains(&seen),
                    "uniform, {kernel:?}: {seen} of 2,000 rows rechecked"
                );
            }
        }
    }

    #[test]
    fn scan_of_an_empty_request_is_nan() {
        let train = Array2::from_shape_fn((4, 2), |(i, j)| (i + j) as f64);
        let index = NeighbourIndex::build(train.view()).unwrap();
        let mut best = ScanScratch::default();
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
