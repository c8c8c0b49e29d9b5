"""Bad micrographs on the command line: exit code 2 and one line on stderr, never a traceback."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import tifffile
from PIL import Image

REPO = Path(__file__).resolve().parents[1]


def _write(kind: str, tmp_path: Path) -> Path:
    rng = np.random.default_rng(3)
    if kind == "missing":
        return tmp_path / "membrane_07.tif"
    if kind == "folder":
        path = tmp_path / "line3.png"
        path.mkdir()
        return path
    if kind == "empty":
        path = tmp_path / "zero.tif"
        path.touch()
        return path
    if kind == "text_as_png":
        path = tmp_path / "readme.png"
        path.write_text("this is not an image\n")
        return path
    if kind == "truncated_png":
        path = tmp_path / "cut.png"
        Image.fromarray(rng.integers(0, 256, (128, 128), dtype=np.uint8)).save(path)
        path.write_bytes(path.read_bytes()[:2000])
        return path
    if kind == "truncated_tiff":
        path = tmp_path / "cut.tif"
        tifffile.imwrite(path, rng.integers(0, 65536, (128, 128), dtype=np.uint16))
        path.write_bytes(path.read_bytes()[:5000])
        return path
    if kind == "tiny":
        path = tmp_path / "tiny.png"
        Image.fromarray(rng.integers(0, 256, (20, 20), dtype=np.uint8)).save(path)
        return path
    if kind == "constant":
        path = tmp_path / "flat.png"
        Image.fromarray(np.full((64, 64), 200, np.uint8)).save(path)
        return path
    if kind == "nan_only":
        path = tmp_path / "nan.tif"
        tifffile.imwrite(path, np.full((64, 64), np.nan, np.float32))
        return path
    if kind == "seven_channels":
        path = tmp_path / "seven.tif"
        tifffile.imwrite(path, rng.integers(0, 256, (64, 64, 7), dtype=np.uint8),
                         photometric="minisblack", planarconfig="contig")
        return path
    if kind == "unsupported":
        path = tmp_path / "scan.gif"
        Image.fromarray(rng.integers(0, 256, (64, 64), dtype=np.uint8)).save(path)
        return path
    raise AssertionError(kind)


ALL_KINDS = [
    "missing", "folder", "empty", "text_as_png", "truncated_png", "truncated_tiff", "tiny",
    "constant", "nan_only", "seven_channels", "unsupported",
]  # fmt: skip
# A fresh interpreter costs seconds (the pipeline imports scikit-learn and ripser), so only a
# few kinds go through a real subprocess; all of them go through the same entry point in-process.
SUBPROCESS_KINDS = ["missing", "text_as_png", "truncated_tiff", "seven_channels"]


@pytest.mark.parametrize("kind", SUBPROCESS_KINDS)
def test_inspect_bad_image_subprocess(tmp_path, kind):
    path = _write(kind, tmp_path)
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(REPO), env.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    result = subprocess.run(
        [sys.executable, "-m", "topoclass", "inspect", str(path)],
        cwd=REPO, env=env, capture_output=True, text=True, timeout=120,
    )
    assert result.returncode == 2, result.stderr
    _assert_one_error_line(result.stderr, path)
    assert result.stdout == ""


@pytest.mark.parametrize("kind", ALL_KINDS)
def test_inspect_bad_image_entry_point(tmp_path, kind, monkeypatch, capsys):
    from topoclass.cli import main

    path = _write(kind, tmp_path)
    monkeypatch.setattr(sys, "argv", ["topoclass", "inspect", str(path)])
    with pytest.raises(SystemExit) as excinfo:
        main()
    assert excinfo.value.code == 2
    captured = capsys.readouterr()
    _assert_one_error_line(captured.err, path)
    assert captured.out == ""


def _assert_one_error_line(stderr: str, path: Path) -> None:
    assert "Traceback" not in stderr
    lines = stderr.splitlines()
    assert len(lines) == 1, stderr
    assert lines[0].startswith("topoclass: error: ")
    assert str(path) in lines[0]
