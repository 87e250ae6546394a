"""The daemon end to end, with the real analysis on synthetic lattices of known spacing.

Truth for the lattice checks: the frames are drawn with A columns every
SPACING_PX = 19.5 px at PIXEL_SIZE_PM = 20 pm, i.e. a = 390 pm (see _helpers).
"""

import json
import os
import shutil
import signal
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile
import zmq

from livequant.daemon import Daemon, Ledger, SetupError, send_command
from livequant.frames import write_frame
from livequant.outputs import read_columns_csv
from livequant.wire import encode_frame_message

from ._helpers import (PIXEL_SIZE_PM, SPACING_PX, cli_argv, fast_settings, frame_events_by_id,
                       lattice_image, read_events, running_daemon, sidecar, wait_for)

SHAPE = (256, 256)
A_TRUE_PM = SPACING_PX * PIXEL_SIZE_PM  # 390 pm, by construction
REPO = Path(__file__).resolve().parents[2]


def _daemon(tmp_path, *, watch=True, analyze=None, **overrides):
    kw = {} if analyze is None else {"analyze": analyze}
    watch_dir = tmp_path / "watch"
    watch_dir.mkdir(exist_ok=True)
    return Daemon(fast_settings(**overrides), session=tmp_path / "session",
                  watch=watch_dir if watch else None, **kw)


def _done(d):
    return d.snapshot.counts.get("done", 0)


def _assert_each_done_once(session: Path, frame_ids):
    """Every frame: one ledger row, done once, outputs complete, one frame event."""
    with Ledger(session / "ledger.sqlite", readonly=True) as led:
        rows = led.rows()
    by_id = {r.frame_id: r for r in rows}
    assert sorted(by_id) == sorted(frame_ids)
    assert len(rows) == len(frame_ids)
    for fid, row in by_id.items():
        assert (row.state, row.done_count) == ("done", 1), (fid, row)
        folder = session / "frames" / fid
        summary = json.loads((folder / "summary.json").read_text())
        cols = read_columns_csv(folder / "columns.csv")
        assert summary["frame_id"] == fid
        assert len(cols["x_px"]) == summary["n_columns"] > 0
    assert frame_events_by_id(session) == {fid: 1 for fid in frame_ids}


def test_folder_frames_are_each_analysed_once(tmp_path):
    """1. start on an empty folder; 2. an acquisition writes 3 frames (image, then sidecar);
    3. every frame is done exactly once, its files are there and its summary published,
    with the lattice parameter of the synthetic truth."""
    d = _daemon(tmp_path)
    with running_daemon(d):
        for k in range(3):
            write_frame(tmp_path / "watch", f"scan{k}", lattice_image(SHAPE, seed=k),
                        sidecar(f"scan{k}"))
        wait_for(lambda: _done(d) == 3, what="3 frames done")
        last = d.snapshot.last
    session = tmp_path / "session"
    _assert_each_done_once(session, ["scan0", "scan1", "scan2"])
    for k in range(3):
        summary = json.loads((session / "frames" / f"scan{k}" / "summary.json").read_text())
        assert summary["lattice"]["a_pm"] == pytest.approx(A_TRUE_PM, abs=2.0)
    assert last.n_columns > 0 and last.a_pm == pytest.approx(A_TRUE_PM, abs=2.0)
    events = [e["data"].get("event") for e in read_events(session, "status")]
    assert events[0] == "started" and events[-1] == "stopped"
    assert not (session / "daemon.json").exists()


def test_socket_frames_are_saved_then_analysed(tmp_path):
    d = _daemon(tmp_path, watch=False)
    with running_daemon(d):
        ctx = zmq.Context()
        push = ctx.socket(zmq.PUSH)
        push.setsockopt(zmq.LINGER, 0)
        push.connect(d.endpoints["ingest"])
        sub = ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.LINGER, 0)
        sub.setsockopt(zmq.SUBSCRIBE, b"frame")
        sub.connect(d.endpoints["events"])
        time.sleep(0.3)  # let the subscription reach the publisher (slow joiner)
        try:
            for k in range(2):
                push.send_multipart(encode_frame_message(lattice_image(SHAPE, seed=10 + k),
                                                         sidecar(f"sock{k}")))
            push.send_multipart([b"frame", b"garbage"])
            wait_for(lambda: _done(d) == 2, what="2 socket frames done")
            assert sub.poll(10_000)
            topic, payload = sub.recv_multipart()
            assert topic == b"frame" and json.loads(payload)["frame_id"].startswith("sock")
            assert d.snapshot.rejected_messages == 1
        finally:
            push.close(linger=0)
            sub.close(linger=0)
            ctx.term()
    session = tmp_path / "session"
    _assert_each_done_once(session, ["sock0", "sock1"])
    assert sorted(p.name for p in (session / "incoming").glob("*.tif")) == ["sock0.tif",
                                                                            "sock1.tif"]


def test_half_written_frame_waits_until_complete(tmp_path):
    """1. a writer writes a frame in place, in pieces, pausing less than the settle time;
    2. it then writes the sidecar; 3. the frame is analysed once, from the whole image."""
    d = _daemon(tmp_path, settle_time_s=1.5)
    pixels = lattice_image(SHAPE, seed=21)
    target = tmp_path / "watch" / "slow.tif"
    import io
    buf = io.BytesIO()
    tifffile.imwrite(buf, pixels)
    chunks = np.array_split(np.frombuffer(buf.getvalue(), np.uint8), 5)
    with running_daemon(d):
        with open(target, "wb") as fh:
            for chunk in chunks:
                fh.write(chunk.tobytes())
                fh.flush()
                time.sleep(0.5)
                assert d.snapshot.counts.get("quarantined", 0) == 0
        (tmp_path / "watch" / "slow.json").write_text(json.dumps(sidecar("slow")))
        wait_for(lambda: _done(d) == 1, what="the frame done")
    _assert_each_done_once(tmp_path / "session", ["slow"])


def test_frames_written_while_stopped_are_caught_up(tmp_path):
    """1. run, analyse one frame, stop; 2. two frames land while no daemon runs;
    3. restart on the same session: the two are analysed, the first is not again."""
    d = _daemon(tmp_path)
    with running_daemon(d):
        write_frame(tmp_path / "watch", "before", lattice_image(SHAPE, seed=1), sidecar("before"))
        wait_for(lambda: _done(d) == 1, what="first frame")
    write_frame(tmp_path / "watch", "while_down1", lattice_image(SHAPE, seed=2),
                sidecar("while_down1"))
    tifffile.imwrite(tmp_path / "watch" / "while_down2.tif", lattice_image(SHAPE, seed=3))
    # no sidecar: an old enough file counts as settled; its pixel size comes from the config
    old = time.time() - 60
    os.utime(tmp_path / "watch" / "while_down2.tif", (old, old))
    d2 = Daemon(fast_settings(frame_defaults={"pixel_size_pm": PIXEL_SIZE_PM}),
                session=tmp_path / "session", watch=tmp_path / "watch")
    with running_daemon(d2):
        wait_for(lambda: _done(d2) == 3, what="all three frames done")
        time.sleep(0.5)  # a few more re-listings change nothing
        assert _done(d2) == 3
    _assert_each_done_once(tmp_path / "session", ["before", "while_down1", "while_down2"])
    with Ledger(tmp_path / "session" / "ledger.sqlite", readonly=True) as led:
        assert all(r.attempts == 1 for r in led.rows())


@pytest.mark.parametrize("event_written", [True, False])
def test_a_crash_between_event_and_mark_publishes_each_frame_once(tmp_path, event_written):
    """The window a SIGKILL can hit: a frame is done in the ledger, but not marked
    published; its event (1) made it into the events file or (2) did not.  A
    restarted daemon must leave exactly one frame event for it either way.
    (Made deterministic here by undoing the mark, and the event for case 2.)"""
    session = tmp_path / "session"
    d = _daemon(tmp_path)
    with running_daemon(d):
        write_frame(tmp_path / "watch", "once", lattice_image(SHAPE, seed=1), sidecar("once"))
        wait_for(lambda: _done(d) == 1, what="the frame done")
    import sqlite3

    with sqlite3.connect(session / "ledger.sqlite") as db:
        db.execute("UPDATE frames SET published_at=NULL")
    if not event_written:
        events = session / "events.jsonl"
        kept = [line for line in events.read_text().splitlines(keepends=True)
                if json.loads(line)["topic"] != "frame"]
        events.write_text("".join(kept))
    with running_daemon(_daemon(tmp_path)):
        pass
    assert frame_events_by_id(session) == {"once": 1}
    with Ledger(session / "ledger.sqlite", readonly=True) as led:
        assert led.unpublished_done() == []


def test_bad_frames_are_quarantined_and_the_next_good_one_is_done(tmp_path):
    d = _daemon(tmp_path)
    watch = tmp_path / "watch"
    with running_daemon(d):
        (watch / "broken.tif").write_bytes(b"II*\0" + b"\x07" * 100)  # a cut TIFF header
        (watch / "broken.json").write_text(json.dumps(sidecar("broken")))
        write_frame(watch, "nopixel", lattice_image(SHAPE, seed=4), {"frame_id": "nopixel"})
        wait_for(lambda: d.snapshot.counts.get("quarantined") == 2, what="2 quarantined")
        write_frame(watch, "good", lattice_image(SHAPE, seed=5), sidecar("good"))
        wait_for(lambda: _done(d) == 1, what="the good frame")
        shutil.copy(watch / "good.tif", watch / "good_copy.tif")
        wait_for(lambda: d.snapshot.counts.get("quarantined") == 3, what="the duplicate")
        warnings = "\n".join(d.snapshot.warnings)
    with Ledger(tmp_path / "session" / "ledger.sqlite", readonly=True) as led:
        reasons = {Path(r.path).stem: r.reason for r in led.rows(state="quarantined")}
    assert reasons == {"broken": "unreadable", "nopixel": "no-pixel-size",
                       "good_copy": "duplicate"}
    assert "broken.tif" in warnings and "nopixel.tif" in warnings
    quarantine_events = [e["data"] for e in read_events(tmp_path / "session", "status")
                         if e["data"].get("event") == "quarantined"]
    assert {Path(e["path"]).stem for e in quarantine_events} == set(reasons)


def test_status_json_from_daemon_and_from_ledger(tmp_path, capsys):
    from argparse import Namespace

    from livequant.commands.status import status_command

    d = _daemon(tmp_path)
    args = Namespace(session=str(tmp_path / "session"), json=True, timeout=5.0)
    with running_daemon(d):
        for k in range(2):
            write_frame(tmp_path / "watch", f"s{k}", lattice_image(SHAPE, seed=k), sidecar(f"s{k}"))
        (tmp_path / "watch" / "bad.tif").write_bytes(b"not a tiff at all")
        (tmp_path / "watch" / "bad.json").write_text(json.dumps(sidecar("bad")))
        wait_for(lambda: _done(d) == 2 and d.snapshot.counts["quarantined"] == 1,
                 what="2 done, 1 quarantined")
        assert status_command(args) == 0
        live = json.loads(capsys.readouterr().out)
    assert live["source"] == "daemon"
    assert live["status"]["counts"] == {"queued": 0, "processing": 0, "done": 2,
                                        "quarantined": 1}
    assert live["status"]["state"] == "running"
    assert status_command(args) == 0
    offline = json.loads(capsys.readouterr().out)
    assert offline["source"] == "ledger" and offline["status"]["state"] == "offline"
    assert offline["status"]["counts"] == live["status"]["counts"]
    # the newest done frame, read back from its summary.json
    assert offline["status"]["last"]["frame_id"] in ("s0", "s1")
    assert offline["status"]["last"]["n_columns"] > 0
    assert status_command(Namespace(**{**vars(args), "json": False})) == 0
    human = capsys.readouterr()
    assert human.out == "" and "2 done" in human.err and "1 quarantined" in human.err
    missing = Namespace(session=str(tmp_path / "nowhere"), json=True, timeout=1.0)
    assert status_command(missing) == 2
    assert "no ledger" in capsys.readouterr().err


def test_commands_pause_resume_shutdown(tmp_path):
    d = _daemon(tmp_path)
    d.add_command("echo", lambda req: {"said": req["text"]})  # as the decision loop will
    with pytest.raises(ValueError, match="built in"):
        d.add_command("status", lambda req: {})
    with running_daemon(d):
        ep = d.endpoints["commands"]
        assert send_command(ep, {"cmd": "echo", "text": "hi"}, timeout_s=5)["said"] == "hi"
        assert send_command(ep, {"cmd": "pause"}, timeout_s=5) == {"ok": True,
                                                                   "state": "paused"}
        write_frame(tmp_path / "watch", "held", lattice_image(SHAPE, seed=6), sidecar("held"))
        wait_for(lambda: d.snapshot.counts.get("queued") == 1, what="frame queued")
        time.sleep(0.5)
        assert _done(d) == 0 and d.snapshot.state == "paused"  # recorded, not analysed
        assert send_command(ep, {"cmd": "nonsense"}, timeout_s=5)["ok"] is False
        assert send_command(ep, {"cmd": "resume"}, timeout_s=5)["ok"] is True
        wait_for(lambda: _done(d) == 1, what="frame done after resume")
        assert send_command(ep, {"cmd": "shutdown"}, timeout_s=5)["state"] == "draining"
        wait_for(lambda: d.should_exit.is_set(), what="exit requested")
    events = [e["data"].get("event") for e in read_events(tmp_path / "session", "status")]
    assert "paused" in events and "resumed" in events


def test_a_frame_that_kills_its_worker_is_quarantined_others_survive(tmp_path):
    """Plumbing test (stand-in analysis): a frame whose analysis kills the worker process
    is retried alone and quarantined after max_attempts; the frames beside it are done.

    Deterministic whatever order the frames are claimed in: a frame is charged an
    attempt only when it was alone in flight as its worker died (it used to fail now
    and then when a frame beside the poison one was charged for its crashes too)."""
    d = _daemon(tmp_path, analyze="tests.daemon._helpers:plain_analyze", max_attempts=2)
    watch = tmp_path / "watch"
    write_frame(watch, "ok1", lattice_image(seed=1), sidecar("ok1"))
    write_frame(watch, "poison", lattice_image(seed=2), sidecar("poison", die=True))
    write_frame(watch, "ok2", lattice_image(seed=3), sidecar("ok2"))
    write_frame(watch, "buggy", lattice_image(seed=4), sidecar("buggy", **{"raise": True}))
    with running_daemon(d):
        wait_for(lambda: _done(d) == 2 and d.snapshot.counts["quarantined"] == 2,
                 what="2 done, 2 quarantined")
    with Ledger(tmp_path / "session" / "ledger.sqlite", readonly=True) as led:
        reasons = {Path(r.path).stem: (r.reason, r.attempts) for r in led.rows(state="quarantined")}
        done = sorted(Path(r.path).stem for r in led.rows(state="done"))
    assert done == ["ok1", "ok2"]
    assert reasons["poison"] == ("worker-crash", 2)
    assert reasons["buggy"][0] == "analysis-error"


def test_frames_sharing_the_pool_with_a_crash_are_not_charged(tmp_path):
    """Two workers, three frames in flight: the newest (claimed first) kills its worker
    while two slow innocent frames are in flight.  None is charged; each is re-run alone
    (bisection down to single frames), and only the frame that kills its worker alone is
    charged.  With max_attempts = 1 the old rule (every frame in flight charged)
    quarantined the innocent frames as worker-crash."""
    settings = fast_settings(max_attempts=1, newest_first=True, max_in_flight=3)
    settings = type(settings).model_validate({**settings.model_dump(), "workers": 2})
    watch = tmp_path / "watch"
    watch.mkdir()
    d = Daemon(settings, session=tmp_path / "session", watch=watch,
               analyze="tests.daemon._helpers:plain_analyze")
    for k in (1, 2, 3):
        write_frame(watch, f"ok{k}", lattice_image(seed=k), sidecar(f"ok{k}", sleep_s=1.5))
    write_frame(watch, "poison", lattice_image(seed=9), sidecar("poison", die=True))
    with running_daemon(d):
        wait_for(lambda: _done(d) == 3 and d.snapshot.counts["quarantined"] == 1,
                 timeout_s=120, what="3 done, 1 quarantined")
        crashes = d.n_worker_crashes
    with Ledger(tmp_path / "session" / "ledger.sqlite", readonly=True) as led:
        rows = {Path(r.path).stem: r for r in led.rows()}
    assert {k: r.state for k, r in rows.items()} == {"ok1": "done", "ok2": "done",
                                                      "ok3": "done", "poison": "quarantined"}
    assert rows["poison"].reason == "worker-crash" and rows["poison"].attempts == 1
    assert "no other frame in flight" in rows["poison"].message
    # every innocent frame was charged only for the run that finished it
    assert all(rows[f"ok{k}"].attempts == 1 for k in (1, 2, 3))
    assert crashes == 2  # once beside the innocent frames, once alone


def test_drain_finishes_frames_in_flight(tmp_path):
    d = _daemon(tmp_path, analyze="tests.daemon._helpers:plain_analyze")
    with running_daemon(d):
        write_frame(tmp_path / "watch", "slow", lattice_image(seed=1), sidecar("slow", sleep_s=2))
        wait_for(lambda: d.snapshot.counts.get("processing") == 1, what="frame in flight")
        # leaving the block calls handle_exit(): the frame in flight is finished first
    with Ledger(tmp_path / "session" / "ledger.sqlite", readonly=True) as led:
        assert [r.state for r in led.rows()] == ["done"]


def test_forced_stop_requeues_frames_in_flight(tmp_path):
    d = _daemon(tmp_path, analyze="tests.daemon._helpers:plain_analyze")
    with running_daemon(d):
        write_frame(tmp_path / "watch", "slow", lattice_image(seed=1), sidecar("slow", sleep_s=30))
        wait_for(lambda: d.snapshot.counts.get("processing") == 1, what="frame in flight")
        d.handle_exit()
        d.handle_exit()  # the second Ctrl+C: do not wait
    with Ledger(tmp_path / "session" / "ledger.sqlite", readonly=True) as led:
        assert [(r.state, r.done_count) for r in led.rows()] == [("queued", 0)]


def test_startup_errors_are_clear(tmp_path):
    with pytest.raises(SetupError, match="does not exist"):
        Daemon(fast_settings(), session=tmp_path / "s", watch=tmp_path / "missing").start()
    (tmp_path / "afile").write_text("x")
    with pytest.raises(SetupError, match="not writable|not a folder"):
        Daemon(fast_settings(), session=tmp_path / "afile" / "s", watch=None).start()
    d = _daemon(tmp_path)
    with running_daemon(d):
        with pytest.raises(SetupError, match="another daemon"):
            _daemon(tmp_path).start()


def test_cli_run_reports_a_missing_folder_with_exit_2(tmp_path):
    proc = subprocess.run(cli_argv() + ["run", "--watch", str(tmp_path / "nope"), "--session",
                                        str(tmp_path / "s"), "--no-console"],
                          cwd=REPO, env={**os.environ, "PYTHONPATH": str(REPO)},
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert "watch folder" in proc.stderr and "does not exist" in proc.stderr


def _start_cli_daemon(tmp_path, extra=()):
    log = open(tmp_path / "daemon.log", "ab")
    proc = subprocess.Popen(
        cli_argv() + ["run", "--watch", str(tmp_path / "watch"), "--session",
                      str(tmp_path / "session"), "--no-console", "--workers", "1",
                      "--ingest-port", "0", "--events-port", "0", "--commands-port", "0",
                      *extra],
        cwd=REPO, env={**os.environ, "PYTHONPATH": str(REPO)}, stdout=log, stderr=log,
        start_new_session=True)  # its own process group: SIGKILL reaches the workers too
    return proc


def _ledger_counts(session: Path) -> dict:
    try:
        with Ledger(session / "ledger.sqlite", readonly=True) as led:
            return led.counts()
    except Exception:  # noqa: BLE001 - not created yet
        return {}


@pytest.mark.slow
def test_sigkill_mid_burst_loses_nothing_and_does_nothing_twice(tmp_path):
    """1. a daemon process analyses a burst of 8 frames; 2. it is killed with SIGKILL (with
    its workers) while frames are still queued and in flight; 3. a new daemon on the
    same session finishes the rest; 4. every frame is done exactly once, with its files."""
    watch = tmp_path / "watch"
    watch.mkdir()
    proc = _start_cli_daemon(tmp_path)
    try:
        burst = [lattice_image((384, 384), seed=k) for k in range(8)]
        wait_for(lambda: (tmp_path / "session" / "daemon.json").exists(), what="daemon up")
        for k, pixels in enumerate(burst):
            write_frame(watch, f"burst{k}", pixels, sidecar(f"burst{k}"))
        wait_for(lambda: _ledger_counts(tmp_path / "session").get("done", 0) >= 2,
                 what="two frames done")
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(30)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(30)
    before = _ledger_counts(tmp_path / "session")
    assert before["done"] < 8, "the kill came too late to test anything"
    assert before["processing"] >= 1, f"nothing was in flight at the kill: {before}"
    assert (tmp_path / "session" / "daemon.json").exists()  # stale: nobody removed it
    # `livequant status --json` sees the daemon is gone and reads the ledger instead
    status = subprocess.run(cli_argv() + ["status", "--json", "--session",
                                          str(tmp_path / "session"), "--timeout", "2"],
                            cwd=REPO, env={**os.environ, "PYTHONPATH": str(REPO)},
                            capture_output=True, text=True, timeout=120)
    assert status.returncode == 0, status.stderr
    reported = json.loads(status.stdout)
    assert reported["source"] == "ledger" and reported["status"]["counts"] == before
    d = Daemon(fast_settings(), session=tmp_path / "session", watch=watch)
    with running_daemon(d):
        wait_for(lambda: _done(d) == 8, what="all 8 frames done after the restart")
    _assert_each_done_once(tmp_path / "session", [f"burst{k}" for k in range(8)])


@pytest.mark.slow
def test_sigterm_drains_and_exits(tmp_path):
    watch = tmp_path / "watch"
    watch.mkdir()
    proc = _start_cli_daemon(tmp_path)
    try:
        wait_for(lambda: (tmp_path / "session" / "daemon.json").exists(), what="daemon up")
        write_frame(watch, "t0", lattice_image(SHAPE, seed=0), sidecar("t0"))
        wait_for(lambda: _ledger_counts(tmp_path / "session").get("done", 0) == 1, what="done")
        proc.send_signal(signal.SIGTERM)
        code = proc.wait(60)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(30)
    assert code == -signal.SIGTERM  # the signal is handed back after a clean stop
    assert not (tmp_path / "session" / "daemon.json").exists()
    log = (tmp_path / "daemon.log").read_text()
    assert "stopping" in log
    events = [e["data"].get("event") for e in read_events(tmp_path / "session", "status")]
    assert events[-1] == "stopped"
    # the session-wide table of columns is written once the daemon has stopped
    import pyarrow.parquet as pq

    table = pq.read_table(tmp_path / "session" / "columns.parquet")
    assert set(table.column("frame_id").to_pylist()) == {"t0"} and table.num_rows > 0
