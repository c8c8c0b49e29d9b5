"""Image files → per-image :class:`~topoclass.vectorize.Texture` records, cached and in parallel.

Stage 5 of the pipeline. Each micrograph is read, its sites found, its persistence diagrams and
order measures computed once; the result is cached on disk, keyed by the file's content hash,
the settings that shaped it and the package version, so a changed setting recomputes and an
unchanged one never does. One bad image never stops a batch: it comes back as a failed
:class:`TextureResult` with a one-line message.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import tempfile
import warnings
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from topoclass import __version__
from topoclass._progress import progress_bar
from topoclass.errors import TopoclassError
from topoclass.images import Micrograph, read_micrograph
from topoclass.order import order_measures
from topoclass.persistence import Diagrams, pattern_persistence
from topoclass.sites import SitePattern, find_sites
from topoclass.vectorize import Texture

#: Bumped whenever the cached record layout changes, so old cache entries are never misread.
_CACHE_LAYOUT = 2


@dataclass(frozen=True)
class FeatureSettings:
    """Everything that shapes a :class:`Texture`; part of the cache key.

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
    """

    polarity: str = "auto"
    max_scale: float = 2.5
    pixel_size_nm: float | None = None
    max_pixels: int = 100_000_000

    def key(self) -> str:
        """A short stable hash of what shapes a texture, the package version and cache layout.

        ``max_pixels`` is left out: it decides whether an image is read, not what comes out.
        """
        shaping = dataclasses.asdict(self)
        shaping.pop("max_pixels")
        payload = json.dumps(
            {**shaping, "version": __version__, "layout": _CACHE_LAYOUT}, sort_keys=True
        )
        return hashlib.sha256(payload.encode()).hexdigest()[:16]


@dataclass(frozen=True)
class TextureResult:
    """The outcome for one image: a texture, or the reason there is none."""

    path: Path
    sha256: str | None
    texture: Texture | None
    error: str | None = None
    notes: tuple[str, ...] = ()

    @property
    def ok(self) -> bool:
        return self.texture is not None


def default_cache_dir() -> Path:
    """``$TOPOCLASS_CACHE``, else ``$XDG_CACHE_HOME/topoclass``, else ``~/.cache/topoclass``."""
    if os.environ.get("TOPOCLASS_CACHE"):
        return Path(os.environ["TOPOCLASS_CACHE"])
    base = os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache"
    return Path(base) / "topoclass"


def file_sha256(path: str | Path) -> str:
    """SHA-256 of a file's bytes, read in chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


@dataclass(frozen=True)
class ImageMeasurement:
    """Every stage's output for one micrograph: the image, its sites and its texture."""

    micrograph: Micrograph
    pattern: SitePattern
    texture: Texture


def measure_image(path: str | Path, settings: FeatureSettings | None = None) -> ImageMeasurement:
    """Read one micrograph, find its sites, and compute persistence and order measures.

    Raises
    ------
    TopoclassError
        When the file cannot be read or holds no usable lattice pattern.
    """
    settings = settings or FeatureSettings()
    micrograph = read_micrograph(path, max_pixels=settings.max_pixels)
    pixel_size = micrograph.pixel_size_nm
    if pixel_size is None:
        pixel_size = settings.pixel_size_nm
    pattern = find_sites(
        micrograph.image, polarity=settings.polarity, pixel_size_nm=pixel_size, source=str(path)
    )
    diagrams = pattern_persistence(pattern, max_scale=settings.max_scale)
    texture = Texture(diagrams=diagrams, order=order_measures(pattern), source=str(path))
    return ImageMeasurement(micrograph, pattern, texture)


def extract_texture(path: str | Path, settings: FeatureSettings | None = None) -> Texture:
    """The :class:`Texture` of one micrograph (no cache); see :func:`measure_image`."""
    return measure_image(path, settings).texture


def compute_textures(
    paths: Sequence[str | Path],
    settings: FeatureSettings | None = None,
    *,
    cache_dir: str | Path | None = None,
    jobs: int = 1,
    progress: bool = False,
    description: str = "features",
) -> list[TextureResult]:
    """Textures of many images, in input order; see :func:`iter_textures`."""
    return list(
        iter_textures(
            paths, settings, cache_dir=cache_dir, jobs=jobs, progress=progress,
            description=description,
        )
    )


def iter_textures(
    paths: Sequence[str | Path],
    settings: FeatureSettings | None = None,
    *,
    cache_dir: str | Path | None = None,
    jobs: int = 1,
    progress: bool = False,
    description: str = "features",
) -> Iterator[TextureResult]:
    """Yield a :class:`TextureResult` per path, in input order, as images finish.

    Parameters
    ----------
    paths : sequence of path-like
        Image files.
    settings : FeatureSettings, optional
        Site-finding and persistence settings (defaults when omitted).
    cache_dir : path-like or None
        Folder of the on-disk cache; ``None`` uses :func:`default_cache_dir`. Pass ``False``-y
        ``""`` to disable caching.
    jobs : int
        Worker processes (joblib); 1 runs in this process. Each worker's BLAS/OpenMP pools are
        limited to one thread so that ``jobs`` workers do not oversubscribe the cores.
    progress : bool
        Show a progress bar (images done, rate, time left) on stderr.
    """
    settings = settings or FeatureSettings()
    paths = [Path(p) for p in paths]
    if cache_dir is None:
        cache_dir = default_cache_dir()
    cache = _TextureCache(Path(cache_dir), settings) if cache_dir != "" else None
    work = _Worker(settings, cache)
    if jobs == 1 or len(paths) <= 1:
        results: Iterator[TextureResult] = (work(p) for p in paths)
    else:
        from joblib import Parallel, delayed

        parallel = Parallel(n_jobs=jobs, return_as="generator", batch_size="auto")
        results = parallel(delayed(_limited)(work, p) for p in paths)
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

    def __init__(self, settings: FeatureSettings, cache: _TextureCache | None):
        self.settings = settings
        self.cache = cache

    def __call__(self, path: Path) -> TextureResult:
        try:
            sha = file_sha256(path)
        except OSError as exc:
            reason = exc.strerror or type(exc).__name__
            return TextureResult(path, None, None, f"{path}: cannot read the file ({reason}); "
                                 "check that it exists and is readable")
        if self.cache is not None:
            hit = self.cache.get(sha, path)
            if hit is not None:
                texture, notes = hit
                return TextureResult(path, sha, texture, notes=notes)
        # Reader warnings (multi-page TIFF, non-finite pixels) belong in the image's own row,
        # not on a terminal shared by a whole batch.
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                texture = extract_texture(path, self.settings)
            except TopoclassError as exc:
                return TextureResult(path, sha, None, " ".join(str(exc).split()))
            except Exception as exc:  # a bug or an unforeseen file: report it, keep going
                message = f"{path}: unexpected {type(exc).__name__}: {exc}"
                return TextureResult(path, sha, None, " ".join(message.split()))
        notes = tuple(dict.fromkeys(" ".join(str(w.message).split()) for w in caught))
        if self.cache is not None:
            self.cache.put(sha, texture, notes)
        return TextureResult(path, sha, texture, notes=notes)


def _limited(work: Callable, path: Path) -> TextureResult:
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        return work(path)


class _TextureCache:
    """One ``.npz`` file per (content hash, settings key); loaded without pickle."""

    def __init__(self, root: Path, settings: FeatureSettings):
        self.folder = root / settings.key()

    def get(self, sha: str, path: Path) -> tuple[Texture, tuple[str, ...]] | None:
        file = self.folder / f"{sha}.npz"
        if not file.exists():
            return None
        try:
            with np.load(file, allow_pickle=False) as data:
                notes = tuple(str(n) for n in data["notes"])
                return _texture_from_arrays(data, str(path)), notes
        except Exception:  # a damaged entry is recomputed, never trusted
            return None

    def put(self, sha: str, texture: Texture, notes: tuple[str, ...] = ()) -> None:
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            # Write to a temporary file and rename, so a concurrent reader never sees half a file.
            fd, tmp = tempfile.mkstemp(dir=self.folder, suffix=".npz.tmp")
            with os.fdopen(fd, "wb") as fh:
                np.savez(fh, notes=np.array(notes, dtype=str), **_texture_to_arrays(texture))
            os.replace(tmp, self.folder / f"{sha}.npz")
        except OSError:
            pass  # the cache is an optimisation; a read-only disk must not fail the batch


def _texture_to_arrays(texture: Texture) -> dict[str, np.ndarray]:
    arrays = {f"d_{k}": v for k, v in texture.diagrams.to_dict().items()}
    keys = list(texture.order)
    arrays["order_keys"] = np.array(keys, dtype=str)
    arrays["order_values"] = np.array([texture.order[k] for k in keys], dtype=float)
    return arrays


def _texture_from_arrays(data, source: str) -> Texture:
    diagrams = Diagrams.from_dict({k[2:]: data[k] for k in data.files if k.startswith("d_")})
    order = dict(zip(data["order_keys"].tolist(), data["order_values"].tolist(), strict=True))
    return Texture(diagrams=diagrams, order=order, source=source)
