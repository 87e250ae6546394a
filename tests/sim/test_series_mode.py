"""The simulator's series and orthogonal pairs: sidecars, truth, jumps."""

import json

import numpy as np

from sim_instrument.__main__ import main
from sim_instrument.engine import DriftModel
from sim_instrument.quick import perovskite_engine


def test_series_mode_writes_members_with_one_series_id(tmp_path):
    out = tmp_path / "frames"
    assert main(["series", "--out", str(out), "--frames", "3", "--dwell-us", "1", "--shape",
                 "64", "--fov-nm", "1", "--jitter-pm", "2", "--series-id", "s1"]) == 0
    sides = [json.loads((out / f"sim_0000{k}.json").read_text()) for k in (1, 2, 3)]
    assert {s["series_id"] for s in sides} == {"s1"}
    assert [s["series_index"] for s in sides] == [0, 1, 2]
    assert all(s["dwell_time_us"] == 1.0 for s in sides)
    assert sorted(p.name for p in (tmp_path / "frames-truth").glob("*.npz")) == [
        "sim_00001.npz", "sim_00002.npz", "sim_00003.npz"]
    assert main(["series", "--out", str(tmp_path / "pair"), "--pair", "--shape", "64",
                 "--fov-nm", "1", "--rotation-deg", "10"]) == 0
    a, b = (json.loads((tmp_path / "pair" / f"sim_0000{k}.json").read_text()) for k in (1, 2))
    assert a["series_id"] == b["series_id"]
    assert (a["scan_rotation_deg"], b["scan_rotation_deg"]) == (10.0, 100.0)


def test_frames_follow_one_drift_and_a_jump_moves_the_specimen():
    """Consecutive members are one frame time apart on one drift track; a jump
    before frame 2 adds its displacement to that frame and the ones after."""
    eng = perovskite_engine(dwell_time_us=1.0, drift_nm_per_s=(0.02, 0.0), seed=1)
    acqs = eng.acquire_series(4, (0.0, 0.0), 0.64, (64, 64), jump_before={2: (0.1, 0.0)})
    t = [a.truth.meta["t_start_s"] for a in acqs]
    assert np.allclose(np.diff(t), 64 * 64 * 1e-6)
    start = np.array([a.truth.meta["drift"]["offset_start_nm"] for a in acqs])
    step = 0.02 * 64 * 64 * 1e-6
    assert np.allclose(np.diff(start[:, 0]), [step, step + 0.1, step], atol=1e-9)
    assert acqs[2].truth.meta["jump_nm"] == [0.1, 0.0]


def test_a_jump_scheduled_inside_a_frame_moves_only_the_later_lines():
    d = DriftModel((0.0, 0.0), 0.0)
    d.jump((0.5, 0.0), at_s=1.0)
    off = d.offsets_nm([0.5, 0.99, 1.0, 1.5])
    assert np.allclose(off[:, 0], [0.0, 0.0, 0.5, 0.5])
