"""Maps of large micrographs: which defect class sits where on a mosaic or large-area scan.

A use case beside :mod:`topoclass.scoring`. The image is read piece by piece
(:mod:`topoclass.bigimage`) and cut into overlapping tiles; each tile is measured exactly as a
whole micrograph is (:func:`topoclass.features.measure_micrograph`) and scored with the same
probabilities, novelty checks, review band and rows as ``score`` (the scoring module's own
row builder, :func:`topoclass.scoring.score_rows`). So that a tile is seen at the scale the
model learnt, its side holds as many sites as the median training image (recorded in the model
card) unless the user gives it.

The analysed region is found once, on the whole image (:func:`large_image_region`: the
model's ``region`` setting less an instrument data bar, searched in the top and bottom strips);
tiles are measured with no region search of their own, since a tile edge is no instrument's
frame.

Geometry: the analysed region is cut into a grid of *cores* that cover it exactly once; each
tile is its core widened by half the overlap on every side (shifted inwards at the frame, so
that every tile has the same size), so no loop or neighbourhood is lost at a seam. Area totals
count cores, never overlaps.

``DIR/tiles.csv`` is written as in ``score``: rows appended and flushed as tiles finish, a lock
beside it, ``resume=True`` keeps the finished tiles of a killed run.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from topoclass._files import file_sha256
from topoclass._progress import progress_bar
from topoclass._workers import end_with_parent, pool_owner
from topoclass.bigimage import DEFAULT_MEMORY_LIMIT_MB, LargeImage, open_large_image
from topoclass.errors import PatternError, TopoclassError
from topoclass.features import FeatureSettings, RecordResult, measure_micrograph
from topoclass.region import AnalysedRegion, DataBar, analysed_region
from topoclass.rowfile import (
    WriterLock,
    csv_header,
    csv_line,
    in_chunks,
    read_rows,
    reopen_checked,
    write_durably,
)
from topoclass.scoring import AMOUNT_COLUMNS, CAUTION, MEASURE_COLUMNS, score_rows
from topoclass.sites import estimate_spacing

TILES_FILE = "tiles.csv"
MAP_FILE = "map.json"
TOTALS_FILE = "totals.csv"

#: Overlap of neighbouring tiles, in lattice spacings: a vacancy's loop dies at sqrt(3)
#: spacings and the persistence is radius-limited to 2.5, so 3 spacings keep both whole.
DEFAULT_OVERLAP_SPACINGS = 3.0

#: Sites per tile for a model whose card does not record its training images (older models).
FALLBACK_TILE_SITES = 400

#: Verdicts that are not a class, in the order the totals list them.
OTHER_VERDICTS = ("review", "unfamiliar", "not measured")

_HEX_AREA = math.sqrt(3.0) / 2.0  # area per site of a triangular lattice, in spacings squared
_SPACING_PROBE_PX = 1024  # side of each crop the spacing of a large image is estimated on
# Rows of each edge strip searched for a data bar: instrument bars are tens to a few hundred
# rows deep, and a strip of the whole width stays small (12,000 px wide: 49 MB as float32).
_BAR_STRIP_ROWS = 1024


@dataclass(frozen=True)
class TilePlan:
    """Tiles over an image: rectangles measured and the cores they stand for.

    Attributes
    ----------
    shape : (rows, cols)
        Image size.
    boxes : ndarray of int, shape (n, 4)
        ``x0, y0, x1, y1`` (half-open pixels) of each tile, row by row.
    cores : ndarray of int, shape (n, 4)
        The part of the image each tile stands for; the cores cover the analysed region
        exactly once.
    tile, overlap : int
        Tile side and overlap in pixels.
    """

    shape: tuple[int, int]
    boxes: np.ndarray
    cores: np.ndarray
    tile: int
    overlap: int

    def __len__(self) -> int:
        return int(self.boxes.shape[0])


@dataclass
class MapSummary:
    """What a map run did."""

    out_dir: Path
    plan: TilePlan
    spacing_px: float
    pixel_size_nm: float | None
    region: AnalysedRegion | None = None
    scored: int = 0
    failed: int = 0
    skipped: int = 0
    totals: list[dict] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


def plan_tiles(shape: tuple[int, int], tile: int, overlap: int,
               box: tuple[int, int, int, int] | None = None) -> TilePlan:
    """Cut an image into tiles of side ``tile`` whose neighbours share ``overlap`` pixels.

    Parameters
    ----------
    shape : (rows, cols)
        Image size in pixels.
    tile : int
        Tile side in pixels (smaller where the image itself is smaller).
    overlap : int
        Pixels shared by neighbouring tiles, ``0 <= overlap < tile``.
    box : (x0, y0, x1, y1), optional
        The analysed region (half-open pixels) the tiles cover; the whole image by default.

    Returns
    -------
    TilePlan
    """
    rows, cols = (int(v) for v in shape)
    tile, overlap = int(tile), int(overlap)
    if tile < 1 or not 0 <= overlap < tile:
        raise ValueError(f"need tile >= 1 and 0 <= overlap < tile, not {tile}, {overlap}")
    x0, y0, x1, y1 = (0, 0, cols, rows) if box is None else (int(v) for v in box)
    if not (0 <= x0 < x1 <= cols and 0 <= y0 < y1 <= rows):
        raise ValueError(f"box {box} is not inside the image of {cols}x{rows} pixels")
    ys, ycore = _axis(y1 - y0, tile, overlap)
    xs, xcore = _axis(x1 - x0, tile, overlap)
    boxes, cores = [], []
    for (b0, b1), (c0, c1) in zip(ys, ycore, strict=True):
        for (a0, a1), (d0, d1) in zip(xs, xcore, strict=True):
            boxes.append((x0 + a0, y0 + b0, x0 + a1, y0 + b1))
            cores.append((x0 + d0, y0 + c0, x0 + d1, y0 + c1))
    return TilePlan(shape=(rows, cols), boxes=np.array(boxes, dtype=np.int64).reshape(-1, 4),
                    cores=np.array(cores, dtype=np.int64).reshape(-1, 4), tile=tile,
                    overlap=overlap)


def tile_side(model, spacing_px: float) -> tuple[int, str]:
    """Tile side in pixels that holds as many sites as the model's median training image.

    A square of side ``L`` on a triangular lattice of spacing ``a`` holds
    ``L**2 / (sqrt(3)/2 a**2)`` sites (elementary geometry), so ``L = a sqrt(n sqrt(3)/2)``.

    Returns
    -------
    (side, note)
        The note says where the site count came from.
    """
    stored = dict(getattr(model, "settings", None) or {}).get("training_images") or {}
    n = stored.get("median_n_sites")
    if n:
        note = f"tiles hold about {n:.0f} sites, the median of the training images"
    else:
        n = FALLBACK_TILE_SITES
        note = (f"the model card records no training image size (an older model); tiles hold "
                f"about {n} sites (give --tile to choose)")
    return max(32, int(round(spacing_px * math.sqrt(float(n) * _HEX_AREA)))), note


def large_image_region(image: LargeImage, box=None, *, auto: bool = True) -> AnalysedRegion:
    """The analysed region of a large image: the user's box less an instrument data bar.

    As :func:`topoclass.region.analysed_region` on the whole image, but reading only the top
    and bottom strips of the box (at most 1024 rows each, the whole box when it is at most
    twice that): a data bar lies along an edge, so nothing else needs reading. The strips are
    searched as one image, the top strip above the bottom one, so the deeper of the two edges'
    bands is left out, as for a whole micrograph.

    Parameters
    ----------
    image : LargeImage
    box : (x0, y0, x1, y1), optional
        The user's region, in pixels or fractions of the frame (see ``--region``).
    auto : bool
        Look for a data bar inside the box.

    Raises
    ------
    TopoclassError
        When the box does not fit the image or leaves too little to analyse.
    """
    rows, cols = image.shape
    name = str(image.path)
    # The box in pixels, checked, without reading a pixel (only the shape is looked at).
    x0, y0, x1, y1 = analysed_region(np.broadcast_to(np.float32(0), (rows, cols)), box,
                                     auto=False, source=name).box
    if not auto:
        return AnalysedRegion((x0, y0, x1, y1), (rows, cols))
    h = y1 - y0 if y1 - y0 <= 2 * _BAR_STRIP_ROWS else _BAR_STRIP_ROWS
    top = image.read((x0, y0, x1, y0 + h)).image
    if h == y1 - y0:
        strips, gap = top, 0
    else:
        strips = np.vstack([top, image.read((x0, y1 - h, x1, y1)).image])
        gap = (y1 - y0) - 2 * h  # rows between the strips, not read
    found = analysed_region(strips, auto=True, source=name)
    bar = found.data_bar
    if bar is None:
        return AnalysedRegion((x0, y0, x1, y1), (rows, cols))
    if bar.edge == "bottom":
        b0, b1 = y0, found.box[3] + gap + y0
        boundary = bar.boundary + gap + y0
    else:
        b0, b1 = found.box[1] + y0, y1
        boundary = bar.boundary + y0
    return AnalysedRegion((x0, b0, x1, b1), (rows, cols),
                          DataBar(bar.edge, boundary, bar.rows, bar.level, bar.n_marks))


def map_spacing(image: LargeImage, box: tuple[int, int, int, int] | None = None) -> float:
    """Lattice spacing of a large image in pixels: the median over a few crops.

    Crops of at most 1024 px at the centre and the centres of the four quarters (of ``box``,
    the analysed region, when given), each estimated with
    :func:`topoclass.sites.estimate_spacing`; crops without a lattice are left out.

    Raises
    ------
    PatternError
        When no crop shows a lattice spacing.
    """
    bx0, by0, bx1, by1 = box or (0, 0, image.shape[1], image.shape[0])
    rows, cols = by1 - by0, bx1 - bx0
    side = min(_SPACING_PROBE_PX, rows, cols)
    centres = [(cols / 2, rows / 2)]
    if min(rows, cols) >= 2 * side:
        centres += [(cols * fx, rows * fy) for fx in (0.25, 0.75) for fy in (0.25, 0.75)]
    found, why = [], ""
    for cx, cy in centres:
        x0 = bx0 + int(min(max(cx - side / 2, 0), cols - side))
        y0 = by0 + int(min(max(cy - side / 2, 0), rows - side))
        try:
            crop = image.read((x0, y0, x0 + side, y0 + side))
            found.append(estimate_spacing(crop.image, source=crop.source))
        except TopoclassError as exc:
            why = str(exc)
    if not found:
        raise PatternError(f"{image.path}: no lattice spacing found in its central crops "
                           f"({why}); give the tile size with --tile")
    return float(np.median(found))


def tile_columns(classes: Sequence[str]) -> list[str]:
    """The header of ``tiles.csv`` for a model with these classes."""
    return (["x0", "y0", "x1", "y1", "status", "predicted", "confidence", "verdict"]
            + [f"p_{c}" for c in classes]
            + ["unfamiliar", *MEASURE_COLUMNS, *AMOUNT_COLUMNS,
               "core_x0", "core_y0", "core_x1", "core_y1", "message"])


def map_image(
    model,
    image: str | Path,
    out_dir: str | Path,
    *,
    tile: int | None = None,
    overlap: float = DEFAULT_OVERLAP_SPACINGS,
    settings: FeatureSettings | None = None,
    jobs: int = 1,
    resume: bool = False,
    overwrite: bool = False,
    memory_limit_mb: float = DEFAULT_MEMORY_LIMIT_MB,
    progress: bool = False,
    alpha: float | None = None,
    engine=None,
) -> MapSummary:
    """Score every tile of a large micrograph; write ``tiles.csv``, ``map.json``, ``totals.csv``.

    Parameters
    ----------
    model : topoclass.model.TrainedModel
        A trained model (:func:`topoclass.model.load_model`).
    image : path-like
        The micrograph (TIFF read in pieces; PNG/JPEG read whole within ``memory_limit_mb``).
    out_dir : path-like
        Folder for the outputs (made if missing).
    tile : int, optional
        Tile side in pixels; by default as many sites as the median training image
        (:func:`tile_side`).
    overlap : float
        Overlap of neighbouring tiles in lattice spacings.
    settings : FeatureSettings, optional
        The model's own (:meth:`FeatureSettings.from_model`) when omitted.
    jobs : int
        Worker processes.
    resume, overwrite : bool
        Keep the finished tiles of an earlier run of the same image, model and tiles; or
        replace earlier outputs. Without either, existing outputs are refused.
    memory_limit_mb : float
        See :func:`topoclass.bigimage.open_large_image`.
    progress : bool
        Progress bar on stderr.
    alpha : float, optional
        Error rate of the review band behind ``verdict`` (the model's own when omitted).
    engine : topoclass.cluster.ClusterEngine, optional
        Measure each tile as a task on a Dask cluster instead (``jobs`` is then ignored), as
        ``score --cluster`` does; rows still come back in tile order to this process, the one
        writer. Every worker must see the image under the same path.

    Returns
    -------
    MapSummary
    """
    out_dir = Path(out_dir)
    classes = [str(c) for c in model.classes]
    columns = tile_columns(classes)
    settings = settings or FeatureSettings.from_model(model)
    # The analysed region is found once, on the whole image (large_image_region); a tile lies
    # inside it, so no region of its own and no data-bar search (a tile edge is not an
    # instrument's frame).
    region_box, auto_region = settings.region, settings.auto_region
    settings = dataclasses.replace(settings, region=None, auto_region=False)
    if alpha is not None:
        from topoclass.model.conformal import check_alpha

        alpha = check_alpha(alpha)
    if overlap < 0:
        raise TopoclassError(f"overlap must be zero or more spacings, not {overlap}")
    tiles_csv = out_dir / TILES_FILE
    if tiles_csv.exists() and not (resume or overwrite):
        raise TopoclassError(f"{tiles_csv}: a map exists in {out_dir}; pass --resume to continue "
                             "it or --overwrite to replace it")
    with open_large_image(image, memory_limit_mb=memory_limit_mb) as big:
        if engine is not None and big.access == "whole" \
                and getattr(engine.spec, "local_workers", None) is None:
            raise TopoclassError(
                f"{image}: a PNG or JPEG is read whole into a temporary file on this machine, "
                "which the cluster's workers cannot see; save it as a tiled TIFF, or map it "
                "with --jobs or --cluster local:N")
        notes = list(big.notes)
        region = large_image_region(big, region_box, auto=auto_region)
        if not region.whole:
            notes.append("left out: " + region.left_out())
        rx0, ry0, rx1, ry1 = region.box
        spacing = map_spacing(big, region.box)
        if tile is None:
            tile, why = tile_side(model, spacing)
            notes.append(why)
        tile = int(min(tile, max(rx1 - rx0, ry1 - ry0)))
        if tile < 32:
            raise TopoclassError(f"tile side {tile} px is too small; give at least 32 pixels")
        overlap_px = min(int(round(overlap * spacing)), tile // 2)
        plan = plan_tiles(big.shape, tile, overlap_px, box=region.box)
        pixel_size = big.pixel_size_nm if big.pixel_size_nm is not None \
            else settings.pixel_size_nm
        header = {
            "image": str(image), "image_sha256": file_sha256(image),
            "shape": list(big.shape), "tile_px": plan.tile, "overlap_px": plan.overlap,
            "overlap_spacings": float(overlap), "spacing_px": spacing,
            "pixel_size_nm": pixel_size, "classes": classes, "n_tiles": len(plan),
            "region": list(region.box),
            "data_bar": None if region.data_bar is None
            else dataclasses.asdict(region.data_bar),
            "caution": CAUTION,
        }
        summary = MapSummary(out_dir=out_dir, plan=plan, spacing_px=spacing,
                             pixel_size_nm=pixel_size, region=region, notes=notes)
        out_dir.mkdir(parents=True, exist_ok=True)
        with WriterLock(tiles_csv):
            done = _prepare(out_dir, columns, header, resume=resume)
            todo = [i for i in range(len(plan)) if tuple(plan.boxes[i]) not in done]
            summary.skipped = len(plan) - len(todo)
            with open(tiles_csv, "a", newline="", encoding="utf-8") as fh:
                for chunk in in_chunks(_tile_results(big, plan, todo, settings, jobs,
                                                     progress, engine)):
                    idx = [i for i, _ in chunk]
                    rows = score_rows(model, classes, [r for _, r in chunk], alpha)
                    for i, row in zip(idx, rows, strict=True):
                        _place(row, plan, i)
                        if row["status"] == "ok":
                            summary.scored += 1
                        else:
                            summary.failed += 1
                    write_durably(fh, rows, columns)
    summary.totals = map_totals(read_tiles(tiles_csv), classes, pixel_size)
    _write_totals(out_dir / TOTALS_FILE, summary.totals)
    return summary


def read_tiles(path: str | Path) -> list[dict[str, str]]:
    """Rows of a ``tiles.csv`` (an incomplete last line, from a crash, is ignored)."""
    return read_rows(path)


def read_map_header(out_dir: str | Path) -> dict:
    """The ``map.json`` of a map folder (image, grid, spacing, pixel size, classes)."""
    path = Path(out_dir) / MAP_FILE
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise TopoclassError(f"{path}: not found; run `topoclass map` first") from None
    except (OSError, ValueError) as exc:
        raise TopoclassError(f"{path}: cannot be read ({exc}); run the map again with "
                             "--overwrite") from None


def map_totals(rows: Sequence[dict], classes: Sequence[str],
               pixel_size_nm: float | None = None) -> list[dict]:
    """Share of the analysed region under each verdict, from the tile cores (they cover it once).

    Returns
    -------
    list of dict
        One per class, then ``review``, ``unfamiliar`` and ``not measured`` (failed tiles and
        tiles not yet done): ``verdict, tiles, area_px, fraction`` and ``area_um2`` (None when
        the pixel size is unknown).
    """
    area: dict[str, float] = {c: 0.0 for c in [*classes, *OTHER_VERDICTS]}
    count: dict[str, int] = dict.fromkeys(area, 0)
    total = 0.0
    for r in rows:
        a = (int(r["core_x1"]) - int(r["core_x0"])) * (int(r["core_y1"]) - int(r["core_y0"]))
        total += a
        verdict = (r.get("verdict") or "") if r.get("status") == "ok" else "not measured"
        verdict = verdict if verdict in area else "not measured"
        area[verdict] += a
        count[verdict] += 1
    um2 = None if pixel_size_nm is None else (pixel_size_nm / 1000.0) ** 2
    return [{"verdict": v, "tiles": count[v], "area_px": area[v],
             "fraction": area[v] / total if total else 0.0,
             "area_um2": None if um2 is None else area[v] * um2} for v in area]


def map_summary_text(summary: MapSummary) -> str:
    """A short human summary of a map run, ending with the caution about probabilities."""
    p = summary.plan
    lines = [f"tiles {len(p)} ({p.tile} px, overlap {p.overlap} px, spacing "
             f"{summary.spacing_px:.1f} px): scored {summary.scored}, failed {summary.failed}, "
             f"already done {summary.skipped}"]
    lines += [f"  note: {n}" for n in summary.notes]
    where = "image" if summary.region is None or summary.region.whole else "analysed region"
    for t in summary.totals:
        if t["tiles"]:
            size = "" if t["area_um2"] is None else f", {t['area_um2']:,.1f} µm²"
            lines.append(f"  {t['verdict']:<16} {t['fraction']:6.1%} of the {where} "
                         f"({t['tiles']} tiles{size})")
    lines += [f"results: {summary.out_dir / TILES_FILE}", "", "Caution: " + CAUTION]
    return "\n".join(lines)


# --------------------------------------------------------------------------------------------
# private helpers


def _axis(length: int, tile: int, overlap: int) -> tuple[list, list]:
    """Tile and core intervals along one axis: cores split it evenly and exactly.

    With ``n = ceil((length - overlap) / (tile - overlap))`` cores, a core is at most a pixel or
    so wider than the step ``tile - overlap``; the tiles of this axis grow by that much, so that
    neighbours always share at least ``overlap`` pixels.
    """
    if length <= tile:
        return [(0, length)], [(0, length)]
    n = math.ceil((length - overlap) / (tile - overlap))
    edges = np.linspace(0, length, n + 1).round().astype(int)
    side = min(length, max(tile, int(np.diff(edges).max()) + overlap))
    spans, cores = [], []
    for c0, c1 in zip(edges[:-1].tolist(), edges[1:].tolist(), strict=True):
        t0 = int(math.floor((c0 + c1 - side) / 2))
        t0 = min(max(t0, 0), length - side)  # shifted inwards at the frame
        spans.append((t0, t0 + side))
        cores.append((c0, c1))
    return spans, cores


def _tile_results(big: LargeImage, plan: TilePlan, todo: list[int], settings: FeatureSettings,
                  jobs: int, progress: bool, engine=None):
    work = _TileWorker(big, settings)
    boxes = [tuple(int(v) for v in plan.boxes[i]) for i in todo]
    if engine is not None:
        results = engine.imap(_TileOnWorker(work), [(b,) for b in boxes], lost=work.given_up)
    elif jobs == 1 or len(boxes) <= 1:
        results = (work(b) for b in boxes)
    else:
        from joblib import Parallel, delayed

        parallel = Parallel(n_jobs=jobs, return_as="generator", batch_size="auto")
        results = parallel(delayed(_limited)(work, b) for b in boxes)
    if not progress:
        yield from zip(todo, results, strict=True)
        return
    with progress_bar(len(boxes), "mapping tiles") as advance:
        for item in zip(todo, results, strict=True):
            advance()
            yield item


class _TileWorker:
    """Measure one tile; picklable, so joblib can ship it (the image reopens in the worker)."""

    def __init__(self, big: LargeImage, settings: FeatureSettings):
        self.big = big
        self.settings = settings
        self.owner = pool_owner()

    def __call__(self, box: tuple[int, int, int, int]) -> RecordResult:
        end_with_parent(self.owner)  # a pool worker must not outlive a killed run
        name = self.tile_name(box)
        try:
            measured = measure_micrograph(self.big.read(box), self.settings)
        except TopoclassError as exc:
            # Input errors (a blank or damaged piece, no lattice) become an error row; anything
            # else is a bug and stops the run.
            return RecordResult(name, "", None, " ".join(str(exc).split()))
        return RecordResult(name, "", measured.record, notes=measured.micrograph.notes)

    def tile_name(self, box) -> Path:
        return Path(f"{self.big.path} [tile {','.join(map(str, box))}]")

    def given_up(self, box, reason: str) -> RecordResult:
        """The error row of a tile whose cluster task killed workers too often."""
        return RecordResult(self.tile_name(box), "", None,
                            f"{self.tile_name(box)}: {reason}; map again with --resume on "
                            "workers with more memory, or with a smaller --tile")


class _TileOnWorker:
    """One tile as a cluster task: one BLAS thread, the image by its absolute path, and an
    image the worker cannot see is that tile's error row, naming the worker."""

    def __init__(self, work: _TileWorker):
        big = dataclasses.replace(work.big, path=Path(work.big.path).absolute(), _handle=None)
        self.work = _TileWorker(big, work.settings)

    def __call__(self, box: tuple[int, int, int, int]) -> RecordResult:
        from topoclass.cluster import worker_name

        path = self.work.big.path
        if not path.is_file():
            return RecordResult(self.work.tile_name(box), "", None,
                                f"{path}: not found on cluster worker {worker_name()}; put the "
                                "image in a folder every worker sees under the same path")
        result = _limited(self.work, box)
        if result.ok:
            return result
        return dataclasses.replace(result, error=f"{result.error} (on cluster worker "
                                   f"{worker_name()})")


def _limited(work, box):
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        return work(box)


def _place(row: dict, plan: TilePlan, i: int) -> None:
    row.pop("image", None)
    row.pop("sha256", None)
    for key, v in zip(("x0", "y0", "x1", "y1"), plan.boxes[i], strict=True):
        row[key] = int(v)
    for key, v in zip(("core_x0", "core_y0", "core_x1", "core_y1"), plan.cores[i], strict=True):
        row[key] = int(v)


def _prepare(out_dir: Path, columns: list[str], header: dict, *, resume: bool) -> set:
    """Start fresh files, or check an earlier run and return its finished tile boxes."""
    tiles_csv = out_dir / TILES_FILE
    if not (resume and tiles_csv.exists()):
        _write_json(out_dir / MAP_FILE, header)
        tiles_csv.write_text(csv_header(columns), encoding="utf-8")
        return set()
    earlier = read_map_header(out_dir)
    same = ("image_sha256", "shape", "tile_px", "overlap_px", "classes", "region")
    if any(earlier.get(k) != header[k] for k in same):
        raise TopoclassError(
            f"{tiles_csv}: was made from another image, model, tile size or region; resume "
            "only with the same ones, or pass --overwrite"
        )
    reopen_checked(tiles_csv, columns, f"{tiles_csv}: its columns do not match this model or "
                   "version; pass --overwrite to map again")
    return {tuple(int(r[k]) for k in ("x0", "y0", "x1", "y1")) for r in read_tiles(tiles_csv)}


def _write_totals(path: Path, totals: list[dict]) -> None:
    keys = ["verdict", "tiles", "area_px", "fraction", "area_um2"]
    with open(path, "w", newline="", encoding="utf-8") as fh:
        fh.write(csv_header(keys))
        for t in totals:
            fh.write(csv_line({k: ("" if t[k] is None else t[k]) for k in keys}, keys))


def _write_json(path: Path, data: dict) -> None:
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(json.dumps(data, indent=1) + "\n", encoding="utf-8")
    os.replace(tmp, path)
