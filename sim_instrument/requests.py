"""The ``scan-request`` event: how the daemon asks the instrument for a frame.

On the daemon's events PUB socket a request is the two-part message
``[b"scan-request", JSON]``.  The JSON object has the fields of
:class:`ScanRequest`; stage coordinates are the instrument's own (the frame
centre the stage is commanded to), in nm.  Keys this model does not know are
accepted and passed through into the frame's sidecar under ``request_extra``,
so the publisher may add fields (a score, a reason) without breaking us.
"""

from __future__ import annotations

import json
from typing import Sequence

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

__all__ = ["SCAN_REQUEST_TOPIC", "ScanRequest", "ScanRequestError", "encode_scan_request",
           "decode_scan_request"]

SCAN_REQUEST_TOPIC = b"scan-request"


class ScanRequestError(ValueError):
    """A scan-request message that cannot be acted on; the text says why."""


class ScanRequest(BaseModel):
    """One requested acquisition.

    Attributes
    ----------
    id : str
        Identifier of the request (e.g. the accepted proposal's id); the
        frame id is derived from it.
    center_x_nm, center_y_nm : float
        Commanded stage position of the frame centre, nm.
    fov_nm : float
        Field of view along the fast-scan axis, nm.
    shape_px : (rows, cols)
        Pixel counts; a single integer means square.
    scan_rotation_deg : float
    dwell_time_us, beam_current_pa : float, optional
        Instrument defaults when absent.
    detector : "HAADF" or "ABF", optional
    """

    model_config = ConfigDict(extra="allow", frozen=True)

    id: str = Field(min_length=1, max_length=200)
    center_x_nm: float = Field(allow_inf_nan=False)
    center_y_nm: float = Field(allow_inf_nan=False)
    fov_nm: float = Field(gt=0, le=5000, allow_inf_nan=False)
    shape_px: tuple[int, int] = (512, 512)
    scan_rotation_deg: float = Field(default=0.0, allow_inf_nan=False)
    dwell_time_us: float | None = Field(default=None, gt=0, le=1000)
    beam_current_pa: float | None = Field(default=None, gt=0, le=2000)
    detector: str | None = None

    @field_validator("shape_px", mode="before")
    @classmethod
    def _square(cls, v):
        if isinstance(v, int) and not isinstance(v, bool):
            return (v, v)
        return v

    @field_validator("shape_px")
    @classmethod
    def _shape_limits(cls, v):
        if not all(8 <= n <= 8192 for n in v):
            raise ValueError(f"each of rows, cols must be within 8..8192, got {list(v)}")
        return v

    @field_validator("detector")
    @classmethod
    def _detector(cls, v):
        if v is not None and v.upper() not in ("HAADF", "ABF"):
            raise ValueError(f"must be 'HAADF' or 'ABF', got {v!r}")
        return None if v is None else v.upper()

    @property
    def extra(self) -> dict:
        return dict(self.model_extra or {})


def encode_scan_request(request: ScanRequest | dict) -> list[bytes]:
    """``[b"scan-request", JSON]`` for a request (validated first)."""
    req = request if isinstance(request, ScanRequest) else ScanRequest.model_validate(request)
    return [SCAN_REQUEST_TOPIC, req.model_dump_json().encode("utf-8")]


def decode_scan_request(parts: Sequence[bytes]) -> ScanRequest:
    """Check and decode a scan-request message.

    Raises
    ------
    ScanRequestError
        Wrong number of parts, wrong topic, not JSON, or invalid fields (each
        named).
    """
    if len(parts) != 2:
        raise ScanRequestError(f"scan-request must have 2 parts [topic, JSON], got {len(parts)}")
    topic, body = (bytes(p) for p in parts)
    if topic != SCAN_REQUEST_TOPIC:
        raise ScanRequestError(f"topic {topic[:40]!r} is not {SCAN_REQUEST_TOPIC!r}")
    try:
        data = json.loads(body.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ScanRequestError(f"scan-request body is not UTF-8 JSON ({exc})") from None
    if not isinstance(data, dict):
        raise ScanRequestError("scan-request body must be a JSON object")
    try:
        return ScanRequest.model_validate(data)
    except ValidationError as exc:
        problems = "; ".join(
            f"`{'.'.join(str(p) for p in e['loc'])}` {e['msg']} (got {e.get('input')!r})"
            for e in exc.errors())
        raise ScanRequestError(f"invalid scan-request {data.get('id', '(no id)')!r}: "
                               f"{problems}") from None
