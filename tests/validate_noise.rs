//! The behaviour nested cross-validation exists for, with the reference
//! models of `validate_support` (ridge by the normal equations, brute-force
//! k-NN, "predict the training mean"): on a pure-noise target it claims no
//! skill while a plain grid search looks better than it is, y-randomisation
//! finds nothing; on a real signal it claims skill and y-randomisation
//! says so; a random split hides the optimism that cluster folds expose.
//! The same checks with the real model families are in validate_models.rs.

#![allow(clippy::unwrap_used, clippy::expect_used)]

mod validate_support;

use std::sync::Mutex;

use ndarray::{Array1, ArrayView2, Axis};
use plumbline::models::{Family, Grid, GridPredictions};
use plumbline::space::Standardizer;
use plumbline::validate::{FoldDesign, NestedSettings, Validation, validate};
use validate_support::{
    default_ridge_grid, knn_grid, knn_predict, mean_predict, noise, quiet, ridge_predict,
};

fn cluster_design(x: ArrayView2<f64>, k: usize, seed: u64) -> FoldDesign {
    let xs = Standardizer::fit(x).transform(x);
    FoldDesign::clusters(xs.view(), k, seed, None).unwrap()
}

fn settings(n_permutations: usize) -> NestedSettings {
    NestedSettings {
        n_permutations,
        seed: 17,
        ..NestedSettings::default()
    }
}

/// Pure noise: 150 rows × 20 descriptors, the target independent of them.
fn noise_problem() -> (ndarray::Array2<f64>, Array1<f64>) {
    let x = noise(150, 20, 1);
    let y = noise(150, 1, 2).column(0).to_owned();
    (x, y)
}

fn run_ridge(x: ArrayView2<f64>, y: &Array1<f64>, permutations: usize) -> Validation {
    let design = cluster_design(x, 5, 3);
    validate(
        x,
        y.view(),
        &design,
        &[default_ridge_grid()],
        &settings(permutations),
        &ridge_predict,
        &quiet,
    )
    .unwrap()
}

#[test]
fn on_pure_noise_nested_cv_claims_no_skill_and_a_plain_grid_search_is_optimistic() {
    let (x, y) = noise_problem();
    let v = run_ridge(x.view(), &y, 39);
    let q2 = v.claims().r2.mean;
    assert!(q2 <= 0.02, "nested q² on noise: {q2}");
    // The plain search picks its best setting on the same folds it reports:
    // its score is the maximum of many noisy estimates, so it is higher.
    let plain = v.final_selection.plain_best_q2.mean;
    assert!(plain > q2, "plain grid search q² {plain} vs nested {q2}");
    let inner_best: f64 = v
        .chosen()
        .outer
        .iter()
        .map(|o| o.inner_best_mse)
        .sum::<f64>()
        / v.chosen().outer.len() as f64;
    assert!(
        inner_best < v.claims().mse.mean,
        "inner best MSE {inner_best} vs outer MSE {}",
        v.claims().mse.mean
    );
    // 39 permutations: p can go down to 1/40; noise should not get near 0.05.
    let yr = &v.y_randomization;
    assert_eq!(yr.permuted_q2.len(), 39);
    assert!(
        yr.p_value > 0.05,
        "p = {} on a pure-noise target",
        yr.p_value
    );
    assert_eq!(yr.real_q2, q2);
}

#[test]
fn on_a_real_signal_nested_cv_claims_skill_and_y_randomisation_is_significant() {
    let x = noise(150, 20, 5);
    let w: Vec<f64> = (0..20).map(|j| if j < 5 { 1.0 } else { 0.0 }).collect();
    let y = x.dot(&Array1::from(w)) + noise(150, 1, 6).column(0).mapv(|e| 0.5 * e);
    let v = run_ridge(x.view(), &y, 19);
    let q2 = v.claims().r2.mean;
    assert!(q2 > 0.8, "nested q² on a linear signal: {q2}");
    let yr = &v.y_randomization;
    assert_eq!(
        yr.p_value,
        1.0 / 20.0,
        "no permutation should reach q² {q2}"
    );
    assert!(
        yr.permuted_q2.iter().all(|&p| p < 0.1),
        "{:?}",
        yr.permuted_q2
    );
    // The claims and the random-split comparison both see the signal.
    let random = v
        .random_split
        .expect("cluster design: a random split is run beside it");
    assert!(random.r2.mean > 0.8);
}

#[test]
fn a_model_with_no_skill_scores_below_zero_in_every_outer_fold() {
    // Predicting the training mean gives R² < 0 on any test fold whose mean
    // differs from the training mean (SSE = SST + m·(ȳ_test − ȳ_train)²).
    let (x, y) = noise_problem();
    let design = cluster_design(x.view(), 5, 3);
    let grid = default_ridge_grid();
    let v = validate(
        x.view(),
        y.view(),
        &design,
        &[grid],
        &settings(5),
        &mean_predict,
        &quiet,
    )
    .unwrap();
    for o in &v.chosen().outer {
        assert!(o.metrics.r2 < 0.0, "fold {}: {}", o.fold, o.metrics.r2);
    }
    assert!(v.y_randomization.permuted_q2.iter().all(|&q| q < 0.0));
}

#[test]
fn random_splits_hide_the_optimism_that_cluster_folds_expose() {
    // 30 tight clusters in 10-D whose targets are a per-cluster random level
    // plus a little noise: neighbours within a cluster predict each other
    // well, so a random split (a cluster's rows on both sides) looks
    // skilful, while cluster folds ask the model to predict unseen clusters,
    // which the descriptors cannot do.
    let centres = noise(30, 10, 7).mapv(|v| 6.0 * v);
    let levels = noise(30, 1, 8);
    let jitter = noise(300, 10, 9);
    let eps = noise(300, 1, 10);
    let x = ndarray::Array2::from_shape_fn((300, 10), |(i, j)| {
        centres[[i % 30, j]] + 0.2 * jitter[[i, j]]
    });
    let y = Array1::from_shape_fn(300, |i| levels[[i % 30, 0]] + 0.1 * eps[[i, 0]]);
    let xs = Standardizer::fit(x.view()).transform(x.view());
    let design = FoldDesign::clusters(xs.view(), 5, 1, Some(30)).unwrap();
    let grid = knn_grid(&[25, 15, 10, 7, 5, 3, 1]);
    let v = validate(
        x.view(),
        y.view(),
        &design,
        &[grid],
        &settings(0),
        &knn_predict,
        &quiet,
    )
    .unwrap();
    let cluster_q2 = v.claims().r2.mean;
    let random_q2 = v.random_split.unwrap().r2.mean;
    assert!(random_q2 > 0.9, "random split q² {random_q2}");
    assert!(cluster_q2 < 0.3, "cluster split q² {cluster_q2}");
}

/// Ridge stands for the simplest family and the mean model for the most
/// flexible one, or the other way round; the choice must follow the
/// outer-CV errors and, within one SE, prefer the simpler family.
fn two_families(
    ridge_as: Family,
    mean_as: Family,
) -> impl Fn(&Grid, ArrayView2<f64>, ArrayView2<f64>, ArrayView2<f64>) -> GridPredictions + Sync {
    move |grid, xt, yt, xs| {
        if grid.family == ridge_as {
            ridge_predict(grid, xt, yt, xs)
        } else {
            assert_eq!(grid.family, mean_as);
            mean_predict(grid, xt, yt, xs)
        }
    }
}

fn relabel(grid: &Grid, family: Family) -> Grid {
    Grid {
        family,
        points: grid.points.clone(),
    }
}

#[test]
fn auto_takes_the_clearly_better_family_and_otherwise_the_simplest() {
    let x = noise(120, 8, 11);
    let signal = x.column(0).to_owned() * 2.0 + noise(120, 1, 12).column(0);
    let (_, pure_noise) = noise_problem();
    let pure_noise = pure_noise.slice(ndarray::s![..120]).to_owned();
    let design = cluster_design(x.view(), 5, 4);
    let ridge = default_ridge_grid();
    // Given most flexible first: the order of the grids must not matter.
    let grids = [relabel(&ridge, Family::Knn), relabel(&ridge, Family::Ridge)];
    let predict = two_families(Family::Knn, Family::Ridge);
    let v = validate(
        x.view(),
        signal.view(),
        &design,
        &grids,
        &settings(0),
        &predict,
        &quiet,
    )
    .unwrap();
    assert_eq!(
        v.families.iter().map(|f| f.family).collect::<Vec<_>>(),
        [Family::Ridge, Family::Knn],
        "families are reported simplest first"
    );
    assert_eq!(
        v.chosen_family,
        Family::Knn,
        "the skilled family, far better than the simple one"
    );
    let v = validate(
        x.view(),
        pure_noise.view(),
        &design,
        &grids,
        &settings(0),
        &predict,
        &quiet,
    )
    .unwrap();
    let (simple, flexible) = (&v.families[0].claims.mse, &v.families[1].claims.mse);
    assert!(
        (simple.mean - flexible.mean).abs() < simple.se.max(flexible.se),
        "on noise neither family is better: {simple:?} vs {flexible:?}"
    );
    assert_eq!(
        v.chosen_family,
        Family::Ridge,
        "within one SE: the simplest family"
    );
}

#[test]
fn progress_counts_every_outer_fold_of_every_stage() {
    let (x, y) = noise_problem();
    let design = cluster_design(x.view(), 5, 3);
    let seen = Mutex::new(Vec::new());
    let progress = |stage: &str, done: usize, total: usize| {
        seen.lock().unwrap().push((stage.to_owned(), done, total));
    };
    let grids = [
        default_ridge_grid(),
        relabel(&default_ridge_grid(), Family::KernelRidge),
    ];
    let predict = |g: &Grid, a: ArrayView2<f64>, b: ArrayView2<f64>, c: ArrayView2<f64>| {
        ridge_predict(&relabel(g, Family::Ridge), a, b, c)
    };
    validate(
        x.view(),
        y.view(),
        &design,
        &grids,
        &settings(2),
        &predict,
        &progress,
    )
    .unwrap();
    let seen = seen.into_inner().unwrap();
    // Two families × 5 outer folds, the random split's 5, the final step.
    assert_eq!(seen.len(), 16);
    assert!(seen.iter().all(|(_, _, total)| *total == 16));
    let mut done: Vec<usize> = seen.iter().map(|(_, d, _)| *d).collect();
    done.sort_unstable();
    assert_eq!(done, (1..=16).collect::<Vec<_>>());
    assert_eq!(seen.last().unwrap().0, "final selection");
    assert!(seen.iter().any(|(s, _, _)| s == "random-split comparison"));
    assert!(seen.iter().any(|(s, _, _)| s == "nested CV (kernel-ridge)"));
}

#[test]
fn the_conformal_material_is_consistent_with_the_folds() {
    let x = noise(100, 6, 21);
    let y = x.column(1).to_owned() + noise(100, 1, 22).column(0);
    let v = run_ridge(x.view(), &y, 0);
    for o in &v.chosen().outer {
        assert_eq!(o.inner_residuals.len(), o.train_rows.len());
        assert_eq!(o.inner_test_predictions.dim(), (o.test_rows.len(), 5));
        assert_eq!(o.inner_folds.fold_of.len(), o.train_rows.len());
        // Each residual is y minus the prediction of the inner model that
        // held its row out: refit that model directly and compare.
        let g = o.chosen[0];
        let grid = Grid {
            family: Family::Ridge,
            points: vec![v.chosen().grid.points[g]],
        };
        let xt = x.select(Axis(0), &o.train_rows);
        let scaler = Standardizer::fit(xt.view());
        let xs = scaler.transform(xt.view());
        let yt = y
            .select(Axis(0), &o.train_rows)
            .insert_axis(Axis(1))
            .to_owned();
        for inner in 0..5 {
            let (tr, te) = (
                o.inner_folds.train_rows(inner),
                o.inner_folds.test_rows(inner),
            );
            let p = ridge_predict(
                &grid,
                xs.select(Axis(0), &tr).view(),
                yt.select(Axis(0), &tr).view(),
                xs.select(Axis(0), &te).view(),
            );
            for (j, &row) in te.iter().enumerate() {
                let r = yt[[row, 0]] - p.test[[0, j, 0]];
                assert!((r - o.inner_residuals[row]).abs() < 1e-9);
            }
        }
    }
    let fs = &v.final_selection;
    assert_eq!(fs.folds, v.outer_folds);
    for i in 0..100 {
        assert!((fs.residuals[i] - (y[i] - fs.oof_predictions[i])).abs() < 1e-12);
    }
}

#[test]
fn results_do_not_depend_on_the_number_of_threads() {
    // Folds run in parallel; every random choice is seeded per fold and the
    // results are gathered in fold order, so one thread and two give the
    // same numbers to the last bit.
    let x = noise(90, 6, 41);
    let y = x.column(2).to_owned() + noise(90, 1, 42).column(0);
    let run = |threads: usize| {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap();
        pool.install(|| run_ridge(x.view(), &y, 3))
    };
    let (one, two) = (run(1), run(2));
    assert_eq!(one.claims(), two.claims());
    assert_eq!(one.y_randomization, two.y_randomization);
    assert_eq!(one.final_selection.residuals, two.final_selection.residuals);
    assert_eq!(
        one.chosen().outer_predictions,
        two.chosen().outer_predictions
    );
}
