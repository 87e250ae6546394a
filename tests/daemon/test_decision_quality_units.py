"""The decision loop's dose bookkeeping, drift-aware core proposals and one-proposal walls.

The loop runs on a real ledger with a recording publisher and a stand-in rule
manager that returns chosen flags, so each test knows the exact answer.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from livequant.config import Settings
from livequant.daemon.decisions import DecisionLoop
from livequant.daemon.ledger import Ledger
from livequant.frames import FrameMeta
from livequant.proposals.dose import DoseMap, dose_e_per_a2, electrons_per_pixel
from livequant.proposals.propose import CAUTION
from livequant.rules.manager import SessionContext
from livequant.rules.types import Flag, FrameView, Region

PX_PM = 10.0
SHAPE = (1024, 1024)          # 10.24 nm frames


class _Publisher:
    def __init__(self):
        self.events = []

    def publish(self, topic, data):
        self.events.append((topic, data))


class _Rules:
    """Returns the flags queued for each frame id."""

    def __init__(self):
        self.by_frame = {}

    def evaluate(self, view, context):
        return [Flag(**{**f, "frame_id": view.frame_id, "rule": "test"})
                for f in self.by_frame.get(view.frame_id, [])]

    def status(self):
        return {}


def _loop(tmp_path, **overrides):
    base = {"proposals": {"auto_accept": True, "lead_time_s": 0.0},
            "drift": {"clock": "frames"}}
    for key, value in overrides.items():
        section, name = key.split(".")
        base.setdefault(section, {})[name] = value
    settings = Settings.model_validate(base)
    tmp_path.mkdir(parents=True, exist_ok=True)
    ledger = Ledger(tmp_path / "ledger.sqlite")
    rules = _Rules()
    loop = DecisionLoop(settings, ledger, _Publisher(), rules=rules,
                        session_context=SessionContext.from_settings(settings),
                        clock=lambda: 1.0e9)
    return loop, rules, ledger


def loop_settings(loop):
    """The settings a loop was made with (rebuilt from its sections)."""
    return Settings.model_validate({"proposals": loop.cfg.model_dump(),
                                    "drift": loop.drift_cfg.model_dump()})


def _view(fid, t_s, stage_nm=(0.0, 0.0), *, current_pa=20.0, dwell_us=2.0, loop=None):
    """A frame view without cells or thumbnail (`loop`: anchor its drift at 0 like the
    tracker does for a session's first frame)."""
    from datetime import datetime, timezone

    meta = FrameMeta(frame_id=fid, pixel_size_pm=PX_PM, dwell_time_us=dwell_us,
                     stage_x_nm=stage_nm[0], stage_y_nm=stage_nm[1],
                     acquired_at=datetime.fromtimestamp(t_s, timezone.utc).isoformat(),
                     beam_current_pa=current_pa)
    if loop is not None:
        loop.model.add_anchor(fid, t_s + 1.048576 / 2, (0.0, 0.0), 0.0)
    return FrameView(frame_id=fid, meta=meta, shape=SHAPE, status="ok", summary={})


def _core(x_px=512.0, y_px=512.0, side_px=160.0):
    return {"kind": "vortex", "score": 0.9, "region": Region(x_px, y_px, side_px, side_px),
            "message": "core"}


def _wall(x_px=512.0, length_px=1000.0, width_px=120.0):
    """A vertical wall band through the frame (long axis along the rows)."""
    return {"kind": "domain-wall", "score": 0.8,
            "region": Region(x_px, 512.0, width_px, length_px), "message": "wall"}


# ------------------------------------------------------------------ dose numbers

def test_dose_of_a_frame_matches_the_published_bookkeeping():
    """CHECK-VALUES section 9 and check 15: 20 pA, 2 us, 10 pm pixels ->
    250 e/pixel and 2.5e4 e/A^2 (I t / e = 249.7; / (0.1 A)^2)."""
    assert electrons_per_pixel(20.0, 2.0) == pytest.approx(249.7, rel=1e-3)
    assert dose_e_per_a2(20.0, 2.0, 10.0) == pytest.approx(2.5e4, rel=2e-3)
    # The other two worked examples of the same section.
    assert electrons_per_pixel(50.0, 20.0) == pytest.approx(6242, rel=1e-3)
    assert dose_e_per_a2(50.0, 20.0, 5.0) == pytest.approx(2.5e6, rel=2e-3)
    assert dose_e_per_a2(30.0, 1.0, 15.0) == pytest.approx(8.3e3, rel=5e-3)  # 2 digits given
    with pytest.raises(ValueError, match="beam_current_pa"):
        dose_e_per_a2(0.0, 2.0, 10.0)


def test_dose_map_adds_overlaps_and_counts_rotated_regions_by_area():
    m = DoseMap(cell_nm=0.1)
    a = {"center_x_nm": 0.0, "center_y_nm": 0.0, "width_nm": 10.0, "height_nm": 10.0,
         "rotation_deg": 0.0}
    b = {**a, "center_x_nm": 6.0, "rotation_deg": 30.0}
    m.add(a, 100.0)
    m.add(b, 50.0)
    assert m.max_in(a) == pytest.approx(150.0)
    far = {**a, "center_x_nm": 40.0}
    assert m.max_in(far) == 0.0
    # The rotated square covers its area: 10 x 10 nm = 10,000 cells of 0.1 nm.
    v = m.values_in(b)
    assert v.size == pytest.approx(10_000, rel=0.01)
    img, extent = m.image()
    assert img.max() == pytest.approx(150.0)
    assert (img > 0).sum() * 0.01 == pytest.approx(200 - _overlap(a, b), rel=0.01)
    t = math.radians(30.0)
    assert extent[0] <= -5.0 and extent[1] >= 6.0 + 5 * (math.cos(t) + math.sin(t)) - 0.1


def _overlap(a, b):
    from livequant.proposals.geometry import overlap_area

    return overlap_area(a, b)


# ------------------------------------------------------------------ dose budget

def test_a_proposal_over_the_dose_budget_is_marked_and_not_auto_accepted(tmp_path):
    """One survey frame gives 2.5e4 e/A^2; the proposed scan (4 us, 10 pm, 20 pA) another
    5.0e4.  With a budget of 6e4 the proposal would take the core's cells to 7.5e4: marked,
    left open for the operator, with the reason; the same frame under a budget of 1e5 is
    accepted (the drift gate is off here)."""
    for budget, expect_open in ((6e4, True), (1e5, False)):
        loop, rules, ledger = _loop(tmp_path / f"b{int(budget)}",
                                    **{"proposals.dose_budget_e_per_a2": budget,
                                       "proposals.auto_accept_min_drift_pairs": 0})
        rules.by_frame["f1"] = [_core()]
        loop.on_frame(_view("f1", 1000.0, loop=loop))
        (row,) = list(ledger.proposals())
        p = row["payload"]
        assert p["dose_prior_max_e_per_a2"] == pytest.approx(2.5e4, rel=2e-3)
        assert p["dose_e_per_a2"] == pytest.approx(5.0e4, rel=5e-3)  # pixel rounded to fit
        assert p["dose_after_max_e_per_a2"] == pytest.approx(7.5e4, rel=5e-3)
        assert p["dose_budget_e_per_a2"] == budget
        if expect_open:
            assert row["state"] == "open" and p["dose_budget_exceeded"] is True
            assert "over the dose budget" in p["auto_accept_blocked"]
            assert "7.48e+04" in p["auto_accept_blocked"]
            with pytest.raises(ValueError, match="over the dose budget"):
                loop.accept(row["id"], decided_by="auto")
            # The operator may still decide: the budget is theirs to set.
            reply = loop.accept(row["id"])
            assert reply["dose_budget_exceeded"] is True and reply["caution"] == CAUTION
        else:
            assert row["state"] == "accepted" and p["dose_budget_exceeded"] is False
        ledger.close()


def test_with_a_budget_and_no_beam_current_nothing_is_auto_accepted(tmp_path):
    loop, rules, ledger = _loop(tmp_path, **{"proposals.dose_budget_e_per_a2": 1e9,
                                             "proposals.auto_accept_min_drift_pairs": 0})
    rules.by_frame["f1"] = [_core()]
    loop.on_frame(_view("f1", 1000.0, current_pa=None, loop=loop))
    (row,) = list(ledger.proposals())
    assert row["state"] == "open"
    assert "dose unknown" in row["payload"]["auto_accept_blocked"]
    assert loop.status()["dose"]["frames_without_dose"] == 1
    ledger.close()


def test_the_dose_map_follows_the_specimen_not_the_stage(tmp_path):
    """Two frames at the same stage position, the specimen drifted 5 nm between them: the
    map holds two single exposures side by side (overlap 5.24 of 10.24 nm), not one
    double exposure."""
    loop, rules, ledger = _loop(tmp_path)
    loop.on_frame(_view("f1", 1000.0, loop=loop))
    loop.model.add_anchor("f2", 1010.0, (5.0, 0.0), 0.01)
    loop.on_frame(_view("f2", 1010.0))
    one = dose_e_per_a2(20.0, 2.0, 10.0)
    img, extent = loop.dose.image()
    assert img.max() == pytest.approx(2 * one)
    width_nm = (img > 0).any(axis=0).sum() * loop.dose.cell_nm
    assert width_nm == pytest.approx(10.24 + 5.0, abs=0.6)
    ledger.close()


# ------------------------------------------------------------------ cores and drift

def test_a_core_proposal_waits_for_the_drift_model_and_is_sized_to_its_uncertainty(tmp_path):
    """Placed for 20 s ahead with no drift measured (prior 0.02 nm/s): sigma about 0.4 nm,
    a 4 nm box would miss the core by more than its margin; the region grows by 3 sigma a
    side and is not accepted automatically until two frame pairs are measured."""
    loop, rules, ledger = _loop(tmp_path, **{"proposals.lead_time_s": 20.0})
    rules.by_frame["f1"] = [_core()]
    loop.on_frame(_view("f1", 1000.0, loop=loop))
    (row,) = list(ledger.proposals())
    p = row["payload"]
    assert row["state"] == "open"
    assert "waiting for the drift model" in p["auto_accept_blocked"]
    # Sized: the flagged 1.6 nm box + 1 nm margin a side, clamped to 4 nm, + 3 sigma a side.
    sigma = p["sigma_drift_nm"]
    assert 0.3 < sigma < 0.6
    assert p["region"]["width_nm"] == pytest.approx(4.0 + 6.0 * sigma)
    # A restart keeps it waiting (not accepted, not forgotten).
    again = DecisionLoop(loop_settings(loop), ledger, _Publisher(), rules=rules,
                         session_context=SessionContext(), clock=lambda: 1.0e9)
    again.resume()
    assert again._held == [row["id"]]
    # Two frame pairs measured: the next frame releases it, placed with the new sigma.
    for k in range(2):
        loop.model.add_pair(1000.0 + 10 * k, 1010.0 + 10 * k, (0.1, 0.0), 0.02)
    loop.on_frame(_view("f2", 1030.0, stage_nm=(100.0, 0.0)))
    row = ledger.proposal(row["id"])
    assert row["state"] == "accepted"
    (dec,) = ledger.decisions()
    assert dec["decided_by"] == "auto" and "drift model ready" in dec["note"]
    ledger.close()


# ------------------------------------------------------------------ walls

def test_a_wall_seen_on_several_frames_is_one_proposal_and_a_second_wall_its_own(tmp_path):
    """Four frames step down a straight vertical wall (7 nm apart, 10.24 nm frames, so
    each sees the wall where the last did not fully); the first sighting becomes a strip
    proposal, the others are the same feature.  A parallel wall 20 nm away is a second
    feature.  No two proposals of one wall overlap."""
    from livequant.proposals.geometry import overlap_area

    loop, rules, ledger = _loop(tmp_path, **{"proposals.auto_accept": False})
    for k in range(4):
        rules.by_frame[f"w{k}"] = [_wall()]
        loop.on_frame(_view(f"w{k}", 1000.0 + 10 * k, stage_nm=(0.0, -7.0 * k)))
    rules.by_frame["other"] = [_wall()]
    loop.on_frame(_view("other", 1050.0, stage_nm=(20.0, 0.0)))
    rows = list(ledger.proposals())
    assert len(rows) == 2
    assert loop.planner.status()["same_feature"] == 3
    a, b = (r["payload"]["specimen_region"] for r in rows)
    assert overlap_area(a, b) == 0.0
    ledger.close()
