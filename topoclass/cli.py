"""Command line: a thin shell over the Python API.

Every command here calls public functions of the pipeline modules; nothing is computed in this
file that a notebook could not compute the same way.
"""

from __future__ import annotations

import contextlib
import json
import sys
from pathlib import Path

import typer

from topoclass.errors import TopoclassError
from topoclass.model.choices import CLASSIFIERS, DEFAULT_CLASSIFIER

_REGION_HELP = ("Analyse only this box, x0,y0,x1,y1 in pixels (or fractions of the frame, "
                "e.g. 0,0,1,0.9); a data bar inside it is still found and left out.")
_NO_AUTO_REGION_HELP = "Do not look for an instrument data bar to leave out."


_CLUSTER_HELP = ("Measure the images on a Dask cluster, whose workers take the place of "
                 "parallel jobs: tcp://HOST:PORT of a running scheduler, or local:N to start "
                 "N worker processes on this machine.")

_FEATURE_HELP = "two-bar, order, topology or all"
_ALPHA_HELP = ("Error rate of the review band: an image's set of plausible classes misses the "
               "true class for at most this share of images like the training set.")
_CLASSIFIER_HELP = f"{', '.join(CLASSIFIERS)} (default {DEFAULT_CLASSIFIER})"

app = typer.Typer(
    add_completion=False,
    # Plain help: the rich layout shows a value placeholder even for flags, which invites
    # `--json true`.
    rich_markup_mode=None,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    help="Sort micrographs of self-organised hexagonal patterns by kind and amount of disorder.",
)


def _print_version(value: bool) -> None:
    if value:
        from topoclass import __version__

        typer.echo(f"topoclass {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: bool = typer.Option(False, "--version", callback=_print_version, is_eager=True,
                                 help="Print the version and exit."),
) -> None:
    """Sort micrographs of self-organised hexagonal patterns by kind and amount of disorder."""


def main() -> None:
    """Entry point: user errors become one line on stderr and exit code 2, never a traceback."""
    # With no arguments at all the help is what a new user needs, not an error.
    args = sys.argv[1:] or ["--help"]
    try:
        # Outside standalone mode typer returns the code of a `typer.Exit` instead of exiting.
        code = app(args=args, prog_name="topoclass", standalone_mode=False)
        if isinstance(code, int) and code:
            sys.exit(code)
    except TopoclassError as exc:
        typer.echo(f"topoclass: error: {_one_line(exc)}", err=True)
        sys.exit(2)
    except typer.Exit as exc:
        sys.exit(exc.exit_code)
    except typer.Abort:
        typer.echo("aborted", err=True)
        sys.exit(130)
    except KeyboardInterrupt:
        typer.echo("interrupted", err=True)
        sys.exit(130)
    except typer.TyperException as exc:
        # typer's own usage errors (missing argument, unknown option or command, bad value);
        # typer re-exports their base class, so no separate package is imported for them.
        typer.echo(f"topoclass: error: {_usage_line(exc)}", err=True)
        sys.exit(exc.exit_code)


@app.command()
def inspect(
    image: Path = typer.Argument(..., metavar="IMAGE",
                            help="Micrograph file (PNG, JPEG or TIFF)."),
    out: Path | None = typer.Option(None, "--out", help="Folder for sites.csv and pictures."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of text."),
    polarity: str = typer.Option("auto", help="auto, bright (dots) or dark (pores)."),
    pixel_size: float | None = typer.Option(
        None, "--pixel-size", min=0.0, help="Pixel size in nm, when the file does not record it."
    ),
    max_pixels: int = typer.Option(100_000_000, "--max-pixels", min=1,
                                   help="Refuse larger images (decompression-bomb guard)."),
    region: str | None = typer.Option(None, "--region", help=_REGION_HELP),
    no_auto_region: bool = typer.Option(False, "--no-auto-region", help=_NO_AUTO_REGION_HELP),
    model_dir: Path | None = typer.Option(
        None, "--model", help="Also list the three training images of this model nearest to "
        "the image (measured with the model's own settings)."),
) -> None:
    """Find the lattice sites of one micrograph and report its order measures."""
    from topoclass.features import FeatureSettings
    from topoclass.inspection import inspect_image

    settings = FeatureSettings(polarity=polarity, pixel_size_nm=pixel_size, max_pixels=max_pixels,
                               **_region_options(region, no_auto_region))
    trained = None
    if model_dir is not None:
        settings, trained = _model_settings(model_dir, max_pixels)
    summary = inspect_image(image, out=out, settings=settings, model=trained)
    if as_json:
        typer.echo(json.dumps(summary, sort_keys=False))
        return
    typer.echo(_human_summary(summary))


@app.command()
def synth(
    out_dir: Path = typer.Argument(..., metavar="OUT_DIR",
                            help="Folder to write images, labels.csv and truth."),
    per_class: int = typer.Option(8, "--per-class", min=1, help="Images per class."),
    size: int = typer.Option(384, "--size", min=64, help="Image side in pixels."),
    seed: int = typer.Option(0, "--seed", help="Random seed; same seed, same images."),
    data_bars: float = typer.Option(0.0, "--data-bars", min=0.0, max=1.0,
                                    help="Fraction of images exported with a data bar."),
    rims: bool = typer.Option(False, "--rims", help="Draw pores with bright rims."),
) -> None:
    """Make synthetic anodic-alumina micrographs with ground truth (invented demo data)."""
    from topoclass.synth import write_dataset

    labels = write_dataset(out_dir, per_class=per_class, size=size, seed=seed, progress=True,
                           data_bars=data_bars, rims=rims)
    typer.echo(f"wrote {labels}")


@app.command()
def train(
    labels: Path = typer.Argument(..., metavar="LABELS",
                            help="Label sheet (CSV image,label[,group]) or folders."),
    model: Path | None = typer.Option(None, "--model", help="Model folder to write."),
    features: str = typer.Option("all", "--features", help="Feature set: " + _FEATURE_HELP),
    classifier: str = typer.Option(DEFAULT_CLASSIFIER, "--classifier", help="Classifier: "
                                   + _CLASSIFIER_HELP),
    cv: int = typer.Option(5, "--cv", min=2, help="Cross-validation folds."),
    calibration: str = typer.Option("auto", "--calibration", help="auto, sigmoid, temperature "
                                    "or isotonic (auto picks from the class sizes)."),
    select: bool = typer.Option(False, "--select", help="Compare feature sets and classifiers "
                                "by grouped CV and keep the best."),
    seed: int = typer.Option(0, "--seed", help="Random seed; same seed, same model."),
    polarity: str = typer.Option("auto", help="auto, bright (dots) or dark (pores)."),
    jobs: int = typer.Option(1, "--jobs", min=1, help="Parallel workers for features."),
    cache: Path | None = typer.Option(None, "--cache", help="Feature cache folder."),
    alpha: float = typer.Option(0.05, "--alpha", help=_ALPHA_HELP),
    region: str | None = typer.Option(None, "--region", help=_REGION_HELP),
    no_auto_region: bool = typer.Option(False, "--no-auto-region", help=_NO_AUTO_REGION_HELP),
    zoom_range: str | None = typer.Option(
        None, "--zoom-range", help="Also train on rescaled copies of every image at zoom "
        "factors lo,hi (e.g. 0.5,2), so the model covers those magnifications."),
    zoom_copies: int = typer.Option(3, "--zoom-copies", min=1,
                                    help="Zoom factors spread over --zoom-range (a factor "
                                    "of 1 is the original and adds no copy)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace the model already in "
                                   "--model (all its files, the validation report too)."),
    cluster: str | None = typer.Option(None, "--cluster", help=_CLUSTER_HELP),
) -> None:
    """Train, cross-validate and calibrate a model from labelled micrographs."""
    from topoclass.augment import parse_zoom_range
    from topoclass.features import FeatureSettings
    from topoclass.workflow import train_from_labels

    settings = FeatureSettings(polarity=polarity, **_region_options(region, no_auto_region))
    with _cluster_engine(cluster, jobs) as engine:
        run = train_from_labels(
            labels, model, feature_set=features, classifier=classifier, cv=cv,
            calibration=calibration, seed=seed, select=select,
            settings=settings, jobs=jobs, cache_dir=cache, progress=True,
            alpha=alpha, zoom_range=parse_zoom_range(zoom_range), zoom_copies=zoom_copies,
            overwrite=overwrite, engine=engine,
        )
    _echo_failures(run.failures)
    if run.comparison:
        typer.echo(_comparison_table(run.comparison))
    typer.echo(_cv_summary(run.model))
    typer.echo(f"model written to {run.directory}")


@app.command()
def validate(
    model_dir: Path = typer.Argument(..., metavar="MODEL_DIR",
                            help="Model folder written by `topoclass train`."),
    labels: Path = typer.Argument(..., metavar="LABELS",
                            help="Held-out label sheet or class folders."),
    out: Path | None = typer.Option(None, "--out", help="Folder for validation.md and its "
                                    "figures (default: the model folder)."),
    jobs: int = typer.Option(1, "--jobs", min=1, help="Parallel workers for features."),
    cache: Path | None = typer.Option(None, "--cache", help="Feature cache folder."),
    region: str | None = typer.Option(None, "--region", help=_REGION_HELP
                                      + " Default: the model's."),
    no_auto_region: bool = typer.Option(False, "--no-auto-region", help=_NO_AUTO_REGION_HELP),
    cluster: str | None = typer.Option(None, "--cluster", help=_CLUSTER_HELP),
) -> None:
    """Measure a trained model on a held-out labelled set."""
    from topoclass.workflow import validate_from_labels

    with _cluster_engine(cluster, jobs) as engine:
        run = validate_from_labels(model_dir, labels, out=out, jobs=jobs, cache_dir=cache,
                                   progress=True, engine=engine,
                                   overrides=_region_options(region, no_auto_region))
    _echo_failures(run.failures)
    m = run.metrics
    typer.echo(f"held-out images {m['n_samples']}: accuracy {m['accuracy']:.3f}, "
               f"macro-F1 {m['macro_f1']:.3f}, log-loss {m['log_loss']:.3f}, "
               f"Brier {m['brier']:.3f}, ECE {m['ece']:.3f}, "
               f"unfamiliar {m['unfamiliar_fraction']:.1%}")
    typer.echo(_reliability_text(m))
    typer.echo(f"report written to {run.report}")


@app.command()
def score(
    model_dir: Path = typer.Argument(..., metavar="MODEL_DIR",
                            help="Model folder written by `topoclass train`."),
    inputs: list[Path] = typer.Argument(..., metavar="INPUT",
                            help="Images, folders or text files of paths."),
    out: Path = typer.Option(..., "--out", help="Results CSV (one row per image)."),
    jobs: int = typer.Option(1, "--jobs", min=1, help="Parallel workers."),
    resume: bool = typer.Option(False, "--resume", help="Keep finished rows; score the rest."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing output "
                                   "(the CSV and its report page)."),
    strict: bool = typer.Option(False, "--strict", help="Exit with code 1 if any image failed."),
    cache: Path | None = typer.Option(None, "--cache", help="Feature cache folder."),
    max_pixels: int | None = typer.Option(None, "--max-pixels", min=1,
                                          help="Refuse larger images (default 100 megapixels)."),
    store: str | None = typer.Option(None, "--store", help="Also write every row to a results "
                                     "store: a SQLite file or a postgresql:// URL."),
    note: str = typer.Option("", "--note", help="Operator note kept with the batch in the "
                             "store."),
    alpha: float | None = typer.Option(None, "--alpha", help=_ALPHA_HELP
                                       + " Default: the one the model was trained with."),
    region: str | None = typer.Option(None, "--region", help=_REGION_HELP
                                      + " Default: the model's."),
    no_auto_region: bool = typer.Option(False, "--no-auto-region", help=_NO_AUTO_REGION_HELP),
    details: int = typer.Option(200, "--details", min=0, help="Detail views in the report for "
                                "at most this many images, the most doubtful first."),
    no_report: bool = typer.Option(False, "--no-report", help="Write the CSV only (`topoclass "
                                   "report` makes the page later)."),
    cluster: str | None = typer.Option(None, "--cluster", help=_CLUSTER_HELP),
) -> None:
    """Score micrographs in batch with a probability for each class.

    The last line printed is `failed: F of N`, for scripts.
    """
    import dataclasses

    from topoclass.features import FeatureSettings
    from topoclass.model import load_model
    from topoclass.report import batch_report_paths, write_batch_report
    from topoclass.scoring import score_images, summary_text

    page, _ = batch_report_paths(out)
    if page.exists() and not (resume or overwrite):
        # Refused before any work, like the CSV itself; --resume continues the same batch.
        raise TopoclassError(f"{page}: the report page exists; pass --overwrite to replace it, "
                             "--resume to continue its batch, or give --out another name")
    trained = load_model(model_dir)
    paths = _image_paths(inputs)
    settings = FeatureSettings.from_model(trained)
    if max_pixels is not None:
        settings = dataclasses.replace(settings, max_pixels=max_pixels)
    settings = dataclasses.replace(settings, **_region_options(region, no_auto_region))
    # The cluster first: a scheduler that cannot be reached must not leave a started batch
    # in the store; the store is closed however scoring ends.
    with _cluster_engine(cluster, jobs) as engine:
        recorder, store_problem = _batch_recorder(store, model_dir, trained, settings, out,
                                                  len(paths), note, alpha)
        try:
            summary = score_images(trained, paths, out, settings=settings, jobs=jobs,
                                   resume=resume, overwrite=overwrite, cache_dir=cache,
                                   progress=True, recorder=recorder, alpha=alpha,
                                   engine=engine)
        finally:
            if recorder is not None:
                recorder.store.close()
    typer.echo(summary_text(summary))
    if not no_report:
        page = write_batch_report(out, model=trained, details=details, jobs=jobs,
                                  cache_dir=cache, overwrite=True, progress=True,
                                  settings=settings)
        typer.echo(f"report: {page}")
    typer.echo(f"failed: {summary.total_failed} of {summary.given}")
    if summary.total_failed == summary.given:
        raise TopoclassError(f"{out}: none of the {summary.given} images could be scored; "
                             "see the message column")
    if store_problem is not None or summary.store_error is not None:
        from topoclass.errors import StoreError

        raise StoreError(f"{store_problem or summary.store_error} (every row is in {out})")
    if strict and summary.total_failed:
        raise typer.Exit(1)


def _batch_recorder(store, model_dir, trained, settings, out, n_images, note, alpha):
    """Open the store and start the batch; a store that cannot be used does not stop scoring."""
    if store is None:
        return None, None
    from topoclass.errors import StoreError
    from topoclass.store import model_sha256, open_store

    try:
        opened = open_store(store)
    except StoreError as exc:
        typer.echo(f"topoclass: error: {_one_line(exc)}; scoring to {out} only", err=True)
        return None, exc
    try:
        recorder = opened.start_batch(
            model_sha256=model_sha256(model_dir), model_path=str(Path(model_dir).absolute()),
            classes=[str(c) for c in trained.classes], settings=settings,
            output_csv=str(Path(out).absolute()), n_images=n_images, note=note,
            # The verdicts' error rate: the one asked for, else the model's own band's.
            review_alpha=alpha if alpha is not None
            else getattr(getattr(trained, "review_band", None), "alpha_", None))
    except StoreError as exc:
        opened.close()
        typer.echo(f"topoclass: error: {_one_line(exc)}; scoring to {out} only", err=True)
        return None, exc
    return recorder, None


@app.command()
def report(
    scores_csv: Path | None = typer.Argument(None, metavar="[SCORES_CSV]",
                                             help="Results CSV written by `topoclass score` "
                                             "(or use --store)."),
    out: Path | None = typer.Option(None, "--out", help="HTML file (default: the CSV's name "
                                    "with .html, e.g. scores.html)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing page."),
    store: str | None = typer.Option(None, "--store", help="Build the page from a results "
                                     "store instead of a CSV (see --batch, --since, "
                                     "--model-hash)."),
    batch: int | None = typer.Option(None, "--batch", help="With --store: this batch only."),
    since: str | None = typer.Option(None, "--since", help="With --store: rows scored since "
                                     "this date (YYYY-MM-DD)."),
    model_hash: str | None = typer.Option(None, "--model-hash", help="With --store: rows of "
                                          "the model whose hash starts so."),
    model_dir: Path | None = typer.Option(None, "--model", help="Model folder, for the "
                                          "site-finding settings of the detail views."),
    details: int = typer.Option(200, "--details", min=0, help="Detail views for at most this "
                                "many images, the most doubtful first."),
    jobs: int = typer.Option(1, "--jobs", min=1, help="Parallel workers."),
    cache: Path | None = typer.Option(None, "--cache", help="Feature cache folder the scoring "
                                      "used (its sites spare measuring the images again)."),
) -> None:
    """Rebuild the HTML report of a scores CSV (for example after a killed run)."""
    from topoclass.model import load_model
    from topoclass.report import write_batch_report

    trained = load_model(model_dir) if model_dir is not None else None
    if store is not None:
        if scores_csv is not None:
            raise TopoclassError(f"report takes a scores CSV ({scores_csv}) or --store "
                                 f"{store}, not both; give one of them")
        out = out if out is not None else Path("report.html")
        scores_csv = _scores_from_store(store, out, batch, since, model_hash)
    elif scores_csv is None:
        raise TopoclassError("report needs a scores CSV or --store STORE; give one of them")
    path = write_batch_report(scores_csv, out, model=trained, details=details, jobs=jobs,
                              cache_dir=cache, overwrite=overwrite, progress=True)
    typer.echo(f"report: {path}")


@app.command()
def demo(
    workdir: Path = typer.Option(Path("topoclass-demo"), "--workdir",
                                 help="Folder for the demo data, model and results."),
    jobs: int = typer.Option(2, "--jobs", min=1, help="Parallel workers."),
) -> None:
    """Run the whole job on invented anodic-alumina micrographs."""
    from topoclass.report import batch_report_paths
    from topoclass.scoring import summary_text
    from topoclass.workflow import run_demo

    run = run_demo(workdir, jobs=jobs, progress=True, log=typer.echo)
    typer.echo("")
    typer.echo(_cv_summary(run.training.model))
    m = run.validation.metrics
    typer.echo(f"validation on the production batch: macro-F1 {m['macro_f1']:.3f}, "
               f"ECE {m['ece']:.3f}")
    typer.echo(summary_text(run.score_summary))
    typer.echo(f"model:      {run.training.directory}")
    typer.echo(f"CV report:  {run.training.directory / 'cv_report.md'}")
    typer.echo(f"validation: {run.validation.report}")
    typer.echo(f"scores:     {run.scores}")
    report, _ = batch_report_paths(run.scores)
    if report.exists():
        typer.echo(f"report:     {report}")


@app.command()
def label(
    images: list[Path] = typer.Argument(..., metavar="IMAGES",
                                        help="Images, folders or text files of paths."),
    sheet: Path = typer.Option(..., "--sheet", help="Label sheet (CSV) to fill in; made when "
                               "missing, continued when it exists."),
    classes: str | None = typer.Option(None, "--classes", help="Classes to offer, comma "
                                       "separated (default: those on the sheet)."),
    port: int | None = typer.Option(None, "--port", min=1, max=65535,
                                    help="Port on 127.0.0.1 (default: a free one)."),
    seed: int = typer.Option(0, "--seed", help="Random seed of the suggestions."),
    jobs: int = typer.Option(1, "--jobs", min=1, help="Parallel workers for features."),
    cache: Path | None = typer.Option(None, "--cache", help="Feature cache folder."),
) -> None:
    """Label images on a local web page; each label is written to the sheet at once."""
    from topoclass.labeling.server import serve_labelling

    paths = _image_paths(images)
    names = [c.strip() for c in (classes or "").split(",") if c.strip()]
    serve_labelling(paths, sheet, classes=names, port=port, cache_dir=cache, jobs=jobs,
                    seed=seed, announce=lambda text: typer.echo(text))


@app.command()
def suggest(
    images: list[Path] = typer.Argument(..., metavar="IMAGES",
                                        help="Images, folders or text files of paths."),
    sheet: Path = typer.Option(..., "--sheet", help="Label sheet in progress (CSV)."),
    count: int = typer.Option(10, "--count", min=1, help="How many images to suggest."),
    as_json: bool = typer.Option(False, "--json", help="Print a JSON list with the predicted "
                                 "class, confidence and reason of each."),
    seed: int = typer.Option(0, "--seed", help="Random seed; same seed, same list."),
    jobs: int = typer.Option(1, "--jobs", min=1, help="Parallel workers for features."),
    cache: Path | None = typer.Option(None, "--cache", help="Feature cache folder."),
) -> None:
    """Print the images worth labelling next, best first (one path per line)."""
    from topoclass.labeling.ranking import suggest_from_sheet, suggestion_json

    paths = _image_paths(images)
    ranked, failures = suggest_from_sheet(paths, sheet, count=count, seed=seed, jobs=jobs,
                                          cache_dir=cache, progress=True)
    _echo_failures(failures)
    if as_json:
        typer.echo(json.dumps([suggestion_json(p, s) for p, s in ranked], indent=1))
    else:
        for path, _ in ranked:
            typer.echo(str(path))


@app.command()
def trend(
    scores_csv: list[Path] | None = typer.Argument(None, metavar="[SCORES_CSV]...",
                                                   help="scores.csv files, one per batch, in "
                                                   "acquisition order (or use --store)."),
    out: Path = typer.Option(..., "--out", help="Folder for trend.png, trend.csv and limits."),
    by: str | None = typer.Option(None, "--by", help="Order by this column (times or numbers), "
                                  "or file-time for the image files' times; default: as read."),
    reference: Path | None = typer.Option(None, "--reference", help="scores.csv of reference "
                                          "images that set the control limits."),
    baseline: int = typer.Option(20, "--baseline", min=2, help="Without --reference, the "
                                 "first this many images set the limits."),
    charts: str | None = typer.Option(None, "--charts", help="Comma-separated columns to "
                                      "chart (default: amounts, then class probabilities)."),
    store: str | None = typer.Option(None, "--store", help="Chart the rows of a results store "
                                     "(in the order they were stored) instead of CSV files."),
    since: str | None = typer.Option(None, "--since", help="With --store: rows scored since "
                                     "this date (YYYY-MM-DD, UTC)."),
    model_hash: str | None = typer.Option(None, "--model-hash", help="With --store: rows of "
                                          "the model whose hash starts so."),
    reference_batch: int | None = typer.Option(None, "--reference-batch", help="With --store: "
                                               "the stored batch whose images set the limits."),
    model_dir: Path | None = typer.Option(None, "--model", help="Set the limits of the amounts "
                                          "from this model's training images."),
    reference_class: str | None = typer.Option(None, "--reference-class", help="With --model: "
                                               "only its training images of this class (for "
                                               "example the accepted, ordered ones)."),
) -> None:
    """Chart amounts and class probabilities over a run, with control limits and run rules."""
    from topoclass.scoring import CAUTION
    from topoclass.trend import (
        TREND_CAUTION,
        default_charts,
        read_score_tables,
        trend_table,
        write_trend,
    )

    if store is not None:
        if scores_csv:
            raise TopoclassError(f"trend takes scores CSV files or --store {store}, not both; "
                                 "give one of them")
        table, ref = _trend_rows_from_store(store, since, model_hash, reference_batch)
        if reference is not None:
            ref = read_score_tables([reference])
    elif not scores_csv:
        raise TopoclassError("trend needs scores CSV files or --store STORE; give one of them")
    else:
        table = read_score_tables(scores_csv)
        ref = read_score_tables([reference]) if reference is not None else None
    chosen = [c.strip() for c in charts.split(",") if c.strip()] if charts else None
    if reference_class is not None and model_dir is None:
        raise TopoclassError("--reference-class needs --model MODEL_DIR; give the model whose "
                             "training images set the limits")
    if model_dir is not None:
        if reference is not None or reference_batch is not None:
            raise TopoclassError("give one reference: --model, --reference or "
                                 "--reference-batch")
        from topoclass.trend import read_model_reference

        ref = read_model_reference(model_dir, reference_class)
        if chosen is None:  # training images have amounts, not this run's probabilities
            chosen = [c for c in default_charts(table)
                      if c in ref.columns and ref[c].notna().sum() >= 2]
    result = trend_table(table, charts=chosen, by=by, reference=ref, baseline=baseline)
    paths = write_trend(result, out)
    flagged = result.table[result.table["flagged"]]
    if model_dir is not None:
        source = f"{len(ref)} training images of {model_dir}" + (
            f" labelled {reference_class}" if reference_class else " (every class)")
    else:
        source = "the reference set" if ref is not None else f"the first {baseline} images"
    typer.echo(f"charted {len(result.table)} images, {len(result.charts)} charts; "
               f"limits from {source}")
    for _, row in flagged.iterrows():
        fired = [f"{c}: {row[c + '_flags']}" for c in result.charts if row[c + "_flags"]]
        typer.echo(f"  flagged {row['position']:>4} {row['image']}  ({'; '.join(fired)})")
    for path in paths:
        typer.echo(f"wrote {path}")
    typer.echo("")
    typer.echo("Caution: " + TREND_CAUTION + " " + CAUTION)


store_app = typer.Typer(no_args_is_help=True, help="Query the results store of many batches.")
app.add_typer(store_app, name="store")


@store_app.command("export")
def store_export(
    store: str = typer.Argument(..., metavar="STORE",
                                help="A SQLite store file or a postgresql:// URL."),
    out: Path = typer.Option(..., "--out", help="File to write: .csv or .parquet."),
    since: str | None = typer.Option(None, "--since", help="Rows scored since this date "
                                     "(YYYY-MM-DD, UTC)."),
    model_hash: str | None = typer.Option(None, "--model", help="Rows of the model whose hash "
                                          "starts so (see `topoclass store batches`)."),
    batch: int | None = typer.Option(None, "--batch", help="Rows of this batch only."),
) -> None:
    """Write stored results, one row per scored image, to a CSV or Parquet file."""
    from topoclass.store import export_results, open_store, parse_since

    when = parse_since(since)
    with open_store(store) as opened:
        n = export_results(opened, out, since=when, model=model_hash, batch=batch)
    typer.echo(f"exported {n} rows to {out}")


@store_app.command("batches")
def store_batches(
    store: str = typer.Argument(..., metavar="STORE",
                                help="A SQLite store file or a postgresql:// URL."),
    last: int = typer.Option(20, "--last", min=1, help="Show this many newest batches."),
) -> None:
    """List the batches in a store, newest first."""
    from topoclass.store import open_store

    with open_store(store) as opened:
        frame = opened.batches().head(last)
    if frame.empty:
        typer.echo(f"{opened.name}: no batches yet")
        return
    typer.echo(f"{'batch':>5}  {'started (UTC)':<19}  {'model':<12} {'rows':>6} {'failed':>6}"
               f"  {'host':<16} note")
    import pandas as pd

    for r in frame.to_dict("records"):
        started = r["started_utc"].strftime("%Y-%m-%d %H:%M:%S")
        failed = "" if pd.isna(r["n_failed"]) else int(r["n_failed"])
        state = " (unfinished)" if pd.isna(r["finished_utc"]) else ""
        typer.echo(f"{r['batch']:>5}  {started:<19}  {r['model_sha256'][:12]:<12} "
                   f"{r['rows']:>6} {failed:>6}  {r['host'][:16]:<16} {r['note']}{state}")


def _trend_rows_from_store(store, since, model_hash, reference_batch):
    """The stored rows to chart, and those of the reference batch (None without one)."""
    from topoclass.store import open_store, parse_since

    with open_store(store) as opened:
        table = opened.results(since=parse_since(since), model=model_hash)
        ref = None if reference_batch is None else opened.results(batch=reference_batch)
    if table.empty:
        raise TopoclassError(f"{opened.name}: no stored rows match; `topoclass store batches` "
                             "lists what it holds")
    if ref is not None and ref.empty:
        raise TopoclassError(f"{opened.name}: batch {reference_batch} holds no rows; "
                             "`topoclass store batches` lists the batches")
    return table, ref


def _scores_from_store(store, page: Path, batch, since, model_hash) -> Path:
    """Query the store into a scores CSV beside the page, for the batch report."""
    from topoclass.store import open_store, parse_since, write_scores_csv

    target = page.with_name(page.stem + "_scores.csv")
    with open_store(store) as opened:
        n = write_scores_csv(opened, target, batch=batch, since=parse_since(since),
                             model=model_hash)
    if n == 0:
        raise TopoclassError(f"{opened.name}: no stored rows match; `topoclass store batches` "
                             "lists what it holds")
    typer.echo(f"{n} rows from {opened.name} written to {target}")
    return target


@app.command("map")
def map_command(
    model_dir: Path = typer.Argument(..., metavar="MODEL_DIR",
                            help="Model folder written by `topoclass train`."),
    image: Path = typer.Argument(..., metavar="IMAGE",
                            help="Large micrograph (TIFF read in pieces; PNG/JPEG whole)."),
    out: Path = typer.Option(..., "--out", help="Folder for tiles.csv, totals.csv, map.png "
                             "and map.html."),
    tile: int | None = typer.Option(None, "--tile", min=32, help="Tile side in pixels "
                                    "(default: as many sites as a training image)."),
    overlap: float = typer.Option(3.0, "--overlap", min=0.0, help="Overlap of neighbouring "
                                  "tiles, in lattice spacings."),
    jobs: int = typer.Option(1, "--jobs", min=1, help="Parallel workers."),
    resume: bool = typer.Option(False, "--resume", help="Keep finished tiles; map the rest."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing map."),
    memory_limit: float = typer.Option(1500, "--memory-limit", min=1, help="MB a file that "
                                       "cannot be read in pieces may take to read whole."),
    alpha: float | None = typer.Option(None, "--alpha", help=_ALPHA_HELP
                                       + " Default: the one the model was trained with."),
    cluster: str | None = typer.Option(None, "--cluster", help=_CLUSTER_HELP),
) -> None:
    """Map where each class sits on a large micrograph, tile by tile."""
    from topoclass.mapping import map_image, map_summary_text
    from topoclass.model import load_model
    from topoclass.report.map_view import write_map_views

    trained = load_model(model_dir)
    with _cluster_engine(cluster, jobs) as engine:
        summary = map_image(trained, image, out, tile=tile, overlap=overlap, jobs=jobs,
                            resume=resume, overwrite=overwrite, memory_limit_mb=memory_limit,
                            progress=True, alpha=alpha, engine=engine)
    png, page = write_map_views(out, image, memory_limit_mb=memory_limit)
    typer.echo(map_summary_text(summary))
    typer.echo(f"map: {png}\npage: {page}")
    if summary.scored == 0 and summary.skipped == 0:
        raise TopoclassError(f"{out / 'tiles.csv'}: none of the {len(summary.plan)} tiles could "
                             "be scored; see the message column")


def _human_summary(summary: dict) -> str:
    lines = [f"{summary['image']}"]
    spacing = f"{summary['spacing_px']:.2f} px"
    if summary.get("spacing_nm") is not None:
        spacing += f" ({summary['spacing_nm']:.1f} nm)"
    interior = summary.get("n_interior", "?")
    lines.append(f"  sites found      {summary['n_sites']} ({interior} interior)")
    lines.append(f"  spacing          {spacing}")
    lines.append(f"  polarity         {summary['polarity']}")
    lines.append("  (persistence values below are in units of the spacing)")
    skip = {"image", "n_sites", "n_interior", "spacing_px", "spacing_nm", "polarity", "outputs",
            "nearest_labelled"}
    for key, value in summary.items():
        if key in skip or value is None or (key.endswith("_err") and key[:-4] in summary):
            continue
        text = f"{value:.4g}" if isinstance(value, float) else str(value)
        err = summary.get(key + "_err")
        if err is not None:
            text += f" ± {err:.2g}"  # the amount's uncertainty (topoclass.amounts)
        lines.append(f"  {key:<16} {text}")
    for rank, n in enumerate(summary.get("nearest_labelled", []), start=1):
        lines.append(f"  nearest labelled {rank}: {n['label']} (sliced Wasserstein H1 "
                     f"{n['distance']:.3g}) {n['image']}")
    for path in summary.get("outputs", []):
        lines.append(f"  wrote            {path}")
    return "\n".join(lines)


def _image_paths(inputs: list[Path]) -> list[Path]:
    """The images the arguments name; none at all is a usage error."""
    from topoclass.images import collect_image_paths

    paths = collect_image_paths(inputs)
    if not paths:
        raise TopoclassError(f"no images found in {', '.join(map(str, inputs))}; give image "
                             "files, folders holding .png/.jpg/.tif files, or a list file")
    return paths


@contextlib.contextmanager
def _cluster_engine(cluster: str | None, jobs: int):
    """The ``with`` block of --cluster (None without it); says where the work goes, on stderr."""
    if cluster is None:
        yield None
        return
    from topoclass.cluster import open_engine, parse_cluster

    spec = parse_cluster(cluster)  # a malformed address is refused before anything starts
    if jobs != 1:
        raise TopoclassError(f"give --jobs {jobs} or --cluster {cluster}, not both: the "
                             "cluster's workers are the parallel workers")
    with open_engine(spec) as engine:
        typer.echo(engine.describe(), err=True)
        yield engine


def _model_settings(model_dir: Path, max_pixels: int):
    """A saved model and the feature settings it was trained with (``max_pixels`` replaced)."""
    import dataclasses

    from topoclass.features import FeatureSettings
    from topoclass.model import load_model

    trained = load_model(model_dir)
    settings = dataclasses.replace(FeatureSettings.from_model(trained), max_pixels=max_pixels)
    return settings, trained


def _region_options(region: str | None, no_auto_region: bool) -> dict:
    """The FeatureSettings fields the region options set (none when not given)."""
    from topoclass.region import parse_region

    options: dict = {}
    if region is not None:
        options["region"] = parse_region(region)
    if no_auto_region:
        options["auto_region"] = False
    return options


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split())


def _usage_line(exc: typer.TyperException) -> str:
    """One line: what was wrong and which help page says what the command takes."""
    text = " ".join(exc.format_message().split()).rstrip(".")
    if text.startswith("Got unexpected extra argument"):
        text += " (flags such as --json or --resume take no value)"
    ctx = getattr(exc, "ctx", None)
    command = ctx.command_path if ctx is not None else "topoclass"
    return f"{text}; run '{command} --help' to see what it takes"


def _echo_failures(failures) -> None:
    for r in failures:
        typer.echo(f"skipped: {r.error}", err=True)
    if failures:
        typer.echo(f"skipped {len(failures)} image(s) that could not be measured (listed above)",
                   err=True)


def _cv_summary(model) -> str:
    r = model.cv_report.summary()
    return (f"cross-validation ({r['n_splits']}-fold {r['splitter']}): "
            f"accuracy {r['accuracy']:.3f}, "
            f"macro-F1 {r['macro_f1']:.3f}, log-loss {r['log_loss']:.3f}, "
            f"Brier {r['brier']:.3f}, ECE {r['ece']:.3f}; calibration: "
            f"{model.calibration_reason}")


def _comparison_table(rows: list[dict]) -> str:
    head = f"{'rank':>4}  {'feature set':<10} {'classifier':<10} {'macro-F1':>8} {'log-loss':>8}"
    lines = [head]
    for row in sorted(rows, key=lambda r: r["rank"]):
        mark = "  <- kept" if row["selected"] else ""
        lines.append(f"{row['rank']:>4}  {row['feature_set']:<10} {row['classifier']:<10} "
                     f"{row['macro_f1']:>8.3f} {row['log_loss']:>8.3f}{mark}")
    return "\n".join(lines)


def _reliability_text(metrics: dict) -> str:
    lines = ["reliability (top-label confidence bin: images, mean confidence, accuracy)"]
    for row in metrics["reliability"]["top_label"]:
        if row["count"]:
            lines.append(f"  {row['lower']:.1f}-{row['upper']:.1f}: {row['count']:>4}, "
                         f"{row['confidence']:.3f}, {row['accuracy']:.3f}")
    return "\n".join(lines)
