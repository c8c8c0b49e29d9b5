"""Shared inputs of the report tests: invented micrographs and a scores.csv in the real format."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
from PIL import Image

from topoclass.scoring import MEASURE_COLUMNS, score_columns
from topoclass.synth import hexagonal_lattice, render_micrograph

CLASSES = ("ordered", "vacancies", "disordered")


def vacancy_lattice(shape=(200, 200), spacing=14.0, seed=1):
    """Invented pore lattice (jitter 2 % of the spacing) with the site nearest the centre removed.

    Returns the image, the removed site (x, y) and the spacing.
    """
    xy = hexagonal_lattice(shape, spacing, jitter=0.02, margin=-spacing, seed=seed)
    centre = np.array([shape[1] / 2, shape[0] / 2])
    k = int(np.argmin(np.hypot(*(xy - centre).T)))
    removed = xy[k].copy()
    xy = np.delete(xy, k, axis=0)
    image = render_micrograph(xy, shape, 0.3 * spacing, polarity="dark", blur=0.8, noise=0.05,
                              seed=seed + 1)
    return image, removed, spacing


def write_png(path: Path, image: np.ndarray) -> Path:
    Image.fromarray(np.clip(image * 255 + 0.5, 0, 255).astype(np.uint8)).save(path)
    return path


def scores_fixture(folder: Path, n_ok: int = 4) -> tuple[Path, list[dict]]:
    """Invented micrographs and a scores.csv (the columns of topoclass.scoring.score_columns).

    Row 0 is unfamiliar, the last row is a failed image; probabilities and measures differ per
    row so that sorting has something to do.
    """
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(7)
    rows = []
    for k in range(n_ok):
        spacing = 11.0 + k
        xy = hexagonal_lattice((160, 160), spacing, jitter=0.03 * (k + 1), margin=-spacing,
                               seed=k)
        image = render_micrograph(xy, (160, 160), 0.3 * spacing, blur=0.7, noise=0.05, seed=k)
        path = write_png(folder / f"membrane_{k}.png", image)
        p = rng.dirichlet(np.ones(len(CLASSES)))
        best = int(np.argmax(p))
        row = {"image": str(path), "status": "ok", "predicted": CLASSES[best],
               "confidence": f"{p[best]:.6g}", "unfamiliar": "yes" if k == 0 else "no",
               "sha256": f"{k:064x}",
               "message": "unlike the training images (unfamiliarity 3.10); check by eye"
               if k == 0 else ""}
        row.update({f"p_{c}": f"{v:.6g}" for c, v in zip(CLASSES, p, strict=True)})
        row.update({m: f"{rng.uniform(0, 100):.6g}" for m in MEASURE_COLUMNS})
        rows.append(row)
    bad = folder / "broken.png"
    bad.write_text("not an image")
    rows.append({"image": str(bad), "status": "error", "sha256": "",
                 "message": f"{bad}: not a readable PNG, JPEG or TIFF image; export it again"})
    scores = folder / "scores.csv"
    columns = score_columns(list(CLASSES))
    with open(scores, "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=columns, lineterminator="\n")
        writer.writeheader()
        for row in rows:
            writer.writerow({c: row.get(c, "") for c in columns})
    return scores, rows
