"""The virtual specimen: lattice, interfaces, walls, vortices, defects, vacancies."""

import math

import numpy as np
import pytest

from livequant.config import load_materials
from sim_instrument.specimen import Specimen

MATERIALS = load_materials()
A_STO = MATERIALS["SrTiO3"].a_pm
A_PTO, C_PTO = MATERIALS["PbTiO3"].a_pm, MATERIALS["PbTiO3"].c_pm


def _film(**extra):
    """A single PbTiO3 layer, polar axis +y, B shift 17 pm (reference = PbTiO3)."""
    raw = {"name": "t", "size_nm": [200.0, 200.0], "reference_material": "PbTiO3",
           "layers": [{"material": "PbTiO3", "polar": {"b_displacement_pm": 17.0,
                                                        "direction_deg": 90.0}}]}
    raw.update(extra)
    return Specimen.from_scenario(raw)


def _by_ij(cols, site):
    sel = cols.sublattice == site
    return {tuple(ij): xy for ij, xy in zip(cols.ij[sel], cols.xy_nm[sel])}


def _spacings(cols, axis):
    """A-A distances between cells neighbouring along `axis` (0: i, 1: j), pm."""
    pos = _by_ij(cols, "A")
    step = (1, 0) if axis == 0 else (0, 1)
    out = [np.hypot(*(pos[(i + step[0], j + step[1])] - p)) * 1000 for (i, j), p in pos.items()
           if (i + step[0], j + step[1]) in pos]
    return np.array(out)


def test_all_four_sublattices_once_per_cell():
    spec = Specimen.from_scenario("demo")
    cols = spec.columns_in((-3.0, 3.0, -100.0, -94.0))
    counts = {s: int((cols.sublattice == s).sum()) for s in ("A", "B", "Oa", "Ob")}
    # One of each per cell in the [001] projection (common practice: ABO3 along [001] shows
    # A, B-O and two O columns per cell); edges can differ by one row/column of cells.
    n = counts["A"]
    assert n > 150
    assert all(abs(c - n) <= 2 * math.sqrt(n) + 16 for c in counts.values()), counts
    assert set(np.unique(cols.z[cols.sublattice == "A"])) == {MATERIALS["SrTiO3"].z_a}
    assert set(np.unique(cols.z_partner[cols.sublattice == "B"])) == {8}


def test_interface_steps_from_substrate_to_film_parameter():
    spec = Specimen.from_scenario("demo")
    # Far below the SrTiO3/SrRuO3 interface (-60 nm) and far above the film one (-56 nm).
    sub = spec.columns_in((-4.0, 4.0, -75.0, -68.0))
    film = spec.columns_in((-4.0, 4.0, -40.0, -33.0))
    # Values: config/materials.toml (CHECK-VALUES section 1): SrTiO3 a, PbTiO3 c; coherent
    # growth keeps the in-plane parameter at the substrate's.
    np.testing.assert_allclose(np.median(_spacings(sub, 1)), A_STO, atol=0.01)
    np.testing.assert_allclose(np.median(_spacings(film, 1)), C_PTO, atol=0.05)
    np.testing.assert_allclose(np.median(_spacings(film, 0)), A_STO, atol=0.05)


def test_180_wall_has_tanh_profile():
    w = 0.7
    spec = _film(walls=[{"kind": "180", "point_nm": [0.0, 0.0], "angle_deg": 90.0,
                         "half_width_nm": w}])
    cells = spec.cells_in((-5.0, 5.0, -0.3, 0.3))
    x = cells.b_xy_nm[:, 0]
    # Positive side (left of the upward wall) reversed: P_y(x) = P0 tanh(x / w), the
    # Landau-Ginzburg 180-degree wall (CHECK-VALUES section 7).
    np.testing.assert_allclose(cells.applied_b_pm[:, 1], 17.0 * np.tanh(x / w), atol=1e-9)
    np.testing.assert_allclose(cells.applied_b_pm[:, 0], 0.0, atol=1e-9)
    # A uniform lattice: what an analysis measures (B minus A cage) is the applied shift.
    np.testing.assert_allclose(cells.displacement_b_pm, cells.applied_b_pm, atol=1e-6)


def test_90_degree_band_swaps_a_and_c():
    # Normal (-1, 1)/sqrt(2): the band (x in 0..20 at y = 0) is on the negative side of
    # the first wall and the positive side of the second; +90 there turns the B shift
    # from +y to -x, head-to-tail across the wall; the first wall turns it back beyond.
    walls = [{"kind": "90", "point_nm": [0.0, 0.0], "angle_deg": 45.0, "half_width_nm": 0.5,
              "rotation_deg": -90},
             {"kind": "90", "point_nm": [20.0, 0.0], "angle_deg": 45.0, "half_width_nm": 0.5,
              "rotation_deg": 90}]
    spec = _film(walls=walls)
    inside = spec.cells_in((8.0, 12.0, -2.0, 2.0))    # between the walls
    outside = spec.cells_in((-14.0, -10.0, -2.0, 2.0))
    # Outside: c-domain, polar axis along y.  Inside: polar axis along x, the long cell
    # edge along x.  The band is built in small-strain (rank-one) form, exact to O(t^2)
    # with t = c/a - 1 = 6 %, hence the 0.3 % tolerance.
    assert np.allclose(np.abs(outside.applied_b_pm[:, 1]), 17.0, atol=1e-3)
    assert np.allclose(np.abs(inside.applied_b_pm[:, 0]), 17.0, atol=1e-2)
    np.testing.assert_allclose(np.median(outside.c_local_pm), C_PTO, rtol=1e-4)
    np.testing.assert_allclose(np.median(inside.a_local_pm), C_PTO, rtol=3e-3)
    np.testing.assert_allclose(np.median(inside.c_local_pm), A_PTO, rtol=3e-3)
    # Head-to-tail: the polarization component along the wall normal is continuous.
    n = np.array([-1.0, 1.0]) / math.sqrt(2)
    p_in = np.median(inside.polarization_dir, axis=0)
    p_out = np.median(outside.polarization_dir, axis=0)
    assert abs(p_in @ n - p_out @ n) < 1e-3


def _winding(cells, box):
    """Total winding of the polarization over a box (CHECK-VALUES section 10 plaquettes)."""
    x0, x1, y0, y1 = box
    sel = ((cells.b_xy_nm[:, 0] > x0) & (cells.b_xy_nm[:, 0] < x1)
           & (cells.b_xy_nm[:, 1] > y0) & (cells.b_xy_nm[:, 1] < y1))
    ij = cells.ij[sel]
    theta = np.arctan2(cells.polarization_dir[sel, 1], cells.polarization_dir[sel, 0])
    i0, j0 = ij.min(axis=0)
    grid = np.full(tuple(ij.max(axis=0) - ij.min(axis=0) + 1), np.nan)
    grid[ij[:, 0] - i0, ij[:, 1] - j0] = theta
    # Boundary loop of the box, counter-clockwise in (i, j): sum of wrapped differences.
    loop = np.concatenate([grid[:, 0], grid[-1, 1:], grid[-2::-1, -1], grid[0, -2:0:-1],
                           grid[:1, 0]])
    d = np.angle(np.exp(1j * np.diff(loop)))
    return d.sum() / (2 * np.pi)


def test_vortex_pair_windings():
    spec = _film(vortex_pairs=[{"vortex_nm": [-6.0, 0.0], "antivortex_nm": [6.0, 0.0],
                                "core_nm": 1.0}])
    cells = spec.cells_in((-15.0, 15.0, -8.0, 8.0))
    assert _winding(cells, (-10.0, -2.0, -4.0, 4.0)) == pytest.approx(1.0, abs=1e-9)
    assert _winding(cells, (2.0, 10.0, -4.0, 4.0)) == pytest.approx(-1.0, abs=1e-9)
    assert _winding(cells, (-14.0, 14.0, -7.0, 7.0)) == pytest.approx(0.0, abs=1e-9)
    truth = spec.vortex_truth()
    assert [v["winding"] for v in truth] == [1, -1]


def test_defect_expansion_matches_centre_of_dilatation():
    eps0, r0 = 0.02, 1.0
    # Defect on a B site (cell 0, 0 centre) so the four A corners sit symmetrically.
    a = A_PTO / 1000
    spec = _film(defects=[{"point_nm": [0.5 * a, 0.5 * a], "expansion_pct": 100 * eps0,
                           "radius_nm": r0}])
    plain = _film()
    cols, ref = spec.columns_in((-2, 2, -2, 2)), plain.columns_in((-2, 2, -2, 2))
    pa, pr = _by_ij(cols, "A"), _by_ij(ref, "A")
    stretch = (pa[(1, 0)][0] - pa[(0, 0)][0]) / (pr[(1, 0)][0] - pr[(0, 0)][0]) - 1
    # u = eps0 r0^2 r / (r^2 + r0^2) evaluated at r = (+-a/2, +-a/2).
    expected = eps0 * r0**2 / (a**2 / 2 + r0**2)
    assert stretch == pytest.approx(expected, rel=1e-6)
    far = _by_ij(spec.columns_in((30, 34, 30, 34)), "A")
    far_ref = _by_ij(plain.columns_in((30, 34, 30, 34)), "A")
    key = sorted(set(far) & set(far_ref))[0]
    assert np.hypot(*(far[key] - far_ref[key])) * 1000 < 1.0  # < 1 pm 45 nm away


def test_vacancy_lowers_one_column():
    a = A_PTO / 1000
    spec = _film(vacancies=[{"point_nm": [3 * a, 4 * a * C_PTO / A_PTO], "site": "A",
                             "occupancy": 0.25}])
    cols = spec.columns_in((-1, 3, -1, 3))
    low = cols.occupancy < 1
    assert low.sum() == 1
    assert cols.sublattice[low][0] == "A" and tuple(cols.ij[low][0]) == (3, 4)
    assert cols.occupancy[low][0] == 0.25


def test_z_contrast_rule():
    spec = Specimen.from_scenario("demo")
    sto = spec.columns_in((-3, 3, -100, -96))
    pto = spec.columns_in((-3, 3, -30, -26))
    n = 1.7
    a_sto = sto.scattering(n)[sto.sublattice == "A"][0]
    a_pto = pto.scattering(n)[pto.sublattice == "A"][0]
    b_pto = pto.scattering(n)[pto.sublattice == "B"][0]
    # I ~ Z^1.7 (CHECK-VALUES section 9): Pb/Sr = (82/38)^1.7; a B-O column adds O.
    assert a_pto / a_sto == pytest.approx((82 / 38) ** n, rel=1e-12)
    assert b_pto == pytest.approx(22**n + 8**n, rel=1e-12)
    # Pure-cation ratio quoted there: Pb/Ti 9.4 at n = 1.7.
    assert (82 / 22) ** n == pytest.approx(9.4, abs=0.05)


def test_region_errors():
    spec = Specimen.from_scenario("demo")
    with pytest.raises(ValueError, match="`region` must be"):
        spec.columns_in((5, 1, 0, 2))
    with pytest.raises(ValueError, match="smaller field of view"):
        spec.columns_in((-2000, 2000, -2000, 2000))


def test_octahedral_tilt_moves_o_columns():
    phi = 5.0
    raw = {"name": "t", "size_nm": [50.0, 50.0], "reference_material": "SrTiO3",
           "layers": [{"material": "SrTiO3", "tilt_deg": phi}]}
    cols = Specimen.from_scenario(raw).columns_in((-2, 2, -2, 2))
    a = _by_ij(cols, "A")
    shifts = []
    for site, axis, step in (("Oa", 0, (1, 0)), ("Ob", 1, (0, 1))):
        for (i, j), p in _by_ij(cols, site).items():
            if (i, j) in a and (i + step[0], j + step[1]) in a:
                mid = 0.5 * (a[(i, j)] + a[(i + step[0], j + step[1])])
                # The O on a B-B bond moves perpendicular to that bond, i.e. along the
                # A-A line it sits on, alternating in sign from cell to cell.
                shifts.append(((p - mid)[axis] * 1000, 1 if (i + j) % 2 == 0 else -1, axis))
    shifts = np.array(shifts)
    # CHECK-VALUES section 8: delta = (a/2) tan(phi); SrTiO3 at 5 deg -> 17.1 pm.
    delta = A_STO / 2 * math.tan(math.radians(phi))
    np.testing.assert_allclose(np.abs(shifts[:, 0]), delta, rtol=1e-9)
    for axis in (0, 1):
        sel = shifts[:, 2] == axis
        signs = np.sign(shifts[sel, 0]) * shifts[sel, 1]
        assert sel.sum() > 10 and len(set(signs)) == 1  # alternates with cell parity
