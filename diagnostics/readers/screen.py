"""Screen (camera) images: PNG, TIFF or ``.npy`` with a JSON sidecar.

Format
------
An image file and, next to it, a sidecar of the same stem::

    SCR-02_101500.png     8- or 16-bit grayscale PNG (or .tif/.tiff, or .npy)
    SCR-02_101500.json    {"device": "SCR-02",
                           "timestamp": "2026-11-30T10:15:00Z",
                           "pixel_size_m": [2.5e-5, 2.5e-5],
                           "bit_depth": 12,
                           "dark": "dark_SCR-02.png",
                           "roi": [100, 80, 540, 400]}

Sidecar fields:

``device`` (required)
    Screen name, non-empty text.
``timestamp`` (required)
    ISO 8601 with ``Z`` or an offset, or epoch seconds (a number).
``pixel_size_m`` (required)
    Metres per pixel on the screen: one number, or ``[x, y]``; each > 0.
``bit_depth``
    Sensor bit depth, integer 1..32 (e.g. 12 for a 12-bit sensor in a 16-bit
    container); no pixel may exceed ``2**bit_depth - 1``.
``dark``
    A dark (background) frame taken at the same settings, as a path relative to
    the sidecar's folder that stays inside it; same image formats, same shape.
    It needs no sidecar of its own and is no input on its own (see
    :func:`diagnostics.readers.is_auxiliary`).
``roi``
    ``[x_min, y_min, x_max, y_max]`` in pixels, half-open, inside the image
    (x along columns, y along rows).

Other fields are kept in :attr:`Frame.metadata`.  Pixels keep their stored
dtype (uint8, uint16, ... or float; big-endian data are made native).  The file
type is taken from its first bytes, which must agree with the suffix.  Images
above :data:`MAX_PIXELS` pixels are refused before they are decoded
(decompression-bomb guard).
"""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Any

import numpy as np

from diagnostics.errors import InputError, located
from diagnostics.measurements import Frame
from diagnostics.readers import _util

#: Image suffixes read as frames.
IMAGE_SUFFIXES = (".png", ".tif", ".tiff", ".npy")

#: Largest image accepted, in pixels (64 Mpx, i.e. 128 MB at 16 bits): a guard
#: against decompression bombs and mistaken files, far above any screen camera.
MAX_PIXELS = 1 << 26

#: Sidecar fields with a meaning; the others go to ``Frame.metadata``.
SIDECAR_FIELDS = ("device", "timestamp", "pixel_size_m", "bit_depth", "dark", "roi")

_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
_TIFF_MAGIC = (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")
_NPY_MAGIC = b"\x93NUMPY"
#: Pillow modes of grayscale images and the numpy dtype they become.
_PIL_MODES = {"L": np.uint8, "I;16": np.uint16, "I;16L": np.uint16, "I;16B": np.uint16, "I": np.int32, "F": np.float32}
_PIXEL_KINDS = "uif"  # unsigned, signed integer, float


def read_frame(path: str | Path, *, load_dark: bool = True) -> Frame:
    """Read one screen image and its sidecar into a :class:`Frame`.

    Parameters
    ----------
    path : str or Path
        The image (``.png``, ``.tif``/``.tiff`` or ``.npy``); its sidecar is
        ``<stem>.json`` in the same folder.
    load_dark : bool, keyword-only
        Load the dark frame named by the sidecar into ``Frame.dark`` (default).
        With ``False`` the dark frame is not opened; its name stays in
        ``metadata["dark"]``.

    Returns
    -------
    Frame

    Raises
    ------
    diagnostics.errors.InputError
        One line naming the file (image, sidecar or dark frame), the field, and
        what was expected.
    """
    p = Path(path)
    if p.suffix.lower() not in IMAGE_SUFFIXES:
        raise located(p, f"unknown image type {p.suffix or '(none)'!r} (expected one of {', '.join(IMAGE_SUFFIXES)})")
    sidecar = sidecar_path(p)
    if not sidecar.is_file():
        raise located(p, f"sidecar {sidecar.name!r} not found (expected JSON with device, timestamp, pixel_size_m)")
    pixels = read_pixels(p)
    meta = _util.read_json_object(sidecar, "an image sidecar")

    device = meta.get("device")
    if not isinstance(device, str) or not device.strip():
        raise located(sidecar, f"field 'device'{_missing_or(meta, 'device')}: expected the screen name as text")
    if "timestamp" not in meta:
        raise located(sidecar, f"field 'timestamp' missing{_util.did_you_mean('timestamp', meta)} "
                               "(expected an ISO 8601 time with zone)")
    timestamp = _util.parse_time(meta["timestamp"], sidecar, "field 'timestamp'")
    pixel_size = _pixel_size(sidecar, meta)
    bit_depth = _bit_depth(sidecar, meta, pixels)
    roi = _roi(sidecar, meta, pixels.shape)
    dark = None
    if "dark" in meta and meta["dark"] is not None and load_dark:
        dark_path = _util.inside(sidecar.parent, meta["dark"], sidecar, "dark")
        if not dark_path.is_file():
            raise located(sidecar, f"field 'dark': dark frame {meta['dark']!r} not found")
        dark = read_pixels(dark_path)
        if dark.shape != pixels.shape:
            raise located(sidecar, f"field 'dark': dark frame {meta['dark']!r} has shape {dark.shape}, "
                                   f"image has {pixels.shape} (expected the same shape)")
        if bit_depth is not None:
            _check_bit_depth(dark_path, dark, bit_depth)
    metadata = {k: v for k, v in meta.items() if k not in SIDECAR_FIELDS or (k == "dark" and not load_dark)}
    return Frame(device=device.strip(), timestamp=timestamp, pixels=pixels, pixel_size_m=pixel_size,
                 bit_depth=bit_depth, dark=dark, roi=roi, source=str(p), metadata=metadata)


def sidecar_path(image: Path) -> Path:
    """The sidecar of an image: same folder and stem, suffix ``.json``."""
    return image.with_suffix(".json")


def _missing_or(meta: dict[str, Any], key: str) -> str:
    return f" missing{_util.did_you_mean(key, meta)}" if key not in meta else f" is {meta[key]!r}"


# --------------------------------------------------------------------------- pixels


def read_pixels(path: Path) -> np.ndarray:
    """Decode one image file (no sidecar) into a native-endian 2-D array.

    The format is told by the first bytes, which must agree with the suffix.
    """
    p = _util.require_file(path, "an image")
    try:
        with p.open("rb") as fh:
            magic = fh.read(8)
    except OSError as exc:
        raise located(p, f"cannot read file: {exc.strerror or exc}") from None
    suffix = p.suffix.lower()
    if suffix == ".png":
        if not magic.startswith(_PNG_MAGIC):
            raise located(p, "not a PNG file (its first bytes are not the PNG signature)")
        pixels = _guarded(p, "PNG", _read_png)
    elif suffix in (".tif", ".tiff"):
        if not magic.startswith(_TIFF_MAGIC):
            raise located(p, "not a TIFF file (its first bytes are not a TIFF header)")
        pixels = _guarded(p, "TIFF", _read_tiff)
    elif suffix == ".npy":
        if not magic.startswith(_NPY_MAGIC):
            raise located(p, "not a .npy file (its first bytes are not the NumPy header)")
        pixels = _guarded(p, ".npy", _read_npy)
    else:
        raise located(p, f"unknown image type {suffix!r} (expected one of {', '.join(IMAGE_SUFFIXES)})")
    if pixels.dtype.kind not in _PIXEL_KINDS or pixels.dtype.itemsize > 8:
        raise located(p, f"pixel type {pixels.dtype} not supported (expected integers or floats)")
    if pixels.ndim != 2 or 0 in pixels.shape:
        raise located(p, f"image has shape {pixels.shape} (expected one 2-D grayscale image)")
    if not pixels.dtype.isnative:
        pixels = pixels.astype(pixels.dtype.newbyteorder("="))
    if pixels.dtype.kind == "f" and not np.isfinite(pixels).all():
        row, col = np.argwhere(~np.isfinite(pixels))[0]
        raise located(p, f"pixel (x={col}, y={row}) is {float(pixels[row, col])!r} (expected finite values)")
    return pixels


def _guarded(path: Path, what: str, decode) -> np.ndarray:
    """Run a decoder and turn whatever it raises into one InputError line."""
    try:
        return decode(path)
    except InputError:
        raise
    except MemoryError:
        raise located(path, f"{what} image too large to decode") from None
    except Exception as exc:  # decoders of untrusted bytes raise many types
        raise located(path, f"cannot decode {what}: {_util.one_line(exc)}") from None


def _check_size(path: Path, shape: tuple[int, ...]) -> None:
    n = int(np.prod(shape, dtype=np.float64))
    if n > MAX_PIXELS:
        raise located(path, f"image of {n} pixels exceeds the limit of {MAX_PIXELS} (shape {tuple(shape)})")


def _read_png(path: Path) -> np.ndarray:
    from PIL import Image

    with warnings.catch_warnings():
        # our own pixel limit applies; Pillow's bomb warning would only duplicate it
        warnings.simplefilter("ignore", Image.DecompressionBombWarning)
        with Image.open(path, formats=["PNG"]) as image:
            width, height = image.size
            _check_size(path, (height, width))
            if image.mode not in _PIL_MODES:
                raise located(path, f"PNG mode {image.mode!r} is not grayscale (expected 8- or 16-bit gray)")
            image.load()
            return np.array(image)


def _read_tiff(path: Path) -> np.ndarray:
    import tifffile

    with tifffile.TiffFile(path) as tif:
        if not tif.series:
            raise located(path, "TIFF holds no image")
        series = tif.series[0]
        shape = tuple(s for s in series.shape if s != 1) if len(series.shape) > 2 else tuple(series.shape)
        if len(tif.series) > 1 or len(shape) != 2:
            raise located(path, f"TIFF holds {len(tif.series)} series of shape {series.shape} "
                                "(expected one 2-D grayscale image)")
        _check_size(path, shape)
        return np.asarray(series.asarray()).reshape(shape)


def _read_npy(path: Path) -> np.ndarray:
    with path.open("rb") as fh:
        version = np.lib.format.read_magic(fh)
        if version == (1, 0):
            shape, fortran, dtype = np.lib.format.read_array_header_1_0(fh)
        else:
            shape, fortran, dtype = np.lib.format.read_array_header_2_0(fh)
        if dtype.hasobject:
            raise located(path, "array holds Python objects (expected numbers; pickles are never loaded)")
        _check_size(path, shape)
        expected = int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
        data = fh.read(expected + 1)
    if len(data) != expected:
        raise located(path, f"file holds {len(data)} bytes of pixels, header says {expected} (truncated?)")
    array = np.frombuffer(data, dtype=dtype).reshape(shape, order="F" if fortran else "C")
    return np.ascontiguousarray(array)


# --------------------------------------------------------------------------- sidecar fields


def _pixel_size(sidecar: Path, meta: dict[str, Any]) -> tuple[float, float]:
    if "pixel_size_m" not in meta:
        raise located(sidecar, f"field 'pixel_size_m' missing{_util.did_you_mean('pixel_size_m', meta)} "
                               "(expected metres per pixel: a number or [x, y])")
    value = meta["pixel_size_m"]
    if isinstance(value, list):
        if len(value) != 2:
            raise located(sidecar, f"field 'pixel_size_m': expected one number or [x, y], found {len(value)} values")
        x, y = (_util.finite_number(v, sidecar, f"field 'pixel_size_m[{i}]'", minimum=0.0) for i, v in enumerate(value))
        return (x, y)
    size = _util.finite_number(value, sidecar, "field 'pixel_size_m'", minimum=0.0)
    return (size, size)


def _bit_depth(sidecar: Path, meta: dict[str, Any], pixels: np.ndarray) -> int | None:
    if meta.get("bit_depth") is None:
        return None
    depth = _util.integer(meta["bit_depth"], sidecar, "field 'bit_depth'", minimum=1, maximum=32)
    _check_bit_depth(sidecar, pixels, depth)
    return depth


def _check_bit_depth(where: Path, pixels: np.ndarray, depth: int) -> None:
    top = 2**depth - 1
    if pixels.max() <= top and pixels.min() >= 0:
        return
    row, col = np.argwhere((pixels > top) | (pixels < 0))[0]
    raise located(where, f"pixel (x={col}, y={row}) = {pixels[row, col]} lies outside 0..{top} of bit_depth "
                         f"{depth} (maximum {pixels.max()}; expected a matching bit_depth)")


def _roi(sidecar: Path, meta: dict[str, Any], shape: tuple[int, ...]) -> tuple[int, int, int, int] | None:
    value = meta.get("roi")
    if value is None:
        return None
    if not isinstance(value, list) or len(value) != 4:
        raise located(sidecar, f"field 'roi': expected [x_min, y_min, x_max, y_max], found {value!r}")
    x0, y0, x1, y1 = (_util.integer(v, sidecar, f"field 'roi[{i}]'", minimum=0) for i, v in enumerate(value))
    rows, cols = shape
    if not (x0 < x1 <= cols and y0 < y1 <= rows):
        raise located(sidecar, f"field 'roi': {value} is not inside the {cols} x {rows} image "
                               "(expected 0 <= x_min < x_max <= columns and 0 <= y_min < y_max <= rows)")
    return (x0, y0, x1, y1)


__all__ = ["IMAGE_SUFFIXES", "MAX_PIXELS", "SIDECAR_FIELDS", "read_frame", "read_pixels", "sidecar_path"]
