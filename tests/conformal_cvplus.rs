//! CV+ intervals (Barber, Candès, Ramdas & Tibshirani, Ann. Statist. 2021)
//! against a brute-force twin that materialises all n shifted values,
//! sorts them and reads the rank, with the ranks computed in exact integer
//! arithmetic from confidences given in per-mille; over many random cases
//! with ties, empty folds and Mondrian bands.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use ndarray::{Array2, array};
use plumbline::conformal::{self, Calibration, Coverage, CvPlus, CvPlusState};
use plumbline::domain::Verdict;
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;

/// ⌊α(n + 1)⌋ and ⌈(1 − α)(n + 1)⌉ with α = (1000 − per_mille)/1000, in
/// integers.
fn exact_ranks(n: usize, per_mille: usize) -> (usize, usize) {
    let a = 1000 - per_mille;
    let lower = a * (n + 1) / 1000;
    let upper = (per_mille * (n + 1)).div_ceil(1000);
    (lower, upper)
}

/// The r-th smallest value, or None outside 1..=len.
fn rank(mut v: Vec<f64>, r: usize) -> Option<f64> {
    v.sort_by(f64::total_cmp);
    (r >= 1 && r <= v.len()).then(|| v[r - 1])
}

/// The whole CV+ interval by brute force over the given rows.
fn brute(
    rows: &[(usize, f64)],
    predictions: &[f64],
    per_mille: usize,
) -> (Option<f64>, Option<f64>) {
    let (lo, hi) = exact_ranks(rows.len(), per_mille);
    let minus = rows.iter().map(|&(k, r)| predictions[k] - r).collect();
    let plus = rows.iter().map(|&(k, r)| predictions[k] + r).collect();
    (rank(minus, lo), rank(plus, hi))
}

struct Case {
    fold_of: Vec<usize>,
    residuals: Vec<f64>,
    verdicts: Vec<Verdict>,
    k: usize,
}

fn random_case(rng: &mut Xoshiro256PlusPlus) -> Case {
    // Small n often, so that unbounded sides are exercised as well.
    let n = if rng.gen_bool(0.4) {
        rng.gen_range(1..40)
    } else {
        rng.gen_range(40..400)
    };
    let k = rng.gen_range(1..11);
    // Half the cases with heavy ties: residuals on a grid of 0.5.
    let ties = rng.gen_bool(0.5);
    // Some folds may be empty: rows only use the first `used` folds.
    let used = rng.gen_range(1..=k);
    let fold_of = (0..n).map(|_| rng.gen_range(0..used)).collect();
    let residuals = (0..n)
        .map(|_| {
            let r: f64 = rng.gen_range(0.0..3.0);
            if ties { (r * 2.0).round() / 2.0 } else { r }
        })
        .collect();
    let verdicts = (0..n)
        .map(|_| match rng.gen_range(0.0..1.0) {
            u if u < 0.7 => Verdict::Inside,
            u if u < 0.93 => Verdict::Border,
            _ => Verdict::Outside,
        })
        .collect();
    Case {
        fold_of,
        residuals,
        verdicts,
        k,
    }
}

fn predictions(rng: &mut Xoshiro256PlusPlus, k: usize) -> Vec<f64> {
    // Ties between fold models too: sometimes all equal, sometimes on a grid.
    match rng.gen_range(0..3) {
        0 => vec![1.25; k],
        1 => (0..k)
            .map(|_| f64::from(rng.gen_range(-2i32..3)) / 2.0)
            .collect(),
        _ => (0..k).map(|_| rng.gen_range(-5.0..5.0)).collect(),
    }
}

#[test]
fn intervals_equal_brute_force_on_many_random_cases() {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(2021);
    let mut bounded = 0;
    for case_no in 0..3000 {
        let c = random_case(&mut rng);
        let min_band = rng.gen_range(0..80);
        let cv = CvPlus::new(&c.fold_of, c.k, &c.residuals, &c.verdicts, min_band).unwrap();
        for _ in 0..4 {
            let mu = predictions(&mut rng, c.k);
            let per_mille = if rng.gen_bool(0.5) {
                10 * rng.gen_range(50..=99)
            } else {
                rng.gen_range(500..=990)
            };
            let confidence = per_mille as f64 / 1000.0;
            let verdict = Verdict::ALL[rng.gen_range(0..3)];
            let got = cv.interval(&mu, confidence, verdict);
            let band: Vec<(usize, f64)> = (0..c.fold_of.len())
                .filter(|&i| c.verdicts[i] == verdict)
                .map(|i| (c.fold_of[i], c.residuals[i]))
                .collect();
            let (band_lo, band_hi) = exact_ranks(band.len(), per_mille);
            let use_band = band.len() >= min_band && band_lo >= 1 && band_hi <= band.len();
            let rows: Vec<(usize, f64)> = if use_band {
                band
            } else {
                c.fold_of
                    .iter()
                    .copied()
                    .zip(c.residuals.iter().copied())
                    .collect()
            };
            let want = brute(&rows, &mu, per_mille);
            assert_eq!(
                (got.lower, got.upper),
                want,
                "case {case_no}, confidence {confidence}"
            );
            let want_cal = if use_band {
                Calibration::Band(verdict)
            } else {
                Calibration::Pooled
            };
            assert_eq!(got.calibration, want_cal, "case {case_no}");
            bounded += usize::from(want.0.is_some());
        }
    }
    // The random cases must exercise both bounded and unbounded answers.
    assert!(
        (300..=11_700).contains(&bounded),
        "{bounded} bounded of 12000"
    );
}

#[test]
fn rank_boundaries_match_exact_integer_arithmetic() {
    for n in 1..=2000 {
        for per_mille in (500..=990).step_by(5) {
            let (lo, hi) = exact_ranks(n, per_mille);
            let within = |r: usize| (1..=n).contains(&r).then_some(r);
            assert_eq!(
                conformal::ranks(n, per_mille as f64 / 1000.0),
                (within(lo), within(hi)),
                "n {n}, confidence {per_mille}‰"
            );
        }
    }
}

#[test]
fn a_small_case_by_hand() {
    // Nine rows in three folds; at 0.9 the ranks are 1 and 9 (α(n+1) = 1):
    // the extremes of μₖ − R and μₖ + R.
    let fold_of = [0, 0, 0, 1, 1, 1, 2, 2, 2];
    let r = [0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9];
    let v = [Verdict::Inside; 9];
    let cv = CvPlus::new(&fold_of, 3, &r, &v, 50).unwrap();
    let iv = cv.interval(&[10.0, 20.0, 30.0], 0.9, Verdict::Inside);
    // min of {9.9, 9.8, 9.7, 19.6, 19.5, 19.4, 29.3, 29.2, 29.1} = 9.7;
    // max of {10.1, …, 30.9} = 30.9.
    assert_eq!(iv.lower, Some(10.0 - 0.3));
    assert_eq!(iv.upper, Some(30.0 + 0.9));
    assert_eq!(
        iv.calibration,
        Calibration::Pooled,
        "9 rows are fewer than min_band 50"
    );
    // At 0.5: α(n+1) = 5 → 5th smallest of each side.
    let iv = cv.interval(&[10.0, 20.0, 30.0], 0.5, Verdict::Inside);
    assert_eq!(iv.lower, Some(20.0 - 0.5));
    assert_eq!(iv.upper, Some(20.0 + 0.5));
    // With eight rows 0.9 has no bounded rank: both sides unbounded.
    let cv8 = CvPlus::new(&fold_of[..8], 3, &r[..8], &v[..8], 50).unwrap();
    let iv = cv8.interval(&[10.0, 20.0, 30.0], 0.9, Verdict::Inside);
    assert_eq!((iv.lower, iv.upper), (None, None));
}

#[test]
fn bands_are_used_only_when_big_enough_for_the_confidence() {
    let n = 160;
    let fold_of: Vec<usize> = (0..n).map(|i| i % 4).collect();
    let residuals: Vec<f64> = (0..n).map(|i| (i % 17) as f64 * 0.1).collect();
    // 100 inside, 60 border, no outside.
    let verdicts: Vec<Verdict> = (0..n)
        .map(|i| {
            if i < 100 {
                Verdict::Inside
            } else {
                Verdict::Border
            }
        })
        .collect();
    let cv = CvPlus::new(&fold_of, 4, &residuals, &verdicts, 50).unwrap();
    assert_eq!(
        cv.band_sizes(),
        vec![
            (Verdict::Inside, 100),
            (Verdict::Border, 60),
            (Verdict::Outside, 0)
        ]
    );
    assert!(cv.band_used(Verdict::Inside, 0.9));
    assert!(cv.band_used(Verdict::Border, 0.95), "⌊0.05·61⌋ = 3 ≥ 1");
    assert!(
        !cv.band_used(Verdict::Border, 0.99),
        "⌊0.01·61⌋ = 0: unbounded, so pooled"
    );
    assert!(cv.band_used(Verdict::Inside, 0.99), "⌊0.01·101⌋ = 1");
    assert!(!cv.band_used(Verdict::Outside, 0.8));
    let mu = [0.0; 4];
    assert_eq!(
        cv.interval(&mu, 0.99, Verdict::Border).calibration,
        Calibration::Pooled
    );
    assert_eq!(
        cv.interval(&mu, 0.9, Verdict::Border).calibration,
        Calibration::Band(Verdict::Border)
    );
    assert_eq!(
        cv.interval(&mu, 0.9, Verdict::Outside).calibration,
        Calibration::Pooled
    );
}

#[test]
fn state_round_trips_through_json() {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(8);
    let c = random_case(&mut rng);
    let cv = CvPlus::new(&c.fold_of, c.k, &c.residuals, &c.verdicts, 20).unwrap();
    let json = serde_json::to_string(cv.state()).unwrap();
    let state: CvPlusState = serde_json::from_str(&json).unwrap();
    let back = CvPlus::from_state(state).unwrap();
    assert_eq!(back, cv);
    let mut broken = cv.state().clone();
    broken.residuals[0] = f64::NAN;
    assert!(matches!(
        CvPlus::from_state(broken),
        Err(conformal::Error::BadResidual { row: 0, .. })
    ));
}

#[test]
fn non_finite_predictions_give_no_bound_rather_than_a_made_up_one() {
    let cv = CvPlus::new(
        &[0, 1, 0, 1],
        2,
        &[0.1, 0.2, 0.3, 0.4],
        &[Verdict::Inside; 4],
        1,
    )
    .unwrap();
    let iv = cv.interval(&[f64::NAN, 1.0], 0.5, Verdict::Inside);
    assert_eq!((iv.lower, iv.upper), (None, None));
}

#[test]
fn empirical_coverage_counts_by_hand() {
    // 19 calibration rows in one fold, residuals 1..19: at 0.9 the ranks
    // are 2 and 18, so the interval is μ − 18 … μ + 18; at 0.5 the ranks
    // are 10 and 10: μ − 10 … μ + 10.
    let fold_of = vec![0; 19];
    let r: Vec<f64> = (1..=19).map(f64::from).collect();
    let cv = CvPlus::new(&fold_of, 1, &r, &[Verdict::Inside; 19], 50).unwrap();
    let preds = array![[0.0], [0.0], [0.0], [100.0]];
    let observed = [5.0, -15.0, 18.0, 81.0];
    let verdicts = [Verdict::Inside; 4];
    let cov = cv
        .empirical_coverage(preds.view(), &observed, &verdicts, &[0.5, 0.9])
        .unwrap();
    assert_eq!((cov[0].covered, cov[0].n), (1, 4), "only 5 lies within ±10");
    assert_eq!((cov[1].covered, cov[1].n), (3, 4), "81 is 19 below 100");
    assert_eq!(cov[1].empirical, 0.75);
    let pooled = Coverage::pool(&[cov.clone(), cov]);
    assert_eq!((pooled[1].covered, pooled[1].n), (6, 8));
    let bad = cv.empirical_coverage(Array2::zeros((4, 2)).view(), &observed, &verdicts, &[0.9]);
    assert!(matches!(
        bad,
        Err(conformal::Error::FoldPredictions { len: 2, k: 1, .. })
    ));
    let bad = cv.empirical_coverage(preds.view(), &observed, &verdicts, &[0.999]);
    assert_eq!(bad, Err(conformal::Error::Confidence { value: 0.999 }));
}
