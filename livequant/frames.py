"""Frames: the image, its metadata, and the readers for files on disk.

A frame on disk is ``NAME.tif``/``NAME.tiff`` (one 2D page) or ``NAME.npy``
(2D), with an optional JSON sidecar ``NAME.json`` holding the keys of
:class:`Sidecar`.  Every way a file can be wrong raises :class:`FrameError`
with a message that names the file, says what is wrong and how to fix it.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import stat
import struct
from dataclasses import dataclass, field, replace
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

__all__ = [
    "Frame",
    "FrameMeta",
    "FrameError",
    "Sidecar",
    "IMAGE_SUFFIXES",
    "read_frame",
    "read_image",
    "read_sidecar",
    "sidecar_path",
    "frame_from_array",
    "MAX_FRAME_PIXELS",
    "write_frame",
    "write_json_atomic",
    "write_text_atomic",
    "check_pixels",
    "check_not_constant",
    "check_inside",
    "resolve_meta",
]

IMAGE_SUFFIXES = (".tif", ".tiff", ".npy")

#: Largest frame we accept (pixels).  16384 x 16384 is past any STEM scan
#: generator in use; a larger declared size is a corrupt header, not data.
MAX_FRAME_PIXELS = 16384 * 16384

_ALLOWED_KINDS = "biuf"  # bool, signed and unsigned integers, floats


class FrameError(ValueError):
    """A frame that cannot be analysed.  ``reason`` is a short machine tag."""

    def __init__(self, message: str, *, reason: str, path: str | os.PathLike | None = None):
        super().__init__(message)
        self.reason = reason
        self.path = None if path is None else str(path)


class Sidecar(BaseModel):
    """The JSON sidecar of a frame.  Unknown keys are kept in ``extra``."""

    model_config = ConfigDict(extra="allow", frozen=True, strict=False)

    frame_id: str | None = None
    pixel_size_pm: float | None = Field(default=None, gt=0, allow_inf_nan=False)
    dwell_time_us: float | None = Field(default=None, gt=0, allow_inf_nan=False)
    stage_x_nm: float | None = Field(default=None, allow_inf_nan=False)
    stage_y_nm: float | None = Field(default=None, allow_inf_nan=False)
    scan_rotation_deg: float | None = Field(default=None, allow_inf_nan=False)
    acquired_at: datetime | None = None
    detector: str | None = None
    beam_current_pa: float | None = Field(default=None, gt=0, allow_inf_nan=False)
    series_id: str | None = None

    @field_validator("frame_id", "detector", "series_id", mode="before")
    @classmethod
    def _must_be_text(cls, value):
        if value is not None and not isinstance(value, str):
            raise ValueError(f"must be a string, got {type(value).__name__}")
        return value

    @field_validator(
        "pixel_size_pm", "dwell_time_us", "stage_x_nm", "stage_y_nm", "scan_rotation_deg",
        "beam_current_pa", mode="before",
    )
    @classmethod
    def _must_be_number(cls, value):
        # JSON true/false and numeric strings are mistakes in a sidecar, not numbers.
        if value is not None and (isinstance(value, bool) or not isinstance(value, (int, float))):
            raise ValueError(f"must be a number, got {type(value).__name__} {value!r}")
        return value

    @classmethod
    def parse(cls, data: Any, *, where: str) -> "Sidecar":
        """Validate a decoded JSON object; raise FrameError naming `where`."""
        if not isinstance(data, dict):
            raise FrameError(
                f"{where}: the sidecar must be a JSON object ({{...}}), got {type(data).__name__}",
                reason="sidecar-not-object",
            )
        try:
            return cls.model_validate(data)
        except ValidationError as exc:
            problems = "; ".join(
                f"`{'.'.join(str(p) for p in e['loc'])}` {e['msg']} (got {e.get('input')!r})"
                for e in exc.errors()
            )
            raise FrameError(
                f"{where}: invalid sidecar: {problems}. Fix the value or remove the key "
                "to use the configured default.",
                reason="sidecar-invalid",
            ) from None


@dataclass(frozen=True)
class FrameMeta:
    """Resolved metadata of a frame (sidecar merged over configured defaults)."""

    frame_id: str
    pixel_size_pm: float
    dwell_time_us: float | None = None
    stage_x_nm: float = 0.0
    stage_y_nm: float = 0.0
    scan_rotation_deg: float = 0.0
    acquired_at: str | None = None
    detector: str = "HAADF"
    extra: dict = field(default_factory=dict)
    beam_current_pa: float | None = None
    series_id: str | None = None

    def to_json(self) -> dict:
        d = {k: getattr(self, k) for k in (
            "frame_id", "pixel_size_pm", "dwell_time_us", "stage_x_nm", "stage_y_nm",
            "scan_rotation_deg", "acquired_at", "detector", "beam_current_pa",
             "series_id")}
        d["extra"] = dict(self.extra)
        return d


@dataclass(frozen=True)
class Frame:
    """One image with its metadata.  The pixel array is read-only."""

    pixels: np.ndarray
    meta: FrameMeta
    path: str | None = None

    @property
    def frame_id(self) -> str:
        return self.meta.frame_id

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(self.pixels.shape)  # type: ignore[return-value]


def sidecar_path(image_path: str | os.PathLike) -> Path:
    """The sidecar that belongs to `image_path` (same stem, ``.json``)."""
    p = Path(image_path)
    return p.with_suffix(".json")


def read_sidecar(path: str | os.PathLike) -> Sidecar:
    """Read and validate one sidecar file."""
    path = Path(path)
    try:
        _check_regular(path, what="sidecar")
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise FrameError(f"{path}: sidecar vanished before it could be read",
                         reason="vanished", path=path) from None
    except UnicodeDecodeError as exc:
        raise FrameError(f"{path}: sidecar is not UTF-8 text ({exc.reason} at byte {exc.start})",
                         reason="sidecar-not-json", path=path) from None
    except OSError as exc:
        raise FrameError(f"{path}: cannot read sidecar: {exc.strerror}", reason="unreadable",
                         path=path) from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise FrameError(
            f"{path}: sidecar is not valid JSON ({exc.msg} at line {exc.lineno}, column "
            f"{exc.colno}); write it as a JSON object of the documented keys",
            reason="sidecar-not-json", path=path) from None
    try:
        return Sidecar.parse(data, where=str(path))
    except FrameError as exc:
        exc.path = str(path)
        raise


def read_image(path: str | os.PathLike) -> np.ndarray:
    """Read the pixels of a TIFF or NPY frame and check they are usable.

    Raises
    ------
    FrameError
        For a missing, empty, truncated or unreadable file, an unsupported
        suffix or dtype, a shape that is not 2D, an absurd size, or NaN/inf.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in IMAGE_SUFFIXES:
        raise FrameError(f"{path}: not a frame file; expected one of {', '.join(IMAGE_SUFFIXES)}",
                         reason="unsupported-format", path=path)
    try:
        size = _check_regular(path, what="image").st_size
    except FileNotFoundError:
        raise FrameError(f"{path}: file vanished before it could be read", reason="vanished",
                         path=path) from None
    if size == 0:
        raise FrameError(f"{path}: file is empty (0 bytes); was it still being written?",
                         reason="empty-file", path=path)
    try:
        pixels = _read_npy(path) if suffix == ".npy" else _read_tiff(path)
    except FrameError:
        raise
    except FileNotFoundError:
        raise FrameError(f"{path}: file vanished while being read", reason="vanished",
                         path=path) from None
    except MemoryError:
        raise FrameError(f"{path}: declared image size does not fit in memory",
                         reason="too-large", path=path) from None
    except (ValueError, OSError, EOFError, KeyError, IndexError, struct.error) as exc:
        # decoder failures on a damaged file; programming errors still propagate
        raise FrameError(f"{path}: cannot decode image ({type(exc).__name__}: {exc}); the file "
                         "is truncated or not a valid image", reason="unreadable",
                         path=path) from None
    return check_pixels(pixels, where=str(path))


def _check_regular(path: Path, *, what: str) -> os.stat_result:
    """stat() `path` (following links) and refuse anything but a regular file.

    A FIFO or a device named like a frame would block the reader or never end.
    """
    st = path.stat()
    if not stat.S_ISREG(st.st_mode):
        raise FrameError(f"{path}: the {what} is not a regular file (a pipe, device or "
                         "socket); write frames as ordinary files", reason="not-a-file",
                         path=path)
    return st


def check_inside(path: str | os.PathLike, root: str | os.PathLike, *, what: str = "file") -> None:
    """Refuse `path` when it resolves (through symbolic links) outside the folder `root`.

    Whoever can write the watched folder could otherwise make the daemon read
    any file the daemon's user can read, by linking to it.
    """
    real = Path(os.path.realpath(path))
    real_root = Path(os.path.realpath(root))
    if real != real_root and real_root not in real.parents:
        raise FrameError(f"{path}: the {what} is a link to {real}, outside the folder "
                         f"{real_root}; copy the file in instead of linking to it",
                         reason="outside-folder", path=path)


def check_not_constant(pixels: np.ndarray, *, where: str) -> None:
    """Refuse an image whose pixels all hold the same value.

    A constant frame carries no specimen information: a blanked beam, a
    detector that read nothing, or a writer that saved an empty buffer.  It is
    bad data rather than "no lattice found", so it is set aside with its own
    reason (common practice: such frames are discarded at acquisition).
    """
    flat = pixels.reshape(-1)
    if flat.size and not (flat != flat[0]).any():
        raise FrameError(f"{where}: every pixel has the value {flat[0].item()!r}; a constant "
                         "frame holds no image (beam blanked, detector not read out, or an "
                         "empty buffer saved)", reason="constant")


def check_pixels(pixels: np.ndarray, *, where: str) -> np.ndarray:
    """Validate an image array (2D, numeric, finite, not empty) and return it."""
    pixels = np.asarray(pixels)
    if pixels.dtype.kind not in _ALLOWED_KINDS:
        raise FrameError(f"{where}: unsupported pixel type {pixels.dtype}; use an integer or "
                         "float image", reason="bad-dtype", path=None)
    if pixels.ndim == 3 and 1 in pixels.shape:
        pixels = pixels.reshape([n for n in pixels.shape if n != 1][:2] or (1, 1))
    if pixels.ndim != 2:
        raise FrameError(f"{where}: image must be 2D, got shape {pixels.shape}; save one frame "
                         "per file", reason="not-2d")
    if pixels.size == 0 or min(pixels.shape) < 8:
        raise FrameError(f"{where}: image of shape {pixels.shape} is too small to hold a lattice "
                         "(need at least 8 x 8 pixels)", reason="too-small")
    if pixels.size > MAX_FRAME_PIXELS:
        raise FrameError(f"{where}: image of shape {pixels.shape} is larger than the "
                         f"{MAX_FRAME_PIXELS} pixels accepted", reason="too-large")
    if pixels.dtype.kind == "f":
        bad = ~np.isfinite(pixels)
        if bad.any():
            n = int(bad.sum())
            r, c = np.argwhere(bad)[0]
            raise FrameError(f"{where}: {n} pixel(s) are NaN or infinite (first at row {r}, "
                             f"col {c}); the detector read-out is corrupt", reason="non-finite")
    return pixels


def _read_npy(path: Path) -> np.ndarray:
    with open(path, "rb") as fh:
        try:
            version = np.lib.format.read_magic(fh)
            if version == (1, 0):
                shape, _fortran, dtype = np.lib.format.read_array_header_1_0(fh)
            else:
                shape, _fortran, dtype = np.lib.format.read_array_header_2_0(fh)
        except ValueError as exc:
            raise FrameError(f"{path}: not a valid .npy file ({exc})", reason="unreadable",
                             path=path) from None
        n_items = math.prod(shape)
        if n_items > MAX_FRAME_PIXELS:
            raise FrameError(f"{path}: declared shape {shape} is larger than the "
                             f"{MAX_FRAME_PIXELS} pixels accepted", reason="too-large", path=path)
        if dtype.hasobject:
            raise FrameError(f"{path}: .npy holds Python objects; only numeric images are read "
                             "(objects would need unpickling, which we never do)",
                             reason="bad-dtype", path=path)
        expected = n_items * dtype.itemsize
        remaining = path.stat().st_size - fh.tell()
        if remaining < expected:
            raise FrameError(f"{path}: truncated: header declares {expected} bytes of pixels, "
                             f"file holds {remaining}", reason="truncated", path=path)
    return np.load(path, allow_pickle=False)


def _read_tiff(path: Path) -> np.ndarray:
    import tifffile

    try:
        with tifffile.TiffFile(path) as tif:
            if len(tif.pages) == 0:
                raise FrameError(f"{path}: TIFF holds no image pages", reason="unreadable",
                                 path=path)
            page = tif.pages[0]
            n_items = math.prod(page.shape)
            if n_items > MAX_FRAME_PIXELS:
                raise FrameError(f"{path}: declared shape {page.shape} is larger than the "
                                 f"{MAX_FRAME_PIXELS} pixels accepted", reason="too-large",
                                 path=path)
            if len(tif.pages) > 1 and len(tif.series) and len(tif.series[0].shape) > 2:
                raise FrameError(f"{path}: TIFF holds a stack of {len(tif.pages)} pages; save "
                                 "one frame per file", reason="not-2d", path=path)
            return page.asarray()
    except tifffile.TiffFileError as exc:
        raise FrameError(f"{path}: not a readable TIFF ({exc}); the file is truncated or not "
                         "an image", reason="unreadable", path=path) from None


def resolve_meta(sidecar: Sidecar | None, *, default_id: str, defaults: dict | None = None,
                 where: str) -> FrameMeta:
    """Merge a sidecar over configured defaults into a :class:`FrameMeta`.

    `defaults` maps sidecar keys to configured fallback values (``None`` for
    no fallback).  A frame with no pixel size from either is rejected.
    """
    defaults = dict(defaults or {})
    values: dict[str, Any] = {}
    known = ("frame_id", "pixel_size_pm", "dwell_time_us", "stage_x_nm", "stage_y_nm",
             "scan_rotation_deg", "acquired_at", "detector", "beam_current_pa",
             "series_id")
    extra: dict = {}
    if sidecar is not None:
        for key in known:
            v = getattr(sidecar, key)
            if v is not None:
                values[key] = v
        extra = dict(sidecar.model_extra or {})
    for key in known:
        if key not in values and defaults.get(key) is not None:
            values[key] = defaults[key]
    if values.get("pixel_size_pm") is None:
        raise FrameError(
            f"{where}: no pixel size: put \"pixel_size_pm\" in the frame's sidecar, give "
            "--pixel-size-pm PM, or set `frame_defaults.pixel_size_pm` in the configuration "
            "(a TIFF's resolution tags are used when they give a plausible size)",
            reason="no-pixel-size")
    if isinstance(values.get("acquired_at"), datetime):
        values["acquired_at"] = values["acquired_at"].isoformat()
    values.setdefault("frame_id", default_id)
    return FrameMeta(**values, extra=extra)


def read_frame(path: str | os.PathLike, *, defaults: dict | None = None,
               confine_to: str | os.PathLike | None = None) -> Frame:
    """Read an image file and its optional sidecar into a :class:`Frame`.

    Parameters
    ----------
    path : path-like
        ``.tif``, ``.tiff`` or ``.npy`` file.
    defaults : dict, optional
        Fallback metadata for keys the sidecar does not give (e.g. from
        ``Settings.frame_defaults``).
    confine_to : path-like, optional
        A folder the image and its sidecar must really be in: a symbolic link
        leading out of it is refused (reason ``outside-folder``) before anything
        is read.  The daemon confines every frame to the folder it was found in.

    A frame whose pixels are all equal is refused (reason ``constant``) after
    its metadata, so a missing pixel size is still reported as such.
    """
    path = Path(path)
    sc_path = sidecar_path(path)
    if confine_to is not None:
        check_inside(path, confine_to, what="image")
        if os.path.lexists(sc_path):
            check_inside(sc_path, confine_to, what="sidecar")
    pixels = read_image(path)
    try:
        sidecar = read_sidecar(sc_path) if sc_path.exists() else None
    except FrameError as exc:
        exc.path = exc.path or str(path)
        raise
    source = None
    if sidecar is None or sidecar.pixel_size_pm is None:
        # No pixel size in a sidecar: a configured one (--pixel-size-pm, which the user
        # set on purpose) comes first, then the TIFF's own resolution tags; say which.
        if (defaults or {}).get("pixel_size_pm") is not None:
            source = "configuration (--pixel-size-pm or frame_defaults.pixel_size_pm)"
        elif path.suffix.lower() in (".tif", ".tiff"):
            from_tags = tiff_pixel_size_pm(path)
            if from_tags is not None:
                defaults = {**(defaults or {}), "pixel_size_pm": from_tags[0]}
                source = from_tags[1]
    try:
        meta = resolve_meta(sidecar, default_id=path.stem, defaults=defaults, where=str(path))
        check_not_constant(pixels, where=str(path))
    except FrameError as exc:
        exc.path = str(path)
        raise
    if source is not None:
        meta = replace(meta, extra={**meta.extra, "pixel_size_source": source})
    return frame_from_array(pixels, meta, path=str(path))


#: Picometres per unit of the TIFF ResolutionUnit tag (2 inch, 3 centimetre) and of
#: the ``unit`` of ImageJ's description (ResolutionUnit 1, none).
_TIFF_UNIT_PM = {2: 2.54e10, 3: 1e10}
_IMAGEJ_UNIT_PM = {"pm": 1.0, "a": 100.0, "å": 100.0, "angstrom": 100.0, "nm": 1000.0,
                   "um": 1e6, "µm": 1e6, "micron": 1e6, "microns": 1e6}
#: Pixel sizes outside this range (pm) are not taken from tags: a bare 72 or 300 dpi
#: written by general image software would give metres per pixel.
PLAUSIBLE_PIXEL_PM = (0.5, 1e5)


def tiff_pixel_size_pm(path: str | os.PathLike) -> tuple[float, str] | None:
    """The pixel size (pm) in a TIFF's resolution tags, and where it came from; or None.

    Uses XResolution / YResolution (pixels per unit) with ResolutionUnit
    centimetre or inch, or with no unit and ImageJ's ``unit=`` (nm, um, A, pm).
    Returns None when the tags are absent, x and y differ by more than 0.1 %, the
    unit is unknown, or the size is outside :data:`PLAUSIBLE_PIXEL_PM`.
    """
    import tifffile

    try:
        with tifffile.TiffFile(path) as tif:
            page = tif.pages[0]
            tags = page.tags
            if "XResolution" not in tags:
                return None
            xr, yr = tags["XResolution"].value, tags.get("YResolution")
            unit = int(tags["ResolutionUnit"].value) if "ResolutionUnit" in tags else 2
            ij_unit = (tif.imagej_metadata or {}).get("unit") if tif.is_imagej else None
    except Exception:  # noqa: BLE001 - unreadable tags: no pixel size from them
        return None

    def per_unit(v):
        num, den = (v if isinstance(v, tuple) else (v, 1))
        return float(num) / float(den) if den else math.nan

    px_per_unit = per_unit(xr)
    py_per_unit = per_unit(yr.value) if yr is not None else px_per_unit
    if not (px_per_unit > 0 and math.isclose(px_per_unit, py_per_unit, rel_tol=1e-3)):
        return None
    if ij_unit and unit == 1:
        unit_pm = _IMAGEJ_UNIT_PM.get(str(ij_unit).strip().lower())
        unit_name = f"ImageJ unit {ij_unit!r}"
    else:
        unit_pm = _TIFF_UNIT_PM.get(unit)
        unit_name = {2: "inch", 3: "centimetre"}.get(unit, f"ResolutionUnit {unit}")
    if unit_pm is None:
        return None
    pixel_pm = unit_pm / px_per_unit
    if not PLAUSIBLE_PIXEL_PM[0] <= pixel_pm <= PLAUSIBLE_PIXEL_PM[1]:
        return None
    return pixel_pm, (f"TIFF resolution tags ({px_per_unit:.6g} pixels per {unit_name})")


def frame_from_array(pixels, meta: FrameMeta, *, path: str | None = None) -> Frame:
    """Wrap an array (validated, made read-only) and metadata into a Frame."""
    pixels = check_pixels(np.asarray(pixels), where=path or meta.frame_id)
    pixels = np.array(pixels, copy=True)
    pixels.flags.writeable = False
    return Frame(pixels=pixels, meta=meta, path=path)


def write_frame(directory: str | os.PathLike, stem: str, pixels: np.ndarray,
                sidecar: dict | None = None, *, fmt: str = "tif") -> Path:
    """Write a frame the way a well-behaved acquisition writer does.

    The image is written to a hidden temporary name and renamed into place,
    then the sidecar likewise, so a watcher that waits for the sidecar never
    sees a partial file.  Returns the image path.
    """
    import tifffile

    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    if fmt not in ("tif", "tiff", "npy"):
        raise ValueError(f"`fmt` must be 'tif', 'tiff' or 'npy', got {fmt!r}")
    final = directory / f"{stem}.{fmt}"
    tmp = directory / f".{stem}.{fmt}.part"
    if fmt == "npy":
        with open(tmp, "wb") as fh:
            np.save(fh, np.asarray(pixels), allow_pickle=False)
    else:
        tifffile.imwrite(tmp, np.asarray(pixels))
    os.replace(tmp, final)
    if sidecar is not None:
        write_json_atomic(directory / f"{stem}.json", sidecar)
    return final


def write_text_atomic(path: str | os.PathLike, text: str) -> None:
    """Write text to a temporary file in the same folder, then rename it into place.

    A reader never sees half a file.  On any failure (disk full, killed half-way)
    no temporary file is left behind; the caller sees the error and the old
    file (if any) is untouched.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.part")
    try:
        with open(tmp, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def write_json_atomic(path: str | os.PathLike, data: Any) -> None:
    """Write JSON atomically (see :func:`write_text_atomic`)."""
    write_text_atomic(path, json.dumps(data, indent=1, default=str))
