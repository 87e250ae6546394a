"""Flags -> scan regions in stage coordinates, corrected for specimen drift (pure numerics).

The names below are imported on first use (PEP 562), so that reading
:data:`CAUTION` costs no numerics.
"""

__all__ = ["DriftImage", "DriftModel", "DriftTracker", "PairDrift", "estimate_pair_drift",
           "frame_times_s", "FrameGeometry", "overlap_fraction", "stage_region", "CAUTION",
           "Candidate", "Planner", "Proposal", "candidate_from_flag", "merge_candidates",
           "proposal_from_json", "scan_request_fields"]

_MODULES = {
    "livequant.proposals.drift": ("DriftImage", "DriftModel", "DriftTracker", "PairDrift",
                                  "estimate_pair_drift", "frame_times_s"),
    "livequant.proposals.geometry": ("FrameGeometry", "overlap_fraction", "stage_region"),
    "livequant.proposals.caution": ("CAUTION",),
    "livequant.proposals.propose": ("Candidate", "Planner", "Proposal", "candidate_from_flag",
                                    "merge_candidates", "proposal_from_json",
                                    "scan_request_fields"),
}
_LAZY = {name: module for module, names in _MODULES.items() for name in names}


from livequant._lazy import lazy_names  # noqa: E402

__getattr__, __dir__ = lazy_names(__name__, _LAZY, __all__)
