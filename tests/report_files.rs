//! The written fit report: `report.json` round-trips, `report.html` is
//! well-formed enough to trust (every element closed, every SVG closed, no
//! script, no external resource), its claims table shows exactly the JSON's
//! numbers, and text from outside is escaped.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::collections::BTreeMap;

use plumbline::domain::Verdict;
use plumbline::models::Hyper;
use plumbline::report::{
    self, BandSummary, Claims, ConformalSummary, CoveragePoint, Curve, CurvePoint, DataSummary,
    DomainSummary, FamilyOutcome, FitReport, FitSettings, OofPoint, Selection, Timing,
    YRandomization,
};
use plumbline::validate::Estimate;
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;

const HOSTILE: &str = "<script>alert(\"x\")</script> & 'quoted' <b>bold</b>";

fn est(rng: &mut Xoshiro256PlusPlus, centre: f64) -> Estimate {
    Estimate {
        mean: centre + rng.gen_range(-0.1..0.1),
        se: rng.gen_range(0.001..0.05),
    }
}

fn claims(rng: &mut Xoshiro256PlusPlus, mse: f64) -> Claims {
    Claims {
        mse: est(rng, mse),
        rmse: est(rng, mse.sqrt()),
        mae: est(rng, 0.8 * mse.sqrt()),
        r2: est(rng, 0.6),
        pearson: est(rng, 0.8),
        spearman: est(rng, 0.78),
    }
}

/// A report with arbitrary but plausible values, hostile text in every
/// free-text field, and a kernel-ridge α curve over a logarithmic grid.
fn sample(seed: u64) -> FitReport {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    let alphas = [100.0, 10.0, 1.0, 0.1, 0.01, 0.001];
    let points = alphas
        .iter()
        .enumerate()
        .map(|(i, &alpha)| CurvePoint {
            hyper: Hyper::KernelRidge { gamma: 0.01, alpha },
            x: alpha,
            train_mse: est(&mut rng, 0.9 - 0.15 * i as f64),
            test_mse: est(&mut rng, 0.9 - 0.05 * i as f64 + 0.02 * (i * i) as f64),
        })
        .collect();
    let ks = [12.0, 10.0, 8.0, 6.0, 4.0, 2.0];
    let k_points = ks
        .iter()
        .map(|&k| CurvePoint {
            hyper: Hyper::Knn { k: k as usize },
            x: k,
            train_mse: est(&mut rng, 0.5 - 0.4 / k),
            test_mse: est(&mut rng, 0.6 + 0.3 / k),
        })
        .collect();
    let out_of_fold = (0..120)
        .map(|i| {
            let observed = rng.gen_range(4.0..9.0);
            let verdict = Verdict::ALL[i % 7 / 3];
            OofPoint {
                id: format!("cpd-{i}{}", if i == 0 { HOSTILE } else { "" }),
                observed,
                predicted: observed + rng.gen_range(-0.8..0.8),
                fold: i % 5,
                knn_distance: rng.gen_range(0.5..4.0),
                verdict,
            }
        })
        .collect();
    let mut counts = BTreeMap::new();
    counts.insert("inside".to_string(), 70);
    counts.insert("border".to_string(), 35);
    counts.insert("outside".to_string(), 15);
    let family_claims = claims(&mut rng, 0.5);
    FitReport {
        tool_version: "0.1.0".into(),
        created_at: "2025-03-14T09:26:53Z".into(),
        data: DataSummary {
            path: format!("data/{HOSTILE}.csv"),
            sha256: "ab".repeat(32),
            rows: 120,
            descriptors: 25,
            dropped_constant: vec![HOSTILE.into(), "fp_15".into()],
            dropped_incomplete: 2,
            id_column: "compound_id".into(),
            target_column: format!("activity {HOSTILE}"),
        },
        settings: FitSettings {
            split: "cluster".into(),
            folds: 5,
            inner_folds: 5,
            seed: seed * 7 + 1,
            model: "auto".into(),
            permutations: 10,
        },
        selection: Selection {
            family: "kernel-ridge".into(),
            hyper: Hyper::KernelRidge {
                gamma: 0.01,
                alpha: 0.1,
            },
            rule: format!("one standard error {HOSTILE}"),
            families: vec![
                FamilyOutcome {
                    family: "ridge".into(),
                    claims: claims(&mut rng, 0.8),
                    within_one_se: false,
                    chosen_per_outer_fold: vec![Hyper::Ridge { alpha: 10.0 }; 5],
                },
                FamilyOutcome {
                    family: "kernel-ridge".into(),
                    claims: family_claims,
                    within_one_se: true,
                    chosen_per_outer_fold: vec![
                        Hyper::KernelRidge {
                            gamma: 0.01,
                            alpha: 0.1
                        };
                        5
                    ],
                },
            ],
        },
        claims: family_claims,
        random_split: claims(&mut rng, 0.35),
        curves: vec![
            Curve {
                family: "kernel-ridge".into(),
                parameter: "alpha".into(),
                points,
                chosen: 3,
            },
            Curve {
                family: "knn".into(),
                parameter: "k".into(),
                points: k_points,
                chosen: 3,
            },
        ],
        out_of_fold,
        y_randomization: YRandomization {
            permutations: 10,
            real_q2: 0.61,
            permuted_q2: (0..10).map(|_| rng.gen_range(-0.4..0.05)).collect(),
            p_value: 1.0 / 11.0,
        },
        domain: DomainSummary {
            k: 5,
            components: 6,
            explained_variance: 0.91,
            z: 0.5,
            z_threshold: 2.7,
            leverage_warning: 0.175,
            leverage_meaningful: true,
            residual_border_limit: 3.1,
            residual_outside_limit: 5.2,
            typicality_border: 0.05,
            typicality_outside: 0.01,
            oof_verdict_counts: counts,
        },
        conformal: ConformalSummary {
            method: format!("CV+ Mondrian {HOSTILE}"),
            bands: vec![
                BandSummary {
                    verdict: "inside".into(),
                    n: 70,
                    used: true,
                },
                BandSummary {
                    verdict: "outside".into(),
                    n: 15,
                    used: false,
                },
            ],
            coverage: [0.5, 0.6, 0.7, 0.8, 0.9, 0.95]
                .iter()
                .map(|&nominal| CoveragePoint {
                    nominal,
                    empirical: (nominal + rng.gen_range(-0.05..0.05)).min(1.0),
                    n: 120,
                })
                .collect(),
        },
        timings: vec![
            Timing {
                stage: format!("outer CV {HOSTILE}"),
                seconds: 12.5,
            },
            Timing {
                stage: "y-randomisation".into(),
                seconds: 30.25,
            },
        ],
        cautions: vec![format!("small data {HOSTILE}")],
    }
}

fn written(report: &FitReport) -> (tempfile::TempDir, String, String) {
    let dir = tempfile::tempdir().expect("temporary directory");
    report::write(report, dir.path()).expect("report written");
    let json = std::fs::read_to_string(dir.path().join("report.json")).expect("json");
    let html = std::fs::read_to_string(dir.path().join("report.html")).expect("html");
    (dir, json, html)
}

#[test]
fn json_round_trips() {
    let r = sample(1);
    let (_dir, json, _) = written(&r);
    let back: FitReport = serde_json::from_str(&json).expect("report.json parses");
    assert_eq!(back, r);
    // The fields other tools read by name are where the issue says.
    let v: serde_json::Value = serde_json::from_str(&json).expect("json value");
    for key in [
        "selection",
        "claims",
        "random_split",
        "y_randomization",
        "domain",
        "conformal",
    ] {
        assert!(v.get(key).is_some(), "report.json lacks `{key}`");
    }
    assert!(v["claims"]["mse"]["se"].is_f64());
    assert!(v["y_randomization"]["p_value"].is_f64());
    assert_eq!(v["selection"]["hyper"]["family"], "kernel-ridge");
}

#[test]
fn undefined_metrics_are_null_in_json_and_read_back_as_nan() {
    let mut r = sample(2);
    r.claims.pearson.mean = f64::NAN;
    r.claims.spearman.se = f64::INFINITY;
    r.y_randomization.permuted_q2[3] = f64::NAN;
    let (_dir, json, html) = written(&r);
    let v: serde_json::Value = serde_json::from_str(&json).expect("json value");
    assert!(v["claims"]["pearson"]["mean"].is_null());
    assert!(v["claims"]["spearman"]["se"].is_null());
    let back: FitReport = serde_json::from_str(&json).expect("nulls read back");
    assert!(back.claims.pearson.mean.is_nan());
    assert!(back.claims.spearman.se.is_nan());
    assert!(back.y_randomization.permuted_q2[3].is_nan());
    assert_eq!(back.claims.mse, r.claims.mse);
    // Writing the read-back report gives the same JSON: nothing drifts.
    assert_eq!(
        serde_json::to_string_pretty(&back).expect("json") + "\n",
        json
    );
    assert!(table(&html, "claims").contains("n/a"));
}

/// Checks that tags nest and close: a small stack machine over the page.
/// Void elements and `/>` need no closing tag; the doctype is skipped.
fn assert_well_formed(html: &str) {
    const VOID: [&str; 4] = ["meta", "br", "hr", "img"];
    let mut stack: Vec<String> = Vec::new();
    let mut rest = html;
    while let Some(start) = rest.find('<') {
        let after = &rest[start + 1..];
        let end = after.find('>').expect("every tag ends");
        let tag = &after[..end];
        rest = &after[end + 1..];
        assert!(!tag.contains('<'), "a '<' inside a tag: {tag}");
        if tag.starts_with('!') {
            assert!(
                tag.eq_ignore_ascii_case("!DOCTYPE html"),
                "unexpected {tag}"
            );
            continue;
        }
        let name: String = tag
            .trim_start_matches('/')
            .chars()
            .take_while(|c| c.is_ascii_alphanumeric() || *c == '-')
            .collect();
        assert!(!name.is_empty(), "empty tag name in <{tag}>");
        if let Some(closing) = tag.strip_prefix('/') {
            let open = stack
                .pop()
                .unwrap_or_else(|| panic!("</{closing}> closes nothing"));
            assert_eq!(open, name, "<{open}> closed by </{name}>");
        } else if !(tag.ends_with('/') || VOID.contains(&name.as_str())) {
            stack.push(name);
        }
    }
    assert!(stack.is_empty(), "left open: {stack:?}");
}

/// The text between `<table id="ID"` and its `</table>`.
fn table<'a>(html: &'a str, id: &str) -> &'a str {
    let open = format!("<table id=\"{id}\"");
    let start = html.find(&open).unwrap_or_else(|| panic!("no table {id}"));
    let end = html[start..].find("</table>").expect("table closed");
    &html[start..start + end]
}

/// Numbers in the text content (outside tags) of an HTML fragment, each
/// with the decimals it was shown with, as (value, half a unit in the last
/// place shown).
fn shown_numbers(fragment: &str) -> Vec<(f64, f64)> {
    let mut text = String::new();
    let mut in_tag = false;
    for c in fragment.chars() {
        match c {
            '<' => in_tag = true,
            '>' => {
                in_tag = false;
                text.push(' ');
            }
            c if !in_tag => text.push(c),
            _ => {}
        }
    }
    let mut out = Vec::new();
    let chars: Vec<char> = text.chars().collect();
    let mut i = 0;
    while i < chars.len() {
        let starts = chars[i].is_ascii_digit()
            || (chars[i] == '-' && chars.get(i + 1).is_some_and(|c| c.is_ascii_digit()));
        if !starts {
            i += 1;
            continue;
        }
        let mut j = i + 1;
        while j < chars.len() && (chars[j].is_ascii_digit() || chars[j] == '.') {
            j += 1;
        }
        let mantissa: String = chars[i..j].iter().collect();
        let mut exponent = 0i32;
        if j < chars.len() && chars[j] == 'e' {
            let mut k = j + 1;
            if k < chars.len() && chars[k] == '-' {
                k += 1;
            }
            while k < chars.len() && chars[k].is_ascii_digit() {
                k += 1;
            }
            exponent = chars[j + 1..k]
                .iter()
                .collect::<String>()
                .parse()
                .expect("exponent");
            j = k;
        }
        let decimals = mantissa.split('.').nth(1).map_or(0, str::len) as i32;
        let value: f64 = mantissa.parse::<f64>().expect("number") * 10f64.powi(exponent);
        out.push((value, 0.5 * 10f64.powi(exponent - decimals)));
        i = j;
    }
    out
}

fn json_numbers(v: &serde_json::Value, out: &mut Vec<f64>) {
    match v {
        serde_json::Value::Number(n) => out.extend(n.as_f64()),
        serde_json::Value::Array(a) => a.iter().for_each(|x| json_numbers(x, out)),
        serde_json::Value::Object(o) => o.values().for_each(|x| json_numbers(x, out)),
        _ => {}
    }
}

#[test]
fn html_is_well_formed_self_contained_and_script_free() {
    let r = sample(3);
    let (_dir, _, html) = written(&r);
    assert_well_formed(&html);
    let lower = html.to_ascii_lowercase();
    assert!(!lower.contains("<script"), "no scripts");
    for external in ["src=", "href=", "@import", "url("] {
        assert!(
            !lower.contains(external),
            "external resource via {external}"
        );
    }
    // One plot per curve, observed/predicted, error/distance, coverage and
    // the y-randomisation histogram; every one closed.
    let opened = html.matches("<svg").count();
    assert_eq!(opened, r.curves.len() + 4);
    assert_eq!(html.matches("</svg>").count(), opened);
    // The α grid is logarithmic, the arithmetic k grid is not.
    assert!(html.contains("α (log scale)"));
    assert!(html.contains(">k</text>"));
}

#[test]
fn every_number_in_the_claims_table_is_a_json_claim() {
    for seed in 4..8 {
        let r = sample(seed);
        let (_dir, json, html) = written(&r);
        let v: serde_json::Value = serde_json::from_str(&json).expect("json");
        let mut claimed = Vec::new();
        json_numbers(&v["claims"], &mut claimed);
        let shown = shown_numbers(table(&html, "claims"));
        // Six metrics, each mean and SE.
        assert_eq!(shown.len(), 12, "{shown:?}");
        for (value, half_ulp) in shown {
            assert!(
                claimed
                    .iter()
                    .any(|c| (c - value).abs() <= half_ulp * (1.0 + 1e-9)),
                "{value} is shown but is no claim in report.json"
            );
        }
        // And the optimism table shows both splits' figures from the JSON.
        let mut both = claimed.clone();
        json_numbers(&v["random_split"], &mut both);
        let shown = shown_numbers(table(&html, "optimism"));
        assert_eq!(shown.len(), 6 * 5);
        for (i, (value, half_ulp)) in shown.iter().enumerate() {
            if i % 5 == 4 {
                continue; // the difference column is computed here
            }
            assert!(
                both.iter()
                    .any(|c| (c - value).abs() <= half_ulp * (1.0 + 1e-9)),
                "{value} in the optimism table is in neither split of report.json"
            );
        }
    }
}

#[test]
fn outside_text_is_escaped_everywhere() {
    let r = sample(9);
    let (_dir, _, html) = written(&r);
    assert!(!html.contains(HOSTILE));
    assert!(!html.contains("<b>"));
    let escaped = report::svg::escape(HOSTILE);
    assert_eq!(
        escaped,
        "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt; &amp; &#39;quoted&#39; \
         &lt;b&gt;bold&lt;/b&gt;"
    );
    // Path, target, rule, method, timing stage, cautions, dropped column.
    assert!(html.matches(&escaped).count() >= 7);
    assert_eq!(report::svg::escape("plain α ± 1"), "plain α ± 1");
}

#[test]
fn general_cautions_are_always_shown() {
    let mut r = sample(10);
    r.cautions.clear();
    let (_dir, _, html) = written(&r);
    for c in report::GENERAL_CAUTIONS {
        assert!(html.contains(c), "missing caution: {c}");
    }
    assert!(html.contains("optimism a random split hides"));
}

#[test]
fn an_unwritable_directory_is_an_error_naming_it() {
    let dir = tempfile::tempdir().expect("temporary directory");
    let blocker = dir.path().join("a-file");
    std::fs::write(&blocker, b"x").expect("file");
    let err = report::write(&sample(11), &blocker.join("report")).expect_err("cannot write");
    let msg = err.to_string();
    assert!(matches!(err, report::Error::CreateDir { .. }), "{msg}");
    assert!(msg.contains("a-file"), "{msg}");
}
