"""Walls and cores followed across frames (livequant.proposals.tracks).

Truth: synthetic observations with known velocity and noise; the weighted least-squares
velocity and its sigma are the textbook straight-line fit (common practice), checked here by
coverage over 300 realisations.
"""

from __future__ import annotations

import numpy as np
import pytest

from livequant.proposals.tracks import (FeatureTracker, WallObservation, inside_region,
                                        merge_cores)

REGION = {"center_x_nm": 0.0, "center_y_nm": 0.0, "width_nm": 20.0, "height_nm": 20.0,
          "rotation_deg": 0.0}


def _wall(fid, t, x, sigma=0.05, normal=(1.0, 0.0)):
    return WallObservation(fid, t, (x, 3.0), normal, sigma)


def test_wall_velocity_within_2_sigma_in_90_percent():
    # A wall at 0.02 nm/s seen in 8 frames 10 s apart with 0.05 nm position noise.
    rng = np.random.default_rng(21)
    hits = 0
    for _ in range(300):
        tr = FeatureTracker()
        for k in range(8):
            t = 10.0 * k
            tr.observe(f"f{k}", t, REGION, walls=[_wall(f"f{k}", t, 1.0 + 0.02 * t
                                                       + rng.normal(0, 0.05))])
        assert len(tr.walls) == 1
        v = tr.walls[0].velocity()
        hits += abs(v["velocity_nm_per_s"] - 0.02) <= 2 * v["sigma_velocity_nm_per_s"]
    assert hits / 300 >= 0.90
    # Analytic sigma of the slope: sigma / sqrt(sum (t - mean t)^2).
    t = 10.0 * np.arange(8)
    assert v["sigma_velocity_nm_per_s"] == pytest.approx(
        0.05 / np.sqrt(np.sum((t - t.mean()) ** 2)), rel=0.6)


def test_normal_reported_the_other_way_is_the_same_wall():
    tr = FeatureTracker()
    tr.observe("a", 0.0, REGION, walls=[_wall("a", 0.0, 1.0)])
    tr.observe("b", 5.0, REGION, walls=[_wall("b", 5.0, 1.1, normal=(-1.0, 0.0))])
    assert len(tr.walls) == 1
    assert tr.walls[0].velocity()["velocity_nm_per_s"] == pytest.approx(0.02)


def test_two_walls_make_two_tracks():
    tr = FeatureTracker(match_distance_nm=2.0)
    for k in range(3):
        tr.observe(f"f{k}", k, REGION, walls=[_wall(f"f{k}", k, -5.0), _wall(f"f{k}", k, 5.0)])
    assert len(tr.walls) == 2
    assert all(len(w.observations) == 3 for w in tr.walls)


def test_core_pair_that_annihilates_is_reported_vanished():
    tr = FeatureTracker(vanish_frames=2)
    pair_xy = [[-1.0, 0.0], [1.0, 0.0]]
    for k in range(3):
        out = tr.observe(f"f{k}", k, REGION, cores_xy_nm=pair_xy, cores_winding=[1, -1])
        assert out["vanished"] == [] and out["appeared"] == []
    out = tr.observe("f3", 3, REGION)   # gone: missed once
    assert out["vanished"] == []
    out = tr.observe("f4", 4, REGION)   # missed twice: vanished
    assert len(out["vanished"]) == 2
    assert {tr.core(i).winding for i in out["vanished"]} == {1, -1}
    assert all(tr.core(i).vanished_in == "f4" for i in out["vanished"])


def test_core_outside_the_frame_is_not_missing_and_new_ground_is_not_appearance():
    tr = FeatureTracker(vanish_frames=1)
    tr.observe("f0", 0, REGION, cores_xy_nm=[[5.0, 5.0]], cores_winding=[1])
    elsewhere = {**REGION, "center_x_nm": 100.0}
    out = tr.observe("f1", 1, elsewhere, cores_xy_nm=[[100.0, 0.0]], cores_winding=[1])
    assert out == {"walls": [], "appeared": [], "vanished": []}  # new ground, old core unseen
    out = tr.observe("f2", 2, REGION, cores_xy_nm=[[5.0, 5.0], [-4.0, -4.0]],
                     cores_winding=[1, -1])
    assert len(out["appeared"]) == 1 and tr.core(out["appeared"][0]).winding == -1


def test_merge_cores_joins_neighbouring_plaquettes_of_one_sign():
    xy, w = merge_cores([[0, 0], [0.4, 0], [0.8, 0.1], [0.2, 0.1], [5, 5]], [1, 1, 1, -1, 1],
                        radius_nm=0.5)
    assert len(xy) == 3
    assert sorted(w.tolist()) == [-1, 1, 1]
    assert np.any(np.all(np.isclose(xy, [0.4, 0.0 + 0.1 / 3]), axis=1))


def test_inside_region_rotated():
    r = {**REGION, "width_nm": 10.0, "height_nm": 2.0, "rotation_deg": 90.0}
    assert inside_region([0.0, 4.0], r)[0] and not inside_region([4.0, 0.0], r)[0]
    assert not inside_region([0.0, 4.5], r, margin_nm=1.0)[0]


def test_session_means_of_a_track_with_chi2():
    # Widths 0.50 +- 0.01 nm in five frames, then one at 0.60: the weighted mean of the first
    # five is consistent, adding the sixth is not (chi-square test, combine.weighted_mean).
    from dataclasses import replace
    tr = FeatureTracker()
    for k, w in enumerate([0.50, 0.51, 0.49, 0.50, 0.505]):
        tr.observe(f"f{k}", k, REGION, walls=[replace(_wall(f"f{k}", k, 1.0), width_nm=w,
                                                      sigma_width_nm=0.01)])
    m = tr.walls[0].session_means()["width_nm"]
    assert m["n"] == 5 and m["consistent"] and m["mean"] == pytest.approx(0.501, abs=0.002)
    tr.observe("f5", 5, REGION, walls=[replace(_wall("f5", 5, 1.0), width_nm=0.60,
                                               sigma_width_nm=0.01)])
    m = tr.walls[0].to_json()["means"]["width_nm"]
    assert m["n"] == 6 and not m["consistent"] and m["sigma_scaled"] > 2 * m["sigma"]
