"""Reference values for the gating M-step: statsmodels MNLogit on its anes96 example.

Source: statsmodels' documented multinomial logit example (statsmodels.datasets.anes96,
944 respondents of the 1996 American National Election Study; outcome PID, party
identification with 7 levels 0..6; regressors logpopul, selfLR, age, educ, income plus a
constant; reference level 0). statsmodels' MNLogit ignores weights, so the frequency-
weighted reference replicates each row by its weight (1 + row index mod 3).

Writes anes96.csv (the data, with the weight column) and gating_anes96.json (coefficients
and their standard errors (statsmodels' bse: the inverse Hessian of the log-likelihood)
per outcome level 1..6 in regressor order, and the log-likelihood).

Run: python make_gating_anes96.py [OUTPUT_FOLDER]   (default: this script's folder)
"""
import json
import os
import sys

import numpy as np
import statsmodels.api as sm

out = sys.argv[1] if len(sys.argv) > 1 else os.path.dirname(os.path.abspath(__file__))
data = sm.datasets.anes96.load_pandas()
exog_names = ["logpopul", "selfLR", "age", "educ", "income"]
y = data.endog.astype(int).to_numpy()
x = data.exog[exog_names].to_numpy()
n = len(y)
freq = 1 + np.arange(n) % 3

with open(os.path.join(out, "anes96.csv"), "w") as fh:
    fh.write("PID," + ",".join(exog_names) + ",freq\n")
    for i in range(n):
        fh.write(f"{y[i]}," + ",".join(repr(float(v)) for v in x[i]) + f",{freq[i]}\n")


def fit(yy, xx):
    model = sm.MNLogit(yy, sm.add_constant(xx))
    res = model.fit(method="newton", maxiter=200, tol=1e-14, disp=0)
    # params: (regressors incl. constant) x (levels 1..6); store per level.
    return {
        "loglik": float(res.llf),
        "coefficients": np.asarray(res.params).T.tolist(),
        "standard_errors": np.asarray(res.bse).T.tolist(),
    }


rep = np.repeat(np.arange(n), freq)
ref = {
    "source": "statsmodels MNLogit, anes96 example (statsmodels.datasets.anes96), Newton, tol 1e-14",
    "terms": ["intercept"] + exog_names,
    "unweighted": fit(y, x),
    "frequency_weighted": fit(y[rep], x[rep]),
}
with open(os.path.join(out, "gating_anes96.json"), "w") as fh:
    json.dump(ref, fh, indent=1)
    fh.write("\n")
print("loglik", ref["unweighted"]["loglik"], ref["frequency_weighted"]["loglik"])
