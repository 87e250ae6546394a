"""Winding numbers of the in-plane displacement field, vortex and antivortex cores.

Sources: CHECK-VALUES.md section 10 and suggested check 13 (plaquette winding number;
counter-clockwise and clockwise circulation both +1, saddle -1, uniform 0, total 0 on a torus);
clockwise / anticlockwise vortex pairs as mapped in PbTiO3/SrTiO3 superlattices (Yadav et al.,
Nature 530, 198 (2016)).
"""

from __future__ import annotations

import numpy as np
import pytest

from livequant.analysis.cells import compute_cells
from livequant.analysis.topology import find_cores, winding_numbers
from tests.analysis.test_cells_synthetic import lattice_for, make_columns, perovskite

PX = 10.0
A_PX = 20.0


def _grid8():
    # 8 x 8 grid, index i along x and j along y, centred so no node sits on the core.
    x, y = np.meshgrid(np.arange(8) - 3.5, np.arange(8) - 3.5, indexing="ij")
    return x, y


@pytest.mark.parametrize("name, field, expected", [
    ("counter-clockwise vortex", lambda x, y: (-y, x), 1),
    ("clockwise vortex", lambda x, y: (y, -x), 1),
    ("source", lambda x, y: (x, y), 1),
    ("saddle (antivortex)", lambda x, y: (x, -y), -1),
    ("uniform", lambda x, y: (np.ones_like(x), 0.3 * np.ones_like(x)), 0),
])
def test_check_13_winding_of_elementary_fields(name, field, expected):
    x, y = _grid8()
    ux, uy = field(x, y)
    w = winding_numbers(ux, uy)
    assert w.shape == (7, 7)
    assert w[3, 3] == expected, name           # the plaquette around the origin
    others = np.delete(w.ravel(), 3 * 7 + 3)
    assert np.all(others == 0), name           # nothing else winds


def test_chirality_is_reported_apart_from_the_winding():
    x, y = _grid8()
    r = np.stack([x, y], -1) * 100.0
    _, ccw = find_cores(r[..., 0], r[..., 1], -y, x)
    _, cw = find_cores(r[..., 0], r[..., 1], y, -x)
    _, src = find_cores(r[..., 0], r[..., 1], x, y)
    _, sad = find_cores(r[..., 0], r[..., 1], x, -y)
    assert [c.winding for c in ccw + cw + src + sad] == [1, 1, 1, -1]
    assert (ccw[0].kind, ccw[0].chirality) == ("vortex", 1)
    assert (cw[0].kind, cw[0].chirality) == ("vortex", -1)
    assert (src[0].kind, src[0].chirality) == ("source", 0)
    assert sad[0].kind == "antivortex"
    assert (ccw[0].x_pm, ccw[0].y_pm) == (0.0, 0.0)


def test_periodic_vortex_array_sums_to_zero():
    # Check 13: a flux-closure array (stream function sin(kx) sin(ky)) on a torus: vortices of
    # both chiralities and saddles between them; the total winding is zero.
    n, period = 16, 8.0
    k = 2 * np.pi / period
    x, y = np.meshgrid(np.arange(n) + 0.5, np.arange(n) + 0.5, indexing="ij")
    ux = np.sin(k * x) * np.cos(k * y)
    uy = -np.cos(k * x) * np.sin(k * y)
    w = winding_numbers(ux, uy, periodic=True)
    assert w.shape == (n, n)
    assert np.sum(w == 1) >= 8 and np.sum(w == -1) >= 8
    assert np.nansum(w) == 0


def test_invalid_corners_and_input_errors():
    x, y = _grid8()
    valid = np.ones((8, 8), bool)
    valid[3, 3] = False
    w = winding_numbers(-y, x, valid=valid)
    assert np.isnan(w[3, 3]) and np.isnan(w[2, 2]) and w[5, 5] == 0
    with pytest.raises(ValueError, match="2D arrays"):
        winding_numbers(np.zeros(4), np.zeros(4))
    with pytest.raises(ValueError, match="handedness"):
        winding_numbers(x, y, handedness=2)


def _vortex_columns(cores, *, u0_pm=20.0, sigma_px=0.0, rng=None, ni=16, nj=12):
    """B-site shifts with direction theta = sum_k w_k atan2(r - c_k) + gamma, magnitude u0."""

    def shift(r):  # r: ideal B (row, col) pixels
        theta = np.zeros(len(r))
        for (cx, cy), wk, gamma in cores:
            theta += wk * np.arctan2(r[:, 0] - cy, r[:, 1] - cx) + gamma
        return u0_pm / PX * np.column_stack([np.sin(theta), np.cos(theta)])

    sites = perovskite(ni, nj, a_xy_px=(A_PX, 0), b_xy_px=(0, A_PX), b_shift=shift)
    return make_columns(sites, sigma_px=sigma_px, rng=rng)


def test_clockwise_anticlockwise_vortex_pair_is_located():
    # theta = phi1 + phi2 - pi/2: a counter-clockwise core at c1 and a clockwise one at c2 (both
    # winding +1, as in a flux-closure pair).  Cores are placed on A sites (cell corners),
    # which are the plaquette centres of the B-site grid; found within one cell of the truth.
    c1, c2 = (15 + 5 * A_PX, 15 + 6 * A_PX), (15 + 11 * A_PX, 15 + 6 * A_PX)  # (x, y) px
    cols = _vortex_columns([(c1, 1, 0.0), (c2, 1, -np.pi / 2)], sigma_px=0.05,
                           rng=np.random.default_rng(13))
    cells = compute_cells(cols, lattice_for(), pixel_size_pm=PX)
    topo = cells.summary()["topology"]
    cores = topo["cores"]
    assert len(cores) == 2, cores
    found = sorted(cores, key=lambda c: c["x_pm"])
    for core, (cx, cy) in zip(found, (c1, c2)):
        assert np.hypot(core["x_pm"] - cx * PX, core["y_pm"] - cy * PX) < A_PX * PX
        assert core["winding"] == 1 and core["kind"] == "vortex"
    assert found[0]["chirality"] == -found[1]["chirality"] != 0
    assert topo["total_winding"] == 2


def test_vortex_antivortex_pair():
    # theta = phi1 - phi2: +1 at c1, -1 (saddle) at c2.
    c1, c2 = (15 + 4 * A_PX, 15 + 5 * A_PX), (15 + 10 * A_PX, 15 + 7 * A_PX)
    cols = _vortex_columns([(c1, 1, np.pi / 2), (c2, -1, 0.0)], sigma_px=0.05,
                           rng=np.random.default_rng(21))
    cores = compute_cells(cols, lattice_for(), pixel_size_pm=PX).summary()["topology"]["cores"]
    by_w = {c["winding"]: c for c in cores}
    assert sorted(by_w) == [-1, 1] and len(cores) == 2
    assert by_w[-1]["kind"] == "antivortex"
    assert np.hypot(by_w[1]["x_pm"] - c1[0] * PX, by_w[1]["y_pm"] - c1[1] * PX) < A_PX * PX
    assert np.hypot(by_w[-1]["x_pm"] - c2[0] * PX, by_w[-1]["y_pm"] - c2[1] * PX) < A_PX * PX


def test_noise_below_threshold_makes_no_cores():
    # A paraelectric frame (no displacement) must not produce spurious windings from noise.
    cols = _vortex_columns([((0.0, 0.0), 0, 0.0)], u0_pm=0.0, sigma_px=0.1,
                           rng=np.random.default_rng(2))
    topo = compute_cells(cols, lattice_for(), pixel_size_pm=PX).summary()["topology"]
    assert topo["cores"] == [] and topo["n_plaquettes"] < 10


def test_vortex_texture_is_not_reported_as_a_wall():
    # The displacement reverses across a vortex pair too, but no single tanh wall fits it.
    c1, c2 = (15 + 5 * A_PX, 15 + 6 * A_PX), (15 + 11 * A_PX, 15 + 6 * A_PX)
    cols = _vortex_columns([(c1, 1, 0.0), (c2, 1, -np.pi / 2)], sigma_px=0.05,
                           rng=np.random.default_rng(4))
    summary = compute_cells(cols, lattice_for(), pixel_size_pm=PX).summary()
    assert summary["wall"] is None
    assert "chi-square" in summary["wall_candidate"]["rejected"]
