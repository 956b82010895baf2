//! The Outcomes service through the real server: lab results recorded
//! against the records a Score call returned, every row reported on its
//! own, and the realised calibration with its alarms when the lab's truth
//! has moved away from the model.

use plumbline::pb;
use plumbline::pb::outcomes_client::OutcomesClient;

use crate::fixtures::{self, ModelSpec};
use crate::util::TestServer;
use crate::{candidates, request};

fn by_record(id: &str, observed: f64) -> pb::OutcomeRow {
    pb::OutcomeRow {
        target: Some(pb::outcome_row::Target::RecordId(id.to_string())),
        observed,
    }
}

fn status(r: &pb::OutcomeRowResult) -> pb::OutcomeRowStatus {
    pb::OutcomeRowStatus::try_from(r.status).expect("a known row status")
}

/// The truth has shifted: every value 3 interval widths above the upper
/// bound, so no interval covers and the error is far above the claim.
/// `scored` must all carry both bounds.
pub fn shifted_truth(scored: &[&pb::ScoredCandidate]) -> Vec<pb::OutcomeRow> {
    scored
        .iter()
        .map(|c| {
            let (lo, hi) = (c.lower.expect("lower"), c.upper.expect("upper"));
            by_record(&c.record_id, hi + 3.0 * (hi - lo).abs().max(0.1))
        })
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn outcomes_are_recorded_row_by_row_and_a_shifted_truth_fires_the_alarms() {
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "m.plumb", &ModelSpec::new("m", 7));
        },
        |_| {},
    )
    .await;
    let mut scoring = server.client().await;
    let mut outcomes = OutcomesClient::new(server.channel().await);
    let rows = fixtures::in_domain_rows(120, 3);
    let answer = scoring
        .score(request("m", candidates("c", &rows)))
        .await
        .expect("score")
        .into_inner();
    let scored: Vec<&pb::ScoredCandidate> = answer
        .results
        .iter()
        .filter(|c| c.prediction.is_some() && c.lower.is_some() && c.upper.is_some())
        .collect();
    assert!(scored.len() >= 100, "{} with an interval", scored.len());

    // One by candidate id + model, a duplicate, an unknown id.
    let first = scored[0];
    let got = outcomes
        .record_outcomes(pb::RecordOutcomesRequest {
            rows: vec![
                pb::OutcomeRow {
                    target: Some(pb::outcome_row::Target::Candidate(pb::CandidateRef {
                        candidate_id: first.id.clone(),
                        model: "m".into(),
                    })),
                    observed: 1.0,
                },
                by_record(&first.record_id, 2.0),
                by_record("no-such-record", 3.0),
            ],
            replace: false,
            source: "plate-1.csv".into(),
        })
        .await
        .expect("record")
        .into_inner();
    assert_eq!(got.stored, 1);
    assert_eq!(
        status(&got.results[0]),
        pb::OutcomeRowStatus::OutcomeRecorded
    );
    assert_eq!(got.results[0].record_id, first.record_id);
    assert_eq!(
        status(&got.results[1]),
        pb::OutcomeRowStatus::OutcomeDuplicateInRequest
    );
    assert_eq!(
        status(&got.results[2]),
        pb::OutcomeRowStatus::OutcomeUnknownRecord
    );

    let shifted = shifted_truth(&scored);
    let again = outcomes
        .record_outcomes(pb::RecordOutcomesRequest {
            rows: shifted.clone(),
            replace: false,
            source: "plate-2.csv".into(),
        })
        .await
        .expect("record")
        .into_inner();
    assert_eq!(again.stored as usize, scored.len() - 1);
    assert_eq!(
        status(&again.results[0]),
        pb::OutcomeRowStatus::OutcomeAlreadyRecorded
    );
    assert_eq!(again.results[0].previous, 1.0);
    let replaced = outcomes
        .record_outcomes(pb::RecordOutcomesRequest {
            rows: vec![shifted[0].clone()],
            replace: true,
            source: "plate-2.csv".into(),
        })
        .await
        .expect("replace")
        .into_inner();
    assert_eq!(
        status(&replaced.results[0]),
        pb::OutcomeRowStatus::OutcomeReplaced
    );

    let cal = outcomes
        .calibration(pb::CalibrationRequest {
            model: "m".into(),
            ..Default::default()
        })
        .await
        .expect("calibration")
        .into_inner();
    let overall = cal.overall.expect("overall");
    assert_eq!(overall.outcomes as usize, scored.len());
    let cov = overall.coverage.expect("coverage");
    assert_eq!(cov.covered, 0);
    assert_eq!(cov.intervals as usize, scored.len());
    assert!(cal.claims.iter().any(|c| c.metric == "mse"));
    let alarm = |name: &str| {
        cal.alarms
            .iter()
            .find(|a| a.name == name)
            .unwrap_or_else(|| panic!("alarm {name} missing"))
    };
    assert!(alarm("coverage_below_nominal").firing);
    assert!(alarm("error_above_claim").firing);
    // In-domain queries only: the outside share is not above training.
    assert!(!alarm("outside_share_above_training").firing);
    server.stop().await.expect("clean stop");
}
