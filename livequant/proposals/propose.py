"""Flags -> proposed scan regions: stage coordinates, merged, not repeated, budgeted.

Every region is kept twice: as the specimen sees it (``specimen_region``: the
stage region where it was seen minus the drift ``d`` at that time, i.e. stage
coordinates at the session's drift origin) and as placed for the instrument
(``region``: the specimen region plus the drift predicted for the moment the
instrument will get there).  Merging and the "already visited" test work on
specimen regions, so drift never makes an old region look new.

A straight feature (a domain wall, an interface) seen again on later frames is
the same feature: one proposal, a strip along it, not one per frame (see
:meth:`Planner.same_feature`).  A placed region grows on every side by
``drift_margin_sigma`` times the drift uncertainty predicted for the time it
will be scanned, so a revisit placed before the drift is well measured still
holds its feature.

Ranking (:func:`priority`): ``strength x novelty / dose cost`` --
``strength`` is the flag's score (0..1), ``novelty`` the share of the region
no earlier visit or proposal covers (0..1), ``dose cost`` ``1 + D_prior /
D_scan``: 1 on fresh specimen, 2 where the most exposed part already had one
such scan's dose (1 when the dose is not known).

Proposals are suggestions to the operator (see :data:`CAUTION`).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from livequant.proposals.caution import CAUTION  # shown wherever a proposal is shown
from livequant.proposals.geometry import (FrameGeometry, bounding_region, overlap_area,
                                          overlap_fraction, shift_region, stage_region)

__all__ = ["CAUTION", "LINE_KINDS", "POINT_KINDS", "priority", "Candidate", "Proposal", "Planner",
           "candidate_from_flag", "merge_candidates", "scan_request_fields", "scan_shape", "proposal_from_json"]

#: Kinds of flags that mark a straight, extended feature (one proposal per feature).
LINE_KINDS = ("domain-wall", "interface")

#: Kinds of flags that mark a point feature (placement must wait for a drift model).
POINT_KINDS = ("vortex", "antivortex", "anomaly")


def priority(strength: float, novelty: float, dose_prior_e_per_a2: float | None,
             dose_scan_e_per_a2: float | None) -> float:
    """Rank of a proposal: ``strength x novelty / (1 + D_prior / D_scan)`` (module docstring)."""
    cost = 1.0
    if dose_prior_e_per_a2 is not None and dose_scan_e_per_a2:
        cost = 1.0 + max(float(dose_prior_e_per_a2), 0.0) / float(dose_scan_e_per_a2)
    return float(strength) * float(np.clip(novelty, 0.0, 1.0)) / cost


@dataclass(frozen=True)
class Candidate:
    """A region worth a look, before it gets an id.

    ``specimen_region`` is drift-free (see the module docstring); ``t_seen_s``
    the time the frame saw it; ``score`` 0..1.
    """

    specimen_region: dict
    frame_id: str
    t_seen_s: float
    score: float
    kinds: tuple[str, ...]
    reasons: tuple[str, ...]
    flag_ids: tuple[int, ...]
    rules: tuple[str, ...] = ()


@dataclass(frozen=True)
class Proposal:
    """A proposed scan region with its id, placement and scan settings."""

    id: str
    candidate: Candidate
    region: dict                 # stage region, placed for `placed_for_s`
    placed_for_s: float          # unix time the placement predicts the drift for
    drift_nm: tuple[float, float]
    sigma_drift_nm: float
    pixel_size_pm: float
    dwell_time_us: float
    shape_px: tuple[int, int]
    state: str = "open"

    @property
    def score(self) -> float:
        return self.candidate.score

    @property
    def reason(self) -> str:
        return "; ".join(self.candidate.reasons)

    def to_json(self) -> dict:
        c = self.candidate
        return {"id": self.id, "state": self.state, "frame_id": c.frame_id, "score": c.score,
                "region": dict(self.region), "specimen_region": dict(c.specimen_region),
                "t_seen_s": c.t_seen_s, "placed_for_s": self.placed_for_s,
                "drift_nm": list(self.drift_nm), "sigma_drift_nm": self.sigma_drift_nm,
                "pixel_size_pm": self.pixel_size_pm, "dwell_time_us": self.dwell_time_us,
                "shape_px": list(self.shape_px), "reason": self.reason,
                "kinds": list(c.kinds), "rules": list(c.rules), "flag_ids": list(c.flag_ids),
                "caution": CAUTION}


def candidate_from_flag(flag, geometry: FrameGeometry, *, flag_id: int, t_seen_s: float,
                        drift_nm, margin_nm: float = 1.0, min_size_nm: float = 4.0,
                        max_size_nm: float = 40.0) -> Candidate:
    """The drift-free region around one flag, grown by `margin_nm`, clamped in size.

    Parameters
    ----------
    flag : livequant.rules.types.Flag
    geometry : FrameGeometry
        Of the frame the flag was raised on.
    drift_nm : (2,)
        ``d`` at the frame's time (subtracted to make the region drift-free).
    """
    r = geometry.region_to_stage(flag.region)
    w = float(np.clip(r["width_nm"] + 2 * margin_nm, min_size_nm, max_size_nm))
    h = float(np.clip(r["height_nm"] + 2 * margin_nm, min_size_nm, max_size_nm))
    d = np.asarray(drift_nm, float).reshape(2)
    spec = stage_region(r["center_x_nm"] - d[0], r["center_y_nm"] - d[1], w, h,
                        r["rotation_deg"])
    msg = flag.message or flag.kind
    # "domain wall: ..." from the rule already names its kind: no "domain-wall: domain wall:"
    said = msg.lower().replace("-", " ").startswith(flag.kind.lower().replace("-", " "))
    return Candidate(specimen_region=spec, frame_id=flag.frame_id or "", t_seen_s=float(t_seen_s),
                     score=float(flag.score), kinds=(flag.kind,),
                     reasons=(msg if said else f"{flag.kind}: {msg}",),
                     flag_ids=(int(flag_id),), rules=(flag.rule,) if flag.rule else ())


def _shared_fraction(a: dict, b: dict) -> float:
    """Common area over the smaller region's area."""
    small = min(a["width_nm"] * a["height_nm"], b["width_nm"] * b["height_nm"])
    return overlap_area(a, b) / small if small > 0 else 0.0


def _unique(seq) -> tuple:
    return tuple(dict.fromkeys(seq))


def merge_candidates(cands, *, merge_overlap: float = 0.3,
                     max_size_nm: float = 40.0) -> list[Candidate]:
    """Merge candidates whose regions share at least `merge_overlap` of the smaller one.

    The merged region is the bounding rectangle in the orientation of the
    higher-scored one (never larger than `max_size_nm` a side: such pairs stay
    apart); it keeps the highest score and every reason, kind and flag id.
    Highest scores first.
    """
    out = sorted(cands, key=lambda c: -c.score)
    merged_any = True
    while merged_any:
        merged_any = False
        for i in range(len(out)):
            for j in range(i + 1, len(out)):
                a, b = out[i], out[j]
                if _shared_fraction(a.specimen_region, b.specimen_region) < merge_overlap:
                    continue
                box = bounding_region([a.specimen_region, b.specimen_region],
                                      a.specimen_region["rotation_deg"])
                if max(box["width_nm"], box["height_nm"]) > max_size_nm:
                    continue
                out[i] = Candidate(
                    specimen_region=box, frame_id=a.frame_id, t_seen_s=max(a.t_seen_s,
                                                                           b.t_seen_s),
                    score=max(a.score, b.score), kinds=_unique(a.kinds + b.kinds),
                    reasons=_unique(a.reasons + b.reasons),
                    flag_ids=_unique(a.flag_ids + b.flag_ids), rules=_unique(a.rules + b.rules))
                del out[j]
                merged_any = True
                break
            if merged_any:
                break
    return sorted(out, key=lambda c: -c.score)


def scan_shape(region: dict, *, pixel_size_pm: float, max_side_px: int = 2048,
               min_side_px: int = 64) -> tuple[tuple[int, int], float]:
    """``((rows, cols), pixel_size_pm)`` to cover `region` (pixel size grows to fit max side)."""
    w_pm, h_pm = region["width_nm"] * 1000, region["height_nm"] * 1000
    px = max(float(pixel_size_pm), max(w_pm, h_pm) / max_side_px)
    cols = int(min(max(round(w_pm / px), min_side_px), 8192))
    rows = int(min(max(round(h_pm / px), min_side_px), 8192))
    return (rows, cols), w_pm / cols


def scan_request_fields(proposal: Proposal, *, request_id: str | None = None) -> dict:
    """The ``scan-request`` message (``sim_instrument.requests.ScanRequest`` schema).

    Extra keys (``proposal_id``, ``score``, ``reason``, ``caution``) are
    allowed by the schema and passed into the new frame's sidecar.
    """
    r = proposal.region
    return {"id": request_id or proposal.id, "center_x_nm": r["center_x_nm"],
            "center_y_nm": r["center_y_nm"], "fov_nm": r["width_nm"],
            "shape_px": list(proposal.shape_px), "scan_rotation_deg": r["rotation_deg"],
            "dwell_time_us": proposal.dwell_time_us, "proposal_id": proposal.id,
            "score": proposal.score, "reason": proposal.reason, "caution": CAUTION}


@dataclass
class Planner:
    """Session state of the proposal stage: what was proposed or visited, the budget.

    Parameters mirror ``[proposals]`` of the settings.  All regions held here
    are drift-free specimen regions.
    """

    min_score: float = 0.3
    max_size_nm: float = 40.0
    merge_overlap: float = 0.3
    visited_overlap: float = 0.5
    max_per_frame: int = 3
    max_per_session: int = 50
    pixel_size_pm: float = 10.0
    dwell_time_us: float = 4.0
    max_side_px: int = 2048
    drift_margin_sigma: float = 3.0
    line_max_angle_deg: float = 15.0
    line_max_offset_nm: float = 1.5
    visited: list = field(default_factory=list)
    proposed: list = field(default_factory=list)
    proposed_kinds: list = field(default_factory=list)
    n_proposed: int = 0
    n_same_feature: int = 0
    n_skipped_visited: int = 0
    n_over_budget: int = 0
    n_below_score: int = 0

    @classmethod
    def from_settings(cls, cfg) -> "Planner":
        keys = ("min_score", "max_size_nm", "merge_overlap",
                "visited_overlap", "max_per_frame", "max_per_session", "pixel_size_pm",
                "dwell_time_us", "max_side_px", "drift_margin_sigma")
        return cls(**{k: getattr(cfg, k) for k in keys})

    def add_visited(self, specimen_region: dict) -> None:
        self.visited.append(dict(specimen_region))

    def add_proposed(self, specimen_region: dict, kinds=()) -> None:
        """Remember an existing proposal (also on resume), counting it in the budget."""
        self.proposed.append(dict(specimen_region))
        self.proposed_kinds.append(tuple(kinds))
        self.n_proposed += 1

    def novelty(self, specimen_region: dict) -> float:
        """Share of the region no visited or proposed region covers (largest single cover)."""
        covers = [overlap_fraction(specimen_region, v) for v in self.visited + self.proposed]
        return 1.0 - max(covers, default=0.0)

    def same_feature(self, cand: Candidate) -> int | None:
        """Index of an earlier proposal of the same straight feature, or None.

        A line feature (:data:`LINE_KINDS`) is the same as an earlier proposal
        of its kind when their long axes are parallel within
        `line_max_angle_deg` and the new centre lies within
        `line_max_offset_nm` (or half the wider band) of the earlier axis: a
        straight wall or interface seen again further along.
        """
        kinds = set(cand.kinds) & set(LINE_KINDS)
        if not kinds:
            return None
        a = _line(cand.specimen_region)
        if a is None:
            return None
        for k, (region, pk) in enumerate(zip(self.proposed, self.proposed_kinds)):
            if not kinds & set(pk):
                continue
            b = _line(region)
            if b is None:
                continue
            cos = abs(float(a[1] @ b[1]))
            if cos < np.cos(np.radians(self.line_max_angle_deg)):
                continue
            d = a[0] - b[0]
            off = abs(float(d[0] * b[1][1] - d[1] * b[1][0]))
            if off <= max(self.line_max_offset_nm, a[2], b[2]):
                return k
        return None

    def is_visited(self, specimen_region: dict) -> bool:
        """Covered (by `visited_overlap` of its area) by a visited or proposed region."""
        return any(overlap_fraction(specimen_region, v) >= self.visited_overlap
                   for v in self.visited + self.proposed)

    def plan(self, candidates) -> list[Candidate]:
        """The candidates to propose now: scored, merged, new, within budget."""
        keep = []
        for c in candidates:
            if c.score < self.min_score:
                self.n_below_score += 1
            else:
                keep.append(c)
        merged = merge_candidates(keep, merge_overlap=self.merge_overlap,
                                  max_size_nm=self.max_size_nm)
        out = []
        for c in merged:
            if self.is_visited(c.specimen_region):
                self.n_skipped_visited += 1
                continue
            if self.same_feature(c) is not None:
                self.n_same_feature += 1
                continue
            if len(out) >= self.max_per_frame or self.n_proposed + len(out) >= \
                    self.max_per_session:
                self.n_over_budget += 1
                continue
            out.append(c)
        return out

    def place(self, proposal_id: str, cand: Candidate, *, drift_nm, sigma_drift_nm: float,
              placed_for_s: float) -> Proposal:
        """Give a candidate its id and place it where the drift will have moved it.

        The region grows by ``drift_margin_sigma x sigma_drift_nm`` on every
        side: the feature lies within it at that confidence.
        """
        d = np.asarray(drift_nm, float).reshape(2)
        region = shift_region(cand.specimen_region, d)
        grow = 2.0 * self.drift_margin_sigma * max(float(sigma_drift_nm), 0.0)
        if grow > 0:   # never past max_size_nm (an unknown drift has an infinite sigma)
            w, h = region["width_nm"], region["height_nm"]
            region = {**region, "width_nm": min(w + grow, max(w, self.max_size_nm)),
                      "height_nm": min(h + grow, max(h, self.max_size_nm))}
        shape, px = scan_shape(region, pixel_size_pm=self.pixel_size_pm,
                               max_side_px=self.max_side_px)
        return Proposal(id=proposal_id, candidate=cand, region=region,
                        placed_for_s=float(placed_for_s), drift_nm=(float(d[0]), float(d[1])),
                        sigma_drift_nm=float(sigma_drift_nm), pixel_size_pm=px,
                        dwell_time_us=float(self.dwell_time_us), shape_px=shape)

    def commit(self, proposal: Proposal) -> None:
        self.add_proposed(proposal.candidate.specimen_region, proposal.candidate.kinds)

    def replace_placement(self, proposal: Proposal, *, drift_nm, sigma_drift_nm: float,
                          placed_for_s: float) -> Proposal:
        """The same proposal placed for another time (at accept)."""
        placed = self.place(proposal.id, proposal.candidate, drift_nm=drift_nm,
                            sigma_drift_nm=sigma_drift_nm, placed_for_s=placed_for_s)
        return replace(placed, state=proposal.state)

    def status(self) -> dict:
        return {"proposed": self.n_proposed, "skipped_visited": self.n_skipped_visited,
                "same_feature": self.n_same_feature,
                "over_budget": self.n_over_budget, "below_score": self.n_below_score,
                "budget_left": max(0, self.max_per_session - self.n_proposed)}


def _line(region: dict):
    """``(centre, unit long axis, half width)`` of an elongated region (aspect >= 2), else None."""
    w, h = region["width_nm"], region["height_nm"]
    if max(w, h) < 2.0 * min(w, h):
        return None
    t = np.radians(region["rotation_deg"] + (0.0 if w >= h else 90.0))
    return (np.array([region["center_x_nm"], region["center_y_nm"]]),
            np.array([np.cos(t), np.sin(t)]), 0.5 * min(w, h))


def proposal_from_json(d: dict) -> Proposal:
    """Rebuild a proposal from its :meth:`Proposal.to_json` (the ledger payload)."""
    cand = Candidate(specimen_region=dict(d["specimen_region"]), frame_id=d.get("frame_id") or "",
                     t_seen_s=float(d["t_seen_s"]), score=float(d["score"]),
                     kinds=tuple(d.get("kinds") or ()), reasons=tuple(
                         [s for s in (d.get("reason") or "").split("; ") if s]),
                     flag_ids=tuple(d.get("flag_ids") or ()), rules=tuple(d.get("rules") or ()))
    return Proposal(id=d["id"], candidate=cand, region=dict(d["region"]),
                    placed_for_s=float(d["placed_for_s"]), drift_nm=tuple(d["drift_nm"]),
                    sigma_drift_nm=float(d["sigma_drift_nm"]),
                    pixel_size_pm=float(d["pixel_size_pm"]),
                    dwell_time_us=float(d["dwell_time_us"]), shape_px=tuple(d["shape_px"]),
                    state=d.get("state", "open"))
