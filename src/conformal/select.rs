//! Order statistics of a union of sorted arrays without merging them: the
//! fast path of CV+, where the K arrays are one fold's sorted residuals
//! shifted by that fold model's prediction.
//!
//! Weighted-median pruning: each round takes the middle element of every
//! array's live window, picks their median weighted by window size as a
//! pivot, counts the elements below and at the pivot by binary search in
//! each window, and discards the side that cannot hold the answer. At
//! least a quarter of the live elements go each round, so a query costs
//! O(K log n) per round over O(log n) rounds, O(K log² n) in all, instead of
//! the O(n) of materialising every shifted value.

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

/// The `rank`-th smallest (1-based) value of the union of the arrays, or
/// `None` when the rank is outside 1..=total.
pub(crate) fn rank_of_union(arrays: &[Shifted<'_>], rank: usize) -> Option<f64> {
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
