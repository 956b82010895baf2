//! Grid cross-validation and the whole nested procedure against an
//! independent implementation: scikit-learn's `Ridge` and `StandardScaler`
//! driven by tests/reference/stats_ref.py on the same inputs and folds. The
//! Rust side uses the reference ridge of `validate_support`, so this checks
//! the bookkeeping — fold indexing, standardisation per outer fold, inner
//! folds on the outer-training rows, the one-SE rule, refits, metrics and
//! their mean ± SE — not a model implementation.

#![allow(clippy::unwrap_used, clippy::expect_used)]

mod validate_support;

use ndarray::{Array2, s};
use plumbline::validate::{FoldDesign, Folds, NestedSettings, grid_cv, validate};
use validate_support::{close, fixture, floats, matrix, quiet, ridge_grid, ridge_predict, usizes};

const TOL: f64 = 1e-8;

fn assert_all_close(ours: &[f64], theirs: &[f64], what: &str) {
    assert_eq!(ours.len(), theirs.len(), "{what}: lengths");
    for (i, (a, b)) in ours.iter().zip(theirs).enumerate() {
        assert!(close(*a, *b, TOL), "{what}[{i}]: {a} vs scikit-learn {b}");
    }
}

#[test]
fn grid_cv_matches_scikit_learn_ridge_on_the_same_folds() {
    let fx = fixture();
    let g = &fx["grid_cv"];
    let (x, y) = (matrix(&g["x"]), matrix(&g["y"]));
    let folds = Folds {
        k: g["k"].as_u64().unwrap() as usize,
        fold_of: usizes(&g["fold_of"]),
    };
    let alphas = floats(&g["alphas"]);
    let cv = grid_cv(
        &ridge_grid(&alphas),
        x.view(),
        y.view(),
        &folds,
        None,
        &ridge_predict,
    )
    .unwrap();
    for (gi, _) in alphas.iter().enumerate() {
        for (key, ours) in [
            ("test_mse", &cv.test_mse),
            ("train_mse", &cv.train_mse),
            ("test_r2", &cv.test_r2),
        ] {
            let means: Vec<f64> = ours.row(gi).iter().map(|e| e.mean).collect();
            let ses: Vec<f64> = ours.row(gi).iter().map(|e| e.se).collect();
            assert_all_close(
                &means,
                &floats(&g[key][gi]["mean"]),
                &format!("{key} mean, alpha {gi}"),
            );
            assert_all_close(
                &ses,
                &floats(&g[key][gi]["se"]),
                &format!("{key} se, alpha {gi}"),
            );
        }
        let oof = matrix(&g["oof"][gi]);
        let ours: Array2<f64> = cv.oof.slice(s![gi, .., ..]).to_owned();
        assert_all_close(ours.as_slice().unwrap(), oof.as_slice().unwrap(), "oof");
    }
    let want = g["one_se_choice"].as_u64().unwrap() as usize;
    assert_eq!(
        cv.choose(0).unwrap(),
        want,
        "one-SE choice of the real target"
    );
}

#[test]
fn nested_cv_matches_a_scikit_learn_nested_loop_on_time_folds() {
    let fx = fixture();
    let nf = &fx["nested"];
    let (x, y) = (matrix(&nf["x"]), floats(&nf["y"]));
    let y = ndarray::Array1::from(y);
    let design = FoldDesign::Time {
        times: floats(&nf["times"]),
    };
    let settings = NestedSettings {
        k_outer: nf["k_outer"].as_u64().unwrap() as usize,
        k_inner: nf["k_inner"].as_u64().unwrap() as usize,
        seed: 0,
        n_permutations: 0,
        compare_random_split: false,
    };
    let grid = ridge_grid(&floats(&nf["alphas"]));
    let v = validate(
        x.view(),
        y.view(),
        &design,
        &[grid],
        &settings,
        &ridge_predict,
        &quiet,
    )
    .unwrap();
    assert_eq!(v.outer_folds.fold_of, usizes(&nf["outer_fold_of"]));
    let chosen = v.chosen();
    for (f, (ours, theirs)) in chosen
        .outer
        .iter()
        .zip(nf["folds"].as_array().unwrap())
        .enumerate()
    {
        assert_eq!(
            ours.chosen[0],
            theirs["chosen"].as_u64().unwrap() as usize,
            "fold {f} choice"
        );
        let m = &theirs["metrics"];
        for (a, key) in [
            (ours.metrics.mse, "mse"),
            (ours.metrics.rmse, "rmse"),
            (ours.metrics.mae, "mae"),
            (ours.metrics.r2, "r2"),
            (ours.metrics.pearson, "pearson"),
            (ours.metrics.spearman, "spearman"),
        ] {
            assert!(
                close(a, m[key].as_f64().unwrap(), TOL),
                "fold {f} {key}: {a} vs {}",
                m[key]
            );
        }
        assert!(close(
            ours.inner_best_mse,
            theirs["inner_best_mse"].as_f64().unwrap(),
            TOL
        ));
        assert_all_close(
            &ours.test_predictions,
            &floats(&theirs["test_predictions"]),
            "outer predictions",
        );
        assert_all_close(
            &ours.inner_residuals,
            &floats(&theirs["inner_residuals"]),
            "inner residuals",
        );
        let inner = matrix(&theirs["inner_test_predictions"]);
        assert_eq!(ours.inner_test_predictions.dim(), inner.dim());
        assert_all_close(
            ours.inner_test_predictions
                .as_standard_layout()
                .as_slice()
                .unwrap(),
            inner.as_slice().unwrap(),
            "inner fold models on the outer-test rows",
        );
    }
    let claims = v.claims();
    for (e, key) in [
        (claims.mse, "mse"),
        (claims.rmse, "rmse"),
        (claims.mae, "mae"),
        (claims.r2, "r2"),
        (claims.pearson, "pearson"),
        (claims.spearman, "spearman"),
    ] {
        let c = &nf["claims"][key];
        assert!(
            close(e.mean, c["mean"].as_f64().unwrap(), TOL),
            "claim {key} mean"
        );
        assert!(
            close(e.se, c["se"].as_f64().unwrap(), TOL),
            "claim {key} se"
        );
    }
    let fin = &nf["final"];
    let ours = &v.final_selection;
    assert_eq!(
        ours.chosen,
        fin["chosen"].as_u64().unwrap() as usize,
        "final one-SE choice"
    );
    assert_eq!(
        ours.plain_best,
        fin["plain_best"].as_u64().unwrap() as usize
    );
    assert_ne!(
        ours.chosen, ours.plain_best,
        "the one-SE rule moved off the minimum here"
    );
    assert_all_close(
        &ours.oof_predictions,
        &floats(&fin["oof_predictions"]),
        "final oof",
    );
    assert_all_close(
        &ours.residuals,
        &floats(&fin["residuals"]),
        "final residuals",
    );
    assert!(close(
        ours.plain_best_mse.mean,
        fin["plain_best_mse"]["mean"].as_f64().unwrap(),
        TOL
    ));
    assert!(close(
        ours.plain_best_mse.se,
        fin["plain_best_mse"]["se"].as_f64().unwrap(),
        TOL
    ));
    assert!(close(
        ours.plain_best_q2.mean,
        fin["plain_best_q2"]["mean"].as_f64().unwrap(),
        TOL
    ));
    assert!(close(
        ours.plain_best_q2.se,
        fin["plain_best_q2"]["se"].as_f64().unwrap(),
        TOL
    ));
}
