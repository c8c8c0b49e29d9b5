"""Classic order measures of a site pattern: ψ6, coordination defects, NN spread, Clark–Evans.

Stage 3 of the pipeline, beside :mod:`topoclass.persistence`: a
:class:`~topoclass.sites.SitePattern` becomes a dict of numbers.

Neighbours are Delaunay neighbours (common practice for two-dimensional crystals). Values that the
frame would bias are taken over the interior sites only (``~pattern.border``); their neighbours
may be border sites, which is why the border band exists.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

from topoclass.errors import PatternError
from topoclass.sites import SitePattern, Triangulation, site_coordinates, triangulate

#: The keys every result of :func:`order_measures` has, in this order.
ORDER_MEASURE_KEYS = (
    "psi6_global",
    "psi6_local_mean",
    "defect_fraction",
    "n5_fraction",
    "n7_fraction",
    "nn_cv",
    "clark_evans_r",
    "mean_coordination",
    "nn_mean_per_spacing",
    "density_per_spacing2",
    "lattice_angle_deg",
    "psi4_global",
    "psi4_local_mean",
)


def order_measures(pattern: SitePattern, *, clark_evans_edge: str = "cells") -> dict[str, float]:
    """The classic order measures of one site pattern.

    Parameters
    ----------
    pattern : SitePattern
        Sites, spacing and border flags; the frame is ``pattern.frame``.
    clark_evans_edge : {"cells", "donnelly"}
        Edge handling of the Clark–Evans index. ``"cells"``: interior sites only, their
        nearest neighbours among all sites, and the density of the region they own (their
        Voronoi cells), see :func:`clark_evans_interior`. ``"donnelly"``: all sites in the
        frame with Donnelly's (1978) perimeter correction, for comparison with work that uses
        it.

    Returns
    -------
    dict
        Over the interior sites (neighbours may be border sites):

        * ``psi6_global`` — ``|mean psi6|``, the global bond-orientational order (1 for one
          perfect crystal, near 0 for a liquid or many randomly turned grains);
        * ``psi6_local_mean`` — mean of ``|psi6|``, the local order (stays high across grains);
        * ``defect_fraction`` — fraction of sites with Delaunay coordination other than 6;
        * ``n5_fraction``, ``n7_fraction`` — fractions with 5 and with 7 neighbours;
        * ``nn_cv`` — coefficient of variation (std / mean) of nearest-neighbour distances;
        * ``clark_evans_r`` — Clark–Evans index (see ``clark_evans_edge``): 1 for a Poisson
          pattern, 2.1491 for hexagonal packing;
        * ``mean_coordination`` — mean Delaunay coordination (6 on average in any large
          triangulation, by Euler's formula; a check on the border handling);
        * ``nn_mean_per_spacing`` — mean nearest-neighbour distance / spacing;
        * ``density_per_spacing2`` — sites per spacing² over the searched region
          (``2 / sqrt(3) = 1.1547`` for a triangular lattice whose spacing is the bond length);
        * ``lattice_angle_deg`` — mean lattice orientation ``arg(mean psi6) / 6`` in degrees in
          (-30, 30], image axes (x right, y down);
        * ``psi4_global``, ``psi4_local_mean`` — the same as the psi6 pair for fourfold
          (square) order, over each site's four nearest neighbours (see :func:`psi4`): near 1
          on a square lattice, low on a triangular one. Not a classification feature; the
          novelty checks use it to tell a lattice of another symmetry from a disordered one.

    Raises
    ------
    PatternError
        With fewer than 3 sites, all sites on a line, or no interior site.
    """
    if not isinstance(pattern, SitePattern):
        raise TypeError(f"order_measures expects a SitePattern, not {type(pattern).__name__}")
    name = pattern.source or "the site pattern"
    if clark_evans_edge not in ("cells", "donnelly"):
        raise ValueError(f"clark_evans_edge must be 'cells' or 'donnelly', not "
                         f"{clark_evans_edge!r}")
    xy = pattern.xy
    interior = ~pattern.border
    if not np.any(interior):
        raise PatternError(f"{name}: no interior site (all {pattern.n_sites} sites are at the "
                           "border); use a larger field of view or a higher magnification")
    indptr, indices = _neighbours(pattern.delaunay, xy.shape[0], name)
    coord = np.diff(indptr)
    psi = psi6(xy, (indptr, indices))
    nn = nearest_neighbour_distances(xy, focal=interior)
    x0, y0, x1, y1 = pattern.frame  # the searched region: a data bar left out holds no sites
    area = pattern.area
    c_in, psi_in = coord[interior], psi[interior]
    mean_psi = psi_in.mean()
    psi4_in = psi4(xy)[interior]
    nn_mean = float(nn.mean())
    if clark_evans_edge == "cells":
        cells = pattern.delaunay.cell_area[interior]
        if not np.any(np.isfinite(cells) & (cells > 0)):
            raise PatternError(f"{name}: every interior site lies on the outline of the pattern "
                               "(no bounded Voronoi cell), so there is no region to measure the "
                               "density in; check the site finding of this image")
        r = clark_evans_interior(xy, interior, pattern.delaunay.cell_area, nn=nn)
    else:
        r = clark_evans(xy, area, perimeter=2.0 * ((x1 - x0) + (y1 - y0)))
    return {
        "psi6_global": float(np.abs(mean_psi)),
        "psi6_local_mean": float(np.abs(psi_in).mean()),
        "defect_fraction": float(np.mean(c_in != 6)),
        "n5_fraction": float(np.mean(c_in == 5)),
        "n7_fraction": float(np.mean(c_in == 7)),
        "nn_cv": float(nn.std() / nn_mean) if nn_mean > 0 else 0.0,
        "clark_evans_r": r,
        "mean_coordination": float(c_in.mean()),
        "nn_mean_per_spacing": nn_mean / pattern.spacing,
        "density_per_spacing2": pattern.n_sites / area * pattern.spacing**2,
        "lattice_angle_deg": float(np.degrees(np.angle(mean_psi)) / 6.0),
        "psi4_global": float(np.abs(psi4_in.mean())),
        "psi4_local_mean": float(np.abs(psi4_in).mean()),
    }


def delaunay_neighbours(
    xy: np.ndarray, *, source: str | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Delaunay neighbours of every site as CSR arrays ``(indptr, indices)``.

    The neighbours of site ``j`` are ``indices[indptr[j]:indptr[j + 1]]``. A site that qhull
    leaves out (an exact or near duplicate of another site) has no neighbours.

    Raises
    ------
    PatternError
        With fewer than 3 sites or all sites on one line (no triangulation).
    """
    xy = site_coordinates(xy, source)
    return _neighbours(triangulate(xy), xy.shape[0], source or "the site pattern")


def _neighbours(tri: Triangulation | None, n: int, name: str) -> tuple[np.ndarray, np.ndarray]:
    if tri is not None:
        return tri.indptr, tri.indices
    if n < 3:
        raise PatternError(f"{name}: {n} sites are too few for order measures "
                           "(at least 3 needed); check the site finding of this image")
    raise PatternError(f"{name}: the sites lie on one line, so they have no triangulation; "
                       "check the site finding of this image")


def coordination(xy: np.ndarray, neighbours: tuple | None = None) -> np.ndarray:
    """Number of Delaunay neighbours of every site."""
    indptr, _ = neighbours if neighbours is not None else delaunay_neighbours(xy)
    return np.diff(indptr)


def site_coordination(pattern: SitePattern) -> np.ndarray:
    """Delaunay coordination of every site of a pattern (0 for fewer than 3 sites).

    Uses the pattern's own triangulation (:attr:`SitePattern.delaunay`), which the order
    measures have usually built already.
    """
    if pattern.n_sites < 3:
        return np.zeros(pattern.n_sites, dtype=np.int64)
    tri = pattern.delaunay
    neighbours = (tri.indptr, tri.indices) if tri is not None else None
    return np.asarray(coordination(pattern.xy, neighbours), dtype=np.int64)


def coordination_class(coord: np.ndarray) -> np.ndarray:
    """The class of each Delaunay coordination as pictures and pages show it: ``≤4``, ``5``,
    ``6``, ``7``, ``≥8`` (the keys of :data:`topoclass.report.COORDINATION_COLOURS`)."""
    coord = np.asarray(coord)
    return np.where(coord <= 4, "≤4", np.where(coord >= 8, "≥8", coord.astype(str)))


def psi6(xy: np.ndarray, neighbours: tuple | None = None) -> np.ndarray:
    """Local bond-orientational order ``psi6(j) = (1/N_j) sum_k exp(6 i theta_jk)``.

    Halperin & Nelson, Phys. Rev. Lett. 41, 121 (1978); ``theta_jk`` is the angle of the bond
    from site ``j`` to neighbour ``k`` (image axes) and the sum runs over the ``N_j`` Delaunay
    neighbours. Sites without neighbours get 0.

    Parameters
    ----------
    xy : ndarray of shape (n, 2)
    neighbours : (indptr, indices), optional
        CSR neighbour lists, e.g. from :func:`delaunay_neighbours` (computed when omitted).

    Returns
    -------
    complex ndarray of shape (n,)
    """
    xy = site_coordinates(xy)
    indptr, indices = neighbours if neighbours is not None else delaunay_neighbours(xy)
    count = np.diff(indptr)
    owner = np.repeat(np.arange(xy.shape[0]), count)
    bond = xy[indices] - xy[owner]
    z = bond[:, 0] + 1j * bond[:, 1]
    mag = np.abs(z)
    z = np.divide(z, mag, out=np.zeros_like(z), where=mag > 0) ** 6  # exp(6 i theta)
    total = np.bincount(owner, weights=z.real, minlength=xy.shape[0]) + 1j * np.bincount(
        owner, weights=z.imag, minlength=xy.shape[0]
    )
    return np.divide(total, count, out=np.zeros_like(total), where=count > 0)


def psi4(xy: np.ndarray, k: int = 4) -> np.ndarray:
    """Local fourfold bond order ``psi4(j) = (1/k) sum_m exp(4 i theta_jm)``.

    The square-lattice counterpart of :func:`psi6` (the bond-orientational order parameter of
    Halperin & Nelson 1978 with 4 in place of 6), summed over the ``k`` nearest neighbours of
    each site: a Delaunay triangulation of a square lattice adds one diagonal per square at
    random, and a diagonal (45 degrees, ``exp(4 i pi / 4) = -1``) would cancel the order it is
    meant to show. Using the four nearest neighbours is common practice for fourfold order.

    Returns
    -------
    complex ndarray of shape (n,); 0 for fewer than ``k + 1`` sites.
    """
    xy = site_coordinates(xy)
    n = xy.shape[0]
    if n < k + 1:
        return np.zeros(n, dtype=complex)
    _, idx = cKDTree(xy).query(xy, k=k + 1)
    bond = xy[idx[:, 1:]] - xy[:, None, :]
    z = bond[..., 0] + 1j * bond[..., 1]
    mag = np.abs(z)
    z = np.divide(z, mag, out=np.zeros_like(z), where=mag > 0) ** 4
    return z.mean(axis=1)


def nearest_neighbour_distances(xy: np.ndarray, focal: np.ndarray | None = None) -> np.ndarray:
    """Distance from each (focal) site to its nearest other site among all sites."""
    xy = site_coordinates(xy)
    if xy.shape[0] < 2:
        return np.zeros(0)
    queries = xy if focal is None else xy[np.asarray(focal, dtype=bool)]
    dist, _ = cKDTree(xy).query(queries, k=2)
    return dist[:, 1]


def clark_evans(
    xy: np.ndarray,
    area: float,
    perimeter: float | None = None,
    focal: np.ndarray | None = None,
) -> float:
    """Clark–Evans aggregation index ``R = mean NN distance / (0.5 / sqrt(density))``.

    Clark & Evans, Ecology 35, 445 (1954): R = 1 for a Poisson pattern, < 1 for clustering and
    2.1491 (its maximum) for hexagonal packing. Sites near the window edge have their nearest
    neighbour cut off, which biases R upwards; two corrections are offered:

    * ``focal`` (border or guard-area method, minus-sampling; common practice in spatial
      statistics): nearest-neighbour distances are taken from the focal sites only, to all
      sites, so a guard band around the focal sites supplies their true neighbours; the density
      is ``n / area`` over all ``n`` sites. Unbiased for any pattern when the guard is wider
      than the nearest-neighbour distances. :func:`order_measures` uses the same guard but
      takes the density from the focal sites' own cells (:func:`clark_evans_interior`).
    * ``perimeter`` (Donnelly 1978, for a Poisson pattern in a convex window; coefficients
      value from memory): the expected mean NN distance is
      ``0.5 sqrt(A / n) + (0.0514 + 0.041 / sqrt(n)) P / n``, using all sites.

    With neither, the uncorrected classic index is returned.

    Parameters
    ----------
    xy : ndarray of shape (n, 2)
    area : float
        Area of the observation window, same units squared.
    perimeter : float, optional
        Window perimeter, for the Donnelly correction.
    focal : ndarray of bool, shape (n,), optional
        Sites whose NN distances are used (border method).

    Returns
    -------
    float
    """
    xy = site_coordinates(xy)
    n = xy.shape[0]
    if not (np.isfinite(area) and area > 0):
        raise ValueError(f"area must be a positive number, not {area!r}")
    if perimeter is not None and focal is not None:
        raise ValueError("give either perimeter (Donnelly correction) or focal (border method)")
    nn = nearest_neighbour_distances(xy, focal=focal)
    if nn.size == 0:
        raise ValueError("the Clark-Evans index needs at least two sites and one focal site")
    return _clark_evans_index(nn, area, n, perimeter)


def clark_evans_interior(
    xy: np.ndarray,
    interior: np.ndarray,
    cell_area: np.ndarray,
    *,
    nn: np.ndarray | None = None,
) -> float:
    """Clark–Evans index of the interior sites, over the region they own.

    ``R = mean NN distance / (0.5 / sqrt(density))`` (Clark & Evans, Ecology 35, 445, 1954)
    with both terms taken from the interior sites: their nearest neighbours are searched among
    all sites (the border band supplies the neighbours the frame would cut off: the border or
    guard-area method, common practice in spatial statistics), and the density is the number
    of interior sites over the total area of their Voronoi cells, the region nearer to them
    than to any other site.

    Why the cells and not the frame: the frame's site count jumps by a whole row of sites as
    the lattice shifts against it, so ``n / frame area`` (or the interior window's area) puts
    R for a perfect triangular lattice anywhere from about 2.03 to 2.23 on a 128-pixel frame
    with 15-pixel spacing (measured over random shifts and turns). The cells of a perfect
    lattice are exact hexagons, so R is 2.1491 on any frame; for a Poisson pattern the mean
    cell area is ``1 / density`` (common practice), so R stays 1 on average.

    Parameters
    ----------
    xy : ndarray of shape (n, 2)
    interior : ndarray of bool, shape (n,)
        Sites whose nearest neighbours and cells are used.
    cell_area : ndarray of float, shape (n,)
        Voronoi cell area of every site (:attr:`Triangulation.cell_area`); NaN cells (on the
        hull) are left out of the density.
    nn : ndarray, optional
        Nearest-neighbour distances of the interior sites, when already computed.

    Returns
    -------
    float
    """
    xy = site_coordinates(xy)
    interior = np.asarray(interior, dtype=bool).reshape(-1)
    cells = np.asarray(cell_area, dtype=float).reshape(-1)[interior]
    if nn is None:
        nn = nearest_neighbour_distances(xy, focal=interior)
    cells = cells[np.isfinite(cells) & (cells > 0)]
    if nn.size == 0 or cells.size == 0:
        raise ValueError("the Clark-Evans index needs interior sites with bounded cells")
    return float(nn.mean() / (0.5 * np.sqrt(cells.mean())))


def _clark_evans_index(
    nn: np.ndarray, area: float, n: int, perimeter: float | None = None
) -> float:
    expected = 0.5 * np.sqrt(area / n)
    if perimeter is not None:
        expected += (0.0514 + 0.041 / np.sqrt(n)) * perimeter / n
    return float(nn.mean() / expected)
