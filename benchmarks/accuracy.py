"""Accuracy of each feature set on invented demo micrographs, held out by sample (group).

Writes ``benchmarks/accuracy.md`` (the README links it; its numbers come only from this code).
``benchmarks/run.py`` calls :func:`measure_accuracy` and :func:`accuracy_markdown` too.

For each feature set ("two-bar", "order", "topology", "all") with the default classifier,
grouped cross-validation (:func:`topoclass.model.cross_validate_model`, folds from
``StratifiedGroupKFold`` over the simulated membrane samples) of
``build_pipeline(make_features(name), DEFAULT_CLASSIFIER)``: macro-F1 and top-label ECE of the
out-of-fold probabilities, bare and with the calibration that ``train_model`` would ship
(``choose_calibration(y, "auto")``, fitted inside each fold). The images are invented
(``topoclass.synth.write_dataset``), not measurements.

Run from the repository root: ``PYTHONPATH=. python benchmarks/accuracy.py [--quick]``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from topoclass.features import FeatureSettings  # noqa: E402
from topoclass.labels import read_labels  # noqa: E402
from topoclass.model import (  # noqa: E402
    DEFAULT_CLASSIFIER,
    build_pipeline,
    choose_calibration,
    cross_validate_model,
)
from topoclass.synth import write_dataset  # noqa: E402
from topoclass.vectorize import make_features  # noqa: E402
from topoclass.workflow import labelled_records  # noqa: E402

FEATURE_SET_NAMES = ("two-bar", "order", "topology", "all")
OUT = Path(__file__).with_name("accuracy.md")
FULL = {"per_class": 24, "size": 320, "seed": 2026, "cv": 5}
QUICK = {"per_class": 12, "size": 320, "seed": 2026, "cv": 5}


def measure_accuracy(per_class: int = 24, size: int = 320, seed: int = 2026, cv: int = 5, *,
                     jobs: int = 2, workdir: str | Path | None = None) -> dict:
    """Grouped-CV macro-F1 and ECE of every feature set on one invented demo set.

    Returns a dict with ``rows`` (one per feature set), the data set description and timings.
    """
    with tempfile.TemporaryDirectory(prefix="topoclass-acc-") as tmp:
        base = Path(workdir) if workdir is not None else Path(tmp)
        t0 = time.perf_counter()
        sheet = write_dataset(base / "data", per_class=per_class, size=size, seed=seed)
        t_data = time.perf_counter() - t0
        labels = read_labels(sheet, n_folds=cv)
        t0 = time.perf_counter()
        records, y, groups, failures = labelled_records(
            labels, FeatureSettings(), jobs=jobs, cache_dir=base / "cache"
        )
        t_records = time.perf_counter() - t0
        method, reason = choose_calibration(y, "auto")
        rows = []
        t0 = time.perf_counter()
        for name in FEATURE_SET_NAMES:
            pipeline = build_pipeline(make_features(name), DEFAULT_CLASSIFIER, seed=0)
            bare = cross_validate_model(pipeline, records, y, groups, cv=cv, seed=0)
            calibrated = cross_validate_model(pipeline, records, y, groups, cv=cv, seed=0,
                                              calibration=method)
            rows.append({
                "feature_set": name,
                "classifier": DEFAULT_CLASSIFIER,
                "macro_f1": bare.macro_f1,
                "ece": bare.ece,
                "accuracy": bare.accuracy,
                "macro_f1_calibrated": calibrated.macro_f1,
                "ece_calibrated": calibrated.ece,
            })
        t_cv = time.perf_counter() - t0
    n_groups = len(set(groups.tolist())) if groups is not None else 0
    return {
        "rows": rows,
        "per_class": per_class,
        "size": size,
        "seed": seed,
        "cv": cv,
        "n_images": int(len(y)),
        "n_groups": n_groups,
        "n_failed": len(failures),
        "classes": sorted(set(y.tolist())),
        "calibration": method,
        "calibration_reason": reason,
        "seconds": {"write_dataset": t_data, "records": t_records, "cross_validation": t_cv},
    }


def accuracy_markdown(result: dict, *, heading: str = "#") -> str:
    """The accuracy table with what it was measured on."""
    r = result
    lines = [
        f"{heading} Accuracy by feature set (grouped cross-validation, invented demo data)",
        "",
        f"Written by `python benchmarks/accuracy.py` / `python benchmarks/run.py` on "
        f"{dt.date.today().isoformat()}; do not edit by hand.",
        "",
        f"- data: `topoclass.synth.write_dataset(per_class={r['per_class']}, size={r['size']}, "
        f"seed={r['seed']})`: {r['n_images']} invented anodic-alumina micrographs "
        f"({', '.join(r['classes'])}), {r['n_groups']} simulated membrane samples; "
        f"{r['n_failed']} images failed site finding",
        f"- {r['cv']}-fold `StratifiedGroupKFold` (fold seed 0): the images of one sample are "
        "never on both sides of a split",
        f"- classifier: `{r['rows'][0]['classifier']}` (`topoclass.model.DEFAULT_CLASSIFIER`) in "
        "`build_pipeline(make_features(name), classifier)`",
        f"- calibrated columns: `{r['calibration']}` inside each fold, as `train_model` would "
        f"ship it ({r['calibration_reason']})",
        "- ECE: top-label expected calibration error, 10 equal-width bins (0 is perfect)",
        "",
        "| feature set | macro-F1 | ECE | accuracy | macro-F1 (calibrated) | ECE (calibrated) |",
        "| --- | --- | --- | --- | --- | --- |",
    ]
    for row in r["rows"]:
        lines.append(
            f"| {row['feature_set']} | {row['macro_f1']:.3f} | {row['ece']:.3f} | "
            f"{row['accuracy']:.3f} | {row['macro_f1_calibrated']:.3f} | "
            f"{row['ece_calibrated']:.3f} |"
        )
    s = r["seconds"]
    lines += ["", f"Time: data {s['write_dataset']:.0f} s, records {s['records']:.0f} s, "
              f"cross-validation {s['cross_validation']:.0f} s.", ""]
    return "\n".join(lines)


def accuracy_table(rows: list[dict]) -> str:
    """The feature-set table alone, as Markdown."""
    lines = ["| feature set | macro-F1 | ECE | macro-F1 (calibrated) | ECE (calibrated) |",
             "| --- | --- | --- | --- | --- |"]
    for r in rows:
        lines.append(f"| {r['feature_set']} | {r['macro_f1']:.3f} | {r['ece']:.3f} | "
                     f"{r['macro_f1_calibrated']:.3f} | {r['ece_calibrated']:.3f} |")
    return "\n".join(lines)


def write_readme_block(readme: Path, result: dict) -> bool:
    """Put this run's table between the accuracy markers of a README; False if it has none."""
    start, end = "<!-- accuracy:start -->", "<!-- accuracy:end -->"
    if not readme.exists():
        return False
    text = readme.read_text(encoding="utf-8")
    if start not in text or end not in text:
        return False
    r = result
    block = (f"{start}\n{accuracy_table(r['rows'])}\n\n{r['n_images']} invented images, "
             f"{r['n_groups']} samples, {r['cv']}-fold grouped CV, classifier "
             f"`{r['rows'][0]['classifier']}`, calibration `{r['calibration']}`; written by "
             f"`benchmarks/accuracy.py` on {dt.date.today().isoformat()}.\n{end}")
    head, rest = text.split(start, 1)
    readme.write_text(head + block + rest.split(end, 1)[1], encoding="utf-8")
    return True


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true",
                        help=f"{QUICK['per_class']} images per class instead of "
                             f"{FULL['per_class']} (accuracy.md is then not written)")
    parser.add_argument("--jobs", type=int, default=2)
    args = parser.parse_args()
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1):
        result = measure_accuracy(**(QUICK if args.quick else FULL), jobs=args.jobs)
    text = accuracy_markdown(result)
    print(text)
    if not args.quick:
        OUT.write_text(text, encoding="utf-8")
        print(f"wrote {OUT}")
        for readme in (ROOT / "README.md", ROOT / "benchmarks" / "README.md"):
            if write_readme_block(readme, result):
                print(f"wrote the accuracy block of {readme}")


if __name__ == "__main__":
    main()
