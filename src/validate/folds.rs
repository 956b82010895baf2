//! Fold designs: random, cluster-grouped (k-means), grouped by a column, and
//! contiguous blocks in time order; and [`FoldDesign`], which makes the
//! folds of any subset of rows the same way, for the inner level of nested
//! cross-validation.

use std::collections::HashMap;
use std::hash::Hash;

use linfa::DatasetBase;
use linfa::traits::{Fit, Predict};
use linfa_clustering::KMeans;
use ndarray::{Array2, ArrayView2, Axis};
use rand::SeedableRng;
use rand::seq::SliceRandom;
use rand_xoshiro::Xoshiro256PlusPlus;

use super::{Error, Folds};

/// k-means restarts (k-means++ seeding each time; the lowest inertia wins).
/// Three is our choice: the folds only need a sensible partition, not the
/// best of many.
const KMEANS_RUNS: usize = 3;
/// Iteration cap of one k-means run.
const KMEANS_MAX_ITERATIONS: u64 = 300;
/// Convergence: the Euclidean (Frobenius) norm of the change of the centroid
/// matrix in one update, linfa-clustering's own criterion and default.
const KMEANS_TOLERANCE: f64 = 1e-4;

/// The number of k-means clusters used when none is given:
/// min(⌊n/5⌋, max(5K, 25)), and never fewer than K nor more than n.
///
/// Our choice (common practice has no single rule): about five clusters per
/// outer fold lets the greedy assignment balance fold sizes and leaves about
/// four per inner fold (K inner folds over the K−1 outer-training folds);
/// ⌊n/5⌋ keeps clusters at five rows or more on average, so a cluster is a
/// neighbourhood rather than a single point.
pub fn default_n_clusters(n: usize, k: usize) -> usize {
    (n / 5).min((5 * k).max(25)).max(k).min(n)
}

/// A seed for the `stream`-th independent use of `seed`: one SplitMix64 step
/// (Steele, Lea & Flood, "Fast splittable pseudorandom number generators",
/// OOPSLA 2014; constants as in Vigna's reference splitmix64.c), so nearby
/// streams get unrelated seeds.
pub fn derive_seed(seed: u64, stream: u64) -> u64 {
    let mut z = seed.wrapping_add(stream.wrapping_add(1).wrapping_mul(0x9E37_79B9_7F4A_7C15));
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

fn check_k(n: usize, k: usize) -> Result<(), Error> {
    if k < 2 {
        return Err(Error::TooFewFolds { k });
    }
    if k > n {
        return Err(Error::MoreFoldsThanRows { k, n });
    }
    Ok(())
}

impl Folds {
    /// A seeded shuffle dealt round-robin: fold sizes differ by at most one.
    pub fn random(n: usize, k: usize, seed: u64) -> Result<Folds, Error> {
        check_k(n, k)?;
        let mut order: Vec<usize> = (0..n).collect();
        order.shuffle(&mut Xoshiro256PlusPlus::seed_from_u64(seed));
        let mut fold_of = vec![0; n];
        for (position, &row) in order.iter().enumerate() {
            fold_of[row] = position % k;
        }
        Ok(Folds { k, fold_of })
    }

    /// Cluster-grouped folds: k-means on the standardised descriptors
    /// (`n_clusters`, default [`default_n_clusters`]), then whole clusters per
    /// fold as in [`Folds::groups`], so near-duplicates never straddle train
    /// and test. Returns the folds and each row's cluster label.
    pub fn cluster(
        x_std: ArrayView2<f64>,
        k: usize,
        seed: u64,
        n_clusters: Option<usize>,
    ) -> Result<(Folds, Vec<usize>), Error> {
        check_k(x_std.nrows(), k)?;
        let labels = kmeans_labels(x_std, k, seed, n_clusters)?;
        let folds = group_folds(&labels, k, seed, "clusters")?;
        Ok((folds, labels))
    }

    /// Whole groups per fold: groups from the largest down, each into the
    /// fold that has the fewest rows so far (ties: the lowest fold index);
    /// the seed only orders groups of equal size. Fewer groups than folds is
    /// an error naming both numbers.
    pub fn groups<L: Eq + Hash>(labels: &[L], k: usize, seed: u64) -> Result<Folds, Error> {
        check_k(labels.len(), k)?;
        group_folds(labels, k, seed, "groups")
    }

    /// Contiguous blocks in time order (stable for equal times), sized as
    /// numpy's `array_split` sizes them: the first n mod K blocks have one row
    /// more. A block boundary never separates equal times (the later block
    /// gives way), so a tie never straddles train and test.
    ///
    /// This is blocked cross-validation: a fold's model is trained on the
    /// blocks before and after it, not only on the past.
    pub fn time_order(times: &[f64], k: usize) -> Result<Folds, Error> {
        let n = times.len();
        check_k(n, k)?;
        let mut order: Vec<usize> = (0..n).collect();
        order.sort_by(|&a, &b| times[a].total_cmp(&times[b]));
        let mut fold_of = vec![0; n];
        let (base, extra) = (n / k, n % k);
        let mut start = 0;
        for fold in 0..k {
            let mut end = (start + base + usize::from(fold < extra)).min(n);
            if fold == k - 1 {
                end = n;
            }
            while end < n && end > 0 && times[order[end]] == times[order[end - 1]] {
                end += 1;
            }
            if end <= start {
                let distinct = count_distinct(times);
                return Err(Error::TooFewDistinctTimes { distinct, folds: k });
            }
            for &row in &order[start..end] {
                fold_of[row] = fold;
            }
            start = end;
        }
        Ok(Folds { k, fold_of })
    }

    /// The number of rows in each fold.
    pub fn sizes(&self) -> Vec<usize> {
        let mut sizes = vec![0; self.k];
        for &f in &self.fold_of {
            sizes[f] += 1;
        }
        sizes
    }
}

fn count_distinct(times: &[f64]) -> usize {
    let mut sorted = times.to_vec();
    sorted.sort_by(f64::total_cmp);
    sorted.dedup();
    sorted.len()
}

fn group_folds<L: Eq + Hash>(
    labels: &[L],
    k: usize,
    seed: u64,
    what: &'static str,
) -> Result<Folds, Error> {
    // Groups numbered by first appearance, so the result depends on the
    // labels' pattern and the seed, not on hashing.
    let mut index_of: HashMap<&L, usize> = HashMap::new();
    let mut group_of = Vec::with_capacity(labels.len());
    let mut sizes: Vec<usize> = Vec::new();
    for label in labels {
        let next = index_of.len();
        let g = *index_of.entry(label).or_insert(next);
        if g == sizes.len() {
            sizes.push(0);
        }
        sizes[g] += 1;
        group_of.push(g);
    }
    if sizes.len() < k {
        return Err(Error::TooFewGroups {
            groups: sizes.len(),
            folds: k,
            what,
        });
    }
    let mut order: Vec<usize> = (0..sizes.len()).collect();
    order.shuffle(&mut Xoshiro256PlusPlus::seed_from_u64(seed));
    order.sort_by_key(|&g| std::cmp::Reverse(sizes[g]));
    let mut fold_rows = vec![0usize; k];
    let mut fold_of_group = vec![0usize; sizes.len()];
    for g in order {
        let fold = (0..k).min_by_key(|&f| fold_rows[f]).unwrap_or(0);
        fold_rows[fold] += sizes[g];
        fold_of_group[g] = fold;
    }
    let fold_of = group_of.iter().map(|&g| fold_of_group[g]).collect();
    Ok(Folds { k, fold_of })
}

/// How much work one clustering may do.
#[derive(Clone, Copy, Debug)]
struct KMeansBudget {
    runs: usize,
    max_iterations: u64,
    tolerance: f64,
}

const DEFAULT_BUDGET: KMeansBudget = KMeansBudget {
    runs: KMEANS_RUNS,
    max_iterations: KMEANS_MAX_ITERATIONS,
    tolerance: KMEANS_TOLERANCE,
};

/// k-means labels by linfa-clustering (k-means++ seeding, seeded
/// Xoshiro256++), with the convergence check it does not make itself.
fn kmeans_labels(
    x_std: ArrayView2<f64>,
    k: usize,
    seed: u64,
    n_clusters: Option<usize>,
) -> Result<Vec<usize>, Error> {
    let n = x_std.nrows();
    let clusters = n_clusters.unwrap_or_else(|| default_n_clusters(n, k));
    if clusters < k {
        return Err(Error::TooFewGroups {
            groups: clusters,
            folds: k,
            what: "clusters",
        });
    }
    if clusters > n {
        return Err(Error::MoreClustersThanRows { clusters, n });
    }
    let (labels, shift) = kmeans(x_std, clusters, seed, DEFAULT_BUDGET)?;
    if shift >= KMEANS_TOLERANCE {
        // linfa stops at the iteration cap without saying so.
        tracing::warn!(
            clusters,
            shift,
            tolerance = KMEANS_TOLERANCE,
            max_iterations = KMEANS_MAX_ITERATIONS,
            "k-means stopped at its iteration cap before converging; the cluster \
             folds are still whole clusters, but another seed may give other folds"
        );
    }
    Ok(labels)
}

/// Runs k-means and returns the labels and how far one more update step
/// would move the centroids (below the tolerance: converged).
fn kmeans(
    x_std: ArrayView2<f64>,
    clusters: usize,
    seed: u64,
    budget: KMeansBudget,
) -> Result<(Vec<usize>, f64), Error> {
    let records = x_std.to_owned();
    let dataset = DatasetBase::from(records.clone());
    let rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    let model = KMeans::params_with_rng(clusters, rng)
        .n_runs(budget.runs)
        .max_n_iterations(budget.max_iterations)
        .tolerance(budget.tolerance)
        .fit(&dataset)
        .map_err(|e| Error::KMeans {
            message: e.to_string(),
        })?;
    let labels = model.predict(&records);
    let shift = next_update_shift(model.centroids(), records.view(), labels.as_slice());
    Ok((labels.to_vec(), shift))
}

/// How far one more update would move the centroids: linfa's update treats
/// the old centroid as one more member of its cluster ("m_k-means"), so the
/// same rule is applied here.
fn next_update_shift(centroids: &Array2<f64>, x: ArrayView2<f64>, labels: Option<&[usize]>) -> f64 {
    let Some(labels) = labels else {
        return f64::INFINITY;
    };
    let mut sums = centroids.clone();
    let mut counts = vec![1.0f64; centroids.nrows()];
    for (row, &c) in x.axis_iter(Axis(0)).zip(labels) {
        let mut s = sums.row_mut(c);
        s += &row;
        counts[c] += 1.0;
    }
    for (mut s, &count) in sums.axis_iter_mut(Axis(0)).zip(&counts) {
        s /= count;
    }
    (&sums - centroids).mapv(|d| d * d).sum().sqrt()
}

/// How the rows of a table are split into folds, with what each design
/// needs per row, so any subset of rows (the outer-training rows of nested
/// cross-validation) can be split the same way.
#[derive(Clone, Debug, PartialEq)]
pub enum FoldDesign {
    /// A seeded shuffle.
    Random,
    /// Whole clusters per fold; the k-means labels are computed once on all
    /// rows, and inner folds reuse them (no re-clustering).
    Cluster { labels: Vec<usize> },
    /// Whole groups of a group column per fold.
    Group { labels: Vec<usize> },
    /// Contiguous blocks in time order.
    Time { times: Vec<f64> },
}

impl FoldDesign {
    /// Clusters all rows by k-means on the standardised descriptors (see
    /// [`Folds::cluster`]); the folds are made later, by [`FoldDesign::folds`].
    pub fn clusters(
        x_std: ArrayView2<f64>,
        k: usize,
        seed: u64,
        n_clusters: Option<usize>,
    ) -> Result<FoldDesign, Error> {
        check_k(x_std.nrows(), k)?;
        let labels = kmeans_labels(x_std, k, seed, n_clusters)?;
        Ok(FoldDesign::Cluster { labels })
    }

    /// Groups from a group column's values.
    pub fn groups<L: Eq + Hash>(values: &[L]) -> FoldDesign {
        let mut index_of: HashMap<&L, usize> = HashMap::new();
        let labels = values
            .iter()
            .map(|v| {
                let next = index_of.len();
                *index_of.entry(v).or_insert(next)
            })
            .collect();
        FoldDesign::Group { labels }
    }

    /// The design's name, as the command line and the report spell it.
    pub fn name(&self) -> &'static str {
        match self {
            FoldDesign::Random => "random",
            FoldDesign::Cluster { .. } => "cluster",
            FoldDesign::Group { .. } => "group",
            FoldDesign::Time { .. } => "time",
        }
    }

    /// The number of rows the design knows (`None` for random folds, which
    /// fit any number).
    pub fn n_rows(&self) -> Option<usize> {
        match self {
            FoldDesign::Random => None,
            FoldDesign::Cluster { labels } | FoldDesign::Group { labels } => Some(labels.len()),
            FoldDesign::Time { times } => Some(times.len()),
        }
    }

    /// `k` folds of the rows `rows` (indices into the full table); the
    /// result is indexed by position in `rows`.
    pub fn folds(&self, rows: &[usize], k: usize, seed: u64) -> Result<Folds, Error> {
        match self {
            FoldDesign::Random => Folds::random(rows.len(), k, seed),
            FoldDesign::Cluster { labels } => {
                check_k(rows.len(), k)?;
                let sub: Vec<usize> = rows.iter().map(|&r| labels[r]).collect();
                group_folds(&sub, k, seed, "clusters")
            }
            FoldDesign::Group { labels } => {
                check_k(rows.len(), k)?;
                let sub: Vec<usize> = rows.iter().map(|&r| labels[r]).collect();
                group_folds(&sub, k, seed, "groups")
            }
            FoldDesign::Time { times } => {
                let sub: Vec<f64> = rows.iter().map(|&r| times[r]).collect();
                Folds::time_order(&sub, k)
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::Rng;

    /// Three well-separated blobs in 2-D, 40 points each.
    fn blobs() -> Array2<f64> {
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(5);
        let centres = [(0.0, 0.0), (10.0, 0.0), (0.0, 10.0)];
        Array2::from_shape_fn((120, 2), |(i, j)| {
            let c = centres[i / 40];
            let base = if j == 0 { c.0 } else { c.1 };
            base + rng.gen_range(-1.0..1.0)
        })
    }

    #[test]
    fn the_convergence_check_tells_a_capped_run_from_a_converged_one() {
        let x = blobs();
        let budget = |max_iterations| KMeansBudget {
            runs: 1,
            max_iterations,
            tolerance: KMEANS_TOLERANCE,
        };
        let (_, settled) = kmeans(x.view(), 3, 1, budget(300)).unwrap();
        assert!(settled < KMEANS_TOLERANCE, "shift {settled}");
        // Random restarts of many clusters cannot settle in one step.
        let (_, capped) = kmeans(x.view(), 12, 1, budget(1)).unwrap();
        assert!(capped >= KMEANS_TOLERANCE, "shift {capped}");
    }

    #[test]
    fn derived_seeds_differ_between_streams() {
        let seeds: Vec<u64> = (0..100).map(|s| derive_seed(7, s)).collect();
        let mut unique = seeds.clone();
        unique.sort_unstable();
        unique.dedup();
        assert_eq!(unique.len(), seeds.len());
        assert_ne!(derive_seed(7, 0), derive_seed(8, 0));
    }
}
