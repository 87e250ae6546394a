"""A full disk or an unwritable session folder: a clear error, the frame stays
queued, and nothing is marked done that was not written.

Root (who runs CI) ignores file permissions, so the faults are injected where the
operating system would report them: fsync failing with ENOSPC in the worker
process (tests/reliability/_plumbing.py), and the session's write probe failing
at start-up.
"""

import errno
import json
import os
import pathlib
import time

import pytest

from livequant.daemon import Daemon, Ledger, SetupError
from livequant.frames import write_frame
from livequant.outputs import read_columns_csv

from tests.daemon._helpers import (fast_settings, lattice_image, read_events, running_daemon,
                                   sidecar, wait_for)

SHAPE = (128, 128)


@pytest.mark.slow
def test_full_disk_keeps_the_frame_queued_until_it_can_be_written(tmp_path, monkeypatch):
    """1. the disk of the session is full; a frame arrives; 2. its outputs cannot be
    written: the daemon says so, keeps it queued and retries, and never marks it done;
    3. space is freed: the frame is done once, with complete files."""
    watch, session = tmp_path / "watch", tmp_path / "session"
    watch.mkdir()
    marker = tmp_path / "DISK_FULL"
    marker.write_text("while this file exists the session's disk is full")
    d = Daemon(fast_settings(), session=session, watch=watch,
               analyze="tests.reliability._plumbing:analyze_on_a_full_disk")
    # the events file is on the same full disk (heartbeats are published every second)
    _full_disk_for_events(monkeypatch, d, marker)
    with running_daemon(d):
        write_frame(watch, "f1", lattice_image(SHAPE, seed=1),
                    sidecar("f1", disk_full_while=str(marker)))
        wait_for(lambda: any("No space left on device" in w for w in d.snapshot.warnings),
                 what="the disk-full warning")
        wait_for(lambda: _attempts(session) >= 2, what="a retry after the hold")
        snap = d.snapshot
        assert snap.counts["done"] == 0 and snap.counts["quarantined"] == 0
        assert snap.counts["queued"] + snap.counts["processing"] == 1
        assert not (session / "frames" / "f1" / "summary.json").exists()
        leftovers = [p.name for p in (session / "frames").rglob("*") if p.is_file()]
        assert leftovers == [], leftovers  # no half-written or temporary files either
        warning = next(w for w in snap.warnings if "No space" in w)
        assert "kept queued" in warning
        assert d.publisher.n_unwritten > 0 and d.snapshot.state == "running"
        marker.unlink()  # space freed
        wait_for(lambda: d.snapshot.counts["done"] == 1, what="the frame done after all")
    with Ledger(session / "ledger.sqlite", readonly=True) as led:
        (row,) = led.rows()
    assert (row.state, row.done_count) == ("done", 1) and row.attempts >= 2
    folder = session / "frames" / "f1"
    summary = json.loads((folder / "summary.json").read_text())
    cols = read_columns_csv(folder / "columns.csv")
    assert summary["status"] == "ok" and len(cols["x_px"]) == summary["n_columns"] > 0
    assert (folder / "cells.csv").read_text().count("\n") > 1
    frame_events = [e for e in read_events(session, "frame")]
    assert len(frame_events) == 1  # published once, after it was written
    events = read_events(session)  # every line whole JSON, none lost while the disk was full
    assert [e["seq"] for e in events] == list(range(1, len(events) + 1))
    assert sum(e["data"].get("event") == "heartbeat" for e in events) >= 3


def _full_disk_for_events(monkeypatch, daemon, marker):
    """os.write to the daemon's events file writes half the line, then fails, while
    `marker` exists (a disk filling up in the middle of a line)."""
    real = os.write
    state = {}

    def write(fd, data):
        pub = daemon.publisher
        if pub is not None and fd == pub._fd and marker.exists():
            if not state.get("half"):
                state["half"] = True
                return real(fd, bytes(data)[: len(data) // 2])
            state["half"] = False
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(fd, data)

    monkeypatch.setattr(os, "write", write)


def test_events_file_keeps_whole_lines_through_a_full_disk(tmp_path, monkeypatch):
    from livequant.daemon.publisher import EventPublisher

    path = tmp_path / "events.jsonl"
    path.write_text('{"topic": "status", "seq": 1, "data": {}}\n{"topic": "frame", "se')
    pub = EventPublisher(None, "", path)  # a killed daemon left half a line: it goes
    assert path.read_text().count("\n") == 1 and path.read_text().endswith("}\n")
    marker = tmp_path / "FULL"
    marker.write_text("")

    class _D:
        publisher = pub

    _full_disk_for_events(monkeypatch, _D, marker)
    for k in range(5):
        pub.publish("status", {"k": k})
    assert pub.n_unwritten == 5 and pub.n_file_errors >= 5
    assert path.read_text().count("\n") == 1  # nothing half-written meanwhile
    marker.unlink()
    pub.publish("status", {"k": 5})
    pub.close()
    lines = [json.loads(x) for x in path.read_text().splitlines()]
    assert [e["data"].get("k") for e in lines[1:]] == [0, 1, 2, 3, 4, 5]
    assert [e["seq"] for e in lines[1:]] == [1, 2, 3, 4, 5, 6]


def _attempts(session) -> int:
    try:
        with Ledger(session / "ledger.sqlite", readonly=True) as led:
            return max((r.attempts for r in led.rows()), default=0)
    except Exception:  # noqa: BLE001 - not created yet
        return 0


@pytest.mark.parametrize("err", [errno.EACCES, errno.ENOSPC, errno.EROFS])
def test_unwritable_session_folder_is_a_clear_startup_error(tmp_path, monkeypatch, err):
    real = pathlib.Path.write_bytes

    def probe_fails(self, data):
        if self.name.startswith(".write-test-"):
            raise OSError(err, os.strerror(err), str(self))
        return real(self, data)

    monkeypatch.setattr(pathlib.Path, "write_bytes", probe_fails)
    d = Daemon(fast_settings(), session=tmp_path / "session", watch=None)
    with pytest.raises(SetupError) as exc:
        d.start()
    msg = str(exc.value)
    assert "session folder" in msg and "not writable" in msg and os.strerror(err) in msg
    assert "--session" in msg  # says how to fix it
    assert not (tmp_path / "session" / "ledger.sqlite").exists()
