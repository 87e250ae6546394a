"""Compiled inner sums of the batched column fit.

The Levenberg-Marquardt iteration itself (damping, acceptance, convergence)
is array code over all columns in ``refine.py``.  What is compiled here is the
one expensive step of every iteration: for each active column, one pass over
its window pixels that evaluates the model and accumulates the Poisson
weighted cost, ``J^T W J`` and ``J^T W r``.  Written with numpy operations
that step makes a dozen full passes over ``(K, P)`` arrays and a batched
``(7 x P)(P x 7)`` product per column; fused, it reads each pixel once.
Columns are independent, so they are spread over the cores (``prange``).

numba is a dependency for this reason only: the same sums in numpy ran at a
fifth of the speed (measured by ``livequant bench``), and nothing we would
write by hand in C is easier to keep right than these twenty lines.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

__all__ = ["normal_equations", "weighted_cost", "render_gaussians"]


@njit(cache=True, inline="always")
def _unpack(t, centre, elliptical):
    """Amplitude, shape (p, q, s; round: q = 0, s = p) and the centre's offset
    from its window centre, for one column's parameters `t`."""
    if elliptical:
        q = t[5]
        s = t[6]
    else:
        q = 0.0
        s = t[4]
    return t[2], t[4], q, s, t[0] - centre[0], t[1] - centre[1]


@njit(cache=True, inline="always")
def _next_gaussian(row, prev_row, dr, dc, p, q, s, decay, G, step):
    """exp(-(p dr^2 + 2 q dr dc + s dc^2) / 2) along a row of the window.

    Window pixels come row by row with the column offset rising by one, so
    along a row the exponent is a quadratic in ``dc`` with a constant second
    difference: each next value is the last times a ratio that itself shrinks
    by ``exp(-s)``.  Two exponentials per row instead of one per pixel; the
    exponential dominated the cost of the fit.
    """
    if row != prev_row:
        G = math.exp(-0.5 * (p * dr * dr + 2.0 * q * dr * dc + s * dc * dc))
        step = math.exp(-s * dc - 0.5 * s - q * dr)
        return G, step, row
    G = G * step
    step = step * decay
    return G, step, prev_row


@njit(cache=True, parallel=True)
def normal_equations(theta, centres, off_r, off_c, data, valid, others, idx, gain, floor,
                     uniform, elliptical, weights_out, model_out, H, g, cost):
    """For columns ``idx``: weights, model, cost, ``J^T W J`` and ``J^T W r``.

    Writes ``weights_out[k]`` and ``model_out[k]`` (per pixel) and ``H[j]``,
    ``g[j]``, ``cost[j]`` for ``k = idx[j]``.  Weights are ``1 / (gain *
    max(model + others, floor))`` (Poisson) or 1 (`uniform`), zero outside
    the frame.  The 28 sums of the symmetric 7 x 7 matrix are kept in scalar
    accumulators (written out below rather than in a loop) so they stay in
    registers; the round model uses the first five parameters only.

    Jacobian of ``m = B + A exp(-(p dr^2 + 2 q dr dc + s dc^2) / 2)`` for
    ``(mu_r, mu_c, A, B, p, q, s)``: ``A G (p dr + q dc)``, ``A G (q dr + s dc)``,
    ``G``, ``1``, ``-A G dr^2 / 2``, ``-A G dr dc``, ``-A G dc^2 / 2`` (round:
    ``q = 0``, ``s = p`` and ``-A G (dr^2 + dc^2) / 2`` for ``p``).
    """
    n_par = theta.shape[1]
    n_pix = off_r.shape[0]
    for j in prange(idx.shape[0]):
        k = idx[j]
        t = theta[k]
        B = t[3]
        A, p, q, s, d_r, d_c = _unpack(t, centres[k], elliptical)
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
        ck = 0.0
        decay = math.exp(-s)
        prev_row = 1e300
        G = 0.0
        step = 0.0
        for i in range(n_pix):
            dr = off_r[i] - d_r
            dc = off_c[i] - d_c
            G, step, prev_row = _next_gaussian(off_r[i], prev_row, dr, dc, p, q, s, decay, G,
                                               step)
            if not valid[k, i]:
                weights_out[k, i] = 0.0
                model_out[k, i] = 0.0
                continue
            AG = A * G
            m = B + AG
            if uniform:
                w = 1.0
            else:
                w = 1.0 / (gain * max(m + others[k, i], floor))
            r = data[k, i] - others[k, i] - m
            weights_out[k, i] = w
            model_out[k, i] = m
            ck += w * r * r
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
            wr = w * r
            g0 += wr * j0
            g1 += wr * j1
            g2 += wr * j2
            g3 += wr * j3
            g4 += wr * j4
            g5 += wr * j5
            g6 += wr * j6
            h00 += w0 * j0
            h01 += w0 * j1
            h02 += w0 * j2
            h03 += w0 * j3
            h04 += w0 * j4
            h05 += w0 * j5
            h06 += w0 * j6
            h11 += w1 * j1
            h12 += w1 * j2
            h13 += w1 * j3
            h14 += w1 * j4
            h15 += w1 * j5
            h16 += w1 * j6
            h22 += w2 * j2
            h23 += w2 * j3
            h24 += w2 * j4
            h25 += w2 * j5
            h26 += w2 * j6
            h33 += w3 * j3
            h34 += w3 * j4
            h35 += w3 * j5
            h36 += w3 * j6
            h44 += w4 * j4
            h45 += w4 * j5
            h46 += w4 * j6
            h55 += w5 * j5
            h56 += w5 * j6
            h66 += w6 * j6
        Hk = np.zeros((7, 7))
        Hk[0, 0] = h00
        Hk[0, 1] = h01
        Hk[1, 0] = h01
        Hk[0, 2] = h02
        Hk[2, 0] = h02
        Hk[0, 3] = h03
        Hk[3, 0] = h03
        Hk[0, 4] = h04
        Hk[4, 0] = h04
        Hk[0, 5] = h05
        Hk[5, 0] = h05
        Hk[0, 6] = h06
        Hk[6, 0] = h06
        Hk[1, 1] = h11
        Hk[1, 2] = h12
        Hk[2, 1] = h12
        Hk[1, 3] = h13
        Hk[3, 1] = h13
        Hk[1, 4] = h14
        Hk[4, 1] = h14
        Hk[1, 5] = h15
        Hk[5, 1] = h15
        Hk[1, 6] = h16
        Hk[6, 1] = h16
        Hk[2, 2] = h22
        Hk[2, 3] = h23
        Hk[3, 2] = h23
        Hk[2, 4] = h24
        Hk[4, 2] = h24
        Hk[2, 5] = h25
        Hk[5, 2] = h25
        Hk[2, 6] = h26
        Hk[6, 2] = h26
        Hk[3, 3] = h33
        Hk[3, 4] = h34
        Hk[4, 3] = h34
        Hk[3, 5] = h35
        Hk[5, 3] = h35
        Hk[3, 6] = h36
        Hk[6, 3] = h36
        Hk[4, 4] = h44
        Hk[4, 5] = h45
        Hk[5, 4] = h45
        Hk[4, 6] = h46
        Hk[6, 4] = h46
        Hk[5, 5] = h55
        Hk[5, 6] = h56
        Hk[6, 5] = h56
        Hk[6, 6] = h66
        gk = np.array([g0, g1, g2, g3, g4, g5, g6])
        for a in range(n_par):
            g[j, a] = gk[a]
            for b in range(n_par):
                H[j, a, b] = Hk[a, b]
        cost[j] = ck


@njit(cache=True, parallel=True)
def weighted_cost(theta, centres, off_r, off_c, data, others, idx, weights, elliptical, cost):
    """Cost of parameters `theta` for columns `idx` with given per-pixel weights."""
    n_pix = off_r.shape[0]
    for j in prange(idx.shape[0]):
        k = idx[j]
        t = theta[k]
        A, p, q, s, d_r, d_c = _unpack(t, centres[k], elliptical)
        ck = 0.0
        decay = math.exp(-s)
        prev_row = 1e300
        G = 0.0
        step = 0.0
        for i in range(n_pix):
            dr = off_r[i] - d_r
            dc = off_c[i] - d_c
            G, step, prev_row = _next_gaussian(off_r[i], prev_row, dr, dc, p, q, s, decay, G,
                                               step)
            w = weights[k, i]
            if w == 0.0:
                continue
            m = t[3] + A * G
            r = data[k, i] - others[k, i] - m
            ck += w * r * r
        cost[j] = ck


@njit(cache=True)
def render_gaussians(theta, centres, off_r, off_c, shape_r, shape_c, elliptical, out):
    """Add every column's Gaussian ``A G`` (no background) into image `out`.

    Serial on purpose: windows overlap, so parallel adds would race.
    """
    for k in range(theta.shape[0]):
        t = theta[k]
        A, p, q, s, d_r, d_c = _unpack(t, centres[k], elliptical)
        decay = math.exp(-s)
        prev_row = 1e300
        G = 0.0
        step = 0.0
        for i in range(off_r.shape[0]):
            dr = off_r[i] - d_r
            dc = off_c[i] - d_c
            G, step, prev_row = _next_gaussian(off_r[i], prev_row, dr, dc, p, q, s, decay, G,
                                               step)
            row = centres[k, 0] + off_r[i]
            col = centres[k, 1] + off_c[i]
            if row < 0 or row >= shape_r or col < 0 or col >= shape_c:
                continue
            out[int(row), int(col)] += A * G
