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
def test_full_disk_keeps_the_frame_queued_until_it_can_be_written(tmp_path):
    """1. the disk of the session is full; a frame arrives; 2. its outputs cannot be
    written: the daemon says so, keeps it queued and retries, and never marks it done;
    3. space is freed: the frame is done once, with complete files."""
    watch, session = tmp_path / "watch", tmp_path / "session"
    watch.mkdir()
    marker = tmp_path / "DISK_FULL"
    marker.write_text("while this file exists the session's disk is full")
    d = Daemon(fast_settings(), session=session, watch=watch,
               analyze="tests.reliability._plumbing:analyze_on_a_full_disk")
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
