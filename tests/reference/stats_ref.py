"""Reference values for plumbline's validation statistics, computed with
scipy, scikit-learn and numpy on seeded generated inputs.

Writes tests/fixtures/stats_reference.json:
- correlations: scipy.stats.pearsonr / spearmanr (average ranks for ties);
- regression: sklearn.metrics mean_squared_error, mean_absolute_error,
  r2_score (RMSE as numpy.sqrt of the MSE);
- sem: numpy mean and scipy.stats.sem (ddof = 1);
- sha256: hashlib's SHA-256 of a small CSV text;
- grid_cv: sklearn Ridge over a penalty grid on fixed folds (per-fold test
  and train MSE, test R², their mean and scipy.stats.sem, out-of-fold
  predictions);
- nested: nested cross-validation of sklearn Ridge with StandardScaler on
  the outer-training rows, time-ordered folds cut like numpy.array_split,
  the one-SE rule (Hastie, Tibshirani & Friedman, ESL 2nd ed. section 7.10),
  and the final selection on all rows.

Inputs are rounded to 10 significant digits before anything is computed
from them, every output float is rounded to 10 significant digits, and the
output is deterministic, so rerunning this script reproduces the fixture
byte for byte.

Run from the repository root: python3 tests/reference/stats_ref.py
"""

import hashlib
import json
from pathlib import Path

import numpy as np
from scipy import stats
from sklearn.linear_model import Ridge
from sklearn.metrics import mean_absolute_error, mean_squared_error, r2_score
from sklearn.preprocessing import StandardScaler

OUT = Path(__file__).resolve().parents[1] / "fixtures" / "stats_reference.json"
SEED = 20240611


def r10(value):
    """Round floats (in nested lists) to 10 significant digits."""
    if isinstance(value, (list, tuple)):
        return [r10(v) for v in value]
    if isinstance(value, np.ndarray):
        return r10(value.tolist())
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    return float(f"{float(value):.10g}")


def rounded(a):
    """An input array rounded to 10 significant digits, as it is written."""
    return np.array(r10(np.asarray(a, dtype=float)))


def correlations(rng):
    cases = []
    x = rounded(rng.normal(size=30))
    cases.append(("continuous", x, rounded(0.6 * x + rng.normal(scale=0.8, size=30))))
    x = rng.integers(0, 6, size=40).astype(float)
    cases.append(("ties", x, x + rng.integers(0, 8, size=40).astype(float)))
    x = rounded(rng.uniform(-2, 2, size=15))
    cases.append(("negative_monotone", x, rounded(-(x**3) + rng.normal(scale=0.3, size=15))))
    x = np.array([1.0, 2.0, 2.0, 2.0, 5.0, 7.0, 7.0])
    cases.append(("ties_both_sides", x, np.array([3.0, 1.0, 4.0, 1.0, 5.0, 9.0, 2.0])))
    out = []
    for name, a, b in cases:
        out.append(
            {
                "name": name,
                "x": r10(a),
                "y": r10(b),
                "pearson": r10(stats.pearsonr(a, b).statistic),
                "spearman": r10(stats.spearmanr(a, b).statistic),
            }
        )
    return out


def regression(rng):
    out = []
    for name, n, noise in [("close", 25, 0.3), ("poor", 20, 3.0), ("tiny", 4, 1.0)]:
        y = rounded(rng.normal(loc=5.0, scale=2.0, size=n))
        pred = rounded(y + rng.normal(scale=noise, size=n) + 0.2)
        mse = mean_squared_error(y, pred)
        out.append(
            {
                "name": name,
                "y": r10(y),
                "pred": r10(pred),
                "mse": r10(mse),
                "rmse": r10(np.sqrt(mse)),
                "mae": r10(mean_absolute_error(y, pred)),
                "r2": r10(r2_score(y, pred)),
                "pearson": r10(stats.pearsonr(y, pred).statistic),
                "spearman": r10(stats.spearmanr(y, pred).statistic),
            }
        )
    return out


def sem_cases(rng):
    out = []
    for values in [rounded(rng.normal(size=5)), rounded(rng.exponential(size=10)), np.array([2.0, 4.0])]:
        out.append(
            {
                "values": r10(values),
                "mean": r10(np.mean(values)),
                "se": r10(stats.sem(values, ddof=1)),
            }
        )
    return out


def one_se(mean, se):
    """ESL section 7.10: the first (simplest) index within one SE of the best.
    Also returns the smallest relative gap to the threshold and between the
    best two means, so the fixture can refuse inputs where rounding could
    flip the choice."""
    mean = np.asarray(mean)
    best = int(np.argmin(mean))
    threshold = mean[best] + se[best]
    choice = int(np.flatnonzero(mean <= threshold)[0])
    gaps = np.abs(mean - threshold) / abs(threshold)
    ordered = np.sort(mean)
    best_gap = (ordered[1] - ordered[0]) / abs(ordered[0]) if len(mean) > 1 else 1.0
    return choice, float(min(gaps.min(), best_gap))


def fold_scores(alpha, x, y, fold_of, k):
    """Per fold: test MSE, train MSE and test R² per target column, and the
    out-of-fold predictions."""
    n, c = y.shape
    oof = np.zeros((n, c))
    test_mse, train_mse, test_r2 = [], [], []
    for f in range(k):
        te, tr = fold_of == f, fold_of != f
        model = Ridge(alpha=alpha).fit(x[tr], y[tr])
        # A single target column comes back flat: keep predictions n × c.
        pt = model.predict(x[te]).reshape(-1, c)
        ptr = model.predict(x[tr]).reshape(-1, c)
        oof[te] = pt
        test_mse.append([mean_squared_error(y[te, j], pt[:, j]) for j in range(c)])
        train_mse.append([mean_squared_error(y[tr, j], ptr[:, j]) for j in range(c)])
        test_r2.append([r2_score(y[te, j], pt[:, j]) for j in range(c)])
    return np.array(test_mse), np.array(train_mse), np.array(test_r2), oof


def summarise(per_fold):
    """Mean and standard error over folds (axis 0)."""
    return per_fold.mean(axis=0), stats.sem(per_fold, axis=0, ddof=1)


def grid_cv(rng):
    n, p, k = 40, 3, 4
    x = rounded(StandardScaler().fit_transform(rng.normal(size=(n, p))))
    w = np.array([1.0, -0.5, 0.25])
    y0 = x @ w + rng.normal(scale=0.7, size=n)
    y = rounded(np.column_stack([y0, rng.permutation(y0)]))
    fold_of = rng.permutation(np.arange(n) % k)
    alphas = [100.0, 10.0, 1.0, 0.1]
    results = {"test_mse": [], "train_mse": [], "test_r2": [], "oof": []}
    for alpha in alphas:
        te, tr, r2, oof = fold_scores(alpha, x, y, fold_of, k)
        for key, per_fold in [("test_mse", te), ("train_mse", tr), ("test_r2", r2)]:
            mean, se = summarise(per_fold)
            results[key].append({"mean": r10(mean), "se": r10(se)})
        results["oof"].append(r10(oof))
    means = [g["mean"][0] for g in results["test_mse"]]
    ses = [g["se"][0] for g in results["test_mse"]]
    choice, margin = one_se(means, ses)
    assert margin > 1e-6, f"grid_cv one-SE choice too close to call ({margin})"
    return {
        "x": r10(x),
        "y": r10(y),
        "k": k,
        "fold_of": r10(fold_of),
        "alphas": alphas,
        **results,
        "one_se_choice": choice,
    }


def time_folds(times, k):
    """Contiguous blocks in time order, sized as numpy.array_split sizes them."""
    order = np.argsort(times, kind="stable")
    fold_of = np.empty(len(times), dtype=int)
    for f, block in enumerate(np.array_split(order, k)):
        fold_of[block] = f
    return fold_of


def metric_row(y, pred):
    mse = mean_squared_error(y, pred)
    return {
        "mse": mse,
        "rmse": float(np.sqrt(mse)),
        "mae": mean_absolute_error(y, pred),
        "r2": r2_score(y, pred),
        "pearson": stats.pearsonr(y, pred).statistic,
        "spearman": stats.spearmanr(y, pred).statistic,
    }


def inner_choice(alphas, xs, y, inner_of, k_inner):
    """One-SE choice on the inner folds; also the inner fold models at every
    alpha (for their predictions of the outer-test rows)."""
    mse = np.array(
        [fold_scores(a, xs, y[:, None], inner_of, k_inner)[0][:, 0] for a in alphas]
    )  # alphas × folds
    means, ses = mse.mean(axis=1), stats.sem(mse, axis=1, ddof=1)
    choice, margin = one_se(means, ses)
    return choice, margin, float(means.min())


def nested(rng):
    n, k_outer, k_inner = 60, 4, 3
    scale = np.array([1.0, 10.0, 0.1, 5.0])
    shift = np.array([0.0, 100.0, -3.0, 2.0])
    x = rounded(rng.normal(size=(n, 4)) * scale + shift)
    y = rounded(
        0.5 * x[:, 0] + 0.05 * x[:, 1] + 3.0 * x[:, 2] + rng.normal(scale=0.6, size=n)
    )
    times = rounded(np.round(rng.permutation(n) * 1.5 + rng.uniform(0, 1, size=n), 6))
    assert len(np.unique(times)) == n
    alphas = [1000.0, 300.0, 100.0, 30.0, 10.0, 3.0, 1.0, 0.3, 0.1, 0.03]
    outer_of = time_folds(times, k_outer)
    folds, margins = [], []
    for f in range(k_outer):
        train, test = np.flatnonzero(outer_of != f), np.flatnonzero(outer_of == f)
        scaler = StandardScaler().fit(x[train])
        xs_tr, xs_te = scaler.transform(x[train]), scaler.transform(x[test])
        inner_of = time_folds(times[train], k_inner)
        choice, margin, inner_best = inner_choice(alphas, xs_tr, y[train], inner_of, k_inner)
        margins.append(margin)
        alpha = alphas[choice]
        pred = Ridge(alpha=alpha).fit(xs_tr, y[train]).predict(xs_te)
        inner_pred = np.column_stack(
            [
                Ridge(alpha=alpha)
                .fit(xs_tr[inner_of != j], y[train][inner_of != j])
                .predict(xs_te)
                for j in range(k_inner)
            ]
        )
        oof = fold_scores(alpha, xs_tr, y[train][:, None], inner_of, k_inner)[3][:, 0]
        folds.append(
            {
                "chosen": choice,
                "metrics": {key: r10(v) for key, v in metric_row(y[test], pred).items()},
                "inner_best_mse": r10(inner_best),
                "test_predictions": r10(pred),
                "inner_test_predictions": r10(inner_pred),
                "inner_residuals": r10(y[train] - oof),
            }
        )
    claims = {}
    for key in ["mse", "rmse", "mae", "r2", "pearson", "spearman"]:
        values = np.array([fold["metrics"][key] for fold in folds])
        claims[key] = {"mean": r10(values.mean()), "se": r10(stats.sem(values, ddof=1))}
    xs = StandardScaler().fit_transform(x)
    final_mse = [fold_scores(a, xs, y[:, None], outer_of, k_outer) for a in alphas]
    te = np.array([s[0][:, 0] for s in final_mse])  # alphas × folds
    r2 = np.array([s[2][:, 0] for s in final_mse])
    means, ses = te.mean(axis=1), stats.sem(te, axis=1, ddof=1)
    final_choice, margin = one_se(means, ses)
    margins.append(margin)
    assert min(margins) > 1e-6, f"nested one-SE choices too close to call ({margins})"
    plain = int(np.argmin(means))
    oof = final_mse[final_choice][3][:, 0]
    return {
        "x": r10(x),
        "y": r10(y),
        "times": r10(times),
        "k_outer": k_outer,
        "k_inner": k_inner,
        "alphas": alphas,
        "outer_fold_of": r10(outer_of),
        "folds": folds,
        "claims": claims,
        "final": {
            "chosen": final_choice,
            "oof_predictions": r10(oof),
            "residuals": r10(y - oof),
            "plain_best": plain,
            "plain_best_mse": {"mean": r10(means[plain]), "se": r10(ses[plain])},
            "plain_best_q2": {
                "mean": r10(r2[plain].mean()),
                "se": r10(stats.sem(r2[plain], ddof=1)),
            },
        },
    }


def main():
    rng = np.random.default_rng(SEED)
    csv_text = "id,a,y\nm1,1.5,0.25\nm2,2.5,0.5\nm3,4,1\n"
    fixture = {
        "source": "tests/reference/stats_ref.py (numpy, scipy, scikit-learn; "
        "versions in tests/reference/requirements.txt)",
        "correlations": correlations(rng),
        "regression": regression(rng),
        "sem": sem_cases(rng),
        "sha256": {"text": csv_text, "hex": hashlib.sha256(csv_text.encode()).hexdigest()},
        "grid_cv": grid_cv(rng),
        "nested": nested(rng),
    }
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps(fixture, indent=1, sort_keys=True) + "\n")


if __name__ == "__main__":
    main()
