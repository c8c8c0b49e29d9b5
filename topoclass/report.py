"""See what the model sees: figures (matplotlib, Agg) and the offline HTML batch report.

The last stage of the pipeline; it may read every stage to its left and draws what they made:

* inspection pictures of one micrograph — the sites coloured by their Delaunay coordination
  (:func:`plot_sites`), the persistence diagram and barcode (:func:`plot_diagrams`) and the
  defect map, where the longest H1 bars and the latest H0 merges sit on the image
  (:func:`locate_defects`, :func:`plot_defects`);
* training and validation figures — confusion matrix, reliability diagram with bin counts,
  per-class precision and recall, and permutation importance of the features
  (:func:`write_metric_figures`, :func:`feature_importance`);
* one self-contained HTML page beside ``scores.csv`` (:func:`write_batch_report`).

Figures are drawn on :class:`matplotlib.figure.Figure` objects directly (no pyplot state), so
nothing needs a display and nothing leaks between calls.

Colours
-------
Coordination and class colours are picks from the colour-blind-safe palette of Okabe & Ito
(2008, "Color Universal Design (CUD): how to make figures and presentations that are friendly
to colorblind people"); heat maps use matplotlib's ``cividis`` (Nuñez, Anderton & Renslow 2018,
PLoS ONE 13, e0199239), which reads the same with every common colour-vision deficiency.
"""

from __future__ import annotations

import base64
import copy
import csv
import html
import io
import math
import re
from collections import Counter
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from scipy.spatial import Delaunay, QhullError

from topoclass._progress import progress_bar
from topoclass.errors import TopoclassError
from topoclass.persistence import Diagrams
from topoclass.sites import SitePattern

#: Colour of each coordination class (Okabe & Ito 2008 palette): the six-fold sites of a
#: perfect triangular lattice in bluish green, the common 5/7 defect pair in vermillion and
#: blue, and the rarer under- and over-coordinated sites in reddish purple and yellow.
COORDINATION_COLOURS: dict[str, str] = {
    "≤4": "#CC79A7",  # reddish purple
    "5": "#D55E00",  # vermillion
    "6": "#009E73",  # bluish green
    "7": "#0072B2",  # blue
    "≥8": "#F0E442",  # yellow
}

#: Colours of the defect map (Okabe & Ito 2008): H1 loops and H0 merges.
DEFECT_COLOURS = {"h1": "#D55E00", "h0": "#56B4E9"}  # vermillion, sky blue

#: Class colours of the report, in class order (Okabe & Ito 2008; repeated past eight classes).
CLASS_COLOURS = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442",
                 "#000000")

#: Columns of ``defects.csv``; ``length``, ``birth`` and ``death`` in units of the spacing,
#: ``x, y`` in pixels.
DEFECT_COLUMNS = ("kind", "rank", "length", "birth", "death", "x", "y", "site_i", "site_j",
                  "truncated", "located_by")

#: Detail views (inspection pictures) are made for at most this many images of a batch.
MAX_DETAILS = 200
#: Thumbnails are embedded for at most this many images of a batch.
MAX_THUMBNAILS = 2000
_THUMB_PX = 72  # longest side of an embedded thumbnail
_FIGURE_PX = 800  # longest side of the image panel of the inspection pictures


# --------------------------------------------------------------------------------------------
# Inspection pictures
# --------------------------------------------------------------------------------------------


def plot_sites(image: np.ndarray, pattern: SitePattern) -> Figure:
    """The micrograph in grey with every site coloured by its Delaunay coordination.

    Interior sites are filled discs; border sites (``pattern.border``), whose neighbours
    beyond the frame are missing, are hollow and faded. The image panel fills the top of the
    figure pixel for pixel up to a scale factor (see :func:`image_to_figure_pixels`); the legend
    sits in a strip below it.
    """
    fig, ax, scale = _image_figure(image, legend_rows=1)
    coord = site_coordination(pattern)
    size = _marker_area(pattern.spacing * scale, 0.42)
    handles = []
    for label, colour in COORDINATION_COLOURS.items():
        members = _coordination_class(coord) == label
        inner, outer = members & ~pattern.border, members & pattern.border
        if inner.any():
            ax.scatter(pattern.xy[inner, 0], pattern.xy[inner, 1], s=size, c=colour,
                       edgecolors="black", linewidths=0.4)
        if outer.any():
            ax.scatter(pattern.xy[outer, 0], pattern.xy[outer, 1], s=size, facecolors="none",
                       edgecolors=colour, linewidths=1.0, alpha=0.6)
        handles.append(Line2D([], [], ls="", marker="o", markersize=7, markerfacecolor=colour,
                              markeredgecolor="black", markeredgewidth=0.4,
                              label=f"{label} ({int(np.count_nonzero(inner))})"))
    handles.append(Line2D([], [], ls="", marker="o", markersize=7, markerfacecolor="none",
                          markeredgecolor="grey", label=f"border ({int(pattern.border.sum())})"))
    fig.legend(handles=handles, loc="lower center", ncols=len(handles), fontsize=8,
               frameon=False, title="Delaunay neighbours (interior sites)", title_fontsize=8,
               handletextpad=0.2, columnspacing=0.8)
    return fig


def plot_diagrams(diagrams: Diagrams) -> Figure:
    """Persistence diagram (H0 and H1, spacing units) beside the barcode.

    The diagonal is drawn; H1 bars cut at the radius limit ``max_scale`` are drawn as
    triangles on the dashed line of the limit.
    """
    fig = Figure(figsize=(10, 4.4), dpi=100)
    # Fixed margins: a layout engine would cost more than the drawing itself here.
    grid = fig.add_gridspec(2, 2, width_ratios=(1, 1.25), left=0.07, right=0.98, bottom=0.11,
                            top=0.93, wspace=0.18, hspace=0.08)
    ax_d = fig.add_subplot(grid[:, 0])
    ax_h1 = fig.add_subplot(grid[0, 1])
    ax_h0 = fig.add_subplot(grid[1, 1], sharex=ax_h1)
    limit = float(diagrams.max_scale)
    h0, h1, cut = diagrams.h0, diagrams.h1, np.asarray(diagrams.h1_truncated, dtype=bool)
    top = max(limit, float(h0[:, 1].max()) if h0.size else 0.0) * 1.05
    ax_d.plot([0, top], [0, top], color="0.4", lw=0.8, label="birth = death")
    ax_d.axhline(limit, color="0.4", ls="--", lw=0.8, label=f"radius limit {limit:g}")
    ax_d.scatter(h0[:, 0], h0[:, 1], s=12, c=DEFECT_COLOURS["h0"], edgecolors="black",
                 linewidths=0.3, label=f"H0 ({len(h0)})")
    ax_d.scatter(h1[~cut, 0], h1[~cut, 1], s=14, c=DEFECT_COLOURS["h1"], edgecolors="black",
                 linewidths=0.3, label=f"H1 ({int(np.count_nonzero(~cut))})")
    if cut.any():
        ax_d.scatter(h1[cut, 0], h1[cut, 1], s=30, marker="^", c=DEFECT_COLOURS["h1"],
                     edgecolors="black", linewidths=0.5,
                     label=f"H1 cut at the limit ({int(cut.sum())})")
    ax_d.set(xlim=(-0.03 * top, top), ylim=(-0.03 * top, top), aspect="equal",
             xlabel="birth (spacings)", ylabel="death (spacings)", title="Persistence diagram")
    ax_d.legend(fontsize=7, loc="lower right")

    # Barcodes, one panel per dimension (H0 has as many bars as sites, H1 far fewer), longest
    # bar on top; thousands of bars are one LineCollection each.
    for ax_b, bars, dim, flags in ((ax_h1, h1, "H1", cut), (ax_h0, h0, "H0", None)):
        order = np.argsort(-(bars[:, 1] - bars[:, 0]), kind="stable") if bars.size else []
        colour = DEFECT_COLOURS[dim.lower()]
        n = len(order)
        if n:
            y = np.arange(n)[::-1]
            segs = np.stack([np.column_stack([bars[order, 0], y]),
                             np.column_stack([bars[order, 1], y])], axis=1)
            lw = float(np.clip(150.0 / n, 0.4, 3.0))
            ax_b.add_collection(LineCollection(segs, colors=colour, linewidths=lw))
            if flags is not None and flags[order].any():
                sel = flags[order]
                ax_b.scatter(bars[order][sel, 1], y[sel], marker=">", s=16, c=colour, zorder=3,
                             label="cut at the limit")
                ax_b.legend(fontsize=7, loc="lower right")
        ax_b.axvline(limit, color="0.4", ls="--", lw=0.8)
        ax_b.set(xlim=(0, top), ylim=(-1, max(n, 1)), yticks=[],
                 ylabel=f"{dim} bars ({n})")
    ax_h1.set_title("Barcode (longest bars on top)")
    ax_h1.tick_params(labelbottom=False)
    ax_h0.set_xlabel("scale (spacings)")
    return fig


def locate_defects(pattern: SitePattern, diagrams: Diagrams, *, top: int = 10) -> list[dict]:
    """Where the ``top`` longest H1 bars and the ``top`` latest H0 merges sit on the image.

    Returns one dict per defect with the keys of :data:`DEFECT_COLUMNS` (``length``, ``birth``,
    ``death`` in spacings, ``x, y`` in pixels), H1 first, each kind by decreasing length.

    How a bar is placed
    -------------------
    * H0 bar: the midpoint of its death edge (``diagrams.h0_edges``), the minimum-spanning-tree
      edge across the gap that closes last.
    * H1 bar that dies below the radius limit: the midpoint of its *death* edge, the longest
      edge of the triangle that fills the loop (Rips filtration: a triangle enters with its
      longest edge, so that edge's length is the death value). That triangle lies inside the
      hole when the hole closes, so the place is local — unlike the birth edge, which can sit
      far away when, at the birth scale, the still-open region stretches across the image.
      The persistence stage finds that edge (``diagrams.h1_death_edges``).
    * H1 bar cut at the radius limit (a hole wider than the limit): the centre of the largest
      empty circle of the Delaunay triangulation of the interior sites, one circle per bar,
      circles at least a limit apart. A cut class has no death edge; its birth edge is used
      only when no empty circle is left.
    """
    if top < 0:
        raise ValueError(f"top must be >= 0, not {top!r}")
    spacing = float(diagrams.spacing)
    pts = pattern.xy / spacing  # the same arithmetic as the persistence stage
    if pts.shape[0] and (diagrams.h0_edges.size and diagrams.h0_edges.max() >= pts.shape[0]):
        raise TopoclassError(f"{pattern.source or 'the pattern'}: the diagrams do not belong to "
                             "this site pattern; measure the image again")
    rows: list[dict] = []
    l1 = diagrams.lengths(1)
    cut = np.asarray(diagrams.h1_truncated, dtype=bool)
    order1 = np.argsort(-l1, kind="stable")[:top]
    circles = _empty_circles(pts, pattern.border, float(diagrams.max_scale)) if cut.any() else []
    for rank, k in enumerate(order1, start=1):
        b, d = (float(v) for v in diagrams.h1[k])
        i, j = (int(v) for v in diagrams.h1_edges[k])
        how = "birth edge"
        xy = 0.5 * (pts[i] + pts[j])
        death_edge = diagrams.h1_death_edges[k]
        if not cut[k] and death_edge[0] >= 0:
            i, j = (int(v) for v in death_edge)
            xy, how = 0.5 * (pts[i] + pts[j]), "death edge"
        elif circles:
            xy, how = circles.pop(0), "largest empty circle"
        rows.append(_defect_row("h1", rank, b, d, xy * spacing, i, j, bool(cut[k]), how))
    l0 = diagrams.lengths(0)
    for rank, k in enumerate(np.argsort(-l0, kind="stable")[:top], start=1):
        b, d = (float(v) for v in diagrams.h0[k])
        i, j = (int(v) for v in diagrams.h0_edges[k])
        xy = 0.5 * (pts[i] + pts[j]) * spacing
        rows.append(_defect_row("h0", rank, b, d, xy, i, j, False, "mst edge"))
    return rows


def plot_defects(image: np.ndarray, pattern: SitePattern, defects: Sequence[dict]) -> Figure:
    """The defect map: :func:`locate_defects` output drawn on the micrograph.

    H1 loops are circles whose radius is half the bar length (in pixels) with their rank beside
    them and the placing edge drawn; H0 merges are their minimum-spanning-tree edges with a
    small circle at the midpoint, sized the same way.
    """
    fig, ax, scale = _image_figure(image, legend_rows=1)
    ax.scatter(pattern.xy[:, 0], pattern.xy[:, 1], s=_marker_area(pattern.spacing * scale, 0.12),
               c="white", edgecolors="black", linewidths=0.2, alpha=0.6)
    spacing = pattern.spacing
    xy = pattern.xy
    for row in defects:
        kind = row["kind"]
        colour = DEFECT_COLOURS[kind]
        i, j = int(row["site_i"]), int(row["site_j"])
        if row["located_by"] in ("death edge", "mst edge", "birth edge"):
            ax.plot(xy[[i, j], 0], xy[[i, j], 1], color=colour, lw=1.6 if kind == "h1" else 2.2,
                    solid_capstyle="round")
        radius = max(0.5 * row["length"] * spacing, 0.25 * spacing)
        ax.add_patch(_circle((row["x"], row["y"]), radius, colour,
                             lw=2.0 if kind == "h1" else 1.2))
        if kind == "h1":
            ax.annotate(str(row["rank"]), (row["x"] + radius, row["y"] - radius), color=colour,
                        fontsize=8, fontweight="bold", ha="left", va="bottom",
                        bbox={"boxstyle": "round,pad=0.1", "fc": "white", "ec": "none",
                              "alpha": 0.7})
    n1 = sum(r["kind"] == "h1" for r in defects)
    n0 = sum(r["kind"] == "h0" for r in defects)
    handles = [
        Line2D([], [], ls="", marker="o", markersize=10, markerfacecolor="none",
               markeredgecolor=DEFECT_COLOURS["h1"], markeredgewidth=2,
               label=f"{n1} longest H1 bars (loops; circle radius = half the bar length)"),
        Line2D([], [], color=DEFECT_COLOURS["h0"], lw=2.2, marker="o", markerfacecolor="none",
               label=f"{n0} latest H0 merges (widest gaps)"),
    ]
    fig.legend(handles=handles, loc="lower center", ncols=2, fontsize=8, frameon=False)
    return fig


def write_inspection_figures(image: np.ndarray, pattern: SitePattern, diagrams: Diagrams,
                             out: str | Path, *, top: int = 10) -> list[Path]:
    """Write ``overlay.png``, ``diagram.png``, ``defects.png`` and ``defects.csv`` into ``out``.

    Returns the paths written, in that order.
    """
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    defects = locate_defects(pattern, diagrams, top=top)
    paths = [out / "overlay.png", out / "diagram.png", out / "defects.png", out / "defects.csv"]
    _save(plot_sites(image, pattern), paths[0])
    _save(plot_diagrams(diagrams), paths[1])
    _save(plot_defects(image, pattern, defects), paths[2])
    write_defects_csv(defects, paths[3])
    return paths


def write_defects_csv(defects: Sequence[dict], path: str | Path) -> Path:
    """Write :func:`locate_defects` rows to a CSV with the columns :data:`DEFECT_COLUMNS`."""
    path = Path(path)
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=DEFECT_COLUMNS, lineterminator="\n")
        writer.writeheader()
        for row in defects:
            writer.writerow({k: (f"{v:.6g}" if isinstance(v, float) else v)
                             for k, v in row.items()})
    return path


def site_coordination(pattern: SitePattern) -> np.ndarray:
    """Delaunay coordination of every site (via :func:`topoclass.order.coordination`).

    Uses the pattern's own triangulation (:attr:`SitePattern.delaunay`), which the order
    measures have usually built already.
    """
    from topoclass.order import coordination

    if pattern.n_sites < 3:
        return np.zeros(pattern.n_sites, dtype=np.int64)
    tri = pattern.delaunay
    neighbours = (tri.indptr, tri.indices) if tri is not None else None
    return np.asarray(coordination(pattern.xy, neighbours), dtype=np.int64)


def image_to_figure_pixels(shape: tuple[int, int]) -> tuple[float, int]:
    """Scale factor and legend-strip height (pixels) of the image pictures.

    Image pixel ``(x, y)`` (x right, y down; pixel centres at integers) lands on picture pixel
    ``(scale * (x + 0.5), scale * (y + 0.5))``; the legend strip lies below the image.
    """
    rows, cols = int(shape[0]), int(shape[1])
    scale = float(np.clip(_FIGURE_PX / max(rows, cols), 0.25, 4.0))
    return scale, 60


# --------------------------------------------------------------------------------------------
# Training and validation figures
# --------------------------------------------------------------------------------------------


def plot_confusion(metrics: dict, *, title: str = "Confusion matrix") -> Figure:
    """Confusion matrix of a metrics dict (``topoclass.model.metrics_from_probabilities``)."""
    classes = [str(c) for c in metrics["classes"]]
    cm = np.asarray(metrics["confusion_matrix"], dtype=float)
    side = 1.2 + 0.9 * len(classes)
    fig = Figure(figsize=(side + 1.2, side), dpi=100, layout="constrained")
    ax = fig.subplots()
    with np.errstate(invalid="ignore", divide="ignore"):
        share = cm / cm.sum(axis=1, keepdims=True)
    im = ax.imshow(np.nan_to_num(share), cmap="cividis", vmin=0, vmax=1)
    for r in range(len(classes)):
        for c in range(len(classes)):
            light = np.nan_to_num(share[r, c]) > 0.6
            ax.text(c, r, f"{int(cm[r, c])}", ha="center", va="center", fontsize=9,
                    color="black" if light else "white")
    ax.set(xticks=range(len(classes)), yticks=range(len(classes)), xticklabels=classes,
           yticklabels=classes, xlabel="predicted class", ylabel="true class", title=title)
    ax.tick_params(axis="x", labelrotation=30)
    fig.colorbar(im, ax=ax, label="share of the true class", shrink=0.8)
    return fig


def plot_reliability(metrics: dict, *, title: str = "Reliability (top-label confidence)"
                     ) -> Figure:
    """Reliability diagram of the top-label confidence with the number of images per bin."""
    table = metrics["reliability"]["top_label"]
    lower = np.array([r["lower"] for r in table])
    upper = np.array([r["upper"] for r in table])
    count = np.array([r["count"] for r in table])
    conf = np.array([r["confidence"] for r in table], dtype=float)
    acc = np.array([r["accuracy"] for r in table], dtype=float)
    fig = Figure(figsize=(5.2, 5.6), dpi=100, layout="constrained")
    ax, ax_n = fig.subplots(2, 1, height_ratios=(3, 1), sharex=True)
    ax.plot([0, 1], [0, 1], color="0.4", lw=0.8, ls="--", label="perfect calibration")
    filled = count > 0
    ax.bar(lower[filled], acc[filled], width=(upper - lower)[filled], align="edge",
           color=CLASS_COLOURS[0], alpha=0.35, edgecolor=CLASS_COLOURS[0], label="accuracy")
    ax.plot(conf[filled], acc[filled], "o-", color=CLASS_COLOURS[5], ms=5,
            label="accuracy at mean confidence")
    ax.set(xlim=(0, 1), ylim=(0, 1.02), ylabel="accuracy",
           title=f"{title}\nECE {metrics.get('ece', float('nan')):.3f}, "
                 f"{metrics.get('n_samples', int(count.sum()))} images")
    ax.legend(fontsize=7, loc="upper left")
    ax_n.bar(lower, count, width=upper - lower, align="edge", color="0.55", edgecolor="0.3")
    for lo, hi, n in zip(lower, upper, count, strict=True):
        if n:
            ax_n.text(0.5 * (lo + hi), n, str(int(n)), ha="center", va="bottom", fontsize=7)
    ax_n.set(xlabel="top-label confidence", ylabel="images",
             ylim=(0, max(int(count.max()), 1) * 1.25))
    return fig


def plot_per_class(metrics: dict, *, title: str = "Per class") -> Figure:
    """Precision and recall of each class as paired bars, with the image counts."""
    classes = [str(c) for c in metrics["classes"]]
    per = metrics["per_class"]
    x = np.arange(len(classes))
    fig = Figure(figsize=(1.6 + 1.1 * len(classes), 3.8), dpi=100, layout="constrained")
    ax = fig.subplots()
    prec = [per[c]["precision"] for c in classes]
    rec = [per[c]["recall"] for c in classes]
    ax.bar(x - 0.2, prec, 0.4, color=CLASS_COLOURS[0], label="precision")
    ax.bar(x + 0.2, rec, 0.4, color=CLASS_COLOURS[1], label="recall")
    labels = [f"{c}\n({per[c]['support']} images)" for c in classes]
    ax.set(xticks=x, xticklabels=labels, ylim=(0, 1.1), ylabel="score", title=title)
    ax.legend(fontsize=8, loc="lower right")
    return fig


def feature_importance(model, X, y, *, n_repeats: int = 3, seed: int = 0,
                       grouped: bool = False) -> dict:
    """Permutation importance of the model's feature columns (log-loss), readable names.

    The raw inputs are per-image records, so whole feature columns only exist after the
    feature step. Each calibrated member of the ensemble has its own fitted feature step;
    column ``j`` is permuted the same way in every member's transformed matrix and the rest of
    each member's pipeline (imputation, scaling, classifier, calibrator) scores the result,
    averaged over the members as the model itself averages them. The permutations, repeats
    and scoring are those of :func:`sklearn.inspection.permutation_importance` (Breiman 2001),
    which is called on a matrix of row indices that picks the permuted values.

    Parameters
    ----------
    model : TrainedModel or fitted scikit-learn classifier
        A :class:`~topoclass.model.TrainedModel` (its ``estimator``), a fitted
        ``CalibratedClassifierCV`` over a pipeline whose first step is the feature step, or
        such a pipeline itself.
    X, y
        Training inputs (as the feature step takes them) and labels.
    n_repeats, seed
        Permutations per column and their seed.
    grouped : bool
        Permute whole feature families together (:func:`feature_family`: every pixel of the H1
        persistence image, every point of one landscape or Betti curve) instead of single
        columns. Neighbouring pixels of a persistence image are strongly correlated, and the
        permutation importance of one column of a correlated block is close to zero even when
        the block matters (the scikit-learn user guide warns of this); a family is also what
        a person can act on. It is also far cheaper: tens of families instead of hundreds of
        columns.

    Returns
    -------
    dict with ``names`` (feature names), ``importances_mean``, ``importances_std`` and
    ``importances`` (n_features, n_repeats): drop of the negative log-loss when the column is
    permuted (larger = more important), ``baseline_log_loss``.
    """
    from sklearn.inspection import permutation_importance

    # A TrainedModel wraps the fitted estimator; a CalibratedClassifierCV's own ``estimator``
    # is its unfitted template, so it is used as it stands.
    fitted = hasattr(model, "calibrated_classifiers_") or hasattr(model, "steps")
    estimator = model if fitted else model.estimator
    members = getattr(estimator, "calibrated_classifiers_", None)
    if members is None:
        pipes, rests = [estimator], [estimator[1:]]
    else:
        pipes = [m.estimator for m in members]
        rests = []
        for m in members:
            rest = copy.copy(m)
            rest.estimator = m.estimator[1:]
            rests.append(rest)
    mats = [_feature_matrix(p, X) for p in pipes]
    names = _feature_names(pipes[0], mats[0].shape[1])
    if any(m.shape != mats[0].shape for m in mats):
        raise TopoclassError("the calibrated members give feature matrices of different "
                             "shapes; permutation importance needs one set of columns")
    column_group = np.arange(mats[0].shape[1])
    if grouped:
        families = [feature_family(n) for n in names]
        unique = list(dict.fromkeys(families))
        column_group = np.array([unique.index(f) for f in families])
        names = unique
    wrapper = _PermutedColumns(mats, rests, estimator.classes_, column_group)
    index = np.repeat(np.arange(mats[0].shape[0])[:, None], len(names), axis=1)
    result = permutation_importance(wrapper, index, np.asarray(y), scoring="neg_log_loss",
                                    n_repeats=n_repeats, random_state=seed)
    baseline = -_neg_log_loss(wrapper, index, np.asarray(y))
    return {"names": names, "importances_mean": result.importances_mean,
            "importances_std": result.importances_std, "importances": result.importances,
            "baseline_log_loss": baseline}


def feature_family(name: str) -> str:
    """The family of a feature name: the name without its grid coordinates.

    ``h1_pimage_b0.95_p0.30`` → ``h1_pimage``; ``h1_landscape_k2_t0.85`` → ``h1_landscape_k2``;
    ``betti1_t1.20`` → ``betti1``; a barcode statistic or order measure is its own family.
    """
    parts = name.split("_")
    while len(parts) > 1 and re.fullmatch(r"[btp]-?\d+(\.\d+)?", parts[-1]):
        parts.pop()
    return "_".join(parts)


def plot_importance(importance: dict, *, top: int = 15,
                    title: str = "Most important features (permutation, log-loss)") -> Figure:
    """Horizontal bars of the ``top`` largest permutation importances, with their spread."""
    mean = np.asarray(importance["importances_mean"])
    std = np.asarray(importance["importances_std"])
    order = np.argsort(-mean, kind="stable")[:top]
    names = [str(importance["names"][k]) for k in order]
    fig = Figure(figsize=(7.5, 1.2 + 0.3 * len(order)), dpi=100, layout="constrained")
    ax = fig.subplots()
    y = np.arange(len(order))[::-1]
    ax.barh(y, mean[order], xerr=std[order], color=CLASS_COLOURS[0], ecolor="0.3",
            capsize=2)
    ax.set(yticks=y, yticklabels=names, xlabel="increase of the log-loss when permuted",
           title=title)
    ax.axvline(0, color="0.3", lw=0.6)
    ax.tick_params(axis="y", labelsize=8)
    return fig


def write_metric_figures(metrics: dict, out: str | Path, *, prefix: str = "",
                         title: str = "") -> list[Path]:
    """Write the confusion matrix, reliability diagram and per-class bars (PNG and SVG).

    File names: ``<prefix>confusion.png``, ``<prefix>reliability.png``,
    ``<prefix>per_class.png`` (each also as ``.svg``). Returns the PNG paths.
    """
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    lead = f"{title}: " if title else ""
    figures = {
        "confusion": plot_confusion(metrics, title=f"{lead}confusion matrix"),
        "reliability": plot_reliability(metrics, title=f"{lead}reliability"),
        "per_class": plot_per_class(metrics, title=f"{lead}precision and recall"),
    }
    paths = []
    for name, fig in figures.items():
        path = out / f"{prefix}{name}.png"
        _save(fig, path, svg=True)
        paths.append(path)
    return paths


def write_training_figures(model, out: str | Path, X=None, y=None, *, top: int = 15,
                           n_repeats: int = 3, seed: int = 0) -> list[Path]:
    """Cross-validation figures of a trained model, and its feature importance when X, y given.

    Writes ``cv_confusion``, ``cv_reliability``, ``cv_per_class`` and ``importance`` (PNG and
    SVG) and ``importance.csv`` (every feature, by decreasing importance). Returns the PNG and
    CSV paths.
    """
    out = Path(out)
    paths = write_metric_figures(model.cv_report.metrics, out, prefix="cv_",
                                 title="cross-validation")
    if X is not None and y is not None:
        imp = feature_importance(model, X, y, n_repeats=n_repeats, seed=seed, grouped=True)
        fig = plot_importance(imp, top=top)
        _save(fig, out / "importance.png", svg=True)
        csv_path = out / "importance.csv"
        order = np.argsort(-imp["importances_mean"], kind="stable")
        with open(csv_path, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh, lineterminator="\n")
            w.writerow(["feature", "importance_mean", "importance_std"])
            for k in order:
                w.writerow([imp["names"][k], f"{imp['importances_mean'][k]:.6g}",
                            f"{imp['importances_std'][k]:.6g}"])
        paths += [out / "importance.png", csv_path]
    return paths


# --------------------------------------------------------------------------------------------
# HTML batch report
# --------------------------------------------------------------------------------------------


def write_batch_report(scores_csv: str | Path, out_html: str | Path | None = None, *,
                       model=None, details: int = MAX_DETAILS,
                       thumbnails: int = MAX_THUMBNAILS, progress: bool = False) -> Path:
    """Write one self-contained HTML page for a ``scores.csv``.

    The page (no network access needed: inline CSS, inline JavaScript, images embedded or in
    the sibling folder ``report_files/``) has the counts per class, the failed and unfamiliar
    images first, then a table sortable by clicking a header — by each class probability and
    each order measure — with a thumbnail, the predicted class, a bar per class probability,
    the unfamiliar flag and a link to a detail view (site overlay, persistence diagram, defect
    map) made by measuring the image again. The caution of :data:`topoclass.scoring.CAUTION`
    is on the page.

    Parameters
    ----------
    scores_csv : path
        A file written by :func:`topoclass.scoring.score_images` (a partly written file from
        a killed run is fine).
    out_html : path, optional
        Default: ``report.html`` beside ``scores_csv``.
    model : TrainedModel, optional
        Supplies the site-finding settings of the detail views and the model's name.
    details : int
        Detail views for at most this many images (unfamiliar ones first, then in file order).
    thumbnails : int
        Embedded thumbnails for at most this many images.
    progress : bool
        Show a progress bar while the images are read.

    Returns
    -------
    Path of the HTML file.
    """
    from topoclass.scoring import CAUTION, MEASURE_COLUMNS, read_scores

    scores_csv = Path(scores_csv)
    if not scores_csv.is_file():
        raise TopoclassError(f"{scores_csv}: no such scores file; give the CSV written by "
                             "`topoclass score`")
    try:
        rows = read_scores(scores_csv)
        header = _csv_header(scores_csv)
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise TopoclassError(f"{scores_csv}: cannot be read as a scores file ({exc}); give the "
                             "CSV written by `topoclass score`") from None
    if "image" not in header or "status" not in header:
        raise TopoclassError(f"{scores_csv}: has no image/status columns; give the CSV written "
                             "by `topoclass score`")
    classes = [c[2:] for c in header if c.startswith("p_")]
    measures = [c for c in MEASURE_COLUMNS if c in header]
    out_html = Path(out_html) if out_html is not None else scores_csv.with_name("report.html")
    out_html.parent.mkdir(parents=True, exist_ok=True)
    files = out_html.parent / "report_files"
    base = scores_csv.parent

    ok = [r for r in rows if r.get("status") == "ok"]
    unfamiliar = [r for r in ok if r.get("unfamiliar") == "yes"]
    failed = [r for r in rows if r.get("status") != "ok"]
    # Detail views: unfamiliar images first (they are the ones to check by eye), then the rest.
    detail_order = unfamiliar + [r for r in ok if r.get("unfamiliar") != "yes"]
    detail_ids = {id(r) for r in detail_order[:max(details, 0)]}
    settings = _settings_of(model)

    thumbs: dict[int, str] = {}
    links: dict[int, str] = {}
    todo = sum(1 for n, r in enumerate(rows) if n < thumbnails or id(r) in detail_ids)
    bar = progress_bar(todo, "report") if progress else None
    advance = bar.__enter__() if bar is not None else (lambda: None)
    try:
        for n, row in enumerate(rows):
            in_thumbs = n < thumbnails
            wants_detail = id(row) in detail_ids
            if not (in_thumbs or wants_detail):
                continue
            path = _image_path(row["image"], base)
            if in_thumbs:
                thumbs[n] = _thumbnail(path, settings)
            if wants_detail:
                page = _detail_view(path, row, n, files, out_html, settings, classes, CAUTION)
                if page:
                    links[n] = page
            advance()
    finally:
        if bar is not None:
            bar.__exit__(None, None, None)

    # As in the scoring summary: an unfamiliar image's class is not counted with the rest.
    counts = Counter(r.get("predicted", "") for r in ok if r.get("unfamiliar") != "yes")
    page = _report_page(
        scores_csv=scores_csv, rows=rows, classes=classes, measures=measures, counts=counts,
        failed=failed, unfamiliar=unfamiliar, thumbs=thumbs, links=links, details=details,
        thumbnails=thumbnails, model=model, caution=CAUTION,
    )
    tmp = out_html.with_name(out_html.name + ".tmp")
    tmp.write_text(page, encoding="utf-8")
    tmp.replace(out_html)
    return out_html


# --------------------------------------------------------------------------------------------
# private helpers: pictures
# --------------------------------------------------------------------------------------------


def _image_figure(image: np.ndarray, *, legend_rows: int = 1):
    """A figure whose top holds the image pixel for pixel (times ``scale``), a legend below."""
    image = np.asarray(image, dtype=float)
    rows, cols = image.shape
    scale, strip = image_to_figure_pixels(image.shape)
    dpi = 100
    width, height = cols * scale, rows * scale + strip * legend_rows
    fig = Figure(figsize=(width / dpi, height / dpi), dpi=dpi)
    ax = fig.add_axes((0, (strip * legend_rows) / height, 1, rows * scale / height))
    ax.imshow(image, cmap="gray", vmin=0, vmax=1, interpolation="nearest",
              extent=(-0.5, cols - 0.5, rows - 0.5, -0.5))
    ax.set_xlim(-0.5, cols - 0.5)
    ax.set_ylim(rows - 0.5, -0.5)
    ax.set_axis_off()
    return fig, ax, scale


def _marker_area(diameter_px: float, fraction: float) -> float:
    """Scatter marker area (points²) of a disc ``fraction`` of ``diameter_px`` across."""
    points = max(diameter_px * fraction, 2.0) * 72.0 / 100.0
    return points**2


def _circle(centre, radius, colour, lw):
    from matplotlib.patches import Circle

    return Circle(centre, radius, fill=False, edgecolor=colour, lw=lw)


def _coordination_class(coord: np.ndarray) -> np.ndarray:
    labels = np.where(coord <= 4, "≤4", np.where(coord >= 8, "≥8", coord.astype(str)))
    return labels


def _save(fig: Figure, path: Path, *, svg: bool = False) -> None:
    fig.savefig(path, dpi=fig.dpi)
    if svg:
        fig.savefig(path.with_suffix(".svg"))


def _defect_row(kind, rank, birth, death, xy, i, j, truncated, how) -> dict:
    return {"kind": kind, "rank": int(rank), "length": float(death - birth),
            "birth": float(birth), "death": float(death), "x": float(xy[0]), "y": float(xy[1]),
            "site_i": int(i), "site_j": int(j), "truncated": int(truncated), "located_by": how}


def _empty_circles(pts: np.ndarray, border: np.ndarray, limit: float) -> list[np.ndarray]:
    """Centres of the largest empty circles among the interior Delaunay triangles."""
    if pts.shape[0] < 3:
        return []
    try:
        tri = Delaunay(pts)
    except QhullError:
        return []
    simplices = tri.simplices[~np.any(border[tri.simplices], axis=1)]
    if simplices.shape[0] == 0:
        return []
    centres, radii = _circumcircles(pts[simplices])
    order = np.argsort(-radii, kind="stable")
    chosen: list[np.ndarray] = []
    for k in order:
        if radii[k] < 0.5 * limit:  # a hole that a limit-wide triangle would have filled
            break
        if all(np.hypot(*(centres[k] - c)) >= limit for c in chosen):
            chosen.append(centres[k])
    return chosen


def _circumcircles(tri: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    a, b, c = tri[:, 0], tri[:, 1], tri[:, 2]
    bx, by = b[:, 0] - a[:, 0], b[:, 1] - a[:, 1]
    cx, cy = c[:, 0] - a[:, 0], c[:, 1] - a[:, 1]
    d = 2 * (bx * cy - by * cx)
    d = np.where(np.abs(d) < 1e-12, np.nan, d)
    ux = (cy * (bx**2 + by**2) - by * (cx**2 + cy**2)) / d
    uy = (bx * (cx**2 + cy**2) - cx * (bx**2 + by**2)) / d
    centres = np.column_stack([ux + a[:, 0], uy + a[:, 1]])
    radii = np.nan_to_num(np.hypot(ux, uy), nan=0.0)
    return centres, radii


# --------------------------------------------------------------------------------------------
# private helpers: permutation importance
# --------------------------------------------------------------------------------------------


def _feature_matrix(pipe, X) -> np.ndarray:
    step = pipe.steps[0][1]
    if step is None or (isinstance(step, str) and step == "passthrough"):
        return np.asarray(X, dtype=np.float64)
    return np.asarray(step.transform(X), dtype=np.float64)


def _feature_names(pipe, n: int) -> list[str]:
    step = pipe.steps[0][1]
    try:
        names = step.get_feature_names_out()
    except (AttributeError, TypeError, ValueError):
        names = None
    if names is None or len(names) != n:
        return [f"x{k}" for k in range(n)]
    return [str(v) for v in names]


class _PermutedColumns:
    """A fitted classifier over a matrix of row indices: column ``j`` of the input picks the
    rows of column ``j`` of every member's transformed feature matrix."""

    _estimator_type = "classifier"

    def __init__(self, mats, rests, classes, column_group=None):
        self.mats, self.rests, self.classes_ = mats, rests, np.asarray(classes)
        # Input column g permutes every feature column c with column_group[c] == g.
        width = mats[0].shape[1]
        self.column_group = np.arange(width) if column_group is None else column_group

    def __sklearn_tags__(self):
        from sklearn.utils import ClassifierTags, Tags, TargetTags

        return Tags(estimator_type="classifier", target_tags=TargetTags(required=True),
                    classifier_tags=ClassifierTags())

    def fit(self, X, y=None):  # pragma: no cover - never refitted; present for the API
        return self

    def get_params(self, deep=True):  # scikit-learn's scorers may ask
        return {}

    def predict_proba(self, index) -> np.ndarray:
        index = np.asarray(index).astype(np.int64)[:, self.column_group]
        cols = np.arange(index.shape[1])[None, :]
        total = None
        for mat, rest in zip(self.mats, self.rests, strict=True):
            proba = rest.predict_proba(mat[index, cols])
            total = proba if total is None else total + proba
        return total / len(self.mats)

    def predict(self, index) -> np.ndarray:
        return self.classes_[np.argmax(self.predict_proba(index), axis=1)]


def _neg_log_loss(model, X, y) -> float:
    from sklearn.metrics import get_scorer

    return float(get_scorer("neg_log_loss")(model, X, y))


# --------------------------------------------------------------------------------------------
# private helpers: HTML
# --------------------------------------------------------------------------------------------


def _csv_header(path: Path) -> list[str]:
    with open(path, newline="", encoding="utf-8") as fh:
        return next(csv.reader(fh), [])


def _settings_of(model):
    from dataclasses import fields

    from topoclass.features import FeatureSettings

    stored = dict(getattr(model, "settings", {}).get("features", {})) if model is not None else {}
    known = {f.name for f in fields(FeatureSettings)}
    return FeatureSettings(**{k: v for k, v in stored.items() if k in known})


def _image_path(image: str, base: Path) -> Path:
    path = Path(image)
    return path if path.is_absolute() or path.exists() else base / path


def _thumbnail(path: Path, settings) -> str:
    """A small grey PNG of the image as a data URI, or '' when the file cannot be read."""
    from PIL import Image

    from topoclass.images import read_micrograph

    try:
        image = read_micrograph(path, max_pixels=settings.max_pixels).image
    except Exception:  # a failed row's file: no thumbnail, the row says why
        return ""
    im = Image.fromarray(np.clip(image * 255 + 0.5, 0, 255).astype(np.uint8))
    im.thumbnail((_THUMB_PX, _THUMB_PX), Image.Resampling.LANCZOS)
    buf = io.BytesIO()
    im.save(buf, format="PNG", optimize=True)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _detail_view(path, row, n, files: Path, out_html: Path, settings, classes, caution) -> str:
    """Measure the image again, write its pictures and a small page; return the page link."""
    from topoclass.features import measure_image

    key = (row.get("sha256") or "")[:12] or f"{n:05d}"
    folder = files / f"{n:05d}-{key}"
    pictures = ["overlay.png", "diagram.png", "defects.png"]
    if not all((folder / p).is_file() for p in pictures):
        try:
            m = measure_image(path, settings)
            write_inspection_figures(m.micrograph.image, m.pattern, m.texture.diagrams, folder)
        except Exception as exc:  # the batch report never stops for one image
            folder.mkdir(parents=True, exist_ok=True)
            (folder / "error.txt").write_text(" ".join(str(exc).split()), encoding="utf-8")
            return ""
    probs = "".join(
        f"<tr><td>{html.escape(c)}</td><td>{_num(row.get('p_' + c))}</td></tr>" for c in classes
    )
    body = (
        f"<h1>{html.escape(Path(row['image']).name)}</h1>"
        f"<p class='path'>{html.escape(row['image'])}</p>"
        f"<p>predicted <b>{html.escape(row.get('predicted', ''))}</b>, confidence "
        f"{_num(row.get('confidence'))}; unfamiliar: {html.escape(row.get('unfamiliar', ''))}"
        f"{' — ' + html.escape(row['message']) if row.get('message') else ''}</p>"
        f"<table class='small'><tr><th>class</th><th>probability</th></tr>{probs}</table>"
        "<h2>Sites by Delaunay coordination</h2><img src='overlay.png' alt='site overlay'>"
        "<h2>Persistence diagram and barcode</h2><img src='diagram.png' alt='diagram'>"
        "<h2>Defect map</h2><img src='defects.png' alt='defect map'>"
        "<p><a href='defects.csv'>defects.csv</a> — the places drawn above.</p>"
        f"<p class='caution'>{html.escape(caution)}</p>"
        f"<p><a href='../{html.escape(out_html.name)}'>back to the report</a></p>"
    )
    (folder / "index.html").write_text(_page(f"topoclass — {Path(row['image']).name}", body),
                                       encoding="utf-8")
    return f"{files.name}/{folder.name}/index.html"


def _num(value, digits: int = 3) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return ""
    return f"{v:.{digits}f}" if math.isfinite(v) else ""


def _short(value) -> str:
    """Four significant digits, integers without a decimal point."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return ""
    if not math.isfinite(v):
        return ""
    return f"{int(v)}" if v == int(v) and abs(v) < 1e9 else f"{v:.4g}"


def _sort_value(value) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return ""
    return repr(v) if math.isfinite(v) else ""


def _report_page(*, scores_csv, rows, classes, measures, counts, failed, unfamiliar, thumbs,
                 links, details, thumbnails, model, caution) -> str:
    colour = {c: CLASS_COLOURS[k % len(CLASS_COLOURS)] for k, c in enumerate(classes)}
    esc = html.escape
    parts = [f"<h1>topoclass batch report</h1><p class='path'>{esc(str(scores_csv))}</p>"]
    if model is not None:
        parts.append(f"<p>model: {esc(str(getattr(model, 'feature_set_name', '')))} + "
                     f"{esc(str(getattr(model, 'classifier', '')))}</p>")
    parts.append(f"<p class='caution'><b>Caution.</b> {esc(caution)}</p>")
    n_ok = len(rows) - len(failed)
    summary = "".join(
        f"<tr><td><span class='dot' style='background:{colour[c]}'></span>{esc(c)}</td>"
        f"<td class='n'>{counts.get(c, 0)}</td></tr>" for c in classes
    )
    parts.append(
        "<h2>Summary</h2><table class='small' id='summary'><tr><th>predicted class</th>"
        f"<th>images</th></tr>{summary}"
        f"<tr><td>unfamiliar (check by eye; not counted above)</td>"
        f"<td class='n'>{len(unfamiliar)}</td></tr>"
        f"<tr><td>failed</td><td class='n'>{len(failed)}</td></tr>"
        f"<tr><th>scored</th><th class='n'>{n_ok}</th></tr></table>"
    )
    index = {id(r): n for n, r in enumerate(rows)}
    if failed or unfamiliar:
        items = []
        for r in failed:
            message = r.get("message", "") or "no message"
            if not message.startswith(r["image"]):
                message = f"{r['image']}: {message}"
            items.append(f"<li class='failed'><b>failed</b> {esc(message)}</li>")
        for r in unfamiliar:
            n = index[id(r)]
            link = (f" — <a href='{esc(links[n])}'>detail</a>" if n in links else "")
            items.append(f"<li class='unfamiliar'><b>unfamiliar</b> {esc(r['image'])} "
                         f"(predicted {esc(r.get('predicted', ''))}){link}: "
                         f"{esc(r.get('message', ''))}</li>")
        parts.append("<h2>Look at these first</h2><ul id='attention'>" + "".join(items)
                     + "</ul>")
    notes = []
    if len(rows) > thumbnails:
        notes.append(f"thumbnails for the first {thumbnails} of {len(rows)} images")
    notes.append(f"detail views for at most {details} images (unfamiliar ones first)")
    parts.append("<h2>All images</h2><p class='note'>Click a column header to sort; click "
                 "again to reverse. " + "; ".join(notes).capitalize() + ".</p>")
    head = ["<th data-type='num'>#</th><th>image</th><th data-type='text'>predicted</th>"]
    head += [f"<th data-type='num' class='p'>p {esc(c)}</th>" for c in classes]
    head += ["<th data-type='text'>unfamiliar</th>"]
    head += [f"<th data-type='num'>{esc(m)}</th>" for m in measures]
    head += ["<th>detail / message</th>"]
    body = []
    for n, r in enumerate(rows):
        ok = r.get("status") == "ok"
        thumb = thumbs.get(n, "")
        img = (f"<img class='thumb' src='{thumb}' alt='thumbnail'>" if thumb else "")
        cells = [f"<td data-value='{n}' class='n'>{n + 1}</td>",
                 f"<td class='image'>{img}<span>{esc(Path(r['image']).name)}</span></td>"]
        pred = r.get("predicted", "") if ok else "failed"
        cells.append(f"<td data-value='{esc(pred)}'>{esc(pred)}</td>")
        for c in classes:
            v = _sort_value(r.get(f"p_{c}")) if ok else ""
            width = f"{100 * float(v):.1f}" if v else "0"
            cells.append(
                f"<td data-value='{v}' class='p'><div class='bar'><span style='width:{width}%;"
                f"background:{colour[c]}'></span></div><small>{_num(v, 2)}</small></td>"
            )
        flag = r.get("unfamiliar", "") if ok else ""
        cells.append(f"<td data-value='{esc(flag)}' class='{'flag' if flag == 'yes' else ''}'>"
                     f"{esc(flag)}</td>")
        for m in measures:
            v = _sort_value(r.get(m))
            cells.append(f"<td data-value='{v}' class='n'>{_short(v)}</td>")
        if ok:
            last = f"<a href='{esc(links[n])}'>detail</a>" if n in links else ""
            if r.get("message"):
                last += f" <small>{esc(r['message'])}</small>"
        else:
            last = f"<span class='msg'>{esc(r.get('message', ''))}</span>"
        cells.append(f"<td>{last}</td>")
        klass = "failed" if not ok else ("unfamiliar" if flag == "yes" else "")
        body.append(f"<tr class='{klass}'>" + "".join(cells) + "</tr>")
    parts.append("<table id='scores' class='sortable'><thead><tr>" + "".join(head)
                 + "</tr></thead><tbody>" + "".join(body) + "</tbody></table>")
    parts.append(f"<p class='note'>Made by topoclass from {esc(scores_csv.name)}. Order "
                 "measures: persistence values in units of the site spacing.</p>")
    return _page("topoclass batch report", "".join(parts), script=_SORT_SCRIPT)


def _page(title: str, body: str, *, script: str = "") -> str:
    return (
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
        "<meta name='viewport' content='width=device-width, initial-scale=1'>"
        "<link rel='icon' href='data:,'>"
        f"<title>{html.escape(title)}</title><style>{_STYLE}</style></head><body>"
        f"{body}" + (f"<script>{script}</script>" if script else "") + "</body></html>\n"
    )


_STYLE = """
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,sans-serif;margin:1.5em;color:#222}
h1{font-size:1.4em}h2{font-size:1.15em;margin-top:1.4em}
.path,.note{color:#555;font-size:.9em}
.caution{background:#fff6e0;border-left:4px solid #E69F00;padding:.5em .8em;max-width:60em}
table{border-collapse:collapse;font-size:.85em}
th,td{border-bottom:1px solid #ddd;padding:3px 6px;text-align:left;vertical-align:middle}
th{background:#f2f2f2;position:sticky;top:0}
table.sortable th[data-type]{cursor:pointer;user-select:none}
table.sortable th[data-type]:after{content:' \\2195';color:#999}
table.sortable th.asc:after{content:' \\2191';color:#000}
table.sortable th.desc:after{content:' \\2193';color:#000}
td.n{text-align:right;font-variant-numeric:tabular-nums}
.bar{width:70px;height:9px;background:#eee;display:inline-block;margin-right:4px}
.bar span{display:block;height:100%}
.dot{display:inline-block;width:.8em;height:.8em;border-radius:50%;margin-right:.4em}
img.thumb{width:48px;height:auto;vertical-align:middle;margin-right:6px;image-rendering:auto}
tr.failed{background:#fde8e0}tr.unfamiliar{background:#fff6e0}
td.flag{font-weight:bold;color:#a04000}.msg{color:#a03000}
li.failed{color:#a03000}
img{max-width:100%}
"""

# Sorts the rows of every table.sortable by the data-value of the clicked column: numbers
# numerically (empty cells last), text alphabetically; a second click reverses.
_SORT_SCRIPT = """
(function(){
  document.querySelectorAll('table.sortable').forEach(function(table){
    var heads = table.tHead.rows[0].cells;
    Array.prototype.forEach.call(heads, function(th, col){
      if(!th.dataset.type){return;}
      th.addEventListener('click', function(){
        var asc = !th.classList.contains('asc');
        Array.prototype.forEach.call(heads, function(h){h.classList.remove('asc','desc');});
        th.classList.add(asc ? 'asc' : 'desc');
        var body = table.tBodies[0];
        var rows = Array.prototype.slice.call(body.rows);
        var num = th.dataset.type === 'num';
        rows.sort(function(a, b){
          var x = a.cells[col].dataset.value, y = b.cells[col].dataset.value;
          if(x === '' && y === ''){return 0;}
          if(x === ''){return 1;}
          if(y === ''){return -1;}
          var c = num ? parseFloat(x) - parseFloat(y) : x.localeCompare(y);
          return asc ? c : -c;
        });
        rows.forEach(function(r){body.appendChild(r);});
      });
    });
  });
})();
"""
