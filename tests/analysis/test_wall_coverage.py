"""Coverage of the wall fit's error bars and the plateau asymmetry.

Truth: synthetic column sets with a known tanh wall (CHECK-VALUES section 7 profile) and
Gaussian column noise of a known sigma.  An honest 2-sigma interval holds the truth in
95.4 % of realisations; the issue asks for >= 90 % of 200 (binomial sd of the fraction at
0.954: 1.5 %, so 90 % is 3.6 sd below the nominal value).
"""

from __future__ import annotations

import numpy as np
import pytest

from livequant.analysis.cells import compute_cells
from tests.analysis.test_cells_synthetic import lattice_for, make_columns, perovskite

PX = 10.0
A_PX = 20.0


def _frame(d0_pm, w_px, x0_px, *, offset_pm=0.0, sigma_px, rng):
    def shift(r):
        dy = (offset_pm + d0_pm * np.tanh((r[:, 1] - x0_px) / w_px)) / PX
        return np.column_stack([dy, np.zeros(len(r))])

    sites = perovskite(18, 6, a_xy_px=(A_PX, 0), b_xy_px=(0, A_PX), b_shift=shift)
    return make_columns(sites, sigma_px=sigma_px, rng=rng)


@pytest.mark.parametrize("w_cells,sigma_px,seed", [(1.5, 0.1, 150), (1.0, 0.2, 100),
                                                    (0.7, 0.1, 70)])
def test_width_and_p0_inside_2_sigma_in_90_percent(w_cells, sigma_px, seed):
    rng = np.random.default_rng(seed)
    w_true, p0_true = w_cells * A_PX * PX, 20.0
    inside_w = inside_p = n = 0
    for _ in range(200):
        wall = compute_cells(_frame(p0_true, w_cells * A_PX, 190.0, sigma_px=sigma_px, rng=rng),
                             lattice_for(), pixel_size_pm=PX).summary()["wall"]
        assert wall is not None
        n += 1
        inside_w += abs(wall["width"] - w_true) <= 2 * wall["sigma_width"]
        inside_p += abs(wall["p0"] - p0_true) <= 2 * wall["sigma_p0"]
    assert inside_w / n >= 0.90, inside_w / n
    assert inside_p / n >= 0.90, inside_p / n


def test_plateau_asymmetry_is_measured_with_honest_sigma():
    # Plateaus +22 and -18 pm (offset 2 pm): |P+| - |P-| = 4 pm.  Without offset: 0.
    rng = np.random.default_rng(44)
    for offset, truth in ((2.0, 4.0), (0.0, 0.0)):
        pulls = []
        for _ in range(60):
            wall = compute_cells(_frame(20.0, 1.5 * A_PX, 190.0, offset_pm=offset,
                                        sigma_px=0.1, rng=rng),
                                 lattice_for(), pixel_size_pm=PX).summary()["wall"]
            pulls.append((wall["asymmetry"] - truth) / wall["sigma_asymmetry"])
        pulls = np.array(pulls)
        assert abs(np.mean(pulls)) < 0.5, (offset, np.mean(pulls))
        assert 0.75 < np.std(pulls) < 1.3, (offset, np.std(pulls))


def test_asymmetry_vector_follows_the_larger_plateau():
    # Plateaus +23 / -17 pm along y, and the mirrored specimen (-23 / +17).  The asymmetry is
    # |P+| - |P-| along the reported polar axis, so asymmetry * axis points along the larger
    # plateau's polarization (the direction a built-in field would favour): +6 y, then -6 y.
    for sign in (1.0, -1.0):
        wall = compute_cells(_frame(sign * 20.0, 1.5 * A_PX, 190.0, offset_pm=sign * 3.0,
                                    sigma_px=0.02, rng=np.random.default_rng(5)),
                             lattice_for(), pixel_size_pm=PX).summary()["wall"]
        axis = np.array([np.cos(np.radians(wall["axis_deg"])),
                         np.sin(np.radians(wall["axis_deg"]))])
        assert wall["asymmetry"] * axis == pytest.approx([0.0, sign * 6.0], abs=0.3)
        # The offset model is the reported one here (a symmetric fit has chi2 >> 1).
        assert wall["p0"] == pytest.approx(20.0, abs=0.3)
        assert wall["reduced_chi2"] < 2.0
