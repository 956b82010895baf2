//! Serving benchmark: starts `plumbline serve` (this binary re-run as a
//! child process, so its peak RSS is the server's alone) on a fitted bundle
//! and drives it over loopback with the tonic client, the audit store on.
//!
//! - ridge bundle, 5,000 training rows × 200 descriptors: batches of 1,000
//!   candidates from several concurrent clients → candidates/s;
//! - the same bundle, single-candidate unary calls → p50 / p99 latency;
//! - kernel ridge bundle of the same size: batches of 1,000 → candidates/s.
//!
//! Run: `cargo bench --bench serve` (about two to four minutes on 2 cores,
//! most of it fitting the kernel ridge bundle; `SERVE_BENCH_RIDGE_ONLY=1`
//! skips the kernel ridge part, `SERVE_BENCH_UNARY_ONLY=1` the batches before
//! the unary calls; `PLUMBLINE_*` variables set the server's
//! settings, e.g. `PLUMBLINE_AUDIT__SYNCHRONOUS=normal`). Every loop is
//! bounded in both time and count.

#![allow(clippy::unwrap_used, clippy::expect_used)]

#[path = "common/drive.rs"]
mod drive;
#[path = "common/server.rs"]
mod server;

use std::path::Path;
use std::time::{Duration, Instant};

use drive::{Server, UNARY_WARM_UP_CALLS, batches, runtime, unary_latency, warm_up};

use ndarray::{Array1, Array2};
use plumbline::data::Table;
use plumbline::fit::{FitOptions, SplitSpec};
use plumbline::models::{Family, Grid, Hyper};
use plumbline::pb;
use rand::{Rng, SeedableRng};

const ROWS: usize = 5_000;
const DESCRIPTORS: usize = 200;
const BATCH: usize = 1_000;
const CLIENTS: usize = 4;
const CHILD_ENV: &str = "SERVE_BENCH_CHILD_DIR";

fn main() {
    if let Ok(dir) = std::env::var(CHILD_ENV) {
        server::serve_child(Path::new(&dir), |s| s.models.reload_poll_ms = 0);
        return;
    }
    let work = tempfile::tempdir().expect("temporary directory");
    println!("serving benchmark: {ROWS} training rows × {DESCRIPTORS} descriptors");

    let ridge_dir = work.path().join("ridge");
    let t = Instant::now();
    write_bundle(&ridge_dir, Family::Ridge);
    println!(
        "fitted the ridge bundle in {:.1} s",
        t.elapsed().as_secs_f64()
    );
    let server = Server::own_child(CHILD_ENV, &ridge_dir);
    let rt = runtime();
    let batch = rows(BATCH, 11);
    let one = &rows(1, 12)[0];
    rt.block_on(warm_up(server.port, &batch));
    let cpu = server.cpu_seconds();
    // Unary calls alone, on a store no batch has filled: the tail they
    // meet from their own commits and checkpoints.
    let batch_limit = if std::env::var("SERVE_BENCH_UNARY_ONLY").is_ok() {
        1
    } else {
        4_000
    };
    let done = rt.block_on(batches(
        server.port,
        &batch,
        CLIENTS,
        Duration::from_secs(8),
        batch_limit,
    ));
    // CPU time per candidate holds on a loaded machine, where the rate
    // measures the share of it the server got.
    let cpu_us = (server.cpu_seconds() - cpu) / done.candidates as f64 * 1e6;
    let rate = done.rate();
    let cpu = server.cpu_seconds();
    let latency = rt.block_on(unary_latency(
        server.port,
        one,
        Duration::from_secs(8),
        20_000,
    ));
    // The server's CPU time covers the warm-up calls too.
    let unary_cpu_us =
        (server.cpu_seconds() - cpu) / (latency.calls + UNARY_WARM_UP_CALLS) as f64 * 1e6;
    let rss = server.stop();
    println!(
        "ridge: {rate:.0} candidates/s in batches of {BATCH} from {CLIENTS} clients \
         (target ≥ 100,000; {cpu_us:.1} server CPU-µs per candidate); single-candidate unary: {} \
         (target p99 < 2 ms; {unary_cpu_us:.0} server CPU-µs per call); server peak RSS {:.0} MiB",
        latency.summary(),
        rss as f64 / 1024.0
    );

    if std::env::var("SERVE_BENCH_RIDGE_ONLY").is_ok() {
        return;
    }
    let kernel_dir = work.path().join("kernel");
    let t = Instant::now();
    write_bundle(&kernel_dir, Family::KernelRidge);
    println!(
        "fitted the kernel ridge bundle in {:.1} s",
        t.elapsed().as_secs_f64()
    );
    let server = Server::own_child(CHILD_ENV, &kernel_dir);
    rt.block_on(warm_up(server.port, &batch));
    let rate = rt
        .block_on(batches(
            server.port,
            &batch,
            CLIENTS,
            Duration::from_secs(8),
            400,
        ))
        .rate();
    let rss = server.stop();
    println!(
        "kernel ridge: {rate:.0} candidates/s in batches of {BATCH} from {CLIENTS} clients; \
         server peak RSS {:.0} MiB",
        rss as f64 / 1024.0
    );
}

/// Training data: a linear signal in the first 20 descriptors plus noise.
fn table(seed: u64) -> Table {
    let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(seed);
    let x = Array2::from_shape_fn((ROWS, DESCRIPTORS), |_| rng.gen_range(-1.0..1.0));
    let w: Vec<f64> = (0..20).map(|_| rng.gen_range(-1.0..1.0)).collect();
    let y: Array1<f64> = x
        .rows()
        .into_iter()
        .map(|r| (0..20).map(|j| r[j] * w[j]).sum::<f64>() + rng.gen_range(-0.3..0.3))
        .collect();
    server::training_table(x, y, seed)
}

/// Fits with the real procedure; the kernel grid is one point so the bench
/// measures serving, not hyperparameter search.
fn write_bundle(dir: &Path, family: Family) {
    std::fs::create_dir_all(dir.join("bundles")).expect("bundle directory");
    let table = table(7);
    let mut options = FitOptions::new("bench", "activity");
    options.families = vec![family];
    options.split = SplitSpec::Random;
    options.folds = 5;
    options.inner_folds = 2;
    options.permutations = 0;
    if family == Family::KernelRidge {
        options.grid_overrides = vec![Grid {
            family,
            points: vec![Hyper::KernelRidge {
                gamma: 1.0 / DESCRIPTORS as f64,
                alpha: 1.0,
            }],
        }];
    }
    let outcome = plumbline::fit::fit(&table, "bench.csv", &options, &|_, _, _| {}).expect("fit");
    plumbline::bundle::write(
        &dir.join("bundles").join("bench.plumb"),
        &outcome.model,
        &outcome.card,
        &table.ids,
        &outcome.training_y,
    )
    .expect("write bundle");
}

fn rows(n: usize, seed: u64) -> Vec<pb::Candidate> {
    let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(seed);
    (0..n)
        .map(|i| pb::Candidate {
            id: format!("c{i}"),
            descriptors: (0..DESCRIPTORS).map(|_| rng.gen_range(-0.9..0.9)).collect(),
        })
        .collect()
}
