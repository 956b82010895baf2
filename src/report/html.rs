//! The fit report for people: one self-contained HTML page (inline CSS and
//! inline SVG, no scripts, no external resources) that opens anywhere and
//! can be archived with the bundle.
//!
//! Every piece of text from the report goes through [`escape`]; numbers are
//! shown to four significant digits, undefined ones as "n/a".

use std::fmt::Write as _;

use super::svg::{self, Plot, Scale, escape};
use super::{Claims, Curve, FitReport, GENERAL_CAUTIONS, OofPoint};
use crate::domain::Verdict;
use crate::models::Hyper;
use crate::validate::Estimate;

/// The calm palette of the report: warm paper, slate text, a deep teal for
/// what the claims rest on (test error), a grey-blue for training error, a
/// rust accent for the chosen setting, and sea green / ochre / terracotta
/// for the three domain verdicts.
const STYLE: &str = "\
body{margin:0;background:#fbfaf7;color:#2b2d33;font:15px/1.5 system-ui,-apple-system,'Segoe UI',sans-serif}
main{max-width:980px;margin:0 auto;padding:24px 28px 60px}
h1{font-size:26px;margin:8px 0 2px;color:#33475b}
h2{font-size:19px;margin:34px 0 8px;color:#33475b;border-bottom:1px solid #d9d4c7;padding-bottom:4px}
h3{font-size:15px;margin:18px 0 6px;color:#4a5a6a}
p.meta{color:#6b6f76;margin:0 0 12px;font-size:13px;word-break:break-all}
table{border-collapse:collapse;margin:8px 0 14px;font-size:14px}
th,td{border-bottom:1px solid #e4dfd3;padding:4px 12px 4px 0;text-align:left;vertical-align:top}
th{color:#4a5a6a;font-weight:600}
td.num{font-variant-numeric:tabular-nums;text-align:right}
tr.chosen td{background:#f1ebe0}
.cautions{background:#f4efe4;border-left:4px solid #9c5a3c;padding:10px 16px;margin:16px 0}
.cautions ul{margin:4px 0;padding-left:20px}
figure{margin:10px 0 18px}
figcaption{color:#6b6f76;font-size:13px;max-width:560px}
svg.plot{background:#ffffff;border:1px solid #e4dfd3;max-width:100%;height:auto}
svg .frame{fill:none;stroke:#b9b4a8;stroke-width:1}
svg .grid{stroke:#eeeae1;stroke-width:1}
svg .tick,svg .legend,svg .note{font-size:11px;fill:#5b5f66}
svg .axis-title{font-size:12px;fill:#3b4652}
svg .line-train{fill:none;stroke:#7d8fa3;stroke-width:2}
svg .line-test{fill:none;stroke:#2f6f6a;stroke-width:2}
svg .band-train{fill:#7d8fa3;fill-opacity:.18;stroke:none}
svg .band-test{fill:#2f6f6a;fill-opacity:.18;stroke:none}
svg .pt-train{fill:#7d8fa3}
svg .pt-test{fill:#2f6f6a}
svg .chosen{fill:none;stroke:#9c5a3c;stroke-width:2.5}
svg .mark{stroke:#9c5a3c;stroke-width:1.5;stroke-dasharray:5 4}
svg .identity{stroke:#8a8d93;stroke-width:1.2;stroke-dasharray:4 4}
svg .pt-inside{fill:#3d7f6f;fill-opacity:.75}
svg .pt-border{fill:#d0a040;fill-opacity:.85}
svg .pt-outside{fill:#b0513a;fill-opacity:.85}
svg .sw-train{fill:#7d8fa3}
svg .sw-test{fill:#2f6f6a}
svg .sw-inside{fill:#3d7f6f}
svg .sw-border{fill:#d0a040}
svg .sw-outside{fill:#b0513a}
svg .sw-band{fill:#2f6f6a;fill-opacity:.18}
svg .legend-panel{fill:#ffffff;fill-opacity:.85;stroke:#e4dfd3}
svg .bar{fill:#7d8fa3;stroke:#ffffff;stroke-width:1}
";

/// The whole page.
pub fn render(r: &FitReport) -> String {
    let title = format!("plumbline fit report: {}", r.data.target_column);
    let mut page = String::new();
    let _ = write!(
        page,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <title>{}</title>\n<style>\n{STYLE}</style>\n</head>\n<body>\n<main>\n",
        escape(&title)
    );
    let _ = write!(
        page,
        "<h1>{}</h1>\n<p class=\"meta\">{} · written {} by plumbline {} · data {} (SHA-256 {})</p>\n",
        escape(&title),
        escape(&hyper_text(&r.selection.hyper)),
        escape(&r.created_at),
        escape(&r.tool_version),
        escape(&r.data.path),
        escape(&r.data.sha256)
    );
    page.push_str(&cautions(r));
    page.push_str(&selection(r));
    page.push_str(&claims(r));
    page.push_str(&optimism(r));
    page.push_str(&curves(r));
    page.push_str(&out_of_fold(r));
    page.push_str(&domain(r));
    page.push_str(&conformal(r));
    page.push_str(&y_randomization(r));
    page.push_str(&data(r));
    page.push_str(&timings(r));
    page.push_str("</main>\n</body>\n</html>\n");
    page
}

/// Four significant digits; exponent form outside [1e-3, 1e5); "n/a" for
/// an undefined value.
pub fn num(v: f64) -> String {
    if !v.is_finite() {
        return "n/a".to_string();
    }
    if v == 0.0 {
        return "0".to_string();
    }
    let a = v.abs();
    if !(1e-3..1e5).contains(&a) {
        return format!("{v:.3e}");
    }
    let decimals = (3 - a.log10().floor() as i32).max(0) as usize;
    format!("{v:.decimals$}")
}

/// Like [`num`] without trailing zeros, for labels and hyperparameters
/// where "0.1" reads better than "0.1000".
pub fn short(v: f64) -> String {
    let s = num(v);
    match s.split_once('e') {
        Some((m, e)) if m.contains('.') => {
            format!("{}e{e}", m.trim_end_matches('0').trim_end_matches('.'))
        }
        None if s.contains('.') => s.trim_end_matches('0').trim_end_matches('.').to_string(),
        _ => s,
    }
}

fn estimate(e: &Estimate) -> String {
    format!("{} ± {}", num(e.mean), num(e.se))
}

/// Hyperparameters in the trade's symbols.
pub fn hyper_text(h: &Hyper) -> String {
    match *h {
        Hyper::Ridge { alpha } => format!("ridge, α = {}", short(alpha)),
        Hyper::KernelRidge { gamma, alpha } => {
            format!("kernel ridge, γ = {}, α = {}", short(gamma), short(alpha))
        }
        Hyper::Knn { k } => format!("k-NN, k = {k}"),
    }
}

fn symbol(parameter: &str) -> &str {
    match parameter {
        "alpha" => "α",
        "gamma" => "γ",
        other => other,
    }
}

/// A table from a header row (none when every heading is empty, as in a
/// key–value table) and body rows of already-escaped cells; cells starting
/// with a digit, sign or "n/a" are right-aligned as numbers.
fn table(id: &str, head: &[&str], rows: &[Vec<String>]) -> String {
    let mut s = format!("<table id=\"{}\">\n", escape(id));
    if head.iter().any(|h| !h.is_empty()) {
        s.push_str("<tr>");
        for h in head {
            let _ = write!(s, "<th>{}</th>", escape(h));
        }
        s.push_str("</tr>\n");
    }
    for row in rows {
        s.push_str("<tr>");
        for cell in row {
            let numeric = cell
                .chars()
                .next()
                .is_some_and(|c| c.is_ascii_digit() || c == '-' || c == '+')
                || cell == "n/a";
            if numeric {
                let _ = write!(s, "<td class=\"num\">{cell}</td>");
            } else {
                let _ = write!(s, "<td>{cell}</td>");
            }
        }
        s.push_str("</tr>\n");
    }
    s.push_str("</table>\n");
    s
}

fn cautions(r: &FitReport) -> String {
    let mut s =
        String::from("<section class=\"cautions\" id=\"cautions\">\n<h3>Cautions</h3>\n<ul>\n");
    for c in GENERAL_CAUTIONS
        .iter()
        .map(|c| c.to_string())
        .chain(r.cautions.iter().cloned())
    {
        let _ = writeln!(s, "<li>{}</li>", escape(&c));
    }
    s.push_str("</ul>\n</section>\n");
    s
}

fn selection(r: &FitReport) -> String {
    let st = &r.settings;
    let mut s = String::from("<h2>Selection</h2>\n");
    let rows = vec![
        vec!["model".into(), escape(&hyper_text(&r.selection.hyper))],
        vec!["rule".into(), escape(&r.selection.rule)],
        vec!["model setting".into(), escape(&st.model)],
        vec!["split".into(), escape(&st.split)],
        vec!["outer folds".into(), st.folds.to_string()],
        vec!["inner folds".into(), st.inner_folds.to_string()],
        vec!["seed".into(), st.seed.to_string()],
        vec![
            "y-randomisation permutations".into(),
            st.permutations.to_string(),
        ],
    ];
    s.push_str(&table("selection", &["", ""], &rows));
    if !r.selection.families.is_empty() {
        s.push_str(
            "<h3>Families through the same outer cross-validation</h3>\n<p>The simplest family \
             whose outer MSE is within one standard error of the best is chosen.</p>\n",
        );
        let mut t = String::from(
            "<table id=\"families\">\n<tr><th>family</th><th>outer MSE</th><th>q²</th>\
             <th>within one SE</th><th>chosen in each outer fold</th></tr>\n",
        );
        for f in &r.selection.families {
            let chosen = if f.family == r.selection.family {
                " class=\"chosen\""
            } else {
                ""
            };
            let per_fold = tally(&f.chosen_per_outer_fold);
            let _ = writeln!(
                t,
                "<tr{chosen}><td>{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td>\
                 <td>{}</td><td>{}</td></tr>",
                escape(&f.family),
                escape(&estimate(&f.claims.mse)),
                escape(&estimate(&f.claims.r2)),
                if f.within_one_se { "yes" } else { "no" },
                escape(&per_fold)
            );
        }
        t.push_str("</table>\n");
        s.push_str(&t);
    }
    s
}

/// Distinct settings with how many outer folds chose each, in first-seen
/// order: "ridge, α = 10 (5 folds)".
fn tally(chosen: &[Hyper]) -> String {
    let mut seen: Vec<(Hyper, usize)> = Vec::new();
    for h in chosen {
        match seen.iter_mut().find(|(s, _)| s == h) {
            Some((_, n)) => *n += 1,
            None => seen.push((*h, 1)),
        }
    }
    seen.iter()
        .map(|(h, n)| {
            let folds = if *n == 1 { "fold" } else { "folds" };
            format!("{} ({n} {folds})", hyper_text(h))
        })
        .collect::<Vec<_>>()
        .join("; ")
}

/// The metrics in display order with their names.
fn metric_rows(c: &Claims) -> [(&'static str, Estimate); 6] {
    [
        ("MSE", c.mse),
        ("RMSE", c.rmse),
        ("MAE", c.mae),
        ("q² (out-of-fold R²)", c.r2),
        ("Pearson r", c.pearson),
        ("Spearman ρ", c.spearman),
    ]
}

fn claims(r: &FitReport) -> String {
    let rows: Vec<Vec<String>> = metric_rows(&r.claims)
        .iter()
        .map(|(name, e)| vec![escape(name), escape(&estimate(e))])
        .collect();
    format!(
        "<h2>Claims</h2>\n<p>Outer cross-validation of the whole procedure, selection included \
         (split: {}); each figure is the mean ± standard error over the {} outer folds. Only \
         these are claims.</p>\n{}",
        escape(&r.settings.split),
        r.settings.folds,
        table("claims", &["metric", "mean ± SE"], &rows)
    )
}

fn optimism(r: &FitReport) -> String {
    let chosen = metric_rows(&r.claims);
    let random = metric_rows(&r.random_split);
    let rows: Vec<Vec<String>> = chosen
        .iter()
        .zip(random.iter())
        .map(|((name, c), (_, rnd))| {
            vec![
                escape(name),
                escape(&estimate(c)),
                escape(&estimate(rnd)),
                escape(&num(rnd.mean - c.mean)),
            ]
        })
        .collect();
    format!(
        "<h2>Random split beside the chosen split</h2>\n<p>The same procedure scored under a \
         random split. The difference is the optimism a random split hides: near-duplicate \
         rows fall on both sides of a random split, so it flatters the model, while the chosen \
         split ({}) keeps them together as new candidates will be. Optimism shows as a \
         negative difference for MSE, RMSE and MAE and a positive one for q² and the \
         correlations.</p>\n{}",
        escape(&r.settings.split),
        table(
            "optimism",
            &["metric", "chosen split", "random split", "random − chosen"],
            &rows
        )
    )
}

fn curves(r: &FitReport) -> String {
    let mut s = String::from(
        "<h2>Error against each hyperparameter</h2>\n<p>Training and test MSE (mean ± SE over \
         folds, shaded) as one hyperparameter moves over its grid, the others held at the \
         chosen values; the chosen setting is circled.</p>\n",
    );
    if r.curves.is_empty() {
        s.push_str("<p>No curves were recorded.</p>\n");
    }
    for c in &r.curves {
        s.push_str(&curve_figure(c));
    }
    s
}

fn curve_figure(c: &Curve) -> String {
    let xs: Vec<f64> = c.points.iter().map(|p| p.x).collect();
    let log = svg::is_logarithmic(&xs);
    let (xlo, xhi) = extent(xs.iter().copied().filter(|v| !log || *v > 0.0));
    let ys = c.points.iter().flat_map(|p| {
        [
            p.train_mse.mean - p.train_mse.se.max(0.0),
            p.train_mse.mean + p.train_mse.se.max(0.0),
            p.test_mse.mean - p.test_mse.se.max(0.0),
            p.test_mse.mean + p.test_mse.se.max(0.0),
        ]
    });
    let (ylo, yhi) = extent(ys);
    let x_scale = if log {
        Scale::log(xlo, xhi)
    } else {
        Scale::linear(xlo, xhi)
    };
    let mut plot = Plot::new(x_scale, Scale::linear(ylo, yhi));
    let sym = symbol(&c.parameter);
    let x_title = if log {
        format!("{sym} (log scale)")
    } else {
        sym.to_string()
    };
    plot.axes(&x_title, "MSE");
    for (kind, pick) in [
        (
            "train",
            (|p: &super::CurvePoint| p.train_mse) as fn(&super::CurvePoint) -> Estimate,
        ),
        ("test", |p: &super::CurvePoint| p.test_mse),
    ] {
        let mean: Vec<(f64, f64)> = c.points.iter().map(|p| (p.x, pick(p).mean)).collect();
        let band_ok = c.points.iter().all(|p| pick(p).se.is_finite());
        if band_ok {
            let lower: Vec<(f64, f64)> = c
                .points
                .iter()
                .map(|p| (p.x, pick(p).mean - pick(p).se))
                .collect();
            let upper: Vec<(f64, f64)> = c
                .points
                .iter()
                .map(|p| (p.x, pick(p).mean + pick(p).se))
                .collect();
            plot.band(&lower, &upper, &format!("band-{kind}"));
        }
        plot.polyline(&mean, &format!("line-{kind}"));
        plot.points(&mean, 2.5, &format!("pt-{kind}"));
    }
    let held = c
        .points
        .get(c.chosen)
        .map(|p| hyper_text(&p.hyper))
        .unwrap_or_default();
    if let Some(p) = c.points.get(c.chosen) {
        plot.vline(p.x, "mark", &format!("chosen {sym} = {}", short(p.x)));
        plot.points(&[(p.x, p.test_mse.mean)], 6.0, "chosen");
    }
    plot.legend(&[("sw-train", "training MSE"), ("sw-test", "test MSE")]);
    let title = format!("{}: MSE against {sym}", c.family);
    format!(
        "<figure>\n{}\n<figcaption>{}. Chosen: {}.</figcaption>\n</figure>\n",
        plot.finish(&title),
        escape(&title),
        escape(&held)
    )
}

/// The finite range of some values, (0, 1) when there are none.
fn extent(values: impl Iterator<Item = f64>) -> (f64, f64) {
    let (lo, hi) = values
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| {
            (lo.min(v), hi.max(v))
        });
    if lo.is_finite() { (lo, hi) } else { (0.0, 1.0) }
}

fn verdict_points<'a>(
    oof: &'a [OofPoint],
    f: impl Fn(&OofPoint) -> (f64, f64) + 'a,
) -> impl Iterator<Item = (Verdict, Vec<(f64, f64)>)> + 'a {
    Verdict::ALL.into_iter().map(move |v| {
        let pts = oof.iter().filter(|p| p.verdict == v).map(&f).collect();
        (v, pts)
    })
}

fn verdict_legend(oof: &[OofPoint]) -> Vec<(String, String)> {
    Verdict::ALL
        .iter()
        .map(|v| {
            let n = oof.iter().filter(|p| p.verdict == *v).count();
            (format!("sw-{}", v.name()), format!("{} ({n})", v.name()))
        })
        .collect()
}

fn add_legend(plot: &mut Plot, entries: &[(String, String)]) {
    let refs: Vec<(&str, &str)> = entries
        .iter()
        .map(|(a, b)| (a.as_str(), b.as_str()))
        .collect();
    plot.legend(&refs);
}

fn out_of_fold(r: &FitReport) -> String {
    let mut s = String::from("<h2>Out-of-fold predictions</h2>\n");
    if r.out_of_fold.is_empty() {
        s.push_str("<p>No out-of-fold predictions were recorded.</p>\n");
        return s;
    }
    let oof = &r.out_of_fold;
    // One range for both axes so the identity line is the diagonal.
    let (lo, hi) = extent(oof.iter().flat_map(|p| [p.observed, p.predicted]));
    let scale = Scale::linear(lo, hi);
    let mut plot = Plot::new(scale, scale);
    plot.axes(
        &format!("observed {}", r.data.target_column),
        "out-of-fold prediction",
    );
    let (a, b) = scale.bounds();
    plot.segment((a, a), (b, b), "identity");
    for (v, pts) in verdict_points(oof, |p| (p.observed, p.predicted)) {
        plot.points(&pts, 3.0, &format!("pt-{}", v.name()));
    }
    add_legend(&mut plot, &verdict_legend(oof));
    let _ = write!(
        s,
        "<figure>\n{}\n<figcaption>Each training row predicted by the model of the fold that \
         left it out, coloured by its out-of-fold domain verdict; the dashed line is perfect \
         agreement.</figcaption>\n</figure>\n",
        plot.finish("Observed against out-of-fold predicted")
    );

    let (dlo, dhi) = extent(
        oof.iter()
            .map(|p| p.knn_distance)
            .chain([r.domain.z_threshold]),
    );
    let (elo, ehi) = extent(
        oof.iter()
            .map(|p| (p.observed - p.predicted).abs())
            .chain([0.0]),
    );
    let mut plot = Plot::new(Scale::linear(dlo, dhi), Scale::linear(elo, ehi));
    plot.axes(
        &format!("mean distance to the {} nearest training rows", r.domain.k),
        "|observed − predicted|",
    );
    for (v, pts) in verdict_points(oof, |p| (p.knn_distance, (p.observed - p.predicted).abs())) {
        plot.points(&pts, 3.0, &format!("pt-{}", v.name()));
    }
    plot.vline(r.domain.z_threshold, "mark", "Z-rule threshold");
    add_legend(&mut plot, &verdict_legend(oof));
    let _ = write!(
        s,
        "<figure>\n{}\n<figcaption>Out-of-fold error against the distance to the fold's \
         training rows in PCA space. Errors that grow with distance are why candidates far \
         from the training data are flagged rather than ranked.</figcaption>\n</figure>\n",
        plot.finish("Error against domain distance")
    );
    s
}

fn domain(r: &FitReport) -> String {
    let d = &r.domain;
    let leverage = if d.leverage_meaningful {
        num(d.leverage_warning)
    } else {
        format!(
            "{} (not meaningful: h* ≥ 1, so no leverage can exceed it)",
            num(d.leverage_warning)
        )
    };
    let counts: Vec<String> = d
        .oof_verdict_counts
        .iter()
        .map(|(k, v)| format!("{k}: {v}"))
        .collect();
    let rows = vec![
        vec!["neighbours k".into(), d.k.to_string()],
        vec![
            "PCA components".into(),
            format!(
                "{} ({} % of the variance)",
                d.components,
                short(100.0 * d.explained_variance)
            ),
        ],
        vec![
            "Z-rule threshold D̄ + Z·σ".into(),
            escape(&format!("{} (Z = {})", num(d.z_threshold), short(d.z))),
        ],
        vec!["leverage warning h* = 3(p+1)/n".into(), escape(&leverage)],
        vec![
            "PCA residual: border / outside above".into(),
            format!(
                "{} / {}",
                num(d.residual_border_limit),
                num(d.residual_outside_limit)
            ),
        ],
        vec![
            "typicality: border / outside below".into(),
            format!(
                "{} / {}",
                num(d.typicality_border),
                num(d.typicality_outside)
            ),
        ],
        vec!["out-of-fold verdicts".into(), escape(&counts.join(", "))],
    ];
    format!(
        "<h2>Applicability domain</h2>\n<p>Thresholds calibrated out-of-fold: each training row \
         was measured against its fold's training rows, as a candidate is measured against all \
         of them.</p>\n{}",
        table("domain", &["signal", "threshold"], &rows)
    )
}

fn conformal(r: &FitReport) -> String {
    let c = &r.conformal;
    let mut s = format!(
        "<h2>Prediction intervals</h2>\n<p>{}</p>\n",
        escape(&c.method)
    );
    let rows: Vec<Vec<String>> = c
        .bands
        .iter()
        .map(|b| {
            vec![
                escape(&b.verdict),
                b.n.to_string(),
                if b.used {
                    "its own residuals".to_string()
                } else {
                    "pooled residuals (too few points)".to_string()
                },
            ]
        })
        .collect();
    s.push_str(&table(
        "bands",
        &["verdict band", "residuals", "calibrated by"],
        &rows,
    ));
    if c.coverage.is_empty() {
        s.push_str("<p>No coverage was measured.</p>\n");
        return s;
    }
    // The band is where sampling alone puts the empirical coverage about 95%
    // of the time: nominal ± 1.96·√(p(1−p)/n), the normal approximation to
    // the binomial (common practice).
    let half = |p: &super::CoveragePoint| {
        1.96 * (p.nominal * (1.0 - p.nominal) / p.n.max(1) as f64).sqrt()
    };
    let (lo, _) = extent(
        c.coverage
            .iter()
            .flat_map(|p| [p.nominal, p.empirical, p.nominal - half(p)]),
    );
    let scale = Scale::linear(lo.min(1.0), 1.0);
    let mut plot = Plot::new(scale, scale);
    plot.axes("nominal coverage", "empirical out-of-fold coverage");
    let lower: Vec<(f64, f64)> = c
        .coverage
        .iter()
        .map(|p| (p.nominal, p.nominal - half(p)))
        .collect();
    let upper: Vec<(f64, f64)> = c
        .coverage
        .iter()
        .map(|p| (p.nominal, (p.nominal + half(p)).min(1.0)))
        .collect();
    plot.band(&lower, &upper, "band-test");
    let (a, b) = scale.bounds();
    plot.segment((a, a), (b, b), "identity");
    let pts: Vec<(f64, f64)> = c
        .coverage
        .iter()
        .map(|p| (p.nominal, p.empirical))
        .collect();
    plot.polyline(&pts, "line-test");
    plot.points(&pts, 3.5, "pt-test");
    plot.legend(&[
        ("sw-test", "empirical coverage"),
        ("sw-band", "binomial 95% band around nominal"),
    ]);
    let _ = write!(
        s,
        "<figure>\n{}\n<figcaption>Empirical coverage of the out-of-fold intervals against the \
         nominal level; on the dashed diagonal they cover exactly as promised.</figcaption>\n\
         </figure>\n",
        plot.finish("Nominal against empirical interval coverage")
    );
    let rows: Vec<Vec<String>> = c
        .coverage
        .iter()
        .map(|p| vec![num(p.nominal), num(p.empirical), p.n.to_string()])
        .collect();
    s.push_str(&table("coverage", &["nominal", "empirical", "rows"], &rows));
    s
}

/// Counts of `values` in `bins` equal-width bins over `[lo, hi]`, the last
/// bin closed on the right (numpy.histogram's convention); values outside
/// the range are not counted.
pub fn histogram(values: &[f64], lo: f64, hi: f64, bins: usize) -> Vec<usize> {
    let mut counts = vec![0; bins];
    if bins == 0 || hi.partial_cmp(&lo) != Some(std::cmp::Ordering::Greater) {
        return counts;
    }
    let width = (hi - lo) / bins as f64;
    for &v in values.iter().filter(|v| v.is_finite()) {
        if v < lo || v > hi {
            continue;
        }
        let b = (((v - lo) / width).floor() as usize).min(bins - 1);
        counts[b] += 1;
    }
    counts
}

fn y_randomization(r: &FitReport) -> String {
    let y = &r.y_randomization;
    let mut s = format!(
        "<h2>y-randomisation</h2>\n<p>The chosen family refitted, selection included, on {} \
         permutations of the target. Real q² = {}; p = {} is the share of permutations (plus \
         one) doing at least as well. A small p means the model found structure that shuffled \
         targets do not have.</p>\n",
        y.permutations,
        escape(&num(y.real_q2)),
        escape(&num(y.p_value))
    );
    let permuted: Vec<f64> = y
        .permuted_q2
        .iter()
        .copied()
        .filter(|v| v.is_finite())
        .collect();
    if permuted.is_empty() {
        s.push_str("<p>No permutations were run.</p>\n");
        return s;
    }
    let (lo, hi) = extent(permuted.iter().copied());
    let (lo, hi) = if hi > lo {
        (lo, hi)
    } else {
        (lo - 0.05, hi + 0.05)
    };
    let bins = ((permuted.len() as f64).sqrt().ceil() as usize).clamp(5, 30);
    let counts = histogram(&permuted, lo, hi, bins);
    let width = (hi - lo) / bins as f64;
    let top = counts.iter().copied().max().unwrap_or(1) as f64;
    let (xlo, xhi) = extent([lo, hi, y.real_q2].into_iter());
    let mut plot = Plot::new(Scale::linear(xlo, xhi), Scale::linear(0.0, top));
    plot.axes("q² on permuted targets", "permutations");
    for (i, &n) in counts.iter().enumerate() {
        let a = lo + width * i as f64;
        plot.rect((a, 0.0), (a + width, n as f64), "bar");
    }
    plot.vline(
        y.real_q2,
        "mark",
        &format!("real q² = {}", short(y.real_q2)),
    );
    let _ = write!(
        s,
        "<figure>\n{}\n<figcaption>Histogram of q² over the permutations; the dashed line is \
         the real model's q².</figcaption>\n</figure>\n",
        plot.finish("y-randomisation: permuted q²")
    );
    s
}

fn data(r: &FitReport) -> String {
    let d = &r.data;
    let dropped = if d.dropped_constant.is_empty() {
        "none".to_string()
    } else {
        d.dropped_constant.join(", ")
    };
    let rows = vec![
        vec!["file".into(), escape(&d.path)],
        vec!["SHA-256".into(), escape(&d.sha256)],
        vec!["rows used".into(), d.rows.to_string()],
        vec!["descriptors used".into(), d.descriptors.to_string()],
        vec!["id column".into(), escape(&d.id_column)],
        vec!["target column".into(), escape(&d.target_column)],
        vec!["constant descriptors dropped".into(), escape(&dropped)],
        vec![
            "incomplete rows dropped".into(),
            d.dropped_incomplete.to_string(),
        ],
    ];
    format!("<h2>Data</h2>\n{}", table("data", &["", ""], &rows))
}

fn timings(r: &FitReport) -> String {
    let mut rows: Vec<Vec<String>> = r
        .timings
        .iter()
        .map(|t| vec![escape(&t.stage), num(t.seconds)])
        .collect();
    let total: f64 = r.timings.iter().map(|t| t.seconds).sum();
    rows.push(vec!["total".into(), num(total)]);
    format!(
        "<h2>Timings</h2>\n{}",
        table("timings", &["stage", "seconds"], &rows)
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn histogram_counts_match_hand_binning() {
        // Bins over [0, 1] of width 0.25: [0,.25) [.25,.5) [.5,.75) [.75,1];
        // 1.0 falls in the last, closed bin; 1.5 and -0.1 fall outside (by
        // hand, following numpy.histogram's documented convention).
        let v = [
            0.0,
            0.1,
            0.25,
            0.3,
            0.49,
            0.5,
            0.99,
            1.0,
            1.5,
            -0.1,
            f64::NAN,
        ];
        assert_eq!(histogram(&v, 0.0, 1.0, 4), vec![2, 3, 1, 2]);
        assert_eq!(histogram(&v, 1.0, 1.0, 3), vec![0, 0, 0]);
    }

    #[test]
    fn numbers_show_four_significant_digits() {
        assert_eq!(num(0.123456), "0.1235");
        assert_eq!(num(12.3456), "12.35");
        assert_eq!(num(-1234.56), "-1235");
        assert_eq!(num(0.000012344), "1.234e-5");
        assert_eq!(num(f64::NAN), "n/a");
        assert_eq!(num(0.0), "0");
        assert_eq!(short(0.1), "0.1");
        assert_eq!(short(100.0), "100");
        assert_eq!(short(0.00001), "1e-5");
        assert_eq!(short(1.5e-7), "1.5e-7");
        assert_eq!(short(1234.0), "1234");
    }
}
