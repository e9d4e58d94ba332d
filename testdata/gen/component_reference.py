"""Reference values for component discounting (one forgetting factor for the
trend block, one for the seasonal block), computed in covariance form with
numpy. Run from the repository root with Debian's interpreter:

    /usr/bin/python3 testdata/gen/component_reference.py

It writes testdata/component_cases.csv (one model per case),
testdata/component_reference.csv (the values) and testdata/series/co2_gaps.csv
(co2 with 19 buckets left empty).

The recursion (discount weighted estimation with a diagonal discount matrix,
Ameen and Harrison 1984; the multiple-discount form of component discounting,
West and Harrison 1997, ch. 6), with theta in coordinates relative to the
newest bucket, G = L^T the evolution over one bucket, D = diag(block factor):

    prior over k buckets:  a = G^k m,  R = D^-k/2 G^k C G^kT D^-k/2
    observation y:         f = f(0), q = f^T R f, e = y - f^T a,
                           A = R f / (1 + q), m = a + A e,
                           C = R - A A^T (1 + q)
    residual scale:        T <- lv^k T (+1), S <- lv^k S (+ e^2 / (1 + q)),
                           lv = max(trend factor, seasonal factor)

Covariance form cannot start from F = 0 (C would be infinite), so the first
buckets run in information form until F is fitted; that warm-up is the
estimator's own definition: discounted least squares with the one factor lv
(F <- lv^k L^-k F L^-kT + f f^T, h <- lv^k L^-k h + f y), until F is positive
definite with a scaled reciprocal condition number of at least 1e-10
(1-norm, F scaled by its diagonal), written here in dense numpy. At the first
such bucket: C = F^-1, m = C h, S = syy - h^T C h. From there on only the
covariance form above runs.

L^k comes from numpy.linalg.matrix_power of the one-step L (built from the
shift property f(j+1) = L f(j)), not from a closed form.
"""
import csv
import math

import numpy as np


def regressors(j, degree, period, harmonics):
    out = [j**i / math.factorial(i) for i in range(degree + 1)]
    for k in range(1, harmonics + 1):
        a = 2 * math.pi * k * j / period
        if 2 * k != period:
            out.append(math.sin(a))
        out.append(math.cos(a))
    return np.array(out)


def shift_matrix(degree, period, harmonics):
    """L with f(j+1) = L f(j): solve it from p + 3 points by least squares."""
    js = np.arange(-3.0, 13.0)
    X0 = np.array([regressors(j, degree, period, harmonics) for j in js])
    X1 = np.array([regressors(j + 1, degree, period, harmonics) for j in js])
    # X1 = X0 L^T  ->  L^T = lstsq(X0, X1)
    Lt, *_ = np.linalg.lstsq(X0, X1, rcond=None)
    return Lt.T


def block_factors(degree, p, lam_t, lam_s):
    return np.array([lam_t if i <= degree else lam_s for i in range(p)])


def pd(F):
    """The estimator's rule: Cholesky pivots above 1e-13 of their diagonal."""
    p = F.shape[0]
    c = np.zeros_like(F)
    for j in range(p):
        d = F[j, j] - np.dot(c[j, :j], c[j, :j])
        if not d > 1e-13 * F[j, j]:
            return False
        c[j, j] = math.sqrt(d)
        for i in range(j + 1, p):
            c[i, j] = (F[i, j] - np.dot(c[i, :j], c[j, :j])) / c[j, j]
    return True


def rcond(F):
    d = np.sqrt(np.diag(F))
    A = F / np.outer(d, d)
    return 1.0 / (np.linalg.norm(A, 1) * np.linalg.norm(np.linalg.inv(A), 1))


def run(y, degree, period, harmonics, lam_t, lam_s, burn_in, skip_runs):
    """Yields (origin, state) after each bucket once in covariance form.

    skip_runs: gaps are applied as one shift over the whole run of missing
    buckets (yielding only after it) when True, one bucket at a time when
    False."""
    p = len(regressors(0, degree, period, harmonics))
    L = shift_matrix(degree, period, harmonics)
    Linv = np.linalg.inv(L)
    d = block_factors(degree, p, lam_t, lam_s)
    lv = max(lam_t, lam_s)
    f0 = regressors(0, degree, period, harmonics)
    F, h = np.zeros((p, p)), np.zeros(p)
    m = C = None
    T = S = syy = 0.0
    n_obs = 0
    i, n = 0, len(y)
    while i < n:
        k = 1
        if math.isnan(y[i]) and skip_runs:
            while i + k < n and math.isnan(y[i + k]):
                k += 1
        Gk = np.linalg.matrix_power(L.T, k)
        if C is None:
            Lk = np.linalg.matrix_power(Linv, k)
            F = lv**k * Lk @ F @ Lk.T
            h = lv**k * Lk @ h
        else:
            m = Gk @ m
            dki = np.diag(d ** (-k / 2.0))
            C = dki @ Gk @ C @ Gk.T @ dki
        T, S, syy = lv**k * T, lv**k * S, lv**k * syy
        yi = y[i + k - 1]
        if not math.isnan(yi):
            n_obs += 1
            if C is None:
                F = F + np.outer(f0, f0)
                h = h + f0 * yi
                syy += yi * yi
                T += 1
                if pd(F) and rcond(F) >= 1e-10:
                    C = np.linalg.inv(F)
                    m = C @ h
                    S = max(0.0, syy - h @ C @ h)
            else:
                R = C
                q = f0 @ R @ f0
                e = yi - f0 @ m
                A = R @ f0 / (1 + q)
                m = m + A * e
                C = R - np.outer(A, A) * (1 + q)
                C = (C + C.T) / 2
                S += e * e / (1 + q)
                T += 1
                syy += yi * yi
        i += k
        if C is not None and n_obs >= p + burn_in:
            f1 = regressors(1, degree, period, harmonics)
            f12 = regressors(12, degree, period, harmonics)
            yield i, {
                "theta": m,
                "forecast1": [f1 @ m],
                "forecast12": [f12 @ m],
                "v1": [f1 @ C @ f1],
                "v12": [f12 @ C @ f12],
                "T": [T],
                "S": [S],
            }


def load(name):
    with open(f"testdata/series/{name}.csv") as fh:
        return [float(r["value"]) if r["value"] else math.nan for r in csv.DictReader(fh)]


def main():
    co2 = load("co2")
    gaps = {30, 31, 32, 100, 200, 201, 202, 203, 204, 205, 206, 207, 208, 209, 210, 211, 212, 213, 400}
    co2_gaps = [math.nan if b in gaps else v for b, v in enumerate(co2, start=1)]
    with open("testdata/series/co2_gaps.csv", "w") as fh:
        fh.write("bucket,value\n")
        for b, v in enumerate(co2_gaps, start=1):
            fh.write(f"{b},{'' if math.isnan(v) else repr(v)}\n")
    air = [math.log(v) for v in load("airpassengers")]
    series = {"co2": co2, "co2_gaps": co2_gaps, "log_airpassengers": air, "nile_gaps": load("nile_gaps")}
    cases = [
        # series, degree, period, harmonics, trend factor, seasonal factor, burn-in
        ("co2", 1, 12, 2, 0.90, 0.99, 0),
        ("co2_gaps", 1, 12, 2, 0.93, 0.995, 2),
        ("co2_gaps", 2, 12, 3, 0.99, 0.90, 0),
        ("log_airpassengers", 1, 12, 3, 0.95, 0.995, 0),
        ("nile_gaps", 1, 4, 1, 0.85, 0.97, 1),
        ("nile_gaps", 0, 7, 3, 0.97, 0.8, 0),
    ]
    with open("testdata/component_cases.csv", "w") as out:
        out.write("case,series,degree,period,harmonics,lambda,season_lambda,burn_in\n")
        for c, (name, deg, per, K, lt, ls, b) in enumerate(cases, start=1):
            out.write(f"{c},{name},{deg},{per},{K},{lt!r},{ls!r},{b}\n")
    with open("testdata/component_reference.csv", "w") as out:
        out.write("case,gap_runs,origin,quantity,index,value\n")
        for c, (name, deg, per, K, lt, ls, b) in enumerate(cases, start=1):
            for runs in (False, True):
                for origin, vals in run(series[name], deg, per, K, lt, ls, b, runs):
                    for q, v in vals.items():
                        for idx, x in enumerate(v, start=1):
                            out.write(f"{c},{int(runs)},{origin},{q},{idx},{float(x)!r}\n")
    print("numpy", np.__version__)


main()
