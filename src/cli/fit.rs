//! `plumbline fit`: read the table, run the procedure, write the bundle and
//! the report. Nothing is written unless the whole fit succeeded.

use std::io::IsTerminal as _;

use anyhow::Context;
use indicatif::{ProgressBar, ProgressStyle};

use super::{DirectionArg, FitArgs, ModelChoice};
use crate::data::{self, TableSpec};
use crate::fit::{FitOptions, SplitSpec};
use crate::models::Family;
use crate::scoring::Direction;

pub fn run(args: &FitArgs) -> anyhow::Result<()> {
    let options = options(args)?;
    let spec = TableSpec {
        id: args.id.clone(),
        target: Some(args.target.clone()),
        group: options.split.group_column().map(str::to_string),
        time: options.split.time_column().map(str::to_string),
        descriptors: args.descriptors.clone(),
        drop_incomplete: args.drop_incomplete,
    };
    let table = data::read_table(&args.data, &spec)
        .with_context(|| format!("reading {}", args.data.display()))?;
    data::check_enough_rows(table.ids.len(), args.folds, args.inner_folds)?;
    if table.dropped_incomplete > 0 && !args.quiet {
        eprintln!(
            "dropped {} incomplete rows (--drop-incomplete)",
            table.dropped_incomplete
        );
    }

    let bar = progress_bar(args.quiet);
    let progress = |stage: &str, done: usize, total: usize| {
        if let Some(bar) = &bar {
            bar.set_length(total as u64);
            bar.set_position(done as u64);
            bar.set_message(stage.to_string());
        }
    };
    let outcome = crate::fit::fit(
        &table,
        &args.data.display().to_string(),
        &options,
        &progress,
    )?;
    if let Some(bar) = bar {
        bar.finish_and_clear();
    }

    if let Some(dir) = &args.report {
        crate::report::write(&outcome.report, dir)
            .with_context(|| format!("writing the report to {}", dir.display()))?;
    }
    let version = crate::bundle::write(
        &args.out,
        &outcome.model,
        &outcome.card,
        &table.ids,
        &outcome.training_y,
    )?;
    if !args.quiet {
        eprint!("{}", crate::fit::summary(&outcome, &version));
        eprintln!("wrote {}", args.out.display());
        if let Some(dir) = &args.report {
            eprintln!("report in {}", dir.join("report.html").display());
        }
    }
    Ok(())
}

/// Builds the fit options from the command line, checking every value.
pub fn options(args: &FitArgs) -> anyhow::Result<FitOptions> {
    let split = SplitSpec::parse(&args.split)?;
    let families = match args.model {
        ModelChoice::Auto => Family::BY_SIMPLICITY.to_vec(),
        ModelChoice::Ridge => vec![Family::Ridge],
        ModelChoice::KernelRidge => vec![Family::KernelRidge],
        ModelChoice::Knn => vec![Family::Knn],
    };
    let mut grid_overrides = Vec::new();
    for g in &args.grids {
        let (family, spec) = g.split_once(':').with_context(|| {
            format!("--grid '{g}' should look like FAMILY:SPEC, e.g. ridge:alpha=10,1,0.1")
        })?;
        let family = match family {
            "ridge" => Family::Ridge,
            "kernel-ridge" => Family::KernelRidge,
            "knn" => Family::Knn,
            other => anyhow::bail!("--grid: unknown family '{other}' (ridge, kernel-ridge or knn)"),
        };
        grid_overrides.push(crate::models::parse_grid(family, spec)?);
    }
    if args.folds < 2 || args.inner_folds < 2 {
        anyhow::bail!(
            "--folds and --inner-folds must be at least 2 (got {} and {})",
            args.folds,
            args.inner_folds
        );
    }
    super::predict::check_confidence(args.confidence)?;
    let name = match &args.name {
        Some(n) => n.clone(),
        None => args
            .out
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_else(|| "model".into()),
    };
    Ok(FitOptions {
        families,
        grid_overrides,
        split,
        folds: args.folds,
        inner_folds: args.inner_folds,
        seed: args.seed,
        permutations: args.permutations,
        domain: Default::default(),
        min_band: crate::fit::DEFAULT_MIN_BAND,
        model_id: name,
        id_column: args.id.clone(),
        target_column: args.target.clone(),
        endpoint: args.endpoint.clone().unwrap_or_else(|| args.target.clone()),
        unit: args.unit.clone(),
        direction: match args.direction {
            DirectionArg::Higher => Direction::Higher,
            DirectionArg::Lower => Direction::Lower,
        },
        default_confidence: args.confidence,
    })
}

fn progress_bar(quiet: bool) -> Option<ProgressBar> {
    if quiet || !std::io::stderr().is_terminal() {
        return None;
    }
    let bar = ProgressBar::new(1);
    let style =
        ProgressStyle::with_template("{spinner} {msg:<28} [{bar:30}] {pos}/{len} {elapsed}")
            .unwrap_or_else(|_| ProgressStyle::default_bar())
            .progress_chars("=> ");
    bar.set_style(style);
    Some(bar)
}
