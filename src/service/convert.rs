//! Conversions between the core's types and the wire (`crate::pb`) and
//! audit records. The answer and its audit record are built from the same
//! [`Outcome`], so what is stored is what was said.

use crate::audit::{CandidateRecord, CandidateStatus, OutOfRangeRecord, SignalsRecord};
use crate::conformal::Calibration;
use crate::domain::{DomainSignals, Verdict};
use crate::models::Hyper;
use crate::pb;
use crate::scoring::{Direction, ModelInfo};

use super::batch::Outcome;
use super::registry::{CardFacts, LoadedModel};

pub fn status_to_pb(s: CandidateStatus) -> pb::Status {
    match s {
        CandidateStatus::Scored => pb::Status::Scored,
        CandidateStatus::Flagged => pb::Status::Flagged,
        CandidateStatus::Refused => pb::Status::Refused,
        CandidateStatus::Rejected => pb::Status::Rejected,
    }
}

pub fn verdict_to_pb(v: Verdict) -> pb::Verdict {
    match v {
        Verdict::Inside => pb::Verdict::Inside,
        Verdict::Border => pb::Verdict::Border,
        Verdict::Outside => pb::Verdict::Outside,
    }
}

pub fn calibration_name(c: Calibration) -> String {
    match c {
        Calibration::Band(v) => v.name().to_string(),
        Calibration::Pooled => "pooled".to_string(),
    }
}

/// The numbers the answer gives for a candidate: REFUSED and REJECTED
/// candidates get none.
struct Given {
    prediction: Option<f64>,
    lower: Option<f64>,
    upper: Option<f64>,
    calibration: Option<String>,
}

fn given(o: &Outcome) -> Given {
    match (&o.score, o.status) {
        (Some(s), CandidateStatus::Scored | CandidateStatus::Flagged) => Given {
            prediction: Some(s.prediction),
            lower: s.interval.lower,
            upper: s.interval.upper,
            calibration: Some(calibration_name(s.interval.calibration)),
        },
        _ => Given {
            prediction: None,
            lower: None,
            upper: None,
            calibration: None,
        },
    }
}

fn out_of_range_names(d: &DomainSignals, info: &ModelInfo) -> Vec<(String, f64, f64, f64)> {
    d.out_of_range
        .iter()
        .map(|r| {
            let name = info
                .descriptor_names
                .get(r.descriptor)
                .cloned()
                .unwrap_or_else(|| format!("#{}", r.descriptor));
            (name, r.value, r.min, r.max)
        })
        .collect()
}

pub fn domain_report(d: &DomainSignals, model: &LoadedModel) -> pb::DomainReport {
    let t = &model.facts.thresholds;
    pb::DomainReport {
        verdict: verdict_to_pb(d.verdict) as i32,
        knn_distance: d.knn_distance,
        typicality: d.typicality,
        beyond_z_threshold: d.beyond_z_threshold,
        leverage: d.leverage,
        leverage_warning: t.leverage_warning,
        pca_residual: d.pca_residual,
        pca_residual_limit: t.pca_residual_limit,
        pca_residual_border_limit: t.pca_residual_border_limit,
        out_of_range: out_of_range_names(d, model.info())
            .into_iter()
            .map(|(descriptor, value, min, max)| pb::OutOfRange {
                descriptor,
                value,
                min,
                max,
            })
            .collect(),
        notes: d.notes.clone(),
    }
}

pub fn scored_candidate(
    o: &Outcome,
    record_id: String,
    model: &LoadedModel,
) -> pb::ScoredCandidate {
    let g = given(o);
    let has_interval = g.calibration.is_some();
    pb::ScoredCandidate {
        id: o.id.clone(),
        record_id,
        status: status_to_pb(o.status) as i32,
        prediction: g.prediction,
        lower: g.lower,
        upper: g.upper,
        domain: o.score.as_ref().map(|s| domain_report(&s.domain, model)),
        rank: o.rank,
        reason: o.reason.clone(),
        lower_unbounded: has_interval && g.lower.is_none(),
        upper_unbounded: has_interval && g.upper.is_none(),
        calibration: g.calibration.unwrap_or_default(),
    }
}

/// The audit record of an outcome. Moves the outcome's strings and values
/// into the record instead of copying them: call it after
/// [`scored_candidate`], last of all uses of `o`.
pub fn candidate_record(
    o: &mut Outcome,
    record_id: String,
    request_id: &str,
    position: u32,
    confidence: f64,
    model: &LoadedModel,
) -> CandidateRecord {
    let g = given(o);
    CandidateRecord {
        record_id,
        request_id: request_id.to_string(),
        position,
        candidate_id: std::mem::take(&mut o.id),
        status: o.status,
        prediction: g.prediction,
        lower: g.lower,
        upper: g.upper,
        confidence,
        calibration: g.calibration,
        signals: o.score.as_mut().map(|s| SignalsRecord {
            verdict: s.domain.verdict.name().to_string(),
            knn_distance: s.domain.knn_distance,
            typicality: s.domain.typicality,
            beyond_z_threshold: s.domain.beyond_z_threshold,
            leverage: s.domain.leverage,
            pca_residual: s.domain.pca_residual,
            out_of_range: out_of_range_names(&s.domain, model.info())
                .into_iter()
                .map(|(descriptor, value, min, max)| OutOfRangeRecord {
                    descriptor,
                    value,
                    min,
                    max,
                })
                .collect(),
            notes: std::mem::take(&mut s.domain.notes),
        }),
        rank: o.rank,
        reason: std::mem::take(&mut o.reason),
        descriptor_sha256: std::mem::take(&mut o.descriptor_sha256),
        descriptors: o.descriptors.take(),
    }
}

pub fn direction_name(d: Direction) -> &'static str {
    match d {
        Direction::Higher => "higher",
        Direction::Lower => "lower",
    }
}

/// Hyperparameters by name, as the card lists them.
pub fn hyperparameters(h: &Hyper) -> Vec<(&'static str, f64)> {
    match *h {
        Hyper::Ridge { alpha } => vec![("alpha", alpha)],
        Hyper::KernelRidge { gamma, alpha } => vec![("gamma", gamma), ("alpha", alpha)],
        Hyper::Knn { k } => vec![("k", k as f64)],
    }
}

/// The model card: what a model expects and what its fit claims. Takes the
/// two halves a bundle provides: the scoring info and the manifest facts.
/// The bundle's cross-validated claims as the wire carries them.
pub fn claims_to_pb(facts: &CardFacts) -> Vec<pb::Claim> {
    facts
        .claims
        .iter()
        .map(|c| pb::Claim {
            metric: c.metric.clone(),
            mean: c.mean,
            se: c.se,
        })
        .collect()
}

pub fn model_card(info: &ModelInfo, facts: &CardFacts, is_default: bool) -> pb::ModelCard {
    let t = &facts.thresholds;
    pb::ModelCard {
        model: info.id.clone(),
        model_version: info.version.clone(),
        descriptor_names: info.descriptor_names.clone(),
        endpoint: info.endpoint.clone(),
        unit: info.unit.clone(),
        direction: direction_name(info.direction).to_string(),
        family: info.hyper.family().name().to_string(),
        hyperparameters: hyperparameters(&info.hyper)
            .into_iter()
            .map(|(k, v)| (k.to_string(), v))
            .collect(),
        claims: claims_to_pb(facts),
        domain: Some(pb::DomainThresholds {
            k: t.k,
            components: t.components,
            z_threshold: t.z_threshold,
            leverage_warning: t.leverage_warning,
            pca_residual_limit: t.pca_residual_limit,
            typicality_border: t.typicality_border,
            typicality_outside: t.typicality_outside,
            pca_residual_border_limit: t.pca_residual_border_limit,
            explained_variance: t.explained_variance,
            leverage_meaningful: t.leverage_meaningful,
            z: t.z,
        }),
        training_rows: facts.training_rows,
        training_data_sha256: facts.training_data_sha256.clone(),
        created_at: facts.created_at.clone(),
        default_confidence: info.default_confidence,
        is_default,
        cautions: facts.cautions.clone(),
    }
}
