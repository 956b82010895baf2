//! The outcome monitor: what the lab measured set beside what the service
//! predicted. Pure numerics, no SQL or gRPC: the service reads the pairs
//! from the audit store and hands them here.
//!
//! # Layout
//! - [`stats`]: normal and binomial distributions, Wilson and Fisher z
//!   intervals;
//! - this file: realised calibration (errors, correlations, interval
//!   coverage, overall and per verdict) and the alarms computed from it.
//!
//! # Alarms
//! Each is a one-sided test at level `alpha`, re-run on every call, so an
//! alarm clears itself when later outcomes bring the figures back:
//! - **coverage**: covered count ~ Poisson-binomial with the confidence each
//!   interval was made at; fires when P(X ≤ covered) < alpha;
//! - **error**: the mean squared error of the outcomes against the fit's
//!   cross-validated MSE claim, z = (MSE − claim) / √(se² + se_claim²);
//!   fires when the upper-tail p < alpha (CLT on the mean of squared
//!   errors, common practice);
//! - **outside share**: outside-domain candidates among the recent queries
//!   ~ Binomial(n, p₀) with p₀ the out-of-fold outside share of the fit;
//!   fires when P(X ≥ outside) < alpha.

pub mod stats;

use std::collections::BTreeMap;

use ndarray::ArrayView1;

pub use stats::Interval;

/// One recorded outcome with what was predicted for it.
#[derive(Clone, Debug, PartialEq)]
pub struct Pair {
    pub observed: f64,
    /// None for refused candidates (no prediction was given).
    pub predicted: Option<f64>,
    pub lower: Option<f64>,
    pub upper: Option<f64>,
    /// The confidence the interval was made at.
    pub confidence: f64,
    /// `inside`, `border`, `outside`, or none for rejected candidates.
    pub verdict: Option<String>,
}

/// Interval coverage of one group.
#[derive(Clone, Debug, PartialEq)]
pub struct Coverage {
    /// Outcomes with an interval.
    pub n: u64,
    pub covered: u64,
    /// Realised rate with its Wilson interval.
    pub rate: Interval,
    /// Mean confidence the intervals were made at (the nominal rate).
    pub nominal: f64,
    /// One-sided P(covered or fewer | every interval as good as claimed).
    pub p_below: f64,
}

/// Errors and correlations of one group.
#[derive(Clone, Debug, PartialEq)]
pub struct Errors {
    /// Outcomes with a prediction.
    pub n: u64,
    /// RMSE; interval by the delta method on the MSE interval.
    pub rmse: Interval,
    /// MSE with its normal interval and standard error.
    pub mse: Interval,
    pub mse_se: f64,
    pub mae: Interval,
    pub r2: f64,
    /// Pearson and Spearman with Fisher z intervals (None when n ≤ 3 or a
    /// side is constant).
    pub pearson: Option<Interval>,
    pub spearman: Option<Interval>,
}

/// Calibration of one group of outcomes.
#[derive(Clone, Debug, PartialEq)]
pub struct Group {
    pub outcomes: u64,
    pub errors: Option<Errors>,
    pub coverage: Option<Coverage>,
}

/// Realised calibration, overall and by verdict.
#[derive(Clone, Debug, PartialEq)]
pub struct Calibration {
    /// The level of every uncertainty interval reported.
    pub level: f64,
    pub overall: Group,
    pub by_verdict: BTreeMap<String, Group>,
}

/// Computes the calibration of `pairs`, intervals at `level`.
pub fn calibrate(pairs: &[Pair], level: f64) -> Calibration {
    let mut by: BTreeMap<String, Vec<&Pair>> = BTreeMap::new();
    for p in pairs {
        let key = p.verdict.clone().unwrap_or_else(|| "none".to_string());
        by.entry(key).or_default().push(p);
    }
    let all: Vec<&Pair> = pairs.iter().collect();
    Calibration {
        level,
        overall: group(&all, level),
        by_verdict: by.into_iter().map(|(k, v)| (k, group(&v, level))).collect(),
    }
}

fn group(pairs: &[&Pair], level: f64) -> Group {
    Group {
        outcomes: pairs.len() as u64,
        errors: errors(pairs, level),
        coverage: coverage(pairs, level),
    }
}

fn errors(pairs: &[&Pair], level: f64) -> Option<Errors> {
    let (obs, pred): (Vec<f64>, Vec<f64>) = pairs
        .iter()
        .filter_map(|p| p.predicted.map(|q| (p.observed, q)))
        .unzip();
    let n = obs.len();
    if n < 2 {
        return None;
    }
    let m = crate::validate::metrics(ArrayView1::from(&obs), ArrayView1::from(&pred));
    let sq: Vec<f64> = obs
        .iter()
        .zip(&pred)
        .map(|(a, b)| (a - b).powi(2))
        .collect();
    let ab: Vec<f64> = obs.iter().zip(&pred).map(|(a, b)| (a - b).abs()).collect();
    let (mse, mse_se) = stats::mean_interval(&sq, level)?;
    let (mae, _) = stats::mean_interval(&ab, level)?;
    // RMSE bounds are the square roots of the MSE bounds (monotone map of
    // the interval), clamped at zero.
    let rmse = Interval {
        estimate: m.rmse,
        lower: mse.lower.max(0.0).sqrt(),
        upper: mse.upper.max(0.0).sqrt(),
    };
    Some(Errors {
        n: n as u64,
        rmse,
        mse,
        mse_se,
        mae,
        r2: m.r2,
        pearson: stats::fisher_z(m.pearson, n, level),
        // Fisher z for Spearman's rho too (common practice; slightly narrow
        // for strong rank correlations).
        spearman: stats::fisher_z(m.spearman, n, level),
    })
}

fn coverage(pairs: &[&Pair], level: f64) -> Option<Coverage> {
    let mut ps = Vec::new();
    let mut covered = 0u64;
    for p in pairs {
        if let (Some(lo), Some(hi)) = (p.lower, p.upper) {
            ps.push(p.confidence);
            if lo <= p.observed && p.observed <= hi {
                covered += 1;
            }
        }
    }
    let n = ps.len() as u64;
    let rate = stats::wilson(covered, n, level)?;
    Some(Coverage {
        n,
        covered,
        rate,
        nominal: ps.iter().sum::<f64>() / n as f64,
        p_below: stats::poisson_binom_cdf(covered, &ps),
    })
}

/// Which alarm.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord)]
pub enum AlarmKind {
    Coverage,
    Error,
    OutsideShare,
}

impl AlarmKind {
    pub fn name(self) -> &'static str {
        match self {
            AlarmKind::Coverage => "coverage_below_nominal",
            AlarmKind::Error => "error_above_claim",
            AlarmKind::OutsideShare => "outside_share_above_training",
        }
    }
}

/// One alarm's state.
#[derive(Clone, Debug, PartialEq)]
pub struct Alarm {
    pub kind: AlarmKind,
    pub firing: bool,
    /// The one-sided p-value; NaN when the test could not be made.
    pub p_value: f64,
    pub observed: f64,
    pub expected: f64,
    /// Observations the test rests on.
    pub n: u64,
    /// A sentence for people.
    pub detail: String,
}

/// The fit's claim the error alarm compares with.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct MseClaim {
    pub mean: f64,
    pub se: f64,
}

/// Outside-domain queries over a recent window.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct OutsideWindow {
    pub outside: u64,
    pub total: u64,
    /// The out-of-fold outside share of the fit, in [0, 1].
    pub expected: f64,
}

/// Evaluates the three alarms at level `alpha`. An alarm that cannot be
/// tested (no outcomes, no claim) is reported as not firing, p NaN.
pub fn alarms(
    cal: &Calibration,
    claim: Option<MseClaim>,
    window: Option<OutsideWindow>,
    alpha: f64,
) -> Vec<Alarm> {
    let mut out = Vec::with_capacity(3);
    out.push(match &cal.overall.coverage {
        Some(c) => {
            let firing = c.p_below < alpha;
            Alarm {
                kind: AlarmKind::Coverage,
                firing,
                p_value: c.p_below,
                observed: c.rate.estimate,
                expected: c.nominal,
                n: c.n,
                detail: format!(
                    "{} of {} intervals covered ({:.1}%, nominal {:.1}%); P(this few | \
                     calibrated) = {:.3e}{}",
                    c.covered,
                    c.n,
                    100.0 * c.rate.estimate,
                    100.0 * c.nominal,
                    c.p_below,
                    if firing {
                        "; the intervals are too narrow for the new data: refit or recalibrate"
                    } else {
                        ""
                    }
                ),
            }
        }
        None => untested(AlarmKind::Coverage, "no outcome has an interval yet"),
    });
    out.push(match (&cal.overall.errors, claim) {
        (Some(e), Some(c)) if c.mean.is_finite() && c.se.is_finite() => {
            let sd = (e.mse_se.powi(2) + c.se.powi(2)).sqrt();
            let z = (e.mse.estimate - c.mean) / sd;
            let p = if sd > 0.0 {
                stats::norm_sf(z)
            } else if e.mse.estimate > c.mean {
                0.0
            } else {
                1.0
            };
            let firing = p < alpha;
            Alarm {
                kind: AlarmKind::Error,
                firing,
                p_value: p,
                observed: e.mse.estimate,
                expected: c.mean,
                n: e.n,
                detail: format!(
                    "MSE on {} outcomes {:.4} against the cross-validated claim {:.4} \
                     (se {:.3e}); one-sided p = {:.3e}{}",
                    e.n,
                    e.mse.estimate,
                    c.mean,
                    c.se,
                    p,
                    if firing {
                        "; the model does worse than its fit promised: refit on recent data"
                    } else {
                        ""
                    }
                ),
            }
        }
        (None, _) => untested(
            AlarmKind::Error,
            "fewer than two outcomes with a prediction",
        ),
        (_, _) => untested(AlarmKind::Error, "the bundle carries no MSE claim"),
    });
    out.push(match window {
        Some(w) if w.total > 0 && (0.0..=1.0).contains(&w.expected) => {
            let p = stats::binom_sf_ge(w.outside, w.total, w.expected);
            let firing = p < alpha;
            Alarm {
                kind: AlarmKind::OutsideShare,
                firing,
                p_value: p,
                observed: w.outside as f64 / w.total as f64,
                expected: w.expected,
                n: w.total,
                detail: format!(
                    "{} of the last {} scored candidates outside the domain ({:.1}%, training \
                     expectation {:.1}%); P(this many | training mix) = {:.3e}{}",
                    w.outside,
                    w.total,
                    100.0 * w.outside as f64 / w.total as f64,
                    100.0 * w.expected,
                    p,
                    if firing {
                        "; the queries have moved away from the training chemistry"
                    } else {
                        ""
                    }
                ),
            }
        }
        _ => untested(
            AlarmKind::OutsideShare,
            "no scored candidates in the window",
        ),
    });
    out
}

fn untested(kind: AlarmKind, why: &str) -> Alarm {
    Alarm {
        kind,
        firing: false,
        p_value: f64::NAN,
        observed: f64::NAN,
        expected: f64::NAN,
        n: 0,
        detail: format!("not tested: {why}"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_xoshiro::Xoshiro256PlusPlus;

    fn normal(rng: &mut Xoshiro256PlusPlus) -> f64 {
        // Box–Muller.
        let u1: f64 = rng.r#gen::<f64>().max(1e-300);
        let u2: f64 = rng.r#gen();
        (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
    }

    /// A stream where the model's predictive distribution is N(pred, 1) and
    /// the truth is drawn from N(pred + shift, scale²); intervals are the
    /// exact 90% normal ones.
    fn stream(n: usize, shift: f64, scale: f64, seed: u64) -> Vec<Pair> {
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
        let z = stats::z_two_sided(0.9);
        (0..n)
            .map(|i| {
                let pred = normal(&mut rng) * 3.0;
                let observed = pred + shift + scale * normal(&mut rng);
                Pair {
                    observed,
                    predicted: Some(pred),
                    lower: Some(pred - z),
                    upper: Some(pred + z),
                    confidence: 0.9,
                    verdict: Some(if i % 4 == 0 { "border" } else { "inside" }.into()),
                }
            })
            .collect()
    }

    /// Reference: sklearn.metrics and scipy.stats on the same pairs
    /// (tests/reference/monitor_ref.py, "calibration").
    #[test]
    fn point_figures_match_sklearn_and_scipy() {
        let path = concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/fixtures/monitor_reference.json"
        );
        let fx: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
        let c = &fx["calibration"];
        let get = |k: &str| -> Vec<f64> {
            c[k].as_array()
                .unwrap()
                .iter()
                .map(|v| v.as_f64().unwrap())
                .collect()
        };
        let pairs: Vec<Pair> = get("observed")
            .into_iter()
            .zip(get("predicted"))
            .map(|(o, p)| Pair {
                observed: o,
                predicted: Some(p),
                lower: None,
                upper: None,
                confidence: 0.9,
                verdict: Some("inside".into()),
            })
            .collect();
        let cal = calibrate(&pairs, 0.95);
        let e = cal.overall.errors.unwrap();
        let want = |k: &str| c[k].as_f64().unwrap();
        for (got, key) in [
            (e.rmse.estimate, "rmse"),
            (e.mae.estimate, "mae"),
            (e.r2, "r2"),
            (e.pearson.unwrap().estimate, "pearson"),
            (e.spearman.unwrap().estimate, "spearman"),
        ] {
            assert!(
                (got - want(key)).abs() < 1e-8 * want(key).abs().max(1.0),
                "{key}"
            );
        }
        assert!(cal.overall.coverage.is_none());
    }

    #[test]
    fn truth_matching_the_model_raises_no_alarm_and_covers_nominally() {
        let pairs = stream(600, 0.0, 1.0, 11);
        let cal = calibrate(&pairs, 0.95);
        let c = cal.overall.coverage.as_ref().unwrap();
        assert!(c.rate.contains(0.9), "{c:?}");
        assert!(cal.by_verdict.contains_key("border") && cal.by_verdict.contains_key("inside"));
        let claim = MseClaim {
            mean: 1.0,
            se: 0.05,
        };
        let window = OutsideWindow {
            outside: 6,
            total: 100,
            expected: 0.05,
        };
        let a = alarms(&cal, Some(claim), Some(window), 0.01);
        assert_eq!(a.len(), 3);
        assert!(a.iter().all(|x| !x.firing), "{a:?}");
        assert!(a.iter().all(|x| x.p_value.is_finite()));
    }

    #[test]
    fn shifted_truth_fires_coverage_and_error_alarms() {
        let pairs = stream(300, 1.0, 1.3, 12);
        let cal = calibrate(&pairs, 0.95);
        let c = cal.overall.coverage.as_ref().unwrap();
        assert!(c.rate.upper < 0.9, "{c:?}");
        let claim = MseClaim {
            mean: 1.0,
            se: 0.05,
        };
        let a = alarms(&cal, Some(claim), None, 0.01);
        assert!(
            a[0].firing && a[0].kind == AlarmKind::Coverage,
            "{:?}",
            a[0]
        );
        assert!(a[1].firing && a[1].kind == AlarmKind::Error, "{:?}", a[1]);
        assert!(!a[2].firing && a[2].p_value.is_nan());
    }

    #[test]
    fn an_outside_share_well_above_training_fires() {
        let cal = calibrate(&[], 0.95);
        let w = OutsideWindow {
            outside: 20,
            total: 100,
            expected: 0.05,
        };
        let a = alarms(&cal, None, Some(w), 0.01);
        assert!(a[2].firing, "{:?}", a[2]);
        // Binomial(100, 0.05) upper tail at 20 is about 1e-6 (scipy.stats.binom.sf(19, 100, 0.05)
        // = 1.1e-6, from memory); the exact sum is checked in stats against scipy.
        assert!(a[2].p_value < 1e-4);
        assert!(!a[0].firing && !a[1].firing);
    }
}
