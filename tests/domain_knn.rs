//! Every nearest-neighbour query of the domain guard (kiddo k-d tree)
//! against brute force over all training rows in PCA space: the k nearest
//! distances of queries, the k-NN distance signal and the leave-one-out
//! distances, over many random shapes, all tree dimensions used (1..=16
//! components) and many duplicate rows (more than a tree bucket of 32
//! sharing one point).

#![allow(clippy::unwrap_used, clippy::expect_used)]

use ndarray::{Array2, ArrayView1, Axis, concatenate};
use plumbline::domain::{DomainGuard, DomainSettings};
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;

fn gaussian(rng: &mut Xoshiro256PlusPlus) -> f64 {
    // Box–Muller.
    let u: f64 = rng.gen_range(f64::EPSILON..1.0);
    let v: f64 = rng.gen_range(0.0..1.0);
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
}

fn random(rows: usize, cols: usize, rng: &mut Xoshiro256PlusPlus) -> Array2<f64> {
    Array2::from_shape_fn((rows, cols), |_| gaussian(rng))
}

/// Training data with `copies` extra copies of row 0 and of row 1.
fn with_duplicates(x: Array2<f64>, copies: usize) -> Array2<f64> {
    let first = x.select(Axis(0), &vec![0; copies]);
    let second = x.select(Axis(0), &vec![1; copies / 3]);
    concatenate(Axis(0), &[x.view(), first.view(), second.view()]).unwrap()
}

fn dist(a: ArrayView1<f64>, b: ArrayView1<f64>) -> f64 {
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).powi(2))
        .sum::<f64>()
        .sqrt()
}

/// Sorted distances from `q` to every training score row, optionally
/// leaving one row out by index.
fn brute(train: &Array2<f64>, q: ArrayView1<f64>, leave_out: Option<usize>) -> Vec<f64> {
    let mut d: Vec<f64> = train
        .rows()
        .into_iter()
        .enumerate()
        .filter(|(i, _)| Some(*i) != leave_out)
        .map(|(_, r)| dist(r, q))
        .collect();
    d.sort_by(f64::total_cmp);
    d
}

fn assert_close(got: &[f64], want: &[f64], what: &str) {
    assert_eq!(got.len(), want.len(), "{what}: count");
    for (g, w) in got.iter().zip(want) {
        assert!(
            (g - w).abs() <= 1e-9 * (1.0 + w.abs()),
            "{what}: tree {g}, brute force {w}"
        );
    }
}

fn check_case(seed: u64, n: usize, d: usize, k: usize, copies: usize) {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    let x = with_duplicates(random(n, d, &mut rng), copies);
    let settings = DomainSettings {
        k,
        variance_fraction: 1.0,
        max_components: 16,
        ..DomainSettings::default()
    };
    // Raw and standardised are the same here: ranges do not matter.
    let guard = DomainGuard::fit(x.view(), x.view(), &settings).unwrap();
    let scores = guard.pca().scores(x.view());
    let case = format!(
        "seed {seed}, n {}, d {d}, p {}, k {k}",
        x.nrows(),
        guard.pca().n_components()
    );

    for (i, want_row) in scores.rows().into_iter().enumerate().take(60) {
        let near = brute(&scores, want_row, Some(i));
        let want = near[..k].iter().sum::<f64>() / k as f64;
        let got = guard.training_loo_distances()[i];
        assert_close(
            &[got],
            &[want],
            &format!("{case}: leave-one-out of row {i}"),
        );
    }

    // Queries: the training rows themselves, the duplicated row, and new
    // points near and far.
    let mut queries = x.select(Axis(0), &[0, 1, 2, x.nrows() - 1]);
    let fresh = random(12, d, &mut rng) * 1.5;
    queries = concatenate(Axis(0), &[queries.view(), fresh.view()]).unwrap();
    let q_scores = guard.pca().scores(queries.view());
    let signals = guard.assess(queries.view(), queries.view());
    for (j, q) in queries.rows().into_iter().enumerate() {
        let all = brute(&scores, q_scores.row(j), None);
        for kk in [1, k, k + 3, x.nrows() + 2] {
            let got: Vec<f64> = guard.neighbours(q, kk).iter().map(|&(_, dd)| dd).collect();
            let take = kk.min(x.nrows());
            assert_close(
                &got,
                &all[..take],
                &format!("{case}: query {j}, {kk} nearest"),
            );
        }
        let want = all[..k].iter().sum::<f64>() / k as f64;
        assert_close(
            &[signals[j].knn_distance],
            &[want],
            &format!("{case}: query {j} k-NN distance"),
        );
        // Indices the tree reports are real rows at the distance it says.
        for (i, dd) in guard.neighbours(q, k) {
            assert_close(
                &[dist(scores.row(i), q_scores.row(j))],
                &[dd],
                &format!("{case}: row {i}"),
            );
        }
    }
}

#[test]
fn tree_queries_match_brute_force_in_every_dimension() {
    for p in 1..=16 {
        check_case(100 + p as u64, 40 + 7 * p, p, 5, 0);
    }
}

#[test]
fn tree_queries_match_brute_force_with_many_duplicate_rows() {
    // 45 copies of one row and 15 of another: more than a bucket of 32.
    for (seed, d, k) in [(1, 3, 5), (2, 8, 5), (3, 16, 3), (4, 2, 50)] {
        check_case(seed, 120, d, k, 45);
    }
}

#[test]
fn leave_one_out_of_a_duplicated_row_is_zero_when_k_copies_remain() {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(9);
    let x = with_duplicates(random(50, 4, &mut rng), 40);
    let guard = DomainGuard::fit(x.view(), x.view(), &DomainSettings::default()).unwrap();
    let loo = guard.training_loo_distances();
    // Row 0 has 40 identical copies: its 5 nearest others are at 0.
    assert_eq!(loo[0], 0.0);
    assert_eq!(loo[60], 0.0);
    // Row 1 has 13 copies: also 0 with k = 5.
    assert_eq!(loo[1], 0.0);
    assert!(loo[2] > 0.0);
}

#[test]
fn many_random_shapes_match_brute_force() {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(77);
    for case in 0..25 {
        let n = rng.gen_range(8..200);
        let d = rng.gen_range(1..24);
        let k = rng.gen_range(1..n.min(12));
        let copies = if case % 3 == 0 {
            rng.gen_range(0..50)
        } else {
            0
        };
        check_case(1000 + case, n, d, k, copies);
    }
}
