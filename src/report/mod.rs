//! The fit report: everything `fit` learned, for machines (`report.json`)
//! and for people (`report.html`, self-contained, with SVG plots).
//!
//! The types here are the report's schema. `fit` fills them; this module
//! only presents them, so nothing in it recomputes a claim.
//!
//! Conventions the filler follows (and the HTML relies on):
//! - Every [`Estimate`] is a mean ± standard error over outer folds.
//! - [`Curve`]s hold one hyperparameter at a time: for each hyperparameter of
//!   a family, one curve varies it over its grid while the others stay at the
//!   chosen values. Kernel ridge therefore has two curves, α at the chosen γ
//!   and γ at the chosen α; ridge has one (α), k-NN one (k). This keeps
//!   [`Curve::chosen`] meaningful on every curve.
//! - Verdict names and band names are those of [`Verdict::name`].
//! - A metric that is undefined (a correlation of constant predictions, an
//!   SE from a single fold) is NaN in memory and `null` in the JSON (as
//!   serde_json writes every non-finite number); the metric fields read
//!   `null` back as NaN, so a report always round-trips.

pub mod html;
pub mod svg;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Deserializer, Serialize};

use crate::domain::Verdict;
use crate::models::Hyper;
use crate::validate::Estimate;

/// The whole report of one fit.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FitReport {
    /// `plumbline` version that wrote it (`CARGO_PKG_VERSION`).
    pub tool_version: String,
    /// RFC 3339 time the fit finished, UTC.
    pub created_at: String,
    pub data: DataSummary,
    pub settings: FitSettings,
    pub selection: Selection,
    /// The chosen family's outer-CV metrics under the chosen split.
    pub claims: Claims,
    /// The same metrics under a random split, to show the optimism a random
    /// split hides.
    pub random_split: Claims,
    pub curves: Vec<Curve>,
    pub out_of_fold: Vec<OofPoint>,
    pub y_randomization: YRandomization,
    pub domain: DomainSummary,
    pub conformal: ConformalSummary,
    pub timings: Vec<Timing>,
    /// Cautions specific to this fit (small data, leverage meaningless, a
    /// band pooled, ...). The general cautions of [`GENERAL_CAUTIONS`] are
    /// always shown in the HTML beside these.
    pub cautions: Vec<String>,
}

/// The training table.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct DataSummary {
    pub path: String,
    /// SHA-256 of the file's bytes, hex.
    pub sha256: String,
    /// Rows used (after any dropped as incomplete).
    pub rows: usize,
    /// Descriptors used (after constant ones were dropped).
    pub descriptors: usize,
    pub dropped_constant: Vec<String>,
    pub dropped_incomplete: usize,
    pub id_column: String,
    pub target_column: String,
}

/// The settings the fit ran with.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FitSettings {
    /// `random`, `cluster`, `group:COL` or `time:COL`.
    pub split: String,
    pub folds: usize,
    pub inner_folds: usize,
    pub seed: u64,
    /// `auto`, `ridge`, `kernel-ridge` or `knn`.
    pub model: String,
    /// y-randomisation permutations.
    pub permutations: usize,
}

/// What was chosen and how.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Selection {
    /// The chosen family's name ([`crate::models::Family::name`]).
    pub family: String,
    /// The hyperparameters of the final model (selected on all rows).
    pub hyper: Hyper,
    /// The selection rule in words, e.g. "one standard error (Hastie et al.
    /// 2009, §7.10) over 5 inner folds".
    pub rule: String,
    /// Every family that went through the outer CV.
    pub families: Vec<FamilyOutcome>,
}

/// One family's outer-CV result.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FamilyOutcome {
    pub family: String,
    pub claims: Claims,
    /// Whether its outer MSE is within one SE of the best family's.
    pub within_one_se: bool,
    /// The hyperparameters the inner loop chose in each outer fold.
    pub chosen_per_outer_fold: Vec<Hyper>,
}

/// Outer-CV metrics, each as mean ± SE over outer folds.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Claims {
    #[serde(deserialize_with = "nullable::estimate")]
    pub mse: Estimate,
    #[serde(deserialize_with = "nullable::estimate")]
    pub rmse: Estimate,
    #[serde(deserialize_with = "nullable::estimate")]
    pub mae: Estimate,
    /// q² when out-of-fold.
    #[serde(deserialize_with = "nullable::estimate")]
    pub r2: Estimate,
    #[serde(deserialize_with = "nullable::estimate")]
    pub pearson: Estimate,
    #[serde(deserialize_with = "nullable::estimate")]
    pub spearman: Estimate,
}

/// Train and test error as one hyperparameter varies (see the module doc).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Curve {
    pub family: String,
    /// The hyperparameter on the x axis: `alpha`, `gamma` or `k`.
    pub parameter: String,
    /// In grid order.
    pub points: Vec<CurvePoint>,
    /// Index into `points` of the chosen setting.
    pub chosen: usize,
}

/// One grid point of a [`Curve`].
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CurvePoint {
    pub hyper: Hyper,
    /// The value of [`Curve::parameter`] at this point.
    pub x: f64,
    #[serde(deserialize_with = "nullable::estimate")]
    pub train_mse: Estimate,
    #[serde(deserialize_with = "nullable::estimate")]
    pub test_mse: Estimate,
}

/// One training row's out-of-fold prediction and domain signal.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct OofPoint {
    pub id: String,
    pub observed: f64,
    pub predicted: f64,
    /// The outer fold the row was tested in.
    pub fold: usize,
    /// Mean distance to the k nearest rows of its fold's training set.
    pub knn_distance: f64,
    pub verdict: Verdict,
}

/// y-randomisation: the chosen family refitted (selection included) on
/// permuted targets.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct YRandomization {
    pub permutations: usize,
    #[serde(deserialize_with = "nullable::f64")]
    pub real_q2: f64,
    #[serde(deserialize_with = "nullable::vec")]
    pub permuted_q2: Vec<f64>,
    /// (1 + #{permuted q² ≥ real q²}) / (permutations + 1).
    pub p_value: f64,
}

/// The applicability-domain thresholds, calibrated out-of-fold.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct DomainSummary {
    /// Neighbours in the mean k-NN distance.
    pub k: usize,
    /// PCA components kept.
    pub components: usize,
    /// Fraction of variance they explain, in [0, 1].
    pub explained_variance: f64,
    /// The Z of the Z-rule D̄ + Z·σ (Tropsha 2010).
    pub z: f64,
    pub z_threshold: f64,
    /// h* = 3(p + 1)/n (Gramatica 2007).
    pub leverage_warning: f64,
    /// False when h* ≥ 1, where no leverage can exceed it.
    pub leverage_meaningful: bool,
    pub residual_border_limit: f64,
    pub residual_outside_limit: f64,
    /// Typicality below this is at the border.
    pub typicality_border: f64,
    /// Typicality below this is outside.
    pub typicality_outside: f64,
    /// Out-of-fold verdicts of the training rows, by verdict name.
    pub oof_verdict_counts: BTreeMap<String, usize>,
}

/// How the CV+ intervals were calibrated and how well they covered.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ConformalSummary {
    /// E.g. "CV+ (Barber et al. 2021), Mondrian by verdict".
    pub method: String,
    pub bands: Vec<BandSummary>,
    /// Out-of-fold empirical coverage at several nominal levels.
    pub coverage: Vec<CoveragePoint>,
}

/// One Mondrian band.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct BandSummary {
    pub verdict: String,
    /// Out-of-fold residuals in the band.
    pub n: usize,
    /// False when the band had too few points and pooled residuals serve it.
    pub used: bool,
}

/// Empirical coverage at one nominal level.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct CoveragePoint {
    pub nominal: f64,
    /// NaN when no point was measured.
    #[serde(deserialize_with = "nullable::f64")]
    pub empirical: f64,
    /// Points the coverage was measured on.
    pub n: usize,
}

/// Wall-clock time of one stage of the fit.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Timing {
    pub stage: String,
    pub seconds: f64,
}

/// Cautions every report carries, whatever the fit.
pub const GENERAL_CAUTIONS: [&str; 4] = [
    "Predictions support the prioritisation of candidates only.",
    "They are not safety, dosing or regulatory decisions.",
    "Confirm every promising candidate in the lab.",
    "Follow local practice and regulations.",
];

/// `t` as an RFC 3339 timestamp in UTC to the second, such as
/// `2025-03-14T09:26:53Z`, the form of [`FitReport::created_at`].
pub fn rfc3339_utc(t: std::time::SystemTime) -> String {
    let secs = match t.duration_since(std::time::UNIX_EPOCH) {
        Ok(d) => d.as_secs() as i64,
        Err(e) => -(e.duration().as_secs_f64().ceil() as i64),
    };
    let (days, of_day) = (secs.div_euclid(86_400), secs.rem_euclid(86_400));
    let (y, m, d) = civil_from_days(days);
    format!(
        "{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}Z",
        of_day / 3600,
        of_day % 3600 / 60,
        of_day % 60
    )
}

/// The proleptic Gregorian date of a day count since 1970-01-01 (Howard
/// Hinnant, "chrono-Compatible Low-Level Date Algorithms", civil_from_days:
/// eras of 400 years, years starting in March so the leap day comes last).
fn civil_from_days(days: i64) -> (i64, i64, i64) {
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + i64::from(m <= 2);
    (y, m, d)
}

/// Reading back the `null` that serde_json writes for a non-finite number.
mod nullable {
    use super::*;

    pub fn f64<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
        Ok(Option::<f64>::deserialize(d)?.unwrap_or(f64::NAN))
    }

    pub fn vec<'de, D: Deserializer<'de>>(d: D) -> Result<Vec<f64>, D::Error> {
        let values = Vec::<Option<f64>>::deserialize(d)?;
        Ok(values.into_iter().map(|v| v.unwrap_or(f64::NAN)).collect())
    }

    /// Mirrors the serde shape of [`Estimate`].
    #[derive(Deserialize)]
    struct RawEstimate {
        mean: Option<f64>,
        se: Option<f64>,
    }

    pub fn estimate<'de, D: Deserializer<'de>>(d: D) -> Result<Estimate, D::Error> {
        let raw = RawEstimate::deserialize(d)?;
        Ok(Estimate {
            mean: raw.mean.unwrap_or(f64::NAN),
            se: raw.se.unwrap_or(f64::NAN),
        })
    }
}

/// Errors writing a report.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error(
        "cannot create the report directory {dir}: {source}; check the path given to --report \
         and that it is writable"
    )]
    CreateDir {
        dir: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("cannot write the report file {path}: {source}; check free space and permissions")]
    Write {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("cannot encode the report as JSON: {source}")]
    Json {
        #[source]
        source: serde_json::Error,
    },
}

/// Writes `report.json` (pretty-printed) and `report.html` into `dir`,
/// creating it if needed. Each file is written beside its final name and
/// renamed into place, so a reader never sees half a report.
pub fn write(report: &FitReport, dir: &Path) -> Result<(), Error> {
    std::fs::create_dir_all(dir).map_err(|source| Error::CreateDir {
        dir: dir.to_path_buf(),
        source,
    })?;
    let mut json = serde_json::to_string_pretty(report).map_err(|source| Error::Json { source })?;
    json.push('\n');
    write_replacing(&dir.join("report.json"), json.as_bytes())?;
    write_replacing(&dir.join("report.html"), html::render(report).as_bytes())
}

fn write_replacing(path: &Path, bytes: &[u8]) -> Result<(), Error> {
    let mut tmp = path.as_os_str().to_owned();
    tmp.push(".tmp");
    let tmp = PathBuf::from(tmp);
    let fail = |source| Error::Write {
        path: path.to_path_buf(),
        source,
    };
    std::fs::write(&tmp, bytes).map_err(fail)?;
    std::fs::rename(&tmp, path).map_err(fail)
}
