//! The errors of reading a descriptor table: each names the bad value and
//! where it was (1-based line numbers, the header being line 1, and column
//! names), and says what to do next.

use std::fmt;
use std::path::PathBuf;

/// The role a column plays in a table.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ColumnRole {
    Id,
    Target,
    Group,
    Time,
    Descriptor,
}

impl fmt::Display for ColumnRole {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            ColumnRole::Id => "id",
            ColumnRole::Target => "target",
            ColumnRole::Group => "group",
            ColumnRole::Time => "time",
            ColumnRole::Descriptor => "descriptor",
        })
    }
}

/// One offending cell: where it is and what it held.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct BadCell {
    /// 1-based line in the file (the header is line 1).
    pub line: u64,
    pub column: String,
    pub value: String,
}

impl fmt::Display for BadCell {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "line {} column '{}' = '{}'",
            self.line, self.column, self.value
        )
    }
}

/// How many offending cells an error lists before it only counts.
pub const MAX_LISTED: usize = 10;

/// Errors of reading a descriptor table.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error("cannot read '{}': {source}; check the path and its permissions", path.display())]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("line {line}: {message}; the file must be UTF-8 CSV with a header row")]
    Csv { line: u64, message: String },
    #[error(
        "line {line} has {found} fields but the header has {expected}; \
         check that line for a missing or extra separator or an unclosed quote"
    )]
    RaggedRow {
        line: u64,
        expected: usize,
        found: usize,
    },
    #[error("the file is empty: a header row naming the columns is needed")]
    NoHeader,
    #[error(
        "column {position} has no name in the header (a saved row index, or a trailing \
         separator?); name it or remove it"
    )]
    UnnamedColumn { position: usize },
    #[error(
        "the header names column '{name}' twice (columns {first} and {second}); \
         rename one of them"
    )]
    DuplicateColumn {
        name: String,
        first: usize,
        second: usize,
    },
    #[error("descriptor '{name}' is listed twice; list each descriptor once")]
    DescriptorListedTwice { name: String },
    #[error(
        "{role} column '{name}' not found; the columns are: {}",
        available.join(", ")
    )]
    MissingColumn {
        role: ColumnRole,
        name: String,
        available: Vec<String>,
    },
    #[error(
        "column '{name}' is given both as the {first} and as the {second} column; \
         a column can play one role only"
    )]
    RoleConflict {
        name: String,
        first: ColumnRole,
        second: ColumnRole,
    },
    #[error(
        "line {line}, {role} column '{column}': '{value}' is not a number; fix the cell, \
         or leave it empty (or NA) to mark it missing"
    )]
    NotNumeric {
        line: u64,
        column: String,
        role: ColumnRole,
        value: String,
    },
    #[error(
        "{total} missing or non-finite value(s), first: {}{}; fill them in, or drop \
         incomplete rows (--drop-incomplete)",
        list_cells(first),
        if *total > first.len() { ", ..." } else { "" }
    )]
    Incomplete { total: usize, first: Vec<BadCell> },
    #[error("line {line}: the id (column '{column}') is empty; every row needs an id")]
    EmptyId { line: u64, column: String },
    #[error(
        "id '{id}' appears on line {first_line} and again on line {second_line}; \
         ids must be unique"
    )]
    DuplicateId {
        id: String,
        first_line: u64,
        second_line: u64,
    },
    #[error(
        "the table has no data rows{}; a model needs rows with values",
        if *dropped_incomplete > 0 {
            format!(" left after dropping {dropped_incomplete} incomplete row(s)")
        } else {
            String::new()
        }
    )]
    NoRows { dropped_incomplete: usize },
    #[error(
        "no descriptors left: {} constant, {} non-numeric column(s) skipped{}; \
         the table needs at least one varying numeric descriptor column",
        dropped_constant.len(),
        skipped_non_numeric.len(),
        describe_dropped(dropped_constant, skipped_non_numeric)
    )]
    NoDescriptors {
        dropped_constant: Vec<String>,
        skipped_non_numeric: Vec<String>,
    },
    #[error(
        "{n} rows are too few for {k_outer} outer × {k_inner} inner folds: at least \
         {needed} are needed (2 rows per fold at both levels); add rows or use fewer folds"
    )]
    TooFewRows {
        n: usize,
        needed: usize,
        k_outer: usize,
        k_inner: usize,
    },
    #[error("{k} folds requested at the {level} level; at least 2 are needed")]
    TooFewFolds { k: usize, level: &'static str },
    #[error(
        "descriptor '{}' missing{}; the bundle expects {expected} descriptors, \
         see `plumbline bundle inspect`",
        missing.first().map(String::as_str).unwrap_or(""),
        if missing.len() > 1 {
            format!(" (and {} more: {})", missing.len() - 1, list_names(&missing[1..]))
        } else {
            String::new()
        }
    )]
    MissingDescriptors {
        missing: Vec<String>,
        expected: usize,
    },
}

fn list_cells(cells: &[BadCell]) -> String {
    let parts: Vec<String> = cells.iter().map(BadCell::to_string).collect();
    parts.join("; ")
}

fn list_names(names: &[String]) -> String {
    let shown: Vec<&str> = names.iter().take(MAX_LISTED).map(String::as_str).collect();
    let more = if names.len() > MAX_LISTED {
        ", ..."
    } else {
        ""
    };
    format!("{}{more}", shown.join(", "))
}

fn describe_dropped(constant: &[String], non_numeric: &[String]) -> String {
    let mut parts = Vec::new();
    if !constant.is_empty() {
        parts.push(format!("constant: {}", list_names(constant)));
    }
    if !non_numeric.is_empty() {
        parts.push(format!("non-numeric: {}", list_names(non_numeric)));
    }
    if parts.is_empty() {
        String::new()
    } else {
        format!(" ({})", parts.join("; "))
    }
}
