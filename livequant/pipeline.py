"""One frame through the analysis stages: a pure function, no I/O, no threads.

``analyze_frame(frame, settings) -> FrameResult`` is what ``livequant
analyze``, the daemon's worker processes and (later) a cluster task all call.
It is picklable and keeps no state between calls.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from livequant.analysis.calibration import check_calibration
from livequant.analysis.cells import compute_cells
from livequant.analysis.polarization import MaterialConstants
from livequant.analysis.columns import detect_columns
from livequant.analysis.lattice import NoLatticeError, find_lattice, lattice_from_columns
from livequant.analysis.refine import refine_columns
from livequant.analysis.sublattice import assign_sites
from livequant.analysis.types import Columns, Lattice
from livequant.config import Settings, get_material
from livequant.frames import Frame, FrameMeta

__all__ = ["FrameResult", "analyze_frame", "STATUS_OK", "STATUS_NO_LATTICE", "limit_threads",
           "threads_per_worker"]

STATUS_OK = "ok"
STATUS_NO_LATTICE = "no-lattice"

#: Detectors whose columns are dark on a bright background.
INVERTED_DETECTORS = ("ABF", "BF", "IBF")

#: Exponent n of the column-strength rule of thumb ``Z^n`` on HAADF (CHECK-VALUES
#: section 9: n = 1.6-1.9 in practice).
_HAADF_EXPONENT = 1.7
_Z_OXYGEN = 8


def a_column_stronger(material, detector: str) -> bool:
    """Whether the A column scatters more than the B-O column on this detector.

    Along [001] an A column holds one A atom per cell length and the B column
    one B and one O atom.  On HAADF the atoms add as ``Z^n`` (Sr 38^1.7 >
    Ti 22^1.7 + O 8^1.7).  On the bright-field family (ABF, BF) they do not:
    on multislice ABF frames of SrTiO3 (abTEM; tests/data/multislice) the
    column depths are Sr : Ti-O : O = 2.0 : 1.6 : 1.0, set by each column's
    heaviest atom (about Z^0.45) with the B column's oxygen adding little, so
    the A column is the stronger whenever its cation is the heavier.  (An
    additive ``Z^(1/3)`` rule, used here before, made Ti-O the stronger and
    swapped A and B on such frames: the tilt then read zero.)  Without a
    material the A column is assumed the stronger.
    """
    if material is None:
        return True
    if (detector or "HAADF").upper() in INVERTED_DETECTORS:
        return material.z_a >= material.z_b
    n = _HAADF_EXPONENT
    return material.z_a ** n >= material.z_b ** n + _Z_OXYGEN ** n


@dataclass(frozen=True)
class FrameResult:
    """Everything the analysis found in one frame.

    Attributes
    ----------
    status : str
        ``"ok"`` or ``"no-lattice"`` (blank, noise, amorphous: no columns made).
    lattice : Lattice or None
        Basis vectors refined from the fitted A-site columns (or from the
        Fourier transform when too few columns were found).
    columns : Columns or None
    cells : object or None
        Per-cell descriptors (filled by the descriptor stage).  It provides
        ``csv_fields() -> list[str]`` (starting ``i, j, x_pm, y_pm``),
        ``csv_rows() -> list[dict]`` and ``summary() -> dict`` (JSON-ready).
    calibration : dict or None
        The implied calibration error against a reference material, when
        one is configured.
    timings_s : dict
        Seconds spent per stage.
    """

    frame_id: str
    meta: FrameMeta
    shape: tuple[int, int]
    status: str
    message: str = ""
    lattice: Lattice | None = None
    columns: Columns | None = None
    cells: Any = None
    calibration: dict | None = None
    timings_s: dict = field(default_factory=dict)
    extra: dict = field(default_factory=dict)

    @property
    def pixel_size_pm(self) -> float:
        return self.meta.pixel_size_pm

    @property
    def ok(self) -> bool:
        return self.status == STATUS_OK

    def lattice_summary(self) -> dict | None:
        """Lattice parameters in pm and degrees with their uncertainties."""
        if self.lattice is None:
            return None
        lat, px = self.lattice, self.pixel_size_pm
        return {
            "a_pm": lat.a_px * px,
            "sigma_a_pm": lat.sigma_a_px * px,
            "b_pm": lat.b_px * px,
            "sigma_b_pm": lat.sigma_b_px * px,
            "angle_deg": lat.angle_deg,
            "sigma_angle_deg": lat.sigma_angle_deg,
            "orientation_deg": lat.orientation_deg,
            "quality": lat.quality,
            "method": lat.method,
        }

    def summary(self) -> dict[str, Any]:
        """A JSON-ready summary: the content of ``summary.json`` and the ``frame`` event."""
        counts: dict[str, int] = {}
        n_converged = 0
        median_sigma_pm = None
        if self.columns is not None and len(self.columns):
            labels, n = np.unique(self.columns.sublattice, return_counts=True)
            counts = {str(k): int(v) for k, v in zip(labels, n)}
            n_converged = int(self.columns.converged.sum())
            ok = self.columns.converged
            if ok.any():
                median_sigma_pm = float(np.median(self.columns.sigma_positions_px[ok]) *
                                        self.pixel_size_pm)
        out = {
            "frame_id": self.frame_id,
            "status": self.status,
            "message": self.message,
            "shape": list(self.shape),
            "pixel_size_pm": self.pixel_size_pm,
            "n_columns": 0 if self.columns is None else len(self.columns),
            "n_converged": n_converged,
            "columns_per_sublattice": counts,
            "median_sigma_position_pm": median_sigma_pm,
            "lattice": self.lattice_summary(),
            "calibration": self.calibration,
            "timings_s": dict(self.timings_s),
            "meta": self.meta.to_json(),
        }
        tilted = None if self.columns is None else self.columns.extra.get("tilted_background")
        if tilted:
            out["tilted_background"] = {k: dict(v) for k, v in tilted.items()}
        if self.cells is not None:
            out["cells"] = self.cells.summary()
        out.update(self.extra)
        return out


def _calibration_setting(calibration: dict, meta) -> str:
    """How to apply the pixel size the calibration check implies, where it is set."""
    px = calibration["implied_pixel_size_pm"]
    digits = max(1, 1 - math.floor(math.log10(max(calibration["sigma_implied_pixel_size_pm"],
                                                   1e-9))))
    value = f"{px:.{min(digits, 6)}f}"
    if "pixel_size_source" not in meta.extra:  # it came from the frame's sidecar
        return f'"pixel_size_pm": {value} in the frame\'s sidecar (the sidecar sets it)'
    return f"--pixel-size-pm {value} (or frame_defaults.pixel_size_pm = {value})"


def _undo_scan_drift(columns, frame, shape, cfg, velocity):
    """Columns moved back to the frame's middle time (or unchanged), and what was done."""
    if velocity is None:
        return columns, None
    info = {"velocity_nm_per_s": [float(v) for v in np.asarray(velocity, float).reshape(2)],
            "flyback_s": cfg.flyback_s, "applied": False}
    if not cfg.enabled:
        info["reason"] = "analysis.scan_drift.enabled is false"
        return columns, info
    dwell = frame.meta.dwell_time_us
    if not dwell:
        info["reason"] = "the frame gives no dwell time: line timing unknown"
        return columns, info
    from dataclasses import replace

    from livequant.analysis.scan_drift import correct_scan_drift, line_time_s
    from livequant.analysis.types import readonly

    moved = correct_scan_drift(columns.positions_px, velocity_nm_per_s=velocity,
                               pixel_size_pm=frame.meta.pixel_size_pm,
                               scan_rotation_deg=frame.meta.scan_rotation_deg, shape=shape,
                               dwell_time_us=dwell, flyback_s=cfg.flyback_s)
    shift = np.hypot(*(moved - columns.positions_px).T)
    info.update(applied=True, line_time_s=line_time_s(cols=shape[1], dwell_time_us=dwell,
                                                      flyback_s=cfg.flyback_s),
                max_shift_px=float(shift.max()) if shift.size else 0.0)
    return replace(columns, positions_px=readonly(moved)), info


def _strain_reference(cells_cfg, shape):
    """The strain reference for compute_cells: a name, or a pixel mask of the region."""
    if cells_cfg.reference != "region":
        return cells_cfg.reference
    x0, y0, x1, y1 = cells_cfg.reference_region_px
    mask = np.zeros(shape, dtype=bool)
    r0, r1 = max(0, int(np.floor(y0))), min(shape[0], int(np.ceil(y1)))
    c0, c1 = max(0, int(np.floor(x0))), min(shape[1], int(np.ceil(x1)))
    mask[r0:r1, c0:c1] = True
    return mask


def _wall_physics(cells, material, cfg) -> dict:
    """The ``physics`` block of the summary (analysis.wallphysics) for the frame's wall."""
    from livequant.analysis.landau import LandauPotential
    from livequant.analysis.wallphysics import wall_physics

    potential, note = None, ""
    coeffs = getattr(material, "landau", None)
    if coeffs is not None:
        potential = LandauPotential.from_haun(
            coeffs.alpha1_slope_m_per_F_K * (cfg.temperature_K - coeffs.t0_K), coeffs.alpha11,
            coeffs.alpha111)
        note = (f"{material.name} at {cfg.temperature_K:g} K: {coeffs.source} "
                f"[{coeffs.status}]")
    v = cells.values
    arrays = {"x_pm": cells.x_pm, "y_pm": cells.y_pm, "i": cells.i, "j": cells.j,
              **{k: v[k] for k in ("dx_pm", "dy_pm", "sigma_dx_pm", "sigma_dy_pm")}}
    return wall_physics(arrays, cells.info.get("wall"), potential=potential,
                        material_note=note, min_rows=cfg.roughness_min_rows,
                        n_boot=cfg.roughness_bootstrap)


def threads_per_worker(n_workers: int, n_cores: int | None = None) -> int:
    """Compute threads each of `n_workers` analysis processes should use so that
    together they do not oversubscribe the cores: ``max(1, cores // workers)``.
    Cores are the ones this process may run on (its CPU affinity)."""
    import os

    if n_cores is None:
        try:
            n_cores = len(os.sched_getaffinity(0))
        except AttributeError:  # not on Linux
            n_cores = os.cpu_count() or 1
    if n_workers < 1:
        raise ValueError(f"`n_workers` must be at least 1, got {n_workers}")
    return max(1, int(n_cores) // int(n_workers))


def limit_threads(n_threads: int) -> int:
    """Use at most `n_threads` compute threads in this process's analysis.

    The compiled kernels (numba) start with one thread per core in *every*
    process, so N worker processes on N cores would run N x N threads; call this
    once at the start of each worker (e.g. in the pool initializer) with
    ``threads_per_worker(n_workers)``.  The Fourier transforms follow the same
    number.  Returns the number now in effect (capped by numba's maximum,
    ``NUMBA_NUM_THREADS``).
    """
    import numba

    if n_threads < 1:
        raise ValueError(f"`n_threads` must be at least 1, got {n_threads}")
    n = min(int(n_threads), int(numba.config.NUMBA_NUM_THREADS))
    numba.set_num_threads(n)
    return n


def analyze_frame(frame: Frame, settings: Settings | None = None, *,
                  scan_drift_nm_per_s=None, min_noise_scale: float = 0.0) -> FrameResult:
    """Run lattice finding, column detection, site assignment and refinement.

    Parameters
    ----------
    frame : Frame
    settings : Settings, optional
        Defaults to the built-in defaults.
    scan_drift_nm_per_s : (vx, vy), optional
        The specimen's drift velocity on the stage while the frame was scanned
        (the daemon's drift model).  With it, and a dwell time in the frame's
        metadata, the fitted columns are moved back to the frame's middle time
        (:mod:`livequant.analysis.scan_drift`) before the lattice and the cell
        descriptors are computed; ``summary()["scan_drift_correction"]`` says
        what was done.  The GPA strain works on the image and is not corrected.
    min_noise_scale : float
        Floor of the column fit's noise scale (see
        :func:`~livequant.analysis.refine.refine_columns`): 1.0 for the
        registered sum of a series, whose resampled noise is smoother than
        Poisson noise of the same counts.

    Returns
    -------
    FrameResult
        With ``status == "no-lattice"`` and no columns when the frame holds no
        periodic lattice.  Never raises for a valid frame; programming errors
        still propagate.
    """
    settings = settings or Settings()
    cfg = settings.analysis
    series_block = (frame.meta.extra or {}).get("series")
    if (frame.meta.extra or {}).get("series_role") == "aggregate":
        # The registered sum of a series (livequant.series): its drift is already
        # undone, and its resampled noise must not shrink the uncertainties.
        scan_drift_nm_per_s = None
        min_noise_scale = max(min_noise_scale, 1.0)
    image = np.asarray(frame.pixels, dtype=np.float64)
    timings: dict[str, float] = {}
    base = dict(frame_id=frame.frame_id, meta=frame.meta, shape=frame.shape)

    material = (get_material(cfg.material, user_file=cfg.materials_file) if cfg.material
                else None)
    expected = None
    if material is not None and cfg.sublattice.projection == "perovskite_001":
        px = frame.meta.pixel_size_pm
        expected = (material.a_pm / px, material.c_pm / px)
    t0 = time.perf_counter()
    try:
        fft_lattice = find_lattice(
            image,
            min_spacing_px=cfg.lattice.min_spacing_px,
            max_spacing_fraction=cfg.lattice.max_spacing_fraction,
            min_quality=cfg.lattice.min_quality,
            expected_spacings_px=expected,
        )
    except NoLatticeError as exc:
        timings["lattice"] = time.perf_counter() - t0
        return FrameResult(**base, status=STATUS_NO_LATTICE, message=str(exc), timings_s=timings)
    timings["lattice"] = time.perf_counter() - t0

    inverted = (frame.meta.detector or "").upper() in INVERTED_DETECTORS
    t0 = time.perf_counter()
    candidates = detect_columns(
        image,
        fft_lattice,
        min_distance_fraction=cfg.detection.min_distance_fraction,
        min_prominence_sigma=cfg.detection.min_prominence_sigma,
        border_fraction=cfg.detection.border_fraction,
        inverted=inverted,
    )
    timings["detect"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    keep_oxygen = cfg.sublattice.oxygen == "always" or (cfg.sublattice.oxygen == "auto" and inverted)
    sites = assign_sites(
        candidates,
        fft_lattice,
        projection=cfg.sublattice.projection,
        keep_oxygen=keep_oxygen,
        a_is_brighter=a_column_stronger(material, frame.meta.detector),
    )
    timings["sublattice"] = time.perf_counter() - t0
    if len(sites) == 0:
        timings["total"] = float(sum(timings.values()))
        return FrameResult(**base, status=STATUS_NO_LATTICE, lattice=fft_lattice,
                           message="a periodic pattern was found but no indexable columns "
                                   f"({sites.message})", timings_s=timings)

    t0 = time.perf_counter()
    columns = refine_columns(
        image,
        sites.positions_px,
        sublattice=sites.sublattice,
        ij=sites.ij,
        spacing_px=min(fft_lattice.a_px, fft_lattice.b_px),
        window_fraction=cfg.refine.window_fraction,
        max_iterations=cfg.refine.max_iterations,
        tolerance_px=cfg.refine.tolerance_px,
        elliptical=cfg.refine.elliptical,
        joint_neighbours=cfg.refine.joint_neighbours,
        weighting=cfg.refine.weighting,
        gain=cfg.refine.gain_counts_per_electron,
        min_significance=cfg.refine.min_significance,
        fixed_shape_fallback=cfg.refine.fixed_shape_fallback,
        min_noise_scale=min_noise_scale,
        background=cfg.refine.background,
        window_sigmas=cfg.refine.window_sigmas,
    )
    timings["refine"] = time.perf_counter() - t0

    columns, drift_info = _undo_scan_drift(columns, frame, image.shape, cfg.scan_drift,
                                           scan_drift_nm_per_s)

    t0 = time.perf_counter()
    lattice = lattice_from_columns(columns, fallback=fft_lattice)
    calibration = None
    if cfg.calibration.reference_material:
        ref = get_material(cfg.calibration.reference_material, user_file=cfg.materials_file)
        calibration = check_calibration(
            lattice,
            pixel_size_pm=frame.meta.pixel_size_pm,
            reference_a_pm=ref.a_pm,
            reference_c_pm=ref.c_pm,
            axis=cfg.calibration.axis,
            material=ref.name,
        )
        calibration["apply"] = _calibration_setting(calibration, frame.meta)
    timings["lattice_refine"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    cells, cells_message = None, ""
    try:
        cells = compute_cells(
            columns,
            lattice,
            pixel_size_pm=frame.meta.pixel_size_pm,
            material=None if material is None else MaterialConstants.from_object(material),
            reference=_strain_reference(cfg.cells, image.shape),
            image=image if cfg.cells.gpa else None,
            detector=frame.meta.detector or "HAADF",
            gpa_mask_sigma_fraction=cfg.cells.gpa_mask_sigma_fraction,
            min_snr_topology=cfg.cells.min_snr_topology,
            max_wall_chi2=cfg.cells.max_wall_chi2,
        )
    except ValueError as exc:  # e.g. reference="material" without a material: say so per frame
        cells_message = f"no cell descriptors: {exc}"
    timings["cells"] = time.perf_counter() - t0
    extra = {} if drift_info is None else {"scan_drift_correction": drift_info}
    if cells is not None and cfg.physics.enabled:
        t0 = time.perf_counter()
        extra["physics"] = _wall_physics(cells, material, cfg.physics)
        timings["physics"] = time.perf_counter() - t0
    if series_block is not None:
        extra["series"] = series_block
    timings["total"] = float(sum(timings.values()))
    return FrameResult(**base, status=STATUS_OK, lattice=lattice, columns=columns, cells=cells,
                       calibration=calibration, timings_s=timings, extra=extra,
                       message="; ".join(m for m in (sites.message, columns.message,
                                                     cells_message) if m))
