//! Every candidate of every answered call is in the audit database with the
//! values the answer gave; a failed commit withholds the answer.

use plumbline::audit::{CandidateRecord, CandidateStatus, Method, descriptor_hash};
use plumbline::pb;
use plumbline::service::settings::StoreDescriptors;
use tokio_stream::StreamExt;
use tonic::Code;

use crate::fixtures::{self, ModelSpec};
use crate::util::TestServer;
use crate::{candidates, request, status_of};

fn status_name(s: pb::Status) -> CandidateStatus {
    match s {
        pb::Status::Scored => CandidateStatus::Scored,
        pb::Status::Flagged => CandidateStatus::Flagged,
        pb::Status::Refused => CandidateStatus::Refused,
        pb::Status::Rejected => CandidateStatus::Rejected,
        pb::Status::Unspecified => panic!("unspecified status in an answer"),
    }
}

/// The stored record says what the answer said.
pub(crate) fn assert_matches(rec: &CandidateRecord, c: &pb::ScoredCandidate, confidence: f64) {
    assert_eq!(rec.record_id, c.record_id);
    assert_eq!(rec.candidate_id, c.id);
    assert_eq!(rec.status, status_name(status_of(c)));
    assert_eq!(
        rec.prediction.map(f64::to_bits),
        c.prediction.map(f64::to_bits)
    );
    assert_eq!(rec.lower.map(f64::to_bits), c.lower.map(f64::to_bits));
    assert_eq!(rec.upper.map(f64::to_bits), c.upper.map(f64::to_bits));
    assert_eq!(rec.rank, c.rank);
    assert_eq!(rec.reason, c.reason);
    assert_eq!(rec.confidence, confidence);
    match (&rec.signals, &c.domain) {
        (Some(s), Some(d)) => {
            let verdict = pb::Verdict::try_from(d.verdict).expect("verdict");
            assert_eq!(s.verdict, verdict.as_str_name().to_ascii_lowercase());
            assert_eq!(s.knn_distance.to_bits(), d.knn_distance.to_bits());
            assert_eq!(s.typicality.to_bits(), d.typicality.to_bits());
            assert_eq!(s.leverage.to_bits(), d.leverage.to_bits());
            assert_eq!(s.pca_residual.to_bits(), d.pca_residual.to_bits());
            assert_eq!(s.beyond_z_threshold, d.beyond_z_threshold);
            assert_eq!(s.notes, d.notes);
            assert_eq!(s.out_of_range.len(), d.out_of_range.len());
        }
        (None, None) => {}
        other => panic!("signals stored and answered differ: {other:?}"),
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_candidate_of_every_answered_call_is_recorded_with_matching_values() {
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "model.plumb", &ModelSpec::new("potency", 21));
        },
        |_| {},
    )
    .await;
    let mut client = server.client().await;
    let mut answers: Vec<(pb::ScoreResponse, Vec<pb::Candidate>)> = Vec::new();
    for k in 0..5u64 {
        let mut rows = fixtures::in_domain_rows(30, 100 + k);
        rows.extend(fixtures::far_rows(2));
        let mut cands = candidates(&format!("b{k}-"), &rows);
        cands[3].descriptors[1] = f64::NAN;
        let mut req = request("", cands.clone());
        req.batch_label = format!("plate {k}");
        let answer = client.score(req).await.expect("score").into_inner();
        answers.push((answer, cands));
    }
    // A stream of three chunks is recorded chunk by chunk.
    let chunks: Vec<pb::ScoreRequest> = (0..3u64)
        .map(|k| {
            let mut r = request(
                "",
                candidates(&format!("s{k}-"), &fixtures::in_domain_rows(10, 200 + k)),
            );
            r.final_ranking = k == 2;
            r
        })
        .collect();
    let mut stream = client
        .score_stream(tokio_stream::iter(chunks.clone()))
        .await
        .expect("stream")
        .into_inner();
    let mut stream_answers = Vec::new();
    while let Some(r) = stream.next().await {
        stream_answers.push(r.expect("chunk answer"));
    }
    // After a clean stop everything acknowledged is in the database.
    let mut server = server;
    server.stop_in_place().await.expect("clean stop");
    let db = server.reader();

    for (answer, sent) in &answers {
        let req = db
            .request(&answer.request_id)
            .expect("read")
            .expect("request recorded");
        assert_eq!(req.model_id, answer.model);
        assert_eq!(req.model_version, answer.model_version);
        assert_eq!(req.method, Method::Score);
        assert!(req.batch_label.starts_with("plate "));
        assert!(
            req.peer
                .as_deref()
                .is_some_and(|p| p.starts_with("127.0.0.1:"))
        );
        assert_eq!(req.counts.candidates as usize, answer.results.len());
        let count =
            |s: pb::Status| answer.results.iter().filter(|c| status_of(c) == s).count() as u32;
        assert_eq!(req.counts.scored, count(pb::Status::Scored));
        assert_eq!(req.counts.refused, count(pb::Status::Refused));
        assert_eq!(req.counts.rejected, count(pb::Status::Rejected));
        let stored = db.candidates_of(&answer.request_id).expect("read");
        assert_eq!(stored.len(), answer.results.len());
        for ((rec, c), sent) in stored.iter().zip(&answer.results).zip(sent) {
            assert_matches(rec, c, answer.confidence);
            assert_eq!(
                db.candidate(&c.record_id).expect("read").as_ref(),
                Some(rec)
            );
            // Right-length rows are hashed as sent here (bundle order).
            assert_eq!(rec.descriptor_sha256, descriptor_hash(&sent.descriptors));
            // Default setting: values kept for FLAGGED and REFUSED only.
            let kept = matches!(
                rec.status,
                CandidateStatus::Flagged | CandidateStatus::Refused
            );
            assert_eq!(rec.descriptors.is_some(), kept, "{}", rec.record_id);
            if kept {
                let values = rec.descriptors.as_ref().expect("values");
                let bits: Vec<u64> = values.iter().map(|v| v.to_bits()).collect();
                let sent_bits: Vec<u64> = sent.descriptors.iter().map(|v| v.to_bits()).collect();
                assert_eq!(bits, sent_bits);
            }
        }
    }
    let stream_id = &stream_answers[0].request_id;
    assert_eq!(stream_answers.len(), 3);
    let mut overall = Vec::new();
    for (k, answer) in stream_answers.iter().enumerate() {
        let req = db
            .request(&answer.request_id)
            .expect("read")
            .expect("chunk recorded");
        assert_eq!(req.method, Method::ScoreStream);
        assert_eq!(req.stream_id.as_ref(), Some(stream_id));
        assert_eq!(req.chunk, Some(k as u32));
        let stored = db.candidates_of(&answer.request_id).expect("read");
        for (rec, c) in stored.iter().zip(&answer.results) {
            assert_matches(rec, c, answer.confidence);
        }
        overall.extend(
            answer
                .overall_ranking
                .iter()
                .map(|e| (e.record_id.clone(), e.rank)),
        );
    }
    let stored_ranks: Vec<(String, u32)> = db
        .stream_ranks(stream_id)
        .expect("read")
        .into_iter()
        .map(|r| (r.record_id, r.rank))
        .collect();
    assert!(!stored_ranks.is_empty());
    assert_eq!(stored_ranks, overall);
    let total: usize = answers.iter().map(|(a, _)| a.results.len()).sum::<usize>()
        + stream_answers
            .iter()
            .map(|a| a.results.len())
            .sum::<usize>();
    assert_eq!(db.candidate_count().expect("count") as usize, total);
    assert_eq!(chunks.len(), 3);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn store_descriptors_all_keeps_every_row() {
    let mut server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "model.plumb", &ModelSpec::new("potency", 22));
        },
        |s| s.audit.store_descriptors = StoreDescriptors::All,
    )
    .await;
    let rows = fixtures::in_domain_rows(5, 300);
    let answer = server
        .client()
        .await
        .score(request("", candidates("c", &rows)))
        .await
        .expect("score")
        .into_inner();
    server.stop_in_place().await.expect("clean stop");
    let db = server.reader();
    for (rec, row) in db
        .candidates_of(&answer.request_id)
        .expect("read")
        .iter()
        .zip(&rows)
    {
        assert_eq!(rec.descriptors.as_ref(), Some(row));
    }
}

/// A commit that fails must fail the call: no answer without a record. The
/// failure is real: a trigger makes SQLite abort the insert.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_failed_audit_commit_fails_the_call_with_unavailable() {
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "model.plumb", &ModelSpec::new("potency", 23));
        },
        |_| {},
    )
    .await;
    let mut client = server.client().await;
    let rows = fixtures::in_domain_rows(3, 301);
    let first = client
        .score(request("", candidates("c", &rows)))
        .await
        .expect("score before the failure")
        .into_inner();
    {
        let conn = rusqlite::Connection::open(&server.audit_path).expect("open");
        conn.execute_batch(
            "CREATE TRIGGER refuse_all BEFORE INSERT ON requests
             BEGIN SELECT RAISE(ABORT, 'the disk is full'); END;",
        )
        .expect("trigger");
    }
    let err = client
        .score(request("", candidates("d", &rows)))
        .await
        .expect_err("no answer without a record");
    assert_eq!(err.code(), Code::Unavailable);
    assert!(err.message().contains("audit"), "{}", err.message());
    {
        let conn = rusqlite::Connection::open(&server.audit_path).expect("open");
        conn.execute_batch("DROP TRIGGER refuse_all")
            .expect("drop trigger");
    }
    let again = client
        .score(request("", candidates("e", &rows)))
        .await
        .expect("score after recovery")
        .into_inner();
    let db = server.reader();
    assert!(db.request(&first.request_id).expect("read").is_some());
    assert!(db.request(&again.request_id).expect("read").is_some());
    assert_eq!(
        db.requests().expect("read").len(),
        2,
        "the failed call left nothing"
    );
    server.stop().await.expect("clean stop");
}
