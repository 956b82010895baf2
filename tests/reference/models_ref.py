"""Reference values for the regression models (ridge, RBF kernel ridge, k-NN).

Data: the diabetes data of Efron, Hastie, Johnstone & Tibshirani, "Least
Angle Regression", Ann. Statist. 32 (2004), as shipped by scikit-learn
(`load_diabetes(scaled=False)`: 442 patients, 10 baseline variables, a
disease-progression target one year later).

Writes
- tests/fixtures/diabetes.csv: the raw table (id,age,sex,bmi,bp,s1..s6,target),
  every value exactly as scikit-learn gives it (Python's shortest round-trip
  float repr), ids d001..d442 in the original row order;
- tests/fixtures/models_reference.json: standardisation, ridge, kernel ridge,
  k-NN predictions, eigenvalues and squared distances computed by
  scikit-learn / numpy / scipy on the same inputs.

Protocol: rows 0..349 train, rows 350..441 test; `StandardScaler` fitted on the
training rows and applied to both. A second target column is the target under
a seeded permutation (a y-randomisation column) so multi-column fitting is
checked too. Floats are rounded to 10 significant digits and the output is
deterministic, so rerunning this script must reproduce the committed files.

Run from anywhere: python3 tests/reference/models_ref.py
"""

import json
import pathlib

import numpy as np
import scipy
import sklearn
from scipy.spatial.distance import cdist
from sklearn.datasets import load_diabetes
from sklearn.kernel_ridge import KernelRidge
from sklearn.linear_model import Ridge
from sklearn.neighbors import KNeighborsRegressor
from sklearn.preprocessing import StandardScaler

ROOT = pathlib.Path(__file__).resolve().parents[2]
FIXTURES = ROOT / "tests" / "fixtures"
N_TRAIN = 350
PERMUTATION_SEED = 20040401


def r10(value):
    """Round to 10 significant digits (plain Python floats / nested lists)."""
    if isinstance(value, np.ndarray):
        return [r10(v) for v in value.tolist()]
    if isinstance(value, (list, tuple)):
        return [r10(v) for v in value]
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if not np.isfinite(v):
            raise ValueError(f"non-finite reference value {v}")
        return float(f"{v:.10g}")
    return value


def to_json(value, depth=0):
    """JSON with sorted keys, one object member per line and each innermost
    list on one line: stable and readable in a diff."""
    pad = " " * depth
    if isinstance(value, dict):
        items = [
            f'{pad} {json.dumps(k)}: {to_json(v, depth + 1).lstrip()}'
            for k, v in sorted(value.items())
        ]
        return pad + "{\n" + ",\n".join(items) + "\n" + pad + "}"
    if isinstance(value, list) and any(isinstance(v, (list, dict)) for v in value):
        items = [to_json(v, depth + 1) for v in value]
        return pad + "[\n" + ",\n".join(items) + "\n" + pad + "]"
    return pad + json.dumps(value)


def write_csv(data, target, names):
    lines = ["id," + ",".join(names) + ",target"]
    for i, (row, t) in enumerate(zip(data, target)):
        cells = [f"d{i + 1:03d}"] + [repr(float(v)) for v in row] + [repr(float(t))]
        lines.append(",".join(cells))
    (FIXTURES / "diabetes.csv").write_text("\n".join(lines) + "\n")


def column_matrix(predictions, rows):
    """Rows × targets, whatever shape scikit-learn squeezes to."""
    return np.asarray(predictions).reshape(rows, -1)


def assert_no_neighbour_ties(dist_rows, ks):
    """The k nearest must be unambiguous, or the comparison would depend on
    how each library breaks ties."""
    for r, row in enumerate(dist_rows):
        d = np.sort(row)
        for k in ks:
            if k < len(d):
                gap = d[k] - d[k - 1]
                assert gap > 1e-9 * max(d[k], 1.0), f"tie at k={k} for query {r}"


def ridge_cases(x_tr, y_tr, x_te, alphas):
    out = []
    for alpha in alphas:
        model = Ridge(alpha=alpha, fit_intercept=True, solver="cholesky").fit(x_tr, y_tr)
        out.append(
            {
                "alpha": alpha,
                # Targets × descriptors, whatever shape scikit-learn squeezes to.
                "coef": r10(np.atleast_2d(model.coef_)),
                "intercept": r10(np.atleast_1d(model.intercept_)),
                "predict_test": r10(column_matrix(model.predict(x_te), len(x_te))),
                "predict_train": r10(column_matrix(model.predict(x_tr), len(x_tr))),
            }
        )
    return out


def kernel_ridge_cases(x_tr, y_tr, x_te, settings):
    out = []
    mean = y_tr.mean(axis=0)
    for gamma, alpha in settings:
        # KernelRidge has no intercept: fit on the centred target and add the
        # training mean back, the model plumbline uses.
        model = KernelRidge(kernel="rbf", gamma=gamma, alpha=alpha).fit(x_tr, y_tr - mean)
        out.append(
            {
                "gamma": gamma,
                "alpha": alpha,
                "dual_coef": r10(column_matrix(model.dual_coef_, len(x_tr))),
                "predict_test": r10(column_matrix(model.predict(x_te), len(x_te)) + mean),
                "predict_train": r10(column_matrix(model.predict(x_tr), len(x_tr)) + mean),
            }
        )
    return out


def knn_cases(x_tr, y_tr, x_te, ks):
    assert_no_neighbour_ties(cdist(x_te, x_tr, "sqeuclidean"), ks)
    assert_no_neighbour_ties(cdist(x_tr, x_tr, "sqeuclidean"), ks)
    out = []
    for k in ks:
        model = KNeighborsRegressor(n_neighbors=k, algorithm="brute").fit(x_tr, y_tr)
        out.append(
            {
                "k": k,
                "predict_test": r10(column_matrix(model.predict(x_te), len(x_te))),
                # Predicting the training rows counts each row as its own
                # nearest neighbour (distance 0), as plumbline's train curve does.
                "predict_train": r10(column_matrix(model.predict(x_tr), len(x_tr))),
            }
        )
    return out


def main():
    FIXTURES.mkdir(parents=True, exist_ok=True)
    bunch = load_diabetes(scaled=False)
    data, target, names = bunch.data, bunch.target, list(bunch.feature_names)
    assert data.shape == (442, 10)
    write_csv(data, target, names)

    train = np.arange(N_TRAIN)
    test = np.arange(N_TRAIN, data.shape[0])
    scaler = StandardScaler().fit(data[train])
    x_tr = scaler.transform(data[train])
    x_te = scaler.transform(data[test])

    permutation = np.random.RandomState(PERMUTATION_SEED).permutation(N_TRAIN)
    y_tr = np.column_stack([target[train], target[train][permutation]])

    # Odd training rows: a subset, for fitting one setting on part of the rows.
    odd = np.arange(1, N_TRAIN, 2)
    # The first 8 training rows: fewer rows than descriptors (ridge's dual form).
    few = np.arange(8)

    reference = {
        "source": "diabetes data, Efron et al. 2004, via sklearn.datasets.load_diabetes(scaled=False)",
        "versions": {
            "numpy": np.__version__,
            "scipy": scipy.__version__,
            "scikit-learn": sklearn.__version__,
        },
        "n_train": N_TRAIN,
        "descriptors": names,
        "target_permutation": permutation.tolist(),
        "scaler": {"mean": r10(scaler.mean_), "scale": r10(scaler.scale_)},
        "eigh_xtx": r10(np.linalg.eigh(x_tr.T @ x_tr)[0]),
        "cdist_sqeuclidean": {
            "test_rows": [0, 1, 2],
            "to_train": r10(cdist(x_te[:3], x_tr, "sqeuclidean")),
        },
        "ridge": ridge_cases(x_tr, y_tr, x_te, [1000.0, 10.0, 1.0, 0.1, 0.001]),
        "ridge_odd_rows": ridge_cases(x_tr[odd], y_tr[odd, :1], x_te, [1.0]),
        "ridge_few_rows": ridge_cases(x_tr[few], y_tr[few], x_te, [1.0, 0.1]),
        "kernel_ridge": kernel_ridge_cases(
            x_tr, y_tr, x_te, [(0.01, 1.0), (0.1, 0.1), (0.1, 0.001), (0.3, 0.01)]
        ),
        "kernel_ridge_odd_rows": kernel_ridge_cases(x_tr[odd], y_tr[odd, :1], x_te, [(0.1, 0.1)]),
        "knn": knn_cases(x_tr, y_tr, x_te, [1, 3, 5, 15]),
        "knn_odd_rows": knn_cases(x_tr[odd], y_tr[odd, :1], x_te, [5]),
    }
    (FIXTURES / "models_reference.json").write_text(to_json(reference) + "\n")


if __name__ == "__main__":
    main()
