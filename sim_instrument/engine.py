"""The scan engine: how a STEM frame of the virtual specimen is formed.

A frame is a raster of scan lines.  Line ``l`` starts at time
``t0 + l * t_line`` (``t_line = n_cols * t_px + t_flyback``) and pixel ``c`` of
it is recorded over ``[c t_px, (c + 1) t_px]`` after that (CHECK-VALUES
section 6, linear-drift image model).  The probe's commanded stage position
is the raster rotated by the scan rotation about the commanded centre; the
specimen sits on the stage displaced by the drift ``d(t)`` (linear velocity
plus a random walk that carries over from frame to frame), so the probe
samples the specimen at ``q(t) - d(t)``.

Along one line the sampled specimen position moves on a straight path (the
random walk is stepped once per line), so each atomic column contributes to
a line a 1D Gaussian in the along-line coordinate times the Gaussian of its
distance from the line.  The signal is averaged over each pixel's dwell as
the probe sweeps across it (a difference of normal CDFs), which makes the
simulated image a slightly different model from the 2D Gaussians the
analysis fits, as a real image is.

Detected electrons per pixel are Poisson with mean ``N_e * f``, where
``N_e = I t_px / e`` (CHECK-VALUES section 9) and ``f`` is the fraction of the
beam reaching the detector; gain, offset and read noise follow.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone

import numpy as np
from scipy import ndimage
from scipy.special import ndtr

from sim_instrument.scenario import DriftSpec, InstrumentSpec
from sim_instrument.specimen import Specimen

__all__ = [
    "ELEMENTARY_CHARGE_C",
    "DriftModel",
    "ScanEngine",
    "Acquisition",
    "electrons_per_pixel",
    "render_columns",
]

#: SI 2019 exact value (CHECK-VALUES, units line).
ELEMENTARY_CHARGE_C = 1.602176634e-19

_CUT_SIGMA = 5.0  # a column contributes out to this many probe sigmas


def electrons_per_pixel(beam_current_pa: float, dwell_time_us: float) -> float:
    """Mean beam electrons per pixel, ``I t / e`` (20 pA, 2 us -> 249.7)."""
    return beam_current_pa * 1e-12 * dwell_time_us * 1e-6 / ELEMENTARY_CHARGE_C


class DriftModel:
    """Specimen drift on the stage: ``d(t) = v t + W(t)``, W a 2D random walk.

    The state (time and walk) persists between calls, so consecutive frames
    see one continuous drift history.  Times must not go backwards.

    Parameters
    ----------
    velocity_nm_per_s : (2,) float
        Linear drift velocity in stage (x, y), nm/s.
    random_walk_nm_per_sqrt_s : float
        Standard deviation of the walk per axis after one second, nm.
    seed : int
    """

    def __init__(self, velocity_nm_per_s=(0.0, 0.0), random_walk_nm_per_sqrt_s: float = 0.0,
                 seed: int = 0):
        self.velocity_nm_per_s = np.asarray(velocity_nm_per_s, float).reshape(2)
        if random_walk_nm_per_sqrt_s < 0:
            raise ValueError(f"`random_walk_nm_per_sqrt_s` must be >= 0, got "
                             f"{random_walk_nm_per_sqrt_s}")
        self.random_walk_nm_per_sqrt_s = float(random_walk_nm_per_sqrt_s)
        self._rng = np.random.default_rng(seed)
        self._t_s = 0.0
        self._walk_nm = np.zeros(2)
        self._pending: list = []  # (time_s, offset_nm) of scheduled jumps

    @classmethod
    def from_spec(cls, spec: DriftSpec, seed: int = 0) -> "DriftModel":
        return cls(spec.velocity_nm_per_s, spec.random_walk_nm_per_sqrt_s, seed=seed)

    @classmethod
    def none(cls) -> "DriftModel":
        return cls((0.0, 0.0), 0.0)

    @property
    def time_s(self) -> float:
        return self._t_s

    def offsets_nm(self, times_s) -> np.ndarray:
        """Drift at increasing `times_s` (N,), returning (N, 2) nm; advances the state."""
        times = np.asarray(times_s, float).reshape(-1)
        if times.size == 0:
            return np.zeros((0, 2))
        dt = np.diff(np.concatenate([[self._t_s], times]))
        if np.any(dt < -1e-12):
            raise ValueError("drift times must not go backwards "
                             f"(state at {self._t_s} s, asked for {times.min()} s)")
        dt = np.clip(dt, 0.0, None)
        steps = self._rng.standard_normal((times.size, 2)) * (
            self.random_walk_nm_per_sqrt_s * np.sqrt(dt))[:, None]
        walk = self._walk_nm + np.cumsum(steps, axis=0)
        due = [j for j in self._pending if j[0] <= times[-1]]
        self._pending = [j for j in self._pending if j[0] > times[-1]]
        for t_j, off in due:
            walk[times >= t_j] += off
        self._walk_nm = walk[-1].copy()
        self._t_s = float(times[-1])
        return times[:, None] * self.velocity_nm_per_s[None, :] + walk

    def peek_nm(self) -> np.ndarray:
        """Drift at the current time without advancing."""
        return self._t_s * self.velocity_nm_per_s + self._walk_nm

    def jump(self, offset_nm, *, at_s: float | None = None) -> None:
        """A sudden specimen displacement (a holder settling, a charging jump).

        From now on, or from the simulated time `at_s` on (which may fall
        inside the next frame: the lines scanned after it see the jump).
        """
        offset = np.asarray(offset_nm, float).reshape(2)
        if at_s is None or at_s <= self._t_s:
            self._walk_nm = self._walk_nm + offset
        else:
            self._pending.append((float(at_s), offset))


@dataclass(frozen=True)
class _Raster:
    """Specimen-frame geometry of one frame's scan lines."""

    line_start_nm: np.ndarray   # (R, 2): specimen position of pixel-centre 0 of each line
    step_nm: np.ndarray         # (2,): specimen-frame move per pixel along a line
    n_cols: int
    t_px_s: float
    flyback_amplitude_nm: float
    flyback_time_s: float

    @property
    def step_len_nm(self) -> float:
        return float(np.hypot(*self.step_nm))

    @property
    def u_hat(self) -> np.ndarray:
        return self.step_nm / self.step_len_nm

    @property
    def u_perp(self) -> np.ndarray:
        u = self.u_hat
        return np.array([-u[1], u[0]])

    def edge_coordinate_nm(self, col_edge) -> np.ndarray:
        """Along-line coordinate of pixel edges (pixel-centre units), nm."""
        s = col_edge * self.step_len_nm
        if self.flyback_amplitude_nm > 0:
            # The beam lags behind at the start of a line and settles
            # exponentially; time since the line start is (c + 0.5) t_px.
            s = s - self.flyback_amplitude_nm * np.exp(
                -np.clip(col_edge + 0.5, 0.0, None) * self.t_px_s / self.flyback_time_s)
        return s


def _row_guess(raster: _Raster, xy_nm: np.ndarray) -> np.ndarray:
    """Fractional line index nearest to each specimen point (two fixed-point passes)."""
    L = raster.line_start_nm
    n = L.shape[0]
    perp = raster.u_perp  # lines advance along +perp, one pitch per line
    pitch = float((L[-1] - L[0]) @ perp) / max(n - 1, 1) if n > 1 else 1.0
    if abs(pitch) < 1e-12:
        pitch = 1.0
    row = ((xy_nm - L[0]) @ perp) / pitch
    for _ in range(2):
        r = np.clip(np.round(row).astype(int), 0, n - 1)
        row = r + ((xy_nm - L[r]) * perp).sum(axis=1) / pitch
    return row


def render_columns(raster: _Raster, shape_px: tuple[int, int], xy_nm: np.ndarray,
                   weight_nm2: np.ndarray, sigma_nm: float, *,
                   max_work: int = 3_000_000) -> np.ndarray:
    """Sum of columns seen by a Gaussian probe, averaged over each pixel's dwell.

    Parameters
    ----------
    raster : _Raster
        Per-line specimen-frame geometry.
    shape_px : (rows, cols)
    xy_nm : (K, 2) float
        Column positions in the specimen frame, nm.
    weight_nm2 : (K,) float
        Column cross-sections ``Q`` (nm^2); the probe is normalised to unit
        integral, so a column adds ``Q / (2 pi sigma^2)`` at its peak.
    sigma_nm : float
        Probe standard deviation.

    Returns
    -------
    ndarray (rows, cols)
        Fraction of the beam scattered by the columns, per pixel.
    """
    n_rows, n_cols = shape_px
    out = np.zeros(n_rows * n_cols)
    if len(xy_nm) == 0:
        return out.reshape(shape_px)
    L = raster.line_start_nm
    u_hat, u_perp, step = raster.u_hat, raster.u_perp, raster.step_len_nm
    pitch = float(np.hypot(*(L[-1] - L[0]))) / max(n_rows - 1, 1) if n_rows > 1 else step
    cut = _CUT_SIGMA * sigma_nm
    m = int(math.ceil(cut / max(pitch, 1e-12))) + 1
    row_offsets = np.arange(-m, m + 2)
    hw = int(math.ceil(cut / step)) + int(math.ceil(raster.flyback_amplitude_nm / step)) + 1
    col_offsets = np.arange(-hw, hw + 1)
    rows0 = np.floor(_row_guess(raster, xy_nm)).astype(int)
    norm = 1.0 / (math.sqrt(2 * math.pi) * sigma_nm)

    # Along-line coordinate of every pixel edge, looked up by integer column
    # (edge c - 1/2 is entry c + 2 hw).
    edge_cols = np.arange(-2 * hw, n_cols + 2 * hw + 1)
    s_edge = raster.edge_coordinate_nm(edge_cols - 0.5)
    chunk = max(1, max_work // (row_offsets.size * col_offsets.size))
    for start in range(0, len(xy_nm), chunk):
        sl = slice(start, start + chunk)
        rows = rows0[sl, None] + row_offsets[None, :]
        valid = (rows >= 0) & (rows < n_rows)
        w = xy_nm[sl, None, :] - L[np.clip(rows, 0, n_rows - 1)]
        t = w @ u_hat
        d = w @ u_perp
        keep = valid & (np.abs(d) < cut)
        if not keep.any():
            continue
        k_idx, r_idx = np.nonzero(keep)
        t_p = t[k_idx, r_idx]
        amp = weight_nm2[sl][k_idx] * norm * np.exp(-0.5 * (d[k_idx, r_idx] / sigma_nm) ** 2)
        row_p = rows[k_idx, r_idx]
        c0 = np.clip(np.floor(t_p / step + 0.5).astype(int), -hw, n_cols + hw - 1)
        cols = c0[:, None] + col_offsets[None, :]
        # Mean over the dwell of the probe sweeping each pixel: the CDF at the
        # W + 1 edges of the window, differenced.
        s_e = s_edge[cols[:, :1] + 2 * hw + np.arange(col_offsets.size + 1)[None, :]]
        cdf = ndtr((s_e - t_p[:, None]) / sigma_nm)
        val = amp[:, None] * np.diff(cdf, axis=1) / np.diff(s_e, axis=1)
        ok = (cols >= 0) & (cols < n_cols)
        flat = (row_p[:, None] * n_cols + cols)[ok]
        out += np.bincount(flat, weights=val[ok], minlength=out.size)
    return out.reshape(shape_px)


def locate_in_frame(raster: _Raster, n_rows: int, xy_nm: np.ndarray) -> np.ndarray:
    """Pixel ``(row, col)`` at which the probe passes over each specimen point.

    The row is where the point's signed distance from the scan lines changes
    sign (linear interpolation between lines), the column where the
    along-line coordinate reaches it (Newton on the flyback-warped
    coordinate).  Points the raster does not reach get NaN.
    """
    xy_nm = np.asarray(xy_nm, float).reshape(-1, 2)
    out = np.full((len(xy_nm), 2), np.nan)
    if len(xy_nm) == 0:
        return out
    L = raster.line_start_nm
    row0 = np.floor(_row_guess(raster, xy_nm)).astype(int)
    offs = np.arange(-2, 3)
    rows = np.clip(row0[:, None] + offs[None, :], 0, n_rows - 1)
    w = xy_nm[:, None, :] - L[rows]
    d = w @ raster.u_perp       # decreases from line to line
    t = w @ raster.u_hat
    found = np.zeros(len(xy_nm), bool)
    for k in range(offs.size - 1):
        a, b = d[:, k], d[:, k + 1]
        hit = (~found) & (a >= 0) & (b < 0) & (rows[:, k + 1] == rows[:, k] + 1)
        frac = np.where(hit, a / np.where(hit, a - b, 1.0), 0.0)
        out[hit, 0] = rows[hit, k] + frac[hit]
        t_star = t[:, k] + frac * (t[:, k + 1] - t[:, k])
        out[hit, 1] = t_star[hit]
        found |= hit
    # Points within half a line of the first or last line: extrapolate.
    pitch = float(np.hypot(*(L[-1] - L[0]))) / max(n_rows - 1, 1) if n_rows > 1 else 1.0
    for edge in (0, n_rows - 1):
        we = xy_nm - L[edge]
        de = we @ raster.u_perp
        near = (~found) & (np.abs(de) <= 0.5 * pitch)
        out[near, 0] = edge - de[near] / pitch
        out[near, 1] = (we @ raster.u_hat)[near]
        found |= near
    # Column: solve edge_coordinate(c) = t* (monotone, concave when flyback > 0).
    tstar = out[:, 1]
    step = raster.step_len_nm
    c = (tstar + raster.flyback_amplitude_nm) / step
    if raster.flyback_amplitude_nm > 0:
        k = raster.t_px_s / raster.flyback_time_s
        for _ in range(30):
            e = np.exp(-np.clip(c + 0.5, 0.0, None) * k)
            f = c * step - raster.flyback_amplitude_nm * e - tstar
            fp = step + raster.flyback_amplitude_nm * k * e * (c + 0.5 > 0)
            c = c - f / fp
    out[:, 1] = c
    return out


# ---------------------------------------------------------------- truth


@dataclass(frozen=True)
class FrameTruth:
    """What was really in a frame.  Arrays are per column or per cell.

    Column arrays: ``positions_px`` (N, 2) ``(row, col)`` where the probe
    crossed the column; ``positions_pm`` the same times the pixel size;
    ``xy_nm`` the specimen position; ``sublattice``, ``ij``, ``z``,
    ``z_partner``, ``occupancy``, ``layer``.

    Cell arrays: ``cell_ij`` (M, 2); ``cell_b_px`` (M, 2) ``(row, col)`` of the B
    column; ``cell_displacement_b_pm`` (M, 2) the B shift from its A cage as
    ``(x, y)`` image components (x along columns, y along rows), pm;
    ``cell_polarization_dir`` (M, 2) image ``(x, y)`` unit vectors;
    ``cell_a_pm``, ``cell_c_pm`` (cell edges along specimen x and y, pm),
    ``cell_tilt_deg``, ``cell_layer``.

    ``meta`` holds the scalars and feature lists: frame geometry, the drift
    applied (velocity, offset at start and end, per-line offsets in
    ``drift_per_line_nm``), walls, vortex cores and interfaces with their
    pixel positions.
    """

    arrays: dict
    meta: dict

    def __getattr__(self, name):
        arrays = object.__getattribute__(self, "arrays")
        if name in arrays:
            return arrays[name]
        raise AttributeError(name)

    @property
    def frame_id(self) -> str:
        return self.meta["frame_id"]

    def save(self, directory) -> tuple:
        """Write ``FRAME_ID.npz`` (arrays) and ``FRAME_ID.json`` (meta), atomically."""
        import os
        from pathlib import Path

        from livequant.frames import write_json_atomic

        directory = Path(directory)
        directory.mkdir(parents=True, exist_ok=True)
        npz = directory / f"{self.frame_id}.npz"
        tmp = directory / f".{self.frame_id}.npz.part"
        with open(tmp, "wb") as fh:
            np.savez_compressed(fh, **{k: np.asarray(v) for k, v in self.arrays.items()})
        os.replace(tmp, npz)
        js = directory / f"{self.frame_id}.json"
        write_json_atomic(js, self.meta)
        return npz, js

    @classmethod
    def load(cls, path) -> "FrameTruth":
        """Read a truth saved by :meth:`save` (give either file or the stem)."""
        import json
        from pathlib import Path

        p = Path(path)
        stem = p.with_suffix("") if p.suffix in (".npz", ".json") else p
        with np.load(stem.with_suffix(".npz"), allow_pickle=False) as z:
            arrays = {k: z[k] for k in z.files}
        meta = json.loads(stem.with_suffix(".json").read_text(encoding="utf-8"))
        return cls(arrays=arrays, meta=meta)


@dataclass(frozen=True)
class Acquisition:
    """One simulated frame: pixels, its sidecar (DESIGN.md keys) and the truth."""

    pixels: np.ndarray
    sidecar: dict
    truth: FrameTruth

    @property
    def frame_id(self) -> str:
        return self.sidecar["frame_id"]


# ---------------------------------------------------------------- engine


class ScanEngine:
    """A simulated STEM: scans the virtual specimen on request.

    Parameters
    ----------
    specimen : Specimen
    instrument : InstrumentSpec, optional
        Probe, detector, distortions and default beam settings (default: the
        scenario's ``[instrument]`` table).
    drift : DriftModel, DriftSpec or None, optional
        ``None`` uses the instrument's drift; pass ``DriftModel.none()`` for a
        drift-free instrument.
    seed : int
        Seeds shot noise, line jitter and (when built here) the drift walk.
    start_time : datetime, optional
        Wall-clock time of simulated t = 0, for ``acquired_at``.
    frame_prefix : str
        Frame ids are ``PREFIX_00001``, ``PREFIX_00002``, ...
    """

    def __init__(self, specimen: Specimen, *, instrument: InstrumentSpec | None = None,
                 drift: "DriftModel | DriftSpec | None" = None, seed: int = 0,
                 start_time: datetime | None = None, frame_prefix: str = "sim"):
        self.specimen = specimen
        self.instrument = instrument or specimen.scenario.instrument
        if drift is None:
            drift = self.instrument.drift
        if isinstance(drift, DriftSpec):
            drift = DriftModel.from_spec(drift, seed=seed + 1)
        self.drift = drift
        self._rng = np.random.default_rng(seed)
        self.start_time = start_time or datetime.now(timezone.utc).replace(microsecond=0)
        self.frame_prefix = frame_prefix
        self.frame_count = 0

    @property
    def time_s(self) -> float:
        """Simulated session clock, seconds since t = 0."""
        return self.drift.time_s

    def wait(self, seconds: float) -> None:
        """Let simulated time pass (the specimen keeps drifting)."""
        if seconds < 0:
            raise ValueError(f"`seconds` must be >= 0, got {seconds}")
        self.drift.offsets_nm([self.time_s + seconds])

    def catch_up(self, now: datetime | None = None) -> float:
        """Let simulated time reach the wall clock (opt-in, for a live loop).

        The simulated clock normally advances only by acquisition and
        :meth:`wait`; beside a live daemon the specimen should keep drifting
        while nobody scans.  Advances the clock to ``now - start_time`` when
        that is later, and returns the seconds added (0 when already there).
        """
        now = now or datetime.now(timezone.utc)
        behind = (now - self.start_time).total_seconds() - self.time_s
        if behind > 0:
            self.wait(behind)
            return behind
        return 0.0

    def frame_time_s(self, shape_px, dwell_time_us: float) -> float:
        """Acquisition time of one frame: ``rows * (cols * t_px + t_flyback)``."""
        rows, cols = shape_px
        return rows * (cols * dwell_time_us * 1e-6 + self.instrument.distortion.flyback_s)

    def acquire(self, center_nm=(0.0, 0.0), fov_nm: float = 20.0, shape_px=(512, 512), *,
                scan_rotation_deg: float = 0.0, dwell_time_us: float | None = None,
                beam_current_pa: float | None = None, detector: str | None = None,
                frame_id: str | None = None, noise: bool = True,
                dtype: str = "float32", extra: dict | None = None) -> Acquisition:
        """Scan one frame.

        Parameters
        ----------
        center_nm : (x, y)
            Commanded stage position of the frame centre, nm.  The sidecar
            reports this; the drift makes the specimen under it differ.
        fov_nm : float
            Field of view along the fast-scan axis (``cols * pixel size``), nm.
        shape_px : (rows, cols)
        scan_rotation_deg : float
            Rotation of the raster relative to the stage axes.
        dwell_time_us, beam_current_pa : float, optional
            Default from the instrument settings.
        detector : {"HAADF", "ABF"}, optional
        noise : bool
            False returns the expected signal (gain times mean counts plus
            offset) with no shot or read noise.
        dtype : {"float32", "float64", "uint16", "uint32"}
            Pixel type of the returned image (integers are rounded, clipped).

        Returns
        -------
        Acquisition
        """
        rows, cols = (int(v) for v in shape_px)
        if rows < 8 or cols < 8:
            raise ValueError(f"`shape_px` must be at least (8, 8), got {shape_px}")
        if not fov_nm > 0:
            raise ValueError(f"`fov_nm` must be > 0, got {fov_nm}")
        inst = self.instrument
        dwell = float(dwell_time_us if dwell_time_us is not None else inst.dwell_time_us)
        current = float(beam_current_pa if beam_current_pa is not None else inst.beam_current_pa)
        if dwell <= 0 or current <= 0:
            raise ValueError(f"`dwell_time_us` and `beam_current_pa` must be > 0, got "
                             f"{dwell}, {current}")
        det = inst.detector if detector is None else inst.detector.model_copy(
            update={"mode": detector.upper()})
        if det.mode not in ("HAADF", "ABF"):
            raise ValueError(f"`detector` must be 'HAADF' or 'ABF', got {detector!r}")
        dist = inst.distortion
        probe = inst.probe
        pixel_nm = float(fov_nm) / cols
        t_px = dwell * 1e-6
        t_line = cols * t_px + dist.flyback_s
        t0 = self.time_s
        # A time-varying specimen (moving walls, annihilating cores) is held at its state
        # at the middle of the frame.
        self.specimen.set_time(t0 + rows * t_line / 2)

        theta = math.radians(scan_rotation_deg)
        e_f = np.array([math.cos(theta), math.sin(theta)])
        e_s = np.array([-math.sin(theta), math.cos(theta)])
        center = np.asarray(center_nm, float).reshape(2)
        line_idx = np.arange(rows)
        commanded0 = (center[None, :] + ((0 - (cols - 1) / 2) * pixel_nm) * e_f[None, :]
                      + ((line_idx - (rows - 1) / 2) * pixel_nm)[:, None] * e_s[None, :])
        # Drift sampled at the centre of pixel 0 of each line, then at frame end.
        times = t0 + line_idx * t_line + 0.5 * t_px
        drift_lines = self.drift.offsets_nm(np.concatenate([times, [t0 + rows * t_line]]))
        drift_end = drift_lines[-1]
        drift_lines = drift_lines[:-1]
        jitter = (self._rng.standard_normal(rows) * dist.line_jitter_pm / 1000.0
                  if dist.line_jitter_pm > 0 else np.zeros(rows))
        line_start = commanded0 + jitter[:, None] * e_f[None, :] - drift_lines
        step = pixel_nm * e_f - self.drift.velocity_nm_per_s * t_px
        raster = _Raster(line_start_nm=line_start, step_nm=step, n_cols=cols, t_px_s=t_px,
                         flyback_amplitude_nm=dist.flyback_amplitude_pm / 1000.0,
                         flyback_time_s=dist.flyback_time_us * 1e-6)

        # Columns the probe can reach: bounding box of all sampled positions.
        sigma_nm = probe.sigma_pm / 1000.0
        reach = _CUT_SIGMA * sigma_nm
        ends = np.concatenate([line_start, line_start + (cols - 1) * step[None, :]])
        lo = ends.min(axis=0) - reach - raster.flyback_amplitude_nm
        hi = ends.max(axis=0) + reach + raster.flyback_amplitude_nm
        columns = self.specimen.columns_in((lo[0], hi[0], lo[1], hi[1]))

        if det.mode == "HAADF":
            q_nm2 = det.haadf_cross_section_pm2 * 1e-6 * columns.scattering(det.haadf_exponent)
            base, sign = det.haadf_background_fraction, 1.0
        else:
            q_nm2 = det.abf_cross_section_pm2 * 1e-6 * columns.scattering(
                det.abf_exponent, partner_weight=det.abf_partner_weight)
            base, sign = det.abf_bright_fraction, -1.0
        if probe.tail_fraction > 0:
            # The broad tail is the core image blurred further: a unit Gaussian
            # of width sigma convolved with one of sqrt(st^2 - s^2) is the unit
            # Gaussian of width st.  Columns beyond the frame edge are missing
            # from the blur (reflected instead), a small error in a weak tail.
            core_only = render_columns(raster, (rows, cols), columns.xy_nm, q_nm2, sigma_nm)
            extra_sigma_px = math.sqrt(max(probe.tail_sigma_pm**2 - probe.sigma_pm**2, 0.0)) \
                / (pixel_nm * 1000.0)
            signal = ((1.0 - probe.tail_fraction) * core_only + probe.tail_fraction
                      * ndimage.gaussian_filter(core_only, extra_sigma_px, mode="reflect"))
        else:
            signal = render_columns(raster, (rows, cols), columns.xy_nm, q_nm2, sigma_nm)
        fraction = np.clip(base + sign * signal, 0.0, 1.0)
        mean_e = electrons_per_pixel(current, dwell) * fraction
        if noise:
            image = det.gain * self._rng.poisson(mean_e).astype(np.float64) + det.offset
            if det.read_noise > 0:
                image += det.read_noise * self._rng.standard_normal(image.shape)
        else:
            image = det.gain * mean_e + det.offset
        pixels = _to_dtype(image, dtype)

        self.frame_count += 1
        fid = frame_id or f"{self.frame_prefix}_{self.frame_count:05d}"
        acquired = self.start_time + timedelta(seconds=t0)
        sidecar = {
            "frame_id": fid,
            "pixel_size_pm": pixel_nm * 1000.0,
            "dwell_time_us": dwell,
            "stage_x_nm": float(center[0]),
            "stage_y_nm": float(center[1]),
            "scan_rotation_deg": float(scan_rotation_deg),
            "acquired_at": acquired.isoformat(),
            "detector": det.mode,
            "beam_current_pa": current,
            "frame_time_s": rows * t_line,
            "source": "sim_instrument",
            "scenario": self.specimen.scenario.name,
        }
        if extra:
            sidecar.update(extra)
        truth = self._truth(fid, raster, (rows, cols), pixel_nm, columns, e_f, e_s, sidecar,
                            drift_lines, drift_end, t0, t_line)
        return Acquisition(pixels=pixels, sidecar=sidecar, truth=truth)

    def acquire_series(self, n_frames: int, center_nm=(0.0, 0.0), fov_nm: float = 5.12,
                       shape_px=(512, 512), *, series_id: str | None = None,
                       dwell_time_us: float | None = None, gap_s: float = 0.0,
                       scan_rotation_deg: float = 0.0, jump_before: dict | None = None,
                       jump_during: dict | None = None, **kwargs) -> list[Acquisition]:
        """A fast-scan series: `n_frames` frames of one region, one after the other.

        Every frame carries ``series_id`` in its sidecar (DESIGN.md) and its own
        truth; the drift, the per-line jitter and the flyback of the instrument
        act on every frame as on any other.

        Parameters
        ----------
        n_frames : int
        center_nm, fov_nm, shape_px, scan_rotation_deg, dwell_time_us :
            As in :meth:`acquire` (a fast dwell is the point of a series).
        series_id : str, optional
            Default ``PREFIX_series_NNNNN`` after the first frame's number.
        gap_s : float
            Dead time between frames (the scan's return), seconds.
        jump_before : dict, optional
            ``{frame_index: (dx_nm, dy_nm)}``: the specimen jumps by that much
            just before that frame starts (a frame that must not be averaged).
        jump_during : dict, optional
            ``{frame_index: (dx_nm, dy_nm)}``: the jump happens half-way
            through that frame's scan.
        **kwargs
            Passed to :meth:`acquire`.
        """
        if n_frames < 1:
            raise ValueError(f"`n_frames` must be >= 1, got {n_frames}")
        if gap_s < 0:
            raise ValueError(f"`gap_s` must be >= 0, got {gap_s}")
        sid = series_id or f"{self.frame_prefix}_series_{self.frame_count + 1:05d}"
        jumps = dict(jump_before or {})
        mid_jumps = dict(jump_during or {})
        user_extra = dict(kwargs.pop("extra", None) or {})
        out = []
        for k in range(int(n_frames)):
            if k in jumps:
                self.drift.jump(jumps[k])
            if k in mid_jumps:
                dwell = float(dwell_time_us if dwell_time_us is not None
                              else self.instrument.dwell_time_us)
                half = 0.5 * self.frame_time_s(shape_px, dwell)
                self.drift.jump(mid_jumps[k], at_s=self.time_s + half)
            extra = {**user_extra, "series_id": sid, "series_index": k}
            acq = self.acquire(center_nm, fov_nm, shape_px, scan_rotation_deg=scan_rotation_deg,
                               dwell_time_us=dwell_time_us, extra=extra, **kwargs)
            if k in jumps or k in mid_jumps:
                acq.truth.meta["jump_nm"] = [float(v) for v in jumps.get(k, mid_jumps.get(k))]
                acq.truth.meta["jump_when"] = "before" if k in jumps else "half-way"
            out.append(acq)
            if gap_s > 0 and k < n_frames - 1:
                self.wait(gap_s)
        return out

    def acquire_orthogonal_pair(self, center_nm=(0.0, 0.0), fov_nm: float = 5.12,
                                shape_px=(512, 512), *, series_id: str | None = None,
                                scan_rotation_deg: float = 0.0, gap_s: float = 0.0,
                                **kwargs) -> tuple[Acquisition, Acquisition]:
        """Two frames of one region with scan rotations 90 degrees apart, one after the other.

        Both share ``series_id``; the second has ``scan_rotation_deg + 90``.
        Drift distorts each along its own slow-scan direction, which is what
        the orthogonal-pair correction of Ophus, Ciston & Nelson
        (Ultramicroscopy 162, 1 (2016)) exploits.
        """
        rows, cols = (int(v) for v in shape_px)
        if rows != cols:
            raise ValueError(f"an orthogonal pair needs a square frame, got {shape_px}")
        sid = series_id or f"{self.frame_prefix}_pair_{self.frame_count + 1:05d}"
        first = self.acquire(center_nm, fov_nm, shape_px, scan_rotation_deg=scan_rotation_deg,
                             extra={"series_id": sid, "series_index": 0}, **kwargs)
        if gap_s > 0:
            self.wait(gap_s)
        second = self.acquire(center_nm, fov_nm, shape_px,
                              scan_rotation_deg=scan_rotation_deg + 90.0,
                              extra={"series_id": sid, "series_index": 1}, **kwargs)
        return first, second

    # ------------------------------------------------------------ truth

    def _truth(self, fid, raster, shape, pixel_nm, columns, e_f, e_s, sidecar, drift_lines,
               drift_end, t0, t_line) -> FrameTruth:
        rows, cols = shape
        pos = locate_in_frame(raster, rows, columns.xy_nm)
        inside = (np.isfinite(pos).all(axis=1) & (pos[:, 0] >= -0.5) & (pos[:, 0] <= rows - 0.5)
                  & (pos[:, 1] >= -0.5) & (pos[:, 1] <= cols - 0.5))
        c = columns.select(inside)
        pos = pos[inside]
        pixel_pm = pixel_nm * 1000.0
        arrays = {
            "positions_px": pos, "positions_pm": pos * pixel_pm, "xy_nm": c.xy_nm,
            "sublattice": c.sublattice.astype("U2"), "ij": c.ij, "z": c.z,
            "z_partner": c.z_partner, "occupancy": c.occupancy, "layer": c.layer,
        }
        if len(c):
            lo, hi = c.xy_nm.min(axis=0) - 1.0, c.xy_nm.max(axis=0) + 1.0
            cells = self.specimen.cells_in((lo[0], hi[0], lo[1], hi[1]))
            cpos = locate_in_frame(raster, rows, cells.b_xy_nm)
            keep = (np.isfinite(cpos).all(axis=1) & (cpos[:, 0] >= -0.5)
                    & (cpos[:, 0] <= rows - 0.5) & (cpos[:, 1] >= -0.5)
                    & (cpos[:, 1] <= cols - 0.5))
            to_img = np.stack([e_f, e_s])  # specimen (x, y) vector -> image (x, y)
            arrays.update({
                "cell_ij": cells.ij[keep], "cell_b_px": cpos[keep],
                "cell_displacement_b_pm": cells.displacement_b_pm[keep] @ to_img.T,
                "cell_applied_b_pm": cells.applied_b_pm[keep] @ to_img.T,
                "cell_applied_o_pm": cells.applied_o_pm[keep] @ to_img.T,
                "cell_polarization_dir": cells.polarization_dir[keep] @ to_img.T,
                "cell_a_pm": cells.a_local_pm[keep], "cell_c_pm": cells.c_local_pm[keep],
                "cell_tilt_deg": cells.tilt_deg[keep], "cell_layer": cells.layer[keep],
            })
        arrays["drift_per_line_nm"] = drift_lines

        def feature_px(xy):
            xy = np.asarray(xy, float)[None, :]
            p = locate_in_frame(raster, rows, xy)[0]
            if not np.isfinite(p).all():  # off the frame: extrapolate the raster
                row = float(_row_guess(raster, xy)[0])
                line = int(np.clip(round(row), 0, rows - 1))
                p = np.array([row, float((xy[0] - raster.line_start_nm[line]) @ raster.u_hat)
                              / raster.step_len_nm])
            return [float(p[0]), float(p[1])]

        def in_frame(p):
            return bool(-0.5 <= p[0] <= rows - 0.5 and -0.5 <= p[1] <= cols - 0.5)

        centre_xy = raster.line_start_nm[rows // 2] + ((cols - 1) / 2) * raster.step_nm
        walls = []
        for w in self.specimen.walls_truth():
            w = dict(w)
            # The wall is a straight line in reference coordinates; the film's strain
            # displaces it (a tetragonal film stretches it along y, so an inclined wall
            # turns steeper).  Take the displaced line where it passes the frame: the
            # reference point nearest the frame centre and its neighbours 1 nm either
            # side, displaced.  Vertical walls are unchanged.
            spec_wall = self.specimen.scenario.walls[w["index"]]
            t = math.radians(spec_wall.angle_deg)
            d_ref = np.array([math.cos(t), math.sin(t)])
            p_ref = self.specimen._wall_point(spec_wall)   # where a moving wall is now
            c_ref = centre_xy - self.specimen.displacement_nm(centre_xy[None, :])[0]
            q = p_ref + ((c_ref - p_ref) @ d_ref) * d_ref
            pts = np.stack([q - d_ref, q, q + d_ref])
            pts = pts + self.specimen.displacement_nm(pts)
            d = (pts[2] - pts[0]) / np.hypot(*(pts[2] - pts[0]))
            near = pts[1] + ((centre_xy - pts[1]) @ d) * d
            w["direction"] = d.tolist()
            w["point_nm"] = near.tolist()
            w["point_px"] = feature_px(near)
            half_diag_px = 0.5 * math.hypot(rows, cols)
            dist_px = math.hypot(w["point_px"][0] - (rows - 1) / 2,
                                 w["point_px"][1] - (cols - 1) / 2)
            # Walls act only in polar layers.
            polar_here = bool(len(c)) and any(
                self.specimen.layers[k].polar for k in np.unique(c.layer))
            w["crosses_frame"] = bool(dist_px <= half_diag_px and polar_here)
            # Direction in image (x, y) = (col, row) components.
            w["direction_image_xy"] = [float(d @ e_f), float(d @ e_s)]
            walls.append(w)
        vortices = []
        for v in self.specimen.vortex_truth():
            v = dict(v)
            v["position_px"] = feature_px(v["xy_nm"])
            v["in_frame"] = in_frame(v["position_px"])
            vortices.append(v)
        meta = {
            "frame_id": fid,
            "sidecar": sidecar,
            "shape_px": [rows, cols],
            "pixel_size_pm": pixel_nm * 1000.0,
            "scan_rotation_deg": sidecar["scan_rotation_deg"],
            "commanded_center_nm": [sidecar["stage_x_nm"], sidecar["stage_y_nm"]],
            "t_start_s": t0,
            "line_time_s": t_line,
            "frame_time_s": rows * t_line,
            "drift": {
                "velocity_nm_per_s": self.drift.velocity_nm_per_s.tolist(),
                "random_walk_nm_per_sqrt_s": self.drift.random_walk_nm_per_sqrt_s,
                "offset_start_nm": drift_lines[0].tolist(),
                "offset_end_nm": np.asarray(drift_end).tolist(),
                "note": "specimen displacement on the stage: a specimen point r sits at "
                        "stage position r + offset; per-line offsets in drift_per_line_nm",
            },
            "n_columns": int(len(c)),
            "walls": walls,
            "vortex_cores": vortices,
            "interfaces": self.specimen.interfaces_truth(),
            "probe_sigma_pm": self.instrument.probe.sigma_pm,
        }
        meta["specimen_center_nm"] = centre_xy.tolist()
        meta["specimen_time_s"] = self.specimen.time_s
        return FrameTruth(arrays=arrays, meta=meta)


def _to_dtype(image: np.ndarray, dtype: str) -> np.ndarray:
    if dtype in ("float32", "float64"):
        return image.astype(dtype)
    if dtype in ("uint16", "uint32"):
        info = np.iinfo(dtype)
        return np.clip(np.rint(image), 0, info.max).astype(dtype)
    raise ValueError(f"`dtype` must be float32, float64, uint16 or uint32, got {dtype!r}")
