"""Command line: a thin shell over the Python API.

Every command here calls public functions of the pipeline modules; nothing is computed in this
file that a notebook could not compute the same way.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import typer

from topoclass.errors import TopoclassError

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    help="Sort micrographs of nearly hexagonal patterns by the kind and amount of disorder.",
)


def main() -> None:
    """Entry point: user errors become one line on stderr and exit code 2, never a traceback."""
    try:
        app(standalone_mode=False)
    except TopoclassError as exc:
        typer.echo(f"error: {_one_line(exc)}", err=True)
        sys.exit(2)
    except typer.Exit as exc:
        sys.exit(exc.exit_code)
    except typer.Abort:
        typer.echo("aborted", err=True)
        sys.exit(130)
    except KeyboardInterrupt:
        typer.echo("interrupted", err=True)
        sys.exit(130)
    except Exception as exc:  # click usage errors arrive here in non-standalone mode
        import click

        if isinstance(exc, click.ClickException):
            exc.show()
            sys.exit(exc.exit_code)
        raise


@app.command()
def inspect(
    image: Path = typer.Argument(..., help="Micrograph file (PNG, JPEG or TIFF)."),
    out: Path | None = typer.Option(None, "--out", help="Folder for sites.csv and pictures."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of text."),
    polarity: str = typer.Option("auto", help="auto, bright (dots) or dark (pores)."),
    pixel_size: float | None = typer.Option(
        None, "--pixel-size", help="Pixel size in nm, when the file does not record it."
    ),
) -> None:
    """Find the lattice sites of one micrograph and report its order measures."""
    from topoclass.inspection import inspect_image

    summary = inspect_image(image, out=out, polarity=polarity, pixel_size_nm=pixel_size)
    if as_json:
        typer.echo(json.dumps(summary, sort_keys=False))
        return
    typer.echo(_human_summary(summary))


@app.command()
def synth(
    out_dir: Path = typer.Argument(..., help="Folder to write images, labels.csv and truth."),
    per_class: int = typer.Option(8, "--per-class", min=1, help="Images per class."),
    size: int = typer.Option(384, "--size", min=64, help="Image side in pixels."),
    seed: int = typer.Option(0, "--seed", help="Random seed; same seed, same images."),
) -> None:
    """Make synthetic anodic-alumina micrographs with ground truth (invented demo data)."""
    from topoclass.synth import write_dataset

    labels = write_dataset(out_dir, per_class=per_class, size=size, seed=seed, progress=True)
    typer.echo(f"wrote {labels}")


def _human_summary(summary: dict) -> str:
    lines = [f"{summary['image']}"]
    spacing = f"{summary['spacing_px']:.2f} px"
    if summary.get("spacing_nm") is not None:
        spacing += f" ({summary['spacing_nm']:.1f} nm)"
    interior = summary.get("n_interior", "?")
    lines.append(f"  sites found      {summary['n_sites']} ({interior} interior)")
    lines.append(f"  spacing          {spacing}")
    lines.append(f"  polarity         {summary['polarity']}")
    skip = {"image", "n_sites", "n_interior", "spacing_px", "spacing_nm", "polarity", "outputs"}
    for key, value in summary.items():
        if key in skip or value is None:
            continue
        text = f"{value:.4g}" if isinstance(value, float) else str(value)
        lines.append(f"  {key:<16} {text}")
    for path in summary.get("outputs", []):
        lines.append(f"  wrote            {path}")
    return "\n".join(lines)


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split())
