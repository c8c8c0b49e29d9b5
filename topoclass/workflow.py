"""The job end to end: label sheet → records → trained, validated model → scored batch.

Use-case functions that string the pipeline stages together; the command line is a shell over
them, and a notebook can call them the same way.
"""

from __future__ import annotations

import dataclasses
import shutil
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from topoclass._files import file_sha256
from topoclass.errors import LabelSheetError, TopoclassError
from topoclass.features import FeatureSettings, RecordResult, measure_patterns
from topoclass.labels import LabelSet, read_labels
from topoclass.model import (
    CARD_FILE,
    CLASSIFIERS,
    DEFAULT_ALPHA,
    DEFAULT_CLASSIFIER,
    MODEL_FILE,
    TrainedModel,
    load_model,
    metrics_markdown,
    save_model,
    select_model,
    train_model,
    validate_model,
)
from topoclass.model.conformal import check_alpha
from topoclass.model.neighbours import labelled_diagrams
from topoclass.vectorize import (
    FEATURE_SETS,
    SYMMETRY_KEYS,
    AcquisitionContext,
    OrderMeasureFeatures,
    make_features,
)

#: Feature sets compared by ``select=True``, each with the chosen classifier.
SELECT_FEATURE_SETS = ("two-bar", "order", "topology", "all")


@dataclass
class TrainingRun:
    """What :func:`train_from_labels` produced."""

    model: TrainedModel
    directory: Path
    failures: list[RecordResult] = field(default_factory=list)
    comparison: list[dict] | None = None


@dataclass
class ValidationRun:
    """What :func:`validate_from_labels` produced."""

    metrics: dict
    report: Path | None
    failures: list[RecordResult] = field(default_factory=list)


def labelled_records(
    labels: LabelSet,
    settings: FeatureSettings,
    *,
    jobs: int = 1,
    cache_dir: str | Path | None = None,
    progress: bool = False,
    engine=None,
) -> tuple[list, np.ndarray, np.ndarray | None, list[RecordResult]]:
    """Pattern records of a label set's images; failed images are left out and returned apart."""
    results = measure_patterns(
        labels.images, settings, cache_dir=cache_dir, jobs=jobs, progress=progress,
        description="features", engine=engine,
    )
    keep = [i for i, r in enumerate(results) if r.ok]
    failures = [r for r in results if not r.ok]
    records = [results[i].record for i in keep]
    y = np.array([labels.labels[i] for i in keep])
    groups = None if labels.groups is None else np.array([labels.groups[i] for i in keep])
    return records, y, groups, failures


def zoomed_records(
    labels: LabelSet,
    settings: FeatureSettings,
    factors,
    *,
    jobs: int = 1,
    cache_dir: str | Path | None = None,
    progress: bool = False,
    engine=None,
) -> tuple[list, np.ndarray, np.ndarray, int]:
    """Records of rescaled copies of a label set's images (:mod:`topoclass.augment`).

    Every image gets one copy per zoom factor, with the image's label and group (the image
    itself when the sheet has no groups), so copies of one image stay in one fold. Returns
    ``(records, labels, groups, copies that could not be measured)``; a copy that fails (too
    few sites at a small zoom) is left out.
    """
    factors = [float(f) for f in factors]
    paths = [p for p in labels.images for _ in factors]
    results = measure_patterns(
        paths, settings, cache_dir=cache_dir, jobs=jobs, progress=progress,
        description="zoomed copies", zooms=[f for _ in labels.images for f in factors],
        engine=engine,
    )
    owner = [i for i in range(len(labels.images)) for _ in factors]
    keep = [k for k, r in enumerate(results) if r.ok]
    records = [results[k].record for k in keep]
    y = np.array([labels.labels[owner[k]] for k in keep])
    names = labels.groups if labels.groups is not None else [str(p) for p in labels.images]
    groups = np.array([names[owner[k]] for k in keep])
    return records, y, groups, len(results) - len(keep)


def train_from_labels(
    labels_source: str | Path,
    model_dir: str | Path | None = None,
    *,
    feature_set: str = "all",
    classifier: str = DEFAULT_CLASSIFIER,
    cv: int = 5,
    calibration: str = "auto",
    seed: int = 0,
    select: bool = False,
    settings: FeatureSettings | None = None,
    jobs: int = 1,
    cache_dir: str | Path | None = None,
    progress: bool = False,
    figures: bool = True,
    alpha: float = DEFAULT_ALPHA,
    zoom_range: tuple[float, float] | None = None,
    zoom_copies: int = 3,
    overwrite: bool = False,
    engine=None,
) -> TrainingRun:
    """Train, cross-validate, calibrate and save a model from a label sheet.

    Parameters
    ----------
    labels_source : path
        CSV ``image,label[,group]`` or a folder with one sub-folder per class.
    model_dir : path or None
        Where to write the model; default ``models/<sheet name>-<feature set>-<classifier>``.
    feature_set : str
        A key of :data:`topoclass.vectorize.FEATURE_SETS`.
    classifier : str
        A key of :data:`topoclass.model.CLASSIFIERS`.
    cv : int
        Cross-validation folds (grouped by the sheet's ``group`` column when it has one).
    calibration : {"auto", "sigmoid", "temperature", "isotonic"}
        Probability calibration of the final model (see
        :func:`topoclass.model.choose_calibration`; ``auto`` picks from the class sizes).
    seed : int
        Seed of every random step.
    select : bool
        Compare the feature sets of :data:`SELECT_FEATURE_SETS` (with ``classifier``) and every
        classifier (with ``feature_set``) by grouped CV, and keep the best.
    settings : FeatureSettings, optional
        Site-finding and persistence settings; stored with the model so scoring uses the same.
    jobs, cache_dir, progress
        As in :func:`topoclass.features.measure_patterns`.
    figures : bool
        Also write the cross-validation figures and the permutation importance of the
        features into the model folder (:func:`topoclass.report.write_training_figures`).
    alpha : float
        Error rate of the review band (:class:`topoclass.model.ReviewBand`).
    zoom_range : (lo, hi), optional
        Also train on rescaled copies of every image at ``zoom_copies`` zoom factors spread
        over this range (:func:`topoclass.augment.zoom_factors`; a factor of 1 is the original
        and adds no copy), so the model covers those spacings in pixels; the card records the
        range and the spacings reached.
    zoom_copies : int
        Zoom factors with ``zoom_range``.
    overwrite : bool
        Replace a model already in ``model_dir``: once the new model is trained, every file
        of the old one (its validation report too) is removed. Without it an existing model
        folder is refused, before any work.
    engine : topoclass.cluster.ClusterEngine, optional
        Measure the images on a Dask cluster (``jobs`` is then ignored); the model is the same.
    """
    check_alpha(alpha)
    if model_dir is not None:
        _check_model_folder(Path(model_dir), overwrite=overwrite)
    if feature_set not in FEATURE_SETS:
        make_features(feature_set)  # raises the error that lists the valid names
    if classifier not in CLASSIFIERS:
        raise TopoclassError(
            f"unknown classifier {classifier!r}; choose one of {', '.join(CLASSIFIERS)}"
        )
    settings = settings or FeatureSettings()
    labels = read_labels(labels_source, n_folds=cv)
    records, y, groups, failures = labelled_records(
        labels, settings, jobs=jobs, cache_dir=cache_dir, progress=progress, engine=engine
    )
    if failures:
        # Re-check the class counts on what is left, so CV fails with a clear message.
        _check_after_failures(labels, y, groups, cv, failures)
    originals, original_labels = list(records), y  # the labelled images, without zoomed copies
    augmentation = None
    if zoom_range is not None:
        from topoclass.augment import zoom_factors

        factors = zoom_factors(zoom_range, zoom_copies)
        extra, y_extra, g_extra, n_lost = zoomed_records(
            labels, settings, factors, jobs=jobs, cache_dir=cache_dir, progress=progress,
            engine=engine,
        )
        if groups is None:  # the image is the group: its copies must not cross a split
            ok = {str(p) for p in labels.images} - {str(r.path) for r in failures}
            groups = np.array([str(p) for p in labels.images if str(p) in ok])
        records, y, groups = records + extra, np.concatenate([y, y_extra]), np.concatenate(
            [groups, g_extra])
        augmentation = {"zoom_range": [float(v) for v in zoom_range],
                        "zoom_factors": [float(f) for f in factors],
                        "copies_measured": len(extra), "copies_failed": int(n_lost)}
    comparison = None
    if select:
        candidates = [(name, make_features(name), classifier) for name in SELECT_FEATURE_SETS]
        candidates += [
            (feature_set, make_features(feature_set), clf)
            for clf in CLASSIFIERS
            if clf != classifier
        ]
        model, comparison = select_model(
            records, y, groups, candidates=candidates, cv=cv, seed=seed,
            calibration=calibration, progress=progress, context=AcquisitionContext(),
            alpha=alpha, density=OrderMeasureFeatures(SYMMETRY_KEYS),
        )
    else:
        model = train_model(
            records, y, groups, features=make_features(feature_set),
            feature_set_name=feature_set, classifier=classifier, cv=cv,
            calibration=calibration, seed=seed, progress=progress, context=AcquisitionContext(),
            alpha=alpha, density=OrderMeasureFeatures(SYMMETRY_KEYS),
        )
    model.settings["features"] = dataclasses.asdict(settings)
    model.settings["training_images"] = training_image_sizes(records)
    model.settings["augmentation"] = augmentation
    if model.range_check is not None:
        names = list(model.range_check.names_)
        if "spacing_px" in names:
            k = names.index("spacing_px")
            model.settings["spacing_px_range"] = [float(model.range_check.low_[k]),
                                                  float(model.range_check.high_[k])]
    if model_dir is None:
        sheet = labels.source if labels.source.is_dir() else labels.source.parent
        model_dir = Path("models") / f"{sheet.name}-{model.feature_set_name}-{model.classifier}"
        _check_model_folder(model_dir, overwrite=overwrite)
    # Only now, with the new model in hand, is the old one removed: a failed run keeps it.
    _clear_model_folder(Path(model_dir))
    extra = {
        "label_sheet": str(labels.source),
        "label_sheet_sha256": labels.sheet_hash,
        "failed_images": [r.error for r in failures],
    }
    model.neighbours = labelled_diagrams(originals, original_labels, progress=progress)
    directory = save_model(model, model_dir, extra_card=extra)
    from topoclass.trend import REFERENCE_FILE, write_reference_amounts

    write_reference_amounts(originals, original_labels, directory / REFERENCE_FILE)
    if figures:
        from topoclass.report import write_training_figures

        write_training_figures(model, directory, records, y, groups=groups, seed=seed)
    return TrainingRun(model=model, directory=directory, failures=failures, comparison=comparison)


def training_image_sizes(records) -> dict:
    """Median site count and spacing of the training images, for the model card.

    A map of a large micrograph cuts it into tiles holding as many sites as a training image
    (:func:`topoclass.mapping.tile_side`), so that each tile is measured at the scale the
    model learnt.
    """
    n_sites = [float(r.diagrams.n_sites or len(r.diagrams.h0) + 1) for r in records]
    spacing = [float(r.diagrams.spacing) for r in records]
    return {"median_n_sites": float(np.median(n_sites)) if n_sites else None,
            "median_spacing_px": float(np.median(spacing)) if spacing else None}


def validate_from_labels(
    model_dir: str | Path,
    labels_source: str | Path,
    *,
    out: str | Path | None = None,
    jobs: int = 1,
    cache_dir: str | Path | None = None,
    progress: bool = False,
    overrides: dict | None = None,
    engine=None,
) -> ValidationRun:
    """Metrics of a saved model on a held-out labelled set, with a reliability table.

    Writes ``validation.md`` and the validation figures (confusion matrix, reliability, per
    class) into ``out`` (default: the model folder) and returns the metrics. A validation
    report already in ``out`` is removed first, so that a failed run never leaves one that
    describes another model or another set; the report names the model file's hash.
    ``overrides`` replaces fields of the model's :class:`FeatureSettings` (for example the
    region rule); ``engine`` measures the images on a Dask cluster (:mod:`topoclass.cluster`).
    """
    model = load_model(model_dir)
    out = Path(out) if out is not None else Path(model_dir)
    _remove_validation_report(out)
    labels = read_labels(labels_source)
    settings = dataclasses.replace(FeatureSettings.from_model(model), **(overrides or {}))
    records, y, _, failures = labelled_records(
        labels, settings, jobs=jobs, cache_dir=cache_dir, progress=progress, engine=engine
    )
    if not records:
        raise LabelSheetError(
            f"{labels.source}: none of its images could be measured; see the messages above"
        )
    metrics = validate_model(model, records, y)
    metrics["failed_images"] = [r.error for r in failures]
    out.mkdir(parents=True, exist_ok=True)
    report = out / "validation.md"
    report.write_text(
        metrics_markdown(
            metrics,
            title=f"Validation of {Path(model_dir).name}",
            subtitle=f"Model: {Path(model_dir).resolve()} ({MODEL_FILE} SHA-256 "
            f"{file_sha256(Path(model_dir) / MODEL_FILE)}). Held-out set: {labels.source} "
            f"({len(y)} images measured, {len(failures)} failed).",
        ),
        encoding="utf-8",
    )
    from topoclass.report import write_metric_figures

    write_metric_figures(metrics, out, prefix="validation_", title="validation")
    _write_validation_rows(out / "validation.csv", model, labels, records, failures)
    return ValidationRun(metrics=metrics, report=report, failures=failures)


#: What :func:`validate_from_labels` writes (``write_metric_figures`` with its prefix).
_VALIDATION_FILES = ("validation.md", "validation.csv", *(f"validation_{name}.{ext}" for name in
                     ("confusion", "reliability", "per_class") for ext in ("png", "svg")))


def _write_validation_rows(path: Path, model, labels: LabelSet, records, failures) -> None:
    """One row per held-out image: its label, the model's call, and the sheet's other columns."""
    import csv

    classes = [str(c) for c in model.classes]
    proba, unfamiliarity, _ = model.assess(records)
    failed = {str(r.path): r for r in failures}
    columns = ["image", "label", "status", "predicted", "confidence",
               *(f"p_{c}" for c in classes), "unfamiliar", *labels.extra, "message"]
    measured = iter(zip(proba, unfamiliarity, strict=True))
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(columns)
        for i, (image, label) in enumerate(zip(labels.images, labels.labels, strict=True)):
            notes = [values[i] for values in labels.extra.values()]
            if str(image) in failed:  # measured in sheet order, failures left out
                writer.writerow([image, label, "error", "", "", *([""] * len(classes)), "",
                                 *notes, failed[str(image)].error or ""])
                continue
            p, u = next(measured)
            best = int(np.argmax(p))
            writer.writerow([image, label, "ok", classes[best], f"{p[best]:.6g}",
                             *(f"{v:.6g}" for v in p), "yes" if u > 1.0 else "no", *notes, ""])


def _remove_validation_report(out: Path) -> None:
    for name in _VALIDATION_FILES:
        (out / name).unlink(missing_ok=True)


def _check_model_folder(directory: Path, *, overwrite: bool) -> None:
    """Refuse a folder holding a model (unless ``overwrite``) or anything that is not a model."""
    if not directory.exists():
        return
    if not directory.is_dir():
        raise TopoclassError(f"{directory}: is a file, not a model folder; give --model a "
                             "folder name")
    if not any(directory.iterdir()):
        return
    if not (directory / CARD_FILE).is_file():
        raise TopoclassError(f"{directory}: holds files but no model ({CARD_FILE}); give "
                             "--model a new or empty folder")
    if not overwrite:
        raise TopoclassError(f"{directory}: a model is already there; pass --overwrite to "
                             "replace it (its files, the validation report too, are removed) "
                             "or give --model another folder")


def _clear_model_folder(directory: Path) -> None:
    """Remove everything an earlier model left in its folder (checked by _check_model_folder)."""
    if not (directory / CARD_FILE).is_file():
        return
    for entry in directory.iterdir():
        if entry.is_dir() and not entry.is_symlink():
            shutil.rmtree(entry)
        else:
            entry.unlink()


def _check_after_failures(labels, y, groups, cv, failures) -> None:
    problems = [r.error or str(r.path) for r in failures]
    counts = {c: int(np.sum(y == c)) for c in labels.classes}
    for c, n in counts.items():
        n_units = n if groups is None else len(set(groups[y == c].tolist()))
        if n_units < cv:
            unit = "images" if groups is None else "groups"
            problems.append(f"class {c!r} has {n_units} usable {unit}, fewer than the {cv} folds")
    if len([c for c, n in counts.items() if n > 0]) < 2 or any(
        "fewer than" in p for p in problems
    ):
        raise LabelSheetError(
            f"{labels.source}: too few usable images after {len(failures)} failed: "
            + "; ".join(problems)
            + "; fix or replace the failed images (each message says why) or label more "
            "images of those classes"
        )


@dataclass
class DemoRun:
    """Where :func:`run_demo` put its results."""

    workdir: Path
    training: TrainingRun
    validation: ValidationRun
    scores: Path
    score_summary: object


def run_demo(
    workdir: str | Path = "topoclass-demo",
    *,
    per_class: int = 24,
    production_per_class: int = 6,
    size: int = 320,
    seed: int = 2026,
    jobs: int = 2,
    progress: bool = True,
    log=print,
) -> DemoRun:
    """The whole job on invented anodic-alumina micrographs.

    Makes a labelled training set and a separate "production" batch (other simulated membrane
    samples, another seed, plus a photograph of something else and a truncated file, as a real
    line delivers them), trains a model with grouped cross-validation, validates it on the
    production batch's labels, and scores that batch into ``scores.csv`` with ``scores.html``
    beside it.
    """
    from topoclass.images import collect_image_paths
    from topoclass.scoring import score_images
    from topoclass.synth import write_dataset

    workdir = Path(workdir)
    cache = workdir / "cache"
    log(f"1/4 making invented training micrographs in {workdir / 'training'}")
    train_sheet = write_dataset(
        workdir / "training", per_class=per_class, size=size, seed=seed, progress=progress
    )
    log(f"    and a production batch in {workdir / 'production'}")
    prod_sheet = write_dataset(
        workdir / "production", per_class=production_per_class, size=size, seed=seed + 1,
        progress=progress,
    )
    # What a production line also delivers: a frame of something else, and a damaged file.
    _add_odd_images(prod_sheet.parent / "images")
    log("2/4 training (grouped cross-validation, then calibration)")
    training = train_from_labels(
        train_sheet, workdir / "model", seed=seed, jobs=jobs, cache_dir=cache, progress=progress,
        overwrite=True,  # the demo's own folder: a second demo run replaces the first
    )
    log("3/4 validating on the production batch's labels")
    validation = validate_from_labels(
        training.directory, prod_sheet, jobs=jobs, cache_dir=cache, progress=progress
    )
    log("4/4 scoring the production batch")
    scores = workdir / "scores.csv"
    summary = score_images(
        training.model, collect_image_paths([prod_sheet.parent / "images"]), scores,
        settings=FeatureSettings.from_model(training.model), jobs=jobs, overwrite=True,
        cache_dir=cache, progress=progress,
    )
    from topoclass.report import write_batch_report

    write_batch_report(scores, model=training.model, overwrite=True, progress=progress)
    return DemoRun(workdir, training, validation, scores, summary)


def _add_odd_images(folder: Path) -> None:
    """A photograph that is no membrane (scikit-image's camera) and a file cut off in transfer."""
    import skimage.data
    import skimage.io

    skimage.io.imsave(folder / "zz_not_a_membrane.png", skimage.data.camera(),
                      check_contrast=False)
    whole = next(iter(sorted(folder.glob("*.png")))).read_bytes()
    (folder / "zz_damaged_transfer.png").write_bytes(whole[: len(whole) // 3])
