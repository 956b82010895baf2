//! Property tests of the readers of outside input: the CSV table reader,
//! the bundle reader and the request validator. Whatever the bytes or
//! names, each answers with a value or an error, never a panic, and a value
//! it returns keeps the promises its type makes.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::collections::HashMap;
use std::path::Path;
use std::sync::OnceLock;

use ndarray::{Array1, Array2};
use plumbline::bundle;
use plumbline::data::{self, Table, TableSpec};
use plumbline::fit::{FitOptions, SplitSpec};
use plumbline::models::Family;
use plumbline::service::batch::{self, CandidateIn, KeepDescriptors};
use plumbline::service::{Error as ServiceError, Scorer, Settings};
use proptest::prelude::*;
use rand::{Rng, SeedableRng};

// ---------------------------------------------------------------- CSV

fn spec() -> TableSpec {
    TableSpec {
        id: "id".into(),
        target: Some("y".into()),
        ..TableSpec::default()
    }
}

/// Cells chosen to hit the reader's edge cases: missing markers, values
/// beyond f64's range, non-numbers, quoting, and plain numbers.
fn cell() -> impl Strategy<Value = String> {
    prop_oneof![
        Just(String::new()),
        Just("NA".to_string()),
        Just("nan".to_string()),
        Just("-inf".to_string()),
        Just("1e400".to_string()),
        Just("4.9e-324".to_string()),
        Just("abc".to_string()),
        Just("\"1,5\"".to_string()),
        Just("\"".to_string()),
        Just(" 2 ".to_string()),
        any::<f64>().prop_map(|v| v.to_string()),
        (-3i32..3).prop_map(|v| v.to_string()),
        "[a-z0-9,;\"\\n\\r ]{0,6}",
    ]
}

fn header_name() -> impl Strategy<Value = String> {
    prop_oneof![
        Just("id".to_string()),
        Just("y".to_string()),
        Just("d1".to_string()),
        Just("d2".to_string()),
        Just(String::new()),
        "[a-z ]{0,4}",
    ]
}

fn csv_text() -> impl Strategy<Value = Vec<u8>> {
    (
        prop::collection::vec(header_name(), 0..6),
        prop::collection::vec(prop::collection::vec(cell(), 0..7), 0..12),
        prop::sample::select(vec![",", ";", "\t"]),
        prop::sample::select(vec!["\n", "\r\n"]),
    )
        .prop_map(|(header, rows, sep, eol)| {
            let mut text = header.join(sep);
            for r in rows {
                text.push_str(eol);
                text.push_str(&r.join(sep));
            }
            text.into_bytes()
        })
}

/// What a table returned by the reader promises.
fn check_table(t: &Table) -> Result<(), TestCaseError> {
    prop_assert_eq!(t.x.nrows(), t.ids.len());
    prop_assert_eq!(t.x.ncols(), t.descriptor_names.len());
    prop_assert!(
        t.x.iter().all(|v| v.is_finite()),
        "descriptors are all finite"
    );
    if let Some(y) = &t.y {
        prop_assert_eq!(y.len(), t.ids.len());
        prop_assert!(y.iter().all(|v| v.is_finite()), "the target is finite");
    }
    Ok(())
}

proptest! {
    #[test]
    fn csv_reader_never_panics_on_random_bytes(bytes in prop::collection::vec(any::<u8>(), 0..600)) {
        if let Ok(t) = data::read_table_from_bytes(&bytes, &spec()) {
            check_table(&t)?;
        }
    }

    #[test]
    fn csv_reader_never_panics_on_table_shaped_text(
        bytes in csv_text(),
        drop_incomplete in any::<bool>(),
        listed in any::<bool>(),
    ) {
        let mut s = spec();
        s.drop_incomplete = drop_incomplete;
        if listed {
            s.descriptors = Some(vec!["d1".into(), "d2".into()]);
        }
        if let Ok(t) = data::read_table_from_bytes(&bytes, &s) {
            check_table(&t)?;
        }
    }
}

#[test]
fn a_well_formed_table_is_read() {
    // Guards the properties above: a reader that always failed would pass them.
    let text = b"id,y,d1,d2\na,1.0,0.5,2\nb,2.0,0.25,3\nc,3.5,-1,4\n";
    let t = data::read_table_from_bytes(text, &spec()).expect("a well-formed table");
    assert_eq!(t.ids, vec!["a", "b", "c"]);
    assert_eq!(t.descriptor_names, vec!["d1", "d2"]);
}

// ---------------------------------------------------------------- bundles

const N_DESCRIPTORS: usize = 3;

fn names() -> Vec<String> {
    (0..N_DESCRIPTORS).map(|j| format!("d{j}")).collect()
}

/// A real, small bundle: fitted once per test binary.
fn valid_bundle() -> &'static [u8] {
    static BYTES: OnceLock<Vec<u8>> = OnceLock::new();
    BYTES.get_or_init(|| {
        let n = 60;
        let mut rng = rand_xoshiro::Xoshiro256PlusPlus::seed_from_u64(9);
        let x = Array2::from_shape_fn((n, N_DESCRIPTORS), |_| rng.gen_range(-1.0..1.0));
        let y: Array1<f64> = x
            .rows()
            .into_iter()
            .map(|r| r[0] - 0.5 * r[1] + rng.gen_range(-0.1..0.1))
            .collect();
        let table = Table {
            ids: (0..n).map(|i| format!("t{i}")).collect(),
            descriptor_names: names(),
            x,
            y: Some(y),
            groups: None,
            times: None,
            dropped_constant: Vec::new(),
            dropped_incomplete: 0,
            sha256: format!("{:064x}", 9),
        };
        let mut options = FitOptions::new("props", "activity");
        options.families = vec![Family::Ridge];
        options.split = SplitSpec::Random;
        options.folds = 5;
        options.inner_folds = 3;
        options.permutations = 2;
        options.seed = 9;
        let outcome = plumbline::fit::fit(&table, "props.csv", &options, &|_, _, _| {})
            .expect("fit the property-test model");
        bundle::encode(
            &outcome.model,
            &outcome.card,
            &table.ids,
            &outcome.training_y,
        )
    })
}

fn model() -> &'static bundle::Bundle {
    static MODEL: OnceLock<bundle::Bundle> = OnceLock::new();
    MODEL.get_or_init(|| {
        bundle::decode(Path::new("props.plumb"), valid_bundle()).expect("the valid bundle reads")
    })
}

/// Ways a bundle file gets damaged: bit flips, cut short, bytes inserted
/// or overwritten.
#[derive(Clone, Debug)]
enum Damage {
    Flip { at: usize, bit: u8 },
    Truncate { to: usize },
    Insert { at: usize, bytes: Vec<u8> },
    Overwrite { at: usize, bytes: Vec<u8> },
}

fn damage() -> impl Strategy<Value = Damage> {
    // Positions are fractions of the length, so every part of the file is hit.
    let pos = 0.0f64..1.0;
    prop_oneof![
        (pos.clone(), 0u8..8).prop_map(|(f, bit)| Damage::Flip {
            at: f.to_bits() as usize,
            bit
        }),
        pos.clone().prop_map(|f| Damage::Truncate {
            to: f.to_bits() as usize
        }),
        (pos.clone(), prop::collection::vec(any::<u8>(), 1..16)).prop_map(|(f, bytes)| {
            Damage::Insert {
                at: f.to_bits() as usize,
                bytes,
            }
        }),
        (pos, prop::collection::vec(any::<u8>(), 1..16)).prop_map(|(f, bytes)| Damage::Overwrite {
            at: f.to_bits() as usize,
            bytes
        }),
    ]
}

/// `at` carries the bits of a fraction in [0, 1).
fn place(at: usize, len: usize) -> usize {
    let f = f64::from_bits(at as u64);
    ((f * len as f64) as usize).min(len.saturating_sub(1))
}

fn apply(d: &Damage, valid: &[u8]) -> Vec<u8> {
    let mut b = valid.to_vec();
    match d {
        Damage::Flip { at, bit } => {
            let i = place(*at, b.len());
            b[i] ^= 1 << bit;
        }
        Damage::Truncate { to } => b.truncate(place(*to, b.len())),
        Damage::Insert { at, bytes } => {
            let i = place(*at, b.len());
            b.splice(i..i, bytes.iter().copied());
        }
        Damage::Overwrite { at, bytes } => {
            let i = place(*at, b.len());
            for (k, v) in bytes.iter().enumerate() {
                if let Some(slot) = b.get_mut(i + k) {
                    *slot = *v;
                }
            }
        }
    }
    b
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(200))]

    #[test]
    fn bundle_reader_never_panics_on_damaged_bundles(d in damage()) {
        let bytes = apply(&d, valid_bundle());
        let got = bundle::decode(Path::new("damaged.plumb"), &bytes);
        // The bundle is checksummed: a damaged one that still reads must
        // be byte for byte the original.
        if got.is_ok() {
            prop_assert_eq!(&bytes[..], valid_bundle(), "{:?} was accepted", d);
        }
    }

    #[test]
    fn bundle_reader_never_panics_on_random_bytes(
        tail in prop::collection::vec(any::<u8>(), 0..400),
        with_magic in any::<bool>(),
    ) {
        let mut bytes = if with_magic { bundle::format::MAGIC.to_vec() } else { Vec::new() };
        bytes.extend(tail);
        prop_assert!(bundle::decode(Path::new("random.plumb"), &bytes).is_err());
    }
}

#[test]
fn the_undamaged_bundle_reads() {
    assert_eq!(model().model.info.descriptor_names, names());
}

// ---------------------------------------------------------------- requests

fn descriptor_name() -> impl Strategy<Value = String> {
    prop_oneof![
        3 => (0..N_DESCRIPTORS + 1).prop_map(|j| format!("d{j}")),
        1 => ".{0,4}",
    ]
}

fn value() -> impl Strategy<Value = f64> {
    prop_oneof![
        4 => -1.0f64..1.0,
        1 => any::<f64>(),
        1 => prop::sample::select(vec![
            f64::NAN, f64::INFINITY, f64::NEG_INFINITY, f64::MAX, -f64::MAX,
            f64::MIN_POSITIVE, f64::from_bits(1), 0.0, -0.0, 1e300,
        ]),
    ]
}

fn candidate() -> impl Strategy<Value = (String, Vec<f64>)> {
    (
        prop_oneof![Just(String::new()), "[a-c]{1,2}", ".{0,8}"],
        prop_oneof![
            4 => prop::collection::vec(value(), N_DESCRIPTORS),
            1 => prop::collection::vec(value(), 0..N_DESCRIPTORS + 3),
        ],
    )
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(200))]

    #[test]
    fn plan_accepts_exactly_a_permutation_of_the_model_names(
        sent in prop_oneof![
            1 => Just(names()),
            1 => Just(names()).prop_shuffle(),
            2 => prop::collection::vec(descriptor_name(), 0..6),
        ],
    ) {
        let m = &model().model;
        match batch::plan(m, 0.9, &sent) {
            Ok(plan) => {
                let expected = &m.info().descriptor_names;
                match &plan.order {
                    None => prop_assert!(sent.is_empty() || &sent == expected),
                    Some(order) => {
                        for (j, &i) in order.iter().enumerate() {
                            prop_assert_eq!(&sent[i], &expected[j]);
                        }
                    }
                }
            }
            Err(ServiceError::DescriptorNames { missing, unexpected, duplicated, .. }) => {
                prop_assert!(!missing.is_empty() || !unexpected.is_empty() || !duplicated.is_empty());
            }
            Err(other) => prop_assert!(false, "unexpected error {other}"),
        }
    }

    #[test]
    fn confidence_is_in_range_or_an_error(requested in value(), server in value()) {
        if let Ok(c) = batch::confidence(requested, server, 0.9) {
            prop_assert!(requested == 0.0 || batch::CONFIDENCE_RANGE.contains(&c));
        }
    }

    #[test]
    fn every_candidate_gets_one_outcome_and_bad_ones_are_rejected(
        cands in prop::collection::vec(candidate(), 0..20),
        shuffled in any::<bool>(),
    ) {
        let m = &model().model;
        let sent = if shuffled { vec!["d2".into(), "d0".into(), "d1".into()] } else { Vec::new() };
        let plan = batch::plan(m, 0.9, &sent).map_err(|e| TestCaseError::fail(e.to_string()))?;
        let input: Vec<CandidateIn<'_>> = cands
            .iter()
            .map(|(id, d)| CandidateIn { id, descriptors: d })
            .collect();
        let policy = Settings::default().policy.policy();
        let mut seen = HashMap::new();
        let scored = batch::score_batch(
            m, &plan, &input, &policy, KeepDescriptors::FlaggedOnly, &mut seen, 0,
        ).map_err(|e| TestCaseError::fail(e.to_string()))?;
        prop_assert_eq!(scored.outcomes.len(), cands.len());
        let std = &model().model.standardizer;
        let mut first: HashMap<&str, usize> = HashMap::new();
        for (i, ((id, d), o)) in cands.iter().zip(&scored.outcomes).enumerate() {
            let duplicate = first.contains_key(id.as_str());
            first.entry(id.as_str()).or_insert(i);
            // Finite values so far out that standardising overflows cannot
            // be scored either (e.g. f64::MAX with a scale below 1).
            let overflows = d.len() == N_DESCRIPTORS && d.iter().enumerate().any(|(i, v)| {
                let j = if shuffled { [2, 0, 1][i] } else { i };
                !((v - std.mean[j]) / std.scale[j]).is_finite()
            });
            let bad = id.is_empty()
                || duplicate
                || d.len() != N_DESCRIPTORS
                || d.iter().any(|v| !v.is_finite())
                || overflows;
            prop_assert_eq!(
                o.status == plumbline::audit::CandidateStatus::Rejected,
                bad,
                "candidate {} ({:?}, {:?}): {:?} {}", i, id, d, o.status, o.reason
            );
            if o.rank > 0 {
                let p = o.score.as_ref().map(|s| s.prediction);
                prop_assert!(p.is_some_and(f64::is_finite), "ranked with prediction {:?}", p);
            }
        }
    }
}
