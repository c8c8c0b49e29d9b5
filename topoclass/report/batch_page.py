"""The offline HTML batch report beside a ``scores.csv``."""

from __future__ import annotations

import base64
import csv
import html
import io
import math
from collections import Counter
from pathlib import Path

import numpy as np

from topoclass._progress import progress_bar
from topoclass.errors import TopoclassError
from topoclass.features import FeatureSettings
from topoclass.pages import html_page
from topoclass.report.figures import CLASS_COLOURS, write_inspection_figures

#: Detail views (inspection pictures) are made for at most this many images of a batch.
MAX_DETAILS = 200


#: Thumbnails are embedded for at most this many images of a batch.
MAX_THUMBNAILS = 2000


_THUMB_PX = 72  # longest side of an embedded thumbnail


def write_batch_report(scores_csv: str | Path, out_html: str | Path | None = None, *,
                       model=None, details: int = MAX_DETAILS,
                       thumbnails: int = MAX_THUMBNAILS, progress: bool = False) -> Path:
    """Write one self-contained HTML page for a ``scores.csv``.

    The page (no network access needed: inline CSS, inline JavaScript, images embedded or in
    the sibling folder ``report_files/``) has the counts per class, the failed and unfamiliar
    images first, then a table sortable by clicking a header — by each class probability and
    each order measure — with a thumbnail, the predicted class, a bar per class probability,
    the unfamiliar flag and a link to a detail view (site overlay, persistence diagram, defect
    map) made by measuring the image again. The caution of :data:`topoclass.scoring.CAUTION`
    is on the page.

    Parameters
    ----------
    scores_csv : path
        A file written by :func:`topoclass.scoring.score_images` (a partly written file from
        a killed run is fine).
    out_html : path, optional
        Default: ``report.html`` beside ``scores_csv``.
    model : TrainedModel, optional
        Supplies the site-finding settings of the detail views and the model's name.
    details : int
        Detail views for at most this many images (unfamiliar ones first, then in file order).
    thumbnails : int
        Embedded thumbnails for at most this many images.
    progress : bool
        Show a progress bar while the images are read.

    Returns
    -------
    Path of the HTML file.
    """
    from topoclass.scoring import CAUTION, MEASURE_COLUMNS, read_scores

    scores_csv = Path(scores_csv)
    if not scores_csv.is_file():
        raise TopoclassError(f"{scores_csv}: no such scores file; give the CSV written by "
                             "`topoclass score`")
    try:
        rows = read_scores(scores_csv)
        header = _csv_header(scores_csv)
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise TopoclassError(f"{scores_csv}: cannot be read as a scores file ({exc}); give the "
                             "CSV written by `topoclass score`") from None
    if "image" not in header or "status" not in header:
        raise TopoclassError(f"{scores_csv}: has no image/status columns; give the CSV written "
                             "by `topoclass score`")
    classes = [c[2:] for c in header if c.startswith("p_")]
    measures = [c for c in MEASURE_COLUMNS if c in header]
    out_html = Path(out_html) if out_html is not None else scores_csv.with_name("report.html")
    out_html.parent.mkdir(parents=True, exist_ok=True)
    files = out_html.parent / "report_files"
    base = scores_csv.parent

    ok = [r for r in rows if r.get("status") == "ok"]
    unfamiliar = [r for r in ok if _is_unfamiliar(r)]
    # The review band's verdict (files from before it have no verdict column).
    review = [r for r in ok if r.get("verdict") == "review"]
    failed = [r for r in rows if r.get("status") != "ok"]
    # Detail views: unfamiliar images first (they are the ones to check by eye), then review,
    # then the rest.
    detail_order = unfamiliar + review + [r for r in ok if not _is_unfamiliar(r)
                                          and r.get("verdict") != "review"]
    detail_ids = {id(r) for r in detail_order[:max(details, 0)]}
    settings = FeatureSettings.from_model(model)

    thumbs: dict[int, str] = {}
    links: dict[int, str] = {}
    todo = sum(1 for n, r in enumerate(rows) if n < thumbnails or id(r) in detail_ids)
    bar = progress_bar(todo, "report") if progress else None
    advance = bar.__enter__() if bar is not None else (lambda: None)
    try:
        for n, row in enumerate(rows):
            in_thumbs = n < thumbnails
            wants_detail = id(row) in detail_ids
            if not (in_thumbs or wants_detail):
                continue
            path = _image_path(row["image"], base)
            if in_thumbs:
                thumbs[n] = _thumbnail(path, settings)
            if wants_detail:
                page = _detail_view(path, row, n, files, out_html, settings, classes, CAUTION)
                if page:
                    links[n] = page
            advance()
    finally:
        if bar is not None:
            bar.__exit__(None, None, None)

    # As in the scoring summary: an unfamiliar or review image's class is not counted.
    counts = Counter(r.get("verdict") or r.get("predicted", "") for r in ok
                     if not _is_unfamiliar(r) and r.get("verdict") != "review")
    page = _report_page(
        scores_csv=scores_csv, rows=rows, classes=classes, measures=measures, counts=counts,
        failed=failed, unfamiliar=unfamiliar, review=review, thumbs=thumbs, links=links,
        details=details, thumbnails=thumbnails, model=model, caution=CAUTION,
    )
    tmp = out_html.with_name(out_html.name + ".tmp")
    tmp.write_text(page, encoding="utf-8")
    tmp.replace(out_html)
    return out_html


def _csv_header(path: Path) -> list[str]:
    with open(path, newline="", encoding="utf-8") as fh:
        return next(csv.reader(fh), [])


def _image_path(image: str, base: Path) -> Path:
    path = Path(image)
    return path if path.is_absolute() or path.exists() else base / path


def _thumbnail(path: Path, settings) -> str:
    """A small grey PNG of the image as a data URI, or '' when the file cannot be read."""
    from PIL import Image

    from topoclass.images import read_micrograph

    try:
        image = read_micrograph(path, max_pixels=settings.max_pixels).image
    except Exception:  # a failed row's file: no thumbnail, the row says why
        return ""
    im = Image.fromarray(np.clip(image * 255 + 0.5, 0, 255).astype(np.uint8))
    im.thumbnail((_THUMB_PX, _THUMB_PX), Image.Resampling.LANCZOS)
    buf = io.BytesIO()
    im.save(buf, format="PNG", optimize=True)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _detail_view(path, row, n, files: Path, out_html: Path, settings, classes, caution) -> str:
    """Measure the image again, write its pictures and a small page; return the page link."""
    from topoclass.features import measure_image

    key = (row.get("sha256") or "")[:12] or f"{n:05d}"
    folder = files / f"{n:05d}-{key}"
    pictures = ["overlay.png", "diagram.png", "defects.png"]
    if not all((folder / p).is_file() for p in pictures):
        try:
            m = measure_image(path, settings)
            write_inspection_figures(m.micrograph.image, m.pattern, m.record.diagrams, folder)
        except Exception as exc:  # the batch report never stops for one image
            folder.mkdir(parents=True, exist_ok=True)
            (folder / "error.txt").write_text(" ".join(str(exc).split()), encoding="utf-8")
            return ""
    probs = "".join(
        f"<tr><td>{html.escape(c)}</td><td>{_num(row.get('p_' + c))}</td></tr>" for c in classes
    )
    body = (
        f"<h1>{html.escape(Path(row['image']).name)}</h1>"
        f"<p class='path'>{html.escape(row['image'])}</p>"
        f"<p>predicted <b>{html.escape(row.get('predicted', ''))}</b>, confidence "
        f"{_num(row.get('confidence'))}; unfamiliar: {html.escape(row.get('unfamiliar', ''))}"
        f"{' — ' + html.escape(row['message']) if row.get('message') else ''}</p>"
        f"<table class='small'><tr><th>class</th><th>probability</th></tr>{probs}</table>"
        "<h2>Sites by Delaunay coordination</h2><img src='overlay.png' alt='site overlay'>"
        "<h2>Persistence diagram and barcode</h2><img src='diagram.png' alt='diagram'>"
        "<h2>Defect map</h2><img src='defects.png' alt='defect map'>"
        "<p><a href='defects.csv'>defects.csv</a> — the places drawn above.</p>"
        f"<p class='caution'>{html.escape(caution)}</p>"
        f"<p><a href='../{html.escape(out_html.name)}'>back to the report</a></p>"
    )
    title = f"topoclass — {Path(row['image']).name}"
    (folder / "index.html").write_text(html_page(title, body),
                                       encoding="utf-8")
    return f"{files.name}/{folder.name}/index.html"


def _num(value, digits: int = 3) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return ""
    return f"{v:.{digits}f}" if math.isfinite(v) else ""


def _short(value) -> str:
    """Four significant digits, integers without a decimal point."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return ""
    if not math.isfinite(v):
        return ""
    return f"{int(v)}" if v == int(v) and abs(v) < 1e9 else f"{v:.4g}"


def _sort_value(value) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return ""
    return repr(v) if math.isfinite(v) else ""


def _is_unfamiliar(row) -> bool:
    return row.get("unfamiliar") == "yes" or row.get("verdict") == "unfamiliar"


def _report_page(*, scores_csv, rows, classes, measures, counts, failed, unfamiliar, review,
                 thumbs,
                 links, details, thumbnails, model, caution) -> str:
    colour = {c: CLASS_COLOURS[k % len(CLASS_COLOURS)] for k, c in enumerate(classes)}
    esc = html.escape
    parts = [f"<h1>topoclass batch report</h1><p class='path'>{esc(str(scores_csv))}</p>"]
    if model is not None:
        parts.append(f"<p>model: {esc(str(getattr(model, 'feature_set_name', '')))} + "
                     f"{esc(str(getattr(model, 'classifier', '')))}</p>")
    parts.append(f"<p class='caution'><b>Caution.</b> {esc(caution)}</p>")
    n_ok = len(rows) - len(failed)
    has_verdict = any("verdict" in r for r in rows)
    if has_verdict:
        from topoclass.scoring import BAND_NOTE

        alpha = getattr(getattr(model, "review_band", None), "alpha_", None)
        note = (BAND_NOTE.format(alpha=alpha) if alpha is not None else
                BAND_NOTE.replace(" (error rate alpha = {alpha:g})", ""))
        parts.append(f"<p class='note' id='band-note'>{esc(note)}</p>")
    summary = "".join(
        f"<tr><td><span class='dot' style='background:{colour[c]}'></span>{esc(c)}</td>"
        f"<td class='n'>{counts.get(c, 0)}</td></tr>" for c in classes
    )
    parts.append(
        "<h2>Summary</h2><table class='small' id='summary'><tr><th>predicted class</th>"
        f"<th>images</th></tr>{summary}"
        f"<tr><td>unfamiliar (check by eye; not counted above)</td>"
        f"<td class='n'>{len(unfamiliar)}</td></tr>"
        + (f"<tr><td>review (more than one class cannot be ruled out; not counted above)</td>"
           f"<td class='n'>{len(review)}</td></tr>" if has_verdict else "")
        + f"<tr><td>failed</td><td class='n'>{len(failed)}</td></tr>"
        f"<tr><th>scored</th><th class='n'>{n_ok}</th></tr></table>"
    )
    index = {id(r): n for n, r in enumerate(rows)}
    if failed or unfamiliar or review:
        items = []
        for r in failed:
            message = r.get("message", "") or "no message"
            if not message.startswith(r["image"]):
                message = f"{r['image']}: {message}"
            items.append(f"<li class='failed'><b>failed</b> {esc(message)}</li>")
        for r in unfamiliar:
            n = index[id(r)]
            link = (f" — <a href='{esc(links[n])}'>detail</a>" if n in links else "")
            items.append(f"<li class='unfamiliar'><b>unfamiliar</b> {esc(r['image'])} "
                         f"(predicted {esc(r.get('predicted', ''))}){link}: "
                         f"{esc(r.get('message', ''))}</li>")
        for r in review:
            n = index[id(r)]
            link = (f" — <a href='{esc(links[n])}'>detail</a>" if n in links else "")
            plausible = ", ".join(f"{c} {_num(r.get(f'p_{c}'), 2)}" for c in classes)
            items.append(f"<li class='review'><b>review</b> {esc(r['image'])} "
                         f"(top class {esc(r.get('predicted', ''))}; {esc(plausible)}){link}"
                         "</li>")
        parts.append("<h2>Look at these first</h2><ul id='attention'>" + "".join(items)
                     + "</ul>")
    notes = []
    if len(rows) > thumbnails:
        notes.append(f"thumbnails for the first {thumbnails} of {len(rows)} images")
    notes.append(f"detail views for at most {details} images (unfamiliar ones first)")
    parts.append("<h2>All images</h2><p class='note'>Click a column header to sort; click "
                 "again to reverse. " + "; ".join(notes).capitalize() + ".</p>")
    head = ["<th data-type='num'>#</th><th>image</th><th data-type='text'>predicted</th>"]
    if has_verdict:
        head += ["<th data-type='text'>verdict</th>"]
    head += [f"<th data-type='num' class='p'>p {esc(c)}</th>" for c in classes]
    head += ["<th data-type='text'>unfamiliar</th>"]
    head += [f"<th data-type='num'>{esc(m)}</th>" for m in measures]
    head += ["<th>detail / message</th>"]
    body = []
    for n, r in enumerate(rows):
        ok = r.get("status") == "ok"
        thumb = thumbs.get(n, "")
        img = (f"<img class='thumb' src='{thumb}' alt='thumbnail'>" if thumb else "")
        cells = [f"<td data-value='{n}' class='n'>{n + 1}</td>",
                 f"<td class='image'>{img}<span>{esc(Path(r['image']).name)}</span></td>"]
        pred = r.get("predicted", "") if ok else "failed"
        cells.append(f"<td data-value='{esc(pred)}'>{esc(pred)}</td>")
        if has_verdict:
            verdict = r.get("verdict", "") if ok else ""
            cells.append(f"<td data-value='{esc(verdict)}'>{esc(verdict)}</td>")
        for c in classes:
            v = _sort_value(r.get(f"p_{c}")) if ok else ""
            width = f"{100 * float(v):.1f}" if v else "0"
            cells.append(
                f"<td data-value='{v}' class='p'><div class='bar'><span style='width:{width}%;"
                f"background:{colour[c]}'></span></div><small>{_num(v, 2)}</small></td>"
            )
        flag = r.get("unfamiliar", "") if ok else ""
        cells.append(f"<td data-value='{esc(flag)}' class='{'flag' if flag == 'yes' else ''}'>"
                     f"{esc(flag)}</td>")
        for m in measures:
            v = _sort_value(r.get(m))
            cells.append(f"<td data-value='{v}' class='n'>{_short(v)}</td>")
        if ok:
            last = f"<a href='{esc(links[n])}'>detail</a>" if n in links else ""
            if r.get("message"):
                last += f" <small>{esc(r['message'])}</small>"
        else:
            last = f"<span class='msg'>{esc(r.get('message', ''))}</span>"
        cells.append(f"<td>{last}</td>")
        klass = ("failed" if not ok else "unfamiliar" if _is_unfamiliar(r)
                 else "review" if r.get("verdict") == "review" else "")
        body.append(f"<tr class='{klass}'>" + "".join(cells) + "</tr>")
    parts.append("<table id='scores' class='sortable'><thead><tr>" + "".join(head)
                 + "</tr></thead><tbody>" + "".join(body) + "</tbody></table>")
    parts.append(f"<p class='note'>Made by topoclass from {esc(scores_csv.name)}. Order "
                 "measures: persistence values in units of the site spacing.</p>")
    return html_page("topoclass batch report", "".join(parts), scripts=("sortable.js",))
