"""Column profiles measured on the frame itself: the tails a Gaussian misses.

A STEM probe is not a Gaussian.  An aberration-corrected probe has an Airy
core whose intensity tails fall off as r^-3, and channelling through a thick
specimen spreads each column further; a heavy column therefore reaches into
its light neighbours' fit windows far more than its fitted Gaussian says.  A
light B column displaced towards one side of its heavy A cage then sits on an
asymmetric slope of A tails and is pulled further that way: its displacement
reads too large on both signs.

This module measures the missing part of every column's profile from the
frame: after the Gaussian fits, the residual image

    R(r) = I(r) - sum_k A_k G_k(r)

is modelled as a constant plus one radial *halo* per sublattice, scaled by
each column's fitted amplitude,

    R(r) ~ B0 + sum_k A_k h_{s(k)}(|r - mu_k|),   h_s(rho_max) = 0,

with h on a grid of radii joined by linear interpolation (hat functions).
That is a linear least-squares problem in the node values, solved once per
frame with a light second-difference penalty -- the same linear
deconvolution by which a point-spread function is estimated in a crowded
field.  The refinement then subtracts every neighbour's Gaussian *and* halo
before it refits a column (:func:`livequant.analysis.refine.refine_columns`
with ``profile="halo"``).  A column's own halo is not subtracted: it is
symmetric about the column, so it cannot move the fitted centre.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

__all__ = ["Halo", "estimate_halo", "estimate_tail", "render_halos", "halo_in_windows"]


@dataclass(frozen=True)
class Halo:
    """Radial halo profiles, per unit column amplitude.

    Attributes
    ----------
    values : (S, n_nodes) array
        ``h_s`` at radii ``0, bin_px, 2 bin_px, ...``; the last node is 0.
    bin_px : float
    labels : tuple of str
        The sublattice of each row of `values`.
    background : float
        The constant ``B0`` of the residual model, counts.
    n_pixels : int
        Pixels used in the estimate.
    """

    values: np.ndarray
    bin_px: float
    labels: tuple
    background: float
    n_pixels: int
    model: dict = None

    @property
    def rho_max_px(self) -> float:
        return self.bin_px * (self.values.shape[1] - 1)

    def summary(self) -> dict:
        """JSON-ready: radii and each sublattice's halo relative to its column."""
        return {"rho_max_px": self.rho_max_px, "bin_px": self.bin_px, "model": self.model,
                "background": self.background, "n_pixels": self.n_pixels,
                "halo_at_origin": {lab: float(v[0]) for lab, v in zip(self.labels, self.values)}}


def _pixel_selection(shape, max_pixels):
    """Index map: -1 outside the pixels used, else their running number.

    Small frames use every pixel; larger ones four blocks at the quarter points
    (the profile is a property of the probe and specimen, the same everywhere).
    """
    h, w = shape
    index = np.full(shape, -1, dtype=np.int64)
    if h * w <= max_pixels:
        index[:] = np.arange(h * w).reshape(shape)
        return index, h * w
    side = int(math.sqrt(max_pixels / 4))
    n = 0
    for fr in (0.25, 0.75):
        for fc in (0.25, 0.75):
            r0 = int(np.clip(fr * h - side / 2, 0, max(h - side, 0)))
            c0 = int(np.clip(fc * w - side / 2, 0, max(w - side, 0)))
            block = index[r0:r0 + side, c0:c0 + side]
            free = block < 0
            k = int(free.sum())
            block[free] = n + np.arange(k)
            n += k
    return index, n


@njit(cache=True)
def _count_entries(index, pos, amp, ok, rho_max):
    h, w = index.shape
    rc = int(math.ceil(rho_max))
    n = 0
    for k in range(pos.shape[0]):
        if not ok[k]:
            continue
        r0 = int(round(pos[k, 0]))
        c0 = int(round(pos[k, 1]))
        for r in range(max(r0 - rc, 0), min(r0 + rc + 1, h)):
            for c in range(max(c0 - rc, 0), min(c0 + rc + 1, w)):
                if index[r, c] < 0:
                    continue
                if math.hypot(r - pos[k, 0], c - pos[k, 1]) < rho_max:
                    n += 2
    return n


@njit(cache=True)
def _fill_entries(index, pos, amp, ok, label, n_free, bin_px, rho_max, rows, cols, vals):
    h, w = index.shape
    rc = int(math.ceil(rho_max))
    n = 0
    for k in range(pos.shape[0]):
        if not ok[k]:
            continue
        r0 = int(round(pos[k, 0]))
        c0 = int(round(pos[k, 1]))
        base = label[k] * n_free
        for r in range(max(r0 - rc, 0), min(r0 + rc + 1, h)):
            for c in range(max(c0 - rc, 0), min(c0 + rc + 1, w)):
                p = index[r, c]
                if p < 0:
                    continue
                rho = math.hypot(r - pos[k, 0], c - pos[k, 1])
                if rho >= rho_max:
                    continue
                x = rho / bin_px
                b = int(x)
                t = x - b
                rows[n] = p
                cols[n] = base + b
                vals[n] = amp[k] * (1.0 - t)
                n += 1
                rows[n] = p
                # the node past the last free one is fixed at zero: point the
                # entry at the same unknown with zero weight
                cols[n] = base + min(b + 1, n_free - 1)
                vals[n] = amp[k] * t if b + 1 < n_free else 0.0
                n += 1
    return n


def estimate_halo(residual, positions_px, amplitude, label_index, labels, *, rho_max_px,
                  bin_px=1.0, max_pixels=160_000, smoothness=1e-3) -> Halo | None:
    """Fit ``R(r) = B0 + sum_k A_k h_{s(k)}(|r - mu_k|)`` by linear least squares.

    Parameters
    ----------
    residual : (H, W) array
        The image minus every column's fitted Gaussian.
    positions_px : (K, 2) array
        Column centres (row, col); non-finite rows are skipped.
    amplitude : (K,) array
        Fitted peak heights (the halo scales with them).
    label_index : (K,) int
        Row of `labels` each column belongs to.
    labels : sequence of str
    rho_max_px : float
        Radius beyond which the halo is taken as zero (its far tail becomes
        part of the constant background).
    bin_px : float
        Node spacing of the radial grid.
    max_pixels : int
        Pixels used at most (larger frames use four blocks).
    smoothness : float
        Weight of the second-difference penalty, relative to the mean diagonal
        of the normal matrix.

    Returns
    -------
    Halo or None
        None when too few columns or pixels take part.
    """
    from scipy import sparse

    residual = np.ascontiguousarray(residual, dtype=np.float64)
    pos = np.ascontiguousarray(positions_px, dtype=np.float64)
    amp = np.ascontiguousarray(amplitude, dtype=np.float64)
    lab = np.ascontiguousarray(label_index, dtype=np.int64)
    ok = np.isfinite(pos).all(axis=1) & np.isfinite(amp) & (amp != 0)
    n_lab = len(labels)
    n_free = int(math.floor(rho_max_px / bin_px))
    if ok.sum() < 8 or n_free < 3:
        return None
    rho_max = n_free * bin_px
    index, n_pix = _pixel_selection(residual.shape, max_pixels)
    n_entries = _count_entries(index, pos, amp, ok, rho_max)
    rows = np.empty(n_entries, np.int64)
    cols = np.empty(n_entries, np.int64)
    vals = np.empty(n_entries)
    _fill_entries(index, pos, amp, ok, lab, n_free, float(bin_px), rho_max, rows, cols, vals)
    n_unk = n_lab * n_free + 1
    X = sparse.csr_matrix((vals, (rows, cols)), shape=(n_pix, n_unk - 1))
    y = np.empty(n_pix)
    sel = index >= 0
    y[index[sel]] = residual[sel]
    XtX = np.zeros((n_unk, n_unk))
    XtX[:-1, :-1] = (X.T @ X).toarray()
    ones_col = np.asarray(X.sum(axis=0)).ravel()
    XtX[:-1, -1] = ones_col
    XtX[-1, :-1] = ones_col
    XtX[-1, -1] = n_pix
    Xty = np.empty(n_unk)
    Xty[:-1] = X.T @ y
    Xty[-1] = y.sum()
    # second differences inside each sublattice's profile (the last, fixed
    # node included as zero) keep unsampled radii from ringing
    D = np.zeros((n_lab * n_free, n_unk))
    for s in range(n_lab):
        for b in range(n_free):
            row = s * n_free + b
            for off, wgt in ((-1, 1.0), (0, -2.0), (1, 1.0)):
                nb = b + off
                if 0 <= nb < n_free:
                    D[row, s * n_free + nb] += wgt
    diag = np.diag(XtX)[:-1]
    used = diag > 0
    if used.sum() < 3:
        return None
    lam = smoothness * float(np.mean(diag[used]))
    M = XtX + lam * (D.T @ D)
    # radii no pixel saw (outside the frame, for example) are pinned to zero
    M[np.arange(n_unk - 1)[~used], np.arange(n_unk - 1)[~used]] += max(lam, 1.0)
    try:
        sol = np.linalg.solve(M, Xty)
    except np.linalg.LinAlgError:
        return None
    values = np.zeros((n_lab, n_free + 1))
    values[:, :n_free] = sol[:-1].reshape(n_lab, n_free)
    return Halo(values=values, bin_px=float(bin_px), labels=tuple(str(v) for v in labels),
                background=float(sol[-1]), n_pixels=int(n_pix))


@njit(cache=True)
def _render(pos, amp, ok, label, table, bin_px, out):
    h, w = out.shape
    n_nodes = table.shape[1]
    rho_max = bin_px * (n_nodes - 1)
    rc = int(math.ceil(rho_max))
    for k in range(pos.shape[0]):
        if not ok[k]:
            continue
        r0 = int(round(pos[k, 0]))
        c0 = int(round(pos[k, 1]))
        s = label[k]
        for r in range(max(r0 - rc, 0), min(r0 + rc + 1, h)):
            for c in range(max(c0 - rc, 0), min(c0 + rc + 1, w)):
                rho = math.hypot(r - pos[k, 0], c - pos[k, 1])
                if rho >= rho_max:
                    continue
                x = rho / bin_px
                b = int(x)
                t = x - b
                out[r, c] += amp[k] * ((1.0 - t) * table[s, b] + t * table[s, b + 1])


def render_halos(halo: Halo, positions_px, amplitude, label_index, out):
    """Add ``A_k h_{s(k)}(|r - mu_k|)`` of every column into `out` (in place)."""
    pos = np.ascontiguousarray(positions_px, dtype=np.float64)
    amp = np.ascontiguousarray(amplitude, dtype=np.float64)
    ok = np.isfinite(pos).all(axis=1) & np.isfinite(amp)
    _render(pos, amp, ok, np.ascontiguousarray(label_index, dtype=np.int64),
            np.ascontiguousarray(halo.values), float(halo.bin_px), out)
    return out


def halo_in_windows(halo: Halo, positions_px, amplitude, label_index, rows, cols):
    """Each column's own halo at its window pixels ``(rows, cols)`` (K, P)."""
    rho = np.hypot(rows - positions_px[:, 0:1], cols - positions_px[:, 1:2])
    x = rho / halo.bin_px
    b = np.minimum(x.astype(np.int64), halo.values.shape[1] - 2)
    t = np.clip(x - b, 0.0, 1.0)
    tab = halo.values[np.asarray(label_index, dtype=np.int64)]
    v0 = np.take_along_axis(tab, b, axis=1)
    v1 = np.take_along_axis(tab, b + 1, axis=1)
    val = (1 - t) * v0 + t * v1
    val[x >= halo.values.shape[1] - 1] = 0.0
    return amplitude[:, None] * val


def _moffat_table(rho0_px, beta, n_nodes, bin_px, inner_px):
    """A Moffat tail ``(1 + (rho / rho0)^2)^-beta`` on the node radii, faded in
    from zero over ``[inner/2, inner]`` (inside a column's own window its
    fitted Gaussian already holds the signal)."""
    rho = np.arange(n_nodes) * bin_px
    m = (1.0 + (rho / rho0_px) ** 2) ** (-beta)
    fade = np.clip((rho - 0.5 * inner_px) / (0.5 * inner_px), 0.0, 1.0)
    m = m * fade
    m[-1] = 0.0
    return m


def estimate_tail(residual, positions_px, volume, *, window_px, rho_max_px, max_gap_px,
                  edge_margin_px=0.0, extra_images=(),
                  rho0_grid_px=(1.0, 2.0, 3.0, 5.0, 8.0), beta_grid=(1.0, 1.25, 1.5, 2.0, 3.0),
                  bin_px=1.0) -> Halo | None:
    """Fit one parametric tail to the residual between the columns.

    Model, on the pixels farther than `window_px` from every column (where the
    residual is made of tails only):

        R(r) ~ B0 + c sum_k V_k M(|r - mu_k|) + sum_m a_m E_m(r)

    with ``M`` a Moffat profile (Moffat, Astron. Astrophys. 3, 455 (1969); the
    usual model of a probe's or telescope's long-tailed point-spread function)
    whose scale ``rho0`` and power ``beta`` are chosen on a grid, ``V_k`` the
    column's integrated intensity, and ``E_m`` optional extra images with
    linear amplitudes (e.g. unfitted oxygen columns).  One tail shape for every
    column: the probe's.  A free profile per sublattice is not identifiable on
    a lattice (a ring of one sublattice's profile through the other's sites
    fits as well), a parametric one is.

    Returns a :class:`Halo` holding ``c M`` (per unit volume) and, in
    ``Halo.extra_amplitudes``, the ``a_m``; None when it cannot be fitted.
    """
    residual = np.ascontiguousarray(residual, dtype=np.float64)
    pos = np.ascontiguousarray(positions_px, dtype=np.float64)
    vol = np.ascontiguousarray(volume, dtype=np.float64)
    ok = np.isfinite(pos).all(axis=1) & np.isfinite(vol)
    n_nodes = int(math.floor(rho_max_px / bin_px)) + 1
    if ok.sum() < 8 or n_nodes < 4:
        return None
    # pixels outside every window, but no farther from a fitted column than
    # `max_gap_px`: a column that was not fitted (at the frame's border, or
    # missed) must not pass for a tail
    from scipy import ndimage

    def distance_to(sel):
        marks = np.ones(residual.shape, bool)
        ctr = np.rint(pos[sel]).astype(np.int64)
        inside = ((ctr >= 0) & (ctr < np.array(residual.shape))).all(axis=1)
        marks[ctr[inside, 0], ctr[inside, 1]] = False
        return ndimage.distance_transform_edt(marks)

    fitted = ok & (vol != 0)
    dist = distance_to(fitted)
    between = (dist > window_px + 1.0) & (dist < max_gap_px)
    if (ok & ~fitted).any():  # columns whose fit failed: their signal is unmodelled
        between &= distance_to(ok & ~fitted) > max_gap_px
    # columns near the frame's edge are not fitted at all
    m = int(math.ceil(edge_margin_px))
    if m > 0:
        between[:m] = between[-m:] = False
        between[:, :m] = between[:, -m:] = False
    n_between = int(between.sum())
    if n_between < 100:
        return None
    y = residual[between]
    extras = [np.asarray(e, float)[between] for e in extra_images]
    best = None
    for rho0 in rho0_grid_px:
        for beta in beta_grid:
            table = _moffat_table(rho0, beta, n_nodes, bin_px, window_px)[None, :]
            tail = np.zeros(residual.shape)
            _render(pos, vol, ok, np.zeros(len(pos), np.int64), table, float(bin_px), tail)
            X = np.column_stack([np.ones(n_between), tail[between], *extras])
            coef, *_ = np.linalg.lstsq(X, y, rcond=None)
            ss = float(np.sum((y - X @ coef) ** 2))
            if best is None or ss < best[0]:
                best = (ss, rho0, beta, coef, table)
    ss, rho0, beta, coef, table = best
    halo = Halo(values=coef[1] * table, bin_px=float(bin_px), labels=("all",),
                background=float(coef[0]), n_pixels=n_between)
    object.__setattr__(halo, "model", {"kind": "moffat", "rho0_px": rho0, "beta": beta,
                                       "scale": float(coef[1]),
                                       "extra_amplitudes": [float(v) for v in coef[2:]]})
    return halo
