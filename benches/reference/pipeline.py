"""Reference pipeline for the side-by-side benchmark: the same work done with
scikit-learn, numpy and scipy, the stack a modeller would otherwise glue
together.

Reads what `benches/compare.rs` wrote into DIR (the same CSV tables, the
query matrix, plumbline's fold assignments, cluster labels and fixed
hyperparameters), times the reference on identical work, checks that its
numbers agree with plumbline's to the tolerances below, and writes
DIR/reference.json. `benches/run-comparison.sh` runs both sides and
`table.py` prints the comparison.

Offline scoring, per query batch:
- StandardScaler (population sd, as plumbline);
- the full model and the K fold models (fold k left out): sklearn `Ridge`,
  or `KernelRidge(kernel="rbf")` on the target centred by its training
  mean (plumbline centres instead of fitting an intercept);
- the CV+ interval of Barber, Candès, Ramdas & Tibshirani (Ann. Statist.
  49, 2021, eq. 6) from the K fold models and the out-of-fold residuals
  R_i = |y_i - mu_{-k(i)}(x_i)|: the floor(alpha (n+1))-th smallest of
  mu_{-k(i)}(x) - R_i and the ceil((1 - alpha)(n+1))-th smallest of
  mu_{-k(i)}(x) + R_i, by numpy partition over all n values;
- the domain signals: PCA (sklearn, the same number of components
  plumbline kept), mean distance to the k nearest training scores
  (sklearn `NearestNeighbors`), leverage and the PCA residual Q.

The fit: nested cross-validation over the same outer folds and, per outer
fold, the same inner folds (a `PredefinedSplit` of plumbline's fold labels,
which are whole k-means clusters: a group k-fold of the same cluster
labels, checked below), `GridSearchCV(n_jobs=2)` over the same kernel ridge
grid with the one-standard-error rule (Hastie, Tibshirani & Friedman,
*Elements of Statistical Learning*, §7.10) as its refit rule, then the same
final selection on all rows.

Usage: python3 benches/reference/pipeline.py DIR [--reps N] [--fit-reps N]
"""

import argparse
import json
import math
import pathlib
import sys
import time

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.decomposition import PCA
from sklearn.kernel_ridge import KernelRidge
from sklearn.linear_model import Ridge
from sklearn.model_selection import GridSearchCV, PredefinedSplit
from sklearn.neighbors import NearestNeighbors
from sklearn.preprocessing import StandardScaler

# Agreement tolerances, relative to the largest magnitude of each output
# over the sample: both sides use different but exact algorithms (Cholesky
# in scipy vs faer, tree searches, an n-value partition vs a rank search), so
# they agree to rounding, far below these.
REL_TOL = {
    "prediction": 1e-9,
    "lower": 1e-9,
    "upper": 1e-9,
    "knn_distance": 1e-9,
    "leverage": 1e-9,
    "pca_residual": 1e-9,
}
FIT_PREDICTION_REL_TOL = 1e-6
BATCH = 2_000


class CentredKernelRidge(BaseEstimator, RegressorMixin):
    """RBF kernel ridge on y - mean(y), the mean added back: plumbline's
    model, as the models reference script fits it."""

    def __init__(self, gamma=1.0, alpha=1.0):
        self.gamma = gamma
        self.alpha = alpha

    def fit(self, x, y):
        self.mean_ = float(np.mean(y))
        self.model_ = KernelRidge(kernel="rbf", gamma=self.gamma, alpha=self.alpha)
        self.model_.fit(x, y - self.mean_)
        return self

    def predict(self, x):
        return self.model_.predict(x) + self.mean_


def read_table(path):
    with open(path) as f:
        header = f.readline().strip().split(",")
    data = np.loadtxt(path, delimiter=",", skiprows=1, usecols=range(1, len(header)))
    return data[:, :-1], data[:, -1]


def cvplus_ranks(n, confidence):
    """Barber et al. (2021): lower rank floor(alpha (n+1)), upper rank
    ceil((1-alpha)(n+1)); None outside 1..n (that side is unbounded). The
    product is rounded to 9 decimals first so that alpha = 0.1 held as a
    binary fraction does not move an integer product across a boundary."""
    alpha = round(1.0 - confidence, 12)
    lower = math.floor(round(alpha * (n + 1), 9))
    upper = math.ceil(round((1.0 - alpha) * (n + 1), 9))
    inside = lambda r: r if 1 <= r <= n else None
    return inside(lower), inside(upper)


class ScoringPipeline:
    def __init__(self, x, y, fold_of, k, hyper, n_components, k_neighbours):
        self.scaler = StandardScaler().fit(x)
        xs = self.scaler.transform(x)
        self.fold_of = np.asarray(fold_of)
        members = [np.arange(len(y))] + [np.flatnonzero(self.fold_of != f) for f in range(k)]
        self.models = [self._model(hyper).fit(xs[rows], y[rows]) for rows in members]
        oof = np.empty(len(y))
        for f in range(k):
            held = self.fold_of == f
            oof[held] = self.models[1 + f].predict(xs[held])
        self.residuals = np.abs(y - oof)
        self.pca = PCA(n_components=n_components, svd_solver="full").fit(xs)
        train_scores = self.pca.transform(xs)
        self.nn = NearestNeighbors(n_neighbors=k_neighbours, n_jobs=2).fit(train_scores)
        self.n = len(y)

    @staticmethod
    def _model(hyper):
        if hyper["family"] == "ridge":
            return Ridge(alpha=hyper["alpha"])
        return CentredKernelRidge(gamma=hyper["gamma"], alpha=hyper["alpha"])

    def score(self, queries, confidence):
        lo_rank, up_rank = cvplus_ranks(self.n, confidence)
        out = {k: [] for k in REL_TOL}
        for start in range(0, len(queries), BATCH):
            qs = self.scaler.transform(queries[start : start + BATCH])
            preds = np.stack([m.predict(qs) for m in self.models])
            # n x B: mu_{-k(i)}(x) for every training row i.
            mu = preds[1:][self.fold_of]
            r = self.residuals[:, None]
            lower = (
                np.partition(mu - r, lo_rank - 1, axis=0)[lo_rank - 1]
                if lo_rank
                else np.full(len(qs), np.nan)
            )
            upper = (
                np.partition(mu + r, up_rank - 1, axis=0)[up_rank - 1]
                if up_rank
                else np.full(len(qs), np.nan)
            )
            t = self.pca.transform(qs)
            dist, _ = self.nn.kneighbors(t)
            lev = 1.0 / self.n + np.sum(t * t / ((self.n - 1) * self.pca.explained_variance_), axis=1)
            recon = t @ self.pca.components_
            q = np.sum((qs - self.pca.mean_ - recon) ** 2, axis=1)
            for key, v in [
                ("prediction", preds[0]),
                ("lower", lower),
                ("upper", upper),
                ("knn_distance", dist.mean(axis=1)),
                ("leverage", lev),
                ("pca_residual", q),
            ]:
                out[key].append(v)
        return {k: np.concatenate(v) for k, v in out.items()}


def agreement(ours, theirs, tolerances):
    """Largest relative difference per output; fails the run beyond the
    tolerance, so the timings compare equal work."""
    report = {}
    for key, tol in tolerances.items():
        a = np.asarray(ours[key], dtype=float)
        b = np.array([np.nan if v is None else v for v in theirs[key]], dtype=float)
        if a.shape != b.shape or not np.array_equal(np.isnan(a), np.isnan(b)):
            raise SystemExit(f"agreement: {key} differs in shape or in which values are unbounded")
        scale = max(np.nanmax(np.abs(b)), 1e-300)
        worst = float(np.nanmax(np.abs(a - b)) / scale) if a.size else 0.0
        report[key] = {"max_rel_diff": worst, "tolerance": tol, "ok": worst <= tol}
        if worst > tol:
            raise SystemExit(f"agreement: {key} differs by {worst:.3g} (relative), tolerance {tol}")
    return report


def scoring(d, dirpath, reps):
    x, y = read_table(dirpath / "score_train.csv")
    queries = np.load(dirpath / "score_queries.npy")
    out = {}
    for name, m in d["models"].items():
        t = time.perf_counter()
        pipe = ScoringPipeline(
            x, y, d["fold_of"], d["k"], m["hyper"], m["pca_components"], d["k_neighbours"]
        )
        print(f"reference scoring {name}: fitted in {time.perf_counter() - t:.1f} s", file=sys.stderr)
        sample = pipe.score(queries[: len(m["outputs"]["prediction"])], d["confidence"])
        check = agreement(sample, m["outputs"], REL_TOL)
        seconds = []
        for _ in range(reps):
            t = time.perf_counter()
            pipe.score(queries, d["confidence"])
            seconds.append(time.perf_counter() - t)
        out[name] = {
            "seconds": seconds,
            "candidates_per_s": len(queries) / float(np.median(seconds)),
            "agreement": check,
        }
    return out


def one_se_refit(n_splits):
    """GridSearchCV's refit rule: the first (simplest) grid point whose mean
    test MSE is within one standard error (sd over folds with n - 1, over
    sqrt of the fold count) of the best mean."""

    def choose(cv_results):
        mse = -np.stack([cv_results[f"split{i}_test_score"] for i in range(n_splits)], axis=1)
        mean = mse.mean(axis=1)
        se = mse.std(axis=1, ddof=1) / math.sqrt(n_splits)
        best = int(np.argmin(mean))
        return int(np.flatnonzero(mean <= mean[best] + se[best])[0])

    return choose


def grid_search(grid, x, y, fold_of):
    split = PredefinedSplit(np.asarray(fold_of))
    search = GridSearchCV(
        CentredKernelRidge(),
        [{"gamma": [h["gamma"]], "alpha": [h["alpha"]]} for h in grid],
        scoring="neg_mean_squared_error",
        cv=split,
        refit=one_se_refit(split.get_n_splits()),
        n_jobs=2,
    )
    return search.fit(x, y)


def nested(d, x, y):
    chosen, predictions = [], []
    for o in d["outer"]:
        train, test = np.asarray(o["train_rows"]), np.asarray(o["test_rows"])
        scaler = StandardScaler().fit(x[train])
        search = grid_search(d["grid"], scaler.transform(x[train]), y[train], o["inner_fold_of"])
        chosen.append(int(search.best_index_))
        predictions.append(search.predict(scaler.transform(x[test])))
    final = grid_search(d["grid"], StandardScaler().fit_transform(x), y, d["outer_fold_of"])
    return chosen, predictions, int(final.best_index_)


def check_groups(labels, fold_of):
    """Every cluster lies in one fold: the folds are a group k-fold."""
    seen = {}
    for lab, f in zip(labels, fold_of):
        if seen.setdefault(lab, f) != f:
            raise SystemExit(f"cluster {lab} is split across folds; the folds are not grouped")


def fit(d, dirpath, reps):
    x, y = read_table(dirpath / "fit_train.csv")
    labels = np.asarray(d["cluster_labels"])
    check_groups(labels, d["outer_fold_of"])
    for o in d["outer"]:
        check_groups(labels[o["train_rows"]], o["inner_fold_of"])
    seconds, result = [], None
    for _ in range(reps):
        t = time.perf_counter()
        result = nested(d, x, y)
        seconds.append(time.perf_counter() - t)
        print(f"reference fit: {seconds[-1]:.1f} s", file=sys.stderr)
    chosen, predictions, final = result
    ours = [o["chosen"] for o in d["outer"]]
    if chosen != ours or final != d["final_chosen"]:
        raise SystemExit(f"agreement: chosen settings differ: reference {chosen} + {final}, plumbline {ours} + {d['final_chosen']}")
    worst = 0.0
    for o, p in zip(d["outer"], predictions):
        a = np.asarray(o["test_predictions"])
        worst = max(worst, float(np.max(np.abs(a - p)) / np.max(np.abs(p))))
    if worst > FIT_PREDICTION_REL_TOL:
        raise SystemExit(f"agreement: outer-test predictions differ by {worst:.3g} (relative)")
    return {
        "seconds": seconds,
        "agreement": {
            "chosen_equal": True,
            "outer_prediction_max_rel_diff": worst,
            "tolerance": FIT_PREDICTION_REL_TOL,
        },
    }


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("dir", type=pathlib.Path)
    ap.add_argument("--reps", type=int, default=3)
    ap.add_argument("--fit-reps", type=int, default=None)
    ap.add_argument("--only", default="score,fit")
    args = ap.parse_args()
    ours = json.loads((args.dir / "plumbline.json").read_text())
    out = {}
    parts = args.only.split(",")
    if "score" in parts and "scoring" in ours:
        out["scoring"] = scoring(ours["scoring"], args.dir, args.reps)
    if "fit" in parts and "fit" in ours:
        out["fit"] = fit(ours["fit"], args.dir, args.fit_reps or args.reps)
    (args.dir / "reference.json").write_text(json.dumps(out, indent=1))
    print(f"wrote {args.dir / 'reference.json'}", file=sys.stderr)


if __name__ == "__main__":
    main()
