"""Simulated frames through livequant's own analysis: recovered columns match the truth.

This checks the two halves against each other: the simulator's truth is
independent of the analysis code, so agreement within the reported
uncertainties says both the frame formation and the fits are right.
"""

import numpy as np
import pytest
from scipy.spatial import cKDTree

from livequant.config import load_materials, load_settings
from livequant.frames import Sidecar, frame_from_array, resolve_meta
from livequant.pipeline import analyze_frame
from sim_instrument import perovskite_frame


def _analyze(acq):
    meta = resolve_meta(Sidecar.parse(acq.sidecar, where="sim"), default_id="sim", where="sim")
    return analyze_frame(frame_from_array(acq.pixels, meta), load_settings())


def test_pbtio3_frame_positions_and_lattice_recovered():
    mat = load_materials()["PbTiO3"]
    acq = perovskite_frame("PbTiO3", (384, 384), pixel_size_pm=10.0, rotation_deg=12.0,
                           b_displacement_pm=(0.0, -17.0), seed=2)
    res = _analyze(acq)
    assert res.ok, res.message
    lat = res.lattice_summary()
    # config/materials.toml (CHECK-VALUES section 1): a = 389.87 pm, c = 413.80 pm.
    assert sorted([lat["a_pm"], lat["b_pm"]]) == pytest.approx([mat.a_pm, mat.c_pm], abs=0.5)
    cols, tr = res.columns, acq.truth
    dist, k = cKDTree(tr.positions_px).query(cols.positions_px)
    ok = (dist < 1.0) & cols.converged
    assert ok.sum() > 0.9 * len(cols)
    a_site = ok & (tr.sublattice[k] == "A")
    err_px = cols.positions_px[a_site] - tr.positions_px[k[a_site]]
    sigma_px = cols.sigma_positions_px[a_site]
    # Unbiased (DESIGN.md target: bias < 0.5 pm) and scattered as the fits' own sigmas say.
    assert np.all(np.abs(err_px.mean(axis=0)) * 10.0 < 0.5)
    z = err_px / sigma_px
    assert 0.7 < z.std() < 1.4
    assert np.all(cols.sublattice[a_site] == "A")
