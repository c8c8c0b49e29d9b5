"""Reading micrographs: formats, scaling, pixel size, and every bad input at the door.

References used below:
* scikit-image's ``img_as_float32`` (dtype-range scaling of unsigned integers: v / 255 for
  uint8, v / 65535 for uint16) and ``skimage.color.rgb2gray`` (luminance
  0.2125 R + 0.7154 G + 0.0721 B) are the reference implementations the reader must agree with.
* Pillow's own decoder is the reference for lossy JPEG pixels.
* Images shipped with scikit-image: ``skimage.data.camera`` and ``skimage.data.checkerboard``.
* TIFF 6.0 specification: XResolution is pixels per ResolutionUnit (2 = inch, 3 = centimetre);
  1 inch = 25.4 mm exactly (international inch, 1959).
"""

from __future__ import annotations

import struct
import warnings
import zlib
from dataclasses import FrozenInstanceError

import numpy as np
import pytest
import tifffile
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image, ImageFile
from skimage import data as skdata
from skimage.color import rgb2gray
from skimage.util import img_as_float32

from topoclass.errors import ImageReadError
from topoclass.images import (
    IMAGE_EXTENSIONS,
    ImageReadWarning,
    Micrograph,
    _unsigned_top,
    collect_image_paths,
    read_micrograph,
)

RNG = np.random.default_rng(7)
GREY8 = RNG.integers(0, 256, size=(48, 64), dtype=np.uint8)
GREY8[0, 0], GREY8[0, 1] = 0, 255
GREY16 = RNG.integers(0, 65536, size=(48, 64), dtype=np.uint16)
GREY16[0, 0], GREY16[0, 1] = 0, 65535
RGB8 = RNG.integers(0, 256, size=(40, 50, 3), dtype=np.uint8)


def _read_quiet(path, **kwargs) -> Micrograph:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ImageReadWarning)
        return read_micrograph(path, **kwargs)


def _assert_f32_equal(actual, expected) -> None:
    """Equal up to float32 rounding (skimage rounds v * (1/255) in float32, we round v / 255)."""
    np.testing.assert_allclose(actual, expected, rtol=0, atol=1.2e-7)


def _assert_one_line_naming(excinfo, path) -> None:
    message = str(excinfo.value)
    assert str(path) in message
    assert "\n" not in message and "\r" not in message
    assert len(message) < 400


# --------------------------------------------------------------------------- round trips


@pytest.mark.parametrize("suffix", [".png", ".tif"])
def test_uint8_scaled_by_255(tmp_path, suffix):
    path = tmp_path / f"g8{suffix}"
    if suffix == ".png":
        Image.fromarray(GREY8).save(path)
    else:
        tifffile.imwrite(path, GREY8)
    m = read_micrograph(path)
    assert m.image.dtype == np.float32 and m.image.shape == GREY8.shape
    # reference: skimage img_as_float32 scales uint8 by 1/255
    _assert_f32_equal(m.image, img_as_float32(GREY8))
    # the formula itself, correctly rounded to float32
    np.testing.assert_array_equal(m.image, (GREY8 / 255.0).astype(np.float32))
    assert m.image[0, 1] == 1.0 and m.image[0, 0] == 0.0
    assert m.dtype == "uint8" and m.n_pages == 1 and not m.colour
    assert m.source == str(path)


@pytest.mark.parametrize("writer", ["tifffile", "pil_png", "skimage_io_png"])
def test_uint16_scaled_by_65535(tmp_path, writer):
    if writer == "tifffile":
        path = tmp_path / "g16.tif"
        tifffile.imwrite(path, GREY16)
    elif writer == "pil_png":
        path = tmp_path / "g16.png"
        Image.fromarray(GREY16).save(path)
    else:
        import skimage.io

        path = tmp_path / "g16_io.png"
        skimage.io.imsave(path, GREY16, check_contrast=False)
    m = read_micrograph(path)
    # reference: skimage img_as_float32 scales uint16 by 1/65535; 65535 -> 1.0
    _assert_f32_equal(m.image, img_as_float32(GREY16))
    assert m.image[0, 1] == 1.0
    assert m.dtype == "uint16"


def test_float32_tiff_scaled_by_finite_min_max(tmp_path):
    values = RNG.uniform(-3.0, 5.0, size=(40, 40)).astype(np.float32)
    values[0, 0], values[0, 1] = -3.0, 5.0
    path = tmp_path / "f.tif"
    tifffile.imwrite(path, values)
    m = read_micrograph(path)
    expected = (values.astype(np.float64) + 3.0) / 8.0  # (v - min) / (max - min)
    np.testing.assert_allclose(m.image, expected, atol=1e-6)
    assert m.image.min() == 0.0 and m.image.max() == 1.0


def test_signed_int_tiff_stretched(tmp_path):
    values = RNG.integers(-500, 1500, size=(40, 40)).astype(np.int16)
    path = tmp_path / "s16.tif"
    tifffile.imwrite(path, values)
    m = read_micrograph(path)
    low, high = float(values.min()), float(values.max())
    np.testing.assert_allclose(m.image, (values - low) / (high - low), atol=1e-6)


def test_non_finite_pixels_replaced_by_median_with_warning(tmp_path):
    values = RNG.uniform(0.0, 10.0, size=(40, 40)).astype(np.float32)
    values[0, 0], values[0, 1] = 0.0, 10.0
    values[5, 5], values[6, 6], values[7, 7] = np.nan, np.inf, -np.inf
    path = tmp_path / "holes.tif"
    tifffile.imwrite(path, values)
    with pytest.warns(ImageReadWarning, match="3 non-finite") as record:
        m = read_micrograph(path)
    assert str(path) in str(record[0].message)
    finite = values[np.isfinite(values)].astype(np.float64)
    median = np.median(finite)
    np.testing.assert_allclose(m.image[5, 5], median / 10.0, atol=1e-6)
    assert np.isfinite(m.image).all()
    assert len(m.notes) == 1


def test_rgb_to_luminance_matches_rgb2gray(tmp_path):
    path = tmp_path / "rgb.png"
    Image.fromarray(RGB8).save(path)
    m = read_micrograph(path)
    # reference: skimage.color.rgb2gray (0.2125 R + 0.7154 G + 0.0721 B on img_as_float)
    np.testing.assert_allclose(m.image, rgb2gray(RGB8), atol=1e-6)
    assert m.colour


@pytest.mark.parametrize("suffix", [".png", ".tif"])
def test_rgba_alpha_dropped(tmp_path, suffix):
    alpha = RNG.integers(0, 256, size=RGB8.shape[:2], dtype=np.uint8)
    rgba = np.dstack([RGB8, alpha])
    path = tmp_path / f"rgba{suffix}"
    if suffix == ".png":
        Image.fromarray(rgba, mode="RGBA").save(path)
    else:
        tifffile.imwrite(path, rgba)
    m = read_micrograph(path)
    np.testing.assert_allclose(m.image, rgb2gray(RGB8), atol=1e-6)


def test_rgb_tiff_16bit(tmp_path):
    rgb16 = RNG.integers(0, 65536, size=(40, 40, 3), dtype=np.uint16)
    path = tmp_path / "rgb16.tif"
    tifffile.imwrite(path, rgb16)
    m = read_micrograph(path)
    np.testing.assert_allclose(m.image, rgb2gray(rgb16), atol=1e-6)


def test_grey_alpha_png_keeps_grey(tmp_path):
    la = np.dstack([GREY8, np.full_like(GREY8, 128)])
    path = tmp_path / "la.png"
    Image.fromarray(la, mode="LA").save(path)
    _assert_f32_equal(read_micrograph(path).image, img_as_float32(GREY8))


def test_palette_png_through_its_colours(tmp_path):
    path = tmp_path / "pal.png"
    Image.fromarray(RGB8).quantize(colors=16).save(path)
    # reference: Pillow's own palette expansion, then rgb2gray
    expected = rgb2gray(np.asarray(Image.open(path).convert("RGB")))
    np.testing.assert_allclose(read_micrograph(path).image, expected, atol=1e-6)


def test_palette_tiff_grey_ramp(tmp_path):
    index = GREY8
    ramp = np.tile(np.arange(256, dtype=np.uint16) * 257, (3, 1))  # grey ramp, 8 -> 16 bit
    path = tmp_path / "pal.tif"
    tifffile.imwrite(path, index, photometric="palette", colormap=ramp)
    np.testing.assert_allclose(read_micrograph(path).image, img_as_float32(index), atol=1e-6)


def test_min_is_white_tiff_inverted(tmp_path):
    path = tmp_path / "white.tif"
    tifffile.imwrite(path, GREY8, photometric="miniswhite")
    # TIFF 6.0: PhotometricInterpretation 0 means 0 is white
    np.testing.assert_allclose(read_micrograph(path).image, 1.0 - GREY8 / 255.0, atol=1e-6)


def test_bilevel_png(tmp_path):
    bits = RNG.random((40, 40)) > 0.5
    path = tmp_path / "bits.png"
    Image.fromarray(bits).save(path)
    np.testing.assert_array_equal(read_micrograph(path).image, bits.astype(np.float32))


def test_jpeg_matches_pillow_decode(tmp_path):
    path = tmp_path / "cam.jpg"
    camera = skdata.camera()
    Image.fromarray(camera).save(path, quality=95)
    m = read_micrograph(path)
    # reference: Pillow's decode of the same file (JPEG is lossy, so not the original pixels)
    _assert_f32_equal(m.image, img_as_float32(np.asarray(Image.open(path))))
    assert np.abs(m.image - img_as_float32(camera)).mean() < 0.02


def test_cmyk_jpeg(tmp_path):
    path = tmp_path / "cmyk.jpg"
    Image.fromarray(RGB8).convert("CMYK").save(path, quality=95)
    expected = rgb2gray(np.asarray(Image.open(path).convert("RGB")))
    np.testing.assert_allclose(read_micrograph(path).image, expected, atol=1e-6)


def test_lzw_tiff(tmp_path):
    # LZW needs a codec tifffile may lack; the reader then falls back to Pillow
    path = tmp_path / "lzw.tif"
    Image.fromarray(GREY8).save(path, compression="tiff_lzw")
    _assert_f32_equal(read_micrograph(path).image, img_as_float32(GREY8))


def test_deflate_tiff(tmp_path):
    path = tmp_path / "zip.tif"
    tifffile.imwrite(path, GREY16, compression="zlib")
    np.testing.assert_allclose(read_micrograph(path).image, img_as_float32(GREY16), atol=1e-7)


@pytest.mark.parametrize("name", ["camera", "checkerboard"])
@pytest.mark.parametrize("suffix", [".png", ".tif", ".tiff"])
def test_scikit_image_samples_round_trip(tmp_path, name, suffix):
    image = getattr(skdata, name)()  # images shipped with scikit-image
    path = tmp_path / f"{name}{suffix}"
    if suffix == ".png":
        Image.fromarray(image).save(path)
    else:
        tifffile.imwrite(path, image)
    _assert_f32_equal(read_micrograph(path).image, img_as_float32(image))


def test_upper_case_extension(tmp_path):
    path = tmp_path / "SCAN.TIF"
    tifffile.imwrite(path, GREY8)
    _assert_f32_equal(read_micrograph(path).image, img_as_float32(GREY8))


def test_content_decides_not_extension(tmp_path):
    path = tmp_path / "really_a_png.tif"
    Image.fromarray(GREY8).save(path, format="PNG")
    _assert_f32_equal(read_micrograph(path).image, img_as_float32(GREY8))


def test_multipage_tiff_first_page_with_warning(tmp_path):
    stack = RNG.integers(0, 256, size=(3, 40, 40), dtype=np.uint8)
    path = tmp_path / "stack.tif"
    tifffile.imwrite(path, stack, photometric="minisblack")  # one grey page per plane
    with pytest.warns(ImageReadWarning, match="3 pages") as record:
        m = read_micrograph(path)
    assert str(path) in str(record[0].message)
    assert m.n_pages == 3
    _assert_f32_equal(m.image, img_as_float32(stack[0]))


def test_micrograph_is_frozen(tmp_path):
    path = tmp_path / "g.png"
    Image.fromarray(GREY8).save(path)
    m = read_micrograph(path)
    with pytest.raises(FrozenInstanceError):
        m.pixel_size_nm = 1.0
    assert m.shape == GREY8.shape


# --------------------------------------------------------------------------- pixel size


@pytest.mark.parametrize(
    ("resolution", "unit", "expected_nm"),
    [
        # 4e6 pixels per centimetre: 1e7 nm / 4e6 = 2.5 nm
        (4e6, "CENTIMETER", 2.5),
        # 25.4e6 nm per inch (1 inch = 25.4 mm exactly) / 5.08e6 pixels per inch = 5 nm
        (5.08e6, "INCH", 5.0),
        # 1e7 nm/cm / 1e5 px/cm = 100 nm (e.g. an optical image of a colloidal monolayer)
        (1e5, "CENTIMETER", 100.0),
    ],
)
def test_pixel_size_from_resolution_tags(tmp_path, resolution, unit, expected_nm):
    path = tmp_path / "cal.tif"
    tifffile.imwrite(path, GREY8, resolution=(resolution, resolution), resolutionunit=unit)
    assert read_micrograph(path).pixel_size_nm == pytest.approx(expected_nm, rel=1e-6)


def test_pixel_size_from_imagej_metadata(tmp_path):
    # ImageJ stores pixels per unit in XResolution and the unit in its description:
    # 400 pixels per micrometre -> 1000 nm / 400 = 2.5 nm
    path = tmp_path / "fiji.tif"
    tifffile.imwrite(path, GREY16, imagej=True, resolution=(400, 400), metadata={"unit": "um"})
    assert read_micrograph(path).pixel_size_nm == pytest.approx(2.5, rel=1e-6)


@pytest.mark.parametrize(
    "kwargs",
    [
        {},  # tifffile writes 1 pixel per (no) unit
        {"resolution": (72, 72), "resolutionunit": "INCH"},  # a screen default, not a calibration
    ],
)
def test_no_pixel_size_without_calibration(tmp_path, kwargs):
    path = tmp_path / "nocal.tif"
    tifffile.imwrite(path, GREY8, **kwargs)
    assert read_micrograph(path).pixel_size_nm is None


def test_png_has_no_pixel_size(tmp_path):
    path = tmp_path / "g.png"
    Image.fromarray(GREY8).save(path, dpi=(300, 300))
    assert read_micrograph(path).pixel_size_nm is None


def test_declared_bit_depth_sets_scale():
    # common practice: 12-bit camera data stored in 16-bit words; full range is 2**12 - 1
    assert _unsigned_top(np.dtype(np.uint16), 12) == 4095
    assert _unsigned_top(np.dtype(np.uint16), 16) == 65535
    assert _unsigned_top(np.dtype(np.uint8), 0) == 255


# --------------------------------------------------------------------------- bad inputs


def _png_header_only(path, width, height):
    """A PNG whose header claims a size but whose pixel data is a few bytes (a "bomb")."""

    def chunk(kind, body):
        return struct.pack(">I", len(body)) + kind + body + struct.pack(
            ">I", zlib.crc32(kind + body) & 0xFFFFFFFF
        )

    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    body = zlib.compress(b"\x00" * 64)
    path.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", body)
                     + chunk(b"IEND", b""))


def _make_bad(kind: str, tmp_path):
    """Write one kind of bad input; return its path and a word the message must contain."""
    if kind == "missing":
        return tmp_path / "nowhere.png", "not found"
    if kind == "folder":
        path = tmp_path / "folder.tif"
        path.mkdir()
        return path, "folder"
    if kind == "empty":
        path = tmp_path / "empty.png"
        path.write_bytes(b"")
        return path, "empty"
    if kind == "text_as_png":
        path = tmp_path / "notes.png"
        path.write_text("pores look fine today\n")
        return path, "not a readable"
    if kind == "truncated_png":
        path = tmp_path / "cut.png"
        Image.fromarray(skdata.camera()).save(path)
        path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
        return path, "truncated"
    if kind == "truncated_jpeg":
        path = tmp_path / "cut.jpg"
        Image.fromarray(skdata.camera()).save(path)
        path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
        return path, "truncated"
    if kind == "truncated_tiff":
        path = tmp_path / "cut.tif"
        tifffile.imwrite(path, GREY16)
        path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
        return path, "truncated"
    if kind == "tiny":
        path = tmp_path / "tiny.png"
        Image.fromarray(GREY8[:16, :16]).save(path)
        return path, "32x32"
    if kind == "thin":
        path = tmp_path / "thin.tif"
        tifffile.imwrite(path, RNG.integers(0, 256, size=(20, 400), dtype=np.uint8))
        return path, "32x32"
    if kind == "constant":
        path = tmp_path / "flat.png"
        Image.fromarray(np.full((64, 64), 117, np.uint8)).save(path)
        return path, "same value"
    if kind == "constant_float":
        path = tmp_path / "flat.tif"
        tifffile.imwrite(path, np.full((64, 64), 2.5, np.float32))
        return path, "same value"
    if kind == "nan_only":
        path = tmp_path / "nan.tif"
        tifffile.imwrite(path, np.full((64, 64), np.nan, np.float32))
        return path, "no finite"
    if kind == "inf_only":
        path = tmp_path / "inf.tif"
        values = np.full((64, 64), np.inf, np.float32)
        values[::2] = -np.inf
        tifffile.imwrite(path, values)
        return path, "no finite"
    if kind == "planes_in_one_page":
        path = tmp_path / "planes.tif"
        stack = RNG.integers(0, 256, size=(5, 64, 64), dtype=np.uint8)
        tifffile.imwrite(path, stack, photometric="minisblack", planarconfig="separate")
        return path, "5 channels"
    if kind == "seven_channels":
        path = tmp_path / "seven.tif"
        tifffile.imwrite(path, RNG.integers(0, 256, size=(64, 64, 7), dtype=np.uint8),
                         photometric="minisblack", planarconfig="contig")
        return path, "7 channels"
    if kind == "volume":
        path = tmp_path / "volume.tif"
        tifffile.imwrite(path, RNG.integers(0, 256, size=(4, 64, 64), dtype=np.uint8),
                         photometric="minisblack", volumetric=True, tile=(16, 16))
        return path, "volume"
    if kind == "unsupported":
        path = tmp_path / "scan.bmp"
        Image.fromarray(GREY8).save(path, format="BMP")
        return path, "unsupported"
    if kind == "no_extension":
        path = tmp_path / "scan"
        Image.fromarray(GREY8).save(path, format="PNG")
        return path, "unsupported"
    if kind == "bomb":
        path = tmp_path / "bomb.png"
        _png_header_only(path, 60_000, 60_000)  # 3.6e9 pixels; Pillow itself would refuse
        return path, "--max-pixels"
    raise AssertionError(kind)


BAD_KINDS = [
    "missing", "folder", "empty", "text_as_png", "truncated_png", "truncated_jpeg",
    "truncated_tiff", "tiny", "thin", "constant", "constant_float", "nan_only", "inf_only",
    "planes_in_one_page", "seven_channels", "volume", "unsupported", "no_extension", "bomb",
]  # fmt: skip


@pytest.mark.parametrize("kind", BAD_KINDS)
def test_bad_input_one_line_error_naming_file(tmp_path, kind):
    path, word = _make_bad(kind, tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no stray warning from a decoder either
        with pytest.raises(ImageReadError) as excinfo:
            read_micrograph(path)
    _assert_one_line_naming(excinfo, path)
    assert word in str(excinfo.value)


def test_size_limit_checked_before_decoding(tmp_path, monkeypatch):
    tif, png = tmp_path / "big.tif", tmp_path / "big.png"
    tifffile.imwrite(tif, GREY8)
    Image.fromarray(GREY8).save(png)

    def must_not_decode(*args, **kwargs):
        raise AssertionError("pixels were decoded before the size check")

    monkeypatch.setattr(tifffile.TiffPage, "asarray", must_not_decode)
    monkeypatch.setattr(ImageFile.ImageFile, "load", must_not_decode)
    for path in (tif, png):
        with pytest.raises(ImageReadError, match="--max-pixels") as excinfo:
            read_micrograph(path, max_pixels=1000)
        _assert_one_line_naming(excinfo, path)
        assert "max_pixels=" not in str(excinfo.value)  # the option a user can pass, only


def test_size_limit_can_be_raised(tmp_path):
    path = tmp_path / "g.png"
    Image.fromarray(GREY8).save(path)
    with pytest.raises(ImageReadError):
        read_micrograph(path, max_pixels=GREY8.size - 1)
    assert read_micrograph(path, max_pixels=GREY8.size).image.shape == GREY8.shape


def test_user_limit_overrides_pillow_limit(tmp_path, monkeypatch):
    # Pillow would refuse (DecompressionBombError) above twice its own limit; ours counts.
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 100)
    path = tmp_path / "g.png"
    Image.fromarray(GREY8).save(path)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert read_micrograph(path).image.shape == GREY8.shape
    assert Image.MAX_IMAGE_PIXELS == 100  # restored


def test_truncated_stays_an_error_even_if_pillow_told_otherwise(tmp_path, monkeypatch):
    monkeypatch.setattr(ImageFile, "LOAD_TRUNCATED_IMAGES", True)
    path, _ = _make_bad("truncated_png", tmp_path)
    with pytest.raises(ImageReadError, match="truncated"):
        read_micrograph(path)
    assert ImageFile.LOAD_TRUNCATED_IMAGES is True  # the caller's setting is restored


# --------------------------------------------------------------------------- fuzzing

# tmp_path is shared by the examples of one test; each example overwrites its file
_FUZZ = {"deadline": None, "suppress_health_check": [HealthCheck.function_scoped_fixture]}
_PREFIXES = [b"", b"\x89PNG\r\n\x1a\n", b"\xff\xd8\xff\xe0", b"II*\x00", b"MM\x00*", b"II+\x00"]


@settings(max_examples=150, **_FUZZ)
@given(
    prefix=st.sampled_from(_PREFIXES),
    body=st.binary(min_size=0, max_size=600),
    suffix=st.sampled_from(IMAGE_EXTENSIONS),
)
def test_fuzz_random_bytes_only_image_read_error(tmp_path, prefix, body, suffix):
    path = tmp_path / f"fuzz{suffix}"
    path.write_bytes(prefix + body)
    try:
        m = _read_quiet(path)
    except ImageReadError as exc:
        assert "\n" not in str(exc) and str(path) in str(exc)
    else:  # random bytes that happen to decode must still give a proper image
        assert m.image.dtype == np.float32 and m.image.ndim == 2
        assert 0.0 <= m.image.min() <= m.image.max() <= 1.0


_arrays = st.tuples(
    st.integers(1, 70),
    st.integers(1, 70),
    st.sampled_from(["uint8", "uint16", "float32", "rgb8"]),
    st.integers(0, 2**32 - 1),
    st.sampled_from([".png", ".tif"]),
    st.floats(0.0, 1.0),
)


@settings(max_examples=60, **_FUZZ)
@given(spec=_arrays)
def test_fuzz_small_arrays_read_back_or_refused(tmp_path, spec):
    rows, cols, kind, seed, suffix, bad_fraction = spec
    rng = np.random.default_rng(seed)
    if kind == "float32":
        suffix = ".tif"  # PNG holds no floats
        array = rng.normal(size=(rows, cols)).astype(np.float32)
        array[rng.random((rows, cols)) < bad_fraction] = np.nan
    elif kind == "rgb8":
        array = rng.integers(0, 256, size=(rows, cols, 3), dtype=np.uint8)
    else:
        top = np.iinfo(kind).max
        array = rng.integers(0, top + 1, size=(rows, cols), dtype=kind)
        if bad_fraction > 0.7:
            array[:] = array.flat[0]  # constant
    path = tmp_path / f"arr{suffix}"
    if suffix == ".png":
        Image.fromarray(array).save(path)
    else:
        tifffile.imwrite(path, array)
    try:
        m = _read_quiet(path)
    except ImageReadError as exc:
        assert "\n" not in str(exc) and str(path) in str(exc)
        return
    assert m.image.dtype == np.float32 and m.image.shape == (rows, cols)
    assert 0.0 <= m.image.min() <= m.image.max() <= 1.0
    if kind in ("uint8", "uint16"):
        np.testing.assert_allclose(m.image, img_as_float32(array), atol=1e-7)
    elif kind == "rgb8":
        np.testing.assert_allclose(m.image, rgb2gray(array), atol=1e-6)


@settings(max_examples=60, **_FUZZ)
@given(fraction=st.floats(0.0, 1.0, exclude_max=True), suffix=st.sampled_from([".png", ".tif"]))
def test_fuzz_truncation_never_gives_wrong_pixels(tmp_path, fraction, suffix):
    path = tmp_path / f"cut{suffix}"
    image = skdata.checkerboard()[:64, :80]
    if suffix == ".png":
        Image.fromarray(image).save(path)
    else:
        tifffile.imwrite(path, image)
    whole = path.read_bytes()
    path.write_bytes(whole[: int(len(whole) * fraction)])
    try:
        m = _read_quiet(path)
    except ImageReadError:
        return
    # only trailing bytes after the pixel data may be lost without an error
    _assert_f32_equal(m.image, img_as_float32(image))


# --------------------------------------------------------------------------- collecting paths


def _touch_png(path):
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(GREY8).save(path, format="PNG")
    return path


def test_collect_folder_recursive_sorted_images_only(tmp_path):
    root = tmp_path / "line3"
    b = _touch_png(root / "b.png")
    a = _touch_png(root / "a.TIF")
    deep = _touch_png(root / "batch7" / "z.jpeg")
    _touch_png(root / ".hidden" / "x.png")
    _touch_png(root / "._a.png")
    (root / "notes.txt").write_text("not an image")
    (root / "scores.csv").write_text("image\n")
    assert collect_image_paths([root]) == [a, b, deep]


def test_collect_list_file(tmp_path):
    root = tmp_path / "scans"
    one = _touch_png(root / "one.png")
    two = _touch_png(root / "sub" / "two.tif")
    folder_img = _touch_png(tmp_path / "more" / "m.png")
    listing = tmp_path / "todo.lst"
    listing.write_text(
        "\ufeff# images from the anodising line\n"
        "scans/one.png\r\n"
        "\n"
        f"   {two}   \n"  # absolute path, surrounding blanks
        "more\n"  # a folder
        "scans/missing.png\n"
    )
    found = collect_image_paths([listing])
    assert found == [one, two, folder_img, tmp_path / "scans" / "missing.png"]


def test_collect_mixed_inputs_duplicates_removed_first_kept(tmp_path):
    root = tmp_path / "imgs"
    a = _touch_png(root / "a.png")
    b = _touch_png(root / "b.png")
    listing = tmp_path / "list.txt"
    listing.write_text("imgs/b.png\nimgs/a.png\n")
    again = str(tmp_path / "imgs" / ".." / "imgs" / "a.png")
    found = collect_image_paths([b, root, listing, again])
    assert found == [b, a]


def test_collect_missing_input_raises_naming_it(tmp_path):
    missing = tmp_path / "gone"
    with pytest.raises(ImageReadError) as excinfo:
        collect_image_paths([missing])
    _assert_one_line_naming(excinfo, missing)


def test_collect_list_file_not_utf8(tmp_path):
    listing = tmp_path / "list.txt"
    listing.write_bytes("caf\xe9.png\n".encode("latin-1"))
    with pytest.raises(ImageReadError, match="UTF-8") as excinfo:
        collect_image_paths([listing])
    _assert_one_line_naming(excinfo, listing)


@pytest.mark.parametrize("rational", [(0, 1), (123457, 0)])
def test_garbled_resolution_tag_is_noted_not_dropped_silently(tmp_path, rational):
    # TIFF 6.0: XResolution is a RATIONAL (two uint32, numerator then denominator); 0 pixels per
    # unit or a zero denominator is no pixel size. The image is kept, the note says why.
    path = tmp_path / "garbled.tif"
    tifffile.imwrite(path, GREY16, resolution=(123457, 123457), resolutionunit="CENTIMETER")
    raw = path.read_bytes()
    good = struct.pack("<II", 123457, 1)
    assert raw.count(good) == 2  # XResolution and YResolution
    path.write_bytes(raw.replace(good, struct.pack("<II", *rational)))
    m = _read_quiet(path)
    assert m.pixel_size_nm is None
    assert any("pixel-size tags are unreadable" in n and str(path) in n for n in m.notes)
