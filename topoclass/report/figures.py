"""See what the model sees: the figures (matplotlib, Agg).

The last stage of the pipeline; it may read every stage to its left and draws what they made:

* inspection pictures of one micrograph — the sites coloured by their Delaunay coordination
  (:func:`plot_sites`), the persistence diagram and barcode (:func:`plot_diagrams`) and the
  defect map, where the H1 loops and wide H0 gaps above a noise floor sit on the image
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

import csv
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from topoclass.defects import defect_counts, locate_defects, write_defects_csv
from topoclass.order import coordination_class, site_coordination
from topoclass.persistence import Diagrams
from topoclass.report.importance import feature_importance
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


_FIGURE_PX = 800  # longest side of the image panel of the inspection pictures


#: The defect map draws at most this many defects of each kind (the longest); the CSV has all.
#: Beyond about this many circles on an 800-pixel picture they cover each other.
MAX_DRAWN_DEFECTS = 150


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
    handles = _show_region(ax, pattern)
    for label, colour in COORDINATION_COLOURS.items():
        members = coordination_class(coord) == label
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


def diagram_and_barcode_figure(diagrams: Diagrams) -> Figure:
    """Lifetime diagram of H0 and H1 (spacing units) beside the barcode.

    The diagram plots each bar at (birth, persistence), the coordinates in which persistence
    images are built, so that distance from the floor is distance from the noise. H0 bars are
    all born at 0 and form the column on the left; the radius limit is the falling line
    ``persistence = limit - birth``, and H1 bars cut there are drawn as triangles on it.
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
    life0 = h0[:, 1] - h0[:, 0] if h0.size else np.empty(0)
    life1 = h1[:, 1] - h1[:, 0] if h1.size else np.empty(0)
    ax_d.set_facecolor("#f7f7f4")
    ax_d.grid(color="white", lw=1.0)
    ax_d.set_axisbelow(True)
    ax_d.plot([0, limit], [limit, 0], color="0.35", ls=(0, (4, 2)), lw=0.9,
              label=f"radius limit {limit:g}")
    ax_d.scatter(np.zeros_like(life0), life0, s=26, marker="_", c=DEFECT_COLOURS["h0"],
                 linewidths=1.4, label=f"H0 ({len(h0)})")
    ax_d.scatter(h1[~cut, 0], life1[~cut], s=16, marker="D", c=DEFECT_COLOURS["h1"],
                 edgecolors="white", linewidths=0.3, label=f"H1 ({int(np.count_nonzero(~cut))})")
    if cut.any():
        ax_d.scatter(h1[cut, 0], life1[cut], s=30, marker="^", c=DEFECT_COLOURS["h1"],
                     edgecolors="black", linewidths=0.5,
                     label=f"H1 cut at the limit ({int(cut.sum())})")
    ax_d.set(xlim=(-0.04 * top, top), ylim=(-0.02 * top, top),
             xlabel="birth (spacings)", ylabel="persistence = death - birth (spacings)",
             title="Lifetime diagram")
    for side in ("top", "right"):
        ax_d.spines[side].set_visible(False)
    ax_d.legend(fontsize=7, loc="upper right", frameon=False)

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


def plot_defects(image: np.ndarray, pattern: SitePattern, defects: Sequence[dict], *,
                 max_drawn: int = MAX_DRAWN_DEFECTS, ranked: int = 10) -> Figure:
    """The defect map: :func:`locate_defects` output drawn on the micrograph.

    H1 loops are circles whose radius is half the bar length (in pixels) with the placing edge
    drawn; H0 merges are their minimum-spanning-tree edges with a small circle at the midpoint,
    sized the same way. At most ``max_drawn`` of each kind are drawn (the longest); the legend
    gives how many were found above the noise floor and says when the drawing is capped. The
    ``ranked`` longest loops carry their rank (the ``rank`` column of ``defects.csv``).
    """
    if max_drawn < 0 or ranked < 0:
        raise ValueError(f"max_drawn and ranked must be >= 0, not {max_drawn!r}, {ranked!r}")
    fig, ax, scale = _image_figure(image, legend_rows=1)
    ax.scatter(pattern.xy[:, 0], pattern.xy[:, 1], s=_marker_area(pattern.spacing * scale, 0.12),
               c="white", edgecolors="black", linewidths=0.2, alpha=0.6)
    spacing = pattern.spacing
    xy = pattern.xy
    drawn = {"h1": 0, "h0": 0}
    for row in defects:  # rows come longest first within each kind
        kind = row["kind"]
        if drawn[kind] >= max_drawn:
            continue
        drawn[kind] += 1
        colour = DEFECT_COLOURS[kind]
        i, j = int(row["site_i"]), int(row["site_j"])
        if row["located_by"] in ("death edge", "mst edge", "birth edge"):
            ax.plot(xy[[i, j], 0], xy[[i, j], 1], color=colour, lw=1.6 if kind == "h1" else 2.2,
                    solid_capstyle="round")
        radius = max(0.5 * row["length"] * spacing, 0.25 * spacing)
        ax.add_patch(_circle((row["x"], row["y"]), radius, colour,
                             lw=2.0 if kind == "h1" else 1.2))
        if kind == "h1" and row["rank"] <= ranked:
            ax.annotate(str(row["rank"]), (row["x"] + radius, row["y"] - radius), color=colour,
                        fontsize=8, fontweight="bold", ha="left", va="bottom",
                        bbox={"boxstyle": "round,pad=0.1", "fc": "white", "ec": "none",
                              "alpha": 0.7})
    found = defect_counts(defects)
    floors = {r["kind"]: r["floor"] for r in defects}
    words = {"h1": "H1 loops", "h0": "H0 gaps"}
    labels = {}
    for kind in ("h1", "h0"):
        text = f"{found[kind]} {words[kind]}"
        if kind in floors:
            text += f" > {floors[kind]:.2g} spacing"
        if drawn[kind] < found[kind]:
            text += f" (drawn: longest {drawn[kind]})"
        labels[kind] = text
    handles = [
        Line2D([], [], ls="", marker="o", markersize=10, markerfacecolor="none",
               markeredgecolor=DEFECT_COLOURS["h1"], markeredgewidth=2,
               label=labels["h1"] + "; radius = half the bar"),
        Line2D([], [], color=DEFECT_COLOURS["h0"], lw=2.2, marker="o", markerfacecolor="none",
               label=labels["h0"] + " (widest merges)"),
    ]
    fig.legend(handles=handles, loc="lower center", ncols=2, fontsize=8, frameon=False)
    return fig


def plot_grains(image: np.ndarray, pattern: SitePattern, amounts) -> Figure:
    """The grains of the bond-orientation field drawn on the micrograph.

    Each site is a disc coloured by its grain (:func:`topoclass.amounts.segment_grains`); the
    legend gives each grain's size in sites and its lattice orientation. Vacancy clusters
    counted by :func:`topoclass.amounts.count_vacancies` are ringed in black.
    """
    fig, ax, scale = _image_figure(image, legend_rows=2)
    labels = np.asarray(amounts.grain_labels)
    angles = np.asarray(amounts.grain_angles_deg)
    size = _marker_area(pattern.spacing * scale, 0.5)
    handles = []
    for g in range(int(labels.max()) + 1 if labels.size else 0):
        members = labels == g
        colour = CLASS_COLOURS[g % len(CLASS_COLOURS)]
        ax.scatter(pattern.xy[members, 0], pattern.xy[members, 1], s=size, c=colour,
                   edgecolors="black", linewidths=0.3, alpha=0.85)
        if g < 8:
            handles.append(Line2D([], [], ls="", marker="o", markersize=7,
                                  markerfacecolor=colour, markeredgecolor="black",
                                  markeredgewidth=0.3,
                                  label=f"{int(members.sum())} sites, {angles[g]:+.1f}°"))
    for x, y, missing in np.asarray(amounts.holes).reshape(-1, 3):
        ax.add_patch(_circle((x, y), 0.6 * pattern.spacing * max(1.0, np.sqrt(missing)),
                             "black", lw=1.5))
    if labels.size and labels.max() >= 8:
        handles.append(Line2D([], [], ls="", label=f"... {int(labels.max()) - 7} more"))
    handles.append(Line2D([], [], ls="", marker="o", markersize=9, markerfacecolor="none",
                          markeredgecolor="black", markeredgewidth=1.5,
                          label=f"vacancy clusters ({len(amounts.holes)})"))
    v = amounts.values
    fig.legend(handles=handles, loc="lower center", ncols=min(len(handles), 5), fontsize=8,
               frameon=False, handletextpad=0.2, columnspacing=0.8,
               title=(f"{int(v['grains'])} grains (misorientation > 5° between grains), "
                      f"mean {v['grain_area_sites']:.0f} sites; orientation correlation length "
                      f"{v['orientation_length']:.1f} spacings"), title_fontsize=8)
    return fig


def write_inspection_figures(image: np.ndarray, pattern: SitePattern, diagrams: Diagrams,
                             out: str | Path, *, max_drawn: int = MAX_DRAWN_DEFECTS
                             ) -> list[Path]:
    """Write ``overlay.png``, ``diagram.png``, ``defects.png`` and ``defects.csv`` into ``out``.

    ``defects.csv`` holds every defect above the noise floors of :func:`locate_defects`;
    ``defects.png`` draws at most ``max_drawn`` of each kind. Returns the paths written, in
    that order.
    """
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    defects = locate_defects(pattern, diagrams)
    paths = [out / "overlay.png", out / "diagram.png", out / "defects.png", out / "defects.csv"]
    save_figure(plot_sites(image, pattern), paths[0])
    save_figure(diagram_and_barcode_figure(diagrams), paths[1])
    save_figure(plot_defects(image, pattern, defects, max_drawn=max_drawn), paths[2])
    write_defects_csv(defects, paths[3])
    return paths


def image_to_figure_pixels(shape: tuple[int, int]) -> tuple[float, int]:
    """Scale factor and legend-strip height (pixels) of the image pictures.

    Image pixel ``(x, y)`` (x right, y down; pixel centres at integers) lands on picture pixel
    ``(scale * (x + 0.5), scale * (y + 0.5))``; the legend strip lies below the image.
    """
    rows, cols = int(shape[0]), int(shape[1])
    scale = float(np.clip(_FIGURE_PX / max(rows, cols), 0.25, 4.0))
    return scale, 60


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


def plot_importance(importance: dict, *, top: int = 15,
                    title: str = "Most important features (permutation, log-loss)") -> Figure:
    """Horizontal bars of the ``top`` largest mean permutation importances; every repeat is
    drawn as a dot on its bar, so the spread is seen, not summarised."""
    scores = np.atleast_2d(np.asarray(importance["importances"], dtype=float))
    mean = scores.mean(axis=1)
    order = np.argsort(-mean, kind="stable")[:top]
    names = [str(importance["names"][k]) for k in order]
    fig = Figure(figsize=(7.5, 1.4 + 0.3 * len(order)), dpi=100, layout="constrained")
    ax = fig.subplots()
    y = np.arange(len(order))[::-1]
    ax.barh(y, mean[order], color=CLASS_COLOURS[0], alpha=0.6, label="mean")
    jitter = np.linspace(-0.25, 0.25, scores.shape[1]) if scores.shape[1] > 1 else [0.0]
    for row, k in zip(y, order, strict=True):
        ax.plot(scores[k], row + np.asarray(jitter), ls="none", marker="o", ms=2.5,
                color="0.15")
    how = ("each image took values from another sample group"
           if importance.get("across_groups") else "values permuted among all images")
    ax.set(yticks=y, yticklabels=names,
           xlabel=f"increase of the log-loss when permuted — dots: {scores.shape[1]} repeats "
                  f"({how})", title=title)
    ax.xaxis.label.set_size(8)
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
        save_figure(fig, path, svg=True)
        paths.append(path)
    return paths


def write_training_figures(model, out: str | Path, X=None, y=None, *, groups=None,
                           top: int = 15, n_repeats: int = 10, seed: int = 0) -> list[Path]:
    """Cross-validation figures of a trained model, and its feature importance when X, y given.

    Writes ``cv_confusion``, ``cv_reliability``, ``cv_per_class`` and ``importance`` (PNG and
    SVG) and ``importance.csv`` (every feature family, by decreasing mean importance, with its
    spread over the repeats). ``groups`` (sample group of each image) makes the permutations
    cross sample groups (:func:`feature_importance`). Returns the PNG and CSV paths.
    """
    out = Path(out)
    paths = write_metric_figures(model.cv_report.metrics, out, prefix="cv_",
                                 title="cross-validation")
    if X is not None and y is not None:
        imp = feature_importance(model, X, y, groups=groups, n_repeats=n_repeats, seed=seed,
                                 grouped=True)
        fig = plot_importance(imp, top=top)
        save_figure(fig, out / "importance.png", svg=True)
        csv_path = out / "importance.csv"
        order = np.argsort(-imp["importances_mean"], kind="stable")
        with open(csv_path, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh, lineterminator="\n")
            w.writerow(["feature", "importance_mean", "importance_std", "importance_min",
                        "importance_max", "repeats"])
            for k in order:
                w.writerow([imp["names"][k]]
                           + [f"{imp[key][k]:.6g}" for key in ("importances_mean",
                              "importances_std", "importances_min", "importances_max")]
                           + [imp["n_repeats"]])
        paths += [out / "importance.png", csv_path]
    return paths


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


def _show_region(ax, pattern: SitePattern) -> list:
    """Darken what was left out of the analysis and outline the analysed region.

    Returns the legend handle for the outline (none when the whole frame was analysed).
    """
    from matplotlib.patches import Rectangle

    rows, cols = pattern.shape
    x0, y0, x1, y1 = pattern.frame
    if (x0, y0, x1, y1) == (0, 0, cols, rows):
        return []
    outside = np.ones((rows, cols), dtype=bool)
    outside[y0:y1, x0:x1] = False
    veil = np.zeros((rows, cols, 4))
    veil[outside] = (0.0, 0.0, 0.0, 0.6)
    ax.imshow(veil, interpolation="nearest", extent=(-0.5, cols - 0.5, rows - 0.5, -0.5))
    for colour, width, style in (("black", 2.4, "-"), ("white", 1.2, "--")):
        ax.add_patch(Rectangle((x0 - 0.5, y0 - 0.5), x1 - x0, y1 - y0, fill=False,
                               edgecolor=colour, linewidth=width, linestyle=style))
    return [Line2D([], [], color="black", lw=1.2, ls="--", label="analysed region")]


def _marker_area(diameter_px: float, fraction: float) -> float:
    """Scatter marker area (points²) of a disc ``fraction`` of ``diameter_px`` across."""
    points = max(diameter_px * fraction, 2.0) * 72.0 / 100.0
    return points**2


def _circle(centre, radius, colour, lw):
    from matplotlib.patches import Circle

    return Circle(centre, radius, fill=False, edgecolor=colour, lw=lw)


def save_figure(fig: Figure, path: Path, *, svg: bool = False) -> None:
    fig.savefig(path, dpi=fig.dpi)
    if svg:
        fig.savefig(path.with_suffix(".svg"))
