//! Request and record ids.
//!
//! A request id is the request's arrival time in microseconds since the Unix
//! epoch as 16 lowercase hex digits, bumped past the last id issued so ids
//! are strictly increasing and unique even when two requests arrive in the
//! same microsecond or the clock steps back. The generator starts after the
//! largest id already in the store, so ids stay unique across restarts.
//! Fixed width makes text order equal time order.
//!
//! A record id is `<request id>-<position>` with the position as six
//! decimal digits (requests hold at most 999,999 candidates), so records
//! sort by request, then position.

use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{SystemTime, UNIX_EPOCH};

/// Issues request ids.
#[derive(Debug)]
pub struct RequestIds {
    last: AtomicU64,
}

impl RequestIds {
    /// A generator whose ids all exceed `floor` (the largest id in use).
    pub fn starting_after(floor: u64) -> RequestIds {
        RequestIds {
            last: AtomicU64::new(floor),
        }
    }

    /// The next id with the arrival time it encodes (microseconds, which may
    /// run ahead of the clock by the bumps).
    pub fn next(&self) -> (String, i64) {
        let now = now_micros();
        let mut prev = self.last.load(Ordering::Relaxed);
        loop {
            let candidate = now.max(prev + 1);
            match self.last.compare_exchange_weak(
                prev,
                candidate,
                Ordering::Relaxed,
                Ordering::Relaxed,
            ) {
                Ok(_) => return (format_request_id(candidate), candidate as i64),
                Err(actual) => prev = actual,
            }
        }
    }
}

pub fn format_request_id(micros: u64) -> String {
    format!("{micros:016x}")
}

/// The number a request id encodes, if it is one of ours.
pub fn parse_request_id(id: &str) -> Option<u64> {
    if id.len() != 16 {
        return None;
    }
    u64::from_str_radix(id, 16).ok()
}

/// The record id of the candidate at `position` of a request.
pub fn record_id(request_id: &str, position: usize) -> String {
    format!("{request_id}-{position:06}")
}

/// The request id and position a record id names, if it is one of ours.
pub fn parse_record_id(record_id: &str) -> Option<(&str, i64)> {
    let (request, position) = record_id.rsplit_once('-')?;
    parse_request_id(request)?;
    if position.is_empty() || !position.bytes().all(|b| b.is_ascii_digit()) {
        return None;
    }
    Some((request, position.parse().ok()?))
}

fn now_micros() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map(|d| d.as_micros() as u64)
        .unwrap_or(0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ids_strictly_increase_as_text_and_as_numbers() {
        let ids = RequestIds::starting_after(0);
        let issued: Vec<String> = (0..10_000).map(|_| ids.next().0).collect();
        for w in issued.windows(2) {
            assert!(w[0] < w[1], "{} then {}", w[0], w[1]);
            assert!(parse_request_id(&w[0]) < parse_request_id(&w[1]));
        }
    }

    #[test]
    fn ids_start_after_the_floor_even_if_the_clock_is_behind_it() {
        let floor = now_micros() + 60_000_000;
        let ids = RequestIds::starting_after(floor);
        let (first, _) = ids.next();
        assert_eq!(parse_request_id(&first), Some(floor + 1));
    }

    #[test]
    fn ids_are_unique_across_threads() {
        let ids = std::sync::Arc::new(RequestIds::starting_after(0));
        let handles: Vec<_> = (0..4)
            .map(|_| {
                let ids = ids.clone();
                std::thread::spawn(move || (0..2_000).map(|_| ids.next().0).collect::<Vec<_>>())
            })
            .collect();
        let mut all: Vec<String> = handles
            .into_iter()
            .flat_map(|h| h.join().unwrap())
            .collect();
        let n = all.len();
        all.sort();
        all.dedup();
        assert_eq!(all.len(), n);
    }

    #[test]
    fn record_ids_sort_by_request_then_position() {
        let a = record_id("00000000000000ff", 9);
        let b = record_id("00000000000000ff", 10);
        let c = record_id("0000000000000100", 0);
        assert!(a < b && b < c, "{a} {b} {c}");
        assert_eq!(b, "00000000000000ff-000010");
        assert_eq!(parse_record_id(&b), Some(("00000000000000ff", 10)));
        for bad in [
            "",
            "00000000000000ff",
            "xyz-1",
            "00000000000000ff-",
            "00000000000000ff-1a",
        ] {
            assert_eq!(parse_record_id(bad), None, "{bad}");
        }
    }
}
