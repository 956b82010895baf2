//! `plumbline evaluate`: score an external set that has measured values and
//! set the realised performance and interval coverage, overall and per
//! domain verdict, beside what the bundle's cross-validation claimed.

use std::collections::BTreeMap;

use anyhow::Context;
use ndarray::ArrayView1;
use serde::Serialize;

use super::EvaluateArgs;
use super::predict::check_confidence;
use crate::domain::Verdict;
use crate::scoring::CandidateScore;
use crate::validate::{Estimate, Metrics};

/// Realised figures on one subset of the evaluated rows.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct Realised {
    pub n: usize,
    /// None when the subset has fewer than 2 rows.
    pub metrics: Option<Metrics>,
    /// Share of observed values inside their interval (an unbounded side
    /// always contains).
    pub coverage: Option<f64>,
}

#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct Evaluation {
    pub model: String,
    pub confidence: f64,
    pub overall: Realised,
    pub by_verdict: BTreeMap<String, Realised>,
    pub claims: BTreeMap<String, Estimate>,
}

pub fn run(args: &EvaluateArgs) -> anyhow::Result<()> {
    let bundle = crate::bundle::read(&args.bundle)?;
    let model = &bundle.model;
    let confidence = check_confidence(args.confidence.unwrap_or(model.info.default_confidence))?;
    let target = args
        .target
        .clone()
        .unwrap_or_else(|| bundle.manifest.card.target_column.clone());
    let table = crate::data::read_for_model(
        &args.data,
        &args.id,
        &model.info.descriptor_names,
        Some(&target),
    )
    .with_context(|| format!("reading {}", args.data.display()))?;
    let Some(y) = table.y.as_ref() else {
        anyhow::bail!("{} has no target column '{target}'", args.data.display());
    };
    super::predict::check_scorable(model, &table)?;
    let scores = model.score(table.x.view(), confidence);
    let observed = y.to_vec();
    let evaluation = Evaluation {
        model: model.info.id.clone(),
        confidence,
        overall: realised(&observed, &scores, None),
        by_verdict: Verdict::ALL
            .iter()
            .map(|v| (v.name().to_string(), realised(&observed, &scores, Some(*v))))
            .collect(),
        claims: bundle.manifest.card.claims_map(),
    };
    if args.json {
        println!("{}", serde_json::to_string_pretty(&evaluation)?);
    } else {
        print!("{}", render(&evaluation));
    }
    Ok(())
}

/// Realised metrics and coverage over the rows with `verdict` (all rows when None).
pub fn realised(y: &[f64], scores: &[CandidateScore], verdict: Option<Verdict>) -> Realised {
    let (obs, rows): (Vec<f64>, Vec<&CandidateScore>) = y
        .iter()
        .zip(scores)
        .filter(|(_, s)| verdict.is_none_or(|v| s.domain.verdict == v))
        .map(|(y, s)| (*y, s))
        .unzip();
    let n = obs.len();
    let preds: Vec<f64> = rows.iter().map(|s| s.prediction).collect();
    let covered = obs
        .iter()
        .zip(&rows)
        .filter(|(y, s)| {
            s.interval.lower.is_none_or(|l| **y >= l) && s.interval.upper.is_none_or(|u| **y <= u)
        })
        .count();
    Realised {
        n,
        metrics: (n >= 2)
            .then(|| crate::validate::metrics(ArrayView1::from(&obs), ArrayView1::from(&preds))),
        coverage: (n > 0).then(|| covered as f64 / n as f64),
    }
}

fn render(e: &Evaluation) -> String {
    let mut s = format!("model {}  confidence {}\n\n", e.model, e.confidence);
    s.push_str(&format!(
        "{:<10} {:>5} {:>8} {:>8} {:>8} {:>8} {:>9}\n",
        "subset", "n", "RMSE", "MAE", "R2", "Spearman", "coverage"
    ));
    let mut line = |name: &str, r: &Realised| {
        let f = |v: Option<f64>| v.map(|x| format!("{x:.3}")).unwrap_or_else(|| "-".into());
        let m = r.metrics.as_ref();
        s.push_str(&format!(
            "{:<10} {:>5} {:>8} {:>8} {:>8} {:>8} {:>9}\n",
            name,
            r.n,
            f(m.map(|m| m.rmse)),
            f(m.map(|m| m.mae)),
            f(m.map(|m| m.r2)),
            f(m.map(|m| m.spearman)),
            f(r.coverage)
        ));
    };
    line("all", &e.overall);
    for (v, r) in &e.by_verdict {
        line(v, r);
    }
    s.push_str("\nclaimed by cross-validation (outer folds, mean ± SE):\n");
    for (name, est) in &e.claims {
        s.push_str(&format!("  {name:<9} {:.3} ± {:.3}\n", est.mean, est.se));
    }
    s.push_str(&format!("  coverage  {} (nominal)\n", e.confidence));
    s
}
