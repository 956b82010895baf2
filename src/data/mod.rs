//! Reading descriptor tables (CSV with a header) with row- and
//! column-precise errors.

use ndarray::{Array1, Array2};

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
