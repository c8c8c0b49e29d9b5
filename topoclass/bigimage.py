"""Read a large micrograph piece by piece: any rectangle of it as a float32 image in [0, 1].

Stage 1 of the pipeline for images too large to hold whole (stitched mosaics, large-area
scans). :func:`open_large_image` looks at the file once and returns a :class:`LargeImage` that
reads rectangles on demand, so peak memory grows with the rectangle, not with the image:

* an uncompressed, contiguous TIFF (classic or BigTIFF) is memory-mapped;
* any other tiled or strip TIFF that tifffile can decode is read segment by segment: only the
  strips or tiles a rectangle touches are read and decoded;
* a PNG or JPEG (which cannot be read in pieces), or a TIFF that cannot be read piecewise
  (palette, planes stored apart, a codec that needs PIL), is read whole with
  :func:`topoclass.images.read_micrograph` only when that fits ``memory_limit_mb``, and kept in
  a temporary memory-mapped file for the rest of the run.

Pieces are scaled by the rules of :mod:`topoclass.images` (full range of the stored bit depth
for 8- and 16-bit data, so a piece reads exactly as in the whole image); float and wide-integer
TIFFs read in pieces are stretched piece by piece, by each piece's own minimum and maximum.
Every bad file raises :class:`topoclass.errors.ImageReadError` with one line naming it.
"""

from __future__ import annotations

import math
import os
import shutil
import tempfile
import threading
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from topoclass.errors import ImageReadError, TopoclassError
from topoclass.images import (
    Micrograph,
    check_channels,
    check_image_file,
    check_min_side,
    check_single_plane,
    check_tiff_extent,
    damaged_file_error,
    decoder_guard,
    invert_grey,
    is_tiff,
    read_micrograph,
    tiff_pixel_size_nm,
    to_unit_grey,
)

#: Default limit on the memory a whole-file read may take (PNG, JPEG, TIFF not readable in
#: pieces), in MB; the map of a 144-megapixel TIFF stays within 2 GB peak RSS.
DEFAULT_MEMORY_LIMIT_MB = 1500

# Bytes per pixel a whole read takes at its peak: the decoded pixels (up to 4 bytes of RGBA),
# the float64 scaling copy and the float32 result (topoclass.images.to_unit_grey).
_WHOLE_READ_BYTES_PER_PIXEL = 4 + 8 + 4


@dataclass
class LargeImage:
    """A micrograph file read a rectangle at a time (see :func:`open_large_image`).

    Attributes
    ----------
    path : Path
        The file.
    shape : (rows, cols)
        Size of the whole image.
    pixel_size_nm : float or None
        Pixel size when the file records it.
    access : {"memmap", "segments", "whole"}
        How rectangles are read (memory-mapped pixels, decoded strips or tiles, or a copy
        of the whole image in a temporary file).
    dtype : str
        Stored pixel type before scaling.
    notes : tuple of str
        What was warned about while opening the file.
    """

    path: Path
    shape: tuple[int, int]
    pixel_size_nm: float | None
    access: str
    dtype: str
    notes: tuple[str, ...] = ()
    _info: dict = field(default_factory=dict, repr=False)
    _spill: str | None = field(default=None, repr=False)  # npy copy of a whole read
    _handle: object = field(default=None, repr=False, compare=False)

    def read(self, box: tuple[int, int, int, int]) -> Micrograph:
        """The rectangle ``(x0, y0, x1, y1)`` (half-open, pixels) as a :class:`Micrograph`.

        Raises
        ------
        ImageReadError
            When the piece cannot be decoded, or holds one grey level only.
        """
        x0, y0, x1, y1 = (int(v) for v in box)
        rows, cols = self.shape
        if not (0 <= x0 < x1 <= cols and 0 <= y0 < y1 <= rows):
            raise ValueError(f"box {box} is not inside the image of {cols}x{rows} pixels")
        raw = self._raw(x0, y0, x1, y1)
        notes: list[str] = []
        if self.access == "whole":  # the copy is scaled already, as the whole file was
            image = raw.astype(np.float32, copy=False)
            if float(image.min()) == float(image.max()):
                raise ImageReadError(
                    f"{self.path}: every pixel of tile {x0},{y0},{x1},{y1} has the same value; "
                    "nothing to measure there"
                )
        else:
            image = to_unit_grey(raw, self.path, self._info, notes)
        return Micrograph(image=image, pixel_size_nm=self.pixel_size_nm,
                          source=f"{self.path} [tile {x0},{y0},{x1},{y1}]",
                          dtype=self.dtype, notes=tuple(notes))

    def close(self) -> None:
        """Close the file and remove the temporary copy of a whole read (if any)."""
        handle, self._handle = self._handle, None
        if handle is not None and hasattr(handle, "close"):
            handle.close()
        if self._spill is not None:
            shutil.rmtree(Path(self._spill).parent, ignore_errors=True)
            self._spill = None

    def __enter__(self) -> LargeImage:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __getstate__(self) -> dict:
        # Worker processes reopen the file themselves: an open handle does not travel.
        state = dict(self.__dict__)
        state["_handle"] = None
        return state

    # ------------------------------------------------------------------ private

    def _raw(self, x0: int, y0: int, x1: int, y1: int) -> np.ndarray:
        if self.access == "whole":
            if self._handle is None:
                self._handle = np.load(self._spill, mmap_mode="r")
            return np.array(self._handle[y0:y1, x0:x1])
        if self.access == "memmap":
            if self._handle is None:
                import tifffile

                self._handle = tifffile.memmap(self.path, page=0, mode="r")
            data = np.asarray(self._handle).reshape(*self.shape, -1)
            raw = np.array(data[y0:y1, x0:x1])
        else:
            raw = self._decoded(x0, y0, x1, y1)
        raw = raw[..., 0] if raw.shape[-1] == 1 else raw
        if self._info.get("photometric") == 0:  # white is zero: bright stays bright
            raw = invert_grey(raw, self._info.get("bits", 0))
        return raw

    def _decoded(self, x0: int, y0: int, x1: int, y1: int) -> np.ndarray:
        with _SEGMENT_LOCK:
            if self._handle is None:
                import tifffile

                self._handle = tifffile.TiffFile(self.path)
        tif = self._handle
        page = tif.pages.first
        info = self._info
        out = np.zeros((y1 - y0, x1 - x0, info["samples"]), dtype=np.dtype(info["raw_dtype"]))
        seg_h, seg_w = info["segment"]
        n_across = -(-self.shape[1] // seg_w)
        fh = tif.filehandle
        try:
            for sy in range(y0 // seg_h, (y1 - 1) // seg_h + 1):
                for sx in range(x0 // seg_w, (x1 - 1) // seg_w + 1):
                    index = sy * n_across + sx
                    offset, count = page.dataoffsets[index], page.databytecounts[index]
                    if not count:
                        continue  # an empty segment stays zero, as tifffile fills it
                    with _SEGMENT_LOCK:
                        fh.seek(offset)
                        data = fh.read(count)
                    segment, where, _ = page.decode(data, index, jpegtables=page.jpegtables)
                    if segment is None:
                        continue
                    top, left = int(where[2]), int(where[3])
                    block = np.asarray(segment).reshape(segment.shape[-3:])
                    _paste(out, block, top - y0, left - x0)
        except (ValueError, NotImplementedError, OSError, RuntimeError) as exc:
            # tifffile raises these (and its TiffFileError, a ValueError) for damaged bytes
            raise damaged_file_error(self.path, exc) from None
        return out


_SEGMENT_LOCK = threading.RLock()


def open_large_image(path: str | Path, *,
                     memory_limit_mb: float = DEFAULT_MEMORY_LIMIT_MB) -> LargeImage:
    """Look at a micrograph file once and return a reader of its rectangles.

    Parameters
    ----------
    path : path-like
        A TIFF (classic or BigTIFF, strips or tiles, any compression tifffile decodes), PNG or
        JPEG file.
    memory_limit_mb : float
        A file that can only be read whole is refused when reading it would take more memory
        than this (an estimate from its header: about 16 bytes per pixel).

    Returns
    -------
    LargeImage
        Close it (or use it as a context manager) to remove any temporary copy.

    Raises
    ------
    ImageReadError
        For a file that cannot be used (missing, truncated, damaged, too small, or too large
        to read whole); one line naming the file and what to do.
    """
    path = Path(path)
    check_image_file(path)
    if memory_limit_mb <= 0:
        raise TopoclassError(f"memory limit must be positive, not {memory_limit_mb}")
    if is_tiff(path):
        piecewise = _open_tiff(path)
        if piecewise is not None:
            return piecewise
    return _open_whole(path, memory_limit_mb)


def image_size(path: str | Path) -> tuple[int, int]:
    """``(rows, cols)`` of a micrograph file from its header, without decoding the pixels."""
    path = Path(path)
    check_image_file(path)
    tiff = is_tiff(path)
    with decoder_guard():
        try:
            if tiff:
                import tifffile

                with tifffile.TiffFile(path) as tif:
                    shaped = tif.pages.first.shaped
                    return int(shaped[2]), int(shaped[3])
            from PIL import Image

            with Image.open(path) as im:
                return int(im.size[1]), int(im.size[0])
        except Exception as exc:  # noqa: BLE001 - any parser failure on untrusted bytes
            raise damaged_file_error(path, exc) from None


# --------------------------------------------------------------------------------------------
# private helpers


def _open_tiff(path: Path) -> LargeImage | None:
    """A piecewise reader of a TIFF, or None when it must be read whole."""
    import tifffile

    notes: list[str] = []
    with decoder_guard() as log:
        try:
            with tifffile.TiffFile(path) as tif:
                page = tif.pages.first
                n_pages = len(tif.pages)
                s_separate, depth, rows, cols, s_contig = page.shaped
                photometric = int(page.photometric)
                check_single_plane(path, depth, rows, cols)
                check_channels(path, s_separate * s_contig, photometric, rows, cols,
                               page.extrasamples)
                check_min_side(path, rows, cols)
                check_tiff_extent(path, page, tif.filehandle.size)
                pixel_size = tiff_pixel_size_nm(page, tif, notes, path)
                if n_pages > 1:
                    notes.append(f"{path}: has {n_pages} pages; only the first page is mapped")
                if s_separate > 1 or photometric not in (0, 1, 2):
                    return None  # planes apart, palette, CMYK ...: read whole
                info = {"bits": int(page.bitspersample), "photometric": photometric,
                        "samples": int(s_contig), "raw_dtype": str(page.dtype)}
                if page.is_memmappable:
                    access = "memmap"
                else:
                    access = "segments"
                    if page.is_tiled:
                        info["segment"] = (int(page.tilelength), int(page.tilewidth))
                    else:
                        info["segment"] = (min(int(page.rowsperstrip), int(rows)), int(cols))
                    try:  # a codec that needs PIL shows on the first segment
                        page.decode(None, 0)
                        fh = tif.filehandle
                        fh.seek(page.dataoffsets[0])
                        page.decode(fh.read(page.databytecounts[0]), 0,
                                    jpegtables=page.jpegtables)
                    except (ValueError, NotImplementedError) as exc:
                        if "imagecodecs" in str(exc) or isinstance(exc, NotImplementedError):
                            return None
                        raise
        except ImageReadError:
            raise
        except Exception as exc:  # noqa: BLE001 - any parser failure on untrusted bytes
            raise damaged_file_error(path, log[0] if log else exc) from None
    for note in notes:
        warnings.warn(note, stacklevel=3)
    return LargeImage(path=path, shape=(int(rows), int(cols)), pixel_size_nm=pixel_size,
                      access=access, dtype=str(page.dtype), notes=tuple(notes), _info=info)


def _open_whole(path: Path, memory_limit_mb: float) -> LargeImage:
    rows, cols = image_size(path)
    need_mb = rows * cols * _WHOLE_READ_BYTES_PER_PIXEL / 1e6
    if need_mb > memory_limit_mb:
        raise ImageReadError(
            f"{path}: {cols}x{rows} pixels cannot be read in pieces from this file and reading "
            f"it whole needs about {need_mb:,.0f} MB, more than the limit of "
            f"{memory_limit_mb:,.0f} MB; save it as a tiled or uncompressed TIFF, or raise "
            "the limit (--memory-limit)"
        )
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        micrograph = read_micrograph(path, max_pixels=rows * cols)
    folder = tempfile.mkdtemp(prefix="topoclass-map-")
    spill = os.path.join(folder, "image.npy")
    np.save(spill, micrograph.image)
    notes = tuple(" ".join(str(w.message).split()) for w in caught)
    return LargeImage(path=path, shape=micrograph.shape, pixel_size_nm=micrograph.pixel_size_nm,
                      access="whole", dtype=micrograph.dtype, notes=notes, _spill=spill)


def _paste(out: np.ndarray, block: np.ndarray, top: int, left: int) -> None:
    """Copy the part of ``block`` (placed at top, left of ``out``) that falls inside ``out``."""
    h, w = out.shape[:2]
    r0, c0 = max(0, -top), max(0, -left)
    r1 = min(block.shape[0], h - top)
    c1 = min(block.shape[1], w - left)
    if r1 > r0 and c1 > c0:
        out[top + r0:top + r1, left + c0:left + c1] = block[r0:r1, c0:c1]


def overview(image: LargeImage, longest: int = 2000) -> tuple[np.ndarray, int]:
    """The whole image shrunk by block means so that its longest side is at most ``longest``.

    Read in bands of full rows, so memory stays at a band. The last ``factor - 1`` rows and
    columns at most are left out (less than one overview pixel). A band that cannot be read
    (or holds one grey level) is NaN.

    Returns
    -------
    (small, factor)
        ``small`` is float32 in [0, 1]; pixel ``(i, j)`` covers image rows
        ``i*factor … (i+1)*factor`` and columns likewise.
    """
    from skimage.measure import block_reduce

    rows, cols = image.shape
    factor = max(1, math.ceil(max(rows, cols) / longest))
    h, w = rows // factor, cols // factor
    small = np.full((h, w), np.nan, dtype=np.float32)
    band = factor * max(1, 256 // factor)
    for y0 in range(0, h * factor, band):
        y1 = min(y0 + band, h * factor)
        try:
            piece = image.read((0, y0, w * factor, y1)).image
        except ImageReadError:
            continue
        small[y0 // factor:y1 // factor] = block_reduce(piece, (factor, factor), np.mean)
    return small, factor
