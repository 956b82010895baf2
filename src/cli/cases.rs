//! `plumbline cases list|show|settle|groups|export`: the analysts' command
//! line over the Review service, with tables for people and `--json` (one
//! JSON document per call) for scripts; `export` writes CSV.

use std::io::Write;
use std::path::PathBuf;

use anyhow::{Context, anyhow};
use clap::{Args, Subcommand, ValueEnum};
use serde_json::{Value, json};
use tokio_stream::StreamExt;

use crate::pb;
use crate::pb::review_client::ReviewClient;
use crate::service::client::AuthedChannel;

#[derive(Debug, Args)]
pub struct CasesArgs {
    #[command(subcommand)]
    pub command: CasesCommand,
}

#[derive(Debug, Args, Clone)]
pub struct Common {
    /// Service address, e.g. http://127.0.0.1:7420.
    #[arg(long)]
    pub endpoint: String,
    /// Machine-readable output.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    pub access: super::ConnectArgs,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum VerdictArg {
    Inside,
    Border,
    Outside,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum StatusArg {
    Flagged,
    Refused,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum StateArg {
    Open,
    Settled,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum DecisionArg {
    AcceptForTesting,
    Dismiss,
    NeedsNewData,
}

#[derive(Debug, Args, Clone, Default)]
pub struct FilterArgs {
    #[arg(long)]
    pub model: Option<String>,
    #[arg(long, value_enum)]
    pub verdict: Option<VerdictArg>,
    #[arg(long, value_enum)]
    pub status: Option<StatusArg>,
    #[arg(long, value_enum)]
    pub state: Option<StateArg>,
    /// The latest decision.
    #[arg(long, value_enum)]
    pub decision: Option<DecisionArg>,
    /// Request time from (inclusive), Unix microseconds.
    #[arg(long)]
    pub from_us: Option<i64>,
    /// Request time to (exclusive), Unix microseconds.
    #[arg(long)]
    pub to_us: Option<i64>,
    #[arg(long)]
    pub batch: Option<String>,
}

#[derive(Debug, Subcommand)]
pub enum CasesCommand {
    /// Cases matching the filters, oldest first.
    List {
        #[command(flatten)]
        common: Common,
        #[command(flatten)]
        filter: FilterArgs,
        /// Cases per page.
        #[arg(long, default_value_t = 50)]
        page_size: u32,
        /// Continue from a previous page's token.
        #[arg(long, default_value = "")]
        page_token: String,
    },
    /// One case in full, with its nearest training rows and history.
    Show {
        record_id: String,
        #[command(flatten)]
        common: Common,
        /// Nearest training rows (0: the model's k).
        #[arg(long, default_value_t = 0)]
        neighbours: u32,
    },
    /// Record a decision on a case; earlier decisions are kept.
    Settle {
        record_id: String,
        #[command(flatten)]
        common: Common,
        /// Who decides; defaults to the identity of the token or client
        /// certificate when the server checks one.
        #[arg(long, default_value = "")]
        analyst: String,
        #[arg(long, value_enum)]
        decision: DecisionArg,
        #[arg(long, default_value = "")]
        note: String,
    },
    /// Group the open cases of a model (k-means over PCA scores).
    Groups {
        #[command(flatten)]
        common: Common,
        /// Empty: the default model.
        #[arg(long, default_value = "")]
        model: String,
        #[arg(long, default_value_t = 2)]
        groups: u32,
        #[arg(long, default_value_t = 0)]
        seed: u64,
    },
    /// Every matching case as CSV.
    Export {
        #[command(flatten)]
        common: Common,
        #[command(flatten)]
        filter: FilterArgs,
        /// Output file; standard output when absent.
        #[arg(long)]
        out: Option<PathBuf>,
    },
}

pub fn filter_to_pb(f: &FilterArgs) -> pb::CaseFilter {
    pb::CaseFilter {
        model: f.model.clone().unwrap_or_default(),
        verdict: match f.verdict {
            None => pb::Verdict::Unspecified,
            Some(VerdictArg::Inside) => pb::Verdict::Inside,
            Some(VerdictArg::Border) => pb::Verdict::Border,
            Some(VerdictArg::Outside) => pb::Verdict::Outside,
        } as i32,
        candidate_status: match f.status {
            None => pb::Status::Unspecified,
            Some(StatusArg::Flagged) => pb::Status::Flagged,
            Some(StatusArg::Refused) => pb::Status::Refused,
        } as i32,
        state: match f.state {
            None => pb::CaseState::Unspecified,
            Some(StateArg::Open) => pb::CaseState::CaseOpen,
            Some(StateArg::Settled) => pb::CaseState::CaseSettled,
        } as i32,
        decision: f.decision.map_or(pb::Decision::Unspecified, decision_to_pb) as i32,
        from_time_us: f.from_us.unwrap_or(0),
        to_time_us: f.to_us.unwrap_or(0),
        batch_label: f.batch.clone().unwrap_or_default(),
    }
}

fn decision_to_pb(d: DecisionArg) -> pb::Decision {
    match d {
        DecisionArg::AcceptForTesting => pb::Decision::AcceptForTesting,
        DecisionArg::Dismiss => pb::Decision::Dismiss,
        DecisionArg::NeedsNewData => pb::Decision::NeedsNewData,
    }
}

fn enum_name(name: Option<&str>) -> String {
    name.unwrap_or("?").to_ascii_lowercase()
}

fn status_name(v: i32) -> String {
    enum_name(pb::Status::try_from(v).ok().map(|s| s.as_str_name()))
}
fn verdict_name(v: i32) -> String {
    enum_name(pb::Verdict::try_from(v).ok().map(|s| s.as_str_name()))
}
fn decision_name(v: i32) -> String {
    match pb::Decision::try_from(v) {
        Ok(pb::Decision::Unspecified) => String::new(),
        other => enum_name(other.ok().map(|d| d.as_str_name())),
    }
}
fn state_name(v: i32) -> String {
    match pb::CaseState::try_from(v) {
        Ok(pb::CaseState::CaseOpen) => "open".into(),
        Ok(pb::CaseState::CaseSettled) => "settled".into(),
        _ => "?".into(),
    }
}

fn opt(v: Option<f64>) -> String {
    v.map(|v| format!("{v:.4}")).unwrap_or_else(|| "-".into())
}

fn summary_json(c: &pb::CaseSummary) -> Value {
    json!({
        "record_id": c.record_id,
        "candidate_id": c.candidate_id,
        "model": c.model,
        "model_version": c.model_version,
        "batch_label": c.batch_label,
        "time_us": c.time_us,
        "status": status_name(c.status),
        "verdict": verdict_name(c.verdict),
        "prediction": c.prediction,
        "lower": c.lower,
        "upper": c.upper,
        "state": state_name(c.state),
        "decision": decision_name(c.decision),
        "analyst": c.analyst,
        "note": c.note,
        "revisions": c.revisions,
        "knn_distance": c.knn_distance,
        "typicality": c.typicality,
    })
}

fn history_json(h: &pb::Settlement) -> Value {
    json!({
        "sequence": h.sequence,
        "time_us": h.time_us,
        "analyst": h.analyst,
        "decision": decision_name(h.decision),
        "note": h.note,
        "caller_identity": h.caller_identity,
        "caller_peer": h.caller_peer,
    })
}

fn write_summaries(out: &mut dyn Write, cases: &[pb::CaseSummary]) -> std::io::Result<()> {
    writeln!(
        out,
        "{:<24} {:<14} {:<12} {:<8} {:<8} {:>10} {:>10} {:<8} {:<18}",
        "record",
        "candidate",
        "model",
        "status",
        "verdict",
        "prediction",
        "typicality",
        "state",
        "decision"
    )?;
    for c in cases {
        writeln!(
            out,
            "{:<24} {:<14} {:<12} {:<8} {:<8} {:>10} {:>10.4} {:<8} {:<18}",
            c.record_id,
            c.candidate_id,
            c.model,
            status_name(c.status),
            verdict_name(c.verdict),
            opt(c.prediction),
            c.typicality,
            state_name(c.state),
            decision_name(c.decision)
        )?;
    }
    Ok(())
}

fn write_history(out: &mut dyn Write, history: &[pb::Settlement]) -> std::io::Result<()> {
    writeln!(out, "history ({} decisions, oldest first):", history.len())?;
    for h in history {
        writeln!(
            out,
            "  #{:<5} {:>18} {:<12} {:<18} {}{}",
            h.sequence,
            h.time_us,
            h.analyst,
            decision_name(h.decision),
            h.note,
            if h.caller_identity.is_empty() {
                String::new()
            } else {
                format!("  (by {})", h.caller_identity)
            }
        )?;
    }
    Ok(())
}

fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// A channel to the service named by the common flags, with their TLS and
/// token.
pub async fn connect_channel(common: &Common) -> anyhow::Result<AuthedChannel> {
    crate::service::client::connect(&common.endpoint, &common.access.connect()).await
}

async fn connect(common: &Common) -> anyhow::Result<ReviewClient<AuthedChannel>> {
    Ok(ReviewClient::new(connect_channel(common).await?).max_decoding_message_size(64 << 20))
}

pub fn failed(call: &str, s: tonic::Status) -> anyhow::Error {
    anyhow!("{call} failed ({:?}): {}", s.code(), s.message())
}

/// Runs one `cases` subcommand, writing what it prints to `out`.
pub async fn run_to(args: &CasesArgs, out: &mut dyn Write) -> anyhow::Result<()> {
    match &args.command {
        CasesCommand::List {
            common,
            filter,
            page_size,
            page_token,
        } => {
            let mut client = connect(common).await?;
            let page = client
                .list_cases(pb::ListCasesRequest {
                    filter: Some(filter_to_pb(filter)),
                    page_size: *page_size,
                    page_token: page_token.clone(),
                })
                .await
                .map_err(|s| failed("ListCases", s))?
                .into_inner();
            if common.json {
                let doc = json!({
                    "cases": page.cases.iter().map(summary_json).collect::<Vec<_>>(),
                    "next_page_token": page.next_page_token,
                });
                writeln!(out, "{doc}")?;
            } else {
                write_summaries(out, &page.cases)?;
                if !page.next_page_token.is_empty() {
                    writeln!(out, "more: --page-token {}", page.next_page_token)?;
                }
            }
        }
        CasesCommand::Show {
            record_id,
            common,
            neighbours,
        } => {
            let mut client = connect(common).await?;
            let d = client
                .get_case(pb::GetCaseRequest {
                    record_id: record_id.clone(),
                    neighbours: *neighbours,
                })
                .await
                .map_err(|s| failed("GetCase", s))?
                .into_inner();
            show(out, &d, common.json)?;
        }
        CasesCommand::Settle {
            record_id,
            common,
            analyst,
            decision,
            note,
        } => {
            let mut client = connect(common).await?;
            let r = client
                .settle_case(pb::SettleCaseRequest {
                    record_id: record_id.clone(),
                    analyst: analyst.clone(),
                    decision: decision_to_pb(*decision) as i32,
                    note: note.clone(),
                })
                .await
                .map_err(|s| failed("SettleCase", s))?
                .into_inner();
            if common.json {
                let doc = json!({
                    "case": r.summary.as_ref().map(summary_json),
                    "history": r.history.iter().map(history_json).collect::<Vec<_>>(),
                });
                writeln!(out, "{doc}")?;
            } else {
                writeln!(out, "settled {record_id}")?;
                write_history(out, &r.history)?;
            }
        }
        CasesCommand::Groups {
            common,
            model,
            groups,
            seed,
        } => {
            let mut client = connect(common).await?;
            let r = client
                .group_cases(pb::GroupCasesRequest {
                    model: model.clone(),
                    groups: *groups,
                    seed: *seed,
                    filter: None,
                })
                .await
                .map_err(|s| failed("GroupCases", s))?
                .into_inner();
            if common.json {
                let groups: Vec<Value> = r
                    .groups
                    .iter()
                    .map(|g| {
                        json!({
                            "group": g.group,
                            "size": g.size,
                            "centre": g.centre,
                            "centre_distance": g.centre_distance,
                            "record_ids": g.record_ids,
                        })
                    })
                    .collect();
                let doc = json!({
                    "model": r.model,
                    "model_version": r.model_version,
                    "groups": groups,
                    "skipped": r.skipped,
                });
                writeln!(out, "{doc}")?;
            } else {
                writeln!(
                    out,
                    "open cases of {} ({}) in {} groups; {} without stored descriptors",
                    r.model,
                    r.model_version,
                    r.groups.len(),
                    r.skipped
                )?;
                writeln!(
                    out,
                    "{:>5} {:>6} {:>16}  members",
                    "group", "size", "centre distance"
                )?;
                for g in &r.groups {
                    writeln!(
                        out,
                        "{:>5} {:>6} {:>16.4}  {}",
                        g.group,
                        g.size,
                        g.centre_distance,
                        g.record_ids.join(" ")
                    )?;
                }
            }
        }
        CasesCommand::Export {
            common,
            filter,
            out: file,
        } => {
            let mut client = connect(common).await?;
            let mut stream = client
                .export_cases(pb::ExportCasesRequest {
                    filter: Some(filter_to_pb(filter)),
                })
                .await
                .map_err(|s| failed("ExportCases", s))?
                .into_inner();
            let mut sink: Box<dyn Write + '_> = match file {
                Some(p) => Box::new(std::io::BufWriter::new(
                    std::fs::File::create(p)
                        .with_context(|| format!("creating {}", p.display()))?,
                )),
                None => Box::new(&mut *out),
            };
            writeln!(
                sink,
                "record_id,candidate_id,model,model_version,batch_label,time_us,status,verdict,\
                 prediction,lower,upper,knn_distance,typicality,state,decision,analyst,note,\
                 revisions,descriptors"
            )?;
            let mut n = 0u64;
            while let Some(row) = stream.next().await {
                let c = row.map_err(|s| failed("ExportCases", s))?;
                let num = |v: Option<f64>| v.map(|v| v.to_string()).unwrap_or_default();
                let descriptors: Vec<String> = c.descriptors.iter().map(f64::to_string).collect();
                writeln!(
                    sink,
                    "{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{}",
                    csv_field(&c.record_id),
                    csv_field(&c.candidate_id),
                    csv_field(&c.model),
                    csv_field(&c.model_version),
                    csv_field(&c.batch_label),
                    c.time_us,
                    status_name(c.status),
                    verdict_name(c.verdict),
                    num(c.prediction),
                    num(c.lower),
                    num(c.upper),
                    c.knn_distance,
                    c.typicality,
                    state_name(c.state),
                    decision_name(c.decision),
                    csv_field(&c.analyst),
                    csv_field(&c.note),
                    c.revisions,
                    csv_field(&descriptors.join(";")),
                )?;
                n += 1;
            }
            sink.flush()?;
            drop(sink);
            if let (Some(p), false) = (file, common.json) {
                writeln!(out, "wrote {n} cases to {}", p.display())?;
            }
        }
    }
    Ok(())
}

fn show(out: &mut dyn Write, d: &pb::CaseDetail, as_json: bool) -> anyhow::Result<()> {
    if as_json {
        let domain = d.domain.as_ref().map(|r| {
            json!({
                "verdict": verdict_name(r.verdict),
                "knn_distance": r.knn_distance,
                "typicality": r.typicality,
                "beyond_z_threshold": r.beyond_z_threshold,
                "leverage": r.leverage,
                "leverage_warning": r.leverage_warning,
                "pca_residual": r.pca_residual,
                "pca_residual_limit": r.pca_residual_limit,
                "out_of_range": r.out_of_range.iter().map(|o| json!({
                    "descriptor": o.descriptor, "value": o.value, "min": o.min, "max": o.max,
                })).collect::<Vec<_>>(),
                "notes": r.notes,
            })
        });
        let doc = json!({
            "case": d.summary.as_ref().map(summary_json),
            "descriptor_names": d.descriptor_names,
            "descriptors": d.descriptors,
            "confidence": d.confidence,
            "calibration": d.calibration,
            "domain": domain,
            "neighbours": d.neighbours.iter().map(|n| json!({
                "training_id": n.training_id,
                "training_row": n.training_row,
                "distance": n.distance,
                "observed": n.observed,
            })).collect::<Vec<_>>(),
            "neighbours_model_version": d.neighbours_model_version,
            "history": d.history.iter().map(history_json).collect::<Vec<_>>(),
        });
        writeln!(out, "{doc}")?;
        return Ok(());
    }
    if let Some(s) = &d.summary {
        write_summaries(out, std::slice::from_ref(s))?;
        writeln!(
            out,
            "interval at {:.2}: [{}, {}] ({})",
            d.confidence,
            opt(s.lower),
            opt(s.upper),
            if d.calibration.is_empty() {
                "none"
            } else {
                &d.calibration
            }
        )?;
    }
    writeln!(out, "descriptors:")?;
    for (i, v) in d.descriptors.iter().enumerate() {
        let name = d.descriptor_names.get(i).map_or("?", String::as_str);
        writeln!(out, "  {name:<20} {v}")?;
    }
    if let Some(r) = &d.domain {
        writeln!(
            out,
            "domain: {} knn_distance {:.4} typicality {:.4} leverage {:.4} (warning {:.4}) \
             pca_residual {:.4} (limit {:.4}){}",
            verdict_name(r.verdict),
            r.knn_distance,
            r.typicality,
            r.leverage,
            r.leverage_warning,
            r.pca_residual,
            r.pca_residual_limit,
            if r.beyond_z_threshold {
                " beyond the Z threshold"
            } else {
                ""
            }
        )?;
        for o in &r.out_of_range {
            writeln!(
                out,
                "  out of range: {} = {} (training {}..{})",
                o.descriptor, o.value, o.min, o.max
            )?;
        }
        for n in &r.notes {
            writeln!(out, "  note: {n}")?;
        }
    }
    if !d.neighbours_model_version.is_empty() {
        writeln!(
            out,
            "neighbours from the loaded version {}",
            d.neighbours_model_version
        )?;
    }
    writeln!(
        out,
        "{:<16} {:>6} {:>12} {:>12}",
        "nearest training", "row", "distance", "observed"
    )?;
    for n in &d.neighbours {
        writeln!(
            out,
            "{:<16} {:>6} {:>12.4} {:>12.4}",
            n.training_id, n.training_row, n.distance, n.observed
        )?;
    }
    write_history(out, &d.history)?;
    Ok(())
}

/// `plumbline cases …` from the command line.
pub fn run(args: &CasesArgs) -> anyhow::Result<()> {
    let mut out = std::io::stdout().lock();
    super::block_on(run_to(args, &mut out))
}
