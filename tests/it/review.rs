//! The analysts' review queue through the real server: flagged and refused
//! candidates become cases whose nearest training rows match a brute-force
//! search over the training rows; decisions keep their history; groups are
//! stable under a seed and separate planted families; a database written by
//! the schema before the cases migration upgrades in place keeping its rows.

use ndarray::Array2;
use plumbline::audit::{self, CandidateStatus, MIGRATIONS};
use plumbline::pb;
use plumbline::pb::review_client::ReviewClient;
use plumbline::scoring::OutsidePolicy;
use tokio_stream::StreamExt;
use tonic::Code;
use tonic::transport::Channel;

use crate::fixtures::{self, ModelSpec};
use crate::util::TestServer;
use crate::{candidates, request, status_of};

async fn review(server: &TestServer) -> ReviewClient<Channel> {
    ReviewClient::new(server.channel().await)
}

async fn start(spec: &ModelSpec, outside: OutsidePolicy) -> TestServer {
    let spec = spec.clone();
    TestServer::start(
        fixtures::loader(),
        move |dir| {
            fixtures::write_bundle(dir, "m.plumb", &spec);
        },
        move |s| s.policy.outside = outside,
    )
    .await
}

async fn all_cases(
    client: &mut ReviewClient<Channel>,
    filter: pb::CaseFilter,
) -> Vec<pb::CaseSummary> {
    let mut out = Vec::new();
    let mut token = String::new();
    loop {
        let page = client
            .list_cases(pb::ListCasesRequest {
                filter: Some(filter.clone()),
                page_size: 2,
                page_token: token.clone(),
            })
            .await
            .expect("list cases")
            .into_inner();
        assert!(page.cases.len() <= 2);
        out.extend(page.cases);
        if page.next_page_token.is_empty() {
            return out;
        }
        token = page.next_page_token;
    }
}

/// Rows between the training range and far away, so neighbours differ.
fn odd_rows() -> Vec<Vec<f64>> {
    vec![
        vec![2.5, -0.3, 0.1, 0.4],
        vec![-0.2, 3.0, -2.0, 0.0],
        vec![6.0, 6.0, -6.0, 1.0],
        vec![0.1, 0.2, 0.3, 4.5],
    ]
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn flagged_candidates_are_cases_with_nearest_training_rows_from_brute_force() {
    let spec = ModelSpec::new("potency", 31);
    let server = start(&spec, OutsidePolicy::Flag).await;
    let mut scoring = server.client().await;
    let mut rows = fixtures::in_domain_rows(6, 5);
    rows.extend(odd_rows());
    rows.extend(fixtures::far_rows(2));
    let answer = scoring
        .score(request("potency", candidates("q", &rows)))
        .await
        .expect("score")
        .into_inner();
    let expected: Vec<&pb::ScoredCandidate> = answer
        .results
        .iter()
        .filter(|c| matches!(status_of(c), pb::Status::Flagged | pb::Status::Refused))
        .collect();
    assert!(expected.len() >= 4, "too few flagged: {}", expected.len());

    let mut client = review(&server).await;
    let listed = all_cases(&mut client, pb::CaseFilter::default()).await;
    let listed_ids: Vec<&str> = listed.iter().map(|c| c.record_id.as_str()).collect();
    let expected_ids: Vec<&str> = expected.iter().map(|c| c.record_id.as_str()).collect();
    assert_eq!(
        listed_ids, expected_ids,
        "cases are the flagged candidates, in order"
    );

    // Brute force, independent of the k-d tree: every training row through
    // the bundle's standardisation and PCA, then all distances sorted.
    let bundle = plumbline::bundle::read(&server.bundles.join("m.plumb")).expect("bundle");
    let table = fixtures::training_table(&spec);
    let sm = &bundle.model;
    let train_scores = sm
        .domain
        .pca()
        .scores(sm.standardizer.transform(table.x.view()).view());
    let y = table.y.as_ref().expect("training y");
    for c in &expected {
        let detail = client
            .get_case(pb::GetCaseRequest {
                record_id: c.record_id.clone(),
                neighbours: 5,
            })
            .await
            .expect("get case")
            .into_inner();
        let summary = detail.summary.as_ref().expect("summary");
        assert_eq!(summary.candidate_id, c.id);
        assert_eq!(
            summary.prediction.map(f64::to_bits),
            c.prediction.map(f64::to_bits)
        );
        assert_eq!(summary.state, pb::CaseState::CaseOpen as i32);
        let position: usize = c.id[1..].parse().expect("index in the id");
        assert_eq!(detail.descriptors, rows[position]);
        assert_eq!(
            detail.domain.as_ref().map(|d| d.verdict),
            c.domain.as_ref().map(|d| d.verdict)
        );
        assert_eq!(
            detail.domain.as_ref().map(|d| d.out_of_range.len()),
            c.domain.as_ref().map(|d| d.out_of_range.len())
        );

        let q = Array2::from_shape_vec((1, 4), rows[position].clone()).expect("row");
        let qs = sm
            .domain
            .pca()
            .scores(sm.standardizer.transform(q.view()).view());
        let mut brute: Vec<(usize, f64)> = train_scores
            .rows()
            .into_iter()
            .enumerate()
            .map(|(i, r)| {
                let d2: f64 = r
                    .iter()
                    .zip(qs.row(0))
                    .map(|(a, b)| (a - b) * (a - b))
                    .sum();
                (i, d2.sqrt())
            })
            .collect();
        brute.sort_by(|a, b| a.1.total_cmp(&b.1));
        assert_eq!(detail.neighbours.len(), 5);
        for (got, want) in detail.neighbours.iter().zip(&brute) {
            assert_eq!(got.training_row as usize, want.0, "case {}", c.id);
            assert_eq!(got.training_id, table.ids[want.0]);
            assert!((got.distance - want.1).abs() <= 1e-9 * want.1.max(1.0));
            assert_eq!(got.observed, y[want.0]);
        }
    }

    // Filters narrow the list.
    let flagged_outside = all_cases(
        &mut client,
        pb::CaseFilter {
            verdict: pb::Verdict::Outside as i32,
            ..Default::default()
        },
    )
    .await;
    let n_outside = expected
        .iter()
        .filter(|c| c.domain.as_ref().map(|d| d.verdict) == Some(pb::Verdict::Outside as i32))
        .count();
    assert_eq!(flagged_outside.len(), n_outside);
    let other_label = all_cases(
        &mut client,
        pb::CaseFilter {
            batch_label: "another batch".into(),
            ..Default::default()
        },
    )
    .await;
    assert!(other_label.is_empty());
    let later = all_cases(
        &mut client,
        pb::CaseFilter {
            from_time_us: summary_time(&listed) + 1,
            ..Default::default()
        },
    )
    .await;
    assert!(later.is_empty());

    // Export streams the same cases, with their descriptors.
    let mut stream = client
        .export_cases(pb::ExportCasesRequest { filter: None })
        .await
        .expect("export")
        .into_inner();
    let mut exported = Vec::new();
    while let Some(row) = stream.next().await {
        exported.push(row.expect("row"));
    }
    assert_eq!(exported.len(), expected.len());
    for (e, c) in exported.iter().zip(&expected) {
        assert_eq!(e.record_id, c.record_id);
        let position: usize = c.id[1..].parse().expect("index");
        assert_eq!(e.descriptors, rows[position]);
    }
    server.stop().await.expect("clean stop");
}

fn summary_time(cases: &[pb::CaseSummary]) -> i64 {
    cases.iter().map(|c| c.time_us).max().unwrap_or(0)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn settling_keeps_every_decision_in_order() {
    let server = start(&ModelSpec::new("potency", 32), OutsidePolicy::Refuse).await;
    let mut scoring = server.client().await;
    let mut rows = fixtures::in_domain_rows(2, 9);
    rows.extend(fixtures::far_rows(2));
    let answer = scoring
        .score(request("potency", candidates("s", &rows)))
        .await
        .expect("score")
        .into_inner();
    let refused: Vec<&pb::ScoredCandidate> = answer
        .results
        .iter()
        .filter(|c| status_of(c) == pb::Status::Refused)
        .collect();
    assert_eq!(refused.len(), 2);
    let scored = answer
        .results
        .iter()
        .find(|c| status_of(c) == pb::Status::Scored)
        .expect("an in-domain candidate");
    let id = refused[0].record_id.clone();
    let mut client = review(&server).await;

    let steps = [
        (pb::Decision::Dismiss, "ana", "looks like a salt form"),
        (
            pb::Decision::NeedsNewData,
            "ben",
            "no analogues in training",
        ),
        (pb::Decision::AcceptForTesting, "ana", "worth one assay"),
    ];
    for (i, (decision, analyst, note)) in steps.iter().enumerate() {
        let settled = client
            .settle_case(pb::SettleCaseRequest {
                record_id: id.clone(),
                analyst: analyst.to_string(),
                decision: *decision as i32,
                note: note.to_string(),
            })
            .await
            .expect("settle")
            .into_inner();
        assert_eq!(settled.history.len(), i + 1);
        let s = settled.summary.expect("summary");
        assert_eq!(s.decision, *decision as i32);
        assert_eq!(s.revisions as usize, i + 1);
    }
    let detail = client
        .get_case(pb::GetCaseRequest {
            record_id: id.clone(),
            neighbours: 0,
        })
        .await
        .expect("get")
        .into_inner();
    let got: Vec<(i32, &str, &str)> = detail
        .history
        .iter()
        .map(|h| (h.decision, h.analyst.as_str(), h.note.as_str()))
        .collect();
    let want: Vec<(i32, &str, &str)> = steps.iter().map(|(d, a, n)| (*d as i32, *a, *n)).collect();
    assert_eq!(got, want);
    assert!(
        detail
            .history
            .windows(2)
            .all(|w| w[0].sequence < w[1].sequence)
    );
    assert!(
        detail
            .summary
            .as_ref()
            .is_some_and(|s| s.prediction.is_none()),
        "refused: none"
    );

    let open = all_cases(
        &mut client,
        pb::CaseFilter {
            state: pb::CaseState::CaseOpen as i32,
            ..Default::default()
        },
    )
    .await;
    assert_eq!(
        open.iter().map(|c| &c.record_id).collect::<Vec<_>>(),
        vec![&refused[1].record_id]
    );
    let dismissed = all_cases(
        &mut client,
        pb::CaseFilter {
            decision: pb::Decision::Dismiss as i32,
            ..Default::default()
        },
    )
    .await;
    assert!(dismissed.is_empty(), "the filter is on the latest decision");
    let accepted = all_cases(
        &mut client,
        pb::CaseFilter {
            decision: pb::Decision::AcceptForTesting as i32,
            ..Default::default()
        },
    )
    .await;
    assert_eq!(accepted.len(), 1);

    // Not a case, unknown, no decision, no analyst.
    let err = client
        .settle_case(pb::SettleCaseRequest {
            record_id: scored.record_id.clone(),
            analyst: "ana".into(),
            decision: pb::Decision::Dismiss as i32,
            note: String::new(),
        })
        .await
        .expect_err("a scored candidate is not a case");
    assert_eq!(err.code(), Code::InvalidArgument, "{err:?}");
    let err = client
        .get_case(pb::GetCaseRequest {
            record_id: "no-such-record".into(),
            neighbours: 0,
        })
        .await
        .expect_err("unknown");
    assert_eq!(err.code(), Code::NotFound);
    for (decision, analyst) in [
        (pb::Decision::Unspecified, "ana"),
        (pb::Decision::Dismiss, " "),
    ] {
        let err = client
            .settle_case(pb::SettleCaseRequest {
                record_id: id.clone(),
                analyst: analyst.into(),
                decision: decision as i32,
                note: String::new(),
            })
            .await
            .expect_err("incomplete settlement");
        assert_eq!(err.code(), Code::InvalidArgument);
    }
    // The history cannot be rewritten, even from outside the service.
    let conn = rusqlite::Connection::open(&server.audit_path).expect("open the store");
    for sql in [
        "UPDATE case_history SET note = 'edited'",
        "DELETE FROM case_history",
    ] {
        let err = conn.execute(sql, []).expect_err("append-only");
        assert!(err.to_string().contains("append-only"), "{err}");
    }
    drop(conn);
    server.stop().await.expect("clean stop");
}

/// Rows of one family: a centre plus a small seeded spread.
fn family(centre: f64, n: usize, seed: u64) -> Vec<Vec<f64>> {
    use rand::{Rng, SeedableRng};
    let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(seed);
    (0..n)
        .map(|_| (0..4).map(|_| centre + rng.gen_range(-0.2..0.2)).collect())
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn groups_separate_two_planted_families_and_repeat_under_a_seed() {
    let server = start(&ModelSpec::new("potency", 33), OutsidePolicy::Refuse).await;
    let mut scoring = server.client().await;
    let mut rows = family(4.0, 7, 1);
    rows.extend(family(-4.0, 5, 2));
    let answer = scoring
        .score(request("potency", candidates("g", &rows)))
        .await
        .expect("score")
        .into_inner();
    assert!(
        answer
            .results
            .iter()
            .all(|c| status_of(c) == pb::Status::Refused)
    );
    let family_of = |record_id: &str| {
        let c = answer
            .results
            .iter()
            .find(|c| c.record_id == record_id)
            .expect("a member is a candidate");
        let i: usize = c.id[1..].parse().expect("index");
        usize::from(i >= 7)
    };
    let mut client = review(&server).await;
    let ask = pb::GroupCasesRequest {
        model: "potency".into(),
        groups: 2,
        seed: 17,
        filter: None,
    };
    let first = client
        .group_cases(ask.clone())
        .await
        .expect("group")
        .into_inner();
    let again = client.group_cases(ask).await.expect("group").into_inner();
    assert_eq!(first, again, "a fixed seed gives the same groups");
    assert_eq!(first.groups.len(), 2);
    assert_eq!(first.skipped, 0);
    assert_eq!(
        first.groups.iter().map(|g| g.size).collect::<Vec<_>>(),
        vec![7, 5]
    );
    for (g, want) in first.groups.iter().zip([0usize, 1]) {
        assert_eq!(g.record_ids.len(), g.size as usize);
        assert!(
            g.record_ids.iter().all(|r| family_of(r) == want),
            "group {}",
            g.group
        );
        assert!(g.centre_distance.is_finite() && g.centre_distance > 0.0);
    }

    // Settled cases leave the grouping.
    let member = first.groups[1].record_ids[0].clone();
    client
        .settle_case(pb::SettleCaseRequest {
            record_id: member.clone(),
            analyst: "ana".into(),
            decision: pb::Decision::Dismiss as i32,
            note: String::new(),
        })
        .await
        .expect("settle");
    let after = client
        .group_cases(pb::GroupCasesRequest {
            model: String::new(),
            groups: 2,
            seed: 17,
            filter: None,
        })
        .await
        .expect("group")
        .into_inner();
    let members: usize = after.groups.iter().map(|g| g.size as usize).sum();
    assert_eq!(members, 11);
    assert!(after.groups.iter().all(|g| !g.record_ids.contains(&member)));
    server.stop().await.expect("clean stop");
}

fn old_entry(request_id: &str, time_us: i64, statuses: &[CandidateStatus]) -> audit::Entry {
    let far = fixtures::far_rows(statuses.len());
    let candidates = statuses
        .iter()
        .enumerate()
        .map(|(i, status)| {
            let kept = *status != CandidateStatus::Scored;
            audit::CandidateRecord {
                record_id: audit::record_id(request_id, i),
                request_id: request_id.to_string(),
                position: i as u32,
                candidate_id: format!("old{i}"),
                status: *status,
                prediction: (*status != CandidateStatus::Refused).then_some(1.5 + i as f64),
                lower: None,
                upper: None,
                confidence: 0.9,
                calibration: None,
                signals: Some(audit::SignalsRecord {
                    verdict: if kept { "outside" } else { "inside" }.to_string(),
                    knn_distance: 3.0,
                    typicality: 0.01,
                    beyond_z_threshold: kept,
                    leverage: 0.2,
                    pca_residual: 0.1,
                    out_of_range: Vec::new(),
                    notes: vec!["written before cases existed".into()],
                }),
                rank: 0,
                reason: String::new(),
                descriptor_sha256: audit::descriptor_hash(&far[i]),
                descriptors: kept.then(|| far[i].clone()),
            }
        })
        .collect();
    audit::Entry {
        request: audit::RequestRecord {
            request_id: request_id.to_string(),
            time_us,
            method: audit::Method::Score,
            peer: None,
            identity: None,
            model_id: "potency".into(),
            model_version: "old".into(),
            batch_label: "before the upgrade".into(),
            confidence: 0.9,
            stream_id: None,
            chunk: None,
            counts: audit::Counts {
                candidates: statuses.len() as u32,
                ..Default::default()
            },
        },
        candidates,
        stream_ranks: Vec::new(),
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_database_from_before_the_cases_migration_upgrades_keeping_every_row() {
    // A store with only the first schema step, written through the same
    // write path the previous build used.
    let old = tempfile::tempdir().expect("temporary directory");
    let db = old.path().join("audit.db");
    let entries = [
        old_entry(
            "0000000000000001",
            1_000,
            &[CandidateStatus::Scored, CandidateStatus::Flagged],
        ),
        old_entry(
            "0000000000000002",
            2_000,
            &[CandidateStatus::Refused, CandidateStatus::Refused],
        ),
    ];
    {
        let mut conn = rusqlite::Connection::open(&db).expect("create the old store");
        conn.execute_batch(MIGRATIONS[0].sql).expect("first schema");
        conn.pragma_update(None, "user_version", 1)
            .expect("version 1");
        // Today's write path also appends each request's candidate-id
        // digest (schema step 6): give it the table for the write, then
        // take it away again, so the store is exactly version 1.
        conn.execute_batch(audit::lookup::MIGRATION_SQL)
            .expect("digest table for the write");
        let tx = conn.transaction().expect("transaction");
        let refs: Vec<&audit::Entry> = entries.iter().collect();
        audit::sqlite::write_entries(&tx, &refs).expect("write old rows");
        tx.commit().expect("commit");
        conn.execute_batch("DROP TABLE candidate_digests")
            .expect("back to version 1");
    }
    let before = audit::AuditReader::open(&db).expect("reader");
    assert_eq!(before.schema_version().expect("version"), 1);
    let requests_before = before.requests().expect("requests");
    let mut candidates_before = Vec::new();
    for r in &requests_before {
        candidates_before.extend(before.candidates_of(&r.request_id).expect("candidates"));
    }
    drop(before);

    let path = db.clone();
    let server = TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "m.plumb", &ModelSpec::new("potency", 34));
        },
        move |s| s.audit.path = path,
    )
    .await;
    let mut client = review(&server).await;
    let listed = all_cases(&mut client, pb::CaseFilter::default()).await;
    let after = audit::AuditReader::open(&db).expect("reader");
    assert_eq!(
        after.schema_version().expect("version"),
        MIGRATIONS.len() as i64
    );
    assert_eq!(after.requests().expect("requests"), requests_before);
    let mut candidates_after = Vec::new();
    for r in &requests_before {
        candidates_after.extend(after.candidates_of(&r.request_id).expect("candidates"));
    }
    assert_eq!(candidates_after, candidates_before);
    let ids: Vec<String> = listed.iter().map(|c| c.record_id.clone()).collect();
    assert_eq!(
        ids,
        vec![
            audit::record_id("0000000000000001", 1),
            audit::record_id("0000000000000002", 0),
            audit::record_id("0000000000000002", 1),
        ]
    );
    // Old cases can be settled and inspected like new ones.
    client
        .settle_case(pb::SettleCaseRequest {
            record_id: ids[0].clone(),
            analyst: "ana".into(),
            decision: pb::Decision::NeedsNewData as i32,
            note: "from the old store".into(),
        })
        .await
        .expect("settle an old case");
    let detail = client
        .get_case(pb::GetCaseRequest {
            record_id: ids[0].clone(),
            neighbours: 3,
        })
        .await
        .expect("get")
        .into_inner();
    assert_eq!(detail.history.len(), 1);
    assert_eq!(detail.neighbours.len(), 3);
    assert!(
        !detail.neighbours_model_version.is_empty(),
        "scored by another version"
    );
    server.stop().await.expect("clean stop");
}
