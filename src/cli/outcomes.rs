//! `plumbline outcomes record F.csv|report`: lab results into the Outcomes
//! service from a CSV file, and the realised calibration of a model with its
//! alarms, as tables for people or `--json` for scripts.
//!
//! `record` stops at nothing silently: every row that was not stored is
//! listed with its reason and the command exits non-zero, so a pipeline
//! that records a plate learns at once that some values need attention.

use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::{Context, anyhow, bail};
use clap::{Args, Subcommand};
use serde_json::{Value, json};

use super::cases::{Common, connect_channel, failed};
use crate::pb;
use crate::pb::outcomes_client::OutcomesClient;

/// Rows sent per `RecordOutcomes` call: well inside the default message
/// limit, and large enough that a plate is one call.
const ROWS_PER_CALL: usize = 5_000;

#[derive(Debug, Args)]
pub struct OutcomesArgs {
    #[command(subcommand)]
    pub command: OutcomesCommand,
}

#[derive(Debug, Subcommand)]
pub enum OutcomesCommand {
    /// Record measured values from a CSV file. The file has a `record_id`
    /// column (ids from the score output) or a candidate id column with the
    /// model given by `--model` or a `model` column, and a value column.
    Record {
        file: PathBuf,
        #[command(flatten)]
        common: Common,
        /// Column with the measured values.
        #[arg(long, default_value = "observed")]
        value: String,
        /// Column with candidate ids, used when the file has no `record_id`
        /// column.
        #[arg(long, default_value = "id")]
        id: String,
        /// Model of the candidate ids when the file has no `model` column
        /// (empty: the service's default model).
        #[arg(long, default_value = "")]
        model: String,
        /// Replace values already recorded; the old values stay in history.
        #[arg(long)]
        replace: bool,
        /// Where the values came from, kept with each value (default: the
        /// file name).
        #[arg(long)]
        source: Option<String>,
    },
    /// Realised errors and interval coverage of a model against its
    /// cross-validated claims, with the alarms.
    Report {
        #[command(flatten)]
        common: Common,
        /// Empty: the default model.
        #[arg(long, default_value = "")]
        model: String,
        /// Scoring time from (inclusive), Unix microseconds.
        #[arg(long)]
        from_us: Option<i64>,
        /// Scoring time to (exclusive), Unix microseconds.
        #[arg(long)]
        to_us: Option<i64>,
        /// Level of the uncertainty intervals (default 0.95).
        #[arg(long)]
        level: Option<f64>,
        /// Significance of the alarms (default 0.01).
        #[arg(long)]
        alpha: Option<f64>,
        /// Recent candidates in the outside-share alarm (default 500).
        #[arg(long)]
        outside_window: Option<u32>,
    },
}

/// How the rows of the file name their record.
enum IdColumns {
    Record(usize),
    Candidate { id: usize, model: Option<usize> },
}

/// Reads the outcome rows of a CSV file, naming the line of any bad cell.
pub fn read_rows(
    path: &Path,
    value: &str,
    id: &str,
    default_model: &str,
) -> anyhow::Result<Vec<pb::OutcomeRow>> {
    let mut reader = csv::ReaderBuilder::new()
        .trim(csv::Trim::All)
        .from_path(path)
        .with_context(|| format!("opening {}", path.display()))?;
    let headers = reader
        .headers()
        .with_context(|| format!("reading the header of {}", path.display()))?
        .clone();
    let find = |name: &str| headers.iter().position(|h| h == name);
    let value_at = find(value).ok_or_else(|| {
        anyhow!(
            "{} has no '{value}' column for the measured values (columns: {}); name it with \
             --value",
            path.display(),
            headers.iter().collect::<Vec<_>>().join(", ")
        )
    })?;
    let ids = match (find("record_id"), find(id)) {
        (Some(r), _) => IdColumns::Record(r),
        (None, Some(c)) => IdColumns::Candidate {
            id: c,
            model: find("model"),
        },
        (None, None) => bail!(
            "{} has neither a 'record_id' column nor a '{id}' candidate id column; name the \
             candidate id column with --id",
            path.display()
        ),
    };
    let mut rows = Vec::new();
    for (i, record) in reader.records().enumerate() {
        let line = i + 2;
        let record = record.with_context(|| format!("{} line {line}", path.display()))?;
        let cell = |at: usize| record.get(at).unwrap_or("");
        let raw = cell(value_at);
        let observed: f64 = raw.parse().map_err(|_| {
            anyhow!(
                "{} line {line}: '{raw}' in column '{value}' is not a number",
                path.display()
            )
        })?;
        let target = match ids {
            IdColumns::Record(at) => pb::outcome_row::Target::RecordId(cell(at).to_string()),
            IdColumns::Candidate { id, model } => {
                let model = model
                    .map(|m| cell(m).to_string())
                    .filter(|m| !m.is_empty())
                    .unwrap_or_else(|| default_model.to_string());
                pb::outcome_row::Target::Candidate(pb::CandidateRef {
                    candidate_id: cell(id).to_string(),
                    model,
                })
            }
        };
        rows.push(pb::OutcomeRow {
            target: Some(target),
            observed,
        });
    }
    if rows.is_empty() {
        bail!("{} has a header but no rows", path.display());
    }
    Ok(rows)
}

fn row_status_name(v: i32) -> &'static str {
    match pb::OutcomeRowStatus::try_from(v) {
        Ok(pb::OutcomeRowStatus::OutcomeRecorded) => "recorded",
        Ok(pb::OutcomeRowStatus::OutcomeReplaced) => "replaced",
        Ok(pb::OutcomeRowStatus::OutcomeAlreadyRecorded) => "already_recorded",
        Ok(pb::OutcomeRowStatus::OutcomeDuplicateInRequest) => "duplicate_in_file",
        Ok(pb::OutcomeRowStatus::OutcomeUnknownRecord) => "unknown_record",
        Ok(pb::OutcomeRowStatus::OutcomeUnknownCandidate) => "unknown_candidate",
        Ok(pb::OutcomeRowStatus::OutcomeAmbiguous) => "ambiguous",
        Ok(pb::OutcomeRowStatus::OutcomeInvalid) => "invalid",
        _ => "unknown_status",
    }
}

fn is_stored(v: i32) -> bool {
    matches!(
        pb::OutcomeRowStatus::try_from(v),
        Ok(pb::OutcomeRowStatus::OutcomeRecorded | pb::OutcomeRowStatus::OutcomeReplaced)
    )
}

fn figure_json(f: Option<&pb::Figure>) -> Value {
    match f {
        Some(f) if f.defined => json!({"value": f.value, "lower": f.lower, "upper": f.upper}),
        _ => Value::Null,
    }
}

fn group_json(g: &pb::CalibrationGroup) -> Value {
    let e = g.errors.as_ref();
    let c = g.coverage.as_ref();
    json!({
        "verdict": g.verdict,
        "outcomes": g.outcomes,
        "predictions": e.map(|e| e.predictions),
        "rmse": figure_json(e.and_then(|e| e.rmse.as_ref())),
        "mae": figure_json(e.and_then(|e| e.mae.as_ref())),
        "mse": figure_json(e.and_then(|e| e.mse.as_ref())),
        "r2": e.map(|e| e.r2).filter(|r| r.is_finite()),
        "pearson": figure_json(e.and_then(|e| e.pearson.as_ref())),
        "spearman": figure_json(e.and_then(|e| e.spearman.as_ref())),
        "coverage": c.map(|c| json!({
            "intervals": c.intervals,
            "covered": c.covered,
            "rate": figure_json(c.rate.as_ref()),
            "nominal": c.nominal,
            "p_below": c.p_below,
        })),
    })
}

fn figure_text(f: Option<&pb::Figure>) -> String {
    match f {
        Some(f) if f.defined => format!("{:.3} [{:.3}, {:.3}]", f.value, f.lower, f.upper),
        _ => "-".into(),
    }
}

fn write_group(out: &mut dyn Write, g: &pb::CalibrationGroup) -> std::io::Result<()> {
    let e = g.errors.as_ref();
    let c = g.coverage.as_ref();
    let coverage = match c {
        Some(c) if c.intervals > 0 => format!(
            "{}/{} = {} at nominal {:.3}",
            c.covered,
            c.intervals,
            figure_text(c.rate.as_ref()),
            c.nominal
        ),
        _ => "-".into(),
    };
    writeln!(
        out,
        "{:<8} {:>8} {:>26} {:>26} {:>26}  {}",
        g.verdict,
        g.outcomes,
        figure_text(e.and_then(|e| e.rmse.as_ref())),
        figure_text(e.and_then(|e| e.pearson.as_ref())),
        figure_text(e.and_then(|e| e.spearman.as_ref())),
        coverage
    )
}

fn write_report(out: &mut dyn Write, r: &pb::CalibrationResponse) -> std::io::Result<()> {
    writeln!(
        out,
        "model {} ({}): intervals at {:.0}%, alarms at significance {}",
        r.model,
        r.model_version,
        r.level * 100.0,
        r.alpha
    )?;
    writeln!(
        out,
        "{:<8} {:>8} {:>26} {:>26} {:>26}  coverage",
        "verdict", "outcomes", "rmse", "pearson", "spearman"
    )?;
    if let Some(g) = &r.overall {
        write_group(out, g)?;
    }
    for g in &r.by_verdict {
        write_group(out, g)?;
    }
    writeln!(out, "cross-validated claims of the fit:")?;
    for c in &r.claims {
        writeln!(out, "  {:<10} {:.4} ± {:.4}", c.metric, c.mean, c.se)?;
    }
    writeln!(out, "alarms:")?;
    for a in &r.alarms {
        writeln!(
            out,
            "  {:<30} {:<7} p={:<10.3e} observed {:.4} expected {:.4} n={}  {}",
            a.name,
            if a.firing { "FIRING" } else { "quiet" },
            a.p_value,
            a.observed,
            a.expected,
            a.n,
            a.detail
        )?;
    }
    Ok(())
}

/// Runs one `outcomes` subcommand, writing what it prints to `out`.
pub async fn run_to(args: &OutcomesArgs, out: &mut dyn Write) -> anyhow::Result<()> {
    match &args.command {
        OutcomesCommand::Record {
            file,
            common,
            value,
            id,
            model,
            replace,
            source,
        } => {
            let rows = read_rows(file, value, id, model)?;
            let source = source.clone().unwrap_or_else(|| {
                file.file_name()
                    .map(|n| n.to_string_lossy().into_owned())
                    .unwrap_or_default()
            });
            let mut client = OutcomesClient::new(connect_channel(common).await?)
                .max_decoding_message_size(64 << 20);
            let mut results = Vec::with_capacity(rows.len());
            let mut stored = 0u64;
            for (chunk_at, chunk) in rows.chunks(ROWS_PER_CALL).enumerate() {
                let answer = client
                    .record_outcomes(pb::RecordOutcomesRequest {
                        rows: chunk.to_vec(),
                        replace: *replace,
                        source: source.clone(),
                    })
                    .await
                    .map_err(|s| failed("RecordOutcomes", s))?
                    .into_inner();
                stored += u64::from(answer.stored);
                let offset = chunk_at * ROWS_PER_CALL;
                results.extend(answer.results.into_iter().map(|mut r| {
                    r.row += offset as u32;
                    r
                }));
            }
            let not_stored: Vec<&pb::OutcomeRowResult> =
                results.iter().filter(|r| !is_stored(r.status)).collect();
            if common.json {
                let rows: Vec<Value> = results
                    .iter()
                    .map(|r| {
                        json!({
                            "line": r.row as usize + 2,
                            "status": row_status_name(r.status),
                            "record_id": r.record_id,
                            "previous": is_previous(r.status).then_some(r.previous),
                            "message": r.message,
                            "candidate_records": r.candidate_records,
                        })
                    })
                    .collect();
                writeln!(out, "{}", json!({"stored": stored, "rows": rows}))?;
            } else {
                writeln!(
                    out,
                    "stored {stored} of {} rows from {}",
                    results.len(),
                    file.display()
                )?;
                for r in &not_stored {
                    writeln!(
                        out,
                        "  line {:<6} {:<18} {}",
                        r.row as usize + 2,
                        row_status_name(r.status),
                        r.message
                    )?;
                }
            }
            if !not_stored.is_empty() {
                bail!(
                    "{} of {} rows were not stored (listed above); correct them and record \
                     those rows again{}",
                    not_stored.len(),
                    results.len(),
                    if *replace {
                        ""
                    } else {
                        ", with --replace for values that should overwrite"
                    }
                );
            }
        }
        OutcomesCommand::Report {
            common,
            model,
            from_us,
            to_us,
            level,
            alpha,
            outside_window,
        } => {
            let mut client = OutcomesClient::new(connect_channel(common).await?);
            let r = client
                .calibration(pb::CalibrationRequest {
                    model: model.clone(),
                    from_unix_us: from_us.unwrap_or(0),
                    to_unix_us: to_us.unwrap_or(0),
                    level: level.unwrap_or(0.0),
                    alpha: alpha.unwrap_or(0.0),
                    outside_window: outside_window.unwrap_or(0),
                })
                .await
                .map_err(|s| failed("Calibration", s))?
                .into_inner();
            if common.json {
                let doc = json!({
                    "model": r.model,
                    "model_version": r.model_version,
                    "level": r.level,
                    "alpha": r.alpha,
                    "overall": r.overall.as_ref().map(group_json),
                    "by_verdict": r.by_verdict.iter().map(group_json).collect::<Vec<_>>(),
                    "claims": r.claims.iter().map(|c| json!({
                        "metric": c.metric, "mean": c.mean, "se": c.se,
                    })).collect::<Vec<_>>(),
                    "alarms": r.alarms.iter().map(|a| json!({
                        "name": a.name,
                        "firing": a.firing,
                        "p_value": a.p_value.is_finite().then_some(a.p_value),
                        "observed": a.observed,
                        "expected": a.expected,
                        "n": a.n,
                        "detail": a.detail,
                    })).collect::<Vec<_>>(),
                });
                writeln!(out, "{doc}")?;
            } else {
                write_report(out, &r)?;
            }
        }
    }
    Ok(())
}

fn is_previous(v: i32) -> bool {
    matches!(
        pb::OutcomeRowStatus::try_from(v),
        Ok(pb::OutcomeRowStatus::OutcomeReplaced | pb::OutcomeRowStatus::OutcomeAlreadyRecorded)
    )
}

/// `plumbline outcomes …` from the command line.
pub fn run(args: &OutcomesArgs) -> anyhow::Result<()> {
    let mut out = std::io::stdout().lock();
    super::block_on(run_to(args, &mut out))
}
