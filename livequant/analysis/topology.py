"""Topological charge of the in-plane displacement field.

Winding number of a plaquette with corners ``c1..c4`` taken counter-clockwise
(project check values, section 10):

    w = (1 / 2 pi) sum_k wrap(theta_{k+1} - theta_k),   wrap in (-pi, pi]

with ``theta = atan2(u_y, u_x)``.  A vortex (either circulation) and a source
or sink wind +1; a saddle -- the antivortex -- winds -1.  The circulation
sense (chirality) is a separate property: it is reported apart from the
winding number, from the line integral of the tangential component around the
plaquette, and the flux through it tells a circulating core from a diverging
one.

Frames: the plaquette ``(i, j) -> (i+1, j) -> (i+1, j+1) -> (i, j+1)`` runs
from ``a`` to ``b``, which is counter-clockwise in the (x, y) = (col, row)
frame when the basis is right-handed there (as :class:`Lattice` promises);
``handedness=-1`` handles the other case.  ``chirality = +1`` means
counter-clockwise circulation in the (x, y) = (col, row) frame, which on a
screen with row 0 at the top looks clockwise.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["winding_numbers", "Core", "find_cores"]


def _wrap(delta):
    """Wrap angles to (-pi, pi]."""
    return np.pi - np.mod(np.pi - delta, 2.0 * np.pi)


def _corners(field, periodic):
    """The four plaquette corners of a (ni, nj, ...) grid, counter-clockwise."""
    if periodic:
        return (field, np.roll(field, -1, axis=0), np.roll(np.roll(field, -1, axis=0), -1, axis=1),
                np.roll(field, -1, axis=1))
    return field[:-1, :-1], field[1:, :-1], field[1:, 1:], field[:-1, 1:]


def winding_numbers(ux, uy, *, valid=None, periodic=False, handedness=1) -> np.ndarray:
    """Winding number of every plaquette of a gridded vector field.

    Parameters
    ----------
    ux, uy : array_like, shape (ni, nj)
        Field components on the cell grid (index i along ``a``, j along ``b``).
    valid : array_like of bool, shape (ni, nj), optional
        Cells whose direction is trustworthy (e.g. ``|u|`` several sigmas);
        NaN components count as invalid too.
    periodic : bool
        Wrap around both edges (a torus), giving ``ni x nj`` plaquettes whose
        windings sum to zero.
    handedness : {1, -1}
        +1 when ``a x b > 0`` in the frame where the angles are measured.

    Returns
    -------
    ndarray of float, shape (ni - 1, nj - 1) (or (ni, nj) if periodic)
        Integer-valued; NaN for a plaquette with any invalid corner.

    Examples
    --------
    >>> y, x = np.mgrid[-2:2, -2:2] + 0.5
    >>> float(winding_numbers(-y.T, x.T)[1, 1])   # counter-clockwise vortex, i along x
    1.0
    """
    ux = np.asarray(ux, float)
    uy = np.asarray(uy, float)
    if ux.shape != uy.shape or ux.ndim != 2:
        raise ValueError(f"`ux` and `uy` must be 2D arrays of one shape, got {ux.shape}, {uy.shape}")
    if handedness not in (1, -1):
        raise ValueError(f"`handedness` must be +1 or -1, got {handedness!r}")
    ok = np.isfinite(ux) & np.isfinite(uy) & ((ux != 0) | (uy != 0))
    if valid is not None:
        ok &= np.asarray(valid, bool)
    theta = np.arctan2(uy, ux)
    c = _corners(theta, periodic)
    total = sum(_wrap(c[(k + 1) % 4] - c[k]) for k in range(4))
    w = np.round(total / (2.0 * np.pi)) * handedness
    good = np.logical_and.reduce(_corners(ok, periodic))
    return np.where(good, w, np.nan)


@dataclass(frozen=True)
class Core:
    """A plaquette with non-zero winding.

    ``i, j``: cell index of its first corner; ``x_pm, y_pm``: its centre;
    ``kind``: "vortex", "source", "sink", "antivortex" or "higher-order";
    ``chirality``: +1 counter-clockwise / -1 clockwise in the (x, y) = (col,
    row) frame, 0 when the core is not circulating; ``circulation_pm2`` and
    ``flux_pm2``: line integrals of the tangential and outward components of
    ``u`` around the plaquette.
    """

    i: int
    j: int
    x_pm: float
    y_pm: float
    winding: int
    kind: str
    chirality: int
    circulation_pm2: float
    flux_pm2: float

    def to_json(self) -> dict:
        return {"i": self.i, "j": self.j, "x_pm": self.x_pm, "y_pm": self.y_pm,
                "winding": self.winding, "kind": self.kind, "chirality": self.chirality,
                "circulation_pm2": self.circulation_pm2, "flux_pm2": self.flux_pm2}


def find_cores(x_pm, y_pm, ux, uy, *, i0=0, j0=0, valid=None, handedness=1):
    """Locate and classify every plaquette with non-zero winding.

    Parameters
    ----------
    x_pm, y_pm : array_like, shape (ni, nj)
        Cell centres on the grid (NaN where no cell).
    ux, uy : array_like, shape (ni, nj)
        The in-plane displacement field.
    i0, j0 : int
        Cell index of grid element [0, 0].
    valid, handedness
        As for :func:`winding_numbers`.

    Returns
    -------
    windings : ndarray, shape (ni - 1, nj - 1)
    cores : list of Core
    """
    w = winding_numbers(ux, uy, valid=valid, handedness=handedness)
    hit = np.argwhere(np.isfinite(w) & (w != 0))
    if hit.size == 0:
        return w, []
    xs, ys = (np.asarray(v, float) for v in (x_pm, y_pm))
    r = np.stack([xs, ys], axis=-1)
    u = np.stack([np.asarray(ux, float), np.asarray(uy, float)], axis=-1)
    rc = [c[hit[:, 0], hit[:, 1]] for c in _corners(r, False)]
    uc = [c[hit[:, 0], hit[:, 1]] for c in _corners(u, False)]
    circ = np.zeros(len(hit))
    flux = np.zeros(len(hit))
    for k in range(4):
        edge = rc[(k + 1) % 4] - rc[k]
        umid = (uc[(k + 1) % 4] + uc[k]) / 2.0
        circ += np.sum(umid * edge, axis=1)
        # Outward normal of a counter-clockwise loop: the edge turned by -90 degrees.
        flux += umid[:, 0] * edge[:, 1] - umid[:, 1] * edge[:, 0]
    circ *= handedness
    flux *= handedness
    centre = sum(rc) / 4.0
    cores = []
    for n, (a, b) in enumerate(hit):
        wn = int(w[a, b])
        if wn == 1:
            if abs(circ[n]) >= abs(flux[n]):
                kind, chir = "vortex", int(np.sign(circ[n]))
            else:
                kind, chir = ("source" if flux[n] > 0 else "sink"), 0
        elif wn == -1:
            kind, chir = "antivortex", 0
        else:
            kind, chir = "higher-order", 0
        cores.append(Core(i=int(a + i0), j=int(b + j0), x_pm=float(centre[n, 0]),
                          y_pm=float(centre[n, 1]), winding=wn, kind=kind, chirality=chir,
                          circulation_pm2=float(circ[n]), flux_pm2=float(flux[n])))
    return w, cores
