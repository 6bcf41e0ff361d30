"""Reference values from general-purpose libraries, for the outside checks
of tests/tests/outside.rs. Reads one JSON request on stdin, writes one JSON
answer on stdout. Versions are pinned in requirements.txt; each answer
carries the versions used.

Requests:
  {"check": "water_static", "t_c": [...]}
      static relative permittivity of liquid water at 0.101325 MPa,
      IAPWS R8-97 (Fernandez et al. 1997) through the iapws package, density
      from IAPWS-95.
  {"check": "stats", "reference": [...], "predicted": [...]}
      bias, RMSEP, SEP, R^2 (squared Pearson correlation), RPD and the slope
      of reference on predicted, computed with numpy and scipy.stats.
  {"check": "ide", "geometries": [{"width_m", "gap_m", "length_m", "n", "eps_sub", "eps_prod"}]}
      interdigital capacitance by Igreja and Dias (2004): per half-space and
      unit permittivity C = eps0 L K(k)/K(k'), interior k = sin(pi eta/2),
      exterior k = 2 sqrt(eta)/(1 + eta), eta = W/(W+G); total
      (N-3) C_I/2 + 2 C_I C_E/(C_I + C_E), with scipy.special.ellipk
      (parameter m = k^2) and scipy.constants.epsilon_0.
"""

import json
import math
import sys

import numpy
import scipy
import scipy.constants
import scipy.special
import scipy.stats


def water_static(req):
    import iapws
    from iapws import IAPWS95

    out = [IAPWS95(T=t + 273.15, P=0.101325).epsilon for t in req["t_c"]]
    return {"eps_s": out, "versions": {"iapws": iapws.__version__}}


def stats(req):
    ref = numpy.asarray(req["reference"], dtype=float)
    pred = numpy.asarray(req["predicted"], dtype=float)
    e = pred - ref
    sep = float(numpy.std(e, ddof=1))
    lr = scipy.stats.linregress(pred, ref)
    return {
        "bias": float(numpy.mean(e)),
        "rmsep": float(numpy.sqrt(numpy.mean(e * e))),
        "sep": sep,
        "r_squared": float(scipy.stats.pearsonr(ref, pred).statistic ** 2),
        "rpd": float(numpy.std(ref, ddof=1)) / sep,
        "slope": float(lr.slope),
        "versions": {"numpy": numpy.__version__, "scipy": scipy.__version__},
    }


def ide(req):
    eps0 = scipy.constants.epsilon_0
    out = []
    for g in req["geometries"]:
        eta = g["width_m"] / (g["width_m"] + g["gap_m"])
        k_i = math.sin(math.pi * eta / 2)
        k_e = 2 * math.sqrt(eta) / (1 + eta)

        def cell(k):
            m = k * k
            return eps0 * g["length_m"] * scipy.special.ellipk(m) / scipy.special.ellipk(1 - m)

        c_i = (g["eps_sub"] + g["eps_prod"]) * cell(k_i)
        c_e = (g["eps_sub"] + g["eps_prod"]) * cell(k_e)
        n = g["n"]
        out.append({
            "c_i_half_f": cell(k_i),
            "c_e_half_f": cell(k_e),
            "total_f": (n - 3) * c_i / 2 + 2 * c_i * c_e / (c_i + c_e),
        })
    return {"capacitances": out, "versions": {"scipy": scipy.__version__}}


CHECKS = {"water_static": water_static, "stats": stats, "ide": ide}

if __name__ == "__main__":
    request = json.load(sys.stdin)
    print(json.dumps(CHECKS[request["check"]](request)))
