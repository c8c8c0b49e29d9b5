"""Image files → per-image :class:`~topoclass.records.PatternRecord`s, cached and in parallel.

Stage 5 of the pipeline. Each micrograph is read, its sites found, its persistence diagrams and
order measures computed once; the result is cached on disk, keyed by the file's content hash,
the settings that shaped it and the package version, so a changed setting recomputes and an
unchanged one never does. One bad image never stops a batch: it comes back as a failed
:class:`RecordResult` with a one-line message.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import tempfile
import warnings
import zipfile
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from topoclass import __version__
from topoclass._files import file_sha256
from topoclass._progress import progress_bar
from topoclass._workers import end_with_parent, pool_owner
from topoclass.amounts import PatternAmounts, pattern_amounts
from topoclass.augment import zoom_image
from topoclass.errors import TopoclassError
from topoclass.images import Micrograph, read_micrograph
from topoclass.order import order_measures
from topoclass.persistence import DEFAULT_MAX_SCALE, Diagrams, pattern_persistence
from topoclass.records import PatternRecord
from topoclass.region import AnalysedRegion, analysed_region
from topoclass.sites import SitePattern, find_sites

#: Bumped whenever the cached record layout changes, so old cache entries are never misread.
_CACHE_LAYOUT = 7


@dataclass(frozen=True)
class FeatureSettings:
    """Everything that shapes a :class:`PatternRecord`; part of the cache key.

    Parameters
    ----------
    polarity : {"auto", "bright", "dark"}
        Feature polarity passed to :func:`topoclass.sites.find_sites`.
    max_scale : float
        Radius limit of the Vietoris–Rips filtration, in units of the site spacing.
    pixel_size_nm : float or None
        Pixel size to use when a file does not record one.
    max_pixels : int
        Refuse images larger than this (protects against decompression bombs).
    region : (x0, y0, x1, y1) or None
        Region to analyse, in pixels or fractions of the frame (:mod:`topoclass.region`);
        None for the whole frame.
    auto_region : bool
        Find an instrument data bar (inside ``region``) and leave it out.
    """

    polarity: str = "auto"
    max_scale: float = DEFAULT_MAX_SCALE
    pixel_size_nm: float | None = None
    max_pixels: int = 100_000_000
    region: tuple[float, float, float, float] | None = None
    auto_region: bool = True

    def __post_init__(self) -> None:
        if self.region is not None:  # a model card stores it as a JSON list
            object.__setattr__(self, "region", tuple(float(v) for v in self.region))

    def key(self) -> str:
        """A short stable hash of what shapes a record, the package version and cache layout.

        ``max_pixels`` is left out: it decides whether an image is read, not what comes out.
        """
        shaping = dataclasses.asdict(self)
        shaping.pop("max_pixels")
        payload = json.dumps(
            {**shaping, "version": __version__, "layout": _CACHE_LAYOUT}, sort_keys=True
        )
        return hashlib.sha256(payload.encode()).hexdigest()[:16]

    @classmethod
    def from_model(cls, model) -> FeatureSettings:
        """The settings a trained model was made with (defaults for a model or None without).

        The one place that reads them: scoring, the report and the workflow all call this, so
        an image is always measured as the model's training images were.
        """
        stored = dict(getattr(model, "settings", None) or {}).get("features", {}) or {}
        known = {f.name for f in dataclasses.fields(cls)}
        return cls(**{k: v for k, v in dict(stored).items() if k in known})


@dataclass(frozen=True)
class RecordResult:
    """The outcome for one image: a record, or the reason there is none."""

    path: Path
    sha256: str | None
    record: PatternRecord | None
    error: str | None = None
    notes: tuple[str, ...] = ()

    @property
    def ok(self) -> bool:
        return self.record is not None


def default_cache_dir() -> Path:
    """``$TOPOCLASS_CACHE``, else ``$XDG_CACHE_HOME/topoclass``, else ``~/.cache/topoclass``."""
    if os.environ.get("TOPOCLASS_CACHE"):
        return Path(os.environ["TOPOCLASS_CACHE"])
    base = os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache"
    return Path(base) / "topoclass"


@dataclass(frozen=True)
class ImageMeasurement:
    """Every stage's output for one micrograph: the image, its sites, its record and amounts."""

    micrograph: Micrograph
    pattern: SitePattern
    record: PatternRecord
    amounts: PatternAmounts | None = None
    region: AnalysedRegion | None = None


def measure_image(
    path: str | Path, settings: FeatureSettings | None = None, *, zoom: float = 1.0
) -> ImageMeasurement:
    """Read one micrograph, find its sites, and compute persistence and order measures.

    The sites are searched in the analysed region (:func:`topoclass.region.analysed_region`:
    the settings' region less an instrument data bar). ``zoom`` other than 1 measures a
    rescaled copy of that region instead (:func:`topoclass.augment.zoom_image`, for training
    over a range of magnifications); the returned micrograph is then the copy.

    Raises
    ------
    TopoclassError
        When the file cannot be read or holds no usable lattice pattern.
    """
    settings = settings or FeatureSettings()
    micrograph = read_micrograph(path, max_pixels=settings.max_pixels)
    return measure_micrograph(micrograph, settings, zoom=zoom)


def measure_micrograph(micrograph: Micrograph, settings: FeatureSettings | None = None, *,
                       zoom: float = 1.0) -> ImageMeasurement:
    """Sites, persistence, order measures and amounts of an image already read.

    The part of :func:`measure_image` after reading, so that a piece of a large micrograph
    (:mod:`topoclass.mapping`) is measured exactly as a whole file is.
    """
    settings = settings or FeatureSettings()
    source = micrograph.source
    pixel_size = micrograph.pixel_size_nm
    if pixel_size is None:
        pixel_size = settings.pixel_size_nm
    region = analysed_region(micrograph.image, settings.region, auto=settings.auto_region,
                             source=source)
    image, box = micrograph.image, region.box
    if zoom != 1.0:
        x0, y0, x1, y1 = box
        image = zoom_image(image[y0:y1, x0:x1], zoom)
        micrograph = dataclasses.replace(micrograph, image=image)
        pixel_size = None if pixel_size is None else pixel_size / zoom
        box = None
    pattern = find_sites(image, polarity=settings.polarity, pixel_size_nm=pixel_size,
                         source=source, region=box)
    diagrams = pattern_persistence(pattern, max_scale=settings.max_scale)
    amounts = pattern_amounts(pattern, diagrams)
    remarks = [f"left out: {region.left_out()}"] if not region.whole else []
    if not pattern.preferred_spacing:
        remarks.append("no preferred spacing (no ring in the power spectrum): the scale comes "
                       "from the spots, the spacing is that of a lattice of equal density")
    record = PatternRecord(diagrams=diagrams, order=order_measures(pattern), source=source,
                           amounts=amounts.values, region=pattern.frame,
                           remarks=tuple(remarks))
    return ImageMeasurement(micrograph, pattern, record, amounts, region)


def measure_pattern(
    path: str | Path, settings: FeatureSettings | None = None, *, zoom: float = 1.0
) -> PatternRecord:
    """The :class:`PatternRecord` of one micrograph (no cache); see :func:`measure_image`."""
    return measure_image(path, settings, zoom=zoom).record


def measure_patterns(
    paths: Sequence[str | Path],
    settings: FeatureSettings | None = None,
    *,
    cache_dir: str | Path | None = None,
    jobs: int = 1,
    progress: bool = False,
    description: str = "features",
    zooms: Sequence[float] | None = None,
    engine=None,
) -> list[RecordResult]:
    """Pattern records of many images, in input order; see :func:`iter_records`."""
    return list(
        iter_records(
            paths, settings, cache_dir=cache_dir, jobs=jobs, progress=progress,
            description=description, zooms=zooms, engine=engine,
        )
    )


def cached_measurement(path: str | Path, sha256: str, settings: FeatureSettings | None = None,
                       *, cache_dir: str | Path | None = None
                       ) -> tuple[SitePattern, PatternRecord] | None:
    """The site pattern and record that :func:`iter_records` cached for a file, or None.

    ``sha256`` is the file's content hash as scoring recorded it (``scores.csv``); nothing is
    measured here, so a miss (another cache folder, caching off, a changed setting) is None.
    """
    settings = settings or FeatureSettings()
    if not sha256 or cache_dir == "":
        return None
    cache = _RecordCache(Path(default_cache_dir() if cache_dir is None else cache_dir), settings)
    pattern = cache.pattern(sha256, str(path))
    hit = cache.get(sha256, Path(path)) if pattern is not None else None
    return None if hit is None else (pattern, hit[0])


def iter_records(
    paths: Sequence[str | Path],
    settings: FeatureSettings | None = None,
    *,
    cache_dir: str | Path | None = None,
    jobs: int = 1,
    progress: bool = False,
    description: str = "features",
    zooms: Sequence[float] | None = None,
    engine=None,
) -> Iterator[RecordResult]:
    """Yield a :class:`RecordResult` per path, in input order, as images finish.

    Parameters
    ----------
    paths : sequence of path-like
        Image files.
    settings : FeatureSettings, optional
        Site-finding and persistence settings (defaults when omitted).
    cache_dir : path-like, None or False
        Folder of the on-disk cache; ``None`` uses :func:`default_cache_dir`; ``False`` (or
        ``""``) turns the cache off.
    jobs : int
        Worker processes (joblib); 1 runs in this process. Each worker's BLAS/OpenMP pools are
        limited to one thread so that ``jobs`` workers do not oversubscribe the cores.
    progress : bool
        Show a progress bar (images done, rate, time left) on stderr.
    zooms : sequence of float, optional
        One zoom factor per path: measure a rescaled copy of the image instead
        (:func:`measure_image`); cached apart from the original.
    engine : topoclass.cluster.ClusterEngine, optional
        Run each image as a task on a Dask cluster instead (``jobs`` is then ignored); results
        still come back in input order, to this process. The cache folder is used by the
        workers that can write it and skipped by those that cannot; a failed image's message
        names the worker.
    """
    settings = settings or FeatureSettings()
    paths = [Path(p) for p in paths]
    zooms = [1.0] * len(paths) if zooms is None else [float(z) for z in zooms]
    if len(zooms) != len(paths):
        raise ValueError(f"{len(zooms)} zoom factors for {len(paths)} paths")
    cache = _cache_for(cache_dir, settings)
    work = _Worker(settings, cache)
    if engine is not None:
        results: Iterator[RecordResult] = engine.imap(
            _OnWorker(work), zip(paths, zooms, strict=True), lost=_given_up)
    elif jobs == 1 or len(paths) <= 1:
        results = (work(p, z) for p, z in zip(paths, zooms, strict=True))
    else:
        from joblib import Parallel, delayed

        parallel = Parallel(n_jobs=jobs, return_as="generator", batch_size="auto")
        results = parallel(delayed(_limited)(work, p, z)
                           for p, z in zip(paths, zooms, strict=True))
    if not progress:
        yield from results
        return
    with progress_bar(len(paths), description) as advance:
        for result in results:
            advance()
            yield result


# --------------------------------------------------------------------------------------------
# private helpers


class _Worker:
    """Picklable callable so joblib can ship it to worker processes."""

    def __init__(self, settings: FeatureSettings, cache: _RecordCache | None):
        self.settings = settings
        self.cache = cache
        self.owner = pool_owner()

    def __call__(self, path: Path, zoom: float = 1.0) -> RecordResult:
        end_with_parent(self.owner)  # a pool worker must not outlive a killed run
        try:
            sha = file_sha256(path)
        except OSError as exc:
            reason = exc.strerror or type(exc).__name__
            return RecordResult(path, None, None, f"{path}: cannot read the file ({reason}); "
                                 "check that it exists and is readable")
        entry = sha if zoom == 1.0 else f"{sha}-zoom{zoom:.6g}"
        if self.cache is not None:
            hit = self.cache.get(entry, path)
            if hit is not None:
                record, notes = hit
                return RecordResult(path, sha, record, notes=notes)
        # Reader warnings (multi-page TIFF, non-finite pixels) belong in the image's own row,
        # not on a terminal shared by a whole batch.
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                measured = measure_image(path, self.settings, zoom=zoom)
            except TopoclassError as exc:
                # Only input errors become a failed result (the readers turn every decoder
                # failure into ImageReadError); anything else is a bug and must stop the run.
                return RecordResult(path, sha, None, " ".join(str(exc).split()))
        notes = tuple(dict.fromkeys(" ".join(str(w.message).split()) for w in caught))
        record = measured.record
        if self.cache is not None:
            self.cache.put(entry, record, notes, measured.pattern)
        return RecordResult(path, sha, record, notes=notes)


def _limited(work: Callable, path: Path, zoom: float = 1.0) -> RecordResult:
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        return work(path, zoom)


class _OnWorker:
    """One image as a cluster task: one BLAS thread, and a failure that names the worker."""

    def __init__(self, work: _Worker):
        # A worker's working folder is not the client's: relative paths (images, cache) are
        # taken as the client meant them; results carry the path as given, as with --jobs.
        self.cwd = Path.cwd()
        if work.cache is not None:
            work.cache.folder = work.cache.folder.absolute()
        self.work = work

    def __call__(self, path: Path, zoom: float = 1.0) -> RecordResult:
        from topoclass.cluster import worker_name

        result = _limited(self.work, self.cwd / path, zoom)
        if result.ok:
            return dataclasses.replace(result, path=path,
                                       record=dataclasses.replace(result.record,
                                                                  source=str(path)))
        # A worker sees its own file system: where it failed matters to the operator.
        where = worker_name()
        error = f"{result.error} (on cluster worker {where})" if where else result.error
        return dataclasses.replace(result, path=path, error=error)


def _given_up(path: Path, zoom: float, reason: str) -> RecordResult:
    return RecordResult(path, None, None, f"{path}: {reason}; score it alone, or on a worker "
                        "with more memory (--resume retries it)")


def _cache_for(cache_dir, settings: FeatureSettings) -> _RecordCache | None:
    if cache_dir is False or (isinstance(cache_dir, str) and cache_dir == ""):
        return None
    if cache_dir is None:
        cache_dir = default_cache_dir()
    if not isinstance(cache_dir, str | os.PathLike):
        raise TypeError(f"cache_dir must be a path, None or False, not {cache_dir!r}")
    return _RecordCache(Path(cache_dir), settings)


class _RecordCache:
    """One ``.npz`` file per (content hash, settings key); loaded without pickle."""

    def __init__(self, root: Path, settings: FeatureSettings):
        self.folder = root / settings.key()

    def get(self, sha: str, path: Path) -> tuple[PatternRecord, tuple[str, ...]] | None:
        file = self.folder / f"{sha}.npz"
        if not file.exists():
            return None
        try:
            with np.load(file, allow_pickle=False) as data:
                notes = tuple(str(n) for n in data["notes"])
                return _record_from_arrays(data, str(path)), notes
        except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile):
            # a damaged or older entry is recomputed, never trusted
            return None

    def pattern(self, sha: str, source: str) -> SitePattern | None:
        file = self.folder / f"{sha}.npz"
        if not file.exists():
            return None
        try:
            with np.load(file, allow_pickle=False) as data:
                return _pattern_from_arrays(data, source)
        except Exception:  # a damaged entry (or one without sites) is measured again
            return None

    def put(self, sha: str, record: PatternRecord, notes: tuple[str, ...] = (),
            pattern: SitePattern | None = None) -> None:
        # Write to a temporary file and rename, so a concurrent reader never sees half a file;
        # a failed write (disk full, read-only) removes its temporary file and is otherwise
        # ignored: the cache is an optimisation and must not fail the batch.
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(dir=self.folder, suffix=".npz.tmp")
        except OSError:
            return
        try:
            with os.fdopen(fd, "wb") as fh:
                np.savez(fh, notes=np.array(notes, dtype=str), **_record_to_arrays(record),
                         **_pattern_to_arrays(pattern))
            os.replace(tmp, self.folder / f"{sha}.npz")
        except OSError:
            Path(tmp).unlink(missing_ok=True)


def _record_to_arrays(record: PatternRecord) -> dict[str, np.ndarray]:
    arrays = {f"d_{k}": v for k, v in record.diagrams.to_dict().items()}
    keys = list(record.order)
    arrays["order_keys"] = np.array(keys, dtype=str)
    arrays["order_values"] = np.array([record.order[k] for k in keys], dtype=float)
    names = list(record.amounts)
    arrays["amount_keys"] = np.array(names, dtype=str)
    arrays["amount_values"] = np.array([record.amounts[k] for k in names], dtype=float)
    arrays["region"] = np.array(record.region if record.region is not None else [], dtype=int)
    arrays["remarks"] = np.array(record.remarks, dtype=str)
    return arrays


def _record_from_arrays(data, source: str) -> PatternRecord:
    diagrams = Diagrams.from_dict({k[2:]: data[k] for k in data.files if k.startswith("d_")})
    order = dict(zip(data["order_keys"].tolist(), data["order_values"].tolist(), strict=True))
    amounts = dict(zip(data["amount_keys"].tolist(), data["amount_values"].tolist(), strict=True))
    region = tuple(int(v) for v in data["region"]) or None
    remarks = tuple(str(r) for r in data["remarks"])
    return PatternRecord(diagrams=diagrams, order=order, source=source, amounts=amounts,
                         region=region, remarks=remarks)


def _pattern_to_arrays(pattern: SitePattern | None) -> dict[str, np.ndarray]:
    # The sites travel with the record so that a report can draw them without measuring the
    # image again (the costliest part of a detail view otherwise).
    if pattern is None:
        return {}
    pixel = np.nan if pattern.pixel_size_nm is None else float(pattern.pixel_size_nm)
    return {"p_xy": pattern.xy, "p_border": pattern.border, "p_shape": np.array(pattern.shape),
            "p_spacing": np.array(pattern.spacing), "p_polarity": np.array(pattern.polarity),
            "p_pixel_size_nm": np.array(pixel),
            "p_region": np.array(pattern.region or [], dtype=int),
            "p_preferred_spacing": np.array(pattern.preferred_spacing)}


def _pattern_from_arrays(data, source: str) -> SitePattern:
    pixel = float(data["p_pixel_size_nm"])
    return SitePattern(xy=data["p_xy"], spacing=float(data["p_spacing"]),
                       polarity=str(data["p_polarity"]), border=data["p_border"],
                       shape=tuple(int(v) for v in data["p_shape"]),
                       pixel_size_nm=None if np.isnan(pixel) else pixel, source=source,
                       region=tuple(int(v) for v in data["p_region"]) or None,
                       preferred_spacing=bool(data["p_preferred_spacing"]))
