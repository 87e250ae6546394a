"""Batched refinement of atomic columns: 2D Gaussian plus local background.

Every column is fitted in its own circular window, all columns at once: the
parameters form a ``(K, P)`` array and each Levenberg-Marquardt iteration is a
handful of array operations and one batched ``P x P`` solve, never a Python
loop over columns.

Model of column ``k`` at pixel ``r`` (row, col)::

    m_k(r) = B_k + A_k exp(-1/2 (r - mu_k)^T Q_k (r - mu_k)),   Q_k = [[p, q], [q, s]]

With Poisson weights (variance = model, times the detector gain) the
iteration is Fisher scoring, whose fixed point is the Poisson maximum-
likelihood estimate, and ``(J^T W J)^-1`` at that point is the inverse Fisher
information: the Cramér-Rao bound of the model (Van Aert, den Dekker, van den
Bos & Van Dyck, IEEE Trans. Instrum. Meas. 51, 611 (2002)).

Neighbour overlap: after a first pass, every column's fitted Gaussian is
rendered into one image and each column is refitted against the data minus
its neighbours' Gaussians, so a dim B column beside bright A columns is not
pulled toward them.
"""

from __future__ import annotations

import numpy as np

from livequant.analysis import _kernels
from livequant.analysis.types import Columns, readonly

__all__ = ["refine_columns", "FitWindows", "extract_windows", "gaussian_model"]

_CHUNK = 4096  # columns per batch: bounds the per-pixel weight and model arrays


class FitWindows:
    """Pixel windows around columns: ``(K, P)`` arrays of coordinates, data and mask."""

    def __init__(self, rows, cols, flat, data, valid, radius_px, centres=None, offsets=None):
        self.centres = centres      # (K, 2) integer window centres
        self.offsets = offsets      # (2, P) pixel offsets shared by every window
        self.rows = rows
        self.cols = cols
        self.flat = flat
        self.data = data
        self.valid = valid
        self.radius_px = radius_px

    def take(self, idx) -> "FitWindows":
        """The windows of columns `idx`."""
        return FitWindows(self.rows[idx], self.cols[idx], self.flat[idx], self.data[idx],
                          self.valid[idx], self.radius_px, centres=self.centres[idx],
                          offsets=self.offsets)


def extract_windows(image, centres_px, radius_px) -> FitWindows:
    """Circular windows of `radius_px` around the rounded `centres_px`."""
    h, w = image.shape
    rc = int(np.ceil(radius_px))
    off = np.arange(-rc, rc + 1)
    orow, ocol = np.meshgrid(off, off, indexing="ij")
    disk = (orow**2 + ocol**2) <= radius_px**2 + 1e-9
    orow, ocol = orow[disk], ocol[disk]
    ctr = np.rint(centres_px).astype(np.int64)
    rows = ctr[:, 0, None] + orow[None, :]
    cols = ctr[:, 1, None] + ocol[None, :]
    valid = (rows >= 0) & (rows < h) & (cols >= 0) & (cols < w)
    rows_c = np.clip(rows, 0, h - 1)
    cols_c = np.clip(cols, 0, w - 1)
    flat = rows_c * w + cols_c
    data = image.ravel()[flat]
    return FitWindows(rows.astype(float), cols.astype(float), flat, data, valid, radius_px,
                      centres=ctr, offsets=np.stack([orow, ocol]))


def gaussian_model(theta, rows, cols, *, elliptical=True, jacobian=False):
    """Evaluate the column model (and its Jacobian) for a batch.

    theta : (K, 7) [mu_r, mu_c, A, B, p, q, s] if elliptical else (K, 5) [mu_r, mu_c, A, B, p]
    rows, cols : (K, P) pixel coordinates
    Returns m (K, P) and, with `jacobian`, J (K, n_params, P) (parameter-major,
    which makes the batched ``J W J^T`` products contiguous); the Gaussian part
    ``A * G`` is returned too so neighbours can be rendered.
    """
    dr = rows - theta[:, 0:1]
    dc = cols - theta[:, 1:2]
    A = theta[:, 2:3]
    B = theta[:, 3:4]
    p = theta[:, 4:5]
    if elliptical:
        q = theta[:, 5:6]
        s = theta[:, 6:7]
    else:
        q = 0.0
        s = p
    E = -0.5 * (p * dr * dr + 2.0 * q * dr * dc + s * dc * dc)
    G = np.exp(E)
    AG = A * G
    m = B + AG
    if not jacobian:
        return m, AG, None
    n_par = theta.shape[1]
    J = np.empty((m.shape[0], n_par, m.shape[1]))
    J[:, 0] = AG * (p * dr + q * dc)
    J[:, 1] = AG * (q * dr + s * dc)
    J[:, 2] = G
    J[:, 3] = 1.0
    if elliptical:
        J[:, 4] = AG * (-0.5 * dr * dr)
        J[:, 5] = AG * (-dr * dc)
        J[:, 6] = AG * (-0.5 * dc * dc)
    else:
        J[:, 4] = AG * (-0.5 * (dr * dr + dc * dc))
    return m, AG, J


def refine_columns(image, positions_px, *, sublattice=None, ij=None, spacing_px, window_fraction=0.3,
                   max_iterations=30, tolerance_px=1e-4, elliptical=True, joint_neighbours=True,
                   weighting="poisson", gain=1.0, neighbour_passes=2) -> Columns:
    """Fit every column with a 2D Gaussian plus a constant local background.

    Parameters
    ----------
    image : (H, W) array
        Detector counts (Poisson weighting assumes counts = gain x electrons).
    positions_px : (N, 2) array
        Starting (row, col) of each column.
    sublattice : (N,) str, optional
        Labels carried into the result (default all ``"A"``); widths are
        initialised per sublattice.
    ij : (N, 2) int, optional
        Cell indices carried into the result.
    spacing_px : float
        The shorter lattice spacing; the fit window radius is
        ``window_fraction * spacing_px``.
    window_fraction : float
    max_iterations : int
    tolerance_px : float
        Converged when an accepted step moves the centre less than this.
    elliptical : bool
        Fit an elliptical Gaussian (7 parameters) instead of a round one (5).
    joint_neighbours : bool
        Refit each column against the data minus its neighbours' fitted
        Gaussians (`neighbour_passes` times).
    weighting : {"poisson", "uniform"}
    gain : float
        Detector counts per electron, used for the Poisson variance.  The
        reported uncertainties are further scaled by the frame's median
        reduced chi-square, so a wrong gain does not make them wrong.

    Returns
    -------
    Columns
        Failed fits keep their starting position, ``converged=False`` and NaN
        uncertainties; they never raise.
    """
    image = np.asarray(image, dtype=np.float64)
    pos0 = np.atleast_2d(np.asarray(positions_px, dtype=np.float64))
    n = len(pos0)
    if weighting not in ("poisson", "uniform"):
        raise ValueError(f"`weighting` must be 'poisson' or 'uniform', got {weighting!r}")
    if not spacing_px > 0:
        raise ValueError(f"`spacing_px` must be > 0, got {spacing_px}")
    sublattice = np.full(n, "A") if sublattice is None else np.asarray(sublattice)
    ij = np.zeros((n, 2), int) if ij is None else np.asarray(ij)
    if n == 0:
        return _empty_columns()
    radius = max(2.0, window_fraction * spacing_px)
    win = extract_windows(image, pos0, radius)
    theta = _initial_theta(win, pos0, sublattice, elliptical)

    others = np.zeros_like(win.data)
    passes = 1 + (neighbour_passes if joint_neighbours and n > 1 else 0)
    render = None
    theta, state = _fit_batched(theta, win, others, elliptical=elliptical,
                                max_iterations=max_iterations, tolerance_px=tolerance_px,
                                weighting=weighting, gain=gain, start=pos0)
    for _ in range(passes - 1):
        if not _neighbours_reach(theta, radius, gain, elliptical).any():
            break
        if render is None:
            render = extract_windows(image, pos0, _render_radius(theta, radius, spacing_px,
                                                                 elliptical))
        others = _neighbour_contribution(theta, win, render, image.shape, elliptical)
        # Refit only the columns whose neighbours reach into their window by more
        # than a tenth of the local noise somewhere: for well-separated columns
        # the second pass would change nothing but cost as much as the first.
        noise = np.sqrt(np.maximum(np.abs(win.data), 1.0) * gain)
        touched = (np.abs(others) * win.valid > 0.1 * noise).any(axis=1)
        if not touched.any():
            break
        sub = np.nonzero(touched)[0]
        th_sub, st_sub = _fit_batched(theta[sub], win.take(sub), others[sub],
                                      elliptical=elliptical, max_iterations=max_iterations,
                                      tolerance_px=tolerance_px, weighting=weighting, gain=gain,
                                      start=pos0[sub])
        theta[sub] = th_sub
        for key in state:
            state[key][sub] = st_sub[key]
    return _to_columns(theta, state, win, others, pos0, sublattice, ij, elliptical, weighting,
                       gain)


def _empty_columns() -> Columns:
    z2, z1 = np.zeros((0, 2)), np.zeros(0)
    return Columns(positions_px=readonly(z2), sigma_positions_px=readonly(z2),
                   amplitude=readonly(z1), sigma_amplitude=readonly(z1), width_px=readonly(z2),
                   width_angle_deg=readonly(z1), background=readonly(z1),
                   sublattice=readonly(np.zeros(0, "<U2")), ij=readonly(np.zeros((0, 2), int)),
                   converged=readonly(np.zeros(0, bool)), reduced_chi2=readonly(z1),
                   message="no columns")


def _initial_theta(win: FitWindows, pos0, sublattice, elliptical):
    off_r, off_c = win.offsets
    r2_off = off_r.astype(float) ** 2 + off_c.astype(float) ** 2
    # background: lower quartile of the outer ring (robust to a neighbour's tail);
    # pixels outside the frame are pushed to the top so they never count
    outer = np.nonzero(r2_off > (0.7 * win.radius_px) ** 2)[0]
    ring = np.where(win.valid[:, outer], win.data[:, outer], np.inf)
    kth = max(0, len(outer) // 4)
    B0 = np.partition(ring, kth, axis=1)[:, kth]
    B0 = np.where(np.isfinite(B0), B0, np.median(win.data))
    centre = np.nonzero(r2_off <= 1.0)[0]
    peak = (win.data[:, centre] * win.valid[:, centre]).sum(1) / np.maximum(
        win.valid[:, centre].sum(1), 1)
    A0 = peak - B0
    # width from the second moment of the background-subtracted window, then the
    # median per sublattice (a single window's moment is too noisy to start from)
    wgt = np.clip((win.data - B0[:, None]) * np.sign(A0)[:, None], 0, None) * win.valid
    sub = pos0 - win.centres
    dr = off_r[None, :] - sub[:, 0:1]
    dc = off_c[None, :] - sub[:, 1:2]
    with np.errstate(all="ignore"):
        var = (wgt * (dr**2 + dc**2)).sum(1) / (2.0 * wgt.sum(1))
    var = np.where(np.isfinite(var) & (var > 0), var, (win.radius_px / 3) ** 2)
    # moments inside a truncated window underestimate; clamp to a sane range
    var = np.clip(var, 0.25, (win.radius_px / 1.5) ** 2)
    labels, inverse = np.unique(sublattice, return_inverse=True)
    for k in range(len(labels)):  # a handful of sublattices, not columns
        sel = inverse == k
        var[sel] = np.median(var[sel])
    p0 = 1.0 / var
    cols = [pos0[:, 0], pos0[:, 1], A0, B0, p0]
    if elliptical:
        cols += [np.zeros_like(p0), p0]
    return np.stack(cols, axis=1)


def _weights(m_total, weighting, gain, floor):
    if weighting == "uniform":
        return np.ones_like(m_total)
    return 1.0 / (gain * np.maximum(m_total, floor))


def _variance_floor(win: FitWindows) -> float:
    """Smallest model value used as a Poisson variance: a thousandth of the typical
    pixel (a subsample is as good as all pixels for a median)."""
    return max(1e-6, 1e-3 * float(np.median(np.abs(win.data[:, ::5]))))


def _fit_batched(theta, win, others, *, elliptical, max_iterations, tolerance_px, weighting, gain,
                 start):
    """Levenberg-Marquardt over all columns, in chunks to bound memory."""
    n = len(theta)
    out = theta.copy()
    state = {"converged": np.zeros(n, bool), "iterations": np.zeros(n, int),
             "H": np.zeros((n, theta.shape[1], theta.shape[1])),
             "model": np.zeros_like(win.data)}
    floor = _variance_floor(win)
    for lo in range(0, n, _CHUNK):
        sl = slice(lo, min(n, lo + _CHUNK))
        th, conv, it, H, m = _lm_chunk(theta[sl].copy(), win.centres[sl], win.offsets, win.data[sl],
                                    win.valid[sl], others[sl], start[sl], win.radius_px,
                                    elliptical=elliptical, max_iterations=max_iterations,
                                    tolerance_px=tolerance_px, weighting=weighting, gain=gain,
                                    floor=floor)
        out[sl] = th
        state["converged"][sl] = conv
        state["iterations"][sl] = it
        state["H"][sl] = H
        state["model"][sl] = m
    return out, state


def _physical(theta, start, radius, sign0, elliptical):
    ok = np.all(np.isfinite(theta), axis=1)
    ok &= np.sign(theta[:, 2]) == sign0
    ok &= theta[:, 4] > 0
    if elliptical:
        ok &= (theta[:, 6] > 0) & (theta[:, 4] * theta[:, 6] - theta[:, 5] ** 2 > 0)
        tr, det = theta[:, 4] + theta[:, 6], theta[:, 4] * theta[:, 6] - theta[:, 5] ** 2
        lam_min = tr / 2 - np.sqrt(np.maximum(tr**2 / 4 - det, 0))
    else:
        lam_min = theta[:, 4]
    # a Gaussian wider than the fit window is background, not a column
    ok &= lam_min > 1.0 / radius**2
    ok &= np.hypot(theta[:, 0] - start[:, 0], theta[:, 1] - start[:, 1]) < 0.5 * radius
    # widths narrower than a tenth of a pixel are not columns
    ok &= theta[:, 4] < 100.0
    return ok


def _lm_chunk(theta, centres, offsets, data, valid, others, start, radius, *, elliptical,
              max_iterations, tolerance_px, weighting, gain, floor):
    k, n_par = theta.shape
    cen = np.ascontiguousarray(centres, dtype=np.float64)
    off_r = np.ascontiguousarray(offsets[0], dtype=np.float64)
    off_c = np.ascontiguousarray(offsets[1], dtype=np.float64)
    data = np.ascontiguousarray(data, dtype=np.float64)
    others = np.ascontiguousarray(others, dtype=np.float64)
    valid = np.ascontiguousarray(valid, dtype=np.bool_)
    uniform = weighting == "uniform"
    W = np.zeros_like(data)
    M = np.zeros_like(data)
    sign0 = np.sign(theta[:, 2])
    sign0[sign0 == 0] = 1.0
    theta[:, 2] = np.where(theta[:, 2] == 0, sign0, theta[:, 2])
    lam = np.full(k, 1e-3)
    active = np.ones(k, bool)
    converged = np.zeros(k, bool)
    iterations = np.zeros(k, int)
    eye = np.eye(n_par)

    def equations(idx):
        H = np.empty((len(idx), n_par, n_par))
        g = np.empty((len(idx), n_par))
        cost = np.empty(len(idx))
        _kernels.normal_equations(theta, cen, off_r, off_c, data, valid, others, idx,
                                  float(gain), float(floor), uniform, elliptical, W, M, H, g,
                                  cost)
        return H, g, cost

    H_last = np.zeros((k, n_par, n_par))
    fresh = np.zeros(k, bool)  # H_last and M hold the values at the current theta
    for _ in range(max_iterations):
        idx = np.nonzero(active)[0]
        if len(idx) == 0:
            break
        # one weighted least-squares problem per iteration (IRLS): weights at the
        # current point, the step judged with those same weights
        H, g, cost = equations(idx)
        H_last[idx] = H
        fresh[idx] = True
        diag = np.einsum("kii->ki", H)
        A_mat = H + (lam[idx, None] * np.maximum(diag, 1e-12))[:, :, None] * eye
        try:
            step = np.linalg.solve(A_mat, g[..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = np.stack([_safe_solve(a, b) for a, b in zip(A_mat, g)])  # rare: singular batch
        trial = theta.copy()
        trial[idx] = theta[idx] + step
        ok = _physical(trial[idx], start[idx], radius, sign0[idx], elliptical)
        ct = np.empty(len(idx))
        _kernels.weighted_cost(trial, cen, off_r, off_c, data, others, idx, W, elliptical, ct)
        better = ok & np.isfinite(ct) & (ct <= cost)
        acc = idx[better]
        theta[acc] = trial[acc]
        moved = np.hypot(step[:, 0], step[:, 1])
        fresh[idx[better & (moved >= tolerance_px)]] = False
        lam[acc] = np.maximum(lam[acc] / 3.0, 1e-7)
        rej = idx[~better]
        lam[rej] = lam[rej] * 5.0
        iterations[idx] += 1
        # converged: an accepted step that barely moves the centre, or a
        # rejected one whose full Gauss-Newton size would already be tiny
        done = (better & (moved < tolerance_px)) | (~better & (moved * (1 + lam[idx]) < tolerance_px))
        converged[idx[done]] = True
        active[idx[done]] = False
        # a column whose damping has run away is stuck: stop it, unconverged
        active[rej[lam[rej] > 1e8]] = False
    # Fisher information at the final parameters, for the covariance.  Columns
    # whose last accepted step was below the tolerance keep the matrix of the
    # point before it (a difference far below the uncertainty); the others get
    # a fresh evaluation.
    stale = np.nonzero(~fresh | ~converged)[0]
    if len(stale):
        H_last[stale], _, _ = equations(stale)
    converged &= _physical(theta, start, radius, sign0, elliptical)
    return theta, converged, iterations, H_last, M.copy()


def _safe_solve(a, b):
    try:
        return np.linalg.solve(a, b)
    except np.linalg.LinAlgError:
        return np.zeros_like(b)


def _neighbours_reach(theta, radius, gain, elliptical):
    """Cheap bound: which columns have a neighbour whose Gaussian exceeds a tenth of
    the noise inside their window?  (Nearest eight neighbours, widest axis.)"""
    from scipy.spatial import cKDTree

    n = len(theta)
    pos = theta[:, :2]
    k = min(9, n)
    dist, nb = cKDTree(pos).query(pos, k=k)
    dist, nb = dist[:, 1:], nb[:, 1:]
    p = theta[:, 4]
    if elliptical:
        tr, det = theta[:, 4] + theta[:, 6], theta[:, 4] * theta[:, 6] - theta[:, 5] ** 2
        p = tr / 2 - np.sqrt(np.maximum(tr**2 / 4 - det, 0))
    with np.errstate(divide="ignore", invalid="ignore"):
        sig2 = np.where(p > 0, 1.0 / p, np.inf)
    gap = np.clip(dist - radius, 0, None)
    reach = np.abs(theta[nb, 2]) * np.exp(-0.5 * gap**2 / sig2[nb])
    noise = np.sqrt(np.maximum(np.abs(theta[:, 3]), 1.0) * gain)
    return (reach > 0.1 * noise[:, None]).any(axis=1)


def _render_radius(theta, fit_radius, spacing_px, elliptical):
    """Footprint for rendering neighbours: 4 sigma of the widest typical column.

    It must reach beyond the fit window, because the tail of a neighbour that
    matters is the part inside *this* column's window, far from its own centre.
    """
    p = theta[:, 4]
    if elliptical:
        # largest eigenvalue of Q^-1 = 1 / smallest eigenvalue of Q
        tr, det = theta[:, 4] + theta[:, 6], theta[:, 4] * theta[:, 6] - theta[:, 5] ** 2
        lam_min = tr / 2 - np.sqrt(np.maximum(tr**2 / 4 - det, 0))
        p = lam_min
    with np.errstate(divide="ignore", invalid="ignore"):
        sig = np.sqrt(1.0 / p)
    sig = sig[np.isfinite(sig)]
    typical = float(np.percentile(sig, 90)) if len(sig) else fit_radius / 3
    return float(np.clip(4.0 * typical, fit_radius, 1.5 * spacing_px))


def _neighbour_contribution(theta, win: FitWindows, render: FitWindows, shape, elliptical):
    """For each fit window, the sum of all *other* columns' fitted Gaussians.

    Every column is rendered over its (larger) `render` footprint; the fit
    window pixels are a subset of it, so subtracting the column's own
    Gaussian on its window leaves exactly the neighbours.
    """
    _, AG_render, _ = gaussian_model(theta, render.rows, render.cols, elliptical=elliptical)
    AG_render = np.where(render.valid, AG_render, 0.0)
    total = np.bincount(render.flat.ravel(), weights=AG_render.ravel(),
                        minlength=shape[0] * shape[1])
    _, AG_own, _ = gaussian_model(theta, win.rows, win.cols, elliptical=elliptical)
    return total[win.flat] - np.where(win.valid, AG_own, 0.0)


def _to_columns(theta, state, win, others, pos0, sublattice, ij, elliptical, weighting, gain):
    n = len(theta)
    n_par = theta.shape[1]
    converged = state["converged"].copy()
    H = state["H"]
    # inverse of the Fisher information; singular ones mark the column failed
    cov = np.full_like(H, np.nan)
    good = converged & np.all(np.isfinite(H), axis=(1, 2))
    if good.any():
        try:
            cov[good] = np.linalg.inv(H[good])
        except np.linalg.LinAlgError:
            for k in np.nonzero(good)[0]:
                try:
                    cov[k] = np.linalg.inv(H[k])
                except np.linalg.LinAlgError:
                    converged[k] = False
    # reduced chi-square per column with the final weights
    floor = _variance_floor(win)
    m = state["model"]
    W = _weights(m + others, weighting, gain, floor) * win.valid
    res = (win.data - others) - m
    dof = np.maximum(win.valid.sum(1) - n_par, 1)
    chi2 = (W * res * res).sum(1) / dof
    if weighting == "poisson":
        # One frame-wide factor: the median reduced chi-square estimates the
        # true gain / excess noise; it scales every covariance alike.
        scale_ok = converged & np.isfinite(chi2)
        scale = float(np.median(chi2[scale_ok])) if scale_ok.any() else 1.0
        cov = cov * max(scale, 1e-12)
    else:
        cov = cov * chi2[:, None, None]
    diag = np.einsum("kii->ki", cov)
    sig_pos = np.sqrt(np.clip(diag[:, 0:2], 0, None))
    sig_amp = np.sqrt(np.clip(diag[:, 2], 0, None))
    # an amplitude indistinguishable from zero is noise fitted as a column
    with np.errstate(invalid="ignore", divide="ignore"):
        significant = np.abs(theta[:, 2]) > 3.0 * sig_amp
    converged &= significant
    bad = ~converged
    pos = theta[:, 0:2].copy()
    pos[bad] = pos0[bad]
    sig_pos[bad] = np.nan
    sig_amp[bad] = np.nan
    # widths: eigen-decomposition of the covariance Q^-1 of the Gaussian
    if elliptical:
        p, q, s = theta[:, 4], theta[:, 5], theta[:, 6]
    else:
        p, q, s = theta[:, 4], np.zeros(n), theta[:, 4]
    with np.errstate(all="ignore"):
        det = p * s - q * q
        c_rr, c_cc, c_rc = s / det, p / det, -q / det
        tr = c_rr + c_cc
        disc = np.sqrt(np.maximum(((c_rr - c_cc) / 2) ** 2 + c_rc**2, 0))
        lam1 = tr / 2 + disc
        lam2 = tr / 2 - disc
        width = np.sqrt(np.stack([np.clip(lam1, 0, None), np.clip(lam2, 0, None)], 1))
        # major-axis direction in (x, y) = (col, row): eigenvector of [[c_cc, c_rc], [c_rc, c_rr]]
        ang = 0.5 * np.degrees(np.arctan2(2 * c_rc, c_cc - c_rr))
    n_conv = int(converged.sum())
    msg = f"{n_conv} of {n} columns converged"
    return Columns(
        positions_px=readonly(pos), sigma_positions_px=readonly(sig_pos),
        amplitude=readonly(theta[:, 2]), sigma_amplitude=readonly(sig_amp),
        width_px=readonly(width), width_angle_deg=readonly(ang),
        background=readonly(theta[:, 3]), sublattice=readonly(np.asarray(sublattice, "<U2")),
        ij=readonly(np.asarray(ij, dtype=np.int64)), converged=readonly(converged),
        reduced_chi2=readonly(chi2), message=msg,
        extra={"window_radius_px": float(win.radius_px),
               "iterations_median": float(np.median(state["iterations"]))},
    )
