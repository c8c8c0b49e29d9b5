"""The analysed region of a micrograph: the frame minus what the instrument added to it.

Stage 1b of the pipeline, between reading an image and finding its sites. Most electron
microscopes export a micrograph with a data bar along one edge: a uniform band (black or white)
holding text (voltage, magnification, working distance) and a scale bar. Sites found on its
glyphs would enter the persistence, the order measures and the overlay, so the band is found
and left out:

1. The band's level is the median of the two outermost rows; pixels within 0.05 grey levels of
   it (compression rings around the glyphs) count as at that level.
2. The band ends at a sharp horizontal edge: the first row from which on that level is rare
   (under 35 % of the row) for three rows running.
3. Every row before the edge (one transitional row aside) has at least 40 % of its pixels at the
   band's level (text and the scale bar take the rest), and the level is rare in a block of
   the micrograph beyond it; a band deeper than 35 % of the frame, or thinner than 6 rows, is
   not a data bar.
4. The marks inside the band (connected pixels off its level) are counted: text-like blobs.

A white band against walls that are themselves saturated white is not told apart from them;
give such images a ``--region``.

A user can also give the region (``x0,y0,x1,y1`` in pixels, or fractions of the frame when all
four are at most 1); the automatic search then runs inside it unless it is switched off.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from topoclass.errors import TopoclassError

_LEVEL_TOLERANCE = 0.05  # grey levels (image in [0, 1]) counted as "at the band's level"
_OUTER_ROW_FILL = 0.9  # the two outermost rows of a band are nearly all at its level
_BAND_ROW_FILL = 0.4  # every band row has at least this fraction of its pixels at that level
_IMAGE_ROW_FILL = 0.35  # rows of the micrograph have less than this fraction at that level ...
_IMAGE_BLOCK_FILL = 0.3  # ... and a block of them at most this (saturated walls reach 0.2)
_MIN_BAND_ROWS = 6
_MAX_BAND_FRACTION = 0.35
_EDGE_ROWS = 2  # the band must give way to the micrograph within this many rows
_GUARD = 1  # rows left out beyond the detected edge (blur and compression smear it)
_MIN_REGION_SIDE = 16  # pixels; matches the smallest image the site finder accepts


@dataclass(frozen=True)
class DataBar:
    """An instrument data bar found along the top or bottom edge.

    Attributes
    ----------
    edge : {"bottom", "top"}
        Which edge of the searched frame it lies along.
    boundary : int
        Image row where the band meets the micrograph: the band's first row (bottom) or the
        first row below it (top).
    rows : int
        Band height in pixels.
    level : float
        Grey level of the band, in [0, 1].
    n_marks : int
        Connected marks (text glyphs, the scale bar) inside the band.
    """

    edge: str
    boundary: int
    rows: int
    level: float
    n_marks: int


@dataclass(frozen=True)
class AnalysedRegion:
    """The part of an image the sites are found in.

    Attributes
    ----------
    box : (x0, y0, x1, y1)
        Half-open pixel box (columns ``x0 <= x < x1``, rows ``y0 <= y < y1``).
    shape : (rows, cols)
        Shape of the whole image.
    data_bar : DataBar or None
        The data bar left out, when one was found.
    """

    box: tuple[int, int, int, int]
    shape: tuple[int, int]
    data_bar: DataBar | None = None

    @property
    def whole(self) -> bool:
        """True when the region is the whole frame."""
        return self.box == (0, 0, self.shape[1], self.shape[0])

    def left_out(self) -> str:
        """What was left out, in words ("" when nothing was)."""
        if self.whole:
            return ""
        x0, y0, x1, y1 = self.box
        words = []
        bar = self.data_bar
        if bar is not None:
            words.append(f"data bar along the {bar.edge} edge ({bar.rows} rows from row "
                         f"{bar.boundary if bar.edge == 'bottom' else bar.boundary - bar.rows}, "
                         f"{bar.n_marks} marks)")
        words.append(f"analysed x {x0}-{x1}, y {y0}-{y1} of {self.shape[1]}x{self.shape[0]} px")
        return "; ".join(words)


def find_data_bar(image: np.ndarray) -> DataBar | None:
    """The instrument data bar along the bottom or top edge of an image, or None.

    Parameters
    ----------
    image : ndarray of shape (rows, cols)
        Grey image in [0, 1].

    Returns
    -------
    DataBar or None
        The deeper of the bands found at the two edges; None when neither edge has one.
    """
    img = np.asarray(image, dtype=np.float32)
    if img.ndim != 2 or min(img.shape) < 2 * _MIN_BAND_ROWS:
        return None
    rows = img.shape[0]
    found = []
    bottom = _band_from_edge(img[::-1])
    if bottom is not None:
        depth, level, marks = bottom
        found.append(DataBar("bottom", rows - depth, depth, level, marks))
    top = _band_from_edge(img)
    if top is not None:
        depth, level, marks = top
        found.append(DataBar("top", depth, depth, level, marks))
    return max(found, key=lambda bar: bar.rows, default=None)


def analysed_region(
    image: np.ndarray,
    box: tuple[float, float, float, float] | None = None,
    *,
    auto: bool = True,
    source: str | None = None,
) -> AnalysedRegion:
    """The region of ``image`` to find sites in.

    Parameters
    ----------
    image : ndarray of shape (rows, cols)
        Grey image in [0, 1].
    box : (x0, y0, x1, y1), optional
        The region in pixels (half-open), or in fractions of the frame when all four values are
        at most 1. The whole frame when omitted.
    auto : bool
        Look for an instrument data bar inside the box and leave it out.
    source : str, optional
        File name for messages.

    Raises
    ------
    TopoclassError
        When the box does not fit the image or leaves too little to analyse.
    """
    name = source or "image"
    rows, cols = np.shape(image)[:2]
    x0, y0, x1, y1 = _pixel_box(box, rows, cols, name)
    bar = None
    if auto:
        bar = find_data_bar(np.asarray(image)[y0:y1, x0:x1])
        if bar is not None:
            bar = DataBar(bar.edge, bar.boundary + y0, bar.rows, bar.level, bar.n_marks)
            if bar.edge == "bottom":
                y1 = bar.boundary - _GUARD
            else:
                y0 = bar.boundary + _GUARD
    if min(x1 - x0, y1 - y0) < _MIN_REGION_SIDE:
        raise TopoclassError(
            f"{name}: the analysed region x {x0}-{x1}, y {y0}-{y1} is smaller than "
            f"{_MIN_REGION_SIDE} px on a side; give a larger --region or use --no-auto-region"
        )
    return AnalysedRegion((x0, y0, x1, y1), (int(rows), int(cols)), bar)


def parse_region(text: str | None) -> tuple[float, float, float, float] | None:
    """``"x0,y0,x1,y1"`` (pixels, or fractions when all are at most 1) as four numbers.

    Raises
    ------
    TopoclassError
        When the text is not four numbers with ``x0 < x1`` and ``y0 < y1``.
    """
    if text is None or not str(text).strip():
        return None
    parts = str(text).replace(" ", "").split(",")
    try:
        values = tuple(float(p) for p in parts)
    except ValueError:
        values = ()
    if len(values) != 4 or not all(np.isfinite(values)) or min(values) < 0:
        raise TopoclassError(
            f"--region {text!r}: give four non-negative numbers x0,y0,x1,y1 (pixels, or "
            "fractions of the frame such as 0,0,1,0.9)"
        )
    if not (values[0] < values[2] and values[1] < values[3]):
        raise TopoclassError(f"--region {text!r}: x0 must be below x1 and y0 below y1")
    return values  # type: ignore[return-value]


# --------------------------------------------------------------------------------------------
# private helpers


def _pixel_box(box, rows: int, cols: int, name: str) -> tuple[int, int, int, int]:
    if box is None:
        return 0, 0, int(cols), int(rows)
    x0, y0, x1, y1 = (float(v) for v in box)
    if max(x0, y0, x1, y1) <= 1.0:  # fractions of the frame
        x0, x1 = x0 * cols, x1 * cols
        y0, y1 = y0 * rows, y1 * rows
    x0, y0 = int(np.floor(x0)), int(np.floor(y0))
    x1, y1 = int(np.ceil(x1)), int(np.ceil(y1))
    if not (0 <= x0 < x1 <= cols and 0 <= y0 < y1 <= rows):
        raise TopoclassError(
            f"{name}: the region x {x0}-{x1}, y {y0}-{y1} does not fit the {cols}x{rows} px "
            "image; give a --region inside the frame (or fractions such as 0,0,1,0.9)"
        )
    return x0, y0, x1, y1


def _band_from_edge(img: np.ndarray) -> tuple[int, float, int] | None:
    """(depth, level, marks) of a data bar starting at row 0 of ``img``, or None."""
    rows = img.shape[0]
    depth_max = int(_MAX_BAND_FRACTION * rows)
    level = float(np.median(img[:2]))
    tolerance = _LEVEL_TOLERANCE
    near = np.abs(img[: depth_max + _EDGE_ROWS + 1] - level) <= tolerance
    fill = near.mean(axis=1)
    if fill[:2].min() < _OUTER_ROW_FILL:
        return None  # the outermost rows of a data bar are plain
    # The edge: the first row where the band's level turns rare and stays rare.
    rare = fill < _IMAGE_ROW_FILL
    runs = np.flatnonzero(np.convolve(rare, np.ones(_EDGE_ROWS + 1), "valid") == _EDGE_ROWS + 1)
    if runs.size == 0 or not _MIN_BAND_ROWS <= runs[0] <= depth_max:
        return None
    depth = int(runs[0])
    # Every band row is mostly at the band's level (text and scale bar take the rest); one
    # transitional row before the edge may be half band, half micrograph.
    if fill[: depth - 1].min() < _BAND_ROW_FILL:
        return None
    block = img[depth : depth + max(3 * _MIN_BAND_ROWS, depth)]
    if np.mean(np.abs(block - level) <= tolerance) > _IMAGE_BLOCK_FILL:
        return None  # the band's level is common in the micrograph: a row of walls or pores
    _, marks = ndimage.label(~near[:depth], structure=np.ones((3, 3)))
    return depth, level, int(marks)
