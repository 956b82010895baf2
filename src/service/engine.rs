//! What every scoring call does, beside the gRPC plumbing: resolve the
//! model once (the call keeps that `Arc` to its end), check the request,
//! score off the async runtime, build the answer and its audit records from
//! the same outcomes, commit the records, and only then hand the answer back.

use std::collections::HashMap;
use std::sync::Arc;
use std::time::Instant;

use tokio::sync::Semaphore;
use tokio_stream::{Stream, StreamExt};
use tracing::Instrument;

use super::Error;
use super::batch::{self, CandidateIn, KeepDescriptors, Plan};
use super::convert;
use super::metrics::{Metrics, Tally};
use super::registry::{LoadedModel, Registry};
use crate::audit::{AuditWriter, Entry, Method, RequestIds, RequestRecord, StreamRank, record_id};
use crate::conformal::Interval;
use crate::domain::DomainSignals;
use crate::pb;
use crate::scoring::{CandidateScore, Direction, Policy, RankKey, ranks};

/// Requests of at most this many candidates are scored on the async
/// worker itself rather than on the blocking pool.
const INLINE_CANDIDATES: usize = 4;

pub use crate::audit::Caller;

/// The limits and policy a call runs under.
#[derive(Clone, Debug)]
pub struct EngineOptions {
    pub policy: Policy,
    /// 0 = the bundle's default.
    pub default_confidence: f64,
    pub max_candidates: usize,
    pub keep: KeepDescriptors,
    /// Batches scored at once (CPU-bound work).
    pub workers: usize,
    /// Calls processed at once.
    pub concurrency_limit: usize,
}

pub struct Engine {
    registry: Arc<Registry>,
    audit: AuditWriter,
    ids: RequestIds,
    options: EngineOptions,
    cpu: Semaphore,
    calls: Semaphore,
    metrics: Option<Arc<Metrics>>,
}

/// A chunk scored but not yet committed.
struct Prepared {
    response: pb::ScoreResponse,
    entry: Entry,
    /// Ranked candidates (id, record id, what ranking needs), for streams.
    ranked: Vec<(String, String, CandidateScore)>,
    /// Candidates by status and verdict, counted once the answer is committed.
    tally: Tally,
}

/// Per-request facts that go into the audit record.
struct RequestMeta {
    method: Method,
    request_id: String,
    time_us: i64,
    batch_label: String,
    stream_id: Option<String>,
    chunk: Option<u32>,
}

impl Engine {
    pub fn new(
        registry: Arc<Registry>,
        audit: AuditWriter,
        ids: RequestIds,
        options: EngineOptions,
    ) -> Engine {
        Engine {
            cpu: Semaphore::new(options.workers.max(1)),
            calls: Semaphore::new(options.concurrency_limit.max(1)),
            registry,
            audit,
            ids,
            options,
            metrics: None,
        }
    }

    /// Counts every answered candidate in `metrics`.
    pub fn with_metrics(mut self, metrics: Arc<Metrics>) -> Engine {
        self.metrics = Some(metrics);
        self
    }

    /// Counts a committed answer's candidates: one series lookup per call.
    fn count(&self, model: &str, tally: &Tally) {
        if let Some(m) = &self.metrics {
            m.model(model).record(tally);
        }
    }

    pub fn registry(&self) -> &Arc<Registry> {
        &self.registry
    }

    pub fn audit(&self) -> &AuditWriter {
        &self.audit
    }

    /// One `Score` call.
    pub async fn score(
        &self,
        req: pb::ScoreRequest,
        caller: &Caller,
    ) -> Result<pb::ScoreResponse, Error> {
        let started = Instant::now();
        let (request_id, time_us) = self.ids.next();
        let span = tracing::info_span!("Score", request_id = %request_id,
            model = tracing::field::Empty, candidates = req.candidates.len(),
            peer = caller.peer.as_deref().unwrap_or(""));
        async move {
            let _permit = self
                .calls
                .acquire()
                .await
                .map_err(|_| Error::ShuttingDown)?;
            let model = self.registry.snapshot().get(&req.model)?;
            tracing::Span::current().record("model", model.id());
            let plan = self.plan(&model, &req)?;
            let meta = RequestMeta {
                method: Method::Score,
                request_id,
                time_us,
                batch_label: req.batch_label,
                stream_id: None,
                chunk: None,
            };
            let (prepared, _) = self
                .prepare(
                    model,
                    Arc::new(plan),
                    req.candidates,
                    HashMap::new(),
                    0,
                    meta,
                    caller,
                    false,
                )
                .await?;
            self.audit.commit(prepared.entry).await?;
            self.count(&prepared.response.model, &prepared.tally);
            log_answer(&prepared.response, started);
            Ok(prepared.response)
        }
        .instrument(span)
        .await
    }

    /// One `ScoreStream` call: each inbound message is a chunk answered in
    /// order; see the proto for the rules.
    pub async fn score_stream<S, E>(
        &self,
        mut inbound: S,
        caller: &Caller,
        mut send: impl AsyncSend,
    ) -> Result<(), StreamEnd<E>>
    where
        S: Stream<Item = Result<pb::ScoreRequest, E>> + Unpin,
    {
        let mut state: Option<StreamState> = None;
        while let Some(msg) = inbound.next().await {
            let req = msg.map_err(StreamEnd::Inbound)?;
            let started = Instant::now();
            let (request_id, time_us) = self.ids.next();
            let span = tracing::info_span!("ScoreStream", request_id = %request_id,
                stream_id = tracing::field::Empty, model = tracing::field::Empty,
                candidates = req.candidates.len(), peer = caller.peer.as_deref().unwrap_or(""));
            let response = self
                .stream_chunk(&mut state, req, request_id, time_us, caller)
                .instrument(span)
                .await
                .map_err(StreamEnd::Failed)?;
            log_answer(&response, started);
            if !send.send(response).await {
                // The client went away; its answers so far are recorded.
                return Ok(());
            }
        }
        Ok(())
    }

    async fn stream_chunk(
        &self,
        state: &mut Option<StreamState>,
        req: pb::ScoreRequest,
        request_id: String,
        time_us: i64,
        caller: &Caller,
    ) -> Result<pb::ScoreResponse, Error> {
        let _permit = self
            .calls
            .acquire()
            .await
            .map_err(|_| Error::ShuttingDown)?;
        let st = match state {
            Some(st) => {
                st.check_same(&req)?;
                st
            }
            None => {
                let model = self.registry.snapshot().get(&req.model)?;
                let plan = Arc::new(self.plan(&model, &req)?);
                state.insert(StreamState {
                    model,
                    plan,
                    model_requested: req.model.clone(),
                    confidence_requested: req.confidence,
                    names: req.descriptor_names.clone(),
                    stream_id: request_id.clone(),
                    chunk: 0,
                    position: 0,
                    seen: HashMap::new(),
                    ranked: Vec::new(),
                })
            }
        };
        let span = tracing::Span::current();
        span.record("stream_id", st.stream_id.as_str());
        span.record("model", st.model.id());
        let n = req.candidates.len();
        if n > self.options.max_candidates {
            return Err(Error::TooManyCandidates {
                count: n,
                limit: self.options.max_candidates,
            });
        }
        let meta = RequestMeta {
            method: Method::ScoreStream,
            request_id,
            time_us,
            batch_label: req.batch_label,
            stream_id: Some(st.stream_id.clone()),
            chunk: Some(st.chunk),
        };
        let seen = std::mem::take(&mut st.seen);
        let (mut prepared, seen) = self
            .prepare(
                st.model.clone(),
                st.plan.clone(),
                req.candidates,
                seen,
                st.position,
                meta,
                caller,
                true,
            )
            .await?;
        st.seen = seen;
        st.position += n;
        st.chunk += 1;
        st.ranked.append(&mut prepared.ranked);
        if req.final_ranking {
            let overall =
                overall_ranking(&st.ranked, &self.options.policy, st.model.info().direction);
            prepared.entry.stream_ranks = overall
                .iter()
                .map(|e| StreamRank {
                    stream_id: st.stream_id.clone(),
                    record_id: e.record_id.clone(),
                    rank: e.rank,
                })
                .collect();
            prepared.response.overall_ranking = overall;
        }
        self.audit.commit(prepared.entry).await?;
        self.count(&prepared.response.model, &prepared.tally);
        Ok(prepared.response)
    }

    fn plan(&self, model: &LoadedModel, req: &pb::ScoreRequest) -> Result<Plan, Error> {
        let confidence = batch::confidence(
            req.confidence,
            self.options.default_confidence,
            model.info().default_confidence,
        )?;
        if req.candidates.len() > self.options.max_candidates {
            return Err(Error::TooManyCandidates {
                count: req.candidates.len(),
                limit: self.options.max_candidates,
            });
        }
        batch::plan(model.scorer.as_ref(), confidence, &req.descriptor_names)
    }

    /// Scores a chunk on the blocking pool (bounded by `workers`) and builds
    /// the answer and the audit entry from the same outcomes.
    #[allow(clippy::too_many_arguments)]
    async fn prepare(
        &self,
        model: Arc<LoadedModel>,
        plan: Arc<Plan>,
        candidates: Vec<pb::Candidate>,
        seen: HashMap<String, usize>,
        first_position: usize,
        meta: RequestMeta,
        caller: &Caller,
        keep_ranked: bool,
    ) -> Result<(Prepared, HashMap<String, usize>), Error> {
        let _cpu = self.cpu.acquire().await.map_err(|_| Error::ShuttingDown)?;
        let candidates_len = candidates.len();
        let policy = self.options.policy;
        let keep = self.options.keep;
        let worker_model = model.clone();
        let worker_plan = plan.clone();
        let work = move || {
            let mut seen = seen;
            let rows: Vec<CandidateIn<'_>> = candidates
                .iter()
                .map(|c| CandidateIn {
                    id: &c.id,
                    descriptors: &c.descriptors,
                })
                .collect();
            let batch = batch::score_batch(
                worker_model.scorer.as_ref(),
                &worker_plan,
                &rows,
                &policy,
                keep,
                &mut seen,
                first_position,
            );
            (batch, seen)
        };
        // A few candidates take tens of microseconds: scored right here,
        // since a hand-off to the blocking pool and back costs as much and
        // adds the scheduler's delays to a single-candidate call's latency.
        let (batch, seen) = if candidates_len <= INLINE_CANDIDATES {
            work()
        } else {
            tokio::task::spawn_blocking(work)
                .await
                .map_err(|e| Error::Internal {
                    what: format!("scoring task failed: {e}"),
                })?
        };
        let mut batch = batch?;
        let confidence = plan.confidence;
        let mut results = Vec::with_capacity(batch.outcomes.len());
        let mut records = Vec::with_capacity(batch.outcomes.len());
        let mut ranked = Vec::new();
        let mut tally = Tally::default();
        for (i, o) in batch.outcomes.iter_mut().enumerate() {
            tally.add(o.status, o.score.as_ref().map(|s| s.domain.verdict));
            let rid = record_id(&meta.request_id, first_position + i);
            results.push(convert::scored_candidate(o, rid.clone(), &model));
            if keep_ranked
                && o.rank > 0
                && let Some(s) = &o.score
            {
                ranked.push((o.id.clone(), rid.clone(), slim(s)));
            }
            records.push(convert::candidate_record(
                o,
                rid,
                &meta.request_id,
                (first_position + i) as u32,
                confidence,
                &model,
            ));
        }
        let info = model.info();
        let response = pb::ScoreResponse {
            model: info.id.clone(),
            model_version: info.version.clone(),
            request_id: meta.request_id.clone(),
            results,
            overall_ranking: Vec::new(),
            confidence,
        };
        let entry = Entry {
            request: RequestRecord {
                request_id: meta.request_id,
                time_us: meta.time_us,
                method: meta.method,
                peer: caller.peer.clone(),
                identity: caller.identity.clone(),
                model_id: info.id.clone(),
                model_version: info.version.clone(),
                batch_label: meta.batch_label,
                confidence,
                stream_id: meta.stream_id,
                chunk: meta.chunk,
                counts: batch.counts,
            },
            candidates: records,
            stream_ranks: Vec::new(),
        };
        Ok((
            Prepared {
                response,
                entry,
                ranked,
                tally,
            },
            seen,
        ))
    }

    pub fn describe(&self, model: &str) -> Result<pb::ModelCard, Error> {
        let models = self.registry.snapshot();
        let m = models.get(model)?;
        let is_default = models.default_id() == Some(m.id());
        Ok(convert::model_card(m.info(), &m.facts, is_default))
    }

    pub fn list(&self) -> pb::ListModelsResponse {
        let models = self.registry.snapshot();
        pb::ListModelsResponse {
            models: models
                .default_first()
                .iter()
                .map(|m| {
                    convert::model_card(m.info(), &m.facts, models.default_id() == Some(m.id()))
                })
                .collect(),
        }
    }
}

/// How a stream ended early.
#[derive(Debug)]
pub enum StreamEnd<E> {
    /// Reading the client's messages failed (transport, size limit).
    Inbound(E),
    /// A chunk could not be answered.
    Failed(Error),
}

/// Sends one answer of a stream; false when the client is gone.
pub trait AsyncSend {
    fn send(&mut self, response: pb::ScoreResponse) -> impl Future<Output = bool> + Send;
}

struct StreamState {
    model: Arc<LoadedModel>,
    plan: Arc<Plan>,
    model_requested: String,
    confidence_requested: f64,
    names: Vec<String>,
    stream_id: String,
    chunk: u32,
    position: usize,
    seen: HashMap<String, usize>,
    ranked: Vec<(String, String, CandidateScore)>,
}

impl StreamState {
    /// Later messages may leave model, confidence and names empty, or repeat
    /// them; changing them mid-stream is an error.
    fn check_same(&self, req: &pb::ScoreRequest) -> Result<(), Error> {
        if !req.model.is_empty() && req.model != self.model_requested {
            return Err(Error::StreamChanged {
                field: "model",
                first: format!("'{}'", self.model_requested),
                now: format!("'{}'", req.model),
            });
        }
        if req.confidence != 0.0 && req.confidence != self.confidence_requested {
            return Err(Error::StreamChanged {
                field: "confidence",
                first: self.confidence_requested.to_string(),
                now: req.confidence.to_string(),
            });
        }
        if !req.descriptor_names.is_empty() && req.descriptor_names != self.names {
            return Err(Error::StreamChanged {
                field: "descriptor_names",
                first: format!("{} names", self.names.len()),
                now: format!("{} different names", req.descriptor_names.len()),
            });
        }
        Ok(())
    }
}

/// What ranking reads of a score: prediction, interval and verdict. Keeps
/// a long stream's memory small.
fn slim(s: &CandidateScore) -> CandidateScore {
    CandidateScore {
        prediction: s.prediction,
        interval: Interval {
            lower: s.interval.lower,
            upper: s.interval.upper,
            calibration: s.interval.calibration,
        },
        domain: DomainSignals {
            knn_distance: 0.0,
            typicality: 0.0,
            beyond_z_threshold: false,
            leverage: 0.0,
            pca_residual: 0.0,
            out_of_range: Vec::new(),
            verdict: s.domain.verdict,
            notes: Vec::new(),
        },
    }
}

/// The ranking over every ranked candidate of a stream, best first, by the
/// same rule as within a chunk.
fn overall_ranking(
    ranked: &[(String, String, CandidateScore)],
    policy: &Policy,
    direction: Direction,
) -> Vec<pb::RankedEntry> {
    let view: Vec<Option<&CandidateScore>> = ranked.iter().map(|(_, _, s)| Some(s)).collect();
    let r = ranks(&view, policy, direction);
    let mut out: Vec<pb::RankedEntry> = ranked
        .iter()
        .zip(r)
        .filter(|(_, rank)| *rank > 0)
        .map(|((id, record_id, s), rank)| pb::RankedEntry {
            id: id.clone(),
            record_id: record_id.clone(),
            rank,
            key: rank_key_value(s, policy.key, direction),
        })
        .collect();
    out.sort_by_key(|e| e.rank);
    out
}

/// The key value reported beside an overall rank; an unbounded conservative
/// side is reported as the infinity it stands for.
fn rank_key_value(s: &CandidateScore, key: RankKey, direction: Direction) -> f64 {
    match (key, direction) {
        (RankKey::Prediction, _) => s.prediction,
        (RankKey::ConservativeBound, Direction::Higher) => {
            s.interval.lower.unwrap_or(f64::NEG_INFINITY)
        }
        (RankKey::ConservativeBound, Direction::Lower) => s.interval.upper.unwrap_or(f64::INFINITY),
    }
}

fn log_answer(r: &pb::ScoreResponse, started: Instant) {
    let mut counts = [0u32; 5];
    for c in &r.results {
        if let Some(slot) = counts.get_mut(c.status as usize) {
            *slot += 1;
        }
    }
    tracing::info!(
        model = %r.model,
        version = %r.model_version,
        scored = counts[pb::Status::Scored as usize],
        flagged = counts[pb::Status::Flagged as usize],
        refused = counts[pb::Status::Refused as usize],
        rejected = counts[pb::Status::Rejected as usize],
        latency_us = started.elapsed().as_micros() as u64,
        "answered"
    );
}
