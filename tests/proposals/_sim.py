"""Simulated frames for the proposal tests: drift images and views with known truth."""

from __future__ import annotations

import numpy as np

from livequant.frames import FrameMeta
from livequant.proposals.drift import DriftImage
from livequant.proposals.geometry import FrameGeometry
from livequant.rules.types import FrameView, bin_image


def drift_image(acq) -> DriftImage:
    """The DriftImage of a simulated acquisition, timed at its simulated mid-frame."""
    s = acq.sidecar
    g = FrameGeometry(s["stage_x_nm"], s["stage_y_nm"], s["pixel_size_pm"] / 1000,
                      s["scan_rotation_deg"], acq.pixels.shape)
    thumb, f = bin_image(acq.pixels)
    t_mid = acq.truth.meta["t_start_s"] + acq.truth.meta["frame_time_s"] / 2
    return DriftImage(acq.frame_id, t_mid, g, thumb, f)


def truth_drift_nm(acq) -> np.ndarray:
    """The simulator's drift averaged over the frame's lines (what registration sees)."""
    return np.asarray(acq.truth.drift_per_line_nm).mean(axis=0)


def view_of(acq) -> FrameView:
    """A FrameView of a simulated frame without analysis (meta, shape, thumbnail)."""
    s = acq.sidecar
    extra = {k: v for k, v in s.items() if k not in FrameMeta.__dataclass_fields__}
    meta = FrameMeta(frame_id=s["frame_id"], pixel_size_pm=s["pixel_size_pm"],
                     dwell_time_us=s["dwell_time_us"], stage_x_nm=s["stage_x_nm"],
                     stage_y_nm=s["stage_y_nm"], scan_rotation_deg=s["scan_rotation_deg"],
                     acquired_at=s["acquired_at"], detector=s["detector"], extra=extra)
    thumb, f = bin_image(acq.pixels)
    return FrameView(frame_id=s["frame_id"], meta=meta, shape=tuple(acq.pixels.shape),
                     status="ok", summary={"frame_id": s["frame_id"], "status": "ok"},
                     thumbnail=thumb, thumbnail_bin=f)
