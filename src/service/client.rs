//! `plumbline score`: the client side. Reads a CSV of candidates, asks the
//! server which descriptors the model expects (DescribeModel), picks those
//! columns by name (so column order in the file does not matter), sends the
//! rows over ScoreStream in chunks and writes one CSV row per candidate with
//! `id,prediction,lower,upper,verdict,typicality,rank,status,record_id`.
//! The rank is over the whole file (the stream's overall ranking).
//!
//! [`Connect`] and [`connect`] are shared by every client of this crate: TLS
//! with a chosen CA (and a client certificate for mutual TLS) and a bearer
//! token sent with every call.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use anyhow::{Context, anyhow, bail};
use tokio::sync::mpsc;
use tokio_stream::wrappers::ReceiverStream;

use tonic::metadata::{AsciiMetadataValue, MetadataValue};
use tonic::service::Interceptor;
use tonic::service::interceptor::InterceptedService;
use tonic::transport::{Channel, Endpoint};

use crate::pb;
use crate::pb::scoring_client::ScoringClient;

/// How a client reaches a server that may ask for TLS and a token.
#[derive(Clone, Debug, Default)]
pub struct Connect {
    /// Bearer token sent as `authorization: Bearer <token>`.
    pub token: Option<String>,
    /// CA that signed the server's certificate; given, the client speaks TLS.
    pub ca_cert: Option<PathBuf>,
    /// The client's certificate and key, for servers with mutual TLS.
    pub client_cert: Option<PathBuf>,
    pub client_key: Option<PathBuf>,
    /// The name the server's certificate must carry (default: the
    /// endpoint's host).
    pub server_name: Option<String>,
}

/// A channel whose every call carries the token.
pub type AuthedChannel = InterceptedService<Channel, AttachToken>;

/// Adds the bearer token, if any, to every call.
#[derive(Clone, Debug)]
pub struct AttachToken(Option<AsciiMetadataValue>);

impl Interceptor for AttachToken {
    fn call(&mut self, mut req: tonic::Request<()>) -> Result<tonic::Request<()>, tonic::Status> {
        if let Some(v) = &self.0 {
            req.metadata_mut().insert("authorization", v.clone());
        }
        Ok(req)
    }
}

/// Connects to `endpoint` (`http://` or, with TLS, `https://`) as `how`
/// says.
pub async fn connect(endpoint: &str, how: &Connect) -> anyhow::Result<AuthedChannel> {
    let token = match &how.token {
        Some(t) => Some(
            MetadataValue::try_from(format!("Bearer {}", t.trim()))
                .map_err(|_| anyhow!("the token holds characters a header cannot carry"))?,
        ),
        None => None,
    };
    let mut ep = Endpoint::from_shared(endpoint.to_string())
        .with_context(|| format!("'{endpoint}' is not an endpoint address"))?;
    let tls = super::tls::client_config(&super::tls::ClientTls {
        ca_cert: how.ca_cert.as_deref(),
        client_cert: how.client_cert.as_deref(),
        client_key: how.client_key.as_deref(),
    })?;
    if let Some(mut tls) = tls {
        if let Some(name) = &how.server_name {
            tls = tls.domain_name(name.clone());
        }
        ep = ep
            .tls_config(tls)
            .with_context(|| format!("setting up TLS to {endpoint}"))?;
    } else if endpoint.starts_with("https://") {
        bail!("{endpoint}: https needs --ca-cert, the CA that signed the server's certificate");
    }
    let channel = ep.connect().await.map_err(|e| {
        anyhow!(
            "connecting to {endpoint}: {}; is `plumbline serve` running there, and do TLS \
             (--ca-cert) and the server's settings agree?",
            super::error_chain(&e)
        )
    })?;
    Ok(InterceptedService::new(channel, AttachToken(token)))
}

/// Candidates per stream message.
const CHUNK: usize = 1000;

/// Scores `data_csv` against the server at `endpoint` and writes `out_csv`.
/// An empty `model` means the server's default; `confidence` None means the
/// model's default.
pub async fn score_client(
    endpoint: &str,
    data_csv: &Path,
    out_csv: &Path,
    model: &str,
    confidence: Option<f64>,
    id_column: &str,
) -> anyhow::Result<()> {
    score_client_with(
        endpoint,
        &Connect::default(),
        data_csv,
        out_csv,
        model,
        confidence,
        id_column,
    )
    .await
}

/// [`score_client`] through a connection made as `how` says (TLS, token).
pub async fn score_client_with(
    endpoint: &str,
    how: &Connect,
    data_csv: &Path,
    out_csv: &Path,
    model: &str,
    confidence: Option<f64>,
    id_column: &str,
) -> anyhow::Result<()> {
    let mut client = ScoringClient::new(connect(endpoint, how).await?)
        .max_decoding_message_size(64 << 20)
        .max_encoding_message_size(64 << 20);
    let card = client
        .describe_model(pb::DescribeModelRequest {
            model: model.to_string(),
        })
        .await
        .map_err(|s| anyhow!("DescribeModel failed ({:?}): {}", s.code(), s.message()))?
        .into_inner();

    let mut reader = csv::Reader::from_path(data_csv)
        .with_context(|| format!("opening {}", data_csv.display()))?;
    let header = reader
        .headers()
        .with_context(|| format!("reading the header of {}", data_csv.display()))?
        .clone();
    let columns = Columns::find(&header, id_column, &card, data_csv)?;

    let (tx, rx) = mpsc::channel::<pb::ScoreRequest>(2);
    let first = pb::ScoreRequest {
        model: card.model.clone(),
        confidence: confidence.unwrap_or(0.0),
        descriptor_names: card.descriptor_names.clone(),
        candidates: Vec::new(),
        batch_label: data_csv
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default(),
        final_ranking: false,
    };
    let path = data_csv.to_path_buf();
    let producer =
        tokio::task::spawn_blocking(move || send_rows(reader, columns, first, tx, &path));

    let mut answers = client
        .score_stream(ReceiverStream::new(rx))
        .await
        .map_err(|s| anyhow!("ScoreStream failed: {}", s.message()))?
        .into_inner();
    let mut results: Vec<pb::ScoredCandidate> = Vec::new();
    let mut overall: HashMap<String, u32> = HashMap::new();
    loop {
        match answers.message().await {
            Ok(Some(r)) => {
                results.extend(r.results);
                overall.extend(r.overall_ranking.into_iter().map(|e| (e.record_id, e.rank)));
            }
            Ok(None) => break,
            Err(s) => bail!("the server ended the stream: {}", s.message()),
        }
    }
    producer.await.context("reading the input")??;
    write_results(out_csv, &results, &overall)
}

/// Where the id and each model descriptor are in the file.
struct Columns {
    id: usize,
    descriptors: Vec<usize>,
    names: Vec<String>,
}

impl Columns {
    fn find(
        header: &csv::StringRecord,
        id_column: &str,
        card: &pb::ModelCard,
        file: &Path,
    ) -> anyhow::Result<Columns> {
        let index: HashMap<&str, usize> = header.iter().enumerate().map(|(i, h)| (h, i)).collect();
        let id = *index.get(id_column).ok_or_else(|| {
            anyhow!(
                "{}: no id column '{id_column}'; the header has [{}] (use --id)",
                file.display(),
                header.iter().collect::<Vec<_>>().join(", ")
            )
        })?;
        let missing: Vec<&str> = card
            .descriptor_names
            .iter()
            .filter(|n| !index.contains_key(n.as_str()))
            .map(String::as_str)
            .collect();
        if !missing.is_empty() {
            bail!(
                "{}: descriptor{} {} missing; model '{}' expects {} descriptors (see `plumbline \
                 bundle inspect` or DescribeModel)",
                file.display(),
                if missing.len() == 1 { "" } else { "s" },
                missing
                    .iter()
                    .map(|m| format!("'{m}'"))
                    .collect::<Vec<_>>()
                    .join(", "),
                card.model,
                card.descriptor_names.len()
            );
        }
        Ok(Columns {
            id,
            descriptors: card
                .descriptor_names
                .iter()
                .map(|n| index[n.as_str()])
                .collect(),
            names: card.descriptor_names.clone(),
        })
    }
}

/// Reads rows and sends them in chunks; the last message asks for the
/// overall ranking. Empty or `NA`/`NaN` cells are sent as NaN so the
/// server rejects that candidate with its reason and the row stays in the
/// output; text that is not a number stops with its row and column.
fn send_rows(
    mut reader: csv::Reader<std::fs::File>,
    columns: Columns,
    first: pb::ScoreRequest,
    tx: mpsc::Sender<pb::ScoreRequest>,
    file: &Path,
) -> anyhow::Result<()> {
    let mut next = first;
    let mut record = csv::StringRecord::new();
    let mut line = 1usize;
    loop {
        let more = reader
            .read_record(&mut record)
            .with_context(|| format!("{}: reading line {}", file.display(), line + 1))?;
        if more {
            line += 1;
            let id = record.get(columns.id).unwrap_or("").to_string();
            let mut descriptors = Vec::with_capacity(columns.descriptors.len());
            for (j, &c) in columns.descriptors.iter().enumerate() {
                let cell = record.get(c).unwrap_or("").trim();
                descriptors.push(parse_cell(cell).ok_or_else(|| {
                    anyhow!(
                        "{}: line {line}, column '{}': '{cell}' is not a number",
                        file.display(),
                        columns.names[j]
                    )
                })?);
            }
            next.candidates.push(pb::Candidate { id, descriptors });
        }
        if next.candidates.len() == CHUNK || !more {
            next.final_ranking = !more;
            let sent = std::mem::take(&mut next);
            if tx.blocking_send(sent).is_err() {
                // The stream ended early; its error is reported by the caller.
                return Ok(());
            }
        }
        if !more {
            return Ok(());
        }
    }
}

fn parse_cell(cell: &str) -> Option<f64> {
    if cell.is_empty() || cell.eq_ignore_ascii_case("na") || cell.eq_ignore_ascii_case("nan") {
        return Some(f64::NAN);
    }
    cell.parse().ok()
}

fn write_results(
    out: &Path,
    results: &[pb::ScoredCandidate],
    overall: &HashMap<String, u32>,
) -> anyhow::Result<()> {
    let mut w =
        csv::Writer::from_path(out).with_context(|| format!("creating {}", out.display()))?;
    let header = crate::cli::predict::COLUMNS
        .iter()
        .chain(&["status", "record_id"]);
    w.write_record(header)?;
    // Shortest text that reads back to the same f64, as `predict` writes.
    let num = |v: Option<f64>| v.map(|x| format!("{x:?}")).unwrap_or_default();
    for r in results {
        let domain = r.domain.as_ref();
        let verdict = domain
            .and_then(|d| pb::Verdict::try_from(d.verdict).ok())
            .map(|v| v.as_str_name().to_ascii_lowercase())
            .unwrap_or_default();
        let status = pb::Status::try_from(r.status)
            .map(|s| s.as_str_name().to_ascii_lowercase())
            .unwrap_or_default();
        let rank = overall
            .get(&r.record_id)
            .map(|k| k.to_string())
            .unwrap_or_default();
        w.write_record([
            r.id.as_str(),
            &num(r.prediction),
            &num(r.lower),
            &num(r.upper),
            &verdict,
            &num(domain.map(|d| d.typicality)),
            &rank,
            &status,
            &r.record_id,
        ])?;
    }
    w.flush()
        .with_context(|| format!("writing {}", out.display()))?;
    Ok(())
}
