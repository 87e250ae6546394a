"""Property-based tests of every parser that reads untrusted input.

The sidecar (a file anyone with write access to the watched folder controls),
the frame message of the ingest socket and the command requests: whatever
they hold, the parser either returns a validated value or raises
:class:`FrameError` with one of the documented reasons (commands: an error
reply).  Never another exception, never a crash.  Hypothesis runs
derandomized, so every run tries the same examples.
"""

import json
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from livequant.daemon.commands import CommandServer
from livequant.frames import FrameError, Sidecar, read_sidecar
from livequant.wire import _WIRE_DTYPES, decode_frame_message, encode_frame_message

FUZZ = settings(derandomize=True, deadline=None, max_examples=300,
                suppress_health_check=[HealthCheck.too_slow,
                                       HealthCheck.function_scoped_fixture])

SIDECAR_REASONS = {"sidecar-not-json", "sidecar-not-object", "sidecar-invalid", "vanished",
                   "unreadable"}
MESSAGE_REASONS = {"bad-message", "bad-dtype", "not-2d", "too-large", "truncated",
                   "sidecar-invalid", "sidecar-not-object", "non-finite", "too-small"}
KEYS = ["frame_id", "pixel_size_pm", "dwell_time_us", "stage_x_nm", "stage_y_nm",
        "scan_rotation_deg", "acquired_at", "detector", "dtype", "shape", "cmd", "id"]

json_scalars = (st.none() | st.booleans() | st.integers(-10**20, 10**20)
                | st.floats(allow_nan=False) | st.text(max_size=20))
json_values = st.recursive(json_scalars, lambda inner: st.lists(inner, max_size=4)
                           | st.dictionaries(st.text(max_size=8), inner, max_size=4),
                           max_leaves=12)
# objects whose keys are mostly the real ones, so the validators are reached
sidecar_like = st.dictionaries(st.sampled_from(KEYS) | st.text(max_size=8), json_values,
                               max_size=8)


def _check_sidecar(sc: Sidecar) -> None:
    """What a sidecar that passed validation guarantees to the rest of the code."""
    if sc.pixel_size_pm is not None:
        assert math.isfinite(sc.pixel_size_pm) and sc.pixel_size_pm > 0
    if sc.dwell_time_us is not None:
        assert math.isfinite(sc.dwell_time_us) and sc.dwell_time_us > 0
    for name in ("stage_x_nm", "stage_y_nm", "scan_rotation_deg"):
        v = getattr(sc, name)
        assert v is None or math.isfinite(v)
    assert sc.frame_id is None or isinstance(sc.frame_id, str)
    assert sc.detector is None or isinstance(sc.detector, str)


@FUZZ
@given(data=json_values | sidecar_like)
def test_sidecar_parse_accepts_or_names_the_problem(data):
    try:
        sc = Sidecar.parse(data, where="fuzz.json")
    except FrameError as exc:
        assert exc.reason in SIDECAR_REASONS and "fuzz.json" in str(exc)
    else:
        assert isinstance(data, dict)
        _check_sidecar(sc)


@FUZZ
@given(raw=st.binary(max_size=200) | sidecar_like.map(lambda d: json.dumps(d).encode()))
def test_sidecar_file_of_any_bytes(tmp_path_factory, raw):
    p = tmp_path_factory.mktemp("sc") / "f.json"
    p.write_bytes(raw)
    try:
        sc = read_sidecar(p)
    except FrameError as exc:
        assert exc.reason in SIDECAR_REASONS and "f.json" in str(exc)
    else:
        _check_sidecar(sc)


@FUZZ
@given(px=st.floats(min_value=1e-3, max_value=1e6), dwell=st.floats(min_value=1e-3, max_value=1e6),
       x=st.floats(-1e6, 1e6), rot=st.floats(-360, 360), fid=st.text(min_size=1, max_size=30))
def test_valid_sidecar_values_survive_parsing(px, dwell, x, rot, fid):
    sc = Sidecar.parse({"pixel_size_pm": px, "dwell_time_us": dwell, "stage_x_nm": x,
                        "scan_rotation_deg": rot, "frame_id": fid, "note": [1, "a"]}, where="s")
    assert (sc.pixel_size_pm, sc.dwell_time_us, sc.stage_x_nm, sc.scan_rotation_deg,
            sc.frame_id) == (px, dwell, x, rot, fid)
    assert sc.model_extra == {"note": [1, "a"]}


@FUZZ
@given(parts=st.lists(st.binary(max_size=64), max_size=5))
def test_frame_message_of_random_parts(parts):
    try:
        decode_frame_message(parts)
    except FrameError as exc:
        assert exc.reason in MESSAGE_REASONS


@st.composite
def frames(draw):
    dtype = np.dtype(draw(st.sampled_from(sorted(_WIRE_DTYPES))))
    shape = (draw(st.integers(8, 24)), draw(st.integers(8, 24)))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    if dtype.kind == "f":
        pixels = rng.normal(100, 10, shape).astype(dtype)
    else:
        info = np.iinfo(dtype)
        pixels = rng.integers(max(info.min, -1000), min(info.max, 1000), shape,
                              endpoint=True).astype(dtype)
    return pixels


@FUZZ
@given(pixels=frames(), px=st.floats(min_value=0.1, max_value=1000))
def test_frame_message_round_trip(pixels, px):
    out, sc = decode_frame_message(encode_frame_message(pixels, {"frame_id": "r",
                                                                 "pixel_size_pm": px}))
    np.testing.assert_array_equal(out, pixels)
    assert out.dtype == pixels.dtype and sc.pixel_size_pm == px


@FUZZ
@given(pixels=frames(), header_patch=sidecar_like, cut=st.integers(0, 64))
def test_frame_message_with_a_tampered_header_or_payload(pixels, header_patch, cut):
    """A valid message with random header keys replaced and the payload cut short:
    either still a valid frame (and then exactly the shape and dtype it declares) or
    a FrameError with a documented reason."""
    topic, header, payload = encode_frame_message(pixels, {"pixel_size_pm": 10.0})
    h = json.loads(header)
    h.update(header_patch)
    try:
        out, sc = decode_frame_message([topic, json.dumps(h).encode(), payload[cut:]])
    except FrameError as exc:
        assert exc.reason in MESSAGE_REASONS
    else:
        assert list(out.shape) == h["shape"] and out.dtype == np.dtype(h["dtype"])
        assert np.isfinite(out).all()
        _check_sidecar(sc)


# ---------------------------------------------------------------- commands


def _server():
    return CommandServer(None, "tcp://127.0.0.1:0", {
        "status": lambda req: {"state": "running"},
        "pause": lambda req: {"state": "paused"},
        "accept": lambda req: {"accepted": req["id"]},
    })


def _check_reply(reply):
    assert isinstance(reply, dict) and isinstance(reply.get("ok"), bool)
    if not reply["ok"]:
        assert isinstance(reply["error"], str) and reply["error"]
    json.dumps(reply)  # always sendable


@FUZZ
@given(raw=st.binary(max_size=300))
def test_command_of_random_bytes_gets_a_reply(raw):
    _check_reply(_server().answer(raw))


@FUZZ
@given(request=json_values | sidecar_like | st.fixed_dictionaries(
    {"cmd": st.sampled_from(["status", "pause", "accept", "nope"]) | json_values},
    optional={"id": json_values, "extra": json_values}))
def test_command_of_random_json_gets_a_reply(request):
    reply = _server().answer(json.dumps(request).encode())
    _check_reply(reply)
    if reply["ok"]:
        assert isinstance(request, dict) and request["cmd"] in ("status", "pause", "accept")
