//! Recording lab outcomes against a large audit store: how long one upload
//! of 1,000 results takes when the rows name candidates by the lab's own
//! candidate id (matched through the per-request digests) and when they
//! name record ids, as the store grows.
//!
//! The store is filled directly through the writer's own insert code
//! (`write_entries`), ten requests of 1,000 candidates a transaction, so
//! that millions of rows take seconds rather than a serving run. Prints a
//! table; asserts only that every upload found what it was meant to find.
//!
//! `OUTCOMES_BENCH_SIZES` (candidates, comma-separated; default
//! `100000,1000000`) sets the store sizes; 10,000,000 takes about a minute
//! and 3 GB of temporary disk.

// A bench stops at its first failure, with the reason.
#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::time::Instant;

use plumbline::audit::outcomes::{self, OutcomeInput, Target};
use plumbline::audit::{
    Caller, CandidateRecord, CandidateStatus, Counts, Entry, Method, RequestIds, RequestRecord,
    SignalsRecord, Synchronous, descriptor_hash, record_id, sqlite,
};
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;

const PER_REQUEST: usize = 1_000;
const REQUESTS_PER_COMMIT: usize = 10;
const UPLOAD: usize = 1_000;
const UPLOADS: usize = 3;
const MODEL: &str = "bench-model";

fn main() {
    let sizes: Vec<usize> = std::env::var("OUTCOMES_BENCH_SIZES")
        .unwrap_or_else(|_| "100000,1000000".into())
        .split(',')
        .map(|s| {
            s.trim()
                .parse()
                .expect("OUTCOMES_BENCH_SIZES: candidates, comma-separated")
        })
        .collect();
    println!(
        "outcome uploads of {UPLOAD} rows, {UPLOADS} a store size, against stores filled with \
         requests of {PER_REQUEST} candidates"
    );
    println!(
        "| candidates stored | store MiB | fill s | by candidate id, ms an upload | by record id, \
         ms an upload |"
    );
    println!("|---|---|---|---|---|");
    for size in sizes {
        let row = measure(size.div_ceil(PER_REQUEST));
        println!(
            "| {} | {:.0} | {:.1} | {} | {} |",
            row.candidates,
            row.bytes as f64 / (1 << 20) as f64,
            row.fill_s,
            range(&row.by_candidate_ms),
            range(&row.by_record_ms)
        );
    }
}

struct Row {
    candidates: usize,
    bytes: u64,
    fill_s: f64,
    by_candidate_ms: Vec<f64>,
    by_record_ms: Vec<f64>,
}

fn range(ms: &[f64]) -> String {
    let lo = ms.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = ms.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    format!("{lo:.1}–{hi:.1}")
}

fn measure(requests: usize) -> Row {
    let dir = tempfile::tempdir().expect("temporary directory");
    let path = dir.path().join("audit.db");
    let mut conn = sqlite::open_for_writing(&path, Synchronous::Normal).expect("open store");
    let ids = RequestIds::starting_after(0);
    let mut request_ids = Vec::with_capacity(requests);
    let t = Instant::now();
    for first in (0..requests).step_by(REQUESTS_PER_COMMIT) {
        let entries: Vec<Entry> = (first..requests.min(first + REQUESTS_PER_COMMIT))
            .map(|r| entry(&ids, r))
            .collect();
        request_ids.extend(entries.iter().map(|e| e.request.request_id.clone()));
        let tx = conn.transaction().expect("begin");
        sqlite::write_entries(&tx, &entries.iter().collect::<Vec<_>>()).expect("write");
        tx.commit().expect("commit");
    }
    let fill_s = t.elapsed().as_secs_f64();
    conn.execute_batch("PRAGMA wal_checkpoint(TRUNCATE);")
        .expect("checkpoint");
    let bytes = std::fs::metadata(&path).map(|m| m.len()).unwrap_or(0);
    let candidates = requests * PER_REQUEST;

    let mut rng = Xoshiro256PlusPlus::seed_from_u64(requests as u64);
    let caller = Caller::default();
    let mut by_candidate_ms = Vec::new();
    let mut by_record_ms = Vec::new();
    // One timed upload; each of its `distinct` targets must be stored
    // (replacing an earlier upload's value where the picks repeat one).
    let mut upload = |rows: &[OutcomeInput], distinct: usize, now_us: i64, what: &str| -> f64 {
        let t = Instant::now();
        let results = outcomes::record(&mut conn, rows, true, "bench", now_us, &caller)
            .unwrap_or_else(|e| panic!("record by {what}: {e}"));
        let ms = t.elapsed().as_secs_f64() * 1e3;
        let stored = results.iter().filter(|r| r.stored()).count();
        assert_eq!(stored, distinct, "by {what}: every row found once");
        ms
    };
    for _ in 0..UPLOADS {
        // Candidates spread over the whole store, as results of a screen
        // that ran over months would be; each upload its own.
        let picks: Vec<usize> = (0..UPLOAD).map(|_| rng.gen_range(0..candidates)).collect();
        let distinct = picks
            .iter()
            .collect::<std::collections::BTreeSet<_>>()
            .len();
        let by_candidate: Vec<OutcomeInput> = picks
            .iter()
            .map(|&g| OutcomeInput {
                target: Target::Candidate {
                    candidate_id: candidate_id(g),
                    model_id: MODEL.into(),
                },
                observed: g as f64 * 1e-3,
            })
            .collect();
        by_candidate_ms.push(upload(&by_candidate, distinct, 1, "candidate id"));
        let by_record: Vec<OutcomeInput> = picks
            .iter()
            .map(|&g| OutcomeInput {
                target: Target::Record(record_id(&request_ids[g / PER_REQUEST], g % PER_REQUEST)),
                observed: g as f64 * 2e-3,
            })
            .collect();
        by_record_ms.push(upload(&by_record, distinct, 2, "record id"));
    }
    Row {
        candidates,
        bytes,
        fill_s,
        by_candidate_ms,
        by_record_ms,
    }
}

/// The lab's id of the store's g-th candidate: unique over the store.
fn candidate_id(g: usize) -> String {
    format!("plate{:05}-well{:04}", g / PER_REQUEST, g % PER_REQUEST)
}

/// Request `r`: 1,000 scored candidates, as a batch from the service.
fn entry(ids: &RequestIds, r: usize) -> Entry {
    let (request_id, time_us) = ids.next();
    let candidates: Vec<CandidateRecord> = (0..PER_REQUEST)
        .map(|i| {
            let g = r * PER_REQUEST + i;
            let descriptors = [g as f64, -0.5, 1e-9];
            CandidateRecord {
                record_id: record_id(&request_id, i),
                request_id: request_id.clone(),
                position: i as u32,
                candidate_id: candidate_id(g),
                status: CandidateStatus::Scored,
                prediction: Some(5.0 + (g % 97) as f64 * 0.01),
                lower: Some(4.5),
                upper: Some(5.5),
                confidence: 0.9,
                calibration: Some("inside".into()),
                signals: Some(SignalsRecord {
                    verdict: "inside".into(),
                    knn_distance: 0.3,
                    typicality: 0.7,
                    beyond_z_threshold: false,
                    leverage: 0.01,
                    pca_residual: 0.2,
                    out_of_range: Vec::new(),
                    notes: Vec::new(),
                }),
                rank: i as u32 + 1,
                reason: String::new(),
                descriptor_sha256: descriptor_hash(&descriptors),
                descriptors: None,
            }
        })
        .collect();
    Entry {
        request: RequestRecord {
            request_id,
            time_us,
            method: Method::Score,
            peer: Some("127.0.0.1:5000".into()),
            identity: None,
            model_id: MODEL.into(),
            model_version: "v1".into(),
            batch_label: format!("plate {r}"),
            confidence: 0.9,
            stream_id: None,
            chunk: None,
            counts: Counts {
                candidates: PER_REQUEST as u32,
                scored: PER_REQUEST as u32,
                flagged: 0,
                refused: 0,
                rejected: 0,
            },
        },
        candidates,
        stream_ranks: Vec::new(),
    }
}
