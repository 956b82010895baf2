//! The distributions and intervals the monitor needs, written out here so
//! that no statistics crate is pulled in for a handful of formulas: the
//! normal CDF and quantile, the exact binomial and Poisson-binomial tails,
//! Wilson's score interval and Fisher's z interval.
//!
//! Each is checked against scipy / statsmodels in `tests` below (fixture
//! written by `tests/reference/monitor_ref.py`).

use std::f64::consts::PI;

/// ln Γ(x) for x > 0 by the Lanczos approximation (g = 7, nine terms;
/// coefficients as published by Godfrey, quoted in Numerical Recipes 3rd
/// ed. §6.1 — from memory, checked against scipy.special.gammaln in tests).
pub fn ln_gamma(x: f64) -> f64 {
    const C: [f64; 9] = [
        0.999_999_999_999_809_9,
        676.520_368_121_885_1,
        -1_259.139_216_722_402_8,
        771.323_428_777_653_1,
        -176.615_029_162_140_6,
        12.507_343_278_686_905,
        -0.138_571_095_265_720_12,
        9.984_369_578_019_572e-6,
        1.505_632_735_149_311_6e-7,
    ];
    if x < 0.5 {
        // Reflection keeps the series in its accurate range.
        return (PI / (PI * x).sin()).ln() - ln_gamma(1.0 - x);
    }
    let x = x - 1.0;
    let mut a = C[0];
    let t = x + 7.5;
    for (i, c) in C.iter().enumerate().skip(1) {
        a += c / (x + i as f64);
    }
    0.5 * (2.0 * PI).ln() + (x + 0.5) * t.ln() - t + a.ln()
}

/// erfc(x) through the regularised incomplete gamma function,
/// erfc(x) = Q(½, x²) for x ≥ 0 (Abramowitz & Stegun 7.1.2 / 6.5.17): the
/// series for P below x² < 1.5 and Lentz's continued fraction for Q above,
/// both to full double precision.
pub fn erfc(x: f64) -> f64 {
    if x.is_nan() {
        return f64::NAN;
    }
    if x < 0.0 {
        return 2.0 - erfc(-x);
    }
    let a = 0.5;
    let z = x * x;
    if z == 0.0 {
        return 1.0;
    }
    let ln_pre = a * z.ln() - z - ln_gamma(a);
    if z < a + 1.0 {
        let (mut sum, mut term, mut ap) = (1.0 / a, 1.0 / a, a);
        for _ in 0..500 {
            ap += 1.0;
            term *= z / ap;
            sum += term;
            if term.abs() < sum.abs() * 1e-17 {
                break;
            }
        }
        1.0 - sum * ln_pre.exp()
    } else {
        const TINY: f64 = 1e-300;
        let mut b = z + 1.0 - a;
        let mut c = 1.0 / TINY;
        let mut d = 1.0 / b;
        let mut h = d;
        for i in 1..500 {
            let an = -(i as f64) * (i as f64 - a);
            b += 2.0;
            d = an * d + b;
            if d.abs() < TINY {
                d = TINY;
            }
            c = b + an / c;
            if c.abs() < TINY {
                c = TINY;
            }
            d = 1.0 / d;
            let delta = d * c;
            h *= delta;
            if (delta - 1.0).abs() < 1e-16 {
                break;
            }
        }
        ln_pre.exp() * h
    }
}

/// Standard normal CDF Φ(x).
pub fn norm_cdf(x: f64) -> f64 {
    0.5 * erfc(-x / std::f64::consts::SQRT_2)
}

/// Upper tail 1 − Φ(x), accurate far into the tail.
pub fn norm_sf(x: f64) -> f64 {
    0.5 * erfc(x / std::f64::consts::SQRT_2)
}

/// Standard normal quantile Φ⁻¹(p): Acklam's rational approximation
/// (relative error 1.15e-9; coefficients from memory) refined by one Halley
/// step on the accurate CDF above, which brings it to double precision.
pub fn norm_ppf(p: f64) -> f64 {
    if !(0.0..=1.0).contains(&p) || p.is_nan() {
        return f64::NAN;
    }
    if p == 0.0 {
        return f64::NEG_INFINITY;
    }
    if p == 1.0 {
        return f64::INFINITY;
    }
    const A: [f64; 6] = [
        -3.969_683_028_665_376e1,
        2.209_460_984_245_205e2,
        -2.759_285_104_469_687e2,
        1.383_577_518_672_69e2,
        -3.066_479_806_614_716e1,
        2.506_628_277_459_239,
    ];
    const B: [f64; 5] = [
        -5.447_609_879_822_406e1,
        1.615_858_368_580_409e2,
        -1.556_989_798_598_866e2,
        6.680_131_188_771_972e1,
        -1.328_068_155_288_572e1,
    ];
    const C: [f64; 6] = [
        -7.784_894_002_430_293e-3,
        -3.223_964_580_411_365e-1,
        -2.400_758_277_161_838,
        -2.549_732_539_343_734,
        4.374_664_141_464_968,
        2.938_163_982_698_783,
    ];
    const D: [f64; 4] = [
        7.784_695_709_041_462e-3,
        3.224_671_290_700_398e-1,
        2.445_134_137_142_996,
        3.754_408_661_907_416,
    ];
    let low = 0.02425;
    let x = if p < low {
        let q = (-2.0 * p.ln()).sqrt();
        (((((C[0] * q + C[1]) * q + C[2]) * q + C[3]) * q + C[4]) * q + C[5])
            / ((((D[0] * q + D[1]) * q + D[2]) * q + D[3]) * q + 1.0)
    } else if p <= 1.0 - low {
        let q = p - 0.5;
        let r = q * q;
        (((((A[0] * r + A[1]) * r + A[2]) * r + A[3]) * r + A[4]) * r + A[5]) * q
            / (((((B[0] * r + B[1]) * r + B[2]) * r + B[3]) * r + B[4]) * r + 1.0)
    } else {
        let q = (-2.0 * (1.0 - p).ln()).sqrt();
        -(((((C[0] * q + C[1]) * q + C[2]) * q + C[3]) * q + C[4]) * q + C[5])
            / ((((D[0] * q + D[1]) * q + D[2]) * q + D[3]) * q + 1.0)
    };
    // Halley refinement (Acklam's note).
    let e = norm_cdf(x) - p;
    let u = e * (2.0 * PI).sqrt() * (x * x / 2.0).exp();
    x - u / (1.0 + x * u / 2.0)
}

/// The two-sided normal critical value for a confidence level in (0, 1).
pub fn z_two_sided(level: f64) -> f64 {
    norm_ppf(0.5 + level / 2.0)
}

fn ln_choose(n: u64, k: u64) -> f64 {
    ln_gamma(n as f64 + 1.0) - ln_gamma(k as f64 + 1.0) - ln_gamma((n - k) as f64 + 1.0)
}

/// P(X ≤ k) for X ~ Binomial(n, p), summed exactly in log space.
pub fn binom_cdf(k: u64, n: u64, p: f64) -> f64 {
    if k >= n {
        return 1.0;
    }
    if p <= 0.0 {
        return 1.0;
    }
    if p >= 1.0 {
        return 0.0;
    }
    let (lp, lq) = (p.ln(), (1.0 - p).ln());
    let mut total = 0.0;
    for i in 0..=k {
        total += (ln_choose(n, i) + i as f64 * lp + (n - i) as f64 * lq).exp();
    }
    total.min(1.0)
}

/// P(X ≥ k) for X ~ Binomial(n, p).
pub fn binom_sf_ge(k: u64, n: u64, p: f64) -> f64 {
    if k == 0 {
        return 1.0;
    }
    if k > n {
        return 0.0;
    }
    if p <= 0.0 {
        return 0.0;
    }
    if p >= 1.0 {
        return 1.0;
    }
    let (lp, lq) = (p.ln(), (1.0 - p).ln());
    let mut total = 0.0;
    for i in k..=n {
        total += (ln_choose(n, i) + i as f64 * lp + (n - i) as f64 * lq).exp();
    }
    total.min(1.0)
}

/// Largest set for which the Poisson-binomial is computed exactly; above it
/// the normal approximation with continuity correction is used (common
/// practice: by Lyapunov's CLT it is accurate to well under 1% there).
pub const POISSON_BINOMIAL_EXACT_MAX: usize = 4000;

/// P(X ≤ k) for X a sum of independent Bernoulli(pᵢ): the number of
/// intervals expected to cover when each was made at its own confidence.
/// Equal probabilities use [`binom_cdf`]; otherwise the exact recursion
/// over the distribution of the partial sums, truncated at k + 1.
pub fn poisson_binom_cdf(k: u64, ps: &[f64]) -> f64 {
    let n = ps.len();
    if k as usize >= n {
        return 1.0;
    }
    if let Some(&p0) = ps.first()
        && ps.iter().all(|&p| p == p0)
    {
        return binom_cdf(k, n as u64, p0);
    }
    if n > POISSON_BINOMIAL_EXACT_MAX {
        let mean: f64 = ps.iter().sum();
        let var: f64 = ps.iter().map(|p| p * (1.0 - p)).sum();
        if var <= 0.0 {
            return if (k as f64) >= mean { 1.0 } else { 0.0 };
        }
        return norm_cdf((k as f64 + 0.5 - mean) / var.sqrt());
    }
    let k = k as usize;
    // dist[j] = P(partial sum = j) for j ≤ k; mass above k is dropped as it
    // never returns below.
    let mut dist = vec![0.0; k + 1];
    dist[0] = 1.0;
    for &p in ps {
        for j in (0..=k).rev() {
            let from_below = if j > 0 { dist[j - 1] * p } else { 0.0 };
            dist[j] = dist[j] * (1.0 - p) + from_below;
        }
    }
    dist.iter().sum::<f64>().min(1.0)
}

/// An estimate with a two-sided interval.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Interval {
    pub estimate: f64,
    pub lower: f64,
    pub upper: f64,
}

impl Interval {
    pub fn contains(&self, v: f64) -> bool {
        self.lower <= v && v <= self.upper
    }
}

/// Wilson's score interval for a binomial proportion (Wilson 1927, JASA 22,
/// 209–212), the `method="wilson"` of statsmodels' `proportion_confint`.
/// None for n = 0.
pub fn wilson(successes: u64, n: u64, level: f64) -> Option<Interval> {
    if n == 0 || successes > n {
        return None;
    }
    let z = z_two_sided(level);
    let nf = n as f64;
    let p = successes as f64 / nf;
    let z2 = z * z;
    let denom = 1.0 + z2 / nf;
    let centre = (p + z2 / (2.0 * nf)) / denom;
    let half = z / denom * (p * (1.0 - p) / nf + z2 / (4.0 * nf * nf)).sqrt();
    Some(Interval {
        estimate: p,
        lower: (centre - half).max(0.0),
        upper: (centre + half).min(1.0),
    })
}

/// Fisher's z interval for a correlation: tanh(atanh r ± z/√(n − 3))
/// (Fisher 1921), as scipy's `PearsonRResult.confidence_interval()`.
/// None when n ≤ 3 or r is not finite.
pub fn fisher_z(r: f64, n: usize, level: f64) -> Option<Interval> {
    if n <= 3 || !r.is_finite() {
        return None;
    }
    let r = r.clamp(-1.0, 1.0);
    let zr = r.atanh();
    let half = z_two_sided(level) / ((n - 3) as f64).sqrt();
    Some(Interval {
        estimate: r,
        lower: (zr - half).tanh(),
        upper: (zr + half).tanh(),
    })
}

/// Mean and its normal interval from the sample standard deviation
/// (ddof = 1): the CLT interval used for the mean absolute and squared
/// errors. None below two values.
pub fn mean_interval(values: &[f64], level: f64) -> Option<(Interval, f64)> {
    let n = values.len();
    if n < 2 {
        return None;
    }
    let nf = n as f64;
    let mean = values.iter().sum::<f64>() / nf;
    let var = values.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (nf - 1.0);
    let se = (var / nf).sqrt();
    let z = z_two_sided(level);
    Some((
        Interval {
            estimate: mean,
            lower: mean - z * se,
            upper: mean + z * se,
        },
        se,
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn fixture() -> serde_json::Value {
        let path = concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/fixtures/monitor_reference.json"
        );
        let text = std::fs::read_to_string(path).expect("run tests/reference/monitor_ref.py");
        serde_json::from_str(&text).expect("fixture JSON")
    }

    fn f(v: &serde_json::Value) -> f64 {
        v.as_f64().expect("number")
    }

    fn close(a: f64, b: f64, rel: f64) -> bool {
        (a - b).abs() <= rel * b.abs().max(1e-300) || (a - b).abs() < 1e-14
    }

    /// Reference: scipy.special.gammaln and scipy.stats.norm.cdf / .ppf.
    #[test]
    fn special_functions_match_scipy() {
        let fx = fixture();
        for c in fx["gammaln"].as_array().expect("cases") {
            let (x, want) = (f(&c["x"]), f(&c["value"]));
            assert!(
                close(ln_gamma(x), want, 1e-9),
                "lgamma({x}) {} vs {want}",
                ln_gamma(x)
            );
        }
        for c in fx["norm"].as_array().expect("cases") {
            let x = f(&c["x"]);
            assert!(close(norm_cdf(x), f(&c["cdf"]), 1e-9), "cdf({x})");
            assert!(close(norm_sf(x), f(&c["sf"]), 1e-9), "sf({x})");
            let p = f(&c["p"]);
            assert!(
                close(norm_ppf(p), f(&c["ppf"]), 1e-9),
                "ppf({p}) {}",
                norm_ppf(p)
            );
        }
    }

    /// Reference: scipy.stats.binom.cdf / .sf and scipy.stats.poisson_binom.cdf.
    #[test]
    fn binomial_tails_match_scipy() {
        let fx = fixture();
        for c in fx["binom"].as_array().expect("cases") {
            let (k, n, p) = (
                c["k"].as_u64().expect("k"),
                c["n"].as_u64().expect("n"),
                f(&c["p"]),
            );
            assert!(
                close(binom_cdf(k, n, p), f(&c["cdf"]), 1e-8),
                "cdf {k} {n} {p}"
            );
            assert!(
                close(binom_sf_ge(k, n, p), f(&c["sf_ge"]), 1e-8),
                "sf {k} {n} {p}"
            );
        }
        for c in fx["poisson_binom"].as_array().expect("cases") {
            let ps: Vec<f64> = c["p"].as_array().expect("p").iter().map(f).collect();
            let k = c["k"].as_u64().expect("k");
            let got = poisson_binom_cdf(k, &ps);
            assert!(
                close(got, f(&c["cdf"]), 1e-8),
                "k {k}: {got} vs {}",
                f(&c["cdf"])
            );
        }
    }

    /// Reference: statsmodels.stats.proportion.proportion_confint(method="wilson").
    #[test]
    fn wilson_intervals_match_statsmodels() {
        let fx = fixture();
        let cases = fx["wilson"].as_array().expect("cases");
        assert!(cases.len() >= 8);
        for c in cases {
            let (k, n, level) = (
                c["k"].as_u64().expect("k"),
                c["n"].as_u64().expect("n"),
                f(&c["level"]),
            );
            let w = wilson(k, n, level).expect("n > 0");
            assert!(close(w.lower, f(&c["lower"]), 1e-9), "{k}/{n}: {w:?}");
            assert!(close(w.upper, f(&c["upper"]), 1e-9), "{k}/{n}: {w:?}");
        }
        assert!(wilson(0, 0, 0.95).is_none());
    }

    /// Reference: scipy.stats.pearsonr(x, y).confidence_interval(level).
    #[test]
    fn fisher_z_intervals_match_scipy() {
        let fx = fixture();
        let cases = fx["fisher"].as_array().expect("cases");
        assert!(cases.len() >= 4);
        for c in cases {
            let x: Vec<f64> = c["x"].as_array().expect("x").iter().map(f).collect();
            let y: Vec<f64> = c["y"].as_array().expect("y").iter().map(f).collect();
            let level = f(&c["level"]);
            let r = crate::validate::pearson(
                ndarray::ArrayView1::from(&x),
                ndarray::ArrayView1::from(&y),
            );
            assert!(close(r, f(&c["r"]), 1e-9));
            let iv = fisher_z(r, x.len(), level).expect("n > 3");
            assert!(close(iv.lower, f(&c["lower"]), 1e-8), "{iv:?}");
            assert!(close(iv.upper, f(&c["upper"]), 1e-8), "{iv:?}");
        }
        assert!(fisher_z(0.5, 3, 0.95).is_none());
    }
}
