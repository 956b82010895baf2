//! y-randomisation: the whole nested procedure rerun on permuted targets,
//! to show that the claimed skill is not what any target would have got.
//!
//! The permutations ride along as extra target columns of the same nested
//! pass (the grid predictor fits n × c targets), so each permuted column
//! gets its own hyperparameter selection at almost no extra cost.

use ndarray::{Array2, ArrayView1};
use rand::SeedableRng;
use rand::seq::SliceRandom;
use rand_xoshiro::Xoshiro256PlusPlus;
use serde::{Deserialize, Serialize};

/// The outcome of y-randomisation.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct YRandomization {
    /// The claimed q² (mean over outer folds) on the real target.
    pub real_q2: f64,
    /// The same figure for each permuted target, in permutation order.
    pub permuted_q2: Vec<f64>,
    /// (1 + #{permuted ≥ real}) / (P + 1); see [`permutation_p_value`].
    pub p_value: f64,
    /// The seed the permutations were drawn from.
    pub seed: u64,
}

/// `y` and `n_permutations` seeded permutations of it as the columns of one
/// n × (1 + P) array; column 0 is `y` itself.
pub fn permuted_targets(y: ArrayView1<f64>, n_permutations: usize, seed: u64) -> Array2<f64> {
    let n = y.len();
    let mut out = Array2::zeros((n, 1 + n_permutations));
    out.column_mut(0).assign(&y);
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    let mut order: Vec<usize> = (0..n).collect();
    for p in 0..n_permutations {
        order.shuffle(&mut rng);
        for (i, &src) in order.iter().enumerate() {
            out[[i, 1 + p]] = y[src];
        }
    }
    out
}

/// The permutation test's p-value (1 + #{q²_perm ≥ q²_real}) / (P + 1),
/// which counts the real labelling as one of the permutations so it is never
/// zero (Phipson & Smyth, "Permutation p-values should never be zero",
/// Stat. Appl. Genet. Mol. Biol. 2010). An undefined (NaN) permuted figure
/// counts against the real one, and an undefined real figure gives 1: the
/// test then shows nothing. With P permutations the smallest possible value
/// is 1/(P + 1).
pub fn permutation_p_value(real: f64, permuted: &[f64]) -> f64 {
    if real.is_nan() {
        return 1.0;
    }
    let at_least = permuted
        .iter()
        .filter(|&&q| q.is_nan() || q >= real)
        .count();
    (1 + at_least) as f64 / (permuted.len() + 1) as f64
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn permuted_columns_are_permutations_and_column_zero_is_y() {
        let y = array![1.0, 2.0, 3.0, 4.0, 5.0, 6.0];
        let t = permuted_targets(y.view(), 4, 7);
        assert_eq!(t.column(0), y);
        let mut moved = false;
        for p in 1..5 {
            let mut col = t.column(p).to_vec();
            moved |= col != y.to_vec();
            col.sort_by(f64::total_cmp);
            assert_eq!(col, y.to_vec());
        }
        assert!(moved, "at least one permutation reorders y");
        assert_eq!(t, permuted_targets(y.view(), 4, 7), "seeded");
    }

    #[test]
    fn p_value_counts_the_real_labelling() {
        // (1 + 0)/(3 + 1) and (1 + 2)/(3 + 1), by the definition.
        assert_eq!(permutation_p_value(0.5, &[0.1, -0.2, 0.0]), 0.25);
        assert_eq!(permutation_p_value(0.0, &[0.1, -0.2, 0.0]), 0.75);
        assert_eq!(permutation_p_value(0.5, &[f64::NAN]), 1.0);
        assert_eq!(permutation_p_value(f64::NAN, &[0.1]), 1.0);
    }
}
