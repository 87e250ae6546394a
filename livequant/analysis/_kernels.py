"""Compiled per-column work of the batched column fit.

``refine.py`` decides what to fit (windows, starting values, neighbour
passes) with array code over all columns; what is compiled here is the work
done *inside* one column, spread over the cores with ``prange`` (columns are
independent, so results do not depend on the thread count):

* ``window_starts``: the starting background, amplitude and width moment of
  every window, read straight from the image;
* ``fit_columns``: the whole Levenberg-Marquardt loop of every column.  Each
  iteration costs one pass over the window pixels, which evaluates the model
  at the trial point and accumulates, in one go, the trial's cost under the
  current weights (to accept or reject the step) and the Poisson weights,
  cost, ``J^T W J`` and ``J^T W r`` at the trial point (what the next
  iteration needs when the step is accepted, as it nearly always is);
* ``render_gaussians`` and ``window_others``: the neighbours' Gaussians
  inside each window for the neighbour passes.

Windows are read from the image by offset, never copied into ``(K, P)``
arrays.  numba is a dependency for this reason only: the same loop in numpy
ran at a fifth of the speed with many times the memory (``livequant bench``).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

__all__ = ["fit_columns", "window_starts", "render_gaussians", "window_others"]


@njit(cache=True, inline="always")
def _unpack(t, centre_r, centre_c, elliptical):
    """Amplitude, shape (p, q, s; round: q = 0, s = p) and the centre's offset
    from its window centre, for one column's parameters `t`."""
    if elliptical:
        q = t[5]
        s = t[6]
    else:
        q = 0.0
        s = t[4]
    return t[2], t[4], q, s, t[0] - centre_r, t[1] - centre_c


@njit(cache=True)
def _row_runs(off_r):
    """Where each row of a footprint starts in its pixel list (pixels come row
    by row, columns rising): ``runs[a]:runs[a + 1]`` are row ``a``'s."""
    n = off_r.shape[0]
    n_rows = 0
    for i in range(n):
        if i == 0 or off_r[i] != off_r[i - 1]:
            n_rows += 1
    runs = np.empty(n_rows + 1, np.int64)
    a = 0
    for i in range(n):
        if i == 0 or off_r[i] != off_r[i - 1]:
            runs[a] = i
            a += 1
    runs[n_rows] = n
    return runs


@njit(cache=True, inline="always")
def _row_start(dr, dc, p, q, s):
    """``exp(-(p dr^2 + 2 q dr dc + s dc^2) / 2)`` at a row's first pixel
    ``(dr, dc)``, and the ratio to its right-hand neighbour.

    Footprint pixels come row by row with the column offset rising by one, so
    along a row the exponent is a quadratic in ``dc`` with a constant second
    difference: each next value is the last times the ratio, and the ratio
    itself shrinks by ``exp(-s)`` each pixel.  Two exponentials per row
    instead of one per pixel; the exponential dominated the cost of the fit.
    """
    return (math.exp(-0.5 * (p * dr * dr + 2.0 * q * dr * dc + s * dc * dc)),
            math.exp(-s * dc - 0.5 * s - q * dr))


@njit(cache=True, inline="always")
def _window_gaussian(off_r, off_c, runs, p, q, s, d_r, d_c, Gs):
    """The unit Gaussian at every window pixel into `Gs`, row by row (`runs`
    from `_row_runs`) by the recurrence of `_row_start` (serial: each
    value follows from the last)."""
    decay = math.exp(-s)
    for a in range(runs.shape[0] - 1):
        i0 = runs[a]
        G, step = _row_start(off_r[i0] - d_r, off_c[i0] - d_c, p, q, s)
        for i in range(i0, runs[a + 1]):
            Gs[i] = G
            G = G * step
            step = step * decay


#: Columns per scratch allocation in `fit_columns` (and per task of its loop).
_COLUMNS_PER_CHUNK = 32
#: In the tilted refit, the largest step of any free parameter other than the
#: centre, in units of its own bound, that still counts as settled (the centre
#: itself must settle within 0.01 of its bound).  At 0.01 for every parameter
#: the slow amplitude and background steps of weak columns cost a quarter of
#: the refit's iterations without moving their centres.
_PLANE_OTHERS_SETTLE = 0.1

# Sums may be reordered (and so vectorised) and multiply-adds fused; nothing
# else is relaxed (no assumptions about NaN, infinities or signed zeros).
_FASTMATH = {"reassoc", "contract"}


@njit(cache=True, fastmath=_FASTMATH, error_model="numpy")
def _window_pass(d, o, vm, off_r, off_c, runs, t, cr, cc, elliptical, uniform, gain, floor, w_old,
                 w_new, Gs, H, g):
    """One pass over a window at parameters `t`.

    `d` is the window's data minus the neighbours' model `o`, `vm` 1 for a
    pixel inside the frame and 0 outside.  Returns ``(cost under w_old, cost
    under the new weights)`` and writes the new weights ``vm / (gain *
    max(model + o, floor))`` (Poisson) or `vm` (uniform) into `w_new`, and
    ``J^T W J`` and ``J^T W r`` into `H` and `g`.

    Two loops: the Gaussian by its row recurrence (serial, two
    multiplications a pixel) into `Gs`, then everything else, independent
    per pixel and so vectorised by the compiler: the 28 sums of the symmetric
    7 x 7 matrix and the 7 of the gradient are written out as scalar
    accumulators, which become vector registers.  (Two things had kept that
    loop scalar: the recurrence inside it, and numba's Python error model,
    whose division-by-zero check blocks vectorisation; the weights' floor
    keeps every divisor positive.)  The round model uses five parameters.

    Jacobian of ``m = B + A exp(-(p dr^2 + 2 q dr dc + s dc^2) / 2)`` for
    ``(mu_r, mu_c, A, B, p, q, s)``: ``A G (p dr + q dc)``, ``A G (q dr + s dc)``,
    ``G``, ``1``, ``-A G dr^2 / 2``, ``-A G dr dc``, ``-A G dc^2 / 2`` (round:
    ``q = 0``, ``s = p`` and ``-A G (dr^2 + dc^2) / 2`` for ``p``).
    """
    n_par = t.shape[0]
    n_pix = off_r.shape[0]
    B = t[3]
    A, p, q, s, d_r, d_c = _unpack(t, cr, cc, elliptical)
    _window_gaussian(off_r, off_c, runs, p, q, s, d_r, d_c, Gs)
    h00 = 0.0
    h01 = 0.0
    h02 = 0.0
    h03 = 0.0
    h04 = 0.0
    h05 = 0.0
    h06 = 0.0
    h11 = 0.0
    h12 = 0.0
    h13 = 0.0
    h14 = 0.0
    h15 = 0.0
    h16 = 0.0
    h22 = 0.0
    h23 = 0.0
    h24 = 0.0
    h25 = 0.0
    h26 = 0.0
    h33 = 0.0
    h34 = 0.0
    h35 = 0.0
    h36 = 0.0
    h44 = 0.0
    h45 = 0.0
    h46 = 0.0
    h55 = 0.0
    h56 = 0.0
    h66 = 0.0
    g0 = 0.0
    g1 = 0.0
    g2 = 0.0
    g3 = 0.0
    g4 = 0.0
    g5 = 0.0
    g6 = 0.0
    c_old = 0.0
    c_new = 0.0
    for i in range(n_pix):
        dr = off_r[i] - d_r
        dc = off_c[i] - d_c
        G = Gs[i]
        AG = A * G
        m = B + AG
        r = d[i] - m
        c_old += w_old[i] * r * r
        if uniform:
            w = vm[i]
        else:
            w = vm[i] / (gain * max(m + o[i], floor))
        w_new[i] = w
        wr = w * r
        c_new += wr * r
        j0 = AG * (p * dr + q * dc)
        j1 = AG * (q * dr + s * dc)
        j2 = G
        if elliptical:
            j4 = -0.5 * AG * dr * dr
            j5 = -AG * dr * dc
            j6 = -0.5 * AG * dc * dc
        else:
            j4 = -0.5 * AG * (dr * dr + dc * dc)
            j5 = 0.0
            j6 = 0.0
        w0 = w * j0
        w1 = w * j1
        w2 = w * j2
        w4 = w * j4
        w5 = w * j5
        w6 = w * j6
        g0 += wr * j0
        g1 += wr * j1
        g2 += wr * j2
        g3 += wr
        g4 += wr * j4
        g5 += wr * j5
        g6 += wr * j6
        h00 += w0 * j0
        h01 += w0 * j1
        h02 += w0 * j2
        h03 += w0
        h04 += w0 * j4
        h05 += w0 * j5
        h06 += w0 * j6
        h11 += w1 * j1
        h12 += w1 * j2
        h13 += w1
        h14 += w1 * j4
        h15 += w1 * j5
        h16 += w1 * j6
        h22 += w2 * j2
        h23 += w2
        h24 += w2 * j4
        h25 += w2 * j5
        h26 += w2 * j6
        h33 += w
        h34 += w4
        h35 += w5
        h36 += w6
        h44 += w4 * j4
        h45 += w4 * j5
        h46 += w4 * j6
        h55 += w5 * j5
        h56 += w5 * j6
        h66 += w6 * j6
    H[0, 0] = h00
    H[0, 1] = h01
    H[0, 2] = h02
    H[0, 3] = h03
    H[0, 4] = h04
    H[1, 1] = h11
    H[1, 2] = h12
    H[1, 3] = h13
    H[1, 4] = h14
    H[2, 2] = h22
    H[2, 3] = h23
    H[2, 4] = h24
    H[3, 3] = h33
    H[3, 4] = h34
    H[4, 4] = h44
    g[0] = g0
    g[1] = g1
    g[2] = g2
    g[3] = g3
    g[4] = g4
    if n_par == 7:
        H[0, 5] = h05
        H[0, 6] = h06
        H[1, 5] = h15
        H[1, 6] = h16
        H[2, 5] = h25
        H[2, 6] = h26
        H[3, 5] = h35
        H[3, 6] = h36
        H[4, 5] = h45
        H[4, 6] = h46
        H[5, 5] = h55
        H[5, 6] = h56
        H[6, 6] = h66
        g[5] = g5
        g[6] = g6
    for a in range(n_par):
        for b in range(a):
            H[a, b] = H[b, a]
    return c_old, c_new


@njit(cache=True, fastmath=_FASTMATH, error_model="numpy")
def _window_pass_plane(d, o, vm, off_r, off_c, runs, t, cr, cc, elliptical, uniform, gain, floor,
                       w_old, w_new, Gs, H, g):
    """`_window_pass` for the model with a tilted background,
    ``m = B + b_r dr0 + b_c dc0 + A exp(-(p dr^2 + 2 q dr dc + s dc^2) / 2)``,
    ``(dr0, dc0)`` the pixel's offset from the window centre and ``(b_r, b_c)``
    the last two parameters.  The slope takes up what the neighbours' tails
    (and the probe's cross-talk onto them) add across a light column's window
    to first order, which a flat background reads as a shift of the column.

    Unrolled like `_window_pass` (the 45 sums of the 9 x 9 matrix as scalar
    accumulators, so the pixel loop vectorises); the round model's five shape
    parameters use the same sums, its ``q`` and ``s`` rows left out.
    """
    n_par = t.shape[0]
    n_pix = off_r.shape[0]
    B = t[3]
    b_r = t[n_par - 2]
    b_c = t[n_par - 1]
    A, p, q, s, d_r, d_c = _unpack(t, cr, cc, elliptical)
    _window_gaussian(off_r, off_c, runs, p, q, s, d_r, d_c, Gs)
    h00 = 0.0
    h01 = 0.0
    h02 = 0.0
    h03 = 0.0
    h04 = 0.0
    h05 = 0.0
    h06 = 0.0
    h07 = 0.0
    h08 = 0.0
    h11 = 0.0
    h12 = 0.0
    h13 = 0.0
    h14 = 0.0
    h15 = 0.0
    h16 = 0.0
    h17 = 0.0
    h18 = 0.0
    h22 = 0.0
    h23 = 0.0
    h24 = 0.0
    h25 = 0.0
    h26 = 0.0
    h27 = 0.0
    h28 = 0.0
    h33 = 0.0
    h34 = 0.0
    h35 = 0.0
    h36 = 0.0
    h37 = 0.0
    h38 = 0.0
    h44 = 0.0
    h45 = 0.0
    h46 = 0.0
    h47 = 0.0
    h48 = 0.0
    h55 = 0.0
    h56 = 0.0
    h57 = 0.0
    h58 = 0.0
    h66 = 0.0
    h67 = 0.0
    h68 = 0.0
    h77 = 0.0
    h78 = 0.0
    h88 = 0.0
    g0 = 0.0
    g1 = 0.0
    g2 = 0.0
    g3 = 0.0
    g4 = 0.0
    g5 = 0.0
    g6 = 0.0
    g7 = 0.0
    g8 = 0.0
    c_old = 0.0
    c_new = 0.0
    for i in range(n_pix):
        dr = off_r[i] - d_r
        dc = off_c[i] - d_c
        G = Gs[i]
        AG = A * G
        j7 = off_r[i]
        j8 = off_c[i]
        m = B + b_r * j7 + b_c * j8 + AG
        r = d[i] - m
        c_old += w_old[i] * r * r
        if uniform:
            w = vm[i]
        else:
            w = vm[i] / (gain * max(m + o[i], floor))
        w_new[i] = w
        wr = w * r
        c_new += wr * r
        j0 = AG * (p * dr + q * dc)
        j1 = AG * (q * dr + s * dc)
        j2 = G
        j3 = 1.0
        if elliptical:
            j4 = -0.5 * AG * dr * dr
            j5 = -AG * dr * dc
            j6 = -0.5 * AG * dc * dc
        else:
            j4 = -0.5 * AG * (dr * dr + dc * dc)
            j5 = 0.0
            j6 = 0.0
        w0 = w * j0
        w1 = w * j1
        w2 = w * j2
        w3 = w * j3
        w4 = w * j4
        w5 = w * j5
        w6 = w * j6
        w7 = w * j7
        w8 = w * j8
        g0 += wr * j0
        g1 += wr * j1
        g2 += wr * j2
        g3 += wr * j3
        g4 += wr * j4
        g5 += wr * j5
        g6 += wr * j6
        g7 += wr * j7
        g8 += wr * j8
        h00 += w0 * j0
        h01 += w0 * j1
        h02 += w0 * j2
        h03 += w0 * j3
        h04 += w0 * j4
        h05 += w0 * j5
        h06 += w0 * j6
        h07 += w0 * j7
        h08 += w0 * j8
        h11 += w1 * j1
        h12 += w1 * j2
        h13 += w1 * j3
        h14 += w1 * j4
        h15 += w1 * j5
        h16 += w1 * j6
        h17 += w1 * j7
        h18 += w1 * j8
        h22 += w2 * j2
        h23 += w2 * j3
        h24 += w2 * j4
        h25 += w2 * j5
        h26 += w2 * j6
        h27 += w2 * j7
        h28 += w2 * j8
        h33 += w3 * j3
        h34 += w3 * j4
        h35 += w3 * j5
        h36 += w3 * j6
        h37 += w3 * j7
        h38 += w3 * j8
        h44 += w4 * j4
        h45 += w4 * j5
        h46 += w4 * j6
        h47 += w4 * j7
        h48 += w4 * j8
        h55 += w5 * j5
        h56 += w5 * j6
        h57 += w5 * j7
        h58 += w5 * j8
        h66 += w6 * j6
        h67 += w6 * j7
        h68 += w6 * j8
        h77 += w7 * j7
        h78 += w7 * j8
        h88 += w8 * j8
    # parameter k of the round model is sum index `use[k]` (q and s left out)
    if elliptical:
        g[0] = g0
        H[0, 0] = h00
        H[0, 1] = h01
        H[0, 2] = h02
        H[0, 3] = h03
        H[0, 4] = h04
        H[0, 5] = h05
        H[0, 6] = h06
        H[0, 7] = h07
        H[0, 8] = h08
        g[1] = g1
        H[1, 1] = h11
        H[1, 2] = h12
        H[1, 3] = h13
        H[1, 4] = h14
        H[1, 5] = h15
        H[1, 6] = h16
        H[1, 7] = h17
        H[1, 8] = h18
        g[2] = g2
        H[2, 2] = h22
        H[2, 3] = h23
        H[2, 4] = h24
        H[2, 5] = h25
        H[2, 6] = h26
        H[2, 7] = h27
        H[2, 8] = h28
        g[3] = g3
        H[3, 3] = h33
        H[3, 4] = h34
        H[3, 5] = h35
        H[3, 6] = h36
        H[3, 7] = h37
        H[3, 8] = h38
        g[4] = g4
        H[4, 4] = h44
        H[4, 5] = h45
        H[4, 6] = h46
        H[4, 7] = h47
        H[4, 8] = h48
        g[5] = g5
        H[5, 5] = h55
        H[5, 6] = h56
        H[5, 7] = h57
        H[5, 8] = h58
        g[6] = g6
        H[6, 6] = h66
        H[6, 7] = h67
        H[6, 8] = h68
        g[7] = g7
        H[7, 7] = h77
        H[7, 8] = h78
        g[8] = g8
        H[8, 8] = h88
    else:
        g[0] = g0
        H[0, 0] = h00
        H[0, 1] = h01
        H[0, 2] = h02
        H[0, 3] = h03
        H[0, 4] = h04
        H[0, 5] = h07
        H[0, 6] = h08
        g[1] = g1
        H[1, 1] = h11
        H[1, 2] = h12
        H[1, 3] = h13
        H[1, 4] = h14
        H[1, 5] = h17
        H[1, 6] = h18
        g[2] = g2
        H[2, 2] = h22
        H[2, 3] = h23
        H[2, 4] = h24
        H[2, 5] = h27
        H[2, 6] = h28
        g[3] = g3
        H[3, 3] = h33
        H[3, 4] = h34
        H[3, 5] = h37
        H[3, 6] = h38
        g[4] = g4
        H[4, 4] = h44
        H[4, 5] = h47
        H[4, 6] = h48
        g[5] = g7
        H[5, 5] = h77
        H[5, 6] = h78
        g[6] = g8
        H[6, 6] = h88
    for a in range(n_par):
        for b in range(a):
            H[a, b] = H[b, a]
    return c_old, c_new

@njit(cache=True)
def _cholesky(M, n):
    """In place: the lower Cholesky factor of symmetric `M` (``M = L L^T``) in its
    lower triangle, except that the diagonal holds the reciprocals ``1 / L[c, c]``
    (what the solves need: a division costs several multiplications, and they
    come in a dependent chain).  False when `M` is not numerically positive
    definite."""
    for c in range(n):
        acc = M[c, c]
        for k in range(c):
            acc -= M[c, k] * M[c, k]
        if not acc > 0.0 or not math.isfinite(acc):
            return False
        inv = 1.0 / math.sqrt(acc)
        M[c, c] = inv
        for a in range(c + 1, n):
            acc = M[a, c]
            for k in range(c):
                acc -= M[a, k] * M[c, k]
            M[a, c] = acc * inv
    return True


@njit(cache=True)
def _damped_step(H, g, lam, M, step):
    """Solve ``(H + lam diag(H)) step = g``: by Cholesky (the damped normal
    matrix is positive definite), or by `_damped_step_lu` when it is not
    numerically so.  Returns False, with a zero step, when singular."""
    n = g.shape[0]
    for a in range(n):
        for b in range(a + 1):
            M[a, b] = H[a, b]
        M[a, a] += lam * max(H[a, a], 1e-12)
    if not _cholesky(M, n):
        return _damped_step_lu(H, g, lam, M, step)
    for a in range(n):  # L y = g
        acc = g[a]
        for b in range(a):
            acc -= M[a, b] * step[b]
        step[a] = acc * M[a, a]
    for a in range(n - 1, -1, -1):  # L^T x = y
        acc = step[a]
        for b in range(a + 1, n):
            acc -= M[b, a] * step[b]
        step[a] = acc * M[a, a]
    return True


@njit(cache=True)
def _damped_step_lu(H, g, lam, M, step):
    """Solve ``(H + lam diag(H)) step = g`` by Gaussian elimination with partial
    pivoting (the ``n x n`` systems are tiny; a library call per column would
    cost more than the arithmetic).  Returns False, with a zero step, when the
    matrix is singular."""
    n = g.shape[0]
    for a in range(n):
        for b in range(n):
            M[a, b] = H[a, b]
        M[a, a] += lam * max(H[a, a], 1e-12)
        step[a] = g[a]
    for c in range(n):
        piv = c
        big = abs(M[c, c])
        for a in range(c + 1, n):
            if abs(M[a, c]) > big:
                big = abs(M[a, c])
                piv = a
        if not big > 0.0 or not math.isfinite(big):
            step[:] = 0.0
            return False
        if piv != c:
            for b in range(n):
                tmp = M[c, b]
                M[c, b] = M[piv, b]
                M[piv, b] = tmp
            tmp = step[c]
            step[c] = step[piv]
            step[piv] = tmp
        for a in range(c + 1, n):
            f = M[a, c] / M[c, c]
            if f != 0.0:
                for b in range(c, n):
                    M[a, b] -= f * M[c, b]
                step[a] -= f * step[c]
    for a in range(n - 1, -1, -1):
        acc = step[a]
        for b in range(a + 1, n):
            acc -= M[a, b] * step[b]
        step[a] = acc / M[a, a]
    for a in range(n):
        if not math.isfinite(step[a]):
            step[:] = 0.0
            return False
    return True


@njit(cache=True)
def _hold(H, g, n_free):
    """Hold parameters `n_free`.. fixed: their gradient is zero and their rows and
    columns of ``J^T W J`` are those of the identity, so a step never moves them."""
    n_par = g.shape[0]
    for a in range(n_free, n_par):
        g[a] = 0.0
        for b in range(n_par):
            H[a, b] = 0.0
            H[b, a] = 0.0
        H[a, a] = 1.0


@njit(cache=True)
def physical(t, start_r, start_c, radius, sign0, elliptical):
    """Is `t` a column?  Finite, amplitude of the starting sign, a positive
    definite shape narrower than the window but wider than a tenth of a pixel,
    centre within half a window radius of the start."""
    for a in range(t.shape[0]):
        if not math.isfinite(t[a]):
            return False
    amp_sign = 1.0 if t[2] > 0 else (-1.0 if t[2] < 0 else 0.0)
    if amp_sign != sign0 or not t[4] > 0:
        return False
    if elliptical:
        det = t[4] * t[6] - t[5] * t[5]
        if not (t[6] > 0 and det > 0):
            return False
        tr = t[4] + t[6]
        lam_min = tr / 2 - math.sqrt(max(tr * tr / 4 - det, 0.0))
    else:
        lam_min = t[4]
    # a Gaussian wider than the fit window is background, not a column
    if not lam_min > 1.0 / (radius * radius):
        return False
    if not math.hypot(t[0] - start_r, t[1] - start_c) < 0.5 * radius:
        return False
    # widths narrower than a tenth of a pixel are not columns
    return t[4] < 100.0


@njit(cache=True)
def _invert(H, out):
    """Inverse of a symmetric positive definite matrix through its Cholesky
    factor (``H^-1 = L^-T L^-1``), or `_invert_gauss_jordan` when it is not
    numerically positive definite; False (and NaN) when it is singular."""
    n = H.shape[0]
    L = np.empty((n, n))
    for a in range(n):
        for b in range(a + 1):
            L[a, b] = H[a, b]
    if not _cholesky(L, n):
        return _invert_gauss_jordan(H, out)
    # L^-1, lower triangular, into the upper triangle's mirror: Li[a, b] for b <= a
    Li = np.zeros((n, n))
    for b in range(n):
        Li[b, b] = L[b, b]  # (`_cholesky` leaves the reciprocal there)
        for a in range(b + 1, n):
            acc = 0.0
            for k in range(b, a):
                acc -= L[a, k] * Li[k, b]
            Li[a, b] = acc * L[a, a]
    for a in range(n):
        for b in range(a + 1):
            acc = 0.0
            for k in range(a, n):
                acc += Li[k, a] * Li[k, b]
            out[a, b] = acc
            out[b, a] = acc
            if not math.isfinite(acc):
                out[:, :] = np.nan
                return False
    return True


@njit(cache=True)
def _invert_gauss_jordan(H, out):
    """Inverse of a small matrix by Gauss-Jordan elimination with partial
    pivoting; False (and NaN) when it is singular."""
    n = H.shape[0]
    M = np.empty((n, 2 * n))
    for a in range(n):
        for b in range(n):
            M[a, b] = H[a, b]
            M[a, n + b] = 1.0 if a == b else 0.0
    for c in range(n):
        piv = c
        big = abs(M[c, c])
        for a in range(c + 1, n):
            if abs(M[a, c]) > big:
                big = abs(M[a, c])
                piv = a
        if not big > 0.0 or not math.isfinite(big):
            out[:, :] = np.nan
            return False
        if piv != c:
            for b in range(2 * n):
                tmp = M[c, b]
                M[c, b] = M[piv, b]
                M[piv, b] = tmp
        f = 1.0 / M[c, c]
        for b in range(2 * n):
            M[c, b] *= f
        for a in range(n):
            if a != c and M[a, c] != 0.0:
                f = M[a, c]
                for b in range(2 * n):
                    M[a, b] -= f * M[c, b]
    for a in range(n):
        for b in range(n):
            out[a, b] = M[a, n + b]
            if not math.isfinite(out[a, b]):
                out[:, :] = np.nan
                return False
    return True


@njit(cache=True, parallel=True, error_model="numpy")
def fit_columns(image, centres, off_r, off_c, idx, theta, start, others, has_others, radius,
                gain, floor, uniform, elliptical, max_iterations, tolerance_px,
                theta_out, cov_out, converged, iterations, cost_out, n_valid, n_free, plane):
    """Levenberg-Marquardt (Fisher scoring with Poisson weights) for columns `idx`.

    Column ``k = idx[j]`` starts at ``theta[k]`` in the window at integer
    ``centres[k]`` with pixel offsets ``(off_r, off_c)`` (row by row);
    ``others[j]`` (when `has_others`) is the neighbours' model in its window.
    Writes, at index `j`, the final parameters, the inverse of ``J^T W J``
    there (the covariance before any chi-square scaling; NaN unless
    converged), the converged flag, the iteration count, the weighted cost
    (chi-square) and the number of pixels inside the frame.

    Each iteration solves one damped weighted least-squares problem with the
    weights of the current point (IRLS) and judges the trial by its cost under
    those same weights; the same pass already computes everything the next
    iteration needs at the trial.  Converged: a step that moves the centre
    less than `tolerance_px` (taken without a further pass: it is far below
    the uncertainty; the matrix is the one of the point before it), or a
    rejected step whose full size would already be that small.  A column
    whose damping runs away stops, unconverged.

    At low counts the reweighting can cycle: under the weights of point a,
    point b is better, and under b's, a.  In the tilted refit (`plane`) an
    accepted step that turns back along the last one (cosine below -1/2 in
    the metric of the diagonal of ``J^T W J``) raises the damping instead of
    lowering it, so the iteration contracts onto the same fixed point (the
    Poisson score equation) instead of going round until `max_iterations`
    and leaving the column with its flat-background fit; there a damped
    step counts at its undamped size (about ``(1 + lambda)`` times its own).
    The main fit keeps the plain rule: a weak column that cannot settle
    there is better refitted with its sublattice's shape held (the fixed-
    shape fallback of ``refine.py``) than given a free shape it cannot
    support; damping it there put a false core on a wall at 2 us.

    Only the first `n_free` parameters move (4: centre, amplitude and
    background, the shape held at ``theta[k]``); the covariance rows and
    columns of the held ones are zero.  With `plane` the last two parameters
    are the background's slopes along rows and columns (`_window_pass_plane`).
    """
    n_par = theta.shape[1]
    n_pix = off_r.shape[0]
    n = idx.shape[0]
    n_chunks = (n + _COLUMNS_PER_CHUNK - 1) // _COLUMNS_PER_CHUNK
    runs = _row_runs(off_r)
    for c in prange(n_chunks):
        # scratch for a run of columns: allocating it per column cost as much
        # as a pixel pass
        pix = np.empty((6, n_pix))
        mats = np.empty((3, n_par, n_par))
        vecs = np.empty((5, n_par))
        for j in range(c * _COLUMNS_PER_CHUNK, min((c + 1) * _COLUMNS_PER_CHUNK, n)):
            _fit_one(image, centres, off_r, off_c, runs, idx[j], j, theta, start, others,
                     has_others, radius, gain, floor, uniform, elliptical, max_iterations,
                     tolerance_px, pix, mats, vecs, theta_out, cov_out, converged, iterations,
                     cost_out, n_valid, n_free, plane)


@njit(cache=True, error_model="numpy")
def _fit_one(image, centres, off_r, off_c, runs, k, j, theta, start, others, has_others, radius,
             gain, floor, uniform, elliptical, max_iterations, tolerance_px, pix, mats, vecs,
             theta_out, cov_out, converged, iterations, cost_out, n_valid, n_free, plane):
    """`fit_columns` for column ``k = idx[j]``, with scratch arrays `pix`, `mats`, `vecs`."""
    n_par = theta.shape[1]
    n_pix = off_r.shape[0]
    h_img, w_img = image.shape
    cr = centres[k, 0]
    cc = centres[k, 1]
    t = theta[k].copy()
    sign0 = 1.0 if t[2] >= 0 else -1.0
    if t[2] == 0.0:
        t[2] = sign0
    # the window, read once: data minus neighbours, neighbours, inside-frame mask
    d = pix[0]
    o = pix[1]
    vm = pix[2]
    w_cur = pix[3]
    w_try = pix[4]
    Gs = pix[5]
    nv = 0
    for a in range(runs.shape[0] - 1):
        i0 = runs[a]
        row = cr + int(off_r[i0])
        col0 = cc + int(off_c[i0])
        inside_row = row >= 0 and row < h_img
        for i in range(i0, runs[a + 1]):
            col = col0 + (i - i0)
            d[i] = 0.0
            o[i] = 0.0
            vm[i] = 0.0
            w_try[i] = 0.0
            if not inside_row or col < 0 or col >= w_img:
                continue
            nv += 1
            vm[i] = 1.0
            if has_others:
                o[i] = others[j, i]
            d[i] = image[row, col] - o[i]
    H = mats[0]
    H_try = mats[1]
    M = mats[2]
    g = vecs[0]
    g_try = vecs[1]
    step = vecs[2]
    trial = vecs[3]
    last = vecs[4]
    last[:] = 0.0
    if plane:
        _, cost = _window_pass_plane(d, o, vm, off_r, off_c, runs, t, cr, cc, elliptical, uniform,
                                     gain, floor, w_try, w_cur, Gs, H, g)
    else:
        _, cost = _window_pass(d, o, vm, off_r, off_c, runs, t, cr, cc, elliptical, uniform, gain,
                               floor, w_try, w_cur, Gs, H, g)
    _hold(H, g, n_free)
    lam = 1e-3
    done = False
    it = 0
    turned = False
    for _ in range(max_iterations):
        _damped_step(H, g, lam, M, step)
        for a in range(n_par):
            trial[a] = t[a] + step[a]
        it += 1
        moved = math.hypot(step[0], step[1])
        ok = physical(trial, start[k, 0], start[k, 1], radius, sign0, elliptical)
        # settled: a step below the tolerance, or below a hundredth of the
        # centre's own uncertainty (1 / sqrt of the larger diagonal of J^T W J,
        # a lower bound on it): a weak column's last steps wander in the noise
        settle = max(tolerance_px, 0.01 / math.sqrt(max(H[0, 0], H[1, 1], 1e-300)))
        if plane:
            # the tilted refit starts where another model left the column, and
            # a first step that mostly moves amplitude and background can come
            # before a larger one of the centre: there the centre must settle
            # within a hundredth of its own bound and every other free
            # parameter within `_PLANE_OTHERS_SETTLE` of its own
            sc = 0.0
            so = 0.0
            for a in range(n_free):
                z = abs(step[a]) * math.sqrt(max(H[a, a], 1e-300))
                if a < 2:
                    sc = max(sc, z)
                else:
                    so = max(so, z)
            settle = max(tolerance_px, moved * min(0.01 / max(sc, 1e-300),
                                                   _PLANE_OTHERS_SETTLE / max(so, 1e-300)))
        # (in the tilted refit a damped step counts at its undamped size,
        # about (1 + lambda) times its own: its damping is raised on purpose)
        if ok and (moved * (1.0 + lam) if plane else moved) < settle:
            t[:] = trial
            done = True
            break
        better = False
        if ok:
            if plane:
                c_trial, c_next = _window_pass_plane(d, o, vm, off_r, off_c, runs, trial, cr, cc,
                                                     elliptical, uniform, gain, floor, w_cur,
                                                     w_try, Gs, H_try, g_try)
            else:
                c_trial, c_next = _window_pass(d, o, vm, off_r, off_c, runs, trial, cr, cc,
                                               elliptical, uniform, gain, floor, w_cur, w_try,
                                               Gs, H_try, g_try)
            _hold(H_try, g_try, n_free)
            better = math.isfinite(c_trial) and c_trial <= cost
        if better:
            if plane:
                # a step back along the last one: the weights of the two
                # points each prefer the other (see the docstring)
                back = 0.0
                norm_s = 0.0
                norm_l = 0.0
                for a in range(n_free):
                    back += step[a] * last[a] * H[a, a]
                    norm_s += step[a] * step[a] * H[a, a]
                    norm_l += last[a] * last[a] * H[a, a]
                turned = back < -0.5 * math.sqrt(norm_s * norm_l)
                for a in range(n_par):
                    last[a] = step[a]
            t[:] = trial
            H, H_try = H_try, H
            g, g_try = g_try, g
            w_cur, w_try = w_try, w_cur
            cost = c_next
            if plane and turned:
                lam = lam * 5.0
            else:
                lam = max(lam / 3.0, 1e-7)
        else:
            lam = lam * 5.0
            if moved * (1.0 + lam) < settle:
                done = True
                break
            if lam > 1e8:
                break
    theta_out[j] = t
    done = done and physical(t, start[k, 0], start[k, 1], radius, sign0, elliptical)
    if done:
        done = _invert(H, cov_out[j])
        for a in range(n_free, n_par):
            for b in range(n_par):
                cov_out[j, a, b] = 0.0
                cov_out[j, b, a] = 0.0
    else:
        cov_out[j] = np.nan
    converged[j] = done
    iterations[j] = it
    cost_out[j] = cost
    n_valid[j] = nv


@njit(cache=True)
def _select(a, n, kth):
    """The `kth` smallest of ``a[:n]`` (reorders them): quickselect with a
    median-of-three pivot and a branch-free partition (whether an element goes
    left is added to an index, not branched on: on noisy data a branch is
    mispredicted half the time); values equal to the pivot are stepped over
    together.  numba's ``np.partition`` copies and cost more than the rest of
    `window_starts` together."""
    lo = 0
    hi = n - 1
    while lo < hi:
        mid = (lo + hi) // 2
        # median of a[lo], a[mid], a[hi] to a[hi]
        if a[mid] < a[lo]:
            a[mid], a[lo] = a[lo], a[mid]
        if a[hi] < a[lo]:
            a[hi], a[lo] = a[lo], a[hi]
        if a[mid] < a[hi]:
            a[mid], a[hi] = a[hi], a[mid]
        pivot = a[hi]
        store = lo
        for i in range(lo, hi):
            x = a[i]
            a[i] = a[store]
            a[store] = x
            store += 1 if x < pivot else 0
        a[hi] = a[store]
        a[store] = pivot
        if kth == store:
            return pivot
        if kth < store:
            hi = store - 1
        else:
            # the elements equal to the pivot, gathered next to it (branch-free
            # as above): detector counts are integers, and at a few counts a
            # pixel stepping past equal values one round at a time made the
            # selection three times slower (quadratic in the limit)
            eq = store + 1
            for i in range(store + 1, hi + 1):
                x = a[i]
                a[i] = a[eq]
                a[eq] = x
                eq += 1 if x == pivot else 0
            if kth < eq:
                return pivot
            lo = eq
    return a[kth]


@njit(cache=True, parallel=True, fastmath=_FASTMATH, error_model="numpy")
def window_starts(image, centres, start, off_r, off_c, radius, fallback, background, peak,
                  variance):
    """Per window: background (lower quartile of the outer ring, robust to a
    neighbour's tail; pixels outside the frame never count, `fallback` if none
    is inside), peak (mean of the pixels within 1 px of the centre) and the
    second moment of the background-subtracted window about the start,
    ``sum w |r - start|^2 / (2 sum w)`` (NaN when nothing is above background).
    """
    h_img, w_img = image.shape
    n_pix = off_r.shape[0]
    r2 = off_r * off_r + off_c * off_c
    outer = np.nonzero(r2 > (0.7 * radius) ** 2)[0]
    centre = np.nonzero(r2 <= 1.0)[0]
    kth = max(0, outer.shape[0] // 4)
    n = centres.shape[0]
    n_chunks = (n + _COLUMNS_PER_CHUNK - 1) // _COLUMNS_PER_CHUNK
    for chunk in prange(n_chunks):
        vals = np.empty(n_pix)
        vm = np.empty(n_pix)
        ring = np.empty(outer.shape[0])
        for k in range(chunk * _COLUMNS_PER_CHUNK, min((chunk + 1) * _COLUMNS_PER_CHUNK, n)):
            cr = centres[k, 0]
            cc = centres[k, 1]
            for i in range(n_pix):
                row = cr + int(off_r[i])
                col = cc + int(off_c[i])
                vals[i] = 0.0
                vm[i] = 0.0
                if row >= 0 and row < h_img and col >= 0 and col < w_img:
                    vals[i] = image[row, col]
                    vm[i] = 1.0
            n_ring = 0
            for i in outer:
                if vm[i] > 0:
                    ring[n_ring] = vals[i]
                    n_ring += 1
            B0 = _select(ring, n_ring, kth) if kth < n_ring else fallback
            background[k] = B0
            c_sum = 0.0
            c_n = 0.0
            for i in centre:
                c_sum += vals[i] * vm[i]
                c_n += vm[i]
            peak[k] = c_sum / max(c_n, 1.0)
            sgn = peak[k] - B0
            sgn = 1.0 if sgn > 0 else (-1.0 if sgn < 0 else 0.0)
            sub_r = start[k, 0] - cr
            sub_c = start[k, 1] - cc
            s_w = 0.0
            s_wr2 = 0.0
            for i in range(n_pix):
                wgt = max((vals[i] - B0) * sgn, 0.0) * vm[i]
                dr = off_r[i] - sub_r
                dc = off_c[i] - sub_c
                s_w += wgt
                s_wr2 += wgt * (dr * dr + dc * dc)
            variance[k] = s_wr2 / (2.0 * s_w) if s_w > 0 else np.nan


@njit(cache=True, parallel=True)
def render_gaussians(theta, centres, off_r, off_c, elliptical, out):
    """Add every column's Gaussian ``A G`` (no background) into image `out`
    over the footprint ``(off_r, off_c)`` around its integer centre.

    Footprints overlap, so columns cannot simply be spread over threads.  The
    frame is cut into bands of rows taller than twice the footprint's reach:
    two bands with one between them never touch a common pixel, so all even
    bands are rendered in parallel, then all odd ones.  Each pixel receives
    its sums in a fixed order (its even band's columns, then its odd band's,
    each in index order), so the result does not depend on the thread count.
    """
    n = theta.shape[0]
    if n == 0 or off_r.shape[0] == 0:
        return
    reach = 0
    for i in range(off_r.shape[0]):
        reach = max(reach, abs(int(off_r[i])))
    height = 2 * reach + 1
    n_bands = max(1, (out.shape[0] + height - 1) // height)
    # columns by band (a stable counting sort; centres off the frame go to
    # the nearest band, whose pixels their footprints can only be within)
    band = np.empty(n, np.int64)
    first = np.zeros(n_bands + 1, np.int64)
    for k in range(n):
        band[k] = min(max(centres[k, 0] // height, 0), n_bands - 1)
        first[band[k] + 1] += 1
    for b in range(n_bands):
        first[b + 1] += first[b]
    order = np.empty(n, np.int64)
    fill = first[:-1].copy()
    for k in range(n):
        order[fill[band[k]]] = k
        fill[band[k]] += 1
    runs = _row_runs(off_r)
    for parity in range(2):
        for h in prange((n_bands - parity + 1) // 2):
            b = 2 * h + parity
            for m in range(first[b], first[b + 1]):
                _render_one(theta, centres, off_r, off_c, runs, elliptical, out, order[m])


@njit(cache=True, inline="always")
def _render_one(theta, centres, off_r, off_c, runs, elliptical, out, k):
    """`render_gaussians` for column `k`: row by row, each row's run of
    pixels cut to the frame once and its Gaussian by the recurrence of
    `_row_start` from the run's first pixel."""
    shape_r, shape_c = out.shape
    cr = centres[k, 0]
    cc = centres[k, 1]
    A, p, q, s, d_r, d_c = _unpack(theta[k], cr, cc, elliptical)
    decay = math.exp(-s)
    for a in range(runs.shape[0] - 1):
        i0 = runs[a]
        row = cr + int(off_r[i0])
        if row < 0 or row >= shape_r:
            continue
        c0 = max(cc + int(off_c[i0]), 0)
        c1 = min(cc + int(off_c[runs[a + 1] - 1]), shape_c - 1)
        if c0 > c1:
            continue
        G, step = _row_start(off_r[i0] - d_r, (c0 - cc) - d_c, p, q, s)
        line = out[row]
        for col in range(c0, c1 + 1):
            line[col] += A * G
            G = G * step
            step = step * decay


@njit(cache=True, parallel=True)
def window_others(total, image, theta, centres, off_r, off_c, idx, elliptical, gain, out,
                  touched):
    """The neighbours' model in the windows of columns `idx`: the rendered
    `total` minus the column's own Gaussian (zero outside the frame), written
    to ``out[j]`` when `out` has a row per column; and whether it exceeds a
    tenth of the local noise ``sqrt(gain max(|data|, 1))`` anywhere."""
    h_img, w_img = total.shape
    write = out.shape[0] == idx.shape[0]
    runs = _row_runs(off_r)
    for j in prange(idx.shape[0]):
        k = idx[j]
        cr = centres[k, 0]
        cc = centres[k, 1]
        A, p, q, s, d_r, d_c = _unpack(theta[k], cr, cc, elliptical)
        decay = math.exp(-s)
        hit = False
        for a in range(runs.shape[0] - 1):
            i0 = runs[a]
            i1 = runs[a + 1]
            row = cr + int(off_r[i0])
            col0 = cc + int(off_c[i0])
            G, step = _row_start(off_r[i0] - d_r, off_c[i0] - d_c, p, q, s)
            inside_row = row >= 0 and row < h_img
            for i in range(i0, i1):
                col = col0 + (i - i0)
                o = 0.0
                if inside_row and col >= 0 and col < w_img:
                    o = total[row, col] - A * G
                    # |o| > 0.1 sqrt(gain max(|data|, 1)), without the root
                    if o * o > 0.01 * max(abs(image[row, col]), 1.0) * gain:
                        hit = True
                if write:
                    out[j, i] = o
                G = G * step
                step = step * decay
        touched[j] = hit
