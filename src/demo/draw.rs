//! Seeded random draws for the demo scenario, built only from the raw
//! 64-bit output of xoshiro256++ and IEEE additions and multiplications.
//!
//! Why not `rand`'s distributions: the committed CSVs must be reproduced
//! byte for byte by every future build on every platform. The raw xoshiro
//! stream is fixed by its published algorithm (Blackman & Vigna 2018), and
//! the arithmetic below uses no library function (`ln`, `cos`, `exp`) whose
//! last bit may differ between platforms' maths libraries.

use rand::{RngCore, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;

/// A source of the draws the scenario needs.
pub struct Draw {
    rng: Xoshiro256PlusPlus,
}

impl Draw {
    pub fn new(seed: u64) -> Draw {
        Draw {
            rng: Xoshiro256PlusPlus::seed_from_u64(seed),
        }
    }

    /// Uniform on [0, 1): the top 53 bits scaled by 2⁻⁵³, exactly.
    pub fn uniform(&mut self) -> f64 {
        (self.rng.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }

    /// Approximately standard normal: the sum of twelve uniforms minus six
    /// (the Irwin–Hall approximation; mean 0, variance 1, tails cut at ±6,
    /// from memory), which needs no transcendental function.
    pub fn normal(&mut self) -> f64 {
        let mut s = 0.0;
        for _ in 0..12 {
            s += self.uniform();
        }
        s - 6.0
    }

    /// Normal with the given mean and standard deviation.
    pub fn gauss(&mut self, mean: f64, sd: f64) -> f64 {
        mean + sd * self.normal()
    }

    /// True with probability `p`.
    pub fn bernoulli(&mut self, p: f64) -> bool {
        self.uniform() < p
    }

    /// A uniformly chosen index below `n` (n > 0).
    pub fn index(&mut self, n: usize) -> usize {
        ((self.uniform() * n as f64) as usize).min(n.saturating_sub(1))
    }

    /// Fisher–Yates shuffle (Knuth, TAOCP vol. 2, Algorithm P).
    pub fn shuffle<T>(&mut self, items: &mut [T]) {
        for i in (1..items.len()).rev() {
            let j = self.index(i + 1);
            items.swap(i, j);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn uniform_matches_the_raw_stream_scaled_by_two_to_the_minus_53() {
        let mut raw = Xoshiro256PlusPlus::seed_from_u64(7);
        let mut d = Draw::new(7);
        for _ in 0..100 {
            let u = d.uniform();
            let expect = (raw.next_u64() >> 11) as f64 / 9_007_199_254_740_992.0;
            assert_eq!(u, expect);
            assert!((0.0..1.0).contains(&u));
        }
    }

    #[test]
    fn normal_draws_have_unit_variance_and_zero_mean() {
        // Irwin–Hall with twelve terms has variance 12 · 1/12 = 1 exactly;
        // 20,000 draws put the sample mean within ±0.03 and the variance
        // within ±0.04 of it with overwhelming probability (SE 0.007 and
        // 0.01 respectively).
        let mut d = Draw::new(11);
        let xs: Vec<f64> = (0..20_000).map(|_| d.normal()).collect();
        let n = xs.len() as f64;
        let mean = xs.iter().sum::<f64>() / n;
        let var = xs.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
        assert!(mean.abs() < 0.03, "mean {mean}");
        assert!((var - 1.0).abs() < 0.04, "variance {var}");
        // About 68.3% within one SD (normal table, from memory); Irwin–Hall
        // with twelve terms is within a fraction of a percent of that.
        let within = xs.iter().filter(|x| x.abs() < 1.0).count() as f64 / n;
        assert!((within - 0.683).abs() < 0.015, "within one SD {within}");
    }

    #[test]
    fn shuffle_is_a_permutation() {
        let mut d = Draw::new(3);
        let mut v: Vec<usize> = (0..50).collect();
        d.shuffle(&mut v);
        assert_ne!(v, (0..50).collect::<Vec<_>>());
        v.sort();
        assert_eq!(v, (0..50).collect::<Vec<_>>());
    }
}
