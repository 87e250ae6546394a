"""Make physics-based STEM test frames with an open multislice simulator.

This script is NOT part of CI and is not imported by livequant. It runs in a separate
virtual environment that holds abTEM and ASE::

    python3 -m venv /work/abtem-venv
    /work/abtem-venv/bin/pip install abtem ase
    /work/abtem-venv/bin/python tests/data/multislice/make_frames.py --out tests/data/multislice

Method
------
Multislice STEM simulation (Kirkland, *Advanced Computing in Electron Microscopy*,
2nd ed., Springer 2010) as implemented in abTEM (Madsen & Susi, "The abTEM code:
transmission electron microscopy from first principles", Open Research Europe 1, 24
(2021)). The PRISM scattering-matrix form of the multislice is used; with interpolation
factor 1 it equals the conventional probe-by-probe multislice up to the probe's own
band limit (the plane waves inside the probe aperture are exactly those the probe is made
of). Thermal diffuse scattering comes from frozen phonons (abTEM ``FrozenPhonons``:
independent Gaussian displacements per atom and per axis, the Einstein model).

The PbTiO3 domain supercell is instead computed without a scan by ``simulate_exact``
(image Fourier coefficients from the full scattering matrix); PRISM interpolation 4 x 1
biased its Ti positions by about 1.3 pm because the probe's periodic copies sat on the
other domain.

Every specimen here is periodic in the plane of the image, so one supercell period is
scanned and the image is extended to the 256 x 256 output grid exactly:

* A STEM image is band-limited by the probe aperture: the image as a function of probe
  position contains no spatial frequency above 2*alpha/lambda (17.5 nm^-1 at 200 kV and
  22 mrad), whatever the specimen and detector, because it is a sum of products of two
  aperture-limited waves. The scan step (<= 24.5 pm) samples above the Nyquist rate of that
  limit (28.5 pm step), so the periodic image is fully determined by its samples on one
  period.
* The output frame is therefore evaluated as the Fourier series of the scanned period
  (trigonometric interpolation) at the output pixel centres, for any pixel size; the
  series is periodic, which tiles the field of view.

Frozen phonons: within each configuration the in-plane random displacements are
re-centred per column and per element, so every column's projected centroid equals the
position put in, and configurations are used in antithetic pairs (u, -u); together this
removes the first-order position noise of a finite number of configurations (the
thermal smearing of every atom is unchanged). The truth positions
in the JSON files are the mean projected positions of the atoms put in (no phonons).

Conventions of the saved frames
-------------------------------
* ``NAME.npy``: float32, shape (256, 256), index [row, col] = [y, x]. Pixel (row r,
  col c) is the detector signal (fraction of the incident probe intensity) with the probe
  at x = c * pixel_size_pm, y = r * pixel_size_pm from the scan origin: pixel centres sit
  at integer pixel coordinates and pixel (0, 0) is the scan origin.
* The specimen x and y axes are the image column and row axes; angles in the truth are
  measured from +x towards +y (with y pointing down the rows, i.e. clockwise as
  displayed with the origin at the top left).
* ``NAME.json``: all physics settings and the truth (every projected column in the frame,
  x_px, y_px in the convention above).

Seeds are fixed; the same command reproduces the same frames (up to floating-point
summation order in FFT libraries).
"""

from __future__ import annotations

import os

# At most two threads (the machine is shared); set before numpy is imported.
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse
import json
import math
import time
from dataclasses import dataclass, field

import numpy as np

ENERGY_EV = 200e3
SEMIANGLE_MRAD = 22.0
HAADF_MRAD = (70.0, 160.0)
ABF_MRAD = (11.0, 22.0)
OUT_SHAPE = (256, 256)
MAX_SCAN_STEP_PM = 24.5

# Room-temperature rms thermal displacement per axis (Angstrom), Einstein model. Typical
# magnitudes for these perovskites (isotropic B of about 0.4-1.0 A^2, u = sqrt(B / 8 pi^2));
# values from memory, order of magnitude only: they set the thermal smearing, not a truth.
SIGMAS_A = {"Sr": 0.088, "Ba": 0.075, "Pb": 0.110, "Ti": 0.071, "O": 0.094}

# Lattice parameters (pm) from /work/shared/CHECK-VALUES.md section 1.
A_STO_PM = 390.53
A_PTO_PM, C_PTO_PM = 389.87, 413.80
A_BTO_PM, C_BTO_PM = 399.98, 401.80


@dataclass
class Column:
    """One projected atomic column of the supercell (positions in Angstrom)."""

    site: str
    label: str
    i: int
    j: int
    atoms: list  # (symbol, x_A, y_A, z_A) within one z period
    extra: dict = field(default_factory=dict)

    @property
    def mean_xy(self):
        xy = np.array([[a[1], a[2]] for a in self.atoms])
        return xy.mean(axis=0)


@dataclass
class Specimen:
    name: str
    lx_A: float
    ly_A: float
    z_period_A: float
    n_cells_xy: tuple  # unit cells along x and y in the supercell
    cell_xy_A: tuple  # unit-cell size along x and y
    columns: list
    description: str
    extra: dict = field(default_factory=dict)
    # Cells scanned along x and y: one period of the static structure (the image of a
    # periodic specimen has the structure's period); the supercell around it only keeps
    # the probe's periodic images away.
    scan_cells: tuple = (1, 1)

    @property
    def scan_period_A(self):
        return (self.scan_cells[0] * self.cell_xy_A[0], self.scan_cells[1] * self.cell_xy_A[1])


# --------------------------------------------------------------------------- structures


def _perovskite_columns(a_x, a_y, a_z, nx, ny, a_sym, b_sym, b_shift_y=None, o_shift=None):
    """Columns of a perovskite viewed along a cube axis, A at the cell corner.

    Projected layout per cell (i, j) (fractions of the cell): A at (0, 0) (z = 0);
    B at (1/2, 1/2) (z = a_z/2) sharing its column with one O (z = 0); O at (1/2, 0)
    and (0, 1/2) (z = a_z/2).

    b_shift_y(i, j) -> shift (A) of B and of every O of cell (i, j) along y (rigid B-O
    framework shift relative to the A cage). o_shift(kind, i, j) -> list over z layers
    of (dx, dy) for the equatorial O columns (rotation frames).
    """
    cols = []
    for j in range(ny):
        for i in range(nx):
            x0, y0 = i * a_x, j * a_y
            d = b_shift_y(i, j) if b_shift_y else 0.0
            cols.append(Column("A", a_sym, i, j, [(a_sym, x0, y0, 0.0)]))
            cols.append(
                Column(
                    "B",
                    f"{b_sym}+O",
                    i,
                    j,
                    [
                        (b_sym, x0 + a_x / 2, y0 + a_y / 2 + d, a_z / 2),
                        ("O", x0 + a_x / 2, y0 + a_y / 2 + d, 0.0),
                    ],
                )
            )
            for kind, (fx, fy) in (("Ox", (0.5, 0.0)), ("Oy", (0.0, 0.5))):
                layers = o_shift(kind, i, j) if o_shift else [(0.0, 0.0)]
                atoms = []
                for k, (dx, dy) in enumerate(layers):
                    atoms.append(
                        ("O", x0 + fx * a_x + dx, y0 + fy * a_y + d + dy, k * a_z + a_z / 2)
                    )
                cols.append(Column("O", "O", i, j, atoms, {"o_kind": kind}))
    return cols


def sto_specimen():
    a = A_STO_PM / 100
    n = 3
    cols = _perovskite_columns(a, a, a, n, n, "Sr", "Ti")
    return Specimen(
        "sto", n * a, n * a, a, (n, n), (a, a), cols,
        "SrTiO3 cubic, viewed along [001]; A = Sr, B column = Ti+O, pure O columns.",
        scan_cells=(n, n),
    )


def domain_specimen(n_domain=6, ny=3, shift_pm=30.0):
    """PbTiO3 viewed along [100]: x = b (wall normal), y = c (polar axis, along walls)."""
    ax, ay, az = A_PTO_PM / 100, C_PTO_PM / 100, A_PTO_PM / 100
    nx = 2 * n_domain

    def domain(i):
        return 1 if i < n_domain else -1

    def shift(i, j):
        return domain(i) * shift_pm / 100

    cols = _perovskite_columns(ax, ay, az, nx, ny, "Pb", "Ti", b_shift_y=shift)
    for c in cols:
        c.extra["domain"] = domain(c.i)
        c.extra["imposed_dy_pm"] = 0.0 if c.site == "A" else domain(c.i) * shift_pm
    return Specimen(
        "pto", nx * ax, ny * ay, az, (nx, ny), (ax, ay), cols,
        "PbTiO3 tetragonal viewed along [100]; x along b (normal to the 180 deg walls), "
        "y along c (polar axis). Cells i = 0..n-1 of each period: domain +1, i = n..2n-1: "
        "domain -1. In domain s the Ti and all O of the cell are displaced by s*shift "
        "along +y relative to the Pb cage (rigid Ti-O framework shift; the Ti column and "
        "its O share one projected position).",
        {"n_cells_per_domain": n_domain, "imposed_shift_pm": shift_pm,
         "walls_x_cells": [0.0, float(n_domain)], "wall_planes": "Pb-O planes between "
         "cell columns i = n-1 and n (and 2n-1 and 0 by periodicity): the wall lies on "
         "the Pb / O(0, 1/2) column row at x = n*a"},
        scan_cells=(nx, ny),
    )


def bto_specimen(shift_pm=10.0, n=3):
    """BaTiO3 single domain viewed along [100]: x = b, y = c (polar axis)."""
    ax, ay, az = A_BTO_PM / 100, C_BTO_PM / 100, A_BTO_PM / 100
    cols = _perovskite_columns(ax, ay, az, n, n, "Ba", "Ti", b_shift_y=lambda i, j: shift_pm / 100)
    for c in cols:
        c.extra["imposed_dy_pm"] = 0.0 if c.site == "A" else shift_pm
    return Specimen(
        "bto", n * ax, n * ay, az, (n, n), (ax, ay), cols,
        "BaTiO3 tetragonal viewed along [100]; x along b, y along c (polar axis). Ti and "
        "all O displaced by +shift along +y relative to the Ba cage (rigid Ti-O framework "
        "shift, exaggerated from the real ~5 pm). In BaTiO3 P is parallel to the Ti shift "
        "relative to Ba (CHECK-VALUES section 3), so P points along +y.",
        {"imposed_shift_pm": shift_pm},
        scan_cells=(n, n),
    )


def rotation_specimen(phi_deg=4.0, phase="+", n=4):
    """SrTiO3-like perovskite with an octahedral rotation about the beam (z) axis.

    phase '+': a0a0c+ (every layer along the beam rotated alike); '-': a0a0c- (alternate
    layers opposite). Octahedron of cell (i, j) rotates by s_ij * phi with
    s_ij = (-1)**(i + j) (from +x towards +y). Its equatorial O move perpendicular to the
    B-B bond by (a/2) tan(phi), the B-O-B geometry of rigid-lattice rotation.
    """
    a = A_STO_PM / 100
    t = (a / 2) * math.tan(math.radians(phi_deg))
    n_layers = 1 if phase == "+" else 2

    def sign(i, j):
        return 1 if (i + j) % 2 == 0 else -1

    def o_shift(kind, i, j):
        # Ox column at (i+1/2, j): shared by the octahedra of cells (i, j-1) (its top O)
        # and (i, j) (its bottom O); bottom-O rule of cell (i, j): dx = +t*s_ij.
        # Oy column at (i, j+1/2): right O of cell (i-1, j), left O of cell (i, j);
        # left-O rule of cell (i, j): dy = -t*s_ij.
        s = sign(i, j)
        out = []
        for k in range(n_layers):
            lk = 1 if (phase == "+" or k % 2 == 0) else -1
            out.append((lk * s * t, 0.0) if kind == "Ox" else (0.0, -lk * s * t))
        return out

    cols = _perovskite_columns(a, a, a, n, n, "Sr", "Ti", o_shift=o_shift)
    for c in cols:
        if c.site == "B":
            c.extra["rotation_sign"] = sign(c.i, c.j)
            c.extra["imposed_angle_deg"] = sign(c.i, c.j) * phi_deg if phase == "+" else 0.0
        if c.site == "O":
            shifts = o_shift(c.extra["o_kind"], c.i, c.j)
            c.extra["layer_shifts_pm"] = [[dx * 100, dy * 100] for dx, dy in shifts]
            mean = np.mean(np.array(shifts), axis=0) * 100
            c.extra["imposed_dxy_pm"] = [float(mean[0]), float(mean[1])]
    desc = (
        f"SrTiO3-like cubic perovskite (a = {A_STO_PM} pm) viewed along the rotation axis "
        f"[001], octahedral rotation a0a0c{phase} of {phi_deg} deg. Octahedron of cell (i, j) "
        "(B at ((i+1/2)a, (j+1/2)a)) rotates by s*phi, s = (-1)^(i+j), from +x towards +y. "
    )
    if phase == "+":
        desc += "In-phase along the beam: the projection shows the +-phi checkerboard."
    else:
        desc += (
            "Antiphase along the beam: alternate layers carry +delta and -delta, so each O "
            "column's mean projected position is undisplaced (no net projected rotation), "
            "only elongated O columns."
        )
    return Specimen(
        f"rot{phase}", n * a, n * a, n_layers * a, (n, n), (a, a), cols, desc,
        {"phi_deg": phi_deg, "phase": phase, "o_shift_pm": t * 100,
         "angle_convention": "angle of the B->O bond from the B-B bond direction, "
         "positive from +x towards +y; cell (i, j) rotates by (-1)^(i+j) * phi"},
        scan_cells=(n, n),
    )


# --------------------------------------------------------------------------- simulation


def slice_thickness_A(spec: Specimen) -> float:
    """Half a perovskite cell: one atomic plane per slice."""
    return spec.z_period_A / (2 * round(spec.z_period_A / 3.9))


def build_atoms(spec: Specimen, n_periods: int):
    """ASE Atoms of the specimen, thickness n_periods z periods, plus per-atom group ids.

    Atomic planes sit in the middle of their slices (z offset of half a slice), and the
    cell is exactly n_periods z periods thick.
    """
    from ase import Atoms

    dz = slice_thickness_A(spec) / 2
    symbols, pos, group = [], [], []
    for ci, col in enumerate(spec.columns):
        for sym, x, y, z in col.atoms:
            for k in range(n_periods):
                symbols.append(sym)
                pos.append((x % spec.lx_A, y % spec.ly_A, z + k * spec.z_period_A + dz))
                group.append(f"{ci}:{sym}")
    thickness = n_periods * spec.z_period_A
    atoms = Atoms(symbols, positions=pos, cell=[spec.lx_A, spec.ly_A, thickness], pbc=True)
    _, gid = np.unique(np.array(group), return_inverse=True)
    return atoms, gid, thickness


def phonon_ensemble(atoms, gid, n_configs, seed):
    """Frozen-phonon configurations (abTEM FrozenPhonons) in antithetic pairs.

    n_configs // 2 configurations are drawn with abTEM's FrozenPhonons; each is used
    with its displacements u and with -u (antithetic pair: both are equally likely
    samples of the symmetric Gaussian, and the first-order effect of u on the image
    cancels in the pair). Before that the in-plane displacements are re-centred per
    column and element, so each column's projected centroid is the truth position.
    """
    import abtem

    if n_configs < 2 or n_configs % 2:
        raise ValueError(f"n_configs must be an even number >= 2 (antithetic pairs), got {n_configs}")
    sig = {s: v for s, v in SIGMAS_A.items() if s in set(atoms.get_chemical_symbols())}
    fp = abtem.FrozenPhonons(atoms, num_configs=n_configs // 2, sigmas=sig, seed=seed)
    traj = []
    ngroups = gid.max() + 1
    counts = np.bincount(gid, minlength=ngroups)
    for conf in fp.to_atoms_ensemble().trajectory:
        d = conf.positions - atoms.positions
        for ax in range(2):
            mean = np.bincount(gid, weights=d[:, ax], minlength=ngroups) / counts
            d[:, ax] -= mean[gid]
        for sign in (1.0, -1.0):
            c = atoms.copy()
            c.positions = atoms.positions + sign * d
            traj.append(c)
    return abtem.AtomsEnsemble(traj), sig


def fourier_resample(img_yx, lx_pm, ly_pm, pixel_pm, shape):
    """Evaluate the Fourier series of one scanned period at the output pixel centres.

    img_yx: samples at x = k * lx/nx, y = l * ly/ny (k, l = 0..n-1), index [l, k].
    Returns (image, nyquist_fraction) where nyquist_fraction is the largest Fourier
    amplitude in the Nyquist row/column relative to the mean (should be ~0 for a
    band-limited, adequately sampled image).
    """
    ny, nx = img_yx.shape
    f = np.fft.fft2(img_yx) / (nx * ny)
    nyq = 0.0
    if nx % 2 == 0:
        nyq = max(nyq, np.abs(f[:, nx // 2]).max())
        f[:, nx // 2] = 0
    if ny % 2 == 0:
        nyq = max(nyq, np.abs(f[ny // 2, :]).max())
        f[ny // 2, :] = 0
    kx = np.fft.fftfreq(nx, d=1.0 / nx)
    ky = np.fft.fftfreq(ny, d=1.0 / ny)
    xs = np.arange(shape[1]) * pixel_pm
    ys = np.arange(shape[0]) * pixel_pm
    ex = np.exp(2j * np.pi * np.outer(xs, kx) / lx_pm)  # (W, nx)
    ey = np.exp(2j * np.pi * np.outer(ys, ky) / ly_pm)  # (H, ny)
    out = (ey @ f @ ex.T).real
    return out, float(nyq / abs(f[0, 0]))


def band_limit_check(img_yx, lx_pm, ly_pm):
    """Fraction of the non-DC power above the probe band limit 2 alpha / lambda."""
    from abtem.core.energy import energy2wavelength

    lam_pm = energy2wavelength(ENERGY_EV) * 100
    kmax = 2 * SEMIANGLE_MRAD * 1e-3 / lam_pm  # 1/pm
    ny, nx = img_yx.shape
    p = np.abs(np.fft.fft2(img_yx - img_yx.mean())) ** 2
    kx = np.fft.fftfreq(nx, d=lx_pm / nx)
    ky = np.fft.fftfreq(ny, d=ly_pm / ny)
    k = np.hypot(*np.meshgrid(kx, ky))
    return float(p[k > kmax * 1.001].sum() / max(p.sum(), 1e-30)), lam_pm


def simulate(spec, n_periods, n_configs, seed, gpts, interpolation, detectors):
    import abtem

    atoms, gid, thickness = build_atoms(spec, n_periods)
    ens, sig = phonon_ensemble(atoms, gid, n_configs, seed)
    pot = abtem.Potential(
        ens, gpts=gpts, slice_thickness=slice_thickness_A(spec),
        projection="infinite", parametrization="lobato",
    )
    sx_A, sy_A = spec.scan_period_A
    lx_pm, ly_pm = sx_A * 100, sy_A * 100
    nsx = int(math.ceil(lx_pm / MAX_SCAN_STEP_PM))
    nsy = int(math.ceil(ly_pm / MAX_SCAN_STEP_PM))
    scan = abtem.GridScan(start=(0, 0), end=(sx_A, sy_A), gpts=(nsx, nsy), endpoint=False)
    smat = abtem.SMatrix(
        potential=pot, energy=ENERGY_EV, semiangle_cutoff=SEMIANGLE_MRAD,
        interpolation=interpolation,
    )
    dets = [abtem.AnnularDetector(inner=lo, outer=hi) for lo, hi in detectors]
    t0 = time.perf_counter()
    meas = smat.scan(scan=scan, detectors=dets)
    meas = meas.compute() if isinstance(meas, list) else [meas.compute()]
    arrays = []
    for m in meas:
        arr = np.asarray(m.array)
        if arr.ndim != 2:
            raise RuntimeError(f"unexpected measurement shape {arr.shape}")
        arrays.append(arr.T.astype(np.float64))  # abTEM index [x, y] -> [y, x]
    wall = time.perf_counter() - t0
    info = {
        "potential_gpts": list(pot.gpts),
        "potential_sampling_pm": [s * 100 for s in pot.sampling],
        "slice_thickness_pm": pot.slice_thickness[0] * 100,
        "num_slices": pot.num_slices,
        "thickness_nm": thickness / 10,
        "n_z_periods": n_periods,
        "scan_gpts_xy": [nsx, nsy],
        "scan_step_pm": [lx_pm / nsx, ly_pm / nsy],
        "prism_interpolation": list(smat.interpolation),
        "prism_num_plane_waves": len(smat),
        "phonon_configs": n_configs,
        "phonon_seed": seed,
        "phonon_rms_displacement_per_axis_pm": {k: v * 100 for k, v in sig.items()},
        "phonon_model": "abtem.FrozenPhonons (Einstein, independent Gaussian per atom and "
        "axis); in-plane displacements re-centred per column and element in each "
        "configuration so every column's projected centroid is the truth position; "
        "configurations used in antithetic pairs (u, -u)",
        "max_detector_angle_supported_mrad": float(min(smat.cutoff_angles)) if hasattr(smat, "cutoff_angles") else None,
        "simulation_wall_s": wall,
    }
    return arrays, info


def simulate_exact(spec, n_periods, n_configs, seed, gpts, detectors):
    """Image Fourier coefficients from the full scattering matrix, without a scan.

    With interpolation factor 1 the probe at r_p is psi = sum_j c_j S_j with
    c_j = A(k_j) exp(-2 pi i k_j . r_p) (A: the aperture, abTEM's CTF), so the detector
    signal is I(r_p) = sum_{j,j'} c_j c_j'^* M_jj' with M_jj' = sum_k D(k) S_j(k) S_j'(k)^*:
    a Fourier series whose coefficient at q = k_j' - k_j is sum A_j A_j'^* M_jj'. This is
    the probe-by-probe multislice of a probe periodic with the supercell, evaluated
    exactly at every probe position, and avoids both the scan and PRISM's window
    approximation (used for the PbTiO3 domain supercell, whose interpolated PRISM
    result put the probe's periodic copies on the other domain). Checked against
    abTEM's own scan on SrTiO3 and on a non-centrosymmetric BaTiO3 cell (correlation
    0.99997; the ~3 % local difference comes from which k pixels on the coarse grid
    fall inside the annulus).

    Returns (list of (F, (N, M)) per detector, info); F[dn + N, dm + M] is the
    coefficient of exp(2 pi i (dn x / Lx + dm y / Ly)).
    """
    import abtem
    from abtem.core.energy import energy2wavelength
    from abtem.transfer import CTF

    atoms, gid, thickness = build_atoms(spec, n_periods)
    ens, sig = phonon_ensemble(atoms, gid, n_configs, seed)
    lam = energy2wavelength(ENERGY_EV)
    lx, ly = spec.lx_A, spec.ly_A
    out = [None] * len(detectors)
    t0 = time.perf_counter()
    for conf in ens.trajectory:
        pot = abtem.Potential(conf, gpts=gpts, slice_thickness=slice_thickness_A(spec),
                              projection="infinite", parametrization="lobato")
        smat = abtem.SMatrix(potential=pot, energy=ENERGY_EV, semiangle_cutoff=SEMIANGLE_MRAD,
                             interpolation=1, downsample=False)
        sa = smat.build().compute()
        arr = np.asarray(sa.array)  # (beams, nx, ny), each wave of unit total intensity
        kv = np.asarray(sa.wave_vectors, dtype=np.float64)
        nb, nx, ny = arr.shape
        spec_k = np.fft.fft2(arr, axes=(1, 2))
        del arr, sa
        theta = lam * np.hypot(np.fft.fftfreq(nx, d=lx / nx)[:, None],
                               np.fft.fftfreq(ny, d=ly / ny)[None, :]) * 1e3
        alpha = np.hypot(kv[:, 0], kv[:, 1]) * lam
        aperture = np.asarray(
            CTF(energy=ENERGY_EV, semiangle_cutoff=SEMIANGLE_MRAD)._evaluate_from_angular_grid(
                alpha, np.arctan2(kv[:, 0], kv[:, 1]))).astype(np.complex128)
        n = np.rint(kv[:, 0] * lx).astype(int)
        m = np.rint(kv[:, 1] * ly).astype(int)
        big_n, big_m = 2 * np.abs(n).max() + 1, 2 * np.abs(m).max() + 1
        dn = (n[None, :] - n[:, None]).ravel() + big_n
        dm = (m[None, :] - m[:, None]).ravel() + big_m
        for di, (lo, hi) in enumerate(detectors):
            sk = spec_k[:, (theta >= lo) & (theta < hi)]
            mjj = (sk @ sk.conj().T).astype(np.complex128)  # M[j, j'] = sum_k S_j S_j'^*
            w = (aperture[:, None] * aperture.conj()[None, :]) * mjj / np.sum(np.abs(aperture) ** 2)
            if out[di] is None:
                out[di] = np.zeros((2 * big_n + 1, 2 * big_m + 1), complex)
            np.add.at(out[di], (dn, dm), w.ravel())
        del spec_k
    wall = time.perf_counter() - t0
    coeffs = [(f / len(ens.trajectory), (big_n, big_m)) for f in out]
    info = {
        "method": "full PRISM scattering matrix (interpolation 1, every plane wave inside "
        "the aperture), image Fourier coefficients computed directly (no scan); see "
        "simulate_exact in make_frames.py",
        "potential_gpts": list(pot.gpts),
        "potential_sampling_pm": [s_ * 100 for s_ in pot.sampling],
        "slice_thickness_pm": pot.slice_thickness[0] * 100,
        "num_slices": pot.num_slices,
        "thickness_nm": thickness / 10,
        "n_z_periods": n_periods,
        "scan_gpts_xy": None,
        "scan_step_pm": None,
        "prism_interpolation": [1, 1],
        "prism_num_plane_waves": int(nb),
        "phonon_configs": n_configs,
        "phonon_seed": seed,
        "phonon_rms_displacement_per_axis_pm": {k: v * 100 for k, v in sig.items()},
        "phonon_model": "abtem.FrozenPhonons (Einstein, independent Gaussian per atom and "
        "axis); in-plane displacements re-centred per column and element in each "
        "configuration so every column's projected centroid is the truth position; "
        "configurations used in antithetic pairs (u, -u)",
        "max_detector_angle_supported_mrad": float(min(smat.cutoff_angles)),
        "simulation_wall_s": wall,
    }
    return coeffs, info


def evaluate_series(coeff, lx_pm, ly_pm, pixel_pm, shape):
    """Evaluate a Fourier series F[dn + N, dm + M] at the output pixel centres ([y, x])."""
    f, (big_n, big_m) = coeff
    dn = np.arange(-big_n, big_n + 1)
    dm = np.arange(-big_m, big_m + 1)
    ex = np.exp(2j * np.pi * np.outer(np.arange(shape[1]) * pixel_pm, dn) / lx_pm)
    ey = np.exp(2j * np.pi * np.outer(np.arange(shape[0]) * pixel_pm, dm) / ly_pm)
    return (ey @ f.T @ ex.T).real


# --------------------------------------------------------------------------- output


def truth_columns(spec: Specimen, pixel_pm: float, shape, origin_pm=(0.0, 0.0)):
    """Every column whose centre lies inside the frame, in output pixel coordinates."""
    h, w = shape
    lx, ly = spec.lx_A * 100, spec.ly_A * 100
    nx_t = int(math.ceil(w * pixel_pm / lx)) + 1
    ny_t = int(math.ceil(h * pixel_pm / ly)) + 1
    ncx, ncy = spec.n_cells_xy
    out = []
    for ty in range(-1, ny_t):
        for tx in range(-1, nx_t):
            for col_index, col in enumerate(spec.columns):
                mx, my = col.mean_xy * 100
                x_px = (mx + tx * lx - origin_pm[0]) / pixel_pm
                y_px = (my + ty * ly - origin_pm[1]) / pixel_pm
                if not (-0.5 <= x_px < w - 0.5 and -0.5 <= y_px < h - 0.5):
                    continue
                rec = {
                    "x_px": round(float(x_px), 5),
                    "y_px": round(float(y_px), 5),
                    "site": col.site,
                    "elements": col.label,
                    "i": col.i + tx * ncx,
                    "j": col.j + ty * ncy,
                    "supercell_column": col_index,
                }
                for k, v in col.extra.items():
                    rec[k] = v
                out.append(rec)
    out.sort(key=lambda r: (r["y_px"], r["x_px"]))
    return out


def save_frame(outdir, name, image, meta, spec, pixel_pm):
    image = image.astype(np.float32)
    if image.shape != OUT_SHAPE:
        raise RuntimeError(f"{name}: shape {image.shape}")
    np.save(os.path.join(outdir, f"{name}.npy"), image)
    meta = dict(meta)
    meta["supercell_atoms"] = {
        "note": "every atom of one z period of the supercell, per projected column: "
        "[element, x_pm, y_pm, z_pm] in the supercell frame (x_pm / pixel_size_pm = "
        "x_px of the first tile); the specimen is this repeated n_z_periods times along "
        "the beam, plus frozen-phonon displacements",
        "columns": [
            {"site": c.site, "elements": c.label, "i": c.i, "j": c.j,
             "atoms": [[s, round(x * 100, 4), round(y * 100, 4), round(z * 100, 4)]
                       for s, x, y, z in c.atoms]}
            for c in spec.columns
        ],
    }
    truth = truth_columns(spec, pixel_pm, OUT_SHAPE)
    text = json.dumps(meta, indent=1)
    rows = ",\n  ".join(json.dumps(r, separators=(",", ":")) for r in truth)
    text = text[:-2] + ',\n "truth": [\n  ' + rows + "\n ]\n}\n"
    json.loads(text)  # self-check
    with open(os.path.join(outdir, f"{name}.json"), "w") as fh:
        fh.write(text)
    print(f"  wrote {name}: mean {image.mean():.4g}, min {image.min():.4g}, max {image.max():.4g}, "
          f"{len(truth)} columns", flush=True)


PLANS = {
    # name: (specimen factory, target thickness nm, gpts, interpolation, detectors,
    #        frames {frame name: (detector index, pixel size pm, detector label)})
    "sto": (sto_specimen, 8.0, (240, 240), 1, [HAADF_MRAD, ABF_MRAD],
            {"sto_haadf": (0, 20.0, "HAADF"), "sto_abf": (1, 20.0, "ABF")}),
    # The domain supercell is not periodic on a PRISM window, so its image is computed
    # exactly from the full scattering matrix ("exact", see simulate_exact).
    "pto": (domain_specimen, 8.2, (960, 256), "exact", [HAADF_MRAD],
            {"pto_domains_haadf": (0, 20.0, "HAADF")}),
    "bto": (bto_specimen, 8.0, (250, 250), 1, [HAADF_MRAD],
            {"bto_haadf": (0, 20.0, "HAADF")}),
    "rot+": (lambda: rotation_specimen(4.0, "+"), 8.0, (192, 192), 1, [ABF_MRAD],
             {"abf_rotation": (0, 18.0, "ABF")}),
    "rot-": (lambda: rotation_specimen(4.0, "-"), 8.0, (192, 192), 1, [ABF_MRAD],
             {"abf_rotation_antiphase": (0, 18.0, "ABF")}),
}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--only", default="", help="comma-separated plan names: " + ",".join(PLANS))
    ap.add_argument("--configs", type=int, default=4,
                    help="frozen-phonon configurations (even: antithetic pairs)")
    ap.add_argument("--thickness-scale", type=float, default=1.0,
                    help="multiply the target thicknesses (e.g. 0.4 for a quick look)")
    ap.add_argument("--seed", type=int, default=20261203)
    ap.add_argument("--threads", type=int, default=2)
    args = ap.parse_args(argv)

    import abtem
    import dask

    dask.config.set(scheduler="threads", num_workers=args.threads)
    abtem.config.set({"diagnostics.progress_bar": False, "fftw.threads": 1,
                      "fftw.planning_effort": "FFTW_ESTIMATE"})
    os.makedirs(args.out, exist_ok=True)
    names = [n for n in (args.only.split(",") if args.only else PLANS) if n]
    t_all = time.perf_counter()
    for pname in names:
        factory, thick_nm, gpts, interp, dets, frames = PLANS[pname]
        spec = factory()
        n_periods = max(1, int(math.ceil(args.thickness_scale * thick_nm * 10 / spec.z_period_A - 1e-6)))
        print(f"{pname}: {n_periods} z periods, {args.configs} phonon configs", flush=True)
        seed = args.seed + 17 * list(PLANS).index(pname)  # per specimen, independent of --only
        exact = interp == "exact"
        if exact:
            coeffs, info = simulate_exact(spec, n_periods, args.configs, seed, gpts, dets)
        else:
            arrays, info = simulate(spec, n_periods, args.configs, seed, gpts, interp, dets)
        print(f"  simulated in {info['simulation_wall_s']:.1f} s", flush=True)
        for fname, (di, pixel_pm, det_label) in frames.items():
            lx_pm, ly_pm = spec.scan_period_A[0] * 100, spec.scan_period_A[1] * 100
            if exact:
                img = evaluate_series(coeffs[di], lx_pm, ly_pm, pixel_pm, OUT_SHAPE)
                # Every coefficient sits at q = k_j' - k_j with |k| <= alpha / lambda.
                nyq, above = 0.0, 0.0
            else:
                img, nyq = fourier_resample(arrays[di], lx_pm, ly_pm, pixel_pm, OUT_SHAPE)
            n_negative = int((img < 0).sum())
            img = np.clip(img, 0.0, None)
            if not exact:
                above, lam_pm = band_limit_check(arrays[di], lx_pm, ly_pm)
            else:
                from abtem.core.energy import energy2wavelength

                lam_pm = energy2wavelength(ENERGY_EV) * 100
            meta = {
                "name": fname,
                "description": spec.description,
                "generator": "tests/data/multislice/make_frames.py",
                "simulator": f"abTEM {abtem.__version__} (PRISM multislice), ASE for atoms",
                "method": info.get("method", "abTEM SMatrix.scan over one supercell period, "
                                   "Fourier-extended to the frame"),
                "citations": [
                    "J. Madsen & T. Susi, The abTEM code: transmission electron microscopy "
                    "from first principles, Open Research Europe 1, 24 (2021)",
                    "E. J. Kirkland, Advanced Computing in Electron Microscopy, 2nd ed. "
                    "(Springer, 2010)",
                ],
                "image_convention": "array[row, col] = [y, x]; pixel (r, c) is the signal "
                "with the probe at x = c*pixel_size_pm, y = r*pixel_size_pm from the scan "
                "origin; pixel centres at integer coordinates; values are the fraction of "
                "the incident probe intensity on the detector (noiseless)",
                "pixel_size_pm": pixel_pm,
                "shape": list(OUT_SHAPE),
                "detector": det_label,
                "detector_angles_mrad": list(dets[di]),
                "energy_kV": ENERGY_EV / 1e3,
                "wavelength_pm": lam_pm,
                "convergence_semiangle_mrad": SEMIANGLE_MRAD,
                "aberrations": "none (defocus 0: probe focused on the entrance surface)",
                "source_size": "none (point source), no partial temporal coherence",
                "potential": "independent-atom model, Lobato parametrisation, infinite "
                "projection per slice",
                "supercell_pm": [lx_pm, ly_pm],
                "supercell_cells": list(spec.n_cells_xy),
                "unit_cell_xy_pm": [spec.cell_xy_A[0] * 100, spec.cell_xy_A[1] * 100],
                "z_period_pm": spec.z_period_A * 100,
                "scan_period_pm": [lx_pm, ly_pm],
                "scan_period_cells": list(spec.scan_cells),
                "tiling": "one period of the static structure (scan_period_pm, origin = "
                "supercell origin) scanned inside the larger periodic supercell "
                "(supercell_pm), then extended to the frame by its Fourier series (exact "
                "for a band-limited periodic image); the frame repeats with scan_period_pm, "
                "so frozen-phonon sampling noise repeats too",
                "fourier_power_above_band_limit": above,
                "nyquist_bin_amplitude_rel": nyq,
                "negative_pixels_clipped": n_negative,
                "specimen": spec.extra,
                **info,
                "seconds_total_this_specimen": None,
            }
            meta["seconds_total_this_specimen"] = info["simulation_wall_s"]
            save_frame(args.out, fname, img, meta, spec, pixel_pm)
    print(f"all done in {time.perf_counter() - t_all:.1f} s", flush=True)


if __name__ == "__main__":
    main()
