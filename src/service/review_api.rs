//! The `plumbline.v1.Review` gRPC service: the analysts' queue of FLAGGED
//! and REFUSED candidates, read from the audit store, with each case's
//! nearest training rows from the loaded bundle, append-only decisions, and
//! k-means groups of the open cases in a model's PCA space.
//!
//! Database work runs on the blocking pool over one connection of its own
//! (WAL lets it read while the audit writer commits; its few writes wait on
//! SQLite's busy timeout rather than on the writer's queue).

use std::pin::Pin;
use std::sync::{Arc, Mutex};

use linfa::DatasetBase;
use linfa::prelude::{Fit, Predict};
use linfa_clustering::KMeans;
use ndarray::{Array2, ArrayView1};
use rand::SeedableRng;
use rand_xoshiro::Xoshiro256PlusPlus;
use rusqlite::Connection;
use tokio_stream::Stream;
use tonic::{Code, Request, Response, Status};

use super::convert::status_to_pb;
use super::registry::{self, LoadedModel, Registry};
use crate::audit::cases::{self, Case, CaseError, CaseFilter, Decision, Settlement};
use crate::audit::{self, CandidateStatus, SignalsRecord, Synchronous};
use crate::pb;
use crate::pb::review_server::Review;
use crate::scoring::ScoringModel;

const DEFAULT_PAGE: usize = 100;
const MAX_PAGE: usize = 1000;
/// Rows per page read while grouping or exporting.
const SCAN_PAGE: usize = 1000;
/// Open cases grouped at most: k-means over more is a batch job, not a call.
const MAX_GROUPED: usize = 100_000;
const PAGE_TOKEN_PREFIX: &str = "c1:";

/// Errors of the review service.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error(transparent)]
    Case(#[from] CaseError),
    #[error(transparent)]
    Model(#[from] registry::Error),
    #[error("{field}: {detail}")]
    BadArgument { field: &'static str, detail: String },
    #[error(
        "model '{model}' is loaded without its fitted pipeline; cases cannot be placed in its \
         PCA space"
    )]
    NoPipeline { model: String },
    #[error("grouping the open cases of '{model}' failed: {message}")]
    Grouping { model: String, message: String },
    #[error("the review task stopped: {reason}")]
    Task { reason: String },
}

fn to_status(e: &Error) -> Status {
    let code = match e {
        Error::Case(CaseError::NotFound { .. }) => Code::NotFound,
        Error::Case(CaseError::NotACase { .. } | CaseError::Missing { .. }) => {
            Code::InvalidArgument
        }
        Error::Case(_) => Code::Internal,
        Error::Model(registry::Error::UnknownModel { .. } | registry::Error::NoDefault { .. }) => {
            Code::NotFound
        }
        Error::Model(_) => Code::Internal,
        Error::BadArgument { .. } => Code::InvalidArgument,
        Error::NoPipeline { .. } => Code::FailedPrecondition,
        Error::Grouping { .. } | Error::Task { .. } => Code::Internal,
    };
    Status::new(code, e.to_string())
}

pub struct ReviewApi {
    registry: Arc<Registry>,
    conn: Arc<Mutex<Connection>>,
}

impl ReviewApi {
    /// Opens its own connection to the audit store (migrating it if the
    /// writer has not yet).
    pub fn open(
        registry: Arc<Registry>,
        path: &std::path::Path,
        synchronous: Synchronous,
    ) -> Result<ReviewApi, audit::Error> {
        let conn = audit::sqlite::open_for_writing(path, synchronous)?;
        Ok(ReviewApi {
            registry,
            conn: Arc::new(Mutex::new(conn)),
        })
    }

    async fn with_db<T: Send + 'static>(
        &self,
        work: impl FnOnce(&mut Connection) -> Result<T, Error> + Send + 'static,
    ) -> Result<T, Error> {
        let conn = self.conn.clone();
        tokio::task::spawn_blocking(move || {
            // A panic while holding the lock leaves SQLite consistent (an
            // open transaction rolls back on drop), so the guard is reused.
            let mut guard = conn.lock().unwrap_or_else(|p| p.into_inner());
            work(&mut guard)
        })
        .await
        .map_err(|e| Error::Task {
            reason: e.to_string(),
        })?
    }
}

/// Page tokens are opaque to clients; inside, the last record id listed.
fn encode_token(record_id: &str) -> String {
    let mut s = String::from(PAGE_TOKEN_PREFIX);
    for b in record_id.bytes() {
        s.push_str(&format!("{b:02x}"));
    }
    s
}

fn decode_token(token: &str) -> Result<Option<String>, Error> {
    if token.is_empty() {
        return Ok(None);
    }
    let bad = || Error::BadArgument {
        field: "page_token",
        detail: format!(
            "'{token}' is not a token this service gave; pass next_page_token unchanged, or \
             leave it empty for the first page"
        ),
    };
    let hex = token.strip_prefix(PAGE_TOKEN_PREFIX).ok_or_else(bad)?;
    if hex.len() % 2 != 0 {
        return Err(bad());
    }
    let bytes = (0..hex.len())
        .step_by(2)
        .map(|i| u8::from_str_radix(&hex[i..i + 2], 16))
        .collect::<Result<Vec<u8>, _>>()
        .map_err(|_| bad())?;
    let id = String::from_utf8(bytes).map_err(|_| bad())?;
    match crate::audit::ids::parse_record_id(&id) {
        Some(_) => Ok(Some(id)),
        None => Err(bad()),
    }
}

fn decision_from_pb(value: i32, field: &'static str) -> Result<Option<Decision>, Error> {
    match pb::Decision::try_from(value) {
        Ok(pb::Decision::Unspecified) => Ok(None),
        Ok(pb::Decision::AcceptForTesting) => Ok(Some(Decision::AcceptForTesting)),
        Ok(pb::Decision::Dismiss) => Ok(Some(Decision::Dismiss)),
        Ok(pb::Decision::NeedsNewData) => Ok(Some(Decision::NeedsNewData)),
        Err(_) => Err(Error::BadArgument {
            field,
            detail: format!(
                "{value} is not a decision; use ACCEPT_FOR_TESTING, DISMISS or NEEDS_NEW_DATA"
            ),
        }),
    }
}

fn decision_to_pb(d: Decision) -> pb::Decision {
    match d {
        Decision::AcceptForTesting => pb::Decision::AcceptForTesting,
        Decision::Dismiss => pb::Decision::Dismiss,
        Decision::NeedsNewData => pb::Decision::NeedsNewData,
    }
}

fn verdict_to_pb(v: &str) -> pb::Verdict {
    match v {
        "inside" => pb::Verdict::Inside,
        "border" => pb::Verdict::Border,
        "outside" => pb::Verdict::Outside,
        _ => pb::Verdict::Unspecified,
    }
}

/// The audit filter a request's filter means.
pub fn filter_from_pb(f: Option<&pb::CaseFilter>) -> Result<CaseFilter, Error> {
    let Some(f) = f else {
        return Ok(CaseFilter::default());
    };
    let nonempty = |s: &str| (!s.is_empty()).then(|| s.to_string());
    let verdict = match pb::Verdict::try_from(f.verdict) {
        Ok(pb::Verdict::Unspecified) => None,
        Ok(pb::Verdict::Inside) => Some("inside".to_string()),
        Ok(pb::Verdict::Border) => Some("border".to_string()),
        Ok(pb::Verdict::Outside) => Some("outside".to_string()),
        Err(_) => {
            return Err(Error::BadArgument {
                field: "filter.verdict",
                detail: format!(
                    "{} is not a verdict; use INSIDE, BORDER or OUTSIDE",
                    f.verdict
                ),
            });
        }
    };
    let candidate_status = match pb::Status::try_from(f.candidate_status) {
        Ok(pb::Status::Unspecified) => None,
        Ok(pb::Status::Flagged) => Some(CandidateStatus::Flagged),
        Ok(pb::Status::Refused) => Some(CandidateStatus::Refused),
        _ => {
            return Err(Error::BadArgument {
                field: "filter.candidate_status",
                detail: format!(
                    "{} is not a case status; cases are FLAGGED or REFUSED candidates",
                    f.candidate_status
                ),
            });
        }
    };
    let open = match pb::CaseState::try_from(f.state) {
        Ok(pb::CaseState::Unspecified) => None,
        Ok(pb::CaseState::CaseOpen) => Some(true),
        Ok(pb::CaseState::CaseSettled) => Some(false),
        Err(_) => {
            return Err(Error::BadArgument {
                field: "filter.state",
                detail: format!("{} is not a state; use CASE_OPEN or CASE_SETTLED", f.state),
            });
        }
    };
    Ok(CaseFilter {
        model: nonempty(&f.model),
        verdict,
        candidate_status,
        open,
        decision: decision_from_pb(f.decision, "filter.decision")?,
        from_us: (f.from_time_us != 0).then_some(f.from_time_us),
        to_us: (f.to_time_us != 0).then_some(f.to_time_us),
        batch_label: nonempty(&f.batch_label),
    })
}

pub fn summary(case: &Case, with_descriptors: bool) -> pb::CaseSummary {
    let c = &case.candidate;
    let s = c.signals.as_ref();
    let latest = case.latest.as_ref();
    pb::CaseSummary {
        record_id: c.record_id.clone(),
        candidate_id: c.candidate_id.clone(),
        model: case.model_id.clone(),
        model_version: case.model_version.clone(),
        batch_label: case.batch_label.clone(),
        time_us: case.time_us,
        status: status_to_pb(c.status) as i32,
        verdict: s.map_or(pb::Verdict::Unspecified, |s| verdict_to_pb(&s.verdict)) as i32,
        prediction: c.prediction,
        lower: c.lower,
        upper: c.upper,
        state: if latest.is_some() {
            pb::CaseState::CaseSettled
        } else {
            pb::CaseState::CaseOpen
        } as i32,
        decision: latest.map_or(pb::Decision::Unspecified, |l| decision_to_pb(l.decision)) as i32,
        analyst: latest.map(|l| l.analyst.clone()).unwrap_or_default(),
        note: latest.map(|l| l.note.clone()).unwrap_or_default(),
        revisions: case.revisions,
        reason: c.reason.clone(),
        knn_distance: s.map_or(f64::NAN, |s| s.knn_distance),
        typicality: s.map_or(f64::NAN, |s| s.typicality),
        descriptors: if with_descriptors {
            c.descriptors.clone().unwrap_or_default()
        } else {
            Vec::new()
        },
    }
}

fn settlement_to_pb(s: &Settlement) -> pb::Settlement {
    pb::Settlement {
        sequence: s.sequence.max(0) as u64,
        time_us: s.time_us,
        analyst: s.analyst.clone(),
        decision: decision_to_pb(s.decision) as i32,
        note: s.note.clone(),
        caller_identity: s.caller.identity.clone().unwrap_or_default(),
        caller_peer: s.caller.peer.clone().unwrap_or_default(),
    }
}

fn domain_report(s: &SignalsRecord, model: Option<&LoadedModel>) -> pb::DomainReport {
    let t = model
        .map(|m| m.facts.thresholds.clone())
        .unwrap_or_default();
    pb::DomainReport {
        verdict: verdict_to_pb(&s.verdict) as i32,
        knn_distance: s.knn_distance,
        typicality: s.typicality,
        beyond_z_threshold: s.beyond_z_threshold,
        leverage: s.leverage,
        leverage_warning: t.leverage_warning,
        pca_residual: s.pca_residual,
        pca_residual_limit: t.pca_residual_limit,
        pca_residual_border_limit: t.pca_residual_border_limit,
        out_of_range: s
            .out_of_range
            .iter()
            .map(|r| pb::OutOfRange {
                descriptor: r.descriptor.clone(),
                value: r.value,
                min: r.min,
                max: r.max,
            })
            .collect(),
        notes: s.notes.clone(),
    }
}

fn pipeline(model: &LoadedModel) -> Result<&ScoringModel, Error> {
    model
        .scorer
        .scoring_model()
        .ok_or_else(|| Error::NoPipeline {
            model: model.id().to_string(),
        })
}

/// PCA scores of raw rows in the bundle's descriptor order.
fn pca_scores(sm: &ScoringModel, x_raw: &Array2<f64>) -> Array2<f64> {
    let x_std = sm.standardizer.transform(x_raw.view());
    sm.domain.pca().scores(x_std.view())
}

/// The nearest training rows of one case, in the model's PCA space.
pub fn neighbours(model: &LoadedModel, descriptors: &[f64], k: usize) -> Vec<pb::Neighbour> {
    let Ok(sm) = pipeline(model) else {
        return Vec::new();
    };
    let Ok(x) = Array2::from_shape_vec((1, descriptors.len()), descriptors.to_vec()) else {
        return Vec::new();
    };
    let x_std = sm.standardizer.transform(x.view());
    let k = if k == 0 { sm.domain.settings().k } else { k };
    sm.domain
        .neighbours(x_std.row(0), k)
        .into_iter()
        .map(|(row, distance)| pb::Neighbour {
            training_id: model
                .facts
                .training_ids
                .get(row)
                .cloned()
                .unwrap_or_else(|| format!("#{row}")),
            training_row: row as u32,
            distance,
            observed: model.facts.training_y.get(row).copied().unwrap_or(f64::NAN),
        })
        .collect()
}

/// Mean Euclidean distance from `point` to its `k` nearest rows of
/// `training` (brute force: one call per group, n rows each).
fn mean_knn_distance(training: &Array2<f64>, point: ArrayView1<f64>, k: usize) -> f64 {
    let mut d: Vec<f64> = training
        .rows()
        .into_iter()
        .map(|r| {
            r.iter()
                .zip(point.iter())
                .map(|(a, b)| (a - b) * (a - b))
                .sum::<f64>()
                .sqrt()
        })
        .collect();
    d.sort_by(f64::total_cmp);
    let k = k.clamp(1, d.len().max(1));
    d.iter().take(k).sum::<f64>() / k as f64
}

/// k-means (linfa-clustering, seeded) over the PCA scores of `cases`,
/// which must all carry descriptors of the model's length.
pub fn group(
    model: &LoadedModel,
    cases: &[Case],
    groups: usize,
    seed: u64,
) -> Result<Vec<pb::CaseGroup>, Error> {
    let sm = pipeline(model)?;
    if cases.is_empty() {
        return Ok(Vec::new());
    }
    let d = sm.n_descriptors();
    let flat: Vec<f64> = cases
        .iter()
        .flat_map(|c| c.candidate.descriptors.clone().unwrap_or_default())
        .collect();
    let x = Array2::from_shape_vec((cases.len(), d), flat).map_err(|e| Error::Grouping {
        model: model.id().to_string(),
        message: e.to_string(),
    })?;
    let scores = pca_scores(sm, &x);
    let k = groups.clamp(1, cases.len());
    let fitted = KMeans::params_with_rng(k, Xoshiro256PlusPlus::seed_from_u64(seed))
        .n_runs(10)
        .max_n_iterations(300)
        .tolerance(1e-10)
        .fit(&DatasetBase::from(scores.clone()))
        .map_err(|e| Error::Grouping {
            model: model.id().to_string(),
            message: e.to_string(),
        })?;
    let labels = fitted.predict(&scores);
    let centroids = fitted.centroids();
    let training = &sm.domain.state().training_scores;
    let knn_k = sm.domain.settings().k;
    let mut out: Vec<pb::CaseGroup> = (0..k)
        .map(|g| pb::CaseGroup {
            group: 0,
            size: 0,
            centre: centroids.row(g).to_vec(),
            centre_distance: mean_knn_distance(training, centroids.row(g), knn_k),
            record_ids: Vec::new(),
        })
        .collect();
    for (case, &label) in cases.iter().zip(labels.iter()) {
        if let Some(g) = out.get_mut(label) {
            g.size += 1;
            g.record_ids.push(case.candidate.record_id.clone());
        }
    }
    out.retain(|g| g.size > 0);
    // Largest first, then by first member, so numbering does not depend on
    // k-means' internal label order.
    out.sort_by(|a, b| {
        b.size
            .cmp(&a.size)
            .then_with(|| a.record_ids.first().cmp(&b.record_ids.first()))
    });
    for (i, g) in out.iter_mut().enumerate() {
        g.group = i as u32 + 1;
    }
    Ok(out)
}

type ExportStream = Pin<Box<dyn Stream<Item = Result<pb::CaseSummary, Status>> + Send>>;

#[tonic::async_trait]
impl Review for ReviewApi {
    async fn list_cases(
        &self,
        request: Request<pb::ListCasesRequest>,
    ) -> Result<Response<pb::ListCasesResponse>, Status> {
        let req = request.into_inner();
        let run = async {
            let filter = filter_from_pb(req.filter.as_ref())?;
            let after = decode_token(&req.page_token)?;
            let size = match req.page_size as usize {
                0 => DEFAULT_PAGE,
                n => n.min(MAX_PAGE),
            };
            // One more than asked tells whether another page exists.
            let mut found = self
                .with_db(move |c| Ok(cases::list(c, &filter, after.as_deref(), size + 1)?))
                .await?;
            let more = found.len() > size;
            found.truncate(size);
            let next_page_token = match (more, found.last()) {
                (true, Some(last)) => encode_token(&last.candidate.record_id),
                _ => String::new(),
            };
            Ok::<_, Error>(pb::ListCasesResponse {
                cases: found.iter().map(|c| summary(c, false)).collect(),
                next_page_token,
            })
        };
        run.await.map(Response::new).map_err(|e| to_status(&e))
    }

    async fn get_case(
        &self,
        request: Request<pb::GetCaseRequest>,
    ) -> Result<Response<pb::CaseDetail>, Status> {
        let req = request.into_inner();
        let run = async {
            let id = req.record_id.clone();
            let (case, history) = self
                .with_db(move |c| Ok((cases::get(c, &id)?, cases::history(c, &id)?)))
                .await?;
            let models = self.registry.snapshot();
            let model = models.get(&case.model_id).ok();
            let descriptors = case.candidate.descriptors.clone().unwrap_or_default();
            let neighbours = model
                .as_deref()
                .map(|m| neighbours(m, &descriptors, req.neighbours as usize))
                .unwrap_or_default();
            let loaded_version = model
                .as_deref()
                .map(|m| m.info().version.clone())
                .unwrap_or_default();
            Ok::<_, Error>(pb::CaseDetail {
                summary: Some(summary(&case, false)),
                descriptor_names: model
                    .as_deref()
                    .map(|m| m.info().descriptor_names.clone())
                    .unwrap_or_default(),
                descriptors,
                domain: case
                    .candidate
                    .signals
                    .as_ref()
                    .map(|s| domain_report(s, model.as_deref())),
                neighbours,
                history: history.iter().map(settlement_to_pb).collect(),
                confidence: case.candidate.confidence,
                calibration: case.candidate.calibration.clone().unwrap_or_default(),
                neighbours_model_version: if loaded_version != case.model_version {
                    loaded_version
                } else {
                    String::new()
                },
            })
        };
        run.await.map(Response::new).map_err(|e| to_status(&e))
    }

    async fn settle_case(
        &self,
        request: Request<pb::SettleCaseRequest>,
    ) -> Result<Response<pb::SettleCaseResponse>, Status> {
        let caller = super::access::caller_of(&request);
        let mut req = request.into_inner();
        // An authenticated analyst need not type a name: the token or
        // certificate says who they are.
        if req.analyst.trim().is_empty()
            && let Some(id) = &caller.identity
        {
            req.analyst = id.clone();
        }
        let run = async {
            let decision =
                decision_from_pb(req.decision, "decision")?.ok_or(Error::BadArgument {
                    field: "decision",
                    detail: "a decision is required: ACCEPT_FOR_TESTING, DISMISS or \
                             NEEDS_NEW_DATA"
                        .into(),
                })?;
            let now = std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .map(|d| d.as_micros() as i64)
                .unwrap_or(0);
            let (case, history) = self
                .with_db(move |c| {
                    cases::settle(
                        c,
                        &req.record_id,
                        &req.analyst,
                        decision,
                        &req.note,
                        now,
                        &caller,
                    )?;
                    Ok((
                        cases::get(c, &req.record_id)?,
                        cases::history(c, &req.record_id)?,
                    ))
                })
                .await?;
            tracing::info!(record_id = %case.candidate.record_id,
                decision = decision.name(), revisions = case.revisions, "case settled");
            Ok::<_, Error>(pb::SettleCaseResponse {
                summary: Some(summary(&case, false)),
                history: history.iter().map(settlement_to_pb).collect(),
            })
        };
        run.await.map(Response::new).map_err(|e| to_status(&e))
    }

    async fn group_cases(
        &self,
        request: Request<pb::GroupCasesRequest>,
    ) -> Result<Response<pb::GroupCasesResponse>, Status> {
        let req = request.into_inner();
        let run = async {
            let model = self.registry.snapshot().get(&req.model)?;
            let mut filter = filter_from_pb(req.filter.as_ref())?;
            filter.model = Some(model.id().to_string());
            filter.open = Some(true);
            let d = model.info().descriptor_names.len();
            let all = self
                .with_db(move |c| {
                    let mut all = Vec::new();
                    let mut after: Option<String> = None;
                    while all.len() < MAX_GROUPED {
                        let page = cases::list(c, &filter, after.as_deref(), SCAN_PAGE)?;
                        let Some(last) = page.last() else { break };
                        after = Some(last.candidate.record_id.clone());
                        all.extend(page);
                    }
                    all.truncate(MAX_GROUPED);
                    Ok(all)
                })
                .await?;
            let (usable, skipped): (Vec<Case>, Vec<Case>) = all.into_iter().partition(|c| {
                c.candidate
                    .descriptors
                    .as_ref()
                    .is_some_and(|v| v.len() == d)
            });
            let groups = match req.groups {
                0 => 2,
                n => n as usize,
            };
            let model_for_group = model.clone();
            let seed = req.seed;
            let grouped =
                tokio::task::spawn_blocking(move || group(&model_for_group, &usable, groups, seed))
                    .await
                    .map_err(|e| Error::Task {
                        reason: e.to_string(),
                    })??;
            Ok::<_, Error>(pb::GroupCasesResponse {
                model: model.id().to_string(),
                model_version: model.info().version.clone(),
                groups: grouped,
                skipped: skipped.len() as u32,
            })
        };
        run.await.map(Response::new).map_err(|e| to_status(&e))
    }

    type ExportCasesStream = ExportStream;

    async fn export_cases(
        &self,
        request: Request<pb::ExportCasesRequest>,
    ) -> Result<Response<Self::ExportCasesStream>, Status> {
        let req = request.into_inner();
        let filter = filter_from_pb(req.filter.as_ref()).map_err(|e| to_status(&e))?;
        let (tx, rx) = tokio::sync::mpsc::channel(SCAN_PAGE);
        let conn = self.conn.clone();
        // Page by page, so a large export neither holds the connection for
        // its whole length nor sits in memory.
        tokio::task::spawn_blocking(move || {
            let mut after: Option<String> = None;
            loop {
                let page = {
                    let guard = conn.lock().unwrap_or_else(|p| p.into_inner());
                    cases::list(&guard, &filter, after.as_deref(), SCAN_PAGE)
                };
                let page = match page {
                    Ok(p) => p,
                    Err(e) => {
                        let _ = tx.blocking_send(Err(to_status(&Error::Case(e))));
                        return;
                    }
                };
                let Some(last) = page.last() else { return };
                after = Some(last.candidate.record_id.clone());
                for case in &page {
                    if tx.blocking_send(Ok(summary(case, true))).is_err() {
                        return;
                    }
                }
            }
        });
        Ok(Response::new(Box::pin(
            tokio_stream::wrappers::ReceiverStream::new(rx),
        )))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn page_tokens_round_trip_and_foreign_tokens_are_refused() {
        let id = "000000000000001a-000003";
        assert_eq!(
            decode_token(&encode_token(id)).unwrap().as_deref(),
            Some(id)
        );
        assert_eq!(decode_token("").unwrap(), None);
        let not_a_record = encode_token("r1-2");
        for bad in ["xyz", "c1:zz", "c1:abc", "c1:ff", not_a_record.as_str()] {
            assert!(
                matches!(
                    decode_token(bad),
                    Err(Error::BadArgument {
                        field: "page_token",
                        ..
                    })
                ),
                "{bad}"
            );
        }
    }

    #[test]
    fn centre_distance_is_the_mean_of_the_k_nearest() {
        // Training points on a line at 0, 1, 2, 10; from 0.5 the two
        // nearest are at distance 0.5 each, the third at 1.5.
        let t = Array2::from_shape_vec((4, 1), vec![0.0, 1.0, 2.0, 10.0]).unwrap();
        let p = ndarray::arr1(&[0.5]);
        assert!((mean_knn_distance(&t, p.view(), 2) - 0.5).abs() < 1e-15);
        assert!((mean_knn_distance(&t, p.view(), 3) - 2.5 / 3.0).abs() < 1e-15);
    }
}
