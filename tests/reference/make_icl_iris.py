"""Reference ICL values for Fisher's iris, full covariance, 2 and 3 clusters.

ICL in the form of Biernacki, Celeux & Govaert (2000, IEEE PAMI 22:719-725): the integrated
classification likelihood approximated as BIC - 2 * sum_i ln tau_i,MAP, where tau_i,MAP is
row i's largest posterior probability (the classification log-likelihood of the most likely
labels, on top of BIC = -2 loglik + k ln n). Its soft form, BIC + 2 * EN with the entropy
EN = -sum_i sum_g tau_ig ln tau_ig, is written beside it.

Source: Fisher's iris data (tests/reference/iris.csv, as bundled with scikit-learn).
Reference library: scikit-learn GaussianMixture (covariance_type="full", reg_covar=0,
tol=1e-12) finds the optima, started from the means of setosa and of the other two species
(2 clusters) or of each species (3 clusters; the start that reaches the best admissible
optimum, see make_mixture_iris.py). The log-likelihoods are checked against
mixture_iris.json. The posteriors, log-likelihood, BIC and ICL are then computed
independently of scikit-learn, from the fitted parameters with scipy's multivariate normal
density. Parameters: k = (G - 1) + G d + G d (d + 1) / 2.

Writes icl_iris.json. Run: python make_icl_iris.py [OUTPUT_FOLDER]
"""
import json
import os
import sys
import warnings

import numpy as np
from scipy.special import logsumexp
from scipy.stats import multivariate_normal
from sklearn.exceptions import ConvergenceWarning
from sklearn.mixture import GaussianMixture

warnings.filterwarnings("ignore", category=ConvergenceWarning)
here = os.path.dirname(os.path.abspath(__file__))
out = sys.argv[1] if len(sys.argv) > 1 else here

data = np.genfromtxt(os.path.join(here, "iris.csv"), delimiter=",", names=True)
y = np.column_stack([data[c] for c in ["sepal_length", "sepal_width", "petal_length", "petal_width"]])
species = data["species"].astype(int)
n, d = y.shape

cases = []
for g in (2, 3):
    common = dict(n_components=g, covariance_type="full", reg_covar=0.0, tol=1e-12, max_iter=20000)
    groups = [[0], [1, 2]] if g == 2 else [[0], [1], [2]]
    means = np.array([y[np.isin(species, grp)].mean(axis=0) for grp in groups])
    gm = GaussianMixture(means_init=means, random_state=0, **common).fit(y)
    log_joint = np.column_stack(
        [np.log(gm.weights_[k]) + multivariate_normal(gm.means_[k], gm.covariances_[k]).logpdf(y) for k in range(g)]
    )
    row_loglik = logsumexp(log_joint, axis=1)
    tau = np.exp(log_joint - row_loglik[:, None])
    loglik = float(row_loglik.sum())
    known = json.load(open(os.path.join(here, "mixture_iris.json")))["cases"]
    best = next(c["loglik"] for c in known if c["covariance_type"] == "full" and c["clusters"] == g)
    assert abs(loglik - best) < 1e-6, (g, loglik, best)
    k = (g - 1) + g * d + g * d * (d + 1) // 2
    bic = -2 * loglik + k * np.log(n)
    icl = bic - 2 * float(np.log(tau.max(axis=1)).sum())
    entropy = -float(np.sum(tau * np.log(np.where(tau > 0, tau, 1.0))))
    cases.append(
        {
            "clusters": g,
            "loglik": loglik,
            "parameters": k,
            "bic": float(bic),
            "icl": float(icl),
            "bic_entropy": float(bic + 2 * entropy),
        }
    )

with open(os.path.join(out, "icl_iris.json"), "w") as f:
    json.dump({"source": __doc__.strip().splitlines()[0], "covariance": "full", "cases": cases}, f, indent=1)
    f.write("\n")
