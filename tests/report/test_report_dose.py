"""The report's dose map: rebuilt from the frames' sidecar values and the recorded drift."""

from __future__ import annotations

import pytest

from livequant.proposals.dose import dose_e_per_a2
from livequant.report.dose import dose_map_figure, session_dose_map


def _summary(x_nm, current=20.0, dwell=2.0, px=10.0):
    return {"shape": [512, 512], "meta": {"pixel_size_pm": px, "dwell_time_us": dwell,
                                          "beam_current_pa": current, "stage_x_nm": x_nm,
                                          "stage_y_nm": 0.0, "scan_rotation_deg": 0.0}}


def test_dose_map_counts_frames_in_specimen_coordinates():
    """Two 5.12 nm frames at stage x = 0 and x = 3 nm; the second was taken after the
    specimen drifted +3 nm, so both saw the same specimen area: one double exposure of
    2 x 2.5e4 e/A^2 (CHECK-VALUES section 9), not two single ones.  A frame without a
    beam current is counted apart."""
    summaries = {"f1": _summary(0.0), "f2": _summary(3.0), "f3": _summary(50.0, current=None)}
    drift = [{"frame_id": "f2", "t": 10.0, "dx_nm": 3.0, "dy_nm": 0.0}]
    dm, info = session_dose_map(summaries, drift)
    one = dose_e_per_a2(20.0, 2.0, 10.0)
    assert info == {"frames": 2, "without_dose": 1, "max_frame_e_per_a2": pytest.approx(one)}
    img, extent = dm.image()
    assert img.max() == pytest.approx(2 * one)
    assert (img == img.max()).mean() > 0.9           # nearly all of the map doubly exposed
    assert extent[1] - extent[0] == pytest.approx(5.12, abs=0.3)
    proposals = [{"id": "p0001", "state": "open", "payload": {
        "region": {"center_x_nm": 1.0, "center_y_nm": 0.0, "width_nm": 2.0, "height_nm": 2.0,
                   "rotation_deg": 0.0}, "drift_nm": [1.0, 0.0], "dose_budget_exceeded": True}}]
    fig = dose_map_figure(dm, proposals, budget_e_per_a2=3e4)
    assert fig.axes and "dose" in fig.axes[0].get_title().lower()
    empty = dose_map_figure(session_dose_map({}, [])[0], [])
    assert "no dose map" in empty.axes[0].texts[0].get_text()
