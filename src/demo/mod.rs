//! The demo scenario: a seeded generator of the invented lead-optimisation
//! programme in `demo-data/` (see its README): the training table, the next
//! round of candidates, and the lab results that come back for them.
//!
//! The committed CSVs are exactly what [`generate`] writes with [`SEED`];
//! a test regenerates them and compares byte for byte.

mod draw;
mod scenario;

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

pub use scenario::{ASSAY_NOISE, NEW_SERIES, known_series};

/// The seed of the committed demo data.
pub const SEED: u64 = 20_250_314;

/// The compound-id column.
pub const ID_COLUMN: &str = "compound_id";
/// The (text) series column, usable as a fold group.
pub const SERIES_COLUMN: &str = "series";
/// The measured activity, pIC50-like, higher is better.
pub const TARGET_COLUMN: &str = "activity";

pub const TRAINING_FILE: &str = "training.csv";
pub const NEXT_ROUND_FILE: &str = "next_round.csv";
pub const LAB_RESULTS_FILE: &str = "lab_results.csv";

/// Descriptor names, in file order (every column but id, series and
/// activity).
pub fn descriptor_names() -> Vec<&'static str> {
    scenario::DESCRIPTORS.iter().map(|(n, _)| *n).collect()
}

/// Where [`generate`] wrote the scenario.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct DemoFiles {
    pub training: PathBuf,
    pub next_round: PathBuf,
    pub lab_results: PathBuf,
}

/// Errors writing the demo data.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error("cannot create the demo data directory {dir}: {source}; check that it is writable")]
    CreateDir {
        dir: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("cannot write demo data file {path}: {source}; check free space and permissions")]
    Write {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
}

/// Writes `training.csv`, `next_round.csv` and `lab_results.csv` into
/// `dir` (created if needed). The same seed always gives the same bytes.
pub fn generate(seed: u64, dir: &Path) -> Result<DemoFiles, Error> {
    std::fs::create_dir_all(dir).map_err(|source| Error::CreateDir {
        dir: dir.to_path_buf(),
        source,
    })?;
    let p = scenario::programme(seed);
    let files = DemoFiles {
        training: dir.join(TRAINING_FILE),
        next_round: dir.join(NEXT_ROUND_FILE),
        lab_results: dir.join(LAB_RESULTS_FILE),
    };

    let mut training = header(true);
    for (c, activity) in &p.training {
        row(&mut training, c, Some(*activity));
    }
    write(&files.training, &training)?;

    let mut next = header(false);
    for c in &p.next_round {
        row(&mut next, c, None);
    }
    write(&files.next_round, &next)?;

    let mut lab = format!("{ID_COLUMN},{TARGET_COLUMN}\n");
    for (c, a) in p.next_round.iter().zip(&p.lab_results) {
        let _ = writeln!(lab, "{},{a:.2}", c.id);
    }
    write(&files.lab_results, &lab)?;
    Ok(files)
}

fn header(with_activity: bool) -> String {
    let mut h = format!("{ID_COLUMN},{SERIES_COLUMN}");
    for name in descriptor_names() {
        h.push(',');
        h.push_str(name);
    }
    if with_activity {
        h.push(',');
        h.push_str(TARGET_COLUMN);
    }
    h.push('\n');
    h
}

fn row(out: &mut String, c: &scenario::Compound, activity: Option<f64>) {
    let _ = write!(out, "{},{}", c.id, c.series);
    for (v, (_, decimals)) in c.descriptors.iter().zip(scenario::DESCRIPTORS.iter()) {
        let _ = write!(out, ",{v:.decimals$}");
    }
    if let Some(a) = activity {
        let _ = write!(out, ",{a:.2}");
    }
    out.push('\n');
}

fn write(path: &Path, text: &str) -> Result<(), Error> {
    std::fs::write(path, text).map_err(|source| Error::Write {
        path: path.to_path_buf(),
        source,
    })
}
