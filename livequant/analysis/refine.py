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

from livequant.analysis.types import Columns, readonly

__all__ = ["refine_columns", "FitWindows", "extract_windows", "gaussian_model"]

_CHUNK = 4096  # columns per batch: bounds the Jacobian to ~60 MB for 13x13 windows


class FitWindows:
    """Pixel windows around columns: ``(K, P)`` arrays of coordinates, data and mask."""

    def __init__(self, rows, cols, flat, data, valid, radius_px):
        self.rows = rows
        self.cols = cols
        self.flat = flat
        self.data = data
        self.valid = valid
        self.radius_px = radius_px


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
    return FitWindows(rows.astype(float), cols.astype(float), flat, data, valid, radius_px)


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
    for k in range(passes):
        if k > 0:
            others = _neighbour_contribution(theta, win, image.shape, elliptical)
        theta, state = _fit_batched(theta, win, others, elliptical=elliptical,
                                    max_iterations=max_iterations, tolerance_px=tolerance_px,
                                    weighting=weighting, gain=gain, start=pos0)
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
    d = np.where(win.valid, win.data, np.nan)
    r2 = (win.rows - np.rint(pos0[:, 0:1])) ** 2 + (win.cols - np.rint(pos0[:, 1:2])) ** 2
    outer = r2 > (0.7 * win.radius_px) ** 2
    with np.errstate(all="ignore"):
        B0 = np.nanmedian(np.where(outer, d, np.nan), axis=1)
        centre = r2 <= 1.0
        peak = np.nanmean(np.where(centre, d, np.nan), axis=1)
    B0 = np.where(np.isfinite(B0), B0, np.nanmedian(d))
    A0 = peak - B0
    # width from the second moment of the background-subtracted window, then the
    # median per sublattice (a single window's moment is too noisy to start from)
    wgt = np.clip(np.nan_to_num(d - B0[:, None]) * np.sign(A0)[:, None], 0, None)
    wgt = np.where(win.valid, wgt, 0.0)
    dr = win.rows - pos0[:, 0:1]
    dc = win.cols - pos0[:, 1:2]
    with np.errstate(all="ignore"):
        var = (wgt * (dr**2 + dc**2)).sum(1) / (2.0 * wgt.sum(1))
    var = np.where(np.isfinite(var) & (var > 0), var, (win.radius_px / 3) ** 2)
    # moments inside a truncated window underestimate; clamp to a sane range
    var = np.clip(var, 0.25, (win.radius_px / 1.5) ** 2)
    for lab in np.unique(sublattice):
        sel = sublattice == lab
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


def _fit_batched(theta, win, others, *, elliptical, max_iterations, tolerance_px, weighting, gain,
                 start):
    """Levenberg-Marquardt over all columns, in chunks to bound memory."""
    n = len(theta)
    out = theta.copy()
    state = {"converged": np.zeros(n, bool), "iterations": np.zeros(n, int),
             "H": np.zeros((n, theta.shape[1], theta.shape[1]))}
    floor = max(1e-6, 1e-3 * float(np.nanmedian(np.abs(win.data))))
    for lo in range(0, n, _CHUNK):
        sl = slice(lo, min(n, lo + _CHUNK))
        th, conv, it, H = _lm_chunk(theta[sl].copy(), win.rows[sl], win.cols[sl], win.data[sl],
                                    win.valid[sl], others[sl], start[sl], win.radius_px,
                                    elliptical=elliptical, max_iterations=max_iterations,
                                    tolerance_px=tolerance_px, weighting=weighting, gain=gain,
                                    floor=floor)
        out[sl] = th
        state["converged"][sl] = conv
        state["iterations"][sl] = it
        state["H"][sl] = H
    return out, state


def _physical(theta, start, radius, sign0, elliptical):
    ok = np.all(np.isfinite(theta), axis=1)
    ok &= np.sign(theta[:, 2]) == sign0
    ok &= theta[:, 4] > 0
    if elliptical:
        ok &= (theta[:, 6] > 0) & (theta[:, 4] * theta[:, 6] - theta[:, 5] ** 2 > 0)
    ok &= np.hypot(theta[:, 0] - start[:, 0], theta[:, 1] - start[:, 1]) < 0.5 * radius
    # widths narrower than a tenth of a pixel are not columns
    ok &= theta[:, 4] < 100.0
    return ok


def _lm_chunk(theta, rows, cols, data, valid, others, start, radius, *, elliptical, max_iterations,
              tolerance_px, weighting, gain, floor):
    k, n_par = theta.shape
    vmask = valid.astype(float)
    target = data - others
    sign0 = np.sign(theta[:, 2])
    sign0[sign0 == 0] = 1.0
    theta[:, 2] = np.where(theta[:, 2] == 0, sign0, theta[:, 2])
    lam = np.full(k, 1e-3)
    active = np.ones(k, bool)
    converged = np.zeros(k, bool)
    iterations = np.zeros(k, int)
    eye = np.eye(n_par)

    def evaluate(th, rr, cc, tgt, oth, vm):
        m, _, J = gaussian_model(th, rr, cc, elliptical=elliptical, jacobian=True)
        W = _weights(m + oth, weighting, gain, floor) * vm
        res = tgt - m
        cost = (W * res * res).sum(1)
        return J, W, res, cost

    J, W, res, cost = evaluate(theta, rows, cols, target, others, vmask)
    for _ in range(max_iterations):
        idx = np.nonzero(active)[0]
        if len(idx) == 0:
            break
        Ji, Wi, ri = J[idx], W[idx], res[idx]
        JW = Ji * Wi[:, None, :]
        H = np.matmul(JW, Ji.transpose(0, 2, 1))
        g = np.matmul(JW, ri[..., None])[..., 0]
        diag = np.einsum("kii->ki", H)
        A_mat = H + (lam[idx, None] * np.maximum(diag, 1e-12))[:, :, None] * eye
        try:
            step = np.linalg.solve(A_mat, g[..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = np.stack([_safe_solve(a, b) for a, b in zip(A_mat, g)])  # rare: singular batch
        trial = theta[idx] + step
        ok = _physical(trial, start[idx], radius, sign0[idx], elliptical)
        # Judge the step with the weights of the current point (one fixed
        # weighted least-squares problem per iteration, as in IRLS); the
        # weights are then renewed at the accepted point.
        m_t, _, _ = gaussian_model(trial, rows[idx], cols[idx], elliptical=elliptical)
        r_t = target[idx] - m_t
        ct_fixed = (Wi * r_t * r_t).sum(1)
        better = ok & np.isfinite(ct_fixed) & (ct_fixed <= cost[idx])
        acc = idx[better]
        theta[acc] = trial[better]
        if len(acc):
            J[acc], W[acc], res[acc], cost[acc] = evaluate(theta[acc], rows[acc], cols[acc],
                                                           target[acc], others[acc], vmask[acc])
        lam[acc] = np.maximum(lam[acc] / 3.0, 1e-7)
        rej = idx[~better]
        lam[rej] = lam[rej] * 5.0
        iterations[idx] += 1
        moved = np.hypot(step[:, 0], step[:, 1])
        # converged: an accepted step that barely moves the centre, or a
        # rejected one whose full Gauss-Newton size would already be tiny
        done = (better & (moved < tolerance_px)) | (~better & (moved * (1 + lam[idx]) < tolerance_px))
        converged[idx[done]] = True
        active[idx[done]] = False
        # a column whose damping has run away is stuck: stop it, unconverged
        active[rej[lam[rej] > 1e8]] = False
    # Hessian at the final parameters for the covariance
    H = np.matmul(J * W[:, None, :], J.transpose(0, 2, 1))
    converged &= _physical(theta, start, radius, sign0, elliptical)
    return theta, converged, iterations, H


def _safe_solve(a, b):
    try:
        return np.linalg.solve(a, b)
    except np.linalg.LinAlgError:
        return np.zeros_like(b)


def _neighbour_contribution(theta, win: FitWindows, shape, elliptical):
    """For each window, the sum of all *other* columns' fitted Gaussians."""
    _, AG, _ = gaussian_model(theta, win.rows, win.cols, elliptical=elliptical)
    AG = np.where(win.valid, AG, 0.0)
    total = np.bincount(win.flat.ravel(), weights=AG.ravel(), minlength=shape[0] * shape[1])
    return total[win.flat] - AG


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
    floor = max(1e-6, 1e-3 * float(np.nanmedian(np.abs(win.data))))
    m, _, _ = gaussian_model(theta, win.rows, win.cols, elliptical=elliptical)
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
