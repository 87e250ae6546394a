"""Small perfect-lattice frames with exact truth, for the tests of other parts.

:func:`perovskite_frame` renders one frame of a single-material perovskite
with optional uniform polar displacement and octahedral rotation, no drift
and no scan distortion unless asked for.  It goes through the same specimen
and scan engine as the full simulator, so its truth is the same kind of
object (:class:`~sim_instrument.engine.FrameTruth`).
"""

from __future__ import annotations

import math

from sim_instrument.engine import Acquisition, DriftModel, ScanEngine
from sim_instrument.scenario import scenario_from_dict
from sim_instrument.specimen import Specimen

__all__ = ["perovskite_frame", "perovskite_engine"]


def perovskite_frame(material: str = "SrTiO3", shape=(256, 256), *, pixel_size_pm: float = 10.0,
                     rotation_deg: float = 0.0, b_displacement_pm=(0.0, 0.0),
                     o_displacement_pm: float = 0.0, tilt_deg: float = 0.0,
                     dwell_time_us: float = 2.0, beam_current_pa: float = 20.0,
                     probe_sigma_pm: float = 40.0, probe_tail_fraction: float = 0.0,
                     probe_tail_sigma_pm: float = 150.0, detector: str = "HAADF",
                     drift_nm_per_s=(0.0, 0.0), center_nm=(0.0, 0.0), noise: bool = True,
                     seed: int = 0, frame_id: str = "quick_00001",
                     materials=None) -> Acquisition:
    """Render a frame of a perfect perovskite lattice viewed along [001].

    Parameters
    ----------
    material : str
        A name from ``config/materials.toml``; the lattice has ``a_pm`` along
        the specimen x axis and ``c_pm`` along y.
    shape : (rows, cols)
    pixel_size_pm : float
    rotation_deg : float
        Scan rotation: the lattice appears rotated by ``-rotation_deg`` in the image.
    b_displacement_pm : (dx, dy)
        Uniform shift of every B column from its A-cage centre, specimen
        axes, pm.  ``o_displacement_pm`` shifts O columns along the same
        direction by that amount.
    tilt_deg : float
        Octahedral rotation about [001] (antiphase, seen on O columns).
    dwell_time_us, beam_current_pa : float
        Dose per pixel is ``I t / e`` (20 pA, 2 us -> 250 electrons).
    probe_sigma_pm : float
    probe_tail_fraction, probe_tail_sigma_pm : float
        A broad weak tail of the probe (fraction of its intensity, and its
        RMS width): heavy columns then reach into their neighbours, as real
        probe tails and channelling make them do.
    detector : {"HAADF", "ABF"}
    drift_nm_per_s : (vx, vy)
        Linear drift during the scan (no random walk).
    center_nm : (x, y)
        Frame centre on the specimen; ``(0, 0)`` is an A column.
    noise : bool
        False gives the expected image (no shot noise).
    seed : int

    Returns
    -------
    Acquisition
        ``pixels`` (float32), ``sidecar`` and ``truth``.

    Examples
    --------
    >>> acq = perovskite_frame("SrTiO3", (64, 64), noise=False)
    >>> acq.pixels.shape, sorted(set(acq.truth.sublattice.tolist()))
    ((64, 64), ['A', 'B', 'Oa', 'Ob'])
    """
    rows, cols = (int(v) for v in shape)
    dx, dy = (float(v) for v in b_displacement_pm)
    mag = math.hypot(dx, dy)
    extent_nm = 2.5 * max(rows, cols) * pixel_size_pm / 1000.0 + 4.0
    extent_nm += 2.0 * math.hypot(*center_nm)
    layer = {"material": material, "tilt_deg": tilt_deg}
    if mag > 0 or o_displacement_pm:
        direction = math.degrees(math.atan2(dy, dx)) if mag > 0 else 90.0
        layer["polar"] = {"b_displacement_pm": mag, "o_displacement_pm": o_displacement_pm,
                          "direction_deg": direction}
    raw = {
        "name": f"quick-{material}",
        "size_nm": [extent_nm, extent_nm],
        "reference_material": material,
        "layers": [layer],
        "seed": seed,
        "instrument": {
            "beam_current_pa": beam_current_pa,
            "dwell_time_us": dwell_time_us,
            "probe": {"sigma_pm": probe_sigma_pm, "tail_fraction": probe_tail_fraction,
                      "tail_sigma_pm": probe_tail_sigma_pm},
            "drift": {"velocity_nm_per_s": [0.0, 0.0], "random_walk_nm_per_sqrt_s": 0.0},
            "detector": {"mode": detector.upper()},
        },
    }
    engine = _engine(raw, drift_nm_per_s=drift_nm_per_s, seed=seed, materials=materials)
    return engine.acquire(center_nm, cols * pixel_size_pm / 1000.0, (rows, cols),
                          scan_rotation_deg=rotation_deg, noise=noise, frame_id=frame_id)


def _engine(raw, *, drift_nm_per_s, seed, materials, random_walk=0.0) -> ScanEngine:
    specimen = Specimen(scenario_from_dict(raw, where="perovskite_frame", materials=materials),
                        materials=materials)
    return ScanEngine(specimen, drift=DriftModel(drift_nm_per_s, random_walk, seed=seed + 1),
                      seed=seed)


def perovskite_engine(material: str = "SrTiO3", *, extent_nm: float = 40.0,
                      dwell_time_us: float = 1.0, beam_current_pa: float = 20.0,
                      probe_sigma_pm: float = 40.0, detector: str = "HAADF",
                      drift_nm_per_s=(0.0, 0.0), random_walk_nm_per_sqrt_s: float = 0.0,
                      line_jitter_pm: float = 0.0, flyback_s: float = 0.0,
                      flyback_amplitude_pm: float = 0.0, seed: int = 0,
                      frame_prefix: str = "quick", materials=None) -> ScanEngine:
    """A scan engine over a perfect single-material lattice, for series and pairs.

    Unlike :func:`perovskite_frame` the engine (its clock, drift and noise)
    lives on, so :meth:`ScanEngine.acquire_series` and
    :meth:`ScanEngine.acquire_orthogonal_pair` see one continuous drift.
    `line_jitter_pm` is the rms jitter of each scan line along the fast axis.
    """
    raw = {
        "name": f"quick-{material}",
        "size_nm": [extent_nm, extent_nm],
        "reference_material": material,
        "layers": [{"material": material}],
        "seed": seed,
        "instrument": {
            "beam_current_pa": beam_current_pa,
            "dwell_time_us": dwell_time_us,
            "probe": {"sigma_pm": probe_sigma_pm, "tail_fraction": 0.0},
            "drift": {"velocity_nm_per_s": list(drift_nm_per_s),
                      "random_walk_nm_per_sqrt_s": random_walk_nm_per_sqrt_s},
            "distortion": {"line_jitter_pm": line_jitter_pm, "flyback_s": flyback_s,
                           "flyback_amplitude_pm": flyback_amplitude_pm},
            "detector": {"mode": detector.upper()},
        },
    }
    engine = _engine(raw, drift_nm_per_s=drift_nm_per_s, seed=seed, materials=materials,
                     random_walk=random_walk_nm_per_sqrt_s)
    engine.frame_prefix = frame_prefix
    return engine
