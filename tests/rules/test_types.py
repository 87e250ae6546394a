"""The decision loop's data types: validation, JSON and the frame view."""

import pickle

import numpy as np
import pytest

from livequant.analysis.cells import VALUE_FIELDS
from livequant.frames import Frame, FrameMeta
from livequant.pipeline import analyze_frame
from livequant.rules.types import Flag, FrameView, Region, bin_image
from livequant.synthetic import perovskite_frame


def test_region_validates_and_round_trips():
    r = Region(10, 20, 30, 40, angle_deg=15)
    assert Region.from_json(r.to_json()) == r
    with pytest.raises(ValueError, match="positive size"):
        Region(0, 0, 0, 5)
    with pytest.raises(ValueError, match="finite"):
        Region(float("nan"), 0, 1, 1)


def test_region_around_points():
    r = Region.around([10, 30], [5, 15], margin_px=2)
    assert (r.x_px, r.y_px, r.width_px, r.height_px) == (20, 10, 24, 14)


def test_flag_validates_score_and_serialises_numpy_evidence():
    with pytest.raises(ValueError, match="score"):
        Flag("domain-wall", 1.5, Region(0, 0, 1, 1), "x")
    f = Flag("vortex", 0.7, Region(1, 2, 3, 4), "core", {"w": np.int64(1), "s": np.float64(np.nan)})
    j = f.to_json()
    assert j["evidence"] == {"w": 1, "s": None} and j["region_px"]["x_px"] == 1.0


def test_bin_image_block_means():
    img = np.arange(16, dtype=float).reshape(4, 4)
    out, f = bin_image(img, max_side_px=2)
    assert f == 2 and out.shape == (2, 2)
    assert out[0, 0] == pytest.approx(np.mean([0, 1, 4, 5]))


def test_frame_view_from_a_real_result_is_small_and_picklable():
    syn = perovskite_frame((256, 256), pixel_size_pm=10.0, seed=3)
    frame = Frame(pixels=syn.pixels, meta=FrameMeta(frame_id="f1", pixel_size_pm=10.0))
    result = analyze_frame(frame)
    view = FrameView.from_result(result, image=syn.pixels, thumbnail_max_side_px=128)
    assert view.ok and view.frame_id == "f1"
    assert view.thumbnail.shape == (128, 128) and view.thumbnail_bin == 2
    n = len(view.cells["i"])
    assert n == result.summary()["cells"]["n_cells"]
    assert set(VALUE_FIELDS) <= set(view.cells)
    np.testing.assert_allclose(view.cells["x_px"] * 10.0, view.cells["x_pm"])
    assert len(view.columns["x_px"]) == len(result.columns)
    back = pickle.loads(pickle.dumps(view))
    np.testing.assert_array_equal(back.cells["dx_pm"], view.cells["dx_pm"])
