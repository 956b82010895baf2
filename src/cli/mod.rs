//! The command line: argument definitions and dispatch. Every subcommand is
//! a library function (`fit::run`, `predict::run`, …) that tests call
//! directly; `main` only parses and dispatches.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand, ValueEnum};

pub mod bundle_cmd;
pub mod cases;
pub mod demo;
pub mod evaluate;
pub mod fit;
pub mod outcomes;
pub mod predict;
pub mod token;

#[derive(Debug, Parser)]
#[command(
    name = "plumbline",
    version,
    about = "Honest regression models and a gRPC scoring service with an applicability-domain guard"
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Pick hyperparameters by nested cross-validation and write a model bundle.
    Fit(FitArgs),
    /// Score a CSV of candidates offline with a bundle.
    Predict(PredictArgs),
    /// Score an external set that has the target and compare with the bundle's claims.
    Evaluate(EvaluateArgs),
    /// Inspect or verify a bundle.
    Bundle {
        #[command(subcommand)]
        command: BundleCommand,
    },
    /// Run the gRPC scoring service.
    Serve(ServeArgs),
    /// Score a CSV of candidates through a running service.
    Score(ScoreArgs),
    /// Run the whole job on the embedded demo scenario.
    Demo(DemoArgs),
    /// Review the flagged and refused candidates of a running service.
    Cases(cases::CasesArgs),
    /// Record lab results and report a model's realised calibration and alarms.
    Outcomes(outcomes::OutcomesArgs),
    /// Make bearer tokens for `auth.tokens_file` (only their hashes are stored).
    Token {
        #[command(subcommand)]
        command: TokenCommand,
    },
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum ModelChoice {
    Auto,
    Ridge,
    KernelRidge,
    Knn,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum DirectionArg {
    Higher,
    Lower,
}

#[derive(Debug, Args)]
pub struct FitArgs {
    /// Training table (CSV with a header).
    #[arg(long)]
    pub data: PathBuf,
    /// Column holding the row identifiers.
    #[arg(long)]
    pub id: String,
    /// Column holding the measured activity.
    #[arg(long)]
    pub target: String,
    /// Where to write the bundle (conventionally NAME.plumb).
    #[arg(long)]
    pub out: PathBuf,
    /// Directory for report.json and report.html.
    #[arg(long)]
    pub report: Option<PathBuf>,
    /// Which values of the target are better.
    #[arg(long, value_enum, default_value = "higher")]
    pub direction: DirectionArg,
    /// Model family; `auto` takes the simplest family within one SE of the best.
    #[arg(long, value_enum, default_value = "auto")]
    pub model: ModelChoice,
    /// Fold design: random, cluster, group:COL or time:COL.
    #[arg(long, default_value = "cluster")]
    pub split: String,
    /// Number of outer (and full-data) folds.
    #[arg(long, default_value_t = 5)]
    pub folds: usize,
    /// Number of inner folds of the nested search.
    #[arg(long, default_value_t = 5)]
    pub inner_folds: usize,
    /// Seed of every random choice (recorded in the bundle).
    #[arg(long, default_value_t = 20261201)]
    pub seed: u64,
    /// Number of y-randomisation permutations (0 to skip).
    #[arg(long, default_value_t = 10)]
    pub permutations: usize,
    /// Comma-separated descriptor columns (default: every other numeric column).
    #[arg(long, value_delimiter = ',')]
    pub descriptors: Option<Vec<String>>,
    /// Drop rows with missing or non-finite values instead of failing (they are counted).
    #[arg(long)]
    pub drop_incomplete: bool,
    /// Grid override, e.g. `ridge:alpha=100,10,1` or `kernel-ridge:gamma=0.01,0.1;alpha=1,0.1`; repeatable.
    #[arg(long = "grid")]
    pub grids: Vec<String>,
    /// Model id clients use (default: the bundle file's stem).
    #[arg(long)]
    pub name: Option<String>,
    /// Name of the endpoint (default: the target column).
    #[arg(long)]
    pub endpoint: Option<String>,
    /// Unit of the endpoint, for the model card.
    #[arg(long, default_value = "")]
    pub unit: String,
    /// Interval confidence used when a request does not give one.
    #[arg(long, default_value_t = 0.9)]
    pub confidence: f64,
    /// No progress bar and no summary on stderr.
    #[arg(long)]
    pub quiet: bool,
}

#[derive(Debug, Args)]
pub struct PredictArgs {
    #[arg(long)]
    pub bundle: PathBuf,
    #[arg(long)]
    pub data: PathBuf,
    #[arg(long)]
    pub out: PathBuf,
    /// Column holding the candidate ids.
    #[arg(long, default_value = "id")]
    pub id: String,
    /// Interval confidence in [0.5, 0.99] (default: the bundle's).
    #[arg(long)]
    pub confidence: Option<f64>,
    #[command(flatten)]
    pub policy: PolicyArgs,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum OutsideArg {
    Refuse,
    Flag,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum RankKeyArg {
    Prediction,
    ConservativeBound,
}

#[derive(Debug, Args, Clone)]
pub struct PolicyArgs {
    /// What to do with candidates outside the domain.
    #[arg(long, value_enum, default_value = "refuse")]
    pub outside: OutsideArg,
    /// Do not rank candidates at the border of the domain (flag them instead).
    #[arg(long)]
    pub no_rank_border: bool,
    /// Ranking key.
    #[arg(long, value_enum, default_value = "prediction")]
    pub rank_key: RankKeyArg,
}

#[derive(Debug, Args)]
pub struct EvaluateArgs {
    #[arg(long)]
    pub bundle: PathBuf,
    #[arg(long)]
    pub data: PathBuf,
    /// Column holding the candidate ids.
    #[arg(long, default_value = "id")]
    pub id: String,
    /// Column holding the measured values (default: the bundle's endpoint).
    #[arg(long)]
    pub target: Option<String>,
    /// Interval confidence (default: the bundle's).
    #[arg(long)]
    pub confidence: Option<f64>,
    /// Machine-readable output.
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Subcommand)]
pub enum BundleCommand {
    /// Print the model card.
    Inspect {
        file: PathBuf,
        #[arg(long)]
        json: bool,
    },
    /// Check the bundle; exits non-zero with the reason on any corruption.
    Verify { file: PathBuf },
}

#[derive(Debug, Args)]
pub struct ServeArgs {
    /// Settings file (TOML); `PLUMBLINE_*` environment variables override it.
    #[arg(long)]
    pub config: Option<PathBuf>,
    /// Listen address, e.g. 127.0.0.1:7420.
    #[arg(long)]
    pub listen: Option<String>,
    /// Directory of bundles to serve.
    #[arg(long)]
    pub bundles: Option<PathBuf>,
    /// Audit database path.
    #[arg(long)]
    pub audit: Option<PathBuf>,
    /// Prometheus metrics address, e.g. 0.0.0.0:9464; empty turns them off.
    #[arg(long)]
    pub metrics_listen: Option<String>,
}

#[derive(Debug, Args)]
pub struct ScoreArgs {
    /// Service address, e.g. http://127.0.0.1:7420.
    #[arg(long)]
    pub endpoint: String,
    #[arg(long)]
    pub data: PathBuf,
    #[arg(long)]
    pub out: PathBuf,
    #[arg(long, default_value = "")]
    pub model: String,
    #[arg(long)]
    pub confidence: Option<f64>,
    /// Column holding the candidate ids.
    #[arg(long, default_value = "id")]
    pub id: String,
    #[command(flatten)]
    pub access: ConnectArgs,
}

/// How the clients reach a secured server.
#[derive(Debug, Args, Clone, Default)]
pub struct ConnectArgs {
    /// Bearer token for servers that require one (see `plumbline token new`).
    #[arg(long, env = "PLUMBLINE_TOKEN", hide_env_values = true)]
    pub token: Option<String>,
    /// CA certificate (PEM) that signed the server's certificate; use with an https:// endpoint.
    #[arg(long)]
    pub ca_cert: Option<PathBuf>,
    /// Client certificate (PEM) for servers with mutual TLS.
    #[arg(long, requires = "client_key")]
    pub client_cert: Option<PathBuf>,
    /// The client certificate's private key (PEM).
    #[arg(long, requires = "client_cert")]
    pub client_key: Option<PathBuf>,
    /// Name the server's certificate must carry (default: the endpoint's host).
    #[arg(long)]
    pub server_name: Option<String>,
}

impl ConnectArgs {
    pub fn connect(&self) -> crate::service::client::Connect {
        crate::service::client::Connect {
            token: self.token.clone(),
            ca_cert: self.ca_cert.clone(),
            client_cert: self.client_cert.clone(),
            client_key: self.client_key.clone(),
            server_name: self.server_name.clone(),
        }
    }
}

#[derive(Debug, Subcommand)]
pub enum TokenCommand {
    /// Print a fresh random token once, and the line that configures it.
    New {
        /// Who holds the token; written into every audit record of its calls.
        #[arg(long)]
        name: String,
        /// What it may do: score, review or admin (admin may do everything).
        #[arg(long, value_parser = ["score", "review", "admin"])]
        role: String,
    },
}

#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Where the demo writes its bundle, report and database.
    #[arg(long, default_value = "plumbline-demo")]
    pub dir: PathBuf,
    /// Leave the service running afterwards.
    #[arg(long)]
    pub keep_serving: bool,
    /// Rewrite demo-data/ from the seeded generator and exit.
    #[arg(long)]
    pub regenerate_data: bool,
}

/// Runs a client command's future on a one-thread runtime.
fn block_on<T>(call: impl std::future::Future<Output = anyhow::Result<T>>) -> anyhow::Result<T> {
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()?
        .block_on(call)
}

/// Runs a parsed command line.
pub fn run(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Fit(args) => fit::run(&args),
        Command::Predict(args) => predict::run(&args),
        Command::Evaluate(args) => evaluate::run(&args),
        Command::Bundle { command } => bundle_cmd::run(&command),
        Command::Serve(args) => serve(&args),
        Command::Score(args) => score(&args),
        Command::Demo(args) => demo::run(&args),
        Command::Cases(args) => cases::run(&args),
        Command::Outcomes(args) => outcomes::run(&args),
        Command::Token { command } => token::run(&command, &mut std::io::stdout().lock()),
    }
}

fn serve(args: &ServeArgs) -> anyhow::Result<()> {
    use crate::service::settings::Settings;
    let mut overrides: Vec<(&str, String)> = Vec::new();
    if let Some(l) = &args.listen {
        overrides.push(("server.listen", l.clone()));
    }
    if let Some(b) = &args.bundles {
        overrides.push(("models.dir", b.display().to_string()));
    }
    if let Some(a) = &args.audit {
        overrides.push(("audit.path", a.display().to_string()));
    }
    if let Some(m) = &args.metrics_listen {
        overrides.push(("metrics.listen", m.clone()));
    }
    let settings = Settings::load_from_process_env(args.config.as_deref(), &overrides)?;
    let runtime = crate::service::build_runtime(&settings)?;
    runtime.block_on(crate::service::serve_main(settings))
}

fn score(args: &ScoreArgs) -> anyhow::Result<()> {
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()?;
    runtime.block_on(crate::service::client::score_client_with(
        &args.endpoint,
        &args.access.connect(),
        &args.data,
        &args.out,
        &args.model,
        args.confidence,
        &args.id,
    ))
}
