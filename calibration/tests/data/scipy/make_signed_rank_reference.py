"""Reference values for calibration/tests/signed_rank_scipy.rs, computed once
with SciPy (the versions pinned in tests/python/requirements.txt; the file
records the ones used).

    /path/to/venv/bin/python calibration/tests/data/scipy/make_signed_rank_reference.py

Wilcoxon's signed-rank test of paired differences (one-sided: are they
shifted above zero), the normal approximation without continuity
correction, zero differences dropped (Wilcoxon's own convention), ties
given their mean rank and the variance corrected for them:
scipy.stats.wilcoxon(d, zero_method="wilcox", correction=False,
alternative="greater", method="approx"), and where there are neither ties
nor zeros the exact p value (method="exact"). Invented cases: no ties,
ties and zeros, heavy tails (a few large differences of either sign
among many small positive ones, where a t test on the differences has
little power), and two small ones where the normal form is poor.
"""
import json
import pathlib

import numpy as np
import scipy
from scipy import stats

cases = {
    "no_ties": [0.31, -0.12, 0.54, 0.08, -0.27, 0.66, 0.19, -0.05, 0.42, 0.73, -0.38, 0.25],
    "ties_and_zeros": [0.2, -0.2, 0.5, 0.0, 0.5, 0.1, -0.1, 0.3, 0.0, 0.2, 0.7, -0.5, 0.3, 0.2],
    "heavy_tails": [0.05, 0.08, 0.03, 0.06, 0.09, 0.04, 0.07, 0.02, 0.05, 0.06, 0.08, 0.03,
                    0.04, 0.07, 0.05, 0.06, -2.5, 0.09, 0.04, -1.8, 0.03, 0.07, 0.06, 3.1],
    "five": [0.4, 0.1, -0.2, 0.3, 0.5],
    "four_positive": [1.0, 2.0, 3.0, 4.0],
}
out = {
    "versions": {"numpy": np.__version__, "scipy": scipy.__version__},
    "normal_quantile_0_95": float(stats.norm.ppf(0.95)),
    "cases": {},
}
for name, d in cases.items():
    r = stats.wilcoxon(d, zero_method="wilcox", correction=False, alternative="greater", method="approx")
    t = stats.ttest_1samp(d, 0.0, alternative="greater")
    # The exact p value where SciPy computes one (no ties, no zeros).
    a = np.abs(np.array(d))
    exact = None
    if len(set(a.tolist())) == len(a) and not (a == 0).any():
        exact = float(stats.wilcoxon(d, alternative="greater", method="exact").pvalue)
    out["cases"][name] = {
        "d": d,
        "w_plus": float(r.statistic),
        "z": float(r.zstatistic),
        "p": float(r.pvalue),
        "p_exact": exact,
        "t": float(t.statistic),
        "t_p": float(t.pvalue),
    }
    print(f"{name}: W+ {r.statistic} z {r.zstatistic:.4f} p {r.pvalue:.4g}; t {t.statistic:.3f} p {t.pvalue:.3g}")
path = pathlib.Path(__file__).with_name("signed_rank_reference.json")
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path} with SciPy {scipy.__version__}")
