"""The decision scorer against a hand-made session whose right answers are known."""

from __future__ import annotations

import numpy as np
import pytest

from livequant.daemon.ledger import Ledger
from livequant.tools.score_session import format_table, score_session
from sim_instrument import ScanEngine, Specimen


def _stage(region):
    return {"center_x_nm": region[0], "center_y_nm": region[1], "width_nm": region[2],
            "height_nm": region[3], "rotation_deg": 0.0}


def test_scores_a_known_session(tmp_path):
    """One 12 nm frame on the demo's wall at x = -40 nm (truth from the simulator) and one
    featureless frame.  Flags: the wall (right), a vortex 3 nm off any core (wrong), an
    anomaly on the wall's band (a repeat), an anomaly on the featureless frame (a false
    alarm).  Two accepted proposals of the wall overlapping by 2 x 4 nm = 8 nm^2."""
    eng = ScanEngine(Specimen.from_scenario("demo"), seed=3)
    wall = eng.acquire((-40.0, 0.0), 12.0, (384, 384))
    plain = eng.acquire((-80.0, 0.0), 12.0, (384, 384))
    (tmp_path / "truth").mkdir()
    wall.truth.save(tmp_path / "truth")
    plain.truth.save(tmp_path / "truth")
    (w,) = [w for w in wall.truth.meta["walls"] if w["crosses_frame"]]
    # A place on the featureless frame at least 1.5 nm from any column with missing atoms.
    occ, pos = plain.truth.arrays["occupancy"], plain.truth.arrays["positions_px"][:, ::-1]
    px_nm = plain.sidecar["pixel_size_pm"] / 1000
    grid = np.stack(np.meshgrid(np.arange(80, 300, 20.0), np.arange(80, 300, 20.0)), -1)
    grid = grid.reshape(-1, 2)
    far = [p for p in grid if np.all(np.hypot(*(pos[occ < 0.99] - p).T) * px_nm > 1.5)]
    quiet = far[0]
    row, col = w["point_px"]
    band = {"x_px": col, "y_px": 192.0, "width_px": 380.0, "height_px": 60.0, "angle_deg": 90.0}
    with Ledger(tmp_path / "ledger.sqlite") as led:
        fw = led.add_flag(frame_id=wall.frame_id, rule="t", kind="domain-wall", score=0.9,
                          region=band, payload={})
        led.add_flag(frame_id=wall.frame_id, rule="t", kind="vortex", score=0.5,
                     region={"x_px": col + 96.0, "y_px": 100.0, "width_px": 40.0,
                             "height_px": 40.0}, payload={})
        led.add_flag(frame_id=wall.frame_id, rule="t", kind="anomaly", score=0.5,
                     region={"x_px": col + 5.0, "y_px": 300.0, "width_px": 30.0,
                             "height_px": 30.0}, payload={})
        led.add_flag(frame_id=plain.frame_id, rule="t", kind="anomaly", score=0.5,
                     region={"x_px": float(quiet[0]), "y_px": float(quiet[1]), "width_px": 30.0,
                             "height_px": 30.0}, payload={})
        for pid, x in (("p1", -40.0), ("p2", -38.0)):
            region = _stage((x, 0.0, 4.0, 4.0))
            led.add_proposal(pid, region=region, frame_id=wall.frame_id, score=0.9,
                             payload={"flag_ids": [fw], "region": region, "drift_nm": [0, 0],
                                      "pixel_size_pm": 10.0})
            led.decide(pid, "accept", decided_by="auto")
    s = score_session(tmp_path)
    assert s["frames"] == 2 and s["featureless_frames"] == 1
    assert s["precision"]["domain-wall"] == 1.0 and s["recall"]["domain-wall"] == 1.0
    assert s["precision"]["vortex"] == 0.0
    assert s["anomalies_repeating_typed"] == 1
    assert s["false_alarms_per_featureless_frame"] == 1.0
    assert s["proposals_per_feature"] == 2.0 and s["distinct_features_proposed"] == 1
    assert s["overlap_nm2"] == pytest.approx(8.0)
    assert s["overlap_px"] == pytest.approx(8.0 / 0.01 ** 2)
    table = format_table([s])
    assert "| 1.00 / 1.00 (1/1) |" in table and "| 8.0 |" in table
