//! Integration tests of `plumbline serve`: a real server on 127.0.0.1 with
//! an OS-chosen port, called with the tonic client (and from Python with the
//! official grpcio packages), checked against in-process scoring of the same
//! bundles and against the audit database.

#![allow(clippy::unwrap_used, clippy::expect_used)]

mod access;
mod analysts_cli;
mod audit_trail;
mod bad_input;
mod cli_client;
mod faults;
mod fixtures;
mod metrics;
mod ops;
mod outcomes;
mod python;
mod reload;
mod review;
mod scoring;
mod stream;
mod util;

use plumbline::pb;

pub fn candidates(prefix: &str, rows: &[Vec<f64>]) -> Vec<pb::Candidate> {
    rows.iter()
        .enumerate()
        .map(|(i, r)| pb::Candidate {
            id: format!("{prefix}{i}"),
            descriptors: r.clone(),
        })
        .collect()
}

pub fn request(model: &str, candidates: Vec<pb::Candidate>) -> pb::ScoreRequest {
    pb::ScoreRequest {
        model: model.to_string(),
        confidence: 0.0,
        descriptor_names: Vec::new(),
        candidates,
        batch_label: "integration test".to_string(),
        final_ranking: false,
    }
}

pub fn status_of(c: &pb::ScoredCandidate) -> pb::Status {
    pb::Status::try_from(c.status).expect("a known status")
}
