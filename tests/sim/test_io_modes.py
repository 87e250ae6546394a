"""Outputs and modes: folder and socket carry the same frames; replay; serve closes the loop."""

import json
import threading
import time

import numpy as np
import pytest
import zmq

from livequant.frames import read_frame
from livequant.wire import decode_frame_message
from sim_instrument import (
    DriftModel,
    FolderSink,
    FrameTruth,
    ScanEngine,
    ScanRequest,
    ScanRequestError,
    Specimen,
    ZmqSink,
    decode_scan_request,
    encode_scan_request,
)
from sim_instrument.modes import run_replay, run_serve, run_survey, survey_positions

SMALL = dict(fov_nm=3.0, shape_px=(96, 128))


@pytest.fixture(scope="module")
def specimen():
    return Specimen.from_scenario("demo")


@pytest.fixture
def ctx():
    context = zmq.Context()
    yield context
    context.destroy(linger=0)


def _pull(ctx, endpoint):
    sock = ctx.socket(zmq.PULL)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.RCVTIMEO, 5000)
    sock.connect(endpoint)
    return sock


def test_survey_raster_is_serpentine():
    pos = survey_positions(5, (0.0, 0.0), 10.0)
    np.testing.assert_allclose(pos, [[0, 0], [10, 0], [20, 0], [20, 10], [10, 10]])
    pos = survey_positions(4, (1.0, 2.0), (3.0, 2.0))
    np.testing.assert_allclose(pos, [[1, 2], [4, 2], [4, 4], [1, 4]])


def test_folder_and_socket_carry_identical_frames(tmp_path, specimen, ctx):
    out = tmp_path / "watched"
    folder = FolderSink(out)
    zsink = ZmqSink("tcp://127.0.0.1:*", context=ctx, send_timeout_ms=5000)
    pull = _pull(ctx, zsink.endpoint)
    try:
        engine = ScanEngine(specimen, seed=3)
        ids = run_survey(engine, [folder, zsink], frames=3, start_nm=(0.0, -58.0), **SMALL)
        assert len(ids) == 3
        for fid in ids:
            pixels, sidecar = decode_frame_message(pull.recv_multipart())
            frame = read_frame(out / f"{fid}.tif")
            assert sidecar.frame_id == fid
            np.testing.assert_array_equal(pixels, frame.pixels)
            assert pixels.dtype == frame.pixels.dtype
            on_disk = json.loads((out / f"{fid}.json").read_text())
            assert sidecar.model_dump(exclude_none=True, exclude={"acquired_at"}).items() <= \
                on_disk.items()
            assert sidecar.model_extra == {k: v for k, v in on_disk.items()
                                           if k not in type(sidecar).model_fields}
    finally:
        pull.close(linger=0)
        zsink.close()
    # Truth is beside, never inside, the watched folder; the folder holds frames only.
    assert sorted(p.name for p in out.iterdir()) == sorted(
        f"{fid}{suffix}" for fid in ids for suffix in (".tif", ".json"))
    assert not any(p.name.startswith(".") for p in out.iterdir())  # no leftovers
    truth = FrameTruth.load(tmp_path / "watched-truth" / f"{ids[0]}.npz")
    assert truth.meta["sidecar"]["frame_id"] == ids[0]
    assert len(truth.positions_px) == truth.meta["n_columns"] > 50


def test_truth_folder_cannot_be_the_watched_folder(tmp_path):
    with pytest.raises(ValueError, match="must not be the watched folder"):
        FolderSink(tmp_path, truth_dir=tmp_path)


def test_replay_resends_frames_unchanged(tmp_path, specimen):
    src = tmp_path / "src"
    engine = ScanEngine(specimen, drift=DriftModel.none(), seed=1)
    ids = run_survey(engine, [FolderSink(src)], frames=2, **SMALL)
    dst = tmp_path / "dst"
    sent = run_replay(src, [FolderSink(dst, truth_dir=False)], interval_s=0.0, loops=2)
    assert sent == ids + [f"{i}_r2" for i in ids]
    for fid in ids:
        a, b = read_frame(src / f"{fid}.tif"), read_frame(dst / f"{fid}.tif")
        np.testing.assert_array_equal(a.pixels, b.pixels)
        assert a.meta == b.meta
    assert read_frame(dst / f"{ids[0]}_r2.tif").frame_id == f"{ids[0]}_r2"


def test_replay_of_empty_folder_is_an_error(tmp_path):
    with pytest.raises(ValueError, match="no frame files"):
        run_replay(tmp_path, [], interval_s=0.0)


def test_scan_request_schema():
    req = ScanRequest(id="p-7", center_x_nm=1.5, center_y_nm=-2.0, fov_nm=8.0, shape_px=256,
                      score=0.9)
    assert req.shape_px == (256, 256) and req.extra == {"score": 0.9}
    back = decode_scan_request(encode_scan_request(req))
    assert back == req
    with pytest.raises(ScanRequestError, match="`fov_nm`"):
        decode_scan_request([b"scan-request", b'{"id": "x", "center_x_nm": 0, '
                                              b'"center_y_nm": 0, "fov_nm": -1}'])
    with pytest.raises(ScanRequestError, match="`center_y_nm`.*Field required"):
        decode_scan_request([b"scan-request", b'{"id": "x", "center_x_nm": 0, "fov_nm": 3}'])
    with pytest.raises(ScanRequestError, match="not UTF-8 JSON"):
        decode_scan_request([b"scan-request", b"{nope"])
    with pytest.raises(ScanRequestError, match="2 parts"):
        decode_scan_request([b"scan-request"])


def test_serve_acquires_requested_region(tmp_path, specimen, ctx):
    """1. the test binds a PUB socket, as the daemon's events socket;
    2. serve subscribes to it on a thread;
    3. the test publishes a malformed request, then a valid one (repeated: the first
       copies may be lost before the subscription lands), then a second valid one;
    4. repeats of an id are served once; the frames report the requested centre and
       shape; serve stops after two frames."""
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.LINGER, 0)
    pub.bind("tcp://127.0.0.1:*")
    endpoint = pub.getsockopt_string(zmq.LAST_ENDPOINT)
    out = tmp_path / "frames"
    engine = ScanEngine(specimen, seed=2)
    result, stop = {}, threading.Event()

    def serve():
        result["ids"] = run_serve(engine, [FolderSink(out)], endpoint, max_requests=2,
                                  duration_s=20.0, stop=stop, context=ctx, poll_ms=20)

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    try:
        req = {"id": "prop-1", "center_x_nm": -40.0, "center_y_nm": 10.0, "fov_nm": 4.0,
               "shape_px": [64, 96], "scan_rotation_deg": 10.0}
        deadline = time.monotonic() + 15.0
        while thread.is_alive() and time.monotonic() < deadline:
            # Subscriptions take a moment to arrive (slow joiner): repeat until served.
            pub.send_multipart([b"scan-request", b"{broken"])
            pub.send_multipart(encode_scan_request(req))
            if out.exists() and any(out.glob("*.tif")):
                pub.send_multipart(encode_scan_request({**req, "id": "prop-2"}))
            thread.join(0.1)
    finally:
        stop.set()
        thread.join(5.0)
        pub.close(linger=0)
    assert not thread.is_alive()
    assert len(result["ids"]) == 2
    assert [i.split("_")[1] for i in result["ids"]] == ["prop-1", "prop-2"]
    frame = read_frame(out / f"{result['ids'][0]}.tif")
    assert frame.shape == (64, 96)
    assert (frame.meta.stage_x_nm, frame.meta.stage_y_nm) == (-40.0, 10.0)
    assert frame.meta.scan_rotation_deg == 10.0
    assert frame.meta.pixel_size_pm == pytest.approx(4000.0 / 96)
    assert frame.meta.extra["request_id"] == "prop-1"


def test_serve_must_be_bounded(specimen):
    with pytest.raises(ValueError, match="must be bounded"):
        run_serve(ScanEngine(specimen), [], "tcp://127.0.0.1:1")
