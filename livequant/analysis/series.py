"""A fast-scan series: register each new frame to the running average and sum it.

Many fast frames of one region, registered and averaged, give the dose of a
slow frame without its drift distortion (Yankovich et al., Nat. Commun. 5,
4155 (2014); Jones et al., Adv. Struct. Chem. Imaging 1, 8 (2015)).
:class:`SeriesStack` does it one frame at a time, as frames arrive:

- every new frame is registered to the running average
  (:func:`livequant.analysis.registration.register_frame`: rigid, then per
  scan line) and added to a running sum on the first frame's grid;
- a frame that does not register is left out with its reason: a shift far
  from what the drift so far predicts (the specimen jumped), or a residual
  far above the noise (the specimen moved within the frame, the focus or the
  dose changed);
- the frames' rigid shifts against their acquisition times give the drift
  velocity in image pixels per second.  A steady drift distorts every frame
  alike (each line is recorded ``t_line`` later than the one before), so no
  registration between frames can see it; the velocity measured between
  frames undoes it (the linear-drift model of CHECK-VALUES section 6);
- the first frame's own scan jitter would stay in the grid of the average;
  :meth:`SeriesStack.average` takes the mean per-line offset of all members
  as the undistorted grid instead (the mean of independent jitters shrinks as
  1/sqrt(N)), in the same resampling that undoes the drift.

The average is returned as the *sum* of the members' counts over the region
every member covers, so a column fit with Poisson weights sees the summed
dose and its uncertainties are those of the summed dose.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from livequant.analysis.registration import register_frame

__all__ = ["MemberRecord", "SeriesAverage", "SeriesStack", "REASON_JUMP", "REASON_RESIDUAL",
           "REASON_SHAPE"]

REASON_JUMP = "jump"
REASON_RESIDUAL = "residual"
REASON_SHAPE = "shape"


@dataclass(frozen=True)
class MemberRecord:
    """What happened to one frame offered to the series."""

    frame_id: str
    index: int                 # order offered (0 = first)
    accepted: bool
    reason: str | None         # None, "jump", "residual", "shape"
    message: str
    t_start_s: float
    shift_px: list             # rigid + mean per-line shift (row, col) against the grid
    residual_chi2: float | None
    line_rms_px: float | None  # rms of the per-line offsets about their mean
    jitter_px: list | None     # estimated per-line jitter (row, col)

    def to_json(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


@dataclass(frozen=True)
class SeriesAverage:
    """The registered series, ready to analyse.

    ``summed`` is the sum of the accepted members' counts over ``box``
    ``(row0, row1, col0, col1)`` of the first frame's grid (so it reads as a
    frame of ``n_members`` times the dose); ``velocity_px_per_s`` the drift
    undone (row, col), or None.
    """

    summed: np.ndarray
    box: tuple
    n_members: int
    velocity_px_per_s: np.ndarray | None
    info: dict = field(default_factory=dict)

    @property
    def mean(self) -> np.ndarray:
        return self.summed / max(self.n_members, 1)


class SeriesStack:
    """Running registration and sum of one series (see the module docstring).

    Parameters
    ----------
    gain : float
        Detector counts per electron (the residual's Poisson variance).
    line_time_s, dwell_s : float
        Scan timing of the frames (``line_time_s = cols * dwell + flyback``),
        needed to undo the drift inside the frames.
    nonrigid : bool
        Solve per-line offsets after the rigid step.
    max_jump_px : float
        A frame whose shift differs from the drift's prediction by more is
        left out (``jump``); checked from the third frame on (two are needed
        for a prediction).
    max_residual_chi2 : float
        A frame whose residual against the average exceeds this is left out
        (``residual``).
    max_residual_ratio : float
        ... and so is one whose residual exceeds this multiple of the median
        residual of the accepted frames (from the third frame on): the
        absolute scale depends on the detector gain, the ratio does not.
    upsample_factor, iterations, smooth_lines, smooth_px :
        Passed to :func:`~livequant.analysis.registration.register_frame`.
    """

    def __init__(self, *, gain: float = 1.0, line_time_s: float | None = None,
                 dwell_s: float | None = None, nonrigid: bool = True,
                 max_jump_px: float = 10.0, max_residual_chi2: float = 3.0,
                 max_residual_ratio: float = 1.5, upsample_factor: int = 20,
                 iterations: int = 3, smooth_lines: float = 32.0, smooth_px: float = 2.0):
        for name, v in (("gain", gain), ("max_jump_px", max_jump_px),
                        ("max_residual_chi2", max_residual_chi2),
                        ("max_residual_ratio", max_residual_ratio)):
            if not (v > 0 and math.isfinite(v)):
                raise ValueError(f"`{name}` must be a positive number, got {v!r}")
        self.gain = float(gain)
        self.line_time_s = line_time_s
        self.dwell_s = dwell_s
        self.nonrigid = nonrigid
        self.max_jump_px = float(max_jump_px)
        self.max_residual_chi2 = float(max_residual_chi2)
        self.max_residual_ratio = float(max_residual_ratio)
        self._reg = dict(upsample_factor=upsample_factor, iterations=iterations,
                         smooth_lines=smooth_lines, smooth_px=smooth_px)
        self.shape: tuple | None = None
        self._sum: np.ndarray | None = None
        self._count: np.ndarray | None = None
        self._offsets: list[np.ndarray] = []   # per accepted member, (rows, 2) incl. shift
        self._times: list[float] = []
        self._shifts: list[np.ndarray] = []
        self._chi2: list[float] = []
        self._jump_px = np.zeros(2)          # where the last settled jump put the specimen
        self._pending_jump: np.ndarray | None = None
        self.records: list[MemberRecord] = []

    # ------------------------------------------------------------------ state

    @property
    def n_members(self) -> int:
        """Accepted frames in the sum."""
        return len(self._times)

    @property
    def n_excluded(self) -> int:
        return sum(1 for r in self.records if not r.accepted)

    def reference(self) -> np.ndarray:
        """The running average on the first frame's grid (NaN where nothing landed)."""
        if self._sum is None:
            raise ValueError("the series is empty")
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self._count > 0, self._sum / np.maximum(self._count, 1), np.nan)

    def velocity_px_per_s(self) -> np.ndarray | None:
        """Drift velocity (row, col) px/s: least-squares slope of the shifts in time."""
        if len(self._times) < 2:
            return None
        t = np.asarray(self._times)
        if np.ptp(t) <= 0:
            return None
        s = np.asarray(self._shifts)
        tc = t - t.mean()
        return (tc @ (s - s.mean(axis=0))) / float(tc @ tc)

    def predicted_shift_px(self, t_s: float) -> np.ndarray | None:
        """Where the drift so far puts the content at time `t_s` (two members needed)."""
        v = self.velocity_px_per_s()
        if v is None:
            return None
        t = np.asarray(self._times)
        s = np.asarray(self._shifts)
        return s.mean(axis=0) + v * (t_s - t.mean()) + self._jump_px

    # ------------------------------------------------------------------ add

    def add(self, pixels, *, frame_id: str, t_start_s: float | None = None) -> MemberRecord:
        """Register one frame and add it to the sum unless it does not register.

        `t_start_s` is the frame's acquisition start on any steady clock
        (seconds); without it frames are taken as back to back, one frame
        time apart (needs ``line_time_s``), or one second apart.
        """
        img = np.asarray(pixels, dtype=np.float64)
        index = len(self.records)
        if t_start_s is None:
            frame_s = self.line_time_s * img.shape[0] if self.line_time_s else 1.0
            t_start_s = index * frame_s
        if self._sum is None:
            self.shape = img.shape
            self._sum = img.copy()
            self._count = np.ones(img.shape, dtype=np.int32)
            self._offsets.append(np.zeros((img.shape[0], 2)))
            self._times.append(float(t_start_s))
            self._shifts.append(np.zeros(2))
            rec = MemberRecord(frame_id, index, True, None, "first frame: the series' grid",
                               float(t_start_s), [0.0, 0.0], None, 0.0, None)
            self.records.append(rec)
            return rec
        if img.shape != self.shape:
            rec = MemberRecord(frame_id, index, False, REASON_SHAPE,
                               f"shape {img.shape} differs from the series' {self.shape}",
                               float(t_start_s), [0.0, 0.0], None, None, None)
            self.records.append(rec)
            return rec
        ref = self.reference()
        ref = np.where(np.isfinite(ref), ref, np.nanmean(ref))
        pred = self.predicted_shift_px(float(t_start_s))
        near = pred if pred is not None else self._shifts[-1] + self._jump_px
        reg = register_frame(ref, img, n_reference=self.n_members, gain=self.gain,
                             nonrigid=self.nonrigid, near_px=near, **self._reg)
        total = reg.total_shift_px
        line_rms = float(np.sqrt(((reg.line_offsets_px - reg.line_offsets_px.mean(axis=0))
                                  ** 2).sum(axis=1).mean()))
        reason, message = None, "registered"
        excess = None if pred is None else total - pred
        if reg.residual_chi2 > self.max_residual_chi2:
            reason = REASON_RESIDUAL
            message = (f"residual {reg.residual_chi2:.2f} x the shot noise after registration, "
                       f"above {self.max_residual_chi2:g}: the image changed (specimen moved "
                       "within the frame, focus or dose changed)")
        elif excess is not None and np.hypot(*excess) > self.max_jump_px:
            if (self._pending_jump is not None
                    and np.hypot(*(excess - self._pending_jump)) <= self.max_jump_px / 2):
                # Two frames in a row agree on the new place: the specimen
                # jumped and settled there.  Follow it.
                self._jump_px = self._jump_px + excess
                message = (f"the specimen settled {np.hypot(*excess):.1f} px from the drift's "
                           "track after a jump; the track follows it from this frame on")
                excess = np.zeros(2)
            else:
                reason = REASON_JUMP
                message = (f"shift ({total[0]:.1f}, {total[1]:.1f}) px is "
                           f"{np.hypot(*excess):.1f} px from the drift's prediction "
                           f"({pred[0]:.1f}, {pred[1]:.1f}); more than {self.max_jump_px:g} px: "
                           "the specimen jumped")
        if reason is not None:
            pass
        elif len(self._chi2) >= 2 and reg.residual_chi2 > self.max_residual_ratio * float(
                np.median(self._chi2)):
            med = float(np.median(self._chi2))
            reason = REASON_RESIDUAL
            message = (f"residual {reg.residual_chi2:.2f} is {reg.residual_chi2 / med:.2f} x the "
                       f"series' median {med:.2f}, above {self.max_residual_ratio:g}: the image "
                       "changed (specimen moved within the frame, focus or dose changed)")
        accepted = reason is None
        self._pending_jump = excess if reason == REASON_JUMP else None
        if accepted:
            good = reg.valid
            self._sum[good] += reg.warped[good]
            self._count[good] += 1
            self._offsets.append(reg.line_offsets_px + reg.shift_px[None, :])
            self._times.append(float(t_start_s))
            self._shifts.append(total - self._jump_px)   # the drift track, jumps taken out
            self._chi2.append(reg.residual_chi2)
        rec = MemberRecord(frame_id, index, accepted, reason, message, float(t_start_s),
                           [float(v) for v in total], float(reg.residual_chi2), line_rms,
                           [float(v) for v in reg.jitter_px])
        self.records.append(rec)
        return rec

    # ------------------------------------------------------------------ average

    def average(self, *, correct_drift: bool = True, normalise_lines: bool = True,
                velocity_px_per_s=None) -> SeriesAverage:
        """The registered sum, with the drift and the grid's own jitter undone.

        Parameters
        ----------
        correct_drift : bool
            Undo the steady drift inside the frames (needs ``line_time_s`` and
            at least two members, or `velocity_px_per_s`).
        normalise_lines : bool
            Put the grid at the members' mean per-line offset.
        velocity_px_per_s : (2,), optional
            Use this drift velocity instead of the one measured.

        Returns
        -------
        SeriesAverage
            Cropped to the region every accepted member covers.
        """
        if self._sum is None:
            raise ValueError("the series is empty")
        n = self.n_members
        rows, cols = self.shape
        mean = self._sum / np.maximum(self._count, 1)
        full = self._count >= n
        rr = np.zeros((rows, 1))
        cc = np.zeros((rows, 1))
        info: dict = {"n_members": n, "n_excluded": self.n_excluded}
        if normalise_lines and n > 1:
            off = np.stack(self._offsets)            # (n, rows, 2) incl. rigid shifts
            rel = off - off.mean(axis=1, keepdims=True)
            mean_rel = rel.mean(axis=0)              # the grid's own per-line error
            rr = rr - mean_rel[:, 0:1]
            cc = cc - mean_rel[:, 1:2]
            info["grid_line_rms_px"] = float(np.sqrt((mean_rel**2).sum(axis=1).mean()))
        v = None
        if correct_drift:
            v = (np.asarray(velocity_px_per_s, float).reshape(2) if velocity_px_per_s is not None
                 else self.velocity_px_per_s())
            if v is not None and self.line_time_s:
                t_px = self.dwell_s or 0.0
                r_idx = np.arange(rows, dtype=float)[:, None]
                c_idx = np.arange(cols, dtype=float)[None, :]
                t = r_idx * self.line_time_s + c_idx * t_px
                t_mid = ((rows - 1) * self.line_time_s + (cols - 1) * t_px) / 2.0
                rr = rr + v[0] * (t - t_mid)
                cc = cc + v[1] * (t - t_mid)
                info["drift_velocity_px_per_s"] = [float(x) for x in v]
                info["drift_over_frame_px"] = [float(x) * rows * self.line_time_s for x in v]
            else:
                v = None
        rr = np.broadcast_to(rr, (rows, cols))
        cc = np.broadcast_to(cc, (rows, cols))
        disp = max(float(np.abs(rr).max()), float(np.abs(cc).max()))
        margin = 0
        if disp > 1e-9:
            filled = np.where(full, mean, mean[full].mean() if full.any() else 0.0)
            grid_r = np.arange(rows, dtype=float)[:, None] + rr
            grid_c = np.arange(cols, dtype=float)[None, :] + cc
            mean = ndimage.map_coordinates(filled, [grid_r, grid_c], order=3, mode="nearest")
            # no pixel moves by more than `disp`: shrinking the full-coverage box by
            # that (plus the spline's reach) keeps only pixels made of full coverage
            margin = int(math.ceil(disp)) + 2
        box = _full_box(full, margin=margin)
        r0, r1, c0, c1 = box
        summed = mean[r0:r1, c0:c1] * n
        info["box"] = list(box)
        return SeriesAverage(summed=summed, box=box, n_members=n, velocity_px_per_s=v, info=info)


def _full_box(mask: np.ndarray, *, margin: int = 0) -> tuple:
    """A large axis-aligned rectangle inside `mask` (greedy shrink from the bounding box)."""
    if not mask.any():
        raise ValueError("no region is covered by every member of the series")
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    r0, r1, c0, c1 = rows[0], rows[-1] + 1, cols[0], cols[-1] + 1
    while r1 - r0 > 8 and c1 - c0 > 8:
        sub = mask[r0:r1, c0:c1]
        if sub.all():
            break
        bad = [(~sub[0]).sum() / sub.shape[1], (~sub[-1]).sum() / sub.shape[1],
               (~sub[:, 0]).sum() / sub.shape[0], (~sub[:, -1]).sum() / sub.shape[0]]
        k = int(np.argmax(bad))
        if k == 0:
            r0 += 1
        elif k == 1:
            r1 -= 1
        elif k == 2:
            c0 += 1
        else:
            c1 -= 1
    r0, c0 = r0 + margin, c0 + margin
    r1, c1 = r1 - margin, c1 - margin
    if r1 - r0 < 8 or c1 - c0 < 8:
        raise ValueError("the region every member covers is smaller than 8 x 8 pixels: the "
                         "specimen drifted too far over the series")
    return int(r0), int(r1), int(c0), int(c1)
