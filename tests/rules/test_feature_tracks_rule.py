"""Built-in rule feature_tracks on hand-made track views (no analysis needed).

Truth: the thresholds of the rule's settings (max_wall_shift_nm, min_significance) and the
track events handed over in context.tracks.
"""

from types import SimpleNamespace

import pytest

from livequant.config import FeatureTrackSettings
from livequant.rules.builtin.feature_tracks import FeatureTrackRule


def _view(fid="f3"):
    return SimpleNamespace(frame_id=fid, pixel_size_pm=10.0)


def _ctx(s_nm, sigma=0.02, fid="f3", vanished=()):
    wall = {"track_id": "W1", "s_nm": s_nm, "sigma_s_nm": [sigma] * len(s_nm), "x_px": 100.0,
            "y_px": 50.0, "velocity_nm_per_s": 0.02, "sigma_velocity_nm_per_s": 0.001}
    return SimpleNamespace(tracks={"frame_id": fid, "walls": [wall], "appeared": [],
                                   "vanished": list(vanished)})


def test_wall_moved_once_per_step_and_only_when_significant():
    rule = FeatureTrackRule(FeatureTrackSettings(max_wall_shift_nm=0.5, min_significance=3.0))
    assert rule.livequant_frame_rules(_view(), _ctx([0.0, 0.3])) == []          # < 0.5 nm
    assert rule.livequant_frame_rules(_view(), _ctx([0.0, 0.6], sigma=0.5)) == []  # < 3 sigma
    flags = rule.livequant_frame_rules(_view(), _ctx([0.0, 0.3, 0.6]))
    assert [f.kind for f in flags] == ["wall-moved"]
    assert flags[0].evidence["shift_nm"] == pytest.approx(0.6)
    assert flags[0].region.width_px == pytest.approx(300.0)   # 3 nm at 10 pm pixels
    # The next flag needs another 0.5 nm from where it was flagged.
    assert rule.livequant_frame_rules(_view(), _ctx([0.0, 0.3, 0.6, 0.9])) == []
    assert len(rule.livequant_frame_rules(_view(), _ctx([0.0, 0.3, 0.6, 0.9, 1.2]))) == 1


def test_vanished_core_is_flagged_and_other_frames_are_ignored():
    core = {"track_id": "C4", "winding": -1, "xy_nm": [[42.9, 0.4]], "frames": ["f1"],
            "x_px": 300.0, "y_px": 380.0}
    rule = FeatureTrackRule()
    flags = rule.livequant_frame_rules(_view(), _ctx([0.0], vanished=[core]))
    assert [(f.kind, f.evidence["winding"]) for f in flags] == [("core-vanished", -1)]
    assert "vanished" in flags[0].message
    # Tracks of another frame (stale context) give nothing.
    assert rule.livequant_frame_rules(_view("f9"), _ctx([0.0], vanished=[core])) == []
    assert FeatureTrackRule(FeatureTrackSettings(flag_cores=False)).livequant_frame_rules(
        _view(), _ctx([0.0], vanished=[core])) == []
