//! Real bundles for the tests: small seeded synthetic data fitted with
//! `plumbline::fit` and written with `plumbline::bundle`, and the
//! in-process reference scores (`ScoringModel::score`, what `plumbline
//! predict` calls) the server's answers are compared with.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex, OnceLock};

use ndarray::{Array1, Array2};
use plumbline::data::Table;
use plumbline::fit::{FitOptions, SplitSpec};
use plumbline::models::Family;
use plumbline::scoring::{CandidateScore, Direction, ModelInfo};
use plumbline::service::Loader;
use rand::{Rng, SeedableRng};

pub const N_DESCRIPTORS: usize = 4;
const TRAINING_ROWS: usize = 160;

/// What a test bundle is made from.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct ModelSpec {
    pub id: String,
    pub seed: u64,
    pub direction: Direction,
    pub family: Family,
}

impl ModelSpec {
    pub fn new(id: &str, seed: u64) -> ModelSpec {
        ModelSpec {
            id: id.to_string(),
            seed,
            direction: Direction::Higher,
            family: Family::Ridge,
        }
    }
}

pub fn descriptor_names() -> Vec<String> {
    (0..N_DESCRIPTORS).map(|j| format!("d{j}")).collect()
}

/// The service's real bundle reader.
pub fn loader() -> Loader {
    plumbline::service::bundle_loader()
}

/// Training data: y = w·x + a curved term + noise, x uniform in [-1, 1].
pub fn training_table(spec: &ModelSpec) -> Table {
    let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(spec.seed);
    let w: Vec<f64> = (0..N_DESCRIPTORS)
        .map(|_| rng.gen_range(-2.0..2.0))
        .collect();
    let x = Array2::from_shape_fn((TRAINING_ROWS, N_DESCRIPTORS), |_| rng.gen_range(-1.0..1.0));
    let y: Array1<f64> = x
        .rows()
        .into_iter()
        .map(|r| {
            let linear: f64 = r.iter().zip(&w).map(|(a, b)| a * b).sum();
            linear + 0.3 * (3.0 * r[0]).sin() + rng.gen_range(-0.2..0.2)
        })
        .collect();
    Table {
        ids: (0..TRAINING_ROWS).map(|i| format!("t{i}")).collect(),
        descriptor_names: descriptor_names(),
        x,
        y: Some(y),
        groups: None,
        times: None,
        dropped_constant: Vec::new(),
        dropped_incomplete: 0,
        sha256: format!("{:064x}", spec.seed),
    }
}

/// Bundle bytes per spec: fitting is deterministic, so each spec is fitted
/// once per test binary.
fn bundle_bytes(spec: &ModelSpec) -> Vec<u8> {
    static CACHE: OnceLock<Mutex<HashMap<String, Vec<u8>>>> = OnceLock::new();
    let cache = CACHE.get_or_init(Default::default);
    let key = format!("{spec:?}");
    if let Some(b) = cache.lock().expect("cache").get(&key) {
        return b.clone();
    }
    let table = training_table(spec);
    let mut options = FitOptions::new(&spec.id, "activity");
    options.families = vec![spec.family];
    options.split = SplitSpec::Random;
    options.folds = 5;
    options.inner_folds = 3;
    options.permutations = 2;
    options.seed = spec.seed;
    options.direction = spec.direction;
    options.unit = "pIC50".into();
    let outcome = plumbline::fit::fit(&table, "synthetic.csv", &options, &|_, _, _| {})
        .expect("fit the test model");
    let bytes = plumbline::bundle::encode(
        &outcome.model,
        &outcome.card,
        &table.ids,
        &outcome.training_y,
    );
    cache.lock().expect("cache").insert(key, bytes.clone());
    bytes
}

/// Writes a bundle atomically (temporary name, then rename), as `fit` does.
pub fn write_bundle(dir: &Path, file_name: &str, spec: &ModelSpec) -> PathBuf {
    let bytes = bundle_bytes(spec);
    let path = dir.join(file_name);
    let tmp = dir.join(format!("{file_name}.tmp"));
    std::fs::write(&tmp, bytes).expect("write bundle");
    std::fs::rename(&tmp, &path).expect("rename bundle");
    path
}

fn read(path: &Path) -> Arc<plumbline::bundle::Bundle> {
    Arc::new(plumbline::bundle::read(path).expect("read the bundle"))
}

pub fn model_info(path: &Path) -> ModelInfo {
    read(path).model.info.clone()
}

/// Scores rows in-process, exactly as `plumbline predict` does.
pub fn reference_scores(path: &Path, rows: &[Vec<f64>], confidence: f64) -> Vec<CandidateScore> {
    let b = read(path);
    let flat: Vec<f64> = rows.iter().flatten().copied().collect();
    let x = Array2::from_shape_vec((rows.len(), N_DESCRIPTORS), flat).expect("rows");
    b.model.score(x.view(), confidence)
}

/// Rows like the training data (drawn from its middle).
pub fn in_domain_rows(n: usize, seed: u64) -> Vec<Vec<f64>> {
    let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(seed);
    (0..n)
        .map(|_| {
            (0..N_DESCRIPTORS)
                .map(|_| rng.gen_range(-0.7..0.7))
                .collect()
        })
        .collect()
}

/// Rows far from anything the model was fitted on.
pub fn far_rows(n: usize) -> Vec<Vec<f64>> {
    (0..n)
        .map(|i| {
            (0..N_DESCRIPTORS)
                .map(|j| 40.0 + (i * 7 + j) as f64)
                .collect()
        })
        .collect()
}
