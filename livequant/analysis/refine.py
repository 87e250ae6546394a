"""Batched refinement of atomic columns: 2D Gaussian plus local background.

Every column is fitted in its own circular window, all columns in one call:
the parameters form a ``(K, P)`` array, and the Levenberg-Marquardt loop of
each column runs compiled and in parallel over the columns
(``_kernels.fit_columns``), one pass over the window pixels per iteration;
never a Python loop over columns.  Windows are read from the image by offset
(no per-pixel copies of all windows), so memory stays near the frame's size.

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

from livequant.analysis import _filters, _kernels
from livequant.analysis.types import Columns, readonly

__all__ = ["refine_columns", "starting_parameters", "FitWindows", "extract_windows",
           "gaussian_model"]

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
                   weighting="poisson", gain=1.0, neighbour_passes=2, min_significance=3.0,
                   fixed_shape_fallback=False, min_noise_scale=0.0, background="flat",
                   window_sigmas=3.0) -> Columns:
    """Fit every column with a 2D Gaussian plus a local background.

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
        Converged when a step moves the centre less than this.
    elliptical : bool
        Fit an elliptical Gaussian (7 parameters) instead of a round one (5).
    joint_neighbours : bool
        Refit each column against the data minus its neighbours' fitted
        Gaussians (`neighbour_passes` times).
    weighting : {"poisson", "uniform"}
    min_significance : float
        A fit whose amplitude is below this many standard deviations is noise
        fitted as a column and counts as failed.
    fixed_shape_fallback : bool
        Refit the columns whose free fit failed with their sublattice's median
        shape held fixed (centre, amplitude and background free): a weak
        column at low dose cannot support a free width, but its position is
        still measurable.
    gain : float
        Detector counts per electron, used for the Poisson variance.  The
        reported uncertainties are further scaled by the frame's median
        reduced chi-square, so a wrong gain does not make them wrong.
    background : {"flat", "tilted"}
        "flat": a constant local background.  "tilted": last, refit every
        freely fitted column of the fainter sublattices (all but the
        brightest) with a background that may tilt (two slopes more) over a
        window of `window_sigmas` times its sublattice's median Gaussian width:
        the tails of heavier neighbours (and the probe's cross-talk onto them)
        add a slope across a light column, which a flat background reads as a
        shift of the column.  Each column's slopes are then replaced by the
        median of its neighbourhood's, shrunk by their noise, and held (see
        `_tilted_refit`), so where the slopes are only noise the result is the
        flat model's.
    window_sigmas : float
        Radius of that window in units of the sublattice's median width
        (geometric mean of the two axes), between 2 px and half the spacing.
    min_noise_scale : float
        Floor of that scale.  An image resampled and summed from a series has
        its pixel noise smoothed (lower variance, correlated between pixels)
        without gaining information; with 1.0 its uncertainties stay the
        Poisson bound of the summed counts instead of shrinking with the
        smoothing.

    Returns
    -------
    Columns
        Failed fits keep their starting position, ``converged=False`` and NaN
        uncertainties; they never raise.
    """
    image = np.ascontiguousarray(image, dtype=np.float64)
    pos0 = np.atleast_2d(np.asarray(positions_px, dtype=np.float64))
    n = len(pos0)
    if background not in ("flat", "tilted"):
        raise ValueError(f"`background` must be 'flat' or 'tilted', got {background!r}")
    if weighting not in ("poisson", "uniform"):
        raise ValueError(f"`weighting` must be 'poisson' or 'uniform', got {weighting!r}")
    if not spacing_px > 0:
        raise ValueError(f"`spacing_px` must be > 0, got {spacing_px}")
    sublattice = np.full(n, "A") if sublattice is None else np.asarray(sublattice)
    ij = np.zeros((n, 2), int) if ij is None else np.asarray(ij)
    if n == 0:
        return _empty_columns()
    radius = max(2.0, window_fraction * spacing_px)
    off_r, off_c = _disk(radius)
    centres = np.rint(pos0).astype(np.int64)
    theta = _initial_theta(image, centres, pos0, off_r, off_c, radius, sublattice, elliptical)
    theta_init = theta.copy()
    fit = _Fitter(image, centres, off_r, off_c, pos0, radius, elliptical=elliptical,
                  max_iterations=max_iterations, tolerance_px=tolerance_px,
                  weighting=weighting, gain=gain)
    everyone = np.arange(n)
    theta, state = fit(theta, everyone, None)

    neighbours = joint_neighbours and n > 1
    passes = 1 + (neighbour_passes if neighbours else 0)
    rendered = None
    candidates = everyone
    for _ in range(passes - 1):
        if rendered is None:
            # the cheap bound first; a later pass has the exact test of its candidates
            if not _neighbours_reach(theta, radius, gain, elliptical).any():
                break
            rendered = _Rendered.for_columns(image.shape, centres, theta, radius, spacing_px,
                                             elliptical)
        total = rendered.show(theta)
        # Refit only the columns whose neighbours reach into their window by more
        # than a tenth of the local noise somewhere: for well-separated columns
        # the second pass would change nothing but cost as much as the first.
        # A later pass looks only at the columns the previous one refitted: the
        # others' neighbours stayed below that tenth, and a refit moves a
        # neighbour's Gaussian far less than that.
        touched = np.zeros(len(candidates), bool)
        _kernels.window_others(total, image, theta, centres, off_r, off_c, candidates,
                               elliptical, float(gain), np.zeros((0, len(off_r))), touched)
        if not touched.any():
            break
        sub = candidates[touched]
        candidates = sub
        others = np.empty((len(sub), len(off_r)))
        _kernels.window_others(total, image, theta, centres, off_r, off_c, sub, elliptical,
                               float(gain), others, np.zeros(len(sub), bool))
        th_sub, st_sub = fit(theta, sub, others)
        theta[sub] = th_sub
        for key in state:
            state[key][sub] = st_sub[key]
    n_fallback = 0
    if fixed_shape_fallback:
        theta, state, n_fallback = _fixed_shape_refit(fit, theta, theta_init, state, sublattice,
                                                      ij, elliptical, min_significance)
    tilted = {}
    if background == "tilted":
        if neighbours and rendered is None:
            rendered = _Rendered.for_columns(image.shape, centres, theta, radius, spacing_px,
                                             elliptical)
        theta, state, tilted = _tilted_refit(fit, theta, state, sublattice, elliptical,
                                             spacing_px, window_sigmas, rendered, gain,
                                             min_significance)
    rendered = total = None  # the frame-sized sum is not needed any more
    columns = _to_columns(theta, state, pos0, sublattice, ij, elliptical, weighting, radius,
                          min_significance, min_noise_scale)
    extra = dict(columns.extra)
    if tilted:
        extra["tilted_background"] = tilted
    if n_fallback:
        extra["fixed_shape_refits"] = n_fallback
    msg = columns.message
    if n_fallback:
        msg += f" ({n_fallback} weak columns refitted with their sublattice's shape held fixed)"
    from dataclasses import replace
    return replace(columns, extra=extra, message=msg)


def starting_parameters(image, positions_px, *, spacing_px, window_fraction=0.3, sublattice=None,
                        elliptical=True):
    """The parameters `refine_columns` starts from, ``(N, 7)`` (or ``(N, 5)``
    round): ``[mu_r, mu_c, A, B, p, q, s]`` in the windows it fits.  For
    references that must solve the same problem from the same point."""
    image = np.ascontiguousarray(image, dtype=np.float64)
    pos0 = np.atleast_2d(np.asarray(positions_px, dtype=np.float64))
    sublattice = np.full(len(pos0), "A") if sublattice is None else np.asarray(sublattice)
    radius = max(2.0, window_fraction * spacing_px)
    off_r, off_c = _disk(radius)
    return _initial_theta(image, np.rint(pos0).astype(np.int64), pos0, off_r, off_c, radius,
                          sublattice, elliptical)


def _disk(radius_px):
    """Row and column offsets (float) of the pixels within `radius_px`, row by row."""
    rc = int(np.ceil(radius_px))
    off = np.arange(-rc, rc + 1)
    orow, ocol = np.meshgrid(off, off, indexing="ij")
    disk = (orow**2 + ocol**2) <= radius_px**2 + 1e-9
    return (np.ascontiguousarray(orow[disk], dtype=np.float64),
            np.ascontiguousarray(ocol[disk], dtype=np.float64))


def _empty_columns() -> Columns:
    z2, z1 = np.zeros((0, 2)), np.zeros(0)
    return Columns(positions_px=readonly(z2), sigma_positions_px=readonly(z2),
                   amplitude=readonly(z1), sigma_amplitude=readonly(z1), width_px=readonly(z2),
                   width_angle_deg=readonly(z1), background=readonly(z1),
                   sublattice=readonly(np.zeros(0, "<U2")), ij=readonly(np.zeros((0, 2), int)),
                   converged=readonly(np.zeros(0, bool)), reduced_chi2=readonly(z1),
                   message="no columns")


def _initial_theta(image, centres, pos0, off_r, off_c, radius, sublattice, elliptical):
    n = len(pos0)
    B0, peak, var = np.empty(n), np.empty(n), np.empty(n)
    _kernels.window_starts(image, centres, pos0, off_r, off_c, float(radius), np.nan, B0, peak,
                           var)
    if not np.isfinite(B0).all():  # a window whose outer ring lies wholly outside the frame
        _kernels.window_starts(image, centres, pos0, off_r, off_c, float(radius),
                               float(np.median(image)), B0, peak, var)
    A0 = peak - B0
    # width from the second moment of the background-subtracted window, then the
    # median per sublattice (a single window's moment is too noisy to start from)
    var = np.where(np.isfinite(var) & (var > 0), var, (radius / 3) ** 2)
    # moments inside a truncated window underestimate; clamp to a sane range
    var = np.clip(var, 0.25, (radius / 1.5) ** 2)
    labels, inverse = np.unique(sublattice, return_inverse=True)
    for k in range(len(labels)):  # a handful of sublattices, not columns
        sel = inverse == k
        var[sel] = np.median(var[sel])
    p0 = 1.0 / var
    cols = [pos0[:, 0], pos0[:, 1], A0, B0, p0]
    if elliptical:
        cols += [np.zeros_like(p0), p0]
    return np.stack(cols, axis=1)


def _variance_floor(image, centres, off_r, off_c) -> float:
    """Smallest model value used as a Poisson variance: a thousandth of the typical
    window pixel (the median of every fifth pixel of up to ~400 evenly spread
    windows: as good as all of them for a median, and cheap)."""
    h, w = image.shape
    every = max(1, len(centres) // 400)
    c = centres[::every]
    rows = np.clip(c[:, 0, None] + off_r[None, ::5].astype(np.int64), 0, h - 1)
    cols = np.clip(c[:, 1, None] + off_c[None, ::5].astype(np.int64), 0, w - 1)
    return max(1e-6, 1e-3 * float(np.median(np.abs(image[rows, cols]))))


class _Fitter:
    """The compiled Levenberg-Marquardt over a set of columns of one image."""

    def __init__(self, image, centres, off_r, off_c, start, radius, *, elliptical,
                 max_iterations, tolerance_px, weighting, gain):
        self.image, self.centres, self.off_r, self.off_c = image, centres, off_r, off_c
        self.start, self.radius, self.elliptical = start, float(radius), bool(elliptical)
        self.max_iterations, self.tolerance_px = int(max_iterations), float(tolerance_px)
        self.uniform, self.gain = weighting == "uniform", float(gain)
        self.floor = _variance_floor(image, centres, off_r, off_c)

    def __call__(self, theta, idx, others):
        """Fit columns `idx` from `theta[idx]`; `others` (len(idx), P) or None."""
        return self._run(theta, idx, others, self.centres, self.start, self.tolerance_px,
                         theta.shape[1])

    def fixed_shape(self, theta, idx, anchor):
        """The compiled fit of columns `idx` over centre, amplitude and background
        only, the shape ``theta[idx, 4:]`` held fixed, each window centred on
        (and the fit kept near) its `anchor` (row, col)."""
        centres = self.centres.copy()
        start = self.start.copy()
        centres[idx] = np.rint(anchor).astype(np.int64)
        start[idx] = anchor
        full = np.zeros((len(self.centres), theta.shape[1]))
        full[idx] = theta
        # a weak column is settled long before 1e-4 px: 1e-3 px is still a
        # hundredth of its uncertainty
        return self._run(full, idx, None, centres, start, max(self.tolerance_px, 1e-3), 4)

    def with_window(self, radius, start):
        """The same fit over disk windows of `radius` pixels centred on (and kept
        near) `start` (N, 2)."""
        from copy import copy
        other = copy(self)
        other.off_r, other.off_c = _disk(radius)
        other.radius = float(radius)
        other.start = np.ascontiguousarray(start, dtype=np.float64)
        other.centres = np.rint(other.start).astype(np.int64)
        return other

    def tilted(self, theta, idx, others, *, hold_slopes=False):
        """Fit columns `idx` with a tilted background: `theta` has the two
        slopes appended as its last parameters (held at their values with
        `hold_slopes`)."""
        n_par = theta.shape[1]
        return self._run(theta, idx, others, self.centres, self.start, self.tolerance_px,
                         n_par - 2 if hold_slopes else n_par, plane=True)

    def _run(self, theta, idx, others, centres, start, tolerance_px, n_free, plane=False):
        """One call of the compiled fit; returns the fitted rows and their state."""
        m, n_par = len(idx), theta.shape[1]
        has_others = others is not None
        if not has_others:
            others = np.zeros((1, len(self.off_r)))
        out = np.empty((m, n_par))
        state = {"converged": np.zeros(m, bool), "iterations": np.zeros(m, np.int64),
                 "cov": np.zeros((m, n_par, n_par)), "chi2": np.zeros(m),
                 "n_valid": np.zeros(m, np.int64)}
        _kernels.fit_columns(self.image, centres, self.off_r, self.off_c,
                             np.ascontiguousarray(idx, dtype=np.int64),
                             np.ascontiguousarray(theta, dtype=np.float64), start,
                             np.ascontiguousarray(others), has_others, self.radius, self.gain,
                             self.floor, self.uniform, self.elliptical, self.max_iterations,
                             tolerance_px, out, state["cov"], state["converged"],
                             state["iterations"], state["chi2"], state["n_valid"], n_free,
                             bool(plane))
        state["n_par"] = np.full(m, min(n_free, n_par), np.int64)
        return out, state


class _Rendered:
    """Every shown column's Gaussian ``A G`` summed over the frame (`show`
    returns the sum), kept current by rendering only the columns whose
    parameters changed since the last call: the old Gaussian out, the new one
    in.  A neighbour pass refits a seventh of a physics-like frame's columns,
    so bringing the sum up to date costs about a quarter of rendering it
    again.  One footprint (`radius_px`) and one integer centre per column for
    the life of the sum, so what was added is exactly what is taken out."""

    def __init__(self, shape, centres, radius_px, elliptical):
        self.total = np.zeros(shape)
        self.centres = centres
        self.off_r, self.off_c = _disk(radius_px)
        self.elliptical = elliptical
        self.at = None  # (N, P) parameters each column is rendered at; NaN: not rendered

    @classmethod
    def for_columns(cls, shape, centres, theta, fit_radius, spacing_px, elliptical):
        """An empty sum whose footprint reaches as far as these columns' tails
        (`_render_radius`)."""
        return cls(shape, centres, _render_radius(theta, fit_radius, spacing_px, elliptical),
                   elliptical)

    def show(self, theta, which=None) -> np.ndarray:
        """The sum with the columns `which` (default all; non-finite rows
        never) at `theta`."""
        want = np.array(theta, dtype=np.float64)
        keep = np.isfinite(want).all(axis=1)
        if which is not None:
            keep &= which
        want[~keep] = np.nan
        if self.at is None:
            self.at = np.full_like(want, np.nan)
        was = np.isfinite(self.at).all(axis=1)
        changed = np.nonzero((keep != was) | (keep & (want != self.at).any(axis=1)))[0]
        out_ = changed[was[changed]]
        in_ = changed[keep[changed]]
        if len(out_):
            gone = self.at[out_].copy()
            gone[:, 2] = -gone[:, 2]
            self._render(gone, out_)
        if len(in_):
            self._render(want[in_], in_)
        self.at[changed] = want[changed]
        return self.total

    def _render(self, theta, idx):
        _kernels.render_gaussians(np.ascontiguousarray(theta), self.centres[idx], self.off_r,
                                  self.off_c, self.elliptical, self.total)


def _predicted_sites(pos, labels, ij, good):
    """Where the lattice puts every column: the mean of the A corners around its
    site (the perovskite site convention of :mod:`livequant.analysis.types`) plus
    its sublattice's median offset from them; NaN with fewer than two corners."""
    out = np.full(pos.shape, np.nan)
    ij = np.asarray(ij, dtype=np.int64)
    a_ok = good & (labels == "A")
    if a_ok.sum() < 4:
        return out
    i0, j0 = ij[a_ok].min(axis=0) - 1
    n_i, n_j = ij[a_ok].max(axis=0) - (i0, j0) + 2
    grid = np.full((n_i + 1, n_j + 1, 2), np.nan)
    gi, gj = ij[a_ok, 0] - i0, ij[a_ok, 1] - j0
    grid[gi, gj] = pos[a_ok]
    # corners per site kind, as (di, dj) from the column's own (i, j)
    corners = {"A": ((-1, 0), (1, 0), (0, -1), (0, 1)), "B": ((0, 0), (1, 0), (0, 1), (1, 1)),
               "Oa": ((0, 0), (1, 0)), "Ob": ((0, 0), (0, 1))}
    for lab, offs in corners.items():
        sel = np.nonzero(labels == lab)[0]
        if len(sel) == 0:
            continue
        ci = ij[sel, 0] - i0
        cj = ij[sel, 1] - j0
        stack = []
        for di, dj in offs:
            ii, jj = ci + di, cj + dj
            inside = (ii >= 0) & (ii <= n_i) & (jj >= 0) & (jj <= n_j)
            v = np.full((len(sel), 2), np.nan)
            v[inside] = grid[ii[inside], jj[inside]]
            stack.append(v)
        stack = np.stack(stack)
        n_ok = np.isfinite(stack[..., 0]).sum(axis=0)
        with np.errstate(invalid="ignore"):
            centre = np.nanmean(stack, axis=0) if len(offs) else stack[0]
        centre[n_ok < 2] = np.nan
        ref = good[sel] & np.isfinite(centre).all(axis=1)
        offset = np.median(pos[sel[ref]] - centre[ref], axis=0) if ref.sum() >= 5 else 0.0
        out[sel] = centre + offset
    return out


def _shape(theta, elliptical):
    """``(p, q, s)`` of every column's Gaussian (the inverse covariance; round:
    ``q = 0``, ``s = p``)."""
    if elliptical:
        return theta[:, 4], theta[:, 5], theta[:, 6]
    return theta[:, 4], np.zeros(len(theta)), theta[:, 4]


def _geometric_sigma(theta, elliptical):
    """Each column's width as the geometric mean of its two axes, pixels."""
    p, q, s = _shape(theta, elliptical)
    with np.errstate(invalid="ignore", divide="ignore"):
        return (p * s - q * q) ** -0.25


def _median_reduced_chi2(state, ok) -> float:
    """The median reduced chi-square of the fits `ok` (1 where the Poisson
    weights are right; the noise variance for uniform weights)."""
    if not ok.any():
        return 1.0
    dof = np.maximum(state["n_valid"][ok] - state["n_par"][ok], 1)
    return max(float(np.median(state["chi2"][ok] / dof)), 1e-12)


def _fixed_shape_refit(fit, theta, theta_init, state, sublattice, ij, elliptical,
                       min_significance):
    """Refit with the sublattice's median shape held fixed the columns whose free
    fit failed, collapsed or came out insignificant.  Returns theta, state and
    how many columns were refitted."""
    conv = state["converged"] & np.isfinite(theta).all(axis=1)
    labels = np.asarray(sublattice).astype(str)
    p, q, s = _shape(theta, elliptical)
    with np.errstate(invalid="ignore"):
        lam_max = (p + s) / 2 + np.sqrt(np.maximum(((p - s) / 2) ** 2 + q * q, 0))
        minor = 1.0 / np.sqrt(lam_max)
        sig_amp = np.sqrt(np.abs(state["cov"][:, 2, 2]))
        weak = np.abs(theta[:, 2]) < min_significance * sig_amp
    # the test of a collapsed fit that _to_columns applies, a little wider (the
    # medians it compares with are taken over slightly different columns there)
    collapsed = _collapsed(minor, labels, conv, fraction=1.25 * _COLLAPSE_FRACTION)
    shape = np.full((len(theta), 3), np.nan)
    sign = np.ones(len(theta))
    redo = np.zeros(len(theta), bool)
    names, inv = np.unique(labels, return_inverse=True)
    for k in range(len(names)):  # a handful of sublattices
        sel = inv == k
        ref = sel & conv & ~weak
        if ref.sum() < 5:
            continue
        shape[sel] = np.median(np.stack([p[ref], q[ref], s[ref]], 1), axis=0)
        sign[sel] = np.sign(np.median(theta[ref, 2])) or 1.0
        redo |= sel & (~conv | collapsed | weak)
    idx = np.nonzero(redo)[0]
    if len(idx) == 0:
        return theta, state, 0
    start = theta_init[idx].copy()
    # start (and stay near) where the lattice puts the site: a weak column's
    # detected candidate may be a noise peak beside it
    anchor = _predicted_sites(theta[:, :2], labels, ij, conv & ~weak)[idx]
    use = np.isfinite(anchor).all(axis=1)
    anchor[~use] = fit.start[idx[~use]]
    start[:, :2] = anchor
    # the sublattice's sign of amplitude (a weak column's starting peak may sit
    # below its starting background)
    start[:, 2] = sign[idx] * np.maximum(np.abs(start[:, 2]), 1e-6)
    start[:, 4] = shape[idx, 0]
    if elliptical:
        start[:, 5], start[:, 6] = shape[idx, 1], shape[idx, 2]
    th, st = fit.fixed_shape(start, idx, anchor)
    better = st["converged"]
    theta = theta.copy()
    theta[idx[better]] = th[better]
    for key in state:
        state[key][idx[better]] = st[key][better]
    return theta, state, int(better.sum())


def _tilted_refit(fit, theta, state, sublattice, elliptical, spacing_px, window_sigmas,
                  rendered, gain, min_significance):
    """The tilted-background stage of `refine_columns`: per sublattice (a
    handful) but the brightest, refit its freely fitted columns over a window of `window_sigmas`
    times the sublattice's median width, with the two background slopes free
    and, when `neighbours`, the other columns' Gaussians subtracted.  A column
    whose refit fails keeps its earlier fit.  Returns theta, state and, per
    sublattice refitted, the window radius, the slope statistic
    (`_mean_slope_chi2`: about 2 where the slopes are noise) and how many
    columns took the refit.  `rendered` (a `_Rendered`, or None for no
    neighbour subtraction) is brought up to the freely fitted columns."""
    n, n_par = theta.shape
    labels = np.asarray(sublattice).astype(str)
    free = state["converged"] & np.isfinite(theta).all(axis=1) & (state["n_par"] == n_par)
    sigma = _geometric_sigma(theta, elliptical)
    wide = np.concatenate([theta, np.zeros((n, 2))], axis=1)
    total = None if rendered is None else rendered.show(theta, free)
    theta, report = theta.copy(), {}
    names, inv = np.unique(labels, return_inverse=True)
    brightness = np.array([np.median(np.abs(theta[free & (inv == k), 2]))
                           if (free & (inv == k)).any() else np.nan for k in range(len(names))])
    for k, name in enumerate(names):  # a handful of sublattices
        idx = np.nonzero(free & (inv == k))[0]
        # the brightest sublattice's neighbours are fainter than itself: their
        # tails move it far less than its own noise, and two more parameters
        # would cost its precision for nothing
        if len(idx) == 0 or brightness[k] >= np.nanmax(brightness):
            continue
        radius = float(np.clip(window_sigmas * np.median(sigma[idx]), 2.0, 0.5 * spacing_px))
        f = fit.with_window(radius, theta[:, :2])
        others = None
        if total is not None:
            # the other columns' Gaussians in these windows; the column's own
            # Gaussian is taken out of `total` (it was rendered at its fit)
            others = np.empty((len(idx), len(f.off_r)))
            _kernels.window_others(total, fit.image, theta, f.centres, f.off_r, f.off_c, idx,
                                   elliptical, float(gain), others, np.zeros(len(idx), bool))
        out, st = f.tilted(wide, idx, others)
        ok = _still_a_column(out, st, sigma[idx], elliptical, min_significance)
        # the slopes' variance in the units of the data: the inverse Fisher
        # information times the fits' median reduced chi-square (as in _to_columns)
        slope_cov = st["cov"][:, -2:, -2:] * _median_reduced_chi2(st, ok)
        slope_chi2 = _mean_slope_chi2(out[:, -2:], slope_cov, ok)
        # Each column's own slopes are noisy and, free, cost its position about
        # 25 % in sigma.  The slope a neighbourhood puts on a column changes
        # only from cell to cell (with the domain, at a wall), so each column
        # takes the median slope of its nearest neighbours of the same
        # sublattice, held fixed in a last fit of everything else.
        wide[idx] = out
        wide[idx, -2:] = _neighbourhood_slopes(out[:, :2], out[:, -2:], ok,
                                               np.einsum("kii->ki", slope_cov))
        out, st = f.tilted(wide, idx, others, hold_slopes=True)
        ok = _still_a_column(out, st, sigma[idx], elliptical, min_significance)
        report[str(name)] = {"window_radius_px": radius, "slope_chi2": slope_chi2,
                             "refitted": int(ok.sum()), "of": len(idx)}
        theta[idx[ok]] = out[ok, :n_par]
        st["cov"] = st["cov"][:, :n_par, :n_par]
        for key in state:
            state[key][idx[ok]] = st[key][ok]
    return theta, state, report


def _still_a_column(out, st, sigma, elliptical, min_significance):
    """Refits that still measure a column: converged, significant and about as
    wide as their sublattice (two slopes more can let a weak column's fit
    slide into the noise)."""
    with np.errstate(invalid="ignore"):
        ratio = _geometric_sigma(out, elliptical) / np.median(sigma)
        return (st["converged"]
                & (np.abs(out[:, 2]) > min_significance * np.sqrt(np.abs(st["cov"][:, 2, 2])))
                & (ratio > 0.5) & (ratio < 2.0))


#: Columns (the column itself included) whose median slope a column takes.
_SLOPE_NEIGHBOURS = 9


def _neighbourhood_slopes(pos, slopes, ok, variance):
    """Per column, the median (per component) of the slopes of the
    `_SLOPE_NEIGHBOURS` nearest columns among `ok` (itself included when ok),
    shrunk toward zero by the positive-part James-Stein factor ``max(0, 1 -
    v / m^2)`` (James & Stein, Proc. 4th Berkeley Symp. 1, 361 (1961)), ``v``
    the median's own noise variance (``pi / 2`` times the neighbours' median
    slope variance over their number).  Where the slopes are real the factor
    is about 1; where they are noise (Gaussian columns on a flat background)
    it is about 0 and the refit is the flat model's.  One tree query and one
    median over a (N, k, 2) array."""
    from scipy.spatial import cKDTree

    good = np.nonzero(ok & np.isfinite(slopes).all(axis=1) & np.isfinite(variance).all(axis=1))[0]
    if len(good) == 0:
        return np.zeros_like(slopes)
    k = min(_SLOPE_NEIGHBOURS, len(good))
    _, nn = cKDTree(pos[good]).query(pos, k=k, workers=_filters.compute_threads())
    nn = np.asarray(nn).reshape(len(pos), k)
    median = np.median(slopes[good][nn], axis=1)
    noise = np.pi / 2 * np.median(variance[good][nn], axis=1) / k
    with np.errstate(invalid="ignore", divide="ignore"):
        factor = np.clip(1.0 - noise / median**2, 0.0, 1.0)
    return median * np.nan_to_num(factor)


def _mean_slope_chi2(slopes, cov, ok) -> float:
    """Mean over columns `ok` of ``b^T C^-1 b``, the fitted background slopes
    against their covariance (in the units of the data, so a detector gain
    other than 1 does not read as slope).  Pure noise gives 2 (chi-square with
    two degrees of freedom; more where the noise is correlated between pixels);
    each value is capped at 50 so a few odd windows cannot dominate.  Measured
    at 1,250 e/px: multislice PbTiO3 20, BaTiO3 4, SrTiO3 2.5; Gaussian columns
    of the simulated instrument 1.8-2.0.  A diagnostic for the operator, not a
    switch: a model chosen per frame would make frames of one session disagree."""
    b, c = slopes[ok], cov[ok]
    det = c[:, 0, 0] * c[:, 1, 1] - c[:, 0, 1] ** 2
    with np.errstate(invalid="ignore", divide="ignore"):
        z2 = (b[:, 0] ** 2 * c[:, 1, 1] - 2 * b[:, 0] * b[:, 1] * c[:, 0, 1]
              + b[:, 1] ** 2 * c[:, 0, 0]) / det
    z2 = np.minimum(z2[np.isfinite(z2)], 50.0)
    return float(z2.mean()) if len(z2) else float("nan")


def _neighbours_reach(theta, radius, gain, elliptical):
    """Cheap bound: which columns have a neighbour whose Gaussian exceeds a tenth of
    the noise inside their window?  (Widest axis; only pairs close enough that the
    brightest, widest column could reach the quietest window are looked at, so a
    well-separated lattice costs one tree search and no pair.)"""
    from scipy.spatial import cKDTree

    n = len(theta)
    pos = theta[:, :2]
    p = theta[:, 4]
    if elliptical:
        tr, det = theta[:, 4] + theta[:, 6], theta[:, 4] * theta[:, 6] - theta[:, 5] ** 2
        p = tr / 2 - np.sqrt(np.maximum(tr**2 / 4 - det, 0))
    with np.errstate(divide="ignore", invalid="ignore"):
        sig2 = np.where(p > 0, 1.0 / p, np.inf)
    amp = np.abs(theta[:, 2])
    noise = np.sqrt(np.maximum(np.abs(theta[:, 3]), 1.0) * gain)
    ok = np.isfinite(pos).all(axis=1) & np.isfinite(sig2) & np.isfinite(amp)
    reach = np.zeros(n, bool)
    if ok.sum() < 2:
        return reach
    # |A| exp(-gap^2 / 2 s^2) > 0.1 noise needs gap < s sqrt(2 ln(10 |A| / noise))
    ratio = 10.0 * amp[ok].max() / noise.min()
    cutoff = radius + np.sqrt(sig2[ok].max() * 2.0 * np.log(max(ratio, 1.0)))
    sel = np.nonzero(ok)[0]
    pairs = cKDTree(pos[sel]).query_pairs(cutoff, output_type="ndarray")
    if len(pairs) == 0:
        return reach
    i, j = sel[pairs[:, 0]], sel[pairs[:, 1]]
    gap = np.clip(np.hypot(*(pos[i] - pos[j]).T) - radius, 0, None)
    # j reaching into i's window, and i into j's
    reach_i = amp[j] * np.exp(-0.5 * gap**2 / sig2[j]) > 0.1 * noise[i]
    reach_j = amp[i] * np.exp(-0.5 * gap**2 / sig2[i]) > 0.1 * noise[j]
    reach[i[reach_i]] = True
    reach[j[reach_j]] = True
    return reach


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


#: A converged fit whose minor width is below this fraction of the median minor width
#: of its sublattice's converged fits is rejected as collapsed onto a noise spike.
_COLLAPSE_FRACTION = 0.4


def _collapsed(minor_width, labels, converged, fraction=_COLLAPSE_FRACTION) -> np.ndarray:
    """Fits much narrower than the median of their sublattice (vectorised over labels)."""
    out = np.zeros(len(minor_width), bool)
    if not converged.any():
        return out
    names, inv = np.unique(labels, return_inverse=True)
    med = np.full(len(names), np.nan)
    for k in range(len(names)):  # a handful of sublattices, not one pass per column
        sel = converged & (inv == k) & np.isfinite(minor_width)
        if sel.sum() >= 5:
            med[k] = np.median(minor_width[sel])
    ref = med[inv]
    with np.errstate(invalid="ignore"):
        out = converged & np.isfinite(ref) & (minor_width < fraction * ref)
    return out


def _to_columns(theta, state, pos0, sublattice, ij, elliptical, weighting, radius,
                min_significance=3.0, min_noise_scale=0.0):
    n = len(theta)
    n_par = theta.shape[1]
    converged = state["converged"].copy()
    # inverse of the Fisher information (from the kernel; NaN and not
    # converged where it was singular)
    cov = state["cov"]
    # reduced chi-square per column with the final weights (the kernel's cost)
    dof = np.maximum(state["n_valid"] - state.get("n_par", n_par), 1)
    chi2 = state["chi2"] / dof
    if weighting == "poisson":
        # One frame-wide factor: the median reduced chi-square estimates the
        # true gain / excess noise; it scales every covariance alike.
        scale_ok = converged & np.isfinite(chi2)
        scale = float(np.median(chi2[scale_ok])) if scale_ok.any() else 1.0
        cov = cov * max(scale, min_noise_scale, 1e-12)
    else:
        cov = cov * chi2[:, None, None]
    diag = np.einsum("kii->ki", cov)
    sig_pos = np.sqrt(np.clip(diag[:, 0:2], 0, None))
    sig_amp = np.sqrt(np.clip(diag[:, 2], 0, None))
    # an amplitude indistinguishable from zero is noise fitted as a column
    with np.errstate(invalid="ignore", divide="ignore"):
        significant = np.abs(theta[:, 2]) > min_significance * sig_amp
    converged &= significant
    # widths: eigen-decomposition of the covariance Q^-1 of the Gaussian
    p, q, s = _shape(theta, elliptical)
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
    # A fit that shrank to a needle on one bright pixel (shot noise at low dose) has
    # a huge amplitude and a tiny volume; no column is several times narrower than
    # the others of its sublattice, whose width the probe sets.
    collapsed = _collapsed(width[:, 1], np.asarray(sublattice).astype(str), converged)
    converged &= ~collapsed
    bad = ~converged
    pos = theta[:, 0:2].copy()
    pos[bad] = pos0[bad]
    sig_pos[bad] = np.nan
    sig_amp[bad] = np.nan
    n_conv = int(converged.sum())
    msg = f"{n_conv} of {n} columns converged"
    if collapsed.any():
        msg += (f" ({int(collapsed.sum())} fits collapsed below {_COLLAPSE_FRACTION:g} of their "
                "sublattice's median width and were rejected)")
    return Columns(
        positions_px=readonly(pos), sigma_positions_px=readonly(sig_pos),
        amplitude=readonly(theta[:, 2]), sigma_amplitude=readonly(sig_amp),
        width_px=readonly(width), width_angle_deg=readonly(ang),
        background=readonly(theta[:, 3]), sublattice=readonly(np.asarray(sublattice, "<U2")),
        ij=readonly(np.asarray(ij, dtype=np.int64)), converged=readonly(converged),
        reduced_chi2=readonly(chi2), message=msg,
        extra={"window_radius_px": float(radius),
               "iterations_median": float(np.median(state["iterations"]))},
    )
