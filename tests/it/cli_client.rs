//! `plumbline score`: CSV in, CSV out, columns found by name.

use plumbline::pb;

use crate::fixtures::{self, ModelSpec};
use crate::util::TestServer;
use crate::{candidates, request, status_of};

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_score_client_writes_one_row_per_candidate_with_overall_ranks() {
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "m.plumb", &ModelSpec::new("potency", 51));
        },
        |_| {},
    )
    .await;
    // More rows than one stream chunk, columns out of order, an extra column.
    let mut rows = fixtures::in_domain_rows(1_203, 900);
    rows.extend(fixtures::far_rows(2));
    let input = server.dir.path().join("candidates.csv");
    let mut w = csv::Writer::from_path(&input).expect("csv");
    w.write_record(["note", "d3", "compound", "d1", "d0", "d2"])
        .expect("header");
    for (i, r) in rows.iter().enumerate() {
        // Row 5 has an empty d2 cell.
        let d2 = if i == 5 {
            String::new()
        } else {
            r[2].to_string()
        };
        w.write_record([
            "x".to_string(),
            r[3].to_string(),
            format!("cpd{i}"),
            r[1].to_string(),
            r[0].to_string(),
            d2,
        ])
        .expect("row");
    }
    w.flush().expect("flush");
    drop(w);
    let output = server.dir.path().join("scores.csv");
    plumbline::service::score_client(
        &server.endpoint(),
        &input,
        &output,
        "",
        Some(0.8),
        "compound",
    )
    .await
    .expect("score client");

    let mut reader = csv::Reader::from_path(&output).expect("output");
    let header: Vec<String> = reader
        .headers()
        .expect("header")
        .iter()
        .map(String::from)
        .collect();
    assert_eq!(
        header,
        [
            "id",
            "prediction",
            "lower",
            "upper",
            "verdict",
            "typicality",
            "rank",
            "status",
            "record_id"
        ]
    );
    let out: Vec<csv::StringRecord> = reader.records().map(|r| r.expect("record")).collect();
    assert_eq!(out.len(), rows.len());
    assert_eq!(
        &out[5][7], "rejected",
        "an empty cell is sent as NaN and rejected"
    );
    assert_eq!(&out[rows.len() - 1][7], "refused");

    // Compare with the same rows scored in one unary call.
    let mut client = server.client().await;
    let mut req = request("", candidates("cpd", &rows));
    req.confidence = 0.8;
    req.candidates[5].descriptors[2] = f64::NAN;
    let answer = client.score(req).await.expect("score").into_inner();
    let mut ranks_seen = Vec::new();
    for (rec, c) in out.iter().zip(&answer.results) {
        assert_eq!(&rec[0], c.id);
        let num = |v: Option<f64>| v.map(|x| format!("{x:?}")).unwrap_or_default();
        assert_eq!(&rec[1], num(c.prediction), "{}", c.id);
        assert_eq!(&rec[2], num(c.lower));
        assert_eq!(&rec[3], num(c.upper));
        assert_eq!(rec[7].to_ascii_uppercase(), status_of(c).as_str_name());
        // One batch and the overall ranking of the stream agree.
        let rank = if c.rank == 0 {
            String::new()
        } else {
            c.rank.to_string()
        };
        assert_eq!(&rec[6], rank, "{}", c.id);
        if !rank.is_empty() {
            ranks_seen.push(c.rank);
        }
        assert!(!rec[8].is_empty());
    }
    assert_eq!(
        ranks_seen.len(),
        answer
            .results
            .iter()
            .filter(|c| status_of(c) == pb::Status::Scored)
            .count()
    );
    server.stop().await.expect("clean stop");
}

/// `plumbline predict` on the bundle file and `plumbline score` through the
/// server give the same file, column for column and bit for bit.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn server_answers_equal_plumbline_predict_to_the_last_bit() {
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "m.plumb", &ModelSpec::new("potency", 52));
        },
        |_| {},
    )
    .await;
    let mut rows = fixtures::in_domain_rows(300, 901);
    rows.extend(fixtures::far_rows(3));
    let input = server.dir.path().join("candidates.csv");
    let mut w = csv::Writer::from_path(&input).expect("csv");
    w.write_record(["d2", "compound", "d0", "d3", "d1"])
        .expect("header");
    for (i, r) in rows.iter().enumerate() {
        w.write_record([
            format!("{:?}", r[2]),
            format!("cpd{i}"),
            format!("{:?}", r[0]),
            format!("{:?}", r[3]),
            format!("{:?}", r[1]),
        ])
        .expect("row");
    }
    w.flush().expect("flush");
    drop(w);
    let offline = server.dir.path().join("predict.csv");
    let bundle = server.bundles.join("m.plumb");
    let args: Vec<String> = [
        "plumbline",
        "predict",
        "--bundle",
        &bundle.to_string_lossy(),
        "--data",
        &input.to_string_lossy(),
        "--out",
        &offline.to_string_lossy(),
        "--id",
        "compound",
        "--confidence",
        "0.85",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    tokio::task::spawn_blocking(move || {
        use clap::Parser;
        plumbline::cli::run(plumbline::cli::Cli::parse_from(args))
    })
    .await
    .expect("task")
    .expect("plumbline predict");
    let served = server.dir.path().join("score.csv");
    plumbline::service::score_client(
        &server.endpoint(),
        &input,
        &served,
        "potency",
        Some(0.85),
        "compound",
    )
    .await
    .expect("plumbline score");

    let read = |p: &std::path::Path| -> Vec<csv::StringRecord> {
        csv::Reader::from_path(p)
            .expect("csv")
            .records()
            .map(|r| r.expect("record"))
            .collect()
    };
    let a = read(&offline);
    let b = read(&served);
    assert_eq!(a.len(), rows.len());
    assert_eq!(b.len(), rows.len());
    let mut refused = 0;
    for (x, y) in a.iter().zip(&b) {
        // id, prediction, lower, upper, verdict, typicality, rank.
        for col in 0..7 {
            assert_eq!(&x[col], &y[col], "column {col} of {}", &x[0]);
        }
        if &y[7] == "refused" {
            refused += 1;
        }
    }
    assert_eq!(refused, 3, "the far rows are refused by both");
    server.stop().await.expect("clean stop");
}
