"""Sublattices and cell indices from column candidates.

The method is local, so it survives strain, interfaces and missing columns
that would break a single global lattice:

1. link every candidate to the candidates found one basis vector ``a`` or
   ``b`` away (within a fifth of a spacing);
2. connected groups of links are translation cosets of one sublattice; small
   groups are noise peaks and are dropped;
3. integer indices propagate along the links inside each group;
4. every other group is placed against the largest one by the half-integer
   offset to its nearest member: (0, 0) same sublattice, (1/2, 1/2) the other
   cation, (1/2, 0) and (0, 1/2) oxygen;
5. of the two cation cosets, the one with the brighter columns is A (HAADF
   contrast ~ Z^n, CHECK-VALUES section 9) unless the caller says the B
   cation is the heavier one (e.g. SrRuO3).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.sparse import csgraph
from scipy.spatial import cKDTree

from numba import njit

from livequant.analysis import _filters
from livequant.analysis.columns import Candidates
from livequant.analysis.types import Lattice, readonly

__all__ = ["Sites", "assign_sites"]

_CLASS_NAMES = {(0, 0): "A", (1, 1): "B", (1, 0): "Oa", (0, 1): "Ob"}


@dataclass(frozen=True)
class Sites:
    """Indexed columns ready for refinement.

    positions_px : (N, 2) initial (row, col)
    sublattice : (N,) labels "A", "B", "Oa", "Ob"
    ij : (N, 2) cell indices (see ``livequant.analysis.types.SUBLATTICES``)
    height : (N,) candidate height above background (for information)
    message : str, notes on what was dropped or assumed
    """

    positions_px: np.ndarray
    sublattice: np.ndarray
    ij: np.ndarray
    height: np.ndarray
    message: str = ""

    def __len__(self) -> int:
        return int(self.positions_px.shape[0])


def _unique_rows(rows):
    """``np.unique(rows, axis=0, return_counts=True)`` for a small-valued
    ``(N, 3)`` int array, through one int64 key per row (numpy's row-wise
    unique sorts a structured view, ten times slower)."""
    lo = rows.min(axis=0)
    span = rows.max(axis=0) - lo + 1
    shifted = (rows - lo).astype(np.int64)
    key = (shifted[:, 0] * span[1] + shifted[:, 1]) * span[2] + shifted[:, 2]
    uniq_key, counts = np.unique(key, return_counts=True)
    out = np.empty((len(uniq_key), 3), dtype=rows.dtype)
    out[:, 2] = uniq_key % span[2]
    rest = uniq_key // span[2]
    out[:, 1] = rest % span[1]
    out[:, 0] = rest // span[1]
    return out + lo, counts


def assign_sites(candidates: Candidates, lattice: Lattice, *, projection="perovskite_001",
                 keep_oxygen=False, a_is_brighter=True, link_tolerance=0.2,
                 min_group_fraction=0.05) -> Sites:
    """Label candidates by sublattice and give them cell indices.

    Parameters
    ----------
    candidates : Candidates
    lattice : Lattice
        Basis vectors (the Fourier estimate is good enough).
    projection : {"perovskite_001", "simple"}
        ``perovskite_001``: A, B and (with `keep_oxygen`) O columns of an ABO3
        perovskite seen along [001]; ``simple``: one column per cell.
    keep_oxygen : bool
        Keep columns on oxygen sites (true for ABF/BF frames where they are
        resolved; on HAADF frames candidates there are noise).
    a_is_brighter : bool
        The A-site columns are the brighter cation columns.
    link_tolerance : float
        How far (fraction of the shorter spacing) a neighbour may sit from
        the predicted position and still be linked.
    min_group_fraction : float
        Linked groups smaller than this fraction of the largest are dropped.
    """
    if projection not in ("perovskite_001", "simple"):
        raise ValueError(f"`projection` must be 'perovskite_001' or 'simple', got {projection!r}")
    pos = np.asarray(candidates.positions_px, dtype=float)
    height = np.asarray(candidates.height, dtype=float)
    empty = Sites(positions_px=readonly(np.zeros((0, 2))), sublattice=readonly(np.zeros(0, "<U2")),
                  ij=readonly(np.zeros((0, 2), int)), height=readonly(np.zeros(0)),
                  message="no columns")
    n = len(pos)
    if n < 3:
        return empty
    basis = np.asarray(lattice.basis_px, dtype=float)
    spacing = min(lattice.a_px, lattice.b_px)
    tol = link_tolerance * spacing
    tree = cKDTree(pos)

    # 1. links along +a and +b
    src, dst, off = [], [], []
    for axis in range(2):
        d, nb = tree.query(pos + basis[axis], distance_upper_bound=tol,
                           workers=_filters.compute_threads())
        ok = np.isfinite(d)
        src.append(np.nonzero(ok)[0])
        dst.append(nb[ok])
        o = np.zeros((ok.sum(), 2), int)
        o[:, axis] = 1
        off.append(o)
    src, dst, off = np.concatenate(src), np.concatenate(dst), np.concatenate(off)
    adj = sparse.coo_matrix((np.ones(len(src)), (src, dst)), shape=(n, n))
    n_groups, group = csgraph.connected_components(adj, directed=False)

    # 2. drop small groups (noise peaks have no lattice neighbours)
    sizes = np.bincount(group, minlength=n_groups)
    big = sizes >= max(3, min_group_fraction * sizes.max())
    keep = big[group]
    if not keep.any():
        return empty
    ref = int(np.argmax(sizes))

    # 3. integer indices inside each group: breadth first along the links from
    #    the group's first member (each column gets its index from the link it
    #    was first reached by, level by level)
    idx = np.zeros((n, 2), int)
    seeds = np.zeros(n_groups, int)
    seeds[group[::-1]] = np.arange(n)[::-1]  # first member of each group
    e_src = np.concatenate([src, dst])
    e_dst = np.concatenate([dst, src])
    e_off = np.concatenate([off, -off])
    key = e_src.astype(np.int64) * n + e_dst
    key, first = np.unique(key, return_index=True)  # sorted; one offset per linked pair
    e_off = e_off[first]
    graph = sparse.csr_matrix((np.ones(len(key)), (key // n, key % n)), shape=(n, n))
    for seed in seeds[big]:
        order, pred = csgraph.breadth_first_order(graph, seed, directed=True,
                                                  return_predecessors=True)
        child = order[1:]
        step = e_off[np.searchsorted(key, pred[child].astype(np.int64) * n + child)]
        _accumulate(order, pred, step, idx)

    # 4. half-integer indices relative to the reference group
    half = 2 * idx
    in_ref = group == ref
    others = np.nonzero(keep & ~in_ref)[0]
    if len(others):
        ref_members = np.nonzero(in_ref)[0]
        _, nearest = cKDTree(pos[ref_members]).query(pos[others],
                                                     workers=_filters.compute_threads())
        q = ref_members[nearest]
        frac = (pos[others] - pos[q]) @ np.linalg.inv(basis.T).T
        # Each member votes for its group's offset against the reference group; the
        # group takes the most common vote.  A single nearest pair (a noise peak, a
        # strongly displaced column) must not shift a whole sublattice onto O sites.
        vote = half[q] + np.rint(2 * frac).astype(int) - 2 * idx[others]
        uniq, counts = _unique_rows(np.column_stack([group[others], vote]))
        order = np.lexsort((-counts, uniq[:, 0]))          # per group, most votes first
        uniq = uniq[order]
        first = np.ones(len(uniq), bool)
        first[1:] = uniq[1:, 0] != uniq[:-1, 0]
        offset = np.zeros((n_groups, 2), int)
        offset[uniq[first, 0]] = uniq[first, 1:]
        half[others] = 2 * idx[others] + offset[group[others]]
    cls = np.mod(half, 2)
    code = cls[:, 0] * 2 + cls[:, 1]  # 0: (0,0) 1: (0,1) 2: (1,0) 3: (1,1)

    notes = []
    if projection == "perovskite_001":
        # The reference group may be an oxygen coset (on ABF frames the O
        # columns are as many and as visible as the cations): the cation pair of
        # cosets, (0,0) and (1/2,1/2), is the stronger one, whatever was found first.
        h_cat = height[keep & ((code == 0) | (code == 3))]
        h_oxy = height[keep & ((code == 1) | (code == 2))]
        if len(h_cat) and len(h_oxy) and np.median(h_oxy) > np.median(h_cat):
            half = half + np.array([1, 0])
            cls = np.mod(half, 2)
            code = cls[:, 0] * 2 + cls[:, 1]
        h00 = height[keep & (code == 0)]
        h11 = height[keep & (code == 3)]
        if len(h11) == 0:
            notes.append("no second cation sublattice found (A and B columns may be equally "
                         "bright); all cation columns labelled A on the lattice found")
            shift = np.zeros(2, int)
        else:
            first_brighter = np.median(h00) >= np.median(h11)
            shift = np.zeros(2, int) if first_brighter == a_is_brighter else np.ones(2, int)
        half = half - shift
        cls = np.mod(half, 2)
        code = cls[:, 0] * 2 + cls[:, 1]
        names = np.array(["A", "Ob", "Oa", "B"])
        label = names[code]
        if not keep_oxygen:
            dropped = int((keep & ((code == 1) | (code == 2))).sum())
            keep &= (code == 0) | (code == 3)
            if dropped:
                notes.append(f"{dropped} candidates on oxygen sites ignored (not resolved in "
                             "this imaging mode)")
    else:
        dropped = int((keep & (code != 0)).sum())
        keep &= code == 0
        label = np.full(n, "A")
        if dropped:
            notes.append(f"{dropped} candidates off the simple lattice dropped")
    ij = (half - cls) // 2

    # 5. one column per site: keep the most prominent of duplicates
    sel = np.nonzero(keep)[0]
    order = sel[np.lexsort((-height[sel], ij[sel, 1], ij[sel, 0], label[sel]))]
    key = np.stack([np.unique(label[order], return_inverse=True)[1], ij[order, 0], ij[order, 1]], 1)
    first = np.ones(len(order), bool)
    first[1:] = np.any(key[1:] != key[:-1], axis=1)
    n_dupes = int((~first).sum())
    if n_dupes:
        notes.append(f"{n_dupes} duplicate candidates at one site dropped")
    final = order[first]
    n_noise = int((~big[group]).sum())
    if n_noise:
        notes.append(f"{n_noise} isolated candidates (no lattice neighbours) dropped")
    # keep the output in a stable spatial order (row-major by index)
    final = final[np.lexsort((ij[final, 0], ij[final, 1]))]
    return Sites(positions_px=readonly(pos[final]), sublattice=readonly(label[final].astype("<U2")),
                 ij=readonly(ij[final]), height=readonly(height[final]), message="; ".join(notes))


@njit(cache=True)
def _accumulate(order, pred, step, idx):
    """``idx[c] = idx[pred[c]] + step`` along a breadth-first `order` (parents
    come before their children, so one pass suffices)."""
    for m in range(1, order.shape[0]):
        c = order[m]
        p = pred[c]
        idx[c, 0] = idx[p, 0] + step[m - 1, 0]
        idx[c, 1] = idx[p, 1] + step[m - 1, 1]
