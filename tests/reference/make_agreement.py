"""Reference values for cluster agreement: adjusted Rand index and assignment.

Sources: scikit-learn's adjusted_rand_score (sklearn.metrics) on fixed label vectors made
here with numpy's seeded generator, and scipy's linear_sum_assignment (scipy.optimize,
maximize=True) on seeded random weight matrices, square and rectangular.
Writes agreement.json. Run: python make_agreement.py [OUTPUT_FOLDER]
"""
import json
import os
import sys

import numpy as np
from scipy.optimize import linear_sum_assignment
from sklearn.metrics import adjusted_rand_score

out = sys.argv[1] if len(sys.argv) > 1 else os.path.dirname(os.path.abspath(__file__))
rng = np.random.default_rng(20261202)
ari = []
for n, ka, kb, noise in [(30, 2, 2, 0.0), (50, 3, 3, 0.2), (200, 4, 3, 0.4), (120, 5, 5, 0.9), (80, 3, 6, 0.5), (300, 2, 4, 1.0)]:
    a = rng.integers(0, ka, n)
    b = np.where(rng.random(n) < noise, rng.integers(0, kb, n), a % kb)
    ari.append({"a": a.tolist(), "b": b.tolist(), "ari": float(adjusted_rand_score(a, b))})
assignments = []
for rows, cols in [(3, 3), (4, 4), (5, 5), (3, 5), (2, 6), (6, 6), (7, 7)]:
    w = rng.random((rows, cols)).round(6)
    r, c = linear_sum_assignment(w, maximize=True)
    assignments.append({"weights": w.tolist(), "total": float(w[r, c].sum()), "columns": c.tolist()})
ref = {
    "source": "scikit-learn adjusted_rand_score; scipy.optimize.linear_sum_assignment(maximize=True)",
    "adjusted_rand_index": ari,
    "assignment": assignments,
}
with open(os.path.join(out, "agreement.json"), "w") as fh:
    json.dump(ref, fh, indent=1)
    fh.write("\n")
print([round(x["ari"], 4) for x in ari])
