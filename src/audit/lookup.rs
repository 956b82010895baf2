//! Finding records by the lab's own candidate id, without an index on it.
//!
//! Lab results come back under the lab's candidate ids, so outcomes can be
//! recorded by candidate id and model. An index on `candidates(candidate_id)`
//! answered that, but those ids arrive in no order: each of a batch's
//! 1,000 inserts landed on its own index page, and every page a commit
//! dirties is written whole to the WAL. That one index was about half of
//! the audit writer's time, and dropping it cut the server's CPU per
//! candidate from about 44 to 36 µs on the serving benchmark (README,
//! "Serving performance").
//!
//! Instead each request gets one row in `candidate_digests`: its candidates'
//! id hashes, sorted, each with the candidate's position. Request ids grow
//! with time, so these rows are appended at the end of the table, and a
//! 1,000-candidate request adds a 12 KB blob (three pages) instead of
//! dirtying a thousand. Writes outnumber lookups by orders of magnitude,
//! which is the trade: a lookup reads every digest of the model (12 bytes
//! per candidate the model has scored), once per upload however many rows
//! it holds, and checks each hit against the candidate row itself, so a
//! hash collision can never match the wrong record.
//!
//! A digest is a format byte ([`FORMAT`]) and then, per candidate, the
//! first 8 bytes of the SHA-256 of its id (UTF-8) as a little-endian u64
//! and its position as a little-endian u32, ordered by (hash, position).

use std::collections::{BTreeMap, BTreeSet, HashMap};

use rusqlite::{Connection, OptionalExtension, Transaction, params};

use super::{CandidateRecord, Error};

/// The first byte of every digest; another layout would take another.
pub const FORMAT: u8 = 1;

const ENTRY: usize = 12;

/// The schema step: the digest table, filled for the requests already in
/// the store by [`fill_existing`], and the index it replaces dropped.
pub const MIGRATION_SQL: &str = "
    CREATE TABLE candidate_digests (
        request_id TEXT PRIMARY KEY REFERENCES requests(request_id),
        digest     BLOB NOT NULL
    ) STRICT;
    DROP INDEX IF EXISTS candidates_by_candidate;
";

/// The hash a digest keeps of a candidate id.
pub fn id_hash(candidate_id: &str) -> u64 {
    use sha2::Digest;
    let full = sha2::Sha256::digest(candidate_id.as_bytes());
    let mut first = [0u8; 8];
    first.copy_from_slice(&full[..8]);
    u64::from_le_bytes(first)
}

/// The digest of a request's candidates, given as (position, id).
pub fn digest<'a>(candidates: impl IntoIterator<Item = (u32, &'a str)>) -> Vec<u8> {
    let mut entries: Vec<(u64, u32)> = candidates
        .into_iter()
        .map(|(position, id)| (id_hash(id), position))
        .collect();
    entries.sort_unstable();
    let mut out = Vec::with_capacity(1 + entries.len() * ENTRY);
    out.push(FORMAT);
    for (hash, position) in entries {
        out.extend_from_slice(&hash.to_le_bytes());
        out.extend_from_slice(&position.to_le_bytes());
    }
    out
}

/// The digest of the candidates of one request, as the writer stores it.
pub fn digest_of(candidates: &[CandidateRecord]) -> Vec<u8> {
    digest(
        candidates
            .iter()
            .map(|c| (c.position, c.candidate_id.as_str())),
    )
}

/// Why a stored digest could not be read.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum DigestError {
    #[error("format {found}, where this build reads {FORMAT}")]
    Format { found: u8 },
    #[error("{len} bytes, where a digest is 1 + 12 per candidate")]
    Length { len: usize },
}

/// Calls `hit(w, position)` for every digest entry whose hash is
/// `wanted[w]`; `wanted` is ascending without repeats. One forward pass:
/// each hash is found by galloping from where the previous one ended
/// (doubling steps, then a binary search), so an upload of w ids costs
/// O(w log(n/w)) reads of a digest of n entries, and at most about twice
/// a binary search per id.
fn each_match(digest: &[u8], wanted: &[u64], mut hit: impl FnMut(usize, u32)) {
    let entries = &digest[1..];
    let n = entries.len() / ENTRY;
    let hash_at = |i: usize| {
        let mut b = [0u8; 8];
        b.copy_from_slice(&entries[i * ENTRY..i * ENTRY + 8]);
        u64::from_le_bytes(b)
    };
    let position_at = |i: usize| {
        let mut b = [0u8; 4];
        b.copy_from_slice(&entries[i * ENTRY + 8..i * ENTRY + ENTRY]);
        u32::from_le_bytes(b)
    };
    // Every entry before `lo` has a hash below the one sought.
    let mut lo = 0;
    for (w, &hash) in wanted.iter().enumerate() {
        let (mut hi, mut step) = (lo, 1);
        while hi < n && hash_at(hi) < hash {
            lo = hi + 1;
            hi = lo + step;
            step *= 2;
        }
        let mut hi = hi.min(n);
        while lo < hi {
            let mid = lo + (hi - lo) / 2;
            if hash_at(mid) < hash {
                lo = mid + 1;
            } else {
                hi = mid;
            }
        }
        let mut i = lo;
        while i < n && hash_at(i) == hash {
            hit(w, position_at(i));
            i += 1;
        }
    }
}

fn check(digest: &[u8]) -> Result<(), DigestError> {
    match digest.first() {
        Some(&FORMAT) if (digest.len() - 1).is_multiple_of(ENTRY) => Ok(()),
        Some(&FORMAT) | None => Err(DigestError::Length { len: digest.len() }),
        Some(&found) => Err(DigestError::Format { found }),
    }
}

/// A digest that cannot be what the writer stored, named by its request.
fn corrupt(request_id: &str, detail: String) -> Error {
    Error::Corrupt {
        record_id: request_id.to_string(),
        what: "candidate digest",
        detail,
    }
}

fn read_err(source: rusqlite::Error) -> Error {
    Error::Read { source }
}

/// The record ids, ascending, of every candidate of each model with each
/// id: one read of the model's digests for all the ids asked of it. Ids
/// with no record map to an empty list.
pub fn records_by_candidate(
    conn: &Connection,
    wanted: &[(String, String)],
) -> Result<HashMap<(String, String), Vec<String>>, Error> {
    // Per model, the wanted hashes ascending, each with the ids that have it.
    let mut by_model: HashMap<&str, BTreeMap<u64, Vec<&str>>> = HashMap::new();
    for (candidate_id, model_id) in wanted {
        by_model
            .entry(model_id)
            .or_default()
            .entry(id_hash(candidate_id))
            .or_default()
            .push(candidate_id);
    }
    let mut found: HashMap<(String, String), BTreeSet<String>> = wanted
        .iter()
        .map(|key| (key.clone(), BTreeSet::new()))
        .collect();
    let mut digests = conn
        .prepare_cached(
            "SELECT d.request_id, d.digest FROM requests r JOIN candidate_digests d
                 USING (request_id)
             WHERE r.model_id = ?1",
        )
        .map_err(read_err)?;
    let mut candidate = conn
        .prepare_cached(
            "SELECT record_id, candidate_id FROM candidates
             WHERE request_id = ?1 AND position = ?2",
        )
        .map_err(read_err)?;
    for (model_id, hashes) in &by_model {
        let (sorted, ids_of): (Vec<u64>, Vec<&Vec<&str>>) = hashes.iter().unzip();
        let mut rows = digests.query([model_id]).map_err(read_err)?;
        while let Some(row) = rows.next().map_err(read_err)? {
            let request_id: String = row.get(0).map_err(read_err)?;
            let digest = row.get_ref(1).map_err(read_err)?.as_blob().map_err(|e| {
                read_err(rusqlite::Error::FromSqlConversionFailure(
                    1,
                    rusqlite::types::Type::Blob,
                    Box::new(e),
                ))
            })?;
            check(digest).map_err(|e| corrupt(&request_id, e.to_string()))?;
            let mut hits = Vec::new();
            each_match(digest, &sorted, |w, position| hits.push((w, position)));
            for (w, position) in hits {
                // The row itself decides: a hash shared by two ids
                // matches only the one the row holds.
                let hit: Option<(String, String)> = candidate
                    .query_row(params![request_id, position], |r| {
                        Ok((r.get(0)?, r.get(1)?))
                    })
                    .optional()
                    .map_err(read_err)?;
                let Some((record_id, held)) = hit else {
                    return Err(corrupt(
                        &request_id,
                        format!("it names position {position}, which the request lacks"),
                    ));
                };
                if ids_of[w].contains(&held.as_str())
                    && let Some(set) = found.get_mut(&(held, model_id.to_string()))
                {
                    set.insert(record_id);
                }
            }
        }
    }
    Ok(found
        .into_iter()
        .map(|(key, set)| (key, set.into_iter().collect()))
        .collect())
}

/// Fills `candidate_digests` for every request already in the store, as
/// the schema step that adds it runs: one pass over the candidates in
/// (request, position) order, which their unique index gives.
pub fn fill_existing(tx: &Transaction<'_>) -> rusqlite::Result<()> {
    let mut read = tx.prepare(
        "SELECT request_id, position, candidate_id FROM candidates
         ORDER BY request_id, position",
    )?;
    let mut write =
        tx.prepare("INSERT INTO candidate_digests (request_id, digest) VALUES (?1, ?2)")?;
    let mut rows = read.query([])?;
    let mut current: Option<String> = None;
    let mut members: Vec<(u32, String)> = Vec::new();
    let mut flush = |request: &str, members: &mut Vec<(u32, String)>| {
        let blob = digest(members.iter().map(|(p, id)| (*p, id.as_str())));
        members.clear();
        write.execute(params![request, blob]).map(|_| ())
    };
    while let Some(row) = rows.next()? {
        let request: String = row.get(0)?;
        if current.as_deref() != Some(request.as_str()) {
            if let Some(done) = current.take() {
                flush(&done, &mut members)?;
            }
            current = Some(request);
        }
        members.push((row.get(1)?, row.get(2)?));
    }
    if let Some(done) = current {
        flush(&done, &mut members)?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::audit::sqlite::{MIGRATIONS, open_for_writing, schema_version, write_entries};
    use crate::audit::writer::tests::entry;
    use crate::audit::{Entry, RequestIds, Synchronous};
    use rand::{Rng, SeedableRng};

    /// Requests of two models whose candidates share ids drawn from a small
    /// pool, so most ids recur within and across requests and models.
    fn store_with_shared_ids(conn: &mut Connection) -> Vec<Entry> {
        let ids = RequestIds::starting_after(0);
        let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(5);
        let entries: Vec<Entry> = (0..60)
            .map(|r| {
                let n = if r % 20 == 7 { 0 } else { rng.gen_range(1..40) };
                let mut e = entry(&ids, n);
                e.request.model_id = ["m1", "m2"][r % 2].into();
                for c in &mut e.candidates {
                    c.candidate_id = format!("lot-{}", rng.gen_range(0..150));
                }
                e
            })
            .collect();
        let tx = conn.transaction().unwrap();
        write_entries(&tx, &entries.iter().collect::<Vec<_>>()).unwrap();
        tx.commit().unwrap();
        entries
    }

    /// Every (id, model) pair asked, including ids and models never seen.
    fn every_pair() -> Vec<(String, String)> {
        (0..160)
            .flat_map(|i| {
                ["m1", "m2", "m3"]
                    .into_iter()
                    .map(move |m| (format!("lot-{i}"), m.to_string()))
            })
            .collect()
    }

    /// The oracle: SQLite itself, searching the candidates table row by
    /// row with the query the candidate-id index used to serve.
    fn searched(conn: &Connection, candidate_id: &str, model_id: &str) -> Vec<String> {
        let mut stmt = conn
            .prepare_cached(
                "SELECT c.record_id FROM candidates c JOIN requests r USING (request_id)
                 WHERE c.candidate_id = ?1 AND r.model_id = ?2 ORDER BY c.record_id",
            )
            .unwrap();
        stmt.query_map(params![candidate_id, model_id], |r| r.get(0))
            .unwrap()
            .collect::<rusqlite::Result<_>>()
            .unwrap()
    }

    fn assert_lookups_agree_with_the_search(conn: &Connection) {
        let wanted = every_pair();
        let got = records_by_candidate(conn, &wanted).unwrap();
        assert_eq!(got.len(), wanted.len());
        let (mut single, mut several) = (0, 0);
        for (candidate_id, model_id) in &wanted {
            let expected = searched(conn, candidate_id, model_id);
            single += usize::from(expected.len() == 1);
            several += usize::from(expected.len() > 1);
            assert_eq!(
                got[&(candidate_id.clone(), model_id.clone())],
                expected,
                "{candidate_id} of {model_id}"
            );
        }
        // The data must exercise unique, ambiguous and absent ids alike.
        assert!(
            single > 10 && several > 10,
            "{single} unique, {several} ambiguous"
        );
    }

    #[test]
    fn lookups_agree_with_sqlite_searching_the_candidates_table() {
        let dir = tempfile::tempdir().unwrap();
        let mut conn = open_for_writing(&dir.path().join("a.db"), Synchronous::Normal).unwrap();
        store_with_shared_ids(&mut conn);
        assert_lookups_agree_with_the_search(&conn);
        // A request with no candidates has no digest; every other one has.
        let (requests, digests): (i64, i64) = conn
            .query_row(
                "SELECT (SELECT count(*) FROM requests WHERE n_candidates > 0),
                        (SELECT count(*) FROM candidate_digests)",
                [],
                |r| Ok((r.get(0)?, r.get(1)?)),
            )
            .unwrap();
        assert_eq!(requests, digests);
    }

    /// A store from before the digests (it has the candidate-id index and
    /// no digest table) gets a digest for every request with candidates
    /// as it is upgraded, loses the index, and answers as before.
    #[test]
    fn an_older_store_gets_digests_of_every_request_it_holds() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.db");
        let before;
        {
            let mut conn = open_for_writing(&path, Synchronous::Normal).unwrap();
            store_with_shared_ids(&mut conn);
            before = searched(&conn, "lot-3", "m1");
            // Back to the previous schema, exactly as it was shipped.
            conn.execute_batch(
                "DROP TABLE candidate_digests;
                 CREATE INDEX candidates_by_candidate ON candidates(candidate_id);",
            )
            .unwrap();
            conn.pragma_update(None, "user_version", MIGRATIONS.len() as i64 - 1)
                .unwrap();
        }
        let conn = open_for_writing(&path, Synchronous::Normal).unwrap();
        assert_eq!(schema_version(&conn).unwrap(), MIGRATIONS.len() as i64);
        let index: i64 = conn
            .query_row(
                "SELECT count(*) FROM sqlite_schema WHERE name = 'candidates_by_candidate'",
                [],
                |r| r.get(0),
            )
            .unwrap();
        assert_eq!(index, 0, "the index the digests replace is dropped");
        let check: String = conn
            .query_row("PRAGMA integrity_check", [], |r| r.get(0))
            .unwrap();
        assert_eq!(check, "ok");
        assert!(!before.is_empty());
        assert_eq!(searched(&conn, "lot-3", "m1"), before);
        assert_lookups_agree_with_the_search(&conn);
    }

    /// Two ids with the same hash: the row decides, so a digest entry whose
    /// row holds another id matches nothing; an entry naming a position the
    /// request lacks is reported as corrupt, not skipped.
    #[test]
    fn a_hash_match_is_checked_against_the_row() {
        let dir = tempfile::tempdir().unwrap();
        let conn = open_for_writing(&dir.path().join("a.db"), Synchronous::Normal).unwrap();
        let ids = RequestIds::starting_after(0);
        let e = entry(&ids, 2);
        let tx = conn.unchecked_transaction().unwrap();
        write_entries(&tx, &[&e]).unwrap();
        tx.commit().unwrap();
        let ask = |id: &str| vec![(id.to_string(), "m".to_string())];
        assert_eq!(
            records_by_candidate(&conn, &ask("c1")).unwrap()[&ask("c1")[0]],
            vec![e.candidates[1].record_id.clone()]
        );
        // Position 1 (which holds "c1") filed under the hash of "ghost".
        let forged = digest([(1, "ghost")]);
        conn.execute(
            "UPDATE candidate_digests SET digest = ?1 WHERE request_id = ?2",
            params![forged, e.request.request_id],
        )
        .unwrap();
        assert!(records_by_candidate(&conn, &ask("ghost")).unwrap()[&ask("ghost")[0]].is_empty());
        let dangling = digest([(7, "c1")]);
        conn.execute(
            "UPDATE candidate_digests SET digest = ?1 WHERE request_id = ?2",
            params![dangling, e.request.request_id],
        )
        .unwrap();
        let err = records_by_candidate(&conn, &ask("c1")).unwrap_err();
        assert!(err.to_string().contains("position 7"), "{err}");
    }

    /// SHA-256 of "abc" begins ba 78 16 bf 8f 01 cf ea (FIPS 180-2,
    /// appendix B.1, the standard's own worked example), so its hash is
    /// those bytes read little-endian.
    #[test]
    fn the_id_hash_is_the_first_eight_bytes_of_sha256() {
        assert_eq!(
            id_hash("abc"),
            u64::from_le_bytes([0xba, 0x78, 0x16, 0xbf, 0x8f, 0x01, 0xcf, 0xea])
        );
    }

    /// `each_match` collected as (wanted index, position) pairs.
    fn matches(blob: &[u8], wanted: &[u64]) -> Vec<(usize, u32)> {
        let mut out = Vec::new();
        each_match(blob, wanted, |w, p| out.push((w, p)));
        out
    }

    #[test]
    fn a_digest_finds_every_position_of_every_id_and_nothing_else() {
        let ids = ["c1", "c2", "c1", "lot-7/a", "", "c2", "c1"];
        let blob = digest(ids.iter().enumerate().map(|(p, id)| (p as u32, *id)));
        assert_eq!(blob.len(), 1 + ids.len() * ENTRY);
        check(&blob).unwrap();
        for id in ids {
            let expected: Vec<(usize, u32)> = (0..ids.len() as u32)
                .filter(|&p| ids[p as usize] == id)
                .map(|p| (0, p))
                .collect();
            assert_eq!(matches(&blob, &[id_hash(id)]), expected, "{id:?}");
        }
        assert!(matches(&blob, &[id_hash("c3")]).is_empty());
        let empty = digest(std::iter::empty());
        assert_eq!(empty, vec![FORMAT]);
        assert!(matches(&empty, &[id_hash("c1")]).is_empty());
    }

    /// Many ids at once, against checking every entry of the digest: long
    /// and short gallops, repeated ids, absent ids, hashes below and above
    /// every entry.
    #[test]
    fn one_pass_finds_what_checking_every_entry_finds() {
        let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(9);
        let ids: Vec<String> = (0..3000)
            .map(|_| format!("lot-{}", rng.gen_range(0..2000)))
            .collect();
        let blob = digest(
            ids.iter()
                .enumerate()
                .map(|(p, id)| (p as u32, id.as_str())),
        );
        let entries: Vec<(u64, u32)> = blob[1..]
            .chunks_exact(ENTRY)
            .map(|e| {
                (
                    u64::from_le_bytes(e[..8].try_into().unwrap()),
                    u32::from_le_bytes(e[8..].try_into().unwrap()),
                )
            })
            .collect();
        for asked in [1, 2, 10, 500, 4000] {
            let mut wanted: Vec<u64> = (0..asked)
                .map(|_| id_hash(&format!("lot-{}", rng.gen_range(0..4000))))
                .chain([0, u64::MAX])
                .collect();
            wanted.sort_unstable();
            wanted.dedup();
            let expected: Vec<(usize, u32)> = wanted
                .iter()
                .enumerate()
                .flat_map(|(w, &h)| {
                    entries
                        .iter()
                        .filter(move |e| e.0 == h)
                        .map(move |e| (w, e.1))
                })
                .collect();
            assert!(asked < 10 || !expected.is_empty());
            assert_eq!(matches(&blob, &wanted), expected, "{asked} asked");
        }
    }

    #[test]
    fn a_malformed_digest_is_named() {
        assert_eq!(check(&[2, 0]), Err(DigestError::Format { found: 2 }));
        assert_eq!(check(&[FORMAT, 0, 0]), Err(DigestError::Length { len: 3 }));
        assert_eq!(check(&[]), Err(DigestError::Length { len: 0 }));
    }
}
