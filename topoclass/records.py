"""Per-image records: what the pipeline knows about one micrograph, and its bar statistics.

A :class:`PatternRecord` holds an image's persistence diagrams and classic order measures; the
feature cache stores it, the vectorisers read lists of them, and scoring writes its barcode
summary. It sits between the measuring stages (sites, persistence, order) and everything that
uses their results, so none of those needs the vectorisers.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from topoclass.persistence import LOOP_FLOOR, Diagrams


@dataclass(frozen=True)
class PatternRecord:
    """What the pipeline knows about one micrograph: its diagrams and its classic order measures.

    Attributes
    ----------
    diagrams : Diagrams
        H0/H1 persistence of the site pattern, in spacing units.
    order : mapping of str to float
        Classic order measures (``psi6_global``, ``defect_fraction``, ...).
    source : str or None
        Path of the image file, for messages.
    amounts : mapping of str to float
        Physical amounts (:func:`topoclass.amounts.pattern_amounts`: spacing in nm, pore
        density, vacancies, grains, disorder index, with errors); not classification features.
    region : (x0, y0, x1, y1) or None
        Half-open pixel box the sites were searched in (:mod:`topoclass.region`).
    remarks : tuple of str
        What a person should know about the measurement: what was left out of the frame (a
        data bar), that the pattern had no preferred spacing.
    """

    diagrams: Diagrams
    order: Mapping[str, float] = field(default_factory=dict)
    source: str | None = None
    amounts: Mapping[str, float] = field(default_factory=dict)
    region: tuple[int, int, int, int] | None = None
    remarks: tuple[str, ...] = ()


def barcode_summary(
    diagrams: Diagrams, quantiles: Sequence[float] = (0.5, 0.9), *, loop_floor: float = LOOP_FLOOR
) -> dict[str, float]:
    """Summary statistics of the H0 and H1 bar lengths of one record.

    Parameters
    ----------
    diagrams : Diagrams
        The persistence diagrams (spacing units).
    quantiles : sequence of float in [0, 1]
        Quantiles of the bar lengths to report.
    loop_floor : float
        H1 bars no longer than this (spacings) are not counted in ``h1_count`` and
        ``h1_count_per_site``: site-position noise alone opens hundreds of such loops on a
        perfect lattice (:data:`topoclass.persistence.LOOP_FLOOR`). Cut bars always count.

    Returns
    -------
    dict
        For ``d`` in 0, 1: ``hd_count``, ``hd_count_per_site``, ``hd_length_sum``,
        ``hd_length_sum_per_site``, ``hd_length_mean``, ``hd_length_variance`` (population
        variance), ``hd_length_max``, ``hd_length_q<q>``, ``hd_entropy`` (persistent entropy
        ``E = -sum p log p`` with ``p = length / total length``, natural log) and
        ``hd_entropy_normalised`` (``E / log n`` for ``n`` bars, Pielou's evenness: 1 for equal
        bars, and unlike ``E`` it does not grow with the field of view); then ``h1_count_raw``
        (every H1 bar, noise included; ``h1_count`` is above ``loop_floor`` only),
        ``h1_truncated_count``, ``h1_truncated_per_site``, ``n_sites`` (``diagrams.n_sites`` when
        the record carries it, else ``len(h0) + 1``) and ``n_sites_counted`` (the number of
        sites the per-site values divide by; see the module notes). H0 covers the finite
        bars only (the essential class has no length). Statistics of an empty diagram are 0.
    """
    n_sites = sites_counted(diagrams)
    out: dict[str, float] = {}
    for dim in (0, 1):
        lengths = bar_lengths(diagrams, dim)
        total = float(lengths.sum())
        p = f"h{dim}_"
        counted = lengths.size
        if dim == 1:
            counted = int(np.count_nonzero((lengths > loop_floor) | truncated_mask(diagrams)))
        out[p + "count"] = float(counted)
        out[p + "count_per_site"] = counted / n_sites
        out[p + "length_sum"] = total
        out[p + "length_sum_per_site"] = total / n_sites
        if lengths.size:
            out[p + "length_mean"] = float(lengths.mean())
            out[p + "length_variance"] = float(lengths.var())
            out[p + "length_max"] = float(lengths.max())
            qs = np.quantile(lengths, np.asarray(quantiles, dtype=float))
        else:
            out[p + "length_mean"] = out[p + "length_variance"] = out[p + "length_max"] = 0.0
            qs = np.zeros(len(quantiles))
        for q, value in zip(quantiles, qs, strict=True):
            out[f"{p}length_q{float(q):g}"] = float(value)
        out[p + "entropy"] = entropy = persistent_entropy(lengths)
        out[p + "entropy_normalised"] = entropy / np.log(lengths.size) if lengths.size > 1 else 0.0
    out["h1_count_raw"] = float(bar_lengths(diagrams, 1).size)
    truncated = int(np.count_nonzero(truncated_mask(diagrams)))
    out["h1_truncated_count"] = float(truncated)
    out["h1_truncated_per_site"] = truncated / n_sites
    out["n_sites"] = float(sites_counted(diagrams, interior=False))
    out["n_sites_counted"] = float(n_sites)
    return out


def bars_of(diagrams: Diagrams, dim: int) -> np.ndarray:
    bars = diagrams.h0 if dim == 0 else diagrams.h1
    return np.asarray(bars, dtype=np.float64).reshape(-1, 2)


def bar_lengths(diagrams: Diagrams, dim: int) -> np.ndarray:
    bars = bars_of(diagrams, dim)
    return bars[:, 1] - bars[:, 0]


def truncated_mask(diagrams: Diagrams) -> np.ndarray:
    return np.asarray(diagrams.h1_truncated, dtype=bool).reshape(-1)


def sites_counted(diagrams: Diagrams, interior: bool = True) -> int:
    # The sites the bars are charged to (interior sites when border bars were dropped), then all
    # sites; a record that carries neither (0 or absent) falls back to len(h0) + 1: each finite
    # H0 bar is one site merging into another, and one component never dies.
    for attr in ("n_interior", "n_sites") if interior else ("n_sites",):
        n = getattr(diagrams, attr, None)
        if n is not None and int(n) > 0:
            return int(n)
    return bars_of(diagrams, 0).shape[0] + 1


def persistent_entropy(lengths: np.ndarray) -> float:
    total = lengths.sum()
    if lengths.size == 0 or total <= 0:
        return 0.0
    p = lengths[lengths > 0] / total
    return float(-(p * np.log(p)).sum())
