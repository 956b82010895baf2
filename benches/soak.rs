//! Load-and-soak run: `plumbline serve` (this binary re-run as a child, so
//! the RSS read from /proc is the server's alone) under a paced mix of good
//! and bad requests from several clients for a bounded time, with the
//! bundle replaced by a new version half-way (hot reload by directory poll).
//!
//! Reports: good calls and failed good calls (must be 0), bad calls and
//! those answered with the wrong code (must be 0), p50/p99 latency of good
//! calls, and the server's mean RSS over the first and the last minute
//! (over the first and last fifth when the run is shorter than five
//! minutes). Exits non-zero when a good call failed, a bad call got the
//! wrong code, the reload was not seen, or (runs of three minutes or more)
//! RSS grew by 10% or more.
//!
//! Run: `cargo bench --bench soak` (three minutes by default;
//! `SOAK_SECS=25` for the short CI run, `SOAK_RATE` sets calls per second,
//! default 200).

#![allow(clippy::unwrap_used, clippy::expect_used)]

mod common;
// Only the client and runtime of the shared driver: the soak paces its own
// calls and samples memory, which the throughput driver does not.
#[allow(dead_code)]
#[path = "common/drive.rs"]
mod drive;
#[path = "common/server.rs"]
mod server;

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use ndarray::Array2;
use plumbline::fit::{FitOptions, SplitSpec};
use plumbline::models::Family;
use plumbline::pb;
use rand::{Rng, SeedableRng};
use tonic::Code;

const ROWS: usize = 1_000;
const DESCRIPTORS: usize = 20;
const BATCH: usize = 50;
const CLIENTS: usize = 4;
const MAX_CANDIDATES: usize = 500;
const CHILD_ENV: &str = "SOAK_CHILD_DIR";
const RSS_JUDGED_SECS: u64 = 180;

fn env_number(key: &str, default: u64) -> u64 {
    std::env::var(key)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

fn main() {
    if let Ok(dir) = std::env::var(CHILD_ENV) {
        server::serve_child(Path::new(&dir), |s| {
            s.models.reload_poll_ms = 500;
            s.server.max_candidates = MAX_CANDIDATES;
        });
        return;
    }
    let secs = env_number("SOAK_SECS", 180).max(10);
    let rate = env_number("SOAK_RATE", 200).max(1);
    let work = tempfile::tempdir().expect("temporary directory");
    let bundles = work.path().join("bundles");
    std::fs::create_dir_all(&bundles).expect("bundle directory");
    let (first, x) = bundle_bytes(1);
    let (second, _) = bundle_bytes(2);
    write_atomically(&bundles.join("soak.plumb"), &first);
    let server = Server::start(work.path());
    let rt = drive::runtime();
    let report = rt.block_on(drive(&server, &bundles, &second, &x, secs, rate));
    let rss = server.stop();
    let (early, late) = rss.windows(secs);
    let growth = (late - early) / early.max(1.0);
    println!(
        "soak: {secs} s at {rate} calls/s from {CLIENTS} clients; good calls {} ({} failed), \
         bad calls {} ({} with the wrong code); good-call latency p50 {:.2} ms, p99 {:.2} ms; \
         reload seen: {}; server RSS {:.1} MiB → {:.1} MiB ({:+.1}%)",
        report.good,
        report.good_failed,
        report.bad,
        report.bad_wrong,
        report.p50 * 1e3,
        report.p99 * 1e3,
        report.reloaded,
        early / 1024.0,
        late / 1024.0,
        growth * 100.0
    );
    println!(
        "soak: server RSS over time (MiB all/heap/shared):{}",
        rss.profile(15.0)
    );
    for e in report.errors.iter().take(5) {
        println!("  {e}");
    }
    // A short run is mostly warm-up (SQLite's page cache fills as the store
    // grows), so RSS growth is judged only on runs long enough to have a
    // first and a last minute apart.
    let judged = secs >= RSS_JUDGED_SECS;
    if !judged {
        println!("soak: RSS growth reported, not judged (runs under {RSS_JUDGED_SECS} s)");
    }
    let ok = report.good_failed == 0
        && report.bad_wrong == 0
        && report.reloaded
        && report.good > 0
        && (!judged || growth < 0.10);
    if !ok {
        println!("soak: FAILED");
        std::process::exit(1);
    }
}

/// A fitted ridge bundle on the shared synthetic data (`seed` changes the
/// data, hence the version), and the training rows for drawing candidates.
fn bundle_bytes(seed: u64) -> (Vec<u8>, Array2<f64>) {
    let (x, y) = common::synthetic(ROWS, DESCRIPTORS, seed);
    let table = server::training_table(x.clone(), y, seed);
    let mut options = FitOptions::new("soak", "activity");
    options.families = vec![Family::Ridge];
    options.split = SplitSpec::Random;
    options.folds = 5;
    options.inner_folds = 2;
    options.permutations = 0;
    options.seed = seed;
    let outcome = plumbline::fit::fit(&table, "soak.csv", &options, &|_, _, _| {}).expect("fit");
    let bytes = plumbline::bundle::encode(
        &outcome.model,
        &outcome.card,
        &table.ids,
        &outcome.training_y,
    );
    (bytes, x)
}

fn write_atomically(path: &Path, bytes: &[u8]) {
    let tmp = path.with_extension("plumb.tmp");
    std::fs::write(&tmp, bytes).expect("write bundle");
    std::fs::rename(&tmp, path).expect("rename bundle");
}

struct Server {
    child: Child,
    port: u16,
    samples: Arc<std::sync::Mutex<Vec<Sample>>>,
    sampling: Arc<AtomicBool>,
}

/// One reading of the server's memory: seconds since start, then resident
/// KiB in all, of it anonymous (heap), and shared (SQLite's WAL index).
#[derive(Clone, Copy)]
struct Sample {
    t: f64,
    rss: f64,
    anon: f64,
    shmem: f64,
}

/// RSS samples.
struct Rss(Vec<Sample>);

impl Rss {
    /// Mean RSS over the first and the last window: a minute when the run
    /// has a first and a last minute apart, else a fifth of the run.
    fn windows(&self, secs: u64) -> (f64, f64) {
        let w = if secs >= RSS_JUDGED_SECS {
            60.0
        } else {
            secs as f64 / 5.0
        };
        let end = self.0.last().map(|s| s.t).unwrap_or(0.0);
        let mean = |keep: &dyn Fn(f64) -> bool| {
            let v: Vec<f64> = self.0.iter().filter(|s| keep(s.t)).map(|s| s.rss).collect();
            v.iter().sum::<f64>() / v.len().max(1) as f64
        };
        (mean(&|t| t <= w), mean(&|t| t >= end - w))
    }

    /// The RSS every `step` seconds (all/heap/shared MiB), for seeing
    /// where growth happens.
    fn profile(&self, step: f64) -> String {
        let mut out = String::new();
        let mut next = 0.0;
        for s in &self.0 {
            if s.t >= next {
                let mib = |k: f64| k / 1024.0;
                out.push_str(&format!(
                    " {:.0}s {:.1}/{:.1}/{:.1}",
                    s.t,
                    mib(s.rss),
                    mib(s.anon),
                    mib(s.shmem)
                ));
                next += step;
            }
        }
        out
    }
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
        let samples = Arc::new(std::sync::Mutex::new(Vec::new()));
        let sampling = Arc::new(AtomicBool::new(true));
        {
            let (samples, sampling, pid) = (samples.clone(), sampling.clone(), child.id());
            std::thread::spawn(move || {
                let start = Instant::now();
                while sampling.load(Ordering::Relaxed) {
                    if let Some(s) = memory(pid, start.elapsed().as_secs_f64()) {
                        samples.lock().unwrap().push(s);
                    }
                    std::thread::sleep(Duration::from_millis(500));
                }
            });
        }
        Server {
            child,
            port,
            samples,
            sampling,
        }
    }

    fn stop(mut self) -> Rss {
        self.sampling.store(false, Ordering::Relaxed);
        let samples = self.samples.lock().unwrap().clone();
        drop(self.child.stdin.take());
        let _ = self.child.wait();
        Rss(samples)
    }
}

fn memory(pid: u32, t: f64) -> Option<Sample> {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let field = |name: &str| -> Option<f64> {
        status
            .lines()
            .find_map(|l| l.strip_prefix(name))
            .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
    };
    Some(Sample {
        t,
        rss: field("VmRSS:")?,
        anon: field("RssAnon:").unwrap_or(0.0),
        shmem: field("RssShmem:").unwrap_or(0.0),
    })
}

fn request(candidates: Vec<pb::Candidate>) -> pb::ScoreRequest {
    pb::ScoreRequest {
        model: String::new(),
        confidence: 0.0,
        descriptor_names: Vec::new(),
        candidates,
        batch_label: "soak".into(),
        final_ranking: false,
    }
}

/// Candidates near training rows (so most are in the domain).
fn good_batch(x: &Array2<f64>, rng: &mut impl Rng, tag: &str) -> Vec<pb::Candidate> {
    (0..BATCH)
        .map(|i| {
            let r = x.row(rng.gen_range(0..x.nrows()));
            pb::Candidate {
                id: format!("{tag}-{i}"),
                descriptors: r.iter().map(|v| v + rng.gen_range(-0.05..0.05)).collect(),
            }
        })
        .collect()
}

/// A bad request and the code it must get (`Ok` for per-candidate
/// rejections inside a successful call).
fn bad_request(
    x: &Array2<f64>,
    rng: &mut impl Rng,
    tag: &str,
) -> (pb::ScoreRequest, Result<(), Code>) {
    let mut good = good_batch(x, rng, tag);
    match rng.gen_range(0..5) {
        0 => {
            let mut r = request(good);
            r.confidence = 0.3;
            (r, Err(Code::InvalidArgument))
        }
        1 => {
            let mut r = request(good);
            r.model = "no-such-model".into();
            (r, Err(Code::NotFound))
        }
        2 => {
            for c in &mut good {
                c.descriptors[3] = f64::NAN;
            }
            (request(good), Ok(()))
        }
        3 => {
            let mut many = Vec::new();
            for k in 0..=MAX_CANDIDATES / BATCH {
                many.extend(good_batch(x, rng, &format!("{tag}-{k}")));
            }
            (request(many), Err(Code::ResourceExhausted))
        }
        _ => {
            let mut r = request(good);
            r.descriptor_names = (0..DESCRIPTORS).map(|j| format!("e{j}")).collect();
            (r, Err(Code::InvalidArgument))
        }
    }
}

#[derive(Default)]
struct Report {
    good: usize,
    good_failed: usize,
    bad: usize,
    bad_wrong: usize,
    p50: f64,
    p99: f64,
    reloaded: bool,
    errors: Vec<String>,
}

async fn drive(
    server: &Server,
    bundles: &Path,
    second: &[u8],
    x: &Array2<f64>,
    secs: u64,
    rate: u64,
) -> Report {
    let duration = Duration::from_secs(secs);
    let start = Instant::now();
    let x = Arc::new(x.clone());
    let period = Duration::from_secs_f64(CLIENTS as f64 / rate as f64);
    let mut tasks = Vec::new();
    for k in 0..CLIENTS {
        let mut c = drive::client(server.port).await;
        let x = x.clone();
        tasks.push(tokio::spawn(async move {
            let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(k as u64);
            let mut tick = tokio::time::interval(period);
            tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
            let mut r = Report::default();
            let mut latencies = Vec::new();
            let mut versions = Vec::new();
            let mut call = 0u64;
            while start.elapsed() < duration {
                tick.tick().await;
                call += 1;
                let tag = format!("k{k}-{call}");
                if rng.gen_bool(0.8) {
                    let t = Instant::now();
                    match c.score(request(good_batch(&x, &mut rng, &tag))).await {
                        Ok(a) => {
                            latencies.push(t.elapsed().as_secs_f64());
                            let a = a.into_inner();
                            if versions.last() != Some(&a.model_version) {
                                versions.push(a.model_version);
                            }
                            r.good += 1;
                        }
                        Err(e) => {
                            r.good_failed += 1;
                            r.errors.push(format!("good call failed: {e:?}"));
                        }
                    }
                } else {
                    let (req, want) = bad_request(&x, &mut rng, &tag);
                    let got = c.score(req).await.map(|_| ()).map_err(|e| e.code());
                    r.bad += 1;
                    if got != want {
                        r.bad_wrong += 1;
                        r.errors
                            .push(format!("bad call: wanted {want:?}, got {got:?}"));
                    }
                }
            }
            (r, latencies, versions)
        }));
    }
    // Hot reload half-way: a new version replaces the bundle.
    tokio::time::sleep(duration / 2).await;
    write_atomically(&bundles.join("soak.plumb"), second);
    let mut total = Report::default();
    let mut latencies = Vec::new();
    for t in tasks {
        let (r, l, versions) = t.await.expect("client");
        total.good += r.good;
        total.good_failed += r.good_failed;
        total.bad += r.bad;
        total.bad_wrong += r.bad_wrong;
        total.errors.extend(r.errors);
        total.reloaded |= versions.len() >= 2;
        latencies.extend(l);
    }
    latencies.sort_by(f64::total_cmp);
    let q = |p: f64| {
        latencies
            .get(((latencies.len().max(1) - 1) as f64 * p).round() as usize)
            .copied()
            .unwrap_or(f64::NAN)
    };
    total.p50 = q(0.5);
    total.p99 = q(0.99);
    total
}
