"""The defect map: where on the image the H1 loops and the wide H0 gaps above a noise floor sit.

Reads a site pattern and its diagrams (the stages to its left) and gives positions in pixels;
the report draws them and the inspection writes them to ``defects.csv``. Every bar above the
floor of its kind is located; only the drawing is capped (:mod:`topoclass.report.figures`).
"""

from __future__ import annotations

import csv
import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from scipy.spatial import Delaunay, QhullError

from topoclass.errors import TopoclassError
from topoclass.persistence import LOOP_FLOOR, Diagrams
from topoclass.sites import SitePattern, circumcircles

#: Columns of ``defects.csv``; ``length``, ``birth``, ``death`` and ``floor`` in units of the
#: spacing, ``x, y`` in pixels; ``kind_count`` is how many bars of that kind are above the floor
#: (every one of them has a row).
DEFECT_COLUMNS = ("kind", "rank", "kind_count", "length", "birth", "death", "x", "y", "site_i",
                  "site_j", "truncated", "located_by", "floor")

# The noise floor of H1 bars (loops) is topoclass.persistence.LOOP_FLOOR, imported above: the
# H1 bar count of topoclass.records.barcode_summary uses the same one.

#: Noise floor of H0 bars (the minimum-spanning-tree edge that merges two parts of the
#: pattern), in spacings: (1 + sqrt(3)) / 2 ~ 1.37, halfway between the first and the second
#: neighbour distance of the triangular lattice. Every merge of an intact lattice happens at
#: about one spacing (at most 1.26 on the disordered demo images); a merge nearer the second
#: neighbour distance than the first means two parts of the pattern are held apart by a gap
#: with no site in it.
GAP_FLOOR = (1.0 + math.sqrt(3.0)) / 2.0


def locate_defects(pattern: SitePattern, diagrams: Diagrams, *, loop_floor: float = LOOP_FLOOR,
                   gap_floor: float = GAP_FLOOR) -> list[dict]:
    """Where every H1 bar longer than ``loop_floor`` and every H0 bar longer than ``gap_floor``
    sits on the image.

    Returns one dict per defect with the keys of :data:`DEFECT_COLUMNS` (``length``, ``birth``,
    ``death`` in spacings, ``x, y`` in pixels), H1 first, each kind by decreasing length.

    Parameters
    ----------
    pattern, diagrams
        A site pattern and its diagrams (:func:`topoclass.persistence.pattern_persistence`).
    loop_floor, gap_floor : float
        Noise floors in spacings (:data:`LOOP_FLOOR`, :data:`GAP_FLOOR`); a bar is kept when
        its length is strictly above the floor of its kind. H1 bars cut at the radius limit are
        always kept (they are longer than any floor below the limit).

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
    for name, value in (("loop_floor", loop_floor), ("gap_floor", gap_floor)):
        if not (isinstance(value, int | float) and math.isfinite(value) and value >= 0):
            raise ValueError(f"{name} must be a finite number >= 0 (spacings), not {value!r}")
    spacing = float(diagrams.spacing)
    pts = pattern.xy / spacing  # the same arithmetic as the persistence stage
    if pts.shape[0] and (diagrams.h0_edges.size and diagrams.h0_edges.max() >= pts.shape[0]):
        raise TopoclassError(f"{pattern.source or 'the pattern'}: the diagrams do not belong to "
                             "this site pattern; measure the image again")
    rows: list[dict] = []
    l1 = diagrams.lengths(1)
    cut = np.asarray(diagrams.h1_truncated, dtype=bool)
    order1 = np.argsort(-l1, kind="stable")
    order1 = order1[(l1[order1] > loop_floor) | cut[order1]]
    circles = _empty_circles(pts, pattern.border, float(diagrams.max_scale)) if cut.any() else []
    for rank, k in enumerate(order1, start=1):
        b, d = (float(v) for v in diagrams.h1[k])
        i, j = (int(v) for v in diagrams.h1_edges[k])
        how = "birth edge"
        death_edge = diagrams.h1_death_edges[k]
        if not cut[k] and death_edge[0] >= 0:
            i, j = (int(v) for v in death_edge)
            xy, how = 0.5 * (pts[i] + pts[j]), "death edge"
        elif circles:
            xy, how = circles.pop(0), "largest empty circle"
        elif i >= 0:
            xy = 0.5 * (pts[i] + pts[j])
        else:  # a closed loop without a death edge, birth edge not kept: nowhere to draw it
            continue
        rows.append(_defect_row("h1", rank, len(order1), b, d, xy * spacing, i, j, bool(cut[k]),
                                how, loop_floor))
    l0 = diagrams.lengths(0)
    order0 = np.argsort(-l0, kind="stable")
    order0 = order0[l0[order0] > gap_floor]
    for rank, k in enumerate(order0, start=1):
        b, d = (float(v) for v in diagrams.h0[k])
        i, j = (int(v) for v in diagrams.h0_edges[k])
        xy = 0.5 * (pts[i] + pts[j]) * spacing
        rows.append(_defect_row("h0", rank, len(order0), b, d, xy, i, j, False, "mst edge",
                                gap_floor))
    return rows


def defect_counts(defects: Sequence[dict]) -> dict[str, int]:
    """How many rows of each kind (``h1`` loops, ``h0`` gaps) :func:`locate_defects` found."""
    return {kind: sum(1 for r in defects if r["kind"] == kind) for kind in ("h1", "h0")}


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


def _defect_row(kind, rank, count, birth, death, xy, i, j, truncated, how, floor) -> dict:
    return {"kind": kind, "rank": int(rank), "kind_count": int(count),
            "length": float(death - birth), "birth": float(birth), "death": float(death),
            "x": float(xy[0]), "y": float(xy[1]), "site_i": int(i), "site_j": int(j),
            "truncated": int(truncated), "located_by": how, "floor": float(floor)}


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
    centres, radii = circumcircles(pts[simplices])
    order = np.argsort(-radii, kind="stable")
    chosen: list[np.ndarray] = []
    for k in order:
        if radii[k] < 0.5 * limit:  # a hole that a limit-wide triangle would have filled
            break
        if all(np.hypot(*(centres[k] - c)) >= limit for c in chosen):
            chosen.append(centres[k])
    return chosen
