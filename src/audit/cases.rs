//! The analysts' review cases: every FLAGGED or REFUSED candidate of the
//! audit store is a case, open until an analyst records a decision.
//!
//! Decisions go to `case_history`, which triggers make append-only (an
//! UPDATE or DELETE aborts), so every change is kept; `cases` holds only the
//! latest decision per case, written in the same transaction, so listing by
//! state needs no scan of the history. A case without a `cases` row is open:
//! the scoring path never writes here, and the candidates table stays the
//! one source of what the service answered.

use rusqlite::{Connection, OptionalExtension, params};

use super::sqlite::{CANDIDATE_COLUMNS, raw_candidate};
use super::{Caller, CandidateRecord, CandidateStatus, Error};

/// The schema step that adds the cases and their history (appended to
/// [`super::MIGRATIONS`]).
pub const MIGRATION_SQL: &str = "
    CREATE TABLE case_history (
        sequence   INTEGER PRIMARY KEY AUTOINCREMENT,
        record_id  TEXT NOT NULL,
        time_us    INTEGER NOT NULL,
        analyst    TEXT NOT NULL,
        decision   TEXT NOT NULL
            CHECK (decision IN ('accept_for_testing', 'dismiss', 'needs_new_data')),
        note       TEXT NOT NULL
    ) STRICT;
    CREATE INDEX case_history_by_record ON case_history(record_id, sequence);
    CREATE TRIGGER case_history_no_update BEFORE UPDATE ON case_history
        BEGIN SELECT RAISE(ABORT, 'case history is append-only'); END;
    CREATE TRIGGER case_history_no_delete BEFORE DELETE ON case_history
        BEGIN SELECT RAISE(ABORT, 'case history is append-only'); END;
    CREATE TABLE cases (
        record_id     TEXT PRIMARY KEY,
        last_sequence INTEGER NOT NULL REFERENCES case_history(sequence),
        revisions     INTEGER NOT NULL
    ) STRICT;
    -- Record ids are checked against the candidates table when a case is
    -- settled (it has no unique key of that name to reference). Only
    -- flagged and refused candidates are cases, so this partial index costs
    -- the scoring path nothing for the candidates it scored.
    CREATE INDEX candidates_cases ON candidates(request_id, position)
        WHERE status IN ('flagged', 'refused');
";

/// An analyst's decision on a case.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Decision {
    AcceptForTesting,
    Dismiss,
    NeedsNewData,
}

impl Decision {
    pub fn name(self) -> &'static str {
        match self {
            Decision::AcceptForTesting => "accept_for_testing",
            Decision::Dismiss => "dismiss",
            Decision::NeedsNewData => "needs_new_data",
        }
    }
    pub fn parse(s: &str) -> Option<Decision> {
        match s {
            "accept_for_testing" => Some(Decision::AcceptForTesting),
            "dismiss" => Some(Decision::Dismiss),
            "needs_new_data" => Some(Decision::NeedsNewData),
            _ => None,
        }
    }
}

/// Errors of the review cases.
#[derive(Debug, thiserror::Error)]
pub enum CaseError {
    #[error("no candidate record '{record_id}' in the audit store; list cases to find its id")]
    NotFound { record_id: String },
    #[error(
        "record '{record_id}' is a {status} candidate, not a case; only flagged and refused \
         candidates are reviewed"
    )]
    NotACase {
        record_id: String,
        status: &'static str,
    },
    #[error("settling a case needs {what}; give it and retry")]
    Missing { what: &'static str },
    #[error("case history: stored decision '{value}' of record {record_id} is unknown")]
    CorruptDecision { record_id: String, value: String },
    #[error("writing the case decision for {record_id}: {source}")]
    Write {
        record_id: String,
        #[source]
        source: rusqlite::Error,
    },
    #[error(transparent)]
    Store(#[from] Error),
}

/// Which cases to list; `None` matches everything.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct CaseFilter {
    pub model: Option<String>,
    /// `inside`, `border` or `outside`.
    pub verdict: Option<String>,
    /// Flagged or refused.
    pub candidate_status: Option<CandidateStatus>,
    /// `Some(true)`: only open cases; `Some(false)`: only settled ones.
    pub open: Option<bool>,
    /// The latest decision.
    pub decision: Option<Decision>,
    /// Request time in Unix microseconds: from inclusive, to exclusive.
    pub from_us: Option<i64>,
    pub to_us: Option<i64>,
    pub batch_label: Option<String>,
}

/// One recorded decision.
#[derive(Clone, Debug, PartialEq)]
pub struct Settlement {
    pub sequence: i64,
    pub record_id: String,
    pub time_us: i64,
    pub analyst: String,
    pub decision: Decision,
    pub note: String,
    /// Who made the call that recorded it (the analyst name above is what
    /// they typed; this is what access control proved).
    pub caller: Caller,
}

/// A case: the candidate as the service answered it, the request it came
/// in, and its latest decision.
#[derive(Clone, Debug, PartialEq)]
pub struct Case {
    pub candidate: CandidateRecord,
    pub model_id: String,
    pub model_version: String,
    pub batch_label: String,
    pub time_us: i64,
    pub latest: Option<Settlement>,
    pub revisions: u32,
}

fn read_err(source: rusqlite::Error) -> CaseError {
    CaseError::Store(Error::Read { source })
}

/// The SELECT shared by listing and fetching: candidate columns first (in
/// the order [`raw_candidate`] reads), then request and decision columns.
fn case_select() -> String {
    let candidate: Vec<String> = CANDIDATE_COLUMNS
        .split(',')
        .map(|c| format!("c.{}", c.trim()))
        .collect();
    format!(
        "SELECT {}, r.model_id, r.model_version, r.batch_label, r.time_us, \
             h.sequence, h.time_us, h.analyst, h.decision, h.note, k.revisions, \
             h.caller_peer, h.caller_identity \
         FROM candidates c \
         JOIN requests r ON r.request_id = c.request_id \
         LEFT JOIN cases k ON k.record_id = c.record_id \
         LEFT JOIN case_history h ON h.sequence = k.last_sequence",
        candidate.join(", ")
    )
}

const FIRST_EXTRA: usize = 22;

struct RawCase {
    candidate: super::sqlite::RawCandidate,
    model_id: String,
    model_version: String,
    batch_label: String,
    time_us: i64,
    sequence: Option<i64>,
    s_time_us: Option<i64>,
    analyst: Option<String>,
    decision: Option<String>,
    note: Option<String>,
    revisions: Option<u32>,
    caller: Caller,
}

fn raw_case(r: &rusqlite::Row<'_>) -> rusqlite::Result<RawCase> {
    let e = FIRST_EXTRA;
    Ok(RawCase {
        candidate: raw_candidate(r)?,
        model_id: r.get(e)?,
        model_version: r.get(e + 1)?,
        batch_label: r.get(e + 2)?,
        time_us: r.get(e + 3)?,
        sequence: r.get(e + 4)?,
        s_time_us: r.get(e + 5)?,
        analyst: r.get(e + 6)?,
        decision: r.get(e + 7)?,
        note: r.get(e + 8)?,
        revisions: r.get(e + 9)?,
        caller: Caller {
            peer: r.get(e + 10)?,
            identity: r.get(e + 11)?,
        },
    })
}

impl RawCase {
    fn into_case(self) -> Result<Case, CaseError> {
        let candidate = self.candidate.into_record()?;
        let latest = match (self.sequence, self.decision) {
            (Some(sequence), Some(d)) => Some(Settlement {
                sequence,
                record_id: candidate.record_id.clone(),
                time_us: self.s_time_us.unwrap_or(0),
                analyst: self.analyst.unwrap_or_default(),
                decision: Decision::parse(&d).ok_or_else(|| CaseError::CorruptDecision {
                    record_id: candidate.record_id.clone(),
                    value: d.clone(),
                })?,
                note: self.note.unwrap_or_default(),
                caller: self.caller,
            }),
            _ => None,
        };
        Ok(Case {
            candidate,
            model_id: self.model_id,
            model_version: self.model_version,
            batch_label: self.batch_label,
            time_us: self.time_us,
            latest,
            revisions: self.revisions.unwrap_or(0),
        })
    }
}

/// Cases matching `filter` with record id after `after`, in record-id
/// (time) order, at most `limit`.
pub fn list(
    conn: &Connection,
    filter: &CaseFilter,
    after: Option<&str>,
    limit: usize,
) -> Result<Vec<Case>, CaseError> {
    let sql = format!(
        "{} WHERE c.status IN ('flagged', 'refused') \
           AND (?1 IS NULL OR r.model_id = ?1) \
           AND (?2 IS NULL OR c.verdict = ?2) \
           AND (?3 IS NULL OR c.status = ?3) \
           AND (?4 IS NULL OR (?4 = 1) = (k.record_id IS NULL)) \
           AND (?5 IS NULL OR h.decision = ?5) \
           AND (?6 IS NULL OR r.time_us >= ?6) \
           AND (?7 IS NULL OR r.time_us < ?7) \
           AND (?8 IS NULL OR r.batch_label = ?8) \
           AND (?9 IS NULL OR (c.request_id, c.position) > (?9, ?11)) \
         ORDER BY c.request_id, c.position LIMIT ?10",
        case_select()
    );
    // A page token that is not one of our record ids starts nowhere: the
    // service checks tokens before they get here.
    let after = after.and_then(super::ids::parse_record_id);
    let mut stmt = conn.prepare_cached(&sql).map_err(read_err)?;
    let rows = stmt
        .query_map(
            params![
                filter.model,
                filter.verdict,
                filter.candidate_status.map(|s| s.name()),
                filter.open.map(i64::from),
                filter.decision.map(|d| d.name()),
                filter.from_us,
                filter.to_us,
                filter.batch_label,
                after.map(|a| a.0),
                limit.min(i64::MAX as usize) as i64,
                after.map(|a| a.1),
            ],
            raw_case,
        )
        .map_err(read_err)?;
    let mut out = Vec::new();
    for raw in rows {
        out.push(raw.map_err(read_err)?.into_case()?);
    }
    Ok(out)
}

/// One case by record id.
pub fn get(conn: &Connection, record_id: &str) -> Result<Case, CaseError> {
    let not_found = || CaseError::NotFound {
        record_id: record_id.to_string(),
    };
    let (request_id, position) = super::ids::parse_record_id(record_id).ok_or_else(not_found)?;
    let sql = format!(
        "{} WHERE c.request_id = ?1 AND c.position = ?2",
        case_select()
    );
    let raw = conn
        .query_row(&sql, params![request_id, position], raw_case)
        .optional()
        .map_err(read_err)?
        .ok_or_else(not_found)?;
    let case = raw.into_case()?;
    match case.candidate.status {
        CandidateStatus::Flagged | CandidateStatus::Refused => Ok(case),
        other => Err(CaseError::NotACase {
            record_id: record_id.to_string(),
            status: other.name(),
        }),
    }
}

/// Every decision on a case, oldest first.
pub fn history(conn: &Connection, record_id: &str) -> Result<Vec<Settlement>, CaseError> {
    let mut stmt = conn
        .prepare_cached(
            "SELECT sequence, record_id, time_us, analyst, decision, note, caller_peer, \
             caller_identity FROM case_history \
             WHERE record_id = ?1 ORDER BY sequence",
        )
        .map_err(read_err)?;
    let rows = stmt
        .query_map([record_id], |r| {
            Ok((
                r.get::<_, i64>(0)?,
                r.get::<_, String>(1)?,
                r.get::<_, i64>(2)?,
                r.get::<_, String>(3)?,
                r.get::<_, String>(4)?,
                r.get::<_, String>(5)?,
                Caller {
                    peer: r.get(6)?,
                    identity: r.get(7)?,
                },
            ))
        })
        .map_err(read_err)?;
    let mut out = Vec::new();
    for row in rows {
        let (sequence, record_id, time_us, analyst, decision, note, caller) =
            row.map_err(read_err)?;
        let decision = Decision::parse(&decision).ok_or_else(|| CaseError::CorruptDecision {
            record_id: record_id.clone(),
            value: decision.clone(),
        })?;
        out.push(Settlement {
            sequence,
            record_id,
            time_us,
            analyst,
            decision,
            note,
            caller,
        });
    }
    Ok(out)
}

/// Records a decision: appends it to the history and makes it the case's
/// latest, in one transaction. `caller` is who made the call.
pub fn settle(
    conn: &mut Connection,
    record_id: &str,
    analyst: &str,
    decision: Decision,
    note: &str,
    time_us: i64,
    caller: &Caller,
) -> Result<Settlement, CaseError> {
    if analyst.trim().is_empty() {
        return Err(CaseError::Missing {
            what: "the analyst's name",
        });
    }
    // Refuses unknown records and candidates that are not cases.
    get(conn, record_id)?;
    let write = |source| CaseError::Write {
        record_id: record_id.to_string(),
        source,
    };
    let tx = conn.transaction().map_err(write)?;
    tx.execute(
        "INSERT INTO case_history (record_id, time_us, analyst, decision, note, \
             caller_peer, caller_identity) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
        params![
            record_id,
            time_us,
            analyst,
            decision.name(),
            note,
            caller.peer,
            caller.identity
        ],
    )
    .map_err(write)?;
    let sequence = tx.last_insert_rowid();
    tx.execute(
        "INSERT INTO cases (record_id, last_sequence, revisions) VALUES (?1, ?2, 1) \
         ON CONFLICT(record_id) DO UPDATE SET last_sequence = excluded.last_sequence, \
             revisions = revisions + 1",
        params![record_id, sequence],
    )
    .map_err(write)?;
    tx.commit().map_err(write)?;
    Ok(Settlement {
        sequence,
        record_id: record_id.to_string(),
        time_us,
        analyst: analyst.to_string(),
        decision,
        note: note.to_string(),
        caller: caller.clone(),
    })
}
