"""Ginzburg-Landau parameters of a wall and the session-level weighted mean.

Sources: CHECK-VALUES.md section 7 (phi^4 wall: P0 = sqrt(|alpha|/beta), xi = sqrt(g/|alpha|),
w = sqrt(2) xi, sigma = (2 sqrt 2/3) g^(1/2) |alpha|^(3/2)/beta; check 12: g = 1, alpha = -2,
beta = 1 -> 2.6667), section 12 (PbTiO3 coefficients of Haun et al., J. Appl. Phys. 62, 3331
(1987), F = alpha1 P^2 + alpha11 P^4 + alpha111 P^6, "Ps ~ 0.75 C/m^2 at room temperature"),
section 3 (PbTiO3 Ps ~ 0.75 C/m^2).  Everything else is checked against independent numerics
(scipy minimisation, finite differences, quadrature) or Monte Carlo.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import curve_fit, minimize_scalar
from scipy.stats import chi2 as chi2_dist

from livequant.analysis.combine import weighted_mean
from livequant.analysis.landau import (EPS0_F_PER_M, LandauPotential, wall_gl_parameters)
from livequant.analysis.walls import landau_wall
from livequant.config import get_material


def _pto(temperature_K=298.0):
    c = get_material("PbTiO3").landau
    return LandauPotential.from_haun(c.alpha1_slope_m_per_F_K * (temperature_K - c.t0_K),
                                     c.alpha11, c.alpha111), c


def test_haun_conversion_gives_the_same_free_energy():
    # Haun writes F = a1 P^2 + a11 P^4 + a111 P^6; ours is (a/2) P^2 + (b/4) P^4 + (c/6) P^6.
    a1, a11, a111 = -1.7e8, -7.3e7, 2.6e8
    pot = LandauPotential.from_haun(a1, a11, a111)
    assert (pot.alpha, pot.beta, pot.gamma) == (2 * a1, 4 * a11, 6 * a111)
    p = np.linspace(-1.0, 1.0, 11)
    assert np.allclose(pot.energy_density(p), a1 * p**2 + a11 * p**4 + a111 * p**6, rtol=1e-12)


def test_curie_weiss_form():
    # alpha1 = (T - T0) / (2 eps0 C): with C = 1.5e5 K the slope is 3.76e5 m/(F K), the
    # 3.8e5 quoted in CHECK-VALUES section 12 to two digits.
    pot = LandauPotential.from_curie_weiss(300.0, t0_K=752.0, curie_constant_K=1.5e5,
                                           alpha11=-7.3e7, alpha111=2.6e8)
    assert pot.alpha / 2 == pytest.approx((300.0 - 752.0) / (2 * EPS0_F_PER_M * 1.5e5))
    assert 1 / (2 * EPS0_F_PER_M * 1.5e5) == pytest.approx(3.8e5, rel=0.015)


def test_pbtio3_spontaneous_polarization_from_haun_coefficients():
    # CHECK-VALUES section 12 / section 3: Haun's coefficients give Ps ~ 0.75 C/m^2 at room
    # temperature; the tolerance asked for by the issue is 1 %.
    pot, coeffs = _pto(298.0)
    ps = pot.spontaneous_polarization()
    assert ps == pytest.approx(0.75, rel=0.01)
    # Independent: the minimum of Haun's own F, found numerically.
    alpha1 = coeffs.alpha1_slope_m_per_F_K * (298.0 - coeffs.t0_K)
    res = minimize_scalar(lambda p: alpha1 * p**2 + coeffs.alpha11 * p**4
                          + coeffs.alpha111 * p**6, bounds=(0.01, 2.0), method="bounded",
                          options={"xatol": 1e-10})
    assert ps == pytest.approx(res.x, rel=1e-6)


def test_paraelectric_raises():
    pot, _ = _pto(900.0)  # far above T0 = 752 K (and above the first-order jump)
    with pytest.raises(ValueError, match="paraelectric"):
        pot.spontaneous_polarization()
    with pytest.raises(ValueError, match="bounded below"):
        LandauPotential(-1.0, -1.0, 0.0)


def test_phi4_limit_is_exact_check_12():
    # CHECK-VALUES check 12: g = 1, alpha = -2, beta = 1 -> sigma = 2.6667, w = sqrt(2 g/|a|).
    pot = LandauPotential(-2.0, 1.0)
    ref = landau_wall(1.0, -2.0, 1.0)
    assert pot.spontaneous_polarization() == pytest.approx(ref["p0"], rel=1e-12)
    assert pot.width_factor() == pytest.approx(np.sqrt(2 / 2.0), rel=1e-12)
    assert pot.curvature_at_ps() == pytest.approx(2 * 2.0)
    gl = wall_gl_parameters(ref["w"], 0.01, pot, p0_C_per_m2=ref["p0"], sigma_p0_C_per_m2=0.0)
    assert gl.g_m3_per_F == pytest.approx(1.0, rel=1e-10)
    assert gl.energy_J_per_m2 == pytest.approx(2.6667, abs=1e-4)
    assert gl.xi_m == pytest.approx(np.sqrt(1.0 / 2.0), rel=1e-12)
    assert gl.p0_over_ps == pytest.approx(1.0)
    # The exact numerical profile of the phi^4 potential is the tanh.
    x = np.linspace(-5, 5, 101)
    assert np.allclose(pot.wall_profile(x, 1.0), np.tanh(x / ref["w"]) * ref["p0"], atol=1e-6)


def test_exact_profile_solves_euler_lagrange_and_carries_the_energy():
    # g P'' = f'(P) on the numerical PbTiO3 profile, and the integrated excess energy equals
    # sqrt(g) * energy_per_sqrt_g (first integral), both by independent finite differences.
    pot, _ = _pto(298.0)
    g = 4e-11
    w = pot.width_factor() * np.sqrt(g)
    x = np.linspace(-8 * w, 8 * w, 40001)
    p = pot.wall_profile(x, g)
    h = x[1] - x[0]
    d2 = (p[2:] - 2 * p[1:-1] + p[:-2]) / h**2
    q = p[1:-1]
    fprime = pot.alpha * q + pot.beta * q**3 + pot.gamma * q**5
    inner = np.abs(x[1:-1]) < 4 * w
    scale = np.max(np.abs(fprime))
    assert np.max(np.abs(g * d2 - fprime)[inner]) < 2e-3 * scale
    dp = np.gradient(p, x)
    dens = pot.energy_density(p) - pot.energy_density(pot.spontaneous_polarization()) \
        + g / 2 * dp**2
    assert np.trapezoid(dens, x) == pytest.approx(np.sqrt(g) * pot.energy_per_sqrt_g(), rel=1e-3)
    # The central slope defines w: P'(0) = Ps / w.
    assert dp[20000] == pytest.approx(pot.spontaneous_polarization() / w, rel=1e-3)


@pytest.mark.parametrize("span", [2.0, 3.0, 5.0])
def test_tanh_approximation_error_for_pbtio3(span):
    # The approximation stated in landau.py: a least-squares tanh fitted to the exact PbTiO3
    # wall (sixth-order potential) over +-span widths returns w within 6 % of c sqrt(g) and
    # P0 within 3 % of Ps; the phi^4 energy formula with those numbers is within 10 % of the
    # exact first integral.  Measured here, so the docs can quote it.
    pot, _ = _pto(298.0)
    g = 4e-11
    w_c = pot.width_factor() * np.sqrt(g)
    x = np.linspace(-span * w_c, span * w_c, 301)
    (p0, w), _ = curve_fit(lambda s, a, b: a * np.tanh(s / b), x, pot.wall_profile(x, g),
                           p0=[0.7, w_c])
    ps = pot.spontaneous_polarization()
    assert w == pytest.approx(w_c, rel=0.06)
    assert p0 == pytest.approx(ps, rel=0.03)
    exact = np.sqrt(g) * pot.energy_per_sqrt_g()
    assert 4 / 3 * g * p0**2 / w == pytest.approx(exact, rel=0.10)


def test_pbtio3_wall_numbers_are_physical():
    # A half-width of one cell (~400 pm) gives g ~ 4e-11 m^3/F and ~80 mJ/m^2; Meyer &
    # Vanderbilt (CHECK-VALUES section 12, from memory) computed 132-169 mJ/m^2 for PbTiO3
    # walls: an order-of-magnitude check only.
    pot, _ = _pto(298.0)
    gl = wall_gl_parameters(400e-12, 40e-12, pot, p0_C_per_m2=0.7, sigma_p0_C_per_m2=0.05)
    assert 1e-11 < gl.g_m3_per_F < 1e-10
    assert 0.02 < gl.energy_J_per_m2 < 0.5
    assert gl.p0_over_ps == pytest.approx(0.7 / pot.spontaneous_polarization())


def test_uncertainty_propagation_matches_monte_carlo():
    # First-order sigma of g and of the energy against the scatter of the same function of
    # w drawn from N(w, sigma_w) (relative sigma 2 %: first order holds to ~1 %).
    pot, _ = _pto(298.0)
    w, sw = 400e-12, 8e-12
    gl = wall_gl_parameters(w, sw, pot)
    rng = np.random.default_rng(41)
    ws = rng.normal(w, sw, 20000)
    g = (ws / pot.width_factor()) ** 2
    e = np.sqrt(g) * pot.energy_per_sqrt_g()
    assert np.std(g) == pytest.approx(gl.sigma_g_m3_per_F, rel=0.03)
    assert np.std(e) == pytest.approx(gl.sigma_energy_J_per_m2, rel=0.03)


def test_bad_width_raises():
    with pytest.raises(ValueError, match="`width_m`"):
        wall_gl_parameters(-1.0, 0.1, LandauPotential(-2.0, 1.0))


# ------------------------------------------------------------------ weighted mean


def test_weighted_mean_known_values():
    r = weighted_mean([1.0, 2.0, np.nan], [1.0, 0.5, 1.0])
    assert r.n == 2
    assert r.mean == pytest.approx((1 + 2 * 4) / 5)
    assert r.sigma == pytest.approx(5 ** -0.5)
    assert r.chi2 == pytest.approx((1 - 1.8) ** 2 + 4 * (2 - 1.8) ** 2)
    assert r.p_value == pytest.approx(chi2_dist.sf(r.chi2, 1))
    with pytest.raises(ValueError, match="no estimate"):
        weighted_mean([np.nan], [1.0])


def test_chi2_test_false_alarm_rate_and_power():
    # Consistent sets: flagged at the nominal 1 % (binomial 3-sigma band over 2000 sets);
    # a set with one 10-sigma outlier is flagged and its scaled sigma is larger.
    rng = np.random.default_rng(7)
    flagged = 0
    for _ in range(2000):
        s = rng.uniform(0.5, 2.0, 8)
        flagged += not weighted_mean(rng.normal(3.0, s), s).consistent
    assert abs(flagged / 2000 - 0.01) < 3 * np.sqrt(0.01 * 0.99 / 2000)
    x = np.array([1.0, 1.1, 0.9, 1.0, 11.0])
    r = weighted_mean(x, np.ones(5))
    assert not r.consistent and r.sigma_scaled > 3 * r.sigma
