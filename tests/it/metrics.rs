//! The metrics endpoint through the real server: scraped over plain HTTP
//! with a raw request, parsed with an independent parser of the Prometheus
//! text format (the `prometheus-parse` crate), and every counter checked
//! against the calls made and the answers' own statuses and verdicts; the
//! alarm gauges against the Calibration answer after a shifted truth.

use std::collections::HashMap;

use plumbline::pb;
use plumbline::pb::outcomes_client::OutcomesClient;
use prometheus_parse::{Sample, Scrape, Value};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio_stream::StreamExt;

use crate::fixtures::{self, ModelSpec};
use crate::outcomes::shifted_truth;
use crate::util::TestServer;
use crate::{candidates, request, status_of};

const SCORING: &str = "plumbline.v1.Scoring";
const OUTCOMES: &str = "plumbline.v1.Outcomes";

/// `GET /metrics` over a fresh connection, checked for status and content
/// type, parsed.
async fn scrape(server: &TestServer) -> Scrape {
    let addr = server.metrics_addr.expect("metrics are on");
    let mut stream = tokio::net::TcpStream::connect(addr)
        .await
        .expect("connect to the metrics port");
    stream
        .write_all(b"GET /metrics HTTP/1.1\r\nHost: plumbline\r\nConnection: close\r\n\r\n")
        .await
        .expect("send the request");
    let mut raw = String::new();
    stream
        .read_to_string(&mut raw)
        .await
        .expect("read the answer");
    let (head, body) = raw.split_once("\r\n\r\n").expect("headers, then a body");
    assert!(head.starts_with("HTTP/1.1 200"), "{head}");
    assert!(
        head.to_ascii_lowercase()
            .contains("content-type: text/plain; version=0.0.4"),
        "{head}"
    );
    Scrape::parse(body.lines().map(|l| Ok(l.to_string()))).expect("a parsable exposition")
}

fn matches(s: &Sample, name: &str, labels: &[(&str, &str)]) -> bool {
    s.metric == name
        && s.labels.len() == labels.len()
        && labels.iter().all(|(k, v)| s.labels.get(k) == Some(*v))
}

/// The value of one counter or gauge series; 0 when the series does not
/// exist yet (series appear on first use).
fn value(scrape: &Scrape, name: &str, labels: &[(&str, &str)]) -> f64 {
    let found: Vec<&Sample> = scrape
        .samples
        .iter()
        .filter(|s| matches(s, name, labels))
        .collect();
    assert!(found.len() <= 1, "{name} {labels:?} appears twice");
    match found.first().map(|s| &s.value) {
        None => 0.0,
        Some(Value::Counter(v) | Value::Gauge(v) | Value::Untyped(v)) => *v,
        Some(other) => panic!("{name} is not a single value: {other:?}"),
    }
}

/// Observations in one histogram series: its `+Inf` bucket, which must
/// agree with its `_count` line.
fn observations(scrape: &Scrape, name: &str, labels: &[(&str, &str)]) -> f64 {
    let hist = scrape
        .samples
        .iter()
        .find(|s| matches(s, name, labels))
        .unwrap_or_else(|| panic!("no histogram {name} {labels:?}"));
    let Value::Histogram(buckets) = &hist.value else {
        panic!("{name} is not a histogram: {:?}", hist.value)
    };
    let inf = buckets
        .iter()
        .find(|b| b.less_than == f64::INFINITY)
        .expect("a +Inf bucket")
        .count;
    // Cumulative buckets never decrease.
    let mut sorted = buckets.clone();
    sorted.sort_by(|a, b| a.less_than.total_cmp(&b.less_than));
    assert!(
        sorted.windows(2).all(|w| w[0].count <= w[1].count),
        "{name}"
    );
    assert_eq!(
        value(scrape, &format!("{name}_count"), labels),
        inf,
        "{name}"
    );
    inf
}

fn calls(scrape: &Scrape, service: &str, method: &str, code: &str) -> f64 {
    value(
        scrape,
        "plumbline_grpc_calls_total",
        &[("service", service), ("method", method), ("code", code)],
    )
}

fn call_latencies(scrape: &Scrape, service: &str, method: &str) -> f64 {
    observations(
        scrape,
        "plumbline_grpc_call_duration_seconds",
        &[("service", service), ("method", method)],
    )
}

/// Candidates of answers by (status, verdict), named as the metrics name
/// them, counted from the answers themselves.
type Tally = HashMap<(&'static str, &'static str), f64>;

fn tally(answers: &[&pb::ScoreResponse]) -> Tally {
    let mut out = Tally::new();
    for c in answers.iter().flat_map(|a| &a.results) {
        let status = match status_of(c) {
            pb::Status::Scored => "scored",
            pb::Status::Flagged => "flagged",
            pb::Status::Refused => "refused",
            pb::Status::Rejected => "rejected",
            other => panic!("unexpected status {other:?}"),
        };
        let verdict = match c.domain.as_ref().map(|d| pb::Verdict::try_from(d.verdict)) {
            Some(Ok(pb::Verdict::Inside)) => "inside",
            Some(Ok(pb::Verdict::Border)) => "border",
            Some(Ok(pb::Verdict::Outside)) => "outside",
            None => "none",
            other => panic!("unexpected verdict {other:?}"),
        };
        *out.entry((status, verdict)).or_default() += 1.0;
    }
    out
}

const STATUSES: [&str; 4] = ["scored", "flagged", "refused", "rejected"];
const VERDICTS: [&str; 4] = ["inside", "border", "outside", "none"];

/// Every (status, verdict) cell of the model's candidate counter moved by
/// exactly the answers' tally between two scrapes.
fn assert_candidates_moved(before: &Scrape, after: &Scrape, model: &str, expected: &Tally) {
    for status in STATUSES {
        for verdict in VERDICTS {
            let labels = [("model", model), ("status", status), ("verdict", verdict)];
            let moved = value(after, "plumbline_candidates_total", &labels)
                - value(before, "plumbline_candidates_total", &labels);
            let want = expected.get(&(status, verdict)).copied().unwrap_or(0.0);
            assert_eq!(moved, want, "candidates {status}/{verdict}");
        }
    }
}

/// Rows of every kind: in the domain, just past one descriptor's training
/// range (border), far away (outside), and two the service rejects.
fn mixed_request(prefix: &str, seed: u64) -> pb::ScoreRequest {
    let mut rows = fixtures::in_domain_rows(40, seed);
    rows.extend((0..3).map(|i| vec![1.02 + 0.01 * i as f64, 0.0, 0.0, 0.0]));
    rows.extend(fixtures::far_rows(3));
    let mut cands = candidates(prefix, &rows);
    cands.push(pb::Candidate {
        id: format!("{prefix}-nan"),
        descriptors: vec![f64::NAN, 0.0, 0.0, 0.0],
    });
    cands.push(pb::Candidate {
        id: format!("{prefix}-short"),
        descriptors: vec![0.0, 0.0],
    });
    request("m", cands)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn metrics_scraped_over_http_move_with_calls_candidates_and_alarms() {
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "m.plumb", &ModelSpec::new("m", 7));
            std::fs::write(dir.join("broken.plumb"), b"not a bundle").expect("write");
        },
        |s| {
            s.metrics.listen = "127.0.0.1:0".into();
            // Border candidates are flagged, outside ones refused: every
            // status occurs.
            s.policy.rank_border = false;
        },
    )
    .await;
    let mut scoring = server.client().await;
    let mut outcomes = OutcomesClient::new(server.channel().await);

    let start = scrape(&server).await;
    assert_eq!(value(&start, "plumbline_models_loaded", &[]), 1.0);
    assert_eq!(
        value(&start, "plumbline_model_loads_total", &[("model", "m")]),
        1.0
    );
    assert_eq!(
        value(
            &start,
            "plumbline_model_load_failures_total",
            &[("file", "broken.plumb")]
        ),
        1.0
    );
    assert_eq!(value(&start, "plumbline_audit_queue_depth", &[]), 0.0);
    assert_eq!(calls(&start, SCORING, "Score", "OK"), 0.0);
    let commits_at_start = observations(&start, "plumbline_audit_commit_duration_seconds", &[]);
    assert_eq!(commits_at_start, 0.0);

    // Round one: a mixed batch, a failing call of each of two methods, and
    // a listing.
    let first = scoring
        .score(mixed_request("a", 3))
        .await
        .expect("score")
        .into_inner();
    let unknown = scoring
        .score(request("no-such-model", candidates("x", &[vec![0.0; 4]])))
        .await
        .expect_err("unknown model");
    assert_eq!(unknown.code(), tonic::Code::NotFound);
    let unknown = scoring
        .describe_model(pb::DescribeModelRequest {
            model: "no-such-model".into(),
        })
        .await
        .expect_err("unknown model");
    assert_eq!(unknown.code(), tonic::Code::NotFound);
    scoring
        .list_models(pb::ListModelsRequest {})
        .await
        .expect("list");

    let one = scrape(&server).await;
    assert_eq!(calls(&one, SCORING, "Score", "OK"), 1.0);
    assert_eq!(calls(&one, SCORING, "Score", "NOT_FOUND"), 1.0);
    assert_eq!(calls(&one, SCORING, "DescribeModel", "NOT_FOUND"), 1.0);
    assert_eq!(calls(&one, SCORING, "DescribeModel", "OK"), 0.0);
    assert_eq!(calls(&one, SCORING, "ListModels", "OK"), 1.0);
    assert_eq!(call_latencies(&one, SCORING, "Score"), 2.0);
    assert_eq!(call_latencies(&one, SCORING, "ListModels"), 1.0);
    let first_tally = tally(&[&first]);
    for status in STATUSES {
        assert!(
            first_tally.keys().any(|(s, _)| *s == status),
            "the mixed batch has no {status} candidate: {first_tally:?}"
        );
    }
    assert_candidates_moved(&start, &one, "m", &first_tally);
    let total: f64 = first_tally.values().sum();
    assert_eq!(total, first.results.len() as f64);
    // One answer committed, alone in its transaction; nothing failed.
    assert_eq!(
        observations(&one, "plumbline_audit_commit_duration_seconds", &[]),
        1.0
    );
    assert_eq!(
        value(&one, "plumbline_audit_commit_failures_total", &[]),
        0.0
    );

    // The shifted truth of the outcomes test, recorded against every
    // candidate with an interval: the alarms fire and the gauges say so.
    let with_interval: Vec<&pb::ScoredCandidate> = first
        .results
        .iter()
        .filter(|c| c.prediction.is_some() && c.lower.is_some() && c.upper.is_some())
        .collect();
    assert!(with_interval.len() >= 30, "{}", with_interval.len());
    let recorded = outcomes
        .record_outcomes(pb::RecordOutcomesRequest {
            rows: shifted_truth(&with_interval),
            replace: false,
            source: "plate-1.csv".into(),
        })
        .await
        .expect("record")
        .into_inner();
    assert_eq!(recorded.stored as usize, with_interval.len());
    let two = scrape(&server).await;
    assert_eq!(calls(&two, OUTCOMES, "RecordOutcomes", "OK"), 1.0);
    for alarm in ["coverage_below_nominal", "error_above_claim"] {
        assert_eq!(
            value(
                &two,
                "plumbline_alarm_firing",
                &[("model", "m"), ("alarm", alarm)]
            ),
            1.0,
            "{alarm}"
        );
    }
    assert_eq!(
        value(&two, "plumbline_realised_coverage", &[("model", "m")]),
        0.0
    );
    // The gauges say what Calibration says, alarm by alarm.
    let cal = outcomes
        .calibration(pb::CalibrationRequest {
            model: "m".into(),
            ..Default::default()
        })
        .await
        .expect("calibration")
        .into_inner();
    assert_eq!(cal.alarms.len(), 3);
    let three = scrape(&server).await;
    for a in &cal.alarms {
        let labels = [("model", "m"), ("alarm", a.name.as_str())];
        let gauge = value(&three, "plumbline_alarm_firing", &labels);
        assert_eq!(gauge, f64::from(u8::from(a.firing)), "{}", a.name);
    }
    let rate = cal
        .overall
        .and_then(|o| o.coverage)
        .and_then(|c| c.rate)
        .expect("coverage rate");
    assert_eq!(
        value(&three, "plumbline_realised_coverage", &[("model", "m")]),
        rate.value
    );
    assert_eq!(calls(&three, OUTCOMES, "Calibration", "OK"), 1.0);

    // Round two: another batch and a stream of two chunks; everything grows
    // by exactly what was sent.
    let second = scoring
        .score(mixed_request("b", 11))
        .await
        .expect("score")
        .into_inner();
    let mut chunks = vec![mixed_request("s0-", 12), mixed_request("s1-", 13)];
    chunks[1].model.clear();
    let mut answers = scoring
        .score_stream(tokio_stream::iter(chunks))
        .await
        .expect("stream")
        .into_inner();
    let mut streamed = Vec::new();
    while let Some(a) = answers.next().await {
        streamed.push(a.expect("chunk answer"));
    }
    assert_eq!(streamed.len(), 2);

    let four = scrape(&server).await;
    assert_eq!(calls(&four, SCORING, "Score", "OK"), 2.0);
    assert_eq!(calls(&four, SCORING, "Score", "NOT_FOUND"), 1.0);
    assert_eq!(calls(&four, SCORING, "ScoreStream", "OK"), 1.0);
    assert_eq!(call_latencies(&four, SCORING, "Score"), 3.0);
    assert_eq!(call_latencies(&four, SCORING, "ScoreStream"), 1.0);
    let later = tally(&[&second, &streamed[0], &streamed[1]]);
    assert_candidates_moved(&three, &four, "m", &later);
    // Four answers committed one after another: four transactions.
    assert_eq!(
        observations(&four, "plumbline_audit_commit_duration_seconds", &[]),
        4.0
    );
    assert_eq!(value(&four, "plumbline_models_loaded", &[]), 1.0);

    let metrics_addr = server.metrics_addr.expect("metrics are on");
    server.stop().await.expect("clean stop");
    // The endpoint stops with the server.
    assert!(tokio::net::TcpStream::connect(metrics_addr).await.is_err());
}
