//! The whole model-building procedure, from a validated table to a
//! scoring model, its card and its report.
//!
//! 1. Standardise the descriptors (target-free, on all rows) and design the
//!    folds (cluster-grouped by default).
//! 2. Nested cross-validation of every candidate family (`validate`): the
//!    outer figures are the claims; the same with random folds shows the
//!    optimism a random split would hide; y-randomisation rides along as
//!    extra target columns.
//! 3. Final selection on all rows with the same fold design and the
//!    one-standard-error rule.
//! 4. The K fold models and the full model at the chosen setting, their
//!    out-of-fold residuals (CV+ calibration), the domain guard and its
//!    out-of-fold signals (Mondrian bands by verdict).
//!
//! Why the scoring model standardises with all rows while nested CV
//! standardises inside each outer training set: the claims must be honest,
//! so nested CV sees nothing of its test rows; the served fold models must
//! share one descriptor space so one kernel row per query serves all of
//! them. Standardisation uses no target, so the fold models' residuals stay
//! honest calibration for CV+.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::time::Instant;

use ndarray::{Array2, ArrayView1};

use crate::bundle::Card;
use crate::conformal::CvPlus;
use crate::data::Table;
use crate::domain::{DomainGuard, DomainSettings, DomainSignals, Verdict};
use crate::models::{self, Family, Grid, Hyper, Predictor};
use crate::report::{self, FitReport};
use crate::scoring::{Direction, ModelInfo, ScoringModel};
use crate::validate::{self, FoldDesign, Folds, NestedSettings, Validation};

/// Smallest Mondrian band used on its own; smaller bands fall back to the
/// pooled residuals (common practice: enough points that the 0.9 interval's
/// ranks are well inside the band).
pub const DEFAULT_MIN_BAND: usize = 50;

/// Nominal confidences at which the report measures empirical coverage.
pub const COVERAGE_LEVELS: [f64; 6] = [0.5, 0.6, 0.7, 0.8, 0.9, 0.95];

/// Errors of the fit procedure.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error("--split '{0}' is not a fold design: use random, cluster, group:COLUMN or time:COLUMN")]
    BadSplit(String),
    #[error("the table has no target column; fitting needs --target")]
    NoTarget,
    #[error("the split names column '{0}' but the table did not read it")]
    MissingSplitColumn(String),
    #[error(transparent)]
    Validate(#[from] validate::Error),
    #[error(transparent)]
    Domain(#[from] crate::domain::Error),
    #[error(transparent)]
    Conformal(#[from] crate::conformal::Error),
}

/// How rows are split into folds.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum SplitSpec {
    Random,
    Cluster,
    Group(String),
    Time(String),
}

impl SplitSpec {
    pub fn parse(s: &str) -> Result<SplitSpec, Error> {
        match s.split_once(':') {
            None if s == "random" => Ok(SplitSpec::Random),
            None if s == "cluster" => Ok(SplitSpec::Cluster),
            Some(("group", c)) if !c.is_empty() => Ok(SplitSpec::Group(c.to_string())),
            Some(("time", c)) if !c.is_empty() => Ok(SplitSpec::Time(c.to_string())),
            _ => Err(Error::BadSplit(s.to_string())),
        }
    }
    pub fn group_column(&self) -> Option<&str> {
        match self {
            SplitSpec::Group(c) => Some(c),
            _ => None,
        }
    }
    pub fn time_column(&self) -> Option<&str> {
        match self {
            SplitSpec::Time(c) => Some(c),
            _ => None,
        }
    }
    pub fn text(&self) -> String {
        match self {
            SplitSpec::Random => "random".into(),
            SplitSpec::Cluster => "cluster".into(),
            SplitSpec::Group(c) => format!("group:{c}"),
            SplitSpec::Time(c) => format!("time:{c}"),
        }
    }
}

/// Everything the procedure needs besides the table.
#[derive(Clone, Debug)]
pub struct FitOptions {
    /// Candidate families; more than one means `auto`.
    pub families: Vec<Family>,
    /// Grids replacing a family's default grid.
    pub grid_overrides: Vec<Grid>,
    pub split: SplitSpec,
    pub folds: usize,
    pub inner_folds: usize,
    pub seed: u64,
    pub permutations: usize,
    pub domain: DomainSettings,
    pub min_band: usize,
    pub model_id: String,
    pub id_column: String,
    pub target_column: String,
    pub endpoint: String,
    pub unit: String,
    pub direction: Direction,
    pub default_confidence: f64,
}

impl FitOptions {
    /// Defaults for a model id: auto, cluster split, 5 × 5 folds.
    pub fn new(model_id: &str, endpoint: &str) -> FitOptions {
        FitOptions {
            families: Family::BY_SIMPLICITY.to_vec(),
            grid_overrides: Vec::new(),
            split: SplitSpec::Cluster,
            folds: 5,
            inner_folds: 5,
            seed: 20261201,
            permutations: 10,
            domain: DomainSettings::default(),
            min_band: DEFAULT_MIN_BAND,
            model_id: model_id.to_string(),
            id_column: "id".to_string(),
            target_column: endpoint.to_string(),
            endpoint: endpoint.to_string(),
            unit: String::new(),
            direction: Direction::Higher,
            default_confidence: 0.9,
        }
    }

    fn grids(&self, n_descriptors: usize) -> Vec<Grid> {
        self.families
            .iter()
            .map(|f| {
                self.grid_overrides
                    .iter()
                    .find(|g| g.family == *f)
                    .cloned()
                    .unwrap_or_else(|| models::default_grid(*f, n_descriptors))
            })
            .collect()
    }
}

/// What a fit produces.
pub struct FitOutcome {
    pub model: ScoringModel,
    pub card: Card,
    pub report: FitReport,
    pub training_y: Vec<f64>,
}

/// Runs the whole procedure on a validated table.
pub fn fit(
    table: &Table,
    data_path: &str,
    options: &FitOptions,
    progress: &(dyn Fn(&str, usize, usize) + Sync),
) -> Result<FitOutcome, Error> {
    let mut watch = Stopwatch::start();
    let y = table.y.as_ref().ok_or(Error::NoTarget)?;
    let x_raw = table.x.view();
    let design = fold_design(table, options)?;
    watch.lap("fold design");
    let settings = NestedSettings {
        k_outer: options.folds,
        k_inner: options.inner_folds,
        seed: options.seed,
        n_permutations: options.permutations,
        compare_random_split: true,
    };
    let grids = options.grids(table.descriptor_names.len());
    let validation =
        validate::validate_with_models(x_raw, y.view(), &design, &grids, &settings, progress)?;
    watch.lap("nested cross-validation");

    let selection = &validation.final_selection;
    let x_std = selection.standardizer.transform(x_raw);
    let assembled = assemble(
        x_raw,
        x_std.view(),
        y.view(),
        &selection.folds,
        &selection.hyper,
        &options.domain,
        options.min_band,
    )?;
    watch.lap("fold models, domain, calibration");
    let coverage = nested_coverage(&validation, y.view())?;
    watch.lap("coverage check");

    let info = ModelInfo {
        id: options.model_id.clone(),
        version: String::new(),
        endpoint: options.endpoint.clone(),
        unit: options.unit.clone(),
        direction: options.direction,
        hyper: selection.hyper,
        descriptor_names: table.descriptor_names.clone(),
        default_confidence: options.default_confidence,
    };
    let mut report = build_report(
        table,
        data_path,
        options,
        &validation,
        &assembled,
        coverage,
        &watch,
    );
    report.cautions = fit_cautions(&report);
    let card = build_card(table, options, &validation, &report);
    let model = ScoringModel {
        info,
        standardizer: selection.standardizer.clone(),
        predictor: assembled.predictor,
        cvplus: assembled.cvplus,
        domain: assembled.guard,
    };
    Ok(FitOutcome {
        model,
        card,
        report,
        training_y: y.to_vec(),
    })
}

fn fold_design(table: &Table, options: &FitOptions) -> Result<FoldDesign, Error> {
    Ok(match &options.split {
        SplitSpec::Random => FoldDesign::Random,
        SplitSpec::Cluster => {
            let std = crate::space::Standardizer::fit(table.x.view());
            FoldDesign::clusters(
                std.transform(table.x.view()).view(),
                options.folds,
                options.seed,
                None,
            )?
        }
        SplitSpec::Group(c) => {
            let groups = table
                .groups
                .as_ref()
                .ok_or_else(|| Error::MissingSplitColumn(c.clone()))?;
            FoldDesign::groups(groups)
        }
        SplitSpec::Time(c) => {
            let times = table
                .times
                .as_ref()
                .ok_or_else(|| Error::MissingSplitColumn(c.clone()))?;
            FoldDesign::Time {
                times: times.clone(),
            }
        }
    })
}

/// Honest empirical coverage: in each outer fold, CV+ intervals from the
/// inner fold models (at the inner-chosen setting) and their inner
/// out-of-fold residuals, evaluated on the outer-test rows that took no
/// part in any of it. Pooled calibration: inner rows carry no verdicts.
fn nested_coverage(
    validation: &Validation,
    y: ArrayView1<f64>,
) -> Result<Vec<report::CoveragePoint>, Error> {
    let mut parts = Vec::new();
    for outer in &validation.chosen().outer {
        let residuals: Vec<f64> = outer.inner_residuals.iter().map(|r| r.abs()).collect();
        let verdicts = vec![Verdict::Inside; residuals.len()];
        let cv = CvPlus::new(
            &outer.inner_folds.fold_of,
            outer.inner_folds.k,
            &residuals,
            &verdicts,
            usize::MAX,
        )?;
        let observed: Vec<f64> = outer.test_rows.iter().map(|&r| y[r]).collect();
        let test_verdicts = vec![Verdict::Inside; observed.len()];
        parts.push(cv.empirical_coverage(
            outer.inner_test_predictions.view(),
            &observed,
            &test_verdicts,
            &COVERAGE_LEVELS,
        )?);
    }
    Ok(crate::conformal::Coverage::pool(&parts)
        .into_iter()
        .map(|c| report::CoveragePoint {
            nominal: c.nominal,
            empirical: c.empirical,
            n: c.n,
        })
        .collect())
}

/// Columns of the fold-model membership matrix: column 0 is every row (the
/// full model), column k + 1 every row outside fold k.
pub fn membership(folds: &Folds) -> Array2<bool> {
    let n = folds.fold_of.len();
    Array2::from_shape_fn((n, folds.k + 1), |(i, m)| {
        m == 0 || folds.fold_of[i] != m - 1
    })
}

/// Fits the served pipeline at the chosen setting: full model, K fold
/// models, CV+ calibration and the domain guard.
pub struct Assembled {
    pub predictor: Predictor,
    /// |yᵢ − μ₋ₖ₍ᵢ₎(xᵢ)| from the served fold models themselves.
    pub residuals: Vec<f64>,
    pub oof_predictions: Vec<f64>,
    pub guard: DomainGuard,
    pub oof_signals: Vec<DomainSignals>,
    pub cvplus: CvPlus,
}

pub fn assemble(
    x_raw: ndarray::ArrayView2<f64>,
    x_std: ndarray::ArrayView2<f64>,
    y: ArrayView1<f64>,
    folds: &Folds,
    hyper: &Hyper,
    domain_settings: &DomainSettings,
    min_band: usize,
) -> Result<Assembled, Error> {
    let predictor = models::fit_predictor(hyper, x_std, y, membership(folds).view());
    // The residuals come from the very fold models that will serve, so the
    // calibration is exactly what a query meets.
    let all = predictor.predict(x_std);
    let oof_predictions: Vec<f64> = (0..y.len())
        .map(|i| all[[i, folds.fold_of[i] + 1]])
        .collect();
    let residuals: Vec<f64> = oof_predictions
        .iter()
        .zip(y.iter())
        .map(|(p, y)| (y - p).abs())
        .collect();
    let guard = DomainGuard::fit(x_std, x_raw, domain_settings)?;
    let oof_signals = crate::domain::out_of_fold(x_std, x_raw, folds, domain_settings)?;
    let verdicts: Vec<Verdict> = oof_signals.iter().map(|s| s.verdict).collect();
    let cvplus = CvPlus::new(&folds.fold_of, folds.k, &residuals, &verdicts, min_band)?;
    Ok(Assembled {
        predictor,
        residuals,
        oof_predictions,
        guard,
        oof_signals,
        cvplus,
    })
}

/// Seconds spent per stage, in order.
#[derive(Default, Debug, Clone)]
pub struct Stopwatch {
    pub stages: Vec<(String, f64)>,
    last: Option<Instant>,
}

impl Stopwatch {
    pub fn start() -> Stopwatch {
        Stopwatch {
            stages: Vec::new(),
            last: Some(Instant::now()),
        }
    }
    pub fn lap(&mut self, stage: &str) {
        let now = Instant::now();
        let since = self
            .last
            .map(|t| now.duration_since(t).as_secs_f64())
            .unwrap_or(0.0);
        self.stages.push((stage.to_string(), since));
        self.last = Some(now);
    }
}

fn claims_of(m: &validate::MetricEstimates) -> report::Claims {
    report::Claims {
        mse: m.mse,
        rmse: m.rmse,
        mae: m.mae,
        r2: m.r2,
        pearson: m.pearson,
        spearman: m.spearman,
    }
}

fn build_report(
    table: &Table,
    data_path: &str,
    options: &FitOptions,
    validation: &Validation,
    assembled: &Assembled,
    coverage: Vec<report::CoveragePoint>,
    watch: &Stopwatch,
) -> FitReport {
    let selection = &validation.final_selection;
    let y = table.y.as_ref().map(|y| y.to_vec()).unwrap_or_default();
    let claims = claims_of(validation.claims());
    let best = validation
        .families
        .iter()
        .min_by(|a, b| a.claims.mse.mean.total_cmp(&b.claims.mse.mean))
        .map(|f| f.claims.mse.mean + f.claims.mse.se)
        .unwrap_or(f64::INFINITY);
    let families = validation
        .families
        .iter()
        .map(|f| report::FamilyOutcome {
            family: f.family.name().to_string(),
            claims: claims_of(&f.claims),
            within_one_se: f.claims.mse.mean <= best,
            chosen_per_outer_fold: f.outer.iter().map(|o| o.hyper).collect(),
        })
        .collect();
    let guard = &assembled.guard;
    let th = guard.thresholds();
    let ds = guard.settings();
    let mut counts = BTreeMap::new();
    for v in Verdict::ALL {
        counts.insert(
            v.name().to_string(),
            assembled
                .oof_signals
                .iter()
                .filter(|s| s.verdict == v)
                .count(),
        );
    }
    FitReport {
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        created_at: report::rfc3339_utc(std::time::SystemTime::now()),
        data: report::DataSummary {
            path: data_path.to_string(),
            sha256: table.sha256.clone(),
            rows: table.ids.len(),
            descriptors: table.descriptor_names.len(),
            dropped_constant: table.dropped_constant.clone(),
            dropped_incomplete: table.dropped_incomplete,
            id_column: options.id_column.clone(),
            target_column: options.target_column.clone(),
        },
        settings: report::FitSettings {
            split: options.split.text(),
            folds: options.folds,
            inner_folds: options.inner_folds,
            seed: options.seed,
            model: if options.families.len() > 1 { "auto".into() } else { options.families[0].name().into() },
            permutations: options.permutations,
        },
        selection: report::Selection {
            family: validation.chosen_family.name().to_string(),
            hyper: selection.hyper,
            rule: "one-standard-error rule (Hastie, Tibshirani & Friedman, ESL §7.10): the simplest setting, \
                   and with auto the simplest family, whose CV error is within one SE of the best"
                .to_string(),
            families,
        },
        claims,
        random_split: validation.random_split.as_ref().map(claims_of).unwrap_or(claims),
        curves: curves(&selection.cv, selection.chosen),
        out_of_fold: (0..y.len())
            .map(|i| report::OofPoint {
                id: table.ids[i].clone(),
                observed: y[i],
                predicted: assembled.oof_predictions[i],
                fold: selection.folds.fold_of[i],
                knn_distance: assembled.oof_signals[i].knn_distance,
                verdict: assembled.oof_signals[i].verdict,
            })
            .collect(),
        y_randomization: report::YRandomization {
            permutations: validation.y_randomization.permuted_q2.len(),
            real_q2: validation.y_randomization.real_q2,
            permuted_q2: validation.y_randomization.permuted_q2.clone(),
            p_value: validation.y_randomization.p_value,
        },
        domain: report::DomainSummary {
            k: ds.k,
            components: guard.pca().n_components(),
            explained_variance: guard.pca().explained_variance(),
            z: ds.z,
            z_threshold: th.z_threshold,
            leverage_warning: th.leverage_warning,
            leverage_meaningful: th.leverage_meaningful,
            residual_border_limit: th.residual_border_limit,
            residual_outside_limit: th.residual_outside_limit,
            typicality_border: ds.typicality_border,
            typicality_outside: ds.typicality_outside,
            oof_verdict_counts: counts,
        },
        conformal: report::ConformalSummary {
            method: "CV+ (Barber, Candès, Ramdas & Tibshirani 2021), Mondrian bands by out-of-fold domain verdict"
                .to_string(),
            bands: assembled
                .cvplus
                .band_sizes()
                .into_iter()
                .map(|(v, n)| report::BandSummary {
                    verdict: v.name().to_string(),
                    n,
                    used: assembled.cvplus.band_used(v, options.default_confidence),
                })
                .collect(),
            coverage,
        },
        timings: watch.stages.iter().map(|(s, t)| report::Timing { stage: s.clone(), seconds: *t }).collect(),
        cautions: Vec::new(),
    }
}

/// The report's train/test curves: one per ridge α or k-NN k; for kernel
/// ridge, α at the chosen γ.
fn curves(cv: &validate::GridCv, chosen: usize) -> Vec<report::Curve> {
    let points = &cv.grid.points;
    let keep: Vec<usize> = match points[chosen] {
        Hyper::KernelRidge { gamma, .. } => (0..points.len())
            .filter(|&g| matches!(points[g], Hyper::KernelRidge { gamma: gg, .. } if gg == gamma))
            .collect(),
        _ => (0..points.len()).collect(),
    };
    let (parameter, x_of): (String, fn(&Hyper) -> f64) = match points[chosen] {
        Hyper::Ridge { .. } => ("alpha".into(), |h| {
            if let Hyper::Ridge { alpha } = h {
                *alpha
            } else {
                f64::NAN
            }
        }),
        Hyper::KernelRidge { gamma, .. } => (format!("alpha (gamma = {gamma:.4})"), |h| {
            if let Hyper::KernelRidge { alpha, .. } = h {
                *alpha
            } else {
                f64::NAN
            }
        }),
        Hyper::Knn { .. } => ("k".into(), |h| {
            if let Hyper::Knn { k } = h {
                *k as f64
            } else {
                f64::NAN
            }
        }),
    };
    let curve_points = keep
        .iter()
        .map(|&g| report::CurvePoint {
            hyper: points[g],
            x: x_of(&points[g]),
            train_mse: cv.train_mse[[g, 0]],
            test_mse: cv.test_mse[[g, 0]],
        })
        .collect();
    let chosen_in_curve = keep.iter().position(|&g| g == chosen).unwrap_or(0);
    vec![report::Curve {
        family: cv.grid.family.name().to_string(),
        parameter,
        points: curve_points,
        chosen: chosen_in_curve,
    }]
}

fn build_card(
    table: &Table,
    options: &FitOptions,
    validation: &Validation,
    report: &FitReport,
) -> Card {
    Card {
        target_column: options.target_column.clone(),
        family: validation.chosen_family.name().to_string(),
        claims: report.claims,
        random_split: report.random_split,
        y_randomization: report.y_randomization.clone(),
        domain: report.domain.clone(),
        conformal_method: report.conformal.method.clone(),
        conformal_bands: report.conformal.bands.clone(),
        training_rows: table.ids.len(),
        dropped_constant: table.dropped_constant.clone(),
        data_sha256: table.sha256.clone(),
        seed: options.seed,
        split: options.split.text(),
        folds: options.folds,
        inner_folds: options.inner_folds,
        created_at: report.created_at.clone(),
        tool_version: report.tool_version.clone(),
        cautions: report::GENERAL_CAUTIONS
            .iter()
            .map(|c| c.to_string())
            .chain(report.cautions.iter().cloned())
            .collect(),
    }
}

/// Cautions particular to this fit, from what the validation found.
fn fit_cautions(r: &FitReport) -> Vec<String> {
    let mut out = Vec::new();
    if r.claims.r2.mean <= 0.0 {
        out.push(format!(
            "The model shows no out-of-fold skill on the {} split (q² = {:.3}): its rankings are no better than the mean.",
            r.settings.split, r.claims.r2.mean
        ));
    }
    let y = &r.y_randomization;
    if y.permutations > 0
        && y.p_value > 0.05
        && y.p_value * (y.permutations as f64 + 1.0) > 1.0 + 1e-9
    {
        out.push(format!(
            "y-randomisation does not separate the model from chance (p = {:.3}).",
            y.p_value
        ));
    }
    let gap = r.random_split.r2.mean - r.claims.r2.mean;
    let se = (r.random_split.r2.se.powi(2) + r.claims.r2.se.powi(2)).sqrt();
    if gap > 2.0 * se && gap > 0.05 {
        out.push(format!(
            "A random split would claim q² {:.3}, {:.3} above the {} split: new candidates unlike the training series will fare worse than random-split figures suggest.",
            r.random_split.r2.mean, gap, r.settings.split
        ));
    }
    if !r.domain.leverage_meaningful {
        out.push("The leverage warning h* is at least 1 (too few rows for the components): leverage is not used.".into());
    }
    for b in r.conformal.bands.iter().filter(|b| !b.used) {
        out.push(format!(
            "The {} band has {} calibration rows: its intervals use the pooled residuals.",
            b.verdict, b.n
        ));
    }
    out
}

/// A few lines for the terminal after a fit.
pub fn summary(outcome: &FitOutcome, version: &str) -> String {
    let r = &outcome.report;
    let mut s = String::new();
    let _ = writeln!(
        s,
        "model {} version {}: {} {}",
        outcome.model.info.id,
        version,
        r.selection.family,
        crate::cli::bundle_cmd::hyper_text(&r.selection.hyper)
    );
    let c = &r.claims;
    let q = &r.random_split;
    let _ = writeln!(
        s,
        "claims ({} split, nested {}×{}): q² {:.3} ± {:.3}, RMSE {:.3} ± {:.3}, Spearman {:.3} ± {:.3}",
        r.settings.split,
        r.settings.folds,
        r.settings.inner_folds,
        c.r2.mean,
        c.r2.se,
        c.rmse.mean,
        c.rmse.se,
        c.spearman.mean,
        c.spearman.se
    );
    let _ = writeln!(
        s,
        "random split would claim q² {:.3} ± {:.3}",
        q.r2.mean, q.r2.se
    );
    let y = &r.y_randomization;
    let _ = writeln!(
        s,
        "y-randomisation: {} permutations, p = {:.3}",
        y.permutations, y.p_value
    );
    for p in &r.conformal.coverage {
        if (p.nominal - 0.9).abs() < 1e-9 {
            let _ = writeln!(
                s,
                "nested-CV coverage of 90% intervals: {:.1}% of {} rows",
                100.0 * p.empirical,
                p.n
            );
        }
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn membership_leaves_out_exactly_each_fold() {
        let folds = Folds {
            k: 3,
            fold_of: vec![0, 1, 2, 0, 1],
        };
        let m = membership(&folds);
        assert_eq!(m.dim(), (5, 4));
        assert!(m.column(0).iter().all(|&b| b));
        for f in 0..3 {
            for i in 0..5 {
                assert_eq!(m[[i, f + 1]], folds.fold_of[i] != f);
            }
        }
    }

    #[test]
    fn split_specs_parse_and_reject() {
        assert_eq!(SplitSpec::parse("cluster").unwrap(), SplitSpec::Cluster);
        assert_eq!(
            SplitSpec::parse("group:series").unwrap(),
            SplitSpec::Group("series".into())
        );
        assert_eq!(SplitSpec::parse("time:date").unwrap().text(), "time:date");
        assert!(SplitSpec::parse("group:").is_err());
        assert!(SplitSpec::parse("clusters").is_err());
    }
}
