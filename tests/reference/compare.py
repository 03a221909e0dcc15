"""Compare freshly made reference files with the committed fixtures.

JSON numbers must agree to 10 significant digits (BLAS and library versions may move the
last few); CSV files must be identical. Exit status 1 on any difference.
Run: python compare.py FRESH_FOLDER
"""
import json
import math
import os
import sys

here = os.path.dirname(os.path.abspath(__file__))
fresh = sys.argv[1]
bad = []


def walk(a, b, where):
    if isinstance(a, dict):
        if set(a) != set(b):
            bad.append(f"{where}: keys differ")
        for k in a:
            if k in b:
                walk(a[k], b[k], f"{where}.{k}")
    elif isinstance(a, list):
        if len(a) != len(b):
            bad.append(f"{where}: lengths differ")
        for i, (x, y) in enumerate(zip(a, b)):
            walk(x, y, f"{where}[{i}]")
    elif isinstance(a, float) or isinstance(b, float):
        if not math.isclose(a, b, rel_tol=1e-10, abs_tol=1e-12):
            bad.append(f"{where}: {a} vs {b}")
    elif a != b:
        bad.append(f"{where}: {a!r} vs {b!r}")


for name in sorted(os.listdir(fresh)):
    mine, theirs = os.path.join(here, name), os.path.join(fresh, name)
    if name.endswith(".json"):
        walk(json.load(open(mine)), json.load(open(theirs)), name)
    elif name.endswith(".csv"):
        if open(mine).read() != open(theirs).read():
            bad.append(f"{name}: differs")
    print("checked", name)
for b in bad:
    print("MISMATCH", b)
sys.exit(1 if bad else 0)
