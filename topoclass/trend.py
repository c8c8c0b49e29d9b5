"""Trends over a production run: physical amounts and class probabilities in acquisition order.

Reads plain tables (pandas DataFrames: the rows of one or more ``scores.csv``, or anything with
the same columns, such as a results store) and draws an individuals control chart per chosen
column, with limits from a reference set.

The rules used (common practice in statistical process control)
---------------------------------------------------------------
* **Individuals chart** (Shewhart): centre line = mean of the reference values; the process
  sigma is estimated from the mean moving range of consecutive reference values,
  ``sigma = mean |x_i - x_(i-1)| / d2`` with ``d2 = 1.128`` for ranges of two (the control-chart
  constant tabulated in e.g. Montgomery, *Introduction to Statistical Quality Control*; value
  from memory, it is ``2 / sqrt(pi)``); limits ``centre ± 3 sigma``.
* **Reference set**: the rows of ``reference`` when given (for example the scores of images
  the lab accepted), else the first ``baseline`` rows of the run (20 by default, a usual Phase I
  size).
* **Run rules** of the Western Electric *Statistical Quality Control Handbook* (1956), zones
  in units of the reference sigma, each flag on the point that completes its pattern:
  ``beyond_3s`` one point beyond 3 sigma; ``two_of_three_2s`` two of three consecutive
  points beyond 2 sigma on the same side; ``four_of_five_1s`` four of five consecutive points
  beyond 1 sigma on the same side; ``eight_one_side`` eight consecutive points on the same
  side of the centre line.

These charts support the lab's own process control; the lab sets and reviews the limits, and a
flag is a reason to look, not a verdict on a part.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from topoclass.errors import TopoclassError

#: Control-chart constant d2 for moving ranges of two consecutive values (2 / sqrt(pi)).
D2_RANGE_OF_TWO = 1.128

#: Run rules in the order they are checked, with their one-line meaning.
RUN_RULES = {
    "beyond_3s": "one point beyond 3 sigma",
    "two_of_three_2s": "2 of 3 consecutive points beyond 2 sigma, same side",
    "four_of_five_1s": "4 of 5 consecutive points beyond 1 sigma, same side",
    "eight_one_side": "8 consecutive points on one side of the centre line",
}

#: Amounts charted by default (those present with values), before the class probabilities.
DEFAULT_AMOUNTS = (
    "vacancies_per_1000",
    "grain_area_sites",
    "disorder_index",
    "pore_density_um2",
    "spacing_nm",
)

#: The ordering that reads the image files' modification times.
FILE_TIME = "file-time"

TREND_CAUTION = (
    "Control limits here come from a reference set of scored images and support the lab's own "
    "process control: the lab sets and reviews the limits, and a flag is a reason to look, not "
    "a verdict on a part."
)


@dataclass(frozen=True)
class ControlLimits:
    """Limits of an individuals chart."""

    centre: float
    sigma: float
    lower: float
    upper: float
    n_reference: int


@dataclass(frozen=True)
class TrendResult:
    """What :func:`trend_table` found.

    Attributes
    ----------
    table : DataFrame
        One row per image in acquisition order: ``position``, ``image``, ``batch``, the order
        key, each charted column and ``<column>_flags`` (the run rules fired there, joined by
        ``;``), and ``flagged`` (any rule on any chart).
    limits : DataFrame
        One row per chart: ``chart, centre, sigma, lower, upper, n_reference`` and the rule.
    batches : DataFrame
        One row per batch: images, share of each predicted class, mean of each charted amount.
    charts : list of str
        The charted columns.
    """

    table: pd.DataFrame
    limits: pd.DataFrame
    batches: pd.DataFrame
    charts: list[str]


def individuals_limits(values: Sequence[float]) -> ControlLimits:
    """Centre ± 3 sigma of an individuals chart, sigma from the mean moving range / 1.128.

    Raises
    ------
    ValueError
        With fewer than two finite values (no moving range).
    """
    x = np.asarray(values, dtype=float)
    x = x[np.isfinite(x)]
    if x.size < 2:
        raise ValueError(f"an individuals chart needs at least 2 reference values, got {x.size}")
    centre = float(x.mean())
    sigma = float(np.abs(np.diff(x)).mean() / D2_RANGE_OF_TWO)
    return ControlLimits(centre, sigma, centre - 3 * sigma, centre + 3 * sigma, int(x.size))


def run_rule_flags(values: Sequence[float], limits: ControlLimits) -> pd.DataFrame:
    """Which run rule fires at each point (one bool column per rule of :data:`RUN_RULES`).

    Missing values (NaN) break no run and fire no rule; a window is judged on the points it
    holds. With a zero sigma (a constant reference) only points off the centre fire.
    """
    x = np.asarray(values, dtype=float)
    if limits.sigma > 0:
        z = (x - limits.centre) / limits.sigma
    else:  # every departure from a constant reference is infinitely many sigmas
        z = np.select([x > limits.centre, x < limits.centre, x == limits.centre],
                      [np.inf, -np.inf, 0.0], np.nan)
    n = x.size
    out = {rule: np.zeros(n, dtype=bool) for rule in RUN_RULES}
    finite = np.isfinite(x)
    out["beyond_3s"] = finite & (np.abs(np.nan_to_num(z)) > 3)
    for rule, window, need, level in (("two_of_three_2s", 3, 2, 2.0),
                                      ("four_of_five_1s", 5, 4, 1.0)):
        for side in (1, -1):
            hit = finite & (side * np.nan_to_num(z) > level)
            count = np.convolve(hit.astype(int), np.ones(window, dtype=int))[:n]
            out[rule] |= hit & (count >= need)
    for side in (1, -1):
        run = 0
        for i in range(n):
            if not finite[i]:
                continue
            run = run + 1 if side * z[i] > 0 else 0
            if run >= 8:
                out["eight_one_side"][i] = True
    return pd.DataFrame(out)


def read_score_tables(paths: Sequence[str | Path]) -> pd.DataFrame:
    """The rows of one or more ``scores.csv`` as one table, with a ``batch`` column (file stem
    or parent folder) and ``source`` (the file), in the given order.

    Raises
    ------
    TopoclassError
        When a file is missing or is not a scores table (no ``image``/``status`` columns).
    """
    frames = []
    for p in paths:
        p = Path(p)
        if not p.is_file():
            raise TopoclassError(f"{p}: no such scores file; give CSV files written by "
                                 "`topoclass score`")
        try:
            frame = pd.read_csv(p, dtype={"image": str, "status": str, "predicted": str})
        except (OSError, UnicodeDecodeError, pd.errors.ParserError,
                pd.errors.EmptyDataError) as exc:
            raise TopoclassError(f"{p}: cannot be read as a scores file "
                                 f"({' '.join(str(exc).split())}); give a CSV written by "
                                 "`topoclass score`") from None
        if not {"image", "status"} <= set(frame.columns):
            raise TopoclassError(f"{p}: has no image/status columns; give a CSV written by "
                                 "`topoclass score`")
        name = p.stem if p.stem != "scores" else (p.parent.name or p.stem)
        frame.insert(0, "batch", name)
        frame.insert(1, "source", str(p))
        frames.append(frame)
    if not frames:
        raise TopoclassError("no scores files given; give CSV files written by `topoclass score`")
    table = pd.concat(frames, ignore_index=True)
    if table["batch"].nunique() < len(frames):  # same stems: tell batches apart by their files
        table["batch"] = table["source"]
    return table


def trend_table(
    scores: pd.DataFrame,
    *,
    charts: Sequence[str] | None = None,
    by: str | None = None,
    reference: pd.DataFrame | None = None,
    baseline: int = 20,
) -> TrendResult:
    """Control charts over a run, in acquisition order.

    Parameters
    ----------
    scores : DataFrame
        Rows of scored images (columns of ``scores.csv``; ``batch`` optional). Rows whose
        ``status`` is not ``ok`` are left out.
    charts : sequence of str, optional
        Columns to chart; default the amounts of :data:`DEFAULT_AMOUNTS` that hold values, then
        every ``p_<class>`` column.
    by : str, optional
        Acquisition order: a column (times or numbers, sorted ascending; ties keep the input
        order), or :data:`FILE_TIME` for the image files' modification times. Default: the
        input order.
    reference : DataFrame, optional
        Scored images whose values set the limits; default the first ``baseline`` rows.
    baseline : int
        Rows of the run that set the limits when no ``reference`` is given.

    Returns
    -------
    TrendResult
    """
    if not isinstance(scores, pd.DataFrame):
        raise TypeError(f"trend_table expects a pandas DataFrame, not {type(scores).__name__}")
    if int(baseline) < 2:
        raise ValueError(f"baseline must be at least 2 rows, not {baseline!r}")
    run = _ok_rows(scores)
    if run.empty:
        raise TopoclassError("no scored images (status ok) to chart; check the scores files")
    run = _in_order(run, by)
    charts = list(charts) if charts is not None else _default_charts(run)
    missing = [c for c in charts if c not in run.columns]
    if missing:
        raise TopoclassError(f"no column {', '.join(missing)} in the scores; choose among "
                             f"{', '.join(_numeric_columns(run))}")
    if not charts:
        raise TopoclassError("no column to chart: the scores hold no amounts or probabilities")
    ref = _ok_rows(reference) if reference is not None else run.head(int(baseline))
    table = pd.DataFrame({"position": np.arange(1, len(run) + 1), "image": run["image"].values})
    table["batch"] = run["batch"].values if "batch" in run.columns else ""
    if by is not None:
        table[by] = run["_order_key"].values
    limit_rows = []
    flagged = np.zeros(len(run), dtype=bool)
    for chart in charts:
        values = pd.to_numeric(run[chart], errors="coerce").to_numpy(dtype=float)
        ref_values = pd.to_numeric(ref[chart], errors="coerce") if chart in ref.columns else []
        try:
            limits = individuals_limits(ref_values)
        except ValueError:
            source = "reference set" if reference is not None else f"first {baseline} rows"
            raise TopoclassError(f"{chart}: fewer than 2 values in the {source}, so it has no "
                                 "control limits; give a larger reference or other charts"
                                 ) from None
        flags = run_rule_flags(values, limits)
        table[chart] = values
        table[chart + "_flags"] = [";".join(r for r in RUN_RULES if flags.at[i, r])
                                   for i in range(len(run))]
        flagged |= flags.to_numpy().any(axis=1)
        limit_rows.append({"chart": chart, "centre": limits.centre, "sigma": limits.sigma,
                           "lower": limits.lower, "upper": limits.upper,
                           "n_reference": limits.n_reference,
                           "rule": "individuals chart, mean ± 3 sigma, sigma = mean moving "
                                   "range / 1.128; Western Electric run rules"})
    table["flagged"] = flagged
    return TrendResult(table, pd.DataFrame(limit_rows), _batch_summary(run, charts), charts)


def write_trend(result: TrendResult, out: str | Path) -> list[Path]:
    """Write ``trend.csv``, ``trend_limits.csv``, ``trend_batches.csv`` and ``trend.png``."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    paths = [out / "trend.csv", out / "trend_limits.csv", out / "trend_batches.csv",
             out / "trend.png"]
    result.table.to_csv(paths[0], index=False, float_format="%.6g")
    result.limits.to_csv(paths[1], index=False, float_format="%.6g")
    result.batches.to_csv(paths[2], index=False, float_format="%.6g")
    fig = plot_trend(result)
    fig.savefig(paths[3], dpi=fig.dpi)
    return paths


def plot_trend(result: TrendResult):
    """One individuals chart per charted column, stacked, flagged points in red."""
    from matplotlib.figure import Figure

    n = len(result.charts)
    fig = Figure(figsize=(9, 1.9 * n + 0.9), dpi=100, layout="constrained")
    axes = fig.subplots(n, 1, sharex=True, squeeze=False)[:, 0]
    x = result.table["position"].to_numpy()
    batches = result.table["batch"].astype(str).to_numpy()
    starts = [i for i in range(1, len(batches)) if batches[i] != batches[i - 1]]
    for ax, chart, (_, lim) in zip(axes, result.charts, result.limits.iterrows(), strict=True):
        y = result.table[chart].to_numpy(dtype=float)
        hit = result.table[chart + "_flags"].astype(str).str.len().to_numpy() > 0
        ax.plot(x, y, color="#0072B2", lw=0.8, marker="o", ms=3)
        ax.plot(x[hit], y[hit], ls="", marker="o", ms=6, color="#D55E00",
                label="run rule fired")
        ax.axhline(lim["centre"], color="black", lw=0.8)
        for level in (lim["lower"], lim["upper"]):
            ax.axhline(level, color="#D55E00", lw=0.8, ls="--")
        for s in starts:
            ax.axvline(x[s] - 0.5, color="grey", lw=0.5, ls=":")
        ax.set_ylabel(chart, fontsize=8)
        ax.tick_params(labelsize=7)
        if hit.any():
            ax.legend(fontsize=7, loc="upper left", frameon=False)
    axes[-1].set_xlabel("image, in acquisition order (dotted lines: batch changes)", fontsize=8)
    fig.suptitle("Individuals charts: centre and ±3 sigma (sigma = mean moving range / 1.128); "
                 "limits are for the lab to set", fontsize=8)
    return fig


#: The file of a model folder holding its training images' amounts (a reference for limits).
REFERENCE_FILE = "reference_amounts.csv"


def write_reference_amounts(records, labels, path: str | Path) -> Path:
    """Write the amounts of a model's training images: ``image, label, status`` and every
    amount column of ``scores.csv``, one row per labelled image (no rescaled copies).

    ``topoclass trend --model DIR`` reads it back (:func:`read_model_reference`) to set
    control limits from the images the model learnt, for example its ``ordered`` ones.
    """
    from topoclass.amounts import AMOUNT_KEYS

    rows = []
    for record, label in zip(records, labels, strict=True):
        row = {"image": record.source or "", "label": str(label), "status": "ok"}
        for key in AMOUNT_KEYS:
            value = (record.amounts or {}).get(key)
            row[key] = float(value) if value is not None else np.nan
        rows.append(row)
    path = Path(path)
    pd.DataFrame(rows).to_csv(path, index=False, float_format="%.6g")
    return path


def read_model_reference(model_dir: str | Path, label: str | None = None) -> pd.DataFrame:
    """The training images' amounts of a model folder, all or those of one ``label``.

    Raises
    ------
    TopoclassError
        When the folder has no :data:`REFERENCE_FILE` (a model trained before it was
        written: train again) or no training image has ``label``.
    """
    path = Path(model_dir) / REFERENCE_FILE
    if not path.is_file():
        raise TopoclassError(f"{model_dir}: no {REFERENCE_FILE} (models trained before it "
                             "was written have none); train the model again or give "
                             "--reference scores.csv")
    table = pd.read_csv(path, dtype={"image": str, "label": str, "status": str})
    if label is not None:
        known = sorted(set(table["label"]))
        table = table[table["label"] == label]
        if table.empty:
            raise TopoclassError(f"{model_dir}: no training image is labelled {label!r}; "
                                 f"choose one of {', '.join(known)}")
    return table.reset_index(drop=True)


def trend_svg(result: TrendResult, *, width: int = 720, panel: int = 110) -> str:
    """The charts of :func:`plot_trend` as one inline SVG, drawn from the arrays.

    Made for the HTML batch report, where a matplotlib figure would cost more than the rest
    of the page: the same centre line, dashed limits, batch changes and flagged points.
    """
    import html

    left, right, top = 120, 10, 8
    rows = result.table
    n = len(rows)
    x = np.arange(n, dtype=float)
    sx = (width - left - right) / max(n - 1, 1)
    batches = rows["batch"].astype(str).to_numpy()
    starts = [i for i in range(1, n) if batches[i] != batches[i - 1]]
    parts = []
    for k, (chart, (_, lim)) in enumerate(zip(result.charts, result.limits.iterrows(),
                                              strict=True)):
        y = rows[chart].to_numpy(dtype=float)
        finite = y[np.isfinite(y)]
        low = min([lim["lower"], *finite]) if finite.size else lim["lower"]
        high = max([lim["upper"], *finite]) if finite.size else lim["upper"]
        if not high > low:
            low, high = low - 1.0, high + 1.0
        y0 = top + k * panel
        height = panel - 22

        def py(v, y0=y0, low=low, high=high, height=height):
            return y0 + height * (1.0 - (v - low) / (high - low))

        px = left + x * sx
        parts.append(f"<text x='{left - 6}' y='{y0 + height / 2:.1f}' text-anchor='end' "
                     f"font-size='11'>{html.escape(chart)}</text>")
        parts.append(f"<rect x='{left}' y='{y0}' width='{width - left - right}' "
                     f"height='{height}' fill='none' stroke='#bbb'/>")
        for s in starts:
            xs = left + (s - 0.5) * sx
            parts.append(f"<line x1='{xs:.1f}' x2='{xs:.1f}' y1='{y0}' y2='{y0 + height}' "
                         "stroke='#999' stroke-dasharray='1,2'/>")
        parts.append(f"<line x1='{left}' x2='{width - right}' y1='{py(lim['centre']):.1f}' "
                     f"y2='{py(lim['centre']):.1f}' stroke='#000'/>")
        for level in (lim["lower"], lim["upper"]):
            parts.append(f"<line x1='{left}' x2='{width - right}' y1='{py(level):.1f}' "
                         f"y2='{py(level):.1f}' stroke='#D55E00' stroke-dasharray='5,3'/>")
        ok = np.isfinite(y)
        points = " ".join(f"{a:.1f},{py(b):.1f}" for a, b in zip(px[ok], y[ok], strict=True))
        parts.append(f"<polyline points='{points}' fill='none' stroke='#0072B2' "
                     "stroke-width='1'/>")
        flags = rows[chart + "_flags"].astype(str).to_numpy()
        for i in np.flatnonzero(ok):
            hit = bool(flags[i]) and flags[i] != "nan"
            title = html.escape(f"{rows['image'].iloc[i]}: {y[i]:.4g}"
                                + (f" ({flags[i]})" if hit else ""))
            parts.append(f"<circle cx='{px[i]:.1f}' cy='{py(y[i]):.1f}' r='{4 if hit else 2}' "
                         f"fill='{'#D55E00' if hit else '#0072B2'}'><title>{title}</title>"
                         "</circle>")
        parts.append(f"<text x='{width - right}' y='{y0 + height + 12}' text-anchor='end' "
                     f"font-size='10' fill='#555'>limits {lim['lower']:.4g} – "
                     f"{lim['upper']:.4g}, centre {lim['centre']:.4g}</text>")
    total = top + panel * len(result.charts)
    return (f"<svg xmlns='http://www.w3.org/2000/svg' width='{width}' height='{total}' "
            f"viewBox='0 0 {width} {total}' role='img' aria-label='control charts'>"
            + "".join(parts) + "</svg>")


# --------------------------------------------------------------------------------------------
# private helpers


def _ok_rows(frame: pd.DataFrame) -> pd.DataFrame:
    if "status" in frame.columns:
        frame = frame[frame["status"].astype(str) == "ok"]
    return frame.reset_index(drop=True)


def _in_order(run: pd.DataFrame, by: str | None) -> pd.DataFrame:
    if by is None:
        return run
    run = run.copy()
    if by == FILE_TIME:
        run["_order_key"] = [_file_time(img, src) for img, src in
                             zip(run["image"], run.get("source", [""] * len(run)), strict=True)]
    elif by in run.columns:
        key = run[by]
        numeric = pd.to_numeric(key, errors="coerce")
        if numeric.notna().all():
            key = numeric
        else:
            parsed = pd.to_datetime(key, errors="coerce")
            key = parsed if parsed.notna().all() else key.astype(str)
        run["_order_key"] = key
    else:
        raise TopoclassError(f"no column {by!r} in the scores to order by; give a column name "
                             f"or {FILE_TIME} for the image files' times")
    return run.sort_values("_order_key", kind="stable").reset_index(drop=True)


def _file_time(image: str, source: str) -> pd.Timestamp:
    path = Path(image)
    candidates = [path] if path.is_absolute() else [path, Path(source).parent / path]
    for c in candidates:
        try:
            return pd.Timestamp(os.stat(c).st_mtime, unit="s")
        except OSError:
            continue
    raise TopoclassError(f"{image}: cannot read the file's time for --by {FILE_TIME}; run from "
                         "the folder the scores were made in, or order by a column")


def _numeric_columns(run: pd.DataFrame) -> list[str]:
    skip = {"batch", "source", "image", "status", "predicted", "unfamiliar", "sha256",
            "message", "_order_key"}
    return [c for c in run.columns if c not in skip
            and pd.to_numeric(run[c], errors="coerce").notna().any()]


def default_charts(scores: pd.DataFrame) -> list[str]:
    """The columns :func:`trend_table` charts when none are chosen: the amounts of
    :data:`DEFAULT_AMOUNTS` that hold values, then every ``p_<class>`` column."""
    return _default_charts(_ok_rows(scores))


def _default_charts(run: pd.DataFrame) -> list[str]:
    amounts = [c for c in DEFAULT_AMOUNTS if c in run.columns
               and pd.to_numeric(run[c], errors="coerce").notna().sum() >= 2]
    return amounts + [c for c in run.columns if c.startswith("p_")]


def _batch_summary(run: pd.DataFrame, charts: list[str]) -> pd.DataFrame:
    batch = run["batch"] if "batch" in run.columns else pd.Series([""] * len(run))
    rows = []
    classes = [c[2:] for c in run.columns if c.startswith("p_")]
    for name, part in run.groupby(batch.values, sort=False):
        row: dict[str, object] = {"batch": name, "images": len(part)}
        predicted = part["predicted"].astype(str) if "predicted" in part.columns else None
        for c in classes:
            row[f"share_{c}"] = float((predicted == c).mean()) if predicted is not None else np.nan
        for chart in charts:
            if not chart.startswith("p_"):
                row[f"mean_{chart}"] = float(pd.to_numeric(part[chart], errors="coerce").mean())
        rows.append(row)
    return pd.DataFrame(rows)
