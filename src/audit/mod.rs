//! The audit store: a durable record of every request the service answered
//! and of every candidate in it, in SQLite (bundled, WAL mode).
//!
//! # Layout
//! - this file: the records and the error type;
//! - [`sqlite`]: the schema with its ordered migrations, writes and the
//!   read API (for tests and review);
//! - [`writer`]: the one task that owns the write connection and commits
//!   requests in groups; a caller is answered only after its records are
//!   committed, which is what lets the service promise that nothing it
//!   acknowledged is lost;
//! - [`outcomes`]: lab results recorded against candidate records, with
//!   their history, and the reads the outcome monitor needs;
//! - [`cases`]: the analysts' review cases and their append-only history;
//! - [`lookup`]: records found by the lab's own candidate id, through a
//!   digest of each request's candidate ids rather than an index;
//! - [`ids`]: time-ordered request ids and the record ids derived from them.

pub mod cases;
pub mod ids;
pub mod lookup;
pub mod outcomes;
pub mod sqlite;
pub mod writer;

use std::path::PathBuf;
use std::time::Duration;

use serde::{Deserialize, Serialize};

pub use ids::{RequestIds, record_id};
pub use sqlite::{AuditReader, MIGRATIONS};
pub use writer::AuditWriter;

/// Errors of the audit store.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error(
        "cannot open the audit database {path}: {source}; check that the directory exists and \
         is writable (setting `audit.path`)"
    )]
    Open {
        path: PathBuf,
        #[source]
        source: rusqlite::Error,
    },
    #[error(
        "audit database {path}: migration to schema version {version} ({name}) failed: {source}"
    )]
    Migrate {
        path: PathBuf,
        version: usize,
        name: &'static str,
        #[source]
        source: rusqlite::Error,
    },
    #[error(
        "audit database {path} has schema version {found}, newer than this build knows \
         ({known}); run a newer plumbline or point `audit.path` elsewhere"
    )]
    NewerSchema {
        path: PathBuf,
        found: i64,
        known: usize,
    },
    #[error(
        "audit database {path} is locked by another process (another `plumbline serve` on the \
         same file, or a tool holding a write transaction on it): {source}; stop that process, \
         or point `audit.path` at a file of this server's own"
    )]
    Locked {
        path: PathBuf,
        #[source]
        source: rusqlite::Error,
    },
    #[error("audit commit failed: {message}")]
    Write { message: String },
    #[error("the audit writer is shut down; no new records are accepted")]
    Closed,
    #[error("the audit writer stopped unexpectedly: {reason}")]
    WriterGone { reason: String },
    #[error("reading the audit database: {source}")]
    Read {
        #[source]
        source: rusqlite::Error,
    },
    #[error("audit record {record_id}: stored {what} is malformed: {detail}")]
    Corrupt {
        record_id: String,
        what: &'static str,
        detail: String,
    },
}

/// SQLite's `synchronous` setting for the WAL-mode store.
///
/// `Full` syncs the WAL on every commit, so a commit that returned survives
/// power loss. `Normal` syncs only at checkpoints: it survives a crash of the
/// process, but the last commits may be lost on power loss or an OS crash —
/// answers already given would then have no record. Group commit makes
/// `Full` affordable (one sync per group of requests), hence the default.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Synchronous {
    Full,
    Normal,
}

/// How the store is opened and the writer run.
#[derive(Clone, Debug)]
pub struct Options {
    pub path: PathBuf,
    pub synchronous: Synchronous,
    /// Most requests committed in one transaction.
    pub batch_max: usize,
    /// Requests waiting for the writer before callers wait to hand theirs over.
    pub queue_depth: usize,
    /// How often the checkpoint thread runs a PASSIVE checkpoint (commits never do).
    pub checkpoint_interval: Duration,
    /// Largest size of the database in bytes, 0 for no cap. Past it commits
    /// fail as they would on a full disk (SQLite's `max_page_count`).
    pub max_bytes: u64,
}

/// Which RPC a request came through.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Method {
    Score,
    ScoreStream,
}

impl Method {
    pub fn name(self) -> &'static str {
        match self {
            Method::Score => "Score",
            Method::ScoreStream => "ScoreStream",
        }
    }
    fn parse(s: &str) -> Option<Method> {
        match s {
            "Score" => Some(Method::Score),
            "ScoreStream" => Some(Method::ScoreStream),
            _ => None,
        }
    }
}

/// Candidate counts of one request by status.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Counts {
    pub candidates: u32,
    pub scored: u32,
    pub flagged: u32,
    pub refused: u32,
    pub rejected: u32,
}

/// Who made a call, as the service saw it: the socket address and, when
/// access control is configured, the token holder or client certificate
/// subject. Written beside every request, decision and outcome.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct Caller {
    pub peer: Option<String>,
    pub identity: Option<String>,
}

/// One answered request (one `Score` call, or one chunk of a stream).
#[derive(Clone, Debug, PartialEq)]
pub struct RequestRecord {
    pub request_id: String,
    /// Unix time in microseconds (UTC) when the request was received.
    pub time_us: i64,
    pub method: Method,
    /// The caller's socket address.
    pub peer: Option<String>,
    /// The authenticated caller; none when access control is off.
    pub identity: Option<String>,
    pub model_id: String,
    pub model_version: String,
    pub batch_label: String,
    /// The confidence the intervals were computed at.
    pub confidence: f64,
    /// For stream chunks: the request id of the stream's first chunk.
    pub stream_id: Option<String>,
    /// For stream chunks: 0 for the first chunk, then 1, 2, …
    pub chunk: Option<u32>,
    pub counts: Counts,
}

/// What the service said of one candidate.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum CandidateStatus {
    Scored,
    Flagged,
    Refused,
    Rejected,
}

impl CandidateStatus {
    pub fn name(self) -> &'static str {
        match self {
            CandidateStatus::Scored => "scored",
            CandidateStatus::Flagged => "flagged",
            CandidateStatus::Refused => "refused",
            CandidateStatus::Rejected => "rejected",
        }
    }
    fn parse(s: &str) -> Option<CandidateStatus> {
        match s {
            "scored" => Some(CandidateStatus::Scored),
            "flagged" => Some(CandidateStatus::Flagged),
            "refused" => Some(CandidateStatus::Refused),
            "rejected" => Some(CandidateStatus::Rejected),
            _ => None,
        }
    }
}

/// A descriptor outside its training range, by name.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct OutOfRangeRecord {
    pub descriptor: String,
    pub value: f64,
    pub min: f64,
    pub max: f64,
}

/// The domain signals reported for a candidate that was scored.
#[derive(Clone, Debug, PartialEq)]
pub struct SignalsRecord {
    /// `inside`, `border` or `outside`.
    pub verdict: String,
    pub knn_distance: f64,
    pub typicality: f64,
    pub beyond_z_threshold: bool,
    pub leverage: f64,
    pub pca_residual: f64,
    pub out_of_range: Vec<OutOfRangeRecord>,
    pub notes: Vec<String>,
}

/// One candidate of a request.
#[derive(Clone, Debug, PartialEq)]
pub struct CandidateRecord {
    pub record_id: String,
    pub request_id: String,
    /// Position in the request.
    pub position: u32,
    pub candidate_id: String,
    pub status: CandidateStatus,
    /// Exactly what the answer gave: none for REFUSED and REJECTED.
    pub prediction: Option<f64>,
    pub lower: Option<f64>,
    pub upper: Option<f64>,
    pub confidence: f64,
    /// Which residuals calibrated the interval (`inside`, `border`,
    /// `outside` band or `pooled`); none when no interval was computed.
    pub calibration: Option<String>,
    /// None for REJECTED candidates, which were never scored.
    pub signals: Option<SignalsRecord>,
    /// 0 when not ranked.
    pub rank: u32,
    pub reason: String,
    /// SHA-256 (hex) of the descriptor values as little-endian f64 bytes, in
    /// the bundle's order when the row could be put in that order, else as
    /// sent.
    pub descriptor_sha256: String,
    /// The values themselves (same order as the hash), for FLAGGED and
    /// REFUSED candidates or for all, by setting.
    pub descriptors: Option<Vec<f64>>,
}

/// The overall rank of a candidate over a whole stream.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct StreamRank {
    pub stream_id: String,
    pub record_id: String,
    pub rank: u32,
}

/// Everything one answer commits at once.
#[derive(Clone, Debug, PartialEq)]
pub struct Entry {
    pub request: RequestRecord,
    pub candidates: Vec<CandidateRecord>,
    pub stream_ranks: Vec<StreamRank>,
}

/// SHA-256 (hex) of values as little-endian f64 bytes.
pub fn descriptor_hash(values: &[f64]) -> String {
    use sha2::Digest;
    // The bytes go to the hasher a buffer at a time: one `update` per value
    // cost as much as the hashing itself (profile of the serving benchmark).
    const CHUNK: usize = 64;
    let mut h = sha2::Sha256::new();
    let mut buffer = [0u8; CHUNK * 8];
    for chunk in values.chunks(CHUNK) {
        for (slot, v) in buffer.chunks_exact_mut(8).zip(chunk) {
            slot.copy_from_slice(&v.to_le_bytes());
        }
        h.update(&buffer[..chunk.len() * 8]);
    }
    hex(&h.finalize())
}

fn hex(bytes: &[u8]) -> String {
    const DIGITS: &[u8; 16] = b"0123456789abcdef";
    let mut s = String::with_capacity(bytes.len() * 2);
    for b in bytes {
        s.push(DIGITS[(b >> 4) as usize] as char);
        s.push(DIGITS[(b & 15) as usize] as char);
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    fn fixture() -> serde_json::Value {
        let path = concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/fixtures/service_reference.json"
        );
        let text = std::fs::read_to_string(path).expect("run tests/reference/service_ref.py");
        serde_json::from_str(&text).expect("fixture JSON")
    }

    /// Reference: Python's hashlib.sha256 over struct.pack('<Nd', ...), from
    /// tests/reference/service_ref.py.
    #[test]
    fn descriptor_hash_matches_hashlib_over_little_endian_doubles() {
        let f = fixture();
        let cases = f["descriptor_hashes"].as_array().expect("cases");
        assert!(cases.len() >= 5);
        for case in cases {
            let values: Vec<f64> = case["bits"]
                .as_array()
                .expect("bits")
                .iter()
                .map(|b| {
                    f64::from_bits(u64::from_str_radix(b.as_str().expect("hex"), 16).expect("hex"))
                })
                .collect();
            // Python's repr of each value reads back to the same double here.
            for (v, r) in values
                .iter()
                .zip(case["values"].as_array().expect("values"))
            {
                let parsed: f64 = r.as_str().expect("repr").parse().expect("float");
                assert_eq!(parsed.to_bits(), v.to_bits());
            }
            assert_eq!(
                descriptor_hash(&values),
                case["sha256"].as_str().expect("sha")
            );
        }
    }
}
