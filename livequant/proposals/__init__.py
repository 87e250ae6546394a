"""Flags -> scan regions in stage coordinates, corrected for specimen drift (pure numerics)."""

from livequant.proposals.drift import (DriftImage, DriftModel, DriftTracker, PairDrift,
                                       estimate_pair_drift, frame_times_s)
from livequant.proposals.geometry import FrameGeometry, overlap_fraction, stage_region

__all__ = ["DriftImage", "DriftModel", "DriftTracker", "PairDrift", "estimate_pair_drift",
           "frame_times_s", "FrameGeometry", "overlap_fraction", "stage_region"]
