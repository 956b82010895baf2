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

    /// Scores B candidates given as raw descriptor rows in the bundle's
    /// order. Every value must be finite: callers reject bad rows first.
    pub fn score(&self, x_raw: ArrayView2<f64>, confidence: f64) -> Vec<CandidateScore> {
        let mut out = Vec::with_capacity(x_raw.nrows());
        // Chunks bound the memory of the B × n kernel (or distance) block.
        for start in (0..x_raw.nrows()).step_by(SCORE_CHUNK) {
            let end = (start + SCORE_CHUNK).min(x_raw.nrows());
            self.score_chunk(x_raw.slice(ndarray::s![start..end, ..]), confidence, &mut out);
        }
        out
    }

    fn score_chunk(&self, x_raw: ArrayView2<f64>, confidence: f64, out: &mut Vec<CandidateScore>) {
        let x_std = self.standardizer.transform(x_raw);
        let predictions = self.predictor.predict(x_std.view());
        let domain = self.domain.assess(x_std.view(), x_raw);
        for (row, signals) in predictions.rows().into_iter().zip(domain) {
            let folds = row.slice(ndarray::s![1..]).to_vec();
            let interval = self.cvplus.interval(&folds, confidence, signals.verdict);
            out.push(CandidateScore { prediction: row[0], interval, domain: signals });
        }
    }
}

/// Ranks among the candidates that are ranked: `None` (rejected) and every
/// candidate whose disposition is not `Scored` get 0; the others 1, 2, … by
/// the policy's key and the endpoint's direction, ties in input order.
pub fn ranks(
    _scores: &[Option<&CandidateScore>],
    _policy: &Policy,
    _direction: Direction,
) -> Vec<u32> {
    todo!()
}
