//! Fold designs: sizes, seeding, and the rule that matters most — cluster
//! and group folds never split a cluster or group, at either level of
//! nested cross-validation.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::collections::HashMap;

use ndarray::{Array1, Array2, ArrayView2};
use plumbline::models::{Family, Grid, GridPredictions, Hyper};
use plumbline::validate::{Error, FoldDesign, Folds, NestedSettings, default_n_clusters, validate};
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;

fn assert_whole(labels: &[usize], folds: &Folds) {
    let mut fold_of_label: HashMap<usize, usize> = HashMap::new();
    for (i, &l) in labels.iter().enumerate() {
        let f = *fold_of_label.entry(l).or_insert(folds.fold_of[i]);
        assert_eq!(f, folds.fold_of[i], "label {l} is split across folds");
    }
}

fn assert_partition(folds: &Folds, n: usize) {
    assert_eq!(folds.fold_of.len(), n);
    assert!(folds.fold_of.iter().all(|&f| f < folds.k));
    assert!(folds.sizes().iter().all(|&s| s > 0), "an empty fold");
}

/// `blobs` well-separated Gaussian-ish blobs of `per` points in 5-D.
fn blobs(blobs: usize, per: usize, seed: u64) -> (Array2<f64>, Vec<usize>) {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    let centres: Vec<Vec<f64>> = (0..blobs)
        .map(|_| (0..5).map(|_| rng.gen_range(-50.0..50.0)).collect())
        .collect();
    let truth: Vec<usize> = (0..blobs * per).map(|i| i / per).collect();
    let x = Array2::from_shape_fn((blobs * per, 5), |(i, j)| {
        centres[truth[i]][j] + rng.gen_range(-1.0..1.0)
    });
    (x, truth)
}

#[test]
fn random_folds_are_seeded_and_differ_in_size_by_at_most_one() {
    for (n, k) in [(10, 3), (101, 5), (7, 7)] {
        let f = Folds::random(n, k, 42).unwrap();
        assert_partition(&f, n);
        let sizes = f.sizes();
        let (lo, hi) = (sizes.iter().min().unwrap(), sizes.iter().max().unwrap());
        assert!(hi - lo <= 1, "sizes {sizes:?}");
        assert_eq!(f, Folds::random(n, k, 42).unwrap(), "same seed, same folds");
    }
    assert_ne!(
        Folds::random(100, 5, 1).unwrap(),
        Folds::random(100, 5, 2).unwrap()
    );
    assert_eq!(
        Folds::random(3, 4, 0),
        Err(Error::MoreFoldsThanRows { k: 4, n: 3 })
    );
    assert_eq!(Folds::random(3, 1, 0), Err(Error::TooFewFolds { k: 1 }));
}

#[test]
fn group_folds_never_split_a_group_and_balance_greedily() {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(9);
    for trial in 0..20 {
        let n_groups = rng.gen_range(5..30);
        let labels: Vec<usize> = (0..200).map(|_| rng.gen_range(0..n_groups)).collect();
        let k = rng.gen_range(2..=5);
        let f = Folds::groups(&labels, k, trial).unwrap();
        assert_partition(&f, labels.len());
        assert_whole(&labels, &f);
    }
    // By hand: groups of 5, 4, 3, 2, 2 rows into 2 folds, largest first into
    // the smaller fold: 5→A, 4→B, 3→B (4<5), 2→A (5<7), 2→A or B (7=7, the
    // lower index): A = 5+2+2 = 9, B = 4+3 = 7, whatever the seed.
    let labels: Vec<&str> = [
        ["a"; 5].as_slice(),
        &["b"; 4],
        &["c"; 3],
        &["d"; 2],
        &["e"; 2],
    ]
    .concat();
    let f = Folds::groups(&labels, 2, 0).unwrap();
    let mut sizes = f.sizes();
    sizes.sort_unstable();
    assert_eq!(sizes, [7, 9]);
    assert_eq!(f.fold_of[0], f.fold_of[12], "a and d share a fold");
    assert_eq!(f.fold_of[0], f.fold_of[14], "a and e share a fold");
}

#[test]
fn fewer_groups_than_folds_is_an_error_naming_both_numbers() {
    let labels = ["s1", "s1", "s2", "s2", "s3", "s3"];
    let err = Folds::groups(&labels, 5, 0).unwrap_err();
    assert_eq!(
        err,
        Error::TooFewGroups {
            groups: 3,
            folds: 5,
            what: "groups"
        }
    );
    assert!(
        err.to_string().starts_with("only 3 groups for 5 folds"),
        "{err}"
    );
    let design = FoldDesign::groups(&labels);
    assert!(design.folds(&[0, 1, 2, 3, 4, 5], 4, 0).is_err());
}

#[test]
fn kmeans_recovers_well_separated_blobs_and_keeps_them_whole() {
    // Six blobs far apart (spread ±1 around centres drawn in ±50): any
    // correct k-means with six clusters finds exactly the generating blobs.
    let (x, truth) = blobs(6, 15, 3);
    let (folds, labels) = Folds::cluster(x.view(), 3, 11, Some(6)).unwrap();
    let mut label_of_blob: HashMap<usize, usize> = HashMap::new();
    for (&t, &l) in truth.iter().zip(&labels) {
        assert_eq!(*label_of_blob.entry(t).or_insert(l), l, "blob {t} split");
    }
    let mut distinct: Vec<usize> = label_of_blob.values().copied().collect();
    distinct.sort_unstable();
    distinct.dedup();
    assert_eq!(distinct.len(), 6, "each blob its own cluster");
    assert_whole(&labels, &folds);
    assert_eq!(folds.sizes(), [30, 30, 30], "two whole blobs per fold");
    let again = Folds::cluster(x.view(), 3, 11, Some(6)).unwrap();
    assert_eq!(again.1, labels, "seeded");
}

#[test]
fn cluster_folds_with_the_default_cluster_count_never_split_a_cluster() {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(4);
    let x = Array2::from_shape_fn((300, 8), |_| rng.gen_range(-1.0..1.0));
    let (folds, labels) = Folds::cluster(x.view(), 5, 2, None).unwrap();
    assert_partition(&folds, 300);
    assert_whole(&labels, &folds);
    let distinct = labels
        .iter()
        .collect::<std::collections::HashSet<_>>()
        .len();
    assert!(distinct <= default_n_clusters(300, 5) && distinct >= 5);
}

#[test]
fn the_default_cluster_count_follows_its_documented_rule() {
    // min(⌊n/5⌋, max(5K, 25)), at least K, at most n.
    assert_eq!(default_n_clusters(2000, 5), 25);
    assert_eq!(default_n_clusters(2000, 10), 50);
    assert_eq!(default_n_clusters(60, 5), 12);
    assert_eq!(default_n_clusters(12, 5), 5);
    assert_eq!(default_n_clusters(3, 5), 3);
}

#[test]
fn too_few_clusters_for_the_folds_is_an_error() {
    let (x, _) = blobs(2, 10, 1);
    let err = Folds::cluster(x.view(), 5, 0, Some(3)).unwrap_err();
    assert!(matches!(
        err,
        Error::TooFewGroups {
            groups: 3,
            folds: 5,
            what: "clusters"
        }
    ));
    let err = Folds::cluster(x.view(), 2, 0, Some(30)).unwrap_err();
    assert_eq!(
        err,
        Error::MoreClustersThanRows {
            clusters: 30,
            n: 20
        }
    );
}

#[test]
fn inner_cluster_folds_reuse_the_outer_labels() {
    let (x, _) = blobs(12, 10, 8);
    let design = FoldDesign::clusters(x.view(), 3, 5, Some(12)).unwrap();
    let FoldDesign::Cluster { labels } = &design else {
        panic!("a cluster design");
    };
    let all: Vec<usize> = (0..x.nrows()).collect();
    let outer = design.folds(&all, 3, 5).unwrap();
    assert_whole(labels, &outer);
    for f in 0..3 {
        let train = outer.train_rows(f);
        let inner = design.folds(&train, 3, 99).unwrap();
        assert_partition(&inner, train.len());
        let sub: Vec<usize> = train.iter().map(|&r| labels[r]).collect();
        assert_whole(&sub, &inner);
    }
}

#[test]
fn time_folds_are_contiguous_blocks_sized_like_numpy_array_split() {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(2);
    let times: Vec<f64> = (0..10).map(|_| rng.gen_range(0.0..100.0)).collect();
    let f = Folds::time_order(&times, 3).unwrap();
    // numpy.array_split of 10 into 3 gives sections of 4, 3, 3.
    assert_eq!(f.sizes(), [4, 3, 3]);
    for fold in 0..2 {
        let last = f
            .test_rows(fold)
            .iter()
            .map(|&i| times[i])
            .fold(f64::MIN, f64::max);
        let next = f
            .test_rows(fold + 1)
            .iter()
            .map(|&i| times[i])
            .fold(f64::MAX, f64::min);
        assert!(
            last < next,
            "block {fold} ends after block {} starts",
            fold + 1
        );
    }
}

#[test]
fn time_folds_keep_equal_times_together() {
    let times = [1.0, 1.0, 2.0, 2.0, 2.0, 3.0, 3.0, 4.0, 5.0];
    let f = Folds::time_order(&times, 3).unwrap();
    // Cuts after 3 and 6 rows; the first falls inside the 2.0 tie and moves
    // past it: blocks {1,1,2,2,2}, {3,3,4}, {5}.
    assert_eq!(f.fold_of, [0, 0, 0, 0, 0, 1, 1, 1, 2]);
    let err = Folds::time_order(&[1.0, 1.0, 1.0, 2.0], 3).unwrap_err();
    assert_eq!(
        err,
        Error::TooFewDistinctTimes {
            distinct: 2,
            folds: 3
        }
    );
}

#[test]
fn designs_split_subsets_of_rows_the_same_way() {
    let times: Vec<f64> = (0..20).map(|i| (19 - i) as f64).collect();
    let design = FoldDesign::Time {
        times: times.clone(),
    };
    let rows: Vec<usize> = (0..20).filter(|r| r % 3 != 0).collect();
    let f = design.folds(&rows, 2, 0).unwrap();
    let sub: Vec<f64> = rows.iter().map(|&r| times[r]).collect();
    assert_eq!(f, Folds::time_order(&sub, 2).unwrap());
    let r = FoldDesign::Random.folds(&rows, 4, 3).unwrap();
    assert_eq!(r, Folds::random(rows.len(), 4, 3).unwrap());
    assert_eq!(FoldDesign::Random.name(), "random");
    assert_eq!(design.name(), "time");
}

#[test]
fn an_inner_level_without_enough_groups_says_which_outer_fold() {
    // Six groups into 3 outer folds leave 4 groups of training rows per
    // outer fold: too few for 5 inner folds.
    let labels: Vec<String> = (0..60).map(|i| format!("g{}", i % 6)).collect();
    let design = FoldDesign::groups(&labels);
    let x = Array2::from_shape_fn((60, 2), |(i, j)| (i * (j + 1)) as f64);
    let y = Array1::from_shape_fn(60, |i| i as f64);
    let settings = NestedSettings {
        k_outer: 3,
        k_inner: 5,
        ..Default::default()
    };
    let never =
        |_: &Grid, _: ArrayView2<f64>, _: ArrayView2<f64>, _: ArrayView2<f64>| -> GridPredictions {
            panic!("no model is fitted when the folds cannot be made")
        };
    let grid = Grid {
        family: Family::Ridge,
        points: vec![Hyper::Ridge { alpha: 1.0 }],
    };
    let err = validate(
        x.view(),
        y.view(),
        &design,
        &[grid],
        &settings,
        &never,
        &|_, _, _| {},
    )
    .unwrap_err();
    match &err {
        Error::InnerFolds { source, .. } => assert_eq!(
            **source,
            Error::TooFewGroups {
                groups: 4,
                folds: 5,
                what: "groups"
            }
        ),
        other => panic!("expected InnerFolds, got {other:?}"),
    }
    assert!(
        err.to_string().contains("only 4 groups for 5 folds"),
        "{err}"
    );
}
