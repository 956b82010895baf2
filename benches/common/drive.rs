//! Drives a scoring server over loopback for the service benchmarks: starts
//! a server child process (any program that prints `PORT <n>` on stdout and
//! stops when its stdin closes), then measures it with the tonic client:
//! candidates/s from concurrent clients sending batches, and the latency
//! quantiles of single-candidate unary calls. The same code drives every
//! server compared, so the client side costs both the same.

use std::io::{BufRead, BufReader};
use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use plumbline::pb;
use plumbline::pb::scoring_client::ScoringClient;

/// A running server child and the loopback port it listens on.
pub struct Server {
    child: Child,
    pub port: u16,
}

impl Server {
    /// This benchmark binary re-run with `env_key=dir`: its `main` becomes
    /// the plumbline server (see `common/server.rs`).
    pub fn own_child(env_key: &str, dir: &Path) -> Server {
        let exe = std::env::current_exe().expect("own path");
        let mut cmd = Command::new(exe);
        cmd.env(env_key, dir).env("RUST_LOG", "warn");
        Server::spawn(cmd)
    }

    /// Starts `cmd` and waits for its `PORT <n>` line; other lines before
    /// it (start-up messages) are passed through to stderr.
    pub fn spawn(mut cmd: Command) -> Server {
        let mut child = cmd
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .spawn()
            .unwrap_or_else(|e| panic!("start the server {cmd:?}: {e}"));
        let mut out = BufReader::new(child.stdout.take().expect("stdout"));
        let port = loop {
            let mut line = String::new();
            let n = out.read_line(&mut line).expect("read the port line");
            assert!(n > 0, "the server {cmd:?} exited before printing its port");
            if let Some(p) = line.trim().strip_prefix("PORT ") {
                break p.parse().expect("the port is a number");
            }
            eprint!("{line}");
        };
        Server { child, port }
    }

    /// CPU seconds the server process has used so far, all threads, user
    /// and system (/proc/<pid>/stat fields 14 and 15, in USER_HZ = 100
    /// ticks per second, fixed by the Linux ABI): the cost of the work
    /// apart from how much of the machine the server got.
    pub fn cpu_seconds(&self) -> f64 {
        let stat = std::fs::read_to_string(format!("/proc/{}/stat", self.child.id()))
            .expect("read the server's /proc stat");
        // The command name (field 2) may hold spaces; fields after it are
        // counted from its closing parenthesis.
        let rest = &stat[stat.rfind(')').expect("stat has a command name") + 1..];
        let f: Vec<f64> = rest
            .split_whitespace()
            .skip(11)
            .take(2)
            .map(|v| v.parse().expect("tick counts"))
            .collect();
        (f[0] + f[1]) / 100.0
    }

    /// Stops the server (stdin closed = shutdown) and returns its peak RSS
    /// in KiB, read from /proc before it exits.
    pub fn stop(mut self) -> u64 {
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

/// A two-worker client runtime: the clients share the machine's two cores
/// with the server, the same for every server measured.
pub fn runtime() -> tokio::runtime::Runtime {
    tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .expect("runtime")
}

pub async fn client(port: u16) -> ScoringClient<tonic::transport::Channel> {
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

pub fn request(candidates: Vec<pb::Candidate>) -> pb::ScoreRequest {
    pb::ScoreRequest {
        model: String::new(),
        confidence: 0.0,
        descriptor_names: Vec::new(),
        candidates,
        batch_label: "bench".into(),
        final_ranking: false,
    }
}

/// One call of `batch`, before timing.
pub async fn warm_up(port: u16, batch: &[pb::Candidate]) {
    client(port)
        .await
        .score(request(batch.to_vec()))
        .await
        .expect("warm-up");
}

/// Candidates scored and the wall time it took.
pub struct Throughput {
    pub candidates: usize,
    pub seconds: f64,
}

impl Throughput {
    pub fn rate(&self) -> f64 {
        self.candidates as f64 / self.seconds
    }
}

/// `clients` concurrent clients (one connection each) sending `batch` again
/// and again, bounded by `duration` and by `max_batches` per client.
pub async fn batches(
    port: u16,
    batch: &[pb::Candidate],
    clients: usize,
    duration: Duration,
    max_batches: usize,
) -> Throughput {
    let mut conns = Vec::with_capacity(clients);
    for _ in 0..clients {
        conns.push(client(port).await);
    }
    let start = Instant::now();
    let mut tasks = Vec::new();
    for mut c in conns {
        let batch = batch.to_vec();
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
    let mut candidates = 0;
    for t in tasks {
        candidates += t.await.expect("client");
    }
    Throughput {
        candidates,
        seconds: start.elapsed().as_secs_f64(),
    }
}

/// Unary call latencies in seconds, and how many calls they are over.
pub struct Latency {
    pub p50: f64,
    pub p90: f64,
    pub p99: f64,
    pub p999: f64,
    pub max: f64,
    pub calls: usize,
}

impl Latency {
    /// "p50 …, p90 …, p99 …, p99.9 …, max … ms over N calls".
    pub fn summary(&self) -> String {
        format!(
            "p50 {:.3} ms, p90 {:.3} ms, p99 {:.3} ms, p99.9 {:.3} ms, max {:.3} ms over {} calls",
            self.p50 * 1e3,
            self.p90 * 1e3,
            self.p99 * 1e3,
            self.p999 * 1e3,
            self.max * 1e3,
            self.calls
        )
    }
}

/// Untimed calls before [`unary_latency`] times any.
pub const UNARY_WARM_UP_CALLS: usize = 200;

/// Latency quantiles of sequential single-candidate calls of `one`, after
/// [`UNARY_WARM_UP_CALLS`] untimed ones.
pub async fn unary_latency(
    port: u16,
    one: &pb::Candidate,
    duration: Duration,
    max_calls: usize,
) -> Latency {
    let mut c = client(port).await;
    for _ in 0..UNARY_WARM_UP_CALLS {
        c.score(request(vec![one.clone()])).await.expect("warm-up");
    }
    let start = Instant::now();
    let mut times = Vec::with_capacity(max_calls);
    for _ in 0..max_calls {
        if start.elapsed() >= duration {
            break;
        }
        let t = Instant::now();
        c.score(request(vec![one.clone()])).await.expect("score");
        times.push(t.elapsed().as_secs_f64());
    }
    times.sort_by(f64::total_cmp);
    let q = |p: f64| times[((times.len() - 1) as f64 * p).round() as usize];
    Latency {
        p50: q(0.5),
        p90: q(0.9),
        p99: q(0.99),
        p999: q(0.999),
        max: q(1.0),
        calls: times.len(),
    }
}
