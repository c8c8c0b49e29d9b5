"""Synthetic demo micrographs with ground truth.

The scenario: top-view micrographs of porous anodic-alumina membranes from an anodising line,
dark pores on bright oxide, nominally hexagonal. All images made here are invented data for the
demo and for tests of the site finder; they are not measurements.
"""

from __future__ import annotations

import json
from contextlib import nullcontext
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import numpy as np
import tifffile
from PIL import Image
from scipy import ndimage
from scipy.spatial import Delaunay, cKDTree

from topoclass._progress import progress_bar
from topoclass.labels import write_labels
from topoclass.sites import circumcircles

KINDS = ("ordered", "vacancies", "grains", "disordered")
# Pore spacing of oxalic-acid anodised alumina (about 100 nm at 40 V: common practice); it sets
# the pixel size written into the TIFF files.
PORE_SPACING_NM = 100.0
SPACING_RANGE_PX = (8.0, 20.0)
TIFF_FRACTION = 0.25
_SQRT3 = np.sqrt(3.0)


def hexagonal_lattice(
    shape: tuple[int, int],
    spacing: float,
    *,
    angle: float = 0.0,
    jitter: float = 0.0,
    margin: float = 0.0,
    seed: int | None = 0,
    offset: tuple[float, float] = (0.0, 0.0),
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
    offset : (dx, dy)
        Shift of the lattice origin from the image centre, in pixels (at most about one spacing,
        so that the frame stays covered).

    Returns
    -------
    ndarray of shape (n, 2): x (right) and y (down) in pixels.
    """
    rng = np.random.default_rng(seed)
    rows, cols = int(shape[0]), int(shape[1])
    half = 0.5 * np.hypot(rows, cols) + 2 * spacing
    n = int(np.ceil(half / spacing)) + 1
    i, j = np.meshgrid(np.arange(-2 * n, 2 * n + 1), np.arange(-2 * n, 2 * n + 1),
                       indexing="ij")
    # The sheared index block |i| <= n, |j| <= 2n reaches only 0.87 of ``half`` towards two
    # of its corners, which left a corner of large frames empty; |i| <= 2n covers the circle.
    # Its points come first, so their jitter (and every frame it covered) stays as it was.
    first = np.abs(i.ravel()) <= n
    order = np.concatenate([np.flatnonzero(first), np.flatnonzero(~first)])
    i, j = i.ravel()[order], j.ravel()[order]
    # Primitive vectors of the triangular lattice: (a, 0) and (a/2, a*sqrt(3)/2).
    u = spacing * (i + 0.5 * j)
    v = spacing * (np.sqrt(3.0) / 2.0) * j
    theta = np.deg2rad(angle)
    x = np.cos(theta) * u - np.sin(theta) * v + cols / 2.0 + float(offset[0])
    y = np.sin(theta) * u + np.cos(theta) * v + rows / 2.0 + float(offset[1])
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


def square_lattice(
    shape: tuple[int, int],
    spacing: float,
    *,
    angle: float = 0.0,
    jitter: float = 0.0,
    margin: float = 0.0,
    seed: int | None = 0,
) -> np.ndarray:
    """Sites of a square lattice covering an image: a pattern of another symmetry.

    Not a class of the demo: a membrane never grows this way, so a model trained on
    hexagonal patterns must call such an image unfamiliar. Parameters as in
    :func:`hexagonal_lattice`.
    """
    rng = np.random.default_rng(seed)
    rows, cols = int(shape[0]), int(shape[1])
    n = int(np.ceil((0.5 * np.hypot(rows, cols) + 2 * spacing) / spacing)) + 1
    i, j = np.meshgrid(np.arange(-n, n + 1), np.arange(-n, n + 1), indexing="ij")
    u, v = spacing * i.ravel(), spacing * j.ravel()
    theta = np.deg2rad(angle)
    xy = np.column_stack([np.cos(theta) * u - np.sin(theta) * v + cols / 2.0,
                          np.sin(theta) * u + np.cos(theta) * v + rows / 2.0])
    if jitter > 0:
        xy = xy + rng.normal(scale=jitter * spacing, size=xy.shape)
    return xy[_in_frame(xy, shape, margin=margin)]


def square_micrograph(*, size: int = 320, seed: int, spacing: float | None = None) -> np.ndarray:
    """An invented micrograph of a square pattern, drawn like the membrane images.

    Spacing, jitter, pore size, blur and noise are drawn from the ranges of
    :func:`draw_sample`, so only the symmetry differs from the training images.
    """
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0x5C]))
    if spacing is None:
        spacing = float(rng.uniform(*SPACING_RANGE_PX))
    xy = square_lattice((size, size), spacing, angle=float(rng.uniform(0, 90)),
                        jitter=float(rng.uniform(0.02, 0.04)), margin=-1.5 * spacing,
                        seed=int(rng.integers(2**63 - 1)))
    return render_micrograph(xy, (size, size), spacing * float(rng.uniform(0.26, 0.34)),
                             edge_width=float(rng.uniform(0.5, 1.2)),
                             blur=float(rng.uniform(0.5, 1.3)),
                             illumination=float(rng.uniform(0.0, 0.35)),
                             noise=float(rng.uniform(0.04, 0.2)),
                             contrast=float(rng.uniform(0.45, 0.7)),
                             seed=int(rng.integers(2**63 - 1)))


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
    rim: float = 0.0,
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
    rim : float
        Brightness of a thin rim along each feature's edge, relative to ``contrast`` (0 = none):
        the edge effect of secondary-electron images, where the walls around a pore light up.
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
    # 4 f (1 - f) is 1 on the edge of the logistic profile and falls off to both sides.
    edge = 4.0 * feature * (1.0 - feature) if rim else 0.0
    if polarity == "dark":
        img = 0.8 - contrast * feature + rim * contrast * edge
    elif polarity == "bright":
        img = 0.2 + contrast * feature + rim * contrast * edge
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


def add_data_bar(
    image: np.ndarray,
    *,
    height: int | None = None,
    polarity: str = "dark",
    edge: str = "bottom",
    seed: int | None = 0,
) -> tuple[np.ndarray, int]:
    """Append an instrument data bar to an invented micrograph, as microscopes export them.

    A uniform band along one edge holding a line of acquisition text (drawn with Pillow's
    built-in font) and a scale bar with its length, all invented.

    Parameters
    ----------
    image : ndarray of shape (rows, cols)
        Grey image in [0, 1].
    height : int, optional
        Band height in pixels; default 12 % of the image rows (at least 24).
    polarity : {"dark", "bright"}
        Black band with white marks, or white band with black marks.
    edge : {"bottom", "top"}
        Where the band goes.
    seed : int or None
        Seed of the text and of the scale bar's length.

    Returns
    -------
    image : ndarray of float32, shape (rows + height, cols)
        The micrograph with the band added outside its frame.
    boundary : int
        First row of the band (``edge="bottom"``) or first row below it (``"top"``).
    """
    from PIL import ImageDraw, ImageFont

    if polarity not in ("dark", "bright"):
        raise ValueError(f"polarity must be 'dark' or 'bright', not {polarity!r}")
    if edge not in ("bottom", "top"):
        raise ValueError(f"edge must be 'bottom' or 'top', not {edge!r}")
    image = np.asarray(image, dtype=np.float32)
    rows, cols = image.shape
    height = int(height if height is not None else max(24, round(0.12 * rows)))
    rng = np.random.default_rng(seed)
    back, ink = (0, 255) if polarity == "dark" else (255, 0)
    band = Image.new("L", (cols, height), color=back)
    draw = ImageDraw.Draw(band)
    size = max(8, min(height // 3, cols // 40))
    font = ImageFont.load_default(size=size)
    kv, mag, wd = rng.choice([3, 5, 10, 15]), rng.choice([20, 50, 100]), rng.uniform(3, 9)
    fields = [f"{kv} kV", f"x{mag},000", f"WD {wd:.1f} mm", "line A",
              f"sample {rng.integers(1, 99):02d}"]
    text = "   ".join(fields)
    while len(fields) > 1 and draw.textlength(text, font=font) > 0.6 * cols:
        fields.pop()  # a narrow frame shows fewer fields, as instruments do
        text = "   ".join(fields)
    draw.text((max(2, cols // 60), height // 2), text, fill=ink, font=font, anchor="lm")
    bar_len = int(cols * rng.uniform(0.1, 0.2))
    x1 = cols - max(4, cols // 30)
    y0 = height // 2 - max(1, height // 12)
    draw.rectangle([x1 - bar_len, y0, x1, y0 + max(2, height // 6)], fill=ink)
    draw.text((x1 - bar_len // 2, y0 - 2), f"{rng.choice([200, 500, 1000])} nm", fill=ink,
              font=font, anchor="mb")
    strip = np.asarray(band, dtype=np.float32) / 255.0
    if edge == "bottom":
        return np.vstack([image, strip]), rows
    return np.vstack([strip, image]), height


def make_sites(
    kind: str,
    shape: tuple[int, int],
    spacing: float,
    *,
    rng: np.random.Generator,
    params: dict | None = None,
) -> tuple[np.ndarray, dict]:
    """Site coordinates of one invented membrane pattern of the given class.

    Parameters
    ----------
    kind : {"ordered", "vacancies", "grains", "disordered"}
        Class of the pattern.
    shape : (rows, cols)
        Image size in pixels.
    spacing : float
        Nominal pore spacing (nearest-neighbour distance of the ideal lattice) in pixels.
    rng : numpy.random.Generator
        Source of every random step.
    params : dict, optional
        Fixed values for the amounts of disorder (for example ``jitter``, ``vacancy_fraction``,
        ``merge_fraction``, ``n_grains``, ``min_distance``, ``relax_steps``, ``angle_deg``);
        whatever is missing is drawn from ``rng``.

    Returns
    -------
    xy : ndarray of shape (n, 2)
        Sites in pixels (x right, y down), covering the frame plus a border about one spacing
        wide, so that pores cut by the frame can be drawn.
    info : dict
        The generator parameters and records (JSON-ready), e.g. removed and merged sites.
    """
    layout = _layout(kind, shape, spacing, rng=rng, params=params)
    return layout.xy, layout.info


def make_micrograph(
    kind: str, *, size: int = 384, seed: int, sample: dict | None = None,
    amounts: dict | None = None,
) -> tuple[np.ndarray, dict]:
    """One invented top-view micrograph of a porous anodic-alumina membrane, with ground truth.

    Parameters
    ----------
    kind : {"ordered", "vacancies", "grains", "disordered"}
        Class of the pattern.
    size : int
        Image side in pixels.
    seed : int
        Seed of every random step; the same seed gives the same image and truth.
    sample : dict, optional
        Parameters shared by the images of one simulated membrane sample (magnification range,
        pore radius, instrument settings, amount of disorder), as made by :func:`draw_sample`.
        Drawn from ``seed`` when not given.
    amounts : dict, optional
        Amounts of disorder of this image, replacing those drawn around the sample's values
        (for harder sets): ``jitter``, ``vacancy_fraction``, ``merge_fraction``, ``n_grains``,
        ``angles_deg`` (one lattice angle per grain), ``min_distance``, ``relax_steps``.

    Returns
    -------
    image : ndarray of float32, shape (size, size), values in [0, 1]
        Dark pores on bright oxide.
    truth : dict
        JSON-ready ground truth: ``kind``, ``sites`` (in-frame sites, n x 2, pixels),
        ``spacing_px``, ``pixel_size_nm``, angles, radius statistics, blur, noise, illumination,
        vacancy and merge counts, number of grains and the generator parameters.
    """
    _check_kind(kind)
    size = int(size)
    if size < 32:
        raise ValueError(f"size must be at least 32 pixels, not {size}")
    # The class enters the seed, so that classes made with one seed do not share magnification.
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), KINDS.index(kind)]))
    if sample is None:
        sample = draw_sample(kind, seed=int(rng.integers(2**63 - 1)))
    elif sample.get("kind", kind) != kind:
        raise ValueError(f"sample parameters are for {sample['kind']!r}, not {kind!r}")
    shape = (size, size)

    lo, hi = sample["spacing_range_px"]
    spacing = float(rng.uniform(lo, hi))
    params = {**_image_amounts(kind, sample, rng), **(amounts or {})}
    layout = _layout(kind, shape, spacing, rng=rng, params=params)

    # Pore radii: one mean per sample, a per-pore spread, and never wider than the wall allows
    # (real pores do not overlap: a wall of oxide always separates neighbours).
    fraction = float(np.clip(sample["radius_fraction"] + rng.normal(0, 0.005), 0.25, 0.35))
    spread = sample["radius_spread"]
    per_pore = 1.0 + spread * rng.standard_normal(len(layout.xy))
    radius = spacing * fraction * layout.scale * per_pore
    nn = _nearest_distance(layout.xy)
    radius = np.clip(radius, 0.12 * spacing, 0.42 * nn)
    centres, radii = _render_centres(layout.xy, layout.axis, radius)

    blur = float(sample["blur_px"] * rng.uniform(0.8, 1.25))
    noise = float(sample["noise"] * rng.uniform(0.8, 1.25))
    illumination = float(rng.uniform(0.0, 0.35))
    contrast = float(sample["contrast"])
    edge_width = float(sample["edge_width_px"])
    image = render_micrograph(
        centres,
        shape,
        radii,
        polarity="dark",
        edge_width=edge_width,
        blur=blur,
        illumination=illumination,
        noise=noise,
        contrast=contrast,
        rim=float(sample.get("rim", 0.0)),
        seed=int(rng.integers(2**63 - 1)),
    )

    inside = _in_frame(layout.xy, shape)
    r_in = radius[inside]
    truth = {
        "kind": kind,
        "invented": True,
        "size": size,
        "seed": int(seed),
        "spacing_px": spacing,
        "pore_spacing_nm": PORE_SPACING_NM,
        "pixel_size_nm": PORE_SPACING_NM / spacing,
        "n_sites": int(inside.sum()),
        "radius_mean_px": float(r_in.mean()) if r_in.size else None,
        "radius_std_px": float(r_in.std()) if r_in.size else None,
        "radius_min_px": float(r_in.min()) if r_in.size else None,
        "radius_max_px": float(r_in.max()) if r_in.size else None,
        "radius_fraction": fraction,
        "radius_spread": spread,
        "blur_px": blur,
        "noise": noise,
        "illumination": illumination,
        "contrast": contrast,
        "edge_width_px": edge_width,
        "polarity": "dark",
    }
    truth.update(layout.info)
    truth["sample"] = dict(sample)
    truth["sites"] = np.round(layout.xy[inside], 3).tolist()
    return image, truth


def draw_sample(kind: str, *, seed: int) -> dict:
    """Parameters shared by the images of one simulated membrane sample.

    A physical sample is imaged at one magnification setting (with small changes between
    fields), has one pore radius (set by the pore-widening time) and one characteristic amount of
    disorder; the instrument settings (focus, noise) are similar between its images.
    """
    _check_kind(kind)
    rng = np.random.default_rng(seed)
    centre = rng.uniform(SPACING_RANGE_PX[0] + 0.5, SPACING_RANGE_PX[1] - 0.5)
    lo = max(SPACING_RANGE_PX[0], centre * 0.94)
    hi = min(SPACING_RANGE_PX[1], centre * 1.06)
    sample = {
        "kind": kind,
        "spacing_range_px": [float(lo), float(hi)],
        "radius_fraction": float(rng.uniform(0.26, 0.34)),
        "radius_spread": float(rng.uniform(0.05, 0.15)),
        "blur_px": float(rng.uniform(0.5, 1.3)),
        "noise": float(rng.uniform(0.04, 0.2)),
        "contrast": float(rng.uniform(0.45, 0.7)),
        "edge_width_px": float(rng.uniform(0.5, 1.2)),
    }
    if kind != "disordered":
        sample["jitter"] = float(rng.uniform(0.022, 0.042))
    if kind == "vacancies":
        sample["vacancy_fraction"] = float(rng.uniform(0.03, 0.09))
        sample["merge_fraction"] = float(rng.uniform(0.005, 0.025))
    elif kind == "grains":
        sample["grain_density"] = float(rng.uniform(0.0, 1.0))  # 0: few large, 1: many small
    elif kind == "disordered":
        sample["min_distance"] = float(rng.uniform(0.68, 0.76))
        sample["relax_steps"] = int(rng.integers(2, 26))
    return sample


def harder_sample(kind: str, *, seed: int) -> dict:
    """Sample parameters of a harder, shifted population than :func:`draw_sample`'s.

    What a new process window or a worse instrument day delivers: more positional jitter
    (0.045-0.06 spacings against 0.02-0.045), fewer vacancies (1.5-3 % against 3-9 %), two
    grains at a small misorientation (5-10 degrees) instead of several clearly turned ones,
    and heavier noise (0.2-0.35 against 0.04-0.2). For measuring how a model trained
    on the usual population behaves on images unlike its training set (invented data).
    """
    sample = draw_sample(kind, seed=seed)
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0x4A3D]))
    sample["noise"] = float(rng.uniform(0.2, 0.35))
    sample["shifted"] = True
    if "jitter" in sample:
        sample["jitter"] = float(rng.uniform(0.045, 0.06))
        sample["jitter_max"] = 0.065
    if kind == "vacancies":
        sample["vacancy_fraction"] = float(rng.uniform(0.015, 0.03))
        sample["vacancy_min"] = 0.012
    elif kind == "grains":
        sample["misorientation_deg"] = float(rng.uniform(5.0, 10.0))
    return sample


def write_dataset(
    out_dir: str | Path,
    *,
    per_class: int = 8,
    size: int = 384,
    seed: int = 0,
    groups_per_class: int | None = None,
    progress: bool = False,
    shifted: bool = False,
    data_bars: float = 0.0,
    rims: bool = False,
) -> Path:
    """Write a labelled set of invented anodic-alumina micrographs with ground truth.

    Writes ``images/<class>_<nnn>.png`` (8-bit) or ``.tif`` (16-bit, about a quarter of the
    images, pixel size in the resolution tags), ``truth/<stem>.json`` and ``labels.csv`` with
    columns ``image,label,group``; a group is one simulated membrane sample, which holds several
    images of one class that share the sample's parameters (:func:`draw_sample`).

    Parameters
    ----------
    out_dir : path
        Folder to write into (made if missing; files of the same names are overwritten).
    per_class : int
        Images per class.
    size : int
        Image side in pixels.
    seed : int
        Same seed, byte-identical files.
    groups_per_class : int, optional
        Samples per class; default ``max(1, per_class // 2)``, so a sample holds two or three
        images.
    progress : bool
        Show a progress bar on stderr.
    shifted : bool
        Draw the samples from :func:`harder_sample` (a harder, shifted population).
    data_bars : float
        Fraction of the images exported with an instrument data bar (:func:`add_data_bar`,
        dark or bright at random); the truth records its first row as ``data_bar_row``.
    rims : bool
        Draw the pores of each sample with bright rims of a brightness drawn per sample (the
        edge effect of secondary-electron images).

    Returns
    -------
    Path of ``labels.csv``.
    """
    if not 0.0 <= data_bars <= 1.0:
        raise ValueError(f"data_bars must be a fraction in [0, 1], not {data_bars}")
    # The export styling has a stream of its own, so the pattern images stay the same as without.
    styling = np.random.default_rng(np.random.SeedSequence([int(seed), 0xBA2]))
    per_class = int(per_class)
    if per_class < 1:
        raise ValueError(f"per_class must be at least 1, not {per_class}")
    if groups_per_class is None:
        groups_per_class = max(1, per_class // 2)
    groups_per_class = int(groups_per_class)
    if not 1 <= groups_per_class <= per_class:
        raise ValueError(
            f"groups_per_class must be between 1 and per_class ({per_class}), "
            f"not {groups_per_class}"
        )
    out = Path(out_dir)
    (out / "images").mkdir(parents=True, exist_ok=True)
    (out / "truth").mkdir(parents=True, exist_ok=True)

    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0x5A17]))
    n_groups = groups_per_class * len(KINDS)
    # Sample numbers in random order, so that a sample's number says nothing about its class.
    numbers = rng.permutation(n_groups) + 1
    width = max(2, len(str(n_groups)))
    jobs = []
    for k, kind in enumerate(KINDS):
        n_tiff = max(1, round(TIFF_FRACTION * per_class)) if per_class >= 2 else 0
        tiff = np.zeros(per_class, dtype=bool)
        tiff[rng.choice(per_class, size=n_tiff, replace=False)] = True
        members = np.array_split(np.arange(per_class), groups_per_class)
        for g, idx in enumerate(members):
            group = f"sample-{numbers[k * groups_per_class + g]:0{width}d}"
            draw = harder_sample if shifted else draw_sample
            sample = draw(kind, seed=int(rng.integers(2**63 - 1)))
            for i in idx:
                image_seed = int(rng.integers(2**63 - 1))
                jobs.append((kind, int(i), group, sample, bool(tiff[i]), image_seed))

    names, labels, groups = [], [], []
    bar = progress_bar(len(jobs), "invented micrographs") if progress else nullcontext(_no_op)
    with bar as advance:
        rim_of: dict[str, float] = {}
        for kind, i, group, sample, as_tiff, image_seed in jobs:
            if rims:
                sample = {**sample, "rim": rim_of.setdefault(group, styling.uniform(0.2, 0.6))}
            image, truth = make_micrograph(kind, size=size, seed=image_seed, sample=sample)
            if styling.uniform() < data_bars:
                image, truth["data_bar_row"] = add_data_bar(
                    image, polarity=("dark", "bright")[int(styling.integers(2))],
                    seed=int(styling.integers(2**31)))
            stem = f"{kind}_{i:03d}"
            name = f"images/{stem}.tif" if as_tiff else f"images/{stem}.png"
            if as_tiff:
                _write_tiff16(out / name, image, truth["pixel_size_nm"])
            else:
                write_grey_png(out / name, image)
            record = {"image": name, "label": kind, "group": group,
                      "format": "tiff16" if as_tiff else "png8"}
            record.update(truth)
            with open(out / "truth" / f"{stem}.json", "w", encoding="utf-8") as fh:
                json.dump(record, fh, separators=(",", ":"))
                fh.write("\n")
            names.append(out / name)
            labels.append(kind)
            groups.append(group)
            advance()
    return write_labels(out / "labels.csv", names, labels, groups)


def grains_per_spacing2(set_dir: str | Path) -> float:
    """Median number of grains per lattice spacing squared in the grain images of a written set.

    Read from the truth files of :func:`write_dataset`; a larger invented field given
    ``amounts={"n_grains": round(value * (size / spacing) ** 2)}`` then holds grains of the
    set's size.

    Raises
    ------
    ValueError
        When the set holds no grain image.
    """
    values = []
    for path in sorted((Path(set_dir) / "truth").glob("grains_*.json")):
        t = json.loads(path.read_text(encoding="utf-8"))
        values.append(t["n_grains"] * t["spacing_px"] ** 2 / t["size"] ** 2)
    if not values:
        raise ValueError(f"{set_dir}: no grains truth files (truth/grains_*.json)")
    return float(np.median(values))


# --------------------------------------------------------------------------------------------
# Private helpers.



@dataclass
class _Layout:
    xy: np.ndarray  # (n, 2) sites, frame plus a border of about one spacing
    axis: np.ndarray  # (n, 2) half-axis of elongated (merged) pores, zeros for round ones
    scale: np.ndarray  # (n,) radius multiplier
    info: dict


def _check_kind(kind: str) -> None:
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {', '.join(KINDS)}; got {kind!r}")


def _image_amounts(kind: str, sample: dict, rng: np.random.Generator) -> dict:
    """Per-image amounts of disorder around the sample's characteristic values."""
    params = {}
    # A sample made by harder_sample carries its own, wider bounds.
    jitter_hi = float(sample.get("jitter_max", 0.045))
    vacancy_lo = float(sample.get("vacancy_min", 0.02))
    if "jitter" in sample:
        params["jitter"] = float(np.clip(sample["jitter"] + rng.normal(0, 0.002), 0.02,
                                         jitter_hi))
    if kind == "vacancies":
        params["vacancy_fraction"] = float(
            np.clip(sample["vacancy_fraction"] * rng.uniform(0.8, 1.25), vacancy_lo, 0.10)
        )
        params["merge_fraction"] = float(
            np.clip(sample["merge_fraction"] * rng.uniform(0.8, 1.25), 0.004, 0.03)
        )
    elif kind == "grains" and "misorientation_deg" in sample:
        first = float(rng.uniform(0.0, 60.0))
        params["n_grains"] = 2
        params["angles_deg"] = [first, first + float(sample["misorientation_deg"])]
    elif kind == "grains":
        low = 3 + int(round(3 * sample["grain_density"]))
        params["n_grains"] = int(rng.integers(low, min(low + 3, 9)))
    elif kind == "disordered":
        params["min_distance"] = float(sample["min_distance"])
        steps = sample["relax_steps"] * rng.uniform(0.75, 1.3)
        params["relax_steps"] = int(np.clip(round(steps), 2, 30))
    return params


def _layout(
    kind: str, shape, spacing: float, *, rng: np.random.Generator, params: dict | None
) -> _Layout:
    _check_kind(kind)
    shape = (int(shape[0]), int(shape[1]))
    spacing = float(spacing)
    if not spacing > 0:
        raise ValueError(f"spacing must be positive, not {spacing}")
    params = dict(params or {})
    if kind == "ordered":
        layout = _ordered(shape, spacing, rng, params)
    elif kind == "vacancies":
        layout = _vacancies(shape, spacing, rng, params)
    elif kind == "grains":
        layout = _grains(shape, spacing, rng, params)
    else:
        layout = _disordered(shape, spacing, rng, params)
    # Fill the keys every class reports, so truth files have one schema.
    defaults = {"angle_deg": None, "angles_deg": [], "n_grains": None, "jitter": None,
                "n_vacancies": 0, "n_merged": 0}
    for key, value in defaults.items():
        layout.info.setdefault(key, value)
    keep = _in_frame(layout.xy, shape, margin=-1.05 * spacing)
    return _Layout(layout.xy[keep], layout.axis[keep], layout.scale[keep], layout.info)


def _ordered(shape, spacing, rng, params) -> _Layout:
    jitter = float(params.get("jitter", rng.uniform(0.02, 0.045)))
    angle = float(params.get("angle_deg", rng.uniform(0.0, 60.0)))
    xy = hexagonal_lattice(shape, spacing, angle=angle, jitter=jitter, margin=-1.5 * spacing,
                           seed=int(rng.integers(2**63 - 1)))
    info = {
        "angle_deg": angle,
        "angles_deg": [angle],
        "jitter": jitter,
        "n_grains": 1,
        # Origin of the ideal lattice (a site of the unjittered lattice sits here).
        "lattice_origin": [shape[1] / 2.0, shape[0] / 2.0],
        "n_lattice_sites": int(_in_frame(xy, shape).sum()),
    }
    return _Layout(xy, np.zeros_like(xy), np.ones(len(xy)), info)


def _vacancies(shape, spacing, rng, params) -> _Layout:
    base = _ordered(shape, spacing, rng, params)
    xy = base.xy
    vacancy_fraction = float(params.get("vacancy_fraction", rng.uniform(0.02, 0.10)))
    merge_fraction = float(params.get("merge_fraction", rng.uniform(0.005, 0.03)))
    inside = np.flatnonzero(_in_frame(xy, shape))
    n_frame = inside.size
    n_merge = int(round(merge_fraction * n_frame))
    n_vac = int(round(vacancy_fraction * n_frame))
    # Only in-frame sites are removed or merged, so that the counts are exact for the frame:
    # sites in frame = lattice sites in frame - vacancies - merges.
    used = np.zeros(len(xy), dtype=bool)
    in_frame = np.zeros(len(xy), dtype=bool)
    in_frame[inside] = True
    tree = cKDTree(xy)
    pairs = []
    for i in rng.permutation(inside):
        if len(pairs) == n_merge:
            break
        if used[i]:
            continue
        near = [j for j in tree.query_ball_point(xy[i], 1.25 * spacing)
                if j != i and in_frame[j] and not used[j]]
        if not near:
            continue
        j = near[int(rng.integers(len(near)))]
        used[i] = used[j] = True
        pairs.append((i, j))
    free = inside[~used[inside]]
    vac = rng.choice(free, size=min(n_vac, free.size), replace=False)
    removed = np.zeros(len(xy), dtype=bool)
    removed[vac] = True
    for i, j in pairs:
        removed[i] = removed[j] = True
    pairs_arr = np.array(pairs, dtype=int).reshape(-1, 2)
    mid = 0.5 * (xy[pairs_arr[:, 0]] + xy[pairs_arr[:, 1]])
    # Two discs a little closer than the two pores were: one elongated pore along the bond.
    axis = 0.45 * 0.5 * (xy[pairs_arr[:, 1]] - xy[pairs_arr[:, 0]])
    keep = ~removed
    out_xy = np.vstack([xy[keep], mid])
    out_axis = np.vstack([np.zeros((int(keep.sum()), 2)), axis])
    out_scale = np.concatenate([np.ones(int(keep.sum())), np.full(len(mid), 1.1)])
    info = dict(base.info)
    info.update({
        "vacancy_fraction": vacancy_fraction,
        "merge_fraction": merge_fraction,
        "n_vacancies": int(vac.size),
        "n_merged": len(pairs),
        "vacancy_sites": np.round(xy[vac], 3).tolist(),
        "merged_pairs": np.round(xy[pairs_arr], 3).tolist(),
        "merged_sites": np.round(mid, 3).tolist(),
    })
    return _Layout(out_xy, out_axis, out_scale, info)


def _grains(shape, spacing, rng, params) -> _Layout:
    rows, cols = shape
    jitter = float(params.get("jitter", rng.uniform(0.02, 0.045)))
    n_grains = int(params.get("n_grains", rng.integers(3, 9)))
    pad = 2.5 * spacing
    centres = _spread_points(n_grains, shape, rng)
    angles = _grain_angles(centres, rng, params.get("angles_deg"))
    owner = cKDTree(centres)
    parts, grain = [], []
    for g, angle in enumerate(angles):
        offset = rng.uniform(-0.5, 0.5, size=2) * spacing  # grains are not in registry
        xy = hexagonal_lattice(shape, spacing, angle=angle, jitter=jitter, margin=-pad,
                               seed=int(rng.integers(2**63 - 1)), offset=tuple(offset))
        xy = xy[owner.query(xy)[1] == g]
        parts.append(xy)
        grain.append(np.full(len(xy), g))
    xy = np.vstack(parts)
    grain = np.concatenate(grain)

    # Sites of different grains that nearly touch cannot both be pores: drop one of each pair.
    pairs = cKDTree(xy).query_pairs(0.7 * spacing, output_type="ndarray")
    pairs = pairs[grain[pairs[:, 0]] != grain[pairs[:, 1]]]
    removed = np.zeros(len(xy), dtype=bool)
    for i, j in pairs[rng.permutation(len(pairs))]:
        if not (removed[i] or removed[j]):
            removed[j if rng.random() < 0.5 else i] = True
    xy, grain = xy[~removed], grain[~removed]

    # Sites within reach of another grain relax; grain interiors stay as grown.
    pairs = cKDTree(xy).query_pairs(1.6 * spacing, output_type="ndarray")
    pairs = pairs[grain[pairs[:, 0]] != grain[pairs[:, 1]]]
    mobile = np.zeros(len(xy), dtype=bool)
    mobile[pairs.ravel()] = True
    n_filled = 0
    for _ in range(2):
        xy = _relax(xy, mobile, spacing, steps=4)
        holes = _holes(xy, mobile, spacing)
        n_filled += len(holes)
        xy = np.vstack([xy, holes])
        mobile = np.concatenate([mobile, np.ones(len(holes), dtype=bool)])
    xy = _relax(xy, mobile, spacing, steps=4)
    info = {
        "angles_deg": [float(a) for a in angles],
        "jitter": jitter,
        "n_grains": n_grains,
        "grain_centres": np.round(centres, 3).tolist(),
        "min_misorientation_deg": _min_misorientation(centres, angles),
        "n_boundary_sites": int(mobile.sum()),
        "n_filled_holes": int(n_filled),
    }
    return _Layout(xy, np.zeros_like(xy), np.ones(len(xy)), info)


def _disordered(shape, spacing, rng, params) -> _Layout:
    min_distance = float(params.get("min_distance", rng.uniform(0.68, 0.76)))
    steps = int(params.get("relax_steps", rng.integers(2, 31)))
    pad = 2.5 * spacing
    lo = np.array([-pad, -pad])
    hi = np.array([shape[1] + pad, shape[0] + pad])
    density = 2.0 / (_SQRT3 * spacing**2)  # sites per px^2 of the triangular lattice
    n_target = int(round(density * np.prod(hi - lo)))
    # Made on a torus (periodic box), so that no free edge thins or piles up the sites; the box
    # is larger than the frame, so the periodicity does not show.
    period = hi - lo
    xy, n_adsorbed = _random_sequential(n_target, period, min_distance * spacing, rng)
    xy = _relax(xy, np.ones(len(xy), dtype=bool), spacing, steps=steps, period=period) + lo
    info = {
        "min_distance": min_distance,
        "relax_steps": steps,
        "adsorbed_fraction": float(n_adsorbed / max(n_target, 1)),
        "density_per_px2": float(len(xy) / np.prod(hi - lo)),
        "lattice_density_per_px2": float(density),
    }
    return _Layout(xy, np.zeros_like(xy), np.ones(len(xy)), info)


def _random_sequential(n, period, d, rng, rounds: int = 8) -> tuple[np.ndarray, int]:
    """Random sequential adsorption of discs of diameter ``d`` in a periodic box, topped up
    to ``n`` sites; returns the sites and the number adsorbed before the top-up.

    Candidates come in batches; a candidate within ``d`` of an accepted site or of an earlier
    candidate of its batch is rejected, which keeps the sequential rule without a Python loop.
    Near jamming adsorption slows down, so after ``rounds`` batches the remaining sites are
    placed at random; the relaxation that follows pushes them apart.
    """
    acc = np.empty((0, 2))
    for _ in range(rounds):
        need = n - len(acc)
        if need <= 0:
            break
        cand = rng.uniform(0.0, period, size=(max(3 * need, 256), 2))
        if len(acc):
            dist, _ = cKDTree(acc, boxsize=period).query(cand, distance_upper_bound=d)
            cand = cand[np.isinf(dist)]
        pairs = cKDTree(cand, boxsize=period).query_pairs(d, output_type="ndarray")
        bad = np.zeros(len(cand), dtype=bool)
        bad[pairs.max(axis=1)] = True
        acc = np.vstack([acc, cand[~bad][:need]])
    n_adsorbed = len(acc)
    if n_adsorbed < n:
        acc = np.vstack([acc, rng.uniform(0.0, period, size=(n - n_adsorbed, 2))])
    return acc, n_adsorbed


def _relax(
    xy: np.ndarray, mobile: np.ndarray, spacing: float, *, steps: int, period=None
) -> np.ndarray:
    """Short-range repulsion: pairs closer than one spacing push apart (mobile sites only).

    With ``period`` (box sides) the sites live in the periodic box ``[0, period)``.
    """
    xy = xy.copy()
    cutoff = spacing
    pairs = np.empty((0, 2), dtype=int)
    for step in range(int(steps)):
        if step % 4 == 0:
            # A neighbour list with a skin, rebuilt every few steps: a step moves a site by far
            # less than the skin (0.3 spacing), so no pair inside the cutoff is missed.
            pairs = cKDTree(xy, boxsize=period).query_pairs(1.3 * cutoff, output_type="ndarray")
            pairs = pairs[mobile[pairs[:, 0]] | mobile[pairs[:, 1]]]
        if not len(pairs):
            break
        d = xy[pairs[:, 1]] - xy[pairs[:, 0]]
        if period is not None:
            d -= period * np.round(d / period)  # minimum image
        dist = np.maximum(np.hypot(d[:, 0], d[:, 1]), 1e-9)
        push = (0.25 * np.maximum(cutoff - dist, 0.0) / dist)[:, None] * d
        n = len(xy)
        move = np.column_stack([
            np.bincount(pairs[:, 1], push[:, k], n) - np.bincount(pairs[:, 0], push[:, k], n)
            for k in range(2)
        ])
        xy[mobile] += move[mobile]
        if period is not None:
            xy %= period
            xy[xy >= period] = 0.0  # float modulo can round up to the period itself
    return xy


def _holes(xy: np.ndarray, mobile: np.ndarray, spacing: float) -> np.ndarray:
    """Circumcentres of Delaunay triangles too big for a pore-free gap, near mobile sites."""
    # Triangulate only the boundary zone: mobile sites and their neighbours.
    pairs = cKDTree(xy).query_pairs(1.6 * spacing, output_type="ndarray")
    zone = mobile.copy()
    zone[pairs[mobile[pairs[:, 0]], 1]] = True
    zone[pairs[mobile[pairs[:, 1]], 0]] = True
    if zone.sum() < 4:
        return np.empty((0, 2))
    sub, sub_mobile = xy[zone], mobile[zone]
    tri = Delaunay(sub)
    centre, radius = circumcircles(sub[tri.simplices])
    big = (radius > 0.8 * spacing) & sub_mobile[tri.simplices].any(axis=1)
    # Triangles on the hull of the zone are thin slivers, not holes.
    big &= radius < 3.0 * spacing
    centre = centre[big]
    if len(centre) > 1:
        drop = np.zeros(len(centre), dtype=bool)
        pairs = cKDTree(centre).query_pairs(0.5 * spacing, output_type="ndarray")
        drop[pairs.max(axis=1)] = True
        centre = centre[~drop]
    return centre


def _spread_points(n: int, shape, rng) -> np.ndarray:
    """``n`` grain centres in the frame, not too close, so no grain is a sliver."""
    rows, cols = shape
    d_min = 0.6 * np.sqrt(rows * cols / n)
    pts: list[np.ndarray] = []
    for _ in range(200 * n):
        p = rng.uniform([0, 0], [cols, rows])
        if all(np.hypot(*(p - q)) >= d_min for q in pts):
            pts.append(p)
            if len(pts) == n:
                break
    while len(pts) < n:  # a crowded frame: accept what is left
        pts.append(rng.uniform([0, 0], [cols, rows]))
    return np.array(pts)


def _grain_angles(centres: np.ndarray, rng, fixed) -> list[float]:
    """Lattice angles such that neighbouring grains differ clearly (at least ~12 degrees)."""
    if fixed is not None:
        return [float(a) for a in fixed]
    neighbours = _grain_neighbours(centres)
    angles: list[float] = []
    for g in range(len(centres)):
        best, best_gap = 0.0, -1.0
        for _ in range(60):
            a = float(rng.uniform(0.0, 60.0))
            gaps = [_misorientation(a, angles[h]) for h in neighbours[g] if h < g]
            gap = min(gaps, default=60.0)
            if gap > best_gap:
                best, best_gap = a, gap
            if gap >= 12.0:
                break
        angles.append(best)
    return angles


def _grain_neighbours(centres: np.ndarray) -> list[set[int]]:
    n = len(centres)
    nb: list[set[int]] = [set() for _ in range(n)]
    if n < 4:
        for i in range(n):
            nb[i] = set(range(n)) - {i}
        return nb
    for s in Delaunay(centres).simplices:
        for i in s:
            nb[i].update(int(j) for j in s if j != i)
    return nb


def _misorientation(a: float, b: float) -> float:
    d = abs(a - b) % 60.0  # six-fold symmetry
    return min(d, 60.0 - d)


def _min_misorientation(centres, angles) -> float:
    nb = _grain_neighbours(centres)
    gaps = [_misorientation(angles[i], angles[j]) for i in range(len(angles)) for j in nb[i]]
    return float(min(gaps, default=0.0))


def _nearest_distance(xy: np.ndarray) -> np.ndarray:
    if len(xy) < 2:
        return np.full(len(xy), np.inf)
    return cKDTree(xy).query(xy, k=2)[0][:, 1]


def _render_centres(xy, axis, radius) -> tuple[np.ndarray, np.ndarray]:
    """Round pores are one disc; an elongated (merged) pore is two overlapping discs."""
    long = np.any(axis != 0, axis=1)
    centres = np.vstack([xy[~long], xy[long] - axis[long], xy[long] + axis[long]])
    radii = np.concatenate([radius[~long], radius[long], radius[long]])
    return centres, radii


def _in_frame(xy: np.ndarray, shape, margin: float = 0.0) -> np.ndarray:
    rows, cols = shape
    return (
        (xy[:, 0] >= margin)
        & (xy[:, 0] <= cols - 1 - margin)
        & (xy[:, 1] >= margin)
        & (xy[:, 1] <= rows - 1 - margin)
    )


def write_grey_png(path: Path, image: np.ndarray) -> None:
    """Save an image in [0, 1] as an 8-bit grey PNG (values clipped, rounded to 0..255)."""
    # PIL writes no time chunk, so the bytes depend on the pixels only.
    data = np.round(np.clip(image, 0, 1) * 255).astype(np.uint8)
    Image.fromarray(data).save(path, format="PNG")


def _write_tiff16(path: Path, image: np.ndarray, pixel_size_nm: float) -> None:
    # Resolution in pixels per centimetre (TIFF unit 3); no DateTime tag and no software or
    # shape description, so the bytes depend on the pixels and the pixel size only. No
    # compression: noisy 16-bit data does not shrink, and every TIFF reader reads it.
    data = np.round(np.clip(image, 0, 1) * 65535).astype(np.uint16)
    per_cm = Fraction(1e7 / pixel_size_nm).limit_denominator(1000)
    res = (per_cm.numerator, per_cm.denominator)
    tifffile.imwrite(path, data, photometric="minisblack", compression=None,
                     resolution=(res, res), resolutionunit="CENTIMETER", metadata=None,
                     software=False, datetime=None)


def _no_op() -> None:
    return None
