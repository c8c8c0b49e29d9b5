"""One micrograph end to end: facts about ideal and irregular lattices survive site finding."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import skimage.io

from topoclass.inspection import inspect_image
from topoclass.synth import make_micrograph

REPO = Path(__file__).resolve().parents[1]
KEYS = ("n_sites", "spacing_px", "polarity", "h0_length_variance", "h1_length_sum", "h1_count",
        "psi6_global", "psi6_local_mean", "defect_fraction", "clark_evans_r", "nn_cv")


def _write(kind: str, seed: int, folder: Path) -> Path:
    image, _ = make_micrograph(kind, size=320, seed=seed)
    path = folder / f"{kind}_{seed}.png"
    skimage.io.imsave(path, (image * 255).round().astype(np.uint8), check_contrast=False)
    return path


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_ordered_micrograph_has_far_less_h0_spread_and_h1_than_a_disordered_one(seed, tmp_path):
    # Common practice: in the Rips filtration of an ideal triangular lattice every finite H0
    # class dies at the spacing (zero variance of the H0 bar lengths), and since a Rips triangle
    # enters at its longest edge every 1-cycle is a boundary when born (no H1 bar of positive
    # length). Disorder raises the H0 length variance and the H1 length sum. Checked here
    # through the whole chain: rendered micrograph -> PNG -> site finding -> persistence.
    ordered = inspect_image(_write("ordered", seed, tmp_path))
    disordered = inspect_image(_write("disordered", seed, tmp_path))
    assert ordered["h0_length_variance"] < 0.5 * disordered["h0_length_variance"]
    assert ordered["h1_length_sum_per_site"] < 0.25 * disordered["h1_length_sum_per_site"]
    assert ordered["psi6_global"] > 0.8 > 0.3 > disordered["psi6_global"]


def test_inspect_json_prints_one_object_with_the_measures(tmp_path):
    path = _write("vacancies", 4, tmp_path)
    env = {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    done = subprocess.run([sys.executable, "-m", "topoclass", "inspect", str(path), "--json"],
                          env=env, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    summary = json.loads(done.stdout)
    for key in KEYS:
        assert key in summary, key
    assert summary["polarity"] == "dark" and summary["n_sites"] > 100
    assert summary["h1_count"] > 0  # missing pores open loops
