"""The scoring scenario: two wall orientations and point defects; wall truth on the strained line."""

from __future__ import annotations

import numpy as np

from sim_instrument import ScanEngine, Specimen


def test_scenario_has_two_wall_orientations_and_several_defects():
    spec = Specimen.from_scenario("defects-walls")
    angles = {round(w.angle_deg) % 180 for w in spec.scenario.walls}
    assert angles == {90, 60}
    assert len(spec.scenario.defects) >= 4 and len(spec.scenario.vortex_pairs) == 1


def test_inclined_wall_truth_follows_the_displaced_wall():
    """Across the inclined wall, the truth cells' polar direction flips sign exactly at the
    truth line: every cell more than 0.6 nm from it on one side points one way, on the
    other side the other way (the film's strain turns the 60 degree wall to 61.4)."""
    eng = ScanEngine(Specimen.from_scenario("defects-walls"), seed=2)
    acq = eng.acquire((75.3, 61.0), 12.0, (384, 384))
    t = acq.truth
    (w,) = [w for w in t.meta["walls"] if w["crosses_frame"]]
    d = np.asarray(w["direction_image_xy"])
    assert np.degrees(np.arctan2(d[1], d[0])) % 180 > 61.0
    p0 = np.asarray(w["point_px"][::-1])
    pos = np.asarray(t.arrays["cell_b_px"], float)[:, ::-1]
    r = pos - p0
    side = r[:, 0] * d[1] - r[:, 1] * d[0]
    px_nm = acq.sidecar["pixel_size_pm"] / 1000
    pol = np.asarray(t.arrays["cell_polarization_dir"], float)
    sign = np.sign(pol @ pol[np.argmax(side)])
    far = np.abs(side) * px_nm > 0.6
    assert far.sum() > 100
    assert np.all(sign[far & (side > 0)] > 0) and np.all(sign[far & (side < 0)] < 0)
