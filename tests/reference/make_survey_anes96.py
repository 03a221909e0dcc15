"""Reference values for design-based standard errors: a weighted multinomial logit with
strata and primary sampling units, by the textbook linearisation formula in numpy.

Source of the formula: Binder (1983), "On the variances of asymptotically normal estimators
from complex surveys", International Statistical Review 51:279-292; as usually written
(e.g. Skinner, Holt & Smith 1989, ch. 3): V = H^-1 M H^-1 with H the weighted Hessian of
the log-likelihood and M = sum_h n_h/(n_h - 1) sum_j (z_hj - zbar_h)(z_hj - zbar_h)', z_hj
the weighted score total of primary sampling unit j of stratum h, n_h the stratum's units
(with replacement, no finite-population correction). The logit itself is fitted here by
Newton's method, independently of the program.

Check of this implementation against a general-purpose library: with unit weights, one
stratum and the units as clusters, (n - 1)/n * M must give statsmodels' cluster-robust
covariance of MNLogit (cov_type="cluster", use_correction=False); the script stops if not.

Data: statsmodels' anes96 example (944 rows; outcome PID with 7 levels), with a simulated
design of our own: sampling weight 0.5 + ((37 i) mod 11)/4, stratum i mod 5, unit
(i div 5) mod 12 within the stratum (60 units). The indicator y = 100 PID + a jitter of
at most 3.2 puts every party in a cluster of its own, so a mixture fitted to y with the five
regressors in its gating network has, at its optimum, exactly this logit as its gating.

Writes survey_anes96.csv and survey_anes96.json: for each reference level r (the
program's reference cluster may be any party), the coefficients and design-based
standard errors of levels != r, in regressor order (intercept first), and the
log-likelihood.

Run: python make_survey_anes96.py [OUTPUT_FOLDER]   (default: this script's folder)
"""
import json
import os
import sys

import numpy as np
import statsmodels.api as sm

out = sys.argv[1] if len(sys.argv) > 1 else os.path.dirname(os.path.abspath(__file__))
data = sm.datasets.anes96.load_pandas()
names = ["logpopul", "selfLR", "age", "educ", "income"]
y = data.endog.astype(int).to_numpy()
x = data.exog[names].to_numpy()
n, levels = len(y), 7
i = np.arange(n)
weight = 0.5 + ((37 * i) % 11) / 4.0
stratum = i % 5
unit = (i // 5) % 12
jitter = (((13 * i) % 7) - 3) + (((7 * i) % 5) - 2) / 10.0
indicator = 100.0 * y + jitter

with open(os.path.join(out, "survey_anes96.csv"), "w") as fh:
    fh.write("PID,y," + ",".join(names) + ",w,stratum,unit\n")
    for k in range(n):
        fh.write(
            f"{y[k]},{float(indicator[k])!r}," + ",".join(repr(float(v)) for v in x[k])
            + f",{float(weight[k])!r},s{stratum[k]},{unit[k]}\n"
        )

X = np.column_stack([np.ones(n), x])
p = X.shape[1]


def fit(base, w):
    """Weighted multinomial logit with reference level `base`, by Newton's method."""
    others = [l for l in range(levels) if l != base]
    Y = np.zeros((n, levels - 1))
    for c, l in enumerate(others):
        Y[y == l, c] = 1.0
    beta = np.zeros((levels - 1) * p)
    for _ in range(100):
        eta = X @ beta.reshape(levels - 1, p).T
        m = np.maximum(eta.max(axis=1, keepdims=True), 0.0)
        e = np.exp(eta - m)
        P = e / (np.exp(-m) + e.sum(axis=1, keepdims=True))
        R = (Y - P) * w[:, None]
        score = (R.T @ X).ravel()
        H = np.zeros(((levels - 1) * p, (levels - 1) * p))
        for a in range(levels - 1):
            for b in range(levels - 1):
                c = w * P[:, a] * ((a == b) - P[:, b])
                H[a * p:(a + 1) * p, b * p:(b + 1) * p] = (X * c[:, None]).T @ X
        step = np.linalg.solve(H, score)
        beta = beta + step
        if np.max(np.abs(step)) < 1e-13:
            break
    eta = X @ beta.reshape(levels - 1, p).T
    m = np.maximum(eta.max(axis=1, keepdims=True), 0.0)
    e = np.exp(eta - m)
    denominator = np.exp(-m) + e.sum(axis=1, keepdims=True)
    P = e / denominator
    logp0 = -m[:, 0] - np.log(denominator[:, 0])
    loglik = float(np.sum(w * np.where(y == base, logp0, np.log(np.take_along_axis(
        np.column_stack([np.ones(n), P]), np.array([0 if v == base else 1 + others.index(v) for v in y])[:, None], 1)[:, 0]))))
    scores = np.einsum("ic,ij->icj", (Y - P) * w[:, None], X).reshape(n, -1)
    return beta, H, scores, loglik


def meat(scores, strata, units):
    """sum_h n_h/(n_h - 1) sum_j (z_hj - zbar_h)(z_hj - zbar_h)'."""
    k = scores.shape[1]
    total = np.zeros((k, k))
    for h in np.unique(strata):
        in_h = strata == h
        ids = np.unique(units[in_h])
        z = np.array([scores[in_h & (units == u)].sum(axis=0) for u in ids])
        nh = len(ids)
        dz = z - z.mean(axis=0)
        total += nh / (nh - 1.0) * dz.T @ dz
    return total


# The implementation against statsmodels: unit weights, one stratum, units as clusters.
groups = stratum * 12 + unit
beta, H, scores, _ = fit(0, np.ones(n))
hinv = np.linalg.inv(H)
ours = hinv @ meat(scores, np.zeros(n, dtype=int), groups) @ hinv
g = len(np.unique(groups))
res = sm.MNLogit(y, X).fit(method="newton", maxiter=200, tol=1e-14, disp=0,
                           cov_type="cluster", cov_kwds={"groups": groups, "use_correction": False})
theirs = np.asarray(res.cov_params())
# statsmodels orders parameters regressor-major within each equation as we do.
worst = np.max(np.abs(ours * (g - 1) / g - theirs) / np.sqrt(np.outer(np.diag(theirs), np.diag(theirs))))
if worst > 1e-8:
    sys.exit(f"the numpy formula does not reproduce statsmodels' cluster-robust covariance ({worst:.2e})")

ref = {
    "source": "numpy implementation of Binder (1983) linearisation; logit by Newton; checked against "
              "statsmodels MNLogit cov_type='cluster' (use_correction=False) with unit weights",
    "terms": ["intercept"] + names,
    "by_reference_level": [],
}
for base in range(levels):
    beta, H, scores, loglik = fit(base, weight)
    hinv = np.linalg.inv(H)
    cov = hinv @ meat(scores, stratum, stratum * 12 + unit) @ hinv
    se = np.sqrt(np.diag(cov))
    ref["by_reference_level"].append({
        "reference": base,
        "levels": [l for l in range(levels) if l != base],
        "coefficients": beta.reshape(levels - 1, p).tolist(),
        "standard_errors": se.reshape(levels - 1, p).tolist(),
        "loglik": loglik,
    })
with open(os.path.join(out, "survey_anes96.json"), "w") as fh:
    json.dump(ref, fh, indent=1)
    fh.write("\n")
print("statsmodels cluster-robust check: worst relative difference", f"{worst:.2e}")
