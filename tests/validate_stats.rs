//! Metrics, correlations, mean ± SE and the one-SE rule, checked against
//! scipy / scikit-learn (the stats reference fixture), published worked
//! examples, and hand-built tables.

#![allow(clippy::unwrap_used, clippy::expect_used)]

mod validate_support;

use ndarray::{Array1, ArrayView1};
use plumbline::validate::{average_ranks, estimate, metrics, one_se_choice, pearson, spearman};
use validate_support::{close, fixture, floats};

fn view(v: &[f64]) -> ArrayView1<'_, f64> {
    ArrayView1::from(v)
}

#[test]
fn correlations_match_scipy_including_ties() {
    // Reference: scipy.stats.pearsonr / spearmanr (tests/reference/stats_ref.py).
    let fx = fixture();
    let cases = fx["correlations"].as_array().unwrap();
    assert_eq!(cases.len(), 4);
    for case in cases {
        let (x, y) = (floats(&case["x"]), floats(&case["y"]));
        let name = case["name"].as_str().unwrap();
        let (p, s) = (pearson(view(&x), view(&y)), spearman(view(&x), view(&y)));
        let (p_ref, s_ref) = (
            case["pearson"].as_f64().unwrap(),
            case["spearman"].as_f64().unwrap(),
        );
        assert!(
            close(p, p_ref, 1e-9),
            "{name}: pearson {p} vs scipy {p_ref}"
        );
        assert!(
            close(s, s_ref, 1e-9),
            "{name}: spearman {s} vs scipy {s_ref}"
        );
    }
}

#[test]
fn regression_metrics_match_scikit_learn() {
    // Reference: sklearn.metrics mean_squared_error, mean_absolute_error,
    // r2_score; numpy.sqrt for RMSE; scipy for the correlations.
    let fx = fixture();
    for case in fx["regression"].as_array().unwrap() {
        let (y, pred) = (floats(&case["y"]), floats(&case["pred"]));
        let m = metrics(view(&y), view(&pred));
        let name = case["name"].as_str().unwrap();
        for (ours, key) in [
            (m.mse, "mse"),
            (m.rmse, "rmse"),
            (m.mae, "mae"),
            (m.r2, "r2"),
            (m.pearson, "pearson"),
            (m.spearman, "spearman"),
        ] {
            let theirs = case[key].as_f64().unwrap();
            assert!(
                close(ours, theirs, 1e-9),
                "{name} {key}: {ours} vs {theirs}"
            );
        }
    }
}

#[test]
fn mean_and_standard_error_match_scipy_sem() {
    // Reference: numpy.mean and scipy.stats.sem(ddof=1).
    let fx = fixture();
    for case in fx["sem"].as_array().unwrap() {
        let e = estimate(&floats(&case["values"]));
        assert!(close(e.mean, case["mean"].as_f64().unwrap(), 1e-9));
        assert!(close(e.se, case["se"].as_f64().unwrap(), 1e-9));
    }
    // By hand: {2, 4} has mean 3, s = √2, SE = √2/√2 = 1.
    let e = estimate(&[2.0, 4.0]);
    assert_eq!((e.mean, e.se), (3.0, 1.0));
    assert!(estimate(&[1.0]).se.is_nan(), "one fold has no spread");
}

#[test]
fn pearson_reproduces_anscombes_printed_correlation() {
    // Anscombe, "Graphs in statistical analysis", The American Statistician
    // 27(1), 1973: all four data sets have r = 0.816 to 3 decimal places
    // (data and figure as tabulated in Wikipedia's "Anscombe's quartet").
    // The printed figure is the first three decimals: set IV's r = 0.8165...
    // would round to 0.817, so the check is on the digits, not on rounding.
    let x = [10.0, 8.0, 13.0, 9.0, 11.0, 14.0, 6.0, 4.0, 12.0, 7.0, 5.0];
    let x4 = [8.0, 8.0, 8.0, 8.0, 8.0, 8.0, 8.0, 19.0, 8.0, 8.0, 8.0];
    let sets: [(&[f64], [f64; 11]); 4] = [
        (
            &x,
            [
                8.04, 6.95, 7.58, 8.81, 8.33, 9.96, 7.24, 4.26, 10.84, 4.82, 5.68,
            ],
        ),
        (
            &x,
            [
                9.14, 8.14, 8.74, 8.77, 9.26, 8.10, 6.13, 3.10, 9.13, 7.26, 4.74,
            ],
        ),
        (
            &x,
            [
                7.46, 6.77, 12.74, 7.11, 7.81, 8.84, 6.08, 5.39, 8.15, 6.42, 5.73,
            ],
        ),
        (
            &x4,
            [
                6.58, 5.76, 7.71, 8.84, 8.47, 7.04, 5.25, 12.50, 5.56, 7.91, 6.89,
            ],
        ),
    ];
    for (i, (xs, ys)) in sets.iter().enumerate() {
        let r = pearson(view(xs), view(ys));
        assert_eq!((r * 1000.0).floor(), 816.0, "set {}: r = {r}", i + 1);
    }
}

#[test]
fn pearson_and_spearman_reproduce_the_ice_cream_worked_example() {
    // Ice cream sales ($) against temperature (°C) over 12 days: Pearson's
    // r = 0.9575 worked through in the Math is Fun "Correlation" page (from
    // memory; the same data and r = 0.9575 are worked at
    // homeworkocean.com/solved-homework-locate-the-results-of-a-recent-survey-
    // that-shows-at-least-two-variables-in-a-newspaper/), and Spearman's
    // rs = 0.951048951 in the Masaryk University exercise sheet
    // is.muni.cz/el/pharm/jaro2020/FAIS1_15/um/hmwork.correlation.txt.
    let temp = [
        14.2, 16.4, 11.9, 15.2, 18.5, 22.1, 19.4, 25.1, 23.4, 18.1, 22.6, 17.2,
    ];
    let sales = [
        215.0, 325.0, 185.0, 332.0, 406.0, 522.0, 412.0, 614.0, 544.0, 421.0, 445.0, 408.0,
    ];
    // The printed sums, checked first so a typo in the data would show here.
    assert!((temp.iter().sum::<f64>() - 224.1).abs() < 1e-9);
    assert_eq!(sales.iter().sum::<f64>(), 4829.0);
    let r = pearson(view(&temp), view(&sales));
    assert!((r - 0.9575).abs() < 5e-5, "r = {r}");
    let rs = spearman(view(&temp), view(&sales));
    assert!((rs - 0.951048951).abs() < 1e-9, "rs = {rs}");
    // With no ties rs = 1 − 6Σd²/(n(n²−1)); Σd² = 14 in the sheet: 1 − 84/1716.
    assert!((rs - (1.0 - 84.0 / 1716.0)).abs() < 1e-12);
}

#[test]
fn spearman_reproduces_the_iq_and_television_worked_example() {
    // Wikipedia, "Spearman's rank correlation coefficient", section Example
    // (as mirrored at liquisearch.com/spearmans_rank_correlation_coefficient/
    // example): IQ against hours of TV per week for 10 people, Σd² = 194,
    // ρ = 1 − 6·194/(10·99) = −0.175757575...
    let iq = [
        106.0, 86.0, 100.0, 101.0, 99.0, 103.0, 97.0, 113.0, 112.0, 110.0,
    ];
    let tv = [7.0, 0.0, 27.0, 50.0, 28.0, 29.0, 20.0, 12.0, 6.0, 17.0];
    let rho = spearman(view(&iq), view(&tv));
    assert!(
        (rho - (-0.175_757_575_757_575_76)).abs() < 1e-12,
        "rho = {rho}"
    );
    let (ri, rt) = (average_ranks(view(&iq)), average_ranks(view(&tv)));
    let d2: f64 = ri.iter().zip(&rt).map(|(a, b)| (a - b).powi(2)).sum();
    assert_eq!(d2, 194.0, "the sheet's Σd²");
}

#[test]
fn tied_values_share_the_average_of_their_ranks() {
    // By hand: x = [1, 2, 2, 3] ranks [1, 2.5, 2.5, 4]; against y = [1, 2, 3, 4]
    // the rank correlation is Σdxdy/√(ΣdxΣdy) = 4.5/√(4.5·5) = 3/√10.
    let x = [1.0, 2.0, 2.0, 3.0];
    assert_eq!(average_ranks(view(&x)), vec![1.0, 2.5, 2.5, 4.0]);
    let rs = spearman(view(&x), view(&[1.0, 2.0, 3.0, 4.0]));
    assert!((rs - 3.0 / 10f64.sqrt()).abs() < 1e-15);
}

#[test]
fn undefined_figures_are_nan_not_made_up() {
    let y = Array1::from(vec![1.0, 2.0, 3.0]);
    let flat = Array1::from(vec![2.0, 2.0, 2.0]);
    let m = metrics(y.view(), flat.view());
    assert!(m.pearson.is_nan() && m.spearman.is_nan());
    // Predicting the mean exactly gives R² = 0 (SSE = SST), by definition.
    assert_eq!(m.r2, 0.0);
    assert!(
        metrics(flat.view(), y.view()).r2.is_nan(),
        "constant y has no SST"
    );
}

#[test]
fn one_se_rule_picks_the_simplest_setting_within_one_se_of_the_best() {
    // A hand-built table, simplest first (ESL §7.10's rule): the best mean is
    // 1.00 at index 3 with SE 0.15, so the threshold is 1.15; index 1 (1.12)
    // is the first at or under it, index 0 (1.30) is not.
    let mean = [1.30, 1.12, 1.05, 1.00, 1.02, 1.10];
    let se = [0.20, 0.18, 0.16, 0.15, 0.15, 0.17];
    assert_eq!(one_se_choice(&mean, &se), 1);
    // The best itself when nothing simpler is close enough.
    let tight = [0.01; 6];
    assert_eq!(one_se_choice(&mean, &tight), 3);
    // Exactly at the threshold counts as within it.
    assert_eq!(one_se_choice(&[1.5, 2.0, 1.0], &[0.0, 0.0, 0.5]), 0);
    // A setting that could not be fitted is never chosen.
    assert_eq!(one_se_choice(&[f64::NAN, 1.1, 1.0], &[0.1, 0.1, 0.2]), 1);
}
