"""Helpers for the decision-loop tests: a fast analysis, a test rule, simulated frames."""

from __future__ import annotations

import numpy as np

from livequant.frames import write_frame
from livequant.pipeline import FrameResult
from livequant.rules.types import Flag, Region


def view_analyze(frame, settings):
    """No column fitting: a result with the frame's metadata (the view still gets a thumbnail).

    For tests of the decision plumbing, where the analysis itself is not under test.
    """
    return FrameResult(frame_id=frame.frame_id, meta=frame.meta,
                       shape=tuple(frame.pixels.shape), status="ok")


class SidecarRule:
    """A rule for tests: flags what the frame's sidecar lists under ``test_flags``.

    Each entry ``{"x_px", "y_px", "size_px", "kind", "score"}``; a sidecar with
    ``rule_raise`` makes the rule raise (a buggy plugin).
    """

    names = ("sidecar",)

    def __init__(self):
        self.calls = 0
        self.raised = 0

    def evaluate(self, view, session_view):
        self.calls += 1
        extra = view.meta.extra or {}
        if extra.get("rule_raise"):
            self.raised += 1
            raise RuntimeError("rule bug on purpose")
        out = []
        for f in extra.get("test_flags", []):
            out.append(Flag(kind=f.get("kind", "anomaly"), score=f.get("score", 0.8),
                            region=Region(f["x_px"], f["y_px"], f.get("size_px", 20),
                                          f.get("size_px", 20)),
                            message=f.get("message", "test flag"), rule="sidecar",
                            frame_id=view.frame_id))
        return out

    def status(self):
        return {"sidecar": {"calls": self.calls, "raised": self.raised}}


def write_sim(folder, acq, **extra) -> None:
    """Write a simulated acquisition as a frame file with extra sidecar keys."""
    side = dict(acq.sidecar)
    side.update(extra)
    write_frame(folder, side["frame_id"], np.asarray(acq.pixels), side, fmt="npy")
