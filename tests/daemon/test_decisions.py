"""The decision loop in the daemon: flags, drift, proposals, accept / reject, resume."""

import json

import numpy as np
import pytest
import zmq

from livequant.daemon import Daemon, send_command
from livequant.daemon.ledger import Ledger
from sim_instrument import ScanEngine, Specimen
from sim_instrument.engine import DriftModel as SimDrift
from sim_instrument.requests import decode_scan_request
from tests.daemon._helpers import fast_settings, read_events, running_daemon, wait_for
from tests.daemon._loop import SidecarRule, view_analyze, write_sim


@pytest.fixture(scope="module")
def specimen():
    return Specimen.from_scenario("demo")


def _settings(**over):
    s = fast_settings(ingest_socket=False)
    tree = s.model_dump()
    for dotted, value in over.items():
        sec, key = dotted.split(".")
        tree[sec][key] = value
    return type(s).model_validate(tree)


def _daemon(tmp_path, settings=None, rule=None):
    watch = tmp_path / "watch"
    watch.mkdir(exist_ok=True)
    d = Daemon(settings or _settings(**{"drift.clock": "frames", "proposals.lead_time_s": 0.0}),
               session=tmp_path / "session", watch=watch, analyze=view_analyze,
               log_heartbeat=False, rules=rule or SidecarRule())
    return d, watch


def _done(d, n, decided=None):
    """`n` frames done in the ledger, none in flight, and the decision loop of
    this daemon through `decided` frames (default `n`: every frame was finished
    by this daemon; after a restart, only the new ones).

    A frame is marked done in the ledger before the daemon counts it and runs its
    rules and proposals, so a test reading the loop's counters right after the
    mark raced it (seen twice in full-suite runs, the second time with a
    condition that compared two counters both still short by the same frame).
    ``status()`` takes the loop's lock, so it returns only after a frame's step
    in progress has ended."""
    decided = n if decided is None else decided
    wait_for(lambda: d.ledger.counts()["done"] >= n and not d._in_flight
             and d.decisions.status()["frames"] >= decided, timeout_s=90,
             what=f"{n} frames done and {decided} decided")


class _Sub:
    """A SUB socket on the daemon's events (loopback, timeouts, linger 0)."""

    def __init__(self, endpoint, topic=b""):
        self.ctx = zmq.Context()
        self.sock = self.ctx.socket(zmq.SUB)
        self.sock.setsockopt(zmq.LINGER, 0)
        self.sock.setsockopt(zmq.SUBSCRIBE, topic)
        self.sock.connect(endpoint)

    def recv(self, topic: bytes, timeout_s=20.0):
        import time

        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.sock.poll(200):
                parts = self.sock.recv_multipart()
                if parts[0] == topic:
                    return parts
        raise AssertionError(f"no {topic!r} event within {timeout_s} s")

    def close(self):
        self.sock.close(linger=0)
        self.ctx.term()


def test_flags_proposals_accept_reject_through_ledger_events_and_socket(tmp_path, specimen):
    """1. A frame whose rule raises two flags far apart: two flags, two proposals (ledger,
       events.jsonl).  2. `accept` one: ledger decision, `proposal` and `scan-request`
       events, the request valid for the simulator.  3. `reject` the other with a reason.
    4. Unknown ids and a second decision get error replies; the daemon keeps running."""
    eng = ScanEngine(specimen, seed=1, drift=SimDrift.none())
    acq = eng.acquire((0, 20), 20.0, (256, 256))
    d, watch = _daemon(tmp_path)
    with running_daemon(d):
        sub = _Sub(d.endpoints["events"], b"scan-request")
        try:
            write_sim(watch, acq, test_flags=[
                {"x_px": 40, "y_px": 40, "kind": "vortex", "score": 0.9},
                {"x_px": 200, "y_px": 210, "kind": "anomaly", "score": 0.6}])
            wait_for(lambda: len(list(d.ledger.proposals())) == 2, timeout_s=60,
                     what="two proposals")
            flags = d.ledger.flags()
            assert [f["kind"] for f in flags] == ["vortex", "anomaly"]
            assert flags[0]["region"]["x_px"] == 40
            # The stage region: the frame centre (0, 20) nm plus (40 - 127.5) px of 78 pm.
            st = flags[0]["payload"]["region_stage"]
            assert st["center_x_nm"] == pytest.approx((40 - 127.5) * 0.078125)
            assert st["center_y_nm"] == pytest.approx(20 + (40 - 127.5) * 0.078125)
            ep = d.endpoints["commands"]
            listed = send_command(ep, {"cmd": "proposals", "state": "open"})
            assert listed["ok"] and [p["kinds"] for p in listed["proposals"]] == [["vortex"],
                                                                                  ["anomaly"]]
            # Ranked by strength x novelty / dose cost; this frame's own (low) dose costs little.
            pri = [p["priority"] for p in listed["proposals"]]
            assert pri == [p["score"] for p in listed["proposals"]]
            assert 0.85 < pri[0] < 0.9 and 0.55 < pri[1] < 0.6
            assert all(p["dose_e_per_a2"] > 0 for p in listed["proposals"])
            assert "dose budget" in listed["caution"]
            best, other = listed["proposals"][0]["id"], listed["proposals"][1]["id"]

            reply = send_command(ep, {"cmd": "accept", "id": best})
            assert reply["ok"] and reply["state"] == "accepted"
            req = decode_scan_request(sub.recv(b"scan-request"))
            assert req.id == best and req.extra["proposal_id"] == best
            assert (req.center_x_nm, req.center_y_nm) == pytest.approx(
                (st["center_x_nm"], st["center_y_nm"]), abs=1e-6)  # no drift here
            reply = send_command(ep, {"cmd": "reject", "id": other, "why": "beam damage"})
            assert reply["ok"] and reply["state"] == "rejected"

            bad = send_command(ep, {"cmd": "accept", "id": "p9999"})
            assert not bad["ok"] and "no proposal with id 'p9999'" in bad["error"]
            again = send_command(ep, {"cmd": "reject", "id": best})
            assert not again["ok"] and "already accepted" in again["error"]
            assert not send_command(ep, {"cmd": "accept"})["ok"]
            assert send_command(ep, {"cmd": "status"})["ok"]
        finally:
            sub.close()
    with Ledger(tmp_path / "session" / "ledger.sqlite", readonly=True) as led:
        decisions = [(x["proposal_id"], x["decision"], x["note"]) for x in led.decisions()]
        assert decisions == [(best, "accept", None), (other, "reject", "beam damage")]
        states = {p["id"]: p["state"] for p in led.proposals()}
        assert states == {best: "accepted", other: "rejected"}
    topics = [e["topic"] for e in read_events(tmp_path / "session")]
    assert topics.count("flag") == 2 and topics.count("scan-request") == 1
    updates = [e["data"] for e in read_events(tmp_path / "session", "proposal")]
    assert [u["state"] for u in updates] == ["open", "open", "accepted", "rejected"]
    assert updates[-1]["note"] == "beam damage"


def test_no_region_is_proposed_twice_and_a_raising_rule_is_survived(tmp_path, specimen):
    """1. Frame 1 flags a spot; frame 2 (overlapping, later) flags the same specimen spot.
    2. Only one proposal exists; the skip is counted.
    3. Frame 3 makes the rule raise: it is logged and counted, the daemon runs on, and
       frame 4 is analysed and flagged as usual.
    4. After a restart on the same session, frame 5 flags the spot again: still one proposal."""
    eng = ScanEngine(specimen, seed=2, drift=SimDrift.none())
    a = eng.acquire((0, 20), 20.0, (256, 256))
    b = eng.acquire((3, 20), 20.0, (256, 256))
    c = eng.acquire((40, 20), 20.0, (256, 256))
    e = eng.acquire((-40, 20), 20.0, (256, 256))
    f = eng.acquire((0, 20), 20.0, (256, 256))
    px = 20.0 / 256
    rule = SidecarRule()
    d, watch = _daemon(tmp_path, rule=rule)
    with running_daemon(d):
        write_sim(watch, a, test_flags=[{"x_px": 128, "y_px": 128}])
        _done(d, 1)
        write_sim(watch, b, test_flags=[{"x_px": 128 - 3 / px, "y_px": 128}])
        _done(d, 2)
        assert len(list(d.ledger.proposals())) == 1 and len(d.ledger.flags()) == 2
        assert d.decisions.status()["proposals"]["skipped_visited"] == 1
        write_sim(watch, c, rule_raise=True)
        _done(d, 3)
        write_sim(watch, e, test_flags=[{"x_px": 50, "y_px": 60}])
        _done(d, 4)
        assert rule.raised == 1 and d.decisions.n_errors == 1
        assert len(list(d.ledger.proposals())) == 2
        wait_for(lambda: d.snapshot.decisions.get("errors") == 1, what="error in the snapshot")
        assert any("rule bug on purpose" in w for w in d.snapshot.warnings)
        assert not d.should_exit.is_set()
    d2, _ = _daemon(tmp_path, rule=SidecarRule())
    with running_daemon(d2):
        write_sim(watch, f, test_flags=[{"x_px": 128, "y_px": 128}])
        _done(d2, 5, decided=1)
        assert len(list(d2.ledger.proposals())) == 2
        assert d2.decisions.status()["proposals"]["skipped_visited"] == 1


def test_accepted_proposal_after_drift_contains_the_feature(tmp_path, specimen):
    """The loop end to end with the simulated instrument and its truth.

    1. The simulator drifts at (0.03, -0.02) nm/s; four overlapping frames around the
       demo's vortex core land in the watched folder, 2 s apart; the last one carries a
       flag on the core (placed from the truth: the rules are not under test here).
    2. Two minutes pass on the instrument while it scans elsewhere (one more frame).
    3. The proposal is accepted; the daemon places it for the drift then and publishes
       the scan-request, which the simulator acquires.
    4. The core is inside the new frame, within 1 nm of its centre.
    """
    eng = ScanEngine(specimen, seed=3, drift=SimDrift((0.03, -0.02), 0.002, seed=4))
    d, watch = _daemon(tmp_path, settings=_settings(**{
        "drift.clock": "frames", "proposals.lead_time_s": 0.0,
        "proposals.pixel_size_pm": 20.0}))
    with running_daemon(d):
        sub = _Sub(d.endpoints["events"], b"scan-request")
        try:
            for k in range(4):
                acq = eng.acquire((-98.5 + 1.0 * k, 66.0 + 0.5 * k), 12.0, (384, 384))
                flags = []
                if k == 3:
                    core = next(c for c in acq.truth.meta["vortex_cores"] if c["winding"] == 1)
                    assert core["in_frame"]
                    flags = [{"x_px": core["position_px"][1], "y_px": core["position_px"][0],
                              "size_px": 30, "kind": "vortex", "score": 0.9}]
                write_sim(watch, acq, test_flags=flags)
                _done(d, k + 1)
                eng.wait(2.0)
            eng.wait(120.0)
            write_sim(watch, eng.acquire((60.0, -20.0), 12.0, (128, 128)))
            _done(d, 5)
            drift_rows = d.ledger.drift()
            assert len(drift_rows) == 3 and all(r["payload"]["used"] for r in drift_rows)
            (prop,) = list(d.ledger.proposals())
            reply = send_command(d.endpoints["commands"], {"cmd": "accept", "id": prop["id"]})
            assert reply["ok"], reply
            req = decode_scan_request(sub.recv(b"scan-request"))
        finally:
            sub.close()
    got = eng.acquire((req.center_x_nm, req.center_y_nm), req.fov_nm, req.shape_px,
                      scan_rotation_deg=req.scan_rotation_deg, dwell_time_us=2.0)
    core = next(c for c in got.truth.meta["vortex_cores"] if c["winding"] == 1)
    assert core["in_frame"]
    rows, cols = req.shape_px
    off_nm = np.hypot(core["position_px"][0] - (rows - 1) / 2,
                      core["position_px"][1] - (cols - 1) / 2) * req.fov_nm / cols
    assert off_nm < 1.0, f"{off_nm:.2f} nm off centre"
    # The drift it corrected for is several nm: without the correction the core is missed.
    moved = np.hypot(*(np.array([req.center_x_nm, req.center_y_nm]) - np.array(
        [prop["region"]["center_x_nm"], prop["region"]["center_y_nm"]])))
    assert moved > 3.0
    json.dumps(reply)  # the reply is plain JSON


def test_auto_accept_closes_the_loop_with_the_simulator_in_serve_mode(tmp_path, specimen):
    """The simulated instrument's own loop, with auto-accept (meant for it alone).

    1. The simulator runs in serve mode on a thread, subscribed to the daemon's events.
    2. One survey frame flags the demo's vortex core; the proposal is accepted at once.
    3. The scan-request reaches the simulator, which writes the requested frame into the
       watched folder; the daemon analyses it and records its region as visited.
    4. The requested frame's truth has the core inside; nothing is proposed again."""
    import threading

    from sim_instrument.modes import run_serve
    from sim_instrument.outputs import FolderSink

    eng = ScanEngine(specimen, seed=5, drift=SimDrift((0.01, 0.005), 0.0))
    d, watch = _daemon(tmp_path, settings=_settings(**{
        "drift.clock": "frames", "proposals.lead_time_s": 0.0, "proposals.auto_accept": True,
        "proposals.pixel_size_pm": 40.0,
        # One frame, no drift pairs: a core would normally wait for the drift model
        # (tests/daemon/test_decision_quality_units.py); here the drift is known to be slow.
        "proposals.auto_accept_min_drift_pairs": 0}))
    sink = FolderSink(watch, truth_dir=tmp_path / "truth", fmt="npy")
    served: list = []
    stop = threading.Event()
    with running_daemon(d):
        serve = threading.Thread(target=lambda: served.extend(run_serve(
            eng, [sink], d.endpoints["events"], max_requests=1, duration_s=60, stop=stop)),
            daemon=True)
        serve.start()
        try:
            import time

            time.sleep(0.5)  # let the subscription reach the PUB socket (slow joiner)
            acq = eng.acquire((-96.0, 66.0), 16.0, (256, 256))
            core = next(c for c in acq.truth.meta["vortex_cores"] if c["winding"] == 1)
            assert core["in_frame"]
            write_sim(watch, acq, test_flags=[{"x_px": core["position_px"][1],
                                               "y_px": core["position_px"][0], "size_px": 20,
                                               "kind": "vortex", "score": 0.9}])
            serve.join(60)
            assert served, "the simulator received no scan-request"
            _done(d, 2)
        finally:
            stop.set()
            serve.join(10)
        (prop,) = list(d.ledger.proposals())
        assert prop["state"] == "accepted"
        assert d.ledger.decisions()[0]["decided_by"] == "auto"
        assert d.decisions.planner.visited  # the requested frame's footprint
    from sim_instrument.engine import FrameTruth

    truth = FrameTruth.load(tmp_path / "truth" / served[0])
    assert truth.meta["sidecar"]["request_id"] == prop["id"]
    core = next(c for c in truth.meta["vortex_cores"] if c["winding"] == 1)
    assert core["in_frame"]
