"""Command line: a thin shell over the Python API.

Every command here calls public functions of the pipeline modules; nothing is computed in this
file that a notebook could not compute the same way.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import typer

from topoclass.errors import TopoclassError
from topoclass.model.pipeline import CLASSIFIERS, DEFAULT_CLASSIFIER

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
        app(args=args, prog_name="topoclass", standalone_mode=False)
    except TopoclassError as exc:
        typer.echo(f"error: {_one_line(exc)}", err=True)
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
) -> None:
    """Find the lattice sites of one micrograph and report its order measures."""
    from topoclass.features import FeatureSettings
    from topoclass.inspection import inspect_image

    settings = FeatureSettings(polarity=polarity, pixel_size_nm=pixel_size, max_pixels=max_pixels)
    summary = inspect_image(image, out=out, settings=settings)
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
) -> None:
    """Make synthetic anodic-alumina micrographs with ground truth (invented demo data)."""
    from topoclass.synth import write_dataset

    labels = write_dataset(out_dir, per_class=per_class, size=size, seed=seed, progress=True)
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
) -> None:
    """Train, cross-validate and calibrate a model from labelled micrographs."""
    from topoclass.features import FeatureSettings
    from topoclass.workflow import train_from_labels

    run = train_from_labels(
        labels, model, feature_set=features, classifier=classifier, cv=cv,
        calibration=calibration, seed=seed, select=select,
        settings=FeatureSettings(polarity=polarity), jobs=jobs, cache_dir=cache, progress=True,
        alpha=alpha,
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
    jobs: int = typer.Option(1, "--jobs", min=1, help="Parallel workers for features."),
    cache: Path | None = typer.Option(None, "--cache", help="Feature cache folder."),
) -> None:
    """Measure a trained model on a held-out labelled set."""
    from topoclass.workflow import validate_from_labels

    run = validate_from_labels(model_dir, labels, jobs=jobs, cache_dir=cache, progress=True)
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
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing output."),
    cache: Path | None = typer.Option(None, "--cache", help="Feature cache folder."),
    max_pixels: int | None = typer.Option(None, "--max-pixels", min=1,
                                          help="Refuse larger images (default 100 megapixels)."),
    alpha: float | None = typer.Option(None, "--alpha", help=_ALPHA_HELP
                                       + " Default: the one the model was trained with."),
    details: int = typer.Option(200, "--details", min=0, help="Detail views in the report for "
                                "at most this many images, the most doubtful first."),
    no_report: bool = typer.Option(False, "--no-report", help="Write the CSV only (`topoclass "
                                   "report` makes the page later)."),
) -> None:
    """Score micrographs in batch with a probability for each class."""
    import dataclasses

    from topoclass.features import FeatureSettings
    from topoclass.images import collect_image_paths
    from topoclass.model import load_model
    from topoclass.scoring import score_images, summary_text

    trained = load_model(model_dir)
    paths = collect_image_paths(inputs)
    if not paths:
        raise TopoclassError(f"no images found in {', '.join(map(str, inputs))}; give image "
                             "files, folders holding .png/.jpg/.tif files, or a list file")
    settings = FeatureSettings.from_model(trained)
    if max_pixels is not None:
        settings = dataclasses.replace(settings, max_pixels=max_pixels)
    summary = score_images(trained, paths, out, settings=settings, jobs=jobs, resume=resume,
                           overwrite=overwrite, cache_dir=cache, progress=True, alpha=alpha)
    typer.echo(summary_text(summary))
    from topoclass.report import write_batch_report

    if not no_report:
        page = write_batch_report(out, model=trained, details=details, jobs=jobs,
                                  cache_dir=cache, progress=True)
        typer.echo(f"report: {page}")
    if summary.scored == 0 and summary.skipped == 0:
        raise TopoclassError(f"{out}: none of the {len(paths)} images could be scored; "
                             "see the message column")


@app.command()
def report(
    scores_csv: Path = typer.Argument(..., metavar="SCORES_CSV",
                            help="Results CSV written by `topoclass score`."),
    out: Path | None = typer.Option(None, "--out", help="HTML file (default: report.html "
                                    "beside the CSV)."),
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
    path = write_batch_report(scores_csv, out, model=trained, details=details, jobs=jobs,
                              cache_dir=cache, progress=True)
    typer.echo(f"report: {path}")


@app.command()
def demo(
    workdir: Path = typer.Option(Path("topoclass-demo"), "--workdir",
                                 help="Folder for the demo data, model and results."),
    jobs: int = typer.Option(2, "--jobs", min=1, help="Parallel workers."),
) -> None:
    """Run the whole job on invented anodic-alumina micrographs."""
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
    report = run.scores.parent / "report.html"
    if report.exists():
        typer.echo(f"report:     {report}")


@app.command()
def label(
    images: list[Path] = typer.Argument(..., help="Images, folders or text files of paths."),
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
    from topoclass.images import collect_image_paths
    from topoclass.labeling.server import serve_labelling

    paths = collect_image_paths(images)
    if not paths:
        raise TopoclassError(f"no images found in {', '.join(map(str, images))}; give image "
                             "files, folders holding .png/.jpg/.tif files, or a list file")
    names = [c.strip() for c in (classes or "").split(",") if c.strip()]
    serve_labelling(paths, sheet, classes=names, port=port, cache_dir=cache, jobs=jobs,
                    seed=seed, announce=lambda text: typer.echo(text))


@app.command()
def suggest(
    images: list[Path] = typer.Argument(..., help="Images, folders or text files of paths."),
    sheet: Path = typer.Option(..., "--sheet", help="Label sheet in progress (CSV)."),
    count: int = typer.Option(10, "--count", min=1, help="How many images to suggest."),
    as_json: bool = typer.Option(False, "--json", help="Print a JSON list with the predicted "
                                 "class, confidence and reason of each."),
    seed: int = typer.Option(0, "--seed", help="Random seed; same seed, same list."),
    jobs: int = typer.Option(1, "--jobs", min=1, help="Parallel workers for features."),
    cache: Path | None = typer.Option(None, "--cache", help="Feature cache folder."),
) -> None:
    """Print the images worth labelling next, best first (one path per line)."""
    from topoclass.images import collect_image_paths
    from topoclass.labeling.ranking import suggest_from_sheet, suggestion_json

    paths = collect_image_paths(images)
    if not paths:
        raise TopoclassError(f"no images found in {', '.join(map(str, images))}; give image "
                             "files, folders holding .png/.jpg/.tif files, or a list file")
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
    scores_csv: list[Path] = typer.Argument(..., help="scores.csv files, one per batch, in "
                                            "acquisition order."),
    out: Path = typer.Option(..., "--out", help="Folder for trend.png, trend.csv and limits."),
    by: str | None = typer.Option(None, "--by", help="Order by this column (times or numbers), "
                                  "or file-time for the image files' times; default: as read."),
    reference: Path | None = typer.Option(None, "--reference", help="scores.csv of reference "
                                          "images that set the control limits."),
    baseline: int = typer.Option(20, "--baseline", min=2, help="Without --reference, the "
                                 "first this many images set the limits."),
    charts: str | None = typer.Option(None, "--charts", help="Comma-separated columns to "
                                      "chart (default: amounts, then class probabilities)."),
) -> None:
    """Chart amounts and class probabilities over a run, with control limits and run rules."""
    from topoclass.scoring import CAUTION
    from topoclass.trend import (
        TREND_CAUTION,
        read_score_tables,
        trend_table,
        write_trend,
    )

    table = read_score_tables(scores_csv)
    ref = read_score_tables([reference]) if reference is not None else None
    chosen = [c.strip() for c in charts.split(",") if c.strip()] if charts else None
    result = trend_table(table, charts=chosen, by=by, reference=ref, baseline=baseline)
    paths = write_trend(result, out)
    flagged = result.table[result.table["flagged"]]
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
    skip = {"image", "n_sites", "n_interior", "spacing_px", "spacing_nm", "polarity", "outputs"}
    for key, value in summary.items():
        if key in skip or value is None or (key.endswith("_err") and key[:-4] in summary):
            continue
        text = f"{value:.4g}" if isinstance(value, float) else str(value)
        err = summary.get(key + "_err")
        if err is not None:
            text += f" ± {err:.2g}"  # the amount's uncertainty (topoclass.amounts)
        lines.append(f"  {key:<16} {text}")
    for path in summary.get("outputs", []):
        lines.append(f"  wrote            {path}")
    return "\n".join(lines)


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
