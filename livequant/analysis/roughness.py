"""Roughness of a domain wall: position per cell row, B(L) and the exponent zeta.

A wall seen edge-on is a line ``u(z)``: its displacement along the wall
normal at the coordinate ``z`` along the wall (one value per cell row).  Its
displacement correlation function

    B(L) = < [u(z + L) - u(z)]^2 >_z

grows as ``L^(2 zeta)`` for a self-affine line; ``zeta = 1/2`` for a thermal
(random-walk) line, ``2/3`` for a line pinned by random-bond disorder, and
about 0.26 was measured on ferroelectric walls written in epitaxial films
(Paruch, Giamarchi & Triscone, Phys. Rev. Lett. 94, 197601 (2005), whose
method -- B(L) of the wall position, zeta from the power-law range -- is the
one used here).

Conventions and choices
-----------------------
* ``u`` in pm, ``z`` in rows (integer lag ``L`` in cell rows; multiply by the
  row spacing for a length).
* Measurement noise adds ``2 <sigma_u^2>`` to every ``B(L)``; it is
  subtracted (``noise_floor``) before the fit.
* ``zeta`` is half the slope of an unweighted least-squares line through
  ``(log L, log B)`` for ``l_min <= L <= l_max``; ``B(L)`` at neighbouring
  lags are strongly correlated, so their naive fit errors would be far too
  small.  The confidence interval is instead a bootstrap:
  over independent lines when four or more are given (resampling whole
  lines keeps every correlation inside a line), otherwise parametric
  (lines of the same length synthesised with the fitted zeta and amplitude
  plus the measured noise, refitted; the interval is their spread about its
  median placed at the estimate).  Measured coverage of the nominal 68 %
  interval: 0.62 for single detrended 40-row random walks, 0.67 for 128-row
  ones (100 and 60 trials; docs/wall-physics.md).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["WallRoughness", "wall_positions_by_row", "displacement_correlation",
           "fit_roughness", "self_affine_line"]


def wall_positions_by_row(s_pm, row, p, sigma_p, *, p0, width_pm, n_iter: int = 8,
                          min_cells: int = 3):
    """Position of a wall along its normal in each cell row crossing it.

    Each row's position ``u`` minimises ``sum ((p - P0 tanh((s - u) / w)) / sigma_p)^2``
    with ``P0`` and ``w`` fixed at the frame's wall fit (one parameter per row;
    Gauss-Newton, vectorised over rows with ``bincount``).

    Parameters
    ----------
    s_pm : array_like, shape (N,)
        Cell coordinate along the wall normal, relative to the fitted wall, pm.
    row : array_like of int, shape (N,)
        Index of the cell row (the lattice row crossing the wall) of each cell.
    p, sigma_p : array_like, shape (N,)
        Polar component (same sign convention as ``p0``) and its sigma.
    p0, width_pm : float
        The frame's fitted plateau and half-width.
    min_cells : int
        Rows with fewer cells within ``3 w`` of the wall are dropped.

    Returns
    -------
    rows : ndarray of int, shape (R,)
    u_pm, sigma_u_pm : ndarray, shape (R,)
        Position along the normal and its sigma (inverse curvature); NaN for a
        row whose fit left ``+-2 w`` (no crossing in that row).
    """
    s = np.asarray(s_pm, float)
    rows_all = np.asarray(row, np.int64)
    p = np.asarray(p, float)
    sp = np.asarray(sigma_p, float)
    ok = np.isfinite(s) & np.isfinite(p) & np.isfinite(sp) & (sp > 0)
    s, rows_all, p, sp = s[ok], rows_all[ok], p[ok], sp[ok]
    near = np.abs(s) < 3 * width_pm
    uniq, inv = np.unique(rows_all, return_inverse=True)
    count = np.bincount(inv, weights=near.astype(float), minlength=uniq.size)
    u = np.zeros(uniq.size)
    wt = 1.0 / sp**2
    for _ in range(n_iter):
        z = (s - u[inv]) / width_pm
        t = np.tanh(z)
        r = p - p0 * t
        j = -p0 * (1 - t**2) / width_pm         # d model / d u
        num = np.bincount(inv, weights=wt * j * r, minlength=uniq.size)
        den = np.bincount(inv, weights=wt * j * j, minlength=uniq.size)
        with np.errstate(invalid="ignore", divide="ignore"):
            step = np.clip(num / den, -width_pm, width_pm)
        u = u + np.where(np.isfinite(step), step, 0.0)
    z = (s - u[inv]) / width_pm
    j = p0 * (1 - np.tanh(z) ** 2) / width_pm
    den = np.bincount(inv, weights=wt * j * j, minlength=uniq.size)
    with np.errstate(divide="ignore"):
        sig = 1.0 / np.sqrt(den)
    bad = (count < min_cells) | (np.abs(u) > 2 * width_pm) | ~np.isfinite(sig)
    u[bad] = np.nan
    sig[bad] = np.nan
    return uniq, u, sig


def displacement_correlation(lines, *, max_lag: int):
    """``B(L) = <[u(z + L) - u(z)]^2>`` pooled over one or several lines.

    Parameters
    ----------
    lines : array_like or list of array_like
        One line ``u`` (1D, NaN for missing rows) or a list of them; rows are
        consecutive integers.
    max_lag : int

    Returns
    -------
    lag : ndarray of int, shape (max_lag,)
        ``1 .. max_lag``.
    b : ndarray, shape (max_lag,)
        ``B(L)`` (NaN where no pair exists).
    n_pairs : ndarray of int, shape (max_lag,)
    """
    if isinstance(lines, np.ndarray) and lines.ndim == 1:
        lines = [lines]
    if max_lag < 1:
        raise ValueError(f"`max_lag` must be >= 1, got {max_lag}")
    total, count = _per_line_sums(lines, max_lag)
    return _pooled(total.sum(0), count.sum(0), max_lag)


def _per_line_sums(lines, max_lag):
    """Sum of squared differences and pair count per line and lag: (n_lines, max_lag)."""
    total = np.zeros((len(lines), max_lag))
    count = np.zeros((len(lines), max_lag), np.int64)
    for i, u in enumerate(lines):
        u = np.asarray(u, float)
        for k in range(min(max_lag, u.size - 1)):
            d = u[k + 1:] - u[:-(k + 1)]
            d = d[np.isfinite(d)]
            total[i, k] = np.sum(d * d)
            count[i, k] = d.size
    return total, count


def _pooled(total, count, max_lag):
    lag = np.arange(1, max_lag + 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        b = np.where(count > 0, total / np.maximum(count, 1), np.nan)
    return lag, b, count


def self_affine_line(n: int, zeta: float, *, rng, amplitude: float = 1.0):
    """A periodic self-affine line of ``n`` points by spectral synthesis.

    Power spectrum ``S(q) ~ q^-(1 + 2 zeta)`` with random phases, so that
    ``B(L) ~ L^(2 zeta)`` for ``1 << L << n`` (0 < zeta < 1).  ``amplitude``
    sets ``B(1)`` approximately to ``amplitude^2``.
    """
    if not 0 < zeta < 1:
        raise ValueError(f"`zeta` must be in (0, 1) for spectral synthesis, got {zeta}")
    q = np.fft.rfftfreq(n)[1:]
    mag = q ** (-(1 + 2 * zeta) / 2)
    coef = np.zeros(n // 2 + 1, complex)
    coef[1:] = mag * (rng.normal(size=q.size) + 1j * rng.normal(size=q.size))
    u = np.fft.irfft(coef, n)
    b1 = np.mean((np.roll(u, -1) - u) ** 2)
    return u * amplitude / np.sqrt(b1)


@dataclass(frozen=True)
class WallRoughness:
    """Roughness exponent of one or several wall lines.

    ``zeta`` with ``sigma_zeta`` (bootstrap standard deviation) and the
    ``ci_level`` interval ``[ci_low, ci_high]``; ``lag`` (rows), ``b_pm2``
    (noise floor subtracted) and ``n_pairs`` are the data, fitted over
    ``l_min..l_max``; ``amplitude_pm2`` is ``B(1)`` of the fitted power law.
    """

    zeta: float
    sigma_zeta: float
    ci_low: float
    ci_high: float
    ci_level: float
    l_min: int
    l_max: int
    amplitude_pm2: float
    noise_floor_pm2: float
    n_lines: int
    method: str
    lag: np.ndarray = field(repr=False)
    b_pm2: np.ndarray = field(repr=False)
    n_pairs: np.ndarray = field(repr=False)

    def to_json(self) -> dict:
        def f(v):
            v = float(v)
            return v if np.isfinite(v) else None
        return {"zeta": f(self.zeta), "sigma_zeta": f(self.sigma_zeta),
                "ci_low": f(self.ci_low), "ci_high": f(self.ci_high),
                "ci_level": self.ci_level, "l_min_rows": self.l_min, "l_max_rows": self.l_max,
                "amplitude_pm2": f(self.amplitude_pm2), "noise_floor_pm2": f(self.noise_floor_pm2),
                "n_lines": self.n_lines, "method": self.method,
                "lag_rows": [int(v) for v in self.lag], "b_pm2": [f(v) for v in self.b_pm2],
                "n_pairs": [int(v) for v in self.n_pairs],
                "convention": "B(L) = <[u(z+L) - u(z)]^2> ~ L^(2 zeta), u along the wall normal "
                              "per cell row (pm), L in rows; noise floor 2<sigma_u^2> subtracted"}


def _fit_zeta(lag, b, l_min, l_max):
    sel = (lag >= l_min) & (lag <= l_max) & np.isfinite(b) & (b > 0)
    if sel.sum() < 3:
        return np.nan, np.nan
    slope, icpt = np.polyfit(np.log(lag[sel]), np.log(b[sel]), 1)
    return slope / 2.0, float(np.exp(icpt))


def _detrend(u):
    """``u`` minus its least-squares straight line (over the finite rows)."""
    u = np.asarray(u, float)
    z = np.arange(u.size)
    ok = np.isfinite(u)
    if ok.sum() < 2:
        return u
    return u - np.polyval(np.polyfit(z[ok], u[ok], 1), z)


def fit_roughness(lines, sigmas=None, *, l_min: int = 1, l_max: int | None = None,
                  n_boot: int = 200, ci_level: float = 0.68, seed: int = 0,
                  detrend: bool = False) -> WallRoughness:
    """Roughness exponent ``zeta`` from ``B(L) ~ L^(2 zeta)`` with a bootstrap CI.

    Parameters
    ----------
    lines : array_like or list of array_like
        Wall positions per row (pm), NaN for missing rows.
    sigmas : same shape as `lines`, optional
        Their sigmas; ``2 <sigma^2>`` is subtracted from ``B(L)``.
    l_min, l_max : int
        Fit range in rows.  ``l_max`` defaults to an eighth of the longest
        line (beyond that few independent pairs remain).
    n_boot : int
        Bootstrap resamples.
    ci_level : float
        Central coverage of ``[ci_low, ci_high]``.
    seed : int
        Seed of the bootstrap's local generator (results are reproducible).
    detrend : bool
        Remove each line's straight-line fit first (and from every simulated
        line of the parametric bootstrap, which then corrects the bias this
        causes).  Use it for positions measured from a fitted straight wall,
        whose tilt is already gone: removing a line's tilt lowers B at large
        L and with it zeta (by ~0.1 for 40 rows of a random walk); with the
        parametric bootstrap that shift is measured on simulated lines and
        added back to the reported ``zeta``.

    Returns
    -------
    WallRoughness

    Raises
    ------
    ValueError
        Fewer than 3 usable lags in the fit range (line too short).
    """
    if isinstance(lines, np.ndarray) and lines.ndim == 1:
        lines = [lines]
    lines = [np.asarray(u, float) for u in lines]
    if detrend:
        lines = [_detrend(u) for u in lines]
    if sigmas is None:
        sigmas = [np.zeros_like(u) for u in lines]
    elif isinstance(sigmas, np.ndarray) and sigmas.ndim == 1:
        sigmas = [sigmas]
    sigmas = [np.asarray(s, float) for s in sigmas]
    longest = max((u.size for u in lines), default=0)
    l_max = int(l_max or max(longest // 8, 3))
    if l_max - l_min + 1 < 3 or longest <= l_max:
        raise ValueError(f"a roughness fit needs at least 3 lags in [{l_min}, {l_max}] and "
                         f"lines longer than l_max; the longest line has {longest} rows")
    var = np.concatenate([s[np.isfinite(u) & np.isfinite(s)] ** 2 for u, s in zip(lines, sigmas)])
    floor = 2.0 * float(np.mean(var)) if var.size else 0.0
    lag, b, npairs = displacement_correlation(lines, max_lag=l_max)
    if floor > 0:
        # Pure noise gives B(L) = floor with a standard error of about floor * 2 / sqrt(n)
        # (each squared difference is floor * chi2_1; overlapping pairs share noise, x sqrt 2).
        sel = (lag >= l_min) & (npairs > 0)
        se = floor * 2.0 / np.sqrt(np.maximum(npairs[sel], 1))
        if not np.any(b[sel] - floor > 3.0 * se):
            raise ValueError("B(L) does not exceed the noise floor 2<sigma_u^2> by 3 standard "
                             "errors at any lag: the wall is flat within its noise")
    zeta, amp = _fit_zeta(lag, b - floor, l_min, l_max)
    if not np.isfinite(zeta):
        raise ValueError("B(L) is not positive over the fit range (the wall is flat within "
                         "its noise): no roughness exponent")
    rng = np.random.default_rng(seed)
    boots = []
    if len(lines) >= 4:
        method = f"bootstrap over {len(lines)} independent lines"
        tot, cnt = _per_line_sums(lines, l_max)
        for _ in range(n_boot):
            pick = rng.integers(0, len(lines), len(lines))
            _, bb, _ = _pooled(tot[pick].sum(0), cnt[pick].sum(0), l_max)
            boots.append(_fit_zeta(lag, bb - floor, l_min, l_max)[0])
        boots = np.array(boots)
        boots = boots[np.isfinite(boots)]
        lo, hi = np.quantile(boots, [(1 - ci_level) / 2, (1 + ci_level) / 2])
    else:
        method = ("parametric bootstrap (synthetic self-affine lines of the fitted zeta"
                  + (", detrended like the data)" if detrend else ")"))
        def simulate(z_sim):
            # B(1) of the simulated lines matches the data's (amplitude of the fit at L = 1).
            raw, flat = [], []
            for _ in range(n_boot):
                sims = []
                for u, s in zip(lines, sigmas):
                    n = u.size
                    # Synthesise 4n points and keep n: no periodicity of the FFT line.
                    line = self_affine_line(4 * n, z_sim, rng=rng, amplitude=np.sqrt(amp))[:n]
                    noise = np.where(np.isfinite(s), s, 0.0) * rng.normal(size=n)
                    sims.append(np.where(np.isfinite(u), line + noise, np.nan))
                _, bb, _ = displacement_correlation(sims, max_lag=l_max)
                raw.append(_fit_zeta(lag, bb - floor, l_min, l_max)[0])
                if detrend:
                    _, bb, _ = displacement_correlation([_detrend(v) for v in sims],
                                                        max_lag=l_max)
                    flat.append(_fit_zeta(lag, bb - floor, l_min, l_max)[0])
            raw = np.array(raw)
            flat = np.array(flat) if detrend else raw
            keep = np.isfinite(raw) & np.isfinite(flat)
            return raw[keep], flat[keep]

        # The interval is the simulated spread of the estimate about its median, placed at
        # the estimate (a percentile interval; the estimator's own small bias, which depends
        # on the line model, is not corrected).  Removing the tilt (detrend) lowers zeta
        # systematically; that shift is measured on the same simulated lines and undone.
        z_sim = float(np.clip(zeta, 0.05, 0.95))
        raw, boots = simulate(z_sim)
        if detrend:
            shift = float(np.median(boots) - np.median(raw))
            z_sim = float(np.clip(zeta - shift, 0.05, 0.95))
            raw, boots = simulate(z_sim)
            shift = float(np.median(boots) - np.median(raw))
            zeta = zeta - shift
        qlo, qmed, qhi = np.quantile(boots, [(1 - ci_level) / 2, 0.5, (1 + ci_level) / 2])
        lo, hi = zeta - (qmed - qlo), zeta + (qhi - qmed)
    return WallRoughness(zeta=float(zeta), sigma_zeta=float(np.std(boots)) if boots.size else
                         np.nan, ci_low=float(lo), ci_high=float(hi), ci_level=ci_level,
                         l_min=int(l_min), l_max=int(l_max), amplitude_pm2=float(amp),
                         noise_floor_pm2=floor, n_lines=len(lines), method=method, lag=lag,
                         b_pm2=b - floor, n_pairs=npairs)
