"""The per-frame physics block: wall line per cell row, G-L numbers, roughness.

Truth: synthetic column sets (tests/analysis/test_cells_synthetic.py) with a tanh wall whose
centre in each lattice row follows a known line u(row); Landau numbers against
livequant.analysis.landau directly (its own tests hold the published checks).
"""

from __future__ import annotations

import numpy as np
import pytest

from livequant.analysis.cells import compute_cells
from livequant.analysis.landau import LandauPotential, wall_gl_parameters
from livequant.analysis.wallphysics import wall_physics
from tests.analysis.test_cells_synthetic import lattice_for, make_columns, perovskite

PX = 10.0
A_PX = 20.0


def _arrays(cells):
    v = cells.values
    return {"x_pm": cells.x_pm, "y_pm": cells.y_pm, "i": cells.i, "j": cells.j,
            **{k: v[k] for k in ("dx_pm", "dy_pm", "sigma_dx_pm", "sigma_dy_pm")}}


def _rough_wall(u_px_of_row, *, ni=18, nj=40, sigma_px=0.05, seed=0):
    # Basis a along x (index i, 18 cells), b along y (index j, 40 cells): the wall's normal is
    # along x and each lattice row j crosses it.  In row j the wall sits at 190 + u[j] px.
    def shift(r):
        j = np.clip(np.round((r[:, 0] - 15.0) / A_PX - 0.5).astype(int), 0, nj - 1)
        dy = 20.0 / PX * np.tanh((r[:, 1] - 190.0 - u_px_of_row[j]) / (1.5 * A_PX))
        return np.column_stack([dy, np.zeros(len(r))])

    sites = perovskite(ni, nj, a_xy_px=(A_PX, 0), b_xy_px=(0, A_PX), b_shift=shift)
    return make_columns(sites, sigma_px=sigma_px, rng=np.random.default_rng(seed)), lattice_for()


def test_wall_line_follows_the_rows_and_gl_matches_landau():
    rng = np.random.default_rng(3)
    u_px = np.cumsum(rng.normal(0, 1.0, 40))
    u_px -= u_px.mean()
    cols, lat = _rough_wall(u_px)
    cells = compute_cells(cols, lat, pixel_size_pm=PX)
    wall = cells.summary()["wall"]
    assert wall is not None
    pot = LandauPotential(-2.0e8, 1.0e9)
    out = wall_physics(_arrays(cells), wall, potential=pot, material_note="test", n_boot=50)
    ref = wall_gl_parameters(wall["width"] * 1e-12, wall["sigma_width"] * 1e-12, pot)
    assert out["gl"]["g_m3_per_F"] == pytest.approx(ref.g_m3_per_F)
    assert out["gl"]["energy_J_per_m2"] == pytest.approx(ref.energy_J_per_m2)
    line = out["line"]
    u = np.array([np.nan if v is None else v for v in line["u_pm"]])
    su = np.array([np.nan if v is None else v for v in line["sigma_u_pm"]])
    ok = np.isfinite(u)
    assert ok.sum() >= 36
    # u is measured from the fitted wall line, so compare after removing the mean and tilt.
    rows = np.array(line["rows"])
    truth = u_px[rows] * PX
    resid = u[ok] - truth[ok]
    resid -= np.polyval(np.polyfit(rows[ok], resid, 1), rows[ok])
    assert np.std(resid / su[ok]) < 2.0
    assert line["row_spacing_pm"] == pytest.approx(A_PX * PX, rel=0.01)
    # The line is a random walk (zeta = 1/2): one 40-row line gives a wide interval that
    # must hold it (parametric bootstrap; fixed seed).
    r = out["roughness"]
    assert r is not None and r["ci_low"] < 0.5 < r["ci_high"], r


def test_straight_wall_has_no_roughness_and_no_wall_has_a_reason():
    from tests.analysis.test_cells_walls import _wall_frame
    cells = compute_cells(_wall_frame(20.0, 1.5 * A_PX, 190.0, sigma_px=0.1,
                                      rng=np.random.default_rng(1)), lattice_for(),
                          pixel_size_pm=PX)
    out = wall_physics(_arrays(cells), cells.summary()["wall"], potential=None, min_rows=4,
                       n_boot=20)
    assert out["gl"] is None and "Landau" in out["gl_reason"]
    assert out["roughness"] is None
    assert "noise" in out["roughness_reason"] or "rows" in out["roughness_reason"]
    assert wall_physics(_arrays(cells), None, potential=None)["wall"] is None
