//! Operations: health per service and overall, reflection, model cards,
//! start-up failures, and shutdown that finishes in-flight calls and
//! flushes the audit store.

use std::path::Path;
use std::sync::Arc;
use std::time::Duration;

use plumbline::pb;
use plumbline::scoring::{CandidateScore, ModelInfo};
use plumbline::service::{Bundle, Loader, Scorer, StartError};
use tonic_health::pb::HealthCheckRequest;
use tonic_health::pb::health_check_response::ServingStatus;
use tonic_health::pb::health_client::HealthClient;

use crate::fixtures::{self, ModelSpec};
use crate::util::TestServer;
use crate::{candidates, request};

async fn health(server: &TestServer, service: &str) -> i32 {
    let mut h = HealthClient::new(server.channel().await);
    h.check(HealthCheckRequest {
        service: service.into(),
    })
    .await
    .expect("health check")
    .into_inner()
    .status
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn health_follows_the_loaded_models_overall_and_per_service() {
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "m.plumb", &ModelSpec::new("potency", 41));
        },
        |_| {},
    )
    .await;
    let scoring = plumbline::service::SCORING_SERVICE;
    assert_eq!(scoring, "plumbline.v1.Scoring");
    assert_eq!(health(&server, "").await, ServingStatus::Serving as i32);
    assert_eq!(
        health(&server, scoring).await,
        ServingStatus::Serving as i32
    );
    std::fs::remove_file(server.bundles.join("m.plumb")).expect("remove");
    let mut status = 0;
    for _ in 0..200 {
        status = health(&server, scoring).await;
        if status == ServingStatus::NotServing as i32 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(25)).await;
    }
    assert_eq!(status, ServingStatus::NotServing as i32);
    assert_eq!(health(&server, "").await, ServingStatus::NotServing as i32);
    fixtures::write_bundle(&server.bundles, "m.plumb", &ModelSpec::new("potency", 42));
    for _ in 0..200 {
        status = health(&server, scoring).await;
        if status == ServingStatus::Serving as i32 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(25)).await;
    }
    assert_eq!(status, ServingStatus::Serving as i32);
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn reflection_lists_the_services() {
    use tonic_reflection::pb::v1::ServerReflectionRequest;
    use tonic_reflection::pb::v1::server_reflection_client::ServerReflectionClient;
    use tonic_reflection::pb::v1::server_reflection_request::MessageRequest;
    use tonic_reflection::pb::v1::server_reflection_response::MessageResponse;
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "m.plumb", &ModelSpec::new("potency", 43));
        },
        |_| {},
    )
    .await;
    let mut client = ServerReflectionClient::new(server.channel().await);
    let req = ServerReflectionRequest {
        host: String::new(),
        message_request: Some(MessageRequest::ListServices(String::new())),
    };
    let mut answers = client
        .server_reflection_info(tokio_stream::iter(vec![req]))
        .await
        .expect("reflection")
        .into_inner();
    let answer = answers
        .message()
        .await
        .expect("answer")
        .expect("one answer");
    let Some(MessageResponse::ListServicesResponse(list)) = answer.message_response else {
        panic!("unexpected reflection answer");
    };
    let names: Vec<String> = list.service.into_iter().map(|s| s.name).collect();
    assert!(
        names.contains(&"plumbline.v1.Scoring".to_string()),
        "{names:?}"
    );
    assert!(
        names.contains(&"grpc.health.v1.Health".to_string()),
        "{names:?}"
    );
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_model_card_lists_descriptors_in_order_and_the_model_facts() {
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "m.plumb", &ModelSpec::new("potency", 44));
        },
        |_| {},
    )
    .await;
    let info = fixtures::model_info(&server.bundles.join("m.plumb"));
    let mut client = server.client().await;
    let card = client
        .describe_model(pb::DescribeModelRequest {
            model: String::new(),
        })
        .await
        .expect("describe the default")
        .into_inner();
    assert_eq!(card.model, info.id);
    assert_eq!(card.model_version, info.version);
    assert_eq!(card.descriptor_names, info.descriptor_names);
    assert_eq!(card.endpoint, info.endpoint);
    assert_eq!(card.default_confidence, info.default_confidence);
    assert!(card.is_default);
    assert_eq!(card.direction, "higher");
    assert_eq!(card.family, info.hyper.family().name());
    // The facts from the bundle's manifest: the fit's claims and thresholds.
    let bundle = plumbline::bundle::read(&server.bundles.join("m.plumb")).expect("bundle");
    let claims: Vec<(String, f64, f64)> = card
        .claims
        .iter()
        .map(|c| (c.metric.clone(), c.mean, c.se))
        .collect();
    let want: Vec<(String, f64, f64)> = bundle
        .manifest
        .card
        .claims_map()
        .into_iter()
        .map(|(m, e)| (m, e.mean, e.se))
        .collect();
    assert_eq!(claims, want);
    assert!(claims.iter().any(|c| c.0 == "rmse"));
    assert_eq!(card.training_rows, 160);
    let d = card.domain.expect("thresholds");
    let t = &bundle.manifest.card.domain;
    assert_eq!(d.k as usize, t.k);
    assert_eq!(d.pca_residual_limit, t.residual_outside_limit);
    assert_eq!(d.pca_residual_border_limit, t.residual_border_limit);
    assert_eq!(d.typicality_border, t.typicality_border);
    assert_eq!(d.leverage_warning, t.leverage_warning);
    let err = client
        .describe_model(pb::DescribeModelRequest {
            model: "none".into(),
        })
        .await
        .expect_err("unknown");
    assert_eq!(err.code(), tonic::Code::NotFound);
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn start_up_fails_only_when_no_bundle_loads() {
    let broken = TestServer::start(
        fixtures::loader(),
        |dir| {
            std::fs::write(dir.join("bad.plumb"), b"not a bundle").expect("write");
        },
        |_| {},
    )
    .await;
    match broken.outcome().await {
        Err(StartError::Models(e)) => assert!(e.to_string().contains("bad.plumb"), "{e}"),
        other => panic!("expected a start-up failure, got {other:?}"),
    }
    // One good bundle is enough; the broken one is skipped.
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            std::fs::write(dir.join("bad.plumb"), b"not a bundle").expect("write");
            fixtures::write_bundle(dir, "good.plumb", &ModelSpec::new("potency", 45));
        },
        |_| {},
    )
    .await;
    let r = server
        .client()
        .await
        .score(request(
            "",
            candidates("c", &fixtures::in_domain_rows(2, 800)),
        ))
        .await
        .expect("served");
    assert_eq!(r.into_inner().model, "potency");
    server.stop().await.expect("clean stop");
}

/// Delays every scoring call, so calls are surely in flight at shutdown.
struct Slow(Arc<dyn Scorer>, Duration);

impl Scorer for Slow {
    fn info(&self) -> &ModelInfo {
        self.0.info()
    }
    fn score(&self, x: ndarray::ArrayView2<f64>, c: f64) -> Vec<CandidateScore> {
        std::thread::sleep(self.1);
        self.0.score(x, c)
    }
}

fn slow_loader(delay: Duration) -> Loader {
    let inner = fixtures::loader();
    Arc::new(move |p: &Path| {
        let b = inner(p)?;
        Ok(Bundle {
            scorer: Arc::new(Slow(b.scorer, delay)),
            facts: b.facts,
        })
    })
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn shutdown_finishes_in_flight_calls_and_flushes_every_record() {
    let mut server = TestServer::start(
        slow_loader(Duration::from_millis(300)),
        |dir| {
            fixtures::write_bundle(dir, "m.plumb", &ModelSpec::new("potency", 46));
        },
        |_| {},
    )
    .await;
    let mut calls = Vec::new();
    for k in 0..4 {
        let mut client = server.client().await;
        calls.push(tokio::spawn(async move {
            client
                .score(request(
                    "",
                    candidates(&format!("k{k}-"), &fixtures::in_domain_rows(5, k)),
                ))
                .await
        }));
    }
    // Let the calls reach the scorer, then shut down while they sleep in it.
    tokio::time::sleep(Duration::from_millis(100)).await;
    server
        .stop_in_place()
        .await
        .expect("run returns Ok after a clean shutdown");
    let mut ids = Vec::new();
    for c in calls {
        let answer = c.await.expect("task").expect("in-flight call answered");
        ids.push(answer.into_inner().request_id);
    }
    let db = server.reader();
    for id in ids {
        assert_eq!(db.candidates_of(&id).expect("read").len(), 5);
    }
    // New connections are refused once the server has stopped.
    let refused = tonic::transport::Channel::from_shared(server.endpoint())
        .expect("endpoint")
        .connect_timeout(Duration::from_millis(500))
        .connect()
        .await;
    assert!(refused.is_err());
}
