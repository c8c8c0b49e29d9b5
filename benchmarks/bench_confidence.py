"""Does the confidence mean something? The review band, the fade and the novelty checks measured.

Writes ``benchmarks/RESULTS_confidence.md`` (every number in it comes from this code).

For each seed: an invented training set (``topoclass.synth.write_dataset``), (a) a held-out set
drawn like it (other simulated samples) and (b) a harder, shifted set
(``write_dataset(shifted=True)``: about twice the jitter, fewer vacancies, two grains at a
small misorientation, about twice the noise). A model is trained with the default settings
(``train_from_labels``); then, with the review band at ``alpha``:

* ``conformal_coverage`` (a): share of images whose prediction set holds the true class;
  goal ``>= 1 - alpha - 0.02`` for every seed (split-conformal guarantee: ``>= 1 - alpha``,
  Vovk, Gammerman & Shafer 2005; Angelopoulos & Bates 2021);
* ``review_share_right`` (a): of the images whose top class is right, the share whose verdict
  is not that class (review or unfamiliar); goal ``<= 0.15``;
* ``wrong_caught`` (b): of the images whose top class is wrong, the share whose verdict is
  review or unfamiliar; goal ``>= 0.8``;
* ``ece_shifted`` (b): top-label expected calibration error, 10 equal bins (Guo, Pleiss, Sun
  & Weinberger 2017; common practice), of the probabilities scoring reports; goal ``<= 0.05``;
  cross-checked against the bins of ``sklearn.calibration.calibration_curve``;
* odd images (first seed's model): a square lattice, a random pattern at about 2.5 times the
  largest training spacing and three scikit-image photographs must all be unfamiliar (or
  refused as having no lattice).

The images are invented, not measurements. Run from the repository root:
``PYTHONPATH=. python benchmarks/bench_confidence.py [--quick]``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import platform
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from benchmarks._machine import cpu_model  # noqa: E402
from topoclass.features import FeatureSettings, measure_patterns  # noqa: E402
from topoclass.labels import read_labels  # noqa: E402
from topoclass.model import (  # noqa: E402
    REVIEW,
    UNFAMILIAR,
    DoubtFade,
    ReviewBand,
    limit_by_evidence,
    reliability_table,
)
from topoclass.synth import make_micrograph, square_micrograph, write_dataset  # noqa: E402
from topoclass.workflow import labelled_records, train_from_labels  # noqa: E402

OUT = Path(__file__).with_name("RESULTS_confidence.md")
FULL = {"seeds": (11, 12, 13, 14, 15), "per_class": 24, "held_per_class": 12, "size": 320}
QUICK = {"seeds": (11, 12), "per_class": 12, "held_per_class": 6, "size": 256}
#: Weights left at the novelty threshold compared in the fade sweep (1.0: none below it).
SWEEP = (1.0, 0.95, 0.8, 0.5)
GOALS = {"conformal_coverage": ">= 1 - alpha - 0.02", "review_share_right": "<= 0.15",
         "wrong_caught": ">= 0.8", "ece_shifted": "<= 0.05", "odd_flagged": "all"}


def ece_via_calibration_curve(correct: np.ndarray, confidence: np.ndarray,
                              n_bins: int = 10) -> float:
    """Top-label ECE from scikit-learn's bins: the cross-check of our own reliability table."""
    from sklearn.calibration import calibration_curve

    observed, predicted = calibration_curve(correct, confidence, n_bins=n_bins,
                                            strategy="uniform")
    # calibration_curve drops empty bins; its bin of each value (same rule) gives the weights.
    ids = np.searchsorted(np.linspace(0.0, 1.0, n_bins + 1)[1:-1], confidence)
    counts = np.bincount(ids, minlength=n_bins)
    counts = counts[counts > 0]
    return float(np.sum(counts / confidence.shape[0] * np.abs(observed - predicted)))


def _set_metrics(model, records, y, alpha):
    proba, unfamiliarity, _ = model.assess(records)
    band = model.review_band.with_alpha(alpha)
    sets = band.prediction_sets(proba)
    verdicts = np.array(band.verdicts(proba, unfamiliarity > 1.0))
    col = np.searchsorted(model.classes, y)
    top = model.classes[np.argmax(proba, axis=1)]
    right = top == y
    unsure = (verdicts == REVIEW) | (verdicts == UNFAMILIAR)
    rel = reliability_table(y, proba, model.classes)
    confidence = proba.max(axis=1)
    raw = model.estimator.predict_proba(records)
    checks = {"mahalanobis": model.novelty, "range": model.range_check,
              "density": model.density_check}
    flagged_by = {name: float(np.mean(check.score(records) > 1.0))
                  for name, check in checks.items() if check is not None}
    return {
        "flagged_by": flagged_by,
        "n": int(y.shape[0]),
        "accuracy": float(right.mean()),
        "coverage": float(sets[np.arange(y.shape[0]), col].mean()),
        "review_share_right": float(unsure[right].mean()) if right.any() else 0.0,
        "n_wrong": int((~right).sum()),
        "wrong_caught": float(unsure[~right].mean()) if (~right).any() else float("nan"),
        "review": float(np.mean(verdicts == REVIEW)),
        "unfamiliar": float(np.mean(verdicts == UNFAMILIAR)),
        "flagged": float(np.mean(unfamiliarity > 1.0)),
        "ece": rel["ece"],
        "ece_sklearn": ece_via_calibration_curve(right.astype(float), confidence),
        "ece_unfaded": reliability_table(y, raw, model.classes)["ece"],
        "mean_confidence": float(confidence.mean()),
        "mean_confidence_wrong": float(confidence[~right].mean()) if (~right).any()
        else float("nan"),
    }


def _fade_sweep(model, parts: dict, alpha: float) -> dict:
    """The same model with other fades (band refitted on the faded out-of-fold scores)."""
    report = model.cv_report
    oof_doubt = model.novelty.oof_distances_ / model.novelty.threshold_
    oof_doubt = np.maximum(oof_doubt, model.density_check.oof_factors_
                           / model.density_check.threshold_)
    out = {}
    for a in SWEEP:
        fade = DoubtFade(at_threshold=a, floor=min(0.02, a)).fit(report.classes, oof_doubt)
        band = ReviewBand(alpha).fit(fade.apply(report.oof_proba, oof_doubt), report.y_true,
                                     report.classes)
        row = {}
        for name, (records, y) in parts.items():
            raw = limit_by_evidence(model.estimator.predict_proba(records),
                                    model.settings["n_samples"])
            graded = np.maximum(model.novelty.score(records), model.density_check.score(records))
            score = model.assess(records)[1]
            proba = fade.apply(raw, np.where(score > 1.0, score, graded))
            verdicts = np.array(band.verdicts(proba, score > 1.0))
            right = model.classes[np.argmax(proba, axis=1)] == y
            unsure = (verdicts == REVIEW) | (verdicts == UNFAMILIAR)
            col = np.searchsorted(model.classes, y)
            row[name] = {"ece": reliability_table(y, proba, model.classes)["ece"],
                         "coverage": float(band.prediction_sets(proba)[np.arange(y.size),
                                                                         col].mean()),
                         "review_share_right": float(unsure[right].mean()),
                         "caught": int(unsure[~right].sum()), "wrong": int((~right).sum())}
        out[a] = row
    return out


def _odd_images(folder: Path, seed: int) -> dict[str, Path]:
    """A square lattice, a random pattern far off in magnification, three photographs."""
    import skimage.data
    import skimage.io
    from skimage.color import rgb2gray
    from skimage.util import img_as_ubyte

    folder.mkdir(parents=True, exist_ok=True)
    out = {}
    out["square lattice"] = folder / "square.png"
    skimage.io.imsave(out["square lattice"], img_as_ubyte(square_micrograph(size=320, seed=seed)),
                      check_contrast=False)
    sample = {"kind": "disordered", "spacing_range_px": [48.0, 52.0], "radius_fraction": 0.3,
              "radius_spread": 0.1, "blur_px": 1.0, "noise": 0.1, "contrast": 0.6,
              "edge_width_px": 1.0, "min_distance": 0.72, "relax_steps": 10}
    image, _ = make_micrograph("disordered", size=640, seed=seed, sample=sample)
    out["random pattern, 2.5x spacing"] = folder / "random_far.png"
    skimage.io.imsave(out["random pattern, 2.5x spacing"], img_as_ubyte(image),
                      check_contrast=False)
    for name in ("camera", "coins", "astronaut"):
        picture = getattr(skimage.data, name)()
        if picture.ndim == 3:
            picture = img_as_ubyte(rgb2gray(picture))
        out[f"scikit-image {name}"] = folder / f"{name}.png"
        skimage.io.imsave(out[f"scikit-image {name}"], picture, check_contrast=False)
    return out


def run(params: dict, alpha: float, jobs: int) -> dict:
    per_seed, odd = [], {}
    with tempfile.TemporaryDirectory(prefix="topoclass-conf-") as tmp:
        base = Path(tmp)
        cache = base / "cache"
        for k, seed in enumerate(params["seeds"]):
            t0 = time.perf_counter()
            size = params["size"]
            train = write_dataset(base / f"train{seed}", per_class=params["per_class"],
                                  size=size, seed=seed)
            held = write_dataset(base / f"held{seed}", per_class=params["held_per_class"],
                                 size=size, seed=seed + 1000)
            shifted = write_dataset(base / f"shifted{seed}", per_class=params["held_per_class"],
                                    size=size, seed=seed + 2000, shifted=True)
            run_ = train_from_labels(train, base / f"model{seed}", seed=seed, jobs=jobs,
                                     cache_dir=cache, figures=False, alpha=alpha)
            model = run_.model
            settings = FeatureSettings.from_model(model)
            row = {"seed": seed}
            parts = {}
            for name, sheet in (("held", held), ("shifted", shifted)):
                records, y, _, failures = labelled_records(read_labels(sheet), settings,
                                                           jobs=jobs, cache_dir=cache)
                row[name] = _set_metrics(model, records, y, alpha)
                row[name]["failed"] = len(failures)
                parts[name] = (records, y)
            row["sweep"] = _fade_sweep(model, parts, alpha)
            row["seconds"] = time.perf_counter() - t0
            row["band"] = model.review_band.describe()
            row["fade_start"] = model.doubt.start_
            per_seed.append(row)
            print(f"seed {seed}: held {row['held']}\n  shifted {row['shifted']}", flush=True)
            if k == 0:
                paths = _odd_images(base / "odd", seed)
                results = measure_patterns(list(paths.values()), settings, jobs=1)
                for (label, _), res in zip(paths.items(), results, strict=True):
                    if not res.ok:
                        odd[label] = {"flagged": True, "how": f"refused: {res.error}"}
                        continue
                    proba, score, reasons = model.assess([res.record])
                    verdict = model.verdicts(proba, score, alpha=alpha)[0]
                    odd[label] = {"flagged": verdict == UNFAMILIAR,
                                  "how": f"verdict {verdict}, unfamiliarity {score[0]:.3g}"
                                         + (f" ({'; '.join(reasons[0])})" if reasons[0] else "")}
    return {"per_seed": per_seed, "odd": odd}


def markdown(result: dict, params: dict, alpha: float, elapsed: float, quick: bool) -> str:
    rows = result["per_seed"]

    def agg(part, key, how=np.mean):
        vals = [r[part][key] for r in rows if np.isfinite(r[part][key])]
        return float(how(vals)) if vals else float("nan")

    coverage_min = agg("held", "coverage", np.min)
    n_wrong = sum(r["shifted"]["n_wrong"] for r in rows)
    caught = sum(r["shifted"]["wrong_caught"] * r["shifted"]["n_wrong"] for r in rows
                 if r["shifted"]["n_wrong"])
    wrong_caught = caught / n_wrong if n_wrong else float("nan")
    odd_flagged = sum(v["flagged"] for v in result["odd"].values())
    keys = {
        "conformal_coverage": (agg("held", "coverage"), coverage_min >= 1 - alpha - 0.02,
                               f"mean over seeds; lowest seed {coverage_min:.3f}"),
        "review_share_right": (agg("held", "review_share_right"),
                               agg("held", "review_share_right", np.max) <= 0.15,
                               f"highest seed {agg('held', 'review_share_right', np.max):.3f}"),
        "wrong_caught": (wrong_caught, wrong_caught >= 0.8,
                         f"{n_wrong} wrong answers on (b) over all seeds"),
        "ece_shifted": (agg("shifted", "ece"), agg("shifted", "ece") <= 0.05,
                        f"bare calibrated classifier (no evidence limit, no fade) "
                        f"{agg('shifted', 'ece_unfaded'):.3f}; "
                        f"sklearn bins {agg('shifted', 'ece_sklearn'):.3f}"),
        "odd_flagged": (odd_flagged, odd_flagged == len(result["odd"]),
                        f"of {len(result['odd'])}"),
    }
    lines = [
        "# Confidence: review band, fade and novelty on invented micrographs", "",
        f"Written by `benchmarks/bench_confidence.py{' --quick' if quick else ''}` on "
        f"{dt.date.today().isoformat()}, {cpu_model()}, Python {platform.python_version()}; "
        f"{elapsed / 60:.1f} min. Invented images (not measurements): "
        f"{params['per_class']} training images per class, (a) {params['held_per_class']} "
        f"held-out and (b) {params['held_per_class']} shifted images per class, "
        f"{params['size']} px, seeds {', '.join(map(str, params['seeds']))}; alpha = {alpha}.",
        "", "| key | value | goal | met | note |", "| --- | --- | --- | --- | --- |"]
    for key, (value, met, note) in keys.items():
        shown = f"{value:.3f}" if isinstance(value, float) else str(value)
        lines.append(f"| `{key}` | {shown} | {GOALS[key]} | {'yes' if met else 'NO'} | {note} |")
    lines += ["", "## Per seed", "",
              "| seed | set | images | accuracy | coverage | review share (right) | wrong | "
              "wrong caught | review | unfamiliar | ECE | ECE (sklearn bins) | ECE unfaded | "
              "mean confidence | on wrong |",
              "| --- " * 15 + "|"]
    for r in rows:
        for part in ("held", "shifted"):
            m = r[part]
            lines.append(
                f"| {r['seed']} | {'(a) held-out' if part == 'held' else '(b) shifted'} | "
                f"{m['n']} | {m['accuracy']:.3f} | {m['coverage']:.3f} | "
                f"{m['review_share_right']:.3f} | {m['n_wrong']} | {m['wrong_caught']:.3f} | "
                f"{m['review']:.3f} | {m['unfamiliar']:.3f} | {m['ece']:.3f} | "
                f"{m['ece_sklearn']:.3f} | {m['ece_unfaded']:.3f} | {m['mean_confidence']:.3f} "
                f"| {m['mean_confidence_wrong']:.3f} |")
    lines += ["", "## The fade compared", "",
              "The same models with other weights left at the novelty threshold (1.0: no "
              "fade up to the threshold, only beyond it; the review band refitted on the "
              "out-of-fold scores faded the same way); "
              "coverage and review share on (a), the rest on (b), pooled over seeds:", "",
              "| weight at threshold | coverage (a) | review share right (a) | wrong caught (b) "
              "| ECE (b) |", "| --- | --- | --- | --- | --- |"]
    for a in SWEEP:
        cov = np.mean([r["sweep"][a]["held"]["coverage"] for r in rows])
        rsr = np.mean([r["sweep"][a]["held"]["review_share_right"] for r in rows])
        caught = sum(r["sweep"][a]["shifted"]["caught"] for r in rows)
        wrong = sum(r["sweep"][a]["shifted"]["wrong"] for r in rows)
        ece = np.mean([r["sweep"][a]["shifted"]["ece"] for r in rows])
        lines.append(f"| {a:g}{' (default)' if a == DoubtFade().at_threshold else ''} | "
                     f"{cov:.3f} | {rsr:.3f} | {caught}/{wrong} | {ece:.3f} |")
    lines += ["", "Beyond the threshold every row fades (an unfamiliar image keeps at most the "
              "weight divided by the squared unfamiliarity), so the shifted images the density "
              "check flags, most of them answered right, carry near-equal odds in every row: "
              "that, not the fade below the threshold, is most of the ECE on (b).", "",
              "Share of images each novelty check flags (a / b):", ""]
    for r in rows:
        parts = ", ".join(f"{name} {r['held']['flagged_by'][name]:.3f} / "
                          f"{r['shifted']['flagged_by'][name]:.3f}"
                          for name in r["held"]["flagged_by"])
        lines.append(f"- seed {r['seed']}: {parts}")
    lines += ["", "Review band per seed (thresholds of the least-ambiguous score 1 - p; "
              "per class when every class has at least 1/alpha - 1 images) and the "
              "unfamiliarity at which the fade begins:", ""]
    for r in rows:
        th = ", ".join(f"{c} {t:.3f}" if t is not None else f"{c} inf"
                       for c, t in r["band"]["thresholds"].items())
        lines.append(f"- seed {r['seed']}: per class {r['band']['per_class']}; {th}; "
                     f"fade from {r['fade_start']:.3f}")
    lines += ["", "## Odd images (model of the first seed)", "", "| image | unfamiliar | how |",
              "| --- | --- | --- |"]
    for label, v in result["odd"].items():
        lines.append(f"| {label} | {'yes' if v['flagged'] else 'NO'} | {v['how']} |")
    lines += ["", "Coverage is guaranteed only for images like the labelled set; (b) shows what "
              "happens to images that are not. Probabilities are estimates from the labelled "
              "set; re-validate a model whenever process, instrument or magnification change.",
              ""]
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="two seeds, smaller sets")
    parser.add_argument("--alpha", type=float, default=0.05)
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--out", type=Path, default=OUT)
    args = parser.parse_args(argv)
    params = QUICK if args.quick else FULL
    t0 = time.perf_counter()
    result = run(params, args.alpha, args.jobs)
    text = markdown(result, params, args.alpha, time.perf_counter() - t0, args.quick)
    args.out.write_text(text, encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
