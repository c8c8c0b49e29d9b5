"""Write the README's pictures from the demo data: docs/overlay.png, docs/defects.png and
docs/report.png, and the caption line under them in README.md.

    python docs/make_figures.py                       # runs `topoclass demo` in a temporary folder
    python docs/make_figures.py --demo topoclass-demo # or uses a folder `topoclass demo` wrote

``overlay.png`` and ``defects.png`` are the pictures ``topoclass inspect`` writes for one
production image of the demo; ``report.png`` is a screenshot of the demo batch's ``scores.html``
taken by Debian's headless Chromium (``apt-get install chromium``). Each is reduced to a
256-colour palette (and, if still larger than :data:`MAX_BYTES`, scaled down) so the repository
stays small. The images are invented (``topoclass.synth``), not measurements.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
for _p in (str(ROOT / "tools"), str(ROOT / "benchmarks")):
    if _p not in sys.path:
        sys.path.insert(0, _p)

from _machine import cpu_model  # noqa: E402
from readme_blocks import replace_blocks  # noqa: E402

README = ROOT / "README.md"
IMAGE = "production/images/vacancies_002.png"  # the image the README's inspect example shows
MAX_BYTES = 300_000
WINDOW = (1300, 1000)
_BROWSERS = ("chromium", "chromium-browser")
_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
          "--disable-component-update", "--disable-sync", "--no-first-run", "--hide-scrollbars")


def make_figures(demo: Path, out_dir: Path = HERE, readme: Path | None = README) -> dict:
    """Write the three pictures from the folder ``demo`` (written by ``topoclass demo``) into
    ``out_dir`` and, when ``readme`` is given, its caption block; returns ``name -> bytes``."""
    demo = Path(demo).resolve()
    page = demo / "scores.html"
    if not (demo / IMAGE).exists() or not page.exists():
        raise SystemExit(f"{demo}: not a folder `topoclass demo` wrote (no {IMAGE} or "
                         "scores.html); run `topoclass demo` or leave out --demo")
    sizes = {}
    with tempfile.TemporaryDirectory(prefix="topoclass-figures-") as tmp:
        tmp = Path(tmp)
        _topoclass(["inspect", IMAGE, "--out", str(tmp / "inspect")], demo, tmp)
        for name in ("overlay.png", "defects.png"):
            sizes[name] = small_png(tmp / "inspect" / name, out_dir / name)
        screenshot(page, tmp / "report.png", tmp / "profile")
        sizes["report.png"] = small_png(tmp / "report.png", out_dir / "report.png")
    if readme is not None:
        caption = (
            "The pictures above are made from invented demo micrographs (`topoclass.synth`), "
            "not measurements: the site overlay and defect map that `topoclass inspect` draws "
            f"for the demo's `{IMAGE}`, and a headless-Chromium screenshot of the demo batch's "
            f"`scores.html`. _Written by `python docs/make_figures.py` on "
            f"{dt.date.today().isoformat()} ({cpu_model()}, {os.cpu_count()} logical cores)._"
        )
        text = readme.read_text(encoding="utf-8")
        readme.write_text(replace_blocks(text, {"pictures": caption}), encoding="utf-8")
    return sizes


def screenshot(page: Path, out: Path, profile: Path) -> Path:
    """A PNG of ``page`` as headless Chromium shows it in a :data:`WINDOW` window."""
    binary = next((shutil.which(b) for b in _BROWSERS if shutil.which(b)), None)
    if binary is None:
        raise SystemExit("no chromium on PATH; install it (apt-get install -y chromium)")
    argv = [binary, *_FLAGS, f"--user-data-dir={profile}",
            f"--window-size={WINDOW[0]},{WINDOW[1]}", "--virtual-time-budget=5000",
            f"--screenshot={out}", page.as_uri()]
    done = subprocess.run(argv, capture_output=True, text=True, timeout=180,
                          stdin=subprocess.DEVNULL)
    if done.returncode != 0 or not out.exists():
        raise SystemExit(f"chromium could not take the screenshot of {page} (exit "
                         f"{done.returncode}): {done.stderr[-1500:]}")
    return out


def small_png(source: Path, out: Path, max_bytes: int = MAX_BYTES) -> int:
    """Save ``source`` as a 256-colour PNG at ``out``, scaled down until it fits ``max_bytes``."""
    from PIL import Image

    image = Image.open(source).convert("RGB")
    while True:
        image.quantize(colors=256, method=Image.Quantize.MEDIANCUT, dither=Image.Dither.NONE
                       ).save(out, optimize=True)
        size = out.stat().st_size
        if size <= max_bytes:
            return size
        image = image.resize((int(image.width * 0.85), int(image.height * 0.85)),
                             Image.Resampling.LANCZOS)


def _topoclass(args: list[str], cwd: Path, tmp: Path) -> None:
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""),
           "MPLBACKEND": "Agg", "TOPOCLASS_CACHE": str(tmp / "cache")}
    done = subprocess.run([sys.executable, "-m", "topoclass", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, stdin=subprocess.DEVNULL)
    if done.returncode != 0:
        raise SystemExit(f"topoclass {' '.join(args)} exited {done.returncode}: "
                         f"{done.stderr[-2000:]}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--demo", type=Path, help="a folder `topoclass demo` wrote")
    args = parser.parse_args(argv)
    if args.demo is not None:
        sizes = make_figures(args.demo)
    else:
        with tempfile.TemporaryDirectory(prefix="topoclass-demo-") as tmp:
            _topoclass(["demo", "--workdir", "topoclass-demo"], Path(tmp), Path(tmp))
            sizes = make_figures(Path(tmp) / "topoclass-demo")
    for name, size in sizes.items():
        print(f"docs/{name}: {size / 1000:.0f} kB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
