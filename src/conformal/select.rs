//! Order statistics of a union of sorted arrays without merging them: the
//! fast path of CV+, where the K arrays are one fold's sorted residuals
//! shifted by that fold model's prediction.
//!
//! Discard-by-prefix selection, the K-array form of the classic two-array
//! k-th element search: with r the rank still sought and L arrays still
//! holding elements, take s = ⌊r/L⌋ (at least 1) and look at the s-th
//! remaining element of every array; the array whose s-th element is
//! smallest has its first s elements among the r smallest of the union
//! (at most L·s − 1 ≤ r − 1 elements lie strictly below any of them), so
//! they are discarded and r falls by s. The rank is searched from the
//! nearer end (the upper CV+ rank is near n, i.e. a small rank from the
//! top). Each round costs K reads and removes at least a 1/K share of the
//! rank, so a query is O(K² log r) reads, against O(K log² n) binary-search
//! steps for weighted-median pruning (kept below as the test twin) and O(n)
//! for materialising every shifted value. Only elements are ever returned,
//! each computed by the same expression as the brute force, so the answer
//! is the same value to the bit.

/// One fold's sorted residuals R (ascending) seen through a shift: either
/// the ascending values μ + R, or the ascending values μ − R (R read from
/// the end).
#[derive(Clone, Copy)]
pub(crate) struct Shifted<'a> {
    pub prediction: f64,
    pub residuals: &'a [f64],
    pub minus: bool,
}

impl Shifted<'_> {
    fn len(&self) -> usize {
        self.residuals.len()
    }

    /// The j-th smallest value, computed by exactly the expression a caller
    /// materialising every value would use (μ − R or μ + R), so pivots and
    /// brute force agree to the bit.
    fn get(&self, j: usize) -> f64 {
        if self.minus {
            self.prediction - self.residuals[self.residuals.len() - 1 - j]
        } else {
            self.prediction + self.residuals[j]
        }
    }

    /// First index in lo..hi whose value fails `keep` (values ascending).
    #[cfg(test)]
    fn partition(&self, lo: usize, hi: usize, keep: impl Fn(f64) -> bool) -> usize {
        let (mut lo, mut hi) = (lo, hi);
        while lo < hi {
            let mid = lo + (hi - lo) / 2;
            if keep(self.get(mid)) {
                lo = mid + 1;
            } else {
                hi = mid;
            }
        }
        lo
    }
}

/// Arrays a query keeps its bookkeeping for on the stack; more fall back
/// to one allocation.
const STACK_ARRAYS: usize = 32;

/// The `rank`-th smallest (1-based) value of the union of the arrays, or
/// `None` when the rank is outside 1..=total.
pub(crate) fn rank_of_union(arrays: &[Shifted<'_>], rank: usize) -> Option<f64> {
    let total: usize = arrays.iter().map(Shifted::len).sum();
    if rank == 0 || rank > total {
        return None;
    }
    let mut stack = [0usize; STACK_ARRAYS];
    let mut heap = Vec::new();
    let taken: &mut [usize] = if arrays.len() <= STACK_ARRAYS {
        &mut stack[..arrays.len()]
    } else {
        heap.resize(arrays.len(), 0);
        &mut heap
    };
    // The rank-th smallest is the (total + 1 − rank)-th largest.
    let from_top = total + 1 - rank;
    if from_top < rank {
        select(
            arrays,
            from_top,
            taken,
            |a, t| a.get(a.len() - 1 - t),
            |x, y| x.total_cmp(&y).is_gt(),
        )
    } else {
        select(
            arrays,
            rank,
            taken,
            |a, t| a.get(t),
            |x, y| x.total_cmp(&y).is_lt(),
        )
    }
}

/// The `rank`-th element in the order `first` (strictly before) of the
/// union, where `at(a, t)` is array a's t-th element in that order. The
/// order is `total_cmp`'s, as the brute force sorts by: −0 comes before +0,
/// so even a tie of the two zeros gives the brute force's bits.
/// `taken` starts at zero: how many elements of each array are discarded.
fn select<'a>(
    arrays: &[Shifted<'a>],
    mut rank: usize,
    taken: &mut [usize],
    at: impl Fn(&Shifted<'a>, usize) -> f64,
    first: impl Fn(f64, f64) -> bool,
) -> Option<f64> {
    loop {
        let live = arrays
            .iter()
            .zip(taken.iter())
            .filter(|(a, t)| **t < a.len())
            .count();
        let step = (rank / live.max(1)).max(1);
        // (array, elements it would give up, the last of them)
        let mut pick: Option<(usize, usize, f64)> = None;
        for (i, a) in arrays.iter().enumerate() {
            let left = a.len() - taken[i];
            if left == 0 {
                continue;
            }
            let s = step.min(left);
            let v = at(a, taken[i] + s - 1);
            if pick.is_none_or(|(_, _, best)| first(v, best)) {
                pick = Some((i, s, v));
            }
        }
        // The caller's rank check leaves an element whenever rank ≥ 1.
        let (i, s, v) = pick?;
        if s == rank {
            // One array left (its rank-th element), or rank 1 (the first head).
            return Some(v);
        }
        taken[i] += s;
        rank -= s;
    }
}

/// Weighted-median pruning, the earlier fast path: the twin the selection
/// above is tested against. Each round takes the middle element of every
/// array's live window, picks their median weighted by window size as a
/// pivot, counts the elements below and at the pivot by binary search, and
/// discards the side that cannot hold the answer.
#[cfg(test)]
fn rank_of_union_by_pruning(arrays: &[Shifted<'_>], rank: usize) -> Option<f64> {
    let total: usize = arrays.iter().map(Shifted::len).sum();
    if rank == 0 || rank > total {
        return None;
    }
    let mut lo = vec![0usize; arrays.len()];
    let mut hi: Vec<usize> = arrays.iter().map(Shifted::len).collect();
    let mut rank = rank;
    let mut middles: Vec<(f64, usize)> = Vec::with_capacity(arrays.len());
    let mut lt = vec![0usize; arrays.len()];
    let mut le = vec![0usize; arrays.len()];
    loop {
        middles.clear();
        for (a, (&l, &h)) in arrays.iter().zip(lo.iter().zip(&hi)) {
            if h > l {
                middles.push((a.get(l + (h - l - 1) / 2), h - l));
            }
        }
        let pivot = weighted_median(&mut middles);
        let (mut below, mut at_or_below) = (0usize, 0usize);
        for (i, a) in arrays.iter().enumerate() {
            lt[i] = a.partition(lo[i], hi[i], |v| v < pivot) - lo[i];
            le[i] = a.partition(lo[i] + lt[i], hi[i], |v| v <= pivot) - lo[i];
            below += lt[i];
            at_or_below += le[i];
        }
        if rank <= below {
            for i in 0..arrays.len() {
                hi[i] = lo[i] + lt[i];
            }
        } else if rank <= at_or_below {
            return Some(pivot);
        } else {
            rank -= at_or_below;
            for i in 0..arrays.len() {
                lo[i] += le[i];
            }
        }
    }
}

#[cfg(test)]
/// The lower weighted median of (value, weight) pairs: the smallest value
/// whose cumulative weight reaches half the total. `items` is non-empty
/// whenever elements remain, which the caller's rank check guarantees.
fn weighted_median(items: &mut [(f64, usize)]) -> f64 {
    items.sort_by(|a, b| a.0.total_cmp(&b.0));
    let total: usize = items.iter().map(|&(_, w)| w).sum();
    let mut cumulative = 0;
    for &(v, w) in items.iter() {
        cumulative += w;
        if 2 * cumulative >= total {
            return v;
        }
    }
    items.last().map_or(f64::NAN, |&(v, _)| v)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ranks_of_a_small_union_by_hand() {
        // μ + R: fold 0 gives 1 + [0, 2] = {1, 3}, fold 1 gives 10 + [1] = {11}.
        let r0 = [0.0, 2.0];
        let r1 = [1.0];
        let upper = [
            Shifted {
                prediction: 1.0,
                residuals: &r0,
                minus: false,
            },
            Shifted {
                prediction: 10.0,
                residuals: &r1,
                minus: false,
            },
        ];
        let got: Vec<_> = (0..=4).map(|r| rank_of_union(&upper, r)).collect();
        assert_eq!(got, vec![None, Some(1.0), Some(3.0), Some(11.0), None]);
        // μ − R: {1 − 2, 1 − 0} = {−1, 1} and {10 − 1} = {9}.
        let lower = upper.map(|s| Shifted { minus: true, ..s });
        let got: Vec<_> = (1..=3).map(|r| rank_of_union(&lower, r)).collect();
        assert_eq!(got, vec![Some(-1.0), Some(1.0), Some(9.0)]);
    }

    /// Twin of the fast path: every rank of random unions, with many ties
    /// (values on a coarse grid), empty arrays and both shift directions,
    /// equals weighted-median pruning and a sort of all materialised
    /// values, to the bit.
    #[test]
    fn every_rank_equals_pruning_and_sorting() {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(5);
        for case in 0..400 {
            let k = rng.gen_range(1..9);
            let coarse = case % 2 == 0;
            let residuals: Vec<Vec<f64>> = (0..k)
                .map(|_| {
                    let len = if rng.gen_bool(0.15) {
                        0
                    } else {
                        rng.gen_range(1..60)
                    };
                    let mut r: Vec<f64> = (0..len)
                        .map(|_| {
                            let v: f64 = rng.gen_range(0.0..3.0);
                            if coarse { (v * 2.0).round() / 2.0 } else { v }
                        })
                        .collect();
                    r.sort_by(f64::total_cmp);
                    r
                })
                .collect();
            let predictions: Vec<f64> = (0..k)
                .map(|_| {
                    let v: f64 = rng.gen_range(-2.0..2.0);
                    if coarse { v.round() } else { v }
                })
                .collect();
            for minus in [false, true] {
                let arrays: Vec<Shifted<'_>> = predictions
                    .iter()
                    .zip(&residuals)
                    .map(|(&prediction, r)| Shifted {
                        prediction,
                        residuals: r,
                        minus,
                    })
                    .collect();
                let mut all: Vec<f64> = arrays
                    .iter()
                    .flat_map(|a| (0..a.len()).map(move |j| a.get(j)))
                    .collect();
                all.sort_by(f64::total_cmp);
                for rank in 0..=all.len() + 1 {
                    let want = (rank >= 1 && rank <= all.len()).then(|| all[rank - 1]);
                    let got = rank_of_union(&arrays, rank);
                    let twin = rank_of_union_by_pruning(&arrays, rank);
                    let bits = |v: Option<f64>| v.map(f64::to_bits);
                    assert_eq!(bits(got), bits(want), "case {case}, rank {rank}");
                    // The twin compares with `<`, blind to the sign of zero.
                    assert_eq!(twin, want, "case {case}, rank {rank} (twin)");
                }
            }
        }
    }

    #[test]
    fn empty_arrays_are_skipped() {
        let r = [0.5, 0.5, 0.5];
        let arrays = [
            Shifted {
                prediction: 0.0,
                residuals: &[],
                minus: false,
            },
            Shifted {
                prediction: 0.0,
                residuals: &r,
                minus: false,
            },
            Shifted {
                prediction: 0.0,
                residuals: &[],
                minus: false,
            },
        ];
        assert_eq!(rank_of_union(&arrays, 3), Some(0.5));
        assert_eq!(rank_of_union(&arrays, 4), None);
    }
}
