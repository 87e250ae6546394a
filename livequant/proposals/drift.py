"""Specimen drift: measured between overlapping frames, modelled over the session.

A feature fixed on the specimen appears at stage position ``s + d(t)``, with
``d(t)`` the drift at the time ``t`` the probe passed (see
:mod:`livequant.proposals.geometry`).  Two frames that overlap on the stage
therefore show the same content displaced by ``d(t_B) - d(t_A)``;
:func:`estimate_pair_drift` measures that displacement by phase correlation of
the frames' binned thumbnails, resampled onto one grid over their stage
overlap.  :class:`DriftModel` turns such pair measurements into a drift
velocity (a weighted, outlier-robust linear fit, older pairs forgotten
exponentially) and per-frame drift positions, and predicts ``d`` at a future
time with an uncertainty.  :class:`DriftTracker` keeps the last few frames'
thumbnails and does both for each new frame.

A crystal lattice is periodic, so its correlation has a peak at every lattice
vector.  The peak is searched only near the offset the model predicts (a
radius growing with the prediction's uncertainty), and a second peak almost
as high marks the measurement ``ambiguous`` with a larger uncertainty.

References
----------
Phase correlation: Kuglin & Hines (1975), Proc. IEEE Int. Conf. Cybernetics
and Society, 163.  Sub-pixel refinement by a local upsampled DFT:
Guizar-Sicairos, Thurman & Fienup (2008), Opt. Lett. 33, 156,
doi:10.1364/OL.33.000156.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime

import numpy as np
from scipy import ndimage

from livequant.proposals.geometry import FrameGeometry, clip_polygon, region_corners

__all__ = ["DriftImage", "PairDrift", "DriftModel", "DriftTracker", "estimate_pair_drift",
           "frame_times_s"]

_MIN_GRID_PX = 16


def frame_times_s(meta, shape) -> tuple[float | None, float]:
    """``(start, duration)`` of a frame's acquisition: unix seconds and seconds.

    The start is the sidecar's ``acquired_at`` (None when absent or not
    ISO 8601); the duration is ``frame_time_s`` from the sidecar extras when
    given, else rows x cols x dwell (no flyback).
    """
    start = None
    text = getattr(meta, "acquired_at", None)
    if text:
        try:
            start = datetime.fromisoformat(str(text).replace("Z", "+00:00")).timestamp()
        except ValueError:
            start = None
    extra = getattr(meta, "extra", None) or {}
    dur = extra.get("frame_time_s")
    if not isinstance(dur, (int, float)) or not math.isfinite(dur) or dur < 0:
        dwell = getattr(meta, "dwell_time_us", None) or 0.0
        dur = shape[0] * shape[1] * dwell * 1e-6
    return start, float(dur)


@dataclass(frozen=True)
class DriftImage:
    """A frame as drift estimation needs it: thumbnail, stage geometry, time.

    ``t_s`` is the middle of the acquisition (unix seconds): a frame's content
    sits, on average, where the drift put it half-way through the scan.
    """

    frame_id: str
    t_s: float
    geometry: FrameGeometry
    thumbnail: np.ndarray
    thumbnail_bin: int = 1

    @classmethod
    def from_view(cls, view, *, t_s: float) -> "DriftImage":
        if view.thumbnail is None:
            raise ValueError(f"frame {view.frame_id}: the view carries no thumbnail")
        return cls(frame_id=view.frame_id, t_s=float(t_s),
                   geometry=FrameGeometry.from_view(view),
                   thumbnail=np.asarray(view.thumbnail, np.float32),
                   thumbnail_bin=int(view.thumbnail_bin))

    @property
    def thumb_pixel_nm(self) -> float:
        return self.geometry.pixel_size_nm * self.thumbnail_bin

    def sample(self, xy_nm: np.ndarray) -> np.ndarray:
        """Thumbnail values at stage points ``(..., 2)`` (bilinear; NaN outside)."""
        px = self.geometry.stage_to_px(xy_nm)
        f = self.thumbnail_bin
        col = (px[..., 0] - (f - 1) / 2) / f
        row = (px[..., 1] - (f - 1) / 2) / f
        return ndimage.map_coordinates(self.thumbnail, [row, col], order=1, mode="constant",
                                       cval=np.nan)


@dataclass(frozen=True)
class PairDrift:
    """Drift measured between two frames: ``shift_nm = d(t_B) - d(t_A)``.

    Attributes
    ----------
    shift_nm : (2,) ndarray
        Stage (x, y) displacement of the content of B relative to A, nm.
    sigma_nm : float
        One-sigma uncertainty of each component, nm.
    peak_ratio : float
        Height of the second-highest correlation peak in the search window
        relative to the highest (above the median), 0..1: near 1 on a lattice.
    ambiguous : bool
        Another peak nearly as high is about as close to the prediction: a
        lattice-vector ambiguity the prediction cannot settle.
    overlap_fraction : float
        Shared stage area over the smaller frame's area.
    snr : float
        Correlation peak over the robust spread of the correlation surface.
    """

    ref_frame_id: str
    frame_id: str
    t_ref_s: float
    t_s: float
    shift_nm: np.ndarray
    sigma_nm: float
    peak_ratio: float
    ambiguous: bool
    overlap_fraction: float
    snr: float
    predicted_nm: np.ndarray = field(default_factory=lambda: np.zeros(2))

    def to_json(self) -> dict:
        return {"ref_frame_id": self.ref_frame_id, "frame_id": self.frame_id,
                "t_ref_s": self.t_ref_s, "t_s": self.t_s,
                "shift_nm": [float(v) for v in self.shift_nm], "sigma_nm": self.sigma_nm,
                "peak_ratio": self.peak_ratio, "ambiguous": self.ambiguous,
                "overlap_fraction": self.overlap_fraction, "snr": self.snr,
                "predicted_nm": [float(v) for v in self.predicted_nm]}


def _overlap_polygon(ref: DriftImage, mov: DriftImage, predicted_nm) -> np.ndarray:
    moved_back = dict(mov.geometry.footprint())
    moved_back["center_x_nm"] -= float(predicted_nm[0])
    moved_back["center_y_nm"] -= float(predicted_nm[1])
    return clip_polygon(region_corners(moved_back), region_corners(ref.geometry.footprint()))


def predicted_overlap_fraction(ref: DriftImage, mov: DriftImage, predicted_nm=(0.0, 0.0)) -> float:
    """Shared stage area (after moving B back by the predicted drift) over the smaller frame."""
    from livequant.proposals.geometry import polygon_area

    area = polygon_area(_overlap_polygon(ref, mov, predicted_nm))
    a_ref = float(np.prod(ref.geometry.size_nm))
    a_mov = float(np.prod(mov.geometry.size_nm))
    return area / min(a_ref, a_mov)


def estimate_pair_drift(ref: DriftImage, mov: DriftImage, *, predicted_nm=(0.0, 0.0),
                        search_radius_nm: float = 2.0, prior_sigma_nm: float | None = None,
                        upsample_factor: int = 20,
                        ambiguity_ratio: float = 0.8) -> PairDrift | None:
    """Measure ``d(t_mov) - d(t_ref)`` from two overlapping frames.

    Parameters
    ----------
    ref, mov : DriftImage
        The earlier (reference) and the later frame.
    predicted_nm : (2,) float
        Expected displacement (from the drift model); the search is centred on it.
    search_radius_nm : float
        Only correlation peaks within this distance of the prediction count.
    prior_sigma_nm : float, optional
        Uncertainty of the prediction (default a quarter of the search radius).
    upsample_factor : int
        Sub-pixel refinement to 1/`upsample_factor` of a grid pixel.
    ambiguity_ratio : float
        Peaks at least this high (relative to the best, above the median)
        compete; the one nearest the prediction wins, and the result is
        ambiguous when a rival is nearly as close (given `prior_sigma_nm`).

    Returns
    -------
    PairDrift or None
        None when the frames do not overlap by at least 16 x 16 grid pixels.

    Notes
    -----
    Both thumbnails are resampled (bilinear) onto one grid aligned with the
    reference frame's scan axes, spacing the coarser thumbnail pixel, over the
    stage overlap; B is sampled at the grid points moved by `predicted_nm`, so
    the residual shift is searched around zero.  Mean-subtracted, Hann-windowed
    images are correlated with the cross-power spectrum divided by the square
    root of its magnitude (between plain and phase correlation).
    """
    if search_radius_nm <= 0:
        raise ValueError(f"`search_radius_nm` must be > 0, got {search_radius_nm}")
    if upsample_factor < 1:
        raise ValueError(f"`upsample_factor` must be >= 1, got {upsample_factor}")
    pred = np.asarray(predicted_nm, float).reshape(2)
    h = max(ref.thumb_pixel_nm, mov.thumb_pixel_nm)
    poly = _overlap_polygon(ref, mov, pred)
    if len(poly) < 3:
        return None
    g = ref.geometry
    e_u, e_v = g.e_fast, g.e_slow
    rel = poly - g.center_nm
    pu, pv = rel @ e_u, rel @ e_v
    nu = int(math.floor((pu.max() - pu.min()) / h))
    nv = int(math.floor((pv.max() - pv.min()) / h))
    if nu < _MIN_GRID_PX or nv < _MIN_GRID_PX:
        return None
    u = pu.min() + h * (np.arange(nu) + 0.5 + ((pu.max() - pu.min()) / h - nu) / 2)
    v = pv.min() + h * (np.arange(nv) + 0.5 + ((pv.max() - pv.min()) / h - nv) / 2)
    uu, vv = np.meshgrid(u, v)  # rows along v (slow), columns along u (fast)
    pts = g.center_nm + uu[..., None] * e_u + vv[..., None] * e_v
    a = ref.sample(pts)
    b = mov.sample(pts + pred)
    ok = np.isfinite(a) & np.isfinite(b)
    if ok.sum() < _MIN_GRID_PX ** 2:
        return None
    a = _prepare(a, ok)
    b = _prepare(b, ok)

    fa, fb = np.fft.fft2(a), np.fft.fft2(b)
    cross = np.conj(fa) * fb
    # Half-way whitening: full phase correlation gives Poisson noise at every
    # frequency the same weight as the few lattice reflections that carry the
    # signal (measured on simulated frames: it fails at 250 electrons/pixel);
    # the plain correlation is dominated by the lowest frequencies.
    mag = np.abs(cross)
    cross /= np.sqrt(mag) + 1e-12 * np.sqrt(mag.max())
    corr = np.fft.ifft2(cross).real
    dy = np.fft.fftfreq(nv, 1.0 / nv)[:, None]  # integer shifts, wrapped to +-N/2
    dx = np.fft.fftfreq(nu, 1.0 / nu)[None, :]
    radius_px = max(search_radius_nm / h, 1.5)
    window = (dx ** 2 + dy ** 2) <= radius_px ** 2
    vals = corr[window]
    med = float(np.median(vals))
    spread = 1.4826 * float(np.median(np.abs(vals - med))) or 1e-12
    peak = float(vals.max())
    local_max = (corr == ndimage.maximum_filter(corr, size=3, mode="wrap")) & window
    # Candidates: every local maximum nearly as high as the best one (on a
    # lattice, one per lattice vector).  Take the one nearest the prediction;
    # under a Gaussian prior of width `prior_sigma_nm` it is ambiguous when a
    # rival is less than ~10 times less likely.
    rel = (corr - med) / max(peak - med, 1e-12)
    cand = np.argwhere(local_max & (rel >= ambiguity_ratio))
    dist2 = (dx[0, cand[:, 1]] ** 2 + dy[cand[:, 0], 0] ** 2) * h * h
    order = np.argsort(dist2)
    iy, ix = cand[order[0]]
    snr = float((corr[iy, ix] - med) / spread)
    prior2 = (prior_sigma_nm if prior_sigma_nm is not None else search_radius_nm / 4) ** 2
    ambiguous, sep_nm = False, 0.0
    if len(order) > 1:
        jy, jx = cand[order[1]]
        sep_nm = math.hypot(dx[0, jx] - dx[0, ix], dy[jy, 0] - dy[iy, 0]) * h
        ambiguous = bool(dist2[order[1]] - dist2[order[0]] < 2 * math.log(10) * prior2)
    others = rel[local_max]
    others = np.sort(others)[::-1]
    peak_ratio = float(others[1]) if others.size > 1 else 0.0
    sy, sx = _refine(cross, float(dy[iy, 0]), float(dx[0, ix]), upsample_factor)
    delta_uv = np.array([sx, sy]) * h
    shift = pred + delta_uv[0] * e_u + delta_uv[1] * e_v
    # Heuristic one-sigma (calibrated on simulated pairs, tests/proposals): a peak
    # a few grid pixels wide, located to ~1.5/snr pixel, never better than 0.1 pixel.
    sigma_px = max(0.1, 1.0 / upsample_factor, 1.5 / max(snr, 1e-6))
    sigma_nm = sigma_px * h
    if ambiguous:
        sigma_nm = max(sigma_nm, sep_nm / 2)
    area_frac = predicted_overlap_fraction(ref, mov, pred)
    return PairDrift(ref_frame_id=ref.frame_id, frame_id=mov.frame_id, t_ref_s=ref.t_s,
                     t_s=mov.t_s, shift_nm=shift, sigma_nm=float(sigma_nm),
                     peak_ratio=peak_ratio, ambiguous=bool(ambiguous),
                     overlap_fraction=float(area_frac), snr=snr, predicted_nm=pred)


def _prepare(img: np.ndarray, ok: np.ndarray) -> np.ndarray:
    out = np.where(ok, img, np.nan)
    mean = float(np.nanmean(out))
    out = np.where(ok, out - mean, 0.0)
    std = float(out[ok].std()) or 1.0
    win = np.outer(np.hanning(out.shape[0]), np.hanning(out.shape[1]))
    return out / std * win


def _refine(cross: np.ndarray, y0: float, x0: float, up: int) -> tuple[float, float]:
    """Peak of the inverse DFT of `cross` near (y0, x0), on a grid 1/up fine."""
    if up <= 1:
        return y0, x0
    ny, nx = cross.shape
    offs = np.arange(-1.5, 1.5 + 0.5 / up, 1.0 / up)
    ry, rx = y0 + offs, x0 + offs
    ky = np.fft.fftfreq(ny, 1.0 / ny)
    kx = np.fft.fftfreq(nx, 1.0 / nx)
    Ky = np.exp(2j * np.pi * np.outer(ry, ky) / ny)
    Kx = np.exp(2j * np.pi * np.outer(kx, rx) / nx)
    cc = (Ky @ cross @ Kx).real
    iy, ix = np.unravel_index(int(np.argmax(cc)), cc.shape)
    return float(ry[iy]), float(rx[ix])


# ---------------------------------------------------------------- the model


@dataclass(frozen=True)
class _Pair:
    t_ref_s: float
    t_s: float
    shift_nm: np.ndarray
    sigma_nm: float


class DriftModel:
    """Drift over a session: velocity from pair measurements, positions of frames.

    Parameters
    ----------
    memory_s : float
        Pairs are weighted by ``exp(-age / memory_s)``: drift changes slowly,
        and an old velocity should not outvote a new one.
    random_walk_nm_per_sqrt_s : float
        Expected random-walk part of the drift (per axis, after 1 s); adds
        ``rw^2 |dt|`` to every pair's variance and to predictions.
    prior_speed_nm_per_s : float
        Uncertainty of the velocity before any pair is measured (per axis).
    outlier_sigma : float
        With three or more pairs, a pair further than this many sigmas from
        the fit is left out (one at a time, worst first).
    """

    def __init__(self, *, memory_s: float = 600.0, random_walk_nm_per_sqrt_s: float = 0.01,
                 prior_speed_nm_per_s: float = 0.02, outlier_sigma: float = 4.0):
        if memory_s <= 0:
            raise ValueError(f"`memory_s` must be > 0, got {memory_s}")
        self.memory_s = float(memory_s)
        self.rw = float(random_walk_nm_per_sqrt_s)
        self.prior_speed = float(prior_speed_nm_per_s)
        self.outlier_sigma = float(outlier_sigma)
        self._pairs: list[_Pair] = []
        self._anchors: dict[str, tuple[float, np.ndarray, float]] = {}
        self._fit: tuple[np.ndarray, float, int] | None = None
        self.n_outliers = 0

    # -- data in

    def add_anchor(self, frame_id: str, t_s: float, d_nm, sigma_nm: float = 0.0) -> None:
        """Record ``d`` (stage nm, relative to the session origin) for a frame."""
        self._anchors[frame_id] = (float(t_s), np.asarray(d_nm, float).reshape(2).copy(),
                                   float(sigma_nm))

    def add_pair(self, t_ref_s: float, t_s: float, shift_nm, sigma_nm: float) -> None:
        self._pairs.append(_Pair(float(t_ref_s), float(t_s),
                                 np.asarray(shift_nm, float).reshape(2), float(sigma_nm)))
        self._fit = None

    def add_measurement(self, pair: PairDrift) -> tuple[np.ndarray, float]:
        """Use a pair measurement: update the fit and anchor the later frame.

        Returns the later frame's drift position and its uncertainty.
        """
        d_ref, s_ref = self.position_of(pair.ref_frame_id, pair.t_ref_s)
        self.add_pair(pair.t_ref_s, pair.t_s, pair.shift_nm, pair.sigma_nm)
        d = d_ref + pair.shift_nm
        s = math.hypot(s_ref, pair.sigma_nm)
        self.add_anchor(pair.frame_id, pair.t_s, d, s)
        return d, s

    @property
    def n_pairs(self) -> int:
        return len(self._pairs)

    # -- the fit

    def velocity(self) -> tuple[np.ndarray, float]:
        """``(v, sigma_v)``: velocity (2,) nm/s and its one-sigma per axis."""
        if self._fit is None:
            self._fit = self._solve()
        v, sv, _ = self._fit
        return v.copy(), sv

    def _solve(self) -> tuple[np.ndarray, float, int]:
        if not self._pairs:
            return np.zeros(2), self.prior_speed, 0
        dt = np.array([p.t_s - p.t_ref_s for p in self._pairs])
        D = np.array([p.shift_nm for p in self._pairs])
        var = np.array([p.sigma_nm ** 2 for p in self._pairs]) + self.rw ** 2 * np.abs(dt)
        var = np.maximum(var, 1e-12)
        latest = max(p.t_s for p in self._pairs)
        age = latest - np.array([p.t_s for p in self._pairs])
        w = np.exp(-age / self.memory_s) / var
        keep = np.abs(dt) > 1e-9
        n_out = 0
        while True:
            idx = np.flatnonzero(keep)
            if idx.size == 0:
                return np.zeros(2), self.prior_speed, n_out
            sw = float(np.sum(w[idx] * dt[idx] ** 2))
            v = (w[idx, None] * dt[idx, None] * D[idx]).sum(axis=0) / sw
            resid = D - dt[:, None] * v
            z = np.sqrt((resid ** 2).sum(axis=1) / (2 * var))
            if idx.size >= 3:
                worst = idx[np.argmax(z[idx])]
                if z[worst] > self.outlier_sigma:
                    keep[worst] = False
                    n_out += 1
                    continue
            dof = 2 * idx.size - 2
            chi2 = float(np.sum(w[idx, None] * resid[idx] ** 2)) / dof if dof > 0 else 1.0
            sv = math.sqrt(max(chi2, 1.0) / sw)
            self.n_outliers = n_out
            return v, sv, n_out

    # -- predictions

    def position(self, t_s: float) -> tuple[np.ndarray, float]:
        """``d(t)`` and its one-sigma: from the anchor nearest in time, moved by the velocity."""
        v, sv = self.velocity()
        if not self._anchors:
            return np.zeros(2), float("inf")
        ta, da, sa = min(self._anchors.values(), key=lambda a: abs(a[0] - t_s))
        dt = t_s - ta
        sigma = math.sqrt(sa ** 2 + (sv * dt) ** 2 + self.rw ** 2 * abs(dt))
        return da + v * dt, sigma

    def position_of(self, frame_id: str | None, t_s: float) -> tuple[np.ndarray, float]:
        """``d`` of a frame: its anchor when it has one, else :meth:`position`."""
        if frame_id is not None and frame_id in self._anchors:
            _, d, s = self._anchors[frame_id]
            return d.copy(), s
        return self.position(t_s)

    def predict_shift(self, t_from_s: float, t_to_s: float, *,
                      frame_id: str | None = None) -> tuple[np.ndarray, float]:
        """How far a feature seen at `t_from_s` (in frame `frame_id`) moves by `t_to_s`.

        Returns ``(d(t_to) - d(t_from), sigma)`` in stage nm.
        """
        v, sv = self.velocity()
        if not self._anchors:
            dt = t_to_s - t_from_s
            return v * dt, math.sqrt((sv * dt) ** 2 + self.rw ** 2 * abs(dt))
        d_to, s_to = self.position(t_to_s)
        d_from, s_from = self.position_of(frame_id, t_from_s)
        return d_to - d_from, math.hypot(s_to, s_from)

    def summary(self) -> dict:
        v, sv = self.velocity()
        return {"velocity_nm_per_s": [float(v[0]), float(v[1])], "sigma_v_nm_per_s": sv,
                "n_pairs": self.n_pairs, "n_outliers": self.n_outliers,
                "n_anchored": len(self._anchors)}


# ---------------------------------------------------------------- the tracker


class DriftTracker:
    """Keep the last few frames and measure each new one against the best overlap.

    Parameters
    ----------
    model : DriftModel
    keep_frames : int
        Thumbnails kept (memory stays bounded: a few 512 x 512 float32 images).
    min_overlap_fraction : float
        Frames sharing less of their area are not registered.
    search_radius_nm : float
        Largest search radius around the predicted offset.
    min_search_radius_nm : float
        Smallest search radius (the prediction's own uncertainty sets it in between).
    upsample_factor : int
    """

    def __init__(self, model: DriftModel, *, keep_frames: int = 8,
                 min_overlap_fraction: float = 0.3, search_radius_nm: float = 5.0,
                 min_search_radius_nm: float = 0.5, upsample_factor: int = 20,
                 ambiguity_ratio: float = 0.8):
        self.model = model
        self.keep_frames = int(keep_frames)
        self.min_overlap_fraction = float(min_overlap_fraction)
        self.search_radius_nm = float(search_radius_nm)
        self.min_search_radius_nm = float(min_search_radius_nm)
        self.upsample_factor = int(upsample_factor)
        self.ambiguity_ratio = float(ambiguity_ratio)
        self._kept: list[DriftImage] = []
        self.n_ambiguous = 0

    def observe(self, image: DriftImage) -> PairDrift | None:
        """Register `image` against the kept frame it overlaps most, then keep it.

        The first frame of a session becomes the origin (``d = 0``).  Returns
        the measurement, or None when no kept frame overlaps enough.
        """
        if not self._kept and not self.model._anchors:
            self.model.add_anchor(image.frame_id, image.t_s, (0.0, 0.0), 0.0)
        best, best_frac, best_pred, sigma = None, 0.0, None, None
        for ref in self._kept:
            if ref.frame_id == image.frame_id:
                continue
            pred, pred_sigma = self.model.predict_shift(ref.t_s, image.t_s,
                                                        frame_id=ref.frame_id)
            frac = predicted_overlap_fraction(ref, image, pred)
            if frac > best_frac:
                best, best_frac, best_pred, sigma = ref, frac, pred, pred_sigma
        result = None
        if best is not None and best_frac >= self.min_overlap_fraction:
            radius = float(np.clip(4 * sigma, self.min_search_radius_nm, self.search_radius_nm))
            result = estimate_pair_drift(best, image, predicted_nm=best_pred,
                                         search_radius_nm=radius, prior_sigma_nm=sigma,
                                         upsample_factor=self.upsample_factor,
                                         ambiguity_ratio=self.ambiguity_ratio)
            if result is not None:
                if result.ambiguous:
                    # Off by an unknown lattice vector, perhaps: recorded, not used.
                    self.n_ambiguous += 1
                else:
                    self.model.add_measurement(result)
        self._kept.append(image)
        # Keep the newest frames by acquisition time (frames may finish out of order).
        self._kept.sort(key=lambda im: im.t_s)
        del self._kept[:-self.keep_frames]
        return result
