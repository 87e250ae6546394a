"""Ginzburg-Landau parameters of a 180-degree wall from its fitted tanh profile.

Convention (used everywhere in livequant)
-----------------------------------------
Free-energy density of a uniaxial polarization ``P`` (C/m^2), SI units::

    f(P) = (alpha/2) P^2 + (beta/4) P^4 + (gamma/6) P^6 + (g/2) |grad P|^2

``alpha`` in m/F, ``beta`` in m^5/(C^2 F), ``gamma`` in m^9/(C^4 F), the
gradient coefficient ``g`` in m^3/F (= J m^3 / C^2).  Haun et al. write the
same expansion without the numeric factors, ``F = alpha1 P^2 + alpha11 P^4 +
alpha111 P^6`` (J. Appl. Phys. 62, 3331 (1987)), so ``alpha = 2 alpha1``,
``beta = 4 alpha11``, ``gamma = 6 alpha111`` (:meth:`LandauPotential.from_haun`),
with ``alpha1 = (T - T0) / (2 eps0 C)`` (Curie-Weiss).

With ``gamma = 0`` (the phi^4 model) the Euler-Lagrange equation
``g P'' = f'(P)`` has the exact 180-degree wall ``P(x) = P0 tanh(x / w)``,
``P0 = sqrt(|alpha| / beta)``, ``w = sqrt(2) xi``, ``xi = sqrt(g / |alpha|)``
and wall energy ``sigma = (2 sqrt 2 / 3) g^(1/2) |alpha|^(3/2) / beta``
(textbook derivation: Chandra & Littlewood, "A Landau primer for
ferroelectrics", in Physics of Ferroelectrics, Topics Appl. Phys. 105,
Springer 2007; project check values section 7).

The sixth-order term (PbTiO3 has ``beta < 0``) makes the tanh only an
approximation.  Two facts stay exact for any local potential:

* the profile scales as ``P(x) = Phi(x / sqrt(g))`` (``Phi`` solves the
  equation with ``g = 1``), so any width measured on it is ``c sqrt(g)`` with
  a material constant ``c``;
* the first integral ``(g/2) P'^2 = f(P) - f(Ps)`` gives the wall energy
  ``sigma = sqrt(2 g) * integral_{-Ps}^{Ps} sqrt(f(P) - f(Ps)) dP`` and the
  slope at the centre ``P'(0) = sqrt(2 (f(0) - f(Ps)) / g)``.

**Approximation used here:** the fitted tanh is taken to have the exact
profile's plateau ``Ps`` and central slope, ``Ps / w = P'(0)``, hence
``w = c sqrt(g)`` with ``c = Ps / sqrt(2 (f(0) - f(Ps)))`` and
``g = (w / c)^2``.  It is exact for ``gamma = 0``; for the PbTiO3
coefficients at room temperature a least-squares tanh over +-2 to +-5 widths of
the exact profile returns 0.95-0.99 of this ``w`` (tests/analysis/test_landau.py),
i.e. ``g`` is uncertain by up to ~10 % from the model alone.  The energy then
uses the exact integral of the material's potential, not the phi^4 formula
(which would be ~6 % low for PbTiO3).

Uncertainties: first-order propagation from the fitted ``w`` and ``P0``
(their covariance is not reported by the wall fit and is neglected; ``g`` and
``sigma`` depend on ``w`` only).  The Landau coefficients are taken as exact:
their own uncertainty (see the ``status`` of each entry in
``config/materials.toml``) is *not* propagated and is usually the larger one.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from scipy.integrate import quad
from scipy.interpolate import CubicSpline

__all__ = ["EPS0_F_PER_M", "LANDAU_CONVENTION", "LandauPotential", "WallGL", "wall_gl_parameters"]

#: Vacuum permittivity (CODATA 2018), F/m.
EPS0_F_PER_M = 8.8541878128e-12

LANDAU_CONVENTION = ("f = (alpha/2) P^2 + (beta/4) P^4 + (gamma/6) P^6 + (g/2) |grad P|^2 (SI); "
                     "Haun 1987: alpha = 2 alpha1, beta = 4 alpha11, gamma = 6 alpha111; "
                     "tanh wall P0 tanh(s/w), w = sqrt(2) xi; g from w by the exact profile's "
                     "central slope, wall energy by the exact first integral")


@dataclass(frozen=True)
class LandauPotential:
    """The homogeneous part of the free energy in livequant's convention.

    Attributes
    ----------
    alpha : float
        Quadratic coefficient, m/F (< 0 in the ordered phase or with ``beta < 0``).
    beta : float
        Quartic coefficient, m^5/(C^2 F).
    gamma : float
        Sextic coefficient, m^9/(C^4 F); 0 for the phi^4 model.
    """

    alpha: float
    beta: float
    gamma: float = 0.0

    def __post_init__(self):
        for k in ("alpha", "beta", "gamma"):
            if not np.isfinite(getattr(self, k)):
                raise ValueError(f"`{k}` must be finite, got {getattr(self, k)!r}")
        if self.gamma < 0 or (self.gamma == 0 and self.beta <= 0):
            raise ValueError("the potential must be bounded below: need `gamma` > 0, or "
                             f"`gamma` = 0 with `beta` > 0; got beta={self.beta!r}, "
                             f"gamma={self.gamma!r}")

    @classmethod
    def from_haun(cls, alpha1: float, alpha11: float, alpha111: float = 0.0) -> "LandauPotential":
        """Convert ``F = alpha1 P^2 + alpha11 P^4 + alpha111 P^6`` (Haun et al. 1987)."""
        return cls(alpha=2.0 * alpha1, beta=4.0 * alpha11, gamma=6.0 * alpha111)

    @classmethod
    def from_curie_weiss(cls, temperature_K: float, *, t0_K: float, curie_constant_K: float,
                         alpha11: float, alpha111: float = 0.0) -> "LandauPotential":
        """Haun-style coefficients with ``alpha1 = (T - T0) / (2 eps0 C)``."""
        if not curie_constant_K > 0:
            raise ValueError(f"`curie_constant_K` must be > 0, got {curie_constant_K!r}")
        alpha1 = (temperature_K - t0_K) / (2.0 * EPS0_F_PER_M * curie_constant_K)
        return cls.from_haun(alpha1, alpha11, alpha111)

    def energy_density(self, p):
        """``f(P)`` without the gradient term, J/m^3."""
        p2 = np.asarray(p, float) ** 2
        return self.alpha / 2 * p2 + self.beta / 4 * p2**2 + self.gamma / 6 * p2**3

    def spontaneous_polarization(self) -> float:
        """The polarization of the global minimum of ``f``, C/m^2.

        Raises
        ------
        ValueError
            When the minimum is at ``P = 0`` (paraelectric at this temperature).
        """
        a, b, c = self.alpha, self.beta, self.gamma
        if c == 0:
            p2 = -a / b
        else:
            disc = b * b - 4 * a * c
            p2 = (-b + np.sqrt(disc)) / (2 * c) if disc >= 0 else -1.0
        if not (p2 > 0 and self.energy_density(np.sqrt(p2)) < 0):
            raise ValueError(f"the potential (alpha={a:.4g}, beta={b:.4g}, gamma={c:.4g}) has "
                             "its minimum at P = 0: no spontaneous polarization (paraelectric)")
        return float(np.sqrt(p2))

    def excess_energy_density(self, p, *, ps2_minus_p2=None):
        """``f(P) - f(Ps)``, J/m^3, in the factored form free of cancellation.

        ``(Ps^2 - P^2)^2 [beta/4 + gamma/6 (P^2 + 2 Ps^2)]`` (``f'(Ps) = 0`` makes
        ``Ps^2`` a double root); ``ps2_minus_p2`` may be passed when known more
        precisely than ``Ps^2 - P^2``.
        """
        ps2 = self.spontaneous_polarization() ** 2
        p2 = np.asarray(p, float) ** 2
        d = ps2 - p2 if ps2_minus_p2 is None else np.asarray(ps2_minus_p2, float)
        return d**2 * (self.beta / 4 + self.gamma / 6 * (p2 + 2 * ps2))

    def barrier(self) -> float:
        """``f(0) - f(Ps)``, J/m^3: the energy density at the wall centre."""
        return float(self.excess_energy_density(0.0))

    def curvature_at_ps(self) -> float:
        """``f''(Ps)``, m/F (``2 |alpha|`` in the phi^4 model)."""
        p2 = self.spontaneous_polarization() ** 2
        return float(self.alpha + 3 * self.beta * p2 + 5 * self.gamma * p2**2)

    def width_factor(self) -> float:
        """``c`` of ``w = c sqrt(g)`` from the exact profile's central slope, (F/m)^(1/2).

        ``c = Ps / sqrt(2 (f(0) - f(Ps)))``; ``sqrt(2 / |alpha|)`` for ``gamma = 0``.
        """
        return float(self.spontaneous_polarization() / np.sqrt(2.0 * self.barrier()))

    def energy_per_sqrt_g(self) -> float:
        """``sigma / sqrt(g)`` from the exact first integral (SI)."""
        ps = self.spontaneous_polarization()
        val, _ = quad(lambda p: np.sqrt(max(float(self.excess_energy_density(p)), 0.0)),
                      -ps, ps, epsabs=0, epsrel=1e-10, limit=200)
        return float(np.sqrt(2.0) * val)

    def wall_profile(self, x_m, g: float):
        """The exact 180-degree wall ``P(x)`` for gradient coefficient `g` (numerical).

        From ``x(P) = integral_0^P sqrt(g / (2 (f(p) - f(Ps)))) dp``; accurate to
        ~1e-6 Ps inside ~10 widths.
        """
        ps = self.spontaneous_polarization()
        # A grid in u with P = Ps tanh(u) is dense near the plateau, where x(P) diverges;
        # Ps^2 - P^2 = Ps^2 sech^2(u) exactly, so the excess energy keeps its precision.
        u = np.linspace(0.0, 12.0, 60001)
        p = ps * np.tanh(u)
        sech2 = 1.0 / np.cosh(u) ** 2
        dfe = self.excess_energy_density(p, ps2_minus_p2=ps**2 * sech2)
        integrand = np.sqrt(g / (2.0 * dfe)) * ps * sech2
        x = np.concatenate([[0.0], np.cumsum((integrand[1:] + integrand[:-1]) / 2 * np.diff(u))])
        xa = np.asarray(x_m, float)
        # A cubic spline of P(x) (x(u) is strictly increasing): smooth to second order.
        spline = CubicSpline(x, p)
        ax = np.abs(xa)
        return np.sign(xa) * np.where(ax < x[-1], spline(np.minimum(ax, x[-1])), ps)

    def to_json(self) -> dict:
        return {**asdict(self), "convention": LANDAU_CONVENTION}


@dataclass(frozen=True)
class WallGL:
    """Ginzburg-Landau numbers of one wall (SI; see the module docstring).

    Attributes
    ----------
    width_m, sigma_width_m : float
        Fitted tanh half-width ``w`` and its sigma.
    xi_m, sigma_xi_m : float
        ``w / sqrt(2)`` (the correlation length of the phi^4 convention).
    g_m3_per_F, sigma_g_m3_per_F : float
        Gradient-energy coefficient.
    energy_J_per_m2, sigma_energy_J_per_m2 : float
        Wall energy per area.
    ps_C_per_m2 : float
        Spontaneous polarization of the material's potential.
    p0_over_ps, sigma_p0_over_ps : float or None
        Measured plateau over ``ps`` (None without a measured P0 in C/m^2).
    """

    width_m: float
    sigma_width_m: float
    xi_m: float
    sigma_xi_m: float
    g_m3_per_F: float
    sigma_g_m3_per_F: float
    energy_J_per_m2: float
    sigma_energy_J_per_m2: float
    ps_C_per_m2: float
    p0_over_ps: float | None = None
    sigma_p0_over_ps: float | None = None
    convention: str = LANDAU_CONVENTION

    def to_json(self) -> dict:
        def clean(v):
            if v is None or isinstance(v, str):
                return v
            v = float(v)
            return v if np.isfinite(v) else None
        return {k: clean(v) for k, v in asdict(self).items()}


def wall_gl_parameters(width_m: float, sigma_width_m: float, potential: LandauPotential, *,
                       p0_C_per_m2: float | None = None,
                       sigma_p0_C_per_m2: float | None = None) -> WallGL:
    """Gradient coefficient, correlation length and wall energy from a fitted wall.

    Parameters
    ----------
    width_m, sigma_width_m : float
        Half-width ``w`` of ``P0 tanh(s / w)`` and its one-sigma error, metres.
    potential : LandauPotential
        The material's homogeneous free energy at the session's temperature.
    p0_C_per_m2, sigma_p0_C_per_m2 : float, optional
        The measured plateau, for the consistency ratio ``P0 / Ps``.

    Returns
    -------
    WallGL
        ``g = (w / c)^2`` with ``c`` = :meth:`LandauPotential.width_factor`,
        ``sigma_g = 2 g sigma_w / w``; energy ``= sqrt(g) *``
        :meth:`LandauPotential.energy_per_sqrt_g`, sigma ``energy * sigma_w / w``.

    Raises
    ------
    ValueError
        A non-positive width or a paraelectric potential.

    Examples
    --------
    phi^4 with g = 1, alpha = -2, beta = 1 (check values section 7 / check 12):
    w = sqrt(2 g / |alpha|) = 1 and the wall energy is 2.6667.

    >>> gl = wall_gl_parameters(1.0, 0.01, LandauPotential(-2.0, 1.0))
    >>> round(gl.g_m3_per_F, 6), round(gl.energy_J_per_m2, 4)
    (1.0, 2.6667)
    """
    if not (np.isfinite(width_m) and width_m > 0):
        raise ValueError(f"`width_m` must be a positive length, got {width_m!r}")
    c = potential.width_factor()
    ps = potential.spontaneous_polarization()
    g = (width_m / c) ** 2
    rel = float(sigma_width_m) / width_m if sigma_width_m is not None else float("nan")
    energy = np.sqrt(g) * potential.energy_per_sqrt_g()
    ratio = sratio = None
    if p0_C_per_m2 is not None and np.isfinite(p0_C_per_m2):
        ratio = abs(p0_C_per_m2) / ps
        sratio = (sigma_p0_C_per_m2 / ps) if sigma_p0_C_per_m2 is not None else None
    return WallGL(width_m=float(width_m), sigma_width_m=float(sigma_width_m),
                  xi_m=float(width_m / np.sqrt(2.0)),
                  sigma_xi_m=float(sigma_width_m / np.sqrt(2.0)),
                  g_m3_per_F=float(g), sigma_g_m3_per_F=float(2.0 * g * rel),
                  energy_J_per_m2=float(energy), sigma_energy_J_per_m2=float(energy * rel),
                  ps_C_per_m2=float(ps), p0_over_ps=ratio, sigma_p0_over_ps=sratio)
