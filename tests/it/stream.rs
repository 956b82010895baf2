//! ScoreStream: every chunk answered in order, ranks within the chunk, the
//! overall ranking on request, and stream-level rules.

use std::collections::HashMap;

use plumbline::pb;
use tokio_stream::StreamExt;
use tonic::Code;

use crate::fixtures::{self, ModelSpec};
use crate::util::TestServer;
use crate::{candidates, request, status_of};

async fn server() -> TestServer {
    TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "model.plumb", &ModelSpec::new("potency", 31));
        },
        |_| {},
    )
    .await
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_chunk_is_answered_in_order_and_the_overall_ranking_covers_the_stream() {
    let server = server().await;
    let mut client = server.client().await;
    let n_chunks = 6;
    let mut chunks = Vec::new();
    let mut all_rows = Vec::new();
    for k in 0..n_chunks {
        let mut rows = fixtures::in_domain_rows(25, 400 + k as u64);
        if k == 2 {
            rows.extend(fixtures::far_rows(2));
        }
        all_rows.extend(rows.clone());
        let mut r = request("", candidates(&format!("k{k}-"), &rows));
        if k > 0 {
            // Later messages may leave the model empty.
            r.model.clear();
        } else {
            r.model = "potency".into();
        }
        chunks.push(r);
    }
    chunks.last_mut().expect("chunks").final_ranking = true;
    let sent = chunks.clone();
    let mut answers = client
        .score_stream(tokio_stream::iter(chunks))
        .await
        .expect("stream")
        .into_inner();
    let mut got = Vec::new();
    while let Some(a) = answers.next().await {
        got.push(a.expect("chunk answer"));
    }
    assert_eq!(got.len(), n_chunks, "one answer per chunk");
    for (answer, req) in got.iter().zip(&sent) {
        let ids: Vec<&str> = answer.results.iter().map(|c| c.id.as_str()).collect();
        let want: Vec<&str> = req.candidates.iter().map(|c| c.id.as_str()).collect();
        assert_eq!(ids, want, "answers in request order");
        // Ranks are within the chunk: 1..=number of SCORED in it.
        let mut ranks: Vec<u32> = answer
            .results
            .iter()
            .map(|c| c.rank)
            .filter(|&r| r > 0)
            .collect();
        ranks.sort_unstable();
        let scored = answer
            .results
            .iter()
            .filter(|c| status_of(c) == pb::Status::Scored)
            .count();
        assert_eq!(ranks, (1..=scored as u32).collect::<Vec<_>>());
    }
    assert!(
        got[..n_chunks - 1]
            .iter()
            .all(|a| a.overall_ranking.is_empty())
    );
    let overall = &got[n_chunks - 1].overall_ranking;

    // The overall ranking is over every SCORED candidate of the stream, by
    // prediction, higher first, the same as scoring them all in one batch.
    let all: Vec<&pb::ScoredCandidate> = got.iter().flat_map(|a| a.results.iter()).collect();
    let scored: Vec<&&pb::ScoredCandidate> = all
        .iter()
        .filter(|c| status_of(c) == pb::Status::Scored)
        .collect();
    assert_eq!(overall.len(), scored.len());
    let prediction: HashMap<&str, f64> = scored
        .iter()
        .map(|c| (c.record_id.as_str(), c.prediction.expect("prediction")))
        .collect();
    for (i, e) in overall.iter().enumerate() {
        assert_eq!(e.rank as usize, i + 1);
        assert_eq!(e.key.to_bits(), prediction[e.record_id.as_str()].to_bits());
    }
    for w in overall.windows(2) {
        assert!(w[0].key >= w[1].key);
    }
    let mut one_batch = request("", candidates("all", &all_rows));
    one_batch.candidates.truncate(all_rows.len());
    let single = client.score(one_batch).await.expect("score").into_inner();
    let single_order: Vec<usize> = {
        let mut v: Vec<(u32, usize)> = single
            .results
            .iter()
            .enumerate()
            .filter(|(_, c)| c.rank > 0)
            .map(|(i, c)| (c.rank, i))
            .collect();
        v.sort_unstable();
        v.into_iter().map(|(_, i)| i).collect()
    };
    let position: HashMap<&str, usize> = all
        .iter()
        .enumerate()
        .map(|(i, c)| (c.record_id.as_str(), i))
        .collect();
    let stream_order: Vec<usize> = overall
        .iter()
        .map(|e| position[e.record_id.as_str()])
        .collect();
    assert_eq!(stream_order, single_order);
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn ids_are_unique_across_the_stream_and_settings_cannot_change_mid_stream() {
    let server = server().await;
    let mut client = server.client().await;
    let rows = fixtures::in_domain_rows(3, 500);
    let first = request("", candidates("a", &rows));
    let repeat = request("", candidates("a", &rows));
    let mut answers = client
        .score_stream(tokio_stream::iter(vec![first, repeat]))
        .await
        .expect("stream")
        .into_inner();
    let _ = answers.next().await.expect("first").expect("answer");
    let second = answers.next().await.expect("second").expect("answer");
    assert!(
        second
            .results
            .iter()
            .all(|c| status_of(c) == pb::Status::Rejected && c.reason.contains("duplicate id"))
    );

    let mut changed = request("", candidates("b", &rows));
    changed.confidence = 0.7;
    let mut answers = client
        .score_stream(tokio_stream::iter(vec![
            request("", candidates("a", &rows)),
            changed,
        ]))
        .await
        .expect("stream")
        .into_inner();
    assert!(answers.next().await.expect("first").is_ok());
    let err = answers
        .next()
        .await
        .expect("second")
        .expect_err("changed confidence");
    assert_eq!(err.code(), Code::InvalidArgument);
    assert!(err.message().contains("confidence"), "{}", err.message());

    let mut answers = client
        .score_stream(tokio_stream::iter(vec![request(
            "nope",
            candidates("a", &rows),
        )]))
        .await
        .expect("stream")
        .into_inner();
    let err = answers
        .next()
        .await
        .expect("answer")
        .expect_err("unknown model");
    assert_eq!(err.code(), Code::NotFound);
    server.stop().await.expect("clean stop");
}
