//! The model bundle: one versioned, checksummed file holding everything the
//! service needs to score with a model and to say what its fit claimed.
//!
//! The byte layout is in [`format`]; this module maps a [`ScoringModel`] and
//! its [`Card`] to named arrays plus a JSON manifest and back, checking that
//! every shape agrees before a model is handed out.

pub mod format;
mod persist;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

pub use format::FormatError;

pub use crate::report::{BandSummary, Claims, DomainSummary, YRandomization};
use crate::scoring::{ModelInfo, ScoringModel};
use crate::validate::Estimate;

/// Conventional file extension of bundles (the service loads `*.plumb`).
pub const EXTENSION: &str = "plumb";

/// Why a bundle could not be read or written.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error("cannot read bundle {path}: {source}")]
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("cannot write bundle {path}: {source}")]
    Write {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("bundle {path}: {source}")]
    Format { path: PathBuf, source: FormatError },
    #[error("bundle {path}: the manifest is not valid: {reason}")]
    Manifest { path: PathBuf, reason: String },
    #[error("bundle {path}: inconsistent content: {reason}")]
    Inconsistent { path: PathBuf, reason: String },
}

/// What the fit claimed and how it was made: the model card. It reuses the
/// report's types, so the card and the report cannot disagree.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Card {
    pub target_column: String,
    pub family: String,
    /// Outer cross-validation of the whole procedure, selection included.
    pub claims: Claims,
    /// The same procedure with random folds: the optimism a random split hides.
    pub random_split: Claims,
    pub y_randomization: YRandomization,
    pub domain: DomainSummary,
    pub conformal_method: String,
    pub conformal_bands: Vec<BandSummary>,
    pub training_rows: usize,
    pub dropped_constant: Vec<String>,
    pub data_sha256: String,
    pub seed: u64,
    pub split: String,
    pub folds: usize,
    pub inner_folds: usize,
    pub created_at: String,
    pub tool_version: String,
    pub cautions: Vec<String>,
}

impl Claims {
    pub fn as_map(&self) -> BTreeMap<String, Estimate> {
        [
            ("mse", self.mse),
            ("rmse", self.rmse),
            ("mae", self.mae),
            ("r2", self.r2),
            ("pearson", self.pearson),
            ("spearman", self.spearman),
        ]
        .into_iter()
        .map(|(k, v)| (k.to_string(), v))
        .collect()
    }
}

impl Card {
    pub fn claims_map(&self) -> BTreeMap<String, Estimate> {
        self.claims.as_map()
    }
}

/// The manifest: everything but the large arrays.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Manifest {
    pub info: ModelInfo,
    pub card: Card,
    pub training_ids: Vec<String>,
    /// Component metadata (kinds, scalars, settings) keyed by component.
    pub components: BTreeMap<String, serde_json::Value>,
}

/// A bundle read back: the model and its manifest.
#[derive(Clone, Debug)]
pub struct Bundle {
    pub manifest: Manifest,
    pub model: ScoringModel,
    /// Observed targets of the training rows (for review: nearest rows' values).
    pub training_y: Vec<f64>,
}

/// Encodes a model into bundle bytes. The model's version is set from the
/// content: the first 12 hex digits of the SHA-256 of the bundle with an
/// empty version, so the same fit gives the same version.
pub fn encode(
    model: &ScoringModel,
    card: &Card,
    training_ids: &[String],
    training_y: &[f64],
) -> Vec<u8> {
    let mut info = model.info.clone();
    info.version = String::new();
    let unversioned = persist::to_sections(model, &info, card, training_ids, training_y);
    let version = format::content_hash(&format::encode(&unversioned))[..12].to_string();
    info.version = version;
    format::encode(&persist::to_sections(
        model,
        &info,
        card,
        training_ids,
        training_y,
    ))
}

/// Writes a bundle atomically (temporary file, fsync, rename), so a reader
/// never sees half a bundle. Returns the version written.
pub fn write(
    path: &Path,
    model: &ScoringModel,
    card: &Card,
    training_ids: &[String],
    training_y: &[f64],
) -> Result<String, Error> {
    use std::io::Write as _;
    let bytes = encode(model, card, training_ids, training_y);
    let werr = |source| Error::Write {
        path: path.to_path_buf(),
        source,
    };
    let tmp = path.with_extension("plumb.tmp");
    let mut f = std::fs::File::create(&tmp).map_err(werr)?;
    f.write_all(&bytes).map_err(werr)?;
    f.sync_all().map_err(werr)?;
    drop(f);
    std::fs::rename(&tmp, path).map_err(werr)?;
    let sections = format::decode(&bytes).map_err(|source| Error::Format {
        path: path.to_path_buf(),
        source,
    })?;
    let manifest: Manifest =
        serde_json::from_slice(&sections.manifest).map_err(|e| Error::Manifest {
            path: path.to_path_buf(),
            reason: e.to_string(),
        })?;
    Ok(manifest.info.version)
}

/// Reads and fully checks a bundle.
pub fn read(path: &Path) -> Result<Bundle, Error> {
    let bytes = std::fs::read(path).map_err(|source| Error::Read {
        path: path.to_path_buf(),
        source,
    })?;
    decode(path, &bytes)
}

/// Decodes bundle bytes; `path` only names the file in errors.
pub fn decode(path: &Path, bytes: &[u8]) -> Result<Bundle, Error> {
    let sections = format::decode(bytes).map_err(|source| Error::Format {
        path: path.to_path_buf(),
        source,
    })?;
    persist::from_sections(&sections).map_err(|e| match e {
        persist::Problem::Manifest(reason) => Error::Manifest {
            path: path.to_path_buf(),
            reason,
        },
        persist::Problem::Inconsistent(reason) => Error::Inconsistent {
            path: path.to_path_buf(),
            reason,
        },
    })
}
