"""The offline HTML batch report beside a ``scores.csv``."""

from __future__ import annotations

import base64
import csv
import html
import io
import math
import re
import shutil
from collections import Counter
from pathlib import Path

import numpy as np

from topoclass._progress import progress_bar
from topoclass._workers import end_with_parent, pool_owner
from topoclass.errors import TopoclassError
from topoclass.features import FeatureSettings
from topoclass.pages import html_page
from topoclass.report.detail_view import write_detail_pictures
from topoclass.report.figures import CLASS_COLOURS

#: Detail views (inspection pictures) are made for at most this many images of a batch.
MAX_DETAILS = 200


#: Thumbnails are embedded for at most this many images of a batch.
MAX_THUMBNAILS = 2000


#: Scored images a batch needs for the report's control charts.
MIN_TREND_IMAGES = 10


_THUMB_PX = 72  # longest side of an embedded thumbnail


def batch_report_paths(scores_csv: str | Path,
                       out_html: str | Path | None = None) -> tuple[Path, Path]:
    """Where the page of a ``scores.csv`` goes: ``scores.html`` and its folder ``scores_files/``.

    Named after the CSV, so that two batches scored into one folder keep a page each.
    """
    out_html = Path(out_html) if out_html is not None else Path(scores_csv).with_suffix(".html")
    return out_html, out_html.with_name(out_html.stem + "_files")


def write_batch_report(scores_csv: str | Path, out_html: str | Path | None = None, *,
                       model=None, details: int = MAX_DETAILS,
                       thumbnails: int = MAX_THUMBNAILS, jobs: int = 1,
                       cache_dir: str | Path | None = None, overwrite: bool = False,
                       trend_charts: bool = True, progress: bool = False,
                       settings: FeatureSettings | None = None) -> Path:
    """Write one self-contained HTML page for a ``scores.csv``.

    The page (no network access needed: inline CSS, inline JavaScript, images embedded or in
    the sibling folder ``<page name>_files/``) has the counts per class, the failed and unfamiliar
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
        Default: the CSV's name with ``.html`` (``scores.csv`` → ``scores.html``), see
        :func:`batch_report_paths`.
    model : TrainedModel, optional
        Supplies the site-finding settings of the detail views and the model's name.
    details : int
        Detail views for at most this many images, the most doubtful first
        (:func:`most_doubtful_first`).
    thumbnails : int
        Embedded thumbnails for at most this many images.
    jobs : int
        Worker processes for the thumbnails and detail views (joblib); 1 works in this process.
    cache_dir : path, optional
        The feature cache the scoring run used (default:
        :func:`topoclass.features.default_cache_dir`). A detail view takes the image's sites
        and diagrams from it; an image not found there is measured again, which costs as much
        as scoring it.
    overwrite : bool
        Replace an existing page (detail views of images no longer in the CSV are removed);
        without it an existing page is refused.
    trend_charts : bool
        Add control charts of the amounts and class probabilities in the batch's order
        (:func:`topoclass.trend.trend_table`, limits from the batch's first images), when the
        batch has at least :data:`MIN_TREND_IMAGES` scored images.
    progress : bool
        Show a progress bar while the images are read.
    settings : FeatureSettings, optional
        The site-finding settings the scoring used, when they differ from the model's (for
        example a ``--region`` given to ``score``); default: the model's.

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
    out_html, files = batch_report_paths(scores_csv, out_html)
    if out_html.exists() and not overwrite:
        raise TopoclassError(f"{out_html}: the report page exists; pass --overwrite to replace "
                             "it or write the scores to a CSV of another name")
    out_html.parent.mkdir(parents=True, exist_ok=True)
    base = scores_csv.parent

    ok = [r for r in rows if r.get("status") == "ok"]
    unfamiliar = [r for r in ok if _is_unfamiliar(r)]
    # The review band's verdict (files from before it have no verdict column).
    review = [r for r in ok if r.get("verdict") == "review"]
    failed = [r for r in rows if r.get("status") != "ok"]
    detail_ids = {id(r) for r in most_doubtful_first(ok, classes)[:max(details, 0)]}
    settings = settings if settings is not None else FeatureSettings.from_model(model)

    work = [(n, row, _image_path(row["image"], base), n < thumbnails, id(row) in detail_ids)
            for n, row in enumerate(rows) if n < thumbnails or id(row) in detail_ids]
    assets = _ImageAssets(files, out_html.name, settings, cache_dir, classes, CAUTION,
                          neighbours=getattr(model, "neighbours", None))
    thumbs: dict[int, str] = {}
    links: dict[int, str] = {}
    for n, thumb, link in _run(assets, work, jobs, progress):
        if thumb:
            thumbs[n] = thumb
        if link:
            links[n] = link

    # As in the scoring summary: an unfamiliar or review image's class is not counted.
    counts = Counter(r.get("verdict") or r.get("predicted", "") for r in ok
                     if not _is_unfamiliar(r) and r.get("verdict") != "review")
    trend = _trend_section(rows, len(ok)) if trend_charts else ""
    page = _report_page(
        trend=trend, scores_csv=scores_csv, rows=rows, classes=classes, measures=measures,
        counts=counts,
        failed=failed, unfamiliar=unfamiliar, review=review, thumbs=thumbs, links=links,
        details=details, thumbnails=thumbnails, model=model, caution=CAUTION,
    )
    tmp = out_html.with_name(out_html.name + ".tmp")
    tmp.write_text(page, encoding="utf-8")
    tmp.replace(out_html)
    _drop_stale_details(files, keep={link.split("/")[1] for link in links.values()})
    return out_html


def _trend_section(rows: list[dict], n_ok: int) -> str:
    """Control charts of this batch in file order, or a line saying why there are none.

    ``rows`` are the rows of the scores file as the page read them; the charts coerce their
    text to numbers, so the file is not read a second time.
    """
    import pandas as pd

    from topoclass.trend import TREND_CAUTION, trend_svg, trend_table

    head = "<h2 id='trend'>Over the batch</h2>"
    if n_ok < MIN_TREND_IMAGES:
        return (head + f"<p class='note'>{n_ok} scored images: control charts need at least "
                f"{MIN_TREND_IMAGES}; chart several batches with <code>topoclass trend</code>."
                "</p>")
    baseline = min(20, n_ok)
    try:
        result = trend_table(pd.DataFrame(rows), baseline=baseline)
    except TopoclassError as exc:
        return head + f"<p class='note'>No control charts: {html.escape(str(exc))}</p>"
    flagged = int(result.table["flagged"].sum())
    return (head + f"<p class='note'>Individuals charts in the order of the scores file; "
            f"limits (dashed) from its first {baseline} images, so they describe this batch "
            f"only — for limits from accepted batches use <code>topoclass trend "
            f"--reference</code>. {flagged} of {len(result.table)} images fired a run rule "
            f"(larger dots; hover for the image). {html.escape(TREND_CAUTION)}</p>"
            f"<div class='trend'>{trend_svg(result)}</div>")


def _drop_stale_details(files: Path, keep: set[str]) -> None:
    """Remove detail folders this page does not link (left by an earlier batch of that name)."""
    if not files.is_dir():
        return
    for folder in files.iterdir():
        # Only folders named as _ImageAssets._folder names them: nothing else is ours.
        if folder.is_dir() and folder.name not in keep and re.fullmatch(r"\d{5}-\w+",
                                                                          folder.name):
            shutil.rmtree(folder)


def _csv_header(path: Path) -> list[str]:
    with open(path, newline="", encoding="utf-8") as fh:
        return next(csv.reader(fh), [])


def _image_path(image: str, base: Path) -> Path:
    path = Path(image)
    return path if path.is_absolute() or path.exists() else base / path


def most_doubtful_first(rows: list[dict], classes: list[str]) -> list[dict]:
    """Scored rows in the order they get detail views: the most doubtful first.

    Unfamiliar images come first (their probabilities rest on nothing like them in the
    training set, so they are the ones to check by eye), then those the review band sends to
    a person (``verdict`` "review"), then the others; within each, by increasing margin
    between the two most probable classes (the closer a call, the nearer it is to flipping);
    ties keep the file order.
    """
    def margin(row: dict) -> float:
        p = sorted((_float(row.get(f"p_{c}")) for c in classes), reverse=True)
        return p[0] - p[1] if len(p) > 1 else 1.0

    def tier(row: dict) -> int:
        return 0 if _is_unfamiliar(row) else 1 if row.get("verdict") == "review" else 2

    order = sorted(range(len(rows)), key=lambda k: (tier(rows[k]), margin(rows[k]), k))
    return [rows[k] for k in order]


def _float(value) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return 0.0
    return v if math.isfinite(v) else 0.0


def _run(assets, work: list, jobs: int, progress: bool):
    """Yield ``assets(*item)`` for every work item, in a joblib pool when ``jobs`` > 1."""
    if jobs > 1 and len(work) > 1:
        from joblib import Parallel, delayed

        results = Parallel(n_jobs=jobs, return_as="generator")(
            delayed(assets)(*item) for item in work)
    else:
        results = (assets(*item) for item in work)
    if not progress:
        yield from results
        return
    with progress_bar(len(work), "report") as advance:
        for result in results:
            advance()
            yield result


class _ImageAssets:
    """Thumbnail and detail view of one image (picklable, for the worker pool)."""

    def __init__(self, files: Path, page_name: str, settings, cache_dir, classes, caution, *,
                 neighbours=None):
        self.files, self.page_name, self.settings = files, page_name, settings
        self.cache_dir, self.classes, self.caution = cache_dir, classes, caution
        self.neighbours = neighbours  # the model's labelled training diagrams, if it keeps them
        self.owner = pool_owner()

    def __call__(self, n: int, row: dict, path: Path, thumb: bool, detail: bool
                 ) -> tuple[int, str, str]:
        end_with_parent(self.owner)  # a pool worker must not outlive a killed run
        from topoclass.features import cached_measurement, measure_image
        from topoclass.images import read_micrograph

        try:
            if detail:
                hit = cached_measurement(path, row.get("sha256", ""), self.settings,
                                         cache_dir=self.cache_dir)
                if hit is None:  # not in this cache: measure again, as scoring did
                    m = measure_image(path, self.settings)
                    image, pattern, diagrams = m.micrograph.image, m.pattern, m.record.diagrams
                else:
                    pattern, record = hit
                    image = read_micrograph(path, max_pixels=self.settings.max_pixels).image
                    diagrams = record.diagrams
            else:
                image = read_micrograph(path, max_pixels=self.settings.max_pixels).image
        except (TopoclassError, OSError) as exc:
            # A failed row's file, or one changed or gone since it was scored: its row (or
            # this note) says why, and the report goes on.
            if detail:
                folder = self._folder(n, row)
                folder.mkdir(parents=True, exist_ok=True)
                (folder / "error.txt").write_text(" ".join(str(exc).split()), encoding="utf-8")
            return n, "", ""
        link = self._detail_page(n, row, image, pattern, diagrams) if detail else ""
        return n, _thumbnail(image) if thumb else "", link

    def _folder(self, n: int, row: dict) -> Path:
        key = (row.get("sha256") or "")[:12] or f"{n:05d}"
        return self.files / f"{n:05d}-{key}"

    def _detail_page(self, n, row, image, pattern, diagrams) -> str:
        folder = self._folder(n, row)
        pictures = write_detail_pictures(image, pattern, diagrams, folder)
        probs = "".join(f"<tr><td>{html.escape(c)}</td><td>{_num(row.get('p_' + c))}</td></tr>"
                        for c in self.classes)
        body = (
            f"<h1>{html.escape(Path(row['image']).name)}</h1>"
            f"<p class='path'>{html.escape(row['image'])}</p>"
            f"<p>predicted <b>{html.escape(row.get('predicted', ''))}</b>, confidence "
            f"{_num(row.get('confidence'))}; unfamiliar: {html.escape(row.get('unfamiliar', ''))}"
            f"{' — ' + html.escape(row['message']) if row.get('message') else ''}</p>"
            f"<table class='small'><tr><th>class</th><th>probability</th></tr>{probs}</table>"
            f"<p class='caution'>{html.escape(self.caution)}</p>"
            f"{pictures}"
            f"{_nearest_html(self.neighbours, diagrams.h1)}"
            f"<p><a href='../../{html.escape(self.page_name)}'>back to the report</a></p>"
        )
        title = f"topoclass — {Path(row['image']).name}"
        (folder / "index.html").write_text(html_page(title, body), encoding="utf-8")
        return f"{self.files.name}/{folder.name}/index.html"


def _nearest_html(neighbours, h1) -> str:
    """The three labelled training images nearest to this one, with thumbnails."""
    if neighbours is None or len(neighbours) == 0:
        return ""
    cells = []
    for n in neighbours.nearest(h1, k=3):
        thumb = _thumbnail(neighbours.thumbnails[n["index"]] / 255.0)
        cells.append(
            f"<figure class='nearest'><img src='{thumb}' alt='training image "
            f"{html.escape(Path(n['image']).name)}'><figcaption><b>{html.escape(n['label'])}"
            f"</b> — distance {n['distance']:.3g}<br>{html.escape(Path(n['image']).name)}"
            "</figcaption></figure>")
    return ("<h2>Nearest labelled images</h2><p>The training images whose H1 persistence "
            "diagrams are closest to this one (sliced Wasserstein distance, spacing units), "
            "with their labels: a way to see what the score is built on, not a second "
            "score.</p>" + "".join(cells))


def _thumbnail(image: np.ndarray) -> str:
    """A small grey PNG of the image as a data URI."""
    from PIL import Image

    im = Image.fromarray(np.clip(image * 255 + 0.5, 0, 255).astype(np.uint8))
    im.thumbnail((_THUMB_PX, _THUMB_PX), Image.Resampling.LANCZOS)
    buf = io.BytesIO()
    im.save(buf, format="PNG", optimize=True)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


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


def _report_page(*, trend, scores_csv, rows, classes, measures, counts, failed, unfamiliar, review,
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
    notes.append(f"detail views for at most {details} images, the most doubtful first "
                 "(unfamiliar ones, then those for review, then the smallest margin "
                 "between the two likeliest classes)")
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
    parts.append(trend)
    parts.append(f"<p class='note'>Made by topoclass from {esc(scores_csv.name)}. Order "
                 "measures: persistence values in units of the site spacing.</p>")
    return html_page("topoclass batch report", "".join(parts), scripts=("sortable.js",))
