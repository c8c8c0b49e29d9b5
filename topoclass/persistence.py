"""Persistent homology (H0, H1) of the Vietoris–Rips filtration on a site cloud.

Stage 3 of the pipeline: a :class:`~topoclass.sites.SitePattern` becomes :class:`Diagrams`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Diagrams:
    """Persistence diagrams of one site pattern, in units of the site spacing.

    Attributes
    ----------
    h0 : ndarray of shape (n0, 2)
        Finite H0 bars ``(birth, death)``; births are 0. The one essential class (the component
        that never dies) is not stored here.
    h1 : ndarray of shape (n1, 2)
        H1 bars ``(birth, death)``. Classes still alive at ``max_scale`` have death ``max_scale``
        and are marked in ``h1_truncated``.
    h1_truncated : ndarray of bool, shape (n1,)
        True for H1 bars cut at ``max_scale``.
    h0_edges : ndarray of int, shape (n0, 2)
        Site indices (into the pattern's ``xy``) of the edge at which each H0 bar dies.
    h1_edges : ndarray of int, shape (n1, 2)
        Site indices of an edge at which each H1 class is born (locates the loop on the image).
    spacing : float
        The spacing (pixels) that all values were divided by; ``value * spacing`` is in pixels.
    max_scale : float
        The radius limit of the filtration, in units of the spacing.
    pixel_size_nm : float or None
        Pixel size, when known, so that ``value * spacing * pixel_size_nm`` is in nanometres.
    """

    h0: np.ndarray
    h1: np.ndarray
    h1_truncated: np.ndarray
    h0_edges: np.ndarray
    h1_edges: np.ndarray
    spacing: float
    max_scale: float
    pixel_size_nm: float | None = None

    def lengths(self, dim: int) -> np.ndarray:
        """Bar lengths ``death - birth`` of dimension ``dim`` (0 or 1), in spacing units."""
        bars = self.h0 if dim == 0 else self.h1
        return bars[:, 1] - bars[:, 0]

    def in_pixels(self, dim: int) -> np.ndarray:
        """The bars of dimension ``dim`` in pixels."""
        return (self.h0 if dim == 0 else self.h1) * self.spacing
