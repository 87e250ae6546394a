"""The simulated specimen changes over time: a moving 180-degree wall, an annihilating pair.

Truth is the scenario itself: the wall's tanh centre moves to point + v t (CHECK-VALUES
section 7 profile), the pair's windings (section 10) vanish from annihilate_at_s on.
"""

import numpy as np
import pytest

from sim_instrument.engine import DriftModel, ScanEngine
from sim_instrument.scenario import ScenarioError
from tests.sim.test_specimen import _film, _winding


def test_moving_wall_follows_its_velocity():
    spec = _film(walls=[{"kind": "180", "point_nm": [0.0, 0.0], "angle_deg": 90.0,
                         "half_width_nm": 0.7, "velocity_nm_per_s": [0.05, 0.0]}])
    for t in (0.0, 20.0):
        spec.set_time(t)
        cells = spec.cells_in((-5.0, 5.0, -0.3, 0.3))
        x = cells.b_xy_nm[:, 0]
        np.testing.assert_allclose(cells.applied_b_pm[:, 1], 17.0 * np.tanh((x - 0.05 * t) / 0.7),
                                   atol=1e-9)
        assert spec.walls_truth()[0]["point_nm"][0] == pytest.approx(0.05 * t)


def test_pair_annihilates_at_its_time_and_leaves_the_truth():
    spec = _film(vortex_pairs=[{"vortex_nm": [-6.0, 0.0], "antivortex_nm": [6.0, 0.0],
                                "core_nm": 1.0, "annihilate_at_s": 30.0}])
    spec.set_time(29.0)
    cells = spec.cells_in((-15.0, 15.0, -8.0, 8.0))
    assert _winding(cells, (-10.0, -2.0, -4.0, 4.0)) == pytest.approx(1.0, abs=1e-9)
    assert len(spec.vortex_truth()) == 2
    spec.set_time(30.0)
    cells = spec.cells_in((-15.0, 15.0, -8.0, 8.0))
    assert _winding(cells, (-10.0, -2.0, -4.0, 4.0)) == pytest.approx(0.0, abs=1e-9)
    assert spec.vortex_truth() == []


def test_engine_holds_the_specimen_at_mid_frame():
    spec = _film(walls=[{"kind": "180", "point_nm": [0.0, 0.0], "angle_deg": 90.0,
                         "half_width_nm": 0.7, "velocity_nm_per_s": [0.05, 0.0]}])
    eng = ScanEngine(spec, seed=1, drift=DriftModel.none())
    eng.wait(10.0)
    acq = eng.acquire((0.0, 0.0), 4.0, (64, 64), noise=False)
    t_mid = 10.0 + acq.truth.meta["frame_time_s"] / 2
    assert acq.truth.meta["specimen_time_s"] == pytest.approx(t_mid)
    assert acq.truth.meta["walls"][0]["point_nm"][0] == pytest.approx(0.05 * t_mid)


def test_only_180_walls_may_move():
    with pytest.raises((ScenarioError, ValueError), match="only 180-degree walls may move"):
        _film(walls=[{"kind": "90", "point_nm": [0.0, 0.0], "angle_deg": 45.0,
                      "half_width_nm": 0.7, "velocity_nm_per_s": [0.05, 0.0]}])
