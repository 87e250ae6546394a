"""Frames on a ZeroMQ socket: ``[b"frame", header_json, pixels]``.

The header is a JSON object with the sidecar keys plus ``dtype`` and
``shape``; the pixels are the raw C-order bytes.  No pickle, ever.
"""

from __future__ import annotations

import json
import math
from typing import Sequence

import numpy as np

from livequant.frames import MAX_FRAME_PIXELS, FrameError, Sidecar, check_pixels

__all__ = ["FRAME_TOPIC", "encode_frame_message", "decode_frame_message", "MAX_HEADER_BYTES"]

FRAME_TOPIC = b"frame"
MAX_HEADER_BYTES = 64 * 1024
_WIRE_DTYPES = {"uint8", "uint16", "uint32", "int8", "int16", "int32", "int64", "uint64",
                "float32", "float64"}


def encode_frame_message(pixels: np.ndarray, sidecar: dict) -> list[bytes]:
    """Build the multipart message for one frame.

    `sidecar` holds the sidecar keys (``frame_id``, ``pixel_size_pm``, ...).
    """
    pixels = np.ascontiguousarray(pixels)
    if pixels.dtype.name not in _WIRE_DTYPES:
        raise ValueError(f"`pixels` dtype {pixels.dtype} cannot be sent; use one of "
                         f"{sorted(_WIRE_DTYPES)}")
    header = dict(sidecar)
    header["dtype"] = pixels.dtype.str  # explicit byte order, e.g. "<u2"
    header["shape"] = list(pixels.shape)
    return [FRAME_TOPIC, json.dumps(header).encode("utf-8"), pixels.tobytes(order="C")]


def decode_frame_message(parts: Sequence[bytes]) -> tuple[np.ndarray, Sidecar]:
    """Check and decode a multipart frame message.

    Returns the pixel array (read-only) and the validated sidecar.

    Raises
    ------
    FrameError
        For any message that is not exactly a valid frame message; the
        ``reason`` names what was wrong.
    """
    if len(parts) != 3:
        raise FrameError(f"frame message must have 3 parts [topic, header, pixels], got "
                         f"{len(parts)}", reason="bad-message")
    topic, header_raw, payload = (bytes(p) if not isinstance(p, bytes) else p for p in parts)
    if topic != FRAME_TOPIC:
        raise FrameError(f"unknown message topic {topic[:32]!r}; expected {FRAME_TOPIC!r}",
                         reason="bad-message")
    if len(header_raw) > MAX_HEADER_BYTES:
        raise FrameError(f"frame header of {len(header_raw)} bytes exceeds {MAX_HEADER_BYTES}",
                         reason="bad-message")
    try:
        header = json.loads(header_raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise FrameError(f"frame header is not UTF-8 JSON ({exc})", reason="bad-message") from None
    if not isinstance(header, dict):
        raise FrameError("frame header must be a JSON object", reason="bad-message")
    dtype_text = header.pop("dtype", None)
    shape = header.pop("shape", None)
    try:
        dtype = np.dtype(dtype_text) if isinstance(dtype_text, str) else None
    except TypeError:
        dtype = None
    if dtype is None or dtype.name not in _WIRE_DTYPES:
        raise FrameError(f"frame header `dtype` {dtype_text!r} is not one of "
                         f"{sorted(_WIRE_DTYPES)}", reason="bad-dtype")
    if (not isinstance(shape, list) or len(shape) != 2
            or not all(isinstance(n, int) and not isinstance(n, bool) and n > 0 for n in shape)):
        raise FrameError(f"frame header `shape` must be [rows, cols] of positive integers, got "
                         f"{shape!r}", reason="not-2d")
    if math.prod(shape) > MAX_FRAME_PIXELS:
        raise FrameError(f"frame header declares shape {shape}, larger than the "
                         f"{MAX_FRAME_PIXELS} pixels accepted", reason="too-large")
    expected = math.prod(shape) * dtype.itemsize
    if len(payload) != expected:
        raise FrameError(f"frame payload has {len(payload)} bytes, header {shape} x {dtype} "
                         f"needs {expected}", reason="truncated")
    sidecar = Sidecar.parse(header, where="frame message header")
    pixels = np.frombuffer(payload, dtype=dtype).reshape(shape)
    pixels = check_pixels(pixels, where=f"frame message {sidecar.frame_id or '(no id)'}")
    return pixels, sidecar
