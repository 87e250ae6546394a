"""Combining repeated measurements: inverse-variance weighted mean and its chi-square test.

For independent estimates ``x_i +- s_i`` of one quantity the weighted mean is
``m = sum(x_i / s_i^2) / sum(1 / s_i^2)`` with ``sigma_m = sum(1 / s_i^2)^(-1/2)``;
``chi2 = sum(((x_i - m) / s_i)^2)`` follows a chi-square law with ``n - 1``
degrees of freedom when the estimates agree within their sigmas.  When the
test fails (``p < p_min``) the scatter is larger than the sigmas say (the
wall moved or changed, or the per-frame sigmas are too small) and the
sigma of the mean is also given scaled by ``sqrt(chi2 / dof)``, the usual
remedy of the Particle Data Group (Review of Particle Physics, "Introduction:
procedures", unconstrained averaging) -- the mean is then a summary, not a
single value of a constant.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from scipy.stats import chi2 as _chi2

__all__ = ["WeightedMean", "weighted_mean"]


@dataclass(frozen=True)
class WeightedMean:
    """Inverse-variance weighted mean with its chi-square consistency test.

    ``consistent`` is ``p_value >= p_min``; ``sigma_scaled`` is
    ``sigma * max(1, sqrt(chi2 / dof))``.
    """

    mean: float
    sigma: float
    n: int
    chi2: float
    dof: int
    p_value: float
    consistent: bool
    sigma_scaled: float

    def to_json(self) -> dict:
        out = asdict(self)
        for k, v in out.items():
            if isinstance(v, float) and not np.isfinite(v):
                out[k] = None
        return out


def weighted_mean(values, sigmas, *, p_min: float = 0.01) -> WeightedMean:
    """Weighted mean of ``values`` with one-sigma errors ``sigmas``.

    Non-finite values or sigmas, and sigmas <= 0, are left out.

    Parameters
    ----------
    values, sigmas : array_like, shape (N,)
    p_min : float
        Significance level of the consistency test.

    Returns
    -------
    WeightedMean
        With one estimate: ``dof = 0``, ``chi2 = 0``, ``p_value = 1``.

    Raises
    ------
    ValueError
        No usable estimate, or arrays of different lengths.

    Examples
    --------
    >>> r = weighted_mean([1.0, 3.0], [1.0, 1.0])
    >>> r.mean, round(r.sigma, 4), r.chi2, r.dof
    (2.0, 0.7071, 2.0, 1)
    """
    x = np.asarray(values, float).ravel()
    s = np.asarray(sigmas, float).ravel()
    if x.shape != s.shape:
        raise ValueError(f"`values` and `sigmas` must have the same length, got {x.size} and "
                         f"{s.size}")
    ok = np.isfinite(x) & np.isfinite(s) & (s > 0)
    if not ok.any():
        raise ValueError("no estimate with a finite value and a positive sigma to average")
    x, s = x[ok], s[ok]
    w = 1.0 / s**2
    mean = float(np.sum(w * x) / np.sum(w))
    sigma = float(np.sum(w) ** -0.5)
    chi2 = float(np.sum(w * (x - mean) ** 2))
    dof = int(x.size - 1)
    p = float(_chi2.sf(chi2, dof)) if dof > 0 else 1.0
    scale = max(1.0, np.sqrt(chi2 / dof)) if dof > 0 else 1.0
    return WeightedMean(mean=mean, sigma=sigma, n=int(x.size), chi2=chi2, dof=dof, p_value=p,
                        consistent=bool(p >= p_min), sigma_scaled=float(sigma * scale))
