//! The scoring path of one batch, free of gRPC and SQL: check the request
//! against the model (confidence, size, descriptor names), check each
//! candidate (id, length, finite values), put the good rows in the bundle's
//! descriptor order, score them in ONE call, give each a status by the
//! policy and rank the ones that are ranked.

use std::borrow::Cow;
use std::collections::HashMap;

use ndarray::Array2;

use super::Error;
use super::registry::Scorer;
use crate::audit::{CandidateStatus, Counts, descriptor_hash};
use crate::scoring::{CandidateScore, Disposition, Policy, ranks};

/// Confidences a request may ask for (0 means the default).
pub const CONFIDENCE_RANGE: std::ops::RangeInclusive<f64> = 0.5..=0.99;

/// One candidate as it arrived.
pub struct CandidateIn<'a> {
    pub id: &'a str,
    pub descriptors: &'a [f64],
}

/// How a request's rows map onto the model: checked once per request (or
/// once per stream).
#[derive(Clone, Debug, PartialEq)]
pub struct Plan {
    pub confidence: f64,
    /// `order[j]` is the request column holding the bundle's descriptor `j`;
    /// `None` when the request sends the bundle's order.
    pub order: Option<Vec<usize>>,
    /// Descriptor names in the request's column order, for reasons.
    pub names_sent: Vec<String>,
}

/// Resolves the confidence: the request's, else the server default, else
/// the bundle's.
pub fn confidence(requested: f64, server_default: f64, bundle_default: f64) -> Result<f64, Error> {
    if requested == 0.0 {
        return Ok(if server_default != 0.0 {
            server_default
        } else {
            bundle_default
        });
    }
    if !CONFIDENCE_RANGE.contains(&requested) {
        return Err(Error::BadConfidence { value: requested });
    }
    Ok(requested)
}

/// Checks descriptor names against the bundle's and returns the column map.
pub fn plan(
    model: &dyn Scorer,
    confidence: f64,
    descriptor_names: &[String],
) -> Result<Plan, Error> {
    let expected = &model.info().descriptor_names;
    if descriptor_names.is_empty() {
        return Ok(Plan {
            confidence,
            order: None,
            names_sent: expected.clone(),
        });
    }
    let mut position: HashMap<&str, usize> = HashMap::with_capacity(descriptor_names.len());
    let mut duplicated = Vec::new();
    for (i, name) in descriptor_names.iter().enumerate() {
        if position.insert(name.as_str(), i).is_some() && !duplicated.contains(name) {
            duplicated.push(name.clone());
        }
    }
    let missing: Vec<String> = expected
        .iter()
        .filter(|n| !position.contains_key(n.as_str()))
        .cloned()
        .collect();
    let known: std::collections::HashSet<&str> = expected.iter().map(|s| s.as_str()).collect();
    let mut unexpected: Vec<String> = Vec::new();
    for n in descriptor_names {
        if !known.contains(n.as_str()) && !unexpected.contains(n) {
            unexpected.push(n.clone());
        }
    }
    if !missing.is_empty() || !unexpected.is_empty() || !duplicated.is_empty() {
        return Err(Error::DescriptorNames {
            model: model.info().id.clone(),
            expected: expected.len(),
            missing,
            unexpected,
            duplicated,
        });
    }
    let order: Vec<usize> = expected.iter().map(|n| position[n.as_str()]).collect();
    let identity = order.iter().enumerate().all(|(j, &i)| i == j);
    Ok(Plan {
        confidence,
        order: (!identity).then_some(order),
        names_sent: descriptor_names.to_vec(),
    })
}

/// What became of one candidate.
#[derive(Clone, Debug)]
pub struct Outcome {
    pub id: String,
    pub status: CandidateStatus,
    /// Present for every candidate that was scored (REFUSED included: the
    /// answer withholds the prediction, the signals are still reported).
    pub score: Option<CandidateScore>,
    pub rank: u32,
    pub reason: String,
    /// SHA-256 of the values (bundle order when the row has the right
    /// length, else as sent).
    pub descriptor_sha256: String,
    /// The values in the same order; kept only where the caller asked.
    pub descriptors: Option<Vec<f64>>,
}

/// A scored batch.
#[derive(Clone, Debug)]
pub struct ScoredBatch {
    pub outcomes: Vec<Outcome>,
    pub counts: Counts,
}

/// Which candidates keep their descriptor values for the audit store.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum KeepDescriptors {
    FlaggedOnly,
    All,
}

/// Scores one batch. `seen` holds the ids met earlier in the same request
/// or stream (duplicates are rejected) and is extended.
pub fn score_batch(
    model: &dyn Scorer,
    plan: &Plan,
    candidates: &[CandidateIn<'_>],
    policy: &Policy,
    keep: KeepDescriptors,
    seen: &mut HashMap<String, usize>,
    first_position: usize,
) -> Result<ScoredBatch, Error> {
    let p = model.info().descriptor_names.len();
    let mut rows: Vec<f64> = Vec::with_capacity(candidates.len() * p);
    let mut outcomes: Vec<Outcome> = Vec::with_capacity(candidates.len());
    // Index into `rows` of each candidate that passed the checks.
    let mut row_of: Vec<Option<usize>> = Vec::with_capacity(candidates.len());
    let mut n_rows = 0;
    for (i, c) in candidates.iter().enumerate() {
        let canonical = reorder(c.descriptors, plan, p);
        let hashed: &[f64] = canonical.as_deref().unwrap_or(c.descriptors);
        let descriptor_sha256 = descriptor_hash(hashed);
        let rejection = check_candidate(c, canonical.is_some(), plan, p, seen, first_position + i)
            .or_else(|| too_far(model, canonical.as_deref()?, plan));
        seen.entry(c.id.to_string()).or_insert(first_position + i);
        match rejection {
            Some(reason) => {
                let keep_values = keep == KeepDescriptors::All;
                outcomes.push(Outcome {
                    id: c.id.to_string(),
                    status: CandidateStatus::Rejected,
                    score: None,
                    rank: 0,
                    reason,
                    descriptor_sha256,
                    descriptors: keep_values.then(|| hashed.to_vec()),
                });
                row_of.push(None);
            }
            None => {
                // The values are copied once, into the batch matrix; the
                // few candidates whose values are kept get them from there.
                rows.extend_from_slice(hashed);
                outcomes.push(Outcome {
                    id: c.id.to_string(),
                    status: CandidateStatus::Scored,
                    score: None,
                    rank: 0,
                    reason: String::new(),
                    descriptor_sha256,
                    descriptors: None,
                });
                row_of.push(Some(n_rows));
                n_rows += 1;
            }
        }
    }
    let x = Array2::from_shape_vec((n_rows, p), rows).map_err(|e| Error::Internal {
        what: format!("assembling {n_rows} × {p} descriptor rows: {e}"),
    })?;
    let scores = if n_rows == 0 {
        Vec::new()
    } else {
        model.score(x.view(), plan.confidence)
    };
    if scores.len() != n_rows {
        return Err(Error::Internal {
            what: format!(
                "model '{}' returned {} scores for {n_rows} rows",
                model.info().id,
                scores.len()
            ),
        });
    }
    let mut scores = scores.into_iter();
    for (o, row) in outcomes.iter_mut().zip(&row_of) {
        let Some(row) = *row else { continue };
        let Some(s) = scores.next() else { break };
        let disposition = policy.disposition(s.domain.verdict);
        o.status = match disposition {
            Disposition::Scored => CandidateStatus::Scored,
            Disposition::Flagged => CandidateStatus::Flagged,
            Disposition::Refused => CandidateStatus::Refused,
        };
        if o.status == CandidateStatus::Refused {
            o.reason = format!(
                "outside the applicability domain ({}); refused by policy",
                s.domain.notes.join("; ")
            );
        } else if o.status == CandidateStatus::Flagged {
            o.reason = format!(
                "{} the applicability domain ({}); not ranked",
                if s.domain.verdict == crate::domain::Verdict::Border {
                    "at the border of"
                } else {
                    "outside"
                },
                s.domain.notes.join("; ")
            );
        }
        let keep_values = keep == KeepDescriptors::All
            || matches!(
                o.status,
                CandidateStatus::Flagged | CandidateStatus::Refused
            );
        if keep_values {
            o.descriptors = Some(x.row(row).to_vec());
        }
        o.score = Some(s);
    }
    let view: Vec<Option<&CandidateScore>> = outcomes.iter().map(|o| o.score.as_ref()).collect();
    let ranked = ranks(&view, policy, model.info().direction);
    let mut counts = Counts {
        candidates: outcomes.len() as u32,
        ..Counts::default()
    };
    for (o, r) in outcomes.iter_mut().zip(ranked) {
        o.rank = r;
        match o.status {
            CandidateStatus::Scored => counts.scored += 1,
            CandidateStatus::Flagged => counts.flagged += 1,
            CandidateStatus::Refused => counts.refused += 1,
            CandidateStatus::Rejected => counts.rejected += 1,
        }
    }
    Ok(ScoredBatch { outcomes, counts })
}

/// The row in the bundle's order, when it has the length the plan expects;
/// borrowed when the request already sends that order.
fn reorder<'a>(values: &'a [f64], plan: &Plan, p: usize) -> Option<Cow<'a, [f64]>> {
    if values.len() != p {
        return None;
    }
    Some(match &plan.order {
        None => Cow::Borrowed(values),
        Some(order) => Cow::Owned(order.iter().map(|&i| values[i]).collect()),
    })
}

/// Why a finite row in bundle order still cannot be scored: a value whose
/// standardised form overflows. The reason names the descriptor as sent.
fn too_far(model: &dyn Scorer, canonical: &[f64], plan: &Plan) -> Option<String> {
    let j = model.unscorable_column(canonical)?;
    let sent = plan
        .order
        .as_ref()
        .and_then(|o| o.get(j))
        .copied()
        .unwrap_or(j);
    let name = plan.names_sent.get(sent).map(String::as_str);
    let name = name.or_else(|| model.info().descriptor_names.get(j).map(String::as_str));
    Some(format!(
        "descriptor '{}' (position {sent}) = {:e} is too far from the training data to \
         standardise (its scaled value overflows); check the units of this descriptor",
        name.unwrap_or("?"),
        canonical[j]
    ))
}

/// Why a candidate cannot be scored, if it cannot. The reason speaks of the
/// request's own positions and names.
fn check_candidate(
    c: &CandidateIn<'_>,
    right_length: bool,
    plan: &Plan,
    p: usize,
    seen: &HashMap<String, usize>,
    position: usize,
) -> Option<String> {
    if c.id.is_empty() {
        return Some(format!(
            "empty id (candidate at position {position}); give every candidate a unique id"
        ));
    }
    if let Some(first) = seen.get(c.id) {
        return Some(format!(
            "duplicate id '{}': already used by the candidate at position {first}",
            c.id
        ));
    }
    if !right_length {
        return Some(format!(
            "{} descriptor values given, the model expects {p} (see DescribeModel)",
            c.descriptors.len()
        ));
    }
    let bad: Vec<String> = c
        .descriptors
        .iter()
        .enumerate()
        .filter(|(_, v)| !v.is_finite())
        .map(|(i, v)| {
            let name = plan.names_sent.get(i).map(String::as_str).unwrap_or("?");
            format!("'{name}' (position {i}) is {v}")
        })
        .collect();
    if bad.is_empty() {
        return None;
    }
    const SHOWN: usize = 5;
    let more = if bad.len() > SHOWN {
        format!(" and {} more", bad.len() - SHOWN)
    } else {
        String::new()
    };
    Some(format!(
        "non-finite descriptor values: {}{more}",
        bad[..bad.len().min(SHOWN)].join(", ")
    ))
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::conformal::{Calibration, Interval};
    use crate::domain::{DomainSignals, Verdict};
    use crate::models::Hyper;
    use crate::scoring::{Direction, ModelInfo, OutsidePolicy, RankKey};
    use ndarray::ArrayView2;

    /// A hand-made scorer: prediction = sum of the row; verdict by the first
    /// value (< 1 inside, < 2 border, else outside). Enough to check the
    /// request path, which must not care how scores are made.
    pub(crate) struct SumScorer(pub ModelInfo);

    impl Scorer for SumScorer {
        fn info(&self) -> &ModelInfo {
            &self.0
        }
        fn score(&self, x: ArrayView2<f64>, _c: f64) -> Vec<CandidateScore> {
            x.rows()
                .into_iter()
                .map(|r| {
                    let pred: f64 = r.sum();
                    let verdict = match r[0] {
                        v if v < 1.0 => Verdict::Inside,
                        v if v < 2.0 => Verdict::Border,
                        _ => Verdict::Outside,
                    };
                    CandidateScore {
                        prediction: pred,
                        interval: Interval {
                            lower: Some(pred - 1.0),
                            upper: Some(pred + 1.0),
                            calibration: Calibration::Pooled,
                        },
                        domain: DomainSignals {
                            knn_distance: r[0],
                            typicality: 0.5,
                            beyond_z_threshold: r[0] >= 2.0,
                            leverage: 0.0,
                            pca_residual: 0.0,
                            out_of_range: vec![],
                            verdict,
                            notes: vec![format!("first value {}", r[0])],
                        },
                    }
                })
                .collect()
        }
    }

    pub(crate) fn sum_model(names: &[&str]) -> SumScorer {
        SumScorer(ModelInfo {
            id: "sum".into(),
            version: "0123456789ab".into(),
            endpoint: "activity".into(),
            unit: "pIC50".into(),
            direction: Direction::Higher,
            hyper: Hyper::Ridge { alpha: 1.0 },
            descriptor_names: names.iter().map(|s| s.to_string()).collect(),
            default_confidence: 0.8,
        })
    }

    fn policy(outside: OutsidePolicy) -> Policy {
        Policy {
            outside,
            rank_border: true,
            key: RankKey::Prediction,
        }
    }

    #[test]
    fn confidence_defaults_and_range() {
        assert_eq!(confidence(0.0, 0.0, 0.8).unwrap(), 0.8);
        assert_eq!(confidence(0.0, 0.95, 0.8).unwrap(), 0.95);
        assert_eq!(confidence(0.5, 0.95, 0.8).unwrap(), 0.5);
        assert_eq!(confidence(0.99, 0.0, 0.8).unwrap(), 0.99);
        for bad in [0.49, 0.995, 1.0, -0.9, f64::NAN] {
            assert!(confidence(bad, 0.0, 0.8).is_err(), "{bad}");
        }
    }

    #[test]
    fn names_must_match_exactly_and_are_listed_when_not() {
        let m = sum_model(&["a", "b", "c"]);
        let names = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
        assert_eq!(plan(&m, 0.9, &[]).unwrap().order, None);
        assert_eq!(plan(&m, 0.9, &names(&["a", "b", "c"])).unwrap().order, None);
        assert_eq!(
            plan(&m, 0.9, &names(&["c", "a", "b"])).unwrap().order,
            Some(vec![1, 2, 0])
        );
        match plan(&m, 0.9, &names(&["c", "x", "x", "a"])).unwrap_err() {
            Error::DescriptorNames {
                missing,
                unexpected,
                duplicated,
                expected,
                ..
            } => {
                assert_eq!(missing, vec!["b"]);
                assert_eq!(unexpected, vec!["x"]);
                assert_eq!(duplicated, vec!["x"]);
                assert_eq!(expected, 3);
            }
            other => panic!("{other}"),
        }
    }

    #[test]
    fn bad_candidates_are_rejected_with_reasons_and_the_rest_scored_in_order() {
        let m = sum_model(&["a", "b"]);
        let pl = plan(&m, 0.9, &[]).unwrap();
        let rows: Vec<(&str, Vec<f64>)> = vec![
            ("x", vec![0.5, 1.0]),
            ("", vec![0.1, 0.1]),
            ("y", vec![0.2, f64::NAN]),
            ("z", vec![0.2]),
            ("x", vec![0.3, 0.3]),
            ("w", vec![0.9, 5.0]),
            ("far", vec![7.0, 0.0]),
        ];
        let cands: Vec<CandidateIn> = rows
            .iter()
            .map(|(id, d)| CandidateIn { id, descriptors: d })
            .collect();
        let mut seen = HashMap::new();
        let b = score_batch(
            &m,
            &pl,
            &cands,
            &policy(OutsidePolicy::Refuse),
            KeepDescriptors::FlaggedOnly,
            &mut seen,
            0,
        )
        .unwrap();
        let st: Vec<CandidateStatus> = b.outcomes.iter().map(|o| o.status).collect();
        use CandidateStatus::*;
        assert_eq!(
            st,
            vec![
                Scored, Rejected, Rejected, Rejected, Rejected, Scored, Refused
            ]
        );
        assert!(b.outcomes[1].reason.contains("empty id"));
        assert!(
            b.outcomes[2].reason.contains("'b' (position 1) is NaN"),
            "{}",
            b.outcomes[2].reason
        );
        assert!(
            b.outcomes[3]
                .reason
                .contains("1 descriptor values given, the model expects 2")
        );
        assert!(b.outcomes[4].reason.contains("duplicate id 'x'"));
        assert!(b.outcomes[6].reason.contains("refused"));
        // w (5.9) before x (1.5); the refused one is not ranked.
        let r: Vec<u32> = b.outcomes.iter().map(|o| o.rank).collect();
        assert_eq!(r, vec![2, 0, 0, 0, 0, 1, 0]);
        assert_eq!(b.outcomes[0].score.as_ref().unwrap().prediction, 1.5);
        // Descriptors kept only for the refused one.
        assert!(b.outcomes[0].descriptors.is_none());
        assert_eq!(b.outcomes[6].descriptors.as_deref(), Some(&[7.0, 0.0][..]));
        assert_eq!(
            b.counts,
            Counts {
                candidates: 7,
                scored: 2,
                flagged: 0,
                refused: 1,
                rejected: 4
            }
        );
    }

    #[test]
    fn reordered_columns_give_the_same_scores_and_hashes() {
        let m = sum_model(&["a", "b", "c"]);
        let canonical = plan(&m, 0.9, &[]).unwrap();
        let names: Vec<String> = ["b", "c", "a"].iter().map(|s| s.to_string()).collect();
        let shuffled = plan(&m, 0.9, &names).unwrap();
        let x1 = [0.5, 2.0, 3.0];
        let x2 = [2.0, 3.0, 0.5];
        let run = |pl: &Plan, d: &[f64]| {
            score_batch(
                &m,
                pl,
                &[CandidateIn {
                    id: "c",
                    descriptors: d,
                }],
                &policy(OutsidePolicy::Flag),
                KeepDescriptors::All,
                &mut HashMap::new(),
                0,
            )
            .unwrap()
        };
        let a = run(&canonical, &x1);
        let b = run(&shuffled, &x2);
        assert_eq!(a.outcomes[0].score, b.outcomes[0].score);
        assert_eq!(
            a.outcomes[0].descriptor_sha256,
            b.outcomes[0].descriptor_sha256
        );
        assert_eq!(a.outcomes[0].descriptors, b.outcomes[0].descriptors);
    }

    #[test]
    fn flag_policy_gives_outside_a_prediction_and_no_rank() {
        let m = sum_model(&["a"]);
        let pl = plan(&m, 0.9, &[]).unwrap();
        let d = [[5.0], [0.5]];
        let cands: Vec<CandidateIn> = d
            .iter()
            .enumerate()
            .map(|(i, v)| CandidateIn {
                id: ["far", "near"][i],
                descriptors: v,
            })
            .collect();
        let b = score_batch(
            &m,
            &pl,
            &cands,
            &policy(OutsidePolicy::Flag),
            KeepDescriptors::FlaggedOnly,
            &mut HashMap::new(),
            0,
        )
        .unwrap();
        assert_eq!(b.outcomes[0].status, CandidateStatus::Flagged);
        assert_eq!(b.outcomes[0].rank, 0);
        assert!(b.outcomes[0].score.is_some());
        assert_eq!(b.outcomes[1].rank, 1);
    }
}
