//! The committed demo data: regenerating with the committed seed gives the
//! committed files byte for byte, the new series lies far from the training
//! series in standardised descriptor space while the rest of the next round
//! lies near them, and the new series' lab results are far below what a
//! model of the training SAR extrapolates, as the scenario says.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::path::{Path, PathBuf};

use ndarray::{Array1, Array2, Axis};
use plumbline::demo;
use plumbline::linalg::{sq_dists, sym_eigen};
use plumbline::space::Standardizer;

fn committed(file: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("demo-data")
        .join(file)
}

#[test]
fn regenerating_with_the_committed_seed_reproduces_the_files() {
    let dir = tempfile::tempdir().expect("temporary directory");
    let files = demo::generate(demo::SEED, dir.path()).expect("demo data written");
    for (fresh, name) in [
        (&files.training, demo::TRAINING_FILE),
        (&files.next_round, demo::NEXT_ROUND_FILE),
        (&files.lab_results, demo::LAB_RESULTS_FILE),
    ] {
        let want = std::fs::read(committed(name)).expect("committed demo file");
        let got = std::fs::read(fresh).expect("regenerated file");
        assert!(
            got == want,
            "demo-data/{name} differs from the generator's output; run \
             `cargo run --release -- demo --regenerate-data` and commit the result"
        );
    }
    // Another seed gives other data: the seed is really used.
    let other = tempfile::tempdir().expect("temporary directory");
    let files2 = demo::generate(demo::SEED + 1, other.path()).expect("demo data written");
    assert_ne!(
        std::fs::read(&files.training).expect("read"),
        std::fs::read(&files2.training).expect("read")
    );
}

/// Rows of a committed CSV as (id, series, descriptors, activity if any).
struct Table {
    ids: Vec<String>,
    series: Vec<String>,
    x: Array2<f64>,
    y: Option<Array1<f64>>,
}

fn read_table(name: &str) -> Table {
    let mut reader = csv::Reader::from_path(committed(name)).expect("committed csv");
    let header: Vec<String> = reader
        .headers()
        .expect("header")
        .iter()
        .map(str::to_string)
        .collect();
    let names = demo::descriptor_names();
    assert_eq!(header[0], demo::ID_COLUMN);
    assert_eq!(header[1], demo::SERIES_COLUMN);
    assert_eq!(&header[2..2 + names.len()], names.as_slice());
    let has_y = header.last().map(String::as_str) == Some(demo::TARGET_COLUMN);
    let (mut ids, mut series, mut values, mut y) = (vec![], vec![], vec![], vec![]);
    for record in reader.records() {
        let r = record.expect("record");
        ids.push(r[0].to_string());
        series.push(r[1].to_string());
        for j in 0..names.len() {
            values.push(r[2 + j].parse::<f64>().expect("numeric descriptor"));
        }
        if has_y {
            y.push(r[2 + names.len()].parse::<f64>().expect("numeric activity"));
        }
    }
    let n = ids.len();
    Table {
        ids,
        series,
        x: Array2::from_shape_vec((n, names.len()), values).expect("shape"),
        y: has_y.then(|| Array1::from(y)),
    }
}

/// Mean distance from each row of `a` to its nearest row of `b`, skipping
/// the row itself when `a` is `b` (brute force: a few hundred rows).
fn mean_nn_distance(a: &Array2<f64>, b: &Array2<f64>, same: bool) -> f64 {
    let d = sq_dists(a.view(), b.view(), None);
    let total: f64 = d
        .axis_iter(Axis(0))
        .enumerate()
        .map(|(i, row)| {
            row.iter()
                .enumerate()
                .filter(|(j, _)| !(same && *j == i))
                .map(|(_, v)| *v)
                .fold(f64::INFINITY, f64::min)
                .sqrt()
        })
        .sum();
    total / a.nrows() as f64
}

fn rows(x: &Array2<f64>, keep: &[bool]) -> Array2<f64> {
    let idx: Vec<usize> = (0..keep.len()).filter(|&i| keep[i]).collect();
    x.select(Axis(0), &idx)
}

#[test]
fn the_new_series_is_far_from_the_training_series_and_the_rest_is_near() {
    let train = read_table(demo::TRAINING_FILE);
    let next = read_table(demo::NEXT_ROUND_FILE);
    assert_eq!(train.x.nrows(), 320);
    assert_eq!(next.x.nrows(), 120);
    assert!(next.y.is_none(), "the next round carries no activity");
    let new: Vec<bool> = next.series.iter().map(|s| s == demo::NEW_SERIES).collect();
    assert_eq!(new.iter().filter(|&&b| b).count(), 20);
    assert!(!train.series.iter().any(|s| s == demo::NEW_SERIES));
    for s in &next.series {
        assert!(s == demo::NEW_SERIES || demo::known_series().contains(&s.as_str()));
    }

    // Standardised by the training rows, as the fit does.
    let st = Standardizer::fit(train.x.view());
    let zt = st.transform(train.x.view());
    let zn = st.transform(next.x.view());
    let within = mean_nn_distance(&zt, &zt, true);
    let far = mean_nn_distance(&rows(&zn, &new), &zt, false);
    let not_new: Vec<bool> = new.iter().map(|b| !b).collect();
    let near = mean_nn_distance(&rows(&zn, &not_new), &zt, false);
    assert!(
        far >= 2.0 * within,
        "new series at {far:.2}, training rows {within:.2} from each other"
    );
    assert!(
        near <= 1.25 * within,
        "known-series candidates at {near:.2} vs {within:.2}: they should look like training"
    );
}

#[test]
fn the_new_series_is_far_worse_in_the_lab_than_a_training_model_extrapolates() {
    let train = read_table(demo::TRAINING_FILE);
    let next = read_table(demo::NEXT_ROUND_FILE);
    let mut lab = csv::Reader::from_path(committed(demo::LAB_RESULTS_FILE)).expect("lab csv");
    let measured: Vec<(String, f64)> = lab
        .records()
        .map(|r| {
            let r = r.expect("record");
            (r[0].to_string(), r[1].parse().expect("numeric activity"))
        })
        .collect();
    let ids: Vec<&str> = measured.iter().map(|(id, _)| id.as_str()).collect();
    assert_eq!(ids, next.ids.iter().map(String::as_str).collect::<Vec<_>>());

    // Ridge regression on standardised descriptors with α = 1, solved by the
    // eigendecomposition of ZᵀZ: β = Q(Λ + αI)⁻¹Qᵀ Zᵀ(y − ȳ) (the textbook
    // closed form; Hastie et al., Elements of Statistical Learning, §3.4.1).
    let y = train.y.expect("training activity");
    let st = Standardizer::fit(train.x.view());
    let z = st.transform(train.x.view());
    let mean = y.mean().expect("rows");
    let (values, q) = sym_eigen(z.t().dot(&z).view()).expect("eigen");
    let qty = q.t().dot(&z.t().dot(&(&y - mean)));
    let beta = q.dot(&(&qty / &(&values + 1.0)));
    let predicted = st.transform(next.x.view()).dot(&beta) + mean;

    // Fitted values reproduce the training activities reasonably (the SAR is
    // learnable), so the extrapolation below is a real model's.
    let fitted = z.dot(&beta) + mean;
    let r2 = 1.0 - (&y - &fitted).mapv(|e| e * e).sum() / y.mapv(|v| (v - mean).powi(2)).sum();
    assert!(r2 > 0.3, "training R² {r2}");

    let (mut gap_new, mut n_new, mut gap_known, mut n_known) = (0.0, 0, 0.0, 0);
    for (i, s) in next.series.iter().enumerate() {
        let gap = predicted[i] - measured[i].1;
        if s == demo::NEW_SERIES {
            gap_new += gap;
            n_new += 1;
        } else {
            gap_known += gap.abs();
            n_known += 1;
        }
    }
    let (gap_new, gap_known) = (gap_new / n_new as f64, gap_known / n_known as f64);
    assert!(
        gap_new >= 1.5,
        "the model over-predicts the new series by only {gap_new:.2} log units"
    );
    assert!(
        gap_known <= 0.8,
        "the known series' next round is off by {gap_known:.2} on average"
    );
}
