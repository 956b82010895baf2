//! The `plumbline.v1.Outcomes` gRPC service: lab results recorded against
//! the audit store's candidate records, and the realised calibration of a
//! model with its alarms ([`crate::monitor`]).
//!
//! The store is reached through one connection of its own behind a mutex,
//! used from blocking tasks: outcome calls are rare next to scoring, and
//! the scoring writer's group commits must not wait on them.

use std::sync::{Arc, Mutex};

use rusqlite::Connection;
use tonic::{Code, Request, Response, Status};

use super::metrics::Metrics;
use super::registry::Registry;
use crate::audit::Caller;
use crate::audit::outcomes::{self, OutcomeInput, RowResult, Target};
use crate::monitor::{self, Interval};
use crate::pb;
use crate::pb::outcomes_server::Outcomes;

/// Defaults of a Calibration request's zero fields.
pub const DEFAULT_LEVEL: f64 = 0.95;
pub const DEFAULT_ALPHA: f64 = 0.01;
pub const DEFAULT_OUTSIDE_WINDOW: u64 = 500;

/// Errors of the outcomes service.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error(transparent)]
    Model(#[from] super::registry::Error),
    #[error(transparent)]
    Audit(#[from] crate::audit::Error),
    #[error("`{field}` is {value}; it must lie in {range} (0 = the default)")]
    OutOfRange {
        field: &'static str,
        value: f64,
        range: &'static str,
    },
    #[error("row {row}: neither a record id nor a candidate id was given")]
    NoTarget { row: usize },
    #[error("internal error: {what}")]
    Internal { what: String },
}

fn to_status(e: &Error) -> Status {
    let code = match e {
        Error::Model(super::registry::Error::UnknownModel { .. })
        | Error::Model(super::registry::Error::NoDefault { .. }) => Code::NotFound,
        Error::OutOfRange { .. } | Error::NoTarget { .. } => Code::InvalidArgument,
        Error::Audit(crate::audit::Error::Write { .. }) => Code::Unavailable,
        _ => Code::Internal,
    };
    Status::new(code, e.to_string())
}

pub struct OutcomesApi {
    registry: Arc<Registry>,
    conn: Arc<Mutex<Connection>>,
    metrics: Option<Arc<Metrics>>,
}

impl OutcomesApi {
    /// Opens its own connection to the audit store at `path` (already
    /// migrated by the scoring writer; opening migrates again if needed).
    pub fn open(
        registry: Arc<Registry>,
        path: &std::path::Path,
        synchronous: crate::audit::Synchronous,
    ) -> Result<OutcomesApi, crate::audit::Error> {
        let conn = crate::audit::sqlite::open_for_writing(path, synchronous)?;
        Ok(OutcomesApi {
            registry,
            conn: Arc::new(Mutex::new(conn)),
            metrics: None,
        })
    }

    /// Sets alarm and realised-coverage gauges in `metrics` from every
    /// default evaluation (see [`super::metrics`]).
    pub fn with_metrics(mut self, metrics: Arc<Metrics>) -> OutcomesApi {
        self.metrics = Some(metrics);
        self
    }

    async fn with_conn<T: Send + 'static>(
        &self,
        f: impl FnOnce(&mut Connection) -> Result<T, Error> + Send + 'static,
    ) -> Result<T, Error> {
        let conn = self.conn.clone();
        tokio::task::spawn_blocking(move || {
            let mut guard = conn.lock().map_err(|_| Error::Internal {
                what: "the outcomes connection was poisoned by a panic".into(),
            })?;
            f(&mut guard)
        })
        .await
        .map_err(|e| Error::Internal {
            what: format!("outcomes task failed: {e}"),
        })?
    }

    fn model_id(&self, name: &str) -> Result<String, Error> {
        Ok(self.registry.snapshot().get(name)?.id().to_string())
    }

    async fn record(
        &self,
        req: pb::RecordOutcomesRequest,
        caller: Caller,
    ) -> Result<pb::RecordOutcomesResponse, Error> {
        let mut inputs = Vec::with_capacity(req.rows.len());
        for (row, r) in req.rows.iter().enumerate() {
            let target = match &r.target {
                Some(pb::outcome_row::Target::RecordId(id)) if !id.is_empty() => {
                    Target::Record(id.clone())
                }
                Some(pb::outcome_row::Target::Candidate(c)) if !c.candidate_id.is_empty() => {
                    Target::Candidate {
                        candidate_id: c.candidate_id.clone(),
                        model_id: self.model_id(&c.model)?,
                    }
                }
                _ => return Err(Error::NoTarget { row }),
            };
            inputs.push(OutcomeInput {
                target,
                observed: r.observed,
            });
        }
        let replace = req.replace;
        let source = req.source.clone();
        let now = now_us();
        let results = self
            .with_conn(move |c| {
                Ok(outcomes::record(
                    c, &inputs, replace, &source, now, &caller,
                )?)
            })
            .await?;
        let stored = results.iter().filter(|r| r.stored()).count() as u32;
        tracing::info!(rows = results.len(), stored, replace, "outcomes recorded");
        // Re-evaluate every loaded model's alarms now that outcomes arrived,
        // so a departure shows in the logs without anyone asking.
        for id in self.registry.snapshot().ids() {
            let calreq = pb::CalibrationRequest {
                model: id.clone(),
                ..Default::default()
            };
            match self.calibration(calreq).await {
                Ok(answer) => log_alarms(&answer),
                Err(e) => tracing::warn!(model = %id, error = %e, "alarms not evaluated"),
            }
        }
        Ok(pb::RecordOutcomesResponse {
            results: results
                .into_iter()
                .enumerate()
                .map(|(row, r)| row_result(row as u32, r))
                .collect(),
            stored,
        })
    }

    async fn calibration(
        &self,
        req: pb::CalibrationRequest,
    ) -> Result<pb::CalibrationResponse, Error> {
        let model = self.registry.snapshot().get(&req.model)?;
        // Only the default evaluation moves the gauges: one consistent series
        // for alerting, whatever windows callers ask about.
        let is_default = req.level == 0.0
            && req.alpha == 0.0
            && req.outside_window == 0
            && req.from_unix_us == 0
            && req.to_unix_us == 0;
        let level = default_in(req.level, DEFAULT_LEVEL, "level", 0.5, 0.999)?;
        let alpha = default_in(req.alpha, DEFAULT_ALPHA, "alpha", 1e-9, 0.5)?;
        let window = if req.outside_window == 0 {
            DEFAULT_OUTSIDE_WINDOW
        } else {
            u64::from(req.outside_window)
        };
        let from = req.from_unix_us;
        let to = if req.to_unix_us == 0 {
            i64::MAX
        } else {
            req.to_unix_us
        };
        let id = model.id().to_string();
        let (pairs, (outside, total)) = self
            .with_conn(move |c| {
                Ok((
                    outcomes::pairs(c, &id, from, to)?,
                    outcomes::recent_outside(c, &id, window)?,
                ))
            })
            .await?;
        let pairs: Vec<monitor::Pair> = pairs
            .into_iter()
            .map(|p| monitor::Pair {
                observed: p.observed,
                predicted: p.prediction,
                lower: p.lower,
                upper: p.upper,
                confidence: p.confidence,
                verdict: p.verdict,
            })
            .collect();
        let cal = monitor::calibrate(&pairs, level);
        let claim = model
            .facts
            .claims
            .iter()
            .find(|c| c.metric == "mse")
            .map(|c| monitor::MseClaim {
                mean: c.mean,
                se: c.se,
            });
        let window = model
            .facts
            .oof_outside_share
            .map(|expected| monitor::OutsideWindow {
                outside,
                total,
                expected,
            });
        let alarms = monitor::alarms(&cal, claim, window, alpha);
        if let Some(m) = self.metrics.as_ref().filter(|_| is_default) {
            m.record_evaluation(
                model.id(),
                alarms.iter().map(|a| (a.kind.name(), a.firing)),
                cal.overall.coverage.as_ref().map(|c| c.rate.estimate),
            );
        }
        Ok(pb::CalibrationResponse {
            model: model.id().to_string(),
            model_version: model.info().version.clone(),
            level,
            alpha,
            overall: Some(group("all", &cal.overall)),
            by_verdict: cal.by_verdict.iter().map(|(k, g)| group(k, g)).collect(),
            claims: super::convert::claims_to_pb(&model.facts),
            alarms: alarms
                .into_iter()
                .map(|a| pb::MonitorAlarm {
                    name: a.kind.name().to_string(),
                    firing: a.firing,
                    p_value: a.p_value,
                    observed: a.observed,
                    expected: a.expected,
                    n: a.n,
                    detail: a.detail,
                })
                .collect(),
        })
    }
}

fn log_alarms(answer: &pb::CalibrationResponse) {
    for a in &answer.alarms {
        if a.firing {
            tracing::warn!(model = %answer.model, alarm = %a.name, p_value = a.p_value,
                observed = a.observed, expected = a.expected, n = a.n, "{}", a.detail);
        }
    }
}

fn default_in(
    value: f64,
    default: f64,
    field: &'static str,
    lo: f64,
    hi: f64,
) -> Result<f64, Error> {
    if value == 0.0 {
        return Ok(default);
    }
    if !(lo..=hi).contains(&value) {
        return Err(Error::OutOfRange {
            field,
            value,
            range: if field == "level" {
                "[0.5, 0.999]"
            } else {
                "(0, 0.5]"
            },
        });
    }
    Ok(value)
}

fn now_us() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_micros() as i64)
        .unwrap_or(0)
}

fn figure(i: Option<Interval>) -> Option<pb::Figure> {
    Some(match i {
        Some(i) => pb::Figure {
            defined: true,
            value: i.estimate,
            lower: i.lower,
            upper: i.upper,
        },
        None => pb::Figure::default(),
    })
}

fn group(verdict: &str, g: &monitor::Group) -> pb::CalibrationGroup {
    pb::CalibrationGroup {
        verdict: verdict.to_string(),
        outcomes: g.outcomes,
        errors: g.errors.as_ref().map(|e| pb::RealisedErrors {
            predictions: e.n,
            rmse: figure(Some(e.rmse)),
            mae: figure(Some(e.mae)),
            mse: figure(Some(e.mse)),
            r2: e.r2,
            pearson: figure(e.pearson),
            spearman: figure(e.spearman),
        }),
        coverage: g.coverage.as_ref().map(|c| pb::RealisedCoverage {
            intervals: c.n,
            covered: c.covered,
            rate: figure(Some(c.rate)),
            nominal: c.nominal,
            p_below: c.p_below,
        }),
    }
}

fn row_result(row: u32, r: RowResult) -> pb::OutcomeRowResult {
    use pb::OutcomeRowStatus as S;
    let mut out = pb::OutcomeRowResult {
        row,
        ..Default::default()
    };
    let (status, message) = match r {
        RowResult::Recorded { record_id } => {
            out.record_id = record_id;
            (S::OutcomeRecorded, "recorded".to_string())
        }
        RowResult::Replaced {
            record_id,
            previous,
        } => {
            out.record_id = record_id;
            out.previous = previous;
            (
                S::OutcomeReplaced,
                format!("replaced {previous}; the old value stays in history"),
            )
        }
        RowResult::AlreadyRecorded {
            record_id,
            existing,
        } => {
            out.record_id = record_id;
            out.previous = existing;
            (
                S::OutcomeAlreadyRecorded,
                format!("already has the value {existing}; send with replace to change it"),
            )
        }
        RowResult::DuplicateInRequest {
            record_id,
            first_row,
        } => {
            out.record_id = record_id;
            (
                S::OutcomeDuplicateInRequest,
                format!("same record as row {first_row}; not recorded twice"),
            )
        }
        RowResult::UnknownRecord { record_id } => {
            let m = format!("no candidate record {record_id} in the audit store");
            out.record_id = record_id;
            (S::OutcomeUnknownRecord, m)
        }
        RowResult::UnknownCandidate {
            candidate_id,
            model_id,
        } => (
            S::OutcomeUnknownCandidate,
            format!("model {model_id} never scored a candidate {candidate_id}"),
        ),
        RowResult::Ambiguous {
            candidate_id,
            record_ids,
        } => {
            let m = format!(
                "candidate {candidate_id} was scored {} times; give the record id",
                record_ids.len()
            );
            out.candidate_records = record_ids;
            (S::OutcomeAmbiguous, m)
        }
        RowResult::Invalid { reason } => (S::OutcomeInvalid, reason),
    };
    out.status = status as i32;
    out.message = message;
    out
}

#[tonic::async_trait]
impl Outcomes for OutcomesApi {
    async fn record_outcomes(
        &self,
        request: Request<pb::RecordOutcomesRequest>,
    ) -> Result<Response<pb::RecordOutcomesResponse>, Status> {
        let caller = super::access::caller_of(&request);
        self.record(request.into_inner(), caller)
            .await
            .map(Response::new)
            .map_err(|e| to_status(&e))
    }

    async fn calibration(
        &self,
        request: Request<pb::CalibrationRequest>,
    ) -> Result<Response<pb::CalibrationResponse>, Status> {
        let answer = OutcomesApi::calibration(self, request.into_inner())
            .await
            .map_err(|e| to_status(&e))?;
        log_alarms(&answer);
        Ok(Response::new(answer))
    }
}
