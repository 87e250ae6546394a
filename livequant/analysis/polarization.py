"""Polar displacement of the B site and the Born-charge polarization estimate.

Seen along [001], every B-site (B-O) column sits at the centre of a square of
four A-site columns in the centrosymmetric reference.  Its shift from that
centre, ``u = B - mean(A4)``, is the polar displacement that HAADF images
show directly.  The polarization follows to first order from the Born
effective charges (Zhong, King-Smith & Vanderbilt, PRL 72, 3618 (1994)):

    P = (e / Omega) * sum_i Z*_i u_i

With only cation columns visible, the estimate this module reports keeps the
B-site term alone, ``P = s (e / Omega) Z*_B u``, where ``s`` is the material's
sign tying the B-versus-A shift to P (``p_sign_b_vs_a``: -1 for PbTiO3 and
BiFeO3, +1 for BaTiO3; see the project's table of check values, section 3).
It is an in-plane, cation-only estimate: the oxygen displacements, which
carry much of the real polarization, are not in it.

Everything here is vectorised over cells; inputs are ``(row, col)`` pixels,
outputs are ``(x, y) = (col, row)`` in picometres as they go to the files.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

__all__ = [
    "E_CHARGE_C",
    "MaterialConstants",
    "Displacement",
    "displacement_from_sites",
    "b_site_polarization",
    "polarization_per_pm",
    "born_polarization",
    "POLARIZATION_LABEL",
]

#: Elementary charge in coulombs (exact in the SI since 2019).
E_CHARGE_C = 1.602176634e-19

#: e / pm^2 expressed in C/m^2 (so P[C/m^2] = this * Z* * u[pm] / Omega[pm^3] * 1 pm).
_E_PER_PM2_C_PER_M2 = E_CHARGE_C * 1e24

POLARIZATION_LABEL = (
    "in-plane, B-cation-only Born-charge estimate P = s (e/Omega) Z*_B u_B-A "
    "(oxygen displacements not included; sign s from the material table)"
)


@dataclass(frozen=True)
class MaterialConstants:
    """The numbers of one material that the descriptors need.

    A plain copy of an entry of the material table, so that the analysis
    package stays free of the configuration code.  Build it with
    :meth:`from_object` from anything carrying these attribute names.

    Attributes
    ----------
    name : str
    a_pm, c_pm : float
        Lattice parameters (``c_pm == a_pm`` for a cubic or pseudocubic cell).
    born_a, born_b, born_o_par, born_o_perp : float or None
        Born effective charges in units of e.
    p_sign_b_vs_a : {-1, 1} or None
        +1: P points along the B-site shift measured against the A-site cage;
        -1: against it.
    """

    name: str
    a_pm: float
    c_pm: float
    born_a: float | None = None
    born_b: float | None = None
    born_o_par: float | None = None
    born_o_perp: float | None = None
    p_sign_b_vs_a: int | None = None

    def __post_init__(self):
        for key in ("a_pm", "c_pm"):
            value = getattr(self, key)
            if not (np.isfinite(value) and value > 0):
                raise ValueError(f"material `{self.name}`: `{key}` must be a positive length "
                                 f"in pm, got {value!r}")
        if self.p_sign_b_vs_a not in (None, -1, 1):
            raise ValueError(f"material `{self.name}`: `p_sign_b_vs_a` must be -1, +1 or "
                             f"absent, got {self.p_sign_b_vs_a!r}")

    @property
    def cell_volume_pm3(self) -> float:
        """Volume of the (tetragonal) formula-unit cell, ``a^2 c``."""
        return self.a_pm * self.a_pm * self.c_pm

    @property
    def born_sum(self) -> float | None:
        """Sum of the Born charges of one cell along c (acoustic sum rule: 0)."""
        parts = (self.born_a, self.born_b, self.born_o_par, self.born_o_perp)
        if any(p is None for p in parts):
            return None
        return self.born_a + self.born_b + self.born_o_par + 2.0 * self.born_o_perp

    def polarization_missing(self) -> str | None:
        """Why no polarization can be estimated for this material, or None."""
        if self.born_b is None:
            return f"material `{self.name}` has no B-site Born charge (born_b) in the table"
        if self.p_sign_b_vs_a is None:
            return (f"material `{self.name}` has no p_sign_b_vs_a in the table; the sign "
                    "between the B-site shift and P is not assumed")
        return None

    @classmethod
    def from_object(cls, obj) -> "MaterialConstants":
        """Copy the fields from any object (e.g. a configuration model) or mapping."""
        if isinstance(obj, MaterialConstants):
            return obj
        get = obj.get if isinstance(obj, dict) else (lambda k, d=None: getattr(obj, k, d))
        missing = [k for k in ("name", "a_pm", "c_pm") if get(k) is None]
        if missing:
            raise ValueError(f"material is missing {', '.join(f'`{k}`' for k in missing)}")
        return cls(name=str(get("name")), a_pm=float(get("a_pm")), c_pm=float(get("c_pm")),
                   born_a=get("born_a"), born_b=get("born_b"), born_o_par=get("born_o_par"),
                   born_o_perp=get("born_o_perp"), p_sign_b_vs_a=get("p_sign_b_vs_a"))


@dataclass(frozen=True)
class Displacement:
    """B-site displacement from the centre of its A-site cage, per cell.

    All arrays have one entry per cell; ``x`` is the column axis and ``y`` the
    row axis of the image, both in picometres.  ``angle_deg`` is
    ``atan2(dy, dx)`` in that frame (the sense of
    :attr:`Lattice.orientation_deg`), in (-180, 180].
    """

    dx_pm: np.ndarray
    sigma_dx_pm: np.ndarray
    dy_pm: np.ndarray
    sigma_dy_pm: np.ndarray
    magnitude_pm: np.ndarray
    sigma_magnitude_pm: np.ndarray
    angle_deg: np.ndarray
    sigma_angle_deg: np.ndarray


def displacement_from_sites(b_px, sigma_b_px, a4_px, sigma_a4_px, *, pixel_size_pm) -> Displacement:
    """Displacement of each B column from the mean of its four A neighbours.

    Parameters
    ----------
    b_px, sigma_b_px : array_like, shape (N, 2)
        ``(row, col)`` of the B column and its one-sigma uncertainty, pixels.
    a4_px, sigma_a4_px : array_like, shape (N, 4, 2)
        The four A corners of each cell (any order) and their uncertainties.
    pixel_size_pm : float

    Returns
    -------
    Displacement
        NaN for a cell where any of the five columns is missing.

    Notes
    -----
    Linear propagation with independent column errors:
    ``var(u) = var(B) + sum_k var(A_k) / 16`` per coordinate.  Magnitude and
    angle sigmas are first order in ``sigma / |u|``, so they are meaningful
    only where ``|u|`` is several sigmas.
    """
    b = np.asarray(b_px, float)
    sb = np.asarray(sigma_b_px, float)
    a4 = np.asarray(a4_px, float)
    sa4 = np.asarray(sigma_a4_px, float)
    if b.ndim != 2 or b.shape[-1] != 2 or a4.shape != b.shape[:1] + (4, 2):
        raise ValueError(f"`b_px` must be (N, 2) and `a4_px` (N, 4, 2); got {b.shape} and "
                         f"{a4.shape}")
    px = float(pixel_size_pm)
    d = (b - a4.mean(axis=1)) * px
    var = (sb**2 + (sa4**2).sum(axis=1) / 16.0) * px**2
    dy, dx = d[:, 0], d[:, 1]
    vy, vx = var[:, 0], var[:, 1]
    mag = np.hypot(dx, dy)
    with np.errstate(invalid="ignore", divide="ignore"):
        sig_mag = np.sqrt(dx**2 * vx + dy**2 * vy) / mag
        sig_ang = np.degrees(np.sqrt(dy**2 * vx + dx**2 * vy) / mag**2)
    return Displacement(dx_pm=dx, sigma_dx_pm=np.sqrt(vx), dy_pm=dy, sigma_dy_pm=np.sqrt(vy),
                        magnitude_pm=mag, sigma_magnitude_pm=sig_mag,
                        angle_deg=np.degrees(np.arctan2(dy, dx)), sigma_angle_deg=sig_ang)


def polarization_per_pm(material: MaterialConstants) -> float:
    """Signed factor ``s Z*_B e / Omega`` turning a B-site shift in pm into C/m^2."""
    why = material.polarization_missing()
    if why is not None:
        raise ValueError(f"cannot estimate the polarization: {why}")
    return material.p_sign_b_vs_a * material.born_b * _E_PER_PM2_C_PER_M2 / material.cell_volume_pm3


def b_site_polarization(dx_pm, dy_pm, sigma_dx_pm, sigma_dy_pm, material: MaterialConstants):
    """In-plane, B-cation-only polarization estimate from the B-site shift.

    ``P = s (e / Omega) Z*_B u`` with ``Omega = a^2 c`` and ``s`` the
    material's ``p_sign_b_vs_a`` (see the module notes and
    :data:`POLARIZATION_LABEL`).

    Parameters
    ----------
    dx_pm, dy_pm, sigma_dx_pm, sigma_dy_pm : array_like
        B-site displacement from the A cage and its sigma, picometres.
    material : MaterialConstants
        Must carry ``born_b`` and ``p_sign_b_vs_a``.

    Returns
    -------
    px, py, sigma_px, sigma_py : ndarray
        C/m^2.  The sigmas carry the displacement error only (the Born charge
        and the cell volume are taken as exact).

    Raises
    ------
    ValueError
        When the material lacks the Born charge or the sign; the message says
        which key to add to the material table.

    Examples
    --------
    Ti shifted 25 pm in tetragonal PbTiO3 (Z*_Ti = 6.71, Omega = 62.90 A^3):

    >>> m = MaterialConstants("PbTiO3", 389.87, 413.80, born_b=6.71, p_sign_b_vs_a=-1)
    >>> px, py, _, _ = b_site_polarization([25.0], [0.0], [0.0], [0.0], m)
    >>> round(float(px[0]), 3)
    -0.427
    """
    k = polarization_per_pm(material)
    return (k * np.asarray(dx_pm, float), k * np.asarray(dy_pm, float),
            abs(k) * np.asarray(sigma_dx_pm, float), abs(k) * np.asarray(sigma_dy_pm, float))


def born_polarization(displacements_pm, born_charges, volume_pm3, *, sum_rule_tolerance=1e-3):
    """Linear Born-charge polarization of one cell, all atoms included.

    ``P_alpha = (e / Omega) sum_i sum_beta Z*_{i, alpha beta} u_{i, beta}``
    (Zhong, King-Smith & Vanderbilt, PRL 72, 3618 (1994)).

    Parameters
    ----------
    displacements_pm : array_like, shape (n_atoms, 3)
        Displacement of each atom of the cell from the centrosymmetric
        reference, picometres.
    born_charges : array_like, shape (n_atoms,) or (n_atoms, 3, 3)
        Isotropic charges or full tensors, units of e.
    volume_pm3 : float
        Cell volume.

    Returns
    -------
    ndarray, shape (3,)
        Polarization in C/m^2.

    Warns
    -----
    UserWarning
        When the charges break the acoustic sum rule (``sum_i Z*_i != 0``) by
        more than `sum_rule_tolerance`: P then changes under a rigid shift of
        the whole cell.
    """
    u = np.asarray(displacements_pm, float)
    z = np.asarray(born_charges, float)
    if u.ndim != 2 or u.shape[1] != 3:
        raise ValueError(f"`displacements_pm` must have shape (n_atoms, 3), got {u.shape}")
    if z.shape == (u.shape[0],):
        z = z[:, None, None] * np.eye(3)
    if z.shape != (u.shape[0], 3, 3):
        raise ValueError(f"`born_charges` must be ({u.shape[0]},) or ({u.shape[0]}, 3, 3), "
                         f"got {z.shape}")
    if not volume_pm3 > 0:
        raise ValueError(f"`volume_pm3` must be positive, got {volume_pm3!r}")
    total = z.sum(axis=0)
    if np.max(np.abs(total)) > sum_rule_tolerance:
        warnings.warn(f"Born charges break the acoustic sum rule (sum of Z* = "
                      f"{np.round(np.diag(total), 4).tolist()}); the estimate depends on the "
                      "choice of origin", UserWarning, stacklevel=2)
    return _E_PER_PM2_C_PER_M2 / float(volume_pm3) * np.einsum("iab,ib->a", z, u)
