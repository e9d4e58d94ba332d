"""Recompute testdata/dls_reference.csv with numpy and report the largest
relative difference from R's values. Run from the repository root with
Debian's interpreter (it needs python3-numpy):

    /usr/bin/python3 testdata/gen/check_numpy.py

Independent of R: weighted least squares by numpy.linalg.lstsq (LAPACK
dgelsd, SVD based) on the rows sqrt(w) f(-j), and (X^T W X)^-1 from the SVD.
"""
import csv
import math
from collections import defaultdict

import numpy as np


def regressors(j, degree, period, harmonics):
    cols = [j**i / math.factorial(i) for i in range(degree + 1)]
    for k in range(1, harmonics + 1):
        a = 2 * math.pi * k * j / period
        if 2 * k != period:
            cols.append(np.sin(a))
        cols.append(np.cos(a))
    return np.column_stack(cols)


def load_series(name):
    with open(f"testdata/series/{name}.csv") as f:
        rows = list(csv.DictReader(f))
    return np.array([float(r["value"]) if r["value"] else np.nan for r in rows])


ref = defaultdict(dict)
meta = {}
with open("testdata/dls_reference.csv") as f:
    for r in csv.DictReader(f):
        ref[r["case"]][(r["quantity"], int(r["index"]))] = float(r["value"])
        meta[r["case"]] = r

worst = 0.0
for case, vals in ref.items():
    m = meta[case]
    degree, period = int(m["degree"]), float(m["period"])
    harmonics, lam, n = int(m["harmonics"]), float(m["lambda"]), int(m["n"])
    y = load_series(m["series"])[:n]
    age = n - 1 - np.arange(n)
    obs = ~np.isnan(y)
    w = lam ** age[obs]
    X = regressors(-age[obs].astype(float), degree, period, harmonics)
    p = X.shape[1]
    sw = np.sqrt(w)
    theta, *_ = np.linalg.lstsq(sw[:, None] * X, sw * y[obs], rcond=None)
    S = float(np.sum(w * (y[obs] - X @ theta) ** 2))
    T = float(np.sum(w))
    sigma = math.sqrt(S / (T - p))
    u, s, vt = np.linalg.svd(sw[:, None] * X, full_matrices=False)
    V = (vt.T / s**2) @ vt
    got = {("S", 0): S, ("T", 0): T, ("sigma", 0): sigma}
    for k in range(p):
        got[("theta", k + 1)] = theta[k]
    if degree >= 1:
        got[("slope_se", 0)] = sigma * math.sqrt(V[1, 1])
    cum = np.zeros(p)
    cumy = 0.0
    for l in range(1, 13):
        f = regressors(np.array([float(l)]), degree, period, harmonics)[0]
        yh = float(f @ theta)
        cum += f
        cumy += yh
        got[("forecast", l)] = yh
        got[("se", l)] = sigma * math.sqrt(1 + f @ V @ f)
        got[("cum", l)] = cumy
        got[("cum_se", l)] = sigma * math.sqrt(l + cum @ V @ cum)
    for key, want in vals.items():
        d = abs(got[key] - want) / max(abs(want), 1e-300)
        if d > worst:
            worst, where = d, (case, m["series"], key)
print(f"numpy {np.__version__}: {sum(len(v) for v in ref.values())} values, "
      f"largest relative difference from R {worst:.2e} at {where}")
