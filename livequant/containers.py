"""Container files: HDF5 (with the open EMD 0.2 layout), MRC 2014 and multi-page TIFF.

A container holds several images; each becomes a frame of its own.  A frame
inside a container is named by a *reference*: the file's path, ``#`` and a key
inside the file.

==================  ======================================  ========================
file                key of one image                        frame id
==================  ======================================  ========================
``run.tif`` stack   ``run.tif#3`` (image page 3, from 0)    ``run#3``
``run.mrc`` stack   ``run.mrc#3`` (section 3 along z)       ``run#3``
``run.h5`` / .emd   ``run.h5#/data/survey/data`` (2D)       ``run#data.survey``
                    ``run.h5#/data/series/data[3]`` (3D)    ``run#data.series#3``
==================  ======================================  ========================

A TIFF or MRC file holding one image keeps the plain path and the id of a
single frame (its stem), exactly as before.  In HDF5 the images are the
``data`` datasets of EMD data groups (groups with attribute
``emd_group_type = 1``) when the file has any, otherwise every numeric dataset
of 2 or 3 dimensions; a 3D dataset is a stack along its non-spatial axis (EMD:
the axis whose ``dim`` vector is not in a length unit; otherwise the first).

Metadata the formats define fill the sidecar keys: the pixel size from EMD's
``dim`` vectors (their ``units``), from MRC's voxel size (Angstrom) and from an
ImageJ-style TIFF (``unit`` and the X resolution).  A JSON sidecar
``NAME.json`` beside the container applies to every image in it and overrides
those values; its ``frame_id``, if any, replaces ``NAME`` in the ids.

Every problem is a :class:`~livequant.frames.FrameError` naming the file and,
where it is about one image, the dataset or index.  Listing a container
(:func:`container_members`) never raises for a damaged file: it returns the
plain path, and reading that gives the error (so it is quarantined with its
reason like any bad frame).

References:
    EMD 0.2 (Electron Microscopy Dataset), emdatasets.com, "EMD v0.1/0.2 specification":
    data groups, ``data`` and ``dim1..dimN`` with ``name``/``units`` attributes.
    MRC 2014 format, ccpem.ac.uk/mrc_format; read with the ``mrcfile`` library.
"""

from __future__ import annotations

import hashlib
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from livequant.frames import (IMAGE_SUFFIXES, MAX_FRAME_PIXELS, Frame, FrameError,
                              check_inside, check_not_constant, check_pixels, frame_from_array,
                              read_frame, read_sidecar, resolve_meta, sidecar_path)

__all__ = ["HDF5_SUFFIXES", "MRC_SUFFIXES", "CONTAINER_SUFFIXES", "FRAME_FILE_SUFFIXES",
           "container_members", "split_ref", "ref_name", "read_any", "read_pixels",
           "member_sha256", "is_member_ref",
           "iter_frames"]

HDF5_SUFFIXES = (".h5", ".hdf5", ".hdf", ".emd")
MRC_SUFFIXES = (".mrc", ".mrcs")
CONTAINER_SUFFIXES = HDF5_SUFFIXES + MRC_SUFFIXES
#: Every file name ending the watched folder and ``reprocess`` pick up.
FRAME_FILE_SUFFIXES = IMAGE_SUFFIXES + CONTAINER_SUFFIXES

_INDEXED = re.compile(r"^(?P<path>.*)\[(?P<index>\d+)\]$")
_UNSAFE_ID = re.compile(r"[^A-Za-z0-9._#-]")

#: Length units seen in EMD ``units`` attributes (after removing "[", "]" and "_"), in pm.
_LENGTH_PM = {"m": 1e12, "mm": 1e9, "um": 1e6, "µm": 1e6, "micron": 1e6, "microns": 1e6,
              "nm": 1e3, "a": 100.0, "å": 100.0, "ang": 100.0, "angstrom": 100.0,
              "angstroms": 100.0, "pm": 1.0}


def _unit_pm(units: str | None) -> float | None:
    """Picometres per `units` for a length unit, else None (``[n_m]`` reads as nm)."""
    if units is None:
        return None
    text = str(units).strip().strip("[]").replace("_", "").strip().lower()
    return _LENGTH_PM.get(text)


def _suffix(path) -> str:
    return Path(path).suffix.lower()


def is_member_ref(ref: str) -> bool:
    """Whether `ref` names one image inside a container (``FILE#KEY``), not a plain file."""
    return split_ref(ref)[1] is not None


def split_ref(ref: str | os.PathLike) -> tuple[Path, str | None]:
    """Split ``FILE#KEY`` into the file and the key; a plain file path gives ``(path, None)``.

    The file is the shortest prefix ending before a ``#`` that names a file with a
    container or TIFF suffix, so file names may contain ``#`` themselves.
    """
    text = os.fspath(ref)
    if "#" not in text:
        return Path(text), None
    start = 0
    while True:
        k = text.find("#", start)
        if k < 0:
            return Path(text), None
        head = text[:k]
        if _suffix(head) in CONTAINER_SUFFIXES + (".tif", ".tiff") and os.path.isfile(head):
            return Path(head), text[k + 1:]
        start = k + 1


def ref_name(ref: str | os.PathLike) -> str:
    """Short name of a frame for messages: the file name, and ``#KEY`` inside a container."""
    path, key = split_ref(ref)
    if key is None:  # a plain file, or a container that is gone (split by its suffix then)
        head, sep, tail = os.fspath(ref).partition("#")
        if sep and _suffix(head) in CONTAINER_SUFFIXES + (".tif", ".tiff"):
            return f"{Path(head).name}#{tail}"
        return path.name
    return f"{path.name}#{key}"


def member_sha256(container_sha256: str, key: str) -> str:
    """Content hash of one image of a container: the container's hash and the key.

    Two copies of one container under different names share their members'
    hashes, so the ledger sets the second copy aside as a duplicate.
    """
    return hashlib.sha256(f"{container_sha256}#{key}".encode()).hexdigest()


# ===================================================================== listing


def container_members(path: str | os.PathLike) -> list[str]:
    """The references of the frames in one file.

    A single-image TIFF or MRC, an NPY file and any file that cannot be opened
    give ``[path]`` (reading it then gives the frame or the specific error); a
    stack gives one reference per image; an HDF5 file one per image dataset or
    stack entry (a dataset that is not an image, e.g. 4D, is still listed, so
    that reading it reports why it is not analysed).
    """
    path = Path(path)
    suffix = _suffix(path)
    try:
        if suffix in (".tif", ".tiff"):
            n = _tiff_page_count(path)
            return [str(path)] if n <= 1 else [f"{path}#{i}" for i in range(n)]
        if suffix in MRC_SUFFIXES:
            n = _mrc_section_count(path)
            return [str(path)] if n <= 1 else [f"{path}#{i}" for i in range(n)]
        if suffix in HDF5_SUFFIXES:
            keys = _hdf5_keys(path)
            return [f"{path}#{k}" for k in keys] if keys else [str(path)]
    except FrameError:
        return [str(path)]
    except Exception:  # noqa: BLE001 - any decoder failure: reading the path reports it
        return [str(path)]
    return [str(path)]


def _tiff_page_count(path: Path) -> int:
    import tifffile

    with tifffile.TiffFile(path) as tif:
        return len(_tiff_images(tif))


def _tiff_images(tif) -> list:
    """The image pages of a TIFF: every page but reduced-resolution copies (previews)."""
    pages = list(tif.pages)
    full = [p for p in pages if not getattr(p, "is_reduced", False)]
    return full or pages


def _mrc_section_count(path: Path) -> int:
    import mrcfile

    # mmap (not header_only): checks the data block is really there, reads no pixels
    with mrcfile.mmap(path, mode="r", permissive=False) as mrc:
        return 1 if mrc.data is None or mrc.data.ndim < 3 else int(mrc.data.shape[0])


def _hdf5_keys(path: Path) -> list[str]:
    """Keys (dataset paths, ``[i]`` for a stack entry) of the images of an HDF5 file."""
    import h5py

    with h5py.File(path, "r") as fh:
        groups: list[str] = []
        datasets: list[str] = []

        def visit(name, obj):
            if isinstance(obj, h5py.Group) and _is_emd_group(obj):
                groups.append(name)
            elif isinstance(obj, h5py.Dataset) and obj.dtype.kind in "biuf" and obj.ndim >= 2:
                datasets.append(name)

        fh.visititems(visit)
        if groups:
            names = []
            for g in sorted(groups):
                ds = fh[g].get("data")
                names.append(f"/{g}/data" if ds is not None else f"/{g}")
        else:
            names = [f"/{d}" for d in sorted(datasets)]
        keys = []
        for name in names:
            obj = fh.get(name)
            if isinstance(obj, h5py.Dataset) and obj.ndim == 3:
                axis = _stack_axis(fh, name)[0]
                keys += [f"{name}[{i}]" for i in range(obj.shape[axis])]
            else:
                keys.append(name)  # 2D, or not an image: reading says which
        return keys


def _is_emd_group(group) -> bool:
    value = group.attrs.get("emd_group_type")
    try:
        return value is not None and int(np.asarray(value).reshape(-1)[0]) == 1
    except (TypeError, ValueError):
        return False


def _dims(fh, dataset_name: str) -> list[tuple[np.ndarray, str | None]] | None:
    """The EMD ``dim1..dimN`` vectors and units beside a ``data`` dataset, or None."""
    parent_name = dataset_name.rsplit("/", 1)[0] or "/"
    parent = fh[parent_name]
    if not _is_emd_group(parent):
        return None
    ds = fh[dataset_name]
    out = []
    for k in range(1, ds.ndim + 1):
        dim = parent.get(f"dim{k}")
        if dim is None:
            return None
        units = dim.attrs.get("units")
        if isinstance(units, bytes):
            units = units.decode("utf-8", "replace")
        out.append((np.asarray(dim[()], dtype=float).reshape(-1), None if units is None
                    else str(units)))
    return out


def _stack_axis(fh, dataset_name: str) -> tuple[int, list | None]:
    """Axis along which a 3D dataset is a stack, and its EMD dims (or None).

    EMD: the one axis whose ``dim`` vector is not a length; without EMD dims, or
    when the units do not tell, axis 0 (the usual C-order stack of images).
    """
    dims = _dims(fh, dataset_name)
    if dims is not None:
        non_length = [k for k, (_v, u) in enumerate(dims) if _unit_pm(u) is None]
        if len(non_length) == 1:
            return non_length[0], dims
    return 0, dims


# ===================================================================== reading


def read_any(ref: str | os.PathLike, *, defaults: dict | None = None,
             confine_to: str | os.PathLike | None = None) -> Frame:
    """Read a frame from a plain frame file or from one image of a container.

    Parameters
    ----------
    ref : str or path-like
        A path (``.tif``, ``.tiff``, ``.npy``; a container path holding one image)
        or a reference ``FILE#KEY`` from :func:`container_members`.
    defaults : dict, optional
        Configured fallback metadata (``Settings.frame_defaults.as_dict()``).
    confine_to : path-like, optional
        Folder the file and its sidecar must really be in (see
        :func:`livequant.frames.read_frame`).

    Raises
    ------
    FrameError
        With the reason tag of the problem and a message naming the file and
        the dataset or index.
    """
    path, key = split_ref(ref)
    suffix = _suffix(path)
    if key is None and suffix in IMAGE_SUFFIXES:
        return read_frame(path, defaults=defaults, confine_to=confine_to)
    if confine_to is not None:
        check_inside(path, confine_to, what="container")
        sc = sidecar_path(path)
        if os.path.lexists(sc):
            check_inside(sc, confine_to, what="sidecar")
    if path.is_dir():
        raise FrameError(f"{path}: is a folder, not a frame file", reason="not-a-file",
                         path=path)
    if not path.is_file():
        raise FrameError(f"{path}: file vanished before it could be read", reason="vanished",
                         path=path)
    pixels, found, where = _read_container_image(path, suffix, key)
    pixels = check_pixels(pixels, where=where)
    return _frame(pixels, path, key, found, defaults=defaults, where=where)


def _read_container_image(path: Path, suffix: str, key):
    """``(pixels, what the format says, where)`` of image `key` of a container."""
    if suffix in (".tif", ".tiff"):
        return _read_tiff_page(path, key)
    if suffix in MRC_SUFFIXES:
        return _read_mrc_section(path, key)
    if suffix in HDF5_SUFFIXES:
        return _read_hdf5_image(path, key)
    raise FrameError(f"{path}: not a frame or container file; expected one of "
                     f"{', '.join(FRAME_FILE_SUFFIXES)}", reason="unsupported-format",
                     path=path)


def read_pixels(ref: str | os.PathLike) -> np.ndarray:
    """Only the pixels of a frame file or of one image of a container (no metadata).

    Raises
    ------
    FrameError
        As :func:`read_any`, for the image itself.
    """
    path, key = split_ref(ref)
    suffix = _suffix(path)
    if key is None and suffix in IMAGE_SUFFIXES:
        from livequant.frames import read_image

        return read_image(path)
    pixels, _found, where = _read_container_image(path, suffix, key)
    return check_pixels(pixels, where=where)


def _frame(pixels, path: Path, key: str | None, found: dict, *, defaults, where) -> Frame:
    """Metadata: configured defaults, under the container's own, under the JSON sidecar."""
    sc_path = sidecar_path(path)
    sidecar = None
    if sc_path.exists():
        try:
            sidecar = read_sidecar(sc_path)
        except FrameError as exc:
            exc.path = exc.path or str(path)
            raise
    name = path.stem
    if sidecar is not None and sidecar.frame_id:
        name = sidecar.frame_id
        sidecar = sidecar.model_copy(update={"frame_id": None})
    frame_id = name if key is None else f"{name}#{_id_part(key)}"
    merged = dict(defaults or {})
    merged.update({k: v for k, v in found.items() if v is not None})
    try:
        meta = resolve_meta(sidecar, default_id=frame_id, defaults=merged, where=where)
        check_not_constant(pixels, where=where)
    except FrameError as exc:
        exc.path = str(path)
        raise
    extra = dict(meta.extra)
    extra.setdefault("container", {"file": str(path), "key": key})
    from dataclasses import replace

    return frame_from_array(pixels, replace(meta, extra=extra),
                            path=str(path) if key is None else f"{path}#{key}")


def _id_part(key: str) -> str:
    """The part of a frame id after ``#`` for a key (safe as a folder name)."""
    m = _INDEXED.match(key)
    index = None
    if m:
        key, index = m.group("path"), m.group("index")
    part = key.strip("/")
    if part.endswith("/data"):  # an EMD group's data: the group names the image
        part = part[: -len("/data")]
    part = part.replace("/", ".")
    if index is not None:
        part = f"{part}#{index}"
    part = _UNSAFE_ID.sub("_", part) or "_"
    return part.lstrip(".") or "_"


def _index(key: str | None, n: int, path: Path, what: str) -> int:
    if key is None:
        if n == 1:
            return 0
        raise FrameError(f"{path}: holds {n} {what}s; name one as {path}#INDEX (0 to {n - 1})",
                         reason="not-2d", path=path)
    if not key.isdigit():
        raise FrameError(f"{path}#{key}: {key!r} is not a {what} index (0 to {n - 1})",
                         reason="no-such-image", path=path)
    i = int(key)
    if i >= n:
        raise FrameError(f"{path}#{key}: the file holds {n} {what}s (0 to {n - 1}); there is "
                         f"no {what} {i}", reason="no-such-image", path=path)
    return i


def _decode_error(path: Path, where: str, exc: Exception, what: str) -> FrameError:
    return FrameError(f"{where}: cannot decode the {what} ({type(exc).__name__}: {exc}); the "
                      "file is truncated or damaged", reason="unreadable", path=path)


def _check_size(shape, path: Path, where: str) -> None:
    if math.prod(shape) > MAX_FRAME_PIXELS:
        raise FrameError(f"{where}: declared shape {tuple(shape)} is larger than the "
                         f"{MAX_FRAME_PIXELS} pixels accepted", reason="too-large", path=path)


# ---------------------------------------------------------------- TIFF


def _read_tiff_page(path: Path, key: str | None):
    import tifffile

    where = f"{path}#{key}" if key is not None else str(path)
    try:
        with tifffile.TiffFile(path) as tif:
            pages = _tiff_images(tif)
            if not pages:
                raise FrameError(f"{path}: TIFF holds no image pages", reason="unreadable",
                                 path=path)
            i = _index(key, len(pages), path, "page")
            page = pages[i]
            _check_size(page.shape, path, where)
            pixels = page.asarray()
            found = {"pixel_size_pm": _imagej_pixel_size_pm(tif, page)}
    except FrameError:
        raise
    except (tifffile.TiffFileError, ValueError, OSError, EOFError, KeyError, IndexError) as exc:
        raise _decode_error(path, where, exc, "TIFF page") from None
    return pixels, found, where


def _imagej_pixel_size_pm(tif, page) -> float | None:
    """Pixel size of an ImageJ-style TIFF: X resolution is pixels per ``unit``."""
    meta = getattr(tif, "imagej_metadata", None) or {}
    scale = _unit_pm(meta.get("unit"))
    tag = page.tags.get("XResolution")
    if scale is None or tag is None:
        return None
    num, den = tag.value
    if not num or not den:
        return None
    pixels_per_unit = num / den
    return scale / pixels_per_unit if pixels_per_unit > 0 else None


# ---------------------------------------------------------------- MRC


def _read_mrc_section(path: Path, key: str | None):
    import mrcfile

    where = f"{path}#{key}" if key is not None else str(path)
    try:
        with mrcfile.mmap(path, mode="r", permissive=False) as mrc:
            data = mrc.data
            if data is None:
                raise FrameError(f"{path}: MRC file holds no data block", reason="unreadable",
                                 path=path)
            if data.ndim == 2:
                data = data[np.newaxis]
            i = _index(key, data.shape[0], path, "section")
            _check_size(data.shape[1:], path, where)
            pixels = np.array(data[i])
            vx = float(mrc.voxel_size.x)
            vy = float(mrc.voxel_size.y)
    except FrameError:
        raise
    except (ValueError, OSError, EOFError, IndexError) as exc:
        raise _decode_error(path, where, exc, "MRC section") from None
    found = {}
    if vx > 0 and vy > 0:  # a voxel size of 0 means "not set" (MRC 2014)
        if not math.isclose(vx, vy, rel_tol=1e-4):
            raise FrameError(f"{where}: pixels are not square (voxel size x {vx} A, y {vy} A); "
                             "livequant needs one pixel size", reason="non-square-pixels",
                             path=path)
        found["pixel_size_pm"] = vx * 100.0  # Angstrom -> pm
    return pixels, found, where


# ---------------------------------------------------------------- HDF5 / EMD


def _read_hdf5_image(path: Path, key: str | None):
    import h5py

    if key is None:
        try:
            keys = _hdf5_keys(path)
        except Exception as exc:  # noqa: BLE001 - any decoder failure is the file's
            raise _decode_error(path, str(path), exc, "HDF5 file") from None
        if not keys:
            raise FrameError(f"{path}: the HDF5 file holds no image (no EMD data group, no "
                             "numeric dataset of 2 or 3 dimensions)", reason="no-images",
                             path=path)
        if len(keys) > 1:
            raise FrameError(f"{path}: holds {len(keys)} images; name one as {path}#{keys[0]}",
                             reason="not-2d", path=path)
        key = keys[0]
    where = f"{path}#{key}"
    m = _INDEXED.match(key)
    name, index = (m.group("path"), int(m.group("index"))) if m else (key, None)
    try:
        with h5py.File(path, "r") as fh:
            obj = fh.get(name)
            if obj is None:
                raise FrameError(f"{where}: no dataset {name!r} in the file",
                                 reason="no-such-image", path=path)
            if isinstance(obj, h5py.Group):
                raise FrameError(f"{where}: the EMD data group has no `data` dataset",
                                 reason="not-an-image", path=path)
            if obj.dtype.kind not in "biuf":
                raise FrameError(f"{where}: unsupported pixel type {obj.dtype}; use an integer "
                                 "or float image", reason="bad-dtype", path=path)
            if obj.ndim == 2:
                if index is not None:
                    raise FrameError(f"{where}: the dataset is one 2D image, not a stack",
                                     reason="no-such-image", path=path)
                _check_size(obj.shape, path, where)
                pixels = obj[()]
                dims = _dims(fh, name)
                spatial = dims
            elif obj.ndim == 3:
                axis, dims = _stack_axis(fh, name)
                if index is None:
                    raise FrameError(f"{where}: a stack of {obj.shape[axis]} images; name "
                                     f"one as {where}[INDEX]", reason="not-2d", path=path)
                if index >= obj.shape[axis]:
                    raise FrameError(f"{where}: the stack holds {obj.shape[axis]} images (0 to "
                                     f"{obj.shape[axis] - 1})", reason="no-such-image",
                                     path=path)
                shape2 = [s for k, s in enumerate(obj.shape) if k != axis]
                _check_size(shape2, path, where)
                sel = [slice(None)] * 3
                sel[axis] = index
                pixels = obj[tuple(sel)]
                spatial = None if dims is None else [d for k, d in enumerate(dims) if k != axis]
            else:
                raise FrameError(f"{where}: dataset of shape {obj.shape} ({obj.ndim} "
                                 "dimensions); livequant reads 2D images and 3D stacks of "
                                 "them", reason="not-2d", path=path)
            found = {"pixel_size_pm": _emd_pixel_size_pm(spatial, where, path)}
    except FrameError:
        raise
    except (OSError, ValueError, KeyError, TypeError, RuntimeError) as exc:
        raise _decode_error(path, where, exc, "HDF5 dataset") from None
    return np.asarray(pixels), found, where


def _emd_pixel_size_pm(spatial, where: str, path: Path) -> float | None:
    """Step of the two spatial ``dim`` vectors in pm; None when they do not give one."""
    if not spatial or len(spatial) != 2:
        return None
    steps = []
    for values, units in spatial:
        scale = _unit_pm(units)
        if scale is None or values.size < 2:
            return None
        steps.append(abs(float(values[1] - values[0])) * scale)
    if not all(np.isfinite(steps)) or min(steps) <= 0:
        return None
    if not math.isclose(steps[0], steps[1], rel_tol=1e-4):
        raise FrameError(f"{where}: pixels are not square ({steps[0]:.4g} pm x {steps[1]:.4g} "
                         "pm from the dim vectors); livequant needs one pixel size",
                         reason="non-square-pixels", path=path)
    return steps[0]


# ===================================================================== many files


@dataclass(frozen=True)
class FrameOrError:
    """One entry of :func:`iter_frames`: a frame, or the error reading it."""

    ref: str
    frame: Frame | None = None
    error: FrameError | None = None


def iter_frames(paths, *, defaults: dict | None = None):
    """Every frame of the given files (containers expanded), each read or its error.

    Yields :class:`FrameOrError` in file order, then image order.
    """
    for path in paths:
        for ref in container_members(path):
            try:
                yield FrameOrError(ref, frame=read_any(ref, defaults=defaults))
            except FrameError as exc:
                yield FrameOrError(ref, error=exc)
