"""Undoing the in-frame distortion of a steady specimen drift, against the simulator's truth."""

import numpy as np
import pytest

from livequant.analysis.scan_drift import correct_scan_drift, line_time_s
from livequant.config import load_settings
from livequant.frames import Frame, FrameMeta
from livequant.pipeline import analyze_frame


def test_line_time_and_bad_timing():
    assert line_time_s(cols=512, dwell_time_us=4.0) == pytest.approx(512 * 4e-6)
    assert line_time_s(cols=512, dwell_time_us=4.0, flyback_s=1e-3) == pytest.approx(3.048e-3)
    with pytest.raises(ValueError, match="dwell_time_us"):
        line_time_s(cols=512, dwell_time_us=0.0)


def test_zero_drift_and_the_frame_centre_are_left_alone():
    pos = np.array([[10.0, 20.0], [255.5, 255.5], [500.0, 3.0]])
    kw = dict(pixel_size_pm=16.0, scan_rotation_deg=25.0, shape=(512, 512), dwell_time_us=4.0)
    np.testing.assert_array_equal(correct_scan_drift(pos, velocity_nm_per_s=(0, 0), **kw), pos)
    out = correct_scan_drift(pos, velocity_nm_per_s=(0.1, -0.2), **kw)
    np.testing.assert_allclose(out[1], pos[1])          # sampled at the middle time
    # a row half a frame after the middle moves back by v . e_slow * (time) / pixel
    th = np.radians(25.0)
    t = (500.0 - 255.5) * 512 * 4e-6 + (3.0 - 255.5) * 4e-6
    vs = 0.1 * -np.sin(th) + -0.2 * np.cos(th)
    assert out[2, 0] == pytest.approx(500.0 - vs * t / 0.016)


@pytest.mark.parametrize("rotation_deg", [0.0, 30.0])
def test_a_drifting_frame_reads_its_true_lattice_once_corrected(rotation_deg):
    """The simulator scans SrTiO3 (a = 390.53 pm, CHECK-VALUES section 1) while the specimen
    drifts at (0.06, 0.09) nm/s: over a 1 s frame 8 nm high that stretches and shears the
    lattice by about 1 % (395 pm, 89.6 deg uncorrected).  Given the same velocity the
    correction restores the cell to 0.1 pm-level and 90 deg."""
    from sim_instrument.quick import perovskite_frame

    v = (0.06, 0.09)
    acq = perovskite_frame("SrTiO3", (512, 512), pixel_size_pm=16.0, dwell_time_us=4.0,
                           drift_nm_per_s=v, rotation_deg=rotation_deg, seed=3)
    frame = Frame(pixels=acq.pixels, meta=FrameMeta(frame_id="d", pixel_size_pm=16.0,
                                                    dwell_time_us=4.0,
                                                    scan_rotation_deg=rotation_deg))
    raw = analyze_frame(frame, load_settings()).lattice_summary()
    fixed_result = analyze_frame(frame, load_settings(), scan_drift_nm_per_s=v)
    fixed = fixed_result.lattice_summary()
    assert max(abs(raw["a_pm"] - 390.53), abs(raw["b_pm"] - 390.53)) > 2.5   # distorted
    for key in ("a_pm", "b_pm"):
        assert fixed[key] == pytest.approx(390.53, abs=0.3)
    assert fixed["angle_deg"] == pytest.approx(90.0, abs=0.05)
    info = fixed_result.summary()["scan_drift_correction"]
    assert info["applied"] is True and info["velocity_nm_per_s"] == [0.06, 0.09]


def test_correction_needs_a_dwell_time_and_can_be_switched_off():
    from livequant.synthetic import perovskite_frame

    f = perovskite_frame((256, 256), pixel_size_pm=10.0, seed=1)
    no_dwell = Frame(pixels=f.pixels, meta=FrameMeta(frame_id="n", pixel_size_pm=10.0))
    info = analyze_frame(no_dwell, scan_drift_nm_per_s=(0.1, 0.0)).summary()[
        "scan_drift_correction"]
    assert info["applied"] is False and "dwell" in info["reason"]
    off = load_settings(overrides={"analysis.scan_drift.enabled": False})
    timed = Frame(pixels=f.pixels, meta=FrameMeta(frame_id="t", pixel_size_pm=10.0,
                                                  dwell_time_us=2.0))
    info = analyze_frame(timed, off, scan_drift_nm_per_s=(0.1, 0.0)).summary()[
        "scan_drift_correction"]
    assert info["applied"] is False and "enabled" in info["reason"]
    assert "scan_drift_correction" not in analyze_frame(timed).summary()
