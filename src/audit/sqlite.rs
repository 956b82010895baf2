//! The SQLite side of the audit store: opening (WAL, `synchronous`), the
//! schema as an ordered list of migrations tracked by `PRAGMA user_version`,
//! the writes one commit performs, and the read API.

use std::borrow::Cow;
use std::path::{Path, PathBuf};
use std::time::Duration;

use rusqlite::{Connection, OpenFlags, OptionalExtension, Transaction, params};

use super::{
    CandidateRecord, CandidateStatus, Counts, Entry, Error, Method, OutOfRangeRecord,
    RequestRecord, SignalsRecord, StreamRank, Synchronous,
};

/// One schema step.
pub struct Migration {
    pub name: &'static str,
    pub sql: &'static str,
    /// Rows the step computes in Rust (SQL cannot), run after `sql` in the
    /// same transaction.
    pub fill: Option<fn(&Transaction<'_>) -> rusqlite::Result<()>>,
}

/// The schema, in order; `PRAGMA user_version` is the number applied. Add a
/// table by appending one entry; never edit an entry that has shipped.
pub const MIGRATIONS: &[Migration] = &[
    Migration {
        name: "requests, candidates and stream ranks",
        sql: "
        CREATE TABLE requests (
            request_id    TEXT PRIMARY KEY,
            time_us       INTEGER NOT NULL,
            method        TEXT NOT NULL,
            peer          TEXT,
            identity      TEXT,
            model_id      TEXT NOT NULL,
            model_version TEXT NOT NULL,
            batch_label   TEXT NOT NULL,
            confidence    REAL NOT NULL,
            stream_id     TEXT,
            chunk         INTEGER,
            n_candidates  INTEGER NOT NULL,
            n_scored      INTEGER NOT NULL,
            n_flagged     INTEGER NOT NULL,
            n_refused     INTEGER NOT NULL,
            n_rejected    INTEGER NOT NULL
        ) STRICT;
        CREATE INDEX requests_by_stream ON requests(stream_id) WHERE stream_id IS NOT NULL;
        CREATE TABLE candidates (
            record_id          TEXT NOT NULL,
            request_id         TEXT NOT NULL REFERENCES requests(request_id),
            position           INTEGER NOT NULL,
            candidate_id       TEXT NOT NULL,
            status             TEXT NOT NULL
                CHECK (status IN ('scored', 'flagged', 'refused', 'rejected')),
            prediction         REAL,
            lower              REAL,
            upper              REAL,
            confidence         REAL NOT NULL,
            calibration        TEXT,
            verdict            TEXT CHECK (verdict IN ('inside', 'border', 'outside')),
            knn_distance       REAL,
            typicality         REAL,
            beyond_z_threshold INTEGER,
            leverage           REAL,
            pca_residual       REAL,
            out_of_range       TEXT,
            notes              TEXT,
            rank               INTEGER NOT NULL,
            reason             TEXT NOT NULL,
            descriptor_sha256  TEXT NOT NULL,
            descriptors        BLOB
        ) STRICT;
        -- A record id is '<request id>-<position>', so this one index serves
        -- lookups by record id and by request; one index per row written is
        -- what keeps a 1,000-candidate commit cheap.
        CREATE UNIQUE INDEX candidates_by_request ON candidates(request_id, position);
        CREATE TABLE stream_ranks (
            record_id TEXT PRIMARY KEY,
            stream_id TEXT NOT NULL,
            rank      INTEGER NOT NULL
        ) STRICT;
        CREATE INDEX stream_ranks_by_stream ON stream_ranks(stream_id, rank);
    ",
        fill: None,
    },
    super::outcomes::MIGRATION,
    Migration {
        name: "review cases and their decision history",
        sql: super::cases::MIGRATION_SQL,
        fill: None,
    },
    Migration {
        name: "who settled a case or recorded an outcome",
        // Rows written before this step have no caller: NULL, not a guess.
        sql: "
        ALTER TABLE case_history ADD COLUMN caller_peer TEXT;
        ALTER TABLE case_history ADD COLUMN caller_identity TEXT;
        ALTER TABLE outcomes ADD COLUMN caller_peer TEXT;
        ALTER TABLE outcomes ADD COLUMN caller_identity TEXT;
    ",
        fill: None,
    },
    CHECKS_AS_COMPARISONS,
    Migration {
        name: "candidate-id digests per request instead of an index on candidate ids",
        sql: super::lookup::MIGRATION_SQL,
        fill: Some(super::lookup::fill_existing),
    },
];

/// Rewrites the two CHECK constraints of `candidates` from `x IN (list)` to
/// `x = a OR x = b …`: the same rule (a NULL verdict passes either way), but
/// SQLite codes a constant IN list of more than two values as a temporary
/// table built afresh for every row inserted, which was a large share of the
/// audit writer's time per candidate (profiled with `perf` on the serving
/// benchmark). The rewrite edits only the stored schema text, by SQLite's
/// documented procedure for constraint changes that leave the stored rows
/// as they are (sqlite.org/lang_altertable.html, "Making Other Kinds Of
/// Table Schema Changes"); no row is rewritten, so it is instant on a large
/// store. Connections that cached the old schema keep the old (equivalent)
/// constraint until they reopen: [`open_for_writing`] reopens after
/// migrating for that reason.
pub const CHECKS_AS_COMPARISONS: Migration = Migration {
    name: "candidate CHECK constraints as plain comparisons",
    sql: "
        PRAGMA writable_schema = ON;
        UPDATE sqlite_schema
           SET sql = replace(replace(sql,
               'status IN (''scored'', ''flagged'', ''refused'', ''rejected'')',
               'status = ''scored'' OR status = ''flagged'' OR status = ''refused'' OR status = ''rejected'''),
               'verdict IN (''inside'', ''border'', ''outside'')',
               'verdict = ''inside'' OR verdict = ''border'' OR verdict = ''outside''')
         WHERE type = 'table' AND name = 'candidates';
        PRAGMA writable_schema = OFF;
    ",
    fill: None,
};

/// Opens (creating if needed) the database for writing and brings its
/// schema up to date.
pub fn open_for_writing(path: &Path, synchronous: Synchronous) -> Result<Connection, Error> {
    let open_err = |source| opening_error(path, source);
    let conn = Connection::open(path).map_err(open_err)?;
    conn.busy_timeout(Duration::from_secs(5))
        .map_err(open_err)?;
    let conn = if migration_pending(&conn).map_err(open_err)? {
        prepare_connection(&conn, path, synchronous)?;
        // A migration that edits the stored schema text
        // ([`CHECKS_AS_COMPARISONS`]) is seen only by connections opened
        // after it: the writer must prepare its inserts against it.
        drop(conn);
        let fresh = Connection::open(path).map_err(open_err)?;
        fresh
            .busy_timeout(Duration::from_secs(5))
            .map_err(open_err)?;
        fresh
    } else {
        conn
    };
    prepare_connection(&conn, path, synchronous)?;
    // A write lock held elsewhere would otherwise only show at the first
    // commit, as failed calls; taking and releasing it here makes start-up
    // say so instead (after the busy timeout).
    conn.execute_batch("BEGIN IMMEDIATE; COMMIT;")
        .map_err(open_err)?;
    Ok(conn)
}

/// A second connection to a store [`open_for_writing`] has prepared, for
/// checkpoints only. Its `synchronous` decides whether a checkpoint syncs
/// the database file, so it is the writer's.
pub fn open_for_checkpoints(path: &Path, synchronous: Synchronous) -> Result<Connection, Error> {
    let open_err = |source| opening_error(path, source);
    let conn = Connection::open(path).map_err(open_err)?;
    conn.busy_timeout(Duration::from_secs(5))
        .map_err(open_err)?;
    conn.pragma_update(None, "synchronous", synchronous_pragma(synchronous))
        .map_err(open_err)?;
    Ok(conn)
}

fn synchronous_pragma(synchronous: Synchronous) -> &'static str {
    match synchronous {
        Synchronous::Full => "FULL",
        Synchronous::Normal => "NORMAL",
    }
}

/// Whether the database is behind this build's schema.
fn migration_pending(conn: &Connection) -> rusqlite::Result<bool> {
    let found: i64 = conn.query_row("PRAGMA user_version", [], |r| r.get(0))?;
    Ok(found < MIGRATIONS.len() as i64)
}

/// Journal mode, `synchronous`, foreign keys and cache of a write
/// connection, then the migrations still to apply.
fn prepare_connection(
    conn: &Connection,
    path: &Path,
    synchronous: Synchronous,
) -> Result<(), Error> {
    let open_err = |source| opening_error(path, source);
    // journal_mode returns the mode in force; anything but WAL (e.g. on a
    // file system without shared memory) would silently lose concurrency.
    let mode: String = conn
        .query_row("PRAGMA journal_mode = WAL", [], |r| r.get(0))
        .map_err(open_err)?;
    if !mode.eq_ignore_ascii_case("wal") {
        return Err(open_err(rusqlite::Error::InvalidParameterName(format!(
            "journal_mode is {mode}, WAL is required"
        ))));
    }
    conn.pragma_update(None, "synchronous", synchronous_pragma(synchronous))
        .map_err(open_err)?;
    conn.pragma_update(None, "foreign_keys", "ON")
        .map_err(open_err)?;
    // A page cache that holds the hot end of the tables and indexes: every
    // commit appends there. 8 MiB is plenty for that (the serving bench ran
    // no slower than with 64 MiB), and a larger one kept the resident size
    // growing for minutes as it filled with pages no commit needs again.
    conn.pragma_update(None, "cache_size", -8_192)
        .map_err(open_err)?;
    migrate(conn, path).map_err(|e| match e {
        Error::Migrate { source, .. } if is_locked(&source) => Error::Locked {
            path: path.to_path_buf(),
            source,
        },
        other => other,
    })
}

/// An open-time failure: [`Error::Locked`] when another connection holds the
/// lock, [`Error::Open`] otherwise.
fn opening_error(path: &Path, source: rusqlite::Error) -> Error {
    if is_locked(&source) {
        Error::Locked {
            path: path.to_path_buf(),
            source,
        }
    } else {
        Error::Open {
            path: path.to_path_buf(),
            source,
        }
    }
}

fn is_locked(e: &rusqlite::Error) -> bool {
    matches!(
        e.sqlite_error_code(),
        Some(rusqlite::ErrorCode::DatabaseBusy | rusqlite::ErrorCode::DatabaseLocked)
    )
}

/// Caps the database at `max_bytes` (0: no cap) through `max_page_count`,
/// which holds for this connection only: past it, commits fail with
/// SQLITE_FULL exactly as on a full disk, and succeed again once pages are
/// free. The cap never goes below the pages already in use.
pub fn cap_size(conn: &Connection, max_bytes: u64) -> Result<(), Error> {
    if max_bytes == 0 {
        return Ok(());
    }
    let read = |source| Error::Read { source };
    let page_size: i64 = conn
        .query_row("PRAGMA page_size", [], |r| r.get(0))
        .map_err(read)?;
    let pages = (max_bytes / page_size.max(1) as u64).max(1);
    let pages = i64::try_from(pages).unwrap_or(i64::MAX);
    conn.query_row(&format!("PRAGMA max_page_count = {pages}"), [], |r| {
        r.get::<_, i64>(0)
    })
    .map_err(read)?;
    Ok(())
}

/// Applies the migrations not yet applied, each in its own transaction with
/// its version bump.
pub fn migrate(conn: &Connection, path: &Path) -> Result<(), Error> {
    let found: i64 = conn
        .query_row("PRAGMA user_version", [], |r| r.get(0))
        .map_err(|source| Error::Open {
            path: path.to_path_buf(),
            source,
        })?;
    if found > MIGRATIONS.len() as i64 {
        return Err(Error::NewerSchema {
            path: path.to_path_buf(),
            found,
            known: MIGRATIONS.len(),
        });
    }
    for (i, m) in MIGRATIONS.iter().enumerate().skip(found.max(0) as usize) {
        let version = i + 1;
        let fail = |source| Error::Migrate {
            path: path.to_path_buf(),
            version,
            name: m.name,
            source,
        };
        let tx = conn.unchecked_transaction().map_err(fail)?;
        tx.execute_batch(m.sql).map_err(fail)?;
        if let Some(fill) = m.fill {
            fill(&tx).map_err(fail)?;
        }
        tx.pragma_update(None, "user_version", version as i64)
            .map_err(fail)?;
        tx.commit().map_err(fail)?;
    }
    Ok(())
}

/// The schema version of an open database.
pub fn schema_version(conn: &Connection) -> Result<i64, Error> {
    conn.query_row("PRAGMA user_version", [], |r| r.get(0))
        .map_err(|source| Error::Read { source })
}

/// The largest request id in the store, as the number it encodes.
pub fn max_request_id(conn: &Connection) -> Result<u64, Error> {
    let id: Option<String> = conn
        .query_row("SELECT max(request_id) FROM requests", [], |r| r.get(0))
        .map_err(|source| Error::Read { source })?;
    Ok(id
        .as_deref()
        .and_then(super::ids::parse_request_id)
        .unwrap_or(0))
}

/// The columns of a candidate row, in the order [`bind_candidate`] binds
/// them.
const CANDIDATE_INSERT_COLUMNS: &str = "record_id, request_id, position, candidate_id, status, \
     prediction, lower, upper, confidence, calibration, verdict, knn_distance, typicality, \
     beyond_z_threshold, leverage, pca_residual, out_of_range, notes, rank, reason, \
     descriptor_sha256, descriptors";

/// Parameters a candidate row binds.
const CANDIDATE_PARAMS: usize = 22;

/// Candidate rows one insert statement writes. Each statement run has a
/// fixed cost (start, halt, reset) besides its rows, and a statement of
/// several rows pays one more, a statement journal (so that a failing row
/// undoes its statement's earlier ones). On the serving benchmark's
/// batches the writer thread's CPU per candidate fell from 6.4–6.5 µs at
/// one row a statement to 5.7–5.9 µs at 16 (per-thread CPU time from
/// /proc, 5 s of batches, three runs each). 16 rows bind 352 parameters,
/// far below SQLite's limit of 32,766.
const CANDIDATES_PER_INSERT: usize = 16;

/// The insert of `rows` candidate records.
fn insert_candidates_sql(rows: usize) -> String {
    let row = |r: usize| {
        let first = r * CANDIDATE_PARAMS + 1;
        let params: Vec<String> = (first..first + CANDIDATE_PARAMS)
            .map(|i| format!("?{i}"))
            .collect();
        format!("({})", params.join(", "))
    };
    let values: Vec<String> = (0..rows).map(row).collect();
    format!(
        "INSERT INTO candidates ({CANDIDATE_INSERT_COLUMNS}) VALUES {}",
        values.join(", ")
    )
}

/// The two inserts the writer runs, built once rather than at every commit
/// (the statement cache is keyed by their text).
static INSERT_MANY_CANDIDATES: std::sync::LazyLock<String> =
    std::sync::LazyLock::new(|| insert_candidates_sql(CANDIDATES_PER_INSERT));
static INSERT_ONE_CANDIDATE: std::sync::LazyLock<String> =
    std::sync::LazyLock::new(|| insert_candidates_sql(1));

/// Binds candidate `c` as the row whose parameters start after `offset`.
fn bind_candidate(
    stmt: &mut rusqlite::CachedStatement<'_>,
    offset: usize,
    c: &CandidateRecord,
) -> rusqlite::Result<()> {
    let s = c.signals.as_ref();
    // Most candidates have neither: their JSON is the constant "[]",
    // exactly what serde_json writes for an empty list.
    let out_of_range = s
        .map(|s| json_list(&s.out_of_range))
        .transpose()
        .map_err(|e| rusqlite::Error::ToSqlConversionFailure(Box::new(e)))?;
    let notes = s
        .map(|s| json_list(&s.notes))
        .transpose()
        .map_err(|e| rusqlite::Error::ToSqlConversionFailure(Box::new(e)))?;
    let blob = c.descriptors.as_ref().map(|d| f64s_to_le_bytes(d));
    let values: [&dyn rusqlite::ToSql; CANDIDATE_PARAMS] = [
        &c.record_id,
        &c.request_id,
        &c.position,
        &c.candidate_id,
        &c.status.name(),
        &c.prediction,
        &c.lower,
        &c.upper,
        &c.confidence,
        &c.calibration,
        &s.map(|s| s.verdict.as_str()),
        &s.map(|s| s.knn_distance),
        &s.map(|s| s.typicality),
        &s.map(|s| s.beyond_z_threshold),
        &s.map(|s| s.leverage),
        &s.map(|s| s.pca_residual),
        &out_of_range,
        &notes,
        &c.rank,
        &c.reason,
        &c.descriptor_sha256,
        &blob,
    ];
    for (i, v) in values.iter().enumerate() {
        stmt.raw_bind_parameter(offset + i + 1, v)?;
    }
    Ok(())
}

/// Inserts the candidate records, [`CANDIDATES_PER_INSERT`] rows a
/// statement and the rest one by one.
fn insert_candidates(tx: &Transaction<'_>, candidates: &[CandidateRecord]) -> rusqlite::Result<()> {
    let (groups, rest) = candidates.as_chunks::<CANDIDATES_PER_INSERT>();
    if !groups.is_empty() {
        let mut many = tx.prepare_cached(&INSERT_MANY_CANDIDATES)?;
        for group in groups {
            for (r, c) in group.iter().enumerate() {
                bind_candidate(&mut many, r * CANDIDATE_PARAMS, c)?;
            }
            many.raw_execute()?;
        }
    }
    if !rest.is_empty() {
        let mut one = tx.prepare_cached(&INSERT_ONE_CANDIDATE)?;
        for c in rest {
            bind_candidate(&mut one, 0, c)?;
            one.raw_execute()?;
        }
    }
    Ok(())
}

/// Writes the entries inside `tx` (the caller commits).
pub fn write_entries(tx: &Transaction<'_>, entries: &[&Entry]) -> rusqlite::Result<()> {
    let mut req = tx.prepare_cached(
        "INSERT INTO requests (request_id, time_us, method, peer, identity, model_id,
             model_version, batch_label, confidence, stream_id, chunk, n_candidates, n_scored,
             n_flagged, n_refused, n_rejected)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16)",
    )?;
    let mut rank = tx.prepare_cached(
        "INSERT INTO stream_ranks (record_id, stream_id, rank) VALUES (?1, ?2, ?3)",
    )?;
    let mut digest =
        tx.prepare_cached("INSERT INTO candidate_digests (request_id, digest) VALUES (?1, ?2)")?;
    for e in entries {
        let r = &e.request;
        req.execute(params![
            r.request_id,
            r.time_us,
            r.method.name(),
            r.peer,
            r.identity,
            r.model_id,
            r.model_version,
            r.batch_label,
            r.confidence,
            r.stream_id,
            r.chunk,
            r.counts.candidates,
            r.counts.scored,
            r.counts.flagged,
            r.counts.refused,
            r.counts.rejected,
        ])?;
        insert_candidates(tx, &e.candidates)?;
        if !e.candidates.is_empty() {
            digest.execute(params![
                r.request_id,
                super::lookup::digest_of(&e.candidates)
            ])?;
        }
        for sr in &e.stream_ranks {
            rank.execute(params![sr.record_id, sr.stream_id, sr.rank])?;
        }
    }
    Ok(())
}

/// A list as JSON text, without serialising when it is empty.
fn json_list<T: serde::Serialize>(items: &[T]) -> serde_json::Result<Cow<'static, str>> {
    if items.is_empty() {
        Ok(Cow::Borrowed("[]"))
    } else {
        serde_json::to_string(items).map(Cow::Owned)
    }
}

pub fn f64s_to_le_bytes(values: &[f64]) -> Vec<u8> {
    let mut out = Vec::with_capacity(values.len() * 8);
    for v in values {
        out.extend_from_slice(&v.to_le_bytes());
    }
    out
}

/// Read access to the store, for tests and review. Opens its own
/// connection; in WAL mode reading never blocks the writer.
pub struct AuditReader {
    conn: Connection,
    path: PathBuf,
}

const REQUEST_COLUMNS: &str = "request_id, time_us, method, peer, identity, model_id, \
     model_version, batch_label, confidence, stream_id, chunk, n_candidates, n_scored, \
     n_flagged, n_refused, n_rejected";

pub(super) const CANDIDATE_COLUMNS: &str = "record_id, request_id, position, candidate_id, status, \
     prediction, lower, upper, confidence, calibration, verdict, knn_distance, typicality, \
     beyond_z_threshold, leverage, pca_residual, out_of_range, notes, rank, reason, \
     descriptor_sha256, descriptors";

impl AuditReader {
    pub fn open(path: &Path) -> Result<AuditReader, Error> {
        let conn = Connection::open_with_flags(
            path,
            OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )
        .map_err(|source| Error::Open {
            path: path.to_path_buf(),
            source,
        })?;
        conn.busy_timeout(Duration::from_secs(5))
            .map_err(|source| Error::Open {
                path: path.to_path_buf(),
                source,
            })?;
        Ok(AuditReader {
            conn,
            path: path.to_path_buf(),
        })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    pub fn schema_version(&self) -> Result<i64, Error> {
        schema_version(&self.conn)
    }

    pub fn request(&self, request_id: &str) -> Result<Option<RequestRecord>, Error> {
        let sql = format!("SELECT {REQUEST_COLUMNS} FROM requests WHERE request_id = ?1");
        let raw = self
            .conn
            .query_row(&sql, [request_id], raw_request)
            .optional()
            .map_err(|source| Error::Read { source })?;
        raw.map(RawRequest::into_record).transpose()
    }

    /// Every request, oldest first.
    pub fn requests(&self) -> Result<Vec<RequestRecord>, Error> {
        let sql = format!("SELECT {REQUEST_COLUMNS} FROM requests ORDER BY request_id");
        self.read_all(&sql, [], raw_request, RawRequest::into_record)
    }

    /// Every row of `sql`, read raw and then checked into its record.
    fn read_all<P: rusqlite::Params, R, T>(
        &self,
        sql: &str,
        params: P,
        raw: fn(&rusqlite::Row<'_>) -> rusqlite::Result<R>,
        into_record: fn(R) -> Result<T, Error>,
    ) -> Result<Vec<T>, Error> {
        let mut stmt = self
            .conn
            .prepare(sql)
            .map_err(|source| Error::Read { source })?;
        let rows = stmt
            .query_map(params, raw)
            .map_err(|source| Error::Read { source })?;
        let mut out = Vec::new();
        for row in rows {
            out.push(into_record(row.map_err(|source| Error::Read { source })?)?);
        }
        Ok(out)
    }

    pub fn candidate(&self, record_id: &str) -> Result<Option<CandidateRecord>, Error> {
        let Some((request_id, position)) = super::ids::parse_record_id(record_id) else {
            return Ok(None);
        };
        let sql = format!(
            "SELECT {CANDIDATE_COLUMNS} FROM candidates WHERE request_id = ?1 AND position = ?2"
        );
        let raw = self
            .conn
            .query_row(&sql, params![request_id, position], raw_candidate)
            .optional()
            .map_err(|source| Error::Read { source })?;
        raw.map(RawCandidate::into_record).transpose()
    }

    /// The candidates of one request, in request order.
    pub fn candidates_of(&self, request_id: &str) -> Result<Vec<CandidateRecord>, Error> {
        let sql = format!(
            "SELECT {CANDIDATE_COLUMNS} FROM candidates WHERE request_id = ?1 ORDER BY position"
        );
        self.read_all(&sql, [request_id], raw_candidate, RawCandidate::into_record)
    }

    /// The overall ranking of a stream, best first.
    pub fn stream_ranks(&self, stream_id: &str) -> Result<Vec<StreamRank>, Error> {
        let mut stmt = self
            .conn
            .prepare(
                "SELECT record_id, stream_id, rank FROM stream_ranks WHERE stream_id = ?1 \
                 ORDER BY rank",
            )
            .map_err(|source| Error::Read { source })?;
        let rows = stmt
            .query_map([stream_id], |r| {
                Ok(StreamRank {
                    record_id: r.get(0)?,
                    stream_id: r.get(1)?,
                    rank: r.get(2)?,
                })
            })
            .map_err(|source| Error::Read { source })?;
        rows.collect::<rusqlite::Result<Vec<_>>>()
            .map_err(|source| Error::Read { source })
    }

    /// Number of candidate records in the store.
    pub fn candidate_count(&self) -> Result<u64, Error> {
        let n: i64 = self
            .conn
            .query_row("SELECT count(*) FROM candidates", [], |r| r.get(0))
            .map_err(|source| Error::Read { source })?;
        Ok(n.max(0) as u64)
    }
}

struct RawRequest {
    record: RequestRecord,
    method: String,
}

impl RawRequest {
    fn into_record(self) -> Result<RequestRecord, Error> {
        let mut record = self.record;
        record.method = Method::parse(&self.method).ok_or_else(|| Error::Corrupt {
            record_id: record.request_id.clone(),
            what: "method",
            detail: self.method.clone(),
        })?;
        Ok(record)
    }
}

fn raw_request(r: &rusqlite::Row<'_>) -> rusqlite::Result<RawRequest> {
    Ok(RawRequest {
        method: r.get(2)?,
        record: RequestRecord {
            request_id: r.get(0)?,
            time_us: r.get(1)?,
            method: Method::Score,
            peer: r.get(3)?,
            identity: r.get(4)?,
            model_id: r.get(5)?,
            model_version: r.get(6)?,
            batch_label: r.get(7)?,
            confidence: r.get(8)?,
            stream_id: r.get(9)?,
            chunk: r.get(10)?,
            counts: Counts {
                candidates: r.get(11)?,
                scored: r.get(12)?,
                flagged: r.get(13)?,
                refused: r.get(14)?,
                rejected: r.get(15)?,
            },
        },
    })
}

pub(super) struct RawCandidate {
    record: CandidateRecord,
    status: String,
    verdict: Option<String>,
    numbers: [Option<f64>; 4],
    beyond: Option<bool>,
    out_of_range: Option<String>,
    notes: Option<String>,
    blob: Option<Vec<u8>>,
}

pub(super) fn raw_candidate(r: &rusqlite::Row<'_>) -> rusqlite::Result<RawCandidate> {
    Ok(RawCandidate {
        status: r.get(4)?,
        verdict: r.get(10)?,
        numbers: [r.get(11)?, r.get(12)?, r.get(14)?, r.get(15)?],
        beyond: r.get(13)?,
        out_of_range: r.get(16)?,
        notes: r.get(17)?,
        blob: r.get(21)?,
        record: CandidateRecord {
            record_id: r.get(0)?,
            request_id: r.get(1)?,
            position: r.get(2)?,
            candidate_id: r.get(3)?,
            status: CandidateStatus::Rejected,
            prediction: r.get(5)?,
            lower: r.get(6)?,
            upper: r.get(7)?,
            confidence: r.get(8)?,
            calibration: r.get(9)?,
            signals: None,
            rank: r.get(18)?,
            reason: r.get(19)?,
            descriptor_sha256: r.get(20)?,
            descriptors: None,
        },
    })
}

impl RawCandidate {
    pub(super) fn into_record(self) -> Result<CandidateRecord, Error> {
        let mut rec = self.record;
        let corrupt = |what, detail: String| Error::Corrupt {
            record_id: rec.record_id.clone(),
            what,
            detail,
        };
        rec.status =
            CandidateStatus::parse(&self.status).ok_or_else(|| corrupt("status", self.status))?;
        if let Some(verdict) = self.verdict {
            let [knn, typ, lev, res] = self.numbers;
            let (Some(knn_distance), Some(typicality), Some(leverage), Some(pca_residual)) =
                (knn, typ, lev, res)
            else {
                return Err(corrupt("signals", "a signal is missing".into()));
            };
            let out_of_range: Vec<OutOfRangeRecord> =
                serde_json::from_str(self.out_of_range.as_deref().unwrap_or("[]"))
                    .map_err(|e| corrupt("out_of_range", e.to_string()))?;
            let notes: Vec<String> = serde_json::from_str(self.notes.as_deref().unwrap_or("[]"))
                .map_err(|e| corrupt("notes", e.to_string()))?;
            rec.signals = Some(SignalsRecord {
                verdict,
                knn_distance,
                typicality,
                beyond_z_threshold: self.beyond.unwrap_or(false),
                leverage,
                pca_residual,
                out_of_range,
                notes,
            });
        }
        if let Some(blob) = self.blob {
            if blob.len() % 8 != 0 {
                return Err(corrupt(
                    "descriptors",
                    format!("{} bytes is not a whole number of f64", blob.len()),
                ));
            }
            rec.descriptors = Some(
                blob.chunks_exact(8)
                    .map(|b| f64::from_le_bytes([b[0], b[1], b[2], b[3], b[4], b[5], b[6], b[7]]))
                    .collect(),
            );
        }
        Ok(rec)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn migrations_bring_a_new_database_to_the_latest_version_once() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.db");
        let conn = open_for_writing(&path, Synchronous::Full).unwrap();
        assert_eq!(schema_version(&conn).unwrap(), MIGRATIONS.len() as i64);
        drop(conn);
        // Reopening applies nothing (a second CREATE TABLE would fail).
        let conn = open_for_writing(&path, Synchronous::Normal).unwrap();
        assert_eq!(schema_version(&conn).unwrap(), MIGRATIONS.len() as i64);
        let mode: String = conn
            .query_row("PRAGMA journal_mode", [], |r| r.get(0))
            .unwrap();
        assert_eq!(mode, "wal");
    }

    /// Inserts one request and one candidate with the given status and
    /// verdict, by hand, as a tool or an older build might.
    fn insert_by_hand(
        conn: &Connection,
        request_id: &str,
        status: &str,
        verdict: Option<&str>,
    ) -> rusqlite::Result<usize> {
        conn.execute(
            "INSERT OR IGNORE INTO requests VALUES (?1, 0, 'Score', NULL, NULL, 'm', 'v', '', 0.9, \
             NULL, NULL, 1, 1, 0, 0, 0)",
            [request_id],
        )?;
        conn.execute(
            "INSERT INTO candidates (record_id, request_id, position, candidate_id, status, \
             confidence, verdict, rank, reason, descriptor_sha256) \
             VALUES (?1 || '-000000', ?1, (SELECT count(*) FROM candidates WHERE request_id = ?1), \
             'c', ?2, 0.9, ?3, 0, '', '')",
            params![request_id, status, verdict],
        )
    }

    fn candidates_sql(conn: &Connection) -> String {
        conn.query_row(
            "SELECT sql FROM sqlite_schema WHERE type = 'table' AND name = 'candidates'",
            [],
            |r| r.get(0),
        )
        .unwrap()
    }

    /// The rewritten constraints keep the rule: every status and verdict
    /// the service writes passes, NULL verdicts pass, anything else fails;
    /// and the insert the writer runs builds no temporary table per row
    /// (SQLite's `OpenEphemeral` opcode, the cost of an IN list).
    #[test]
    fn candidate_checks_are_comparisons_and_still_refuse_unknown_values() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.db");
        let conn = open_for_writing(&path, Synchronous::Normal).unwrap();
        let sql = candidates_sql(&conn);
        assert!(!sql.contains(" IN ("), "{sql}");
        assert!(sql.contains("status = 'rejected'"), "{sql}");
        let mut explain = conn
            .prepare(&format!("EXPLAIN {}", *INSERT_MANY_CANDIDATES))
            .unwrap();
        // EXPLAIN compiles without running: the parameters stay unbound.
        let mut rows = explain.raw_query();
        let mut plan: Vec<String> = Vec::new();
        while let Some(row) = rows.next().unwrap() {
            plan.push(row.get(1).unwrap());
        }
        assert!(plan.iter().any(|op| op == "Insert"), "{plan:?}");
        assert!(!plan.iter().any(|op| op == "OpenEphemeral"), "{plan:?}");
        for status in ["scored", "flagged", "refused", "rejected"] {
            for verdict in [Some("inside"), Some("border"), Some("outside"), None] {
                insert_by_hand(&conn, "r1", status, verdict).unwrap();
            }
        }
        for (status, verdict) in [
            ("scores", Some("inside")),
            ("scored", Some("in")),
            ("", None),
        ] {
            let err = insert_by_hand(&conn, "r2", status, verdict).unwrap_err();
            assert!(err.to_string().contains("CHECK constraint failed"), "{err}");
        }
    }

    /// A store made before the rewrite, with rows in it, is upgraded in
    /// place: the rows stay, the file passes SQLite's integrity check, and
    /// the new text is what later connections read.
    #[test]
    fn an_older_store_with_rows_is_upgraded_in_place() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.db");
        let before = MIGRATIONS
            .iter()
            .position(|m| m.name == CHECKS_AS_COMPARISONS.name)
            .unwrap();
        {
            let conn = Connection::open(&path).unwrap();
            for m in &MIGRATIONS[..before] {
                conn.execute_batch(m.sql).unwrap();
            }
            conn.pragma_update(None, "user_version", before as i64)
                .unwrap();
            assert!(candidates_sql(&conn).contains("status IN ('scored'"));
            insert_by_hand(&conn, "r1", "flagged", Some("border")).unwrap();
            insert_by_hand(&conn, "r1", "rejected", None).unwrap();
        }
        let conn = open_for_writing(&path, Synchronous::Full).unwrap();
        assert_eq!(schema_version(&conn).unwrap(), MIGRATIONS.len() as i64);
        assert!(!candidates_sql(&conn).contains(" IN ("));
        let check: String = conn
            .query_row("PRAGMA integrity_check", [], |r| r.get(0))
            .unwrap();
        assert_eq!(check, "ok");
        let reader = AuditReader::open(&path).unwrap();
        assert_eq!(reader.candidate_count().unwrap(), 2);
        let err = insert_by_hand(&conn, "r1", "bogus", None).unwrap_err();
        assert!(err.to_string().contains("CHECK constraint failed"), "{err}");
    }

    #[test]
    fn a_database_from_a_newer_build_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.db");
        {
            let conn = Connection::open(&path).unwrap();
            conn.pragma_update(None, "user_version", 99).unwrap();
        }
        let err = open_for_writing(&path, Synchronous::Full).unwrap_err();
        assert!(matches!(err, Error::NewerSchema { found: 99, .. }), "{err}");
    }

    #[test]
    fn blobs_round_trip_every_bit() {
        let values = [0.0, -0.0, 1.5, f64::MIN_POSITIVE, -1e308, 1.0 / 3.0];
        let bytes = f64s_to_le_bytes(&values);
        let back: Vec<f64> = bytes
            .chunks_exact(8)
            .map(|b| f64::from_le_bytes(b.try_into().unwrap()))
            .collect();
        for (a, b) in values.iter().zip(&back) {
            assert_eq!(a.to_bits(), b.to_bits());
        }
    }
}
