//! The fitted pipeline that scores candidates: standardise, predict with the
//! full model and every fold model, CV+ interval, domain verdict; and the
//! ranking rules. `predict`, `evaluate` and the service all call this, so
//! their answers agree to the last bit.

use ndarray::ArrayView2;
use serde::{Deserialize, Serialize};

use crate::conformal::Interval;
use crate::domain::{DomainSignals, Verdict};

/// Which values of the endpoint are better.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Direction {
    Higher,
    Lower,
}

/// One candidate's score.
#[derive(Clone, Debug, PartialEq)]
pub struct CandidateScore {
    pub prediction: f64,
    pub interval: Interval,
    pub domain: DomainSignals,
}

/// What to do with candidates outside the domain.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum OutsidePolicy {
    /// Give no prediction.
    Refuse,
    /// Give the prediction, never rank.
    Flag,
}

/// The ranking key.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum RankKey {
    Prediction,
    /// The interval bound on the unfavourable side: the lower bound when
    /// higher is better. A candidate whose conservative side is unbounded
    /// ranks after every bounded one.
    ConservativeBound,
}

/// How candidates are sorted into statuses and ranked.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Policy {
    pub outside: OutsidePolicy,
    pub rank_border: bool,
    pub key: RankKey,
}

impl Default for Policy {
    fn default() -> Self {
        Policy {
            outside: OutsidePolicy::Refuse,
            rank_border: true,
            key: RankKey::Prediction,
        }
    }
}

/// The status a scored candidate gets under a policy.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Disposition {
    Scored,
    Flagged,
    Refused,
}

impl Policy {
    pub fn disposition(&self, verdict: Verdict) -> Disposition {
        match verdict {
            Verdict::Inside => Disposition::Scored,
            Verdict::Border if self.rank_border => Disposition::Scored,
            Verdict::Border => Disposition::Flagged,
            Verdict::Outside => match self.outside {
                OutsidePolicy::Refuse => Disposition::Refused,
                OutsidePolicy::Flag => Disposition::Flagged,
            },
        }
    }
}

/// What the bundle says of the model, beside its arrays.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ModelInfo {
    /// Model id, as clients name it.
    pub id: String,
    /// Version: the first 12 hex digits of the bundle's content hash.
    pub version: String,
    pub endpoint: String,
    pub unit: String,
    pub direction: Direction,
    pub hyper: crate::models::Hyper,
    pub descriptor_names: Vec<String>,
    pub default_confidence: f64,
}

/// Rows scored at once: bounds the B × n kernel block to a few tens of MB.
const SCORE_CHUNK: usize = 1024;

/// The fitted pipeline.
#[derive(Clone, Debug)]
pub struct ScoringModel {
    pub info: ModelInfo,
    pub standardizer: crate::space::Standardizer,
    /// Column 0 is the model fitted on all training rows, columns 1..=K the
    /// fold models of CV+ (fold k left out).
    pub predictor: crate::models::Predictor,
    pub cvplus: crate::conformal::CvPlus,
    pub domain: crate::domain::DomainGuard,
}

impl ScoringModel {
    pub fn n_descriptors(&self) -> usize {
        self.info.descriptor_names.len()
    }

    /// The first descriptor of `row` (bundle order) whose standardised value
    /// is not finite: a finite value so far from the training data (e.g.
    /// `f64::MAX`) that `(x - mean) / scale` overflows. Such a row cannot be
    /// scored; callers reject it as they reject NaN.
    pub fn unscorable_column(&self, row: &[f64]) -> Option<usize> {
        let s = &self.standardizer;
        let columns = || row.iter().zip(s.mean.iter().zip(s.scale.iter()));
        let finite = |(v, (m, sd)): (&f64, (&f64, &f64))| ((v - m) / sd).is_finite();
        // Every row is checked and almost every row passes: one pass with
        // no early exit, which vectorises the divisions, and the search
        // for the column only when one fails.
        if columns().fold(true, |all, c| all & finite(c)) {
            None
        } else {
            columns().position(|c| !finite(c))
        }
    }

    /// Scores B candidates given as raw descriptor rows in the bundle's
    /// order. Every value must be finite and every row pass
    /// [`ScoringModel::unscorable_column`]: callers reject bad rows first.
    pub fn score(&self, x_raw: ArrayView2<f64>, confidence: f64) -> Vec<CandidateScore> {
        let mut out = Vec::with_capacity(x_raw.nrows());
        // Chunks bound the memory of the B × n kernel (or distance) block.
        for start in (0..x_raw.nrows()).step_by(SCORE_CHUNK) {
            let end = (start + SCORE_CHUNK).min(x_raw.nrows());
            self.score_chunk(
                x_raw.slice(ndarray::s![start..end, ..]),
                confidence,
                &mut out,
            );
        }
        out
    }

    fn score_chunk(&self, x_raw: ArrayView2<f64>, confidence: f64, out: &mut Vec<CandidateScore>) {
        let x_std = self.standardizer.transform(x_raw);
        let predictions = self.predictor.predict(x_std.view());
        let domain = self.domain.assess(x_std.view(), x_raw);
        // Each interval is an independent rank search of well under a
        // microsecond: not worth sending to the thread pool.
        out.extend(domain.into_iter().enumerate().map(|(i, signals)| {
            let row = predictions.row(i);
            let interval = match row.as_slice() {
                Some(all) => self.cvplus.interval(&all[1..], confidence, signals.verdict),
                None => {
                    let folds = row.slice(ndarray::s![1..]).to_vec();
                    self.cvplus.interval(&folds, confidence, signals.verdict)
                }
            };
            CandidateScore {
                prediction: row[0],
                interval,
                domain: signals,
            }
        }));
    }
}

/// Ranks among the candidates that are ranked: `None` (rejected) and every
/// candidate whose disposition is not `Scored` get 0; the others 1, 2, … by
/// the policy's key and the endpoint's direction, ties in input order.
///
/// A candidate without a key (its conservative side unbounded, or a NaN)
/// ranks after every candidate with one; those come in order of their
/// prediction, then input order.
pub fn ranks(
    scores: &[Option<&CandidateScore>],
    policy: &Policy,
    direction: Direction,
) -> Vec<u32> {
    let mut ranked: Vec<(usize, Option<f64>, f64)> = scores
        .iter()
        .enumerate()
        .filter_map(|(i, s)| {
            let s = (*s)?;
            (policy.disposition(s.domain.verdict) == Disposition::Scored)
                .then(|| (i, rank_key(s, policy.key, direction), s.prediction))
        })
        .collect();
    // "Better first": descending when higher is better. `total_cmp` gives a
    // total order; NaN keys were turned into `None` above.
    let better = |a: f64, b: f64| match direction {
        Direction::Higher => b.total_cmp(&a),
        Direction::Lower => a.total_cmp(&b),
    };
    // Stable: equal keys keep input order.
    ranked.sort_by(|a, b| match (a.1, b.1) {
        (Some(ka), Some(kb)) => better(ka, kb),
        (Some(_), None) => std::cmp::Ordering::Less,
        (None, Some(_)) => std::cmp::Ordering::Greater,
        (None, None) => match (a.2.is_nan(), b.2.is_nan()) {
            (false, false) => better(a.2, b.2),
            (x, y) => x.cmp(&y),
        },
    });
    let mut out = vec![0; scores.len()];
    for (r, (i, _, _)) in ranked.iter().enumerate() {
        out[*i] = r as u32 + 1;
    }
    out
}

/// The value a candidate is ranked by, `None` when there is none.
fn rank_key(s: &CandidateScore, key: RankKey, direction: Direction) -> Option<f64> {
    let k = match key {
        RankKey::Prediction => Some(s.prediction),
        RankKey::ConservativeBound => match direction {
            Direction::Higher => s.interval.lower,
            Direction::Lower => s.interval.upper,
        },
    };
    k.filter(|v| !v.is_nan())
}

#[cfg(test)]
mod rank_tests {
    use super::*;
    use crate::conformal::{Calibration, Interval};
    use crate::domain::{DomainSignals, Verdict};

    fn score(
        prediction: f64,
        lower: Option<f64>,
        upper: Option<f64>,
        verdict: Verdict,
    ) -> CandidateScore {
        CandidateScore {
            prediction,
            interval: Interval {
                lower,
                upper,
                calibration: Calibration::Pooled,
            },
            domain: DomainSignals {
                knn_distance: 0.0,
                typicality: 1.0,
                beyond_z_threshold: false,
                leverage: 0.0,
                pca_residual: 0.0,
                out_of_range: vec![],
                verdict,
                notes: vec![],
            },
        }
    }

    fn policy(key: RankKey, rank_border: bool) -> Policy {
        Policy {
            outside: OutsidePolicy::Flag,
            rank_border,
            key,
        }
    }

    #[test]
    fn prediction_key_follows_the_direction_and_skips_unranked() {
        let s = [
            score(1.0, Some(0.0), Some(2.0), Verdict::Inside),
            score(3.0, Some(2.0), Some(4.0), Verdict::Outside),
            score(2.0, Some(1.0), Some(3.0), Verdict::Border),
            score(5.0, Some(4.0), Some(6.0), Verdict::Inside),
        ];
        let v: Vec<Option<&CandidateScore>> =
            vec![Some(&s[0]), Some(&s[1]), None, Some(&s[2]), Some(&s[3])];
        let p = policy(RankKey::Prediction, true);
        // By hand: higher is better → 5.0 (index 4), 2.0 (index 3), 1.0 (index 0);
        // the outside one and the rejected one are not ranked.
        assert_eq!(ranks(&v, &p, Direction::Higher), vec![3, 0, 0, 2, 1]);
        assert_eq!(ranks(&v, &p, Direction::Lower), vec![1, 0, 0, 2, 3]);
        let no_border = policy(RankKey::Prediction, false);
        assert_eq!(
            ranks(&v, &no_border, Direction::Higher),
            vec![2, 0, 0, 0, 1]
        );
    }

    #[test]
    fn conservative_bound_uses_the_unfavourable_side_and_puts_unbounded_last() {
        let s = [
            score(10.0, Some(1.0), Some(19.0), Verdict::Inside),
            score(5.0, Some(4.0), Some(6.0), Verdict::Inside),
            score(7.0, None, Some(9.0), Verdict::Inside),
            score(8.0, None, None, Verdict::Inside),
        ];
        let v: Vec<Option<&CandidateScore>> = s.iter().map(Some).collect();
        let p = policy(RankKey::ConservativeBound, true);
        // Higher is better: lower bounds 1, 4, none, none → index 1, then 0,
        // then the unbounded ones by prediction (8 before 7).
        assert_eq!(ranks(&v, &p, Direction::Higher), vec![2, 1, 4, 3]);
        // Lower is better: upper bounds 19, 6, 9, none → 1, 2, 0, then 3.
        assert_eq!(ranks(&v, &p, Direction::Lower), vec![3, 1, 2, 4]);
    }

    #[test]
    fn ties_keep_input_order() {
        let s = [
            score(2.0, None, None, Verdict::Inside),
            score(3.0, None, None, Verdict::Inside),
            score(2.0, None, None, Verdict::Inside),
            score(3.0, None, None, Verdict::Inside),
        ];
        let v: Vec<Option<&CandidateScore>> = s.iter().map(Some).collect();
        let p = policy(RankKey::Prediction, true);
        assert_eq!(ranks(&v, &p, Direction::Higher), vec![3, 1, 4, 2]);
        assert_eq!(ranks(&v, &p, Direction::Lower), vec![1, 3, 2, 4]);
    }

    /// Brute-force twin: a ranked candidate's rank is 1 + the number of
    /// ranked candidates strictly better, + the number of equal ones before it.
    #[test]
    fn ranks_agree_with_counting_better_candidates() {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(7);
        for _ in 0..200 {
            let n = rng.gen_range(0..30);
            let s: Vec<CandidateScore> = (0..n)
                .map(|_| {
                    let pred = rng.gen_range(0..8) as f64;
                    let verdict = Verdict::ALL[rng.gen_range(0..3)];
                    score(pred, Some(pred - 1.0), Some(pred + 1.0), verdict)
                })
                .collect();
            let v: Vec<Option<&CandidateScore>> = s
                .iter()
                .map(|c| if rng.gen_bool(0.1) { None } else { Some(c) })
                .collect();
            let p = policy(RankKey::Prediction, rng.gen_bool(0.5));
            for direction in [Direction::Higher, Direction::Lower] {
                let got = ranks(&v, &p, direction);
                let is_ranked = |c: &Option<&CandidateScore>| {
                    c.is_some_and(|c| p.disposition(c.domain.verdict) == Disposition::Scored)
                };
                for i in 0..n {
                    if !is_ranked(&v[i]) {
                        assert_eq!(got[i], 0);
                        continue;
                    }
                    let pi = s[i].prediction;
                    let beats = |pj: f64| match direction {
                        Direction::Higher => pj > pi,
                        Direction::Lower => pj < pi,
                    };
                    let expected = 1
                        + (0..n)
                            .filter(|&j| is_ranked(&v[j]))
                            .filter(|&j| beats(s[j].prediction) || (s[j].prediction == pi && j < i))
                            .count() as u32;
                    assert_eq!(got[i], expected);
                }
            }
        }
    }
}
