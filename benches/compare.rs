//! Side-by-side benchmark, plumbline's half: writes the shared inputs (CSV
//! tables, a query matrix, the fold assignments and fixed hyperparameters
//! as JSON) so the Python reference pipeline does identical work, then
//! times plumbline on them and writes its timings and a sample of its
//! outputs for the agreement check.
//!
//! Run through `benches/run-comparison.sh`, which also runs the reference
//! side and prints the table; alone:
//! `cargo bench --bench compare -- DIR [--reps N] [--queries N]`.
//!
//! Measured here:
//! - offline scoring (`ScoringModel::score`, everything a candidate gets:
//!   prediction, CV+ interval, domain verdict) of ridge and kernel ridge
//!   bundles fitted on 5,000 × 200, over the query matrix;
//! - the nested 5 × 5 kernel ridge grid search on 2,000 × 200 with fixed
//!   cluster labels (the k-means is shared input, not timed on either side);
//! - dense f64 GEMM on both cores (faer), square and in the shape of one
//!   kernel block, as the machine's practical limit;
//! - the service (`--only service` runs it alone): the ridge bundle of the
//!   offline comparison served by plumbline (this binary re-run as the
//!   server child, audit store on) and by the Python grpcio server of
//!   `benches/reference/serve.py` over the reference pipeline, both driven
//!   by the same tonic client code (`common/drive.rs`): batches of 1,000
//!   from 4 concurrent clients for a fixed time, then single-candidate
//!   unary calls for p50/p99. Before timing, one batch is sent to both and
//!   every prediction, interval, domain signal, status and rank must agree
//!   (else the run fails), so the two servers are timed on equal work.

#![allow(clippy::unwrap_used, clippy::expect_used)]

mod common;
#[path = "common/drive.rs"]
mod drive;
#[path = "common/server.rs"]
mod server;

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use common::synthetic;
use drive::{Server, batches, client, request, runtime, unary_latency, warm_up};
use ndarray::{Array1, Array2, ArrayView2, s};
use plumbline::bundle::{Card, Claims, DomainSummary, YRandomization};
use plumbline::domain::DomainSettings;
use plumbline::models::{self, Family, Hyper};
use plumbline::pb;
use plumbline::scoring::{Direction, ModelInfo, ScoringModel};
use plumbline::space::Standardizer;
use plumbline::validate::{self, Estimate, FoldDesign, Folds, NestedSettings};
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;
use serde_json::{Value, json};

const SEED: u64 = 20261201;
const CONFIDENCE: f64 = 0.9;
/// Outputs of this many leading queries go to the agreement check.
const AGREEMENT_ROWS: usize = 2_000;
const RIDGE: Hyper = Hyper::Ridge { alpha: 10.0 };
/// γ = 1/p for p = 200 descriptors, a mid-grid setting.
const KERNEL: Hyper = Hyper::KernelRidge {
    gamma: 1.0 / 200.0,
    alpha: 0.1,
};

/// id,x0..x{p-1},y with Rust's shortest round-trip float text, so the
/// reference side parses exactly the values used here.
fn write_csv(path: &Path, x: ArrayView2<f64>, y: &Array1<f64>) -> std::io::Result<()> {
    let mut out = String::with_capacity(x.len() * 20);
    out.push_str("id");
    for j in 0..x.ncols() {
        write!(out, ",x{j}").ok();
    }
    out.push_str(",y\n");
    for (i, row) in x.rows().into_iter().enumerate() {
        write!(out, "r{i}").ok();
        for v in row {
            write!(out, ",{v}").ok();
        }
        writeln!(out, ",{}", y[i]).ok();
    }
    std::fs::write(path, out)
}

/// A C-order little-endian f64 `.npy` file (format 1.0): the query matrix is
/// too large to pass as text.
fn write_npy(path: &Path, x: ArrayView2<f64>) -> std::io::Result<()> {
    let dict = format!(
        "{{'descr': '<f8', 'fortran_order': False, 'shape': ({}, {}), }}",
        x.nrows(),
        x.ncols()
    );
    // Magic (6) + version (2) + length (2) + dict + padding + '\n' ≡ 0 mod 64.
    let pad = (64 - (10 + dict.len() + 1) % 64) % 64;
    let header = format!("{dict}{}\n", " ".repeat(pad));
    let mut bytes = Vec::with_capacity(10 + header.len() + x.len() * 8);
    bytes.extend_from_slice(b"\x93NUMPY\x01\x00");
    bytes.extend_from_slice(&(header.len() as u16).to_le_bytes());
    bytes.extend_from_slice(header.as_bytes());
    for v in x.as_standard_layout().iter() {
        bytes.extend_from_slice(&v.to_le_bytes());
    }
    std::fs::write(path, bytes)
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n == 0 {
        f64::NAN
    } else if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

fn time_reps(reps: usize, mut f: impl FnMut()) -> Vec<f64> {
    (0..reps)
        .map(|_| {
            let t = Instant::now();
            f();
            t.elapsed().as_secs_f64()
        })
        .collect()
}

/// Cluster-grouped folds of all rows, as `fit` makes them.
fn cluster_design(x: ArrayView2<f64>) -> FoldDesign {
    let xs = Standardizer::fit(x).transform(x);
    FoldDesign::clusters(xs.view(), 5, SEED, None).expect("k-means on synthetic data")
}

/// A scoring model at a fixed setting, assembled exactly as `fit` does
/// after its selection. Pooled CV+ calibration (no Mondrian bands): the
/// reference would otherwise have to rebuild every domain verdict, and the
/// band only changes which residuals are read, not the work.
fn scoring_model(x: ArrayView2<f64>, y: &Array1<f64>, folds: &Folds, hyper: Hyper) -> ScoringModel {
    let standardizer = Standardizer::fit(x);
    let xs = standardizer.transform(x);
    let settings = DomainSettings::default();
    let assembled =
        plumbline::fit::assemble(x, xs.view(), y.view(), folds, &hyper, &settings, usize::MAX)
            .expect("assembly on synthetic data");
    ScoringModel {
        info: ModelInfo {
            id: "bench".into(),
            version: String::new(),
            endpoint: "y".into(),
            unit: String::new(),
            direction: Direction::Higher,
            hyper,
            descriptor_names: (0..x.ncols()).map(|j| format!("x{j}")).collect(),
            default_confidence: CONFIDENCE,
        },
        standardizer,
        predictor: assembled.predictor,
        cvplus: assembled.cvplus,
        domain: assembled.guard,
    }
}

fn outputs_sample(model: &ScoringModel, queries: ArrayView2<f64>) -> Value {
    let scores = model.score(queries, CONFIDENCE);
    json!({
        "prediction": scores.iter().map(|s| s.prediction).collect::<Vec<_>>(),
        "lower": scores.iter().map(|s| s.interval.lower).collect::<Vec<_>>(),
        "upper": scores.iter().map(|s| s.interval.upper).collect::<Vec<_>>(),
        "knn_distance": scores.iter().map(|s| s.domain.knn_distance).collect::<Vec<_>>(),
        "leverage": scores.iter().map(|s| s.domain.leverage).collect::<Vec<_>>(),
        "pca_residual": scores.iter().map(|s| s.domain.pca_residual).collect::<Vec<_>>(),
    })
}

/// The FLOPs of kernel ridge batch scoring that are matrix products: the
/// cross products x·X (2Bnp) and kernel × dual coefficients (2Bn(K+1)).
fn kernel_scoring_flops(b: usize, n: usize, p: usize, members: usize) -> f64 {
    2.0 * b as f64 * n as f64 * (p + members) as f64
}

fn scoring(dir: &Path, reps: usize, n_queries: usize) -> Value {
    let (n, p) = (5_000, 200);
    let (x, y) = synthetic(n + n_queries, p, SEED);
    let (x_train, y_train) = (x.slice(s![..n, ..]), y.slice(s![..n]).to_owned());
    let queries = x.slice(s![n.., ..]);
    write_csv(&dir.join("score_train.csv"), x_train, &y_train).expect("write score_train.csv");
    write_npy(&dir.join("score_queries.npy"), queries).expect("write score_queries.npy");
    let design = cluster_design(x_train);
    let all: Vec<usize> = (0..n).collect();
    let folds = design.folds(&all, 5, SEED).expect("cluster folds");
    let mut models_out = serde_json::Map::new();
    for (name, hyper) in [("ridge", RIDGE), ("kernel_ridge", KERNEL)] {
        let t = Instant::now();
        let model = scoring_model(x_train, &y_train, &folds, hyper);
        let assemble_s = t.elapsed().as_secs_f64();
        eprintln!(
            "scoring {name}: assembled in {assemble_s:.2} s; timing {reps} × {n_queries} queries"
        );
        let seconds = time_reps(reps, || {
            std::hint::black_box(model.score(queries, CONFIDENCE));
        });
        let members = model.predictor.n_members();
        let mut entry = json!({
            "hyper": hyper,
            "seconds": seconds,
            "candidates_per_s": n_queries as f64 / median(seconds.clone()),
            "pca_components": model.domain.pca().n_components(),
            "outputs": outputs_sample(&model, queries.slice(s![..AGREEMENT_ROWS.min(n_queries), ..])),
        });
        if matches!(hyper, Hyper::KernelRidge { .. }) {
            let flops = kernel_scoring_flops(n_queries, n, p, members);
            entry["gemm_flops"] = json!(flops);
            entry["gflops_per_s"] = json!(flops / median(seconds) / 1e9);
            // The predictor alone (kernel block + dual product), to show
            // what the GEMM-bound part reaches apart from the domain guard.
            let xs = model.standardizer.transform(queries);
            let predictor_s = time_reps(reps, || {
                for start in (0..n_queries).step_by(1024) {
                    let end = (start + 1024).min(n_queries);
                    std::hint::black_box(model.predictor.predict(xs.slice(s![start..end, ..])));
                }
            });
            entry["predictor_seconds"] = json!(predictor_s);
            entry["predictor_gflops_per_s"] = json!(flops / median(predictor_s) / 1e9);
        }
        models_out.insert(name.into(), entry);
    }
    json!({
        "n_train": n, "p": p, "n_queries": n_queries, "confidence": CONFIDENCE,
        "k_neighbours": DomainSettings::default().k,
        "fold_of": folds.fold_of, "k": folds.k,
        "models": models_out,
    })
}

fn fit_search(dir: &Path, reps: usize) -> Value {
    let (n, p) = (2_000, 200);
    let (x, y) = synthetic(n, p, SEED + 1);
    write_csv(&dir.join("fit_train.csv"), x.view(), &y).expect("write fit_train.csv");
    let design = cluster_design(x.view());
    let FoldDesign::Cluster { labels } = &design else {
        unreachable!("cluster_design makes a cluster design")
    };
    let grid = models::default_grid(Family::KernelRidge, p);
    let settings = NestedSettings {
        k_outer: 5,
        k_inner: 5,
        seed: SEED,
        n_permutations: 0,
        compare_random_split: false,
    };
    let run = || {
        validate::validate_with_models(
            x.view(),
            y.view(),
            &design,
            std::slice::from_ref(&grid),
            &settings,
            &|_, _, _| {},
        )
        .expect("nested CV on synthetic data")
    };
    eprintln!(
        "fit: timing {reps} nested 5 × 5 searches over {} settings",
        grid.points.len()
    );
    let mut last = None;
    let seconds = time_reps(reps, || last = Some(run()));
    let v = last.unwrap_or_else(run);
    let fam = v.chosen();
    json!({
        "n": n, "p": p, "cluster_labels": labels,
        "grid": grid.points,
        "outer_fold_of": v.outer_folds.fold_of,
        "outer": fam.outer.iter().map(|o| json!({
            "train_rows": o.train_rows,
            "test_rows": o.test_rows,
            "inner_fold_of": o.inner_folds.fold_of,
            "chosen": o.chosen[0],
            "test_predictions": o.test_predictions,
        })).collect::<Vec<_>>(),
        "final_chosen": v.final_selection.chosen,
        "seconds": seconds,
    })
}

/// C = A·B on both cores, as GFLOP/s (2mnk per product).
fn gemm(reps: usize) -> Value {
    let shapes = [(2048, 2048, 2048), (1024, 200, 5000)];
    let mut out = Vec::new();
    for (m, k, n) in shapes {
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(3);
        let a = Array2::from_shape_fn((m, k), |_| rng.gen_range(-1.0..1.0));
        let b = Array2::from_shape_fn((k, n), |_| rng.gen_range(-1.0..1.0));
        // Short shapes are timed over several products per repetition.
        let inner = (4e9 / (2.0 * (m * n * k) as f64)).ceil().max(1.0) as usize;
        let seconds = time_reps(reps, || {
            for _ in 0..inner {
                std::hint::black_box(plumbline::linalg::matmul(a.view(), b.view()));
            }
        });
        let gflops = 2.0 * (m * n * k * inner) as f64 / median(seconds.clone()) / 1e9;
        out.push(json!({"m": m, "k": k, "n": n, "products": inner, "seconds": seconds, "gflops_per_s": gflops}));
    }
    Value::Array(out)
}

/// Batch size and concurrent clients of the service comparison, as
/// `benches/serve.rs`.
const SERVICE_BATCH: usize = 1_000;
const SERVICE_CLIENTS: usize = 4;
/// Set in the server child's environment: its `main` serves this folder.
const SERVICE_CHILD_ENV: &str = "COMPARE_SERVICE_CHILD_DIR";
/// Agreement of the two servers, relative to the largest magnitude of each
/// output over the sample: the same tolerance as the offline comparison
/// (pipeline.py), since both answer from the same computations and the wire
/// carries f64 exactly.
const SERVICE_REL_TOL: f64 = 1e-9;

/// A card for the benchmark bundle: the model is assembled at a fixed
/// setting, so no claims were measured (NaN, stored as null).
fn bench_card(model: &ScoringModel, n: usize) -> Card {
    let nan = Estimate {
        mean: f64::NAN,
        se: f64::NAN,
    };
    let claims = Claims {
        mse: nan,
        rmse: nan,
        mae: nan,
        r2: nan,
        pearson: nan,
        spearman: nan,
    };
    let (s, t, pca) = (
        model.domain.settings(),
        model.domain.thresholds(),
        model.domain.pca(),
    );
    Card {
        target_column: "y".into(),
        family: "ridge".into(),
        claims,
        random_split: claims,
        y_randomization: YRandomization {
            permutations: 0,
            real_q2: f64::NAN,
            permuted_q2: Vec::new(),
            p_value: 1.0,
        },
        domain: DomainSummary {
            k: s.k,
            components: pca.n_components(),
            explained_variance: pca.explained_variance_ratio.sum(),
            z: s.z,
            z_threshold: t.z_threshold,
            leverage_warning: t.leverage_warning,
            leverage_meaningful: t.leverage_meaningful,
            residual_border_limit: t.residual_border_limit,
            residual_outside_limit: t.residual_outside_limit,
            typicality_border: s.typicality_border,
            typicality_outside: s.typicality_outside,
            oof_verdict_counts: BTreeMap::new(),
        },
        conformal_method: "CV+ (Barber et al. 2021), pooled".into(),
        conformal_bands: Vec::new(),
        training_rows: n,
        dropped_constant: Vec::new(),
        data_sha256: String::new(),
        seed: SEED,
        split: "cluster".into(),
        folds: 5,
        inner_folds: 0,
        created_at: String::new(),
        tool_version: String::new(),
        cautions: vec![
            "Benchmark bundle: assembled at a fixed setting, no claims measured.".into(),
        ],
    }
}

fn candidates(x: ArrayView2<f64>, prefix: &str) -> Vec<pb::Candidate> {
    x.rows()
        .into_iter()
        .enumerate()
        .map(|(i, r)| pb::Candidate {
            id: format!("{prefix}{i}"),
            descriptors: r.to_vec(),
        })
        .collect()
}

/// Compares the two servers' answers to one batch candidate by candidate and
/// panics on the first disagreement: timing unequal work would be no
/// comparison. Returns the largest relative difference per output.
fn service_agreement(ours: &pb::ScoreResponse, theirs: &pb::ScoreResponse) -> Value {
    let (a, b) = (&ours.results, &theirs.results);
    assert_eq!(a.len(), b.len(), "service agreement: result counts differ");
    let mut statuses = BTreeMap::<String, usize>::new();
    for (x, y) in a.iter().zip(b) {
        assert_eq!(x.id, y.id, "service agreement: results out of order");
        assert_eq!(
            (x.status, x.rank, x.lower_unbounded, x.upper_unbounded),
            (y.status, y.rank, y.lower_unbounded, y.upper_unbounded),
            "service agreement: candidate {} differs in (status, rank, unbounded sides)",
            x.id
        );
        let (dx, dy) = (x.domain.as_ref(), y.domain.as_ref());
        assert_eq!(
            dx.map(|d| (d.verdict, d.beyond_z_threshold)),
            dy.map(|d| (d.verdict, d.beyond_z_threshold)),
            "service agreement: candidate {} differs in its domain verdict",
            x.id
        );
        *statuses
            .entry(
                pb::Status::try_from(x.status)
                    .map_or("unknown", |s| s.as_str_name())
                    .to_string(),
            )
            .or_default() += 1;
    }
    type Field = fn(&pb::ScoredCandidate) -> Option<f64>;
    let fields: [(&str, Field); 7] = [
        ("prediction", |c| c.prediction),
        ("lower", |c| c.lower),
        ("upper", |c| c.upper),
        ("knn_distance", |c| {
            c.domain.as_ref().map(|d| d.knn_distance)
        }),
        ("typicality", |c| c.domain.as_ref().map(|d| d.typicality)),
        ("leverage", |c| c.domain.as_ref().map(|d| d.leverage)),
        ("pca_residual", |c| {
            c.domain.as_ref().map(|d| d.pca_residual)
        }),
    ];
    let mut report = serde_json::Map::new();
    for (name, get) in fields {
        let pairs: Vec<(f64, f64)> = a
            .iter()
            .zip(b)
            .map(|(x, y)| match (get(x), get(y)) {
                (Some(u), Some(v)) => (u, v),
                (None, None) => (0.0, 0.0),
                (u, v) => panic!(
                    "service agreement: {name} of candidate {} is {u:?} here and {v:?} in the \
                     reference server",
                    x.id
                ),
            })
            .collect();
        let scale = pairs
            .iter()
            .map(|p| p.1.abs())
            .fold(f64::MIN_POSITIVE, f64::max);
        let worst = pairs
            .iter()
            .map(|(u, v)| (u - v).abs() / scale)
            .fold(0.0, f64::max);
        assert!(
            worst <= SERVICE_REL_TOL,
            "service agreement: {name} differs by {worst:.3e} (relative), tolerance {SERVICE_REL_TOL}"
        );
        report.insert(
            name.into(),
            json!({"max_rel_diff": worst, "tolerance": SERVICE_REL_TOL}),
        );
    }
    json!({"candidates": a.len(), "statuses": statuses, "outputs": report})
}

/// The Python reference server on the same inputs; `PYTHON` names the
/// interpreter (default python3).
fn python_server(dir: &Path) -> Server {
    let python = std::env::var("PYTHON").unwrap_or_else(|_| "python3".into());
    let mut cmd = Command::new(python);
    cmd.arg(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/benches/reference/serve.py"
    ))
    .arg(dir)
    .arg("--threads")
    .arg(SERVICE_CLIENTS.to_string());
    Server::spawn(cmd)
}

fn service(dir: &Path, reps: usize, seconds: f64) -> Value {
    let (n, p) = (5_000, 200);
    // The training rows are the offline comparison's (the generator draws
    // row by row), the queries its first ones.
    let (x, y) = synthetic(n + SERVICE_BATCH + 1, p, SEED);
    let (x_train, y_train) = (x.slice(s![..n, ..]), y.slice(s![..n]).to_owned());
    write_csv(&dir.join("score_train.csv"), x_train, &y_train).expect("write score_train.csv");
    let design = cluster_design(x_train);
    let all: Vec<usize> = (0..n).collect();
    let folds = design.folds(&all, 5, SEED).expect("cluster folds");
    let model = scoring_model(x_train, &y_train, &folds, RIDGE);
    let sdir = dir.join("service");
    let _ = std::fs::remove_dir_all(&sdir);
    std::fs::create_dir_all(sdir.join("bundles")).expect("bundle folder");
    let ids: Vec<String> = (0..n).map(|i| format!("r{i}")).collect();
    plumbline::bundle::write(
        &sdir.join("bundles").join("bench.plumb"),
        &model,
        &bench_card(&model, n),
        &ids,
        y_train.as_slice().expect("contiguous targets"),
    )
    .expect("write the benchmark bundle");
    let spec = json!({
        "fold_of": folds.fold_of, "k": folds.k, "hyper": RIDGE,
        "pca_components": model.domain.pca().n_components(),
        "confidence": CONFIDENCE,
        "domain": model.domain.settings(),
    });
    std::fs::write(dir.join("service_model.json"), spec.to_string())
        .expect("write service_model.json");
    let queries = x.slice(s![n.., ..]);
    let batch = candidates(queries.slice(s![..SERVICE_BATCH, ..]), "q");
    let one = candidates(queries.slice(s![SERVICE_BATCH.., ..]), "one").remove(0);

    let ours = Server::own_child(SERVICE_CHILD_ENV, &sdir);
    let theirs = python_server(dir);
    let rt = runtime();
    let answer = |port: u16| {
        rt.block_on(async {
            client(port)
                .await
                .score(request(batch.clone()))
                .await
                .expect("score the agreement batch")
                .into_inner()
        })
    };
    let agreement = service_agreement(&answer(ours.port), &answer(theirs.port));
    eprintln!("service: the two servers agree on {SERVICE_BATCH} candidates: {agreement}");

    let duration = Duration::from_secs_f64(seconds);
    let mut runs: BTreeMap<&str, Vec<Value>> = BTreeMap::new();
    for rep in 0..reps {
        for (name, server) in [("plumbline", &ours), ("python", &theirs)] {
            let port = server.port;
            rt.block_on(warm_up(port, &batch));
            let cpu = server.cpu_seconds();
            let done = rt.block_on(batches(port, &batch, SERVICE_CLIENTS, duration, usize::MAX));
            let cpu_us = (server.cpu_seconds() - cpu) / done.candidates as f64 * 1e6;
            let rate = done.rate();
            let latency = rt.block_on(unary_latency(port, &one, duration, 1_000_000));
            let (p50, p99, calls) = (latency.p50, latency.p99, latency.calls);
            eprintln!(
                "service {name}, run {}: {rate:.0} candidates/s ({cpu_us:.0} server CPU-µs per \
                 candidate); unary {}",
                rep + 1,
                latency.summary()
            );
            runs.entry(name).or_default().push(json!({
                "candidates_per_s": rate, "cpu_us_per_candidate": cpu_us,
                "p50_ms": p50 * 1e3, "p99_ms": p99 * 1e3,
                "unary_calls": calls,
            }));
        }
    }
    let rss = [("plumbline", ours.stop()), ("python", theirs.stop())];
    let mut out = json!({
        "batch": SERVICE_BATCH, "clients": SERVICE_CLIENTS, "seconds_per_phase": seconds,
        "python_threads": SERVICE_CLIENTS, "agreement": agreement,
    });
    for (name, kib) in rss {
        let r = &runs[name];
        let col = |k: &str| {
            r.iter()
                .map(|v| v[k].as_f64().unwrap_or(f64::NAN))
                .collect::<Vec<_>>()
        };
        out[name] = json!({
            "runs": r,
            "candidates_per_s": median(col("candidates_per_s")),
            "cpu_us_per_candidate": median(col("cpu_us_per_candidate")),
            "p50_ms": median(col("p50_ms")),
            "p99_ms": median(col("p99_ms")),
            "peak_rss_mib": kib as f64 / 1024.0,
        });
    }
    out
}

/// `DIR [--reps N] [--fit-reps N] [--queries N] [--service-seconds S]
/// [--only gemm,score,fit,service]`; `cargo bench` adds a bare `--bench`,
/// which is skipped.
struct Args {
    dir: PathBuf,
    reps: usize,
    fit_reps: usize,
    n_queries: usize,
    service_seconds: f64,
    only: Option<String>,
}

fn parse_args() -> Args {
    let mut args = Args {
        dir: PathBuf::from("target/comparison"),
        reps: 3,
        fit_reps: 3,
        n_queries: 100_000,
        service_seconds: 8.0,
        only: None,
    };
    let mut it = std::env::args().skip(1);
    let count = |flag: &str, v: Option<String>| -> usize {
        let v = v.unwrap_or_default();
        v.parse()
            .unwrap_or_else(|_| panic!("{flag} takes a whole number, got {v:?}"))
    };
    while let Some(a) = it.next() {
        match a.as_str() {
            "--reps" => args.reps = count("--reps", it.next()),
            "--fit-reps" => args.fit_reps = count("--fit-reps", it.next()),
            "--queries" => args.n_queries = count("--queries", it.next()),
            "--service-seconds" => {
                let v = it.next().unwrap_or_default();
                args.service_seconds = v
                    .parse()
                    .ok()
                    .filter(|s: &f64| *s > 0.0)
                    .unwrap_or_else(|| panic!("--service-seconds takes seconds > 0, got {v:?}"));
            }
            "--only" => args.only = it.next(),
            "--bench" => {}
            other => args.dir = PathBuf::from(other),
        }
    }
    args
}

fn main() {
    if let Ok(dir) = std::env::var(SERVICE_CHILD_ENV) {
        server::serve_child(Path::new(&dir), |s| s.models.reload_poll_ms = 0);
        return;
    }
    let Args {
        dir,
        reps,
        fit_reps,
        n_queries,
        service_seconds,
        only,
    } = parse_args();
    std::fs::create_dir_all(&dir).expect("create the output folder");
    let want = |part: &str| {
        only.as_deref()
            .is_none_or(|o| o.split(',').any(|p| p == part))
    };
    let mut result = json!({
        "threads": rayon::current_num_threads(),
        "reps": reps,
    });
    if want("gemm") {
        result["gemm"] = gemm(reps);
    }
    if want("score") {
        result["scoring"] = scoring(&dir, reps, n_queries);
    }
    if want("fit") {
        result["fit"] = fit_search(&dir, fit_reps);
    }
    if want("service") {
        result["service"] = service(&dir, reps, service_seconds);
    }
    let path = dir.join("plumbline.json");
    std::fs::write(
        &path,
        serde_json::to_string(&result).expect("JSON of plain values"),
    )
    .expect("write plumbline.json");
    eprintln!("wrote {}", path.display());
}
