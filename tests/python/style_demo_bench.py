"""Random-forest training time on the Lantern Hall demo's window features: Weft against
scikit-learn 1.9.1's RandomForestClassifier(n_estimators=200), on the same features, in one run,
printed as ratios (the issue's goal: Weft <= scikit-learn); plus Weft's time to estimate one
window (closeness and three reasons; goal <= 100 us), reported, not asserted.

Usage (from the workspace root, after `cargo build --release -p weft`):
    .venv/bin/python tests/python/style_demo_bench.py [--weft target/release/weft]
        [--dir target/style-demo-bench] [--runs 5]

Steps:
1. `weft demo --dir DIR` builds the scene once (36 pieces; skipped when DIR/pieces exists);
2. `weft style train DIR/pieces --target dockside --export-features DIR/features.csv` analyses
   them once and writes every window's features (skipped when the CSV exists);
3. `weft style train --features-from DIR/features.csv --model forest --json` is run RUNS times;
   its `fit_s` is the final fit on every window (standardisation, 200 trees on all cores,
   Platt calibration), its `inference_us_per_window` the mean estimate time;
4. scikit-learn fits RandomForestClassifier(n_estimators=200, class_weight="balanced") -- the
   class weighting Weft trains with -- on the same windows and labels, RUNS times, with
   n_jobs=None (one thread, its default) and n_jobs=-1 (all cores); medians are compared.
"""

import argparse
import csv
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time

import numpy as np
from sklearn.ensemble import RandomForestClassifier

CATEGORY = "dockside"
TREES = 200


def run(cmd):
    print("$ " + " ".join(cmd), file=sys.stderr, flush=True)
    out = subprocess.run(cmd, check=True, stdout=subprocess.PIPE, text=True)
    return out.stdout


def last_json(stdout):
    return json.loads(stdout.strip().splitlines()[-1])


def median_seconds(runs, f):
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        f()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--weft", default="target/release/weft")
    ap.add_argument("--dir", default="target/style-demo-bench")
    ap.add_argument("--runs", type=int, default=5)
    a = ap.parse_args()
    if not os.path.exists(a.weft):
        sys.exit(f"{a.weft} is missing: run `cargo build --release -p weft` first")
    pieces = os.path.join(a.dir, "pieces")
    if not os.path.isdir(pieces):
        run([a.weft, "demo", "--dir", a.dir, "--json"])
    features = os.path.join(a.dir, "features.csv")
    if not os.path.exists(features):
        run(
            [a.weft, "style", "train", pieces, "--target", CATEGORY, "--model", "forest",
             "--folds", "2", "--json", "--out", os.path.join(a.dir, "export.weftstyle"),
             "--export-features", features]
        )

    # Weft, through the command line (process start and file I/O are outside fit_s).
    weft_fit, weft_infer = [], []
    with tempfile.TemporaryDirectory() as tmp:
        for _ in range(a.runs):
            out = last_json(run(
                [a.weft, "style", "train", "--features-from", features, "--model", "forest",
                 "--folds", "2", "--json", "--out", os.path.join(tmp, "m.weftstyle")]
            ))
            weft_fit.append(out["fit_s"])
            weft_infer.append(out["inference_us_per_window"])

    # scikit-learn on the same windows and labels.
    with open(features, newline="") as fh:
        rows = list(csv.reader(fh))
    x = np.asarray([[float(v) for v in r[4:]] for r in rows[1:]], dtype=np.float64)
    y = np.asarray([0 if r[2] == CATEGORY else 1 for r in rows[1:]])

    def fit(n_jobs):
        return RandomForestClassifier(
            n_estimators=TREES, class_weight="balanced", random_state=0, n_jobs=n_jobs
        ).fit(x, y)

    sk_one = median_seconds(a.runs, lambda: fit(None))
    sk_all = median_seconds(a.runs, lambda: fit(-1))
    model = fit(None)
    sk_single = median_seconds(max(a.runs, 50), lambda: model.predict_proba(x[:1]))

    result = {
        "windows": int(x.shape[0]),
        "features": int(x.shape[1]),
        "trees": TREES,
        "cores": os.cpu_count(),
        "weft_fit_s": statistics.median(weft_fit),
        "sklearn_fit_s_n_jobs_1": sk_one,
        "sklearn_fit_s_n_jobs_all": sk_all,
        "ratio_weft_vs_sklearn_n_jobs_1": statistics.median(weft_fit) / sk_one,
        "ratio_weft_vs_sklearn_n_jobs_all": statistics.median(weft_fit) / sk_all,
        "weft_inference_us_per_window": statistics.median(weft_infer),
        "sklearn_predict_proba_one_window_us": 1e6 * sk_single,
    }
    print(
        f"RF({TREES}) on {result['windows']} windows x {result['features']} features: "
        f"Weft {result['weft_fit_s']:.3f} s (all cores); scikit-learn 1.9.1 "
        f"{sk_one:.3f} s (n_jobs=None), {sk_all:.3f} s (n_jobs=-1); "
        f"ratio Weft/scikit-learn {result['ratio_weft_vs_sklearn_n_jobs_1']:.2f} "
        f"(one thread), {result['ratio_weft_vs_sklearn_n_jobs_all']:.2f} (all cores). "
        f"Weft inference {result['weft_inference_us_per_window']:.1f} us per window "
        f"(closeness + 3 reasons); scikit-learn predict_proba of one window "
        f"{result['sklearn_predict_proba_one_window_us']:.0f} us.",
        file=sys.stderr,
    )
    json.dump(result, sys.stdout)
    print()


if __name__ == "__main__":
    main()
