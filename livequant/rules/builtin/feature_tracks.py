"""Built-in rule ``feature_tracks``: walls that moved, cores that appeared or vanished.

What it flags
    The decision loop follows walls and vortex cores across frames of the
    same specimen region, in specimen coordinates (stage minus the measured
    drift; :mod:`livequant.proposals.tracks`), and hands this frame's part
    of the tracks to the rules as ``context.tracks``.  This rule flags

    * ``wall-moved``: a wall track whose position along its normal changed
      by more than ``max_wall_shift_nm`` and by more than
      ``min_significance`` sigmas since the track began (or since it was
      last flagged: one flag per such step, not one per frame);
    * ``core-appeared``: a core in a place an earlier frame had imaged
      without it;
    * ``core-vanished``: a core no longer found where it was, for
      ``vanish_frames`` frames in a row (e.g. a vortex-antivortex pair that
      annihilated).

    Proposals made from these flags are suggestions to the operator: a
    moving wall may be moving *because* of the beam, so mind the dose budget
    of a beam-sensitive specimen; facility procedures and the instrument's
    interlocks come first.

Region
    ``wall-moved``: a square of ``region_nm`` at the wall's point in this
    frame; cores: a square of ``region_nm`` at the core's (last) position,
    in this frame's pixels.

Score
    ``wall-moved``: ``z^2 / (z^2 + 9)`` with ``z`` the shift over its sigma
    (0.5 at 3 sigma); cores: 0.8 (a topological change is rare and
    significant, but one plaquette core may be noise).

Evidence
    ``track_id``; walls: ``shift_nm``, ``sigma_shift_nm``,
    ``velocity_nm_per_s``, ``sigma_velocity_nm_per_s``, ``n_frames``; cores:
    ``winding``, ``xy_specimen_nm``, ``first_seen_in``.
"""

from __future__ import annotations

import math

from livequant.config import FeatureTrackSettings
from livequant.rules.hookspecs import hookimpl
from livequant.rules.types import Flag, Region

__all__ = ["FeatureTrackRule"]


class FeatureTrackRule:
    """Flags moved walls and appeared / vanished cores (see the module docstring)."""

    def __init__(self, settings: FeatureTrackSettings | None = None):
        self.cfg = settings or FeatureTrackSettings()
        self._flagged_at: dict[str, float] = {}  # wall track -> s_nm when last flagged

    @hookimpl
    def livequant_configure(self, config):
        self.cfg = config.rules.feature_tracks

    @hookimpl
    def livequant_frame_rules(self, view, context):
        tracks = getattr(context, "tracks", None) or {}
        if tracks.get("frame_id") != view.frame_id:
            return []
        cfg = self.cfg
        side_px = cfg.region_nm * 1000.0 / view.pixel_size_pm
        out = []
        for w in tracks.get("walls", ()):
            s = w.get("s_nm") or []
            sig = w.get("sigma_s_nm") or []
            if len(s) < 2:
                continue
            ref = self._flagged_at.get(w["track_id"], s[0])
            shift = s[-1] - ref
            sigma = math.hypot(sig[-1], sig[0])
            z = abs(shift) / sigma if sigma > 0 else math.inf
            if abs(shift) <= cfg.max_wall_shift_nm or z <= cfg.min_significance:
                continue
            self._flagged_at[w["track_id"]] = s[-1]
            v, sv = w.get("velocity_nm_per_s"), w.get("sigma_velocity_nm_per_s")
            vtxt = "" if v is None else f", {v * 1000:.1f} +- {sv * 1000:.1f} pm/s"
            out.append(Flag(
                "wall-moved", z * z / (z * z + 9.0) if math.isfinite(z) else 1.0,
                Region(w["x_px"], w["y_px"], side_px, side_px),
                f"wall {w['track_id']} moved {shift:+.2f} +- {sigma:.2f} nm along its normal "
                f"over {len(s)} frames{vtxt}",
                {"track_id": w["track_id"], "shift_nm": shift, "sigma_shift_nm": sigma,
                 "velocity_nm_per_s": v, "sigma_velocity_nm_per_s": sv, "n_frames": len(s)}))
        if cfg.flag_cores:
            for kind, key in (("core-appeared", "appeared"), ("core-vanished", "vanished")):
                for c in tracks.get(key, ()):
                    what = "appeared" if key == "appeared" else "vanished"
                    out.append(Flag(
                        kind, 0.8, Region(c["x_px"], c["y_px"], side_px, side_px),
                        f"core {c['track_id']} (winding {c['winding']:+d}) {what} here",
                        {"track_id": c["track_id"], "winding": c["winding"],
                         "xy_specimen_nm": c["xy_nm"][-1], "first_seen_in": c["frames"][0]}))
        return out
