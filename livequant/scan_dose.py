"""The electron dose a proposed scan would deliver: I t / (e A_px).

A scan of beam current ``I`` with per-pixel dwell ``t`` on pixels of side
``p`` puts ``I t / e`` electrons on each pixel of area ``p**2``; the areal
dose is their ratio.  This is the standard definition of electron dose in
(S)TEM (common practice; e.g. Egerton, Micron 119, 72 (2019) for dose and
dose rate in beam-damage studies).  The probe is treated as sampling each
pixel once, which holds when the pixel is larger than the probe; for
oversampled scans (pixel smaller than the probe) the dose per area is the
same number, spread by the probe.
"""

from __future__ import annotations

import math

__all__ = ["ELEMENTARY_CHARGE_C", "dose_e_per_A2", "format_dose"]

#: The elementary charge (exact in the 2019 SI), coulombs.
ELEMENTARY_CHARGE_C = 1.602176634e-19


def dose_e_per_A2(beam_current_pa, dwell_time_us, pixel_size_pm) -> float | None:
    """Areal electron dose in electrons per square angstrom, or None when unknown.

    Parameters
    ----------
    beam_current_pa : float or None
        Probe current, picoamperes.
    dwell_time_us : float or None
        Dwell per pixel, microseconds.
    pixel_size_pm : float or None
        Pixel side, picometres (square pixels).

    Returns
    -------
    float or None
        ``I t / (e p^2)`` in e/Å²; None when any input is missing, not finite
        or not positive (the dose is then unknown, never guessed).
    """
    try:
        i, t, p = float(beam_current_pa), float(dwell_time_us), float(pixel_size_pm)
    except (TypeError, ValueError):
        return None
    if not all(math.isfinite(v) and v > 0 for v in (i, t, p)):
        return None
    electrons = i * 1e-12 * t * 1e-6 / ELEMENTARY_CHARGE_C
    area_A2 = (p / 100.0) ** 2          # 1 Å = 100 pm
    return electrons / area_A2


def format_dose(dose: float | None) -> str:
    """``51234.0 -> '5.1e4'``, ``812.3 -> '812'``, ``None -> 'n/a'`` (short, for tables)."""
    if dose is None or not math.isfinite(dose):
        return "n/a"
    if dose < 1000:
        return f"{dose:.3g}"
    exp = int(math.floor(math.log10(dose)))
    mant = dose / 10 ** exp
    if round(mant, 1) >= 10:
        mant, exp = mant / 10, exp + 1
    return f"{mant:.1f}e{exp}"
