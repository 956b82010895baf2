//! The first pass over a CSV file: the header and the records as text, with
//! the line each record starts on, and the rules that classify one cell as a
//! number, a missing value or text.

use std::collections::HashMap;

use csv::{ReaderBuilder, StringRecord, Trim};

use super::error::{ColumnRole, Error};

/// A CSV file as text: no value has been interpreted yet.
pub(crate) struct RawTable {
    pub header: Vec<String>,
    pub records: Vec<StringRecord>,
    /// 1-based line each record starts on (the header is line 1).
    pub lines: Vec<u64>,
}

/// What one cell holds.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) enum Cell {
    Number(f64),
    /// Empty, NA, N/A, NaN, ±inf, or a number too large for f64.
    Missing,
    Text,
}

/// Classifies one (already trimmed) cell. Non-finite numbers count as
/// missing: no model can use them, and the user fixes them the same way.
pub(crate) fn classify(cell: &str) -> Cell {
    if cell.is_empty() || cell.eq_ignore_ascii_case("na") || cell.eq_ignore_ascii_case("n/a") {
        return Cell::Missing;
    }
    match cell.parse::<f64>() {
        Ok(v) if v.is_finite() => Cell::Number(v),
        Ok(_) => Cell::Missing,
        Err(_) => Cell::Text,
    }
}

impl RawTable {
    pub fn parse(bytes: &[u8]) -> Result<RawTable, Error> {
        // Not flexible: a record with the wrong number of fields is an error
        // naming its line, rather than a silently shifted row.
        let mut reader = ReaderBuilder::new()
            .has_headers(true)
            .trim(Trim::All)
            .from_reader(bytes);
        let header = reader.headers().map_err(|e| csv_error(e, 1))?.clone();
        if header.is_empty() || (header.len() == 1 && header[0].is_empty()) {
            return Err(Error::NoHeader);
        }
        let header: Vec<String> = header.iter().map(str::to_owned).collect();
        check_unique_names(&header)?;
        let mut records = Vec::new();
        let mut lines = Vec::new();
        for (index, record) in reader.records().enumerate() {
            // Only used when the parser reports no position of its own.
            let fallback_line = index as u64 + 2;
            let record = record.map_err(|e| csv_error(e, fallback_line))?;
            let line = record.position().map_or(fallback_line, |p| p.line());
            records.push(record);
            lines.push(line);
        }
        Ok(RawTable {
            header,
            records,
            lines,
        })
    }

    /// The index of the column `name` in its `role`, or an error listing the
    /// columns there are.
    pub fn column(&self, name: &str, role: ColumnRole) -> Result<usize, Error> {
        self.header
            .iter()
            .position(|h| h == name)
            .ok_or_else(|| Error::MissingColumn {
                role,
                name: name.to_owned(),
                available: self.header.clone(),
            })
    }

    pub fn cell(&self, row: usize, col: usize) -> &str {
        self.records[row].get(col).unwrap_or("")
    }

    pub fn n_rows(&self) -> usize {
        self.records.len()
    }
}

fn check_unique_names(header: &[String]) -> Result<(), Error> {
    let mut seen: HashMap<&str, usize> = HashMap::new();
    for (j, name) in header.iter().enumerate() {
        if name.is_empty() {
            return Err(Error::UnnamedColumn { position: j + 1 });
        }
        if let Some(&first) = seen.get(name.as_str()) {
            return Err(Error::DuplicateColumn {
                name: name.clone(),
                first: first + 1,
                second: j + 1,
            });
        }
        seen.insert(name, j);
    }
    Ok(())
}

fn csv_error(e: csv::Error, fallback_line: u64) -> Error {
    let line = e.position().map_or(fallback_line, |p| p.line());
    match e.kind() {
        csv::ErrorKind::UnequalLengths {
            expected_len, len, ..
        } => Error::RaggedRow {
            line,
            expected: *expected_len as usize,
            found: *len as usize,
        },
        _ => Error::Csv {
            line,
            message: e.to_string(),
        },
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cells_are_classified_by_the_documented_rules() {
        assert_eq!(classify("1.5"), Cell::Number(1.5));
        assert_eq!(classify("-2e-3"), Cell::Number(-2e-3));
        for missing in [
            "",
            "NA",
            "na",
            "N/A",
            "NaN",
            "nan",
            "inf",
            "-Infinity",
            "1e999",
        ] {
            assert_eq!(classify(missing), Cell::Missing, "{missing:?}");
        }
        for text in ["abc", "1,5", "1.2.3", "C1=CC=CC=C1"] {
            assert_eq!(classify(text), Cell::Text, "{text:?}");
        }
    }

    #[test]
    fn records_remember_their_lines_even_after_a_multiline_field() {
        let raw = RawTable::parse(b"id,x\na,1\n\"b\nc\",2\nd,3\n").unwrap();
        assert_eq!(raw.lines, vec![2, 3, 5]);
        assert_eq!(raw.cell(2, 0), "d");
    }
}
