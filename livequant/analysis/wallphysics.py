"""The per-frame ``physics`` block of ``summary.json``: one wall's G-L numbers and roughness.

Joins :mod:`livequant.analysis.landau` (gradient coefficient, correlation
length, wall energy from the fitted tanh width and the material's Landau
coefficients) and :mod:`livequant.analysis.roughness` (the wall's position
per cell row, ``B(L)`` and ``zeta``) for the wall that
:func:`livequant.analysis.walls.find_wall` reported in the cells summary.
Pure numerics: arrays and dicts in, a JSON-ready dict out.
"""

from __future__ import annotations

import numpy as np

from livequant.analysis.landau import LandauPotential, wall_gl_parameters
from livequant.analysis.roughness import fit_roughness, wall_positions_by_row

__all__ = ["wall_line", "wall_physics"]


def wall_line(x_pm, y_pm, i, j, dx_pm, dy_pm, sigma_dx_pm, sigma_dy_pm, wall: dict):
    """The wall as a line: its normal position per lattice row crossing it.

    The row index is the lattice index (``i`` or ``j``) whose direction is
    closest to the wall's tangent, so each row is a line of cells crossing
    the wall.  The polar component is the displacement along the wall's
    ``axis_deg``; ``P0`` and ``w`` are fixed at the wall fit.

    Parameters
    ----------
    x_pm, y_pm : array_like, shape (N,)
        Cell centres.
    i, j : array_like of int, shape (N,)
        Cell indices.
    dx_pm, dy_pm, sigma_dx_pm, sigma_dy_pm : array_like, shape (N,)
        Displacement and its sigma.
    wall : dict
        The cells summary's ``wall`` (``x_pm, y_pm, normal_deg, axis_deg, p0, width``).

    Returns
    -------
    rows : ndarray of int, shape (R,)
        Consecutive row numbers (gaps filled with NaN positions).
    u_pm, sigma_u_pm : ndarray, shape (R,)
    row_spacing_pm : float
        Distance between neighbouring rows along the wall.
    """
    x, y = np.asarray(x_pm, float), np.asarray(y_pm, float)
    ii, jj = np.asarray(i, np.int64), np.asarray(j, np.int64)
    th, ax = np.radians(wall["normal_deg"]), np.radians(wall["axis_deg"])
    n = np.array([np.cos(th), np.sin(th)])
    t = np.array([-n[1], n[0]])
    axis = np.array([np.cos(ax), np.sin(ax)])
    # Lattice vectors from the cell centres: x = x0 + a_x i + b_x j (least squares).
    design = np.column_stack([np.ones_like(x), ii, jj])
    ok = np.isfinite(x) & np.isfinite(y)
    coef, *_ = np.linalg.lstsq(design[ok], np.column_stack([x, y])[ok], rcond=None)
    a_vec, b_vec = coef[1], coef[2]
    along_a = abs(a_vec @ t) / np.hypot(*a_vec) >= abs(b_vec @ t) / np.hypot(*b_vec)
    row = ii if along_a else jj
    spacing = float(abs((a_vec if along_a else b_vec) @ t))
    r = np.column_stack([x - wall["x_pm"], y - wall["y_pm"]])
    s = r @ n
    p = np.column_stack([dx_pm, dy_pm]) @ axis
    sp = np.sqrt(np.column_stack([sigma_dx_pm, sigma_dy_pm]) ** 2 @ axis**2)
    rows, u, su = wall_positions_by_row(s, row, p, sp, p0=wall["p0"], width_pm=wall["width"])
    if rows.size == 0:
        return rows, u, su, spacing
    full = np.arange(rows.min(), rows.max() + 1)
    uu = np.full(full.size, np.nan)
    ss = np.full(full.size, np.nan)
    uu[rows - rows.min()] = u
    ss[rows - rows.min()] = su
    return full, uu, ss, spacing


def wall_physics(cells_arrays: dict, wall: dict | None, *, potential: LandauPotential | None,
                 material_note: str = "", min_rows: int = 12, n_boot: int = 100) -> dict:
    """The ``physics`` block for one frame.

    Parameters
    ----------
    cells_arrays : dict
        ``x_pm, y_pm, i, j, dx_pm, dy_pm, sigma_dx_pm, sigma_dy_pm`` per cell.
    wall : dict or None
        The cells summary's ``wall``.
    potential : LandauPotential or None
        The material's free energy at the session temperature (None: no G-L numbers).
    material_note : str
        Where the coefficients come from (copied into the block).
    min_rows : int
        Rows with a position needed for a roughness fit.

    Returns
    -------
    dict
        ``{"wall": None}`` without a wall; otherwise ``wall`` (position,
        width, P0, asymmetry with sigmas), ``gl`` (or the reason it is
        missing), ``line`` (rows, u_pm, sigma_u_pm, row_spacing_pm) and
        ``roughness`` (or the reason).
    """
    if wall is None:
        return {"wall": None, "reason": "no wall fitted in this frame"}
    keys = ("x_pm", "y_pm", "normal_deg", "width", "sigma_width", "p0", "sigma_p0",
            "p0_C_per_m2", "sigma_p0_C_per_m2", "asymmetry", "sigma_asymmetry", "x0", "sigma_x0")
    out: dict = {"wall": {k: wall.get(k) for k in keys}}
    if potential is None:
        out["gl"] = None
        out["gl_reason"] = "the material has no Landau coefficients (config/materials.toml)"
    elif wall.get("width") is None or wall.get("sigma_width") is None:
        # a degenerate wall fit (e.g. sharper than one cell) has no finite width or sigma
        out["gl"] = None
        out["gl_reason"] = "the wall fit gave no finite width with an uncertainty"
    else:
        try:
            gl = wall_gl_parameters(wall["width"] * 1e-12, wall["sigma_width"] * 1e-12, potential,
                                    p0_C_per_m2=wall.get("p0_C_per_m2"),
                                    sigma_p0_C_per_m2=wall.get("sigma_p0_C_per_m2"))
            out["gl"] = {**gl.to_json(), "coefficients": material_note}
        except ValueError as exc:
            out["gl"] = None
            out["gl_reason"] = str(exc)
    c = cells_arrays
    rows, u, su, spacing = wall_line(c["x_pm"], c["y_pm"], c["i"], c["j"], c["dx_pm"],
                                     c["dy_pm"], c["sigma_dx_pm"], c["sigma_dy_pm"], wall)
    f = (lambda v: float(v) if np.isfinite(v) else None)
    out["line"] = {"rows": [int(r) for r in rows], "u_pm": [f(v) for v in u],
                   "sigma_u_pm": [f(v) for v in su], "row_spacing_pm": spacing}
    n_ok = int(np.isfinite(u).sum())
    if n_ok < min_rows:
        out["roughness"] = None
        out["roughness_reason"] = f"{n_ok} rows with a wall position (< {min_rows})"
    else:
        try:
            # u is measured from the fitted straight wall: its tilt is gone, so detrend.
            out["roughness"] = fit_roughness(u, su, n_boot=n_boot, detrend=True).to_json()
        except ValueError as exc:
            out["roughness"] = None
            out["roughness_reason"] = str(exc)
    return out
