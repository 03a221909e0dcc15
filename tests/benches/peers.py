#!/usr/bin/env python3
"""cohortmix side by side with scikit-learn and statsmodels, on the same data in one run.

    python tests/benches/peers.py                  # N = 1e4, 1e5, 1e6; cohortmix alone at 1e7
    python tests/benches/peers.py --sizes 10000 --big 0 --write none    # a quick look

What it measures (see docs/performance.md, which it rewrites between its markers):
- EM without covariates, d = 5, G = 4, full and axis-aligned covariance: scikit-learn's
  GaussianMixture and cohortmix from the same starting values, 50 iterations, no early
  stop, no covariance regularisation. scikit-learn's seconds per iteration are
  (time of a 50-iteration fit − time of a 1-iteration fit) / 49, which removes its set-up
  and final E-step; cohortmix's are (one E-step + 50 iterations) / 50, which slightly
  overstates them. Both final log-likelihoods must agree to 1e-8 relative.
- The gating network's Newton fit on hard memberships (3 covariates + intercept, 4
  clusters) against statsmodels MNLogit (Newton), both from zero to convergence; the
  maximised log-likelihoods must agree to 1e-8 relative.
Every measurement runs in its own process, so its peak resident memory is its own.
Python measurements set OMP_NUM_THREADS, OPENBLAS_NUM_THREADS and MKL_NUM_THREADS to
their thread count; cohortmix sets its thread pool.
"""

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
D, G, ITERATIONS = 5, 4, 50
SEED = 20261202
BEGIN, END = "<!-- peers:begin -->", "<!-- peers:end -->"


def worker_sklearn(folder, covariance, threads):
    import warnings

    import numpy as np
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.mixture import GaussianMixture
    from threadpoolctl import threadpool_info

    start = json.loads((Path(folder) / "start.json").read_text())
    x = np.fromfile(Path(folder) / "x.f64", dtype="<f8").reshape(-1, start["d"])
    means = np.array(start["means"])
    covs = np.array(start["covariances"])
    if covariance == "full":
        precisions = np.linalg.inv(covs)
    else:
        precisions = 1.0 / np.array([np.diag(c) for c in covs])

    def fit(iterations):
        gm = GaussianMixture(
            n_components=len(start["weights"]),
            covariance_type="full" if covariance == "full" else "diag",
            tol=0.0,
            reg_covar=0.0,
            max_iter=iterations,
            n_init=1,
            init_params="random_from_data",
            weights_init=np.array(start["weights"]),
            means_init=means,
            precisions_init=precisions,
            random_state=0,
        )
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            clock = time.perf_counter()
            gm.fit(x)
            return time.perf_counter() - clock, gm

    one, _ = fit(1)
    many, gm = fit(ITERATIONS)
    blas = [{k: i.get(k) for k in ("internal_api", "num_threads")} for i in threadpool_info()]
    return {
        "tool": "scikit-learn",
        "seconds_per_iteration": (many - one) / (ITERATIONS - 1),
        "loglik": float(gm.score(x)) * len(x),
        "n_iter": int(gm.n_iter_),
        "blas": blas,
    }


def worker_statsmodels(folder, threads):
    import numpy as np
    import statsmodels.api as sm
    from threadpoolctl import threadpool_info

    labels = np.fromfile(Path(folder) / "labels.u8", dtype=np.uint8).astype(np.int64)
    w = np.fromfile(Path(folder) / "w.f64", dtype="<f8").reshape(len(labels), -1)
    exog = sm.add_constant(w, prepend=True)
    clock = time.perf_counter()
    result = sm.MNLogit(labels, exog).fit(method="newton", maxiter=100, disp=0)
    seconds = time.perf_counter() - clock
    blas = [{k: i.get(k) for k in ("internal_api", "num_threads")} for i in threadpool_info()]
    return {
        "tool": "statsmodels",
        "seconds": seconds,
        "loglik": float(result.llf),
        "newton_iterations": int(result.mle_retvals["iterations"]),
        "blas": blas,
    }


def peak_rss_mib():
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def run_python(args, threads):
    env = dict(os.environ)
    for v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        env[v] = str(threads)
    out = subprocess.run(
        [sys.executable, __file__, "worker", *args], env=env, check=True, capture_output=True, text=True
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def run_cohortmix(args):
    out = subprocess.run(
        ["cargo", "bench", "--quiet", "--bench", "peers", "--", *args],
        cwd=ROOT,
        check=True,
        capture_output=True,
        text=True,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def make_mixture(folder, n, rng):
    import numpy as np

    means = rng.normal(0.0, 3.0, size=(G, D))
    covs = []
    for _ in range(G):
        a = rng.normal(0.0, 0.6, size=(D, D))
        covs.append(a @ a.T + 0.5 * np.eye(D))
    shares = np.array([0.4, 0.3, 0.2, 0.1])
    labels = rng.choice(G, size=n, p=shares)
    x = np.empty((n, D))
    for k in range(G):
        rows = labels == k
        x[rows] = rng.multivariate_normal(means[k], covs[k], size=rows.sum())
    x.astype("<f8").tofile(Path(folder) / "x.f64")
    # Start from the truth moved: shifted means, spherical covariances, equal shares.
    start = {
        "d": D,
        "weights": [1.0 / G] * G,
        "means": (means + rng.normal(0.0, 0.8, size=(G, D))).tolist(),
        "covariances": [(np.trace(c) / D * np.eye(D)).tolist() for c in covs],
    }
    (Path(folder) / "start.json").write_text(json.dumps(start))


def make_gating(folder, n, rng):
    import numpy as np

    w = rng.normal(0.0, 1.0, size=(n, 3))
    gamma = np.vstack([np.zeros(4), rng.normal(0.0, 0.5, size=(G - 1, 4))])
    eta = gamma[:, 0] + w @ gamma[:, 1:].T
    p = np.exp(eta - eta.max(axis=1, keepdims=True))
    p /= p.sum(axis=1, keepdims=True)
    u = rng.random(n)[:, None]
    labels = (u > p.cumsum(axis=1)).sum(axis=1).astype(np.uint8)
    w.astype("<f8").tofile(Path(folder) / "w.f64")
    labels.tofile(Path(folder) / "labels.u8")


def relative(a, b):
    return abs(a - b) / max(abs(a), abs(b))


def machine():
    model = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    memory = "unknown"
    try:
        kb = int(Path("/proc/meminfo").read_text().split()[1])
        memory = f"{kb / 1024 / 1024:.0f} GiB"
    except (OSError, ValueError, IndexError):
        pass
    rustc = subprocess.run(["rustc", "--version"], capture_output=True, text=True).stdout.strip()
    import numpy
    import sklearn
    import statsmodels

    return {
        "cpu": model,
        "cores": os.cpu_count(),
        "memory": memory,
        "rustc": rustc,
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scikit-learn": sklearn.__version__,
        "statsmodels": statsmodels.__version__,
    }


def main():
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--sizes", default="10000,100000,1000000", help="N with the peers")
    parser.add_argument("--big", type=int, default=10_000_000, help="N for cohortmix alone (0: skip)")
    parser.add_argument("--write", default=str(ROOT / "docs" / "performance.md"), help="page to update, or none")
    args = parser.parse_args()
    sizes = [int(float(s)) for s in args.sizes.split(",") if s]
    import numpy as np

    subprocess.run(["cargo", "bench", "--quiet", "--bench", "peers", "--no-run"], cwd=ROOT, check=True)
    rng = np.random.default_rng(SEED)
    em_rows, gating_rows, failures = [], [], []
    with tempfile.TemporaryDirectory() as tmp:
        for n in sizes + ([args.big] if args.big else []):
            folder = Path(tmp) / f"n{n}"
            folder.mkdir()
            make_mixture(folder, n, rng)
            make_gating(folder, n, rng)
            peers = n in sizes
            for cov in ("full", "axis"):
                for threads in (1, 2) if n == 1_000_000 or not peers else (1,):
                    if not peers and cov == "axis":
                        continue
                    ours = run_cohortmix(["em", str(folder), cov, str(threads), str(ITERATIONS)])
                    row = {"n": n, "covariance": cov, "threads": threads, "ours": ours}
                    if peers:
                        theirs = run_python(["sklearn", str(folder), cov, str(threads)], threads)
                        row["theirs"] = theirs
                        row["agreement"] = relative(ours["loglik"], theirs["loglik"])
                        if row["agreement"] > 1e-8:
                            failures.append(f"EM n={n} {cov}: log-likelihoods differ by {row['agreement']:.1e}")
                    em_rows.append(row)
                    print(json.dumps(row), flush=True)
            if peers:
                for threads in (1, 2) if n == 1_000_000 else (1,):
                    ours = run_cohortmix(["gating", str(folder), str(threads)])
                    theirs = run_python(["statsmodels", str(folder), str(threads)], threads)
                    row = {"n": n, "threads": threads, "ours": ours, "theirs": theirs}
                    row["agreement"] = relative(ours["loglik"], theirs["loglik"])
                    if row["agreement"] > 1e-8:
                        failures.append(f"gating n={n}: log-likelihoods differ by {row['agreement']:.1e}")
                    gating_rows.append(row)
                    print(json.dumps(row), flush=True)
    page = render(machine(), em_rows, gating_rows)
    print(page)
    if args.write != "none":
        path = Path(args.write)
        text = path.read_text()
        if BEGIN in text and END in text:
            head, rest = text.split(BEGIN, 1)
            _, tail = rest.split(END, 1)
            text = head + BEGIN + "\n" + page + END + tail
        else:
            text = text.rstrip("\n") + "\n\n" + BEGIN + "\n" + page + END + "\n"
        path.write_text(text)
    for f in failures:
        print("DISAGREEMENT:", f, file=sys.stderr)
    sys.exit(1 if failures else 0)


def render(m, em_rows, gating_rows):
    ns = lambda r, key="ours": r[key]["seconds_per_iteration"] / (r["n"] * G) * 1e9  # noqa: E731
    out = []
    out.append(f"Written by `python tests/benches/peers.py` on {time.strftime('%Y-%m-%d')}.\n")
    out.append(
        f"Machine: {m['cpu']}, {m['cores']} cores, {m['memory']}; {m['rustc']}; Python {m['python']}, "
        f"numpy {m['numpy']}, scikit-learn {m['scikit-learn']}, statsmodels {m['statsmodels']}.\n"
    )
    blas = next((r["theirs"]["blas"] for r in em_rows if "theirs" in r and r["threads"] == 1), [])
    out.append(
        "Python side: one process per measurement with OMP/OpenBLAS/MKL threads set to the thread "
        f"count; thread pools it reported at 1 thread: {json.dumps(blas)}.\n"
    )
    out.append("### EM, no covariates, d = 5, G = 4, 50 iterations from the same start\n")
    out.append(
        "| N | covariance | threads | scikit-learn s/iter | cohortmix s/iter | ratio | "
        "cohortmix ns per row·cluster·iter | scikit-learn ns | log-lik. rel. diff. | "
        "cohortmix peak RSS MiB |"
    )
    out.append("|---|---|---|---|---|---|---|---|---|---|")
    for r in em_rows:
        o = r["ours"]
        if "theirs" in r:
            t = r["theirs"]
            peer = f"{t['seconds_per_iteration']:.4g}"
            ratio = f"{t['seconds_per_iteration'] / o['seconds_per_iteration']:.1f}×"
            their_ns = f"{ns(r, 'theirs'):.1f}"
            agree = f"{r['agreement']:.1e}"
        else:
            peer = ratio = their_ns = agree = "—"
        out.append(
            f"| {r['n']:.0e} | {r['covariance']} | {r['threads']} | {peer} | {o['seconds_per_iteration']:.4g} | "
            f"{ratio} | {ns(r):.2f} | {their_ns} | {agree} | {o['peak_rss_mib']:.0f} |"
        )
    out.append("")
    out.append("### Gating network: multinomial logit on hard memberships, 3 covariates, 4 clusters\n")
    out.append(
        "| N | threads | statsmodels s | cohortmix s | ratio | Newton iterations (sm / ours) | "
        "log-lik. rel. diff. |"
    )
    out.append("|---|---|---|---|---|---|---|")
    for r in gating_rows:
        o, t = r["ours"], r["theirs"]
        out.append(
            f"| {r['n']:.0e} | {r['threads']} | {t['seconds']:.3g} | {o['seconds']:.3g} | "
            f"{t['seconds'] / o['seconds']:.1f}× | {t['newton_iterations']} / {o['newton_iterations']} | "
            f"{r['agreement']:.1e} |"
        )
    out.append("")
    return "\n".join(out)


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "worker":
        kind = sys.argv[2]
        if kind == "sklearn":
            result = worker_sklearn(sys.argv[3], sys.argv[4], int(sys.argv[5]))
        else:
            result = worker_statsmodels(sys.argv[3], int(sys.argv[4]))
        result["peak_rss_mib"] = peak_rss_mib()
        print(json.dumps(result))
    else:
        main()
