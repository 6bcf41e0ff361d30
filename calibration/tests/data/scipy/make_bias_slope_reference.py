"""Reference values for calibration/tests/adjust_scipy.rs, computed once
with SciPy (the versions pinned in tests/python/requirements.txt; the file
records the ones used).

    /path/to/venv/bin/python calibration/tests/data/scipy/make_bias_slope_reference.py

A worked example of the ISO 12099 bias and slope tests (invented lab and
inline values, 14 pairs, an inline that reads 0.3 % high with a slope of
0.94): bias, SEP, the bias t statistic and its critical value, the bias
confidence limits; slope and intercept of lab on predicted with the slope's
standard error (scipy.stats.linregress), its t statistic against 1 and
critical value, the residual SD of that regression and the RMSEP; SEP
confidence limits from chi-square; the unexplained-error limit T_UE = SEC
sqrt(F(1 - alpha; n - 1, M)) against an invented calibration (SEC 0.15 %,
M = 31 degrees of freedom). alpha = 0.05.
"""
import json
import pathlib

import numpy as np
import scipy
from scipy import stats

lab = np.array([11.2, 12.8, 13.5, 14.1, 14.9, 15.6, 16.2, 16.8, 17.5, 18.3, 19.0, 19.8, 20.6, 21.9])
# Inline values: 0.94 lab + 1.25 plus a fixed pattern of errors (invented).
noise = np.array([0.12, -0.08, 0.15, -0.20, 0.05, 0.10, -0.12, 0.18, -0.05, 0.02, -0.15, 0.09, -0.03, 0.11])
pred = 0.94 * lab + 1.25 + noise
alpha = 0.05
n = len(lab)
e = pred - lab
bias = e.mean()
sep = e.std(ddof=1)
tt = stats.ttest_1samp(e, 0.0)
tb = stats.t.ppf(1 - alpha / 2, n - 1)
lr = stats.linregress(pred, lab)
ts = stats.t.ppf(1 - alpha / 2, n - 2)
resid = lab - (lr.intercept + lr.slope * pred)
sec_cal, dof_cal = 0.15, 31
f_crit = stats.f.ppf(1 - alpha, n - 1, dof_cal)
out = {
    "versions": {"numpy": np.__version__, "scipy": scipy.__version__},
    "alpha": alpha,
    "lab": lab.tolist(),
    "predicted": pred.tolist(),
    "bias": bias,
    "sep": sep,
    "bias_t": abs(tt.statistic),
    "bias_p": tt.pvalue,
    "bias_t_crit": tb,
    "bias_ci": [bias - tb * sep / np.sqrt(n), bias + tb * sep / np.sqrt(n)],
    "slope": lr.slope,
    "intercept": lr.intercept,
    "slope_se": lr.stderr,
    "slope_t": abs(lr.slope - 1.0) / lr.stderr,
    "slope_t_crit": ts,
    "s_res": float(np.sqrt((resid**2).sum() / (n - 2))),
    "rmsep": float(np.sqrt((e**2).mean())),
    "sec_cal": sec_cal,
    "dof_cal": dof_cal,
    "f_crit": f_crit,
    "t_ue": sec_cal * np.sqrt(f_crit),
    "sep_ci": [
        sep * np.sqrt((n - 1) / stats.chi2.ppf(1 - alpha / 2, n - 1)),
        sep * np.sqrt((n - 1) / stats.chi2.ppf(alpha / 2, n - 1)),
    ],
}
path = pathlib.Path(__file__).with_name("bias_slope_reference.json")
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path} with SciPy {scipy.__version__}: bias {bias:.4f} (t {abs(tt.statistic):.3f} vs {tb:.3f}), slope {lr.slope:.4f} (t {abs(lr.slope - 1) / lr.stderr:.3f} vs {ts:.3f})")
