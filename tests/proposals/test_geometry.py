"""Pixel <-> stage transforms against the simulated instrument's truth; region overlaps."""

import math

import numpy as np
import pytest

from livequant.proposals.geometry import (FrameGeometry, bounding_region, overlap_area,
                                          overlap_fraction, stage_region)
from livequant.rules.types import Region
from sim_instrument import ScanEngine, Specimen
from sim_instrument.engine import DriftModel as SimDrift


@pytest.fixture(scope="module")
def specimen():
    return Specimen.from_scenario("demo")


@pytest.mark.parametrize("rotation_deg", [0.0, 25.0, -90.0])
def test_pixel_to_stage_matches_simulator_truth(specimen, rotation_deg):
    """Without drift the stage position of a column's pixel is its specimen position."""
    eng = ScanEngine(specimen, seed=4, drift=SimDrift.none())
    acq = eng.acquire((12.0, -3.0), 8.0, (160, 200), scan_rotation_deg=rotation_deg)
    g = FrameGeometry(12.0, -3.0, acq.sidecar["pixel_size_pm"] / 1000, rotation_deg, (160, 200))
    rc = acq.truth.positions_px
    # Columns in the first and last line are extrapolated by the truth (jitter): skip them.
    inner = (rc[:, 0] > 1) & (rc[:, 0] < 158)
    xy = g.px_to_stage(rc[inner, 1], rc[inner, 0])
    # Truth: sim_instrument's column positions; tolerance 10 pm covers the 2 pm rms line jitter.
    assert np.abs(xy - acq.truth.xy_nm[inner]).max() < 0.010
    back = g.stage_to_px(acq.truth.xy_nm[inner])
    assert np.abs(back[:, ::-1] - rc[inner]).max() < 0.010 / g.pixel_size_nm


def test_pixel_to_stage_with_drift_is_specimen_plus_drift(specimen):
    """The probe samples the specimen at q - d(t): stage = specimen + drift of that line."""
    eng = ScanEngine(specimen, seed=5, drift=SimDrift((0.5, -0.3), 0.0))
    eng.wait(30.0)
    acq = eng.acquire((0.0, 10.0), 8.0, (128, 128), scan_rotation_deg=10.0)
    g = FrameGeometry(0.0, 10.0, acq.sidecar["pixel_size_pm"] / 1000, 10.0, (128, 128))
    inner = (acq.truth.positions_px[:, 0] > 1) & (acq.truth.positions_px[:, 0] < 126)
    rc = acq.truth.positions_px[inner]
    line_drift = np.asarray(acq.truth.drift_per_line_nm)[np.clip(np.round(rc[:, 0]).astype(int),
                                                                   0, 127)]
    xy = g.px_to_stage(rc[:, 1], rc[:, 0])
    # Within a line the drift moves on by v t_px per pixel (< 0.2 pm here); 10 pm tolerance.
    assert np.abs(xy - line_drift - acq.truth.xy_nm[inner]).max() < 0.010
    assert np.abs(line_drift.mean(axis=0)).min() > 5  # the drift is really there


def test_region_to_stage_rotation_and_size():
    g = FrameGeometry(100.0, 50.0, 0.02, 30.0, (200, 400))
    r = g.region_to_stage(Region(x_px=199.5, y_px=99.5, width_px=100, height_px=50,
                                 angle_deg=15.0))
    assert r["center_x_nm"] == pytest.approx(100.0) and r["center_y_nm"] == pytest.approx(50.0)
    assert (r["width_nm"], r["height_nm"]) == pytest.approx((2.0, 1.0))
    assert r["rotation_deg"] == pytest.approx(45.0)
    # The region's width axis points along the rotated fast-scan axis on the stage.
    end = g.px_to_stage(199.5 + 50 * math.cos(math.radians(15)), 99.5 + 50 * math.sin(
        math.radians(15)))
    assert math.degrees(math.atan2(end[1] - 50.0, end[0] - 100.0)) == pytest.approx(45.0)


def test_overlaps_of_rotated_rectangles_analytic():
    a = stage_region(0, 0, 2, 2)
    assert overlap_area(a, stage_region(1, 0, 2, 2)) == pytest.approx(2.0)
    assert overlap_area(a, stage_region(5, 0, 2, 2)) == 0.0
    # A square and the same square turned 45 degrees: an octagon of area 8 (sqrt 2 - 1).
    assert overlap_area(a, stage_region(0, 0, 2, 2, 45)) == pytest.approx(8 * (2 ** 0.5 - 1))
    assert overlap_fraction(stage_region(0, 0, 1, 1), a) == pytest.approx(1.0)
    box = bounding_region([stage_region(0, 0, 2, 2), stage_region(3, 1, 2, 2)], 0.0)
    assert (box["center_x_nm"], box["center_y_nm"], box["width_nm"], box["height_nm"]) == \
        pytest.approx((1.5, 0.5, 5.0, 3.0))
    with pytest.raises(ValueError, match="positive size"):
        stage_region(0, 0, 0, 1)
