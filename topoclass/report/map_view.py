"""Pictures of a map: ``map.png`` (the image with each tile tinted by its class) and ``map.html``.

Both are drawn from a map folder written by :func:`topoclass.mapping.map_image` (``tiles.csv``,
``map.json``) and the micrograph, shrunk to at most 2000 pixels a side
(:func:`topoclass.bigimage.overview`). Tiles are tinted over their *cores* (which cover the
image once) in the class colours of the report (Okabe & Ito 2008, :data:`CLASS_COLOURS`);
tiles whose verdict is not a class are grey (review light, unfamiliar dark) and tiles that
could not be measured are left untinted. An instrument data bar left out of the analysed region
(:func:`topoclass.mapping.large_image_region`) is hatched and labelled, and a region smaller
than the frame is outlined. The page works offline: the picture is embedded, the zoom and the
per-tile details are a script of ``topoclass/pages/assets``.
"""

from __future__ import annotations

import base64
import html
import io
import json
import textwrap
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure
from matplotlib.patches import Patch, Rectangle

from topoclass.bigimage import DEFAULT_MEMORY_LIMIT_MB, open_large_image, overview
from topoclass.mapping import (
    OTHER_VERDICTS,
    map_totals,
    read_map_header,
    read_tiles,
)
from topoclass.pages import html_page
from topoclass.report.figures import CLASS_COLOURS
from topoclass.scoring import CAUTION

#: Colours of the verdicts that are not a class; ``None`` leaves the tile untinted.
OTHER_COLOURS = {"review": "#BBBBBB", "unfamiliar": "#444444", "not measured": None}

_TINT_ALPHA = 0.4
_LEFT_OUT = {"bar": "instrument data bar (left out)", "region": "analysed region"}
_OVERVIEW_PX = 2000


def verdict_colours(classes) -> dict[str, str | None]:
    """Colour of each verdict: the report's class colours in class order, then the greys."""
    colours = {str(c): CLASS_COLOURS[i % len(CLASS_COLOURS)] for i, c in enumerate(classes)}
    colours.update(OTHER_COLOURS)
    return colours


def write_map_views(out_dir: str | Path, image: str | Path | None = None, *,
                    memory_limit_mb: float = DEFAULT_MEMORY_LIMIT_MB) -> tuple[Path, Path]:
    """Write ``map.png`` and ``map.html`` into a map folder.

    Parameters
    ----------
    out_dir : path-like
        A folder written by :func:`topoclass.mapping.map_image` (a partly written one from a
        killed run is fine: missing tiles are drawn as not measured).
    image : path-like, optional
        The micrograph; by default the one named in ``map.json``.
    memory_limit_mb : float
        As in :func:`topoclass.bigimage.open_large_image`.

    Returns
    -------
    (map.png, map.html)
    """
    out_dir = Path(out_dir)
    header = read_map_header(out_dir)
    rows = read_tiles(out_dir / "tiles.csv")
    classes = header["classes"]
    totals = map_totals(rows, classes, header.get("pixel_size_nm"))
    with open_large_image(image or header["image"], memory_limit_mb=memory_limit_mb) as big:
        small, factor = overview(big, _OVERVIEW_PX)
    colours = verdict_colours(classes)
    tint = _tint(small.shape, rows, factor, colours)
    png = out_dir / "map.png"
    _write_picture(png, small, tint, totals, colours, header)
    page = out_dir / "map.html"
    page.write_text(_page(small, factor, rows, totals, colours, header), encoding="utf-8")
    return png, page


# --------------------------------------------------------------------------------------------
# private helpers


def _tint(shape, rows, factor: int, colours) -> np.ndarray:
    """RGBA layer at overview scale with each tile core filled in its verdict's colour."""
    from matplotlib.colors import to_rgba

    layer = np.zeros((*shape, 4), dtype=np.float32)
    for r in rows:
        colour = colours.get(_verdict(r))
        if colour is None:
            continue
        x0, y0, x1, y1 = (int(r[k]) // factor for k in ("core_x0", "core_y0", "core_x1",
                                                        "core_y1"))
        layer[y0:y1, x0:x1] = to_rgba(colour, _TINT_ALPHA)
    return layer


def _verdict(row: dict) -> str:
    return (row.get("verdict") or "not measured") if row.get("status") == "ok" \
        else "not measured"


def _legend_label(t: dict) -> str:
    size = "" if t["area_um2"] is None else f", {t['area_um2']:,.0f} µm²"
    return f"{t['verdict']}: {t['fraction']:.1%}{size}"


def _write_picture(path: Path, small, tint, totals, colours, header) -> None:
    # One RGB picture, tint composited here and shrunk to about the figure's pixels: letting
    # matplotlib resample a 2000-pixel grey image and an RGBA layer takes seconds.
    from skimage.measure import block_reduce

    grey = np.nan_to_num(small, nan=0.5)[..., None]
    alpha = tint[..., 3:4]
    rgb = np.clip(grey * (1 - alpha) + tint[..., :3] * alpha, 0, 1)
    shrink = max(1, int(np.ceil(max(rgb.shape[:2]) / 1300)))
    if shrink > 1:
        rgb = block_reduce(rgb, (shrink, shrink, 1), np.mean)
    h, w = rgb.shape[:2]
    width_in, below, above = 9.0, 1.3, 0.3  # inches: legend and caution below, title above
    image_in = (width_in - 0.4) * h / w
    fig_h = image_in + below + above
    fig = Figure(figsize=(width_in, fig_h), dpi=150)
    ax = fig.add_axes((0.2 / width_in, below / fig_h, 1 - 0.4 / width_in, image_in / fig_h))
    ax.imshow((rgb * 255).astype(np.uint8), interpolation="nearest")
    ax.set_axis_off()
    # Picture pixels per image pixel, for drawing image boxes over the shrunk picture.
    scale = w / header["shape"][1]
    left_out = _left_out(header)
    for (x0, y0, x1, y1), kind in left_out:
        ax.add_patch(Rectangle(
            (x0 * scale - 0.5, y0 * scale - 0.5), (x1 - x0) * scale, (y1 - y0) * scale,
            fill=kind == "bar", facecolor="white", alpha=0.9 if kind == "bar" else 1.0,
            edgecolor="#D55E00", hatch="//" if kind == "bar" else None,
            linestyle="-" if kind == "bar" else "--", linewidth=1.0))
    ax.set_title(f"{Path(header['image']).name}: tiles of {header['tile_px']} px by class",
                 fontsize=9)
    handles = []
    for t in totals:
        if not t["tiles"] and t["verdict"] in OTHER_VERDICTS:
            continue
        colour = colours.get(t["verdict"])
        handles.append(Patch(facecolor=colour or "none", edgecolor="black", linewidth=0.5,
                             label=_legend_label(t) + ("" if colour else " (no tint)")))
    for _, kind in left_out:
        handles.append(Patch(facecolor="white" if kind == "bar" else "none",
                             edgecolor="#D55E00", hatch="//" if kind == "bar" else None,
                             linestyle="-" if kind == "bar" else "--", label=_LEFT_OUT[kind]))
    fig.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, (below - 0.05) / fig_h),
               ncol=min(3, len(handles)), fontsize=7, frameon=False,
               title=f"share of the {'analysed region' if left_out else 'image'} (tile cores)",
               title_fontsize=7)
    fig.text(0.5, 0.08 / fig_h, "\n".join(textwrap.wrap("Caution: " + CAUTION, 150)), ha="center",
             va="bottom", fontsize=5.5)
    fig.savefig(path)


def _left_out(header: dict) -> list[tuple[tuple[int, int, int, int], str]]:
    """Image boxes to mark: the data bar (``"bar"``) and the analysed region (``"region"``,
    when it is not the whole frame)."""
    rows, cols = header["shape"]
    region = tuple(header.get("region") or (0, 0, cols, rows))
    marks = []
    bar = header.get("data_bar")
    if bar:
        y0 = bar["boundary"] if bar["edge"] == "bottom" else bar["boundary"] - bar["rows"]
        marks.append(((region[0], y0, region[2], y0 + bar["rows"]), "bar"))
    if region != (0, 0, cols, rows):
        marks.append((region, "region"))
    return marks


def _jpeg(small: np.ndarray) -> str:
    from PIL import Image

    grey = np.nan_to_num(small, nan=0.5)
    buf = io.BytesIO()
    Image.fromarray((np.clip(grey, 0, 1) * 255).astype(np.uint8)).save(buf, "JPEG", quality=85)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _page(small, factor, rows, totals, colours, header) -> str:
    e = html.escape
    rows_img, cols_img = header["shape"]
    classes = header["classes"]
    rects = []
    for i, r in enumerate(rows):
        x0, y0, x1, y1 = (int(r[k]) for k in ("core_x0", "core_y0", "core_x1", "core_y1"))
        v = _verdict(r)
        fill = colours.get(v)
        style = f"fill:{fill}" if fill else "fill:transparent"
        rects.append(f"<rect class='tile' data-i='{i}' data-verdict='{e(v)}' x='{x0}' y='{y0}' "
                     f"width='{x1 - x0}' height='{y1 - y0}' style='{style}'/>")
    keep = ["x0", "y0", "x1", "y1", "status", "verdict", "predicted", "confidence",
            *[f"p_{c}" for c in classes], "unfamiliar", "n_sites", "spacing_px",
            "psi6_global", "defect_fraction", "h1_count", "message"]
    data = [{k: r.get(k, "") for k in keep} for r in rows]
    legend = []
    for t in totals:
        if not t["tiles"] and t["verdict"] in OTHER_VERDICTS:
            continue
        area = "" if t["area_um2"] is None else f"{t['area_um2']:,.1f}"
        legend.append(
            f"<tr><td><span class='swatch' style='background:"
            f"{colours.get(t['verdict']) or 'none'}'></span>{e(t['verdict'])}</td>"
            f"<td>{t['tiles']}</td><td>{t['fraction']:.1%}</td><td>{area}</td></tr>")
    marks = []
    for (x0, y0, x1, y1), kind in _left_out(header):
        marks.append(f"<rect class='left-out {kind}' x='{x0}' y='{y0}' width='{x1 - x0}' "
                     f"height='{y1 - y0}'><title>{e(_LEFT_OUT[kind])}</title></rect>")
    bar = header.get("data_bar")
    bar_text = ("" if not bar else
                f" The instrument data bar along the {e(bar['edge'])} edge ({bar['rows']} rows) "
                "is left out of the tiles and hatched on the picture.")
    body = (
        f"<h1>Map of {e(Path(header['image']).name)}</h1>"
        f"<p class='caution'><strong>Caution.</strong> {e(CAUTION)}</p>"
        f"<p>{cols_img} × {rows_img} px; {len(rows)} of {header['n_tiles']} tiles of "
        f"{header['tile_px']} px (overlap {header['overlap_px']} px, lattice spacing "
        f"{header['spacing_px']:.1f} px). Each tile is tinted over the part of the image it "
        f"stands for; click a tile for its scores.{bar_text}</p>"
        "<table class='totals'><thead><tr><th>verdict</th><th>tiles</th><th>share</th>"
        "<th>area µm²</th></tr></thead><tbody>" + "".join(legend) + "</tbody></table>"
        "<div class='map-tools'><button id='zoom-in' type='button'>+</button>"
        "<button id='zoom-out' type='button'>−</button>"
        "<button id='zoom-fit' type='button'>fit</button>"
        "<span id='zoom-level'></span></div>"
        "<div class='map-box'>"
        f"<svg id='map' viewBox='0 0 {cols_img} {rows_img}' data-width='{cols_img}' "
        f"data-height='{rows_img}' xmlns='http://www.w3.org/2000/svg'>"
        f"<image href='data:image/jpeg;base64,{_jpeg(small)}' x='0' y='0' "
        f"width='{small.shape[1] * factor}' height='{small.shape[0] * factor}' "
        "preserveAspectRatio='none'/>"
        f"<g id='tiles'>{''.join(rects)}</g><g id='left-out'>{''.join(marks)}</g></svg>"
        "<aside id='tile-detail'><p>Click a tile.</p></aside></div>"
        f"<script type='application/json' id='tile-data'>{_json_for_script(data)}</script>"
    )
    return html_page(f"map of {Path(header['image']).name}", body,
                     styles=("base.css", "map_page.css"), scripts=("map_page.js",))


def _json_for_script(data) -> str:
    # "</" would end the script element early; JSON allows "<\/" as the same string.
    return json.dumps(data, separators=(",", ":")).replace("</", "<\\/")
