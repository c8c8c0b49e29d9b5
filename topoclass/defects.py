"""The defect map: where on the image the longest H1 bars and the latest H0 merges sit.

Reads a site pattern and its diagrams (the stages to its left) and gives positions in pixels;
the report draws them and the inspection writes them to ``defects.csv``.
"""

from __future__ import annotations

import csv
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from scipy.spatial import Delaunay, QhullError

from topoclass.errors import TopoclassError
from topoclass.persistence import Diagrams
from topoclass.sites import SitePattern, circumcircles

#: Columns of ``defects.csv``; ``length``, ``birth`` and ``death`` in units of the spacing,
#: ``x, y`` in pixels.
DEFECT_COLUMNS = ("kind", "rank", "length", "birth", "death", "x", "y", "site_i", "site_j",
                  "truncated", "located_by")


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
    centres, radii = circumcircles(pts[simplices])
    order = np.argsort(-radii, kind="stable")
    chosen: list[np.ndarray] = []
    for k in order:
        if radii[k] < 0.5 * limit:  # a hole that a limit-wide triangle would have filled
            break
        if all(np.hypot(*(centres[k] - c)) >= limit for c in chosen):
            chosen.append(centres[k])
    return chosen
