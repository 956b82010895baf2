//! The fit pipeline end to end: a real fit on the diabetes data (Efron et
//! al. 2004, as shipped by scikit-learn; see tests/fixtures/README.md), its
//! bundle round trip, corruption refusal, and the command line's promise
//! that a failed fit writes nothing.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::OnceLock;

use plumbline::bundle;
use plumbline::data::{TableSpec, read_table};
use plumbline::fit::{FitOptions, FitOutcome, fit};

fn diabetes_path() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/diabetes.csv")
}

fn spec() -> TableSpec {
    TableSpec {
        id: "id".into(),
        target: Some("target".into()),
        group: None,
        time: None,
        descriptors: None,
        drop_incomplete: false,
    }
}

/// One fit shared by the tests of this file (a few seconds).
fn fitted() -> &'static (plumbline::data::Table, FitOutcome) {
    static FIT: OnceLock<(plumbline::data::Table, FitOutcome)> = OnceLock::new();
    FIT.get_or_init(|| {
        let table = read_table(&diabetes_path(), &spec()).expect("diabetes fixture reads");
        let mut options = FitOptions::new("diabetes", "target");
        options.permutations = 4;
        let outcome = fit(&table, "diabetes.csv", &options, &|_, _, _| {}).expect("fit succeeds");
        (table, outcome)
    })
}

fn encoded() -> Vec<u8> {
    let (table, outcome) = fitted();
    bundle::encode(
        &outcome.model,
        &outcome.card,
        &table.ids,
        &outcome.training_y,
    )
}

#[test]
fn bundle_round_trips_bit_for_bit_and_scores_identically() {
    let (table, outcome) = fitted();
    let bytes = encoded();
    let back = bundle::decode(Path::new("mem"), &bytes).expect("decodes");
    let again = bundle::encode(
        &back.model,
        &back.manifest.card,
        &back.manifest.training_ids,
        &back.training_y,
    );
    assert_eq!(bytes, again, "re-encoding a decoded bundle changes bytes");
    let before = outcome.model.score(table.x.view(), 0.9);
    let after = back.model.score(table.x.view(), 0.9);
    for (a, b) in before.iter().zip(&after) {
        assert_eq!(a.prediction.to_bits(), b.prediction.to_bits());
        assert_eq!(a.interval, b.interval);
        assert_eq!(a.domain, b.domain);
    }
}

#[test]
fn scores_do_not_depend_on_batch_composition() {
    // The service scores whatever batch a client sends; `predict` scores the
    // whole file. Both must give the same bits for the same row.
    let (table, outcome) = fitted();
    let all = outcome.model.score(table.x.view(), 0.8);
    for i in (0..table.ids.len()).step_by(37) {
        let one = outcome
            .model
            .score(table.x.slice(ndarray::s![i..i + 1, ..]), 0.8);
        assert_eq!(
            one[0].prediction.to_bits(),
            all[i].prediction.to_bits(),
            "row {i}"
        );
        assert_eq!(one[0].interval, all[i].interval, "row {i}");
    }
}

#[test]
fn training_rows_score_close_to_their_fit() {
    // A sanity check against the reference fixture's scale: the diabetes
    // target spans 25..346 (scikit-learn's load_diabetes), so in-sample
    // predictions of a regularised model lie inside that span and the
    // intervals contain their point prediction.
    let (table, outcome) = fitted();
    for s in outcome.model.score(table.x.view(), 0.9) {
        assert!(
            (0.0..400.0).contains(&s.prediction),
            "prediction {}",
            s.prediction
        );
        if let (Some(l), Some(u)) = (s.interval.lower, s.interval.upper) {
            assert!(l <= s.prediction && s.prediction <= u);
        }
    }
}

#[test]
fn flipped_bytes_truncation_and_wrong_version_are_refused() {
    let bytes = encoded();
    for at in [
        0,
        20,
        40,
        bytes.len() / 3,
        bytes.len() / 2,
        bytes.len() - 40,
        bytes.len() - 1,
    ] {
        let mut b = bytes.clone();
        b[at] ^= 0x01;
        let err = bundle::decode(Path::new("x.plumb"), &b).expect_err("corruption accepted");
        let text = err.to_string();
        assert!(
            text.contains("x.plumb"),
            "error does not name the file: {text}"
        );
    }
    for len in [0, 10, bytes.len() / 2, bytes.len() - 1] {
        let err =
            bundle::decode(Path::new("x.plumb"), &bytes[..len]).expect_err("truncation accepted");
        assert!(!err.to_string().is_empty());
    }
    let mut b = bytes.clone();
    let at = bundle::format::MAGIC.len() + "format ".len();
    b[at] = b'7';
    let err = bundle::decode(Path::new("x.plumb"), &b).expect_err("wrong version accepted");
    assert!(err.to_string().contains("version 7"), "{err}");
}

#[test]
fn manifest_carries_the_claims_and_cautions() {
    let (_, outcome) = fitted();
    let card = &outcome.card;
    assert_eq!(card.training_rows, 442);
    assert_eq!(card.folds, 5);
    assert!(card.claims.r2.se > 0.0);
    assert!(card.cautions.iter().any(|c| c.contains("regulatory")));
    assert_eq!(card.data_sha256.len(), 64);
}

fn plumbline() -> Command {
    Command::new(env!("CARGO_BIN_EXE_plumbline"))
}

fn write(dir: &Path, name: &str, text: &str) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).expect("temp file");
    p
}

#[test]
fn a_failed_fit_writes_nothing_and_says_where() {
    let dir = tempfile::tempdir().expect("tempdir");
    let mut csv = String::from("id,a,b,y\n");
    for i in 0..60 {
        let a = if i == 17 {
            "abc".to_string()
        } else {
            format!("{}", i as f64 * 0.5)
        };
        csv.push_str(&format!("c{i},{a},{},{}\n", (i % 7) as f64, i as f64));
    }
    let data = write(dir.path(), "bad.csv", &csv);
    let out = dir.path().join("m.plumb");
    let report = dir.path().join("rep");
    let res = plumbline()
        .args(["fit", "--data"])
        .arg(&data)
        .args(["--id", "id", "--target", "y", "--quiet", "--out"])
        .arg(&out)
        .arg("--report")
        .arg(&report)
        .output()
        .expect("runs");
    assert!(!res.status.success());
    let err = String::from_utf8_lossy(&res.stderr);
    // Line 19 of the file: header is line 1, row c17 is line 19.
    assert!(
        err.contains("19") && err.contains("abc") && err.contains('a'),
        "{err}"
    );
    assert!(!out.exists(), "a bundle was written");
    assert!(!report.exists(), "a report was written");
}

#[test]
fn verify_reports_corruption_with_a_non_zero_exit() {
    let dir = tempfile::tempdir().expect("tempdir");
    let good = dir.path().join("good.plumb");
    std::fs::write(&good, encoded()).expect("write");
    let ok = plumbline()
        .args(["bundle", "verify"])
        .arg(&good)
        .output()
        .expect("runs");
    assert!(
        ok.status.success(),
        "{}",
        String::from_utf8_lossy(&ok.stderr)
    );
    let mut bytes = encoded();
    let mid = bytes.len() / 2;
    bytes[mid] ^= 0xff;
    let bad = dir.path().join("bad.plumb");
    std::fs::write(&bad, bytes).expect("write");
    let res = plumbline()
        .args(["bundle", "verify"])
        .arg(&bad)
        .output()
        .expect("runs");
    assert!(!res.status.success());
    assert!(String::from_utf8_lossy(&res.stderr).contains("checksum"));
    let card = plumbline()
        .args(["bundle", "inspect"])
        .arg(&good)
        .output()
        .expect("runs");
    let text = String::from_utf8_lossy(&card.stdout);
    assert!(
        text.contains("claims")
            && text.contains("cautions")
            && text.contains("applicability domain"),
        "{text}"
    );
}
