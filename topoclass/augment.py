"""Rescaled copies of training micrographs, so one model covers a declared range of magnifications.

Every feature is in units of the site spacing, yet the spacing in pixels still changes what the
site finder sees (how many pixels span a pore, how the noise compares with it). A model is only
vouched for over the spacings in pixels its training images had; its range check
(:class:`topoclass.model.RangeNovelty`) flags the others. ``train --zoom-range 0.5,2`` adds, for
every training image, rescaled copies of its analysed region at zoom factors spread over the
range, so the model sees (and its range check admits) the spacings those factors reach. Copies
of one image keep its label and its cross-validation group, so they never sit on both sides of
a split.
"""

from __future__ import annotations

import numpy as np

from topoclass.errors import TopoclassError

#: The smallest and largest zoom factors accepted (beyond them a copy has too few pixels per
#: pore, or so many that one image costs as much as dozens).
ZOOM_LIMITS = (0.2, 5.0)


def zoom_image(image: np.ndarray, factor: float) -> np.ndarray:
    """The image rescaled by ``factor`` (bilinear; Gaussian anti-aliasing when shrinking).

    Uses :func:`skimage.transform.rescale`; values stay in the input's range.
    """
    from skimage.transform import rescale

    factor = float(factor)
    if factor == 1.0:
        return np.asarray(image, dtype=np.float32)
    out = rescale(np.asarray(image, dtype=np.float32), factor, order=1, mode="reflect",
                  anti_aliasing=factor < 1.0, preserve_range=True)
    return out.astype(np.float32)


def parse_zoom_range(text: str | None) -> tuple[float, float] | None:
    """``"lo,hi"`` as two zoom factors (``lo <= 1 <= hi`` is not required).

    Raises
    ------
    TopoclassError
        When the text is not two numbers within :data:`ZOOM_LIMITS` with ``lo < hi``.
    """
    if text is None or not str(text).strip():
        return None
    try:
        lo, hi = (float(p) for p in str(text).replace(" ", "").split(","))
    except ValueError:
        raise TopoclassError(f"--zoom-range {text!r}: give two zoom factors lo,hi such as "
                             "0.5,2") from None
    if not (ZOOM_LIMITS[0] <= lo < hi <= ZOOM_LIMITS[1]):
        raise TopoclassError(f"--zoom-range {text!r}: need {ZOOM_LIMITS[0]:g} <= lo < hi <= "
                             f"{ZOOM_LIMITS[1]:g}")
    return lo, hi


def zoom_factors(zoom_range: tuple[float, float], copies: int) -> np.ndarray:
    """``copies`` zoom factors spread evenly (in log scale) over ``zoom_range``, ends included.

    Factors equal to 1 (the original) are dropped.
    """
    lo, hi = (float(v) for v in zoom_range)
    if int(copies) != copies or copies < 1:
        raise TopoclassError(f"zoom copies must be a positive integer, not {copies!r}")
    if copies == 1:
        factors = np.array([np.sqrt(lo * hi)])
    else:
        factors = np.geomspace(lo, hi, int(copies))
    return factors[~np.isclose(factors, 1.0)]
