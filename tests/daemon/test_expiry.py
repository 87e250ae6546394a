"""Open proposals expire after `proposals.expire_after_s` (ledger decision, event)."""

import time

import pytest

from livequant.config import load_settings
from livequant.daemon.decisions import DecisionLoop
from livequant.daemon.ledger import Ledger

REGION = {"center_x_nm": -40.0, "center_y_nm": 10.0, "width_nm": 4.0, "height_nm": 4.0,
          "rotation_deg": 0.0}


class _Publisher:
    def __init__(self):
        self.events = []

    def publish(self, topic, data):
        self.events.append((topic, data))


class _NoRules:
    names = ()

    def evaluate(self, view, context):
        return []

    def status(self):
        return {}


def _loop(tmp_path, expire_after_s, now):
    settings = load_settings(overrides={"proposals.expire_after_s": expire_after_s})
    ledger = Ledger(tmp_path / "ledger.sqlite")
    pub = _Publisher()
    loop = DecisionLoop(settings, ledger, pub, rules=_NoRules(), clock=lambda: now[0])
    return loop, ledger, pub


def test_open_proposals_expire_and_say_so(tmp_path):
    """1. two open proposals; 2. within the limit nothing happens; 3. past it both expire,
    each with an `expire` decision by `auto` and a `proposal` event; 4. an expired
    proposal can no longer be accepted; 5. decided proposals never expire."""
    now = [time.time()]
    loop, ledger, pub = _loop(tmp_path, 60.0, now)
    for pid in ("p0001", "p0002", "p0003"):
        ledger.add_proposal(pid, region=REGION, frame_id="f1", score=0.5, payload={})
    ledger.decide("p0003", "reject", note="not this one")
    now[0] += 30.0
    assert loop.expire_stale() == []
    now[0] += 60.0
    assert sorted(loop.expire_stale()) == ["p0001", "p0002"]
    states = {p["id"]: p["state"] for p in ledger.proposals()}
    assert states == {"p0001": "expired", "p0002": "expired", "p0003": "rejected"}
    auto = [d for d in ledger.decisions() if d["decision"] == "expire"]
    assert [(d["proposal_id"], d["decided_by"]) for d in auto] == [("p0001", "auto"),
                                                                   ("p0002", "auto")]
    assert "expire_after_s" in auto[0]["note"]
    assert [(t, e["id"], e["state"]) for t, e in pub.events] == [
        ("proposal", "p0001", "expired"), ("proposal", "p0002", "expired")]
    with pytest.raises(ValueError, match="already expired"):
        loop.accept("p0001")
    assert loop.expire_stale() == []
    ledger.close()


def test_zero_means_proposals_never_expire(tmp_path):
    now = [time.time()]
    loop, ledger, _ = _loop(tmp_path, 0.0, now)
    ledger.add_proposal("p0001", region=REGION, frame_id="f1", score=0.5, payload={})
    now[0] += 10 * 24 * 3600.0
    assert loop.expire_stale() == []
    assert [p["state"] for p in loop.list()] == ["open"]
    ledger.close()
