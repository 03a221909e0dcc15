"""Reference values for the Gaussian component M-step: weighted least squares on iris.

Source: Fisher's iris data (150 flowers, 3 species), as bundled with scikit-learn
(sklearn.datasets.load_iris, no download). With hard memberships (cluster = species) each
Gaussian component is a weighted least-squares regression of the indicators (petal length,
petal width) on the component covariates (sepal length, sepal width). Coefficients come
from statsmodels WLS with weights 1 + (row index mod 4); the covariance is the
maximum-likelihood one, sum w r r' / sum w, from statsmodels' residuals (statsmodels'
own scale divides by n - p, see ../../docs/references.md).

Writes iris.csv and gaussian_iris.json.
Run: python make_gaussian_iris.py [OUTPUT_FOLDER]
"""
import json
import os
import sys

import numpy as np
import statsmodels.api as sm
from sklearn.datasets import load_iris

out = sys.argv[1] if len(sys.argv) > 1 else os.path.dirname(os.path.abspath(__file__))
iris = load_iris()
x = iris.data
species = iris.target
w = 1 + np.arange(len(species)) % 4
with open(os.path.join(out, "iris.csv"), "w") as fh:
    fh.write("sepal_length,sepal_width,petal_length,petal_width,species,weight\n")
    for i in range(len(species)):
        fh.write(",".join(repr(float(v)) for v in x[i]) + f",{species[i]},{w[i]}\n")

clusters = []
for g in range(3):
    rows = species == g
    z = sm.add_constant(x[rows][:, [0, 1]])
    ys = x[rows][:, [2, 3]]
    coefs, resid = [], []
    for j in range(2):
        res = sm.WLS(ys[:, j], z, weights=w[rows]).fit()
        coefs.append(np.asarray(res.params).tolist())
        resid.append(np.asarray(res.resid))
    r = np.column_stack(resid)
    ww = w[rows]
    cov = (r * ww[:, None]).T @ r / ww.sum()
    clusters.append({"species": int(g), "coefficients": coefs, "covariance": cov.tolist()})

ref = {
    "source": "statsmodels WLS on Fisher's iris (scikit-learn bundle); ML covariance from its residuals",
    "indicators": ["petal_length", "petal_width"],
    "terms": ["intercept", "sepal_length", "sepal_width"],
    "clusters": clusters,
}
with open(os.path.join(out, "gaussian_iris.json"), "w") as fh:
    json.dump(ref, fh, indent=1)
    fh.write("\n")
print("wrote", out)
