//! Mapping the fitted pipeline to named arrays and manifest metadata, and
//! back with every shape checked.

use std::collections::BTreeMap;

use ndarray::{Array1, Array2};
use serde_json::json;

use super::format::{Array, Elements, Sections};
use super::{Bundle, Card, Manifest};
use crate::models::Predictor;
use crate::scoring::{ModelInfo, ScoringModel};
use crate::space::Standardizer;

/// What was wrong with decoded sections.
pub(super) enum Problem {
    Manifest(String),
    Inconsistent(String),
}

type Arrays = BTreeMap<String, Array>;

fn put1(arrays: &mut Arrays, name: &str, a: &Array1<f64>) {
    arrays.insert(name.into(), Array { shape: vec![a.len()], elements: Elements::F64(a.to_vec()) });
}

fn put2(arrays: &mut Arrays, name: &str, a: &Array2<f64>) {
    let shape = vec![a.nrows(), a.ncols()];
    arrays.insert(name.into(), Array { shape, elements: Elements::F64(a.iter().copied().collect()) });
}

fn put_mask(arrays: &mut Arrays, name: &str, a: &Array2<bool>) {
    let shape = vec![a.nrows(), a.ncols()];
    arrays.insert(name.into(), Array { shape, elements: Elements::U8(a.iter().map(|&b| b as u8).collect()) });
}

fn missing(name: &str) -> Problem {
    Problem::Inconsistent(format!("array '{name}' is missing"))
}

fn get_f64<'a>(arrays: &'a Arrays, name: &str, rank: usize) -> Result<(&'a [usize], &'a [f64]), Problem> {
    let a = arrays.get(name).ok_or_else(|| missing(name))?;
    match &a.elements {
        Elements::F64(v) if a.shape.len() == rank => Ok((&a.shape, v)),
        _ => Err(Problem::Inconsistent(format!("array '{name}' should be a rank-{rank} f64 array"))),
    }
}

pub(super) fn get1(arrays: &Arrays, name: &str) -> Result<Array1<f64>, Problem> {
    let (_, v) = get_f64(arrays, name, 1)?;
    Ok(Array1::from(v.to_vec()))
}

pub(super) fn get2(arrays: &Arrays, name: &str) -> Result<Array2<f64>, Problem> {
    let (shape, v) = get_f64(arrays, name, 2)?;
    Array2::from_shape_vec((shape[0], shape[1]), v.to_vec()).map_err(|e| Problem::Inconsistent(format!("array '{name}': {e}")))
}

fn get_mask(arrays: &Arrays, name: &str) -> Result<Array2<bool>, Problem> {
    let a = arrays.get(name).ok_or_else(|| missing(name))?;
    match &a.elements {
        Elements::U8(v) if a.shape.len() == 2 => Array2::from_shape_vec((a.shape[0], a.shape[1]), v.iter().map(|&b| b != 0).collect())
            .map_err(|e| Problem::Inconsistent(format!("array '{name}': {e}"))),
        _ => Err(Problem::Inconsistent(format!("array '{name}' should be a rank-2 byte array"))),
    }
}

fn expect(cond: bool, what: impl FnOnce() -> String) -> Result<(), Problem> {
    if cond { Ok(()) } else { Err(Problem::Inconsistent(what())) }
}

pub(super) fn to_sections(model: &ScoringModel, info: &ModelInfo, card: &Card, training_ids: &[String], training_y: &[f64]) -> Sections {
    let mut arrays = Arrays::new();
    let mut components = BTreeMap::new();
    put1(&mut arrays, "standardizer.mean", &model.standardizer.mean);
    put1(&mut arrays, "standardizer.scale", &model.standardizer.scale);
    put1(&mut arrays, "training.y", &Array1::from(training_y.to_vec()));
    components.insert("predictor".to_string(), save_predictor(&model.predictor, &mut arrays));
    components.insert("domain".to_string(), crate::domain::persist::save(&model.domain, &mut arrays));
    components.insert("conformal".to_string(), crate::conformal::persist::save(&model.cvplus, &mut arrays));
    let manifest = Manifest { info: info.clone(), card: card.clone(), training_ids: training_ids.to_vec(), components };
    Sections { manifest: serde_json::to_vec_pretty(&manifest).expect("manifest serialises"), arrays }
}

pub(super) fn from_sections(sections: &Sections) -> Result<Bundle, Problem> {
    let manifest: Manifest = serde_json::from_slice(&sections.manifest).map_err(|e| Problem::Manifest(e.to_string()))?;
    let arrays = &sections.arrays;
    let p = manifest.info.descriptor_names.len();
    let standardizer = Standardizer { mean: get1(arrays, "standardizer.mean")?, scale: get1(arrays, "standardizer.scale")? };
    expect(standardizer.mean.len() == p && standardizer.scale.len() == p, || {
        format!("standardizer has {} values but the bundle lists {p} descriptors", standardizer.mean.len())
    })?;
    let training_y = get1(arrays, "training.y")?.to_vec();
    let n = manifest.training_ids.len();
    expect(training_y.len() == n, || format!("{} training targets for {n} training ids", training_y.len()))?;
    let component = |name: &str| manifest.components.get(name).ok_or_else(|| Problem::Manifest(format!("component '{name}' is missing")));
    let predictor = load_predictor(component("predictor")?, arrays, p)?;
    let domain = crate::domain::persist::load(component("domain")?, arrays, p).map_err(Problem::Inconsistent)?;
    let cvplus = crate::conformal::persist::load(component("conformal")?, arrays).map_err(Problem::Inconsistent)?;
    let model = ScoringModel { info: manifest.info.clone(), standardizer, predictor, cvplus, domain };
    Ok(Bundle { manifest, model, training_y })
}

fn save_predictor(p: &Predictor, arrays: &mut Arrays) -> serde_json::Value {
    match p {
        Predictor::Linear { coef, intercept } => {
            put2(arrays, "predictor.coef", coef);
            put1(arrays, "predictor.intercept", intercept);
            json!({ "kind": "linear" })
        }
        Predictor::Kernel { gamma, train, dual, offset } => {
            put2(arrays, "predictor.train", train);
            put2(arrays, "predictor.dual", dual);
            put1(arrays, "predictor.offset", offset);
            json!({ "kind": "kernel", "gamma": gamma })
        }
        Predictor::Neighbours { k, train, y, membership } => {
            put2(arrays, "predictor.train", train);
            put1(arrays, "predictor.y", y);
            put_mask(arrays, "predictor.membership", membership);
            json!({ "kind": "neighbours", "k": k })
        }
    }
}

fn load_predictor(meta: &serde_json::Value, arrays: &Arrays, p: usize) -> Result<Predictor, Problem> {
    let kind = meta.get("kind").and_then(|k| k.as_str()).unwrap_or("");
    let predictor = match kind {
        "linear" => {
            let coef = get2(arrays, "predictor.coef")?;
            let intercept = get1(arrays, "predictor.intercept")?;
            expect(coef.nrows() == p && coef.ncols() == intercept.len(), || {
                format!("linear coefficients are {}×{} for {p} descriptors and {} intercepts", coef.nrows(), coef.ncols(), intercept.len())
            })?;
            Predictor::Linear { coef, intercept }
        }
        "kernel" => {
            let gamma = meta.get("gamma").and_then(|g| g.as_f64()).ok_or_else(|| Problem::Manifest("kernel predictor has no gamma".into()))?;
            let train = get2(arrays, "predictor.train")?;
            let dual = get2(arrays, "predictor.dual")?;
            let offset = get1(arrays, "predictor.offset")?;
            expect(train.ncols() == p && dual.nrows() == train.nrows() && dual.ncols() == offset.len(), || {
                format!("kernel arrays disagree: train {:?}, dual {:?}, offset {}", train.dim(), dual.dim(), offset.len())
            })?;
            Predictor::Kernel { gamma, train, dual, offset }
        }
        "neighbours" => {
            let k = meta.get("k").and_then(|k| k.as_u64()).ok_or_else(|| Problem::Manifest("neighbour predictor has no k".into()))? as usize;
            let train = get2(arrays, "predictor.train")?;
            let y = get1(arrays, "predictor.y")?;
            let membership = get_mask(arrays, "predictor.membership")?;
            expect(train.ncols() == p && y.len() == train.nrows() && membership.nrows() == train.nrows(), || {
                format!("neighbour arrays disagree: train {:?}, y {}, membership {:?}", train.dim(), y.len(), membership.dim())
            })?;
            Predictor::Neighbours { k, train, y, membership }
        }
        other => return Err(Problem::Manifest(format!("unknown predictor kind '{other}'"))),
    };
    Ok(predictor)
}
