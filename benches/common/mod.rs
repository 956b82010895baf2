//! Seeded synthetic data shared by the benchmarks: descriptors in 20
//! clusters and a non-linear (Friedman-style) target of a few of them, so
//! cluster folds and random folds disagree the way real series do.

use ndarray::{Array1, Array2};
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;

/// A standard normal draw by the Box–Muller transform.
fn normal(rng: &mut Xoshiro256PlusPlus) -> f64 {
    let u: f64 = rng.gen_range(f64::EPSILON..1.0);
    let v: f64 = rng.gen_range(0.0..1.0);
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
}

/// `n` rows × `p` descriptors and their target.
pub fn synthetic(n: usize, p: usize, seed: u64) -> (Array2<f64>, Array1<f64>) {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    let centres = Array2::from_shape_fn((20, p), |_| 2.0 * normal(&mut rng));
    let mut x = Array2::zeros((n, p));
    let mut y = Array1::zeros(n);
    for i in 0..n {
        let c = rng.gen_range(0..20);
        for j in 0..p {
            x[[i, j]] = centres[[c, j]] + normal(&mut rng);
        }
        let r = x.row(i);
        y[i] = 10.0 * (r[0] * r[1] / 4.0).sin() + 0.5 * r[2] * r[2] + r[3] + normal(&mut rng);
    }
    (x, y)
}
