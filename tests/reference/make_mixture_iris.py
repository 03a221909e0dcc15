"""Reference optima for four covariance structures on Fisher's iris (no covariates).

Source: Fisher's iris data, 150 flowers x 4 measurements, as bundled with scikit-learn
(sklearn.datasets.load_iris). Reference library: scikit-learn GaussianMixture, whose
covariance types match four of cohortmix's structures:
  full      = varying volume, varying shape, varying orientation
  tied      = equal volume, equal shape, equal orientation
  diag      = varying volume, varying shape, axis-aligned
  spherical = varying volume, spherical

Settings chosen for reference values (scikit-learn's defaults are too loose): reg_covar=0,
tol=1e-12, max_iter=20000, 300 single-start runs per case (k-means++, random and
random-from-data starts, seeds 0..99 each), plus for 3 clusters one run started from the
species means: for full covariance with 3 clusters none of the 300 other runs reached the
best admissible optimum (-180.185), which that start does. Degenerate optima are excluded by a stated rule, because the mixture
likelihood is unbounded (iris is recorded to 0.1 cm, so a cluster can collapse on tied
values): a run counts only if every covariance eigenvalue is at least 1e-3 times the
smallest eigenvalue of the pooled (one-cluster) covariance, and every cluster holds at least
d + 1 = 5 rows of posterior weight. The best surviving run is then polished with tol=0
for 20000 more iterations from its own parameters.

A case is marked well_defined when the best value is a stable admissible optimum: of 10
runs restarted from the best solution with its means moved by 5% of each measurement's
standard deviation at random, at least 5 return to it (within 1e-6 relative) and stay
admissible. cohortmix's test compares only those cases.

Writes mixture_iris.json. Run: python make_mixture_iris.py [OUTPUT_FOLDER]
"""
import json
import os
import sys
import warnings

import numpy as np
from sklearn.datasets import load_iris
from sklearn.exceptions import ConvergenceWarning
from sklearn.mixture import GaussianMixture

warnings.filterwarnings("ignore", category=ConvergenceWarning)
out = sys.argv[1] if len(sys.argv) > 1 else os.path.dirname(os.path.abspath(__file__))
iris = load_iris()
x, species = iris.data, iris.target
n, d = x.shape
pooled_min = np.linalg.eigvalsh(np.cov(x.T, bias=True)).min()
FLOOR = 1e-3 * pooled_min
MIN_ROWS = d + 1


def full_covariances(gm):
    g = gm.n_components
    if gm.covariance_type == "full":
        return gm.covariances_
    if gm.covariance_type == "tied":
        return np.repeat(gm.covariances_[None], g, axis=0)
    if gm.covariance_type == "diag":
        return np.array([np.diag(v) for v in gm.covariances_])
    return np.array([np.eye(d) * v for v in gm.covariances_])


def admissible(gm):
    covs = full_covariances(gm)
    if min(np.linalg.eigvalsh(c).min() for c in covs) < FLOOR:
        return False
    return gm.predict_proba(x).sum(axis=0).min() >= MIN_ROWS


def species_start(kind):
    """Weights, means and precisions of the species partition, for a covariance type."""
    parts = [x[species == k] for k in range(3)]
    covs = [np.cov(p.T, bias=True) for p in parts]
    weights = np.array([len(p) / n for p in parts])
    means = np.array([p.mean(axis=0) for p in parts])
    if kind == "full":
        prec = np.array([np.linalg.inv(c) for c in covs])
    elif kind == "tied":
        prec = np.linalg.inv(sum(w * c for w, c in zip(weights, covs)))
    elif kind == "diag":
        prec = np.array([1 / np.diag(c) for c in covs])
    else:
        prec = np.array([1 / np.diag(c).mean() for c in covs])
    return dict(weights_init=weights, means_init=means, precisions_init=prec, random_state=0)


cases = []
for kind in ["full", "tied", "diag", "spherical"]:
    for g in range(1, 5):
        values, best = [], None
        runs = [dict(init_params=i, random_state=s) for i in ["k-means++", "random", "random_from_data"]
                for s in range(100)]
        if g == 3:
            runs.append(species_start(kind))
        for run in runs:
            if True:
                gm = GaussianMixture(g, covariance_type=kind, reg_covar=0.0, tol=1e-12, max_iter=20000, **run)
                try:
                    gm.fit(x)
                except (ValueError, np.linalg.LinAlgError):
                    continue
                if not admissible(gm):
                    continue
                ll = gm.score(x) * n
                values.append(ll)
                if best is None or ll > best[0]:
                    best = (ll, gm)
        ll, gm = best
        polish = GaussianMixture(g, covariance_type=kind, reg_covar=0.0, tol=0.0, max_iter=20000,
                                 weights_init=gm.weights_, means_init=gm.means_,
                                 precisions_init=gm.precisions_)
        polish.fit(x)
        if admissible(polish) and polish.score(x) * n >= ll:
            ll = polish.score(x) * n
        reached = sum(abs(v - ll) <= 1e-6 * abs(ll) for v in values)
        rng = np.random.default_rng(0)
        returned = 0
        for _ in range(10):
            moved = gm.means_ + 0.05 * x.std(axis=0) * rng.standard_normal(gm.means_.shape)
            again = GaussianMixture(g, covariance_type=kind, reg_covar=0.0, tol=1e-12, max_iter=20000,
                                    weights_init=gm.weights_, means_init=moved,
                                    precisions_init=gm.precisions_)
            try:
                again.fit(x)
            except (ValueError, np.linalg.LinAlgError):
                continue
            if admissible(again) and abs(again.score(x) * n - ll) <= 1e-6 * abs(ll):
                returned += 1
        cases.append({"covariance_type": kind, "clusters": g, "loglik": float(ll),
                      "admissible_runs": len(values), "runs_reaching_best": int(reached),
                      "perturbed_restarts_returning": returned, "well_defined": bool(returned >= 5)})
        print(kind, g, ll, len(values), reached, returned)

ref = {
    "source": "scikit-learn GaussianMixture on Fisher's iris (scikit-learn bundle), reg_covar=0, tol=1e-12, 300 runs (+1 from the species means at G=3), polished",
    "exclusion_rule": {"eigenvalue_floor_relative_to_pooled_min": 1e-3, "min_rows": MIN_ROWS},
    "pooled_min_eigenvalue": float(pooled_min),
    "cases": cases,
}
with open(os.path.join(out, "mixture_iris.json"), "w") as fh:
    json.dump(ref, fh, indent=1)
    fh.write("\n")
