//! The gRPC service: scoring over `plumbline.v1.Scoring`, with health,
//! reflection, limits and graceful shutdown, over a registry of hot-reloaded
//! bundles and a durable audit store.
//!
//! # Layout
//! - [`settings`]: layered settings (defaults, TOML file, `PLUMBLINE_*`);
//! - [`registry`]: the loaded models, swapped atomically on reload;
//! - [`batch`]: one batch's checks, scoring, statuses and ranks (no gRPC);
//! - [`engine`]: a call from request to committed answer;
//! - [`convert`]: core types to wire messages and audit records;
//! - [`scoring_api`]: the tonic handlers, thin;
//! - [`outcomes_api`]: lab results in, realised calibration and alarms out;
//! - [`review_api`]: the analysts' review queue over the audit store;
//! - [`status`]: the one mapping from errors to gRPC statuses;
//! - [`limits`]: the message-size limit that names its setting;
//! - [`metrics`]: Prometheus metrics and their HTTP endpoint;
//! - [`access`]: bearer tokens, roles and the loopback rule for open servers;
//! - [`tls`]: TLS files, server and client TLS, client-certificate subjects;
//! - [`client`]: the `plumbline score` client;
//! - [`telemetry`]: tracing setup.

pub mod access;
pub mod batch;
pub mod client;
pub mod convert;
pub mod engine;
mod error;
pub mod limits;
mod memory;
pub mod metrics;
pub mod outcomes_api;
pub mod registry;
pub mod review_api;
pub mod scoring_api;
pub mod settings;
pub mod status;
pub mod telemetry;
pub mod tls;

use std::future::Future;
use std::sync::Arc;
use std::time::Duration;

use tokio::net::TcpListener;
use tokio::sync::watch;
use tonic::server::NamedService;
use tonic::service::interceptor::InterceptedService;
use tonic::transport::Server;
use tonic::transport::server::TcpIncoming;
use tonic_health::ServingStatus;
use tonic_health::server::HealthReporter;

pub use client::score_client;
pub use error::{Error, StartError};
pub use registry::{Bundle, CardFacts, Loader, Registry, Scorer};
pub use settings::Settings;

use crate::audit::{self, AuditWriter};
use crate::pb;
use access::Role;
use batch::KeepDescriptors;
use engine::{Engine, EngineOptions};
use scoring_api::ScoringApi;

/// The service name health reports per service.
pub const SCORING_SERVICE: &str =
    <pb::scoring_server::ScoringServer<ScoringApi> as NamedService>::NAME;

/// Reads bundles with [`crate::bundle::read`], which verifies the checksum,
/// the format version and every shape before a model is handed out.
pub fn bundle_loader() -> Loader {
    Arc::new(|path: &std::path::Path| {
        let b = crate::bundle::read(path).map_err(|e| e.to_string())?;
        let mut facts = card_facts(&b.manifest.card);
        facts.training_ids = Arc::new(b.manifest.training_ids);
        facts.training_y = Arc::new(b.training_y);
        Ok(Bundle {
            facts,
            scorer: Arc::new(b.model),
        })
    })
}

/// The model-card facts a bundle's manifest holds beside the model.
pub fn card_facts(card: &crate::bundle::Card) -> CardFacts {
    let d = &card.domain;
    CardFacts {
        claims: card
            .claims_map()
            .into_iter()
            .map(|(metric, e)| registry::ClaimFact {
                metric,
                mean: e.mean,
                se: e.se,
            })
            .collect(),
        thresholds: registry::ThresholdFacts {
            k: d.k as u32,
            components: d.components as u32,
            explained_variance: d.explained_variance,
            z: d.z,
            z_threshold: d.z_threshold,
            leverage_warning: d.leverage_warning,
            leverage_meaningful: d.leverage_meaningful,
            pca_residual_border_limit: d.residual_border_limit,
            pca_residual_limit: d.residual_outside_limit,
            typicality_border: d.typicality_border,
            typicality_outside: d.typicality_outside,
        },
        training_rows: card.training_rows as u64,
        training_data_sha256: card.data_sha256.clone(),
        created_at: card.created_at.clone(),
        cautions: card.cautions.clone(),
        oof_outside_share: {
            let total: usize = d.oof_verdict_counts.values().sum();
            let outside = d.oof_verdict_counts.get("outside").copied().unwrap_or(0);
            (total > 0).then(|| outside as f64 / total as f64)
        },
        training_ids: Arc::default(),
        training_y: Arc::default(),
    }
}

/// Runs the server on `listener` until `shutdown` completes, then stops
/// accepting, lets in-flight calls finish (up to `server.shutdown_grace_ms`),
/// and flushes the audit writer before returning.
pub async fn run(
    settings: Settings,
    listener: TcpListener,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> Result<(), StartError> {
    run_with_loader(settings, bundle_loader(), listener, shutdown).await
}

/// [`run`] with a chosen bundle reader; the metrics endpoint, when
/// `metrics.listen` is set, is bound here.
pub async fn run_with_loader(
    settings: Settings,
    loader: Loader,
    listener: TcpListener,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> Result<(), StartError> {
    let metrics_listener = metrics::bind(&settings.metrics).await?;
    run_with_listeners(settings, loader, listener, metrics_listener, shutdown).await
}

/// [`run_with_loader`] on listeners bound by the caller: gRPC on
/// `listener`, metrics on `metrics_listener` when given (whatever
/// `metrics.listen` says), so a test can bind port 0 and know the port.
pub async fn run_with_listeners(
    settings: Settings,
    loader: Loader,
    listener: TcpListener,
    metrics_listener: Option<TcpListener>,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> Result<(), StartError> {
    settings.check()?;
    memory::keep_batch_memory();
    let (rules, builder) = secured(&settings, &listener)?;
    // Collected always (it is cheap), served only on a metrics listener.
    let metrics = Arc::new(metrics::Metrics::new());
    let loader = metrics.counting_loader(loader);
    let (writer, ids) = AuditWriter::start_observed(
        &audit_options(&settings),
        Some(metrics.clone() as Arc<dyn audit::writer::CommitObserver>),
    )?;
    metrics.watch_audit(writer.clone());
    let dir = settings.models.dir.clone();
    let default = settings.models.default.clone();
    let opened = tokio::task::spawn_blocking(move || Registry::open(&dir, &default, loader))
        .await
        .map_err(|e| StartError::Reflection(format!("loading models: {e}")));
    let registry = match opened {
        Ok(Ok(r)) => Arc::new(r),
        Ok(Err(e)) => {
            let _ = writer.close().await;
            return Err(e.into());
        }
        Err(e) => {
            let _ = writer.close().await;
            return Err(e);
        }
    };
    // Review opens its own connection; the writer has already migrated.
    let review_api = match review_api::ReviewApi::open(
        registry.clone(),
        &settings.audit.path,
        settings.audit.synchronous,
    ) {
        Ok(api) => api,
        Err(e) => {
            let _ = writer.close().await;
            return Err(e.into());
        }
    };
    metrics.watch_models(registry.clone());
    let engine = Arc::new(
        Engine::new(
            registry.clone(),
            writer.clone(),
            ids,
            engine_options(&settings),
        )
        .with_metrics(metrics.clone()),
    );

    let (health, health_service) = tonic_health::server::health_reporter();
    report_health(&health, !registry.snapshot().is_empty()).await;
    let (stop_tx, stop_rx) = watch::channel(false);
    let mut background = spawn_background(
        registry.clone(),
        rules.clone(),
        Duration::from_millis(settings.models.reload_poll_ms),
        health.clone(),
        stop_rx.clone(),
    )?;
    if let Some(l) = metrics_listener {
        background.push(tokio::spawn(metrics::serve(l, metrics.clone(), stop_rx)));
    }

    let reflection_v1 = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(pb::FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1()
        .map_err(|e| StartError::Reflection(e.to_string()))?;
    let reflection_v1alpha = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(pb::FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1alpha()
        .map_err(|e| StartError::Reflection(e.to_string()))?;

    let limit = settings.server.max_message_bytes;
    let scoring = pb::scoring_server::ScoringServer::new(ScoringApi::new(engine.clone()))
        .max_decoding_message_size(limit)
        .max_encoding_message_size(limit);
    let gate = |role| access::Gate::new(rules.clone(), role);
    let scoring = InterceptedService::new(scoring, gate(Role::Score));
    let outcomes_api = match outcomes_api::OutcomesApi::open(
        registry.clone(),
        &settings.audit.path,
        settings.audit.synchronous,
    ) {
        Ok(api) => api.with_metrics(metrics.clone()),
        Err(e) => {
            let _ = writer.close().await;
            return Err(e.into());
        }
    };
    let outcomes = pb::outcomes_server::OutcomesServer::new(outcomes_api)
        .max_decoding_message_size(limit)
        .max_encoding_message_size(limit);
    let review = pb::review_server::ReviewServer::new(review_api)
        .max_decoding_message_size(limit)
        .max_encoding_message_size(limit);
    let outcomes = InterceptedService::new(outcomes, gate(Role::Review));
    let review = InterceptedService::new(review, gate(Role::Review));
    let local = listener.local_addr().ok();
    let incoming = TcpIncoming::from(listener).with_nodelay(Some(true));

    let (fired_tx, fired_rx) = tokio::sync::oneshot::channel::<()>();
    let shutdown_health = health.clone();
    let signal = async move {
        shutdown.await;
        tracing::info!("shutting down: no new connections; finishing in-flight calls");
        // Load balancers stop sending as soon as health says so.
        report_health(&shutdown_health, false).await;
        let _ = fired_tx.send(());
    };
    tracing::info!(listen = ?local, models = ?registry.snapshot().ids(), "serving");
    let server = builder
        .timeout(Duration::from_millis(settings.server.request_timeout_ms))
        .layer(metrics::CallLayer::new(metrics.clone()))
        .layer(tower::util::MapRequestLayer::new(move |req| {
            limits::limit_request(req, limit)
        }))
        .add_service(health_service)
        .add_service(reflection_v1)
        .add_service(reflection_v1alpha)
        .add_service(scoring)
        .add_service(outcomes)
        .add_service(review)
        .serve_with_incoming_shutdown(incoming, signal);

    let grace = Duration::from_millis(settings.server.shutdown_grace_ms);
    let served = tokio::select! {
        r = server => r.map_err(StartError::from),
        _ = async {
            let _ = fired_rx.await;
            tokio::time::sleep(grace).await;
        } => {
            tracing::warn!(grace_ms = grace.as_millis() as u64,
                "grace period over; abandoning calls still in flight");
            Ok(())
        }
    };

    let _ = stop_tx.send(true);
    for task in background {
        let _ = task.await;
    }
    match writer.close().await {
        Ok(stats) => tracing::info!(
            transactions = stats.transactions,
            entries = stats.entries,
            failed = stats.failed_entries,
            "audit store flushed"
        ),
        Err(e) => tracing::error!(error = %e, "audit store did not close cleanly"),
    }
    served
}

/// The access rules and a server builder with TLS when configured; refuses
/// an open server on a non-loopback address and warns about an open one.
fn secured(
    settings: &Settings,
    listener: &TcpListener,
) -> Result<(Arc<access::AccessControl>, Server), StartError> {
    let rules = access::AccessControl::from_settings(settings)?;
    if let Ok(addr) = listener.local_addr() {
        access::check_exposure(
            addr,
            settings.auth_configured(),
            settings.server.allow_unauthenticated_remote,
        )?;
    }
    if rules.current().is_open() {
        tracing::warn!(
            "no authentication configured (no tokens, no client CA): the service is open to \
             anyone who can reach it; see the security section of the README"
        );
    }
    let mut builder = Server::builder();
    if let Some(config) = tls::server_config(&settings.tls)? {
        builder = builder
            .tls_config(config)
            .map_err(|e| StartError::Tls(error_chain(&e)))?;
    }
    Ok((Arc::new(rules), builder))
}

/// An error with every cause after it, for messages people act on.
pub(crate) fn error_chain(e: &dyn std::error::Error) -> String {
    let mut text = e.to_string();
    let mut source = e.source();
    while let Some(s) = source {
        text.push_str(": ");
        text.push_str(&s.to_string());
        source = s.source();
    }
    text
}

fn audit_options(s: &Settings) -> audit::Options {
    audit::Options {
        path: s.audit.path.clone(),
        synchronous: s.audit.synchronous,
        batch_max: s.audit.batch_max,
        queue_depth: s.audit.queue_depth,
        checkpoint_interval: Duration::from_millis(s.audit.checkpoint_interval_ms),
        max_bytes: s.audit.max_bytes,
    }
}

fn engine_options(s: &Settings) -> EngineOptions {
    EngineOptions {
        policy: s.policy.policy(),
        default_confidence: s.policy.default_confidence,
        max_candidates: s.server.max_candidates,
        keep: match s.audit.store_descriptors {
            settings::StoreDescriptors::FlaggedOnly => KeepDescriptors::FlaggedOnly,
            settings::StoreDescriptors::All => KeepDescriptors::All,
        },
        workers: s.server.workers,
        concurrency_limit: s.server.concurrency_limit,
    }
}

/// Overall health and the scoring service's health: SERVING only while a
/// model is loaded.
async fn report_health(health: &HealthReporter, serving: bool) {
    let status = if serving {
        ServingStatus::Serving
    } else {
        ServingStatus::NotServing
    };
    health.set_service_status("", status).await;
    health.set_service_status(SCORING_SERVICE, status).await;
}

/// The poller (bundle directory and tokens file), the SIGHUP handler and
/// the health follower, all stopped through `stop`.
fn spawn_background(
    registry: Arc<Registry>,
    rules: Arc<access::AccessControl>,
    poll: Duration,
    health: HealthReporter,
    stop: watch::Receiver<bool>,
) -> Result<Vec<tokio::task::JoinHandle<()>>, StartError> {
    let mut tasks = Vec::new();
    let mut hangup = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::hangup())
        .map_err(|source| StartError::Signal {
            signal: "SIGHUP",
            source,
        })?;

    if !poll.is_zero() {
        let registry = registry.clone();
        let rules = rules.clone();
        let mut stop = stop.clone();
        tasks.push(tokio::spawn(async move {
            let mut tick = tokio::time::interval(poll);
            tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
            tick.tick().await;
            loop {
                tokio::select! {
                    _ = stop.changed() => break,
                    _ = tick.tick() => {
                        rules.reload_logged(false);
                        reload(&registry, false).await;
                    }
                }
            }
        }));
    }
    {
        let registry = registry.clone();
        let mut stop = stop.clone();
        tasks.push(tokio::spawn(async move {
            loop {
                tokio::select! {
                    _ = stop.changed() => break,
                    got = hangup.recv() => match got {
                        Some(()) => {
                            tracing::info!("SIGHUP: reloading every bundle and the tokens file");
                            rules.reload_logged(true);
                            reload(&registry, true).await;
                        }
                        None => break,
                    },
                }
            }
        }));
    }
    {
        let mut changes = registry.subscribe();
        let mut stop = stop;
        tasks.push(tokio::spawn(async move {
            loop {
                tokio::select! {
                    _ = stop.changed() => break,
                    changed = changes.changed() => {
                        if changed.is_err() { break; }
                        let serving = !changes.borrow_and_update().is_empty();
                        report_health(&health, serving).await;
                    }
                }
            }
        }));
    }
    Ok(tasks)
}

async fn reload(registry: &Arc<Registry>, force: bool) {
    let registry = registry.clone();
    match tokio::task::spawn_blocking(move || registry.rescan(force)).await {
        Ok(report) if report.swapped => {
            tracing::info!(
                loaded = report.loaded.len(),
                removed = report.removed.len(),
                failed = report.failed.len(),
                "models swapped"
            );
            memory::release_after_swap();
        }
        Ok(_) => {}
        Err(e) => tracing::error!(error = %e, "model reload task failed"),
    }
}

/// A runtime sized by `server.workers` (tokio would size it from the host's
/// CPUs, not the container's limit).
pub fn build_runtime(settings: &Settings) -> std::io::Result<tokio::runtime::Runtime> {
    tokio::runtime::Builder::new_multi_thread()
        .worker_threads(settings.server.workers.max(1))
        .thread_name("plumbline")
        .enable_all()
        .build()
}

/// `plumbline serve`: tracing, listen, serve until SIGTERM or SIGINT.
pub async fn serve_main(settings: Settings) -> anyhow::Result<()> {
    telemetry::init(settings.server.json_logs);
    let addr = settings.server.listen;
    let listener = TcpListener::bind(addr)
        .await
        .map_err(|source| StartError::Listen {
            addr: addr.to_string(),
            source,
        })?;
    let mut term = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())
        .map_err(|source| StartError::Signal {
            signal: "SIGTERM",
            source,
        })?;
    let shutdown = async move {
        tokio::select! {
            _ = term.recv() => tracing::info!("SIGTERM received"),
            _ = tokio::signal::ctrl_c() => tracing::info!("SIGINT received"),
        }
    };
    run(settings, listener, shutdown).await?;
    Ok(())
}
