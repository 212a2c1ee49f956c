"""Times scikit-learn 1.9.1's RandomForestClassifier on the windows written by Weft's style
benchmark (engine/benches/style.rs), so the benchmark can report Weft / scikit-learn ratios
measured in the same run.

Usage: .venv/bin/python tests/python/style_bench.py DATA.json
DATA.json: {"x": [[...], ...], "y": [...], "trees": 200, "runs": 5}
Prints JSON: median fit seconds with n_jobs=None (scikit-learn's default, one thread) and
n_jobs=-1, and predict_proba seconds per window (batch) and for one window alone.
"""

import json
import statistics
import sys
import time

import numpy as np
from sklearn.ensemble import RandomForestClassifier


def median_seconds(runs, f):
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        f()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main():
    with open(sys.argv[1]) as fh:
        data = json.load(fh)
    x = np.asarray(data["x"], dtype=np.float64)
    y = np.asarray(data["y"])
    trees, runs = data["trees"], data["runs"]

    def fit(n_jobs):
        return RandomForestClassifier(n_estimators=trees, random_state=0, n_jobs=n_jobs).fit(x, y)

    out = {
        "fit_s_n_jobs_1": median_seconds(runs, lambda: fit(None)),
        "fit_s_n_jobs_all": median_seconds(runs, lambda: fit(-1)),
    }
    model = fit(None)
    out["predict_batch_s_per_window"] = median_seconds(runs, lambda: model.predict_proba(x)) / len(x)
    out["predict_single_s"] = median_seconds(runs, lambda: model.predict_proba(x[:1]))
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
