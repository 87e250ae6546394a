"""The ledger: the frame state machine, duplicates, changes, recovery, ordering."""

import sqlite3

import pytest

from livequant.daemon.ledger import Ledger


def _reg(ledger, path, sha="a" * 64, side=None, size=10, mtime=1, origin="folder"):
    return ledger.register(path, origin=origin, sha256=sha, sidecar_sha256=side,
                           size_bytes=size, mtime_ns=mtime, complete_at=100.0)


@pytest.fixture
def ledger(tmp_path):
    with Ledger(tmp_path / "ledger.sqlite") as led:
        yield led


def test_wal_mode_and_tables(tmp_path, ledger):
    db = sqlite3.connect(tmp_path / "ledger.sqlite")
    assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    tables = {r[0] for r in db.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert {"frames", "flags", "proposals", "decisions"} <= tables


def test_lifecycle_queued_processing_done(ledger):
    reg = _reg(ledger, "/w/a.tif")
    assert reg.action == "queued"
    assert ledger.counts() == {"queued": 1, "processing": 0, "done": 0, "quarantined": 0}
    seq, path, origin = ledger.claim(newest_first=False, newer_than_seq=0)
    assert (path, origin) == ("/w/a.tif", "folder")
    assert ledger.counts()["processing"] == 1
    assert ledger.claim(newest_first=False, newer_than_seq=0) is None
    ledger.finish(seq, frame_id="a", read_s=0.1, analyze_s=0.2, write_s=0.3)
    row = ledger.row(seq)
    assert (row.state, row.frame_id, row.attempts, row.done_count) == ("done", "a", 1, 1)
    assert ledger.unpublished_done() == [(seq, "a")]
    ledger.mark_published(seq)
    assert ledger.unpublished_done() == []


def test_same_content_again_is_not_queued_again(ledger):
    seq = _reg(ledger, "/w/a.tif").seq
    ledger.finish(ledger.claim(newest_first=False, newer_than_seq=0)[0], frame_id="a")
    again = _reg(ledger, "/w/a.tif", mtime=2)  # touched, not changed
    assert again.action == "unchanged" and again.seq == seq
    assert ledger.counts()["done"] == 1 and ledger.counts()["queued"] == 0
    assert ledger.known("/w/a.tif") == (10, 2, None)


def test_changed_content_or_sidecar_runs_again(ledger):
    seq = _reg(ledger, "/w/a.tif").seq
    ledger.finish(ledger.claim(newest_first=False, newer_than_seq=0)[0], frame_id="a")
    assert _reg(ledger, "/w/a.tif", side="s" * 64).action == "requeued"
    row = ledger.row(seq)
    assert (row.state, row.version, row.done_count) == ("queued", 2, 0)
    ledger.quarantine(ledger.claim(newest_first=False, newer_than_seq=0)[0],
                      reason="truncated", message="cut short")
    assert _reg(ledger, "/w/a.tif", sha="b" * 64, side="s" * 64).action == "requeued"
    assert ledger.row(seq).state == "queued" and ledger.row(seq).reason is None


def test_same_image_under_another_name_is_a_quarantined_duplicate(ledger):
    _reg(ledger, "/w/a.tif")
    reg = _reg(ledger, "/w/copy_of_a.tif")
    assert reg.action == "duplicate" and reg.duplicate_of == "/w/a.tif"
    row = ledger.row(reg.seq)
    assert (row.state, row.reason) == ("quarantined", "duplicate")
    assert "/w/a.tif" in row.message


def test_recover_puts_processing_back(ledger):
    for k in range(3):
        _reg(ledger, f"/w/{k}.tif", sha=str(k) * 64)
    ledger.claim(newest_first=False, newer_than_seq=0)
    ledger.claim(newest_first=False, newer_than_seq=0)
    assert ledger.recover() == 2
    assert ledger.counts() == {"queued": 3, "processing": 0, "done": 0, "quarantined": 0}


def test_newest_jumps_the_queue_then_backlog_drains_oldest_first(ledger):
    seqs = [_reg(ledger, f"/w/{k}.tif", sha=str(k) * 64).seq for k in range(4)]
    order = []
    newest = 0
    first = ledger.claim(newest_first=True, newer_than_seq=newest)
    order.append(first[0])
    newest = max(newest, first[0])
    late = _reg(ledger, "/w/late.tif", sha="f" * 64).seq  # arrives while the backlog waits
    while (c := ledger.claim(newest_first=True, newer_than_seq=newest)) is not None:
        order.append(c[0])
        newest = max(newest, c[0])
    # newest first, then the late arrival jumps the backlog, then oldest first
    assert order == [seqs[3], late, seqs[0], seqs[1], seqs[2]]


def test_fifo_without_newest_first(ledger):
    seqs = [_reg(ledger, f"/w/{k}.tif", sha=str(k) * 64).seq for k in range(3)]
    got = [ledger.claim(newest_first=False, newer_than_seq=0)[0] for _ in range(3)]
    assert got == seqs


def test_state_survives_reopening(tmp_path):
    path = tmp_path / "ledger.sqlite"
    with Ledger(path) as led:
        seq = _reg(led, "/w/a.tif").seq
        led.finish(led.claim(newest_first=False, newer_than_seq=0)[0], frame_id="a")
    with Ledger(path, readonly=True) as ro:
        assert ro.row(seq).state == "done"
        with pytest.raises(sqlite3.OperationalError):
            ro.quarantine(seq, reason="x", message="y")


def test_readonly_needs_an_existing_ledger(tmp_path):
    with pytest.raises(FileNotFoundError, match="no ledger"):
        Ledger(tmp_path / "nothing.sqlite", readonly=True)


def test_proposals_and_decisions(ledger):
    ledger.add_flag(frame_id="a", rule="wall", kind="domain-wall", score=0.8,
                    region={"x_nm": 1.0})
    ledger.add_proposal("p1", region={"x_nm": 1.0, "y_nm": 2.0, "size_nm": 5.0},
                        frame_id="a", score=0.8)
    assert [p["state"] for p in ledger.proposals()] == ["open"]
    ledger.decide("p1", "accept")
    assert [p["id"] for p in ledger.proposals(state="accepted")] == ["p1"]
    with pytest.raises(KeyError):
        ledger.decide("nope", "accept")
    with pytest.raises(ValueError, match="`decision`"):
        ledger.decide("p1", "maybe")
    assert [(f["kind"], f["region"]) for f in ledger.flags()] == [("domain-wall", {"x_nm": 1.0})]
    assert ledger.flags(frame_id="b") == []
    assert [(d["proposal_id"], d["decision"]) for d in ledger.decisions()] == [("p1", "accept")]


def test_drift_rows_come_back_in_acquisition_order(ledger):
    ledger.add_drift(frame_id="f2", t=20.0, dx_nm=0.4, dy_nm=-0.1, sigma_nm=0.02,
                     ref_frame_id="f1")
    ledger.add_drift(frame_id="f1", t=10.0, dx_nm=0.0, dy_nm=0.0)
    rows = ledger.drift()
    assert [r["frame_id"] for r in rows] == ["f1", "f2"]
    assert rows[1]["dx_nm"] == 0.4 and rows[1]["ref_frame_id"] == "f1"


def test_change_during_processing_runs_again(ledger):
    """1. a frame is claimed; 2. its file changes while the worker has it; 3. finishing
    does not mark it done (the result may be of the old bytes) but queues it again."""
    _reg(ledger, "/w/a.tif")
    seq = ledger.claim(newest_first=False, newer_than_seq=0)[0]
    assert _reg(ledger, "/w/a.tif", sha="c" * 64, size=20).action == "unchanged"
    assert ledger.finish(seq, frame_id="a") is False
    row = ledger.row(seq)
    assert (row.state, row.done_count, row.reason) == ("queued", 0, None)
    seq2 = ledger.claim(newest_first=False, newer_than_seq=0)[0]
    assert seq2 == seq and ledger.finish(seq, frame_id="a") is True
    assert ledger.row(seq).done_count == 1
