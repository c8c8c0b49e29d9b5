"""Find the lattice sites (centres of pores or dots) in a micrograph.

Stage 2 of the pipeline: a 2-D float image in [0, 1] becomes a :class:`SitePattern`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


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
    """

    xy: np.ndarray
    spacing: float
    polarity: str
    border: np.ndarray
    shape: tuple[int, int]
    pixel_size_nm: float | None = None
    source: str | None = field(default=None, compare=False)

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

    @property
    def n_sites(self) -> int:
        return int(self.xy.shape[0])

    @property
    def spacing_nm(self) -> float | None:
        return None if self.pixel_size_nm is None else self.spacing * self.pixel_size_nm
