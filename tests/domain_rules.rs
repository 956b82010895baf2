//! The domain verdict rules on constructed cases, the rules restated
//! against every signal of many random candidates, out-of-fold calibration,
//! persistence of the guard and its refusals of bad input.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use ndarray::{Array1, Array2, Axis, array, concatenate};
use plumbline::domain::{self, DomainGuard, DomainSettings, DomainSignals, Verdict};
use plumbline::space::Standardizer;
use plumbline::validate::Folds;
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;

fn gaussian(rng: &mut Xoshiro256PlusPlus) -> f64 {
    // Box–Muller.
    let u: f64 = rng.gen_range(f64::EPSILON..1.0);
    let v: f64 = rng.gen_range(0.0..1.0);
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
}

/// 300 rows: three correlated Gaussian descriptors in raw units and one
/// 0/1 fingerprint-like bit.
fn training(seed: u64) -> Array2<f64> {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    let mut x = Array2::zeros((300, 4));
    for mut r in x.rows_mut() {
        let a = gaussian(&mut rng);
        r[0] = 10.0 + 2.0 * a;
        r[1] = 5.0 + a + 0.5 * gaussian(&mut rng);
        r[2] = 100.0 + 20.0 * gaussian(&mut rng);
        r[3] = f64::from(u8::from(rng.gen_bool(0.5)));
    }
    x
}

struct Fitted {
    guard: DomainGuard,
    st: Standardizer,
    x_raw: Array2<f64>,
}

fn fitted(x_raw: Array2<f64>, settings: &DomainSettings) -> Fitted {
    let st = Standardizer::fit(x_raw.view());
    let xs = st.transform(x_raw.view());
    let guard = DomainGuard::fit(xs.view(), x_raw.view(), settings).unwrap();
    Fitted { guard, st, x_raw }
}

impl Fitted {
    fn assess(&self, raw: &Array2<f64>) -> Vec<DomainSignals> {
        self.guard
            .assess(self.st.transform(raw.view()).view(), raw.view())
    }

    /// The training row with bit 3 set that lies nearest the centre.
    fn central_with_bit(&self) -> Array1<f64> {
        let xs = self.st.transform(self.x_raw.view());
        let best = (0..xs.nrows())
            .filter(|&i| self.x_raw[[i, 3]] == 1.0)
            .min_by(|&a, &b| {
                let na = xs
                    .row(a)
                    .slice(ndarray::s![..3])
                    .dot(&xs.row(a).slice(ndarray::s![..3]));
                let nb = xs
                    .row(b)
                    .slice(ndarray::s![..3])
                    .dot(&xs.row(b).slice(ndarray::s![..3]));
                na.total_cmp(&nb)
            })
            .unwrap();
        self.x_raw.row(best).to_owned()
    }
}

fn one(row: Array1<f64>) -> Array2<f64> {
    row.insert_axis(Axis(0))
}

#[test]
fn a_central_training_point_is_inside() {
    let f = fitted(training(1), &DomainSettings::default());
    let s = &f.assess(&one(f.central_with_bit()))[0];
    assert_eq!(s.verdict, Verdict::Inside, "{:?}", s.notes);
    assert!(s.notes.is_empty());
    assert!(s.out_of_range.is_empty() && !s.beyond_z_threshold);
}

#[test]
fn one_descriptor_slightly_out_of_range_is_border_and_listed() {
    let f = fitted(training(1), &DomainSettings::default());
    let mut row = f.central_with_bit();
    row[3] = 1.001;
    let s = &f.assess(&one(row))[0];
    assert_eq!(s.verdict, Verdict::Border);
    assert_eq!(s.out_of_range.len(), 1);
    let r = &s.out_of_range[0];
    assert_eq!((r.descriptor, r.value, r.min, r.max), (3, 1.001, 0.0, 1.0));
    assert_eq!(s.notes.len(), 1, "only the range rule fired: {:?}", s.notes);
    assert!(
        s.notes[0].contains("descriptor 3 = 1.001 is outside the training range [0, 1]"),
        "{}",
        s.notes[0]
    );
}

#[test]
fn a_far_point_is_outside_with_its_reasons() {
    let f = fitted(training(1), &DomainSettings::default());
    let mut row = f.central_with_bit();
    row[0] += 60.0; // 30 standard deviations
    let s = &f.assess(&one(row))[0];
    assert_eq!(s.verdict, Verdict::Outside);
    // Typicality bottoms out at 1/(n + 1) (the conformal minimum).
    assert_eq!(s.typicality, 1.0 / 301.0);
    assert!(s.beyond_z_threshold);
    assert!(
        s.notes
            .iter()
            .any(|n| n.contains("below the outside limit")),
        "{:?}",
        s.notes
    );
    assert!(s.notes.iter().any(|n| n.contains("descriptor 0")));
}

#[test]
fn a_point_off_the_training_plane_is_outside_by_its_residual_alone() {
    // Five descriptors that all lie near a plane spanned by two factors.
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(5);
    let mut x = Array2::zeros((400, 5));
    for mut r in x.rows_mut() {
        let (a, b) = (gaussian(&mut rng), gaussian(&mut rng));
        let loadings = [(1.0, 0.0), (0.0, 1.0), (1.0, 1.0), (1.0, -1.0), (0.5, 2.0)];
        for (j, (la, lb)) in loadings.iter().enumerate() {
            r[j] = la * a + lb * b + 0.05 * gaussian(&mut rng);
        }
    }
    let f = fitted(x, &DomainSettings::default());
    assert_eq!(f.guard.pca().n_components(), 2);
    // The centre, pushed along a direction the two factors cannot reach
    // (orthogonal to both loading columns) but inside every range.
    let mut row = Array1::zeros(5);
    let off = [1.0, 1.0, -1.0, 0.0, 0.0];
    for j in 0..5 {
        row[j] = 0.3 * off[j];
    }
    let s = &f.assess(&one(row))[0];
    assert_eq!(s.verdict, Verdict::Outside, "{:?}", s.notes);
    assert!(s.out_of_range.is_empty());
    assert!(s.typicality >= 0.05, "the point is central in PCA space");
    assert_eq!(s.notes.len(), 1, "{:?}", s.notes);
    assert!(s.notes[0].contains("PCA residual") && s.notes[0].contains("outside limit"));
}

#[test]
fn leverage_warning_is_dropped_when_it_exceeds_one() {
    // n = 20 rows and p = 7 components: h* = 3·8/20 = 1.2 (by hand).
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(3);
    let x = Array2::from_shape_fn((20, 7), |_| gaussian(&mut rng));
    let settings = DomainSettings {
        variance_fraction: 1.0,
        ..DomainSettings::default()
    };
    let f = fitted(x, &settings);
    let t = f.guard.thresholds();
    assert_eq!(f.guard.pca().n_components(), 7);
    assert!((t.leverage_warning - 1.2).abs() < 1e-12);
    assert!(!t.leverage_meaningful);
    // All variance kept: Q is zero on training rows and not used.
    assert!(!t.residual_meaningful);
    let far = one(Array1::from_elem(7, 3.0));
    let s = &f.assess(&far)[0];
    assert!(s.leverage > 1.2);
    assert!(
        s.notes.iter().all(|n| !n.contains("leverage")),
        "{:?}",
        s.notes
    );
}

#[test]
fn a_non_finite_candidate_is_outside_with_a_note() {
    let f = fitted(training(2), &DomainSettings::default());
    let mut row = f.central_with_bit();
    row[1] = f64::NAN;
    let s = &f.assess(&one(row))[0];
    assert_eq!(s.verdict, Verdict::Outside);
    assert!(s.knn_distance.is_nan());
    assert!(s.notes[0].contains("not a finite number"));
}

/// The documented rules, restated from the module documentation.
fn rule(s: &DomainSignals, g: &DomainGuard) -> Verdict {
    let (t, set) = (g.thresholds(), g.settings());
    let q_out = t.residual_meaningful && s.pca_residual > t.residual_outside_limit;
    let q_border = t.residual_meaningful && s.pca_residual > t.residual_border_limit;
    if s.typicality < set.typicality_outside || q_out {
        Verdict::Outside
    } else if s.knn_distance > t.z_threshold
        || s.typicality < set.typicality_border
        || (t.leverage_meaningful && s.leverage > t.leverage_warning)
        || q_border
        || !s.out_of_range.is_empty()
    {
        Verdict::Border
    } else {
        Verdict::Inside
    }
}

#[test]
fn every_verdict_follows_the_documented_rules() {
    let f = fitted(training(4), &DomainSettings::default());
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(44);
    // Candidates from the centre to far out, so every rule fires somewhere.
    let mut q = Array2::zeros((600, 4));
    for (i, mut r) in q.rows_mut().into_iter().enumerate() {
        let spread = 0.2 + 4.0 * (i as f64 / 600.0);
        r[0] = 10.0 + 2.0 * spread * gaussian(&mut rng);
        r[1] = 5.0 + spread * gaussian(&mut rng);
        r[2] = 100.0 + 20.0 * spread * gaussian(&mut rng);
        r[3] = f64::from(u8::from(rng.gen_bool(0.5)));
    }
    let signals = f.assess(&q);
    let mut seen = std::collections::BTreeMap::new();
    for s in &signals {
        assert_eq!(s.verdict, rule(s, &f.guard), "{s:?}");
        assert_eq!(
            s.beyond_z_threshold,
            s.knn_distance > f.guard.thresholds().z_threshold
        );
        assert_eq!(s.notes.is_empty(), s.verdict == Verdict::Inside);
        *seen.entry(s.verdict).or_insert(0) += 1;
    }
    assert_eq!(seen.len(), 3, "all three verdicts occur: {seen:?}");
    let p: Vec<f64> = signals.iter().map(|s| s.typicality).collect();
    // Typicality is a p-value: a multiple of 1/(n + 1) in (0, 1].
    for v in p {
        let m = v * 301.0;
        assert!((m - m.round()).abs() < 1e-9 && v > 0.0 && v <= 1.0);
    }
}

#[test]
fn out_of_fold_signals_are_those_of_a_guard_fitted_without_the_fold() {
    let x_raw = training(6);
    let st = Standardizer::fit(x_raw.view());
    let xs = st.transform(x_raw.view());
    let fold_of: Vec<usize> = (0..x_raw.nrows()).map(|i| (i * 7 + i / 3) % 4).collect();
    let folds = Folds { k: 4, fold_of };
    let settings = DomainSettings::default();
    let oof = domain::out_of_fold(xs.view(), x_raw.view(), &folds, &settings).unwrap();
    assert_eq!(oof.len(), x_raw.nrows());
    for fold in 0..4 {
        let (train, test) = (folds.train_rows(fold), folds.test_rows(fold));
        let g = DomainGuard::fit(
            xs.select(Axis(0), &train).view(),
            x_raw.select(Axis(0), &train).view(),
            &settings,
        )
        .unwrap();
        let want = g.assess(
            xs.select(Axis(0), &test).view(),
            x_raw.select(Axis(0), &test).view(),
        );
        for (row, w) in test.iter().zip(&want) {
            assert_eq!(&oof[*row], w, "row {row} of fold {fold}");
        }
    }
    // Measured out-of-fold, training rows look like new points: typicality
    // is roughly uniform, so about 5% fall below 0.05 (wide slack: ±4%).
    let low = oof.iter().filter(|s| s.typicality < 0.05).count() as f64 / 300.0;
    assert!(
        (0.01..=0.09).contains(&low),
        "share with typicality < 0.05: {low}"
    );
}

#[test]
fn out_of_fold_refuses_a_bad_fold_design() {
    let x_raw = training(6);
    let xs = Standardizer::fit(x_raw.view()).transform(x_raw.view());
    let s = DomainSettings::default();
    let short = Folds {
        k: 2,
        fold_of: vec![0; 10],
    };
    assert_eq!(
        domain::out_of_fold(xs.view(), x_raw.view(), &short, &s),
        Err(domain::Error::FoldDesign {
            rows: 300,
            assigned: 10
        })
    );
    let mut fold_of = vec![0; 300];
    fold_of[17] = 5;
    let wrong = Folds { k: 2, fold_of };
    assert_eq!(
        domain::out_of_fold(xs.view(), x_raw.view(), &wrong, &s),
        Err(domain::Error::FoldIndex {
            row: 17,
            fold: 5,
            k: 2
        })
    );
    // A fold whose training rows are too few for k neighbours.
    let mut fold_of = vec![1; 300];
    fold_of[..297].iter_mut().for_each(|f| *f = 0);
    let lopsided = Folds { k: 2, fold_of };
    let err = domain::out_of_fold(xs.view(), x_raw.view(), &lopsided, &s).unwrap_err();
    assert!(matches!(err, domain::Error::Fold { fold: 0, .. }), "{err}");
    assert!(
        err.to_string().contains("at least 6 training rows"),
        "{err}"
    );
}

#[test]
fn a_guard_rebuilt_from_its_state_answers_the_same() {
    let f = fitted(training(7), &DomainSettings::default());
    let rebuilt = DomainGuard::from_state(f.guard.state().clone()).unwrap();
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(70);
    let q = Array2::from_shape_fn((50, 4), |(_, j)| f.x_raw[[0, j]] + 2.0 * gaussian(&mut rng));
    let qs = f.st.transform(q.view());
    assert_eq!(
        f.guard.assess(qs.view(), q.view()),
        rebuilt.assess(qs.view(), q.view())
    );
    assert_eq!(
        f.guard.neighbours(qs.row(3), 7),
        rebuilt.neighbours(qs.row(3), 7)
    );
}

#[test]
fn an_inconsistent_state_is_refused() {
    let f = fitted(training(7), &DomainSettings::default());
    let mut s = f.guard.state().clone();
    s.loo_distances.swap(0, 299);
    let err = DomainGuard::from_state(s).unwrap_err();
    assert!(err.to_string().contains("not sorted"), "{err}");
    let mut s = f.guard.state().clone();
    s.range_max.pop();
    assert!(matches!(
        DomainGuard::from_state(s),
        Err(domain::Error::State { .. })
    ));
    let mut s = f.guard.state().clone();
    s.training_scores = concatenate(
        Axis(0),
        &[s.training_scores.view(), s.training_scores.view()],
    )
    .unwrap();
    assert!(matches!(
        DomainGuard::from_state(s),
        Err(domain::Error::State { .. })
    ));
    let mut s = f.guard.state().clone();
    s.pca.components[[0, 0]] += 0.5;
    assert!(matches!(
        DomainGuard::from_state(s),
        Err(domain::Error::Pca(_))
    ));
}

#[test]
fn bad_training_input_and_settings_are_refused_with_the_bad_value() {
    let x = array![
        [1.0, 2.0],
        [2.0, 1.0],
        [3.0, 5.0],
        [4.0, 4.0],
        [0.0, 1.0],
        [2.0, 2.0]
    ];
    let s = DomainSettings::default();
    let err = DomainGuard::fit(
        x.slice(ndarray::s![..5, ..]),
        x.slice(ndarray::s![..5, ..]),
        &s,
    )
    .unwrap_err();
    assert_eq!(
        err,
        domain::Error::TooFewRows {
            rows: 5,
            needed: 6,
            k: 5
        }
    );
    let mut bad = x.clone();
    bad[[3, 1]] = f64::INFINITY;
    assert!(matches!(
        DomainGuard::fit(x.view(), bad.view(), &s),
        Err(domain::Error::NonFinite {
            matrix: "raw",
            row: 3,
            column: 1,
            ..
        })
    ));
    assert!(matches!(
        DomainGuard::fit(x.view(), x.slice(ndarray::s![.., ..1]), &s),
        Err(domain::Error::ShapeMismatch { .. })
    ));
    let wrong = DomainSettings {
        typicality_outside: 0.1,
        ..s.clone()
    };
    let err = DomainGuard::fit(x.view(), x.view(), &wrong).unwrap_err();
    assert!(
        matches!(
            err,
            domain::Error::Setting {
                name: "domain.typicality_outside",
                ..
            }
        ),
        "{err}"
    );
    let wrong = DomainSettings {
        max_components: 20,
        ..s
    };
    let err = DomainGuard::fit(x.view(), x.view(), &wrong).unwrap_err();
    assert!(
        err.to_string().contains("domain.max_components = 20"),
        "{err}"
    );
}

#[test]
fn settings_default_when_absent_and_reject_unknown_keys() {
    let s: DomainSettings = serde_json::from_str("{}").unwrap();
    assert_eq!(s, DomainSettings::default());
    assert_eq!((s.k, s.z, s.max_components), (5, 0.5, 10));
    let s: DomainSettings = serde_json::from_str(r#"{"k": 7}"#).unwrap();
    assert_eq!(s.k, 7);
    assert!(serde_json::from_str::<DomainSettings>(r#"{"neighbours": 7}"#).is_err());
}
