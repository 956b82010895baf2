//! Outcomes: the values the lab measured, recorded against the candidate
//! records the service answered with. A record has at most one current
//! outcome; replacing it needs an explicit flag and keeps the old value as
//! a superseded row, so the history of every record is never lost.
//!
//! Writes go through their own connection, not the scoring writer: they
//! are rare and small, and WAL mode with a busy timeout serialises them
//! against the group commits.

use std::collections::HashMap;

use rusqlite::{Connection, OptionalExtension, params};

use super::sqlite::Migration;
use super::{Caller, Error};

/// The outcomes table, appended to [`super::MIGRATIONS`].
pub const MIGRATION: Migration = Migration {
    name: "outcomes with their history",
    sql: "
        CREATE TABLE outcomes (
            outcome_id    INTEGER PRIMARY KEY,
            record_id     TEXT NOT NULL,
            request_id    TEXT NOT NULL,
            position      INTEGER NOT NULL,
            observed      REAL NOT NULL,
            recorded_us   INTEGER NOT NULL,
            source        TEXT NOT NULL,
            superseded_us INTEGER,
            FOREIGN KEY (request_id, position) REFERENCES candidates(request_id, position)
        ) STRICT;
        CREATE UNIQUE INDEX outcomes_current ON outcomes(record_id)
            WHERE superseded_us IS NULL;
        CREATE INDEX outcomes_by_record ON outcomes(record_id, outcome_id);
        CREATE INDEX requests_by_model_time ON requests(model_id, time_us);
        -- Labs know their own candidate ids; outcomes recorded by candidate id
        -- and model look them up here.
        CREATE INDEX candidates_by_candidate ON candidates(candidate_id);
    ",
    fill: None,
};

/// Which record a measured value belongs to.
#[derive(Clone, Debug, PartialEq)]
pub enum Target {
    Record(String),
    /// The candidate's own id and the model that scored it.
    Candidate {
        candidate_id: String,
        model_id: String,
    },
}

/// One row to record.
#[derive(Clone, Debug, PartialEq)]
pub struct OutcomeInput {
    pub target: Target,
    pub observed: f64,
}

/// What became of one row; rows are never merged.
#[derive(Clone, Debug, PartialEq)]
pub enum RowResult {
    Recorded {
        record_id: String,
    },
    /// Replaced under the replace flag; the old value stays in history.
    Replaced {
        record_id: String,
        previous: f64,
    },
    /// The record already has an outcome and replace was not asked for.
    AlreadyRecorded {
        record_id: String,
        existing: f64,
    },
    /// The same record appears earlier in this request (row index).
    DuplicateInRequest {
        record_id: String,
        first_row: usize,
    },
    UnknownRecord {
        record_id: String,
    },
    UnknownCandidate {
        candidate_id: String,
        model_id: String,
    },
    /// The candidate was answered more than once by the model: give the
    /// record id.
    Ambiguous {
        candidate_id: String,
        record_ids: Vec<String>,
    },
    Invalid {
        reason: String,
    },
}

impl RowResult {
    pub fn stored(&self) -> bool {
        matches!(
            self,
            RowResult::Recorded { .. } | RowResult::Replaced { .. }
        )
    }
}

/// One stored outcome (current or superseded).
#[derive(Clone, Debug, PartialEq)]
pub struct OutcomeRow {
    pub record_id: String,
    pub observed: f64,
    pub recorded_us: i64,
    pub source: String,
    pub superseded_us: Option<i64>,
    /// Who made the call that recorded it.
    pub caller: Caller,
}

fn read_err(source: rusqlite::Error) -> Error {
    Error::Read { source }
}

fn write_err(e: rusqlite::Error) -> Error {
    Error::Write {
        message: e.to_string(),
    }
}

/// Records `rows` in one transaction; each row gets its own result.
pub fn record(
    conn: &mut Connection,
    rows: &[OutcomeInput],
    replace: bool,
    source: &str,
    now_us: i64,
    caller: &Caller,
) -> Result<Vec<RowResult>, Error> {
    let tx = conn.transaction().map_err(write_err)?;
    // Every row given by candidate id is looked up in one read of the
    // model's digests, not one read per row.
    let wanted: Vec<(String, String)> = rows
        .iter()
        .filter_map(|row| match &row.target {
            Target::Candidate {
                candidate_id,
                model_id,
            } => Some((candidate_id.clone(), model_id.clone())),
            Target::Record(_) => None,
        })
        .collect();
    let by_candidate = super::lookup::records_by_candidate(&tx, &wanted)?;
    let mut results = Vec::with_capacity(rows.len());
    let mut seen: HashMap<String, usize> = HashMap::new();
    for (i, row) in rows.iter().enumerate() {
        if !row.observed.is_finite() {
            results.push(RowResult::Invalid {
                reason: format!("observed value {} is not a finite number", row.observed),
            });
            continue;
        }
        let record_id = match resolve(&tx, &row.target, &by_candidate)? {
            Ok(id) => id,
            Err(r) => {
                results.push(r);
                continue;
            }
        };
        if let Some(&first_row) = seen.get(&record_id) {
            results.push(RowResult::DuplicateInRequest {
                record_id,
                first_row,
            });
            continue;
        }
        seen.insert(record_id.clone(), i);
        let existing: Option<(i64, f64)> = tx
            .query_row(
                "SELECT outcome_id, observed FROM outcomes
                 WHERE record_id = ?1 AND superseded_us IS NULL",
                [&record_id],
                |r| Ok((r.get(0)?, r.get(1)?)),
            )
            .optional()
            .map_err(read_err)?;
        let result = match existing {
            Some((_, existing)) if !replace => RowResult::AlreadyRecorded {
                record_id,
                existing,
            },
            Some((id, previous)) => {
                tx.execute(
                    "UPDATE outcomes SET superseded_us = ?1 WHERE outcome_id = ?2",
                    params![now_us, id],
                )
                .map_err(write_err)?;
                insert(&tx, &record_id, row.observed, now_us, source, caller)?;
                RowResult::Replaced {
                    record_id,
                    previous,
                }
            }
            None => {
                insert(&tx, &record_id, row.observed, now_us, source, caller)?;
                RowResult::Recorded { record_id }
            }
        };
        results.push(result);
    }
    tx.commit().map_err(write_err)?;
    Ok(results)
}

fn insert(
    tx: &rusqlite::Transaction<'_>,
    record_id: &str,
    observed: f64,
    now_us: i64,
    source: &str,
    caller: &Caller,
) -> Result<(), Error> {
    let (request_id, position) =
        super::ids::parse_record_id(record_id).ok_or_else(|| Error::Write {
            message: format!("record id {record_id} is not of the form <request id>-<position>"),
        })?;
    tx.execute(
        "INSERT INTO outcomes (record_id, request_id, position, observed, recorded_us, source,
             caller_peer, caller_identity)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
        params![
            record_id,
            request_id,
            position,
            observed,
            now_us,
            source,
            caller.peer,
            caller.identity
        ],
    )
    .map_err(write_err)?;
    Ok(())
}

/// The record a row names: by record id, checked against the store, or by
/// candidate id and model, from `by_candidate` (see
/// [`super::lookup::records_by_candidate`]).
fn resolve(
    conn: &Connection,
    target: &Target,
    by_candidate: &HashMap<(String, String), Vec<String>>,
) -> Result<Result<String, RowResult>, Error> {
    match target {
        Target::Record(id) => {
            let unknown = || RowResult::UnknownRecord {
                record_id: id.clone(),
            };
            let Some((request_id, position)) = super::ids::parse_record_id(id) else {
                return Ok(Err(unknown()));
            };
            let found: Option<String> = conn
                .query_row(
                    "SELECT record_id FROM candidates WHERE request_id = ?1 AND position = ?2",
                    params![request_id, position],
                    |r| r.get(0),
                )
                .optional()
                .map_err(read_err)?;
            Ok(found.ok_or_else(unknown))
        }
        Target::Candidate {
            candidate_id,
            model_id,
        } => {
            let ids = by_candidate
                .get(&(candidate_id.clone(), model_id.clone()))
                .map(Vec::as_slice)
                .unwrap_or_default();
            Ok(match ids {
                [] => Err(RowResult::UnknownCandidate {
                    candidate_id: candidate_id.clone(),
                    model_id: model_id.clone(),
                }),
                [one] => Ok(one.clone()),
                _ => Err(RowResult::Ambiguous {
                    candidate_id: candidate_id.clone(),
                    record_ids: ids.to_vec(),
                }),
            })
        }
    }
}

/// Every outcome of a record, oldest first.
pub fn history(conn: &Connection, record_id: &str) -> Result<Vec<OutcomeRow>, Error> {
    let mut stmt = conn
        .prepare(
            "SELECT record_id, observed, recorded_us, source, superseded_us, caller_peer,
                    caller_identity FROM outcomes
             WHERE record_id = ?1 ORDER BY outcome_id",
        )
        .map_err(read_err)?;
    stmt.query_map([record_id], |r| {
        Ok(OutcomeRow {
            record_id: r.get(0)?,
            observed: r.get(1)?,
            recorded_us: r.get(2)?,
            source: r.get(3)?,
            superseded_us: r.get(4)?,
            caller: Caller {
                peer: r.get(5)?,
                identity: r.get(6)?,
            },
        })
    })
    .map_err(read_err)?
    .collect::<rusqlite::Result<Vec<_>>>()
    .map_err(read_err)
}

/// A current outcome with what the service answered for it.
#[derive(Clone, Debug, PartialEq)]
pub struct OutcomePair {
    pub record_id: String,
    /// When the candidate was scored (request time, µs).
    pub time_us: i64,
    pub status: String,
    pub observed: f64,
    pub prediction: Option<f64>,
    pub lower: Option<f64>,
    pub upper: Option<f64>,
    pub confidence: f64,
    pub verdict: Option<String>,
}

/// Current outcomes of candidates the model scored with request time in
/// `[from_us, to_us)`.
pub fn pairs(
    conn: &Connection,
    model_id: &str,
    from_us: i64,
    to_us: i64,
) -> Result<Vec<OutcomePair>, Error> {
    let mut stmt = conn
        .prepare(
            "SELECT c.record_id, r.time_us, c.status, o.observed, c.prediction, c.lower,
                    c.upper, c.confidence, c.verdict
             FROM outcomes o
             JOIN candidates c ON c.request_id = o.request_id AND c.position = o.position
             JOIN requests r ON r.request_id = c.request_id
             WHERE o.superseded_us IS NULL AND r.model_id = ?1
               AND r.time_us >= ?2 AND r.time_us < ?3
             ORDER BY c.record_id",
        )
        .map_err(read_err)?;
    stmt.query_map(params![model_id, from_us, to_us], |r| {
        Ok(OutcomePair {
            record_id: r.get(0)?,
            time_us: r.get(1)?,
            status: r.get(2)?,
            observed: r.get(3)?,
            prediction: r.get(4)?,
            lower: r.get(5)?,
            upper: r.get(6)?,
            confidence: r.get(7)?,
            verdict: r.get(8)?,
        })
    })
    .map_err(read_err)?
    .collect::<rusqlite::Result<Vec<_>>>()
    .map_err(read_err)
}

/// Of the model's last `window` candidates that got a domain verdict, how
/// many were outside, and how many there were.
pub fn recent_outside(conn: &Connection, model_id: &str, window: u64) -> Result<(u64, u64), Error> {
    let (outside, total): (i64, i64) = conn
        .query_row(
            "SELECT coalesce(sum(verdict = 'outside'), 0), count(*) FROM (
                 SELECT c.verdict FROM candidates c JOIN requests r USING (request_id)
                 WHERE r.model_id = ?1 AND c.verdict IS NOT NULL
                 ORDER BY r.time_us DESC, c.position DESC LIMIT ?2)",
            params![model_id, window.min(i64::MAX as u64) as i64],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .map_err(read_err)?;
    Ok((outside.max(0) as u64, total.max(0) as u64))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::audit::Caller;
    use crate::audit::Synchronous;
    use crate::audit::sqlite::{MIGRATIONS, open_for_writing, schema_version};

    /// A database at schema version 1 (the serve issue's), with one request
    /// of three candidates.
    fn version_one(path: &std::path::Path) {
        let conn = Connection::open(path).unwrap();
        conn.execute_batch(MIGRATIONS[0].sql).unwrap();
        conn.pragma_update(None, "user_version", 1).unwrap();
        conn.execute(
            "INSERT INTO requests VALUES ('00000000000003e8', 1000, 'Score', NULL, NULL, 'm', 'v1', 'b', 0.9,
                 NULL, NULL, 3, 2, 0, 1, 0)",
            [],
        )
        .unwrap();
        for (i, (cid, status, verdict, pred)) in [
            ("a", "scored", Some("inside"), Some(1.0)),
            ("b", "scored", Some("border"), Some(2.0)),
            ("c", "refused", Some("outside"), None),
        ]
        .into_iter()
        .enumerate()
        {
            conn.execute(
                "INSERT INTO candidates (record_id, request_id, position, candidate_id, status,
                     prediction, lower, upper, confidence, verdict, knn_distance, typicality,
                     beyond_z_threshold, leverage, pca_residual, rank, reason,
                     descriptor_sha256)
                 VALUES (?1, '00000000000003e8', ?2, ?3, ?4, ?5, ?6, ?7, 0.9, ?8, 1, 0.5, 0, 0.1, 0.1, 0, '',
                     'h')",
                params![
                    crate::audit::ids::record_id("00000000000003e8", i),
                    i as i64,
                    cid,
                    status,
                    pred,
                    pred.map(|p| p - 1.0),
                    pred.map(|p| p + 1.0),
                    verdict
                ],
            )
            .unwrap();
        }
    }

    fn row(target: Target, observed: f64) -> OutcomeInput {
        OutcomeInput { target, observed }
    }

    #[test]
    fn a_version_one_database_upgrades_in_place_keeping_every_row() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.db");
        version_one(&path);
        let conn = open_for_writing(&path, Synchronous::Full).unwrap();
        assert_eq!(schema_version(&conn).unwrap(), MIGRATIONS.len() as i64);
        let n: i64 = conn
            .query_row("SELECT count(*) FROM candidates", [], |r| r.get(0))
            .unwrap();
        assert_eq!(n, 3);
        let reader = crate::audit::AuditReader::open(&path).unwrap();
        let c = reader
            .candidate("00000000000003e8-000001")
            .unwrap()
            .unwrap();
        assert_eq!(c.prediction, Some(2.0));
        assert_eq!(c.signals.unwrap().verdict, "border");
        assert_eq!(reader.requests().unwrap().len(), 1);
    }

    #[test]
    fn rows_are_reported_one_by_one_and_replacing_keeps_history() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.db");
        version_one(&path);
        let mut conn = open_for_writing(&path, Synchronous::Full).unwrap();
        let cand = |c: &str, m: &str| Target::Candidate {
            candidate_id: c.into(),
            model_id: m.into(),
        };
        let got = record(
            &mut conn,
            &[
                row(Target::Record("00000000000003e8-000000".into()), 1.5),
                row(cand("b", "m"), 2.5),
                row(Target::Record("00000000000003e8-000000".into()), 9.0),
                row(Target::Record("nope".into()), 1.0),
                row(cand("b", "other"), 1.0),
                row(Target::Record("00000000000003e8-000002".into()), f64::NAN),
            ],
            false,
            "lab.csv",
            5000,
            &Caller::default(),
        )
        .unwrap();
        assert_eq!(
            got[0],
            RowResult::Recorded {
                record_id: "00000000000003e8-000000".into()
            }
        );
        assert_eq!(
            got[1],
            RowResult::Recorded {
                record_id: "00000000000003e8-000001".into()
            }
        );
        assert_eq!(
            got[2],
            RowResult::DuplicateInRequest {
                record_id: "00000000000003e8-000000".into(),
                first_row: 0
            }
        );
        assert!(matches!(got[3], RowResult::UnknownRecord { .. }));
        assert!(matches!(got[4], RowResult::UnknownCandidate { .. }));
        assert!(matches!(got[5], RowResult::Invalid { .. }));

        let again = record(
            &mut conn,
            &[row(Target::Record("00000000000003e8-000000".into()), 1.7)],
            false,
            "x",
            6000,
            &Caller::default(),
        )
        .unwrap();
        assert_eq!(
            again[0],
            RowResult::AlreadyRecorded {
                record_id: "00000000000003e8-000000".into(),
                existing: 1.5
            }
        );
        let replaced = record(
            &mut conn,
            &[row(Target::Record("00000000000003e8-000000".into()), 1.7)],
            true,
            "y",
            7000,
            &Caller {
                peer: Some("10.0.0.7:50100".into()),
                identity: Some("token:ana".into()),
            },
        )
        .unwrap();
        assert_eq!(
            replaced[0],
            RowResult::Replaced {
                record_id: "00000000000003e8-000000".into(),
                previous: 1.5
            }
        );
        let h = history(&conn, "00000000000003e8-000000").unwrap();
        assert_eq!(h.len(), 2);
        assert_eq!((h[0].observed, h[0].superseded_us), (1.5, Some(7000)));
        assert_eq!((h[1].observed, h[1].superseded_us), (1.7, None));
        // Each row keeps the caller of its own call.
        assert_eq!(h[0].caller, Caller::default());
        assert_eq!(h[1].caller.identity.as_deref(), Some("token:ana"));
        assert_eq!(h[1].caller.peer.as_deref(), Some("10.0.0.7:50100"));

        let p = pairs(&conn, "m", 0, 2000).unwrap();
        assert_eq!(p.len(), 2);
        assert_eq!(p[0].observed, 1.7);
        assert_eq!(p[1].verdict.as_deref(), Some("border"));
        assert!(pairs(&conn, "m", 2000, 3000).unwrap().is_empty());
        assert_eq!(recent_outside(&conn, "m", 10).unwrap(), (1, 3));
        assert_eq!(recent_outside(&conn, "m", 1).unwrap(), (1, 1));
    }
}
