//! Every bad input the table reader knows gives its own error, naming the
//! bad value and where it was, and no table; good inputs read as documented.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::io::Write;

use plumbline::data::{
    ColumnRole, Error, TableSpec, check_enough_rows, read_for_model, read_for_model_from_bytes,
    read_table, read_table_from_bytes, read_table_from_reader,
};

fn spec() -> TableSpec {
    TableSpec {
        id: "id".into(),
        target: Some("y".into()),
        ..TableSpec::default()
    }
}

fn read(csv: &str, spec: &TableSpec) -> Result<plumbline::data::Table, Error> {
    read_table_from_bytes(csv.as_bytes(), spec)
}

#[test]
fn a_good_table_reads_every_numeric_column_as_a_descriptor() {
    let csv = "id,name,a,y,b\nm1,aspirin,1.5,0.1,3\nm2,caffeine,2.5,0.2,-1e-2\nm3,x,3,0.3,7\n";
    let t = read(csv, &spec()).unwrap();
    assert_eq!(t.ids, ["m1", "m2", "m3"]);
    assert_eq!(
        t.descriptor_names,
        ["a", "b"],
        "text column 'name' is skipped"
    );
    assert_eq!(t.x.row(1).to_vec(), vec![2.5, -0.01]);
    assert_eq!(t.y.unwrap().to_vec(), vec![0.1, 0.2, 0.3]);
    assert_eq!((t.groups, t.times), (None, None));
    assert!(t.dropped_constant.is_empty());
    assert_eq!(t.sha256.len(), 64);
}

#[test]
fn a_non_numeric_cell_names_its_line_column_and_value() {
    let csv = "id,a,y\nm1,1,0.1\nm2,1.2.3,0.2\nm3,3,0.3\n";
    match read(csv, &spec()) {
        Err(Error::NotNumeric {
            line,
            column,
            role,
            value,
        }) => {
            assert_eq!((line, column.as_str(), value.as_str()), (3, "a", "1.2.3"));
            assert_eq!(role, ColumnRole::Descriptor);
        }
        other => panic!("expected NotNumeric, got {other:?}"),
    }
    // The target column is held to the same rule.
    let csv = "id,a,y\nm1,1,0.1\nm2,2,high\n";
    let err = read(csv, &spec()).unwrap_err();
    assert!(matches!(
        err,
        Error::NotNumeric {
            line: 3,
            role: ColumnRole::Target,
            ..
        }
    ));
    assert!(
        err.to_string()
            .contains("line 3, target column 'y': 'high'"),
        "{err}"
    );
}

#[test]
fn line_numbers_count_physical_lines_across_quoted_newlines() {
    let csv = "id,note,a,y\nm1,\"two\nlines\",1,0.1\nm2,ok,oops,0.2\n";
    let err = read(csv, &spec()).unwrap_err();
    assert!(matches!(err, Error::NotNumeric { line: 4, .. }), "{err:?}");
}

#[test]
fn missing_values_list_the_first_ten_and_count_them_all() {
    let mut csv = String::from("id,a,b,y\n");
    for i in 0..12 {
        // Rows 0..6 miss 'a' and 'b'; the rest are complete.
        let (a, b) = if i < 6 { ("NA", "") } else { ("1", "2") };
        csv.push_str(&format!("m{i},{a},{b},{}\n", i as f64 + 0.5));
    }
    match read(&csv, &spec()) {
        Err(Error::Incomplete { total, first }) => {
            assert_eq!(total, 12);
            assert_eq!(first.len(), 10);
            assert_eq!((first[0].line, first[0].column.as_str()), (2, "a"));
            assert_eq!((first[1].line, first[1].column.as_str()), (2, "b"));
            assert_eq!(first[0].value, "NA");
            assert_eq!(first[9].line, 6);
        }
        other => panic!("expected Incomplete, got {other:?}"),
    }
}

#[test]
fn non_finite_values_count_as_missing_in_every_role() {
    let s = TableSpec {
        group: Some("g".into()),
        time: Some("t".into()),
        ..spec()
    };
    let csv = "id,g,t,a,y\nm1,A,1,inf,1\nm2,,2,1,2\nm3,B,NaN,1,3\nm4,B,4,2,-Infinity\nm5,A,5,3,5\n";
    match read(csv, &s) {
        Err(Error::Incomplete { total, first }) => {
            assert_eq!(total, 4);
            let where_: Vec<(u64, &str)> =
                first.iter().map(|c| (c.line, c.column.as_str())).collect();
            assert_eq!(where_, [(2, "a"), (3, "g"), (4, "t"), (5, "y")]);
        }
        other => panic!("expected Incomplete, got {other:?}"),
    }
}

#[test]
fn drop_incomplete_drops_and_counts_those_rows() {
    let s = TableSpec {
        drop_incomplete: true,
        ..spec()
    };
    let csv = "id,a,b,y\nm1,1,2,0.1\nm2,,2,0.2\nm3,3,1,NA\nm4,4,5,0.4\n";
    let t = read(csv, &s).unwrap();
    assert_eq!(t.ids, ["m1", "m4"]);
    assert_eq!(t.dropped_incomplete, 2);
    assert_eq!(t.x.row(1).to_vec(), vec![4.0, 5.0]);
    assert_eq!(t.y.unwrap().to_vec(), vec![0.1, 0.4]);
}

#[test]
fn dropping_every_row_is_an_error_that_says_so() {
    let s = TableSpec {
        drop_incomplete: true,
        ..spec()
    };
    let err = read("id,a,y\nm1,,1\nm2,2,\n", &s).unwrap_err();
    assert!(
        matches!(
            err,
            Error::NoRows {
                dropped_incomplete: 2
            }
        ),
        "{err:?}"
    );
    let err = read("id,a,y\n", &spec()).unwrap_err();
    assert!(
        matches!(
            err,
            Error::NoRows {
                dropped_incomplete: 0
            }
        ),
        "{err:?}"
    );
}

#[test]
fn duplicate_ids_name_the_id_and_both_lines() {
    let csv = "id,a,y\nm1,1,0.1\nm2,2,0.2\nm1,3,0.3\n";
    match read(csv, &spec()) {
        Err(Error::DuplicateId {
            id,
            first_line,
            second_line,
        }) => assert_eq!((id.as_str(), first_line, second_line), ("m1", 2, 4)),
        other => panic!("expected DuplicateId, got {other:?}"),
    }
}

#[test]
fn an_empty_id_names_its_line() {
    let err = read("id,a,y\nm1,1,0.1\n,2,0.2\n", &spec()).unwrap_err();
    assert!(matches!(err, Error::EmptyId { line: 3, .. }), "{err:?}");
}

#[test]
fn every_missing_role_column_is_named_with_the_columns_there_are() {
    let csv = "id,a,y\nm1,1,0.1\nm2,2,0.2\n";
    let cases = [
        (
            TableSpec {
                id: "ID".into(),
                ..spec()
            },
            ColumnRole::Id,
            "ID",
        ),
        (
            TableSpec {
                target: Some("pIC50".into()),
                ..spec()
            },
            ColumnRole::Target,
            "pIC50",
        ),
        (
            TableSpec {
                group: Some("series".into()),
                ..spec()
            },
            ColumnRole::Group,
            "series",
        ),
        (
            TableSpec {
                time: Some("date".into()),
                ..spec()
            },
            ColumnRole::Time,
            "date",
        ),
        (
            TableSpec {
                descriptors: Some(vec!["a".into(), "logp".into()]),
                ..spec()
            },
            ColumnRole::Descriptor,
            "logp",
        ),
    ];
    for (s, want_role, want_name) in cases {
        match read(csv, &s) {
            Err(Error::MissingColumn {
                role,
                name,
                available,
            }) => {
                assert_eq!((role, name.as_str()), (want_role, want_name));
                assert_eq!(available, ["id", "a", "y"]);
            }
            other => panic!("expected MissingColumn for {want_name}, got {other:?}"),
        }
    }
    let err = read(
        csv,
        &TableSpec {
            target: Some("pIC50".into()),
            ..spec()
        },
    )
    .unwrap_err();
    assert_eq!(
        err.to_string(),
        "target column 'pIC50' not found; the columns are: id, a, y"
    );
}

#[test]
fn constant_descriptors_are_dropped_and_listed() {
    let csv = "id,a,c,b,y\nm1,1,7,0,0.1\nm2,2,7,0,0.2\nm3,3,7,0,0.3\n";
    let t = read(csv, &spec()).unwrap();
    assert_eq!(t.descriptor_names, ["a"]);
    assert_eq!(t.dropped_constant, ["c", "b"]);
    assert_eq!(t.x.ncols(), 1);
}

#[test]
fn a_descriptor_constant_only_after_dropping_rows_is_dropped_too() {
    let s = TableSpec {
        drop_incomplete: true,
        ..spec()
    };
    let csv = "id,a,c,y\nm1,1,7,0.1\nm2,2,9,\nm3,3,7,0.3\n";
    let t = read(csv, &s).unwrap();
    assert_eq!(t.dropped_constant, ["c"]);
}

#[test]
fn no_descriptors_left_is_an_error_listing_why() {
    let csv = "id,name,c,y\nm1,x,7,0.1\nm2,z,7,0.2\n";
    match read(csv, &spec()) {
        Err(Error::NoDescriptors {
            dropped_constant,
            skipped_non_numeric,
        }) => {
            assert_eq!(dropped_constant, ["c"]);
            assert_eq!(skipped_non_numeric, ["name"]);
        }
        other => panic!("expected NoDescriptors, got {other:?}"),
    }
}

#[test]
fn a_listed_text_column_is_an_error_but_an_unlisted_one_is_skipped() {
    let csv = "id,smiles,a,b,y\nm1,CCO,1,5,0.1\nm2,CCN,2,4,0.2\n";
    let listed = TableSpec {
        descriptors: Some(vec!["b".into(), "smiles".into()]),
        ..spec()
    };
    let err = read(csv, &listed).unwrap_err();
    assert!(
        matches!(&err, Error::NotNumeric { line: 2, column, value, .. } if column == "smiles" && value == "CCO"),
        "{err:?}"
    );
    let t = read(csv, &spec()).unwrap();
    assert_eq!(t.descriptor_names, ["a", "b"]);
    // A listed subset is read in the listed order.
    let subset = TableSpec {
        descriptors: Some(vec!["b".into(), "a".into()]),
        ..spec()
    };
    let t = read(csv, &subset).unwrap();
    assert_eq!(t.descriptor_names, ["b", "a"]);
    assert_eq!(t.x.row(0).to_vec(), vec![5.0, 1.0]);
}

#[test]
fn a_ragged_row_names_its_line_and_field_counts() {
    let err = read("id,a,y\nm1,1,0.1\nm2,2\n", &spec()).unwrap_err();
    assert!(
        matches!(
            err,
            Error::RaggedRow {
                line: 3,
                expected: 3,
                found: 2
            }
        ),
        "{err:?}"
    );
}

#[test]
fn an_empty_file_and_a_repeated_header_name_are_errors() {
    assert!(matches!(read("", &spec()), Err(Error::NoHeader)));
    let err = read("id,a,a,y\nm1,1,2,3\n", &spec()).unwrap_err();
    assert!(
        matches!(&err, Error::DuplicateColumn { name, first: 2, second: 3 } if name == "a"),
        "{err:?}"
    );
}

#[test]
fn an_unnamed_column_is_an_error_naming_its_position() {
    // As written by a data frame saved with its row index.
    let err = read(",id,a,y\n0,m1,1,2\n1,m2,2,3\n", &spec()).unwrap_err();
    assert!(
        matches!(err, Error::UnnamedColumn { position: 1 }),
        "{err:?}"
    );
    let err = read("id,a,y,\nm1,1,2,\n", &spec()).unwrap_err();
    assert!(
        matches!(err, Error::UnnamedColumn { position: 4 }),
        "{err:?}"
    );
}

#[test]
fn a_column_cannot_play_two_roles() {
    let s = TableSpec {
        group: Some("y".into()),
        ..spec()
    };
    let err = read("id,a,y\nm1,1,2\n", &s).unwrap_err();
    assert!(
        matches!(&err, Error::RoleConflict { name, first: ColumnRole::Target, second: ColumnRole::Group } if name == "y"),
        "{err:?}"
    );
    let s = TableSpec {
        descriptors: Some(vec!["a".into(), "y".into()]),
        ..spec()
    };
    let err = read("id,a,y\nm1,1,2\n", &s).unwrap_err();
    assert!(matches!(err, Error::RoleConflict { .. }), "{err:?}");
    let s = TableSpec {
        descriptors: Some(vec!["a".into(), "a".into()]),
        ..spec()
    };
    let err = read("id,a,y\nm1,1,2\n", &s).unwrap_err();
    assert!(
        matches!(err, Error::DescriptorListedTwice { .. }),
        "{err:?}"
    );
}

#[test]
fn group_and_time_columns_are_read() {
    let s = TableSpec {
        group: Some("series".into()),
        time: Some("day".into()),
        ..spec()
    };
    let csv = "id,series,day,a,y\nm1,S1,3,1,0.1\nm2,S2,1.5,2,0.2\n";
    let t = read(csv, &s).unwrap();
    assert_eq!(t.groups.unwrap(), ["S1", "S2"]);
    assert_eq!(t.times.unwrap(), [3.0, 1.5]);
    assert_eq!(t.descriptor_names, ["a"]);
    let err = read("id,series,day,a,y\nm1,S1,2024-01-02,1,0.1\n", &s).unwrap_err();
    assert!(
        matches!(
            err,
            Error::NotNumeric {
                role: ColumnRole::Time,
                ..
            }
        ),
        "{err:?}"
    );
}

#[test]
fn files_and_readers_read_like_bytes_and_a_missing_file_is_an_io_error() {
    let csv = "id,a,y\nm1,1,0.1\nm2,2,0.2\n";
    let mut file = tempfile::NamedTempFile::new().unwrap();
    file.write_all(csv.as_bytes()).unwrap();
    let from_file = read_table(file.path(), &spec()).unwrap();
    let from_reader = read_table_from_reader(csv.as_bytes(), &spec()).unwrap();
    assert_eq!(from_file.sha256, from_reader.sha256);
    assert_eq!(from_file.x, from_reader.x);
    let dir = tempfile::tempdir().unwrap();
    let missing = dir.path().join("absent.csv");
    let err = read_table(&missing, &spec()).unwrap_err();
    assert!(matches!(err, Error::Io { .. }), "{err:?}");
    assert!(err.to_string().contains("absent.csv"), "{err}");
}

#[test]
fn the_table_hash_is_the_sha256_of_the_file_bytes() {
    // FIPS 180-2 appendix B.1 gives SHA-256("abc"); a table cannot be "abc",
    // so the known digest of the CSV text below was taken with Python's
    // hashlib and is kept in the stats reference fixture.
    let fixture: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string("tests/fixtures/stats_reference.json").unwrap(),
    )
    .unwrap();
    let text = fixture["sha256"]["text"].as_str().unwrap();
    let hex = fixture["sha256"]["hex"].as_str().unwrap();
    let t = read(text, &spec()).unwrap();
    assert_eq!(t.sha256, hex);
}

#[test]
fn reading_for_a_model_reorders_ignores_extras_and_keeps_constants() {
    let expected: Vec<String> = ["b", "c", "a"].iter().map(|s| s.to_string()).collect();
    let csv = "id,a,extra,b,c,y\nm1,1,x,2,5,0.1\nm2,3,y,4,5,0.2\n";
    let t = read_for_model_from_bytes(csv.as_bytes(), "id", &expected, Some("y")).unwrap();
    assert_eq!(t.descriptor_names, expected);
    assert_eq!(t.x.row(0).to_vec(), vec![2.0, 5.0, 1.0]);
    assert_eq!(
        t.x.row(1).to_vec(),
        vec![4.0, 5.0, 3.0],
        "constant 'c' kept"
    );
    assert_eq!(t.y.unwrap().to_vec(), vec![0.1, 0.2]);
    let t = read_for_model_from_bytes(csv.as_bytes(), "id", &expected, None).unwrap();
    assert!(t.y.is_none());
}

#[test]
fn reading_for_a_model_names_the_missing_descriptors_and_the_bundle_size() {
    let expected: Vec<String> = ["a", "logp", "tpsa", "b"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    let csv = "id,a,b\nm1,1,2\n";
    let err = read_for_model_from_bytes(csv.as_bytes(), "id", &expected, None).unwrap_err();
    match &err {
        Error::MissingDescriptors { missing, expected } => {
            assert_eq!(missing, &["logp", "tpsa"]);
            assert_eq!(*expected, 4);
        }
        other => panic!("expected MissingDescriptors, got {other:?}"),
    }
    assert_eq!(
        err.to_string(),
        "descriptor 'logp' missing (and 1 more: tpsa); the bundle expects 4 descriptors, \
         see `plumbline bundle inspect`"
    );
    // Missing values are errors here too, and a missing target column is named.
    let err = read_for_model_from_bytes(b"id,a,logp,tpsa,b\nm1,1,,3,4\n", "id", &expected, None)
        .unwrap_err();
    assert!(matches!(err, Error::Incomplete { total: 1, .. }), "{err:?}");
    let err = read_for_model_from_bytes(
        b"id,a,logp,tpsa,b\nm1,1,2,3,4\n",
        "id",
        &expected,
        Some("y"),
    )
    .unwrap_err();
    assert!(
        matches!(
            err,
            Error::MissingColumn {
                role: ColumnRole::Target,
                ..
            }
        ),
        "{err:?}"
    );
    let dir = tempfile::tempdir().unwrap();
    let err = read_for_model(&dir.path().join("none.csv"), "id", &expected, None).unwrap_err();
    assert!(matches!(err, Error::Io { .. }));
}

#[test]
fn too_few_rows_for_the_folds_says_how_many_are_needed() {
    // 5 outer × 5 inner folds: 2·5·5 = 50 rows.
    assert!(check_enough_rows(50, 5, 5).is_ok());
    match check_enough_rows(49, 5, 5) {
        Err(e @ Error::TooFewRows { needed: 50, .. }) => {
            assert!(e.to_string().contains("at least 50 are needed"), "{e}");
        }
        other => panic!("expected TooFewRows, got {other:?}"),
    }
    assert!(matches!(
        check_enough_rows(100, 1, 5),
        Err(Error::TooFewFolds {
            k: 1,
            level: "outer"
        })
    ));
}
