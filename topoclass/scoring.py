"""Score production micrographs in batch: one CSV row per image, never losing finished work.

Stage 7 of the pipeline. Rows are appended and flushed as images finish, so a crash, ``kill -9``
or Ctrl-C leaves a valid CSV holding every finished image; ``resume=True`` skips the images
already in the file (the same file however its path is spelled, with the same content hash) and
scores the rest. A lock file beside the output keeps two runs from writing the same file at once.
Rows come in input order whatever the number of jobs, so the same inputs and model give a
byte-identical file. How a row becomes a line, the lock and the resume checks are
:mod:`topoclass.rowfile`'s, shared with maps and the store's export.
"""

from __future__ import annotations

import os
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from topoclass.amounts import AMOUNT_KEYS
from topoclass.errors import StoreError, TopoclassError
from topoclass.features import FeatureSettings, RecordResult, file_sha256, iter_records
from topoclass.records import barcode_summary
from topoclass.rowfile import (
    WriterLock,
    csv_header,
    csv_line,
    in_chunks,
    read_rows,
    reopen_checked,
    write_durably,
)

CAUTION = (
    "Probabilities are estimates learned from the labelled training set. Re-validate the model "
    "whenever the process, the instrument or the magnification changes. These scores support, "
    "and do not replace, the lab's own quality procedures."
)

#: Said wherever the review band is shown: what its guarantee covers and what it does not.
BAND_NOTE = (
    "The verdict is one class when the review band (error rate alpha = {alpha:g}) rules out "
    "all others, 'review' when it cannot, 'unfamiliar' when no class fits; its coverage holds "
    "only for images like the labelled training set."
)

#: Per-image measures written beside the probabilities (persistence values in spacing units).
MEASURE_COLUMNS = (
    "n_sites",
    "spacing_px",
    "h0_length_variance",
    "h1_length_sum",
    "h1_count",
    "psi6_global",
    "psi6_local_mean",
    "defect_fraction",
    "clark_evans_r",
    "nn_cv",
)

#: Physical amounts written after the measures (:data:`topoclass.amounts.AMOUNT_KEYS`; lengths
#: in spacings or nm, areas in µm², each ``*_err`` the uncertainty of the amount before it). A
#: cell is empty where the amount needs a pixel size the file did not record.
AMOUNT_COLUMNS = AMOUNT_KEYS


@dataclass
class ScoreSummary:
    """What a scoring run did, and what the results file says of every image it was given.

    ``scored + failed + skipped == given``; ``sum(per_class) + review + unfamiliar +
    total_failed == given`` (an image finished by an earlier run counts by its row in the file).
    """

    out: Path
    #: Images given to this run.
    given: int = 0
    #: Images measured by this run: scored (a row with status ok) or failed (an error row).
    scored: int = 0
    failed: int = 0
    #: Images already in the file (``resume``), and how many of those rows are errors.
    skipped: int = 0
    skipped_failed: int = 0
    #: Over every image given: unfamiliar ones, ``review`` ones (more than one class cannot be
    #: ruled out), and the verdicts (single classes) of the others.
    unfamiliar: int = 0
    review: int = 0
    per_class: Counter = field(default_factory=Counter)
    #: The results store the rows also went to (see :mod:`topoclass.store`), if any.
    store: str | None = None
    #: Why the store stopped taking rows (the CSV still has every row), if it did.
    store_error: str | None = None
    #: Error rate of the review band used.
    alpha: float | None = None

    @property
    def total_failed(self) -> int:
        """Images given whose row in the file is an error, from this run or an earlier one."""
        return self.failed + self.skipped_failed

    def _count(self, row: dict, *, earlier: bool) -> None:
        if row.get("status") != "ok":
            if earlier:
                self.skipped_failed += 1
            else:
                self.failed += 1
            return
        if not earlier:
            self.scored += 1
        verdict = row.get("verdict", "")
        if verdict == "unfamiliar":
            self.unfamiliar += 1
        elif verdict == "review":
            self.review += 1
        else:
            self.per_class[verdict] += 1


def score_columns(classes: Sequence[str]) -> list[str]:
    """The header of ``scores.csv`` for a model with these classes."""
    return (
        ["image", "status", "predicted", "confidence", "verdict"]
        + [f"p_{c}" for c in classes]
        + ["unfamiliar", *MEASURE_COLUMNS, *AMOUNT_COLUMNS, "analysed_region", "sha256",
           "message"]
    )


def score_images(
    model,
    paths: Sequence[str | Path],
    out: str | Path,
    *,
    settings: FeatureSettings | None = None,
    jobs: int = 1,
    resume: bool = False,
    overwrite: bool = False,
    cache_dir: str | Path | None = None,
    progress: bool = False,
    recorder=None,
    alpha: float | None = None,
    engine=None,
) -> ScoreSummary:
    """Score images with a trained model and append one row per image to ``out``.

    Parameters
    ----------
    model : topoclass.model.TrainedModel
        A model from :func:`topoclass.model.load_model` (or freshly trained).
    paths : sequence of path-like
        Image files, in the order the rows should appear.
    out : path-like
        The CSV to write. An existing file is refused unless ``resume`` or ``overwrite``.
    settings : FeatureSettings, optional
        Site-finding and persistence settings; when omitted, the ones the model was trained
        with (:meth:`FeatureSettings.from_model`). Scoring with other settings than the
        training's gives meaningless probabilities; pass them only to change ``max_pixels``.
    jobs : int
        Worker processes for feature extraction.
    resume : bool
        Keep the rows already in ``out`` and score only the images not yet in it.
    overwrite : bool
        Replace an existing ``out``.
    cache_dir, progress
        As in :func:`topoclass.features.iter_records`.
    recorder : topoclass.store.BatchRecorder, optional
        Also writes every row to a results store, each chunk committed there before it is
        written to the CSV. With ``resume``, images the store already holds for this model and
        settings are not scored again: their stored rows are copied to the CSV. A store that
        fails stops taking rows (``summary.store_error`` says why); the CSV still gets them.
    alpha : float, optional
        Error rate of the review band behind the ``verdict`` column; the model's own (set at
        training) when omitted.
    engine : topoclass.cluster.ClusterEngine, optional
        Measure the images on a Dask cluster (``jobs`` is then ignored). This process stays the
        one writer: the rows, their order, the lock and ``resume`` are as with ``jobs``.
    """
    out = Path(out)
    classes = [str(c) for c in model.classes]
    columns = score_columns(classes)
    if settings is None:
        settings = FeatureSettings.from_model(model)
    band = getattr(model, "review_band", None)
    if alpha is not None:
        from topoclass.model.conformal import check_alpha

        alpha = check_alpha(alpha)
    summary = ScoreSummary(out=out, given=len(paths), alpha=alpha if alpha is not None
                           else (band.alpha_ if band is not None else None),
                           store=None if recorder is None else recorder.store.name)
    if out.exists() and not (resume or overwrite):
        raise TopoclassError(
            f"{out}: the output exists; pass --resume to continue it or --overwrite to replace it"
        )
    out.parent.mkdir(parents=True, exist_ok=True)
    with WriterLock(out):
        done = _prepare_output(out, columns, resume=resume)
        todo: list[Path] = []
        for p in paths:
            p = Path(p)
            key = _same_file_key(p)
            if key in done:
                try:
                    sha = file_sha256(p)
                except OSError:
                    sha = None  # gone since: keep its finished row
                match = [r for r in done[key] if sha is None or r.get("sha256") == sha]
                if match:
                    summary.skipped += 1
                    summary._count(match[-1], earlier=True)
                    continue
                _drop_rows(out, columns, key)  # the file changed: its old row is stale
            todo.append(p)
        with open(out, "a", newline="", encoding="utf-8") as fh:
            if resume and recorder is not None:
                todo = _copy_stored_rows(recorder, todo, fh, columns, summary)
            results = iter_records(
                todo, settings, cache_dir=cache_dir, jobs=jobs, progress=progress,
                description="scoring", engine=engine,
            )
            for chunk in in_chunks(results):
                rows = score_rows(model, classes, chunk, alpha)
                if recorder is not None and summary.store_error is None:
                    try:
                        recorder.add(rows)
                    except StoreError as exc:
                        summary.store_error = str(exc)
                write_durably(fh, rows, columns)
                for row in rows:
                    summary._count(row, earlier=False)
    if recorder is not None and summary.store_error is None:
        try:
            recorder.finish(scored=summary.scored, failed=summary.failed,
                            skipped=summary.skipped)
        except StoreError as exc:
            summary.store_error = str(exc)
    return summary


def score_rows(model, classes: list[str], results: list[RecordResult],
               alpha: float | None = None) -> list[dict]:
    """The ``scores.csv`` rows of measured images, one per result, in order.

    Parameters
    ----------
    model : topoclass.model.TrainedModel
        The model that scores the records.
    classes : list of str
        ``model.classes`` as strings (the ``p_<class>`` columns).
    results : list of RecordResult
        Measured images (:func:`topoclass.features.iter_records`); a failed one gives an
        ``error`` row with its message.
    alpha : float, optional
        Error rate of the review band behind ``verdict``; the model's own when omitted.

    Returns
    -------
    list of dict
        Rows keyed by column name (:func:`score_columns`); the measured images are predicted
        in one call.
    """
    rows: list[dict] = [{"image": str(r.path), "sha256": r.sha256 or ""} for r in results]
    ok = [i for i, r in enumerate(results) if r.ok]
    for i, r in enumerate(results):
        if not r.ok:
            rows[i].update(status="error", message=r.error or "unknown error")
    if not ok:
        return rows
    records = [results[i].record for i in ok]
    # No try/except here: a record that was measured but cannot be scored is a bug (or a model
    # that does not fit its own settings) and must fail loudly, not turn into error rows.
    proba, unfamiliarity, reasons = model.assess(records)
    proba = np.asarray(proba, dtype=float)
    unfamiliarity = np.asarray(unfamiliarity, dtype=float)
    verdicts = model.verdicts(proba, unfamiliarity, alpha=alpha)
    for k, i in enumerate(ok):
        rows[i].update(_ok_row(classes, results[i], proba[k], unfamiliarity[k], reasons[k]))
        rows[i]["verdict"] = verdicts[k]
        if verdicts[k] == "unfamiliar" and unfamiliarity[k] <= 1.0:
            rows[i]["message"] = "; ".join(
                m for m in ("no class fits at the review band's error rate; check by eye",
                            rows[i]["message"]) if m)
    return rows


def read_scores(path: str | Path) -> list[dict[str, str]]:
    """Rows of a ``scores.csv`` as dicts (an incomplete last line, from a crash, is ignored)."""
    return read_rows(path)


def summary_text(summary: ScoreSummary) -> str:
    """A short human summary of a run, ending with the caution about probabilities."""
    done = f", already done {summary.skipped}" if summary.skipped else ""
    if summary.skipped_failed:
        done += f" ({summary.skipped_failed} of them failed)"
    lines = [f"images {summary.given}: scored {summary.scored}, failed {summary.failed}{done}"]
    for cls, n in sorted(summary.per_class.items()):
        lines.append(f"  predicted {cls:<16} {n}")
    lines.append(f"  review {'':<19} {summary.review} (more than one class cannot be ruled "
                 "out, so not counted as any class; look at them)")
    lines.append(f"  unfamiliar {'':<15} {summary.unfamiliar} (unlike the training images or "
                 "no class fits, so not counted as any class; check them by eye)")
    lines.append(f"  failed {'':<19} {summary.total_failed} (see the message column)")
    lines.append(f"results: {summary.out}")
    if summary.store is not None:
        lines.append(f"store: {summary.store}" if summary.store_error is None else
                     f"store: NOT complete ({summary.store_error}); every row is in the CSV")
    lines.append("")
    if summary.alpha is not None:
        lines.append(BAND_NOTE.format(alpha=summary.alpha))
    lines.append("Caution: " + CAUTION)
    return "\n".join(lines)


# --------------------------------------------------------------------------------------------
# private helpers


def _copy_stored_rows(recorder, todo: list[Path], fh, columns: list[str],
                      summary: ScoreSummary) -> list[Path]:
    """Write the stored rows of images the store already holds; return the images still to do."""
    hashes: dict[Path, str] = {}
    for p in todo:
        try:
            hashes[p] = file_sha256(p)
        except OSError:
            pass  # unreadable now: scoring it again writes the error row
    try:
        stored = recorder.finished(hashes.values())
    except StoreError as exc:
        summary.store_error = str(exc)
        return todo
    rest = []
    for p in todo:
        row = stored.get(hashes.get(p, ""))
        if row is None:
            rest.append(p)
            continue
        fh.write(csv_line({**row, "image": str(p)}, columns))
        summary.skipped += 1
        summary._count(row, earlier=True)
    fh.flush()
    os.fsync(fh.fileno())
    return rest


def _ok_row(classes, result: RecordResult, proba, unfamiliarity: float, reasons) -> dict:
    record = result.record
    best = int(np.argmax(proba))
    row: dict[str, object] = {"status": "ok", "predicted": classes[best],
                              "confidence": proba[best]}
    row.update({f"p_{c}": p for c, p in zip(classes, proba, strict=True)})
    row["unfamiliar"] = "yes" if unfamiliarity > 1.0 else "no"
    measures = {**barcode_summary(record.diagrams), **record.order}
    measures["spacing_px"] = record.diagrams.spacing
    for key in MEASURE_COLUMNS:
        if key in measures:
            row[key] = measures[key]
    for key in AMOUNT_COLUMNS:
        value = record.amounts.get(key)
        if value is not None and np.isfinite(value):
            row[key] = value
    if record.region is not None:  # x0,y0,x1,y1 as --region takes it
        row["analysed_region"] = ",".join(str(v) for v in record.region)
    messages = list(result.notes) + list(record.remarks)
    if unfamiliarity > 1.0:
        why = "; ".join(reasons) or f"unfamiliarity {unfamiliarity:.2f}"
        messages.insert(0, f"unlike the training images ({why}); check by eye")
    row["message"] = "; ".join(messages)
    return row


def _prepare_output(out: Path, columns: list[str], *, resume: bool) -> dict[Path, list[dict]]:
    """Start a fresh file, or validate and clean an existing one.

    Returns the finished rows by resolved path, so that a path spelled another way (relative,
    absolute, through a symlink) still finds its row.
    """
    if not (resume and out.exists()):
        out.write_text(csv_header(columns), encoding="utf-8")
        return {}
    reopen_checked(
        out, columns,
        f"{out}: its columns do not match this model's classes or this version's columns; "
        "resume only with the model and version that wrote it, or write to a new file",
    )
    done: dict[Path, list[dict]] = {}
    for r in read_scores(out):
        done.setdefault(_same_file_key(r["image"]), []).append(r)
    return done


def _same_file_key(path: str | Path) -> Path:
    """One key for every spelling of a file's path: relative, absolute, through symlinks."""
    return Path(os.path.expanduser(path)).resolve()


def _drop_rows(out: Path, columns: list[str], key: Path) -> None:
    rows = [r for r in read_scores(out) if _same_file_key(r["image"]) != key]
    tmp = out.with_name(out.name + ".tmp")
    with open(tmp, "w", newline="", encoding="utf-8") as fh:
        fh.write(csv_header(columns))
        for r in rows:
            fh.write(csv_line(r, columns))
    os.replace(tmp, out)
