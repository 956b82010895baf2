//! Fit benchmark: `--model auto` on 2,000 rows × 200 descriptors with
//! 5 × 5 nested folds, the default grids and 10 y-randomisation
//! permutations. Prints the time per stage, the bundle size and the peak
//! resident memory. Run with `cargo bench --bench fit`.
//!
//! The data are synthetic and seeded: 20 clusters of descriptors and a
//! non-linear target of a few of them (Friedman-style), so cluster folds
//! and random folds disagree the way real series do.

#![allow(clippy::unwrap_used, clippy::expect_used)]

mod common;

use std::time::Instant;

use plumbline::data::Table;
use plumbline::fit::{FitOptions, fit};

fn synthetic(n: usize, p: usize, seed: u64) -> Table {
    let (x, y) = common::synthetic(n, p, seed);
    Table {
        ids: (0..n).map(|i| format!("r{i}")).collect(),
        descriptor_names: (0..p).map(|j| format!("x{j}")).collect(),
        x,
        y: Some(y),
        groups: None,
        times: None,
        dropped_constant: Vec::new(),
        dropped_incomplete: 0,
        sha256: String::new(),
    }
}

/// Peak resident set size of this process (Linux), in MiB.
fn peak_rss_mib() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kib: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib / 1024.0)
}

fn main() {
    let (n, p) = (2_000, 200);
    let table = synthetic(n, p, 7);
    let options = FitOptions::new("bench", "y");
    let start = Instant::now();
    let outcome =
        fit(&table, "synthetic", &options, &|_, _, _| {}).expect("fit succeeds on synthetic data");
    let total = start.elapsed().as_secs_f64();
    let bundle = plumbline::bundle::encode(
        &outcome.model,
        &outcome.card,
        &table.ids,
        &outcome.training_y,
    );

    println!(
        "fit benchmark: {n} rows × {p} descriptors, --model auto, 5 × 5 nested folds, 10 permutations"
    );
    println!("{:<36} {:>10}", "stage", "seconds");
    for t in &outcome.report.timings {
        println!("{:<36} {:>10.2}", t.stage, t.seconds);
    }
    println!("{:<36} {:>10.2}", "total", total);
    println!(
        "{:<36} {:>10}",
        "chosen",
        format!(
            "{} {:?}",
            outcome.report.selection.family, outcome.report.selection.hyper
        )
    );
    println!(
        "{:<36} {:>10.2}",
        "bundle size (MiB)",
        bundle.len() as f64 / (1024.0 * 1024.0)
    );
    if let Some(rss) = peak_rss_mib() {
        println!("{:<36} {:>10.1}", "peak resident memory (MiB)", rss);
    }
}
