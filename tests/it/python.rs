//! The server called from Python with the official grpcio packages: a real
//! client we did not write. Under `CI=true` a missing package fails the test;
//! elsewhere it is skipped with a loud message.

use std::path::PathBuf;
use std::process::Command;

use plumbline::pb;
use serde_json::json;

use crate::fixtures::{self, ModelSpec};
use crate::util::TestServer;

fn python_ready() -> Result<(), String> {
    let out = Command::new("python3")
        .args(["-c", "import grpc, grpc_tools, grpc_health.v1.health_pb2"])
        .output()
        .map_err(|e| format!("python3 cannot be run: {e}"))?;
    if out.status.success() {
        Ok(())
    } else {
        Err(String::from_utf8_lossy(&out.stderr).into_owned())
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn grpcio_client_agrees_with_the_server() {
    if let Err(why) = python_ready() {
        if std::env::var("CI").is_ok_and(|v| v == "true") {
            panic!("the Python gRPC packages are required under CI: {why}");
        }
        eprintln!(
            "\n!!!!!!!! SKIPPED: the Python gRPC client test needs grpcio, grpcio-tools and \
             grpcio-health-checking (bash tests/install-test-deps.sh): {why}\n"
        );
        return;
    }
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "m.plumb", &ModelSpec::new("potency", 61));
        },
        |s| s.server.max_candidates = 100,
    )
    .await;
    let mut rows = fixtures::in_domain_rows(18, 1000);
    rows.extend(fixtures::far_rows(2));
    let path = server.bundles.join("m.plumb");
    let info = fixtures::model_info(&path);
    let reference = fixtures::reference_scores(&path, &rows, info.default_confidence);
    let policy = server.settings.policy.policy();
    let expected: Vec<serde_json::Value> = reference
        .iter()
        .enumerate()
        .map(|(i, s)| {
            let status = match policy.disposition(s.domain.verdict) {
                plumbline::scoring::Disposition::Scored => pb::Status::Scored,
                plumbline::scoring::Disposition::Flagged => pb::Status::Flagged,
                plumbline::scoring::Disposition::Refused => pb::Status::Refused,
            };
            let bits = (status != pb::Status::Refused).then(|| s.prediction.to_bits().to_string());
            json!({ "id": format!("c{i}"), "status": status.as_str_name(), "prediction_bits": bits })
        })
        .collect();
    let cases = json!({
        "model": info.id,
        "descriptor_names": info.descriptor_names,
        "max_candidates": 100,
        "candidates": rows.iter().enumerate()
            .map(|(i, r)| json!({ "id": format!("c{i}"), "descriptors": r }))
            .collect::<Vec<_>>(),
        "expected": expected,
    });
    let cases_path = server.dir.path().join("cases.json");
    std::fs::write(&cases_path, serde_json::to_vec(&cases).expect("json")).expect("write cases");
    // Wait until the server answers before handing it to Python.
    let _ = server.client().await;

    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
    let out = Command::new("python3")
        .arg(root.join("tests/python/test_client.py"))
        .env("PLUMBLINE_ADDR", server.addr.to_string())
        .env("PLUMBLINE_PROTO_DIR", root.join("proto"))
        .env("PLUMBLINE_CASES", &cases_path)
        .env("PLUMBLINE_AUDIT_DB", &server.audit_path)
        .output()
        .expect("run python3");
    let text = format!(
        "{}\n{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(out.status.success(), "the Python client failed:\n{text}");
    assert!(text.contains("6 passed, 0 failed"), "{text}");
    server.stop().await.expect("clean stop");
}
