"""Find the lattice sites (centres of pores or dots) in a micrograph.

Stage 2 of the pipeline: a 2-D float image in [0, 1] becomes a :class:`SitePattern`. Only the
region given (:mod:`topoclass.region`: the frame less an instrument data bar) is searched.

How the sites are found
-----------------------
1. Spacing: the first ring of the radially averaged power spectrum of a Hann-windowed tile;
   for a triangular lattice of spacing ``a`` it lies at ``k = 2 / (sqrt(3) a)`` cycles/px.
   Without a clear ring, the first peak of the radially averaged autocorrelation is used.
2. Blob filter at the scale of the spacing, on a block-averaged copy holding about 6-12 px per
   spacing (so the cost does not grow with the magnification): a Gaussian of 0.15 spacing
   minus one of 0.3 spacing. Each pore is measured against its own walls, so small pores
   among large ones and uneven illumination do not matter.
3. Polarity ("auto"): the polarity whose candidate sites have the more regular
   nearest-neighbour distances. The features sit one per cell; the extrema of the matrix
   between them (two per cell) are weaker and merge or split with the local disorder.
   Close-packed features, whose gaps look regular too, are caught by a later check.
4. Local maxima at least half a spacing apart whose height passes a threshold set by a robust
   (MAD) pixel-noise estimate and by the typical feature height. Maxima closer than 0.75
   spacing with no wall between them (an elongated pore) are joined into one site.
5. Sub-pixel centres by a 2-D quadratic fit of the 3x3 neighbourhood; sites within a spacing of
   the edge, where the smoothing sees past the frame, are re-centred by an intensity-weighted
   centroid on the unsmoothed image instead.
6. The spacing is re-measured as the median first-shell bond length of the sites, and the
   detection repeated once when it moved by more than 3 %.

A pattern with no preferred spacing (no ring, no autocorrelation peak, or one so weak that no
feature stands out at it: randomly nucleated pits) takes the filter scale from the spots'
own size instead (scale-space search of the normalised Laplacian); its spots sit on a flat
background, so they must stand 4 noise sigmas high and far above the filter's spread over the
background (which smooth random texture does not). Its spacing is that of a triangular lattice
of the same density, and ``preferred_spacing`` is False.

An image with no spots at all (no feature stands clearly above the noise) raises
:class:`PatternError` rather than returning a pattern: later stages need real sites.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from scipy import fft as sp_fft
from scipy import ndimage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import Delaunay, QhullError, cKDTree

from topoclass.errors import PatternError, TopoclassError


@dataclass(frozen=True)
class SitePattern:
    """The lattice sites found in one micrograph.

    Attributes
    ----------
    xy : ndarray of shape (n_sites, 2)
        Sub-pixel site centres in pixels, column ``x`` (to the right) then row ``y`` (down).
    spacing : float
        Characteristic nearest-neighbour spacing of the pattern, in pixels.
    polarity : {"bright", "dark"}
        Whether the features are bright spots or dark pores.
    border : ndarray of bool, shape (n_sites,)
        True for sites within about one spacing of the image border; later stages exclude them
        where the missing neighbours outside the frame would bias a value.
    shape : tuple of int
        ``(rows, cols)`` of the image the sites came from.
    pixel_size_nm : float or None
        Physical pixel size when the file recorded it.
    source : str or None
        Path of the image file, for messages and reports.
    region : (x0, y0, x1, y1) or None
        Half-open pixel box the sites were searched in (:mod:`topoclass.region`); None for the
        whole frame. The border flags and the density refer to it.
    preferred_spacing : bool
        False when the pattern showed no preferred spacing (no spectral ring) and the filters
        took their scale from the spots; ``spacing`` is then that of a triangular lattice of the
        same density.
    """

    xy: np.ndarray
    spacing: float
    polarity: str
    border: np.ndarray
    shape: tuple[int, int]
    pixel_size_nm: float | None = None
    source: str | None = field(default=None, compare=False)
    region: tuple[int, int, int, int] | None = None
    preferred_spacing: bool = True

    def __post_init__(self) -> None:
        xy = np.asarray(self.xy, dtype=np.float64).reshape(-1, 2)
        border = np.asarray(self.border, dtype=bool).reshape(-1)
        if border.shape[0] != xy.shape[0]:
            raise ValueError("border mask and xy must have one entry per site")
        xy.setflags(write=False)
        border.setflags(write=False)
        object.__setattr__(self, "xy", xy)
        object.__setattr__(self, "border", border)
        object.__setattr__(self, "shape", (int(self.shape[0]), int(self.shape[1])))
        object.__setattr__(self, "spacing", float(self.spacing))
        if self.region is not None:
            object.__setattr__(self, "region", tuple(int(v) for v in self.region))

    @property
    def frame(self) -> tuple[int, int, int, int]:
        """``(x0, y0, x1, y1)`` of the searched region (the whole image without one)."""
        return self.region or (0, 0, self.shape[1], self.shape[0])

    @property
    def area(self) -> float:
        """Area of the searched region, in px^2."""
        x0, y0, x1, y1 = self.frame
        return float((x1 - x0) * (y1 - y0))

    @property
    def n_sites(self) -> int:
        return int(self.xy.shape[0])

    @property
    def spacing_nm(self) -> float | None:
        return None if self.pixel_size_nm is None else self.spacing * self.pixel_size_nm

    @cached_property
    def delaunay(self) -> Triangulation | None:
        """Delaunay neighbours of the sites, computed once (see :func:`triangulate`).

        Both the order measures and the persistence stage need them; the triangulation is the
        costliest step of either after ripser, so the pattern keeps it. None with fewer than
        three sites or all sites on one line.
        """
        return triangulate(self.xy)


@dataclass(frozen=True)
class Triangulation:
    """Delaunay neighbours of a planar point set, as plain arrays (cheap to pickle).

    Attributes
    ----------
    indptr, indices : ndarray of int
        CSR neighbour lists: the neighbours of point ``j`` are ``indices[indptr[j]:indptr[j+1]]``
        (scipy's ``Delaunay.vertex_neighbor_vertices``).
    coplanar : ndarray of int, shape (m, 2)
        ``(point, nearest vertex)`` for the points qhull left out because they sit on (or
        within its precision of) another point; they have no neighbours in the CSR lists.
    cell_area : ndarray of float, shape (n,)
        Area of each point's Voronoi (Dirichlet) cell, from the Delaunay triangles; NaN for
        points on the convex hull (unbounded cell) and for the points qhull left out.
    simplices : ndarray of int, shape (t, 3)
        The triangles, as point indices (scipy's ``Delaunay.simplices``); the physical amounts
        (:mod:`topoclass.amounts`) find the holes of the pattern among them.
    """

    indptr: np.ndarray
    indices: np.ndarray
    coplanar: np.ndarray
    cell_area: np.ndarray | None = None
    simplices: np.ndarray = field(default_factory=lambda: np.zeros((0, 3), np.int64))


def site_coordinates(xy, source: str | None = None) -> np.ndarray:
    """Site coordinates as a float64 ``(n, 2)`` array, checked once for every stage.

    Raises
    ------
    PatternError
        When ``xy`` is not ``(n, 2)`` or holds NaN or infinity; the message names ``source``.
    """
    name = source or "the site pattern"
    xy = np.asarray(xy, dtype=np.float64)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise PatternError(f"{name}: site coordinates must have shape (n, 2), got {xy.shape}")
    if not np.all(np.isfinite(xy)):
        raise PatternError(f"{name}: site coordinates contain NaN or infinity; "
                           "check the site finding of this image")
    return xy


def triangulate(xy: np.ndarray) -> Triangulation | None:
    """Delaunay neighbours of points ``xy`` (n, 2); None with fewer than 3 or all collinear."""
    xy = np.asarray(xy, dtype=np.float64).reshape(-1, 2)
    if xy.shape[0] < 3:
        return None
    try:
        tri = Delaunay(xy)
    except QhullError:
        return None
    indptr, indices = tri.vertex_neighbor_vertices
    coplanar = tri.coplanar[:, [0, 2]] if tri.coplanar.size else np.zeros((0, 2), np.int64)
    area = _voronoi_cell_areas(xy, tri.simplices)
    area[np.unique(tri.convex_hull)] = np.nan
    area[coplanar[:, 0]] = np.nan
    return Triangulation(indptr.astype(np.int64), indices.astype(np.int64),
                         coplanar.astype(np.int64), area, tri.simplices.astype(np.int64))


def _voronoi_cell_areas(xy: np.ndarray, simplices: np.ndarray) -> np.ndarray:
    # The Voronoi cell of a point is cut by its Delaunay triangles into pieces (point, midpoint
    # of one edge, circumcentre, midpoint of the other edge); with signed areas the pieces of
    # obtuse triangles, whose circumcentre lies outside, still add up to the exact cell of every
    # point not on the hull (Meyer et al. 2003, "mixed Voronoi area"; from memory; checked
    # against scipy.spatial.Voronoi in tests/test_order.py).
    p = xy[simplices]  # (t, 3, 2)
    turn = _cross(p[:, 1] - p[:, 0], p[:, 2] - p[:, 0])
    flip = turn < 0
    p[flip] = p[flip][:, [0, 2, 1]]
    order = np.where(flip[:, None], simplices[:, [0, 2, 1]], simplices)
    centre, _ = circumcircles(p)
    area = np.zeros(xy.shape[0])
    for k in range(3):
        a, b, c = p[:, k], p[:, (k + 1) % 3], p[:, (k + 2) % 3]
        piece = 0.5 * (_cross(0.5 * (b - a), centre - a) + _cross(centre - a, 0.5 * (c - a)))
        area += np.bincount(order[:, k], weights=piece, minlength=xy.shape[0])
    return area


def _cross(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    return u[:, 0] * v[:, 1] - u[:, 1] * v[:, 0]


_MIN_SIDE = 16  # pixels; a smaller image cannot show several periods of any resolvable lattice
_MIN_SPACING = 3.0  # pixels; finer patterns are not resolved as separate features
_SPECTRUM_TILE = 1024  # the spacing is measured on a central tile at most this big
_DETECT_PX_PER_SPACING = 6.0  # block-average so that at least this many pixels span a spacing
_FEATURE_SIGMA = 0.15  # centre of the blob filter, spacings (best for pores of ~0.3 spacing)
_SURROUND_RATIO = 2.0  # surround / centre sigma of the blob filter
_BACKGROUND_SIGMA = 2.0  # grey level of the matrix for the centroids at the edge, spacings
_CANDIDATE_WINDOW = 0.25  # half-width of the local-maximum window, spacings
_MIN_SEPARATION = 0.5  # spacings; of two maxima closer than this the lower is dropped
_MERGE_DISTANCE = 0.65  # spacings; closer maxima may belong to one elongated pore ...
_MERGE_SADDLE = 0.7  # ... and do when the filter between them stays above this of the lower
# A low bar is safe: a noise maximum on a wall or in a vacancy has the filter's negative or zero
# response to climb first, and one within half a spacing of a pore is absorbed by it.
_NOISE_FACTOR = 2.0  # sites stand this many noise sigmas above zero ...
_RELATIVE_HEIGHT = 0.15  # ... and at least this fraction of the typical site height
_MIN_SIGNAL = 3.5  # typical site height in noise sigmas below which there is no pattern
_CENTROID_RADIUS = 0.45  # spacings; window of the centroid used near the edge
_BOND_CUT = 1.2  # first-shell bonds are shorter than this times the median nearest distance
_REDO_TOLERANCE = 0.03  # redo the detection when the spacing moved by more than this
_HONEYCOMB_RATIO = 0.7  # auto polarity: sites this much closer than the spectrum says = wrong
_RING_CLARITY = 4.0  # a spectral ring stands this many times above the band's median power
_RING_MAX_WIDTH = 1.0  # full width at half height of a ring, relative to its radius
# Patterns without a preferred spacing (no ring):
_SPOT_SIGMAS = 14  # scales of the scale-space search for the spots' size ...
_SPOT_PER_SIGMA = 4.71  # ... whose best Laplacian scale s* gives spacing sqrt(2) s* / 0.3
_SPOT_NOISE_FACTOR = 4.0  # spots on a flat background stand this many noise sigmas high ...
_SPOT_CONTRAST = 6.0  # ... and this many times the background's spread of the filter
_SPOT_MIN_COUNT = 8


def circumcircles(triangles: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Centres and radii of the circumcircles of triangles given as ``(n, 3, 2)`` corners.

    A degenerate (collinear) triangle gets a NaN centre and radius 0.
    """
    a, b, c = triangles[:, 0], triangles[:, 1], triangles[:, 2]
    bx, by = b[:, 0] - a[:, 0], b[:, 1] - a[:, 1]
    cx, cy = c[:, 0] - a[:, 0], c[:, 1] - a[:, 1]
    d = 2 * (bx * cy - by * cx)
    d = np.where(np.abs(d) < 1e-12, np.nan, d)
    ux = (cy * (bx**2 + by**2) - by * (cx**2 + cy**2)) / d
    uy = (bx * (cx**2 + cy**2) - cx * (bx**2 + by**2)) / d
    centres = np.column_stack([ux + a[:, 0], uy + a[:, 1]])
    radii = np.nan_to_num(np.hypot(ux, uy), nan=0.0)
    return centres, radii


def estimate_spacing(image: np.ndarray, *, source: str | None = None) -> float:
    """Characteristic nearest-neighbour spacing of a lattice pattern, in pixels.

    The first ring of the radially averaged power spectrum of a Hann-windowed central tile
    (at most 1024 px square), converted with ``a = 2 / (sqrt(3) k)`` for a triangular lattice;
    without a clear ring, the first peak of the radially averaged autocorrelation.
    :func:`find_sites` refines this value with the bond lengths of the sites it finds.

    Parameters
    ----------
    image : ndarray of shape (rows, cols)
        Grey-level micrograph.
    source : str, optional
        File name used in error messages.

    Returns
    -------
    float
        Spacing in pixels.

    Raises
    ------
    PatternError
        When the image is too small, flat, or shows no repeating feature spacing at all.
    """
    name = source or "image"
    return _initial_spacing(_as_float_image(image, name), name)


def find_sites(
    image: np.ndarray,
    *,
    spacing: float | None = None,
    polarity: str = "auto",
    pixel_size_nm: float | None = None,
    source: str | None = None,
    border_width: float = 1.0,
    min_sites: int = 12,
    region: tuple[int, int, int, int] | None = None,
) -> SitePattern:
    """Find the lattice sites (pore or dot centres) of a micrograph.

    Parameters
    ----------
    image : ndarray of shape (rows, cols)
        Grey-level micrograph (any real dtype; the scale does not matter).
    spacing : float, optional
        Starting value of the spacing in pixels; estimated from the image when omitted. Either
        way the reported spacing is re-measured from the sites found.
    polarity : {"auto", "bright", "dark"}
        Bright dots on a dark matrix, dark pores on a bright one, or decide from the image.
    pixel_size_nm : float, optional
        Physical pixel size, stored in the pattern.
    source : str, optional
        Path of the image file, for messages and reports.
    border_width : float
        Sites closer than this many spacings to the edge of the region are flagged in ``border``.
    min_sites : int
        Fewer sites than this raise :class:`PatternError`.
    region : (x0, y0, x1, y1), optional
        Half-open pixel box to search (see :mod:`topoclass.region`); nothing outside it becomes
        a site. The whole frame when omitted. Site coordinates stay in image pixels.

    Returns
    -------
    SitePattern
        When the pattern has no preferred spacing (no ring in the power spectrum, as in a
        Poisson-like pattern of randomly nucleated pits), the filters take their scale from the
        spots themselves, ``preferred_spacing`` is False and ``spacing`` is the spacing of a
        triangular lattice of the same density.

    Raises
    ------
    PatternError
        When the image holds no usable pattern (too small, flat, no spots standing above the
        noise, or fewer than ``min_sites`` sites).
    TopoclassError
        When an option has an invalid value.
    """
    name = source or "image"
    _check_options(polarity, pixel_size_nm, border_width, min_sites, name)
    whole = _as_float_image(image, name)
    frame = _frame(region, whole.shape, name)
    x0, y0, x1, y1 = frame
    img = _as_float_image(whole[y0:y1, x0:x1], name)
    start, preferred = _starting_scale(img, spacing, name)
    noise = _pixel_noise(img)
    if preferred:
        try:
            xy, found, measured = _sites_of_lattice(img, start, polarity, noise, name)
        except PatternError:
            if spacing is not None:
                raise
            # A weak autocorrelation peak of a random pattern is no lattice: measure the spots.
            start, preferred = _spacing_from_spots(img, name), False
    if not preferred:
        xy, found = _detect(img, start, polarity, noise, name, spots=True)
        measured = _density_spacing(xy.shape[0], img.size)
    if xy.shape[0] < min_sites:
        raise PatternError(
            f"{name}: only {xy.shape[0]} sites found (at least {min_sites} needed); check that "
            "the image shows a lattice pattern and the magnification"
        )
    xy = xy + np.array([x0, y0], dtype=np.float64)
    return SitePattern(
        xy=xy,
        spacing=measured,
        polarity=found,
        border=_near_frame(xy, frame, border_width * measured),
        shape=whole.shape,
        pixel_size_nm=pixel_size_nm,
        source=source,
        region=frame,
        preferred_spacing=preferred,
    )


# --------------------------------------------------------------------------------------------
# The steps of find_sites


def _check_options(polarity, pixel_size_nm, border_width, min_sites, name: str) -> None:
    if polarity not in ("auto", "bright", "dark"):
        raise TopoclassError(
            f"{name}: polarity must be 'auto', 'bright' or 'dark', not {polarity!r}"
        )
    if pixel_size_nm is not None and not (np.isfinite(pixel_size_nm) and pixel_size_nm > 0):
        raise TopoclassError(
            f"{name}: pixel size must be a positive number of nanometres, not {pixel_size_nm!r}"
        )
    if not (np.isfinite(border_width) and border_width >= 0):
        raise TopoclassError(f"{name}: border_width must be >= 0 spacings, not {border_width!r}")
    if int(min_sites) != min_sites or min_sites < 1:
        raise TopoclassError(f"{name}: min_sites must be a positive integer, not {min_sites!r}")


def _frame(region, shape: tuple[int, int], name: str) -> tuple[int, int, int, int]:
    rows, cols = shape
    if region is None:
        return 0, 0, int(cols), int(rows)
    x0, y0, x1, y1 = (int(v) for v in region)
    if not (0 <= x0 < x1 <= cols and 0 <= y0 < y1 <= rows):
        raise TopoclassError(
            f"{name}: region x {x0}-{x1}, y {y0}-{y1} does not fit the {cols}x{rows} px image"
        )
    return x0, y0, x1, y1


def _starting_scale(img: np.ndarray, spacing: float | None, name: str) -> tuple[float, bool]:
    """Spacing to set the filters by, and whether the pattern has a preferred spacing."""
    if spacing is not None:
        start = float(spacing)
        if not (np.isfinite(start) and _MIN_SPACING <= start <= min(img.shape) / 2):
            raise TopoclassError(
                f"{name}: spacing must be between {_MIN_SPACING:g} and {min(img.shape) / 2:g} "
                f"pixels for this image, not {spacing!r}"
            )
        return start, True
    found = _spacing_of_lattice(img)
    if found is not None:
        return found, True
    return _spacing_from_spots(img, name), False


def _sites_of_lattice(img, start: float, polarity: str, noise: float, name: str):
    """Sites, polarity and re-measured spacing of a pattern with a preferred spacing."""
    xy, found = _detect(img, start, polarity, noise, name)
    measured = _bond_spacing(xy)
    if polarity == "auto" and measured < _HONEYCOMB_RATIO * start:
        # Features covering more than half of the area (close-packed spheres) skew the other way;
        # taking the gaps between them gives a honeycomb about 1/sqrt(3) too dense. Try the other.
        other = "dark" if found == "bright" else "bright"
        try:
            xy2, _ = _detect(img, start, other, noise, name)
        except PatternError:
            xy2 = None
        if xy2 is not None:
            measured2 = _bond_spacing(xy2)
            if abs(np.log(measured2 / start)) < abs(np.log(measured / start)):
                xy, found, measured = xy2, other, measured2
    if np.isfinite(measured) and abs(measured - start) > _REDO_TOLERANCE * start:
        xy, found = _detect(img, measured, found, noise, name)
        measured = _bond_spacing(xy)
    if not np.isfinite(measured):
        measured = start
    return xy, found, measured


def _density_spacing(n_sites: int, area: float) -> float:
    """Bond length of a triangular lattice holding ``n_sites`` in ``area`` px^2."""
    return float(np.sqrt(2.0 / (np.sqrt(3.0) * max(n_sites, 1) / area)))


def _near_frame(xy: np.ndarray, frame, edge: float) -> np.ndarray:
    x0, y0, x1, y1 = frame
    return (
        (xy[:, 0] < x0 + edge)
        | (xy[:, 0] > x1 - 1 - edge)
        | (xy[:, 1] < y0 + edge)
        | (xy[:, 1] > y1 - 1 - edge)
    )


# --------------------------------------------------------------------------------------------
# Input checks


def _as_float_image(image, name: str) -> np.ndarray:
    try:
        img = np.asarray(image)
    except Exception as exc:  # e.g. ragged nested lists
        raise PatternError(f"{name}: cannot be read as an image array ({exc})") from None
    if img.ndim != 2:
        raise PatternError(
            f"{name}: expected a 2-D grey-level image, got an array of shape {img.shape}; "
            "convert colour images to grey first"
        )
    if img.dtype.kind not in "biuf":
        raise PatternError(f"{name}: image pixels must be numbers, not {img.dtype}")
    if min(img.shape) < _MIN_SIDE:
        raise PatternError(
            f"{name}: image is only {img.shape[0]}x{img.shape[1]} pixels; a lattice needs at "
            f"least {_MIN_SIDE} pixels per side and several spacings across"
        )
    img = img.astype(np.float32, copy=False)
    if not np.isfinite(img).all():
        raise PatternError(f"{name}: image contains NaN or infinite pixels; fix or crop the file")
    lo, hi = float(img.min()), float(img.max())
    if not hi > lo:
        raise PatternError(
            f"{name}: image is flat (every pixel is {lo:g}); check the exposure and the file"
        )
    return img


# --------------------------------------------------------------------------------------------
# Spacing from the image


def _initial_spacing(img: np.ndarray, name: str) -> float:
    spacing = _spacing_of_lattice(img)
    if spacing is None:
        raise PatternError(
            f"{name}: no repeating feature spacing found (no ring in the power spectrum, no peak "
            "in the autocorrelation); check that the image shows a lattice pattern"
        )
    return spacing


def _spacing_of_lattice(img: np.ndarray) -> float | None:
    """Spacing from the spectrum's first ring, else the autocorrelation; None without either."""
    power, kx, ky = _power_spectrum(_central_tile(img, _SPECTRUM_TILE))
    spacing = _spacing_from_spectrum(power, kx, ky)
    if spacing is None:
        spacing = _spacing_from_autocorrelation(power)
    return spacing


def _spacing_from_spots(img: np.ndarray, name: str) -> float:
    """A filter scale for spots without a preferred spacing, from the spots' own size.

    Scale-space blob search (Lindeberg 1998, the scale-normalised Laplacian ``s^2 LoG``): at
    each scale, the median response of the extrema that stand five noise deviations above the
    filtered noise; the best scale ``s*`` of a disc of radius ``r`` is ``r / sqrt(2)``. The
    returned spacing is the one whose blob filter suits pores of that radius (0.3 spacing).
    """
    tile = _central_tile(img, 512)
    noise = _pixel_noise(tile)
    top = max(1.0, min(tile.shape) / 24.0)
    best, best_strength = None, 0.0
    for s in np.geomspace(0.8, max(top, 0.9), _SPOT_SIGMAS):
        response = ndimage.gaussian_laplace(tile, s, mode="reflect") * np.float32(s * s)
        bar = 5.0 * noise * _normalised_log_norm(s)
        for sign in (1.0, -1.0):
            r = response if sign > 0 else -response
            peaks = _local_maxima(r, max(1, int(s)), bar)
            if peaks.shape[0] < _SPOT_MIN_COUNT:
                continue
            strength = float(np.median(r[peaks[:, 0], peaks[:, 1]]))
            if strength > best_strength:
                best, best_strength = s, strength
    if best is None:
        raise PatternError(
            f"{name}: no spots stand clearly above the noise (no ring in the power spectrum, "
            "no peak in the autocorrelation, no blobs); check that the image shows a pattern"
        )
    return float(np.clip(_SPOT_PER_SIGMA * best, _MIN_SPACING, min(img.shape) / 2))


def _normalised_log_norm(s: float) -> float:
    """L2 norm of scipy's scale-normalised 2-D Laplacian-of-Gaussian kernel at scale ``s``."""
    radius = int(4.0 * s + 0.5) + 1
    delta = np.zeros((2 * radius + 1, 2 * radius + 1))
    delta[radius, radius] = 1.0
    kernel = ndimage.gaussian_laplace(delta, s, mode="constant") * s * s
    return float(np.sqrt(np.sum(kernel * kernel)))


def _central_tile(img: np.ndarray, size: int) -> np.ndarray:
    rows, cols = img.shape
    r0, c0 = max(0, (rows - size) // 2), max(0, (cols - size) // 2)
    return img[r0 : r0 + size, c0 : c0 + size]


def _power_spectrum(tile: np.ndarray):
    """Power spectrum of the mean-free, Hann-windowed tile (rfft half plane) and its k grid."""
    rows, cols = tile.shape
    window = np.outer(np.hanning(rows), np.hanning(cols)).astype(np.float32)
    t = (tile - tile.mean()) * window
    spec = sp_fft.rfft2(t)
    power = spec.real**2 + spec.imag**2
    ky = sp_fft.fftfreq(rows).astype(np.float32)[:, None]
    kx = sp_fft.rfftfreq(cols).astype(np.float32)[None, :]
    return power, kx, ky


def _spacing_from_spectrum(power: np.ndarray, kx: np.ndarray, ky: np.ndarray) -> float | None:
    rows, cols = power.shape[0], 2 * (power.shape[1] - 1) or 1
    k = np.sqrt(kx**2 + ky**2)
    dk = 1.0 / max(rows, cols)
    bins = np.rint(k / dk).astype(np.int64).ravel()
    counts = np.bincount(bins)
    profile = np.bincount(bins, weights=power.ravel()) / np.maximum(counts, 1)
    radius = np.arange(profile.size) * dk
    # Admissible band: at least 4 periods across the tile, at least _MIN_SPACING pixels.
    k_lo = 2.0 / np.sqrt(3.0) / (min(power.shape[0], cols) / 4.0)
    k_hi = 2.0 / (np.sqrt(3.0) * _MIN_SPACING)
    band = np.flatnonzero((radius >= k_lo) & (radius <= k_hi) & (counts > 0))
    if band.size < 5:
        return None
    # Ring energy (mean power times circumference) so that the falling background of a blurred
    # image does not swamp the ring; smoothed over 3 bins against the scatter of single bins.
    energy = ndimage.uniform_filter1d(profile * radius, 3)[band]
    base = float(np.median(energy))
    if not base > 0:
        return None
    # The strongest ring: for features covering less than half of the area (pores, dots, the
    # gaps between close-packed spheres) the form factor makes the first ring the strongest,
    # and large defects (a blank patch, a crack) put their power below it, not above.
    # Only a local maximum counts: the tail of low-frequency power at the band's inner end is
    # shading or a large defect, not a ring.
    inner = np.flatnonzero((energy[1:-1] >= energy[:-2]) & (energy[1:-1] > energy[2:])) + 1
    if inner.size == 0:
        return None
    first = int(inner[np.argmax(energy[inner])])
    if not energy[first] >= _RING_CLARITY * base:
        return None
    # A lattice ring is narrow; smooth random texture (blurred noise) has one broad hump.
    half = base + 0.5 * (energy[first] - base)
    below = np.flatnonzero(energy <= half)
    lo = below[below < first].max(initial=0)
    hi = below[below > first].min(initial=energy.size - 1)
    if (radius[band[hi]] - radius[band[lo]]) > _RING_MAX_WIDTH * radius[band[first]]:
        return None
    k_peak = radius[band[first]]
    # Sub-bin position: power-weighted mean |k| of the ring, above the annulus' median power.
    ring = (k >= 0.85 * k_peak) & (k <= 1.15 * k_peak)
    p = power[ring]
    w = np.maximum(p - np.median(p), 0.0)
    if not w.sum() > 0:
        return None
    k_ring = float(np.sum(w * k[ring]) / w.sum())
    return 2.0 / (np.sqrt(3.0) * k_ring)


def _spacing_from_autocorrelation(power: np.ndarray) -> float | None:
    rows = power.shape[0]
    cols = 2 * (power.shape[1] - 1)
    ac = sp_fft.irfft2(power, s=(rows, cols))
    if not ac[0, 0] > 0:
        return None
    ac = sp_fft.fftshift(ac / ac[0, 0])
    yy, xx = np.indices(ac.shape)
    r = np.hypot(yy - rows // 2, xx - cols // 2)
    bins = np.rint(r).astype(np.int64).ravel()
    prof = np.bincount(bins, weights=ac.ravel()) / np.maximum(np.bincount(bins), 1)
    prof = prof[: int(min(rows, cols) / 4) + 1]
    for i in range(int(_MIN_SPACING), prof.size - 1):
        # First local maximum that rises clearly above the dip before it.
        if prof[i] >= prof[i - 1] and prof[i] > prof[i + 1] and prof[i] > 0.05:
            if prof[i] - prof[:i].min() < 0.05:
                return None
            den = prof[i - 1] - 2 * prof[i] + prof[i + 1]
            shift = 0.5 * (prof[i - 1] - prof[i + 1]) / den if den < 0 else 0.0
            return float(i + np.clip(shift, -0.5, 0.5))
    return None


def _bond_spacing(xy: np.ndarray) -> float:
    """Median first-shell bond length of a site cloud (NaN for fewer than 3 sites).

    The median of the *nearest* distance is biased low by positional disorder (a minimum over
    six neighbours), so the median is taken over all bonds of the first shell: neighbours closer
    than 1.2 times the median nearest distance (the second shell is at sqrt(3) for a triangular
    and sqrt(2) for a square lattice).
    """
    n = xy.shape[0]
    if n < 3:
        return float("nan")
    # A regular subsample of at most 4000 sites asks the tree: the median is as good, the
    # query (the cost here) several times cheaper for large images.
    step = max(1, n // 4000)
    dist, _ = cKDTree(xy, balanced_tree=False).query(xy[::step], k=min(7, n))
    dist = dist[:, 1:]
    d1 = np.median(dist[:, 0])
    return float(np.median(dist[dist < _BOND_CUT * d1]))


# --------------------------------------------------------------------------------------------
# Detection


def _detect(img: np.ndarray, spacing: float, polarity: str, noise: float, name: str,
            spots: bool = False):
    """Sites (x, y) and polarity found with the filters set by ``spacing``.

    ``spots``: the pattern has no preferred spacing, ``spacing`` comes from the spots' size
    (:func:`_spacing_from_spots`) and the spots sit on a flat background.
    """
    f = max(1, int(spacing // _DETECT_PX_PER_SPACING))
    low = _block_mean(img, f)
    a = spacing / f
    # Centre-surround blob filter (difference of Gaussians). The surround of 0.3 spacing reaches
    # the walls around a pore but hardly its neighbours, so a small pore among large ones is
    # measured against its own walls, not against the mean grey level of the field (which
    # large neighbours pull below a small pore's centre); slow illumination cancels as well.
    s_feat, s_sur = _FEATURE_SIGMA * a, _SURROUND_RATIO * _FEATURE_SIGMA * a
    band = ndimage.gaussian_filter(low, s_feat, mode="reflect")
    band -= ndimage.gaussian_filter(low, s_sur, mode="reflect")
    # Noise of one pixel of ``band``: block averaging divides it by f, the filter by its norm.
    sigma = noise / f * _dog_norm(s_feat, s_sur)
    found = None
    if spots:
        # Spots on a flat background: the background's own noise maxima, which a lattice's
        # walls would push below zero, stand up to a few sigmas high here.
        sigma *= _SPOT_NOISE_FACTOR / _NOISE_FACTOR
        if polarity == "auto":
            polarity = _spot_polarity(band)
    elif polarity == "auto":
        polarity, found = _polarity(band, a, sigma)
    sign = 1.0 if polarity == "bright" else -1.0
    if sign < 0:
        band = np.negative(band, out=band)
    peaks, height = found if found is not None else _candidates(band, a, sigma,
                                                                 expected=not spots)
    if spots and peaks is not None and not _stand_out(band, height):
        peaks = None  # smooth random texture, not spots on a background
    if peaks is None:
        raise PatternError(
            f"{name}: no features stand clearly above the noise at a spacing of {spacing:.1f} px; "
            "check that the image shows a lattice pattern and the magnification"
        )

    yx = peaks + _quadratic_offset(band, peaks)
    if not spots:  # an elongated pore is two maxima in one cell of a lattice
        yx = _merge_elongated(band, yx, height, _MERGE_DISTANCE * a)
    peaks = np.clip(np.rint(yx).astype(np.intp), 0, np.array(band.shape) - 1)
    yx = (yx + 0.5) * f - 0.5  # block centres back to full-resolution pixel coordinates
    near = (yx < spacing).any(axis=1) | (yx[:, 0] > img.shape[0] - 1 - spacing) | (
        yx[:, 1] > img.shape[1] - 1 - spacing
    )
    if near.any():
        background = _background(low, _BACKGROUND_SIGMA * a)
        level = background[peaks[near, 0], peaks[near, 1]]
        yx[near] = _centroid(img, yx[near], level, sign, _CENTROID_RADIUS * spacing)
    return yx[:, ::-1].copy(), polarity


def _merge_elongated(
    band: np.ndarray, yx: np.ndarray, height: np.ndarray, distance: float
) -> np.ndarray:
    """Join maxima closer than ``distance`` that no wall separates into one site.

    An elongated pore (two pores grown together) has two maxima of the blob filter about half
    a spacing apart with no dip between them; two neighbouring pores, however close, have a
    wall between them where the filter falls well below both. The joined site is the
    height-weighted mean of its maxima.
    """
    if yx.shape[0] < 2:
        return yx
    pairs = cKDTree(yx).query_pairs(distance, output_type="ndarray")
    if pairs.size == 0:
        return yx
    t = np.linspace(0.0, 1.0, 9)[1:-1]
    p, q = yx[pairs[:, 0]], yx[pairs[:, 1]]
    line = p[:, None, :] + t[None, :, None] * (q - p)[:, None, :]
    coords = line.reshape(-1, 2).T
    along = ndimage.map_coordinates(band, coords, order=1, mode="nearest").reshape(line.shape[:2])
    low = np.minimum(height[pairs[:, 0]], height[pairs[:, 1]])
    joined = pairs[along.min(axis=1) > _MERGE_SADDLE * low]
    if joined.size == 0:
        return yx
    n = yx.shape[0]
    graph = coo_matrix((np.ones(len(joined)), (joined[:, 0], joined[:, 1])), shape=(n, n))
    _, label = connected_components(graph, directed=False)
    w = np.maximum(height, 1e-12)
    total = np.bincount(label, w)
    out = np.column_stack([np.bincount(label, w * yx[:, k]) / total for k in range(2)])
    return out


def _block_mean(img: np.ndarray, f: int) -> np.ndarray:
    """Mean over f x f blocks (the last rows/columns that do not fill a block are dropped)."""
    if f == 1:
        return img
    rows, cols = (img.shape[0] // f) * f, (img.shape[1] // f) * f
    out = np.zeros((rows // f, cols // f), dtype=np.float32)
    for i in range(f):  # f*f strided adds: much faster than reshape(...).mean()
        for j in range(f):
            out += img[i:rows:f, j:cols:f]
    out *= 1.0 / (f * f)
    return out


def _background(img: np.ndarray, sigma: float) -> np.ndarray:
    """Gaussian background of scale ``sigma`` px, computed on a coarser grid and interpolated."""
    g = max(1, int(sigma // 4))
    small = ndimage.gaussian_filter(_block_mean(img, g), sigma / g, mode="reflect")
    if g == 1 and small.shape == img.shape:
        return small
    # Centre of coarse cell j sits at full-grid position (j + 0.5) g - 0.5.
    rr = (np.arange(img.shape[0], dtype=np.float32) + 0.5) / g - 0.5
    cc = (np.arange(img.shape[1], dtype=np.float32) + 0.5) / g - 0.5
    return _bilinear_grid(small, rr, cc)


def _bilinear_grid(small: np.ndarray, rr: np.ndarray, cc: np.ndarray) -> np.ndarray:
    """Separable linear interpolation of ``small`` at rows ``rr`` x cols ``cc`` (edges held)."""

    def axis_weights(pos, n):
        pos = np.clip(pos, 0, n - 1)
        i0 = np.minimum(pos.astype(np.int64), max(n - 2, 0))
        t = (pos - i0).astype(np.float32)
        i1 = np.minimum(i0 + 1, n - 1)
        return i0, i1, t

    r0, r1, tr = axis_weights(rr, small.shape[0])
    c0, c1, tc = axis_weights(cc, small.shape[1])
    rows = small[r0] * (1 - tr)[:, None] + small[r1] * tr[:, None]
    return rows[:, c0] * (1 - tc)[None, :] + rows[:, c1] * tc[None, :]


def _candidates(band: np.ndarray, a: float, sigma: float, expected: bool = True):
    """Integer (row, col) maxima of ``band`` that pass as sites, and their heights.

    Maxima of a window small enough not to reach the shoulder of a brighter neighbour (its
    corner is 0.35 spacing away), at most one per half spacing, standing a few noise sigmas
    above zero and a fraction of the typical site height. ``(None, None)`` when the typical
    height does not stand clearly above the noise (no pattern).
    """
    peaks = _local_maxima(band, max(1, int(_CANDIDATE_WINDOW * a)), 0.0)
    peaks = _separate(peaks, band[peaks[:, 0], peaks[:, 1]], _MIN_SEPARATION * a)
    height = band[peaks[:, 0], peaks[:, 1]]
    if expected:
        n_expected = max(1, int(band.size / (np.sqrt(3.0) / 2.0 * a * a)))
    else:  # no lattice to count sites by: the maxima above the noise bar are the candidates
        n_expected = max(1, int(np.count_nonzero(height > _NOISE_FACTOR * sigma)))
    typical = float(np.median(np.sort(height)[::-1][:n_expected])) if height.size else 0.0
    if not typical > _MIN_SIGNAL * sigma:
        return None, None
    keep = height > max(_NOISE_FACTOR * sigma, _RELATIVE_HEIGHT * typical)
    return peaks[keep], height[keep]


def _spot_polarity(band: np.ndarray) -> str:
    """Spots on a flat background: the sign whose extremes reach farther from the background."""
    lo, hi = np.percentile(band, [0.1, 99.9])
    return "bright" if hi >= -lo else "dark"


def _stand_out(band: np.ndarray, height: np.ndarray) -> bool:
    """Whether the spots stand far above the background's spread of the filter.

    Spots on a flat background leave most of the filtered image near zero (a small median
    absolute deviation) and their peaks far above it; smooth random texture has peaks only a
    few of its own deviations high.
    """
    if height.size == 0:
        return False
    spread = 1.4826 * float(np.median(np.abs(band - np.median(band))))
    return float(np.median(height)) > _SPOT_CONTRAST * max(spread, 1e-12)


def _polarity(band: np.ndarray, spacing: float, sigma: float):
    """"bright" or "dark": the polarity whose sites have the more regular nearest neighbours.

    Sites of the right polarity sit one per cell of the pattern; the extrema of the matrix
    between them (at the centres of the triangles of sites, two per cell) are weaker, merge
    and split with the local disorder, and give a much wider spread of nearest-neighbour
    distances. Measured on a central tile to save time; a close-packed pattern whose gaps look
    regular too is caught later by its too short bonds. Also returns the winner's
    ``_candidates`` when the tile is the whole band (so they need not be found again), else None.
    """
    tile = _central_tile(band, 512)
    spread, found = [], []
    for sign in (1.0, -1.0):
        peaks, height = _candidates(tile if sign > 0 else -tile, spacing, sigma)
        found.append((peaks, height))
        if peaks is None or peaks.shape[0] < 8:
            spread.append(np.inf)
            continue
        nn = cKDTree(peaks).query(peaks, k=2)[0][:, 1]
        spread.append(float(np.std(nn) / np.mean(nn)))
    pick = 0 if spread[0] < spread[1] else 1
    return ("bright", "dark")[pick], (found[pick] if tile.shape == band.shape else None)


def _pixel_noise(img: np.ndarray) -> float:
    """Robust standard deviation of the pixel noise (MAD of the finest diagonal Haar detail).

    The diagonal detail of 2x2 blocks cancels smooth shading and straight edges, so what is left
    is mostly noise; the median absolute deviation ignores the few pixels on curved edges.
    """
    t = _central_tile(img, _SPECTRUM_TILE)
    r, c = (t.shape[0] // 2) * 2, (t.shape[1] // 2) * 2
    d = 0.5 * (t[0:r:2, 0:c:2] - t[0:r:2, 1:c:2] - t[1:r:2, 0:c:2] + t[1:r:2, 1:c:2])
    return float(np.median(np.abs(d)) / 0.6745)


def _dog_norm(s1: float, s2: float) -> float:
    """L2 norm of the difference of scipy's 2-D Gaussian kernels of sigmas ``s1`` < ``s2``."""
    radius = int(4.0 * s2 + 0.5)
    x = np.arange(-radius, radius + 1, dtype=np.float64)
    g1 = np.exp(-0.5 * (x / s1) ** 2) * (np.abs(x) <= int(4.0 * s1 + 0.5))
    g2 = np.exp(-0.5 * (x / s2) ** 2)
    g1 /= g1.sum()
    g2 /= g2.sum()
    # ||g1 (x) g1 - g2 (x) g2||^2 expands into products of 1-D sums (separable kernels).
    sq = np.sum(g1 * g1) ** 2 + np.sum(g2 * g2) ** 2 - 2.0 * np.sum(g1 * g2) ** 2
    return float(np.sqrt(max(sq, 0.0)))


def _local_maxima(filtered: np.ndarray, min_distance: int, threshold: float) -> np.ndarray:
    """Integer (row, col) of local maxima above ``threshold``, at least ``min_distance`` apart.

    Same rule as :func:`skimage.feature.peak_local_max` with ``exclude_border=False``: a pixel is
    a peak when it equals the maximum of the (2 d + 1)-square around it; among equal peaks closer
    than ``d`` (Chebyshev) the first in raster order is kept. Without that function's general
    spacing pass, which is slow for tens of thousands of peaks: inside one window only equal
    values can both be maxima, so only plateau ties need resolving.
    """
    d = int(min_distance)
    size = 2 * d + 1
    local_max = ndimage.maximum_filter(filtered, size=size, mode="nearest")
    mask = filtered == local_max
    if mask.all():  # a flat image has no peaks
        return np.zeros((0, 2), dtype=np.intp)
    mask &= filtered > threshold
    coords = np.argwhere(mask)
    order = np.argsort(-filtered[mask], kind="stable")
    coords = coords[order]
    if d > 1 and coords.shape[0] > 1:
        pairs = cKDTree(coords).query_pairs(r=d - 1, p=np.inf, output_type="ndarray")
        if pairs.size:
            coords = coords[~_rejected(coords.shape[0], pairs)]
    return coords


def _separate(coords: np.ndarray, height: np.ndarray, distance: float) -> np.ndarray:
    """Drop peaks closer than ``distance`` (Euclidean) to a higher kept one, greedily by height."""
    if coords.shape[0] < 2:
        return coords
    order = np.argsort(-height, kind="stable")
    coords = coords[order]
    pairs = cKDTree(coords).query_pairs(r=distance, output_type="ndarray")
    pairs = pairs[np.hypot(*(coords[pairs[:, 0]] - coords[pairs[:, 1]]).T) < distance]
    if pairs.size == 0:
        return coords
    first, second = pairs.min(axis=1), pairs.max(axis=1)  # first ranks higher
    keep = np.ones(coords.shape[0], dtype=bool)
    # Fixed point of "kept unless a kept higher peak is too close": exact after as many rounds
    # as the longest chain of close peaks, which is a few.
    for _ in range(coords.shape[0]):
        rejected = np.zeros_like(keep)
        rejected[second[keep[first]]] = True
        new = ~rejected
        if np.array_equal(new, keep):
            break
        keep = new
    return coords[keep]


def _rejected(n: int, pairs: np.ndarray) -> np.ndarray:
    # Greedy in rank order: a kept peak rejects its later neighbours. Only tied plateau pixels
    # come here, a handful per image, so a plain loop is fine.
    pairs = np.sort(pairs, axis=1)
    pairs = pairs[np.lexsort((pairs[:, 1], pairs[:, 0]))]
    rejected = np.zeros(n, dtype=bool)
    for i, j in pairs:
        if not rejected[i]:
            rejected[j] = True
    return rejected


def _quadratic_offset(im: np.ndarray, peaks: np.ndarray) -> np.ndarray:
    """Sub-pixel (drow, dcol) of each peak: maximum of a quadratic fitted to its 3x3 patch."""
    if peaks.shape[0] == 0:
        return np.zeros((0, 2))
    r = peaks[:, 0][:, None, None] + np.arange(-1, 2)[None, :, None]
    c = peaks[:, 1][:, None, None] + np.arange(-1, 2)[None, None, :]
    v = im[np.clip(r, 0, im.shape[0] - 1), np.clip(c, 0, im.shape[1] - 1)].astype(np.float64)
    # Least-squares quadratic f = c0 + g.x + x.H.x / 2 over the 3x3 grid (closed form).
    gx = (v[:, :, 2] - v[:, :, 0]).sum(axis=1) / 6.0
    gy = (v[:, 2, :] - v[:, 0, :]).sum(axis=1) / 6.0
    hxx = (v[:, :, 2] + v[:, :, 0] - 2.0 * v[:, :, 1]).sum(axis=1) / 3.0
    hyy = (v[:, 2, :] + v[:, 0, :] - 2.0 * v[:, 1, :]).sum(axis=1) / 3.0
    hxy = (v[:, 2, 2] - v[:, 2, 0] - v[:, 0, 2] + v[:, 0, 0]) / 4.0
    det = hxx * hyy - hxy * hxy
    ok = (det > 0) & (hxx < 0)
    det = np.where(ok, det, 1.0)
    dx = np.where(ok, -(hyy * gx - hxy * gy) / det, 0.0)
    dy = np.where(ok, -(hxx * gy - hxy * gx) / det, 0.0)
    return np.clip(np.column_stack([dy, dx]), -0.75, 0.75)


def _centroid(
    img: np.ndarray, yx: np.ndarray, level: np.ndarray, sign: float, radius: float, n_iter: int = 3
) -> np.ndarray:
    """Iterated intensity-weighted centroid above ``level`` in a disc around each (row, col).

    Used where the smoothing filter sees past the image edge: the window is clipped to the frame
    instead, so a feature cut by the edge pulls its centre into the frame rather than out.
    """
    rad = max(1, int(np.ceil(radius)))
    dy, dx = np.mgrid[-rad : rad + 1, -rad : rad + 1]
    disc = dy**2 + dx**2 <= radius**2
    dy, dx = dy[disc], dx[disc]
    rows, cols = img.shape
    yx = yx.copy()
    for _ in range(n_iter):
        r = np.rint(yx[:, 0]).astype(np.intp)[:, None] + dy[None, :]
        c = np.rint(yx[:, 1]).astype(np.intp)[:, None] + dx[None, :]
        inside = (r >= 0) & (r < rows) & (c >= 0) & (c < cols)
        v = img[np.clip(r, 0, rows - 1), np.clip(c, 0, cols - 1)]
        w = np.where(inside, np.maximum(sign * (v - level[:, None]), 0.0), 0.0)
        total = w.sum(axis=1)
        ok = total > 0
        yx[ok, 0] = (w[ok] * r[ok]).sum(axis=1) / total[ok]
        yx[ok, 1] = (w[ok] * c[ok]).sum(axis=1) / total[ok]
    return yx
