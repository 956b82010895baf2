//! PCA and every domain signal checked against scikit-learn and numpy on the
//! diabetes data (Efron et al., Ann. Statist. 2004, as shipped by
//! scikit-learn). Reference values come from `tests/reference/space_ref.py`
//! (sklearn PCA, StandardScaler, NearestNeighbors; numpy hat matrix and
//! quantiles) via `tests/fixtures/space_reference.json`.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use ndarray::{Array1, Array2, Axis, s};
use plumbline::domain::{self, DomainGuard, DomainSettings};
use plumbline::space::Standardizer;
use plumbline::space::pca::Pca;
use serde_json::Value;

fn fixture() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/fixtures/space_reference.json"
    );
    let text = std::fs::read_to_string(path).expect("fixture is committed");
    serde_json::from_str(&text).expect("fixture is valid JSON")
}

fn vector(v: &Value) -> Array1<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number"))
        .collect()
}

fn matrix(v: &Value) -> Array2<f64> {
    let rows: Vec<Array1<f64>> = v
        .as_array()
        .expect("array of rows")
        .iter()
        .map(vector)
        .collect();
    let cols = rows.first().map_or(0, |r| r.len());
    Array2::from_shape_fn((rows.len(), cols), |(i, j)| rows[i][j])
}

/// Fixture values carry 10 significant digits.
fn close(got: f64, want: f64, what: &str) {
    let tol = 1e-8 * want.abs().max(1.0);
    assert!(
        (got - want).abs() <= tol,
        "{what}: got {got}, scikit-learn/numpy {want}"
    );
}

fn all_close<'a>(
    got: impl IntoIterator<Item = &'a f64>,
    want: impl IntoIterator<Item = &'a f64>,
    what: &str,
) {
    let (got, want): (Vec<_>, Vec<_>) = (got.into_iter().collect(), want.into_iter().collect());
    assert_eq!(got.len(), want.len(), "{what}: lengths");
    for (i, (g, w)) in got.iter().zip(&want).enumerate() {
        close(**g, **w, &format!("{what}[{i}]"));
    }
}

fn standardised(x_raw: &Array2<f64>) -> Array2<f64> {
    Standardizer::fit(x_raw.view()).transform(x_raw.view())
}

#[test]
fn standardiser_matches_sklearn_standard_scaler() {
    let f = fixture();
    let x = matrix(&f["x_raw"]);
    let s = Standardizer::fit(x.view());
    all_close(&s.mean, &vector(&f["scaler_mean"]), "mean");
    all_close(&s.scale, &vector(&f["scaler_scale"]), "scale");
}

#[test]
fn pca_spectrum_and_components_match_sklearn() {
    let f = fixture();
    let xs = standardised(&matrix(&f["x_raw"]));
    let pca = Pca::fit(xs.view(), 1.0, 16).unwrap();
    assert_eq!(pca.n_components(), 10);
    all_close(
        &pca.eigenvalues,
        &vector(&f["pca"]["explained_variance"]),
        "explained variance",
    );
    all_close(
        &pca.explained_variance_ratio,
        &vector(&f["pca"]["explained_variance_ratio"]),
        "explained variance ratio",
    );
    let want = matrix(&f["pca"]["components"]);
    for (j, (ours, theirs)) in pca
        .components
        .rows()
        .into_iter()
        .zip(want.rows())
        .enumerate()
    {
        // Eigenvectors are defined up to sign; ours follow our convention.
        let sign = ours.dot(&theirs).signum();
        let flipped: Vec<f64> = theirs.iter().map(|v| v * sign).collect();
        all_close(ours.iter(), flipped.iter(), &format!("component {j}"));
        let largest = ours
            .iter()
            .fold(0.0f64, |m, v| if v.abs() > m.abs() { *v } else { m });
        assert!(largest > 0.0, "component {j}: largest loading is positive");
    }
}

#[test]
fn pca_keeps_the_components_sklearn_keeps_and_gives_its_scores() {
    let f = fixture();
    let xs = standardised(&matrix(&f["x_raw"]));
    let pca = Pca::fit(xs.view(), 0.9, 10).unwrap();
    let want_p = f["pca"]["n_components_for_fraction"].as_u64().unwrap() as usize;
    assert_eq!(pca.n_components(), want_p);
    let scores = pca.scores(xs.view()).mapv(f64::abs);
    all_close(&scores, &matrix(&f["pca"]["abs_scores"]), "|scores|");
    // Q of training rows against sklearn's inverse_transform residuals.
    all_close(
        &pca.residual(xs.view()),
        &vector(&f["guard"]["training_residual"]),
        "training Q",
    );
}

#[test]
fn pca_with_fewer_rows_than_descriptors_matches_sklearn() {
    let f = fixture();
    let xs = standardised(&matrix(&f["x_raw"]));
    let rows = f["wide"]["rows"].as_u64().unwrap() as usize;
    let wide = xs.slice(s![..rows, ..]);
    let pca = Pca::fit(wide, 1.0, 16).unwrap();
    // 8 centred rows span 7 dimensions: the rank caps the components.
    assert_eq!(pca.n_components(), rows - 1);
    all_close(
        &pca.eigenvalues,
        &vector(&f["wide"]["explained_variance"]),
        "wide variance",
    );
    let scores = pca.scores(wide).mapv(f64::abs);
    all_close(&scores, &matrix(&f["wide"]["abs_scores"]), "wide |scores|");
}

/// Fits the guard with default settings on the given raw rows.
fn guard_for(x_raw: &Array2<f64>) -> (DomainGuard, Standardizer) {
    let st = Standardizer::fit(x_raw.view());
    let xs = st.transform(x_raw.view());
    let guard = DomainGuard::fit(xs.view(), x_raw.view(), &DomainSettings::default()).unwrap();
    (guard, st)
}

#[test]
fn leave_one_out_distances_and_thresholds_match_sklearn_and_numpy() {
    let f = fixture();
    let g = &f["guard"];
    let x_raw = matrix(&f["x_raw"]);
    let (guard, _) = guard_for(&x_raw);
    assert_eq!(
        guard.pca().n_components(),
        g["n_components"].as_u64().unwrap() as usize
    );
    let want = vector(&g["loo_distances"]);
    all_close(
        &guard.training_loo_distances(),
        &want,
        "leave-one-out k-NN distance",
    );
    let mut sorted = want.to_vec();
    sorted.sort_by(f64::total_cmp);
    all_close(
        &guard.state().loo_distances,
        &sorted,
        "sorted leave-one-out distances",
    );
    let t = guard.thresholds();
    close(t.knn_mean, g["knn_mean"].as_f64().unwrap(), "D̄");
    close(t.knn_sd, g["knn_sd"].as_f64().unwrap(), "σ (ddof = 1)");
    close(
        t.z_threshold,
        g["z_threshold"].as_f64().unwrap(),
        "Z-rule threshold",
    );
    close(
        t.residual_border_limit,
        g["residual_q95"].as_f64().unwrap(),
        "Q 95% (numpy linear)",
    );
    close(
        t.residual_outside_limit,
        g["residual_q99"].as_f64().unwrap(),
        "Q 99% (numpy linear)",
    );
    // h* = 3(p + 1)/n with p = 7, n = 442 (by hand: 24/442).
    close(t.leverage_warning, 24.0 / 442.0, "h*");
    assert!(t.leverage_meaningful && t.residual_meaningful);
    all_close(
        &guard.state().range_min,
        &vector(&g["range_min"]),
        "range min",
    );
    all_close(
        &guard.state().range_max,
        &vector(&g["range_max"]),
        "range max",
    );
}

#[test]
fn training_leverage_equals_the_hat_matrix_diagonal() {
    let f = fixture();
    let x_raw = matrix(&f["x_raw"]);
    let (guard, _) = guard_for(&x_raw);
    let st = guard.state();
    let ours: Vec<f64> = st
        .training_scores
        .rows()
        .into_iter()
        .map(|t| domain::leverage(&st.pca, st.n, t))
        .collect();
    all_close(
        &ours,
        &vector(&f["guard"]["training_leverage"]),
        "hat diagonal",
    );
    // The hat matrix of [1, T] has trace p + 1 (by hand): a check on the
    // check.
    let trace: f64 = ours.iter().sum();
    assert!((trace - (st.pca.n_components() + 1) as f64).abs() < 1e-9);
}

#[test]
fn query_signals_match_the_reference() {
    let f = fixture();
    let g = &f["guard"];
    let x_raw = matrix(&f["x_raw"]);
    let q_raw = matrix(&f["queries_raw"]);
    let (guard, st) = guard_for(&x_raw);
    let qs = st.transform(q_raw.view());
    let signals = guard.assess(qs.view(), q_raw.view());
    let pick = |key: &str| {
        signals
            .iter()
            .map(|s| match key {
                "d" => s.knn_distance,
                "p" => s.typicality,
                "h" => s.leverage,
                _ => s.pca_residual,
            })
            .collect::<Vec<_>>()
    };
    all_close(
        &pick("d"),
        &vector(&g["query_knn_distance"]),
        "query k-NN distance",
    );
    all_close(
        &pick("p"),
        &vector(&g["query_typicality"]),
        "query typicality",
    );
    all_close(
        &pick("h"),
        &vector(&g["query_leverage"]),
        "query leverage (hat matrix)",
    );
    all_close(&pick("q"), &vector(&g["query_residual"]), "query Q");
    let (lo, hi) = (vector(&g["range_min"]), vector(&g["range_max"]));
    for (i, s) in signals.iter().enumerate() {
        let want: Vec<usize> = (0..lo.len())
            .filter(|&j| q_raw[[i, j]] < lo[j] || q_raw[[i, j]] > hi[j])
            .collect();
        let got: Vec<usize> = s.out_of_range.iter().map(|r| r.descriptor).collect();
        assert_eq!(got, want, "query {i}: descriptors out of range");
    }
    // The last six queries are far from the data: outside, with reasons.
    for s in &signals[signals.len() - 6..] {
        assert_eq!(s.verdict, domain::Verdict::Outside, "{:?}", s.notes);
        assert!(s.notes.iter().any(|n| n.contains("typicality")));
    }
}

#[test]
fn neighbours_match_sklearn_nearest_neighbors() {
    let f = fixture();
    let g = &f["guard"];
    let x_raw = matrix(&f["x_raw"]);
    let q_raw = matrix(&f["queries_raw"]);
    let (guard, st) = guard_for(&x_raw);
    let qs = st.transform(q_raw.view());
    let want_d = matrix(&g["query_neighbour_distances"]);
    let want_i = matrix(&g["query_neighbour_index"]);
    for (q, row) in qs.axis_iter(Axis(0)).enumerate() {
        let got = guard.neighbours(row, 5);
        let d: Vec<f64> = got.iter().map(|&(_, d)| d).collect();
        all_close(
            &d,
            want_d.row(q).iter(),
            &format!("query {q} neighbour distances"),
        );
        for (j, &(i, dist)) in got.iter().enumerate() {
            // Indices agree wherever the distance is not tied.
            let tied = want_d
                .row(q)
                .iter()
                .enumerate()
                .any(|(m, &w)| m != j && (w - dist).abs() < 1e-9);
            if !tied {
                assert_eq!(i, want_i[[q, j]] as usize, "query {q} neighbour {j}");
            }
        }
    }
}

#[test]
fn duplicate_rows_count_as_neighbours_at_distance_zero_as_in_sklearn() {
    let f = fixture();
    let d = &f["duplicates"];
    let x_raw = matrix(&d["x_raw"]);
    let (guard, st) = guard_for(&x_raw);
    assert_eq!(
        guard.pca().n_components(),
        d["guard"]["n_components"].as_u64().unwrap() as usize
    );
    all_close(
        &guard.training_loo_distances(),
        &vector(&d["guard"]["loo_distances"]),
        "leave-one-out distances with 41 copies of one row",
    );
    let q_raw = matrix(&f["queries_raw"]).slice(s![..4, ..]).to_owned();
    let qs = st.transform(q_raw.view());
    let signals = guard.assess(qs.view(), q_raw.view());
    let got: Vec<f64> = signals.iter().map(|s| s.knn_distance).collect();
    all_close(
        &got,
        &vector(&d["guard"]["query_knn_distance"]),
        "query distances",
    );
    let got: Vec<f64> = signals.iter().map(|s| s.typicality).collect();
    all_close(
        &got,
        &vector(&d["guard"]["query_typicality"]),
        "query typicality",
    );
}
