//! Speed of the domain guard and of CV+ on the sizes of the service's
//! benchmark (2,000 training rows × 200 descriptors, batches of 1,000):
//! guard fit, out-of-fold calibration, batch assessment, the k-d tree
//! against a blocked brute-force k-NN search, the tree against the guard's
//! scan on uniform points in 3 to 16 dimensions, and the CV+ rank search
//! against materialising all n values. Run with
//! `cargo bench --bench domain_conformal`; figures go to stdout.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::hint::black_box;
use std::time::Instant;

use ndarray::{Array2, Axis};
use plumbline::conformal::CvPlus;
use plumbline::domain::{self, DomainGuard, DomainSettings, Verdict};
use plumbline::linalg;
use plumbline::space::Standardizer;
use plumbline::validate::Folds;
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;

fn gaussian(rng: &mut Xoshiro256PlusPlus) -> f64 {
    let u: f64 = rng.gen_range(f64::EPSILON..1.0);
    let v: f64 = rng.gen_range(0.0..1.0);
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
}

/// Descriptors driven by 8 latent factors plus noise, like correlated
/// chemical descriptors.
fn descriptors(
    rows: usize,
    cols: usize,
    rng: &mut Xoshiro256PlusPlus,
    loadings: &Array2<f64>,
) -> Array2<f64> {
    let factors = Array2::from_shape_fn((rows, loadings.nrows()), |_| gaussian(rng));
    let noise = Array2::from_shape_fn((rows, cols), |_| 0.3 * gaussian(rng));
    factors.dot(loadings) + noise
}

/// Median wall time of `runs` calls, in seconds.
fn time<T>(runs: usize, mut f: impl FnMut() -> T) -> f64 {
    let mut t: Vec<f64> = (0..runs)
        .map(|_| {
            let start = Instant::now();
            black_box(f());
            start.elapsed().as_secs_f64()
        })
        .collect();
    t.sort_by(f64::total_cmp);
    t[runs / 2]
}

/// k-NN mean distances by brute force: one GEMM per block of queries, then
/// a partial sort per row.
fn brute_knn(train: &Array2<f64>, queries: &Array2<f64>, k: usize) -> Vec<f64> {
    let norms = linalg::row_sq_norms(train.view());
    let d2 = linalg::sq_dists(queries.view(), train.view(), Some(&norms));
    d2.rows()
        .into_iter()
        .map(|r| {
            let mut v = r.to_vec();
            v.select_nth_unstable_by(k - 1, f64::total_cmp);
            v[..k].iter().map(|d| d.sqrt()).sum::<f64>() / k as f64
        })
        .collect()
}

fn main() {
    for (n, factors) in [(2000, 8), (5000, 8), (5000, 3)] {
        guard_figures(n, 200, factors);
    }
    for dims in [3, 8, 9, 10, 16] {
        scan_figures(5000, dims);
    }
    cvplus_figures();
}

fn guard_figures(n: usize, d: usize, factors: usize) {
    let batch = 1000;
    println!("-- {n} training rows × {d} descriptors driven by {factors} factors");
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(42);
    let loadings = Array2::from_shape_fn((factors, d), |_| gaussian(&mut rng));
    let x_raw = descriptors(n, d, &mut rng, &loadings);
    let q_raw = descriptors(batch, d, &mut rng, &loadings);
    let st = Standardizer::fit(x_raw.view());
    let (xs, qs) = (st.transform(x_raw.view()), st.transform(q_raw.view()));
    let settings = DomainSettings::default();

    let fit = time(5, || {
        DomainGuard::fit(xs.view(), x_raw.view(), &settings).unwrap()
    });
    let guard = DomainGuard::fit(xs.view(), x_raw.view(), &settings).unwrap();
    println!(
        "guard fit, {n} × {d}: {:.1} ms ({} components, {:.1}% of variance)",
        fit * 1e3,
        guard.pca().n_components(),
        100.0 * guard.pca().explained_variance()
    );
    let folds = Folds {
        k: 5,
        fold_of: (0..n).map(|i| i % 5).collect(),
    };
    let oof = time(3, || {
        domain::out_of_fold(xs.view(), x_raw.view(), &folds, &settings).unwrap()
    });
    println!("out-of-fold calibration, 5 folds: {:.1} ms", oof * 1e3);

    let assess = time(7, || guard.assess(qs.view(), q_raw.view()));
    println!(
        "assess, batch of {batch}: {:.2} ms = {:.0} candidates/s",
        assess * 1e3,
        batch as f64 / assess
    );
    let single = qs.slice(ndarray::s![..1, ..]);
    let single_raw = q_raw.slice(ndarray::s![..1, ..]);
    let one = time(501, || guard.assess(single, single_raw));
    println!("assess, one candidate: {:.1} µs", one * 1e6);

    let train_scores = guard.pca().scores(xs.view());
    let query_scores = guard.pca().scores(qs.view());
    let tree = time(7, || {
        qs.axis_iter(Axis(0))
            .map(|q| guard.neighbours(q, 5).len())
            .sum::<usize>()
    });
    let brute = time(7, || brute_knn(&train_scores, &query_scores, 5));
    println!(
        "5-NN of {batch} queries among {n} in {} dims: tree (with projection) {:.2} ms, blocked brute force {:.2} ms",
        train_scores.ncols(),
        tree * 1e3,
        brute * 1e3
    );
}

/// The k-NN distance signal by the tree and by the scan over uniform
/// points (as PCA scores of unstructured descriptors are: no leading
/// component dominates), 1,000 queries, k = 5; both must agree to the bit.
fn scan_figures(n: usize, dims: usize) {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(44);
    let train = Array2::from_shape_fn((n, dims), |_| rng.gen_range(-1.0..1.0));
    let queries: Vec<domain::Point> = (0..1000)
        .map(|_| {
            let row: Vec<f64> = (0..dims).map(|_| rng.gen_range(-1.0..1.0)).collect();
            domain::pad(ndarray::ArrayView1::from(&row)).unwrap()
        })
        .collect();
    let index = domain::NeighbourIndex::build(train.view()).unwrap();
    let mut best = domain::ScanScratch::default();
    for q in &queries {
        assert_eq!(
            index.mean_distance(q, 5).to_bits(),
            index.scan_mean_distance(q, 5, &mut best).to_bits()
        );
    }
    let tree = time(7, || {
        queries
            .iter()
            .map(|q| index.mean_distance(q, 5))
            .sum::<f64>()
    });
    let scan = time(7, || {
        queries
            .iter()
            .map(|q| index.scan_mean_distance(q, 5, &mut best))
            .sum::<f64>()
    });
    assert_eq!(
        index
            .scan_mean_distances(&queries, 5, &mut best)
            .iter()
            .map(|d| d.to_bits())
            .collect::<Vec<_>>(),
        queries
            .iter()
            .map(|q| index.mean_distance(q, 5).to_bits())
            .collect::<Vec<_>>()
    );
    let batched = time(7, || {
        index
            .scan_mean_distances(&queries, 5, &mut best)
            .iter()
            .sum::<f64>()
    });
    println!(
        "5-NN distance, {n} uniform points in {dims} dims: tree {:.1} µs, scan {:.1} µs, \
         batched scan {:.1} µs per query",
        tree * 1e3,
        scan * 1e3,
        batched * 1e3
    );
    if batched > scan {
        // Several queries a pass should cost less a query than one; the
        // opposite has meant the compiler vectorised the sieve the wrong
        // way (DEVELOPERS.md, "Run, test, bench", says how to look).
        println!(
            "  WARNING: the batched scan is slower than one query at a time; \
             read the sieve kernel's machine code for gathers"
        );
    }
}

fn cvplus_figures() {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(43);
    for rows in [2000usize, 100_000] {
        let k = 5;
        let fold_of: Vec<usize> = (0..rows).map(|i| i % k).collect();
        let residuals: Vec<f64> = (0..rows).map(|_| gaussian(&mut rng).abs()).collect();
        let verdicts = vec![Verdict::Inside; rows];
        let cv = CvPlus::new(&fold_of, k, &residuals, &verdicts, 50).unwrap();
        let mu: Vec<Vec<f64>> = (0..1000)
            .map(|_| (0..k).map(|_| gaussian(&mut rng)).collect())
            .collect();
        let fast_path = || -> Vec<(Option<f64>, Option<f64>)> {
            mu.iter()
                .map(|m| {
                    let iv = cv.interval(m, 0.9, Verdict::Inside);
                    (iv.lower, iv.upper)
                })
                .collect()
        };
        let naive_path = || -> Vec<(Option<f64>, Option<f64>)> {
            mu.iter()
                .map(|m| {
                    let mut lo: Vec<f64> =
                        (0..rows).map(|i| m[fold_of[i]] - residuals[i]).collect();
                    let mut hi: Vec<f64> =
                        (0..rows).map(|i| m[fold_of[i]] + residuals[i]).collect();
                    let (r_lo, r_hi) = plumbline::conformal::ranks(rows, 0.9);
                    let a = r_lo.map(|r| *lo.select_nth_unstable_by(r - 1, f64::total_cmp).1);
                    let b = r_hi.map(|r| *hi.select_nth_unstable_by(r - 1, f64::total_cmp).1);
                    (a, b)
                })
                .collect()
        };
        assert_eq!(fast_path(), naive_path(), "the two paths agree");
        let fast = time(5, fast_path);
        let naive = time(5, naive_path);
        println!(
            "CV+ interval, n = {rows}, K = {k}: rank search {:.2} µs, materialise + select {:.2} µs per query",
            fast * 1e3,
            naive * 1e3
        );
    }
}
