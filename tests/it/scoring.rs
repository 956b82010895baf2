//! The scoring path end to end: statuses, ranks, rejections, reordering and
//! request-level errors.

use plumbline::pb;
use plumbline::scoring::{Direction, Disposition, Policy, RankKey};
use plumbline::service::Settings;
use tonic::Code;
use tonic_types::StatusExt;

use crate::fixtures::{self, ModelSpec};
use crate::util::TestServer;
use crate::{candidates, request, status_of};

fn expected_status(policy: &Policy, verdict: plumbline::domain::Verdict) -> pb::Status {
    match policy.disposition(verdict) {
        Disposition::Scored => pb::Status::Scored,
        Disposition::Flagged => pb::Status::Flagged,
        Disposition::Refused => pb::Status::Refused,
    }
}

async fn server_with(spec: ModelSpec, tweak: impl FnOnce(&mut Settings)) -> TestServer {
    TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "model.plumb", &spec);
        },
        tweak,
    )
    .await
}

/// Checks every answer against in-process scoring of the same rows, and the
/// ranks against the policy's key and the endpoint's direction.
fn check_answers(
    server: &TestServer,
    rows: &[Vec<f64>],
    answer: &pb::ScoreResponse,
    policy: &Policy,
    confidence: f64,
) {
    let path = server.bundles.join("model.plumb");
    let info = fixtures::model_info(&path);
    let reference = fixtures::reference_scores(&path, rows, confidence);
    assert_eq!(answer.results.len(), rows.len());
    assert_eq!(answer.model, info.id);
    assert_eq!(answer.model_version, info.version);
    assert_eq!(answer.confidence, confidence);
    let mut ranked: Vec<(u32, f64)> = Vec::new();
    for (got, want) in answer.results.iter().zip(&reference) {
        let status = expected_status(policy, want.domain.verdict);
        assert_eq!(status_of(got), status, "{}", got.id);
        let domain = got.domain.as_ref().expect("domain report");
        assert_eq!(
            domain.typicality.to_bits(),
            want.domain.typicality.to_bits()
        );
        assert_eq!(
            domain.knn_distance.to_bits(),
            want.domain.knn_distance.to_bits()
        );
        if status == pb::Status::Refused {
            assert_eq!(got.prediction, None);
            assert_eq!((got.lower, got.upper), (None, None));
            assert_eq!(got.rank, 0);
            continue;
        }
        // Bit for bit what in-process scoring gives.
        assert_eq!(
            got.prediction.map(f64::to_bits),
            Some(want.prediction.to_bits())
        );
        assert_eq!(
            got.lower.map(f64::to_bits),
            want.interval.lower.map(f64::to_bits)
        );
        assert_eq!(
            got.upper.map(f64::to_bits),
            want.interval.upper.map(f64::to_bits)
        );
        if status == pb::Status::Flagged {
            assert_eq!(got.rank, 0, "flagged candidates are never ranked");
            continue;
        }
        let key = match (policy.key, info.direction) {
            (RankKey::Prediction, _) => Some(want.prediction),
            (RankKey::ConservativeBound, Direction::Higher) => want.interval.lower,
            (RankKey::ConservativeBound, Direction::Lower) => want.interval.upper,
        };
        ranked.push((got.rank, key.expect("bounded key in these tests")));
    }
    ranked.sort_by_key(|r| r.0);
    let ranks: Vec<u32> = ranked.iter().map(|r| r.0).collect();
    assert_eq!(ranks, (1..=ranked.len() as u32).collect::<Vec<_>>());
    for w in ranked.windows(2) {
        match info.direction {
            Direction::Higher => assert!(w[0].1 >= w[1].1, "{w:?}"),
            Direction::Lower => assert!(w[0].1 <= w[1].1, "{w:?}"),
        }
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn in_domain_candidates_are_scored_and_ranked_by_prediction_higher_first() {
    let server = server_with(ModelSpec::new("potency", 1), |_| {}).await;
    let rows = fixtures::in_domain_rows(40, 11);
    let mut client = server.client().await;
    let answer = client
        .score(request("", candidates("c", &rows)))
        .await
        .expect("score")
        .into_inner();
    let policy = server.settings.policy.policy();
    assert!(answer.results.iter().any(|c| c.rank == 1));
    check_answers(&server, &rows, &answer, &policy, 0.9);
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn conservative_bound_ranking_with_lower_is_better_ranks_by_upper_bound() {
    let mut spec = ModelSpec::new("clearance", 2);
    spec.direction = Direction::Lower;
    let server = server_with(spec, |s| {
        s.policy.rank_key = RankKey::ConservativeBound;
    })
    .await;
    let rows = fixtures::in_domain_rows(40, 12);
    let mut req = request("clearance", candidates("c", &rows));
    req.confidence = 0.8;
    let answer = server
        .client()
        .await
        .score(req)
        .await
        .expect("score")
        .into_inner();
    let policy = server.settings.policy.policy();
    check_answers(&server, &rows, &answer, &policy, 0.8);
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn far_outside_is_refused_under_refuse_and_flagged_unranked_under_flag() {
    let mut rows = fixtures::in_domain_rows(10, 13);
    rows.extend(fixtures::far_rows(3));
    for outside in [
        plumbline::scoring::OutsidePolicy::Refuse,
        plumbline::scoring::OutsidePolicy::Flag,
    ] {
        let server =
            server_with(ModelSpec::new("potency", 3), |s| s.policy.outside = outside).await;
        let answer = server
            .client()
            .await
            .score(request("", candidates("c", &rows)))
            .await
            .expect("score")
            .into_inner();
        let far = &answer.results[10..];
        for c in far {
            let verdict = c.domain.as_ref().expect("domain").verdict;
            assert_eq!(verdict, pb::Verdict::Outside as i32, "{}", c.id);
            assert_eq!(c.rank, 0);
            match outside {
                plumbline::scoring::OutsidePolicy::Refuse => {
                    assert_eq!(status_of(c), pb::Status::Refused);
                    assert_eq!(c.prediction, None);
                    assert!(!c.reason.is_empty());
                }
                plumbline::scoring::OutsidePolicy::Flag => {
                    assert_eq!(status_of(c), pb::Status::Flagged);
                    assert!(c.prediction.is_some());
                }
            }
        }
        let policy = server.settings.policy.policy();
        check_answers(&server, &rows, &answer, &policy, 0.9);
        server.stop().await.expect("clean stop");
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn nan_wrong_length_empty_and_duplicate_ids_are_rejected_while_the_rest_is_scored() {
    let server = server_with(ModelSpec::new("potency", 4), |_| {}).await;
    let good = fixtures::in_domain_rows(4, 14);
    let mut cands = candidates("ok", &good);
    let mut nan = good[0].clone();
    nan[2] = f64::NAN;
    let mut inf = good[1].clone();
    inf[0] = f64::INFINITY;
    let short = good[2][..fixtures::N_DESCRIPTORS - 1].to_vec();
    cands.insert(
        1,
        pb::Candidate {
            id: "nan".into(),
            descriptors: nan,
        },
    );
    cands.push(pb::Candidate {
        id: "inf".into(),
        descriptors: inf,
    });
    cands.push(pb::Candidate {
        id: "short".into(),
        descriptors: short,
    });
    cands.push(pb::Candidate {
        id: String::new(),
        descriptors: good[3].clone(),
    });
    cands.push(pb::Candidate {
        id: "ok0".into(),
        descriptors: good[3].clone(),
    });
    let answer = server
        .client()
        .await
        .score(request("", cands))
        .await
        .expect("score")
        .into_inner();
    let by_id = |i: usize| &answer.results[i];
    let expect_rejected = |i: usize, words: &str| {
        let c = by_id(i);
        assert_eq!(status_of(c), pb::Status::Rejected, "{}", c.id);
        assert!(c.reason.contains(words), "{}: {}", c.id, c.reason);
        assert_eq!(c.prediction, None);
        assert_eq!(c.rank, 0);
        assert!(
            !c.record_id.is_empty(),
            "rejected candidates are recorded too"
        );
    };
    expect_rejected(1, "'d2' (position 2) is NaN");
    expect_rejected(5, "'d0' (position 0) is inf");
    expect_rejected(6, "3 descriptor values given, the model expects 4");
    expect_rejected(7, "empty id");
    expect_rejected(8, "duplicate id 'ok0'");
    let scored: Vec<&pb::ScoredCandidate> = answer
        .results
        .iter()
        .filter(|c| status_of(c) != pb::Status::Rejected)
        .collect();
    assert_eq!(scored.len(), 4);
    let reference = fixtures::reference_scores(&server.bundles.join("model.plumb"), &good, 0.9);
    for (c, want) in scored.iter().zip(&reference) {
        assert_eq!(
            c.prediction.map(f64::to_bits),
            Some(want.prediction.to_bits())
        );
    }
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn reordered_descriptor_names_give_the_same_answers_and_wrong_names_are_listed() {
    let server = server_with(ModelSpec::new("potency", 5), |_| {}).await;
    let rows = fixtures::in_domain_rows(20, 15);
    let mut client = server.client().await;
    let plain = client
        .score(request("", candidates("c", &rows)))
        .await
        .expect("score")
        .into_inner();
    let names = fixtures::descriptor_names();
    let order = [2usize, 0, 3, 1];
    let shuffled_rows: Vec<Vec<f64>> = rows
        .iter()
        .map(|r| order.iter().map(|&j| r[j]).collect())
        .collect();
    let mut req = request("", candidates("c", &shuffled_rows));
    req.descriptor_names = order.iter().map(|&j| names[j].clone()).collect();
    let reordered = client.score(req).await.expect("score").into_inner();
    for (a, b) in plain.results.iter().zip(&reordered.results) {
        assert_eq!(
            a.prediction.map(f64::to_bits),
            b.prediction.map(f64::to_bits)
        );
        assert_eq!(a.lower.map(f64::to_bits), b.lower.map(f64::to_bits));
        assert_eq!((a.status, a.rank), (b.status, b.rank));
        assert_eq!(a.domain, b.domain);
    }

    let mut wrong = request("", candidates("c", &rows));
    wrong.descriptor_names = vec!["d0".into(), "d1".into(), "d2".into(), "logp".into()];
    let err = client.score(wrong).await.expect_err("names must match");
    assert_eq!(err.code(), Code::InvalidArgument);
    assert!(err.message().contains("missing 'd3'"), "{}", err.message());
    assert!(
        err.message().contains("unexpected 'logp'"),
        "{}",
        err.message()
    );
    let violations = err
        .get_details_bad_request()
        .expect("field details")
        .field_violations;
    assert_eq!(violations.len(), 2);
    assert!(violations.iter().all(|v| v.field == "descriptor_names"));
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn request_level_errors_get_their_codes_and_name_what_to_change() {
    let server = server_with(ModelSpec::new("potency", 6), |s| {
        s.server.max_candidates = 50;
        s.server.max_message_bytes = 64 * 1024;
    })
    .await;
    let mut client = server.client().await;
    let rows = fixtures::in_domain_rows(51, 16);

    let err = client
        .score(request("nonexistent", candidates("c", &rows[..2])))
        .await
        .expect_err("unknown model");
    assert_eq!(err.code(), Code::NotFound);
    assert!(err.message().contains("potency"), "{}", err.message());

    let err = client
        .score(request("", candidates("c", &rows)))
        .await
        .expect_err("too many");
    assert_eq!(err.code(), Code::ResourceExhausted);
    assert!(
        err.message().contains("server.max_candidates"),
        "{}",
        err.message()
    );

    let mut bad = request("", candidates("c", &rows[..2]));
    bad.confidence = 0.3;
    let err = client.score(bad).await.expect_err("bad confidence");
    assert_eq!(err.code(), Code::InvalidArgument);
    assert_eq!(
        err.get_details_bad_request()
            .expect("details")
            .field_violations[0]
            .field,
        "confidence"
    );

    // 50 candidates with 300 values each is about 120 kB, over the 64 KiB limit.
    let wide: Vec<pb::Candidate> = (0..50)
        .map(|i| pb::Candidate {
            id: format!("w{i}"),
            descriptors: vec![0.5; 300],
        })
        .collect();
    let err = client
        .score(request("", wide))
        .await
        .expect_err("too large");
    assert_eq!(err.code(), Code::ResourceExhausted, "{err:?}");
    assert!(
        err.message().contains("server.max_message_bytes"),
        "{}",
        err.message()
    );

    // The server still answers after all that.
    let ok = client
        .score(request("", candidates("c", &rows[..3])))
        .await
        .expect("score");
    assert_eq!(ok.into_inner().results.len(), 3);
    server.stop().await.expect("clean stop");
}
