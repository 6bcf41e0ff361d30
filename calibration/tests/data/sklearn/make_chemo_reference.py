"""Reference values for calibration/tests/chemo_sklearn.rs, computed once
with scikit-learn (the versions pinned in tests/python/requirements.txt;
the file records the ones used).

    python3 -m venv /tmp/venv && /tmp/venv/bin/pip install -r tests/python/requirements.txt
    /tmp/venv/bin/python calibration/tests/data/sklearn/make_chemo_reference.py

writes chemo_reference.json beside this script: a small table (24 rows,
5 columns, invented numbers from a fixed formula and a seeded generator),
and for it the coefficients, intercepts and predictions of
Ridge(alpha) for three penalties and PLSRegression(n_components, scale=True)
for 1-4 components, and the leave-one-out residuals of Ridge on the
standardised columns (computed by refitting without each row).
"""
import json
import pathlib

import numpy as np
import scipy
import sklearn
from sklearn.cross_decomposition import PLSRegression
from sklearn.linear_model import Ridge

rng = np.random.RandomState(20261202)
n, p = 24, 5
X = rng.normal(size=(n, p)) * np.array([1.0, 3.0, 0.5, 10.0, 2.0]) + np.array([5.0, -2.0, 0.0, 40.0, 1.0])
# Correlated columns, as features of permittivity are.
X[:, 2] += 0.8 * X[:, 0]
X[:, 4] += 0.1 * X[:, 3]
y = 2.0 + 0.7 * X[:, 0] - 0.2 * X[:, 1] + 1.5 * X[:, 2] + 0.05 * X[:, 3] + rng.normal(scale=0.3, size=n)

out = {
    "versions": {"numpy": np.__version__, "scipy": scipy.__version__, "scikit-learn": sklearn.__version__},
    "X": X.tolist(),
    "y": y.tolist(),
    "ridge": [],
    "pls": [],
}
for alpha in [0.01, 1.0, 25.0]:
    m = Ridge(alpha=alpha, fit_intercept=True).fit(X, y)
    out["ridge"].append({
        "alpha": alpha,
        "coef": m.coef_.tolist(),
        "intercept": float(m.intercept_),
        "predict": m.predict(X).tolist(),
    })
for k in [1, 2, 3, 4]:
    m = PLSRegression(n_components=k, scale=True).fit(X, y)
    out["pls"].append({
        "n_components": k,
        "coef": np.ravel(m.coef_).tolist(),
        "intercept": float(np.ravel(m.intercept_)[0]),
        "predict": np.ravel(m.predict(X)).tolist(),
    })
# Leave-one-out residuals of ridge on standardised columns (sd with n - 1,
# from all rows, as the library's RidgePath scales them), by refitting.
Z = (X - X.mean(axis=0)) / X.std(axis=0, ddof=1)
alpha = 3.0
loo = []
for i in range(n):
    keep = np.arange(n) != i
    m = Ridge(alpha=alpha).fit(Z[keep], y[keep])
    loo.append(float(y[i] - m.predict(Z[i:i + 1])[0]))
out["ridge_loo_standardised"] = {"alpha": alpha, "residuals": loo}
path = pathlib.Path(__file__).with_name("chemo_reference.json")
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path} with scikit-learn {sklearn.__version__}")
