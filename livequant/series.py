"""Series of frames of one region: which frames belong together, and their aggregate.

Frames belong to one series when they share a sidecar ``series_id``, or when
they are pages of one container file (frame ids ``NAME#INDEX``, series
``NAME``); :func:`series_key` says which.  A :class:`SeriesBuilder` takes the
members one by one (any source: the daemon's frames as they are done, or the
pages of a container in order) and returns, after each, what became of the
frame and, when due, the aggregate to analyse as a frame of its own:

- a fast-scan series: the registered running sum
  (:class:`~livequant.analysis.series.SeriesStack`);
- an orthogonal pair: two members whose scan rotations differ by 90 degrees,
  combined by :func:`~livequant.analysis.orthogonal.correct_orthogonal_pair`.

An aggregate frame carries ``extra["series_role"] = "aggregate"`` and a
``series`` block in its metadata; :func:`livequant.pipeline.analyze_frame`
then keeps its uncertainties at the summed dose's bound and does not undo the
drift again.  No I/O here: :mod:`livequant.daemon.series` does the files,
the ledger and the events.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime

import numpy as np

from livequant.analysis.orthogonal import correct_orthogonal_pair
from livequant.analysis.series import MemberRecord, SeriesStack
from livequant.frames import Frame, FrameMeta, frame_from_array

__all__ = ["series_key", "is_aggregate", "SeriesBuilder", "SeriesStep", "AGGREGATE_ROLE",
           "aggregate_id"]

AGGREGATE_ROLE = "aggregate"


def series_key(meta: FrameMeta) -> str | None:
    """The series a frame belongs to: its ``series_id``, else the container of a
    ``NAME#INDEX`` page, else None.  Aggregates belong to none."""
    if is_aggregate(meta):
        return None
    if meta.series_id:
        return str(meta.series_id)
    fid = meta.frame_id or ""
    if "#" in fid:
        name, _, index = fid.rpartition("#")
        if name and index:
            return name
    return None


def is_aggregate(meta: FrameMeta) -> bool:
    return (meta.extra or {}).get("series_role") == AGGREGATE_ROLE


def _safe(text: str) -> str:
    """A file-name-safe form of a series key (ids become folder names)."""
    out = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in text)
    return out.strip(".") or "series"


def aggregate_id(key: str, kind: str, n: int) -> str:
    """``KEY~avgNNN`` for a series average of N frames, ``KEY~pair`` for a pair."""
    return f"{_safe(key)}~pair" if kind == "orthogonal" else f"{_safe(key)}~avg{n:03d}"


def _t_seconds(meta: FrameMeta) -> float | None:
    if not meta.acquired_at:
        return None
    try:
        return datetime.fromisoformat(str(meta.acquired_at)).timestamp()
    except ValueError:
        return None


@dataclass(frozen=True)
class SeriesStep:
    """What one member did: its record, and the aggregate frame when one is due."""

    key: str
    record: MemberRecord
    kind: str                     # "average" or "orthogonal"
    aggregate: Frame | None = None
    info: dict = field(default_factory=dict)


class SeriesBuilder:
    """Members of one series in, aggregates out (see the module docstring).

    Parameters
    ----------
    key : str
    settings : Settings
        ``settings.series`` for the registration, ``analysis.scan_drift.flyback_s``
        for the line time, ``analysis.refine.gain_counts_per_electron``.
    """

    def __init__(self, key: str, settings):
        self.key = key
        self.cfg = settings.series
        self.flyback_s = settings.analysis.scan_drift.flyback_s
        self.gain = settings.analysis.refine.gain_counts_per_electron
        self.stack: SeriesStack | None = None
        self.first: Frame | None = None
        self.kind = "average"
        self.closed = False
        self.members: list[MemberRecord] = []
        self.member_meta: list[FrameMeta] = []
        self._t0: float | None = None

    @property
    def n_members(self) -> int:
        return 0 if self.stack is None else self.stack.n_members

    def _timing(self, frame: Frame) -> tuple[float | None, float | None]:
        dwell_us = frame.meta.dwell_time_us
        if not dwell_us:
            return None, None
        cols = frame.shape[1]
        return cols * dwell_us * 1e-6 + self.flyback_s, dwell_us * 1e-6

    def add(self, frame: Frame) -> SeriesStep:
        """Register `frame` to the series; return its record and any aggregate now due."""
        meta = frame.meta
        line_s, dwell_s = self._timing(frame)
        t = _t_seconds(meta)
        if self.first is None:
            self.first = frame
            self._t0 = t
            self.stack = SeriesStack(
                gain=self.gain, line_time_s=line_s, dwell_s=dwell_s, nonrigid=self.cfg.nonrigid,
                max_jump_px=self.cfg.max_jump_px, max_residual_chi2=self.cfg.max_residual_chi2,
                max_residual_ratio=self.cfg.max_residual_ratio,
                iterations=self.cfg.iterations, smooth_lines=self.cfg.smooth_lines,
                smooth_px=self.cfg.smooth_px)
        t_rel = None if (t is None or self._t0 is None) else t - self._t0
        rot = (meta.scan_rotation_deg - self.first.meta.scan_rotation_deg) % 180.0
        if self.closed:
            return self._refuse(frame, t_rel, "closed", "the orthogonal pair of this series is "
                                "complete; start a new series_id for more frames")
        if self.n_members == 1 and len(self.members) == 1 and abs(rot - 90.0) < 1.0:
            return self._pair(frame, line_s, dwell_s, t_rel)
        if min(rot, 180.0 - rot) > 1.0:
            return self._refuse(frame, t_rel, "rotation",
                                f"scan rotation {meta.scan_rotation_deg:g} deg differs from the "
                                f"series' {self.first.meta.scan_rotation_deg:g} deg; a series "
                                "is averaged at one scan rotation")
        if frame.meta.pixel_size_pm != self.first.meta.pixel_size_pm:
            return self._refuse(frame, t_rel, "pixel-size",
                                f"pixel size {meta.pixel_size_pm:g} pm differs from the series' "
                                f"{self.first.meta.pixel_size_pm:g} pm")
        rec = self.stack.add(np.asarray(frame.pixels, float), frame_id=frame.frame_id,
                             t_start_s=t_rel)
        self.members.append(rec)
        self.member_meta.append(meta)
        agg = None
        n = self.stack.n_members
        if (rec.accepted and n >= self.cfg.min_members
                and (n - self.cfg.min_members) % self.cfg.analyse_every == 0):
            avg = self.stack.average()
            agg = self._aggregate_frame(avg.summed, "average", n, avg.info, avg.box)
        return SeriesStep(self.key, rec, "average", agg)

    def _refuse(self, frame, t_rel, reason, message) -> SeriesStep:
        rec = MemberRecord(frame.frame_id, len(self.members), False, reason, message,
                           float(t_rel or 0.0), [0.0, 0.0], None, None, None)
        self.members.append(rec)
        self.member_meta.append(frame.meta)
        return SeriesStep(self.key, rec, self.kind)

    def _pair(self, frame, line_s, dwell_s, t_rel) -> SeriesStep:
        self.kind = "orthogonal"
        self.closed = True
        if frame.shape != self.first.shape or frame.shape[0] != frame.shape[1] or not line_s:
            return self._refuse(frame, t_rel, "shape", "an orthogonal pair needs two square "
                                "frames of one size with a dwell time")
        # order the pair: the frame rotated +90 from the other goes second
        first, second = self.first, frame
        if (frame.meta.scan_rotation_deg - self.first.meta.scan_rotation_deg) % 360.0 > 180.0:
            first, second = frame, self.first
        res = correct_orthogonal_pair(first.pixels, second.pixels, line_time_s=line_s,
                                      dwell_s=dwell_s or 0.0, gain=self.gain,
                                      smooth_lines=self.cfg.smooth_lines,
                                      smooth_px=self.cfg.smooth_px)
        rec = MemberRecord(frame.frame_id, len(self.members), True, None,
                           "orthogonal partner of " + self.first.frame_id, float(t_rel or 0.0),
                           [float(v) for v in res.shift_px], None,
                           float(np.sqrt((res.line_offsets_px**2).sum(axis=2).mean())), None)
        self.members.append(rec)
        self.member_meta.append(frame.meta)
        info = {"agreement": res.agreement, "agreement_uncorrected": res.agreement_uncorrected,
                "drift_velocity_px_per_s": [float(v) for v in res.velocity_px_per_s],
                "first_frame_id": first.frame_id, **res.info}
        agg = self._aggregate_frame(res.summed, "orthogonal", 2, info, res.box, base=first)
        return SeriesStep(self.key, rec, "orthogonal", agg, info)

    def _aggregate_frame(self, summed, kind, n, info, box, base: Frame | None = None) -> Frame:
        base = base or self.first
        m = base.meta
        members = [r.frame_id for r in self.members if r.accepted]
        dwell = None if m.dwell_time_us is None else m.dwell_time_us * n
        # the crop moves the frame centre: keep the stage position of the new centre
        r0, r1, c0, c1 = box
        rows, cols = base.shape
        d_col = ((c0 + c1 - 1) / 2 - (cols - 1) / 2) * m.pixel_size_pm / 1000.0
        d_row = ((r0 + r1 - 1) / 2 - (rows - 1) / 2) * m.pixel_size_pm / 1000.0
        th = math.radians(m.scan_rotation_deg)
        sx = m.stage_x_nm + d_col * math.cos(th) - d_row * math.sin(th)
        sy = m.stage_y_nm + d_col * math.sin(th) + d_row * math.cos(th)
        fid = aggregate_id(self.key, kind, n)
        block = {"series_id": self.key, "kind": kind, "n_members": n,
                 "n_excluded": sum(1 for r in self.members if not r.accepted),
                 "members": members, "box_px": [int(v) for v in box],
                 **{k: v for k, v in info.items() if k != "box"}}
        meta = FrameMeta(frame_id=fid, pixel_size_pm=m.pixel_size_pm, dwell_time_us=dwell,
                         stage_x_nm=sx, stage_y_nm=sy, scan_rotation_deg=m.scan_rotation_deg,
                         acquired_at=m.acquired_at, detector=m.detector,
                         extra={"series_role": AGGREGATE_ROLE, "series": block},
                         series_id=None)
        return frame_from_array(np.asarray(summed, dtype=np.float32), meta)
