//! Fit benchmark: `--model auto` on 2,000 rows × 200 descriptors with
//! 5 × 5 nested folds, the default grids and 10 y-randomisation
//! permutations. Prints the time per stage, the bundle size and the peak
//! resident memory. Run with `cargo bench --bench fit`.
//!
//! The data are synthetic and seeded: 20 clusters of descriptors and a
//! non-linear target of a few of them (Friedman-style), so cluster folds
//! and random folds disagree the way real series do.

use std::time::Instant;

use ndarray::{Array1, Array2};
use plumbline::data::Table;
use plumbline::fit::{FitOptions, fit};
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;

/// A standard normal draw by the Box–Muller transform.
fn normal(rng: &mut Xoshiro256PlusPlus) -> f64 {
    let u: f64 = rng.gen_range(f64::EPSILON..1.0);
    let v: f64 = rng.gen_range(0.0..1.0);
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
}

fn synthetic(n: usize, p: usize, seed: u64) -> Table {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    let centres = Array2::from_shape_fn((20, p), |_| 2.0 * normal(&mut rng));
    let mut x = Array2::zeros((n, p));
    let mut y = Array1::zeros(n);
    for i in 0..n {
        let c = rng.gen_range(0..20);
        for j in 0..p {
            x[[i, j]] = centres[[c, j]] + normal(&mut rng);
        }
        let r = x.row(i);
        y[i] = 10.0 * (r[0] * r[1] / 4.0).sin() + 0.5 * r[2] * r[2] + r[3] + normal(&mut rng);
    }
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
