//! `plumbline demo`: the whole job on the invented demo scenario (see
//! demo-data/README.md), from a clean checkout, in one command.
//!
//! 1. Write the embedded scenario files into the demo directory.
//! 2. Fit on the training table (report included) and write the bundle.
//! 3. Start the service on a free loopback port with the SQLite audit store.
//! 4. Score the next round through gRPC, as a screening pipeline would.
//! 5. Print the ranked candidates, the flagged and refused ones and why.
//! 6. Compare the lab results that came back with what was predicted and
//!    with what the fit claimed.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::Context;

use super::DemoArgs;
use crate::demo;
use crate::pb;
use crate::pb::scoring_client::ScoringClient;

/// The committed scenario, embedded so the demo runs from anywhere.
const TRAINING: &[u8] = include_bytes!("../../demo-data/training.csv");
const NEXT_ROUND: &[u8] = include_bytes!("../../demo-data/next_round.csv");
const LAB_RESULTS: &[u8] = include_bytes!("../../demo-data/lab_results.csv");

/// Where the demo put things.
pub struct DemoPaths {
    pub dir: PathBuf,
    pub data: PathBuf,
    pub bundle: PathBuf,
    pub report: PathBuf,
    pub audit: PathBuf,
}

impl DemoPaths {
    fn new(dir: &Path) -> DemoPaths {
        DemoPaths {
            dir: dir.to_path_buf(),
            data: dir.join("data"),
            bundle: dir.join("bundles").join("demo-activity.plumb"),
            report: dir.join("report"),
            audit: dir.join("audit").join("audit.db"),
        }
    }
}

pub fn run(args: &DemoArgs) -> anyhow::Result<()> {
    if args.regenerate_data {
        let dir = Path::new("demo-data");
        let files = demo::generate(demo::SEED, dir).context("regenerating demo-data/")?;
        println!(
            "wrote {}, {} and {}",
            files.training.display(),
            files.next_round.display(),
            files.lab_results.display()
        );
        return Ok(());
    }
    let paths = DemoPaths::new(&args.dir);
    let out = run_demo(&paths, args.keep_serving)?;
    print!("{out}");
    Ok(())
}

/// Runs the demo and returns what it prints (the tests read it).
pub fn run_demo(paths: &DemoPaths, keep_serving: bool) -> anyhow::Result<String> {
    for d in [&paths.data, &paths.report] {
        std::fs::create_dir_all(d).with_context(|| format!("creating {}", d.display()))?;
    }
    for f in [&paths.bundle, &paths.audit] {
        if let Some(parent) = f.parent() {
            std::fs::create_dir_all(parent)
                .with_context(|| format!("creating {}", parent.display()))?;
        }
    }
    let training = paths.data.join(demo::TRAINING_FILE);
    let next_round = paths.data.join(demo::NEXT_ROUND_FILE);
    let lab = paths.data.join(demo::LAB_RESULTS_FILE);
    for (p, bytes) in [
        (&training, TRAINING),
        (&next_round, NEXT_ROUND),
        (&lab, LAB_RESULTS),
    ] {
        std::fs::write(p, bytes).with_context(|| format!("writing {}", p.display()))?;
    }

    let mut out = String::new();
    out.push_str(
        "plumbline demo: an invented lead-optimisation programme (see demo-data/README.md)\n\n",
    );
    out.push_str(&fit_step(&training, paths)?);

    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()?;
    let served = runtime.block_on(serve_and_score(paths, &next_round, &lab, keep_serving))?;
    out.push_str(&served);
    out.push_str(&format!(
        "\nfiles\n  bundle   {}\n  report   {}\n  audit    {}\n",
        paths.bundle.display(),
        paths.report.join("report.html").display(),
        paths.audit.display()
    ));
    out.push_str(
        "\nPredictions support prioritisation only; they are not safety, dosing or regulatory decisions.\n\
         Confirm in the lab and follow local practice.\n",
    );
    Ok(out)
}

fn fit_step(training: &Path, paths: &DemoPaths) -> anyhow::Result<String> {
    let spec = crate::data::TableSpec {
        id: demo::ID_COLUMN.into(),
        target: Some(demo::TARGET_COLUMN.into()),
        group: None,
        time: None,
        descriptors: Some(descriptors()),
        drop_incomplete: false,
    };
    let table = crate::data::read_table(training, &spec)?;
    let mut options =
        crate::fit::FitOptions::new("demo-activity", "enzyme inhibition (pIC50-like)");
    options.id_column = demo::ID_COLUMN.into();
    options.target_column = demo::TARGET_COLUMN.into();
    options.unit = "log units".into();
    let outcome = crate::fit::fit(
        &table,
        &training.display().to_string(),
        &options,
        &|_, _, _| {},
    )?;
    crate::report::write(&outcome.report, &paths.report)?;
    let version = crate::bundle::write(
        &paths.bundle,
        &outcome.model,
        &outcome.card,
        &table.ids,
        &outcome.training_y,
    )?;
    let mut s = format!(
        "1. fit on {} compounds × {} descriptors\n",
        table.ids.len(),
        table.descriptor_names.len()
    );
    for line in crate::fit::summary(&outcome, &version).lines() {
        s.push_str(&format!("   {line}\n"));
    }
    Ok(s)
}

async fn serve_and_score(
    paths: &DemoPaths,
    next_round: &Path,
    lab: &Path,
    keep_serving: bool,
) -> anyhow::Result<String> {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
    let addr = listener.local_addr()?;
    let mut settings = crate::service::settings::Settings::default();
    settings.server.listen = addr;
    settings.models.dir = paths
        .bundle
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_default();
    settings.audit.path = paths.audit.clone();
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(crate::service::run(settings, listener, async move {
        let _ = stop_rx.await;
    }));
    let endpoint = format!("http://{addr}");
    let mut client = connect(&endpoint).await?;

    let spec = crate::data::TableSpec {
        id: demo::ID_COLUMN.into(),
        target: None,
        group: None,
        time: None,
        descriptors: Some(descriptors()),
        drop_incomplete: false,
    };
    let table = crate::data::read_table(next_round, &spec)?;
    let candidates = table
        .ids
        .iter()
        .zip(table.x.rows())
        .map(|(id, row)| pb::Candidate {
            id: id.clone(),
            descriptors: row.to_vec(),
        })
        .collect();
    let response = client
        .score(pb::ScoreRequest {
            model: String::new(),
            confidence: 0.0,
            descriptor_names: table.descriptor_names.clone(),
            candidates,
            batch_label: "demo next round".into(),
            final_ranking: false,
        })
        .await
        .context("scoring the next round")?
        .into_inner();
    let mut s = format!(
        "\n2. scored the next round through gRPC at {endpoint}: {} candidates, model {} version {}\n",
        response.results.len(),
        response.model,
        response.model_version
    );
    s.push_str(&summarise(&response));
    s.push_str(&compare_with_lab(&response, lab, &paths.bundle, &table)?);

    if keep_serving {
        s.push_str(&format!(
            "\nthe service keeps running at {endpoint} (Ctrl-C to stop); try\n  plumbline score --endpoint {endpoint} --data {} --out scored.csv --id {}\n",
            next_round.display(),
            demo::ID_COLUMN
        ));
        print!("{s}");
        s.clear();
        tokio::signal::ctrl_c().await?;
    }
    let _ = stop_tx.send(());
    server.await.context("service task")?.context("service")?;
    Ok(s)
}

async fn connect(endpoint: &str) -> anyhow::Result<ScoringClient<tonic::transport::Channel>> {
    // The server task binds before this runs; retry briefly while it loads.
    let mut last = None;
    for _ in 0..50 {
        match ScoringClient::connect(endpoint.to_string()).await {
            Ok(c) => match c.clone().list_models(pb::ListModelsRequest {}).await {
                Ok(_) => return Ok(c),
                Err(e) => last = Some(anyhow::anyhow!(e)),
            },
            Err(e) => last = Some(anyhow::anyhow!(e)),
        }
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    }
    Err(last
        .unwrap_or_else(|| anyhow::anyhow!("no answer"))
        .context(format!("connecting to {endpoint}")))
}

fn descriptors() -> Vec<String> {
    demo::descriptor_names()
        .into_iter()
        .map(str::to_string)
        .collect()
}

fn fmt_opt(v: Option<f64>) -> String {
    v.map(|x| format!("{x:.2}")).unwrap_or_else(|| "∞".into())
}

fn summarise(r: &pb::ScoreResponse) -> String {
    let mut counts: BTreeMap<&str, usize> = BTreeMap::new();
    for c in &r.results {
        *counts.entry(status_name(c.status)).or_default() += 1;
    }
    let mut s = String::from("   status: ");
    s.push_str(
        &counts
            .iter()
            .map(|(k, v)| format!("{k} {v}"))
            .collect::<Vec<_>>()
            .join(", "),
    );
    s.push_str(&format!(
        "\n\n   top ranked (interval at confidence {}):\n",
        r.confidence
    ));
    s.push_str("   rank  compound    prediction  interval          verdict\n");
    let mut ranked: Vec<&pb::ScoredCandidate> = r.results.iter().filter(|c| c.rank > 0).collect();
    ranked.sort_by_key(|c| c.rank);
    for c in ranked.iter().take(10) {
        let verdict = c
            .domain
            .as_ref()
            .map(|d| verdict_name(d.verdict))
            .unwrap_or("-");
        s.push_str(&format!(
            "   {:>4}  {:<10} {:>10}  [{:>6}, {:>6}]  {}\n",
            c.rank,
            c.id,
            fmt_opt(c.prediction),
            fmt_opt(c.lower),
            fmt_opt(c.upper),
            verdict
        ));
    }
    let unranked: Vec<&pb::ScoredCandidate> = r.results.iter().filter(|c| c.rank == 0).collect();
    if !unranked.is_empty() {
        s.push_str(&format!(
            "\n   not ranked ({}), first few with the reasons:\n",
            unranked.len()
        ));
        for c in unranked.iter().take(8) {
            // The first note is the weightiest reason (outside ones come first).
            let why = c
                .domain
                .as_ref()
                .and_then(|d| d.notes.first().cloned())
                .unwrap_or_else(|| c.reason.clone());
            let more = c
                .domain
                .as_ref()
                .map(|d| d.notes.len().saturating_sub(1))
                .unwrap_or(0);
            let more = if more > 0 {
                format!(" (+{more} more)")
            } else {
                String::new()
            };
            s.push_str(&format!(
                "   {:<10} {:<8} {why}{more}\n",
                c.id,
                status_name(c.status)
            ));
        }
    }
    s
}

/// The lab results that came back, against the predictions and the claims;
/// and what the refused candidates would have cost had they been ranked.
fn compare_with_lab(
    r: &pb::ScoreResponse,
    lab: &Path,
    bundle: &Path,
    next: &crate::data::Table,
) -> anyhow::Result<String> {
    let mut reader =
        csv::Reader::from_path(lab).with_context(|| format!("reading {}", lab.display()))?;
    let mut measured = BTreeMap::new();
    for rec in reader.records() {
        let rec = rec?;
        let (Some(id), Some(v)) = (rec.get(0), rec.get(1)) else {
            continue;
        };
        if let Ok(v) = v.trim().parse::<f64>() {
            measured.insert(id.to_string(), v);
        }
    }
    // Refused candidates carry no prediction in the answer; score them
    // offline with the same bundle to show what ranking them would have meant.
    let b = crate::bundle::read(bundle)?;
    let offline = b.model.score(next.x.view(), r.confidence);
    let mut groups: BTreeMap<String, Group> = BTreeMap::new();
    for (c, off) in r.results.iter().zip(&offline) {
        let Some(&y) = measured.get(&c.id) else {
            continue;
        };
        let key = match (c.prediction, status_name(c.status)) {
            (Some(_), _) => c
                .domain
                .as_ref()
                .map(|d| verdict_name(d.verdict))
                .unwrap_or("-")
                .to_string(),
            (None, status) => format!("{status}*"),
        };
        let inside =
            off.interval.lower.is_none_or(|l| y >= l) && off.interval.upper.is_none_or(|u| y <= u);
        groups
            .entry(key)
            .or_default()
            .add(y, off.prediction, inside);
        if c.prediction.is_some() {
            groups
                .entry("served".into())
                .or_default()
                .add(y, off.prediction, inside);
        }
    }
    let claim = &b.manifest.card.claims.rmse;
    let mut s = format!(
        "\n3. lab results for {} candidates came back:\n",
        measured.len()
    );
    s.push_str("   subset          n    RMSE   coverage\n");
    for (k, g) in &groups {
        s.push_str(&format!(
            "   {k:<13} {:>3}  {:>6.2}   {:>6.1}%\n",
            g.n,
            g.rmse(),
            100.0 * g.coverage()
        ));
    }
    s.push_str(&format!(
        "   claimed by nested CV: RMSE {:.2} ± {:.2}; nominal coverage {:.0}%\n   (* refused: what the model would have said had the guard not refused them)\n",
        claim.mean,
        claim.se,
        100.0 * r.confidence
    ));
    Ok(s)
}

#[derive(Default)]
struct Group {
    n: usize,
    sse: f64,
    covered: usize,
}

impl Group {
    fn add(&mut self, y: f64, p: f64, covered: bool) {
        self.n += 1;
        self.sse += (y - p).powi(2);
        self.covered += usize::from(covered);
    }
    fn rmse(&self) -> f64 {
        (self.sse / self.n.max(1) as f64).sqrt()
    }
    fn coverage(&self) -> f64 {
        self.covered as f64 / self.n.max(1) as f64
    }
}

fn status_name(s: i32) -> &'static str {
    match pb::Status::try_from(s) {
        Ok(pb::Status::Scored) => "scored",
        Ok(pb::Status::Flagged) => "flagged",
        Ok(pb::Status::Refused) => "refused",
        Ok(pb::Status::Rejected) => "rejected",
        _ => "unknown",
    }
}

fn verdict_name(v: i32) -> &'static str {
    match pb::Verdict::try_from(v) {
        Ok(pb::Verdict::Inside) => "inside",
        Ok(pb::Verdict::Border) => "border",
        Ok(pb::Verdict::Outside) => "outside",
        _ => "-",
    }
}
