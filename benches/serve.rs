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
//! skips the kernel ridge part; `PLUMBLINE_*` variables set the server's
//! settings, e.g. `PLUMBLINE_AUDIT__SYNCHRONOUS=normal`). Every loop is
//! bounded in both time and count.

#![allow(clippy::unwrap_used, clippy::expect_used)]

#[path = "common/server.rs"]
mod server;

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use ndarray::{Array1, Array2};
use plumbline::data::Table;
use plumbline::fit::{FitOptions, SplitSpec};
use plumbline::models::{Family, Grid, Hyper};
use plumbline::pb;
use plumbline::pb::scoring_client::ScoringClient;
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
    let server = Server::start(&ridge_dir);
    let rt = runtime();
    let rate = rt.block_on(batches(server.port, Duration::from_secs(8), 4_000));
    let (p50, p99, n) = rt.block_on(unary_latency(server.port, Duration::from_secs(8), 20_000));
    let rss = server.stop();
    println!(
        "ridge: {rate:.0} candidates/s in batches of {BATCH} from {CLIENTS} clients \
         (target ≥ 100,000); single-candidate unary over {n} calls: p50 {:.3} ms, p99 {:.3} ms \
         (target p99 < 2 ms); server peak RSS {:.0} MiB",
        p50 * 1e3,
        p99 * 1e3,
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
    let server = Server::start(&kernel_dir);
    let rate = rt.block_on(batches(server.port, Duration::from_secs(8), 400));
    let rss = server.stop();
    println!(
        "kernel ridge: {rate:.0} candidates/s in batches of {BATCH} from {CLIENTS} clients; \
         server peak RSS {:.0} MiB",
        rss as f64 / 1024.0
    );
}

fn runtime() -> tokio::runtime::Runtime {
    tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .expect("runtime")
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
    Table {
        ids: (0..ROWS).map(|i| format!("t{i}")).collect(),
        descriptor_names: (0..DESCRIPTORS).map(|j| format!("d{j}")).collect(),
        x,
        y: Some(y),
        groups: None,
        times: None,
        dropped_constant: Vec::new(),
        dropped_incomplete: 0,
        sha256: format!("{seed:064x}"),
    }
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

struct Server {
    child: Child,
    port: u16,
}

impl Server {
    fn start(dir: &Path) -> Server {
        let exe: PathBuf = std::env::current_exe().expect("own path");
        let mut child = Command::new(exe)
            .env(CHILD_ENV, dir)
            .env("RUST_LOG", "warn")
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .spawn()
            .expect("start the server");
        let out = child.stdout.take().expect("stdout");
        let mut line = String::new();
        BufReader::new(out).read_line(&mut line).expect("port line");
        let port = line
            .trim()
            .strip_prefix("PORT ")
            .and_then(|p| p.parse().ok())
            .expect("the server prints its port");
        Server { child, port }
    }

    /// Stops the server (stdin closed = shutdown) and returns its peak RSS
    /// in KiB, read from /proc before it exits.
    fn stop(mut self) -> u64 {
        let status = std::fs::read_to_string(format!("/proc/{}/status", self.child.id()))
            .unwrap_or_default();
        let rss = status
            .lines()
            .find_map(|l| l.strip_prefix("VmHWM:"))
            .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
            .unwrap_or(0);
        drop(self.child.stdin.take());
        let _ = self.child.wait();
        rss
    }
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

async fn client(port: u16) -> ScoringClient<tonic::transport::Channel> {
    let channel = tonic::transport::Channel::from_shared(format!("http://127.0.0.1:{port}"))
        .expect("endpoint")
        .tcp_nodelay(true)
        .connect()
        .await
        .expect("connect");
    ScoringClient::new(channel)
        .max_decoding_message_size(64 << 20)
        .max_encoding_message_size(64 << 20)
}

/// Candidates per second over `CLIENTS` clients sending batches, bounded by
/// `duration` and by `max_batches` per client.
async fn batches(port: u16, duration: Duration, max_batches: usize) -> f64 {
    let batch = rows(BATCH, 11);
    // One warm-up call.
    let _ = client(port)
        .await
        .score(request(batch.clone()))
        .await
        .expect("warm-up");
    let start = Instant::now();
    let mut tasks = Vec::new();
    for _ in 0..CLIENTS {
        let mut c = client(port).await;
        let batch = batch.clone();
        tasks.push(tokio::spawn(async move {
            let mut scored = 0usize;
            for _ in 0..max_batches {
                if start.elapsed() >= duration {
                    break;
                }
                let r = c.score(request(batch.clone())).await.expect("score");
                scored += r.into_inner().results.len();
            }
            scored
        }));
    }
    let mut total = 0;
    for t in tasks {
        total += t.await.expect("client");
    }
    total as f64 / start.elapsed().as_secs_f64()
}

/// Latency quantiles (seconds) of sequential single-candidate calls.
async fn unary_latency(port: u16, duration: Duration, max_calls: usize) -> (f64, f64, usize) {
    let mut c = client(port).await;
    let one = rows(1, 12);
    for _ in 0..200 {
        c.score(request(one.clone())).await.expect("warm-up");
    }
    let start = Instant::now();
    let mut times = Vec::with_capacity(max_calls);
    for _ in 0..max_calls {
        if start.elapsed() >= duration {
            break;
        }
        let t = Instant::now();
        c.score(request(one.clone())).await.expect("score");
        times.push(t.elapsed().as_secs_f64());
    }
    times.sort_by(f64::total_cmp);
    let q = |p: f64| times[((times.len() - 1) as f64 * p).round() as usize];
    (q(0.5), q(0.99), times.len())
}

fn request(candidates: Vec<pb::Candidate>) -> pb::ScoreRequest {
    pb::ScoreRequest {
        model: String::new(),
        confidence: 0.0,
        descriptor_names: Vec::new(),
        candidates,
        batch_label: "bench".into(),
        final_ranking: false,
    }
}
