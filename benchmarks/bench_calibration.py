"""Which calibration suits small multi-class training sets? Rewrites calibration_choice.md.

Trains on ``--per-class`` images per class (three classes, the typical topoclass set), scores a
held-out set of 1000 from the same population, and reports log-loss and top-label ECE for the
bare classifier and for CalibratedClassifierCV with sigmoid and temperature scaling (3 folds).
The data are invented (``sklearn.datasets.make_classification``), not micrograph features.

Run from the repository root: ``PYTHONPATH=. python benchmarks/bench_calibration.py``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import sys
from pathlib import Path

import numpy as np
import sklearn
from sklearn.datasets import make_classification

from topoclass.model import build_pipeline, metrics_from_probabilities
from topoclass.model.calibration import fit_calibrated

sys.path.insert(0, str(Path(__file__).parent))
from _machine import cpu_model  # noqa: E402


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
                    model = fit_calibrated(pipeline, X_tr, y_tr, None, cal, 3, 0)
                m = metrics_from_probabilities(y_te, model.predict_proba(X_te), model.classes_)
                results.setdefault((clf, cal), []).append(
                    (m["accuracy"], m["log_loss"], m["ece"]))
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    lines = [
        "# Calibration of small multi-class sets",
        "",
        "Written by `python benchmarks/bench_calibration.py`; do not edit by hand.",
        "",
        "Question: which `CalibratedClassifierCV` method should `calibration=\"auto\"` pick "
        "for the typical topoclass training set (tens of images per class, three or more "
        "classes)?",
        "",
        f"- date: {dt.datetime.now():%Y-%m-%d %H:%M}; machine: {cpu_model()}, "
        f"{os.cpu_count()} logical cores, load average at the start {load:.1f}; Python "
        f"{platform.python_version()}, numpy {np.__version__}, scikit-learn {sklearn.__version__}",
        f"- invented data (`make_classification`, 10 features, 5 informative, three classes): "
        f"{n_train} training samples, 1000 held-out samples from the same population, "
        f"{args.repeats} data sets (random_state 0-{args.repeats - 1}), calibration with 3 "
        "stratified folds",
        "",
        f"{args.per_class} per class, mean (min–max) over the data sets:",
        "",
        "| classifier | calibration | accuracy | log-loss | ECE |",
        "| --- | --- | --- | --- | --- |",
    ]
    for (clf, cal), rows in results.items():
        a = np.asarray(rows)
        cells = [f"{a[:, k].mean():.3f} ({a[:, k].min():.3f}–{a[:, k].max():.3f})"
                 for k in range(3)]
        lines.append(f"| {clf} | {cal} | " + " | ".join(cells) + " |")
    ece = {key: float(np.mean(np.asarray(rows)[:, 2])) for key, rows in results.items()}
    lines += ["", "Mean ECE, one-vs-rest sigmoid against temperature scaling: " + "; ".join(
        f"{clf} {ece[(clf, 'sigmoid')]:.3f} against {ece[(clf, 'temperature')]:.3f}"
        for clf in ("logistic", "svm", "forest")) + ".", ""]
    text = "\n".join(lines)
    print(text)
    out = Path(__file__).with_name("calibration_choice.md")
    out.write_text(text, encoding="utf-8")
    print(f"wrote {out}")


if __name__ == "__main__":
    main()
