//! The analysts' command line against the real server: `plumbline cases`
//! lists, shows, settles, groups and exports what the guard flagged, and
//! `plumbline outcomes` records a lab CSV (reporting every row it could not
//! store, and failing) and reports the realised calibration. Each answer is
//! checked against what the services themselves say.

use clap::Parser;
use plumbline::cli::{Cli, Command};
use plumbline::pb;
use plumbline::pb::review_client::ReviewClient;
use plumbline::scoring::OutsidePolicy;
use serde_json::Value;

use crate::fixtures::{self, ModelSpec};
use crate::util::TestServer;
use crate::{candidates, request, status_of};

/// Runs one command line and returns what it printed, or its error.
async fn run(words: &[&str]) -> Result<String, String> {
    let cli = Cli::try_parse_from(std::iter::once("plumbline").chain(words.iter().copied()))
        .map_err(|e| format!("command line: {e}"))?;
    let mut out = Vec::new();
    let done = match &cli.command {
        Command::Cases(args) => plumbline::cli::cases::run_to(args, &mut out).await,
        Command::Outcomes(args) => plumbline::cli::outcomes::run_to(args, &mut out).await,
        other => panic!("not an analysts' command: {other:?}"),
    };
    let printed = String::from_utf8(out).expect("utf-8 output");
    match done {
        Ok(()) => Ok(printed),
        Err(e) => Err(format!("{printed}\n{e:#}")),
    }
}

fn json(text: &str) -> Value {
    serde_json::from_str(text.trim()).unwrap_or_else(|e| panic!("not JSON ({e}): {text}"))
}

async fn start() -> TestServer {
    TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "m.plumb", &ModelSpec::new("m", 11));
        },
        |s| s.policy.outside = OutsidePolicy::Flag,
    )
    .await
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn cases_commands_agree_with_the_review_service() {
    let server = start().await;
    let endpoint = server.endpoint();
    let ep = endpoint.as_str();
    let mut rows = fixtures::in_domain_rows(5, 2);
    rows.extend(fixtures::far_rows(3));
    let answer = server
        .client()
        .await
        .score(request("m", candidates("k", &rows)))
        .await
        .expect("score")
        .into_inner();
    let flagged: Vec<String> = answer
        .results
        .iter()
        .filter(|c| status_of(c) == pb::Status::Flagged)
        .map(|c| c.record_id.clone())
        .collect();
    assert!(flagged.len() >= 3, "far rows are flagged: {flagged:?}");

    // list --json names exactly the flagged records, in order.
    let listed = json(
        &run(&["cases", "list", "--endpoint", ep, "--json"])
            .await
            .unwrap(),
    );
    let ids: Vec<&str> = listed["cases"]
        .as_array()
        .expect("cases")
        .iter()
        .map(|c| c["record_id"].as_str().expect("record id"))
        .collect();
    assert_eq!(ids, flagged.iter().map(String::as_str).collect::<Vec<_>>());
    // Paging through the table form reaches the same records.
    let page = run(&["cases", "list", "--endpoint", ep, "--page-size", "1"])
        .await
        .unwrap();
    assert!(
        page.contains(&flagged[0]) && page.contains("more: --page-token"),
        "{page}"
    );

    // show: the same neighbours the service gives.
    let shown = json(
        &run(&["cases", "show", &flagged[0], "--endpoint", ep, "--json"])
            .await
            .unwrap(),
    );
    let detail = ReviewClient::new(server.channel().await)
        .get_case(pb::GetCaseRequest {
            record_id: flagged[0].clone(),
            neighbours: 0,
        })
        .await
        .expect("get case")
        .into_inner();
    let cli_neighbours: Vec<&str> = shown["neighbours"]
        .as_array()
        .expect("neighbours")
        .iter()
        .map(|n| n["training_id"].as_str().expect("id"))
        .collect();
    let service_neighbours: Vec<&str> = detail
        .neighbours
        .iter()
        .map(|n| n.training_id.as_str())
        .collect();
    assert!(!cli_neighbours.is_empty());
    assert_eq!(cli_neighbours, service_neighbours);

    // settle twice: both decisions kept, newest last.
    for (decision, note) in [
        ("dismiss", "first look"),
        ("accept-for-testing", "second look"),
    ] {
        run(&[
            "cases",
            "settle",
            &flagged[0],
            "--endpoint",
            ep,
            "--analyst",
            "ana",
            "--decision",
            decision,
            "--note",
            note,
        ])
        .await
        .unwrap();
    }
    let shown = json(
        &run(&["cases", "show", &flagged[0], "--endpoint", ep, "--json"])
            .await
            .unwrap(),
    );
    let history = shown["history"].as_array().expect("history");
    assert_eq!(history.len(), 2);
    assert_eq!(history[0]["decision"], "dismiss");
    assert_eq!(history[1]["decision"], "accept_for_testing");
    assert_eq!(history[1]["note"], "second look");
    // The settled case leaves the open list.
    let open = json(
        &run(&[
            "cases",
            "list",
            "--endpoint",
            ep,
            "--state",
            "open",
            "--json",
        ])
        .await
        .unwrap(),
    );
    assert_eq!(
        open["cases"].as_array().expect("cases").len(),
        flagged.len() - 1
    );

    // groups cover every open case once.
    let groups = json(
        &run(&[
            "cases",
            "groups",
            "--endpoint",
            ep,
            "--groups",
            "2",
            "--json",
        ])
        .await
        .unwrap(),
    );
    let mut members: Vec<String> = groups["groups"]
        .as_array()
        .expect("groups")
        .iter()
        .flat_map(|g| g["record_ids"].as_array().expect("ids").clone())
        .map(|v| v.as_str().expect("id").to_string())
        .collect();
    members.sort();
    let mut expected: Vec<String> = flagged[1..].to_vec();
    expected.sort();
    assert_eq!(members, expected);

    // export: a CSV row per case with the header first.
    let dir = tempfile::tempdir().expect("temporary directory");
    let file = dir.path().join("cases.csv");
    let said = run(&[
        "cases",
        "export",
        "--endpoint",
        ep,
        "--out",
        file.to_str().unwrap(),
    ])
    .await
    .unwrap();
    assert!(
        said.contains(&format!("wrote {} cases", flagged.len())),
        "{said}"
    );
    let mut reader = csv::Reader::from_path(&file).expect("exported CSV");
    let exported: Vec<String> = reader
        .records()
        .map(|r| r.expect("row")[0].to_string())
        .collect();
    assert_eq!(exported, flagged);
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn outcomes_record_lists_rows_it_could_not_store_and_report_shows_the_alarms() {
    let server = start().await;
    let endpoint = server.endpoint();
    let ep = endpoint.as_str();
    let rows = fixtures::in_domain_rows(60, 4);
    let answer = server
        .client()
        .await
        .score(request("m", candidates("p", &rows)))
        .await
        .expect("score")
        .into_inner();
    let with_interval: Vec<&pb::ScoredCandidate> = answer
        .results
        .iter()
        .filter(|c| c.upper.is_some() && c.lower.is_some())
        .collect();
    assert!(with_interval.len() >= 50);

    // A plate by record id, far above every interval (the truth moved), with
    // one unknown record id on line 3.
    let dir = tempfile::tempdir().expect("temporary directory");
    let plate = dir.path().join("plate-7.csv");
    let mut text = String::from("record_id,observed\n");
    text.push_str(&format!(
        "{},{}\n",
        with_interval[0].record_id,
        with_interval[0].upper.unwrap() + 50.0
    ));
    text.push_str("0000000000000001-000000,1.0\n");
    for c in &with_interval[1..] {
        text.push_str(&format!("{},{}\n", c.record_id, c.upper.unwrap() + 50.0));
    }
    std::fs::write(&plate, text).expect("write plate");
    let failed = run(&[
        "outcomes",
        "record",
        plate.to_str().unwrap(),
        "--endpoint",
        ep,
    ])
    .await
    .expect_err("a row was not stored");
    assert!(
        failed.contains("line 3") && failed.contains("unknown_record"),
        "{failed}"
    );
    assert!(failed.contains("1 of"), "{failed}");
    assert!(
        failed.contains(&format!(
            "stored {} of {}",
            with_interval.len(),
            with_interval.len() + 1
        )),
        "{failed}"
    );

    // Re-recording one value by candidate id needs --replace.
    let again = dir.path().join("again.csv");
    std::fs::write(
        &again,
        format!("id,observed\n{},{}\n", with_interval[0].id, 2.0),
    )
    .expect("write");
    let kept = run(&[
        "outcomes",
        "record",
        again.to_str().unwrap(),
        "--endpoint",
        ep,
        "--model",
        "m",
        "--json",
    ])
    .await
    .expect_err("already recorded is not stored");
    assert!(kept.contains("already_recorded"), "{kept}");
    let replaced = json(
        &run(&[
            "outcomes",
            "record",
            again.to_str().unwrap(),
            "--endpoint",
            ep,
            "--model",
            "m",
            "--replace",
            "--json",
        ])
        .await
        .unwrap(),
    );
    assert_eq!(replaced["stored"], 1);
    assert_eq!(replaced["rows"][0]["status"], "replaced");

    // A bad number names its line and nothing is sent.
    let bad = dir.path().join("bad.csv");
    std::fs::write(&bad, "record_id,observed\nx,1\ny,abc\n").expect("write");
    let refused = run(&[
        "outcomes",
        "record",
        bad.to_str().unwrap(),
        "--endpoint",
        ep,
    ])
    .await
    .expect_err("bad number");
    assert!(
        refused.contains("line 3") && refused.contains("'abc'"),
        "{refused}"
    );

    let report = json(
        &run(&[
            "outcomes",
            "report",
            "--endpoint",
            ep,
            "--model",
            "m",
            "--json",
        ])
        .await
        .unwrap(),
    );
    assert_eq!(
        report["overall"]["outcomes"].as_u64(),
        Some(with_interval.len() as u64)
    );
    let alarms = report["alarms"].as_array().expect("alarms");
    let firing = |name: &str| {
        alarms
            .iter()
            .find(|a| a["name"] == name)
            .unwrap_or_else(|| panic!("alarm {name}"))["firing"]
            .as_bool()
    };
    assert_eq!(firing("coverage_below_nominal"), Some(true));
    assert_eq!(firing("error_above_claim"), Some(true));
    let table = run(&["outcomes", "report", "--endpoint", ep, "--model", "m"])
        .await
        .unwrap();
    assert!(
        table.contains("coverage_below_nominal") && table.contains("FIRING"),
        "{table}"
    );
    server.stop().await.expect("clean stop");
}
