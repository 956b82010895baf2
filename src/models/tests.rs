//! Unit tests of the model layer: every fast path against a brute-force
//! twin written here (explicit loops, Gaussian elimination), the member
//! predictor against per-member grid fits, and the precondition errors.

use super::*;
use ndarray::{Array1, Array2, Axis, array, s};
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;

fn random(rows: usize, cols: usize, seed: u64) -> Array2<f64> {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    Array2::from_shape_fn((rows, cols), |_| rng.gen_range(-1.5..1.5))
}

/// A target with signal plus noise, several columns.
fn targets(x: &Array2<f64>, cols: usize, seed: u64) -> Array2<f64> {
    let noise = random(x.nrows(), cols, seed);
    Array2::from_shape_fn((x.nrows(), cols), |(i, j)| {
        3.0 + (j as f64) + x[[i, 0]] * 2.0 - x[[i, 1 % x.ncols()]].powi(2) + 0.3 * noise[[i, j]]
    })
}

fn assert_close(found: ArrayView2<f64>, expected: ArrayView2<f64>, rel: f64, what: &str) {
    assert_eq!(found.dim(), expected.dim(), "{what}: shapes");
    let scale = expected.iter().fold(1.0f64, |m, v| m.max(v.abs()));
    for ((idx, x), y) in found.indexed_iter().zip(expected.iter()) {
        assert!(
            (x - y).abs() <= rel * scale,
            "{what} at {idx:?}: {x} vs {y}"
        );
    }
}

/// Solves A x = b by Gaussian elimination with partial pivoting: the
/// textbook algorithm, sharing no code with the solvers under test.
fn gauss_solve(mut a: Array2<f64>, mut b: Array1<f64>) -> Array1<f64> {
    let n = a.nrows();
    for col in 0..n {
        let pivot = (col..n)
            .max_by(|&i, &j| a[[i, col]].abs().total_cmp(&a[[j, col]].abs()))
            .unwrap();
        for k in 0..n {
            a.swap([col, k], [pivot, k]);
        }
        b.swap(col, pivot);
        for r in col + 1..n {
            let f = a[[r, col]] / a[[col, col]];
            for k in col..n {
                a[[r, k]] -= f * a[[col, k]];
            }
            b[r] -= f * b[col];
        }
    }
    let mut x = Array1::zeros(n);
    for r in (0..n).rev() {
        let tail: f64 = (r + 1..n).map(|k| a[[r, k]] * x[k]).sum();
        x[r] = (b[r] - tail) / a[[r, r]];
    }
    x
}

fn sq_dist(a: ArrayView1<f64>, b: ArrayView1<f64>) -> f64 {
    a.iter().zip(b.iter()).map(|(u, v)| (u - v).powi(2)).sum()
}

/// Ridge by its definition: centre, solve the normal equations.
fn brute_ridge(alpha: f64, x: &Array2<f64>, y: ArrayView1<f64>, xq: &Array2<f64>) -> Array1<f64> {
    let xm = x.mean_axis(Axis(0)).unwrap();
    let ym = y.mean().unwrap();
    let xc = x - &xm;
    let p = x.ncols();
    let mut a = xc.t().dot(&xc);
    for i in 0..p {
        a[[i, i]] += alpha;
    }
    let beta = gauss_solve(a, xc.t().dot(&(&y - ym)));
    (xq - &xm).dot(&beta) + ym
}

/// Kernel ridge by its definition, with the kernel from explicit loops.
fn brute_kernel(
    gamma: f64,
    alpha: f64,
    x: &Array2<f64>,
    y: ArrayView1<f64>,
    xq: &Array2<f64>,
) -> Array1<f64> {
    let n = x.nrows();
    let ym = y.mean().unwrap();
    let k = Array2::from_shape_fn((n, n), |(i, j)| {
        (-gamma * sq_dist(x.row(i), x.row(j))).exp() + if i == j { alpha } else { 0.0 }
    });
    let dual = gauss_solve(k, &y - ym);
    Array1::from_shape_fn(xq.nrows(), |q| {
        (0..n)
            .map(|i| (-gamma * sq_dist(xq.row(q), x.row(i))).exp() * dual[i])
            .sum::<f64>()
            + ym
    })
}

/// k-NN by its definition: sort every training row by (distance, index).
fn brute_knn(k: usize, x: &Array2<f64>, y: ArrayView1<f64>, xq: &Array2<f64>) -> Array1<f64> {
    Array1::from_shape_fn(xq.nrows(), |q| {
        let mut order: Vec<(f64, usize)> = (0..x.nrows())
            .map(|i| (sq_dist(xq.row(q), x.row(i)), i))
            .collect();
        order.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
        let k = k.min(order.len());
        order[..k].iter().map(|&(_, i)| y[i]).sum::<f64>() / k as f64
    })
}

fn brute(h: &Hyper, x: &Array2<f64>, y: ArrayView1<f64>, xq: &Array2<f64>) -> Array1<f64> {
    match *h {
        Hyper::Ridge { alpha } => brute_ridge(alpha, x, y, xq),
        Hyper::KernelRidge { gamma, alpha } => brute_kernel(gamma, alpha, x, y, xq),
        Hyper::Knn { k } => brute_knn(k, x, y, xq),
    }
}

fn small_grids(p: usize) -> Vec<Grid> {
    vec![
        parse_grid(Family::Ridge, "alpha=1000,3,0.01").unwrap(),
        parse_grid(Family::Ridge, "alpha=0.5").unwrap(),
        default_grid(Family::KernelRidge, p),
        parse_grid(Family::KernelRidge, "gamma=0.2;alpha=0.05,1").unwrap(),
        parse_grid(Family::Knn, "k=50,7,3,1").unwrap(),
    ]
}

#[test]
fn grid_predict_matches_brute_force_fits_on_every_column() {
    // p < n (ridge primal) and p > n (ridge dual) both.
    for (n, p, seed) in [(60, 5, 1), (18, 30, 2)] {
        let x = random(n, p, seed);
        let xt = random(13, p, seed + 10);
        let y = targets(&x, 3, seed + 20);
        for grid in small_grids(p) {
            let out = grid_predict(&grid, x.view(), y.view(), xt.view());
            assert_eq!(out.test.dim(), (grid.points.len(), 13, 3));
            assert_eq!(out.train.dim(), (grid.points.len(), n, 3));
            for (g, h) in grid.points.iter().enumerate() {
                for c in 0..3 {
                    let what = format!("{h} n={n} p={p} column {c}");
                    let test = brute(h, &x, y.column(c), &xt);
                    let train = brute(h, &x, y.column(c), &x);
                    assert_close(
                        out.test.slice(s![g, .., c..c + 1]),
                        test.view().insert_axis(Axis(1)),
                        1e-9,
                        &format!("test, {what}"),
                    );
                    assert_close(
                        out.train.slice(s![g, .., c..c + 1]),
                        train.view().insert_axis(Axis(1)),
                        1e-9,
                        &format!("train, {what}"),
                    );
                }
            }
        }
    }
}

#[test]
fn several_target_columns_give_what_each_column_gives_alone() {
    let x = random(45, 6, 3);
    let xt = random(9, 6, 4);
    let y = targets(&x, 4, 5);
    for grid in small_grids(6) {
        let all = grid_predict(&grid, x.view(), y.view(), xt.view());
        for c in 0..4 {
            let one = grid_predict(&grid, x.view(), y.slice(s![.., c..c + 1]), xt.view());
            for g in 0..grid.points.len() {
                assert_close(
                    all.test.slice(s![g, .., c..c + 1]),
                    one.test.slice(s![g, .., ..]),
                    1e-12,
                    &format!("{} test column {c}", grid.points[g]),
                );
                assert_close(
                    all.train.slice(s![g, .., c..c + 1]),
                    one.train.slice(s![g, .., ..]),
                    1e-12,
                    &format!("{} train column {c}", grid.points[g]),
                );
            }
        }
    }
}

/// The full set, two fold-training sets and a member smaller than k.
fn memberships(n: usize) -> Array2<bool> {
    Array2::from_shape_fn((n, 4), |(i, m)| match m {
        0 => true,
        1 => i % 3 != 0,
        2 => i % 3 != 1,
        _ => i % 11 == 4,
    })
}

#[test]
fn member_predictor_matches_a_grid_fit_on_each_members_rows() {
    let (n, p) = (50, 4);
    let x = random(n, p, 6);
    let y = targets(&x, 1, 7).column(0).to_owned();
    let xq = random(17, p, 8);
    let membership = memberships(n);
    let settings = [
        Hyper::Ridge { alpha: 2.0 },
        Hyper::KernelRidge {
            gamma: 0.3,
            alpha: 0.1,
        },
        Hyper::Knn { k: 6 },
    ];
    for hyper in settings {
        let predictor = fit_predictor(&hyper, x.view(), y.view(), membership.view());
        predictor.check().unwrap();
        assert_eq!(predictor.n_members(), 4);
        assert_eq!(predictor.n_descriptors(), p);
        let fast = predictor.predict(xq.view());
        assert_eq!(fast.dim(), (17, 4));
        let grid = Grid::new(hyper.family(), vec![hyper]).unwrap();
        for m in 0..4 {
            let rows: Vec<usize> = (0..n).filter(|&i| membership[[i, m]]).collect();
            let xm = x.select(Axis(0), &rows);
            let ym = y.select(Axis(0), &rows).insert_axis(Axis(1)).to_owned();
            let twin = grid_predict(&grid, xm.view(), ym.view(), xq.view());
            assert_close(
                fast.slice(s![.., m..m + 1]),
                twin.test.slice(s![0, .., ..]),
                1e-10,
                &format!("{hyper} member {m}"),
            );
        }
    }
}

#[test]
fn a_huge_penalty_predicts_the_training_mean() {
    let x = random(30, 4, 9);
    let y = targets(&x, 2, 10);
    let xt = random(7, 4, 11);
    let grid = parse_grid(Family::Ridge, "alpha=1e12").unwrap();
    let out = grid_predict(&grid, x.view(), y.view(), xt.view());
    let mean = y.mean_axis(Axis(0)).unwrap();
    for c in 0..2 {
        for v in out.test.slice(s![0, .., c]) {
            // ‖β‖ ≈ ‖Xᵀy‖/α ≈ 1e−10 here.
            assert!((v - mean[c]).abs() < 1e-8, "{v} vs mean {}", mean[c]);
        }
    }
}

#[test]
fn k_is_capped_at_the_training_rows_and_ties_go_to_the_lower_index() {
    // Integer coordinates make every squared distance exact, so the ties
    // are real: the query (0, 0) is at distance 1 from rows 1, 2 and 3.
    let x = array![[3.0, 0.0], [1.0, 0.0], [0.0, 1.0], [-1.0, 0.0], [0.0, 2.0]];
    let y = array![[10.0], [20.0], [30.0], [40.0], [50.0]];
    let q = array![[0.0, 0.0]];
    let grid = parse_grid(Family::Knn, "k=30,5,2,1").unwrap();
    let out = grid_predict(&grid, x.view(), y.view(), q.view());
    // k = 30 and k = 5 both average all five rows; k = 2 takes rows 1 and 2;
    // k = 1 takes row 1.
    let expected = [30.0, 30.0, 25.0, 20.0];
    for (g, e) in expected.iter().enumerate() {
        assert_eq!(out.test[[g, 0, 0]], *e, "{}", grid.points[g]);
    }
    let membership = array![
        [true, false],
        [true, false],
        [true, true],
        [true, true],
        [true, true]
    ];
    let predictor = fit_predictor(
        &Hyper::Knn { k: 2 },
        x.view(),
        y.column(0),
        membership.view(),
    );
    let p = predictor.predict(q.view());
    // Member 1 has rows 2, 3, 4: the tie between rows 2 and 3 keeps both.
    assert_eq!(p, array![[25.0, 35.0]]);
}

#[test]
fn bad_inputs_are_reported_with_their_position() {
    let x = random(10, 3, 12);
    let y = targets(&x, 1, 13);
    let grid = default_grid(Family::Ridge, 3);
    let mut bad = x.clone();
    bad[[4, 2]] = f64::NAN;
    let err = try_grid_predict(&grid, bad.view(), y.view(), x.view()).unwrap_err();
    assert!(matches!(
        err,
        Error::NonFinite {
            what: "x_train",
            row: 4,
            column: 2,
            ..
        }
    ));
    assert!(err.to_string().contains("row 4, column 2"), "{err}");
    let err = try_grid_predict(&grid, x.view(), y.slice(s![..9, ..]), x.view()).unwrap_err();
    assert!(
        err.to_string().contains("9 rows but must be 10 rows"),
        "{err}"
    );
    let narrow = x.slice(s![.., ..2]);
    let err = try_grid_predict(&grid, x.view(), y.view(), narrow).unwrap_err();
    assert!(matches!(err, Error::Shape { .. }), "{err}");
    let unsorted = Grid {
        family: Family::Knn,
        points: vec![Hyper::Knn { k: 1 }, Hyper::Knn { k: 5 }],
    };
    assert!(matches!(
        try_grid_predict(&unsorted, x.view(), y.view(), x.view()),
        Err(Error::NotInSimplicityOrder { .. })
    ));
    let empty = Array2::<f64>::zeros((0, 3));
    assert_eq!(
        try_grid_predict(&grid, empty.view(), Array2::zeros((0, 1)).view(), x.view()).unwrap_err(),
        Error::EmptyTrainingSet
    );

    let mut membership = Array2::from_elem((10, 2), true);
    membership.column_mut(1).fill(false);
    let err = try_fit_predictor(
        &Hyper::Ridge { alpha: 1.0 },
        x.view(),
        y.column(0),
        membership.view(),
    )
    .unwrap_err();
    assert_eq!(err, Error::EmptyMember { member: 1 });
    let err = try_fit_predictor(
        &Hyper::Knn { k: 0 },
        x.view(),
        y.column(0),
        membership.view(),
    )
    .unwrap_err();
    assert!(matches!(err, Error::NotACount { .. }));

    let predictor = fit_predictor(
        &Hyper::KernelRidge {
            gamma: 0.5,
            alpha: 1.0,
        },
        x.view(),
        y.column(0),
        Array2::from_elem((10, 1), true).view(),
    );
    let err = predictor.try_predict(narrow).unwrap_err();
    assert!(
        err.to_string().contains("2 descriptors but must be 3"),
        "{err}"
    );
    let mut q = x.slice(s![..2, ..]).to_owned();
    q[[1, 0]] = f64::INFINITY;
    assert!(matches!(
        predictor.try_predict(q.view()),
        Err(Error::NonFinite {
            row: 1,
            column: 0,
            ..
        })
    ));
}

#[test]
fn check_finds_predictors_whose_arrays_do_not_fit_together() {
    let x = random(12, 3, 14);
    let y = targets(&x, 1, 15).column(0).to_owned();
    let all = Array2::from_elem((12, 2), true);
    let Predictor::Kernel {
        gamma,
        train,
        dual,
        offset,
        ..
    } = fit_predictor(
        &Hyper::KernelRidge {
            gamma: 0.5,
            alpha: 1.0,
        },
        x.view(),
        y.view(),
        all.view(),
    )
    else {
        panic!("kernel ridge fits a kernel predictor");
    };
    let short = Predictor::kernel(
        gamma,
        train.clone(),
        dual.slice(s![..11, ..]).to_owned(),
        offset.clone(),
    );
    assert!(matches!(short.check(), Err(Error::Shape { .. })));
    let bad_gamma = Predictor::kernel(-1.0, train.clone(), dual.clone(), offset.clone());
    assert!(matches!(bad_gamma.check(), Err(Error::NotPositive { .. })));
    let stale_norms = Predictor::Kernel {
        gamma,
        train_norms: ndarray::Array1::zeros(train.nrows() - 1),
        train,
        dual,
        offset,
    };
    assert!(matches!(stale_norms.check(), Err(Error::Shape { .. })));
    let lonely = Predictor::Neighbours {
        k: 3,
        train: x.clone(),
        y,
        membership: Array2::from_elem((12, 1), false),
    };
    assert_eq!(lonely.check(), Err(Error::EmptyMember { member: 0 }));
}

#[test]
fn degenerate_sizes_give_well_shaped_answers() {
    // One training row: the centred target is zero, so every family
    // predicts that row's target everywhere.
    let x = array![[0.5, -1.0, 2.0]];
    let y = array![[7.0, -3.0]];
    let xt = random(4, 3, 16);
    for grid in small_grids(3) {
        let out = grid_predict(&grid, x.view(), y.view(), xt.view());
        assert_eq!(out.test.dim(), (grid.points.len(), 4, 2));
        for ((_, _, c), v) in out.test.indexed_iter() {
            assert!((v - y[[0, c]]).abs() < 1e-12, "{}: {v}", grid.family.name());
        }
        // An empty test set is no error: the train curve alone.
        let none = Array2::<f64>::zeros((0, 3));
        let out = grid_predict(&grid, x.view(), y.view(), none.view());
        assert_eq!(out.test.dim(), (grid.points.len(), 0, 2));
        assert_eq!(out.train.dim(), (grid.points.len(), 1, 2));
    }
}
