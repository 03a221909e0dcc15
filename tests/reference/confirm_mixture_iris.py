"""Confirm an optimum that scikit-learn's own starts do not reach.

For full covariance with 4 clusters on iris, cohortmix's best admissible optimum is higher
than the best of the 300 scikit-learn runs in make_mixture_iris.py. This script starts
scikit-learn GaussianMixture (reg_covar=0, tol=1e-12) from cohortmix's solution
(mixture_iris_full4_start.json) and records where scikit-learn's EM settles, and whether that
point passes the same exclusion rule. Writes mixture_iris_confirmed.json.
Run: python confirm_mixture_iris.py [OUTPUT_FOLDER]
"""
import json
import os
import sys

import numpy as np
from sklearn.datasets import load_iris
from sklearn.mixture import GaussianMixture

here = os.path.dirname(os.path.abspath(__file__))
out = sys.argv[1] if len(sys.argv) > 1 else here
x = load_iris().data
n, d = x.shape
g = 4
start = json.load(open(os.path.join(here, "mixture_iris_full4_start.json")))
means = np.array(start["means"]).reshape(g, d)
covs = np.array(start["covs"]).reshape(g, d, d).transpose(0, 2, 1)
gm = GaussianMixture(g, covariance_type="full", reg_covar=0.0, tol=1e-12, max_iter=20000,
                     weights_init=np.array(start["weights"]), means_init=means,
                     precisions_init=np.array([np.linalg.inv(c) for c in covs]), random_state=0).fit(x)
pooled_min = np.linalg.eigvalsh(np.cov(x.T, bias=True)).min()
min_eig = min(np.linalg.eigvalsh(c).min() for c in gm.covariances_)
rows = gm.predict_proba(x).sum(axis=0)
ref = {
    "source": "scikit-learn GaussianMixture started from cohortmix's solution (full covariance, 4 clusters, iris)",
    "covariance_type": "full",
    "clusters": g,
    "loglik": float(gm.score(x) * n),
    "iterations": int(gm.n_iter_),
    "admissible": bool(min_eig >= 1e-3 * pooled_min and rows.min() >= d + 1),
}
with open(os.path.join(out, "mixture_iris_confirmed.json"), "w") as fh:
    json.dump(ref, fh, indent=1)
    fh.write("\n")
print(ref)
