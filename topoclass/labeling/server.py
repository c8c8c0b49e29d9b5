"""The local labelling page: Starlette on 127.0.0.1, one random token per run.

Everything the page does is one of these requests (all refused with 403 unless the query
carries the run's ``token``):

=========================  =================================================================
``GET  /``                 the page (assets from :mod:`topoclass.pages`, inlined)
``GET  /api/state``        images, labels, groups, classes, measuring progress
``GET  /api/image/N``      image N as a grey PNG (``?size=thumb`` for the strip)
``GET  /api/measures/N``   image N's order measures (once its features are measured)
``GET  /api/sites/N``      image N's sites with their Delaunay coordination, for the overlay
``GET  /api/suggestions``  labelling order, quick-model estimate and the learning curve
``POST /api/label``        ``{"index", "label", "group"}``: write the label to the sheet
``POST /api/undo``         put back the row the last label changed
``POST /api/classes``      ``{"name"}``: offer a new class
=========================  =================================================================

Features are measured in a background thread (with the on-disk cache, so a reopened sheet is
quick), so the first image shows at once however large the folder.
"""

from __future__ import annotations

import html
import io
import json
import secrets
import socket
import threading
from collections.abc import Sequence
from functools import lru_cache
from pathlib import Path

import numpy as np

from topoclass.errors import TopoclassError
from topoclass.features import FeatureSettings, RecordResult, iter_records, measure_image
from topoclass.labeling.ranking import PoolFeatures, estimate_from_rows, model_ready, rank_rows
from topoclass.labeling.sheet import LabelBook

_IMAGE_PX = 1400  # longest side of the image sent to the page
_THUMB_PX = 96
_CURVE_STEP = 3  # a learning-curve point every this many labels (and at the current count)
_SUGGESTED = 20  # suggestions sent per ranking: the page walks the first few, then asks again
_SHOWN_MEASURES = ("psi6_global", "psi6_local_mean", "defect_fraction", "n5_fraction",
                   "n7_fraction", "nn_cv", "clark_evans_r", "h0_length_variance",
                   "h1_length_sum_per_site", "spacing_px", "n_sites")


class LabelSession:
    """What one labelling page works on: the images, the label book, the measured features.

    Parameters
    ----------
    images : sequence of path
        The images to label, in the order the page shows them.
    book : LabelBook
        The open sheet.
    settings : FeatureSettings, optional
        Site-finding settings of the features.
    cache_dir : path, optional
        Feature cache (default :func:`topoclass.features.default_cache_dir`).
    jobs : int
        Worker processes measuring features.
    seed : int
        Seed of the quick model.
    """

    def __init__(self, images: Sequence[str | Path], book: LabelBook, *,
                 settings: FeatureSettings | None = None, cache_dir: str | Path | None = None,
                 jobs: int = 1, seed: int = 0):
        self.images = [Path(p) for p in images]
        if not self.images:
            raise TopoclassError(f"{book.path}: no images to label; give image files, folders "
                                 "or a list file")
        self.book = book
        self.settings = settings or FeatureSettings()
        self.cache_dir, self.jobs, self.seed = cache_dir, jobs, seed
        self.records: list[RecordResult | None] = [None] * len(self.images)
        self._index = {book.key(p): n for n, p in enumerate(self.images)}
        self._undo: list[tuple[int, dict | None]] = []
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._version = 0  # bumped at every change of labels or features
        self._ranked: tuple[int, dict] | None = None
        self._curve: dict[tuple, float | None] = {}
        self._features = PoolFeatures()  # kept between rankings; only new images are added
        self._ranking = threading.Lock()  # one ranking at a time (requests run in threads)
        self._measurer = threading.Thread(target=self._measure_all, daemon=True,
                                          name="topoclass-label-features")

    # ---------------------------------------------------------------- lifetime

    def start(self) -> None:
        self._measurer.start()

    def stop(self) -> None:
        self._stop.set()
        self._measurer.join(timeout=30)
        self.book.close()

    # ---------------------------------------------------------------- queries

    def state(self) -> dict:
        with self._lock:
            items = []
            for n, path in enumerate(self.images):
                r = self.records[n]
                items.append({"name": self.book.key(path), "label": self.book.label_of(path),
                              "group": self.book.group_of(path),
                              "measured": r is not None and r.ok,
                              "error": r.error if r is not None and not r.ok else None})
            done = sum(r is not None for r in self.records)
            return {"sheet": str(self.book.path), "classes": list(self.book.classes),
                    "images": items, "measured": done, "total": len(self.images),
                    "undo": len(self._undo)}

    def measures(self, n: int) -> dict | None:
        from topoclass.records import barcode_summary

        r = self._record(n)
        if r is None or not r.ok:
            return None
        values = {**barcode_summary(r.record.diagrams), **r.record.order,
                  "spacing_px": float(r.record.diagrams.spacing)}
        return {k: _finite(values[k]) for k in _SHOWN_MEASURES if k in values}

    def sites(self, n: int) -> dict:
        return _sites_of(self.images[self._check(n)], self.settings)

    def image_png(self, n: int, thumb: bool = False) -> bytes:
        return _png_of(self.images[self._check(n)], _THUMB_PX if thumb else _IMAGE_PX,
                       self.settings.max_pixels)

    def suggestions(self) -> dict:
        """The labelling order of the measured, unlabelled images, and how the model does."""
        with self._ranking:
            return self._suggestions()

    def _suggestions(self) -> dict:
        with self._lock:
            version = self._version
            if self._ranked is not None and self._ranked[0] == version:
                return self._ranked[1]
            measured = [n for n, r in enumerate(self.records) if r is not None and r.ok]
            records = [self.records[n].record for n in measured]
            labelled, pool = [], []
            for row, n in enumerate(measured):
                path = self.images[n]
                label = self.book.label_of(path)
                if label is None:
                    pool.append((n, row))
                else:
                    labelled.append((self.book.key(path), row, label,
                                     self.book.group_of(path)))
            # Sheet order is labelling order: the learning curve follows it.
            order = {k: i for i, k in enumerate(self.book.keys())}
            labelled.sort(key=lambda item: order.get(item[0], len(order)))
        # Features of every measured image, transformed once each (see PoolFeatures).
        rows = self._features.rows(measured, records)
        labels = [item[2] for item in labelled]
        waiting = model_ready(labels)
        ranked = rank_rows(rows[[item[1] for item in labelled]], labels,
                           rows[[row for _, row in pool]], count=_SUGGESTED, seed=self.seed)
        curve = self._learning_curve(labelled, rows)
        out = {
            "ready": waiting is None,
            "message": waiting or "",
            "labelled": len(labelled),
            "estimate": curve[-1][1] if curve and curve[-1][0] == len(labelled) else None,
            "curve": curve,
            "order": [{"index": pool[s.index][0], "predicted": s.predicted,
                       "confidence": s.confidence, "reason": s.reason} for s in ranked],
        }
        with self._lock:
            if self._version == version:
                self._ranked = (version, out)
        return out

    # ---------------------------------------------------------------- changes

    def set_label(self, n: int, label: str, group: str | None) -> None:
        with self._lock:
            path = self.images[self._check(n)]
            self._undo.append((n, self.book.row(path)))
            try:
                self.book.set_label(path, label, group)
            except BaseException:
                self._undo.pop()
                raise
            self._version += 1

    def undo(self) -> int | None:
        with self._lock:
            if not self._undo:
                return None
            n, row = self._undo.pop()
            self.book.restore(self.images[n], row)
            self._version += 1
            return n

    def add_class(self, name: str) -> str:
        with self._lock:
            return self.book.add_class(name)

    # ---------------------------------------------------------------- private

    def _check(self, n: int) -> int:
        if not 0 <= n < len(self.images):
            raise IndexError(n)
        return n

    def _record(self, n: int) -> RecordResult | None:
        with self._lock:
            return self.records[self._check(n)]

    def _measure_all(self) -> None:
        for n, result in enumerate(iter_records(self.images, self.settings,
                                                cache_dir=self.cache_dir, jobs=self.jobs)):
            with self._lock:
                self.records[n] = result
                self._version += 1
            if self._stop.is_set():
                return

    def _learning_curve(self, labelled: list, rows: np.ndarray) -> list[list[float]]:
        # Grouped-CV estimates on the sheet's first k labels, so the curve shows how the
        # estimate moved as labels were added; each prefix is computed once.
        points = []
        n_total = len(labelled)
        sizes = sorted({k for k in range(_CURVE_STEP, n_total + 1, _CURVE_STEP)} | {n_total})
        for k in sizes:
            prefix = labelled[:k]
            key = tuple((item[0], item[2], item[3]) for item in prefix)
            if key not in self._curve:
                self._curve[key] = estimate_from_rows(
                    rows[[item[1] for item in prefix]], [item[2] for item in prefix],
                    [item[3] for item in prefix], seed=self.seed)
            if self._curve[key] is not None:
                points.append([k, self._curve[key]])
        return points


def make_app(session: LabelSession, token: str):
    """The Starlette application of a labelling page; every request must carry ``token``."""
    from starlette.applications import Starlette
    from starlette.middleware import Middleware
    from starlette.middleware.base import BaseHTTPMiddleware
    from starlette.responses import HTMLResponse, JSONResponse, PlainTextResponse, Response
    from starlette.routing import Route

    class _NeedsToken(BaseHTTPMiddleware):
        async def dispatch(self, request, call_next):
            given = request.query_params.get("token", "")
            if not secrets.compare_digest(given.encode(), token.encode()):
                return PlainTextResponse("forbidden: open the address that `topoclass label` "
                                         "printed (it carries the access token)",
                                         status_code=403)
            return await call_next(request)

    def index(n_text: str) -> int:
        try:
            return session._check(int(n_text))
        except (ValueError, IndexError):
            raise _BadRequest(f"no image number {n_text!r}") from None

    def page(request):
        return HTMLResponse(_page_html(), headers={"Cache-Control": "no-store"})

    def state(request):
        return JSONResponse(session.state())

    def image(request):
        n = index(request.path_params["n"])
        try:
            data = session.image_png(n, thumb=request.query_params.get("size") == "thumb")
        except TopoclassError as exc:
            return PlainTextResponse(" ".join(str(exc).split()), status_code=422)
        return Response(data, media_type="image/png", headers={"Cache-Control": "max-age=3600"})

    def measures(request):
        return JSONResponse({"measures": session.measures(index(request.path_params["n"]))})

    def sites(request):
        n = index(request.path_params["n"])
        try:
            return JSONResponse(session.sites(n))
        except TopoclassError as exc:
            return JSONResponse({"error": " ".join(str(exc).split())}, status_code=422)

    def suggestions(request):
        return JSONResponse(session.suggestions())

    async def label(request):
        body = await _json_body(request)
        try:
            session.set_label(index(str(body.get("index"))), str(body.get("label", "")),
                              body.get("group"))
        except TopoclassError as exc:
            return JSONResponse({"error": " ".join(str(exc).split())}, status_code=422)
        return JSONResponse(session.state())

    async def undo(request):
        n = session.undo()
        return JSONResponse({"undone": n, **session.state()})

    async def classes(request):
        body = await _json_body(request)
        try:
            session.add_class(str(body.get("name", "")))
        except TopoclassError as exc:
            return JSONResponse({"error": " ".join(str(exc).split())}, status_code=422)
        return JSONResponse(session.state())

    async def bad_request(request, exc):
        return JSONResponse({"error": str(exc)}, status_code=400)

    routes = [
        Route("/", page), Route("/api/state", state),
        Route("/api/image/{n}", image), Route("/api/measures/{n}", measures),
        Route("/api/sites/{n}", sites), Route("/api/suggestions", suggestions),
        Route("/api/label", label, methods=["POST"]), Route("/api/undo", undo, methods=["POST"]),
        Route("/api/classes", classes, methods=["POST"]),
    ]
    return Starlette(routes=routes, middleware=[Middleware(_NeedsToken)],
                     exception_handlers={_BadRequest: bad_request})


class LabelServer:
    """Serve a :class:`LabelSession` on ``127.0.0.1`` in a background thread.

    Use as a context manager (``with LabelServer(session) as server: ... server.url``): the
    server and the feature thread stop when the block ends. :meth:`run` serves in the calling
    thread until Ctrl-C instead.

    Parameters
    ----------
    session : LabelSession
    port : int, optional
        Port to listen on; default a free port chosen by the system.
    """

    def __init__(self, session: LabelSession, port: int | None = None):
        self.session = session
        self.token = secrets.token_urlsafe(24)
        self._socket = _bind(port)
        self.port = self._socket.getsockname()[1]
        self.url = f"http://127.0.0.1:{self.port}/?token={self.token}"
        self._server = self._thread = None

    def run(self) -> None:
        """Serve until interrupted (Ctrl-C), then stop the feature thread and free the sheet."""
        self.session.start()
        try:
            self._make_server().run(sockets=[self._socket])
        finally:
            self.close()

    def __enter__(self) -> LabelServer:
        self.session.start()
        server = self._server = self._make_server()
        server.install_signal_handlers = lambda: None  # only the main thread may set them
        self._thread = threading.Thread(target=server.run, kwargs={"sockets": [self._socket]},
                                        daemon=True, name="topoclass-label-server")
        self._thread.start()
        for _ in range(500):
            if server.started or not self._thread.is_alive():
                break
            threading.Event().wait(0.01)
        if not server.started:
            self.close()
            raise RuntimeError("the labelling server did not start")
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        if self._server is not None:
            self._server.should_exit = True
        if self._thread is not None:
            self._thread.join(timeout=10)
            self._thread = None
        self._socket.close()
        self.session.stop()

    def _make_server(self):
        import uvicorn

        config = uvicorn.Config(make_app(self.session, self.token), log_level="warning",
                                access_log=False, lifespan="off")
        return uvicorn.Server(config)


def serve_labelling(images: Sequence[str | Path], sheet: str | Path, *,
                    classes: Sequence[str] = (), port: int | None = None,
                    settings: FeatureSettings | None = None,
                    cache_dir: str | Path | None = None, jobs: int = 1, seed: int = 0,
                    announce=print) -> None:
    """The ``topoclass label`` use case: open the sheet, serve the page until Ctrl-C."""
    book = LabelBook(sheet, classes)
    try:
        session = LabelSession(images, book, settings=settings, cache_dir=cache_dir,
                               jobs=jobs, seed=seed)
        server = LabelServer(session, port)
    except BaseException:
        book.close()
        raise
    announce(f"labelling page: {server.url}")
    announce(f"sheet: {book.path} ({len(book)} labelled, {len(session.images)} images); "
             "every label is saved at once; Ctrl-C stops the page")
    server.run()


class _BadRequest(Exception):
    pass


async def _json_body(request) -> dict:
    try:
        body = json.loads(await request.body() or b"{}")
    except ValueError:
        raise _BadRequest("the request body is not JSON") from None
    if not isinstance(body, dict):
        raise _BadRequest("the request body must be a JSON object")
    return body


def _bind(port: int | None) -> socket.socket:
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind(("127.0.0.1", int(port or 0)))  # loopback only: nothing else on the network
    except OSError as exc:
        sock.close()
        raise TopoclassError(f"port {port} on 127.0.0.1 cannot be used ({exc.strerror}); "
                             "choose another with --port or leave it out") from None
    sock.listen(64)
    return sock


def _page_html() -> str:
    from topoclass.pages import html_page
    from topoclass.report.figures import COORDINATION_COLOURS
    from topoclass.scoring import CAUTION

    config = html.escape(json.dumps({"colours": COORDINATION_COLOURS, "caution": CAUTION}))
    body = f"<main id='app' data-config='{config}'><p>loading…</p></main>"
    return html_page("topoclass labelling", body, styles=("base.css", "label_page.css"),
                     scripts=("label_page.js",))


@lru_cache(maxsize=256)
def _png_cached(path: str, mtime: float, side: int, max_pixels: int) -> bytes:
    from PIL import Image

    from topoclass.images import read_micrograph

    image = read_micrograph(path, max_pixels=max_pixels).image
    im = Image.fromarray(np.clip(image * 255 + 0.5, 0, 255).astype(np.uint8))
    if max(im.size) > side:
        im.thumbnail((side, side), Image.Resampling.LANCZOS)
    buf = io.BytesIO()
    im.save(buf, format="PNG")
    return buf.getvalue()


def _mtime(path: Path) -> float:
    """The file's modification time (the caches' key, so an edited file is read again)."""
    try:
        return path.stat().st_mtime
    except OSError as exc:
        raise TopoclassError(f"{path}: cannot read the file ({exc.strerror}); check that it "
                             "exists") from None


def _png_of(path: Path, side: int, max_pixels: int) -> bytes:
    return _png_cached(str(path), _mtime(path), side, max_pixels)


@lru_cache(maxsize=32)
def _sites_cached(path: str, mtime: float, settings: FeatureSettings) -> dict:
    from topoclass.order import coordination_class, site_coordination

    pattern = measure_image(path, settings).pattern
    rows, cols = pattern.shape
    kinds = coordination_class(site_coordination(pattern))
    return {"width": cols, "height": rows, "spacing": float(pattern.spacing),
            "sites": [[round(float(x), 1), round(float(y), 1), str(k), bool(b)]
                      for (x, y), k, b in zip(pattern.xy, kinds, pattern.border, strict=True)]}


def _sites_of(path: Path, settings: FeatureSettings) -> dict:
    return _sites_cached(str(path), _mtime(path), settings)


def _finite(value) -> float | None:
    value = float(value)
    return value if np.isfinite(value) else None
