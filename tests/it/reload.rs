//! Hot reload: a bundle replaced under load swaps with no failed call; a
//! broken file never replaces a working model; SIGHUP-free polling finds
//! new and removed bundles.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::time::Duration;

use crate::fixtures::{self, ModelSpec};
use crate::util::TestServer;
use crate::{candidates, request};

async fn wait_for_version(server: &TestServer, model: &str, version: &str) {
    let mut client = server.client().await;
    for _ in 0..200 {
        let card = client
            .describe_model(plumbline::pb::DescribeModelRequest {
                model: model.into(),
            })
            .await;
        if card.is_ok_and(|c| c.get_ref().model_version == version) {
            return;
        }
        tokio::time::sleep(Duration::from_millis(25)).await;
    }
    panic!("model {model} never reached version {version}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn replacing_a_bundle_under_load_swaps_it_with_no_failed_call() {
    let spec = |seed| ModelSpec::new("potency", seed);
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "potency.plumb", &spec(1000));
        },
        |_| {},
    )
    .await;
    let versions: Vec<String> = (1000..1004)
        .map(|seed| {
            let tmp = tempfile::tempdir().expect("tmp");
            let p = fixtures::write_bundle(tmp.path(), "x.plumb", &spec(seed));
            fixtures::model_info(&p).version
        })
        .collect();
    let stop = Arc::new(AtomicBool::new(false));
    let calls = Arc::new(AtomicUsize::new(0));
    let seen: Arc<std::sync::Mutex<Vec<String>>> = Arc::default();
    let rows = fixtures::in_domain_rows(20, 600);
    let mut clients = Vec::new();
    for _ in 0..4 {
        let mut client = server.client().await;
        let (stop, calls, seen, rows) = (stop.clone(), calls.clone(), seen.clone(), rows.clone());
        clients.push(tokio::spawn(async move {
            let mut failures = Vec::new();
            // Bounded: stops when told, or after 20,000 calls at most.
            for _ in 0..20_000 {
                if stop.load(Ordering::Relaxed) {
                    break;
                }
                match client
                    .score(request("potency", candidates("c", &rows)))
                    .await
                {
                    Ok(r) => {
                        let r = r.into_inner();
                        assert_eq!(r.results.len(), rows.len());
                        seen.lock().expect("lock").push(r.model_version);
                    }
                    Err(e) => failures.push(e.to_string()),
                }
                calls.fetch_add(1, Ordering::Relaxed);
            }
            failures
        }));
    }
    for (k, seed) in (1001..1004).enumerate() {
        tokio::time::sleep(Duration::from_millis(150)).await;
        fixtures::write_bundle(&server.bundles, "potency.plumb", &spec(seed));
        wait_for_version(&server, "potency", &versions[k + 1]).await;
    }
    tokio::time::sleep(Duration::from_millis(150)).await;
    stop.store(true, Ordering::Relaxed);
    let mut failures = Vec::new();
    for c in clients {
        failures.extend(c.await.expect("client task"));
    }
    assert!(
        failures.is_empty(),
        "failed calls during reload: {failures:?}"
    );
    let seen = seen.lock().expect("lock").clone();
    assert!(calls.load(Ordering::Relaxed) > 20, "the clients did hammer");
    for v in &versions {
        assert!(seen.contains(v), "version {v} was never served");
    }
    // Once a version is replaced it is not served again to new calls.
    let last_old = seen
        .iter()
        .rposition(|v| v == &versions[0])
        .expect("old seen");
    let first_new = seen
        .iter()
        .position(|v| v == &versions[3])
        .expect("new seen");
    assert!(last_old < first_new);
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_broken_new_file_keeps_the_working_model_and_new_and_removed_files_are_noticed() {
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "potency.plumb", &ModelSpec::new("potency", 7));
        },
        |_| {},
    )
    .await;
    let mut client = server.client().await;
    let before = client
        .describe_model(plumbline::pb::DescribeModelRequest {
            model: "potency".into(),
        })
        .await
        .expect("describe")
        .into_inner()
        .model_version;
    // Broken bytes under the same name (written atomically).
    let tmp = server.bundles.join("potency.plumb.tmp");
    std::fs::write(&tmp, b"PLUMB garbage").expect("write");
    std::fs::rename(&tmp, server.bundles.join("potency.plumb")).expect("rename");
    // A second model appears meanwhile; once it is served the broken file
    // has certainly been looked at too.
    fixtures::write_bundle(
        &server.bundles,
        "solubility.plumb",
        &ModelSpec::new("solubility", 8),
    );
    let mut listed = Vec::new();
    for _ in 0..200 {
        listed = client
            .list_models(plumbline::pb::ListModelsRequest {})
            .await
            .expect("list")
            .into_inner()
            .models
            .into_iter()
            .map(|m| (m.model, m.model_version, m.is_default))
            .collect::<Vec<_>>();
        if listed.len() == 2 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(25)).await;
    }
    assert_eq!(listed.len(), 2, "{listed:?}");
    assert_eq!(
        listed[0],
        ("potency".to_string(), before.clone(), true),
        "default first"
    );
    let r = client
        .score(request(
            "potency",
            candidates("c", &fixtures::in_domain_rows(3, 700)),
        ))
        .await
        .expect("the working model is still served");
    assert_eq!(r.into_inner().model_version, before);

    std::fs::remove_file(server.bundles.join("solubility.plumb")).expect("remove");
    for _ in 0..200 {
        let n = client
            .list_models(plumbline::pb::ListModelsRequest {})
            .await
            .expect("list")
            .into_inner()
            .models
            .len();
        if n == 1 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(25)).await;
    }
    let err = client
        .score(request(
            "solubility",
            candidates("c", &fixtures::in_domain_rows(1, 701)),
        ))
        .await
        .expect_err("removed model");
    assert_eq!(err.code(), tonic::Code::NotFound);
    server.stop().await.expect("clean stop");
}

/// Waits until the listing has `n` models, then returns the default's
/// version. Files are listed together, so once a change written later is
/// seen, the damaged file written before it has been tried too.
async fn listed_after(server: &TestServer, n: usize) -> Vec<(String, String)> {
    let mut client = server.client().await;
    let mut listed = Vec::new();
    for _ in 0..400 {
        listed = client
            .list_models(plumbline::pb::ListModelsRequest {})
            .await
            .expect("list")
            .into_inner()
            .models
            .into_iter()
            .map(|m| (m.model, m.model_version))
            .collect::<Vec<_>>();
        if listed.len() == n {
            return listed;
        }
        tokio::time::sleep(Duration::from_millis(25)).await;
    }
    panic!("the listing never reached {n} models: {listed:?}");
}

/// The real bundle damaged in place, as a copy caught half-way or a bad
/// disk would leave it: cut to half its length, then full length with one
/// bit flipped. Each is refused by its checksum and the loaded version keeps
/// answering with the same predictions.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_bundle_truncated_or_corrupted_in_place_keeps_the_loaded_model() {
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "potency.plumb", &ModelSpec::new("potency", 7));
        },
        |_| {},
    )
    .await;
    let client = server.client().await;
    let rows = fixtures::in_domain_rows(4, 702);
    let score = |mut client: plumbline::pb::scoring_client::ScoringClient<_>| {
        let req = request("potency", candidates("c", &rows));
        async move {
            let r = client
                .score(req)
                .await
                .expect("the loaded model still answers")
                .into_inner();
            let p: Vec<Option<u64>> = r
                .results
                .iter()
                .map(|c| c.prediction.map(f64::to_bits))
                .collect();
            (r.model_version, p)
        }
    };
    let before = score(client.clone()).await;
    assert!(before.1.iter().all(Option::is_some));
    let path = server.bundles.join("potency.plumb");
    let good = std::fs::read(&path).expect("read the bundle");

    std::fs::write(&path, &good[..good.len() / 2]).expect("truncate in place");
    fixtures::write_bundle(
        &server.bundles,
        "solubility.plumb",
        &ModelSpec::new("solubility", 8),
    );
    let listed = listed_after(&server, 2).await;
    assert_eq!(listed[0], ("potency".to_string(), before.0.clone()));
    assert_eq!(score(client.clone()).await, before, "after truncation");

    let mut flipped = good.clone();
    let mid = flipped.len() / 2;
    flipped[mid] ^= 0x10;
    std::fs::write(&path, &flipped).expect("corrupt in place");
    std::fs::remove_file(server.bundles.join("solubility.plumb")).expect("remove");
    let listed = listed_after(&server, 1).await;
    assert_eq!(listed[0], ("potency".to_string(), before.0.clone()));
    assert_eq!(score(client.clone()).await, before, "after a flipped bit");

    server.stop().await.expect("clean stop");
}
