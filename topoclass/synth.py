"""Synthetic demo micrographs with ground truth.

The scenario: top-view micrographs of porous anodic-alumina membranes from an anodising line,
dark pores on bright oxide, nominally hexagonal. All images made here are invented data for the
demo and for tests of the site finder; they are not measurements.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage
from scipy.spatial import cKDTree


def hexagonal_lattice(
    shape: tuple[int, int],
    spacing: float,
    *,
    angle: float = 0.0,
    jitter: float = 0.0,
    margin: float = 0.0,
    seed: int | None = 0,
) -> np.ndarray:
    """Sites of a triangular (hexagonally packed) lattice covering an image.

    Parameters
    ----------
    shape : (rows, cols)
        Image size in pixels.
    spacing : float
        Nearest-neighbour distance in pixels.
    angle : float
        Lattice rotation in degrees.
    jitter : float
        Standard deviation of a Gaussian displacement of each site, in units of ``spacing``.
    margin : float
        Keep sites at least this many pixels inside the frame (negative keeps sites just outside,
        so that features cut by the border are drawn).
    seed : int or None
        Seed of the jitter.

    Returns
    -------
    ndarray of shape (n, 2): x (right) and y (down) in pixels.
    """
    rng = np.random.default_rng(seed)
    rows, cols = int(shape[0]), int(shape[1])
    half = 0.5 * np.hypot(rows, cols) + 2 * spacing
    n = int(np.ceil(half / spacing)) + 1
    i, j = np.meshgrid(np.arange(-n, n + 1), np.arange(-2 * n, 2 * n + 1), indexing="ij")
    # Primitive vectors of the triangular lattice: (a, 0) and (a/2, a*sqrt(3)/2).
    u = spacing * (i + 0.5 * j)
    v = spacing * (np.sqrt(3.0) / 2.0) * j
    theta = np.deg2rad(angle)
    x = np.cos(theta) * u - np.sin(theta) * v + cols / 2.0
    y = np.sin(theta) * u + np.cos(theta) * v + rows / 2.0
    xy = np.column_stack([x.ravel(), y.ravel()])
    if jitter > 0:
        xy = xy + rng.normal(scale=jitter * spacing, size=xy.shape)
    keep = (
        (xy[:, 0] >= margin)
        & (xy[:, 0] <= cols - 1 - margin)
        & (xy[:, 1] >= margin)
        & (xy[:, 1] <= rows - 1 - margin)
    )
    return xy[keep]


def render_micrograph(
    xy: np.ndarray,
    shape: tuple[int, int],
    radius: float | np.ndarray,
    *,
    polarity: str = "dark",
    edge_width: float = 1.0,
    blur: float = 0.0,
    illumination: float = 0.0,
    noise: float = 0.0,
    contrast: float = 0.6,
    seed: int | None = 0,
) -> np.ndarray:
    """Draw round features at ``xy`` into an image.

    Parameters
    ----------
    xy : ndarray of shape (n, 2)
        Feature centres in pixels (x right, y down).
    shape : (rows, cols)
        Image size.
    radius : float or ndarray of shape (n,)
        Feature radius in pixels, one value or one per feature.
    polarity : {"dark", "bright"}
        Dark pores on a bright matrix (anodic alumina) or bright dots on a dark one.
    edge_width : float
        Width in pixels of the soft feature edge (logistic profile).
    blur : float
        Gaussian blur sigma in pixels (instrument resolution).
    illumination : float
        Relative amplitude of a smooth multiplicative illumination gradient (0 = even).
    noise : float
        Standard deviation of additive Gaussian noise, relative to the feature contrast; shot
        noise is approximated this way because it is what matters for site finding.
    contrast : float
        Intensity difference between matrix and feature before noise.
    seed : int or None
        Seed of the noise and illumination field.

    Returns
    -------
    ndarray of float32, shape ``shape``, values in [0, 1].
    """
    rng = np.random.default_rng(seed)
    rows, cols = int(shape[0]), int(shape[1])
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    radius = np.broadcast_to(np.asarray(radius, dtype=float), (xy.shape[0],))
    yy, xx = np.mgrid[0:rows, 0:cols]
    pix = np.column_stack([xx.ravel() + 0.0, yy.ravel() + 0.0])
    if xy.shape[0]:
        dist, idx = cKDTree(xy).query(pix, k=1, workers=-1)
        arg = np.clip((radius[idx] - dist) / max(edge_width, 1e-6), -50, 50)
        feature = (1.0 / (1.0 + np.exp(-arg))).reshape(rows, cols)
    else:
        feature = np.zeros((rows, cols))
    if polarity == "dark":
        img = 0.8 - contrast * feature
    elif polarity == "bright":
        img = 0.2 + contrast * feature
    else:
        raise ValueError(f"polarity must be 'dark' or 'bright', not {polarity!r}")
    if blur > 0:
        img = ndimage.gaussian_filter(img, blur)
    if illumination > 0:
        # A tilt plus one broad bump: what uneven SEM/AFM illumination typically looks like.
        gx, gy = rng.normal(size=2)
        cy, cx = rng.uniform(0, rows), rng.uniform(0, cols)
        scale = max(rows, cols)
        field = gx * (xx - cols / 2) / scale + gy * (yy - rows / 2) / scale
        field = field + np.exp(-(((xx - cx) ** 2 + (yy - cy) ** 2) / (0.5 * scale) ** 2))
        field = (field - field.mean()) / (np.ptp(field) + 1e-12)
        img = img * (1.0 + illumination * field)
    if noise > 0:
        img = img + rng.normal(scale=noise * contrast, size=img.shape)
    return np.clip(img, 0.0, 1.0).astype(np.float32)
