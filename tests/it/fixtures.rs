//! Bundles for the tests, and the in-process reference scores the server's
//! answers are compared with.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use ndarray::{Array2, ArrayView2};
use plumbline::conformal::{Calibration, Interval};
use plumbline::domain::{DomainSignals, Verdict};
use plumbline::models::Hyper;
use plumbline::scoring::{CandidateScore, Direction, ModelInfo};
use plumbline::service::{Bundle, CardFacts, Loader, Scorer};
use rand::{Rng, SeedableRng};
use serde::{Deserialize, Serialize};

pub const N_DESCRIPTORS: usize = 4;

/// What a test bundle is made from.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct ModelSpec {
    pub id: String,
    pub seed: u64,
    pub direction: Direction,
}

impl ModelSpec {
    pub fn new(id: &str, seed: u64) -> ModelSpec {
        ModelSpec {
            id: id.to_string(),
            seed,
            direction: Direction::Higher,
        }
    }
}

pub fn descriptor_names() -> Vec<String> {
    (0..N_DESCRIPTORS).map(|j| format!("d{j}")).collect()
}

struct Linear {
    info: ModelInfo,
    weights: Vec<f64>,
}

impl Scorer for Linear {
    fn info(&self) -> &ModelInfo {
        &self.info
    }
    fn score(&self, x: ArrayView2<f64>, confidence: f64) -> Vec<CandidateScore> {
        x.rows()
            .into_iter()
            .map(|r| {
                let pred: f64 = r.iter().zip(&self.weights).map(|(a, b)| a * b).sum();
                let far = r.iter().fold(0.0f64, |m, v| m.max(v.abs()));
                let verdict = if far < 3.0 {
                    Verdict::Inside
                } else if far < 5.0 {
                    Verdict::Border
                } else {
                    Verdict::Outside
                };
                let half = confidence * 2.0;
                CandidateScore {
                    prediction: pred,
                    interval: Interval {
                        lower: Some(pred - half),
                        upper: Some(pred + half),
                        calibration: Calibration::Band(verdict),
                    },
                    domain: DomainSignals {
                        knn_distance: far,
                        typicality: 1.0 / (1.0 + far),
                        beyond_z_threshold: far >= 3.0,
                        leverage: far / 10.0,
                        pca_residual: far / 5.0,
                        out_of_range: vec![],
                        verdict,
                        notes: vec![format!("largest |value| {far}")],
                    },
                }
            })
            .collect()
    }
}

fn build(path: &Path) -> Result<Linear, String> {
    let text = std::fs::read_to_string(path).map_err(|e| e.to_string())?;
    let spec: ModelSpec = serde_json::from_str(&text).map_err(|e| format!("not a bundle: {e}"))?;
    let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(spec.seed);
    let weights = (0..N_DESCRIPTORS)
        .map(|_| rng.gen_range(-2.0..2.0))
        .collect();
    Ok(Linear {
        info: ModelInfo {
            id: spec.id,
            version: format!("{:012x}", spec.seed),
            endpoint: "activity".into(),
            unit: "pIC50".into(),
            direction: spec.direction,
            hyper: Hyper::Ridge { alpha: 1.0 },
            descriptor_names: descriptor_names(),
            default_confidence: 0.9,
        },
        weights,
    })
}

pub fn loader() -> Loader {
    Arc::new(|path: &Path| {
        let m = build(path)?;
        Ok(Bundle {
            scorer: Arc::new(m),
            facts: CardFacts::default(),
        })
    })
}

/// Writes a bundle atomically (temporary name, then rename), as `fit` does.
pub fn write_bundle(dir: &Path, file_name: &str, spec: &ModelSpec) -> PathBuf {
    let path = dir.join(file_name);
    let tmp = dir.join(format!("{file_name}.tmp"));
    std::fs::write(&tmp, serde_json::to_vec(spec).expect("spec")).expect("write bundle");
    std::fs::rename(&tmp, &path).expect("rename bundle");
    path
}

pub fn model_info(path: &Path) -> ModelInfo {
    build(path).expect("bundle").info
}

/// Scores rows in-process, as `plumbline predict` does.
pub fn reference_scores(path: &Path, rows: &[Vec<f64>], confidence: f64) -> Vec<CandidateScore> {
    let m = build(path).expect("bundle");
    let flat: Vec<f64> = rows.iter().flatten().copied().collect();
    let x = Array2::from_shape_vec((rows.len(), N_DESCRIPTORS), flat).expect("rows");
    m.score(x.view(), confidence)
}

/// Rows like the training data.
pub fn in_domain_rows(n: usize, seed: u64) -> Vec<Vec<f64>> {
    let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(seed);
    (0..n)
        .map(|_| {
            (0..N_DESCRIPTORS)
                .map(|_| rng.gen_range(-1.0..1.0))
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
