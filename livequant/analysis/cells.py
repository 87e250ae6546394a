"""Per-unit-cell descriptors of one frame: the maps that carry the physics.

:func:`compute_cells` turns a frame's refined columns into one row per unit
cell -- polar displacement, polarization estimate, local lattice parameters,
strain (from the columns and, as an independent check, by geometric phase
analysis of the image), octahedral tilt, column intensity ratio -- each with
its uncertainty propagated from the column fits, plus the frame-level
findings: a fitted domain wall and the topological cores of the displacement
field.  :class:`Cells` is what ``cells.csv`` and the ``cells`` block of
``summary.json`` are written from.

A unit cell ``(i, j)`` is the plaquette of A columns ``(i, j)``, ``(i+1, j)``,
``(i, j+1)``, ``(i+1, j+1)`` with the B column ``(i, j)`` at its centre (the
site convention of :mod:`livequant.analysis.types`).  A cell lacking one of
its four A corners is dropped; a descriptor that needs a missing neighbour
(the B column, an O column, a neighbouring B) is NaN in that cell -- never
guessed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np

from livequant.analysis._grid import index_box, site_grid
from livequant.analysis.gpa import gpa_strain
from livequant.analysis.polarization import (POLARIZATION_LABEL, MaterialConstants,
                                             b_site_polarization, displacement_from_sites,
                                             polarization_per_pm)
from livequant.analysis.strain import (CORNER_OFFSETS, local_lattice, reference_basis,
                                       strain_from_corners)
from livequant.analysis.tilt import NEIGHBOUR_OFFSETS, O_DETECTORS, octahedral_tilt
from livequant.analysis.topology import LOOP_DEFAULTS, find_cores, find_loop_cores
from livequant.analysis.types import Columns, Lattice, readonly
from livequant.analysis.walls import WIDTH_CONVENTION, DisplacementNoise, find_wall

__all__ = ["Cells", "compute_cells", "DESCRIPTORS", "VALUE_FIELDS", "MaterialConstants"]

#: Descriptor columns of ``cells.csv`` in order: (name, has a sigma column, meaning).
DESCRIPTORS: tuple[tuple[str, bool, str], ...] = (
    ("dx_pm", True, "B-site displacement from the centre of its four A neighbours, x (pm)"),
    ("dy_pm", True, "same, y (image rows, pointing down) (pm)"),
    ("d_pm", True, "magnitude of the B-site displacement (pm)"),
    ("d_angle_deg", True, "direction of the B-site displacement, atan2(dy, dx) (deg)"),
    ("d_a_pm", True, "B-site displacement along the cell's own a axis (pm)"),
    ("d_b_pm", True, "B-site displacement along the cell's own b axis (pm)"),
    ("pol_x_C_per_m2", True, "polarization estimate, x: " + POLARIZATION_LABEL + " (C/m^2)"),
    ("pol_y_C_per_m2", True, "polarization estimate, y (C/m^2)"),
    ("a_pm", True, "local lattice parameter along a (pm)"),
    ("b_pm", True, "local lattice parameter along b (pm)"),
    ("b_over_a", True, "|b| / |a| with the frame's labelling of the axes"),
    ("c_over_a", True, "tetragonality max(|a|, |b|) / min(|a|, |b|)"),
    ("exx", True, "strain xx against the reference lattice (column positions)"),
    ("eyy", True, "strain yy"),
    ("exy", True, "shear strain xy (tensor component, half the engineering shear)"),
    ("rotation_deg", True, "local lattice rotation, from +x towards +y (deg)"),
    ("gpa_exx", False, "strain xx by geometric phase analysis of the image"),
    ("gpa_eyy", False, "strain yy by GPA"),
    ("gpa_exy", False, "shear strain xy by GPA"),
    ("gpa_rotation_deg", False, "local rotation by GPA (deg)"),
    ("tilt_deg", True, "octahedral rotation about the beam from the O columns (deg)"),
    ("tilt_staggered_deg", False, "tilt times (-1)^(i+j): uniform for an anti-phase pattern (deg)"),
    ("ratio_b_a", True, "B column amplitude over the mean of its four A corners"),
)
#: New names of two descriptors (``livequant.schema.RENAMED_CELL_FIELDS``): this release
#: writes both, the new ones after the others, with the same values; the old ones go next.
RENAMED: dict[str, str] = {"ratio_b_a": "amplitude_ratio_b_a", "c_over_a": "tetragonality"}
#: The value columns of ``cells.csv`` after ``i, j, x_pm, y_pm``.
VALUE_FIELDS: tuple[str, ...] = tuple(
    f for name, has_sigma, _ in DESCRIPTORS for f in ((name, "sigma_" + name) if has_sigma
                                                      else (name,))) + tuple(
    f for new in RENAMED.values() for f in (new, "sigma_" + new))


def _nan(n):
    return np.full(n, np.nan)


@dataclass(frozen=True)
class Cells:
    """Per-cell descriptors of one frame.

    Attributes
    ----------
    i, j : ndarray of int, shape (N,)
        Cell indices.
    x_pm, y_pm : ndarray, shape (N,)
        Cell centre (mean of the four A corners), pm; x = image column, y = row.
    values : mapping of str to ndarray
        Every descriptor of :data:`DESCRIPTORS` and its ``sigma_<name>``
        where one exists, shape (N,), NaN where not available.  Also reachable
        as attributes (``cells.dx_pm``, ``cells.sigma_dx_pm``).
    info : dict
        Frame-level findings and provenance (reference, material, wall fit,
        topological cores, what was skipped and why); JSON-ready.
    """

    i: np.ndarray
    j: np.ndarray
    x_pm: np.ndarray
    y_pm: np.ndarray
    values: Mapping[str, np.ndarray]
    info: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return int(self.i.shape[0])

    def __getattr__(self, name):
        values = self.__dict__.get("values")
        if values is not None and name in values:
            return values[name]
        raise AttributeError(f"{type(self).__name__!s} has no attribute {name!r}")

    def csv_fields(self) -> list[str]:
        """Column names of ``cells.csv``: ``i, j, x_pm, y_pm``, then descriptor, sigma, ..."""
        return ["i", "j", "x_pm", "y_pm", *VALUE_FIELDS]

    def csv_rows(self) -> list[dict]:
        """One dict per cell, values formatted as text (``nan`` where not available)."""
        fields = self.csv_fields()
        # %-formatting over .tolist() is ~3x faster than np.char.mod; NaN prints as "nan".
        cols = [self.i.astype(int).tolist(), self.j.astype(int).tolist(),
                ["%.3f" % v for v in self.x_pm.tolist()], ["%.3f" % v for v in self.y_pm.tolist()]]
        cols += [["%.6g" % v for v in self.values[name].tolist()] for name in fields[4:]]
        return [dict(zip(fields, row)) for row in zip(*cols)]

    def summary(self) -> dict[str, Any]:
        """JSON-ready digest: counts, statistics per descriptor, frame-level findings."""
        stats = {}
        for name, has_sigma in [(n, h) for n, h, _ in DESCRIPTORS] + [
                (new, True) for new in RENAMED.values()]:
            v = self.values[name]
            ok = np.isfinite(v)
            if not ok.any():
                stats[name] = {"n": 0}
                continue
            entry = {"n": int(ok.sum()), "mean": _f(np.mean(v[ok])),
                     "median": _f(np.median(v[ok])), "std": _f(np.std(v[ok]))}
            if has_sigma:
                s = self.values["sigma_" + name][ok]
                s = s[np.isfinite(s)]
                # Neighbouring cells share columns, so their errors are correlated: the
                # typical per-cell sigma is reported, not a (too small) error of the mean.
                entry["median_sigma"] = _f(np.median(s)) if s.size else None
            stats[name] = entry
        lattice = {k: stats[k] for k in ("a_pm", "b_pm", "tetragonality", "b_over_a",
                                         "c_over_a")}
        return {"n_cells": len(self), "descriptors": stats, "local_lattice": lattice,
                **self.info}


def _f(x):
    x = float(x)
    return x if math.isfinite(x) else None


def _stack_take(grid, ii, jj, offsets):
    """Positions and sigmas of `grid` at (ii + di, jj + dj) for each offset: (N, K, 2)."""
    parts = [grid.take(ii + di, jj + dj) for di, dj in offsets]
    pos = np.stack([p[0] for p in parts], axis=1)
    sig = np.stack([p[1] for p in parts], axis=1)
    amp = np.stack([p[2] for p in parts], axis=1)
    samp = np.stack([p[3] for p in parts], axis=1)
    return pos, sig, amp, samp


def _cell_mask_from_region(region, centres_px) -> np.ndarray:
    region = np.asarray(region)
    if region.dtype != bool or region.ndim != 2:
        raise ValueError("`reference` must be 'median', 'material' or a 2D boolean mask of "
                         f"the frame's pixels; got an array of dtype {region.dtype} and shape "
                         f"{region.shape}")
    rc = np.round(centres_px).astype(np.int64)
    h, w = region.shape
    inside = (rc[:, 0] >= 0) & (rc[:, 0] < h) & (rc[:, 1] >= 0) & (rc[:, 1] < w)
    out = np.zeros(len(rc), dtype=bool)
    out[inside] = region[rc[inside, 0], rc[inside, 1]]
    return out


def compute_cells(columns: Columns, lattice: Lattice, *, pixel_size_pm: float, material=None,
                  reference="median", image=None, detector: str = "HAADF",
                  gpa_mask_sigma_fraction: float = 0.2, min_snr_topology: float = 3.0,
                  max_wall_chi2: float = 5.0) -> Cells:
    """Per-cell descriptors of one frame, with uncertainties.

    Parameters
    ----------
    columns : Columns
        Refined columns with sublattice labels and cell indices.
    lattice : Lattice
        The frame's lattice.  The descriptors (GPA reflections and the
        handedness of the winding loops included) use the local basis of the
        indexed cells instead, so they follow the ``(i, j)`` axes even if the
        lattice was reported in another, equivalent basis.
    pixel_size_pm : float
        Calibrated pixel size.
    material : MaterialConstants or object with its attributes, optional
        Lattice parameters, Born charges and the B-versus-A polarization sign
        (an entry of the material table).  Without it there is no
        polarization estimate and no ``"material"`` reference.
    reference : {"median", "material"} or ndarray of bool
        Strain reference: the frame's median cell, the material's handbook
        lattice, or the cells whose centres fall on True pixels of a
        frame-shaped boolean mask (a substrate region, say).
    image : array_like, shape (H, W), optional
        The frame; when given, strain is also computed by geometric phase
        analysis against the same reference, as a cross-check.
    detector : str
        Imaging mode; the octahedral tilt is computed only for modes that
        image oxygen (:data:`livequant.analysis.tilt.O_DETECTORS`) and when O
        columns were found.
    gpa_mask_sigma_fraction : float
        GPA mask width as a fraction of ``|g|`` (see :func:`gpa_strain`).
    min_snr_topology : float
        A cell's displacement direction counts for the winding numbers only
        where ``|u| / sigma(|u|)`` reaches this.
    max_wall_chi2 : float
        A tanh fit is reported as the frame's wall only when its reduced
        chi-square is at most this; a worse fit (several walls, a vortex
        texture) goes to ``wall_candidate`` in the summary with the reason.

    Returns
    -------
    Cells

    Raises
    ------
    TypeError, ValueError
        For inputs of the wrong kind, a non-positive pixel size, or a
        reference that cannot be built (the message says which and why).
    """
    if not isinstance(columns, Columns):
        raise TypeError(f"`columns` must be a Columns, got {type(columns).__name__}")
    if not isinstance(lattice, Lattice):
        raise TypeError(f"`lattice` must be a Lattice, got {type(lattice).__name__}")
    px = float(pixel_size_pm)
    if not (math.isfinite(px) and px > 0):
        raise ValueError(f"`pixel_size_pm` must be a positive number, got {pixel_size_pm!r}")
    mat = None if material is None else MaterialConstants.from_object(material)
    notes: list[str] = []

    box = index_box(columns)
    grids = {name: site_grid(columns, name, box) for name in ("A", "B", "Oa", "Ob")}
    a_grid = grids["A"]
    p = a_grid.present
    plaquette = p[:-1, :-1] & p[1:, :-1] & p[:-1, 1:] & p[1:, 1:]
    gi, gj = np.nonzero(plaquette)
    ii, jj = gi + box[0], gj + box[1]
    n = ii.size
    a4, sa4, amp4, samp4 = _stack_take(a_grid, ii, jj, CORNER_OFFSETS)
    centre_px = a4.mean(axis=1) if n else np.zeros((0, 2))
    values: dict[str, np.ndarray] = {}

    # Polar displacement and intensity ratio (need the B column).
    b, sb, amp_b, samp_b = grids["B"].take(ii, jj)
    disp = displacement_from_sites(b, sb, a4, sa4, pixel_size_pm=px)
    for name, src in (("dx_pm", "dx_pm"), ("dy_pm", "dy_pm"), ("d_pm", "magnitude_pm"),
                      ("d_angle_deg", "angle_deg")):
        values[name] = getattr(disp, src)
        values["sigma_" + name] = getattr(disp, "sigma_" + src)
    mean_a = amp4.mean(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = amp_b / mean_a
        values["ratio_b_a"] = ratio
        values["sigma_ratio_b_a"] = np.abs(ratio) * np.sqrt(
            (samp_b / amp_b) ** 2 + (np.sum(samp4**2, axis=1) / 16.0) / mean_a**2)
    if not grids["B"].present.any():
        notes.append("no B-site columns: displacement, polarization and ratios are empty")

    # Polarization estimate.
    pol_info: dict[str, Any] = {"label": POLARIZATION_LABEL, "computed": False}
    values["pol_x_C_per_m2"] = values["sigma_pol_x_C_per_m2"] = _nan(n)
    values["pol_y_C_per_m2"] = values["sigma_pol_y_C_per_m2"] = _nan(n)
    why = "no material given (set analysis.material)" if mat is None else mat.polarization_missing()
    if why is None:
        pxp, pyp, spx, spy = b_site_polarization(disp.dx_pm, disp.dy_pm, disp.sigma_dx_pm,
                                                 disp.sigma_dy_pm, mat)
        values.update(pol_x_C_per_m2=pxp, sigma_pol_x_C_per_m2=spx,
                      pol_y_C_per_m2=pyp, sigma_pol_y_C_per_m2=spy)
        pol_info.update(computed=True, material=mat.name, born_b=mat.born_b,
                        p_sign_b_vs_a=mat.p_sign_b_vs_a,
                        cell_volume_A3=mat.cell_volume_pm3 * 1e-6)
        if mat.born_sum is not None and abs(mat.born_sum) > 1e-3:
            pol_info["warning"] = (f"Born charges of {mat.name} sum to {mat.born_sum:+.3f}, not "
                                   "0 (acoustic sum rule)")
    else:
        pol_info["reason"] = why

    # Local lattice and strain against the chosen reference.
    loc = local_lattice(a4, sa4, pixel_size_pm=px)
    for name in ("a_pm", "b_pm", "b_over_a", "c_over_a"):
        values[name] = getattr(loc, name)
        values["sigma_" + name] = getattr(loc, "sigma_" + name)
    # Displacement on the crystal axes: a rotated frame then still reads "along c" directly.
    # The sigma is that of the projection (the axis direction is known to ~sigma/a, which
    # changes the projection only in second order for shifts much smaller than a cell).
    d_xy = np.column_stack([disp.dx_pm, disp.dy_pm])
    var_xy = np.column_stack([disp.sigma_dx_pm, disp.sigma_dy_pm]) ** 2
    for name, vec in (("d_a_pm", loc.a_xy_px), ("d_b_pm", loc.b_xy_px)):
        with np.errstate(invalid="ignore", divide="ignore"):
            unit = vec / np.hypot(*vec.T)[:, None]
        values[name] = np.sum(d_xy * unit, axis=1)
        values["sigma_" + name] = np.sqrt(np.sum(var_xy * unit**2, axis=1))
    strain_names = ("exx", "eyy", "exy", "rotation_deg")
    ref_xy = None
    ref_info: dict[str, Any] = {}
    if n:
        if isinstance(reference, str):
            mode, cell_mask = reference, None
        else:
            mode, cell_mask = "region", _cell_mask_from_region(reference, centre_px)
        ref_xy, ref_desc = reference_basis(loc, reference=mode, pixel_size_pm=px, material=mat,
                                           cell_mask=cell_mask)
        median_xy, _ = reference_basis(loc, reference="median")
        frame_basis_px = median_xy.T[:, ::-1]  # rows a, b as (d_row, d_col)
        st = strain_from_corners(a4, sa4, ref_xy)
        for name in strain_names:
            values[name] = getattr(st, name)
            values["sigma_" + name] = getattr(st, "sigma_" + name)
        ref_pm = ref_xy * px
        ref_info = {"description": ref_desc,
                    "a_pm": _f(np.hypot(*ref_pm[:, 0])), "b_pm": _f(np.hypot(*ref_pm[:, 1])),
                    "a_xy_pm": [_f(v) for v in ref_pm[:, 0]],
                    "b_xy_pm": [_f(v) for v in ref_pm[:, 1]]}
    else:
        for name in strain_names:
            values[name] = values["sigma_" + name] = _nan(0)
        notes.append("no complete cell (four A corners) in the frame")

    # Strain by GPA, sampled at the cell centres.
    gpa_info: dict[str, Any] = {"computed": False}
    for name in strain_names:
        values["gpa_" + name] = _nan(n)
    if image is None:
        gpa_info["reason"] = "no image given"
    elif ref_xy is None:
        gpa_info["reason"] = "no reference lattice"
    else:
        try:
            # Reflections from the frame's own median cell along the (i, j) axes, so that
            # (1, 0) and (0, 1) are the duals of the same vectors the reference describes.
            g = gpa_strain(image, frame_basis_px, reference_xy_px=ref_xy,
                           mask_sigma_fraction=gpa_mask_sigma_fraction)
        except ValueError as exc:
            gpa_info["reason"] = str(exc)
        else:
            sampled = g.sample(centre_px)
            for name in strain_names:
                values["gpa_" + name] = sampled[name]
            both = np.isfinite(sampled["exx"]) & np.isfinite(values["exx"])
            gpa_info.update(computed=True, mask_sigma_per_px=g.mask_sigma_per_px,
                            resolution_pm=g.resolution_px * px, margin_pm=g.margin_px * px,
                            n_cells_inside=int(both.sum()))
            if both.any():
                for name in ("exx", "eyy"):
                    diff = sampled[name][both] - values[name][both]
                    gpa_info[f"median_{name}_minus_columns"] = _f(np.median(diff))

    # Octahedral tilt.
    tilt_info: dict[str, Any] = {"computed": False}
    values["tilt_deg"] = values["sigma_tilt_deg"] = values["tilt_staggered_deg"] = _nan(n)
    has_o = grids["Oa"].present.any() and grids["Ob"].present.any()
    if str(detector).upper() not in O_DETECTORS:
        tilt_info["reason"] = f"detector {detector!r} does not image oxygen columns"
    elif not has_o:
        tilt_info["reason"] = "no oxygen columns were found"
    else:
        bn, sbn, _, _ = _stack_take(grids["B"], ii, jj, [o[0] for o in NEIGHBOUR_OFFSETS])
        parts = [grids[lab].take(ii + di, jj + dj) for _, lab, (di, dj) in NEIGHBOUR_OFFSETS]
        o = np.stack([q[0] for q in parts], axis=1)
        so = np.stack([q[1] for q in parts], axis=1)
        t = octahedral_tilt(b, sb, bn, sbn, o, so, ij=np.column_stack([ii, jj]))
        values.update(tilt_deg=t.tilt_deg, sigma_tilt_deg=t.sigma_tilt_deg,
                      tilt_staggered_deg=t.staggered_deg)
        ok = np.isfinite(t.staggered_deg)
        tilt_info.update(computed=True, n_cells=int(ok.sum()),
                         mean_staggered_deg=_f(np.mean(t.staggered_deg[ok])) if ok.any() else None,
                         convention="phi = atan(2 delta / |B-B'|), mean over the four bonds; "
                                    "positive from +x towards +y; staggered = phi (-1)^(i+j)")

    # Frame-level findings: one domain wall, topological cores.
    x_pm, y_pm = centre_px[:, 1] * px, centre_px[:, 0] * px
    sd_xy = np.column_stack([values["sigma_dx_pm"], values["sigma_dy_pm"]])
    wall = None
    if n:
        ni_, nj_ = a_grid.shape
        corner_ids = np.stack([(gi + di) * nj_ + (gj + dj) for di, dj in CORNER_OFFSETS], axis=1)
        noise = DisplacementNoise(sigma_b_xy=sb[:, ::-1] * px, corner_ids=corner_ids,
                                  sigma_corner_xy=a_grid.sigma_positions_px.reshape(-1, 2)[:, ::-1]
                                  * px)
        wall = find_wall(np.column_stack([x_pm, y_pm]), d_xy, sd_xy, noise=noise)
    wall_info = wall_candidate = None
    if wall is not None:
        wall_info = {**wall.to_json(),
                     "units": "pm (x0, width, correlation_length, width_80, position; each "
                              "also as a key ending _pm); p0 in pm of B-site displacement",
                     "convention": WIDTH_CONVENTION}
        if pol_info["computed"]:
            k = abs(polarization_per_pm(mat))
            wall_info["p0_C_per_m2"] = wall.p0 * k
            wall_info["sigma_p0_C_per_m2"] = wall.sigma_p0 * k
        if not wall.reduced_chi2 <= max_wall_chi2:
            wall_candidate = {**wall_info, "rejected": f"reduced chi-square {wall.reduced_chi2:.3g}"
                                                      f" > {max_wall_chi2}: not one straight "
                                                      "tanh wall"}
            wall_info = None
    topo_info = _topology(ii, jj, x_pm, y_pm, values, frame_basis_px if n else np.eye(2)[::-1],
                          box, plaquette, min_snr_topology)

    for old_name, new_name in RENAMED.items():
        values[new_name], values["sigma_" + new_name] = (values[old_name],
                                                         values["sigma_" + old_name])
    frozen = {k: readonly(values[k], float) for k in VALUE_FIELDS}
    info = {"pixel_size_pm": px, "material": None if mat is None else mat.name,
            "detector": str(detector), "reference": ref_info, "polarization": pol_info,
            "gpa": gpa_info, "tilt": tilt_info, "wall": wall_info,
            "wall_candidate": wall_candidate, "topology": topo_info,
            "sign_conventions": "x = image column, y = image row (down); angles and rotations "
                                "from +x towards +y", "notes": notes}
    return Cells(i=readonly(ii, np.int64), j=readonly(jj, np.int64), x_pm=readonly(x_pm, float),
                 y_pm=readonly(y_pm, float), values=frozen, info=info)


def _topology(ii, jj, x_pm, y_pm, values, basis_px, box, plaquette, min_snr) -> dict:
    """Winding numbers of the displacement field on the cell grid, and its cores."""
    shape = plaquette.shape
    gi, gj = ii - box[0], jj - box[1]

    def dense(v):
        out = np.full(shape, np.nan)
        out[gi, gj] = v
        return out

    with np.errstate(invalid="ignore", divide="ignore"):
        snr = values["d_pm"] / values["sigma_d_pm"]
    valid = dense(np.where(np.isfinite(snr) & (snr >= min_snr), 1.0, 0.0)) == 1.0
    a, b = basis_px  # rows (d_row, d_col) along i and j: handedness in the (x, y) frame
    cross = a[1] * b[0] - a[0] * b[1]
    handedness = 1 if cross >= 0 else -1
    w, cores = find_cores(dense(x_pm), dense(y_pm), dense(values["dx_pm"]),
                          dense(values["dy_pm"]), i0=box[0], j0=box[1], valid=valid,
                          handedness=handedness)
    ok = np.isfinite(w)
    # The cores are those seen by larger loops on the smoothed field (the vortex rule's
    # own search, same defaults): a plaquette winding that no loop confirms is noise or a
    # 180-degree wall's flip, not a core.  Confirmed cores take the chirality, circulation
    # and flux of the plaquette core nearest them of the same winding.
    X, Y = dense(x_pm), dense(y_pm)
    with np.errstate(invalid="ignore"):
        steps = np.hypot(np.diff(X, axis=0), np.diff(Y, axis=0))
    cell_pm = float(np.nanmedian(steps)) if np.isfinite(steps).any() else float("nan")
    loop_cores = []
    if np.isfinite(cell_pm):
        loop_cores, _ = find_loop_cores(X, Y, dense(values["dx_pm"]), dense(values["dy_pm"]),
                                        dense(values["sigma_d_pm"]), cell_size=cell_pm,
                                        handedness=handedness)
    radius = (0.5 * LOOP_DEFAULTS["loop_cells"] + 1.0) * cell_pm
    out, used = [], set()
    for lc in loop_cores:
        best, best_d = None, radius
        for k, c in enumerate(cores):
            d = float(np.hypot(c.x_pm - lc.x, c.y_pm - lc.y))
            if c.winding == lc.winding and d <= best_d and k not in used:
                best, best_d = k, d
        near = int(np.argmin(np.hypot(x_pm - lc.x, y_pm - lc.y)))
        entry = {"i": int(ii[near]), "j": int(jj[near]), "x_pm": lc.x, "y_pm": lc.y,
                 "winding": lc.winding, "kind": lc.kind, "chirality": 0,
                 "circulation_pm2": None, "flux_pm2": None, "n_loops": lc.n_loops}
        if best is not None:
            used.add(best)
            c = cores[best]
            entry.update(kind=c.kind, chirality=c.chirality, circulation_pm2=c.circulation_pm2,
                         flux_pm2=c.flux_pm2)
        out.append(entry)
    kinds: dict[str, int] = {}
    for c in out:
        kinds[c["kind"]] = kinds.get(c["kind"], 0) + 1
    limit = 200
    return {"n_plaquettes": int(ok.sum()), "total_winding": int(sum(c["winding"] for c in out)),
            "n_positive": int(sum(c["winding"] > 0 for c in out)),
            "n_negative": int(sum(c["winding"] < 0 for c in out)),
            "by_kind": kinds, "cores": out[:limit], "cores_truncated": len(out) > limit,
            "plaquettes_unconfirmed": int(np.sum(w[ok] != 0)) - len(used),
            "min_snr": min_snr, "loops": dict(LOOP_DEFAULTS),
            "convention": "cores: windings of square loops of `loops.loop_cells` cells on the "
                          "displacement box-averaged over `loops.smooth_cells` (the vortex "
                          "rule's search), placed by an affine fit; vortex and source +1, "
                          "antivortex (saddle) -1; chirality +1 = counter-clockwise in the "
                          "(x = col, y = row) frame, from the nearest plaquette "
                          "(i,j)->(i+1,j)->(i+1,j+1)->(i,j+1) of that winding (0 when none); "
                          "plaquettes_unconfirmed: plaquette windings no loop confirms (noise, "
                          "or the direction flip across a 180-degree wall), not cores"}
