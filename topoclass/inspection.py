"""Inspect one micrograph: sites, persistence and order measures, with files for a person to check.

A use-case module: it strings the pipeline stages together for a single image. The command
``topoclass inspect`` is a shell over :func:`inspect_image`.
"""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import numpy as np

from topoclass.features import FeatureSettings, ImageMeasurement, measure_image
from topoclass.model.neighbours import nearest_labelled
from topoclass.records import barcode_summary

#: Keys of :func:`summarise` beyond the image and site counts, in print order.
SUMMARY_MEASURES = (
    "h0_length_variance",
    "h1_length_sum",
    "h1_length_sum_per_site",
    "h1_count",
    "h1_count_raw",
    "h1_truncated_count",
    "psi6_global",
    "psi6_local_mean",
    "defect_fraction",
    "n5_fraction",
    "n7_fraction",
    "clark_evans_r",
    "nn_cv",
)


def inspect_image(
    path: str | Path,
    *,
    out: str | Path | None = None,
    polarity: str = "auto",
    pixel_size_nm: float | None = None,
    settings: FeatureSettings | None = None,
    model=None,
) -> dict:
    """Find the sites of one micrograph and summarise its record.

    Returns a JSON-ready dict (see :func:`summarise`); with ``out`` it also writes
    ``sites.csv`` (``x,y,border``) there and lists the files written under ``outputs``.
    With a trained ``model`` that keeps its training diagrams, the summary also lists under
    ``nearest_labelled`` the three training images nearest by the sliced Wasserstein distance
    between H1 diagrams (:mod:`topoclass.model.neighbours`), and ``out`` gets their thumbnails
    (``nearest_1.png`` ...) and ``nearest.csv``.
    """
    if settings is None and model is not None:
        settings = FeatureSettings.from_model(model)  # measured as its training images were
    if settings is None:
        settings = FeatureSettings(polarity=polarity, pixel_size_nm=pixel_size_nm)
    measurement = measure_image(path, settings)
    summary = summarise(measurement)
    nearest = nearest_labelled(model, measurement.record.diagrams.h1)
    if nearest is not None:
        summary["nearest_labelled"] = [{k: v for k, v in n.items() if k != "index"}
                                       for n in nearest]
    if out is not None:
        written = write_inspection(measurement, out)
        if nearest is not None:
            written += _write_nearest(model.neighbours, nearest, Path(out))
        summary["outputs"] = [str(p) for p in written]
    return summary


def _write_nearest(neighbours, nearest: list[dict], out: Path) -> list[Path]:
    from PIL import Image

    table = out / "nearest.csv"
    with open(table, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(["rank", "label", "sliced_wasserstein_h1", "image", "thumbnail"])
        paths = []
        for rank, n in enumerate(nearest, start=1):
            thumb = out / f"nearest_{rank}.png"
            Image.fromarray(neighbours.thumbnails[n["index"]]).save(thumb)
            paths.append(thumb)
            writer.writerow([rank, n["label"], f"{n['distance']:.6g}", n["image"], thumb.name])
    return [table, *paths]


def summarise(measurement: ImageMeasurement) -> dict:
    """JSON-ready summary: sites, spacing, polarity, persistence (spacing units) and order."""
    pattern, record = measurement.pattern, measurement.record
    bars = barcode_summary(record.diagrams)
    summary: dict = {
        "image": str(measurement.micrograph.source),
        "n_sites": pattern.n_sites,
        "n_interior": int(np.count_nonzero(~pattern.border)),
        "spacing_px": pattern.spacing,
        "spacing_nm": pattern.spacing_nm,
        "pixel_size_nm": pattern.pixel_size_nm,
        "polarity": pattern.polarity,
        "preferred_spacing": pattern.preferred_spacing,
        "analysed_region": list(pattern.frame),
        "left_out": measurement.region.left_out() if measurement.region is not None else "",
    }
    merged = {**bars, **record.order}
    for key in SUMMARY_MEASURES:
        if key in merged:
            summary[key] = _json_number(merged[key])
    for key, value in record.order.items():
        summary.setdefault(key, _json_number(value))
    summary["h1_count"] = int(bars["h1_count"])  # loops above the noise floor
    summary["h1_count_raw"] = int(bars["h1_count_raw"])  # every loop, site noise included
    summary["h1_truncated_count"] = int(bars["h1_truncated_count"])
    for key, value in record.amounts.items():
        summary.setdefault(key, _json_number(value))
    return summary


def write_inspection(measurement: ImageMeasurement, out: str | Path) -> list[Path]:
    """Write the files of one measured image into ``out``; return the paths written.

    ``sites.csv`` (``x,y,border``), ``summary.json`` (as ``inspect --json``), the pictures
    of :func:`topoclass.report.write_inspection_figures`: ``overlay.png``, ``diagram.png``,
    ``defects.png`` and ``defects.csv``, and ``grains.png`` (the grains of the orientation
    field, :func:`topoclass.report.plot_grains`).
    """
    from topoclass.report import plot_grains, save_figure, write_inspection_figures

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    pattern = measurement.pattern
    sites_csv = out / "sites.csv"
    rows = np.column_stack([pattern.xy, pattern.border.astype(int)])
    np.savetxt(sites_csv, rows, delimiter=",", header="x,y,border", comments="",
               fmt=["%.3f", "%.3f", "%d"])
    summary_json = out / "summary.json"
    summary_json.write_text(json.dumps(summarise(measurement), indent=2) + "\n",
                            encoding="utf-8")
    pictures = write_inspection_figures(measurement.micrograph.image, pattern,
                                        measurement.record.diagrams, out)
    if measurement.amounts is not None:
        grains_png = out / "grains.png"
        save_figure(plot_grains(measurement.micrograph.image, pattern, measurement.amounts),
                    grains_png)
        pictures.append(grains_png)
    return [sites_csv, summary_json, *pictures]


def _json_number(value) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None
