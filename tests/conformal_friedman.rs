//! CV+ coverage on the Friedman #1 benchmark (Friedman, "Multivariate
//! adaptive regression splines", Ann. Statist. 19, 1991):
//! y = 10 sin(πx₁x₂) + 20(x₃ − 0.5)² + 10x₄ + 5x₅ + ε, x ~ U[0,1]^10,
//! ε ~ N(0, 1); five of the ten inputs are pure noise.
//!
//! 40 seeded repetitions of n_train = 200, n_test = 200, K = 5 random folds,
//! with fold models written here (ridge by the normal equations on the raw
//! features, and 10-NN regression): CV+ holds for any algorithm.
//!
//! Tolerance: the mean coverage over all 8,000 test points must lie within
//! 3 standard errors of nominal, the SE being the larger of the binomial SD
//! of the pooled count, √(c(1 − c)/8000), and the observed SE of the
//! per-repetition coverage (which also carries the calibration's own
//! randomness). Theory (Barber et al. 2021, Thm. 4) guarantees only
//! 1 − 2α − min{2(1 − 1/K)/(n/K + 1), (1 − K/n)/(K + 1)}; that bound is
//! checked too, on the mean.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use ndarray::{Array1, Array2, Axis};
use plumbline::conformal::{Calibration, CvPlus};
use plumbline::domain::Verdict;
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;

const REPS: u64 = 40;
const N_TRAIN: usize = 200;
const N_TEST: usize = 200;
const K: usize = 5;

fn gaussian(rng: &mut Xoshiro256PlusPlus) -> f64 {
    // Box–Muller.
    let u: f64 = rng.gen_range(f64::EPSILON..1.0);
    let v: f64 = rng.gen_range(0.0..1.0);
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
}

/// Friedman #1 rows with noise sd given per row.
fn friedman(
    n: usize,
    rng: &mut Xoshiro256PlusPlus,
    noise: impl Fn(&[f64]) -> f64,
) -> (Array2<f64>, Array1<f64>) {
    let x = Array2::from_shape_fn((n, 10), |_| rng.gen_range(0.0..1.0));
    let y = x
        .rows()
        .into_iter()
        .map(|r| {
            let r = r.to_vec();
            let pi = std::f64::consts::PI;
            10.0 * (pi * r[0] * r[1]).sin()
                + 20.0 * (r[2] - 0.5).powi(2)
                + 10.0 * r[3]
                + 5.0 * r[4]
                + noise(&r) * gaussian(rng)
        })
        .collect();
    (x, y)
}

trait FoldModel {
    fn fit(x: &Array2<f64>, y: &Array1<f64>) -> Self;
    fn predict(&self, x: &Array2<f64>) -> Array1<f64>;
}

/// Ridge with an unpenalised intercept: (XcᵀXc + λI)β = Xcᵀ(y − ȳ),
/// solved by Gaussian elimination with partial pivoting.
struct Ridge {
    mean_x: Array1<f64>,
    mean_y: f64,
    beta: Array1<f64>,
}

impl FoldModel for Ridge {
    fn fit(x: &Array2<f64>, y: &Array1<f64>) -> Ridge {
        let mean_x = x.mean_axis(Axis(0)).unwrap();
        let mean_y = y.mean().unwrap();
        let xc = x - &mean_x;
        let mut a = xc.t().dot(&xc);
        a.diag_mut().mapv_inplace(|v| v + 1e-3);
        let b = xc.t().dot(&(y - mean_y));
        Ridge {
            mean_x,
            mean_y,
            beta: solve(a, b),
        }
    }
    fn predict(&self, x: &Array2<f64>) -> Array1<f64> {
        (x - &self.mean_x).dot(&self.beta) + self.mean_y
    }
}

fn solve(mut a: Array2<f64>, mut b: Array1<f64>) -> Array1<f64> {
    let n = b.len();
    for c in 0..n {
        let p = (c..n)
            .max_by(|&i, &j| a[[i, c]].abs().total_cmp(&a[[j, c]].abs()))
            .unwrap();
        for j in 0..n {
            a.swap([c, j], [p, j]);
        }
        b.swap(c, p);
        for r in c + 1..n {
            let f = a[[r, c]] / a[[c, c]];
            for j in c..n {
                a[[r, j]] -= f * a[[c, j]];
            }
            b[r] -= f * b[c];
        }
    }
    let mut x = Array1::zeros(n);
    for r in (0..n).rev() {
        let s: f64 = (r + 1..n).map(|j| a[[r, j]] * x[j]).sum();
        x[r] = (b[r] - s) / a[[r, r]];
    }
    x
}

/// k-NN regression (k = 10, Euclidean, by brute force).
struct Knn {
    x: Array2<f64>,
    y: Array1<f64>,
}

impl FoldModel for Knn {
    fn fit(x: &Array2<f64>, y: &Array1<f64>) -> Knn {
        Knn {
            x: x.clone(),
            y: y.clone(),
        }
    }
    fn predict(&self, q: &Array2<f64>) -> Array1<f64> {
        q.rows()
            .into_iter()
            .map(|r| {
                let mut d: Vec<(f64, f64)> = self
                    .x
                    .rows()
                    .into_iter()
                    .zip(&self.y)
                    .map(|(t, &y)| (t.iter().zip(&r).map(|(a, b)| (a - b).powi(2)).sum(), y))
                    .collect();
                d.sort_by(|a, b| a.0.total_cmp(&b.0));
                d[..10].iter().map(|p| p.1).sum::<f64>() / 10.0
            })
            .collect()
    }
}

/// One repetition: fold models, out-of-fold residuals, CV+ calibration and
/// the test rows' fold predictions (n_test × K).
struct Repetition {
    cv: CvPlus,
    test_predictions: Array2<f64>,
    y_test: Array1<f64>,
    test_verdicts: Vec<Verdict>,
}

fn repetition<M: FoldModel>(
    seed: u64,
    noise: impl Fn(&[f64]) -> f64 + Copy,
    verdict_of: impl Fn(&[f64]) -> Verdict,
    min_band: usize,
) -> Repetition {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    let (x, y) = friedman(N_TRAIN, &mut rng, noise);
    let (x_test, y_test) = friedman(N_TEST, &mut rng, noise);
    let mut fold_of: Vec<usize> = (0..N_TRAIN).map(|i| i % K).collect();
    fold_of.shuffle(&mut rng);
    let mut residuals = vec![0.0; N_TRAIN];
    let mut test_predictions = Array2::zeros((N_TEST, K));
    for fold in 0..K {
        let train: Vec<usize> = (0..N_TRAIN).filter(|&i| fold_of[i] != fold).collect();
        let held: Vec<usize> = (0..N_TRAIN).filter(|&i| fold_of[i] == fold).collect();
        let model = M::fit(&x.select(Axis(0), &train), &y.select(Axis(0), &train));
        let oof = model.predict(&x.select(Axis(0), &held));
        for (&i, p) in held.iter().zip(oof) {
            residuals[i] = (y[i] - p).abs();
        }
        test_predictions
            .column_mut(fold)
            .assign(&model.predict(&x_test));
    }
    let verdicts: Vec<Verdict> = x
        .rows()
        .into_iter()
        .map(|r| verdict_of(r.as_slice().unwrap()))
        .collect();
    let test_verdicts = x_test
        .rows()
        .into_iter()
        .map(|r| verdict_of(r.as_slice().unwrap()))
        .collect();
    Repetition {
        cv: CvPlus::new(&fold_of, K, &residuals, &verdicts, min_band).unwrap(),
        test_predictions,
        y_test,
        test_verdicts,
    }
}

/// Per-repetition coverage at each confidence, for test rows passing `keep`.
fn coverages(reps: &[Repetition], confidence: f64, keep: impl Fn(Verdict) -> bool) -> Vec<f64> {
    reps.iter()
        .map(|r| {
            let rows: Vec<usize> = (0..N_TEST).filter(|&i| keep(r.test_verdicts[i])).collect();
            let preds = r.test_predictions.select(Axis(0), &rows);
            let y: Vec<f64> = rows.iter().map(|&i| r.y_test[i]).collect();
            let v: Vec<Verdict> = rows.iter().map(|&i| r.test_verdicts[i]).collect();
            let c =
                r.cv.empirical_coverage(preds.view(), &y, &v, &[confidence])
                    .unwrap();
            assert_eq!(c[0].unbounded, 0, "n = 200 bounds every interval at ≤ 0.9");
            c[0].empirical
        })
        .collect()
}

/// Mean coverage over repetitions and its SE (see the header).
fn mean_and_se(per_rep: &[f64], confidence: f64, rows_per_rep: f64) -> (f64, f64) {
    let r = per_rep.len() as f64;
    let mean = per_rep.iter().sum::<f64>() / r;
    let sd = (per_rep.iter().map(|c| (c - mean).powi(2)).sum::<f64>() / (r - 1.0)).sqrt();
    let binomial = (confidence * (1.0 - confidence) / (r * rows_per_rep)).sqrt();
    (mean, binomial.max(sd / r.sqrt()))
}

/// Checks the mean coverage against nominal within 3 SE (see the header).
fn check(per_rep: &[f64], confidence: f64, rows_per_rep: f64, what: &str) -> f64 {
    let (mean, se) = mean_and_se(per_rep, confidence, rows_per_rep);
    eprintln!("{what}: mean {mean:.4}, se {se:.4}");
    assert!(
        (mean - confidence).abs() <= 3.0 * se,
        "{what}: mean coverage {mean:.4} at nominal {confidence}, tolerance ±{:.4}",
        3.0 * se
    );
    let alpha = 1.0 - confidence;
    let (n, k) = (N_TRAIN as f64, K as f64);
    let slack = (2.0 * (1.0 - 1.0 / k) / (n / k + 1.0)).min((1.0 - k / n) / (k + 1.0));
    assert!(
        mean >= 1.0 - 2.0 * alpha - slack,
        "{what}: below the theoretical guarantee"
    );
    mean
}

fn homoscedastic(_: &[f64]) -> f64 {
    1.0
}

fn all_inside(_: &[f64]) -> Verdict {
    Verdict::Inside
}

#[test]
fn cv_plus_covers_at_the_nominal_level_with_ridge_fold_models() {
    let reps: Vec<Repetition> = (0..REPS)
        .map(|s| repetition::<Ridge>(1991 + s, homoscedastic, all_inside, usize::MAX))
        .collect();
    for confidence in [0.8, 0.9] {
        let cov = coverages(&reps, confidence, |_| true);
        check(
            &cov,
            confidence,
            N_TEST as f64,
            &format!("ridge at {confidence}"),
        );
    }
}

/// 10-NN fold models disagree more between folds than ridge does, and CV+
/// widens by that disagreement: it over-covers by a few points here (CV+ is
/// conservative for unstable learners; Barber et al. 2021 discuss this, from
/// memory). So the check is one-sided on the low side at 3 SE, and the
/// excess is bounded at 5 points, which still catches a wrong rank.
#[test]
fn cv_plus_is_not_below_nominal_with_knn_fold_models() {
    let reps: Vec<Repetition> = (0..REPS)
        .map(|s| repetition::<Knn>(7000 + s, homoscedastic, all_inside, usize::MAX))
        .collect();
    for confidence in [0.8, 0.9] {
        let cov = coverages(&reps, confidence, |_| true);
        let (mean, se) = mean_and_se(&cov, confidence, N_TEST as f64);
        eprintln!("10-NN at {confidence}: mean {mean:.4}, se {se:.4}");
        assert!(
            mean >= confidence - 3.0 * se,
            "10-NN at {confidence}: {mean:.4} is below nominal"
        );
        assert!(
            mean <= confidence + 0.05,
            "10-NN at {confidence}: {mean:.4} is far above nominal"
        );
    }
}

/// Noise sd 0.25 where x₆ < 0.5 (labelled inside), 5 elsewhere (border):
/// pooled intervals over-cover the quiet half and under-cover the noisy
/// half; Mondrian bands cover each at the nominal level.
#[test]
fn mondrian_bands_cover_each_band_when_noise_differs_by_band() {
    let noise = |r: &[f64]| if r[5] < 0.5 { 0.25 } else { 5.0 };
    let verdict = |r: &[f64]| {
        if r[5] < 0.5 {
            Verdict::Inside
        } else {
            Verdict::Border
        }
    };
    let bands: Vec<Repetition> = (0..REPS)
        .map(|s| repetition::<Ridge>(500 + s, noise, verdict, 50))
        .collect();
    let pooled: Vec<Repetition> = (0..REPS)
        .map(|s| repetition::<Ridge>(500 + s, noise, verdict, usize::MAX))
        .collect();
    let confidence = 0.9;
    for v in [Verdict::Inside, Verdict::Border] {
        let iv = bands[0].cv.interval(&[0.0; K], confidence, v);
        assert_eq!(
            iv.calibration,
            Calibration::Band(v),
            "about 100 rows per band ≥ 50"
        );
        let cov = coverages(&bands, confidence, |w| w == v);
        // About half the test rows fall in each band.
        check(
            &cov,
            confidence,
            N_TEST as f64 / 2.0,
            &format!("band {}", v.name()),
        );
    }
    let quiet = coverages(&pooled, confidence, |w| w == Verdict::Inside);
    let noisy = coverages(&pooled, confidence, |w| w == Verdict::Border);
    let mean = |c: &[f64]| c.iter().sum::<f64>() / c.len() as f64;
    eprintln!(
        "pooled: quiet {:.4}, noisy {:.4}",
        mean(&quiet),
        mean(&noisy)
    );
    assert!(
        mean(&quiet) > 0.95 && mean(&noisy) < 0.86,
        "pooled: {} and {}",
        mean(&quiet),
        mean(&noisy)
    );
}
