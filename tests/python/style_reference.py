"""Reference figures for Weft's style models and evaluation, from scikit-learn 1.9.1.

Prints one JSON object to stdout:

- datasets: scikit-learn's bundled wine and breast_cancer (no download), each with its data,
  labels, the test indices of 10-fold StratifiedKFold (shuffle=False), and per model the
  balanced accuracy of every fold (balanced_accuracy_score) and scikit-learn's test predictions:
  - forest: RandomForestClassifier(n_estimators=200, random_state=0)
  - linear_svm: make_pipeline(StandardScaler(), LinearSVC())
  - logistic: make_pipeline(StandardScaler(), LogisticRegression())  (multinomial for 3 classes)
  - logistic_ovr: make_pipeline(StandardScaler(), OneVsRestClassifier(LogisticRegression()))
  plus, fitted on the whole standardised dataset, StandardScaler's mean_/scale_, the exact
  optima of LinearSVC and one-vs-rest LogisticRegression (tight tolerances, one row per binary
  problem) and the root split of DecisionTreeClassifier(random_state=0) on the raw data.
- group_folds: a seeded grouped dataset (numpy default_rng) and the test indices of
  StratifiedGroupKFold(n_splits=5, shuffle=False).
- platt: seeded scores and labels and scikit-learn's private _sigmoid_calibration (a, b)
  (Platt's sigmoid with his smoothed targets; closeness = 1 / (1 + exp(a*s + b))).

Run with the project's venv: .venv/bin/python tests/python/style_reference.py
"""

import json
import sys
import warnings

import numpy as np
import sklearn
from sklearn.calibration import _sigmoid_calibration
from sklearn.datasets import load_breast_cancer, load_wine
from sklearn.ensemble import RandomForestClassifier
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import balanced_accuracy_score
from sklearn.model_selection import StratifiedGroupKFold, StratifiedKFold
from sklearn.multiclass import OneVsRestClassifier
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import LinearSVC
from sklearn.tree import DecisionTreeClassifier

FOLDS = 10

MODELS = {
    "forest": lambda: RandomForestClassifier(n_estimators=200, random_state=0, n_jobs=-1),
    "linear_svm": lambda: make_pipeline(StandardScaler(), LinearSVC()),
    "logistic": lambda: make_pipeline(StandardScaler(), LogisticRegression()),
    "logistic_ovr": lambda: make_pipeline(
        StandardScaler(), OneVsRestClassifier(LogisticRegression())
    ),
}


def exact_optima(x, y):
    """Coefficients at the optimum (tight tolerances) on the whole standardised data."""
    z = StandardScaler().fit_transform(x)
    classes = np.unique(y)
    svm_rows, logistic_rows = [], []
    # One binary problem per class, or class 1 vs 0 for two classes (scikit-learn's layout).
    targets = [classes[1]] if len(classes) == 2 else list(classes)
    for c in targets:
        yb = (y == c).astype(int)
        svm = LinearSVC(tol=1e-12, max_iter=1_000_000, dual=False).fit(z, yb)
        svm_rows.append({"weights": svm.coef_[0].tolist(), "intercept": float(svm.intercept_[0])})
        lr = LogisticRegression(solver="newton-cholesky", tol=1e-12, max_iter=1000).fit(z, yb)
        logistic_rows.append(
            {"weights": lr.coef_[0].tolist(), "intercept": float(lr.intercept_[0])}
        )
    return svm_rows, logistic_rows


def dataset(name, loader):
    data = loader()
    x, y = data.data, data.target
    folds = list(StratifiedKFold(n_splits=FOLDS, shuffle=False).split(x, y))
    models = {}
    for model_name, make in MODELS.items():
        scores, predictions = [], []
        for train, test in folds:
            model = make().fit(x[train], y[train])
            predicted = model.predict(x[test])
            scores.append(float(balanced_accuracy_score(y[test], predicted)))
            predictions.append(predicted.tolist())
        models[model_name] = {
            "fold_balanced_accuracy": scores,
            "mean_balanced_accuracy": float(np.mean(scores)),
            "fold_predictions": predictions,
        }
    scaler = StandardScaler().fit(x)
    svm_rows, logistic_rows = exact_optima(x, y)
    tree = DecisionTreeClassifier(random_state=0).fit(x, y).tree_
    return {
        "name": name,
        "source": f"scikit-learn {sklearn.__version__} load_{name}",
        "features": list(map(str, data.feature_names)),
        "x": x.tolist(),
        "y": y.tolist(),
        "test_folds": [test.tolist() for _, test in folds],
        "models": models,
        "scaler_mean": scaler.mean_.tolist(),
        "scaler_scale": scaler.scale_.tolist(),
        "svm_optimum": svm_rows,
        "logistic_optimum": logistic_rows,
        "tree_root": {"feature": int(tree.feature[0]), "threshold": float(tree.threshold[0])},
    }


def group_folds():
    rng = np.random.default_rng(5)
    n_groups = 37
    sizes = rng.integers(1, 9, size=n_groups)
    group_ids = rng.permutation(1000)[:n_groups]
    labels, groups = [], []
    for g, size in zip(group_ids, sizes):
        # Mostly one class per group, sometimes mixed: exercises the greedy balance.
        main = int(rng.integers(0, 3))
        for _ in range(size):
            labels.append(main if rng.random() < 0.8 else int(rng.integers(0, 3)))
            groups.append(int(g))
    labels, groups = np.array(labels), np.array(groups)
    splitter = StratifiedGroupKFold(n_splits=5, shuffle=False)
    tests = [test.tolist() for _, test in splitter.split(np.zeros(len(labels)), labels, groups)]
    return {"labels": labels.tolist(), "groups": groups.tolist(), "folds": 5, "test_folds": tests}


def platt():
    rng = np.random.default_rng(9)
    scores = rng.normal(0.0, 1.5, size=500)
    labels = (rng.random(500) < 1.0 / (1.0 + np.exp(-(1.7 * scores - 0.4)))).astype(int)
    a, b = _sigmoid_calibration(scores, labels)
    return {"scores": scores.tolist(), "labels": labels.tolist(), "a": float(a), "b": float(b)}


def main():
    warnings.simplefilter("ignore", ConvergenceWarning)
    out = {
        "sklearn_version": sklearn.__version__,
        "folds": FOLDS,
        "datasets": [dataset("wine", load_wine), dataset("breast_cancer", load_breast_cancer)],
        "group_folds": group_folds(),
        "platt": platt(),
    }
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
