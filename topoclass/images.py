"""Read micrographs: any PNG, JPEG or TIFF becomes a float32 2-D image in [0, 1].

This module guards the door of the pipeline. Every bad file raises
:class:`topoclass.errors.ImageReadError` with one line that names the file and says what to do;
nothing else escapes :func:`read_micrograph`, whatever the bytes of the file are.

Scaling rules
-------------
* ``bool`` (bilevel) images: False -> 0, True -> 1.
* ``uint8`` and ``uint16`` by the full range of the stored bit depth (``v / 255``,
  ``v / 65535``; a TIFF that declares e.g. 12 bits per sample is divided by ``2**12 - 1``).
* floats, signed and wider integers by their finite minimum and maximum (their "full range"
  says nothing about the exposure). Non-finite pixels are first replaced by the finite median.
* colour (RGB / RGBA / palette) to luminance with :func:`skimage.color.rgb2gray` after scaling;
  alpha is dropped.
"""

from __future__ import annotations

import logging
import os
import threading
import warnings
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from topoclass.errors import ImageReadError

IMAGE_EXTENSIONS: tuple[str, ...] = (".png", ".jpg", ".jpeg", ".tif", ".tiff")
LIST_EXTENSIONS: tuple[str, ...] = (".txt", ".lst")
MIN_SIDE = 32  # fewer pixels than this per side cannot hold a measurable lattice

#: The first four bytes of a TIFF: classic and BigTIFF, either byte order.
TIFF_SIGNATURES = (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")
_PIL_FORMATS = ("PNG", "JPEG", "TIFF")  # never let PIL hand a file to e.g. Ghostscript
# Screen and print defaults (72, 96, 300 dpi ...) are not a calibration; no nanopattern
# micrograph has pixels this large, so such values are ignored rather than reported.
_MAX_PLAUSIBLE_PIXEL_NM = 10_000.0
_NM_PER_UNIT = {
    "nm": 1.0, "nanometer": 1.0, "nanometre": 1.0,
    "um": 1e3, "µm": 1e3, "μm": 1e3, "micron": 1e3, "microns": 1e3,
    "micrometer": 1e3, "micrometre": 1e3, "\\u00b5m": 1e3,
    "mm": 1e6, "millimeter": 1e6, "millimetre": 1e6,
    "cm": 1e7, "centimeter": 1e7, "centimetre": 1e7,
}  # fmt: skip
# Global decoder state (PIL's limits, tifffile's logger, warning filters) is changed only
# while this lock is held, so threads reading at the same time do not undo each other.
_DECODER_LOCK = threading.RLock()


class ImageReadWarning(UserWarning):
    """A micrograph was read, but not all of the file was used as it stands (see the message)."""


@dataclass(frozen=True)
class Micrograph:
    """A micrograph as the pipeline sees it.

    Attributes
    ----------
    image : ndarray of float32, shape (rows, cols)
        Intensities in [0, 1] (see the module notes for the scaling).
    pixel_size_nm : float or None
        Pixel size in nanometres when the file records it (TIFF resolution tags or ImageJ
        metadata), else None.
    source : str
        The path the image was read from.
    n_pages : int
        Number of pages (frames) in the file; only the first is used.
    dtype : str
        Data type of the stored pixels before scaling, e.g. ``"uint16"``.
    colour : bool
        True when the file held a colour image that was turned into luminance.
    notes : tuple of str
        Everything that was warned about while reading (also issued as ImageReadWarning).
    """

    image: np.ndarray
    pixel_size_nm: float | None
    source: str
    n_pages: int = 1
    dtype: str = "float32"
    colour: bool = False
    notes: tuple[str, ...] = field(default=())

    @property
    def shape(self) -> tuple[int, int]:
        """(rows, cols) of the image."""
        return self.image.shape  # type: ignore[return-value]


def read_micrograph(path: str | Path, *, max_pixels: int = 100_000_000) -> Micrograph:
    """Read one micrograph file as a float32 2-D image in [0, 1].

    Parameters
    ----------
    path : str or Path
        A PNG, JPEG or TIFF file (8-bit, 16-bit or float; grey, RGB or RGBA; for a multi-page
        TIFF the first page is used, with a warning).
    max_pixels : int
        Refuse images with more pixels than this, judged from the file header before the pixels
        are decoded (protects against decompression bombs). Raise it for trusted large files.

    Returns
    -------
    Micrograph

    Raises
    ------
    ImageReadError
        For every file that cannot be used; the message is one line naming the file.
    """
    path = Path(path)
    check_image_file(path)
    notes: list[str] = []
    if is_tiff(path):
        raw, info = _read_tiff(path, max_pixels, notes)
    else:
        raw, info = _read_pil(path, max_pixels, notes)
    if info["n_pages"] > 1:
        notes.append(f"{path}: has {info['n_pages']} pages; only the first page was used")
    image = to_unit_grey(raw, path, info, notes)
    for note in notes:
        warnings.warn(note, ImageReadWarning, stacklevel=2)
    return Micrograph(
        image=image,
        pixel_size_nm=info.get("pixel_size_nm"),
        source=str(path),
        n_pages=info["n_pages"],
        dtype=info["dtype"],
        colour=raw.ndim == 3 and raw.shape[-1] >= 3,
        notes=tuple(notes),
    )


def collect_image_paths(inputs: Sequence[str | Path]) -> list[Path]:
    """Expand files, folders and list files into a list of image paths.

    Parameters
    ----------
    inputs : sequence of str or Path
        Each is an image file, a folder (searched recursively for files with an extension in
        :data:`IMAGE_EXTENSIONS`; hidden files and folders skipped; sorted), or a ``.txt`` /
        ``.lst`` file listing one path per line (relative to the list file; blank lines and
        lines starting with ``#`` skipped). A line of a list file may also name a folder.

    Returns
    -------
    list of Path
        In input order, duplicates (same resolved path) removed, first occurrence kept. Paths
        listed in a list file are returned even when missing, so that a batch reports them one
        by one instead of stopping.

    Raises
    ------
    ImageReadError
        When a folder or list file given as input does not exist or cannot be read (a missing
        input with an image extension is returned, like a missing entry of a list file).
    """
    if isinstance(inputs, str | Path):
        inputs = [inputs]
    found: list[Path] = []
    for item in inputs:
        path = Path(os.path.expanduser(item))
        if path.is_dir():
            found.extend(images_in_folder(path))
        elif path.is_file() and path.suffix.lower() in LIST_EXTENSIONS:
            found.extend(_images_in_list(path))
        elif path.exists() or path.suffix.lower() in IMAGE_EXTENSIONS:
            # An explicit file, even a missing one: reading it later says what is wrong, as a
            # row of its own, so one mistyped name does not stop the batch.
            found.append(path)
        else:
            raise ImageReadError(f"{path}: not found; check the path (a file, folder or list)")
    unique: list[Path] = []
    seen: set[Path] = set()
    for path in found:
        key = path.resolve()
        if key not in seen:
            seen.add(key)
            unique.append(path)
    return unique


# --------------------------------------------------------------------------- file checks
# The checks, decoding rules and scaling below are public because :mod:`topoclass.bigimage`
# reads the same files in pieces and must judge and scale them exactly as a whole read does.


def check_image_file(path: Path) -> None:
    """Raise :class:`ImageReadError` unless ``path`` is a readable, non-empty image file."""
    if not path.exists():
        raise ImageReadError(f"{path}: file not found; check the path")
    if path.is_dir():
        raise ImageReadError(
            f"{path}: is a folder, not an image file; give one image file "
            "(batch scoring accepts folders)"
        )
    suffix = path.suffix.lower()
    if suffix not in IMAGE_EXTENSIONS:
        kind = f"'{path.suffix}'" if path.suffix else "without an extension"
        raise ImageReadError(
            f"{path}: unsupported file type {kind}; save it as PNG, JPEG or TIFF "
            f"({' '.join(IMAGE_EXTENSIONS)})"
        )
    try:
        size = path.stat().st_size
        if size and not os.access(path, os.R_OK):
            raise PermissionError
    except PermissionError:
        raise ImageReadError(f"{path}: cannot be read (permission denied); check access") from None
    except OSError as exc:
        raise ImageReadError(f"{path}: cannot be read ({exc.strerror}); check the file") from None
    if size == 0:
        raise ImageReadError(
            f"{path}: file is empty (0 bytes); the copy or export probably failed, copy it again"
        )


def is_tiff(path: Path) -> bool:
    """Whether the file starts like a TIFF (by its bytes, not its name)."""
    with path.open("rb") as fh:
        return fh.read(4) in TIFF_SIGNATURES


def check_min_side(path: Path, rows: int, cols: int) -> None:
    """Raise :class:`ImageReadError` for an image too small to hold a lattice."""
    if rows < MIN_SIDE or cols < MIN_SIDE:
        raise ImageReadError(
            f"{path}: only {cols}x{rows} pixels; at least {MIN_SIDE}x{MIN_SIDE} are needed "
            "to see a lattice, use a larger image"
        )


def check_single_plane(path: Path, depth: int, rows: int, cols: int) -> None:
    """Raise :class:`ImageReadError` for a TIFF page that holds a volume, not one image."""
    if depth > 1:
        raise ImageReadError(
            f"{path}: holds a {depth}x{rows}x{cols} volume, not a 2-D image; "
            "save one slice as its own file"
        )


def _check_header(path: Path, rows: int, cols: int, max_pixels: int) -> None:
    check_min_side(path, rows, cols)
    n = rows * cols
    if n > max_pixels:
        raise ImageReadError(
            f"{path}: {cols}x{rows} = {n:,} pixels is more than the limit of {max_pixels:,}; "
            "if the file is trusted, raise the limit with --max-pixels or crop the image"
        )


def damaged_file_error(path: Path, exc: BaseException) -> ImageReadError:
    """The one-line error for a file a decoder failed on, with the decoder's reason."""
    reason = " ".join(str(exc).split())[:160] or type(exc).__name__
    return ImageReadError(
        f"{path}: damaged or truncated image ({reason}); export or copy the file again"
    )


# --------------------------------------------------------------------------- TIFF


def _read_tiff(path: Path, max_pixels: int, notes: list[str]) -> tuple[np.ndarray, dict]:
    import tifffile

    with decoder_guard() as log:
        try:
            with tifffile.TiffFile(path) as tif:
                page = tif.pages.first
                n_pages = len(tif.pages)
                s_separate, depth, rows, cols, s_contig = page.shaped
                samples = s_separate * s_contig
                check_single_plane(path, depth, rows, cols)
                photometric = int(page.photometric)
                check_channels(path, samples, photometric, rows, cols, page.extrasamples)
                _check_header(path, rows, cols, max_pixels)
                check_tiff_extent(path, page, tif.filehandle.size)
                info = {
                    "n_pages": n_pages,
                    "dtype": str(page.dtype),
                    "pixel_size_nm": tiff_pixel_size_nm(page, tif, notes, path),
                    "bits": int(page.bitspersample),
                }
                if photometric not in (0, 1, 2, 3):  # CMYK, YCbCr, CIELab ...: let PIL convert
                    raise _NeedsPil(f"photometric {page.photometric.name}")
                try:
                    data = page.asarray()
                except ValueError as exc:
                    if "imagecodecs" in str(exc):
                        raise _NeedsPil(str(exc)) from None
                    raise
                colormap = page.colormap
        except ImageReadError:
            raise
        except _NeedsPil as why:
            return _read_pil(path, max_pixels, notes, tiff_reason=str(why))
        except Exception as exc:  # noqa: BLE001 - any parser failure on untrusted bytes
            detail = log[0] if log else exc
            raise damaged_file_error(path, detail) from None
    data = np.asarray(data)
    if s_separate > 1:
        data = np.moveaxis(data, 0, -1)
    data = data.reshape(rows, cols, samples) if samples > 1 else data.reshape(rows, cols)
    if photometric == 3:  # palette: indices into a 16-bit colour map
        if colormap is None:
            raise ImageReadError(f"{path}: palette image without a colour map; save it as grey")
        data = np.moveaxis(colormap[:, np.clip(data, 0, colormap.shape[1] - 1)], 0, -1)
        info["dtype"], info["bits"] = "uint16", 16
    elif photometric == 0:  # white is zero: invert so that bright stays bright
        data = invert_grey(data, info["bits"])
    return data, info


def check_channels(path: Path, samples: int, photometric: int, rows: int, cols: int,
                   extrasamples) -> None:
    """Raise :class:`ImageReadError` unless the samples per pixel make a grey or colour image."""
    if samples == 1:
        return
    if photometric == 2 and samples in (3, 4):
        return
    if photometric in (0, 1) and samples == 2 and len(extrasamples) == 1:
        return  # grey + alpha
    if photometric in (5, 6, 8, 9, 10) and samples in (3, 4):
        return  # CMYK, YCbCr, Lab: converted by PIL
    raise ImageReadError(
        f"{path}: holds {samples} channels of {rows}x{cols} pixels, not a grey or colour "
        "image; save the channel to analyse as a single grey image"
    )


def check_tiff_extent(path: Path, page, file_size: int) -> None:
    """Raise :class:`ImageReadError` if the page's pixel data runs past the end of the file."""
    # tifffile would raise on a short read, but checking the strip table first gives a clear
    # message and never allocates for data that is not there.
    ends = [o + n for o, n in zip(page.dataoffsets, page.databytecounts, strict=False) if n]
    if not ends or max(ends) > file_size:
        raise ImageReadError(
            f"{path}: truncated TIFF (pixel data ends beyond the {file_size:,}-byte file); "
            "copy or export the file again"
        )


def tiff_pixel_size_nm(page, tif, notes: list[str], path: Path) -> float | None:
    """The pixel size in nm a TIFF page records, or None; a garbled tag adds a note."""
    # A garbled calibration must not cost the user the image: the pixel size is optional, but
    # the row says it was dropped, so a missing size in nm is never a silent surprise.
    try:
        return _tiff_pixel_size(page, tif, notes, path)
    except _GarbledCalibration as why:
        notes.append(f"{path}: its pixel-size tags are unreadable ({why}); the pixel size is "
                     "left unknown (give it with the pixel-size setting if needed)")
        return None


class _GarbledCalibration(Exception):
    """A TIFF resolution tag is present but cannot be read as a pixel size."""


def _tiff_pixel_size(page, tif, notes: list[str], path: Path) -> float | None:
    tags = page.tags
    if "XResolution" not in tags:
        return None
    try:
        num, den = tags["XResolution"].value
        per_unit = num / den
    except (TypeError, ValueError, ZeroDivisionError) as exc:
        raise _GarbledCalibration(f"XResolution {tags['XResolution'].value!r}") from exc
    if not np.isfinite(per_unit) or per_unit <= 0:
        raise _GarbledCalibration(f"XResolution {num}/{den}")
    try:
        unit = int(tags["ResolutionUnit"].value) if "ResolutionUnit" in tags else 2  # default
    except (TypeError, ValueError) as exc:
        raise _GarbledCalibration(f"ResolutionUnit {tags['ResolutionUnit'].value!r}") from exc
    if unit == 2:
        nm_per_unit = 25.4e6  # inch
    elif unit == 3:
        nm_per_unit = 1e7  # centimetre
    else:
        # No unit in the tags; ImageJ / Fiji put it in their own metadata (pixels per unit).
        try:
            meta = tif.imagej_metadata or {}
        except (ValueError, TypeError, KeyError) as exc:
            raise _GarbledCalibration("ImageJ metadata") from exc
        nm_per_unit = _NM_PER_UNIT.get(str(meta.get("unit", "")).strip().lower())
        if nm_per_unit is None:
            return None
    size = nm_per_unit / per_unit
    if size >= _MAX_PLAUSIBLE_PIXEL_NM:
        return None
    if "YResolution" in tags:
        try:
            ynum, yden = tags["YResolution"].value
            y_size = nm_per_unit / (ynum / yden)
            if abs(y_size - size) > 0.01 * size:
                notes.append(
                    f"{path}: pixels are not square ({size:.4g} x {y_size:.4g} nm); "
                    "the horizontal size is used"
                )
        except (TypeError, ValueError, ZeroDivisionError):
            notes.append(f"{path}: its YResolution tag is unreadable; the horizontal pixel "
                         "size is used")
    return float(size)


def invert_grey(data: np.ndarray, bits: int) -> np.ndarray:
    """Turn white-is-zero data over, within its stored bit depth, so bright stays bright."""
    if data.dtype == bool:
        return ~data
    if np.issubdtype(data.dtype, np.unsignedinteger):
        top = _unsigned_top(data.dtype, bits)
        return (top - data.astype(np.float64)).astype(data.dtype)
    return -data.astype(np.float64)


class _NeedsPil(Exception):
    """tifffile cannot decode this TIFF without extra codecs; PIL may."""


# --------------------------------------------------------------------------- PNG / JPEG (PIL)


def _read_pil(
    path: Path, max_pixels: int, notes: list[str], tiff_reason: str | None = None
) -> tuple[np.ndarray, dict]:
    from PIL import Image, UnidentifiedImageError

    with decoder_guard():
        try:
            Image.init()
            im = Image.open(path, formats=[f for f in _PIL_FORMATS if f in Image.ID])
        except UnidentifiedImageError:
            if tiff_reason:
                raise ImageReadError(
                    f"{path}: TIFF cannot be decoded here ({tiff_reason}); save it uncompressed "
                    "or with deflate (zip) compression"
                ) from None
            raise ImageReadError(
                f"{path}: not a readable PNG, JPEG or TIFF image (the content is something "
                "else); export it again as PNG or TIFF"
            ) from None
        except Exception as exc:  # noqa: BLE001 - any parser failure on untrusted bytes
            raise damaged_file_error(path, exc) from None
        with im:
            cols, rows = im.size
            _check_header(path, rows, cols, max_pixels)
            try:
                n_pages = int(getattr(im, "n_frames", 1))
                im.seek(0)
                im.load()  # PIL is lazy: only load() finds a truncated file
                data, dtype = _pil_to_array(im)
            except ImageReadError:
                raise
            except Exception as exc:  # noqa: BLE001
                if tiff_reason:
                    raise ImageReadError(
                        f"{path}: TIFF cannot be decoded here ({tiff_reason}); save it "
                        "uncompressed or with deflate (zip) compression"
                    ) from None
                raise damaged_file_error(path, exc) from None
    if data.shape[:2] != (rows, cols):
        raise damaged_file_error(path, ValueError("decoded size differs from the header"))
    return data, {"n_pages": n_pages, "dtype": dtype, "pixel_size_nm": None, "bits": 0}


def _pil_to_array(im) -> tuple[np.ndarray, str]:
    mode = im.mode
    if mode == "1":
        return np.asarray(im, dtype=bool), "bool"
    if mode in ("L", "F") or mode.startswith("I"):
        data = np.asarray(im)
        if data.dtype.kind == "u" and data.dtype.itemsize == 2:
            data = data.astype(np.uint16)  # native byte order
        return data, str(data.dtype)
    if mode in ("LA", "La"):
        return np.asarray(im.convert("LA"))[..., 0], "uint8"
    if mode in ("RGBA", "RGBa", "PA", "P"):
        return np.asarray(im.convert("RGBA")), "uint8"
    return np.asarray(im.convert("RGB")), "uint8"


# --------------------------------------------------------------------------- scaling


def to_unit_grey(raw: np.ndarray, path: Path, info: dict, notes: list[str]) -> np.ndarray:
    """Decoded pixels as a float32 grey image in [0, 1], by the module's scaling rules.

    ``info["bits"]`` is the stored bit depth (0 when unknown); notes on replaced pixels are
    appended to ``notes``. A uniform or unsupported image raises :class:`ImageReadError`.
    """
    from skimage.color import rgb2gray

    data = np.asarray(raw)
    if data.ndim == 3 and data.shape[-1] == 2:
        data = data[..., 0]  # grey + alpha
    if data.ndim == 3:
        data = data[..., :3]  # alpha dropped
    if data.ndim != 2 and not (data.ndim == 3 and data.shape[-1] == 3):
        raise ImageReadError(
            f"{path}: decoded to shape {data.shape}, not a grey or colour image; "
            "save it as a single grey image"
        )
    if data.dtype == bool:
        scaled = data.astype(np.float64)
    elif data.dtype.kind == "u" and data.dtype.itemsize <= 2:
        scaled = data / float(_unsigned_top(data.dtype, info.get("bits", 0)))
        np.clip(scaled, 0.0, 1.0, out=scaled)  # values above a declared bit depth
    elif data.dtype.kind in "uif":
        scaled = _stretch(data.astype(np.float64), path, notes)
    else:
        raise ImageReadError(
            f"{path}: pixel type {data.dtype} is not supported; save it as 8- or 16-bit grey"
        )
    if scaled.ndim == 3:
        scaled = rgb2gray(scaled)
    image = scaled.astype(np.float32)
    low, high = float(image.min()), float(image.max())
    if low == high:
        raise ImageReadError(
            f"{path}: every pixel has the same value ({low:.4g}); nothing to measure, "
            "check the exposure or the export"
        )
    return image


def _stretch(data: np.ndarray, path: Path, notes: list[str]) -> np.ndarray:
    finite = np.isfinite(data)
    n_bad = data.size - int(np.count_nonzero(finite))
    if n_bad == data.size:
        raise ImageReadError(
            f"{path}: holds no finite pixel values (all NaN or infinite); export it again"
        )
    if n_bad:
        fill = float(np.median(data[finite]))
        data = np.where(finite, data, fill)
        notes.append(
            f"{path}: {n_bad} non-finite pixel(s) (NaN or infinite) replaced by the median "
            f"{fill:.4g}"
        )
    low, high = float(data.min()), float(data.max())
    if low == high:
        raise ImageReadError(
            f"{path}: every pixel has the same value ({low:.4g}); nothing to measure, "
            "check the exposure or the export"
        )
    # Subtract first, then divide: keeps precision for large offsets (e.g. int32 counts).
    return (data - low) / (high - low)


def _unsigned_top(dtype: np.dtype, bits: int) -> int:
    full = np.iinfo(dtype).bits
    if 0 < bits < full:
        return 2**bits - 1  # e.g. 12-bit camera data stored as uint16
    return int(np.iinfo(dtype).max)


@contextmanager
def decoder_guard() -> Iterator[list[str]]:
    """Hold the decoders' global settings the way this module needs them.

    PIL's own decompression-bomb check is turned off (``max_pixels`` is checked here instead,
    from the header, so the user's limit is the one that counts), truncated images stay an
    error, and warnings or log lines from the decoders are collected instead of printed: the
    command line must show one line per bad file.
    """
    from PIL import Image, ImageFile

    log: list[str] = []

    class _Collect(logging.Handler):
        def emit(self, record: logging.LogRecord) -> None:
            log.append(record.getMessage())

    logger = logging.getLogger("tifffile")
    handler = _Collect(level=logging.WARNING)
    with _DECODER_LOCK:
        saved = (Image.MAX_IMAGE_PIXELS, ImageFile.LOAD_TRUNCATED_IMAGES, logger.propagate)
        Image.MAX_IMAGE_PIXELS = None
        ImageFile.LOAD_TRUNCATED_IMAGES = False
        logger.propagate = False
        logger.addHandler(handler)
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                yield log
        finally:
            logger.removeHandler(handler)
            Image.MAX_IMAGE_PIXELS, ImageFile.LOAD_TRUNCATED_IMAGES, logger.propagate = saved


# --------------------------------------------------------------------------- collecting paths


def images_in_folder(folder: Path) -> list[Path]:
    """Image files below a folder (any depth; hidden files and folders left out), sorted."""
    found = []
    for root, dirs, files in os.walk(folder):
        dirs[:] = [d for d in dirs if not d.startswith(".")]
        for name in files:
            # "._name" files are macOS resource forks, not images
            if not name.startswith(".") and Path(name).suffix.lower() in IMAGE_EXTENSIONS:
                found.append(Path(root) / name)
    return sorted(found)


def _images_in_list(list_file: Path) -> list[Path]:
    try:
        text = list_file.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise ImageReadError(
            f"{list_file}: list file is not UTF-8 text; save it as UTF-8"
        ) from None
    except OSError as exc:
        raise ImageReadError(f"{list_file}: cannot be read ({exc.strerror})") from None
    base = list_file.parent
    found: list[Path] = []
    for line in text.splitlines():
        entry = line.strip()
        if not entry or entry.startswith("#"):
            continue
        path = Path(os.path.expanduser(entry))
        path = path if path.is_absolute() else base / path
        try:
            is_dir = path.is_dir()
        except (OSError, ValueError):  # e.g. a line too long to be a file name
            is_dir = False
        if is_dir:
            found.extend(images_in_folder(path))
        else:
            found.append(path)
    return found
