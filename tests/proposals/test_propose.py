"""Proposals: merging, the visited test, budgets, and placement for drift against truth."""

import numpy as np
import pytest

from livequant.proposals.drift import DriftModel, DriftTracker
from livequant.proposals.geometry import FrameGeometry, stage_region
from livequant.proposals.propose import (CAUTION, Candidate, Planner, candidate_from_flag,
                                         merge_candidates, proposal_from_json,
                                         scan_request_fields)
from livequant.rules.types import Flag, Region
from sim_instrument import ScanEngine, Specimen
from sim_instrument.engine import DriftModel as SimDrift
from sim_instrument.requests import ScanRequest
from tests.proposals._sim import drift_image


def _cand(x, y, size=4.0, score=0.5, fid=1, kind="anomaly"):
    return Candidate(specimen_region=stage_region(x, y, size, size), frame_id="f", t_seen_s=0.0,
                     score=score, kinds=(kind,), reasons=(f"{kind} at {x},{y}",),
                     flag_ids=(fid,))


def test_overlapping_candidates_merge_and_keep_every_flag():
    out = merge_candidates([_cand(0, 0, score=0.4, fid=1), _cand(1, 0.5, score=0.9, fid=2,
                                                                   kind="vortex"),
                            _cand(20, 0, fid=3)], merge_overlap=0.3)
    assert len(out) == 2
    top = out[0]
    assert top.score == 0.9 and set(top.flag_ids) == {1, 2} and set(top.kinds) == {
        "anomaly", "vortex"}
    r = top.specimen_region
    assert (r["center_x_nm"], r["center_y_nm"], r["width_nm"], r["height_nm"]) == \
        pytest.approx((0.5, 0.25, 5.0, 4.5))


def test_merge_never_exceeds_the_largest_region():
    out = merge_candidates([_cand(0, 0, size=30), _cand(12, 0, size=30)], merge_overlap=0.3,
                           max_size_nm=40.0)
    assert len(out) == 2


def test_visited_regions_and_earlier_proposals_are_not_proposed_again():
    p = Planner(max_per_frame=5, max_per_session=10)
    p.add_visited(stage_region(0, 0, 10, 10))
    first = p.plan([_cand(1, 1), _cand(30, 0)])
    assert [c.specimen_region["center_x_nm"] for c in first] == [30]
    assert p.n_skipped_visited == 1
    p.commit(p.place("p0001", first[0], drift_nm=(0, 0), sigma_drift_nm=0, placed_for_s=0))
    again = p.plan([_cand(30.5, 0.5)])   # the same place, seen again on a later frame
    assert again == [] and p.n_skipped_visited == 2


def test_budgets_per_frame_and_per_session():
    p = Planner(max_per_frame=2, max_per_session=3, min_score=0.3)
    cands = [_cand(20 * k, 0, score=0.5 + 0.01 * k) for k in range(5)] + [_cand(0, 50, score=0.1)]
    first = p.plan(cands)
    assert len(first) == 2 and p.n_below_score == 1
    assert [c.score for c in first] == [0.54, 0.53]  # best first
    for k, c in enumerate(first):
        p.commit(p.place(f"p{k}", c, drift_nm=(0, 0), sigma_drift_nm=0, placed_for_s=0))
    second = p.plan([_cand(20 * k, 100) for k in range(5)])
    assert len(second) == 1 and p.status()["budget_left"] == 1


def test_scan_request_follows_the_simulator_schema_and_round_trips():
    g = FrameGeometry(10.0, 5.0, 0.02, 30.0, (512, 512))
    flag = Flag(kind="vortex", score=0.8, region=Region(100, 200, 50, 40), message="winding +1",
                rule="topology", frame_id="f1")
    cand = candidate_from_flag(flag, g, flag_id=7, t_seen_s=100.0, drift_nm=(0.5, -0.5))
    prop = Planner(pixel_size_pm=10.0).place("p0001", cand, drift_nm=(1.0, 0.0),
                                              sigma_drift_nm=0.1, placed_for_s=200.0)
    req = ScanRequest.model_validate(scan_request_fields(prop))
    assert req.id == "p0001" and req.scan_rotation_deg == pytest.approx(30.0)
    # The flag's centre on the stage, minus the drift then, plus the drift predicted.
    centre = g.px_to_stage(100, 200) - [0.5, -0.5] + [1.0, 0.0]
    assert (req.center_x_nm, req.center_y_nm) == pytest.approx(tuple(centre))
    # The clamped 4 nm region grows by 3 drift sigmas on each side (drift_margin_sigma).
    assert req.fov_nm == pytest.approx(4.0 + 2 * 3.0 * 0.1)
    assert req.extra["caution"] == CAUTION
    assert proposal_from_json(prop.to_json()) == prop


def test_after_drift_the_placed_region_contains_the_feature():
    """The key loop check against the simulator's truth.

    1. Four overlapping frames near the vortex core of the demo specimen, 2 s apart, with
       a fast drift (0.04, -0.03) nm/s; the tracker measures the drift between them.
    2. A flag marks the core in the last frame (from the truth: this test is about placement).
    3. Two minutes pass (the operator thinks): the specimen drifts another ~6 nm.
    4. The proposal is placed for that time; the simulator scans the scan-request's fields.
    5. The core lies inside the new frame, near its centre; placed without the drift
       correction it would miss the frame.
    """
    spec = Specimen.from_scenario("demo")
    v = (0.04, -0.03)
    eng = ScanEngine(spec, seed=7, drift=SimDrift(v, 0.002, seed=8))
    tracker = DriftTracker(DriftModel(prior_speed_nm_per_s=0.05))
    for k in range(4):
        acq = eng.acquire((-98.5 + 1.0 * k, 66.0 + 0.5 * k), 12.0, (384, 384))
        eng.wait(2.0)
        im = drift_image(acq)
        tracker.observe(im)
    core = next(c for c in acq.truth.meta["vortex_cores"] if c["winding"] == 1)
    assert core["in_frame"]
    row, col = core["position_px"]
    flag = Flag(kind="vortex", score=0.9, region=Region(col, row, 30, 30), message="core",
                rule="truth", frame_id=acq.frame_id)
    d_seen, _ = tracker.model.position_of(im.frame_id, im.t_s)
    cand = candidate_from_flag(flag, im.geometry, flag_id=1, t_seen_s=im.t_s, drift_nm=d_seen)
    planner = Planner(pixel_size_pm=20.0)
    assert planner.plan([cand]) == [cand]
    eng.wait(120.0)
    t_scan = eng.time_s + 0.5 * eng.frame_time_s((300, 300), 2.0)
    d_then, sigma = tracker.model.position(t_scan)
    prop = planner.place("p0001", cand, drift_nm=d_then, sigma_drift_nm=sigma,
                         placed_for_s=t_scan)
    req = ScanRequest.model_validate(scan_request_fields(prop))

    def where(request):
        a = eng.acquire((request.center_x_nm, request.center_y_nm), request.fov_nm,
                        request.shape_px, scan_rotation_deg=request.scan_rotation_deg,
                        dwell_time_us=2.0)
        c = next(c for c in a.truth.meta["vortex_cores"] if c["winding"] == 1)
        return c, a.sidecar["pixel_size_pm"] / 1000, request.shape_px

    got, px_nm, shape = where(req)
    assert got["in_frame"], "the feature is not in the requested frame"
    off_nm = np.hypot(got["position_px"][0] - (shape[0] - 1) / 2,
                      got["position_px"][1] - (shape[1] - 1) / 2) * px_nm
    assert off_nm < 1.0, f"feature {off_nm:.2f} nm from the centre"
    # Without the drift correction (placed where it was seen) the feature is off the frame.
    naive = ScanRequest.model_validate({**scan_request_fields(prop),
                                        "center_x_nm": prop.region["center_x_nm"] - d_then[0]
                                        + d_seen[0],
                                        "center_y_nm": prop.region["center_y_nm"] - d_then[1]
                                        + d_seen[1], "id": "naive"})
    eng.wait(0.0)
    got_naive, _, _ = where(naive)
    assert not got_naive["in_frame"]
