"""The daemon with series: members registered as they are done, aggregates analysed as
frames, the ledger, the events and summary.json marked; truth from the simulator."""

import json
import sqlite3

import numpy as np
import pytest

from livequant.daemon import Daemon
from livequant.daemon.ledger import SCHEMA_VERSION, Ledger
from sim_instrument.quick import perovskite_engine
from tests.daemon._helpers import fast_settings, read_events, running_daemon, wait_for
from tests.daemon._loop import write_sim

N = 256
PIXEL_PM = 10.0


@pytest.mark.slow
def test_series_and_pair_through_the_daemon(tmp_path):
    """Five fast frames of one series (a specimen jump before the fourth) and an
    orthogonal pair land in the watched folder.  The jumped frame is left out
    with its reason; the running average is analysed at 2, 3 and 4 members and
    its precision gain over a single member grows about as sqrt(N) (shot-noise
    averaging, Yankovich et al., Nat. Commun. 5, 4155 (2014)); the pair is
    combined into one corrected frame; every step is in the ledger, the events,
    summary.json and the status snapshot."""
    watch = tmp_path / "watch"
    watch.mkdir()
    session = tmp_path / "session"
    eng = perovskite_engine(dwell_time_us=2.0, beam_current_pa=20.0,
                            drift_nm_per_s=(0.008, 0.01), line_jitter_pm=2.0, seed=4)
    series = eng.acquire_series(5, (0.0, 0.0), N * PIXEL_PM / 1000, (N, N), series_id="run-a",
                                jump_before={3: (0.17, -0.11)})
    eng.wait(2.0)
    pair = eng.acquire_orthogonal_pair((0.0, 0.0), N * PIXEL_PM / 1000, (N, N),
                                       series_id="pair-b")
    settings = fast_settings()
    daemon = Daemon(settings, session=session, watch=watch)
    with running_daemon(daemon):
        for acq in [*series, *pair]:
            write_sim(watch, acq)
        ledger = daemon.ledger

        def all_done():
            aggs = ledger.series_aggregates()
            return (len(aggs) == 4 and all(a["analysed_at"] for a in aggs)
                    and len(ledger.series_members()) == 7)
        wait_for(all_done, timeout_s=240, what="series aggregates analysed")
        wait_for(lambda: len(daemon.snapshot.series) == 2, what="series in the snapshot")
        snap = {s["series_id"]: s for s in daemon.snapshot.series}

    led = Ledger(session / "ledger.sqlite", readonly=True)
    members = led.series_members("run-a")
    assert [m["accepted"] for m in members] == [True, True, True, False, True]
    assert members[3]["reason"] == "jump" and "jumped" in members[3]["message"]
    aggs = {a["aggregate_id"]: a for a in led.series_aggregates(series_id="run-a")}
    assert sorted(aggs) == ["run-a~avg002", "run-a~avg003", "run-a~avg004"]
    gains = [aggs[f"run-a~avg00{n}"]["precision_gain"] for n in (2, 3, 4)]
    # shot-noise averaging: gain ~ sqrt(N), here within 25 %
    for n, g in zip((2, 3, 4), gains):
        assert g == pytest.approx(np.sqrt(n), rel=0.25), gains
    pair_agg = led.series_aggregates(series_id="pair-b")
    assert [a["kind"] for a in pair_agg] == ["orthogonal"]
    # the aggregates are frames of the session, marked as series
    rows = {r.frame_id: r for r in led.rows(state="done")}
    assert {"run-a~avg004", "pair-b~pair"} <= set(rows)
    db = sqlite3.connect(session / "ledger.sqlite")
    marked = dict(db.execute("SELECT frame_id, series_id FROM frames WHERE series_id IS NOT NULL"))
    assert marked[series[0].frame_id] == "run-a" and marked["run-a~avg004"] == "run-a"
    assert marked[pair[1].frame_id] == "pair-b"
    # summary.json of the aggregate and of a member
    summ = json.loads((session / "frames" / "run-a~avg004" / "summary.json").read_text())
    assert summ["series"]["n_members"] == 4 and summ["series"]["n_excluded"] == 1
    assert summ["series"]["kind"] == "average"
    assert summ["lattice"]["a_pm"] == pytest.approx(390.53, rel=2e-3)
    member = json.loads((session / "frames" / series[0].frame_id / "summary.json").read_text())
    assert member["meta"]["series_id"] == "run-a"
    # events: every member's verdict, every aggregate's precision
    status = [e["data"] for e in read_events(session, "status")]
    verdicts = [e for e in status if e.get("event") == "series-member"]
    assert len(verdicts) == 7
    assert any(e["reason"] == "jump" for e in verdicts)
    done = [e for e in status if e.get("event") == "series"]
    assert {e["aggregate_id"] for e in done} == {"run-a~avg002", "run-a~avg003",
                                                 "run-a~avg004", "pair-b~pair"}
    frames = {e["data"]["frame_id"]: e["data"] for e in read_events(session, "frame")}
    assert frames["pair-b~pair"]["series"]["kind"] == "orthogonal"
    # the display's snapshot
    assert snap["run-a"]["depth"] == 4 and snap["run-a"]["n_excluded"] == 1
    assert snap["run-a"]["precision_gain"] == pytest.approx(gains[-1])
    # the report plots precision against N and lists the frame left out
    from livequant.report.build import build_report

    build_report(session, max_frames=1, histogram_frames=2)
    html = (session / "report" / "index.html").read_text()
    assert "series-precision-vs-n.png" in html and (session / "report" / "figures" /
                                                    "series-precision-vs-n.png").exists()
    assert "series-left-out" in html and series[3].frame_id in html


def test_a_schema_1_ledger_is_migrated_in_place(tmp_path):
    """A session made before the series tables opens: frames kept, tables added."""
    path = tmp_path / "ledger.sqlite"
    Ledger(path).close()
    db = sqlite3.connect(path)
    db.execute("DROP TABLE series_members")
    db.execute("DROP TABLE series_aggregates")
    db.execute("ALTER TABLE frames DROP COLUMN series_id")
    db.execute("INSERT INTO frames (path, origin, sha256, size_bytes, mtime_ns, state, "
               "complete_at, queued_at) VALUES ('a.tif', 'folder', 'x', 1, 1, 'queued', 0, 0)")
    db.execute("UPDATE meta SET value='1' WHERE key='schema_version'")
    db.commit()
    db.close()
    ro = Ledger(path, readonly=True)          # read as it is
    assert ro.series_members() == [] and len(ro.rows()) == 1
    ro.close()
    led = Ledger(path)
    assert led.counts()["queued"] == 1
    led.add_series_member(series_id="s", frame_id="a", index=0, accepted=True)
    assert led.series_members("s")[0]["accepted"] is True
    led.close()
    db = sqlite3.connect(path)
    assert db.execute("SELECT value FROM meta").fetchone()[0] == str(SCHEMA_VERSION)


class _Publisher:
    def __init__(self):
        self.events = []

    def publish(self, topic, data):
        self.events.append((topic, data))


def test_a_series_goes_on_after_a_restart(tmp_path):
    """Three members averaged, the daemon restarted (a new aggregator on the same
    ledger), a fourth member: the series is rebuilt from the ledger and its files,
    and the next aggregate holds all four."""
    from livequant.config import Settings
    from livequant.daemon.series import SeriesAggregator
    from livequant.daemon.worker import Outcome
    from livequant.frames import read_frame

    watch = tmp_path / "watch"
    eng = perovskite_engine(dwell_time_us=1.0, drift_nm_per_s=(0.01, 0.01), seed=9)
    acqs = eng.acquire_series(4, (0.0, 0.0), 1.92, (192, 192), series_id="r")
    ledger = Ledger(tmp_path / "ledger.sqlite")
    for a in acqs:
        _register_done(ledger, watch, a)

    def outcome(a):
        meta = read_frame(watch / f"{a.frame_id}.npy").meta.to_json()
        return Outcome(str(watch / f"{a.frame_id}.npy"), "done", frame_id=a.frame_id,
                       summary={"meta": meta, "median_sigma_position_pm": 3.0})

    written = []
    settings = Settings()
    first = SeriesAggregator(settings, ledger, _Publisher(), tmp_path / "series",
                             register=written.append)
    for a in acqs[:3]:
        first.on_done(outcome(a))
        key, path, fid, _t, _m = first._queue.get_nowait()
        first._member(key, path, fid)
    assert [p.stem for p in written] == ["r~avg002", "r~avg003"]
    again = SeriesAggregator(settings, ledger, _Publisher(), tmp_path / "series",
                             register=written.append)
    again.on_done(outcome(acqs[3]))
    key, path, fid, _t, _m = again._queue.get_nowait()
    again._member(key, path, fid)
    assert written[-1].stem == "r~avg004"
    assert again._builders["r"].n_members == 4
    assert [m["frame_id"] for m in ledger.series_members("r")] == [a.frame_id for a in acqs]
    # `livequant status` with no daemon running reads the same from the ledger
    from livequant.daemon.status import snapshot_from_ledger

    snap = snapshot_from_ledger(ledger, session=str(tmp_path))
    assert snap.series[0]["series_id"] == "r" and snap.series[0]["depth"] == 4
    assert snap.series[0]["aggregate_id"] == "r~avg004"
    ledger.close()


def test_members_done_before_a_restart_but_never_offered_are_caught_up(tmp_path):
    """Frames of a series done (summary.json written) while no aggregator ran, e.g.
    still waiting when the daemon stopped: the next start offers them, in order."""
    from livequant.config import Settings
    from livequant.daemon.series import SeriesAggregator
    from livequant.frames import read_frame, write_json_atomic

    watch = tmp_path / "watch"
    eng = perovskite_engine(dwell_time_us=1.0, seed=12)
    acqs = eng.acquire_series(3, (0.0, 0.0), 1.28, (128, 128), series_id="late")
    ledger = Ledger(tmp_path / "ledger.sqlite")
    for a in acqs:
        path = _register_done(ledger, watch, a)
        (tmp_path / "frames" / a.frame_id).mkdir(parents=True)
        write_json_atomic(tmp_path / "frames" / a.frame_id / "summary.json",
                          {"frame_id": a.frame_id, "meta": read_frame(path).meta.to_json()})
    written = []
    agg = SeriesAggregator(Settings(), ledger, _Publisher(), tmp_path / "series",
                           register=written.append)
    agg.start()
    agg.stop(timeout_s=120)
    assert [m["frame_id"] for m in ledger.series_members("late")] == [a.frame_id for a in acqs]
    assert [p.stem for p in written] == ["late~avg002", "late~avg003"]
    ledger.close()


def _register_done(ledger, watch, acq):
    """Write a simulated member to `watch`, record it in `ledger` as done; its path."""
    write_sim(watch, acq)
    path = watch / f"{acq.frame_id}.npy"
    reg = ledger.register(str(path), origin="folder", sha256=acq.frame_id, sidecar_sha256=None,
                          size_bytes=1, mtime_ns=1, complete_at=0.0)
    ledger.claim(newest_first=False, newer_than_seq=0)
    ledger.finish(reg.seq, frame_id=acq.frame_id)
    return path
