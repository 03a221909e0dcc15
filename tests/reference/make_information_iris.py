"""Reference standard errors of a fitted mixture of experts from an independent
numerical Hessian of its log-likelihood.

Source data: Fisher's iris, 150 flowers, as bundled with scikit-learn
(sklearn.datasets.load_iris). Model: 3 clusters; indicators petal length and petal width,
bivariate normal with a covariance per cluster (varying volume, shape and orientation);
gating network a multinomial logit on sepal length, cluster 1 the reference.

The log-likelihood is written here from scratch in numpy, with the covariances
parameterised by their Cholesky factors (log diagonal), a different parameterisation from
cohortmix's; standard errors of the gating coefficients and of the means do not depend on
how the covariances are parameterised. The maximum is found by scipy.optimize (BFGS,
then Newton-CG polish) from the species partition; the Hessian is numdifftools.Hessian at
the maximum; the covariance of the estimates is the inverse of the negative Hessian.

Clusters are ordered by their mean petal length (smallest first), so cluster 1 is the
setosa-like one.

Writes information_iris.json. Run: python make_information_iris.py [OUTPUT_FOLDER]
"""
import json
import os
import sys

import numdifftools as nd
import numpy as np
from scipy.optimize import minimize
from scipy.special import logsumexp
from sklearn.datasets import load_iris

out = sys.argv[1] if len(sys.argv) > 1 else os.path.dirname(os.path.abspath(__file__))
iris = load_iris()
y = iris.data[:, [2, 3]]  # petal length, petal width
w = np.column_stack([np.ones(len(y)), iris.data[:, 0]])  # intercept, sepal length
species = iris.target
n, d = y.shape
g, p = 3, 2
tri = np.tril_indices(d)


def unpack(theta):
    gamma = theta[: (g - 1) * p].reshape(g - 1, p)
    rest = theta[(g - 1) * p :]
    means = rest[: g * d].reshape(g, d)
    chol_parts = rest[g * d :].reshape(g, len(tri[0]))
    chols = []
    for k in range(g):
        lk = np.zeros((d, d))
        lk[tri] = chol_parts[k]
        lk[np.diag_indices(d)] = np.exp(np.diag(lk))
        chols.append(lk)
    return gamma, means, chols


def loglik(theta):
    gamma, means, chols = unpack(theta)
    eta = np.column_stack([np.zeros(n), w @ gamma.T])
    log_pi = eta - logsumexp(eta, axis=1, keepdims=True)
    comp = np.empty((n, g))
    for k in range(g):
        lk = chols[k]
        r = np.linalg.solve(lk, (y - means[k]).T)
        comp[:, k] = -0.5 * (r**2).sum(0) - np.log(np.diag(lk)).sum() - 0.5 * d * np.log(2 * np.pi)
    return logsumexp(log_pi + comp, axis=1).sum()


def start():
    means = np.array([y[species == k].mean(0) for k in range(g)])
    parts = []
    for k in range(g):
        lk = np.linalg.cholesky(np.cov(y[species == k].T, bias=True))
        lk[np.diag_indices(d)] = np.log(np.diag(lk))
        parts.append(lk[tri])
    return np.concatenate([np.zeros((g - 1) * p), means.ravel(), np.concatenate(parts)])


neg = lambda t: -loglik(t)
grad = nd.Gradient(neg)
res = minimize(neg, start(), method="BFGS", options={"gtol": 1e-10, "maxiter": 20000})
res = minimize(neg, res.x, jac=grad, hess=nd.Hessian(neg), method="trust-exact", options={"gtol": 1e-11})
theta = res.x
gamma, means, chols = unpack(theta)
order = np.argsort(means[:, 0])
assert list(order) == [0, 1, 2], "clusters came out of the petal-length order"
hess = nd.Hessian(loglik, step=1e-4)(theta)
cov = np.linalg.inv(-hess)
se = np.sqrt(np.diag(cov))
gamma_se = se[: (g - 1) * p].reshape(g - 1, p)
mean_se = se[(g - 1) * p : (g - 1) * p + g * d].reshape(g, d)
def sig(a, digits=9):
    """Round to `digits` significant digits: the numerical Hessian's last digits depend on
    the BLAS, and the check in cohortmix needs 3."""
    return [float(f"{v:.{digits - 1}e}") for v in np.ravel(a)]


def rows(a, width):
    flat = sig(a)
    return [flat[i : i + width] for i in range(0, len(flat), width)]


gradient_norm = float(np.abs(grad(theta)).max())
ref = {
    "source": "numpy log-likelihood, scipy BFGS + trust-exact maximum, numdifftools.Hessian; iris from scikit-learn",
    "loglik": float(loglik(theta)),
    "gating_terms": ["intercept", "sepal_length"],
    "gating_coefficients": rows(gamma, p),
    "gating_standard_errors": rows(gamma_se, p),
    "indicators": ["petal_length", "petal_width"],
    "means": rows(means, d),
    "mean_standard_errors": rows(mean_se, d),
}
with open(os.path.join(out, "information_iris.json"), "w") as fh:
    json.dump(ref, fh, indent=1)
    fh.write("\n")
print("loglik", ref["loglik"], "max |gradient|", gradient_norm)
print("gating se", gamma_se.tolist())
print("mean se", mean_se.tolist())
