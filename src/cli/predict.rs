//! `plumbline predict`: score a CSV offline with a bundle.

use std::path::Path;

use anyhow::Context;

use super::{OutsideArg, PolicyArgs, PredictArgs, RankKeyArg};
use crate::scoring::{
    self, CandidateScore, Disposition, OutsidePolicy, Policy, RankKey, ScoringModel,
};

impl PolicyArgs {
    pub fn policy(&self) -> Policy {
        Policy {
            outside: match self.outside {
                OutsideArg::Refuse => OutsidePolicy::Refuse,
                OutsideArg::Flag => OutsidePolicy::Flag,
            },
            rank_border: !self.no_rank_border,
            key: match self.rank_key {
                RankKeyArg::Prediction => RankKey::Prediction,
                RankKeyArg::ConservativeBound => RankKey::ConservativeBound,
            },
        }
    }
}

/// Checks a confidence given on the command line or in a request.
pub fn check_confidence(c: f64) -> anyhow::Result<f64> {
    if c.is_finite() && (0.5..=0.99).contains(&c) {
        Ok(c)
    } else {
        anyhow::bail!("confidence {c} is outside [0.5, 0.99]; give e.g. --confidence 0.9")
    }
}

pub fn run(args: &PredictArgs) -> anyhow::Result<()> {
    let bundle = crate::bundle::read(&args.bundle)?;
    let model = &bundle.model;
    let confidence = check_confidence(args.confidence.unwrap_or(model.info.default_confidence))?;
    let table =
        crate::data::read_for_model(&args.data, &args.id, &model.info.descriptor_names, None)
            .with_context(|| format!("reading {}", args.data.display()))?;
    check_scorable(model, &table)?;
    let scores = model.score(table.x.view(), confidence);
    let rows = scored_rows(model, &table.ids, &scores, &args.policy.policy());
    write_rows(&args.out, &rows)?;
    let ranked = rows.iter().filter(|r| r.rank > 0).count();
    eprintln!(
        "scored {} candidates at confidence {confidence}: {ranked} ranked, {} not ranked; wrote {}",
        rows.len(),
        rows.len() - ranked,
        args.out.display()
    );
    Ok(())
}

/// Refuses a table with a value too far out to standardise (its scaled
/// value overflows), naming the row and descriptor.
pub fn check_scorable(
    model: &crate::scoring::ScoringModel,
    table: &crate::data::Table,
) -> anyhow::Result<()> {
    for (i, row) in table.x.rows().into_iter().enumerate() {
        if let Some(j) = model.unscorable_column(&row.to_vec()) {
            anyhow::bail!(
                "row {} (id '{}'): descriptor '{}' = {:e} is too far from the training data to \
                 standardise; check the units of this descriptor or drop the row",
                i + 1,
                table.ids.get(i).map(String::as_str).unwrap_or("?"),
                model
                    .info
                    .descriptor_names
                    .get(j)
                    .map(String::as_str)
                    .unwrap_or("?"),
                row[j]
            );
        }
    }
    Ok(())
}

/// One output row of `predict` (and, with status and record id, of `score`).
#[derive(Clone, Debug, PartialEq)]
pub struct Row {
    pub id: String,
    pub prediction: Option<f64>,
    pub lower: Option<f64>,
    pub upper: Option<f64>,
    pub verdict: String,
    pub typicality: f64,
    pub rank: u32,
    pub disposition: Disposition,
}

/// Applies the policy: dispositions, refused predictions withheld, ranks.
pub fn scored_rows(
    model: &ScoringModel,
    ids: &[String],
    scores: &[CandidateScore],
    policy: &Policy,
) -> Vec<Row> {
    let refs: Vec<Option<&CandidateScore>> = scores.iter().map(Some).collect();
    let ranks = scoring::ranks(&refs, policy, model.info.direction);
    ids.iter()
        .zip(scores)
        .zip(ranks)
        .map(|((id, s), rank)| {
            let disposition = policy.disposition(s.domain.verdict);
            let refused = disposition == Disposition::Refused;
            Row {
                id: id.clone(),
                prediction: (!refused).then_some(s.prediction),
                lower: if refused { None } else { s.interval.lower },
                upper: if refused { None } else { s.interval.upper },
                verdict: s.domain.verdict.name().to_string(),
                typicality: s.domain.typicality,
                rank,
                disposition,
            }
        })
        .collect()
}

/// The columns `predict` writes; `score` writes these, then status and record id.
pub const COLUMNS: [&str; 7] = [
    "id",
    "prediction",
    "lower",
    "upper",
    "verdict",
    "typicality",
    "rank",
];

fn opt(v: Option<f64>) -> String {
    // Shortest representation that reads back to the same f64.
    v.map(|x| format!("{x:?}")).unwrap_or_default()
}

fn write_rows(path: &Path, rows: &[Row]) -> anyhow::Result<()> {
    let mut w =
        csv::Writer::from_path(path).with_context(|| format!("creating {}", path.display()))?;
    w.write_record(COLUMNS)?;
    for r in rows {
        let rank = if r.rank > 0 {
            r.rank.to_string()
        } else {
            String::new()
        };
        w.write_record([
            r.id.clone(),
            opt(r.prediction),
            opt(r.lower),
            opt(r.upper),
            r.verdict.clone(),
            format!("{:?}", r.typicality),
            rank,
        ])?;
    }
    w.flush()?;
    Ok(())
}
