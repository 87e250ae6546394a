"""Flags -> scan regions in stage coordinates, corrected for specimen drift (pure numerics)."""

from livequant.proposals.drift import (DriftImage, DriftModel, DriftTracker, PairDrift,
                                       estimate_pair_drift, frame_times_s)
from livequant.proposals.geometry import FrameGeometry, overlap_fraction, stage_region
from livequant.proposals.propose import (CAUTION, Candidate, Planner, Proposal,
                                         candidate_from_flag, merge_candidates,
                                         proposal_from_json, scan_request_fields)

__all__ = ["DriftImage", "DriftModel", "DriftTracker", "PairDrift", "estimate_pair_drift",
           "frame_times_s", "FrameGeometry", "overlap_fraction", "stage_region", "CAUTION",
           "Candidate", "Planner", "Proposal", "candidate_from_flag", "merge_candidates",
           "proposal_from_json", "scan_request_fields"]
