"""Domain-wall profile: the Landau-Ginzburg tanh fit.

For a flat 180-degree wall normal to x with free energy density
``(alpha/2) P^2 + (beta/4) P^4 + (g/2) (dP/dx)^2`` (alpha < 0), the
Euler-Lagrange solution is

    P(x) = P0 tanh((x - x0) / w),   w = sqrt(2) xi,   xi = sqrt(g / |alpha|)

(project check values, section 7; textbook treatment e.g. Chandra &
Littlewood, "A Landau primer for ferroelectrics", Topics Appl. Phys. 105
(2007)).  This module reports the half-width ``w`` in that convention, the
correlation length ``xi = w / sqrt(2)``, and the -0.8 P0 -> +0.8 P0 distance
``2 atanh(0.8) w = 2.197 w`` that a reader measuring by eye would quote.

:func:`find_wall` looks for one straight wall in a per-cell displacement map:
it takes the displacement component along the dominant polar axis and fits
the tanh profile in 2D with the wall's position, width, amplitude and
orientation free.  Parameter sigmas follow from the column sigmas, including
the correlation between neighbouring cells that share A corners.  Several
walls in one frame (or a vortex texture) give a poor fit, which the reduced
chi-square reports.
"""

from __future__ import annotations

import warnings
from dataclasses import asdict, dataclass

import numpy as np
from scipy.optimize import OptimizeWarning, curve_fit

__all__ = ["WallFit", "DisplacementNoise", "tanh_profile", "fit_wall_profile", "find_wall", "landau_wall",
           "WIDTH_CONVENTION", "WIDTH_80_FACTOR"]

WIDTH_CONVENTION = ("P(x) = P0 tanh((x - x0) / w); w = sqrt(2) xi with xi = sqrt(g/|alpha|) "
                    "(Landau-Ginzburg 180-degree wall); width_80 = 2 atanh(0.8) w")

#: The -0.8 P0 -> +0.8 P0 distance in units of w.
WIDTH_80_FACTOR = 2.0 * np.arctanh(0.8)


#: Keys of :meth:`WallFit.to_json` in pm that are also written as ``KEY_pm``.
UNIT_KEYS = ("x0", "sigma_x0", "width", "sigma_width", "p0", "sigma_p0", "correlation_length",
             "width_80")


def tanh_profile(x, p0, x0, w):
    """``p0 * tanh((x - x0) / w)``."""
    return p0 * np.tanh((np.asarray(x, float) - x0) / w)


def landau_wall(g, alpha, beta) -> dict:
    """Bulk polarization, width and energy of the Landau-Ginzburg 180-degree wall.

    Parameters
    ----------
    g, alpha, beta : float
        Gradient coefficient (> 0), quadratic coefficient (< 0, ordered
        phase) and quartic coefficient (> 0), in any consistent units.

    Returns
    -------
    dict
        ``p0 = sqrt(|alpha| / beta)``, ``xi = sqrt(g / |alpha|)``,
        ``w = sqrt(2) xi`` (the half-width of ``P0 tanh(x / w)``) and the
        excess energy per area ``sigma = (2 sqrt(2) / 3) g^(1/2) |alpha|^(3/2)
        / beta = (4/3) g p0^2 / w``.
    """
    if not (g > 0 and alpha < 0 and beta > 0):
        raise ValueError(f"a wall needs g > 0, alpha < 0 and beta > 0; got g={g!r}, "
                         f"alpha={alpha!r}, beta={beta!r}")
    p0 = np.sqrt(-alpha / beta)
    xi = np.sqrt(g / -alpha)
    w = np.sqrt(2.0) * xi
    energy = 2.0 * np.sqrt(2.0) / 3.0 * np.sqrt(g) * (-alpha) ** 1.5 / beta
    return {"p0": float(p0), "xi": float(xi), "w": float(w), "energy": float(energy)}


@dataclass(frozen=True)
class WallFit:
    """Result of a tanh wall fit (lengths in the units of the abscissa, pm in the maps).

    ``reduced_chi2`` is about 1 for a good fit with honest sigmas.  The
    direction fields are set by :func:`find_wall` only: ``axis_deg`` is the
    polar axis whose component reverses, ``normal_deg`` (with
    ``sigma_normal_deg``) the wall normal, both ``atan2(y, x)``;
    ``x_pm, y_pm`` a point on the wall.  ``asymmetry`` (with
    ``sigma_asymmetry``) is ``|P+| - |P-|`` of the two plateaus, from a refit
    with an offset, ``p = c + P0 tanh(...)``, so ``|P+| - |P-| = 2c``: a
    non-zero value hints at a built-in field along the polar axis.  When the
    offset model fits better by more than 3 sigma its P0 (the mean plateau
    magnitude), x0, w and angle are the ones reported.
    """

    x0: float
    sigma_x0: float
    width: float
    sigma_width: float
    p0: float
    sigma_p0: float
    reduced_chi2: float
    n_points: int
    convention: str = WIDTH_CONVENTION
    axis_deg: float | None = None
    normal_deg: float | None = None
    sigma_normal_deg: float | None = None
    x_pm: float | None = None
    y_pm: float | None = None
    asymmetry: float | None = None
    sigma_asymmetry: float | None = None

    @property
    def correlation_length(self) -> float:
        return self.width / np.sqrt(2.0)

    @property
    def width_80(self) -> float:
        return WIDTH_80_FACTOR * self.width

    def to_json(self) -> dict:
        def clean(v):
            if v is None or isinstance(v, str):
                return v
            v = float(v)
            return v if np.isfinite(v) else None  # strict JSON has no NaN

        out = {k: clean(v) for k, v in asdict(self).items()}
        out["n_points"] = int(self.n_points)
        out["correlation_length"] = float(self.correlation_length)
        out["width_80"] = float(self.width_80)
        # The same lengths under names that carry their unit; the bare names above go in
        # the next release (livequant.schema.RENAMED_WALL_KEYS, TODO.md).
        for key in UNIT_KEYS:
            out[f"{key}_pm"] = out[key]
        return out


def fit_wall_profile(x, p, sigma_p=None, *, x0_guess=None, width_guess=None) -> WallFit:
    """Fit ``P(x) = P0 tanh((x - x0) / w)`` to a measured profile.

    Parameters
    ----------
    x, p : array_like, shape (N,)
        Abscissa across the wall and the order-parameter component.
    sigma_p : array_like, shape (N,), optional
        One-sigma errors of `p`.  When given they are taken as absolute, so
        the parameter sigmas follow from them; otherwise the scatter of the
        residuals sets the scale.
    x0_guess, width_guess : float, optional

    Returns
    -------
    WallFit

    Raises
    ------
    ValueError
        Fewer than four finite points, no sign change, or a fit that does not
        converge.
    """
    x = np.asarray(x, float).ravel()
    p = np.asarray(p, float).ravel()
    if x.shape != p.shape:
        raise ValueError(f"`x` and `p` must have the same length, got {x.size} and {p.size}")
    ok = np.isfinite(x) & np.isfinite(p)
    s = None
    if sigma_p is not None:
        s = np.asarray(sigma_p, float).ravel()
        if s.shape != p.shape:
            raise ValueError("`sigma_p` must have the same length as `p`")
        ok &= np.isfinite(s) & (s > 0)
    x, p = x[ok], p[ok]
    s = None if s is None else s[ok]
    if x.size < 4:
        raise ValueError(f"a wall fit needs at least 4 finite points, got {x.size}")
    if not (np.any(p > 0) and np.any(p < 0)):
        raise ValueError("the profile does not change sign: there is no wall to fit")
    order = np.argsort(x)
    xs, ps = x[order], p[order]
    span = float(xs[-1] - xs[0]) or 1.0
    p0_guess = float(np.sign(np.mean(ps[xs > np.median(xs)]) - np.mean(ps[xs <= np.median(xs)]))
                     * np.percentile(np.abs(ps), 90)) or float(np.max(np.abs(ps)))
    if x0_guess is None:
        # Crossing nearest the middle: where the running sign of p changes.
        flips = np.flatnonzero(np.diff(np.sign(ps)) != 0)
        mids = (xs[flips] + xs[flips + 1]) / 2.0
        x0_guess = float(mids[np.argmin(np.abs(mids - np.median(xs)))]) if flips.size else \
            float(np.median(xs))
    width_guess = float(width_guess or span / 10.0)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", OptimizeWarning)
            popt, pcov = curve_fit(tanh_profile, x, p, p0=[p0_guess, x0_guess, width_guess],
                                   sigma=s, absolute_sigma=s is not None,
                                   bounds=([-np.inf, xs[0] - span, 1e-6 * span],
                                           [np.inf, xs[-1] + span, 10.0 * span]),
                                   max_nfev=2000)
    except (RuntimeError, OptimizeWarning, ValueError) as exc:
        raise ValueError(f"the tanh wall fit did not converge: {exc}") from exc
    resid = p - tanh_profile(x, *popt)
    dof = max(x.size - 3, 1)
    chi2 = float(np.sum((resid / s) ** 2) / dof) if s is not None else float(np.nan)
    sig = np.sqrt(np.clip(np.diag(pcov), 0, None))
    p0, x0, w = popt  # w > 0 by the bounds, so the sign of the wall is carried by p0
    return WallFit(x0=float(x0), sigma_x0=float(sig[1]), width=float(w), sigma_width=float(sig[2]),
                   p0=float(p0), sigma_p0=float(sig[0]), reduced_chi2=chi2, n_points=int(x.size))


@dataclass(frozen=True)
class DisplacementNoise:
    """How the per-cell displacements share their errors.

    The displacement of cell ``k`` is ``B_k - mean(A corners)``, and each A
    column is a corner of up to four cells, so neighbouring cells' errors are
    correlated (correlation 1/10 for edge neighbours with equal column
    sigmas).  A fit that ignores this under-states its parameter errors by up
    to ~25 %; with this model :func:`find_wall` propagates the exact column
    covariance instead.

    Attributes
    ----------
    sigma_b_xy : ndarray, shape (N, 2)
        Sigma of each cell's B column, ``(x, y)``, pm.
    corner_ids : ndarray of int, shape (N, 4)
        Index of each of the cell's four A corners into `sigma_corner_xy`.
    sigma_corner_xy : ndarray, shape (M, 2)
        Sigma of every A column, ``(x, y)``, pm.
    """

    sigma_b_xy: np.ndarray
    corner_ids: np.ndarray
    sigma_corner_xy: np.ndarray


def _wall_model(r, centre):
    """``p(r) = P0 tanh(((r - centre) . n(theta) - x0) / w)`` for a straight wall."""

    def model(_, p0, x0, w, theta):
        s = (r[:, 0] - centre[0]) * np.cos(theta) + (r[:, 1] - centre[1]) * np.sin(theta)
        return p0 * np.tanh((s - x0) / w)

    return model


def _wall_jacobian(r, centre, params):
    p0, x0, w, theta = params
    dx, dy = r[:, 0] - centre[0], r[:, 1] - centre[1]
    s = dx * np.cos(theta) + dy * np.sin(theta)
    t = -dx * np.sin(theta) + dy * np.cos(theta)    # coordinate along the wall
    z = (s - x0) / w
    # sech^2 z = 4 e^{-2|z|} / (1 + e^{-2|z|})^2: no overflow far from the wall
    e = np.exp(-2.0 * np.abs(z))
    sech2 = 4.0 * e / (1.0 + e) ** 2
    return np.column_stack([np.tanh(z), -p0 * sech2 / w, -p0 * sech2 * z / w,
                            p0 * sech2 * t / w])


def _sandwich_sigmas(jac, sp, axis, noise: DisplacementNoise, keep):
    """Parameter sigmas of the weighted fit under the full column covariance.

    ``cov = A (G^T C G) A`` with ``A = (J^T W J)^-1``, ``G = W J`` and ``C``
    the covariance of the profile values implied by the column sigmas.
    """
    g = jac / sp[:, None] ** 2
    try:
        a = np.linalg.inv(jac.T @ g)
    except np.linalg.LinAlgError:
        # a degenerate fit (e.g. a wall sharper than one cell: the width no
        # longer changes the profile) has no finite uncertainty
        return np.full(jac.shape[1], np.nan)
    var_b = (np.asarray(noise.sigma_b_xy)[keep] ** 2) @ axis**2
    meat = (g * var_b[:, None]).T @ g
    ids = np.asarray(noise.corner_ids)[keep]
    h = np.zeros((len(noise.sigma_corner_xy), jac.shape[1]))
    np.add.at(h, ids.ravel(), np.repeat(g, 4, axis=0))
    var_c = (np.asarray(noise.sigma_corner_xy) ** 2) @ axis**2 / 16.0
    good = np.isfinite(var_c)
    meat += (h[good] * var_c[good, None]).T @ h[good]
    cov = a @ meat @ a
    return np.sqrt(np.clip(np.diag(cov), 0, None))


def find_wall(positions_xy, d_xy, sigma_d_xy, *, noise: DisplacementNoise | None = None,
              min_fraction=0.1, min_snr=3.0) -> WallFit | None:
    """Find and fit one straight wall in a per-cell displacement map.

    The polar axis is the dominant direction of the displacements (second
    moment), ``p = d . axis`` its component; the wall is fitted in 2D as
    ``p(r) = P0 tanh(((r - c) . n - x0) / w)`` with the normal's angle free,
    started from the direction joining the centroids of the two signs (a
    normal fixed from the centroids would smear the profile when the cells on
    either side cover different areas).

    Parameters
    ----------
    positions_xy : array_like, shape (N, 2)
        Cell centres ``(x, y)``, pm.
    d_xy, sigma_d_xy : array_like, shape (N, 2)
        Displacement ``(dx, dy)`` and its sigma, pm.
    noise : DisplacementNoise, optional
        The shared-corner error structure; when given, the parameter sigmas
        account for the correlation between neighbouring cells.
    min_fraction : float
        Each sign must hold at least this fraction of the cells.
    min_snr : float
        The median ``|p| / sigma_p`` must reach this for a wall to be claimed.

    Returns
    -------
    WallFit or None
        None when the map shows no reversal of the polar component (a single
        domain, or a displacement below the noise) or the fit fails.
        ``p0 > 0`` always: the normal points from the negative to the positive
        domain.
    """
    r = np.asarray(positions_xy, float)
    d = np.asarray(d_xy, float)
    sd = np.asarray(sigma_d_xy, float)
    ok = np.all(np.isfinite(r), 1) & np.all(np.isfinite(d), 1) & np.all(np.isfinite(sd), 1)
    if ok.sum() < 8:
        return None
    r, d, sd = r[ok], d[ok], sd[ok]
    # Dominant polar axis from the second moment (the mean of +P and -P domains is ~0).
    evals, evecs = np.linalg.eigh(d.T @ d / len(d))
    axis = evecs[:, -1]
    p = d @ axis
    sp = np.sqrt((sd**2) @ axis**2)
    pos, neg = p > 0, p < 0
    if min(pos.mean(), neg.mean()) < min_fraction or np.median(np.abs(p) / sp) < min_snr:
        return None
    normal = r[pos].mean(axis=0) - r[neg].mean(axis=0)
    if not np.hypot(*normal) > 0:
        return None
    normal /= np.hypot(*normal)
    centre = r.mean(axis=0)
    s = (r - centre) @ normal
    try:
        first = fit_wall_profile(s, p, sp)
    except ValueError:
        return None
    theta0 = float(np.arctan2(normal[1], normal[0]))
    span = float(np.ptp(s)) or 1.0
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", OptimizeWarning)
            popt, _ = curve_fit(_wall_model(r, centre), None, p,
                                p0=[first.p0, first.x0, first.width, theta0], sigma=sp,
                                absolute_sigma=True,
                                bounds=([-np.inf, -2 * span, 1e-6 * span, theta0 - np.pi / 4],
                                        [np.inf, 2 * span, 10 * span, theta0 + np.pi / 4]),
                                max_nfev=2000)
    except (RuntimeError, OptimizeWarning, ValueError):
        return None
    jac = _wall_jacobian(r, centre, popt)
    resid = p - _wall_model(r, centre)(None, *popt)
    chi2_total = float(np.sum((resid / sp) ** 2))
    dof = max(len(p) - 4, 1)
    if noise is not None:
        sig = _sandwich_sigmas(jac, sp, axis, noise, ok)
    else:
        g = jac / sp[:, None] ** 2
        sig = np.sqrt(np.clip(np.diag(np.linalg.inv(jac.T @ g)), 0, None))
    asym = sigma_asym = None
    offset_fit = _offset_fit(r, centre, p, sp, popt, axis, noise, ok, span, theta0)
    if offset_fit is not None:
        q, sig5, chi2_5 = offset_fit
        # Along this axis |P+| - |P-| = |c + |P0|| - ||P0| - c| = 2 c while |c| < |P0|,
        # whatever the sign of P0; negated below when the axis is flipped.
        asym, sigma_asym = float(2.0 * q[4]), float(2.0 * sig5[4])
        # Unequal plateaus bias a symmetric fit: report the offset model when it is better
        # by more than 3 sigma (chi-square drop > 9 for one parameter, Wilks).
        if chi2_total - chi2_5 > 9.0:
            popt, sig, chi2_total, dof = q[:4], sig5[:4], chi2_5, max(len(p) - 5, 1)
    chi2 = chi2_total / dof
    p0, x0, w, theta = (float(v) for v in popt)
    if p0 < 0:  # describe the same wall with P0 > 0: flip the polar axis
        axis, p0 = -axis, -p0
        asym = None if asym is None else -asym
    n_vec = np.array([np.cos(theta), np.sin(theta)])
    at = centre + x0 * n_vec
    return WallFit(x0=x0, sigma_x0=float(sig[1]), width=w, sigma_width=float(sig[2]), p0=p0,
                   sigma_p0=float(sig[0]), reduced_chi2=chi2, n_points=int(len(p)),
                   axis_deg=float(np.degrees(np.arctan2(axis[1], axis[0]))),
                   normal_deg=float(np.degrees(theta)), sigma_normal_deg=float(np.degrees(sig[3])),
                   x_pm=float(at[0]), y_pm=float(at[1]), asymmetry=asym,
                   sigma_asymmetry=sigma_asym)


def _offset_fit(r, centre, p, sp, popt, axis, noise, keep, span, theta0):
    """Fit ``c + P0 tanh(...)`` from the 4-parameter solution.

    Returns ``(params, sigmas, chi2_total)`` with params ``(P0, x0, w, theta,
    c)`` and sigmas as for the wall (sandwich with the shared corners), or
    None when the refit fails.
    """
    model4 = _wall_model(r, centre)

    def model5(_, p0, x0, w, theta, c):
        return c + model4(None, p0, x0, w, theta)

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", OptimizeWarning)
            q, _ = curve_fit(model5, None, p, p0=[*popt, 0.0], sigma=sp, absolute_sigma=True,
                             bounds=([-np.inf, -2 * span, 1e-6 * span, theta0 - np.pi / 4, -np.inf],
                                     [np.inf, 2 * span, 10 * span, theta0 + np.pi / 4, np.inf]),
                             max_nfev=2000)
    except (RuntimeError, OptimizeWarning, ValueError):
        return None
    jac = np.column_stack([_wall_jacobian(r, centre, q[:4]), np.ones(len(p))])
    if noise is not None:
        sig = _sandwich_sigmas(jac, sp, axis, noise, keep)
    else:
        g = jac / sp[:, None] ** 2
        sig = np.sqrt(np.clip(np.diag(np.linalg.inv(jac.T @ g)), 0, None))
    chi2_total = float(np.sum(((p - model5(None, *q)) / sp) ** 2))
    return q, sig, chi2_total
