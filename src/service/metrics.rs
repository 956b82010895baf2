//! Prometheus metrics of one server: what the service did (calls, candidates
//! by model, status and verdict, latencies), how the audit store keeps up
//! (queue depth, commit latency, failed commits), what is loaded, and what
//! the outcome monitor concluded (alarm states, realised coverage). Served
//! as the Prometheus text exposition format (version 0.0.4) over plain
//! HTTP on a port of its own (`metrics.listen`), `GET /metrics`.
//!
//! Every server owns its [`Metrics`] and the `prometheus-client` registry
//! inside it, never a process-wide recorder: tests run many servers in one
//! process, and each must count only its own calls.
//!
//! The scoring path stays cheap: a model's series are resolved once per
//! model (one map lookup per call, none per candidate), a call's counter
//! once per method and code, and candidates are tallied in a small array
//! before one increment per (status, verdict) cell.
//!
//! # Metrics
//! | name | type | labels | meaning |
//! | --- | --- | --- | --- |
//! | `plumbline_grpc_calls_total` | counter | `service`, `method`, `code` | finished gRPC calls by final status (`CANCELLED` when the client went away first) |
//! | `plumbline_grpc_call_duration_seconds` | histogram | `service`, `method` | from the request's arrival to its final status (a stream's whole life) |
//! | `plumbline_candidates_total` | counter | `model`, `status`, `verdict` | candidates answered; `verdict` is `none` for rejected ones |
//! | `plumbline_audit_queue_depth` | gauge | | requests waiting for the audit writer |
//! | `plumbline_audit_commit_duration_seconds` | histogram | | one audit transaction (write and commit, fsync included) |
//! | `plumbline_audit_commit_failures_total` | counter | | requests whose audit records could not be committed (their answers were withheld) |
//! | `plumbline_model_loads_total` | counter | `model` | bundles loaded (at start and on reload) |
//! | `plumbline_model_load_failures_total` | counter | `file` | bundle files that failed to load |
//! | `plumbline_models_loaded` | gauge | | models being served |
//! | `plumbline_alarm_firing` | gauge | `model`, `alarm` | 1 while the alarm fires, else 0 |
//! | `plumbline_realised_coverage` | gauge | `model` | share of recorded outcomes inside their interval |
//!
//! Alarm and coverage gauges follow the monitor's default evaluation (the
//! whole history, default level, alpha and window): the one run after every
//! `RecordOutcomes` and by a `Calibration` call that leaves those fields at
//! zero. A `Calibration` over a chosen time window answers its caller but
//! does not move the gauges, so alerting sees one consistent series.

use std::collections::HashMap;
use std::convert::Infallible;
use std::net::SocketAddr;
use std::pin::Pin;
use std::sync::{Arc, OnceLock, RwLock};
use std::task::{Context, Poll};
use std::time::{Duration, Instant};

use http_body::{Body, Frame, SizeHint};
use prometheus_client::encoding::EncodeLabelSet;
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::metrics::gauge::Gauge;
use prometheus_client::metrics::histogram::{Histogram, exponential_buckets};
use prometheus_client::registry::Registry as PromRegistry;
use prost::Message;
use tokio::net::TcpListener;
use tokio::sync::watch;

use super::registry::{Loader, Registry};
use super::settings::{self, MetricsSettings};
use crate::audit::writer::CommitObserver;
use crate::audit::{AuditWriter, CandidateStatus};
use crate::domain::Verdict;

/// The label a call to a path we do not serve is counted under, so a
/// client sending made-up paths cannot grow the series without bound.
pub const OTHER: &str = "other";

/// Candidate statuses in tally order.
const STATUSES: [&str; 4] = ["scored", "flagged", "refused", "rejected"];
/// Verdicts in tally order; `none` for candidates never scored.
const VERDICTS: [&str; 4] = ["inside", "border", "outside", "none"];

/// gRPC status code names by number (grpc/grpc `doc/statuscodes.md`).
const CODES: [&str; 17] = [
    "OK",
    "CANCELLED",
    "UNKNOWN",
    "INVALID_ARGUMENT",
    "DEADLINE_EXCEEDED",
    "NOT_FOUND",
    "ALREADY_EXISTS",
    "PERMISSION_DENIED",
    "RESOURCE_EXHAUSTED",
    "FAILED_PRECONDITION",
    "ABORTED",
    "OUT_OF_RANGE",
    "UNIMPLEMENTED",
    "INTERNAL",
    "UNAVAILABLE",
    "DATA_LOSS",
    "UNAUTHENTICATED",
];
const CANCELLED: usize = 1;
const UNKNOWN: usize = 2;

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
struct CallLabels {
    service: Arc<String>,
    method: Arc<String>,
    code: &'static str,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
struct MethodLabels {
    service: Arc<String>,
    method: Arc<String>,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
struct CandidateLabels {
    model: Arc<String>,
    status: &'static str,
    verdict: &'static str,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
struct ModelLabels {
    model: String,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
struct FileLabels {
    file: String,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
struct AlarmLabels {
    model: String,
    alarm: String,
}

type HistogramFamily<L> = Family<L, Histogram, fn() -> Histogram>;

/// 0.5 ms to about 16 s, doubling: a small batch answers in milliseconds,
/// a large stream may run for seconds.
fn call_buckets() -> Histogram {
    Histogram::new(exponential_buckets(0.0005, 2.0, 16))
}

/// 0.1 ms to about 3 s, doubling: a group commit with `synchronous = full`
/// costs one fsync, from well under a millisecond on NVMe to tens of
/// milliseconds on network storage.
fn commit_buckets() -> Histogram {
    Histogram::new(exponential_buckets(0.0001, 2.0, 16))
}

/// The metrics of one server.
pub struct Metrics {
    registry: PromRegistry,
    candidates: Family<CandidateLabels, Counter>,
    audit_queue: Gauge,
    commit_seconds: Histogram,
    commit_failures: Counter,
    model_loads: Family<ModelLabels, Counter>,
    load_failures: Family<FileLabels, Counter>,
    models_loaded: Gauge,
    alarms: Family<AlarmLabels, Gauge>,
    coverage: Family<ModelLabels, Gauge<f64, std::sync::atomic::AtomicU64>>,
    /// gRPC path → its series; built once from the descriptor sets served.
    methods: HashMap<String, Arc<MethodSeries>>,
    other: Arc<MethodSeries>,
    models: RwLock<HashMap<String, Arc<ModelSeries>>>,
    audit: OnceLock<AuditWriter>,
    registry_models: OnceLock<Arc<Registry>>,
}

impl std::fmt::Debug for Metrics {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Metrics")
            .field("methods", &self.methods.len())
            .finish_non_exhaustive()
    }
}

impl Default for Metrics {
    fn default() -> Self {
        Metrics::new()
    }
}

impl Metrics {
    /// A fresh registry with every metric registered; the call series are
    /// bounded to the methods of the services this server mounts.
    pub fn new() -> Metrics {
        let mut registry = PromRegistry::with_prefix("plumbline");
        let calls = Family::<CallLabels, Counter>::default();
        registry.register(
            "grpc_calls",
            "Finished gRPC calls by service, method and final status code",
            calls.clone(),
        );
        let call_seconds: HistogramFamily<MethodLabels> =
            Family::new_with_constructor(call_buckets as fn() -> Histogram);
        registry.register(
            "grpc_call_duration_seconds",
            "Seconds from a call's arrival to its final status, by service and method",
            call_seconds.clone(),
        );
        let candidates = Family::<CandidateLabels, Counter>::default();
        registry.register(
            "candidates",
            "Candidates answered by model, status and domain verdict (none: rejected unscored)",
            candidates.clone(),
        );
        let audit_queue = Gauge::default();
        registry.register(
            "audit_queue_depth",
            "Requests waiting for the audit writer",
            audit_queue.clone(),
        );
        let commit_seconds = commit_buckets();
        registry.register(
            "audit_commit_duration_seconds",
            "Seconds one audit transaction took to write and commit",
            commit_seconds.clone(),
        );
        let commit_failures = Counter::default();
        registry.register(
            "audit_commit_failures",
            "Requests whose audit records could not be committed; their answers were withheld",
            commit_failures.clone(),
        );
        let model_loads = Family::<ModelLabels, Counter>::default();
        registry.register(
            "model_loads",
            "Bundles loaded, at start and on reload, by model",
            model_loads.clone(),
        );
        let load_failures = Family::<FileLabels, Counter>::default();
        registry.register(
            "model_load_failures",
            "Bundle files that failed to load, by file name",
            load_failures.clone(),
        );
        let models_loaded = Gauge::default();
        registry.register(
            "models_loaded",
            "Models being served",
            models_loaded.clone(),
        );
        let alarms = Family::<AlarmLabels, Gauge>::default();
        registry.register(
            "alarm_firing",
            "1 while the outcome monitor's alarm fires for the model, else 0",
            alarms.clone(),
        );
        let coverage = Family::<ModelLabels, Gauge<f64, std::sync::atomic::AtomicU64>>::default();
        registry.register(
            "realised_coverage",
            "Share of the model's recorded outcomes inside their prediction interval",
            coverage.clone(),
        );
        let series = |service: &str, method: &str| {
            Arc::new(MethodSeries::new(
                calls.clone(),
                &call_seconds,
                Arc::new(service.to_string()),
                Arc::new(method.to_string()),
            ))
        };
        let methods = served_methods()
            .into_iter()
            .map(|(service, method)| {
                let path = format!("/{service}/{method}");
                (path, series(&service, &method))
            })
            .collect();
        let other = series(OTHER, OTHER);
        Metrics {
            registry,
            candidates,
            audit_queue,
            commit_seconds,
            commit_failures,
            model_loads,
            load_failures,
            models_loaded,
            alarms,
            coverage,
            methods,
            other,
            models: RwLock::new(HashMap::new()),
            audit: OnceLock::new(),
            registry_models: OnceLock::new(),
        }
    }

    /// The text a scrape returns: the live gauges refreshed, then every
    /// metric in the Prometheus text format.
    pub fn render(&self) -> String {
        if let Some(writer) = self.audit.get() {
            self.audit_queue.set(writer.queue_depth() as i64);
        }
        if let Some(registry) = self.registry_models.get() {
            self.models_loaded.set(registry.snapshot().len() as i64);
        }
        let mut out = String::new();
        // Writing into a String cannot fail; an error here would be a bug
        // in the encoder, reported in the body rather than as a panic.
        if let Err(e) =
            prometheus_client::encoding::prometheus_text::encode(&mut out, &self.registry)
        {
            out = format!("# encoding the metrics failed: {e}\n");
        }
        out
    }

    /// Reads the audit queue depth at every scrape.
    pub fn watch_audit(&self, writer: AuditWriter) {
        let _ = self.audit.set(writer);
    }

    /// Reads the number of served models at every scrape.
    pub fn watch_models(&self, registry: Arc<Registry>) {
        let _ = self.registry_models.set(registry);
    }

    /// `loader`, counting each bundle loaded (by model id) and each file
    /// that failed (by file name, since a broken file names no model).
    pub fn counting_loader(self: &Arc<Self>, loader: Loader) -> Loader {
        let metrics = self.clone();
        Arc::new(move |path: &std::path::Path| {
            let loaded = loader(path);
            match &loaded {
                Ok(bundle) => metrics
                    .model_loads
                    .get_or_create(&ModelLabels {
                        model: bundle.scorer.info().id.clone(),
                    })
                    .inc(),
                Err(_) => metrics
                    .load_failures
                    .get_or_create(&FileLabels {
                        file: path
                            .file_name()
                            .map(|n| n.to_string_lossy().into_owned())
                            .unwrap_or_else(|| path.display().to_string()),
                    })
                    .inc(),
            };
            loaded
        })
    }

    /// The candidate series of one model, resolved once per model.
    pub fn model(&self, id: &str) -> Arc<ModelSeries> {
        let found = match self.models.read() {
            Ok(g) => g.get(id).cloned(),
            Err(poisoned) => poisoned.into_inner().get(id).cloned(),
        };
        if let Some(s) = found {
            return s;
        }
        let mut guard = match self.models.write() {
            Ok(g) => g,
            Err(poisoned) => poisoned.into_inner(),
        };
        guard
            .entry(id.to_string())
            .or_insert_with(|| {
                Arc::new(ModelSeries {
                    family: self.candidates.clone(),
                    model: Arc::new(id.to_string()),
                    cells: std::array::from_fn(|_| std::array::from_fn(|_| OnceLock::new())),
                })
            })
            .clone()
    }

    /// Sets the model's alarm gauges and realised coverage from one
    /// default evaluation of the monitor.
    pub fn record_evaluation<'a>(
        &self,
        model: &str,
        alarms: impl IntoIterator<Item = (&'a str, bool)>,
        coverage: Option<f64>,
    ) {
        for (alarm, firing) in alarms {
            self.alarms
                .get_or_create(&AlarmLabels {
                    model: model.to_string(),
                    alarm: alarm.to_string(),
                })
                .set(i64::from(firing));
        }
        if let Some(rate) = coverage {
            self.coverage
                .get_or_create(&ModelLabels {
                    model: model.to_string(),
                })
                .set(rate);
        }
    }

    fn method(&self, path: &str) -> Arc<MethodSeries> {
        self.methods
            .get(path)
            .cloned()
            .unwrap_or_else(|| self.other.clone())
    }
}

impl CommitObserver for Metrics {
    fn committed(&self, _entries: usize, elapsed: Duration) {
        self.commit_seconds.observe(elapsed.as_secs_f64());
    }

    fn failed(&self, entries: usize) {
        self.commit_failures.inc_by(entries as u64);
    }
}

/// Every (service, method) of the descriptor sets the server mounts:
/// ours, health and both reflection versions.
fn served_methods() -> Vec<(String, String)> {
    let sets: [&[u8]; 4] = [
        crate::pb::FILE_DESCRIPTOR_SET,
        tonic_health::pb::FILE_DESCRIPTOR_SET,
        tonic_reflection::pb::v1::FILE_DESCRIPTOR_SET,
        tonic_reflection::pb::v1alpha::FILE_DESCRIPTOR_SET,
    ];
    let mut out = Vec::new();
    for bytes in sets {
        // These sets are compiled into the binary; one that does not decode
        // leaves its calls counted under `other` rather than stopping start-up.
        let Ok(set) = prost_types::FileDescriptorSet::decode(bytes) else {
            tracing::error!(
                "a compiled-in descriptor set does not decode; its calls count as other"
            );
            continue;
        };
        for file in set.file {
            let package = file.package.unwrap_or_default();
            for service in file.service {
                let name = service.name.unwrap_or_default();
                let full = if package.is_empty() {
                    name
                } else {
                    format!("{package}.{name}")
                };
                for m in service.method {
                    out.push((full.clone(), m.name.unwrap_or_default()));
                }
            }
        }
    }
    out
}

/// One method's series: a counter per status code (resolved on first use,
/// so codes never returned print nothing) and its latency histogram.
pub struct MethodSeries {
    family: Family<CallLabels, Counter>,
    service: Arc<String>,
    method: Arc<String>,
    by_code: [OnceLock<Counter>; 17],
    latency: Histogram,
}

impl MethodSeries {
    fn new(
        family: Family<CallLabels, Counter>,
        latencies: &HistogramFamily<MethodLabels>,
        service: Arc<String>,
        method: Arc<String>,
    ) -> MethodSeries {
        let latency = latencies.get_or_create_owned(&MethodLabels {
            service: service.clone(),
            method: method.clone(),
        });
        MethodSeries {
            family,
            service,
            method,
            by_code: std::array::from_fn(|_| OnceLock::new()),
            latency,
        }
    }

    fn finish(&self, code: usize, started: Instant) {
        let code = code.min(CODES.len() - 1);
        self.by_code[code]
            .get_or_init(|| {
                self.family.get_or_create_owned(&CallLabels {
                    service: self.service.clone(),
                    method: self.method.clone(),
                    code: CODES[code],
                })
            })
            .inc();
        self.latency.observe(started.elapsed().as_secs_f64());
    }
}

/// Candidates of one answer, by status and verdict.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Tally {
    cells: [[u32; 4]; 4],
}

impl Tally {
    pub fn add(&mut self, status: CandidateStatus, verdict: Option<Verdict>) {
        let s = match status {
            CandidateStatus::Scored => 0,
            CandidateStatus::Flagged => 1,
            CandidateStatus::Refused => 2,
            CandidateStatus::Rejected => 3,
        };
        let v = match verdict {
            Some(Verdict::Inside) => 0,
            Some(Verdict::Border) => 1,
            Some(Verdict::Outside) => 2,
            None => 3,
        };
        self.cells[s][v] += 1;
    }
}

/// One model's candidate counters.
pub struct ModelSeries {
    family: Family<CandidateLabels, Counter>,
    model: Arc<String>,
    cells: [[OnceLock<Counter>; 4]; 4],
}

impl ModelSeries {
    /// Adds an answer's candidates: one increment per non-empty cell.
    pub fn record(&self, tally: &Tally) {
        for (s, row) in tally.cells.iter().enumerate() {
            for (v, &n) in row.iter().enumerate() {
                if n == 0 {
                    continue;
                }
                self.cells[s][v]
                    .get_or_init(|| {
                        self.family.get_or_create_owned(&CandidateLabels {
                            model: self.model.clone(),
                            status: STATUSES[s],
                            verdict: VERDICTS[v],
                        })
                    })
                    .inc_by(u64::from(n));
            }
        }
    }
}

/// Counts every call through the gRPC server by its final status.
#[derive(Clone)]
pub struct CallLayer {
    metrics: Arc<Metrics>,
}

impl CallLayer {
    pub fn new(metrics: Arc<Metrics>) -> CallLayer {
        CallLayer { metrics }
    }
}

impl<S> tower::Layer<S> for CallLayer {
    type Service = CallService<S>;
    fn layer(&self, inner: S) -> CallService<S> {
        CallService {
            inner,
            metrics: self.metrics.clone(),
        }
    }
}

#[derive(Clone)]
pub struct CallService<S> {
    inner: S,
    metrics: Arc<Metrics>,
}

type BoxFuture<T> = Pin<Box<dyn std::future::Future<Output = T> + Send>>;

impl<S, B, ResBody> tower::Service<http::Request<B>> for CallService<S>
where
    S: tower::Service<http::Request<B>, Response = http::Response<ResBody>>,
    S::Future: Send + 'static,
    S::Error: Send + 'static,
    ResBody: Body + Send + 'static,
{
    type Response = http::Response<CountedBody<ResBody>>;
    type Error = S::Error;
    type Future = BoxFuture<Result<Self::Response, S::Error>>;

    fn poll_ready(&mut self, cx: &mut Context<'_>) -> Poll<Result<(), S::Error>> {
        self.inner.poll_ready(cx)
    }

    fn call(&mut self, req: http::Request<B>) -> Self::Future {
        let series = self.metrics.method(req.uri().path());
        let started = Instant::now();
        let answer = self.inner.call(req);
        Box::pin(async move {
            match answer.await {
                Ok(response) => {
                    let mut pending = Some(Pending { series, started });
                    // A trailers-only answer (an error before any message)
                    // carries its status in the headers.
                    if let Some(code) = response.headers().get("grpc-status")
                        && let Some(p) = pending.take()
                    {
                        p.series.finish(code_number(code.as_bytes()), p.started);
                    }
                    Ok(response.map(|body| CountedBody {
                        inner: Box::pin(body),
                        pending,
                    }))
                }
                Err(e) => {
                    series.finish(UNKNOWN, started);
                    Err(e)
                }
            }
        })
    }
}

struct Pending {
    series: Arc<MethodSeries>,
    started: Instant,
}

fn code_number(value: &[u8]) -> usize {
    std::str::from_utf8(value)
        .ok()
        .and_then(|s| s.trim().parse::<usize>().ok())
        .filter(|&c| c < CODES.len())
        .unwrap_or(UNKNOWN)
}

/// A response body that counts its call when the final status goes out in
/// the trailers, or as cancelled when it is dropped before that.
pub struct CountedBody<B> {
    inner: Pin<Box<B>>,
    pending: Option<Pending>,
}

impl<B: Body> Body for CountedBody<B> {
    type Data = B::Data;
    type Error = B::Error;

    fn poll_frame(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
    ) -> Poll<Option<Result<Frame<Self::Data>, Self::Error>>> {
        let this = &mut *self;
        let polled = this.inner.as_mut().poll_frame(cx);
        let code = match &polled {
            Poll::Ready(Some(Ok(frame))) => frame.trailers_ref().map(|t| {
                t.get("grpc-status")
                    .map_or(UNKNOWN, |c| code_number(c.as_bytes()))
            }),
            Poll::Ready(Some(Err(_))) | Poll::Ready(None) => Some(UNKNOWN),
            Poll::Pending => None,
        };
        if let Some(code) = code
            && let Some(p) = this.pending.take()
        {
            p.series.finish(code, p.started);
        }
        polled
    }

    fn is_end_stream(&self) -> bool {
        self.inner.is_end_stream()
    }

    fn size_hint(&self) -> SizeHint {
        self.inner.size_hint()
    }
}

impl<B> Drop for CountedBody<B> {
    fn drop(&mut self) {
        if let Some(p) = self.pending.take() {
            p.series.finish(CANCELLED, p.started);
        }
    }
}

/// Binds `metrics.listen`, or nothing when it is empty. A bad address or
/// one that cannot be bound is a start-up error naming the setting.
pub async fn bind(settings: &MetricsSettings) -> Result<Option<TcpListener>, settings::Error> {
    let Some(addr) = settings.listen_addr()? else {
        return Ok(None);
    };
    TcpListener::bind(addr)
        .await
        .map(Some)
        .map_err(|e| settings::Error::Invalid {
            key: "metrics.listen",
            value: addr.to_string(),
            why: format!(
                "cannot listen there: {e}; choose a free port, or leave it empty to turn the \
                 metrics endpoint off"
            ),
        })
}

/// Serves `GET /metrics` on `listener` until `stop` changes; other paths
/// are 404 and other methods on `/metrics` 405. Connections still open at
/// the stop are closed: a scrape is short and safe to repeat.
pub async fn serve(listener: TcpListener, metrics: Arc<Metrics>, mut stop: watch::Receiver<bool>) {
    let local: Option<SocketAddr> = listener.local_addr().ok();
    tracing::info!(listen = ?local, "metrics served at /metrics");
    let mut connections = tokio::task::JoinSet::new();
    loop {
        tokio::select! {
            _ = stop.changed() => break,
            accepted = listener.accept() => match accepted {
                Ok((stream, _)) => {
                    let metrics = metrics.clone();
                    connections.spawn(serve_connection(stream, metrics));
                }
                Err(e) => {
                    // Out of file descriptors and the like: back off
                    // instead of spinning.
                    tracing::warn!(error = %e, "metrics endpoint: accept failed");
                    tokio::time::sleep(Duration::from_millis(100)).await;
                }
            },
            Some(_) = connections.join_next(), if !connections.is_empty() => {}
        }
    }
    connections.shutdown().await;
}

async fn serve_connection(stream: tokio::net::TcpStream, metrics: Arc<Metrics>) {
    let service = hyper::service::service_fn(move |req: http::Request<hyper::body::Incoming>| {
        let metrics = metrics.clone();
        async move { Ok::<_, Infallible>(respond(&metrics, req.method(), req.uri().path())) }
    });
    let served = hyper::server::conn::http1::Builder::new()
        .timer(hyper_util::rt::TokioTimer::new())
        // A client that opens a connection and sends nothing must not hold
        // it forever.
        .header_read_timeout(Duration::from_secs(10))
        .serve_connection(hyper_util::rt::TokioIo::new(stream), service)
        .await;
    if let Err(e) = served {
        tracing::debug!(error = %e, "metrics connection ended with an error");
    }
}

fn respond(metrics: &Metrics, method: &http::Method, path: &str) -> http::Response<String> {
    let (status, content_type, body) = match (path, method) {
        ("/metrics", &http::Method::GET) => (
            http::StatusCode::OK,
            prometheus_client::encoding::prometheus_text::CONTENT_TYPE,
            metrics.render(),
        ),
        ("/metrics", _) => (
            http::StatusCode::METHOD_NOT_ALLOWED,
            "text/plain; charset=utf-8",
            "only GET is served at /metrics\n".to_string(),
        ),
        _ => (
            http::StatusCode::NOT_FOUND,
            "text/plain; charset=utf-8",
            "metrics are served at /metrics\n".to_string(),
        ),
    };
    let mut response = http::Response::new(body);
    *response.status_mut() = status;
    response.headers_mut().insert(
        http::header::CONTENT_TYPE,
        http::HeaderValue::from_static(content_type),
    );
    response
}

#[cfg(test)]
mod tests {
    use super::*;
    use tokio::io::{AsyncReadExt, AsyncWriteExt};

    async fn get(addr: SocketAddr, method: &str, path: &str) -> String {
        let mut s = tokio::net::TcpStream::connect(addr).await.unwrap();
        let req = format!("{method} {path} HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n");
        s.write_all(req.as_bytes()).await.unwrap();
        let mut out = String::new();
        s.read_to_string(&mut out).await.unwrap();
        out
    }

    #[test]
    fn every_served_method_has_its_series_and_unknown_paths_share_one() {
        let m = Metrics::new();
        for path in [
            "/plumbline.v1.Scoring/Score",
            "/plumbline.v1.Scoring/ScoreStream",
            "/plumbline.v1.Outcomes/RecordOutcomes",
            "/plumbline.v1.Review/ListCases",
            "/grpc.health.v1.Health/Check",
        ] {
            assert!(m.methods.contains_key(path), "{path}");
        }
        let a = m.method("/made.up/Path");
        let b = m.method("/plumbline.v1.Scoring/NoSuchMethod");
        assert!(Arc::ptr_eq(&a, &b));
        assert_eq!(*a.service, OTHER);
    }

    #[test]
    fn tallies_land_in_their_cells_and_codes_parse() {
        let m = Metrics::new();
        let mut t = Tally::default();
        t.add(CandidateStatus::Scored, Some(Verdict::Inside));
        t.add(CandidateStatus::Scored, Some(Verdict::Inside));
        t.add(CandidateStatus::Refused, Some(Verdict::Outside));
        t.add(CandidateStatus::Rejected, None);
        m.model("potency").record(&t);
        m.model("potency").record(&t);
        let text = m.render();
        for line in [
            r#"plumbline_candidates_total{model="potency",status="scored",verdict="inside"} 4"#,
            r#"plumbline_candidates_total{model="potency",status="refused",verdict="outside"} 2"#,
            r#"plumbline_candidates_total{model="potency",status="rejected",verdict="none"} 2"#,
        ] {
            assert!(
                text.lines().any(|l| l == line),
                "{line} missing from\n{text}"
            );
        }
        assert!(!text.contains("status=\"flagged\""), "{text}");
        assert_eq!(code_number(b"0"), 0);
        assert_eq!(code_number(b"14"), 14);
        assert_eq!(code_number(b"99"), UNKNOWN);
        assert_eq!(code_number(b"x"), UNKNOWN);
    }

    #[test]
    fn an_empty_listen_setting_is_off_and_a_bad_one_is_refused_by_name() {
        let rt = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .unwrap();
        let off = MetricsSettings::default();
        assert!(rt.block_on(bind(&off)).unwrap().is_none());
        let bad = MetricsSettings {
            listen: "localhost-ish".into(),
        };
        let err = rt.block_on(bind(&bad)).unwrap_err().to_string();
        assert!(
            err.contains("metrics.listen") && err.contains("localhost-ish"),
            "{err}"
        );
        // A port already taken is refused naming the setting too.
        let taken = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
        let busy = MetricsSettings {
            listen: taken.local_addr().unwrap().to_string(),
        };
        let err = rt.block_on(bind(&busy)).unwrap_err().to_string();
        assert!(
            err.contains("metrics.listen") && err.contains("cannot listen"),
            "{err}"
        );
    }

    #[tokio::test]
    async fn the_endpoint_serves_metrics_404s_elsewhere_and_stops_on_request() {
        let metrics = Arc::new(Metrics::new());
        metrics.record_evaluation("m", [("coverage_below_nominal", true)], Some(0.25));
        let listener = TcpListener::bind("127.0.0.1:0").await.unwrap();
        let addr = listener.local_addr().unwrap();
        let (stop_tx, stop_rx) = watch::channel(false);
        let task = tokio::spawn(serve(listener, metrics, stop_rx));

        let ok = get(addr, "GET", "/metrics").await;
        assert!(ok.starts_with("HTTP/1.1 200"), "{ok}");
        assert!(ok.contains("text/plain; version=0.0.4"), "{ok}");
        assert!(
            ok.contains(r#"plumbline_alarm_firing{model="m",alarm="coverage_below_nominal"} 1"#),
            "{ok}"
        );
        assert!(
            ok.contains(r#"plumbline_realised_coverage{model="m"} 0.25"#),
            "{ok}"
        );
        assert!(ok.contains("# TYPE plumbline_grpc_call_duration_seconds histogram"));
        let missing = get(addr, "GET", "/").await;
        assert!(missing.starts_with("HTTP/1.1 404"), "{missing}");
        let post = get(addr, "POST", "/metrics").await;
        assert!(post.starts_with("HTTP/1.1 405"), "{post}");

        stop_tx.send(true).unwrap();
        task.await.unwrap();
        assert!(tokio::net::TcpStream::connect(addr).await.is_err());
    }
}
