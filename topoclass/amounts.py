"""Physical amounts of one site pattern: spacing and pore density, vacancies, grains, disorder.

A measuring stage beside :mod:`topoclass.order` and :mod:`topoclass.defects`: it reads a
:class:`~topoclass.sites.SitePattern` and its :class:`~topoclass.persistence.Diagrams` and gives
numbers a quality engineer can put on a specification, each with its uncertainty. Lengths are in
spacings and, where the pixel size is known (TIFF tags, instrument metadata or ``--pixel-size``),
in nm; areas in µm². Values that need the pixel size are NaN without it.

How each amount is measured
---------------------------
* **Vacancies.** A missing site leaves a hole in the Delaunay triangulation: the triangles that
  span it have circumradius about one spacing, whereas every triangle of an intact triangular
  lattice has ``a / sqrt(3) = 0.577 a`` (geometry of the lattice). Triangles wider than
  ``0.8 a`` are joined into holes through shared edges; a hole counts as a vacancy cluster when
  an H1 bar dies on one of its edges at the vacancy value (death >= 1.5 spacings: a single
  vacancy dies at ``sqrt(3) a``, clusters later; a square loop, which is no vacancy, at
  ``sqrt(2) a``) or, for a hole wider than the filtration limit, when it is that wide. The
  number of missing sites of a hole follows from Euler's formula: removing an interior vertex
  from a triangulation removes two triangles, so ``missing = (area / lattice-triangle area -
  triangles) / 2``. Holes and sites count where they lie at least ``_ZONE_DEPTH`` spacings
  inside the frame, the zone in which every hole's H1 bar is kept by the persistence stage.
* **Grains.** The local bond-orientation field (phase of the local ψ6, Halperin & Nelson 1978,
  averaged over each site and its Delaunay neighbours, modulo 60°) is segmented by region
  growing: a site joins a neighbouring grain when its orientation differs from the grain's mean
  orientation by less than the threshold (5° by default). Growing against the grain's mean,
  not site to site, keeps a slow bend across a boundary from chaining two grains together. The
  threshold follows the usual definition of a grain boundary by a misorientation threshold (the
  low-angle boundaries of Read & Shockley, Phys. Rev. 78, 275 (1950) reach up to about 15°;
  5° as the smallest boundary counted is a common choice in orientation mapping of
  polycrystals, common practice, value from memory). Sites of low local order (boundary sites)
  are then given to the neighbouring grain of closest orientation; grains smaller than
  ``min_grain_sites`` are merged into their neighbours the same way.
* **Orientation correlation length** ``ξ6``: where ``g6(r) = Re <ψ6(j) ψ6*(k)>`` over site pairs
  at distance ``r``, divided by ``<|ψ6|²>``, first falls below ``1/e`` (the bond-orientational
  correlation function of Halperin & Nelson). A value equal to the largest distance measured
  (half the shorter side of the frame) means the order reaches across the frame.
* **Disorder index** in [0, 1]: the mean of two parts, each anchored at 0 by the perfect
  triangular lattice and at 1 by a Poisson (completely random) pattern of the same density,
  then clipped to [0, 1]: ``(1 - mean |ψ6|) / (1 - mean |ψ6|_Poisson)`` and
  ``CV(H0 bar lengths) / CV_Poisson`` (the H0 bars of a Rips filtration are the edges of the
  minimum spanning tree). The Poisson anchors are measured by this module on a seeded Poisson
  pattern, with the same functions.

Uncertainties are counting statistics (a Poisson standard error ``sqrt(n)`` for counts, the
binomial one for fractions), the standard error of a mean or median, or a bootstrap over sites
(disorder index); each key ``name`` has a ``name_err`` beside it.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components, minimum_spanning_tree

from topoclass.errors import PatternError
from topoclass.order import psi6
from topoclass.persistence import Diagrams
from topoclass.sites import SitePattern, Triangulation, circumcircles, triangulate

#: The keys of :attr:`PatternAmounts.values`, in the order ``scores.csv`` writes them.
AMOUNT_KEYS = (
    "pixel_size_nm",
    "spacing_nm", "spacing_nm_err",
    "pore_density_um2", "pore_density_um2_err",
    "vacancies", "vacancies_err",
    "vacancy_clusters",
    "vacancies_per_1000", "vacancies_per_1000_err",
    "vacancies_per_um2", "vacancies_per_um2_err",
    "grains", "grains_err",
    "grain_area_sites", "grain_area_sites_err",
    "grain_area_um2", "grain_area_um2_err",
    "orientation_length", "orientation_length_nm",
    "disorder_index", "disorder_index_err",
)

_OPEN_RADIUS = 0.8  # spacings; between 0.577 (lattice triangle) and 1.0 (triangle over a hole)
_VACANCY_DEATH = 1.5  # spacings; between sqrt(2) (square loop) and sqrt(3) (one vacancy)
_ZONE_DEPTH = 3.0  # spacings: site border (1) + persistence guard (1) + a hole's radius (1)
_LATTICE_TRIANGLE = np.sqrt(3.0) / 4.0  # area of a lattice triangle, spacings²
_SITE_AREA = np.sqrt(3.0) / 2.0  # area per site of the triangular lattice, spacings²
_ORDERED_PSI = 0.5  # sites of lower coarse-grained |ψ6| do not seed or grow grains
_CORRELATION_SITES = 700  # ξ6 from at most this many sites (a seeded subsample)
_BOOTSTRAP = 200


@dataclass(frozen=True)
class PatternAmounts:
    """Physical amounts of one pattern and the per-site maps behind them.

    Attributes
    ----------
    values : dict of str to float
        The keys of :data:`AMOUNT_KEYS`; NaN where an amount cannot be given (no pixel size).
    grain_labels : ndarray of int, shape (n_sites,)
        Grain of every site, 0..n_grains-1 by decreasing size.
    grain_angles_deg : ndarray of float, shape (n_grains,)
        Mean lattice orientation of each grain, degrees in (-30, 30].
    holes : ndarray of shape (n_holes, 3)
        ``x, y`` (pixels) and missing sites of each vacancy cluster counted.
    """

    values: dict[str, float]
    grain_labels: np.ndarray = field(repr=False)
    grain_angles_deg: np.ndarray = field(repr=False)
    holes: np.ndarray = field(repr=False)


def pattern_amounts(
    pattern: SitePattern,
    diagrams: Diagrams,
    *,
    misorientation_deg: float = 5.0,
    min_grain_sites: int = 30,
    seed: int = 0,
) -> PatternAmounts:
    """Physical amounts of one site pattern (see the module notes for each definition).

    Parameters
    ----------
    pattern : SitePattern
        Sites in pixels, with the pixel size when known.
    diagrams : Diagrams
        Persistence of the same pattern (:func:`topoclass.persistence.pattern_persistence`).
    misorientation_deg : float
        Neighbouring grains differ by more than this (degrees, lattice orientation modulo 60°).
    min_grain_sites : int
        Smaller regions of one orientation are not counted as grains.
    seed : int
        Seed of the subsample of the correlation length and of the bootstrap.

    Returns
    -------
    PatternAmounts
    """
    if not isinstance(pattern, SitePattern):
        raise TypeError(f"pattern_amounts expects a SitePattern, not {type(pattern).__name__}")
    if not 0 < misorientation_deg < 30:
        raise ValueError(f"misorientation_deg must be in (0, 30), not {misorientation_deg!r}")
    tri = pattern.delaunay
    if tri is None or tri.simplices.shape[0] == 0:
        tri = triangulate(pattern.xy)  # a pattern built by hand may hold an older triangulation
    if tri is None:
        raise PatternError(f"{pattern.source or 'the site pattern'}: the sites have no "
                           "triangulation; check the site finding of this image")
    values: dict[str, float] = {}
    values.update(spacing_and_density(pattern, tri))
    vac, holes = count_vacancies(pattern, diagrams, tri)
    values.update(vac)
    labels, angles = segment_grains(pattern, tri, misorientation_deg=misorientation_deg,
                                    min_grain_sites=min_grain_sites)
    values.update(_grain_values(pattern, labels))
    values.update(orientation_length(pattern, tri, seed=seed))
    values.update(disorder_index(pattern, diagrams, tri, seed=seed))
    out = {k: float(values.get(k, np.nan)) for k in AMOUNT_KEYS}
    return PatternAmounts(out, labels, angles, holes)


def spacing_and_density(pattern: SitePattern, tri: Triangulation) -> dict[str, float]:
    """Pixel size, pore spacing in nm and pore density per µm² (interior sites).

    The density is the number of interior sites over the area of the rectangle they lie in
    (the frame less the border band of :func:`topoclass.sites.find_sites`), so sites cut by the
    frame do not bias it; its error is the Poisson one, an upper bound for a lattice. The
    spacing error is the standard error of the median first-shell bond length
    (``1.2533 sd / sqrt(n)``, the median's asymptotic efficiency for a normal sample).
    """
    px = pattern.pixel_size_nm
    px = float(px) if px is not None and px > 0 else np.nan
    interior = ~pattern.border
    rows, cols = _frame_size(pattern)
    edge = _border_edge(pattern)
    width, height = max(cols - 1 - 2 * edge, 0.0), max(rows - 1 - 2 * edge, 0.0)
    area_um2 = width * height * (px * 1e-3) ** 2
    n = int(np.count_nonzero(interior))
    bonds = _first_shell_bonds(pattern, tri)
    spread = 1.2533 * bonds.std() / np.sqrt(bonds.size) if bonds.size > 1 else np.nan
    return {
        "pixel_size_nm": px,
        "spacing_nm": pattern.spacing * px,
        "spacing_nm_err": spread * px,
        "pore_density_um2": n / area_um2 if area_um2 > 0 else np.nan,
        "pore_density_um2_err": np.sqrt(n) / area_um2 if area_um2 > 0 else np.nan,
    }


def count_vacancies(
    pattern: SitePattern, diagrams: Diagrams, tri: Triangulation
) -> tuple[dict[str, float], np.ndarray]:
    """Missing sites of the pattern, single and clustered, from its H1 loops and holes.

    Returns the values (``vacancies``, ``vacancy_clusters``, ``vacancies_per_1000`` of lattice
    positions, ``vacancies_per_um2``, with errors) and an ``(n_holes, 3)`` array of hole
    centres (pixels) and missing sites.
    """
    spacing = pattern.spacing
    pts = pattern.xy / spacing
    simplices = tri.simplices
    corners = pts[simplices]
    _, radii = circumcircles(corners)
    open_ = radii > _OPEN_RADIUS
    zone = _in_zone(pattern, pattern.xy)
    n_zone = int(np.count_nonzero(zone))
    holes: list[tuple[float, float, int]] = []
    if open_.any():
        idx = np.flatnonzero(open_)
        labels = _triangle_components(simplices[idx])
        # A loop's death edge (the longest edge of the Rips triangle that fills it) need not be
        # a Delaunay edge, but its midpoint lies inside the hole.
        home = _containing_triangle(corners[idx], _vacancy_midpoints(diagrams, pts))
        confirmed = set(labels[home[home >= 0]].tolist())
        big_hole = 0.5 * float(diagrams.max_scale)
        area = _triangle_areas(corners[idx])
        for c in range(int(labels.max()) + 1 if labels.size else 0):
            members = idx[labels == c]
            wide = radii[members].max() >= big_hole
            if not (wide or c in confirmed):
                continue
            a = area[labels == c]
            missing = int(round((a.sum() / _LATTICE_TRIANGLE - members.size) / 2.0))
            if missing < 1:
                continue  # an open region with no site missing (a dislocation, a wide bond)
            centre = (corners[members].mean(axis=1) * a[:, None]).sum(axis=0) / a.sum()
            if _in_zone(pattern, centre[None, :] * spacing)[0]:
                holes.append((float(centre[0] * spacing), float(centre[1] * spacing), missing))
    hole_arr = np.array(holes, dtype=float).reshape(-1, 3)
    missing = float(hole_arr[:, 2].sum())
    positions = n_zone + missing
    frac = missing / positions if positions > 0 else np.nan
    frac_err = np.sqrt(frac * (1 - frac) / positions) if positions > 0 else np.nan
    zone_area_um2 = _zone_area(pattern) * (_pixel_nm(pattern) * 1e-3) ** 2
    return {
        "vacancies": missing,
        "vacancies_err": np.sqrt(missing),
        "vacancy_clusters": float(hole_arr.shape[0]),
        "vacancies_per_1000": 1000.0 * frac,
        # With no vacancy seen, the binomial error is 0; one count is the honest resolution.
        "vacancies_per_1000_err": 1000.0 * max(frac_err, 1.0 / positions if positions else 0),
        "vacancies_per_um2": missing / zone_area_um2 if zone_area_um2 > 0 else np.nan,
        "vacancies_per_um2_err": (np.sqrt(missing) / zone_area_um2 if zone_area_um2 > 0
                                  else np.nan),
    }, hole_arr


def segment_grains(
    pattern: SitePattern,
    tri: Triangulation,
    *,
    misorientation_deg: float = 5.0,
    min_grain_sites: int = 30,
) -> tuple[np.ndarray, np.ndarray]:
    """Grains of the bond-orientation field: a label per site and a mean angle per grain.

    See the module notes. Labels run 0..n-1 by decreasing grain size; angles are the lattice
    orientation (degrees, (-30, 30], image axes) of each grain.
    """
    n = pattern.n_sites
    indptr, indices = tri.indptr, tri.indices
    local = psi6(pattern.xy, (indptr, indices))
    coarse = _neighbour_mean(local, indptr, indices)
    order = np.abs(coarse)
    phase = np.angle(coarse)  # 6 x orientation, radians
    tol = np.deg2rad(6.0 * misorientation_deg)  # in ψ6 phase, six times the lattice angle
    labels = np.full(n, -1, dtype=np.int64)
    means: list[complex] = []
    unit = np.exp(1j * phase)
    for seed in np.argsort(-order, kind="stable"):
        if labels[seed] >= 0 or order[seed] < _ORDERED_PSI:
            continue
        g = len(means)
        labels[seed] = g
        total = complex(unit[seed])
        queue = deque([seed])
        while queue:
            j = queue.popleft()
            for k in indices[indptr[j]:indptr[j + 1]]:
                if labels[k] >= 0 or order[k] < _ORDERED_PSI:
                    continue
                if abs(np.angle(unit[k] / total)) < tol:
                    labels[k] = g
                    total += unit[k]
                    queue.append(k)
        means.append(total)
    labels = _absorb(labels, np.asarray(means, dtype=complex), unit, indptr, indices,
                     int(min_grain_sites))
    return _relabel(labels, unit)


def orientation_length(
    pattern: SitePattern, tri: Triangulation, *, seed: int = 0
) -> dict[str, float]:
    """Correlation length ``ξ6`` of the bond-orientation field, in spacings and nm."""
    from scipy.spatial.distance import pdist

    local = psi6(pattern.xy, (tri.indptr, tri.indices))
    keep = np.flatnonzero(~pattern.border)
    if keep.size < 3:
        return {"orientation_length": np.nan, "orientation_length_nm": np.nan}
    if keep.size > _CORRELATION_SITES:
        keep = np.sort(np.random.default_rng(seed).choice(keep, _CORRELATION_SITES,
                                                          replace=False))
    xy = pattern.xy[keep] / pattern.spacing
    z = local[keep]
    norm = float(np.mean(np.abs(z) ** 2))
    r_max = 0.5 * min(pattern.shape) / pattern.spacing
    dist = pdist(xy)
    i, j = np.triu_indices(keep.size, k=1)
    near = dist <= r_max
    product = (z[i[near]] * np.conj(z[j[near]])).real
    edges = np.arange(0.5, r_max + 0.5, 0.5)
    if norm <= 0 or edges.size < 2:
        return {"orientation_length": np.nan, "orientation_length_nm": np.nan}
    which = np.floor((dist[near] - 0.5) / 0.5).astype(np.int64)  # bins of half a spacing
    ok = (which >= 0) & (which < edges.size - 1)
    sums = np.bincount(which[ok], weights=product[ok], minlength=edges.size - 1)
    counts = np.bincount(which[ok], minlength=edges.size - 1)
    centres = 0.5 * (edges[:-1] + edges[1:])
    filled = counts > 0
    g = sums[filled] / counts[filled] / norm
    r = centres[filled]
    below = np.flatnonzero(g < np.exp(-1.0))
    if below.size == 0:
        xi = float(r_max)
    elif below[0] == 0:
        xi = float(r[0])
    else:
        k = below[0]  # linear interpolation between the last bin above 1/e and the first below
        xi = float(r[k - 1] + (g[k - 1] - np.exp(-1)) / (g[k - 1] - g[k]) * (r[k] - r[k - 1]))
    return {"orientation_length": xi,
            "orientation_length_nm": xi * pattern.spacing * _pixel_nm(pattern)}


def disorder_index(
    pattern: SitePattern, diagrams: Diagrams, tri: Triangulation, *, seed: int = 0
) -> dict[str, float]:
    """One number in [0, 1] from ordered to random, with a bootstrap error over sites.

    See the module notes for the definition and its anchors.
    """
    local = np.abs(psi6(pattern.xy, (tri.indptr, tri.indices)))[~pattern.border]
    lengths = diagrams.lengths(0)
    if local.size == 0 or lengths.size < 2:
        return {"disorder_index": np.nan, "disorder_index_err": np.nan}
    psi_random, cv_random = random_pattern_anchors()
    value = _disorder(local, lengths, psi_random, cv_random)
    rng = np.random.default_rng(seed)
    # Vectorised bootstrap: every resample's mean and CV at once.
    a = local[rng.integers(0, local.size, (_BOOTSTRAP, local.size))].mean(axis=1)
    b = lengths[rng.integers(0, lengths.size, (_BOOTSTRAP, lengths.size))]
    cv = b.std(axis=1) / np.maximum(b.mean(axis=1), 1e-12)
    boot = np.clip(0.5 * ((1 - a) / (1 - psi_random) + cv / cv_random), 0.0, 1.0)
    return {"disorder_index": value, "disorder_index_err": float(np.std(boot))}


@lru_cache(maxsize=1)
def random_pattern_anchors(n: int = 4000, seed: int = 0) -> tuple[float, float]:
    """Mean local ``|ψ6|`` and the CV of the minimum-spanning-tree edge lengths of a Poisson
    pattern: the anchors at 1 of :func:`disorder_index` (measured, seeded, computed once)."""
    rng = np.random.default_rng(seed)
    side = np.sqrt(n)
    xy = rng.uniform(0.0, side, size=(n, 2))
    tri = triangulate(xy)
    inner = np.all((xy > 2.0) & (xy < side - 2.0), axis=1)
    local = np.abs(psi6(xy, (tri.indptr, tri.indices)))[inner]
    lengths = _mst_lengths(xy, tri)
    return float(local.mean()), float(lengths.std() / lengths.mean())


# --------------------------------------------------------------------------------------------
# private helpers


def _disorder(local, lengths, psi_random, cv_random) -> float:
    a = (1.0 - local.mean()) / (1.0 - psi_random)
    mean = lengths.mean()
    b = (lengths.std() / mean if mean > 0 else 0.0) / cv_random
    return float(np.clip(0.5 * (a + b), 0.0, 1.0))


def _mst_lengths(xy: np.ndarray, tri: Triangulation) -> np.ndarray:
    # The Euclidean minimum spanning tree is a subgraph of the Delaunay triangulation.
    owner = np.repeat(np.arange(xy.shape[0]), np.diff(tri.indptr))
    length = np.hypot(*(xy[tri.indices] - xy[owner]).T)
    graph = coo_matrix((length, (owner, tri.indices)), shape=(xy.shape[0],) * 2).tocsr()
    return minimum_spanning_tree(graph).data


def _border_edge(pattern: SitePattern) -> float:
    # find_sites flags sites closer than one spacing to the frame (its default border width).
    return pattern.spacing


def _pixel_nm(pattern: SitePattern) -> float:
    px = pattern.pixel_size_nm
    return float(px) if px is not None and px > 0 else np.nan


def _in_zone(pattern: SitePattern, xy: np.ndarray) -> np.ndarray:
    rows, cols = pattern.shape
    d = _ZONE_DEPTH * pattern.spacing
    return ((xy[:, 0] >= d) & (xy[:, 0] <= cols - 1 - d)
            & (xy[:, 1] >= d) & (xy[:, 1] <= rows - 1 - d))


def _zone_area(pattern: SitePattern) -> float:
    rows, cols = _frame_size(pattern)
    d = _ZONE_DEPTH * pattern.spacing
    return max(cols - 1 - 2 * d, 0.0) * max(rows - 1 - 2 * d, 0.0)


def _frame_size(pattern: SitePattern) -> tuple[int, int]:
    # The region the sites were searched in (a data bar left out holds none), not the image.
    x0, y0, x1, y1 = pattern.frame
    return y1 - y0, x1 - x0


def _first_shell_bonds(pattern: SitePattern, tri: Triangulation) -> np.ndarray:
    owner = np.repeat(np.arange(pattern.n_sites), np.diff(tri.indptr))
    keep = (owner < tri.indices) & ~pattern.border[owner]
    length = np.hypot(*(pattern.xy[tri.indices[keep]] - pattern.xy[owner[keep]]).T)
    return length[length < 1.2 * pattern.spacing]


def _triangle_areas(corners: np.ndarray) -> np.ndarray:
    a, b, c = corners[:, 0], corners[:, 1], corners[:, 2]
    return 0.5 * np.abs((b[:, 0] - a[:, 0]) * (c[:, 1] - a[:, 1])
                        - (c[:, 0] - a[:, 0]) * (b[:, 1] - a[:, 1]))


def _triangle_components(simplices: np.ndarray) -> np.ndarray:
    """Components of triangles joined through shared edges."""
    t = simplices.shape[0]
    edges = np.concatenate([simplices[:, [0, 1]], simplices[:, [1, 2]], simplices[:, [0, 2]]])
    edges.sort(axis=1)
    owner = np.tile(np.arange(t), 3)
    order = np.lexsort((edges[:, 1], edges[:, 0]))
    e, o = edges[order], owner[order]
    same = np.all(e[1:] == e[:-1], axis=1)
    a, b = o[:-1][same], o[1:][same]
    graph = coo_matrix((np.ones(a.size), (a, b)), shape=(t, t))
    return connected_components(graph, directed=False)[1]


def _vacancy_midpoints(diagrams: Diagrams, pts: np.ndarray) -> np.ndarray:
    bars = np.asarray(diagrams.h1, dtype=float).reshape(-1, 2)
    cut = np.asarray(diagrams.h1_truncated, dtype=bool).reshape(-1)
    edges = np.asarray(diagrams.h1_death_edges, dtype=np.int64).reshape(-1, 2)
    keep = (bars[:, 1] >= _VACANCY_DEATH) & ~cut & (edges[:, 0] >= 0)
    return 0.5 * (pts[edges[keep, 0]] + pts[edges[keep, 1]])


def _containing_triangle(corners: np.ndarray, points: np.ndarray) -> np.ndarray:
    """Index of the triangle holding each point (-1 for none), by barycentric coordinates."""
    if points.shape[0] == 0 or corners.shape[0] == 0:
        return np.full(points.shape[0], -1, dtype=np.int64)
    a = corners[:, 0]
    m = np.stack([corners[:, 1] - a, corners[:, 2] - a], axis=-1)  # (t, 2, 2)
    det = m[:, 0, 0] * m[:, 1, 1] - m[:, 0, 1] * m[:, 1, 0]
    ok = np.abs(det) > 1e-12
    d = points[:, None, :] - a[None, :, :]  # (p, t, 2)
    safe = np.where(ok, det, 1.0)
    u = (d[..., 0] * m[:, 1, 1] - d[..., 1] * m[:, 0, 1]) / safe
    v = (d[..., 1] * m[:, 0, 0] - d[..., 0] * m[:, 1, 0]) / safe
    inside = ok & (u >= -1e-9) & (v >= -1e-9) & (u + v <= 1 + 1e-9)
    return np.where(inside.any(axis=1), inside.argmax(axis=1), -1)


def _neighbour_mean(values: np.ndarray, indptr: np.ndarray, indices: np.ndarray) -> np.ndarray:
    count = np.diff(indptr)
    owner = np.repeat(np.arange(values.size), count)
    total = values + np.bincount(owner, weights=values[indices].real, minlength=values.size) \
        + 1j * np.bincount(owner, weights=values[indices].imag, minlength=values.size)
    return total / (1 + count)


def _absorb(labels, means, unit, indptr, indices, min_sites: int) -> np.ndarray:
    """Give unlabelled sites and sites of small grains to the neighbouring grain of closest
    orientation, wave by wave from the grains outwards."""
    labels = labels.copy()
    if means.size == 0:
        return np.zeros_like(labels)  # no ordered site at all: one region, no grain structure
    sizes = np.bincount(labels[labels >= 0], minlength=means.size)
    small = sizes < min_sites
    if small.all():
        small[np.argmax(sizes)] = False  # keep the largest region, however small
    labels[(labels >= 0) & small[np.maximum(labels, 0)]] = -1
    direction = means / np.maximum(np.abs(means), 1e-12)
    owner = np.repeat(np.arange(labels.size), np.diff(indptr))
    while np.any(labels < 0):
        free = labels[owner] < 0
        taken = labels[indices] >= 0
        cand = free & taken
        if not cand.any():
            labels[labels < 0] = 0  # sites cut off from every grain (should not happen)
            break
        j, k = owner[cand], indices[cand]
        g = labels[k]
        fit = np.abs(np.angle(unit[j] / direction[g]))
        best = np.lexsort((fit, j))
        first = np.ones(best.size, dtype=bool)
        first[1:] = j[best][1:] != j[best][:-1]
        labels[j[best][first]] = g[best][first]
    return labels


def _relabel(labels: np.ndarray, unit: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    used, inverse = np.unique(labels, return_inverse=True)
    sizes = np.bincount(inverse)
    rank = np.empty_like(sizes)
    rank[np.argsort(-sizes, kind="stable")] = np.arange(sizes.size)
    labels = rank[inverse]
    total = np.bincount(labels, weights=unit.real) + 1j * np.bincount(labels, weights=unit.imag)
    return labels, np.degrees(np.angle(total)) / 6.0


def _grain_values(pattern: SitePattern, labels: np.ndarray) -> dict[str, float]:
    n = int(labels.max()) + 1 if labels.size else 0
    sizes = np.bincount(labels, minlength=n).astype(float)
    rows, cols = pattern.shape
    site_area_um2 = rows * cols / max(pattern.n_sites, 1) * (_pixel_nm(pattern) * 1e-3) ** 2
    mean = float(sizes.mean()) if n else np.nan
    err = float(sizes.std(ddof=1) / np.sqrt(n)) if n > 1 else np.nan
    return {
        "grains": float(n),
        "grains_err": float(np.sqrt(n)),
        "grain_area_sites": mean,
        "grain_area_sites_err": err,
        "grain_area_um2": mean * site_area_um2,
        "grain_area_um2_err": err * site_area_um2,
    }
