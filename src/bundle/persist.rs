//! Mapping the fitted pipeline to named arrays and manifest metadata, and
//! back with every shape checked.

use std::collections::BTreeMap;

use ndarray::{Array1, Array2};
use serde_json::json;

use super::format::{Array, Elements, Sections};
use super::{Bundle, Card, Manifest};
use crate::conformal::{CvPlus, CvPlusState};
use crate::domain::{DomainGuard, DomainState, Verdict};
use crate::models::Predictor;
use crate::scoring::{ModelInfo, ScoringModel};
use crate::space::Standardizer;
use crate::space::pca::Pca;

/// What was wrong with decoded sections.
pub(super) enum Problem {
    Manifest(String),
    Inconsistent(String),
}

type Arrays = BTreeMap<String, Array>;

fn put1(arrays: &mut Arrays, name: &str, a: &Array1<f64>) {
    arrays.insert(
        name.into(),
        Array {
            shape: vec![a.len()],
            elements: Elements::F64(a.to_vec()),
        },
    );
}

fn put2(arrays: &mut Arrays, name: &str, a: &Array2<f64>) {
    let shape = vec![a.nrows(), a.ncols()];
    arrays.insert(
        name.into(),
        Array {
            shape,
            elements: Elements::F64(a.iter().copied().collect()),
        },
    );
}

fn put_mask(arrays: &mut Arrays, name: &str, a: &Array2<bool>) {
    let shape = vec![a.nrows(), a.ncols()];
    arrays.insert(
        name.into(),
        Array {
            shape,
            elements: Elements::U8(a.iter().map(|&b| b as u8).collect()),
        },
    );
}

fn missing(name: &str) -> Problem {
    Problem::Inconsistent(format!("array '{name}' is missing"))
}

fn get_f64<'a>(
    arrays: &'a Arrays,
    name: &str,
    rank: usize,
) -> Result<(&'a [usize], &'a [f64]), Problem> {
    let a = arrays.get(name).ok_or_else(|| missing(name))?;
    match &a.elements {
        Elements::F64(v) if a.shape.len() == rank => Ok((&a.shape, v)),
        _ => Err(Problem::Inconsistent(format!(
            "array '{name}' should be a rank-{rank} f64 array"
        ))),
    }
}

pub(super) fn get1(arrays: &Arrays, name: &str) -> Result<Array1<f64>, Problem> {
    let (_, v) = get_f64(arrays, name, 1)?;
    Ok(Array1::from(v.to_vec()))
}

pub(super) fn get2(arrays: &Arrays, name: &str) -> Result<Array2<f64>, Problem> {
    let (shape, v) = get_f64(arrays, name, 2)?;
    Array2::from_shape_vec((shape[0], shape[1]), v.to_vec())
        .map_err(|e| Problem::Inconsistent(format!("array '{name}': {e}")))
}

fn get_mask(arrays: &Arrays, name: &str) -> Result<Array2<bool>, Problem> {
    let a = arrays.get(name).ok_or_else(|| missing(name))?;
    match &a.elements {
        Elements::U8(v) if a.shape.len() == 2 => Array2::from_shape_vec(
            (a.shape[0], a.shape[1]),
            v.iter().map(|&b| b != 0).collect(),
        )
        .map_err(|e| Problem::Inconsistent(format!("array '{name}': {e}"))),
        _ => Err(Problem::Inconsistent(format!(
            "array '{name}' should be a rank-2 byte array"
        ))),
    }
}

fn expect(cond: bool, what: impl FnOnce() -> String) -> Result<(), Problem> {
    if cond {
        Ok(())
    } else {
        Err(Problem::Inconsistent(what()))
    }
}

pub(super) fn to_sections(
    model: &ScoringModel,
    info: &ModelInfo,
    card: &Card,
    training_ids: &[String],
    training_y: &[f64],
) -> Sections {
    let mut arrays = Arrays::new();
    let mut components = BTreeMap::new();
    put1(&mut arrays, "standardizer.mean", &model.standardizer.mean);
    put1(&mut arrays, "standardizer.scale", &model.standardizer.scale);
    put1(
        &mut arrays,
        "training.y",
        &Array1::from(training_y.to_vec()),
    );
    components.insert(
        "predictor".to_string(),
        save_predictor(&model.predictor, &mut arrays),
    );
    components.insert(
        "domain".to_string(),
        save_domain(&model.domain, &mut arrays),
    );
    components.insert(
        "conformal".to_string(),
        save_cvplus(&model.cvplus, &mut arrays),
    );
    let manifest = Manifest {
        info: info.clone(),
        card: card.clone(),
        training_ids: training_ids.to_vec(),
        components,
    };
    // Cannot fail: the manifest is structs, strings, numbers and maps keyed
    // by strings, all of which serde_json writes (non-finite floats as null).
    #[allow(clippy::expect_used)]
    let manifest = serde_json::to_vec_pretty(&manifest).expect("manifest serialises");
    Sections { manifest, arrays }
}

pub(super) fn from_sections(sections: &Sections) -> Result<Bundle, Problem> {
    let manifest: Manifest =
        serde_json::from_slice(&sections.manifest).map_err(|e| Problem::Manifest(e.to_string()))?;
    let arrays = &sections.arrays;
    let p = manifest.info.descriptor_names.len();
    let standardizer = Standardizer {
        mean: get1(arrays, "standardizer.mean")?,
        scale: get1(arrays, "standardizer.scale")?,
    };
    expect(
        standardizer.mean.len() == p && standardizer.scale.len() == p,
        || {
            format!(
                "standardizer has {} values but the bundle lists {p} descriptors",
                standardizer.mean.len()
            )
        },
    )?;
    let training_y = get1(arrays, "training.y")?.to_vec();
    let n = manifest.training_ids.len();
    expect(training_y.len() == n, || {
        format!("{} training targets for {n} training ids", training_y.len())
    })?;
    let component = |name: &str| {
        manifest
            .components
            .get(name)
            .ok_or_else(|| Problem::Manifest(format!("component '{name}' is missing")))
    };
    let predictor = load_predictor(component("predictor")?, arrays, p)?;
    let domain = load_domain(component("domain")?, arrays)?;
    let cvplus = load_cvplus(component("conformal")?, arrays)?;
    expect(domain.n_descriptors() == p, || {
        format!(
            "the domain guard has {} descriptors, the bundle lists {p}",
            domain.n_descriptors()
        )
    })?;
    expect(cvplus.n() == n, || {
        format!("{} calibration residuals for {n} training rows", cvplus.n())
    })?;
    let model = ScoringModel {
        info: manifest.info.clone(),
        standardizer,
        predictor,
        cvplus,
        domain,
    };
    Ok(Bundle {
        manifest,
        model,
        training_y,
    })
}

fn save_predictor(p: &Predictor, arrays: &mut Arrays) -> serde_json::Value {
    match p {
        Predictor::Linear { coef, intercept } => {
            put2(arrays, "predictor.coef", coef);
            put1(arrays, "predictor.intercept", intercept);
            json!({ "kind": "linear" })
        }
        Predictor::Kernel {
            gamma,
            train,
            dual,
            offset,
            ..
        } => {
            put2(arrays, "predictor.train", train);
            put2(arrays, "predictor.dual", dual);
            put1(arrays, "predictor.offset", offset);
            json!({ "kind": "kernel", "gamma": gamma })
        }
        Predictor::Neighbours {
            k,
            train,
            y,
            membership,
        } => {
            put2(arrays, "predictor.train", train);
            put1(arrays, "predictor.y", y);
            put_mask(arrays, "predictor.membership", membership);
            json!({ "kind": "neighbours", "k": k })
        }
    }
}

fn load_predictor(
    meta: &serde_json::Value,
    arrays: &Arrays,
    p: usize,
) -> Result<Predictor, Problem> {
    let kind = meta.get("kind").and_then(|k| k.as_str()).unwrap_or("");
    let predictor = match kind {
        "linear" => {
            let coef = get2(arrays, "predictor.coef")?;
            let intercept = get1(arrays, "predictor.intercept")?;
            expect(coef.nrows() == p && coef.ncols() == intercept.len(), || {
                format!(
                    "linear coefficients are {}×{} for {p} descriptors and {} intercepts",
                    coef.nrows(),
                    coef.ncols(),
                    intercept.len()
                )
            })?;
            Predictor::Linear { coef, intercept }
        }
        "kernel" => {
            let gamma = meta
                .get("gamma")
                .and_then(|g| g.as_f64())
                .ok_or_else(|| Problem::Manifest("kernel predictor has no gamma".into()))?;
            let train = get2(arrays, "predictor.train")?;
            let dual = get2(arrays, "predictor.dual")?;
            let offset = get1(arrays, "predictor.offset")?;
            expect(
                train.ncols() == p && dual.nrows() == train.nrows() && dual.ncols() == offset.len(),
                || {
                    format!(
                        "kernel arrays disagree: train {:?}, dual {:?}, offset {}",
                        train.dim(),
                        dual.dim(),
                        offset.len()
                    )
                },
            )?;
            Predictor::kernel(gamma, train, dual, offset)
        }
        "neighbours" => {
            let k = meta
                .get("k")
                .and_then(|k| k.as_u64())
                .ok_or_else(|| Problem::Manifest("neighbour predictor has no k".into()))?
                as usize;
            let train = get2(arrays, "predictor.train")?;
            let y = get1(arrays, "predictor.y")?;
            let membership = get_mask(arrays, "predictor.membership")?;
            expect(
                train.ncols() == p
                    && y.len() == train.nrows()
                    && membership.nrows() == train.nrows(),
                || {
                    format!(
                        "neighbour arrays disagree: train {:?}, y {}, membership {:?}",
                        train.dim(),
                        y.len(),
                        membership.dim()
                    )
                },
            )?;
            Predictor::Neighbours {
                k,
                train,
                y,
                membership,
            }
        }
        other => {
            return Err(Problem::Manifest(format!(
                "unknown predictor kind '{other}'"
            )));
        }
    };
    Ok(predictor)
}

fn put_u32(arrays: &mut Arrays, name: &str, v: impl Iterator<Item = u32>) {
    let v: Vec<u32> = v.collect();
    arrays.insert(
        name.into(),
        Array {
            shape: vec![v.len()],
            elements: Elements::U32(v),
        },
    );
}

fn get_u32<'a>(arrays: &'a Arrays, name: &str) -> Result<&'a [u32], Problem> {
    match arrays.get(name).map(|a| &a.elements) {
        Some(Elements::U32(v)) => Ok(v),
        Some(_) => Err(Problem::Inconsistent(format!(
            "array '{name}' should be a u32 array"
        ))),
        None => Err(missing(name)),
    }
}

fn verdict_code(v: Verdict) -> u32 {
    match v {
        Verdict::Inside => 0,
        Verdict::Border => 1,
        Verdict::Outside => 2,
    }
}

fn meta_field<T: serde::de::DeserializeOwned>(
    meta: &serde_json::Value,
    key: &str,
) -> Result<T, Problem> {
    let v = meta
        .get(key)
        .ok_or_else(|| Problem::Manifest(format!("'{key}' is missing")))?;
    serde_json::from_value(v.clone()).map_err(|e| Problem::Manifest(format!("'{key}': {e}")))
}

fn save_cvplus(c: &CvPlus, arrays: &mut Arrays) -> serde_json::Value {
    let st = c.state();
    put_u32(
        arrays,
        "conformal.fold_of",
        st.fold_of.iter().map(|&f| f as u32),
    );
    put1(
        arrays,
        "conformal.residuals",
        &Array1::from(st.residuals.clone()),
    );
    put_u32(
        arrays,
        "conformal.verdicts",
        st.verdicts.iter().map(|&v| verdict_code(v)),
    );
    json!({ "k": st.k, "min_band": st.min_band })
}

fn load_cvplus(meta: &serde_json::Value, arrays: &Arrays) -> Result<CvPlus, Problem> {
    let verdicts = get_u32(arrays, "conformal.verdicts")?
        .iter()
        .map(|&c| match c {
            0 => Ok(Verdict::Inside),
            1 => Ok(Verdict::Border),
            2 => Ok(Verdict::Outside),
            other => Err(Problem::Inconsistent(format!(
                "unknown verdict code {other}"
            ))),
        })
        .collect::<Result<Vec<_>, _>>()?;
    let state = CvPlusState {
        k: meta_field(meta, "k")?,
        min_band: meta_field(meta, "min_band")?,
        fold_of: get_u32(arrays, "conformal.fold_of")?
            .iter()
            .map(|&f| f as usize)
            .collect(),
        residuals: get1(arrays, "conformal.residuals")?.to_vec(),
        verdicts,
    };
    CvPlus::from_state(state)
        .map_err(|e| Problem::Inconsistent(format!("conformal calibration: {e}")))
}

fn save_domain(g: &DomainGuard, arrays: &mut Arrays) -> serde_json::Value {
    let st = g.state();
    put1(arrays, "domain.pca.mean", &st.pca.mean);
    put2(arrays, "domain.pca.components", &st.pca.components);
    put1(arrays, "domain.pca.eigenvalues", &st.pca.eigenvalues);
    put1(
        arrays,
        "domain.pca.explained_variance_ratio",
        &st.pca.explained_variance_ratio,
    );
    put2(arrays, "domain.training_scores", &st.training_scores);
    put1(
        arrays,
        "domain.loo_distances",
        &Array1::from(st.loo_distances.clone()),
    );
    put1(
        arrays,
        "domain.range_min",
        &Array1::from(st.range_min.clone()),
    );
    put1(
        arrays,
        "domain.range_max",
        &Array1::from(st.range_max.clone()),
    );
    json!({
        "settings": st.settings,
        "thresholds": st.thresholds,
        "n": st.n,
        "pca_total_variance": st.pca.total_variance,
        "pca_n_samples": st.pca.n_samples,
    })
}

fn load_domain(meta: &serde_json::Value, arrays: &Arrays) -> Result<DomainGuard, Problem> {
    let pca = Pca {
        mean: get1(arrays, "domain.pca.mean")?,
        components: get2(arrays, "domain.pca.components")?,
        eigenvalues: get1(arrays, "domain.pca.eigenvalues")?,
        explained_variance_ratio: get1(arrays, "domain.pca.explained_variance_ratio")?,
        total_variance: meta_field(meta, "pca_total_variance")?,
        n_samples: meta_field(meta, "pca_n_samples")?,
    };
    let state = DomainState {
        settings: meta_field(meta, "settings")?,
        pca,
        training_scores: get2(arrays, "domain.training_scores")?,
        loo_distances: get1(arrays, "domain.loo_distances")?.to_vec(),
        thresholds: meta_field(meta, "thresholds")?,
        range_min: get1(arrays, "domain.range_min")?.to_vec(),
        range_max: get1(arrays, "domain.range_max")?.to_vec(),
        n: meta_field(meta, "n")?,
    };
    DomainGuard::from_state(state).map_err(|e| Problem::Inconsistent(format!("domain guard: {e}")))
}
