"""Persistent homology (H0, H1) of the Vietoris–Rips filtration on a site cloud.

Stage 3 of the pipeline: a :class:`~topoclass.sites.SitePattern` becomes :class:`Diagrams`.

Convention: the filtration value of an edge is the distance between its two sites (ripser's
convention, not half of it), so a bar born at ``r`` appears when sites ``r`` apart are joined.

How it stays linear in the number of sites
------------------------------------------
* H0 is the Euclidean minimum spanning tree (EMST): the finite H0 deaths of a Rips filtration are
  exactly the MST edge lengths (single linkage; common practice). It is the MST of the radius
  graph below when that graph is connected; otherwise (components still apart at ``max_scale``)
  it is the MST of the Delaunay graph, which contains the EMST (computational geometry: every
  MST edge has an empty diametral disk, a Gabriel edge, and Gabriel edges belong to every
  Delaunay triangulation). Either way H0 is exact at every scale, with no radius limit.
* H1 comes from ripser on the sparse graph of the site pairs closer than ``max_scale``. The Rips
  complex at scale ``r`` is built from the edges of length ``<= r`` only, so an edge longer than
  ``max_scale`` never enters the filtration below ``max_scale``: every bar born and dead below the
  limit is exactly the bar of the full (dense) filtration. Classes still alive at the limit are
  kept as bars ending at ``max_scale`` and flagged as truncated — this is the diagram of the
  filtration ``min(f, max_scale)``, so the stability theorem still applies to it.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np
from ripser import ripser
from scipy import sparse
from scipy.sparse.csgraph import minimum_spanning_tree
from scipy.spatial import cKDTree

from topoclass.errors import PatternError
from topoclass.sites import SitePattern, Triangulation, site_coordinates, triangulate

#: Default radius limit in units of the site spacing; see :func:`pattern_persistence`.
DEFAULT_MAX_SCALE = 2.5
#: Default depth (spacings) between border sites and the sites bars are charged to.
DEFAULT_BORDER_GUARD = 1.0
#: Noise floor of H1 bars (loops), in spacings. On an ideal triangular lattice no H1 bar has
#: positive length. The shortest loop a lattice defect opens is the rhombus of two lattice
#: triangles squared by a 5-7 pair, which persists about sqrt(2) - 1 = 0.41 spacing; a vacancy
#: persists about sqrt(3) - 1 = 0.73. Positional jitter of a few per cent of the spacing makes
#: loops of a few hundredths (at most 0.11 on the ordered demo images, measured while choosing
#: this value; on a rendered perfect lattice site-finding noise alone gives a few hundred bars
#: of at most 0.04, tests/test_vectorize.py). Half the shortest defect loop, 0.2, keeps every
#: defect and drops the jitter. The defect map and the H1 bar count (``h1_count``) use it.
LOOP_FLOOR = 0.2


@dataclass(frozen=True)
class Diagrams:
    """Persistence diagrams of one site pattern, in units of the site spacing.

    Attributes
    ----------
    h0 : ndarray of shape (n0, 2)
        Finite H0 bars ``(birth, death)``; births are 0. The one essential class (the component
        that never dies) is not stored here (see :meth:`essential_count`).
    h1 : ndarray of shape (n1, 2)
        H1 bars ``(birth, death)``. Classes still alive at ``max_scale`` have death ``max_scale``
        and are marked in ``h1_truncated``.
    h1_truncated : ndarray of bool, shape (n1,)
        True for H1 bars cut at ``max_scale``.
    h0_edges : ndarray of int, shape (n0, 2)
        Site indices (into the pattern's ``xy``) of the edge at which each H0 bar dies.
    h1_edges : ndarray of int, shape (n1, 2)
        Site indices of an edge at which each H1 class is born. This edge can lie far from the
        loop: at the birth scale the region still open around the new loop may stretch across
        the image, and the edge that closes it can be anywhere along it. Kept for truncated
        bars (they have no death edge to locate them); ``(-1, -1)`` for the others unless the
        diagrams were computed with ``birth_edges="all"``.
    h1_death_edges : ndarray of int, shape (n1, 2)
        Site indices of the edge at which each H1 class dies: the longest edge of the triangle
        that fills the loop (a Rips triangle enters with its longest edge). That triangle lies
        inside the hole as it closes, so this edge is what locates the loop on the image.
        ``(-1, -1)`` for truncated bars, which have no death edge.
    spacing : float
        The spacing (pixels) that all values were divided by; ``value * spacing`` is in pixels.
    max_scale : float
        The radius limit of the filtration, in units of the spacing.
    pixel_size_nm : float or None
        Pixel size, when known, so that ``value * spacing * pixel_size_nm`` is in nanometres.
    n_sites : int
        Number of distinct sites in the cloud (coincident sites count once).
    n_interior : int
        Number of sites the kept bars are charged to: the interior (non-border) sites when border
        bars were excluded, otherwise all sites. Per-site statistics divide by this.
    border_excluded : bool
        Whether bars charged to border sites were dropped.
    """

    h0: np.ndarray
    h1: np.ndarray
    h1_truncated: np.ndarray
    h0_edges: np.ndarray
    h1_edges: np.ndarray
    spacing: float
    max_scale: float
    pixel_size_nm: float | None = None
    n_sites: int = 0
    n_interior: int = 0
    border_excluded: bool = False
    h1_death_edges: np.ndarray | None = None

    def __post_init__(self) -> None:
        # Records built by hand (tests, older caches) may lack death edges: mark them unknown.
        if self.h1_death_edges is None:
            unknown = np.full((np.asarray(self.h1).reshape(-1, 2).shape[0], 2), -1, np.int64)
            object.__setattr__(self, "h1_death_edges", unknown)

    def lengths(self, dim: int) -> np.ndarray:
        """Bar lengths ``death - birth`` of dimension ``dim`` (0 or 1), in spacing units."""
        bars = self._bars(dim)
        return bars[:, 1] - bars[:, 0]

    def in_pixels(self, dim: int) -> np.ndarray:
        """The bars of dimension ``dim`` in pixels."""
        return self._bars(dim) * self.spacing

    def bars_in_pixels(self, dim: int) -> np.ndarray:
        """The bars of dimension ``dim`` in pixels (same as :meth:`in_pixels`)."""
        return self.in_pixels(dim)

    def essential_count(self, dim: int) -> int:
        """Number of classes that never die: 1 in H0 for a non-empty cloud, 0 in H1.

        A finite planar cloud is connected at a large enough scale and its Rips complex is then a
        full simplex, so there is exactly one essential class (H0) and H1 has none; H1 classes
        alive at ``max_scale`` are truncated bars, not essential classes.
        """
        self._bars(dim)
        return int(dim == 0 and self.n_sites > 0)

    @property
    def n_truncated(self) -> int:
        """Number of H1 bars cut at ``max_scale``."""
        return int(np.count_nonzero(self.h1_truncated))

    def to_dict(self) -> dict[str, np.ndarray]:
        """Plain arrays and scalars, e.g. for ``np.savez``; ``pixel_size_nm=None`` becomes NaN."""
        out = {}
        for f in fields(self):
            value = getattr(self, f.name)
            if f.name == "pixel_size_nm" and value is None:
                value = np.nan
            out[f.name] = np.asarray(value)
        return out

    @classmethod
    def from_dict(cls, data) -> Diagrams:
        """Rebuild from :meth:`to_dict` output (or an opened ``.npz`` file)."""
        pixel = float(data["pixel_size_nm"])
        return cls(
            h0=np.asarray(data["h0"], dtype=float).reshape(-1, 2),
            h1=np.asarray(data["h1"], dtype=float).reshape(-1, 2),
            h1_truncated=np.asarray(data["h1_truncated"], dtype=bool).reshape(-1),
            h0_edges=np.asarray(data["h0_edges"], dtype=np.int64).reshape(-1, 2),
            h1_edges=np.asarray(data["h1_edges"], dtype=np.int64).reshape(-1, 2),
            spacing=float(data["spacing"]),
            max_scale=float(data["max_scale"]),
            pixel_size_nm=None if np.isnan(pixel) else pixel,
            n_sites=int(data["n_sites"]),
            n_interior=int(data["n_interior"]),
            border_excluded=bool(data["border_excluded"]),
            h1_death_edges=(np.asarray(data["h1_death_edges"], dtype=np.int64).reshape(-1, 2)
                            if "h1_death_edges" in data else None),
        )

    def _bars(self, dim: int) -> np.ndarray:
        if dim == 0:
            return self.h0
        if dim == 1:
            return self.h1
        raise ValueError(f"dim must be 0 or 1, not {dim!r}")


def pattern_persistence(
    pattern: SitePattern,
    *,
    max_scale: float = DEFAULT_MAX_SCALE,
    exclude_border: bool = True,
    border_guard: float = DEFAULT_BORDER_GUARD,
    birth_edges: str = "cut",
) -> Diagrams:
    """H0 and H1 of the Vietoris–Rips filtration of a site pattern, in spacing units.

    Parameters
    ----------
    pattern : SitePattern
        The sites; coordinates are divided by ``pattern.spacing`` first.
    max_scale : float
        Radius limit of the H1 computation in units of the spacing (H0 is exact at all scales).
        The default 2.5 lets the loops of the common defects die below it (geometry of the
        triangular lattice with spacing ``a``): a vacancy (a hexagon of side ``a``) dies at
        ``sqrt(3) a ~ 1.73 a``, and so does a di-vacancy (two adjacent sites missing: the
        widest triangle left over it is still ``a, sqrt(3) a, sqrt(3) a``), a square loop at
        ``sqrt(2) a ~ 1.41 a``, a 5/7 dislocation pair or a grain-boundary loop (heptagons,
        octagons of stretched bonds, estimate) at about 1.5–1.9 ``a``, a tri-vacancy (three
        mutually adjacent sites, or three in a row) at ``2 a`` (checked against dense ripser
        in tests/test_persistence.py).
        2.5 leaves room for jitter above that; larger holes (missing patches) end as truncated
        bars, which still count. A larger limit costs time: the work grows with the number of
        site pairs within ``max_scale`` (about ``1.8 max_scale**2`` per site).
    exclude_border : bool
        Keep only the bars charged to inner sites. Border sites (``pattern.border``) miss
        neighbours beyond the frame, and an H1 loop reaches about one spacing past its birth
        edge, so inner sites are the non-border sites at least ``border_guard`` from every
        border site. A bar is charged to the site nearest to the midpoint of its death edge
        (for H1 the longest edge of the triangle that fills the loop; a truncated H1 bar, which
        has none, by its birth edge), i.e. to the Voronoi cell holding that midpoint: the
        cells tile the plane, so bars per inner site is an unbiased density with no perimeter
        term (keeping only edges with both ends inner would undercount by the share of bars
        that straddle the perimeter of the inner region; tests/test_persistence.py checks that
        the per-site statistics agree across crop sizes).
    border_guard : float
        Extra depth, in spacings, between border sites and the sites bars are charged to.
    birth_edges : {"cut", "all"}
        Which H1 bars get their birth edge (``Diagrams.h1_edges``): only the truncated ones
        (the default; what border exclusion and the defect map use), or all of them. A birth
        edge comes from ripser's representative cocycles, which cost time (measured in
        benchmarks/RESULTS.md); see :func:`rips_persistence`.

    Returns
    -------
    Diagrams
    """
    if not isinstance(pattern, SitePattern):
        raise TypeError(f"pattern_persistence expects a SitePattern, not {type(pattern).__name__}")
    name = pattern.source or "the site pattern"
    if not np.isfinite(pattern.spacing) or pattern.spacing <= 0:
        raise PatternError(f"{name}: site spacing {pattern.spacing!r} is not a positive number; "
                           "check the site finding of this image")
    raw = rips_persistence(
        pattern.xy / pattern.spacing,
        max_scale=max_scale,
        border=pattern.border if exclude_border else None,
        guard=border_guard,
        source=pattern.source,
        delaunay=pattern.delaunay,
        birth_edges=birth_edges,
    )
    return Diagrams(
        h0=raw["h0"],
        h1=raw["h1"],
        h1_truncated=raw["h1_truncated"],
        h0_edges=raw["h0_edges"],
        h1_edges=raw["h1_edges"],
        h1_death_edges=raw["h1_death_edges"],
        spacing=pattern.spacing,
        max_scale=float(max_scale),
        pixel_size_nm=pattern.pixel_size_nm,
        n_sites=raw["n_sites"],
        n_interior=raw["n_interior"],
        border_excluded=exclude_border,
    )


def rips_persistence(
    xy: np.ndarray,
    *,
    max_scale: float,
    border: np.ndarray | None = None,
    guard: float = 0.0,
    source: str | None = None,
    delaunay: Triangulation | None = None,
    birth_edges: str = "all",
) -> dict:
    """Radius-limited Vietoris–Rips persistence (H0, H1) of a planar point cloud.

    Parameters
    ----------
    xy : ndarray of shape (n, 2)
        Points; all values come back in the same units.
    max_scale : float
        Radius limit of the H1 computation (same units). H1 classes alive at ``max_scale`` end
        there and are flagged in ``h1_truncated``; H0 is exact at every scale.
    border : ndarray of bool, shape (n,), optional
        Points missing neighbours beyond the frame. When given, only bars charged to inner
        points are kept: a bar is charged to the point nearest the midpoint of its death edge
        (its birth edge for truncated H1 bars), and inner points are the non-border points at least
        ``guard`` from every border point (see :func:`pattern_persistence`).
    guard : float
        Depth between border points and inner points, same units as ``xy``.
    source : str, optional
        File name used in error messages.
    delaunay : Triangulation, optional
        Delaunay neighbours of ``xy`` when the caller has them (:attr:`SitePattern.delaunay`);
        computed here when needed otherwise.
    birth_edges : {"all", "cut"}
        Birth edges of every H1 bar (from ripser's cocycles), or of the truncated bars only:
        ripser then runs without cocycles and a truncated bar's birth edge is the one edge of
        the graph with its birth length (float32, as ripser stores it); only when that length
        is shared by several edges does ripser run again with cocycles. Other bars get
        ``(-1, -1)``.

    Returns
    -------
    dict
        ``h0`` (n0, 2), ``h0_edges`` (n0, 2), ``h1`` (n1, 2), ``h1_edges`` (n1, 2),
        ``h1_death_edges`` (n1, 2; -1 for truncated bars), ``h1_truncated`` (n1,),
        ``max_scale``, ``n_sites`` (distinct points) and
        ``n_interior`` (inner distinct points, or ``n_sites`` without ``border``).
        H0 bars are sorted by death, H1 bars by birth then death. Edges index into ``xy``.
    """
    xy = site_coordinates(xy, source or "the site cloud")
    if not np.isfinite(max_scale) or max_scale <= 0:
        raise ValueError(f"max_scale must be a positive number, not {max_scale!r}")
    if not np.isfinite(guard) or guard < 0:
        raise ValueError(f"guard must be a non-negative number, not {guard!r}")
    if border is not None:
        border = np.asarray(border, dtype=bool).reshape(-1)
        if border.shape[0] != xy.shape[0]:
            raise ValueError("border mask and xy must have one entry per site")

    # Coincident sites are merged: a sparse matrix cannot hold a zero distance (it is an absent
    # entry, i.e. "not joined"), so two sites at the same place would look disconnected to
    # ripser. Merging is exact: a duplicate only adds a zero-length H0 bar, which is no bar.
    keep, inverse = _unique_points(xy)
    pts = xy[keep]
    n = pts.shape[0]
    border_u = np.zeros(n, dtype=bool)
    if border is not None:
        np.logical_or.at(border_u, inverse, border)

    tree = cKDTree(pts) if n else None
    pairs, dist = _radius_graph(pts, float(max_scale), tree)
    delaunay_edges = _DelaunayEdges(pts, inverse, delaunay)
    h0, h0_edges = _h0_from_emst(pts, pairs, dist, delaunay_edges)
    if birth_edges not in ("all", "cut"):
        raise ValueError(f"birth_edges must be 'all' or 'cut', not {birth_edges!r}")
    h1, h1_edges, h1_truncated = _h1_from_ripser(pts, float(max_scale), pairs, dist,
                                                 every_birth_edge=birth_edges == "all")
    h1_death = _death_edges(pts, h1[:, 1], h1_truncated, pairs, dist, delaunay_edges)

    inner = np.ones(n, dtype=bool)
    if border is not None:
        inner = _inner_sites(pts, border_u, float(guard))
        keep0 = inner[_charged_site(pts, h0_edges, tree)]
        # A loop is charged where it closes (its death edge lies inside the hole); a truncated
        # loop, which never closes below the limit, where it was born.
        located = np.where(h1_death[:, :1] >= 0, h1_death, h1_edges)
        keep1 = inner[_charged_site(pts, located, tree)]
        h0, h0_edges = h0[keep0], h0_edges[keep0]
        h1, h1_edges, h1_truncated = h1[keep1], h1_edges[keep1], h1_truncated[keep1]
        h1_death = h1_death[keep1]

    return {
        "h0": h0,
        "h0_edges": keep[h0_edges],
        "h1": h1,
        "h1_edges": np.where(h1_edges >= 0, keep[np.maximum(h1_edges, 0)], -1),
        "h1_death_edges": np.where(h1_death >= 0, keep[np.maximum(h1_death, 0)], -1),
        "h1_truncated": h1_truncated,
        "max_scale": float(max_scale),
        "n_sites": int(n),
        "n_interior": int(np.count_nonzero(inner)),
    }


def _unique_points(xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Indices of the first copy of each distinct point (input order) and the inverse map."""
    if xy.shape[0] == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    _, first, inverse = np.unique(xy, axis=0, return_index=True, return_inverse=True)
    inverse = inverse.reshape(-1)
    if first.size == xy.shape[0]:
        return np.arange(xy.shape[0]), np.arange(xy.shape[0])
    order = np.argsort(first)
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    return first[order], rank[inverse]


def _radius_graph(
    pts: np.ndarray, max_scale: float, tree: cKDTree | None
) -> tuple[np.ndarray, np.ndarray]:
    """Site pairs ``i < j`` closer than ``max_scale`` (in no set order) and their lengths."""
    if pts.shape[0] < 2:
        return np.zeros((0, 2), dtype=np.int64), np.zeros(0)
    # No sorting here: ripser sorts a COO input by (row, col) itself (it must, and does).
    pairs = tree.query_pairs(max_scale, output_type="ndarray").astype(np.int64)
    return pairs, np.hypot(*(pts[pairs[:, 0]] - pts[pairs[:, 1]]).T)


def _h0_from_emst(
    pts: np.ndarray, pairs: np.ndarray, dist: np.ndarray, delaunay_edges: _DelaunayEdges
) -> tuple[np.ndarray, np.ndarray]:
    """Finite H0 bars and their death edges from the exact Euclidean MST.

    When the radius graph is connected its MST is the EMST (an edge longer than ``max_scale``
    closes a cycle of shorter edges, so no MST holds it). Otherwise the merges above
    ``max_scale`` are found on the Delaunay graph, which contains the EMST.
    """
    n = pts.shape[0]
    if n < 2:
        return np.zeros((0, 2)), np.zeros((0, 2), dtype=np.int64)
    graph = sparse.coo_matrix((dist, (pairs[:, 0], pairs[:, 1])), shape=(n, n)).tocsr()
    mst = minimum_spanning_tree(graph).tocoo()
    if mst.nnz != n - 1:
        rows, cols = delaunay_edges()
        w = np.hypot(*(pts[rows] - pts[cols]).T)
        graph = sparse.coo_matrix((w, (rows, cols)), shape=(n, n)).tocsr()
        mst = minimum_spanning_tree(graph).tocoo()
    if mst.nnz != n - 1:  # cannot happen for a connected Delaunay graph; guard against qhull
        raise RuntimeError(f"minimum spanning tree has {mst.nnz} edges for {n} sites")
    order = np.argsort(mst.data, kind="stable")
    edges = np.column_stack([mst.row[order], mst.col[order]]).astype(np.int64)
    edges.sort(axis=1)
    bars = np.column_stack([np.zeros(n - 1), mst.data[order]])
    return bars, edges


class _DelaunayEdges:
    """Edges ``i < j`` of the Delaunay graph of the distinct points, built on first call.

    From the caller's triangulation of the raw points when given (indices mapped through
    ``inverse``, so duplicates fold into their first copy), else triangulated here. Points qhull
    left out (closer than its precision to a vertex) are joined to that vertex, their MST
    neighbour; collinear points (no triangulation) get the chain along their line.
    """

    def __init__(self, pts: np.ndarray, inverse: np.ndarray, tri: Triangulation | None):
        self._pts, self._inverse, self._tri = pts, inverse, tri
        self._edges: tuple[np.ndarray, np.ndarray] | None = None

    def __call__(self) -> tuple[np.ndarray, np.ndarray]:
        if self._edges is None:
            self._edges = self._build()
        return self._edges

    def _build(self) -> tuple[np.ndarray, np.ndarray]:
        pts, n = self._pts, self._pts.shape[0]
        tri, inverse = self._tri, self._inverse
        if tri is None:
            tri = triangulate(pts)
            inverse = np.arange(n)
        if tri is None:
            return _collinear_chain(pts)
        rows = np.repeat(np.arange(tri.indptr.size - 1), np.diff(tri.indptr))
        rows = np.concatenate([inverse[rows], inverse[tri.coplanar[:, 0]]])
        cols = np.concatenate([inverse[tri.indices], inverse[tri.coplanar[:, 1]]])
        lo, hi = np.minimum(rows, cols), np.maximum(rows, cols)
        # Each Delaunay edge is listed from both ends; keep one copy (duplicates would be summed).
        key = np.unique(lo[lo < hi] * n + hi[lo < hi])
        return key // n, key % n


def _collinear_chain(pts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Fewer than three points or all on one line: the EMST is the chain along the line."""
    n = pts.shape[0]
    centred = pts - pts.mean(axis=0)
    _, sv, vt = np.linalg.svd(centred, full_matrices=False)
    if n >= 3 and sv[-1] > 1e-9 * max(sv[0], 1e-300):
        raise PatternError("qhull could not triangulate the sites although they are not on one "
                           "line; check the site coordinates")
    order = np.argsort(centred @ vt[0], kind="stable")
    lo, hi = np.minimum(order[:-1], order[1:]), np.maximum(order[:-1], order[1:])
    return lo.astype(np.int64), hi.astype(np.int64)


def _inner_sites(pts: np.ndarray, border: np.ndarray, guard: float) -> np.ndarray:
    """Non-border sites at least ``guard`` from every border site."""
    inner = ~border
    if guard > 0 and border.any() and inner.any():
        dist, _ = cKDTree(pts[border]).query(pts[inner], k=1)
        inner[inner] = dist >= guard
    return inner


def _charged_site(pts: np.ndarray, edges: np.ndarray, tree: cKDTree | None) -> np.ndarray:
    """The site whose Voronoi cell holds the midpoint of each edge."""
    if edges.shape[0] == 0:
        return np.zeros(0, dtype=np.int64)
    _, owner = tree.query(0.5 * (pts[edges[:, 0]] + pts[edges[:, 1]]), k=1)
    return owner


def _h1_from_ripser(
    pts: np.ndarray, max_scale: float, pairs: np.ndarray, dist: np.ndarray,
    *, every_birth_edge: bool = True,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """H1 bars, birth edges and truncation flags from ripser on the radius-limited graph."""
    n = pts.shape[0]
    empty = (np.zeros((0, 2)), np.zeros((0, 2), dtype=np.int64), np.zeros(0, dtype=bool))
    if n < 3 or pairs.shape[0] < 3:
        return empty
    dm = sparse.coo_matrix((dist, (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    res = ripser(dm, distance_matrix=True, maxdim=1, thresh=max_scale,
                 do_cocycles=every_birth_edge)
    bars = np.asarray(res["dgms"][1], dtype=np.float64).reshape(-1, 2)
    if bars.shape[0] == 0:
        return empty
    truncated = ~np.isfinite(bars[:, 1])
    if every_birth_edge:
        edges = _birth_edges(pts, bars[:, 0], res["cocycles"][1])
    else:
        edges = np.full((bars.shape[0], 2), -1, dtype=np.int64)
        found = _unique_length_edges(bars[truncated, 0], dist)
        if found is None:  # a tied length: only the cocycles tell which edge it was
            res = ripser(dm, distance_matrix=True, maxdim=1, thresh=max_scale,
                         do_cocycles=True)
            bars = np.asarray(res["dgms"][1], dtype=np.float64).reshape(-1, 2)
            truncated = ~np.isfinite(bars[:, 1])
            cut = np.flatnonzero(truncated)
            found = _birth_edges(pts, bars[cut, 0], [res["cocycles"][1][k] for k in cut])
        else:
            found = np.sort(pairs[found], axis=1)
        edges[truncated] = found
    bars[truncated, 1] = max_scale
    order = np.lexsort((bars[:, 1], bars[:, 0]))
    return bars[order], edges[order], truncated[order]


def _unique_length_edges(births: np.ndarray, dist: np.ndarray) -> np.ndarray | None:
    """Indices of the graph edges whose float32 length is each birth value, or None when a
    value matches no edge or several (then only ripser's cocycles can tell)."""
    if births.size == 0:
        return np.zeros(0, dtype=np.int64)
    length = dist.astype(np.float32)
    order = np.argsort(length, kind="stable")
    values = births.astype(np.float32)
    lo = np.searchsorted(length[order], values, side="left")
    hi = np.searchsorted(length[order], values, side="right")
    if np.any(hi - lo != 1):
        return None
    return order[lo]


def _birth_edges(pts: np.ndarray, births: np.ndarray, cocycles: list) -> np.ndarray:
    """For each class, the cocycle edge whose length is the birth value.

    ripser reduces the coboundary matrix in reverse filtration order, so a representative
    cocycle holds the birth (pivot) edge plus edges that enter at or after it. The birth edge is
    found as the cocycle edge whose length (rounded to float32, as ripser stores distances) is
    closest to the birth value; with ties (perfect lattices) any of the equal edges closes the
    loop at that scale.
    """
    sizes = np.fromiter((len(c) for c in cocycles), dtype=np.int64, count=len(cocycles))
    flat = np.concatenate([np.asarray(c).reshape(-1, 3) for c in cocycles]).astype(np.int64)
    owner = np.repeat(np.arange(len(cocycles)), sizes)
    length = np.hypot(*(pts[flat[:, 0]] - pts[flat[:, 1]]).T).astype(np.float32)
    gap = np.abs(length.astype(np.float64) - births[owner])
    pick = np.lexsort((gap, owner))
    first = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    chosen = flat[pick[first], :2]
    return np.sort(chosen, axis=1)


def _death_edges(
    pts: np.ndarray,
    deaths: np.ndarray,
    truncated: np.ndarray,
    pairs: np.ndarray,
    dist: np.ndarray,
    delaunay_edges: _DelaunayEdges,
) -> np.ndarray:
    """For each finite H1 bar, the edge whose length is its death value.

    In a Rips filtration a triangle enters with its longest edge, so the death value of a class
    is the length of that edge, exactly as ripser stores it (float32). Where several edges have
    that float32 length (perfect lattices; or lengths that round alike, which among ~10^5 edges
    happens a few hundred times) they are shared out among the bars of that death value,
    Delaunay edges and edges deep inside the cloud first: a loop closes across a Delaunay edge
    (the hexagon around a vacancy is triangulated by its diagonals, while an ordinary
    second-neighbour pair is not a Delaunay edge), and deep inside rather than in the notches
    of the outline.
    """
    out = np.full((deaths.shape[0], 2), -1, dtype=np.int64)
    finite = np.flatnonzero(~truncated)
    if finite.size == 0 or pairs.shape[0] == 0:
        return out
    length = dist.astype(np.float32)
    order = np.argsort(length, kind="stable")
    sorted_len = length[order]
    values = deaths[finite].astype(np.float32)
    # Bars grouped by death value (stable: within a group, in bar order).
    by_value = np.argsort(values, kind="stable")
    uniq, first, counts = np.unique(values[by_value], return_index=True, return_counts=True)
    lo = np.searchsorted(sorted_len, uniq, side="left")
    n_cand = np.searchsorted(sorted_len, uniq, side="right") - lo
    # Candidate edges of every group, flattened: group g holds order[lo[g] : lo[g] + n_cand[g]].
    group = np.repeat(np.arange(uniq.size), n_cand)
    start = np.cumsum(n_cand) - n_cand
    cand = order[lo[group] + np.arange(group.size) - start[group]]
    if np.any(n_cand > 1):
        n = pts.shape[0]
        rows, cols = delaunay_edges()
        delaunay_keys = np.sort(rows * n + cols)
        key = pairs[cand, 0] * n + pairs[cand, 1]
        is_delaunay = np.zeros(cand.size, dtype=bool)
        if delaunay_keys.size:
            pos = np.minimum(np.searchsorted(delaunay_keys, key), delaunay_keys.size - 1)
            is_delaunay = delaunay_keys[pos] == key
        lo_corner, hi_corner = pts.min(axis=0), pts.max(axis=0)
        mids = 0.5 * (pts[pairs[cand, 0]] + pts[pairs[cand, 1]])
        depth = np.minimum(mids - lo_corner, hi_corner - mids).min(axis=1)
        # Last key: the site indices, so that the outcome does not depend on the pair order.
        cand = cand[np.lexsort((key, -depth, ~is_delaunay, group))]
    # The k-th bar of a group takes the k-th candidate of that group, while there are any.
    bar_group = np.repeat(np.arange(uniq.size), counts)
    rank = np.arange(by_value.size) - first[bar_group]
    ok = rank < n_cand[bar_group]
    out[finite[by_value[ok]]] = pairs[cand[start[bar_group[ok]] + rank[ok]]]
    return out
