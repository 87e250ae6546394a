"""Sources: the completeness rule of the watched folder, and the ingest socket."""

import io
import json
import os
import queue
import threading
import time

import numpy as np
import pytest
import tifffile
import zmq

from livequant.daemon.sources import FolderSource, SocketSource
from livequant.frames import read_frame, write_frame
from livequant.wire import encode_frame_message

from ._helpers import lattice_image, sidecar, wait_for


def _drain(q):
    out = []
    while True:
        try:
            out.append(q.get_nowait())
        except queue.Empty:
            return out


@pytest.fixture
def folder_source(tmp_path):
    sources = []

    def make(settle_time_s=0.5, **kw):
        q = queue.Queue(maxsize=64)
        src = FolderSource(tmp_path, q, settle_time_s=settle_time_s, rescan_interval_s=0.1, **kw)
        sources.append(src)
        return src, q

    yield make
    for s in sources:
        s.stop()


def test_frames_present_at_start_are_caught_up(tmp_path, folder_source):
    for k in range(3):
        write_frame(tmp_path, f"old{k}", lattice_image(seed=k), sidecar(f"old{k}"))
    (tmp_path / ".hidden.tif.part").write_bytes(b"partial")
    (tmp_path / "notes.txt").write_text("not a frame")
    src, q = folder_source()
    src.start()
    got = wait_for(lambda: len(q.queue) == 3 and list(q.queue), what="3 candidates")
    assert sorted(os.path.basename(c.path) for c in got) == ["old0.tif", "old1.tif", "old2.tif"]
    time.sleep(0.5)  # several re-listings: nothing is handed out twice
    assert len(_drain(q)) == 3


def test_sidecar_marks_complete_without_waiting(tmp_path, folder_source):
    src, q = folder_source(settle_time_s=3600)  # settling alone would never complete
    src.start()
    write_frame(tmp_path, "a", lattice_image(), sidecar("a"))
    cand = wait_for(lambda: q.qsize() == 1 and q.queue[0], what="sidecar frame")
    assert cand.path.endswith("a.tif") and cand.origin == "folder"


def test_half_written_file_is_not_taken_until_complete(tmp_path, folder_source):
    """1. an image is written half-way, with no sidecar; 2. it stays so for less than
    the settle time, repeatedly; 3. it is finished; 4. only then is it handed out, once,
    and what is read is the whole image."""
    src, q = folder_source(settle_time_s=1.0)
    src.start()
    pixels = lattice_image((128, 128), seed=7)
    buf = io.BytesIO()
    tifffile.imwrite(buf, pixels)
    data = buf.getvalue()
    target = tmp_path / "slow.tif"
    with open(target, "wb") as fh:  # written in place, as a careless writer does
        chunks = np.array_split(np.frombuffer(data, np.uint8), 6)
        for chunk in chunks[:-1]:
            fh.write(chunk.tobytes())
            fh.flush()
            time.sleep(0.4)  # each pause is shorter than the settle time
            assert q.empty(), "a file still being written was handed out"
        fh.write(chunks[-1].tobytes())
    cand = wait_for(lambda: q.qsize() == 1 and q.queue[0], what="the finished frame")
    frame = read_frame(cand.path, defaults={"pixel_size_pm": 20.0})
    np.testing.assert_array_equal(frame.pixels, pixels)
    time.sleep(0.5)
    assert q.qsize() == 1


def test_settled_file_without_sidecar_is_complete(tmp_path, folder_source):
    src, q = folder_source(settle_time_s=0.3)
    src.start()
    tifffile.imwrite(tmp_path / "plain.tif", lattice_image())
    cand = wait_for(lambda: q.qsize() == 1 and q.queue[0], what="settled frame")
    assert cand.path.endswith("plain.tif")


def test_late_sidecar_hands_the_frame_out_again(tmp_path, folder_source):
    src, q = folder_source(settle_time_s=0.3)
    src.start()
    write_frame(tmp_path, "b", lattice_image())  # no sidecar
    wait_for(lambda: q.qsize() == 1, what="settled frame")
    (tmp_path / "b.json").write_text(json.dumps(sidecar("b")))
    wait_for(lambda: q.qsize() == 2, what="frame again with its sidecar")


def test_a_sidecar_written_in_place_hands_the_frame_out_once_more_not_twice(tmp_path,
                                                                          folder_source):
    """A writer that creates the sidecar and fills it afterwards (no rename): the
    frame, already handed out without one, is handed out once more when the
    sidecar has content, never with it empty (that took two hand-outs, the first
    of which would have been read with an empty sidecar)."""
    # the settle time is far above the 0.3 s the sidecar stays empty, so a stalled
    # machine cannot stretch that gap past it (the frame would then be handed out
    # once more, with the empty sidecar, by the settle rule: a race of the test)
    settle_s = 2.0
    src, q = folder_source(settle_time_s=settle_s)
    src.start()
    write_frame(tmp_path, "w", lattice_image())  # no sidecar
    wait_for(lambda: q.qsize() == 1, what="settled frame")
    with open(tmp_path / "w.json", "w") as fh:
        fh.flush()
        # empty for longer than several re-listings (0.1 s), shorter than the settle time
        time.sleep(0.3)
        fh.write(json.dumps(sidecar("w")))
    wait_for(lambda: q.qsize() >= 2, what="frame again with its sidecar")
    time.sleep(settle_s + 0.5)  # past the settle time and many re-listings: nothing more
    assert q.qsize() == 2


def test_polling_observer_works_too(tmp_path, folder_source):
    src, q = folder_source(force_polling=True)
    src.start()
    write_frame(tmp_path, "p", lattice_image(), sidecar("p"))
    wait_for(lambda: q.qsize() == 1, what="polled frame")


def test_full_queue_holds_files_pending_never_drops(tmp_path):
    q = queue.Queue(maxsize=1)
    src = FolderSource(tmp_path, q, settle_time_s=0.2, rescan_interval_s=0.1)
    for k in range(4):
        write_frame(tmp_path, f"q{k}", lattice_image(seed=k), sidecar(f"q{k}"))
    src.start()
    try:
        seen = []
        while len(seen) < 4:
            seen.append(q.get(timeout=30).path)
            time.sleep(0.2)  # a slow consumer
        assert sorted(os.path.basename(p) for p in seen) == [f"q{k}.tif" for k in range(4)]
    finally:
        src.stop()


# ---------------------------------------------------------------- socket


@pytest.fixture
def socket_source(tmp_path):
    ctx = zmq.Context()
    q = queue.Queue(maxsize=16)
    rejects = []
    src = SocketSource(ctx, "tcp://127.0.0.1:0", tmp_path / "incoming", q,
                       frame_defaults={}, on_reject=lambda r, m: rejects.append(r))
    (tmp_path / "incoming").mkdir()
    endpoint = src.start()
    push = ctx.socket(zmq.PUSH)
    push.setsockopt(zmq.LINGER, 0)
    push.connect(endpoint)
    yield src, q, push, rejects
    push.close(linger=0)
    src.stop()
    ctx.term()


def test_socket_frame_is_saved_before_it_is_queued(tmp_path, socket_source):
    src, q, push, _ = socket_source
    pixels = lattice_image(seed=3)
    push.send_multipart(encode_frame_message(pixels, sidecar("s1", operator_note="x")))
    cand = q.get(timeout=30)
    assert cand.origin == "socket" and cand.path == str(tmp_path / "incoming" / "s1.tif")
    frame = read_frame(cand.path)
    np.testing.assert_array_equal(frame.pixels, pixels)
    assert frame.meta.pixel_size_pm == 20.0 and frame.meta.extra["operator_note"] == "x"


@pytest.mark.parametrize("parts, reason", [
    ([b"frame", b"{}"], "bad-message"),
    ([b"hello", b"{}", b""], "bad-message"),
    ([b"frame", b"not json", b"\0" * 8], "bad-message"),
    ([b"frame", json.dumps({"dtype": "<u2", "shape": [64, 64]}).encode(), b"\0" * 10],
     "truncated"),
    ([b"frame", json.dumps({"frame_id": "../evil", "dtype": "<u2", "shape": [8, 8]}).encode(),
      b"\0" * 128], "bad-frame-id"),
])
def test_bad_messages_are_rejected_and_the_socket_goes_on(tmp_path, socket_source, parts,
                                                          reason):
    src, q, push, rejects = socket_source
    push.send_multipart(parts)
    wait_for(lambda: rejects, what="a rejection")
    assert rejects == [reason]
    push.send_multipart(encode_frame_message(lattice_image(), sidecar("good")))
    assert q.get(timeout=30).path.endswith("good.tif")
    assert src.is_alive() and src.n_rejected == 1
    assert sorted(p.name for p in (tmp_path / "incoming").iterdir()) == ["good.json", "good.tif"]


def test_repeated_frame_id_is_rejected_not_overwritten(tmp_path, socket_source):
    src, q, push, rejects = socket_source
    push.send_multipart(encode_frame_message(lattice_image(seed=1), sidecar("dup")))
    q.get(timeout=30)
    push.send_multipart(encode_frame_message(lattice_image(seed=2), sidecar("dup")))
    wait_for(lambda: rejects, what="a rejection")
    assert rejects == ["duplicate-frame-id"]
    np.testing.assert_array_equal(read_frame(tmp_path / "incoming" / "dup.tif").pixels,
                                  lattice_image(seed=1))


def test_port_in_use_is_a_clear_error(tmp_path):
    with zmq.Context() as ctx:
        holder = ctx.socket(zmq.PULL)
        port = holder.bind_to_random_port("tcp://127.0.0.1")
        src = SocketSource(ctx, f"tcp://127.0.0.1:{port}", tmp_path, queue.Queue(),
                           frame_defaults={})
        try:
            with pytest.raises(OSError, match="port in use"):
                src.start()
        finally:
            holder.close(linger=0)
            src.stop()
