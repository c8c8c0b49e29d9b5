"""The light detail view of one image in a batch report: SVG layers over one screen-size JPEG.

The inspection pictures of :mod:`topoclass.report.figures` are matplotlib PNGs with the
micrograph baked into each, about 0.4 s and 1 MB per image: more than scoring the image costs.
A batch page needs neither the print quality nor three copies of the micrograph, so its detail
view holds the micrograph once, as a JPEG no larger than a screen needs (``micrograph.jpg``),
and draws the same content as vector layers written straight from the arrays: the sites by
Delaunay coordination, the defect map (:func:`topoclass.defects.locate_defects`) and the
lifetime diagram with the barcode. Writing the text of a few thousand SVG shapes costs
milliseconds; the browser draws them, sharp at any zoom, without a script.
"""

from __future__ import annotations

import html
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from topoclass.defects import defect_counts, locate_defects, write_defects_csv
from topoclass.order import coordination_class, site_coordination
from topoclass.persistence import Diagrams
from topoclass.report.figures import COORDINATION_COLOURS, DEFECT_COLOURS, MAX_DRAWN_DEFECTS
from topoclass.sites import SitePattern

#: Longest side of the micrograph layer, in pixels; a larger image is reduced to it.
SCREEN_PX = 800


#: JPEG quality of the micrograph layer (libjpeg scale, 0-95).
JPEG_QUALITY = 75


def write_detail_pictures(image: np.ndarray, pattern: SitePattern, diagrams: Diagrams,
                          folder: str | Path, *, max_drawn: int = MAX_DRAWN_DEFECTS) -> str:
    """Write ``micrograph.jpg`` and ``defects.csv`` into ``folder``; return the pictures' HTML.

    The HTML fragment holds three inline SVG pictures with their legends: the sites coloured
    by Delaunay coordination (border sites hollow), the defect map (every loop and gap above
    the noise floors in ``defects.csv``, at most ``max_drawn`` of each kind drawn, which the
    legend then says) and the lifetime diagram beside the barcode. The SVGs are in image
    pixel coordinates (pixel centres at integers), so a site at ``(x, y)`` is drawn at
    ``(x, y)`` over the JPEG, whatever its reduction.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    _write_jpeg(image, folder / "micrograph.jpg")
    defects = locate_defects(pattern, diagrams)
    write_defects_csv(defects, folder / "defects.csv")
    return (
        "<h2>Sites by Delaunay coordination</h2>" + _sites_svg(pattern)
        + "<h2>Defect map</h2>" + _defects_svg(pattern, defects, max_drawn)
        + "<p><a href='defects.csv'>defects.csv</a> — every defect above the noise floors, "
        "with its place in pixels.</p>"
        + "<h2>Lifetime diagram and barcode</h2>" + _diagram_svg(diagrams)
    )


# --------------------------------------------------------------------------------------------
# private helpers


def _write_jpeg(image: np.ndarray, path: Path) -> None:
    from PIL import Image

    im = Image.fromarray(np.clip(np.asarray(image) * 255 + 0.5, 0, 255).astype(np.uint8))
    if max(im.size) > SCREEN_PX:
        im.thumbnail((SCREEN_PX, SCREEN_PX), Image.Resampling.LANCZOS)
    im.save(path, format="JPEG", quality=JPEG_QUALITY, optimize=True)


def _image_svg(pattern: SitePattern, layers: str, label: str) -> str:
    rows, cols = pattern.shape
    scale = min(SCREEN_PX / max(rows, cols), 4.0)
    return (f"<svg class='layers' viewBox='-0.5 -0.5 {cols} {rows}' width='{cols * scale:.0f}' "
            f"height='{rows * scale:.0f}' role='img' aria-label='{html.escape(label)}'>"
            f"<image href='micrograph.jpg' x='-0.5' y='-0.5' width='{cols}' height='{rows}' "
            f"preserveAspectRatio='none'/>{layers}</svg>")


def _circles(xy: np.ndarray, r: float | np.ndarray) -> str:
    r = np.broadcast_to(np.asarray(r, dtype=float), (xy.shape[0],))
    # Plain floats: formatting numpy scalars one by one costs several times more.
    return "".join(f"<circle cx='{x:.1f}' cy='{y:.1f}' r='{q:.1f}'/>"
                   for (x, y), q in zip(np.asarray(xy).tolist(), r.tolist(), strict=True))


def _dots(xy: np.ndarray) -> str:
    """Path data of one zero-length stroke per point: with round caps, one disc each, about a
    quarter of the bytes of a ``<circle>`` per point (a batch page holds thousands)."""
    return "".join(f"M{x:.1f} {y:.1f}h0" for x, y in np.asarray(xy).tolist())


def _sites_svg(pattern: SitePattern) -> str:
    coord = site_coordination(pattern)
    label = coordination_class(coord)
    r = 0.21 * pattern.spacing
    width = 0.06 * pattern.spacing
    groups, legend = [], []
    for name, colour in COORDINATION_COLOURS.items():
        members = label == name
        inner, outer = members & ~pattern.border, members & pattern.border
        if inner.any():
            # An outline in black under the coloured disc, as in the inspection picture.
            d = _dots(pattern.xy[inner])
            groups.append(f"<path d='{d}' stroke='black' stroke-width='{2 * r + width:.2f}' "
                          f"stroke-linecap='round'/><path d='{d}' stroke='{colour}' "
                          f"stroke-width='{2 * r:.2f}' stroke-linecap='round'/>")
        if outer.any():
            groups.append(f"<g fill='none' stroke='{colour}' stroke-width='{2 * width:.2f}' "
                          f"opacity='0.6'>{_circles(pattern.xy[outer], r)}</g>")
        legend.append(f"<span class='dot' style='background:{colour}'></span>{name} "
                      f"({int(np.count_nonzero(inner))})")
    legend.append(f"<span class='dot' style='border:1px solid grey'></span>border "
                  f"({int(pattern.border.sum())})")
    return (_image_svg(pattern, "".join(groups), "sites by Delaunay coordination")
            + "<p class='legend'>Delaunay neighbours (interior sites): "
            + " &nbsp; ".join(legend) + "</p>")


def _defects_svg(pattern: SitePattern, defects: Sequence[dict], max_drawn: int) -> str:
    spacing, xy = pattern.spacing, pattern.xy
    parts = []
    found = defect_counts(defects)
    drawn = {"h1": 0, "h0": 0}
    floors = {}
    for kind in ("h1", "h0"):
        rows = [r for r in defects if r["kind"] == kind][:max(max_drawn, 0)]
        drawn[kind] = len(rows)
        if not rows:
            continue
        floors[kind] = rows[0]["floor"]
        ends = [(*xy[r["site_i"]].tolist(), *xy[r["site_j"]].tolist()) for r in rows
                if r["located_by"] in ("death edge", "mst edge", "birth edge")]
        edges = "".join(f"M{a:.1f} {b:.1f}L{c:.1f} {d:.1f}" for a, b, c, d in ends)
        radii = np.array([max(0.5 * r["length"], 0.25) * spacing for r in rows])
        centres = np.array([[r["x"], r["y"]] for r in rows])
        stroke = (0.16 if kind == "h1" else 0.1) * spacing
        colour = DEFECT_COLOURS[kind]
        parts.append(f"<path d='{edges}' stroke='{colour}' stroke-width='{stroke:.2f}' "
                     "stroke-linecap='round' fill='none'/>")
        parts.append(f"<g fill='none' stroke='{colour}' stroke-width='{stroke:.2f}'>"
                     f"{_circles(centres, radii)}</g>")
        if kind == "h1":  # the ten longest loops carry their rank in defects.csv
            parts.append(
                f"<g fill='{colour}' font-size='{0.6 * spacing:.1f}' font-weight='bold' "
                f"font-family='sans-serif' stroke='white' stroke-width='{0.1 * spacing:.2f}' "
                "paint-order='stroke'>"
                + "".join(f"<text x='{c[0] + q:.1f}' y='{c[1] - q:.1f}'>{r['rank']}</text>"
                          for r, c, q in zip(rows[:10], centres, radii, strict=False))
                + "</g>")
    words = {"h1": "H1 loops (circle radius: half the bar)", "h0": "H0 gaps (widest merges)"}
    legend = []
    for kind in ("h1", "h0"):
        text = f"{found[kind]} {words[kind]}"
        if kind in floors:
            text += f" above {floors[kind]:.2g} spacing"
        if drawn[kind] < found[kind]:
            text += f" — drawn: the longest {drawn[kind]} of {found[kind]}"
        legend.append(f"<span class='dot' style='border:2px solid {DEFECT_COLOURS[kind]}'>"
                      f"</span>{html.escape(text)}")
    return (_image_svg(pattern, "".join(parts), "defect map")
            + "<p class='legend'>" + " &nbsp; ".join(legend) + "</p>")


def _diagram_svg(diagrams: Diagrams) -> str:
    """Lifetime diagram (birth, persistence) of H0 and H1 and the barcode of each, in SVG."""
    limit = float(diagrams.max_scale)
    h0, h1 = diagrams.h0, diagrams.h1
    cut = np.asarray(diagrams.h1_truncated, dtype=bool)
    top = max(limit, float(h0[:, 1].max()) if h0.size else 0.0) * 1.05
    size, pad = 300.0, 40.0  # plot side and margin, in SVG units (CSS pixels)

    def sx(v):
        return pad + size * np.asarray(v, dtype=float) / top

    def sy(v):
        return pad + size * (1.0 - np.asarray(v, dtype=float) / top)

    life0 = h0[:, 1] - h0[:, 0] if h0.size else np.empty(0)
    life1 = h1[:, 1] - h1[:, 0] if h1.size else np.empty(0)
    ticks = _ticks(top)
    out = [f"<line x1='{sx(0):.1f}' y1='{sy(limit):.1f}' x2='{sx(limit):.1f}' y2='{sy(0):.1f}' "
           "stroke='#555' stroke-dasharray='4 2'/>"]
    out.append(_axes(sx, sy, ticks, "birth (spacings)", "persistence (spacings)", pad, size))
    # Marks that fall on the same tenth of a pixel are one mark: H0 has one bar per site.
    ticks0 = np.unique(np.round(sy(life0), 1)).tolist()
    out.append(f"<path d='{''.join(f'M{sx(0) - 4:.1f} {y:.1f}h8' for y in ticks0)}' "
               f"stroke='{DEFECT_COLOURS['h0']}' stroke-width='1.5'/>")
    points1 = np.unique(np.round(np.column_stack([sx(h1[~cut, 0]), sy(life1[~cut])]), 1),
                        axis=0)
    out.append(f"<path d='{_dots(points1)}' stroke='{DEFECT_COLOURS['h1']}' stroke-width='5' "
               "stroke-linecap='round' stroke-opacity='0.8'/>")
    out.append(f"<g fill='{DEFECT_COLOURS['h1']}' stroke='black'>"
               + "".join(f"<path d='M{x:.1f} {y - 4:.1f}l4 7h-8z'/>"
                         for x, y in zip(sx(h1[cut, 0]).tolist(), sy(life1[cut]).tolist(),
                                         strict=True))
               + "</g>")
    diagram = (f"<svg viewBox='0 0 {size + 1.5 * pad:.0f} {size + 2 * pad:.0f}' "
               f"width='{size + 1.5 * pad:.0f}' role='img' aria-label='lifetime diagram'>"
               f"<text x='{pad}' y='20' font-size='13'>Lifetime diagram</text>"
               + "".join(out) + "</svg>")
    bars = [_barcode(h1, "H1", DEFECT_COLOURS["h1"], top, limit),
            _barcode(h0, "H0", DEFECT_COLOURS["h0"], top, limit)]
    legend = (f"<p class='legend'><span class='dot' style='background:{DEFECT_COLOURS['h0']}'>"
              f"</span>H0 ({len(h0)}) &nbsp; <span class='dot' style='background:"
              f"{DEFECT_COLOURS['h1']}'></span>H1 ({int(np.count_nonzero(~cut))}) &nbsp; "
              f"H1 cut at the radius limit {limit:g} (triangles): {int(cut.sum())}; dashed: the "
              "limit, persistence = limit − birth. Barcodes: longest bar on top.</p>")
    return "<div class='diagram'>" + diagram + "".join(bars) + "</div>" + legend


def _barcode(bars: np.ndarray, name: str, colour: str, top: float, limit: float) -> str:
    width, pad, height = 360.0, 30.0, 130.0
    order = np.argsort(-(bars[:, 1] - bars[:, 0]), kind="stable") if bars.size else []
    n = len(order)
    rows = min(n, int(height))
    step = height / max(rows, 1)
    lw = float(np.clip(step * 0.8, 0.3, 3.0))

    def sx(v):
        return pad + width * np.asarray(v, dtype=float) / top

    if n:
        # More bars than pixel rows: each row draws the extent of the bars that fall on it,
        # as a raster would (a row shows the union of its bars).
        row = (np.arange(n) * rows) // n
        left = sx(np.minimum.reduceat(bars[order, 0], np.flatnonzero(np.diff(row, prepend=-1))))
        right = sx(np.maximum.reduceat(bars[order, 1], np.flatnonzero(np.diff(row, prepend=-1))))
        left, right = left.tolist(), right.tolist()
        y = (20 + (np.arange(rows) + 0.5) * step).tolist()
        path = "".join(f"M{a:.1f} {b:.1f}H{c:.1f}" for a, b, c in zip(left, y, right,
                                                                       strict=True))
    else:
        path = ""
    ticks = "".join(f"<line x1='{sx(t):.1f}' x2='{sx(t):.1f}' y1='{20 + height}' "
                    f"y2='{24 + height}' stroke='#333'/><text x='{sx(t):.1f}' "
                    f"y='{36 + height}' font-size='10' text-anchor='middle'>{t:g}</text>"
                    for t in _ticks(top))
    return (f"<svg viewBox='0 0 {width + 2 * pad:.0f} {height + 45:.0f}' "
            f"width='{width + 2 * pad:.0f}' role='img' aria-label='{name} barcode'>"
            f"<text x='{pad}' y='14' font-size='12'>{name} bars ({n})</text>"
            f"<line x1='{sx(limit):.1f}' x2='{sx(limit):.1f}' y1='20' y2='{20 + height}' "
            "stroke='#666' stroke-dasharray='3 2'/>"
            f"<path d='{path}' stroke='{colour}' stroke-width='{lw:.2f}'/>"
            f"<line x1='{pad}' x2='{pad + width}' y1='{20 + height}' y2='{20 + height}' "
            f"stroke='#333'/>{ticks}</svg>")


def _axes(sx, sy, ticks, xlabel: str, ylabel: str, pad: float, size: float) -> str:
    x0, y0 = sx(0), sy(0)
    out = [f"<path d='M{x0:.1f} {pad:.1f}V{y0:.1f}H{pad + size:.1f}' stroke='#333' "
           "fill='none'/>"]
    for t in ticks:
        out.append(f"<line x1='{sx(t):.1f}' x2='{sx(t):.1f}' y1='{y0:.1f}' y2='{y0 + 4:.1f}' "
                   f"stroke='#333'/><text x='{sx(t):.1f}' y='{y0 + 15:.1f}' font-size='10' "
                   f"text-anchor='middle'>{t:g}</text>")
        out.append(f"<line x1='{x0 - 4:.1f}' x2='{x0:.1f}' y1='{sy(t):.1f}' y2='{sy(t):.1f}' "
                   f"stroke='#333'/><text x='{x0 - 6:.1f}' y='{sy(t) + 3:.1f}' font-size='10' "
                   f"text-anchor='end'>{t:g}</text>")
    out.append(f"<text x='{pad + size / 2:.1f}' y='{y0 + 30:.1f}' font-size='11' "
               f"text-anchor='middle'>{xlabel}</text>")
    out.append(f"<text transform='translate({pad - 28:.1f} {pad + size / 2:.1f}) rotate(-90)' "
               f"font-size='11' text-anchor='middle'>{ylabel}</text>")
    return "".join(out)


def _ticks(top: float) -> list[float]:
    step = 0.5 if top <= 3.5 else 1.0
    return [float(t) for t in np.arange(0.0, top + 1e-9, step)]
