"""Reference values for PCA and the applicability-domain signals.

Source data: the diabetes data of Efron, Hastie, Johnstone & Tibshirani,
"Least Angle Regression", Ann. Statist. 32 (2004), as shipped by scikit-learn
(`load_diabetes(scaled=False)`: 442 patients x 10 baseline variables in their
original units).

Everything below is computed by scikit-learn / numpy, independently of the
Rust code: StandardScaler (population sd), PCA (n-1 covariance), the k nearest
neighbours with `sklearn.neighbors.NearestNeighbors` (its `kneighbors()` without
a query leaves each training row out by index, so duplicates count), leverage
as the diagonal of the hat matrix X (X'X)^-1 X' of X = [1, scores], and the PCA
residual Q from `inverse_transform`. Quantiles use numpy's default (linear).

Writes tests/fixtures/space_reference.json, floats rounded to 10 significant
digits so reruns reproduce the file exactly.
"""

import json
import pathlib

import numpy as np
from sklearn.datasets import load_diabetes
from sklearn.decomposition import PCA
from sklearn.neighbors import NearestNeighbors
from sklearn.preprocessing import StandardScaler

K = 5
Z = 0.5
VARIANCE_FRACTION = 0.9
OUT = pathlib.Path(__file__).resolve().parent.parent / "fixtures" / "space_reference.json"


def r10(v):
    return float(f"{float(v):.10g}")


def clean(obj):
    if isinstance(obj, dict):
        return {k: clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return clean(obj.tolist())
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return r10(obj)
    return obj


def dump(obj, indent=0):
    """JSON with one line per matrix row, so diffs stay readable."""
    pad = " " * indent
    if isinstance(obj, dict):
        items = [f'{pad} {json.dumps(k)}: {dump(v, indent + 1).lstrip()}' for k, v in obj.items()]
        return pad + "{\n" + ",\n".join(items) + "\n" + pad + "}"
    if isinstance(obj, list) and obj and isinstance(obj[0], list):
        rows = [pad + " " + json.dumps(r) for r in obj]
        return pad + "[\n" + ",\n".join(rows) + "\n" + pad + "]"
    return pad + json.dumps(obj)


def hat_leverage(train_scores, query_scores):
    """Diagonal of X (X'X)^-1 X' for X = [1, scores], rows of `query_scores`."""
    x = np.hstack([np.ones((len(train_scores), 1)), train_scores])
    q = np.hstack([np.ones((len(query_scores), 1)), query_scores])
    xtx = x.T @ x
    return np.einsum("ij,ji->i", q, np.linalg.solve(xtx, q.T))


def guard_reference(x_raw, queries_raw):
    """Every domain signal of the training rows and of the queries."""
    scaler = StandardScaler().fit(x_raw)
    xs = scaler.transform(x_raw)
    qs = scaler.transform(queries_raw)
    pca = PCA(n_components=VARIANCE_FRACTION, svd_solver="full").fit(xs)
    t = pca.transform(xs)
    tq = pca.transform(qs)
    nn = NearestNeighbors(n_neighbors=K).fit(t)
    loo_dist, _ = nn.kneighbors()
    loo = loo_dist.mean(axis=1)
    q_dist, q_idx = nn.kneighbors(tq)
    d = q_dist.mean(axis=1)
    typicality = np.array([(1 + np.sum(loo >= di)) / (len(loo) + 1) for di in d])
    q_train = ((xs - pca.inverse_transform(t)) ** 2).sum(axis=1)
    q_query = ((qs - pca.inverse_transform(tq)) ** 2).sum(axis=1)
    return {
        "n_components": pca.n_components_,
        "loo_distances": loo,
        "knn_mean": loo.mean(),
        "knn_sd": loo.std(ddof=1),
        "z_threshold": loo.mean() + Z * loo.std(ddof=1),
        "training_leverage": hat_leverage(t, t),
        "training_residual": q_train,
        "residual_q95": np.quantile(q_train, 0.95),
        "residual_q99": np.quantile(q_train, 0.99),
        "query_knn_distance": d,
        "query_neighbour_distances": q_dist,
        "query_neighbour_index": q_idx,
        "query_typicality": typicality,
        "query_leverage": hat_leverage(t, tq),
        "query_residual": q_query,
        "range_min": x_raw.min(axis=0),
        "range_max": x_raw.max(axis=0),
    }


def make_queries(x_raw, rng):
    """Training rows as they are, perturbed, blended, and far away."""
    n, p = x_raw.shape
    sd = x_raw.std(axis=0)
    same = x_raw[rng.choice(n, 8, replace=False)]
    near = x_raw[rng.choice(n, 10, replace=False)] + rng.normal(0, 0.3, (10, p)) * sd
    a, b = rng.choice(n, 6, replace=False), rng.choice(n, 6, replace=False)
    w = rng.uniform(0.2, 0.8, (6, 1))
    blend = w * x_raw[a] + (1 - w) * x_raw[b]
    direction = rng.normal(0, 1, (6, p))
    direction /= np.linalg.norm(direction, axis=1, keepdims=True)
    far = x_raw.mean(axis=0) + 4.0 * np.sqrt(p) * direction * sd
    return np.vstack([same, near, blend, far])


def main():
    x_raw = load_diabetes(scaled=False).data.astype(float)
    rng = np.random.default_rng(20040101)
    scaler = StandardScaler().fit(x_raw)
    xs = scaler.transform(x_raw)
    full = PCA(svd_solver="full").fit(xs)
    kept = PCA(n_components=VARIANCE_FRACTION, svd_solver="full").fit(xs)

    # Fewer rows than descriptors: 8 standardised rows span 7 dimensions.
    wide_rows = xs[:8]
    wide = PCA(n_components=7, svd_solver="full").fit(wide_rows)

    # Many exact duplicates (more than a k-d tree bucket of 32 share a point).
    dup_raw = np.vstack([x_raw[:60], np.repeat(x_raw[:1], 40, axis=0), np.repeat(x_raw[1:2], 5, axis=0)])

    queries = make_queries(x_raw, rng)
    fixture = {
        "source": "sklearn.datasets.load_diabetes(scaled=False); Efron et al., Ann. Statist. 2004",
        "k": K,
        "z": Z,
        "variance_fraction": VARIANCE_FRACTION,
        "x_raw": x_raw,
        "scaler_mean": scaler.mean_,
        "scaler_scale": scaler.scale_,
        "pca": {
            "explained_variance": full.explained_variance_,
            "explained_variance_ratio": full.explained_variance_ratio_,
            "components": full.components_,
            "n_components_for_fraction": kept.n_components_,
            "abs_scores": np.abs(kept.transform(xs)),
        },
        "wide": {
            "rows": 8,
            "explained_variance": wide.explained_variance_,
            "abs_scores": np.abs(wide.transform(wide_rows)),
        },
        "queries_raw": queries,
        "guard": guard_reference(x_raw, queries),
        "duplicates": {
            "x_raw": dup_raw,
            "guard": guard_reference(dup_raw, queries[:4]),
        },
    }
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(dump(clean(fixture)) + "\n")


if __name__ == "__main__":
    main()
