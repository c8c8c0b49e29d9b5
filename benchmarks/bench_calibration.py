"""Which calibration suits small multi-class training sets? Results: calibration_choice.md.

Trains on ``--per-class`` images per class (three classes, the typical topoclass set), scores a
held-out set of 1000 from the same population, and reports log-loss and top-label ECE for the
bare classifier and for CalibratedClassifierCV with sigmoid and temperature scaling (3 folds).
The data are invented (``sklearn.datasets.make_classification``), not micrograph features.

Run from the repository root: ``PYTHONPATH=. python benchmarks/bench_calibration.py``.
"""

from __future__ import annotations

import argparse

import numpy as np
from sklearn.datasets import make_classification

from topoclass.model import _fit_calibrated, build_pipeline, metrics_from_probabilities


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--per-class", type=int, default=30)
    parser.add_argument("--repeats", type=int, default=6)
    args = parser.parse_args()
    n_train = 3 * args.per_class
    results: dict[tuple[str, str], list[tuple[float, float, float]]] = {}
    for rs in range(args.repeats):
        X, y = make_classification(n_samples=n_train + 1000, n_features=10, n_informative=5,
                                   n_redundant=1, n_classes=3, n_clusters_per_class=1,
                                   random_state=rs)
        X_tr, y_tr, X_te, y_te = X[:n_train], y[:n_train], X[n_train:], y[n_train:]
        for clf in ("logistic", "svm", "forest"):
            for cal in ("none", "sigmoid", "temperature"):
                if cal == "none" and clf == "svm":
                    continue  # SVC gives no probabilities without a calibration step
                pipeline = build_pipeline(None, clf, seed=0)
                if cal == "none":
                    model = pipeline.fit(X_tr, y_tr)
                else:
                    model = _fit_calibrated(pipeline, X_tr, y_tr, None, cal, 3, 0)
                m = metrics_from_probabilities(y_te, model.predict_proba(X_te), model.classes_)
                results.setdefault((clf, cal), []).append(
                    (m["accuracy"], m["log_loss"], m["ece"]))
    print(f"{args.per_class} per class, 3 classes, {args.repeats} data sets, mean (min–max)\n")
    print("| classifier | calibration | accuracy | log-loss | ECE |")
    print("| --- | --- | --- | --- | --- |")
    for (clf, cal), rows in results.items():
        a = np.asarray(rows)
        cells = [f"{a[:, k].mean():.3f} ({a[:, k].min():.3f}–{a[:, k].max():.3f})"
                 for k in range(3)]
        print(f"| {clf} | {cal} | " + " | ".join(cells) + " |")


if __name__ == "__main__":
    main()
