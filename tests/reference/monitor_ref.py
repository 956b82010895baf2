"""Reference values for plumbline's outcome monitor, computed with scipy and
statsmodels on fixed and seeded generated inputs.

Writes tests/fixtures/monitor_reference.json:
- gammaln: scipy.special.gammaln;
- norm: scipy.stats.norm.cdf, .sf and .ppf;
- binom: scipy.stats.binom.cdf (P(X <= k)) and .sf(k - 1) (P(X >= k));
- poisson_binom: scipy.stats.poisson_binom.cdf for mixed probabilities;
- wilson: statsmodels.stats.proportion.proportion_confint(method="wilson");
- fisher: scipy.stats.pearsonr(x, y).confidence_interval(level), which is
  Fisher's z interval;
- calibration: sklearn.metrics mean_squared_error / mean_absolute_error /
  r2_score, scipy pearsonr / spearmanr on a generated outcome set.

Every float is rounded to 10 significant digits and the output is
deterministic. Run from the repository root: python3 tests/reference/monitor_ref.py
"""

import json
from pathlib import Path

import numpy as np
from scipy import special, stats
from sklearn.metrics import mean_absolute_error, mean_squared_error, r2_score
from statsmodels.stats.proportion import proportion_confint

OUT = Path(__file__).resolve().parents[1] / "fixtures" / "monitor_reference.json"
SEED = 20261201


def r10(value):
    if isinstance(value, (list, tuple)):
        return [r10(v) for v in value]
    if isinstance(value, np.ndarray):
        return r10(value.tolist())
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        return int(value)
    return float(f"{float(value):.10g}")


def rounded(a):
    return np.array(r10(np.asarray(a, dtype=float)))


def main():
    rng = np.random.default_rng(SEED)
    out = {}
    out["gammaln"] = [
        {"x": x, "value": r10(special.gammaln(x))}
        for x in [0.1, 0.5, 1.0, 1.5, 2.0, 3.7, 10.0, 101.0, 1001.0, 25000.5]
    ]
    out["norm"] = [
        {
            "x": x,
            "cdf": r10(stats.norm.cdf(x)),
            "sf": r10(stats.norm.sf(x)),
            "p": p,
            "ppf": r10(stats.norm.ppf(p)),
        }
        for x, p in [
            (-6.0, 1e-9),
            (-3.2, 0.001),
            (-1.0, 0.02),
            (-0.3, 0.1),
            (0.0, 0.5),
            (0.7, 0.8),
            (1.959963985, 0.975),
            (2.5, 0.99),
            (4.1, 0.9995),
            (8.0, 0.999999),
        ]
    ]
    out["binom"] = [
        {
            "k": k,
            "n": n,
            "p": p,
            "cdf": r10(stats.binom.cdf(k, n, p)),
            "sf_ge": r10(stats.binom.sf(k - 1, n, p)),
        }
        for k, n, p in [
            (0, 10, 0.9),
            (7, 10, 0.9),
            (9, 10, 0.9),
            (80, 100, 0.9),
            (85, 100, 0.9),
            (170, 200, 0.95),
            (430, 500, 0.9),
            (3, 40, 0.05),
            (12, 150, 0.04),
            (1800, 2000, 0.9),
        ]
    ]
    pb = []
    for n, k in [(20, 15), (60, 50), (200, 170)]:
        ps = rounded(rng.choice([0.8, 0.9, 0.95], size=n))
        pb.append({"p": r10(ps), "k": k, "cdf": r10(stats.poisson_binom.cdf(k, ps))})
    out["poisson_binom"] = pb
    wilson = []
    for k, n, level in [
        (0, 10, 0.95),
        (1, 10, 0.95),
        (9, 10, 0.95),
        (10, 10, 0.95),
        (81, 100, 0.90),
        (85, 100, 0.95),
        (430, 500, 0.99),
        (17, 20, 0.80),
        (1, 1, 0.95),
        (9000, 10000, 0.95),
    ]:
        lo, hi = proportion_confint(k, n, alpha=1 - level, method="wilson")
        wilson.append({"k": k, "n": n, "level": level, "lower": r10(lo), "upper": r10(hi)})
    out["wilson"] = wilson
    fisher = []
    for n, rho, level in [(10, 0.3, 0.95), (25, 0.8, 0.90), (60, -0.4, 0.95), (200, 0.95, 0.99)]:
        x = rounded(rng.normal(size=n))
        y = rounded(rho * x + np.sqrt(1 - rho**2) * rng.normal(size=n))
        res = stats.pearsonr(x, y)
        ci = res.confidence_interval(confidence_level=level)
        fisher.append(
            {
                "x": r10(x),
                "y": r10(y),
                "level": level,
                "r": r10(res.statistic),
                "lower": r10(ci.low),
                "upper": r10(ci.high),
            }
        )
    out["fisher"] = fisher
    obs = rounded(rng.normal(size=80))
    pred = rounded(obs + 0.5 * rng.normal(size=80))
    out["calibration"] = {
        "observed": r10(obs),
        "predicted": r10(pred),
        "rmse": r10(np.sqrt(mean_squared_error(obs, pred))),
        "mae": r10(mean_absolute_error(obs, pred)),
        "r2": r10(r2_score(obs, pred)),
        "pearson": r10(stats.pearsonr(obs, pred).statistic),
        "spearman": r10(stats.spearmanr(obs, pred).statistic),
    }
    OUT.write_text(json.dumps(out, indent=1, sort_keys=True) + "\n")


if __name__ == "__main__":
    main()
