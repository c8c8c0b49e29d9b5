"""Inspect one micrograph: sites, persistence and order measures, with files for a person to check.

A use-case module: it strings the pipeline stages together for a single image. The command
``topoclass inspect`` is a shell over :func:`inspect_image`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from topoclass.images import read_micrograph
from topoclass.sites import find_sites


def inspect_image(
    path: str | Path,
    *,
    out: str | Path | None = None,
    polarity: str = "auto",
    pixel_size_nm: float | None = None,
) -> dict:
    """Find the sites of one micrograph and summarise them.

    Returns a JSON-ready dict with at least ``image, n_sites, spacing_px, polarity``; with ``out``
    it also writes ``sites.csv`` (``x,y,border``) there and lists the files under ``outputs``.
    """
    path = Path(path)
    micrograph = read_micrograph(path)
    pixel_size = pixel_size_nm if pixel_size_nm is not None else micrograph.pixel_size_nm
    pattern = find_sites(
        micrograph.image, polarity=polarity, pixel_size_nm=pixel_size, source=str(path)
    )
    summary: dict = {
        "image": str(path),
        "n_sites": pattern.n_sites,
        "n_interior": int(np.count_nonzero(~pattern.border)),
        "spacing_px": pattern.spacing,
        "spacing_nm": pattern.spacing_nm,
        "polarity": pattern.polarity,
    }
    if out is not None:
        out = Path(out)
        out.mkdir(parents=True, exist_ok=True)
        sites_csv = out / "sites.csv"
        rows = np.column_stack([pattern.xy, pattern.border.astype(int)])
        np.savetxt(sites_csv, rows, delimiter=",", header="x,y,border", comments="",
                   fmt=["%.3f", "%.3f", "%d"])
        summary["outputs"] = [str(sites_csv)]
    return summary
