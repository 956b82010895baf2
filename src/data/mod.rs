//! Reading descriptor tables (CSV with a header) with row- and
//! column-precise errors.
//!
//! # Which columns are descriptors
//! The spec names the id column and, optionally, the target, group and time
//! columns. When it also lists the descriptors, exactly those columns are
//! read, in that order, and a cell in them that is not a number is an error.
//! Otherwise every other column that holds at least one finite number is a
//! descriptor, in file order; a column with no number at all (names, SMILES,
//! notes, or entirely empty) is skipped with a warning. A descriptor column
//! that holds numbers and also text is an error at its first text cell, so a
//! typo never silently removes a descriptor; list the descriptors explicitly
//! if such a column is not one.
//!
//! # Missing values
//! Empty cells, `NA`, `N/A`, `NaN`, `±inf` and numbers beyond f64's range in
//! the target, group, time or descriptor columns are missing. They are an
//! error listing the first [`MAX_LISTED`] offenders and their total, unless
//! `drop_incomplete` is set: then their rows are dropped and counted.
//!
//! Descriptors that are constant on the rows kept are dropped with a warning
//! and listed in [`Table::dropped_constant`] (they carry no information and
//! would only be centred to zero); [`read_for_model`] keeps them, because the
//! bundle's schema decides there.

mod error;
mod raw;

use std::collections::HashMap;
use std::io::Read;
use std::path::Path;

use ndarray::{Array1, Array2};
use sha2::{Digest, Sha256};

pub use error::{BadCell, ColumnRole, Error, MAX_LISTED};
use raw::{Cell, RawTable, classify};

/// A validated descriptor table.
#[derive(Clone, Debug)]
pub struct Table {
    pub ids: Vec<String>,
    pub descriptor_names: Vec<String>,
    /// rows × descriptors, all finite.
    pub x: Array2<f64>,
    /// The target, when the spec names one.
    pub y: Option<Array1<f64>>,
    pub groups: Option<Vec<String>>,
    pub times: Option<Vec<f64>>,
    /// Descriptors dropped because they were constant.
    pub dropped_constant: Vec<String>,
    /// Rows dropped by `--drop-incomplete`.
    pub dropped_incomplete: usize,
    /// SHA-256 of the file's bytes, hex.
    pub sha256: String,
}

/// What to read from a table: the names of the columns with a role.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct TableSpec {
    pub id: String,
    pub target: Option<String>,
    pub group: Option<String>,
    pub time: Option<String>,
    /// The descriptor columns, in this order; `None` takes every other
    /// numeric column (see the module documentation).
    pub descriptors: Option<Vec<String>>,
    /// Drop rows with a missing or non-finite value instead of failing.
    pub drop_incomplete: bool,
}

/// Reads a descriptor table from a CSV file.
pub fn read_table(path: &Path, spec: &TableSpec) -> Result<Table, Error> {
    read_table_from_bytes(&read_file(path)?, spec)
}

/// [`read_table`] from any reader (the whole input is read first, since the
/// table's hash covers every byte).
pub fn read_table_from_reader<R: Read>(mut reader: R, spec: &TableSpec) -> Result<Table, Error> {
    let mut bytes = Vec::new();
    reader.read_to_end(&mut bytes).map_err(|source| Error::Io {
        path: "<input>".into(),
        source,
    })?;
    read_table_from_bytes(&bytes, spec)
}

/// [`read_table`] from the bytes of a CSV file.
pub fn read_table_from_bytes(bytes: &[u8], spec: &TableSpec) -> Result<Table, Error> {
    let raw = RawTable::parse(bytes)?;
    let roles = RoleColumns::resolve(&raw, spec)?;
    let descriptors = match &spec.descriptors {
        Some(names) => listed_descriptors(&raw, names, &roles)?,
        None => detected_descriptors(&raw, &roles),
    };
    let parsed = parse_rows(&raw, &roles, &descriptors, spec.drop_incomplete)?;
    let (x, names, dropped_constant) = drop_constant(
        parsed.x,
        descriptors.iter().map(|&j| raw.header[j].clone()).collect(),
    );
    if names.is_empty() {
        return Err(Error::NoDescriptors {
            dropped_constant,
            skipped_non_numeric: skipped_columns(&raw, &roles, &descriptors),
        });
    }
    Ok(Table {
        ids: parsed.ids,
        descriptor_names: names,
        x,
        y: parsed.y.map(Array1::from),
        groups: parsed.groups,
        times: parsed.times,
        dropped_constant,
        dropped_incomplete: parsed.dropped_incomplete,
        sha256: sha256_hex(bytes),
    })
}

/// Reads the rows a fitted model is to score (predict, evaluate): the file
/// must hold every descriptor the bundle expects, in any order; they are
/// returned in `descriptor_names`' order, other columns are ignored, and no
/// descriptor is dropped for being constant.
pub fn read_for_model(
    path: &Path,
    id_col: &str,
    descriptor_names: &[String],
    target: Option<&str>,
) -> Result<Table, Error> {
    read_for_model_from_bytes(&read_file(path)?, id_col, descriptor_names, target)
}

/// [`read_for_model`] from the bytes of a CSV file.
pub fn read_for_model_from_bytes(
    bytes: &[u8],
    id_col: &str,
    descriptor_names: &[String],
    target: Option<&str>,
) -> Result<Table, Error> {
    let raw = RawTable::parse(bytes)?;
    let spec = TableSpec {
        id: id_col.to_owned(),
        target: target.map(str::to_owned),
        ..TableSpec::default()
    };
    let roles = RoleColumns::resolve(&raw, &spec)?;
    let missing: Vec<String> = descriptor_names
        .iter()
        .filter(|name| !raw.header.contains(name))
        .cloned()
        .collect();
    if !missing.is_empty() {
        return Err(Error::MissingDescriptors {
            missing,
            expected: descriptor_names.len(),
        });
    }
    let descriptors = listed_descriptors(&raw, descriptor_names, &roles)?;
    let parsed = parse_rows(&raw, &roles, &descriptors, false)?;
    Ok(Table {
        ids: parsed.ids,
        descriptor_names: descriptor_names.to_vec(),
        x: parsed.x,
        y: parsed.y.map(Array1::from),
        groups: None,
        times: None,
        dropped_constant: Vec::new(),
        dropped_incomplete: 0,
        sha256: sha256_hex(bytes),
    })
}

/// The fewest rows nested cross-validation with `k_outer` × `k_inner` folds
/// accepts: 2·K_outer·K_inner (common practice, our choice). Every outer
/// fold then holds at least 2·K_inner rows and, with folds of near-equal
/// size, every inner fold of the outer-training rows at least 2 — the least
/// that gives a test error a spread. Cluster and group folds are uneven, so
/// this is a floor, not a guarantee; the fold makers report what they could
/// not do.
pub fn rows_needed(k_outer: usize, k_inner: usize) -> usize {
    2 * k_outer * k_inner
}

/// Fails when `n` rows are too few for the folds (see [`rows_needed`]).
pub fn check_enough_rows(n: usize, k_outer: usize, k_inner: usize) -> Result<(), Error> {
    for (k, level) in [(k_outer, "outer"), (k_inner, "inner")] {
        if k < 2 {
            return Err(Error::TooFewFolds { k, level });
        }
    }
    let needed = rows_needed(k_outer, k_inner);
    if n < needed {
        return Err(Error::TooFewRows {
            n,
            needed,
            k_outer,
            k_inner,
        });
    }
    Ok(())
}

fn read_file(path: &Path) -> Result<Vec<u8>, Error> {
    std::fs::read(path).map_err(|source| Error::Io {
        path: path.to_owned(),
        source,
    })
}

fn sha256_hex(bytes: &[u8]) -> String {
    Sha256::digest(bytes)
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect()
}

/// The indices of the columns with a role other than descriptor.
struct RoleColumns {
    id: usize,
    target: Option<usize>,
    group: Option<usize>,
    time: Option<usize>,
}

impl RoleColumns {
    fn resolve(raw: &RawTable, spec: &TableSpec) -> Result<RoleColumns, Error> {
        let optional =
            |name: &Option<String>, role| name.as_deref().map(|n| raw.column(n, role)).transpose();
        let roles = RoleColumns {
            id: raw.column(&spec.id, ColumnRole::Id)?,
            target: optional(&spec.target, ColumnRole::Target)?,
            group: optional(&spec.group, ColumnRole::Group)?,
            time: optional(&spec.time, ColumnRole::Time)?,
        };
        let assigned = roles.assigned();
        for (a, &(col_a, role_a)) in assigned.iter().enumerate() {
            if let Some(&(_, role_b)) = assigned[a + 1..].iter().find(|(c, _)| *c == col_a) {
                return Err(Error::RoleConflict {
                    name: raw.header[col_a].clone(),
                    first: role_a,
                    second: role_b,
                });
            }
        }
        Ok(roles)
    }

    fn assigned(&self) -> Vec<(usize, ColumnRole)> {
        let mut out = vec![(self.id, ColumnRole::Id)];
        out.extend(self.target.map(|c| (c, ColumnRole::Target)));
        out.extend(self.group.map(|c| (c, ColumnRole::Group)));
        out.extend(self.time.map(|c| (c, ColumnRole::Time)));
        out
    }

    fn role_of(&self, col: usize) -> Option<ColumnRole> {
        self.assigned()
            .into_iter()
            .find(|&(c, _)| c == col)
            .map(|(_, r)| r)
    }
}

fn listed_descriptors(
    raw: &RawTable,
    names: &[String],
    roles: &RoleColumns,
) -> Result<Vec<usize>, Error> {
    let mut cols = Vec::with_capacity(names.len());
    for name in names {
        let col = raw.column(name, ColumnRole::Descriptor)?;
        if let Some(role) = roles.role_of(col) {
            return Err(Error::RoleConflict {
                name: name.clone(),
                first: role,
                second: ColumnRole::Descriptor,
            });
        }
        if cols.contains(&col) {
            return Err(Error::DescriptorListedTwice { name: name.clone() });
        }
        cols.push(col);
    }
    Ok(cols)
}

/// Every column without a role that holds at least one finite number.
fn detected_descriptors(raw: &RawTable, roles: &RoleColumns) -> Vec<usize> {
    let mut cols = Vec::new();
    for col in 0..raw.header.len() {
        if roles.role_of(col).is_some() {
            continue;
        }
        let numeric =
            (0..raw.n_rows()).any(|row| matches!(classify(raw.cell(row, col)), Cell::Number(_)));
        if numeric {
            cols.push(col);
        } else {
            tracing::warn!(
                column = %raw.header[col],
                "column holds no number; it is not used as a descriptor"
            );
        }
    }
    cols
}

fn skipped_columns(raw: &RawTable, roles: &RoleColumns, descriptors: &[usize]) -> Vec<String> {
    (0..raw.header.len())
        .filter(|c| roles.role_of(*c).is_none() && !descriptors.contains(c))
        .map(|c| raw.header[c].clone())
        .collect()
}

/// The rows of a table with every value interpreted.
struct ParsedRows {
    ids: Vec<String>,
    x: Array2<f64>,
    y: Option<Vec<f64>>,
    groups: Option<Vec<String>>,
    times: Option<Vec<f64>>,
    dropped_incomplete: usize,
}

/// One row's values, or the cells that made it incomplete.
struct RowValues {
    x: Vec<f64>,
    y: Option<f64>,
    group: Option<String>,
    time: Option<f64>,
    missing: Vec<BadCell>,
}

fn parse_rows(
    raw: &RawTable,
    roles: &RoleColumns,
    descriptors: &[usize],
    drop_incomplete: bool,
) -> Result<ParsedRows, Error> {
    let ids = read_ids(raw, roles.id)?;
    let mut kept_ids = Vec::new();
    let mut x = Vec::new();
    let mut y = roles.target.map(|_| Vec::new());
    let mut groups = roles.group.map(|_| Vec::new());
    let mut times = roles.time.map(|_| Vec::new());
    let mut missing_total = 0;
    let mut missing_first = Vec::new();
    let mut dropped = 0;
    for (row, id) in ids.into_iter().enumerate() {
        let values = parse_row(raw, row, roles, descriptors)?;
        if !values.missing.is_empty() {
            dropped += 1;
            missing_total += values.missing.len();
            let room = MAX_LISTED.saturating_sub(missing_first.len());
            missing_first.extend(values.missing.into_iter().take(room));
            continue;
        }
        kept_ids.push(id);
        x.extend(values.x);
        push_some(&mut y, values.y);
        push_some(&mut groups, values.group);
        push_some(&mut times, values.time);
    }
    if missing_total > 0 && !drop_incomplete {
        return Err(Error::Incomplete {
            total: missing_total,
            first: missing_first,
        });
    }
    if dropped > 0 {
        tracing::warn!(rows = dropped, "dropped incomplete rows");
    }
    if kept_ids.is_empty() {
        return Err(Error::NoRows {
            dropped_incomplete: dropped,
        });
    }
    // Cannot fail: `parse_row` returns one value per descriptor column (a
    // short line is refused by the CSV reader before), so every kept row
    // added exactly `descriptors.len()` values.
    #[allow(clippy::expect_used)]
    let x = Array2::from_shape_vec((kept_ids.len(), descriptors.len()), x)
        .expect("every kept row has one value per descriptor");
    Ok(ParsedRows {
        ids: kept_ids,
        x,
        y,
        groups,
        times,
        dropped_incomplete: dropped,
    })
}

fn push_some<T>(target: &mut Option<Vec<T>>, value: Option<T>) {
    if let (Some(values), Some(v)) = (target.as_mut(), value) {
        values.push(v);
    }
}

/// The ids of every row (before any is dropped: a duplicate is an error even
/// when one of the two rows is incomplete).
fn read_ids(raw: &RawTable, col: usize) -> Result<Vec<String>, Error> {
    let mut first_line: HashMap<&str, u64> = HashMap::with_capacity(raw.n_rows());
    let mut ids = Vec::with_capacity(raw.n_rows());
    for row in 0..raw.n_rows() {
        let id = raw.cell(row, col);
        let line = raw.lines[row];
        if id.is_empty() {
            return Err(Error::EmptyId {
                line,
                column: raw.header[col].clone(),
            });
        }
        if let Some(&first) = first_line.get(id) {
            return Err(Error::DuplicateId {
                id: id.to_owned(),
                first_line: first,
                second_line: line,
            });
        }
        first_line.insert(id, line);
        ids.push(id.to_owned());
    }
    Ok(ids)
}

fn parse_row(
    raw: &RawTable,
    row: usize,
    roles: &RoleColumns,
    descriptors: &[usize],
) -> Result<RowValues, Error> {
    let mut missing = Vec::new();
    let mut number = |col: usize, role: ColumnRole| -> Result<Option<f64>, Error> {
        let text = raw.cell(row, col);
        match classify(text) {
            Cell::Number(v) => Ok(Some(v)),
            Cell::Missing => {
                missing.push(bad_cell(raw, row, col));
                Ok(None)
            }
            Cell::Text => Err(Error::NotNumeric {
                line: raw.lines[row],
                column: raw.header[col].clone(),
                role,
                value: text.to_owned(),
            }),
        }
    };
    let y = roles
        .target
        .map(|c| number(c, ColumnRole::Target))
        .transpose()?
        .flatten();
    let time = roles
        .time
        .map(|c| number(c, ColumnRole::Time))
        .transpose()?
        .flatten();
    let mut x = Vec::with_capacity(descriptors.len());
    for &col in descriptors {
        x.push(number(col, ColumnRole::Descriptor)?.unwrap_or(f64::NAN));
    }
    let group = roles.group.and_then(|col| {
        let text = raw.cell(row, col);
        if classify(text) == Cell::Missing {
            missing.push(bad_cell(raw, row, col));
            None
        } else {
            Some(text.to_owned())
        }
    });
    // Offenders are listed in reading order: by line, then by column.
    missing.sort_by_key(|c| raw.header.iter().position(|h| *h == c.column));
    Ok(RowValues {
        x,
        y,
        group,
        time,
        missing,
    })
}

fn bad_cell(raw: &RawTable, row: usize, col: usize) -> BadCell {
    BadCell {
        line: raw.lines[row],
        column: raw.header[col].clone(),
        value: raw.cell(row, col).to_owned(),
    }
}

/// Drops the descriptors that are constant on the rows kept (to within
/// rounding: a spread below 1e-12 of the values' magnitude, the tolerance
/// `space::Standardizer` uses for a zero scale).
fn drop_constant(x: Array2<f64>, names: Vec<String>) -> (Array2<f64>, Vec<String>, Vec<String>) {
    let mut keep = Vec::new();
    let mut dropped = Vec::new();
    for (j, name) in names.into_iter().enumerate() {
        let col = x.column(j);
        let (lo, hi) = col
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
                (lo.min(v), hi.max(v))
            });
        if hi - lo <= 1e-12 * (1.0 + lo.abs().max(hi.abs())) {
            tracing::warn!(descriptor = %name, value = lo, "constant descriptor dropped");
            dropped.push(name);
        } else {
            keep.push((j, name));
        }
    }
    let cols: Vec<usize> = keep.iter().map(|(j, _)| *j).collect();
    let x = x.select(ndarray::Axis(1), &cols);
    (x, keep.into_iter().map(|(_, n)| n).collect(), dropped)
}
