"""The decision loop inside the daemon: rules -> flags, drift, proposals, operator decisions.

After each frame is done the main thread calls :meth:`DecisionLoop.on_frame`
with the frame's :class:`~livequant.rules.types.FrameView`: the rules run
(each isolated by the rule manager), their flags go to the ledger and out as
``flag`` events, the frame is registered against recent overlapping frames to
update the drift model (``drift`` rows, a ``status`` event), and new flags
become proposals (``proposals`` rows, ``proposal`` events).  The operator's
``accept`` / ``reject`` commands arrive on the command thread; an accepted
proposal is placed again for the drift expected when the instrument gets
there and published as ``scan-request``.

State shared between the two threads (drift model, planner, recent flags) is
guarded by one lock; the ledger and the publisher are thread-safe on their own.
Any exception inside a step is logged, counted and shown in the status; it
never reaches the main loop.

Order per frame: drift (the frame's specimen position), feature tracks (walls
and cores in specimen coordinates, :mod:`livequant.proposals.tracks`; this
frame's part goes to the rules as ``context.tracks`` and out as a ``status``
event with ``event: tracks``), rules, flags, visited regions, proposals.
"""

from __future__ import annotations

import logging
import threading
import time
from collections import deque
from typing import Callable

import numpy as np

from livequant.daemon.briefs import proposal_brief as _proposal_brief
from livequant.proposals.dose import DoseMap, dose_e_per_a2
from livequant.proposals.drift import DriftImage, DriftModel, DriftTracker, frame_times_s
from livequant.proposals.geometry import FrameGeometry, shift_region
from livequant.proposals.propose import (CAUTION, POINT_KINDS, Planner, candidate_from_flag,
                                         priority, proposal_from_json, scan_request_fields)
from livequant.proposals.tracks import FeatureTracker, frame_features

__all__ = ["DecisionLoop", "make_rules"]

log = logging.getLogger("livequant.decisions")

_KEEP_RECENT = 8


def make_rules(settings):
    """``(rule manager, session context)`` from settings.

    Raises
    ------
    livequant.config.ConfigError
        For a plugin that cannot be loaded or validated: start-up stops with
        the plugin's name, never the first frame.
    """
    from livequant.rules.manager import RuleManager, SessionContext

    return RuleManager.from_settings(settings), SessionContext.from_settings(settings)


class DecisionLoop:
    """Rules, drift and proposals of one session (see the module docstring).

    Parameters
    ----------
    settings : Settings
        ``settings.proposals`` and ``settings.drift`` are used here.
    ledger : Ledger
    publisher : EventPublisher
    rules, session_context : optional
        The rule manager and session context (default :func:`make_rules`).
    clock : callable
        Unix time now (tests replace it).
    warn : callable
        Adds a line to the daemon's warnings.
    """

    def __init__(self, settings, ledger, publisher, *, rules=None, session_context=None,
                 clock: Callable[[], float] = time.time, warn: Callable[[str], None] = log.warning):
        self.cfg = settings.proposals
        self.drift_cfg = settings.drift
        self.ledger = ledger
        self.publisher = publisher
        if rules is None:
            rules, made_ctx = make_rules(settings)
            session_context = session_context or made_ctx
        self.rules = rules
        if session_context is None:
            from livequant.rules.manager import SessionContext

            session_context = SessionContext.from_settings(settings)
        self.context = session_context
        self.clock = clock
        self.warn = warn
        d = self.drift_cfg
        self.model = DriftModel(memory_s=d.memory_s,
                                random_walk_nm_per_sqrt_s=d.random_walk_nm_per_sqrt_s,
                                prior_speed_nm_per_s=d.prior_speed_nm_per_s,
                                outlier_sigma=d.outlier_sigma)
        self.tracker = DriftTracker(self.model, keep_frames=d.keep_frames,
                                    min_overlap_fraction=d.min_overlap_fraction,
                                    search_radius_nm=d.search_radius_nm,
                                    min_search_radius_nm=d.min_search_radius_nm,
                                    upsample_factor=d.upsample_factor,
                                    ambiguity_ratio=d.ambiguity_ratio)
        self.planner = Planner.from_settings(self.cfg)
        ft = settings.rules.feature_tracks
        self.features = FeatureTracker(match_distance_nm=ft.match_distance_nm,
                                       max_angle_deg=ft.max_angle_deg,
                                       core_merge_nm=ft.core_merge_nm,
                                       core_match_nm=ft.core_match_nm,
                                       edge_margin_nm=ft.edge_margin_nm,
                                       vanish_frames=ft.vanish_frames)
        self.latest_tracks: dict = {}
        # Cores for the tracks come from the loop windings of the vortex rule (robust where
        # the displacement vanishes at a core), whether or not that rule is enabled.
        from livequant.rules.builtin.vortex_cores import VortexCoreRule

        self._core_finder = VortexCoreRule(settings.rules.vortex_cores)
        self.dose = DoseMap(cell_nm=self.cfg.dose_map_cell_nm)
        self.beam_current_pa: float | None = getattr(
            getattr(settings, "frame_defaults", None), "beam_current_pa", None)
        self.n_frames_without_dose = 0
        self._held: list[str] = []   # auto-accept waits for the drift model
        self._lock = threading.RLock()
        self._shown_proposals: tuple | None = None  # display rows; None: read again
        self._next_number = 1
        self._latest_frame_end_s: float | None = None
        self.recent_flags: deque[dict] = deque(maxlen=_KEEP_RECENT)
        self.n_errors = 0
        self.last_error: str | None = None
        self.n_flags = 0
        self.n_frames = 0

    # ------------------------------------------------------------- resume

    def resume(self) -> None:
        """Bring back proposals (budget, not-again) and drift measurements from the ledger."""
        with self._lock:
            n = 0
            for row in self.ledger.proposals():
                n += 1
                payload = row.get("payload") or {}
                spec = payload.get("specimen_region") or row["region"]
                self.planner.add_proposed(spec, payload.get("kinds") or ())
                if row["state"] == "accepted":
                    self.planner.add_visited(spec)
                    self._context_visited(row["region"])
                elif row["state"] == "open" and self.cfg.auto_accept and \
                        "drift model" in (payload.get("auto_accept_blocked") or ""):
                    self._held.append(row["id"])   # still waiting for the drift model
                self._next_number = max(self._next_number, _number(row["id"]) + 1)
            for row in self.ledger.drift():
                p = row.get("payload") or {}
                if p.get("used") and "t_ref_s" in p:
                    self.model.add_pair(p["t_ref_s"], p["t_s"], p["shift_nm"], p["sigma_nm"])
                    self.model.add_anchor(row["frame_id"], row["t"],
                                          (row["dx_nm"], row["dy_nm"]), row["sigma_nm"] or 0.0)
            for f in self.ledger.flags()[-_KEEP_RECENT:]:
                self.recent_flags.append(_flag_brief(f))
            if n:
                log.info("resumed %d proposal(s) and %d drift measurement(s) from the ledger", n,
                         self.model.n_pairs)

    # ------------------------------------------------------------- per frame

    def now(self) -> float:
        """"Now" for predictions: the wall clock, or the latest frame's end (``drift.clock``)."""
        if self.drift_cfg.clock == "frames" and self._latest_frame_end_s is not None:
            return self._latest_frame_end_s
        return self.clock()

    def on_frame(self, view, *, complete_at: float | None = None) -> None:
        """Everything the decision loop does with one finished frame (never raises)."""
        self._step("expire", lambda _view: self.expire_stale(), view)
        with self._lock:
            self.n_frames += 1
            try:
                start, dur = frame_times_s(view.meta, view.shape)
                if start is None:
                    start = (complete_at or self.clock()) - dur
                t_mid = start + dur / 2
                end = start + dur
                self._latest_frame_end_s = max(self._latest_frame_end_s or end, end)
                geometry = FrameGeometry.from_view(view)
            except Exception as exc:  # noqa: BLE001 - a frame without usable geometry
                self._error(f"{view.frame_id}: geometry: {exc}", exc)
                return
            # The rules see this frame's feature tracks, placed with the drift predicted for
            # it; once the frame is registered they are re-placed with its measured drift.
            self._step("tracks", self._update_tracks, view, geometry, t_mid)
            flags = self._step("rules", self._run_rules, view) or []
            flag_ids = self._step("flags", self._record_flags, view, geometry, flags) or []
            if self.drift_cfg.enabled:
                self._step("drift", self._update_drift, view, t_mid)
                self._step("tracks-drift", self._redrift_tracks, view, t_mid)
            self._step("dose", self._add_dose, view, geometry, t_mid)
            if self._held and self._drift_ready():
                self._step("held", self._accept_held, view)
            self._step("visited", self._note_visited, view, geometry, t_mid)
            if self.cfg.enabled and flags:
                self._step("proposals", self._propose, view, geometry, flags, flag_ids, t_mid)

    def _step(self, name, fn, *args):
        try:
            return fn(*args)
        except Exception as exc:  # noqa: BLE001 - one failing step must not stop the daemon
            self._error(f"{name} on {getattr(args[0], 'frame_id', '?')}: "
                        f"{type(exc).__name__}: {exc}", exc)
            return None

    def _error(self, text: str, exc: BaseException) -> None:
        self.n_errors += 1
        self.last_error = text
        log.error("decision loop: %s", text, exc_info=exc)
        self.warn(f"decisions: {text}")

    def _run_rules(self, view) -> list:
        from livequant.rules.manager import imaging_condition

        session_view = self.context.readonly(imaging_condition(view.meta))
        flags = list(self.rules.evaluate(view, session_view) or [])
        self.context.update(view, flags)
        return flags

    def _record_flags(self, view, geometry: FrameGeometry, flags) -> list[int]:
        ids = []
        for flag in flags:
            stage = geometry.region_to_stage(flag.region)
            data = flag.to_json()
            data["frame_id"] = data.get("frame_id") or view.frame_id
            fid = self.ledger.add_flag(
                frame_id=data["frame_id"], rule=flag.rule or "?", kind=flag.kind,
                score=flag.score, region=flag.region.to_json(),
                payload={"region_stage": stage, "message": flag.message,
                         "evidence": data["evidence"]})
            ids.append(fid)
            event = {"id": fid, **data, "region_stage": stage}
            self.publisher.publish("flag", event)
            self.recent_flags.append(_flag_brief({"id": fid, "frame_id": data["frame_id"],
                                                  "rule": flag.rule, "kind": flag.kind,
                                                  "score": flag.score,
                                                  "payload": {"message": flag.message}}))
            self.n_flags += 1
        return ids

    def _update_drift(self, view, t_mid: float) -> None:
        if view.thumbnail is None:
            return
        result = self.tracker.observe(DriftImage.from_view(view, t_s=t_mid))
        if result is None:
            return
        d, sigma = self.model.position_of(view.frame_id, t_mid)
        used = not result.ambiguous
        payload = {**result.to_json(), "used": used, **self.model.summary()}
        self.ledger.add_drift(frame_id=view.frame_id, t=t_mid, dx_nm=float(d[0]),
                              dy_nm=float(d[1]), sigma_nm=float(sigma),
                              ref_frame_id=result.ref_frame_id, payload=payload)
        self.publisher.publish("status", {"event": "drift", "frame_id": view.frame_id,
                                          "d_nm": [float(d[0]), float(d[1])],
                                          "sigma_nm": float(sigma), **payload})
        if not used:
            self.warn(f"drift: {view.frame_id} vs {result.ref_frame_id} ambiguous by a lattice "
                      "vector; not used")

    def _update_tracks(self, view, geometry: FrameGeometry, t_mid: float) -> None:
        """Walls and cores of this frame into the feature tracks (specimen coordinates)."""
        d, sd = (self.model.position_of(view.frame_id, t_mid) if self.drift_cfg.enabled
                 else (np.zeros(2), 0.0))
        cores_px = [(f.evidence["x_px"], f.evidence["y_px"], f.evidence["winding"])
                    for f in (self._core_finder.livequant_frame_rules(view) or [])]
        report = frame_features(view, geometry, t_mid, d, sd, cores_px=cores_px)
        out = self.features.observe(view.frame_id, t_mid,
                                    shift_region(geometry.footprint(), -np.asarray(d)),
                                    walls=report["walls"], cores_xy_nm=report["cores_xy_nm"],
                                    cores_winding=report["cores_winding"], drift_nm=d)

        def at_px(xy_specimen):
            return geometry.stage_to_px(np.asarray(xy_specimen) + d)

        walls = []
        for tid, obs in zip(out["walls"], report["walls"]):
            px = at_px(obs.point_nm)
            walls.append({**self.features.wall(tid).to_json(), "x_px": float(px[0]),
                          "y_px": float(px[1])})
        tracks = {"frame_id": view.frame_id, "t_s": t_mid, "walls": walls}
        for key in ("appeared", "vanished"):
            tracks[key] = []
            for tid in out[key]:
                c = self.features.core(tid)
                px = at_px(c.point)
                tracks[key].append({**c.to_json(), "x_px": float(px[0]), "y_px": float(px[1])})
        self.context.set_tracks(tracks)
        self.latest_tracks = tracks
        if walls or tracks["appeared"] or tracks["vanished"]:
            self.publisher.publish("status", {
                "event": "tracks", "frame_id": view.frame_id,
                "walls": [{k: w[k] for k in ("track_id", "n", "displacement_nm",
                                             "sigma_displacement_nm", "velocity_nm_per_s",
                                             "sigma_velocity_nm_per_s", "means")}
                          for w in walls],
                "appeared": [c["track_id"] for c in tracks["appeared"]],
                "vanished": [c["track_id"] for c in tracks["vanished"]]})

    def _redrift_tracks(self, view, t_mid: float) -> None:
        d, sd = self.model.position_of(view.frame_id, t_mid)
        self.features.redrift(view.frame_id, d, sd)

    def _tracks_status(self) -> dict:
        """Counts and the latest observed wall track's velocity (for the display)."""
        latest = None
        for w in self.latest_tracks.get("walls") or ():
            if w.get("velocity_nm_per_s") is not None:
                latest = {k: w.get(k) for k in ("track_id", "n", "velocity_nm_per_s",
                                                "sigma_velocity_nm_per_s", "means")}
        return {"walls": len(self.features.walls),
                "cores_alive": sum(c.alive for c in self.features.cores),
                "cores_vanished": sum(not c.alive for c in self.features.cores),
                "latest_wall": latest}

    def tracks_summary(self) -> dict:
        """Every wall and core track of the session (JSON-ready)."""
        with self._lock:
            return self.features.summary()
    def _add_dose(self, view, geometry: FrameGeometry, t_mid: float) -> None:
        """Add the frame's dose to the map, in specimen coordinates (footprint minus drift)."""
        current = view.meta.beam_current_pa or self.beam_current_pa
        if view.meta.beam_current_pa:
            self.beam_current_pa = float(view.meta.beam_current_pa)
        if not current or not view.meta.dwell_time_us:
            self.n_frames_without_dose += 1
            return
        d, _ = self.model.position_of(view.frame_id, t_mid)
        self.dose.add(shift_region(geometry.footprint(), -d),
                      dose_e_per_a2(current, view.meta.dwell_time_us, view.meta.pixel_size_pm))

    def dose_fields(self, prop) -> dict:
        """The dose numbers of a proposal (ledger payload, proposal event, operator views).

        ``dose_e_per_a2``: the proposed scan's own dose at the latest beam
        current; ``dose_prior_max_e_per_a2``: the most exposed part of its
        region so far; ``dose_after_max_e_per_a2``: their sum;
        ``dose_budget_exceeded``: True / False against
        ``proposals.dose_budget_e_per_a2``, None with no budget or an unknown
        current.  Estimates from nominal values, not a measurement.
        """
        budget = self.cfg.dose_budget_e_per_a2
        prior = self.dose.max_in(shift_region(prop.region, [-v for v in prop.drift_nm]))
        own = None
        if self.beam_current_pa:
            own = dose_e_per_a2(self.beam_current_pa, prop.dwell_time_us, prop.pixel_size_pm)
        after = None if own is None else prior + own
        exceeded = None if budget is None or after is None else bool(after > budget)
        if budget is None:
            note = "no dose budget set (proposals.dose_budget_e_per_a2)"
        elif after is None:
            note = ("dose unknown: no beam current (sidecar beam_current_pa or "
                    "frame_defaults.beam_current_pa)")
        elif exceeded:
            note = (f"over the dose budget: {after:.3g} e/A^2 after this scan > "
                    f"{budget:.3g} e/A^2 set in proposals.dose_budget_e_per_a2")
        else:
            note = f"within the dose budget: {after:.3g} of {budget:.3g} e/A^2"
        return {"dose_e_per_a2": own, "dose_prior_max_e_per_a2": prior,
                "dose_after_max_e_per_a2": after, "dose_budget_e_per_a2": budget,
                "dose_budget_exceeded": exceeded, "beam_current_pa": self.beam_current_pa,
                "dose_note": note}

    def _drift_ready(self) -> bool:
        return self.model.n_pairs >= self.cfg.auto_accept_min_drift_pairs

    def _auto_accept_blocked(self, prop, dose: dict) -> str | None:
        """Why a proposal must not be accepted automatically now (None: it may be)."""
        if self.cfg.dose_budget_e_per_a2 is not None and dose["dose_budget_exceeded"] is not False:
            return dose["dose_note"]
        if set(prop.candidate.kinds) & set(POINT_KINDS) and not self._drift_ready():
            return (f"waiting for the drift model ({self.model.n_pairs} of "
                    f"{self.cfg.auto_accept_min_drift_pairs} frame pairs measured): a point "
                    "feature placed now could be missed")
        return None

    def _accept_held(self, view) -> None:
        held, self._held = self._held, []
        for pid in held:
            row = self.ledger.proposal(pid)
            if row is None or row["state"] != "open":
                continue
            prop = proposal_from_json(row["payload"])
            why = self._auto_accept_blocked(prop, self.dose_fields(prop))
            if why is None:
                self.accept(pid, decided_by="auto", note="proposals.auto_accept (drift model ready)")
            elif "drift model" in why:
                self._held.append(pid)

    def _note_visited(self, view, geometry: FrameGeometry, t_mid: float) -> None:
        """A frame acquired for a request covers its region: no proposal there again."""
        if not (view.meta.extra or {}).get("request_id"):
            return
        d, _ = self.model.position_of(view.frame_id, t_mid)
        self.planner.add_visited(shift_region(geometry.footprint(), -d))
        self._context_visited(geometry.footprint())

    def _context_visited(self, stage_region: dict) -> None:
        self.context.add_visited(dict(stage_region))

    def _propose(self, view, geometry, flags, flag_ids, t_mid) -> None:
        d_seen, _ = self.model.position_of(view.frame_id, t_mid)
        cands = [candidate_from_flag(f, geometry, flag_id=i, t_seen_s=t_mid, drift_nm=d_seen,
                                     margin_nm=self.cfg.margin_nm,
                                     min_size_nm=self.cfg.min_size_nm,
                                     max_size_nm=self.cfg.max_size_nm)
                 for f, i in zip(flags, flag_ids)]
        for cand in self.planner.plan(cands):
            target = self.now() + self.cfg.lead_time_s
            d, sigma = self.model.position(target)
            novelty = self.planner.novelty(cand.specimen_region)
            prop = self.planner.place(self._new_id(), cand, drift_nm=d, sigma_drift_nm=sigma,
                                      placed_for_s=target)
            dose = self.dose_fields(prop)
            rank = priority(prop.score, novelty, dose["dose_prior_max_e_per_a2"],
                            dose["dose_e_per_a2"])
            blocked = self._auto_accept_blocked(prop, dose) if self.cfg.auto_accept else None
            payload = {**prop.to_json(), **dose, "strength": prop.score, "novelty": novelty,
                       "priority": rank, "auto_accept_blocked": blocked}
            self._shown_proposals = None
            self.ledger.add_proposal(prop.id, region=prop.region, frame_id=view.frame_id,
                                     score=rank, payload=payload)
            self.planner.commit(prop)
            self.publisher.publish("proposal", payload)
            log.info("proposal %s: %s (priority %.2f)", prop.id, prop.reason, rank)
            if self.cfg.auto_accept:
                if blocked is None:
                    self.accept(prop.id, decided_by="auto", note="proposals.auto_accept")
                else:
                    log.info("proposal %s not accepted automatically: %s", prop.id, blocked)
                    self.warn(f"proposal {prop.id} not accepted automatically: {blocked}")
                    if "drift model" in blocked:
                        self._held.append(prop.id)

    def _new_id(self) -> str:
        pid = f"p{self._next_number:04d}"
        self._next_number += 1
        return pid

    # ------------------------------------------------------------- operator side

    def drift_velocity(self, *, min_pairs: int = 2) -> tuple[float, float] | None:
        """The measured drift velocity (stage nm/s), or None before `min_pairs` frame pairs."""
        with self._lock:
            if self.model.n_pairs < min_pairs:
                return None
            v, _sigma = self.model.velocity()
            return float(v[0]), float(v[1])

    def expire_stale(self) -> list[str]:
        """Expire open proposals older than ``proposals.expire_after_s`` (ledger, event).

        An old proposal's feature has drifted further than its placement allowed
        for and the session has moved on; it leaves the open list with a recorded
        ``expire`` decision instead of waiting there for ever.
        """
        limit = self.cfg.expire_after_s
        if not limit:
            return []
        cutoff = self.clock() - limit
        expired = []
        with self._lock:
            for row in self.ledger.proposals(state="open"):
                if row["created_at"] < cutoff:
                    note = f"open longer than proposals.expire_after_s = {limit:g} s"
                    self._shown_proposals = None
                    self.ledger.decide(row["id"], "expire", decided_by="auto", note=note)
                    self.publisher.publish("proposal", {"id": row["id"], "state": "expired",
                                                        "decided_by": "auto", "note": note})
                    log.info("proposal %s expired (%s)", row["id"], note)
                    expired.append(row["id"])
        return expired

    def list(self, state: str | None = None) -> list[dict]:
        self.expire_stale()
        if state is not None and state not in ("open", "accepted", "rejected", "expired"):
            raise ValueError(f"`state` must be open, accepted, rejected or expired, got "
                             f"{state!r}")
        return [_proposal_brief(r) for r in self.ledger.proposals(state=state)]

    def _open(self, pid) -> dict:
        if not isinstance(pid, str) or not pid:
            raise ValueError("give the proposal `id` (a string such as 'p0001')")
        row = self.ledger.proposal(pid)
        if row is None:
            raise KeyError(f"no proposal with id {pid!r}; list them with `livequant proposals`")
        if row["state"] != "open":
            raise ValueError(f"proposal {pid} is already {row['state']}")
        return row

    def accept(self, pid, *, decided_by: str = "operator", note: str | None = None) -> dict:
        """Accept a proposal: ledger, ``proposal`` event, ``scan-request`` placed for now."""
        self.expire_stale()
        with self._lock:
            row = self._open(pid)
            prop = proposal_from_json({**row["payload"], "state": "accepted"})
            target = self.now() + self.cfg.lead_time_s
            d, sigma = self.model.position(target)
            prop = self.planner.replace_placement(prop, drift_nm=d, sigma_drift_nm=sigma,
                                                  placed_for_s=target)
            request = scan_request_fields(prop)
            dose = self.dose_fields(prop)
            if decided_by == "auto" and self._auto_accept_blocked(prop, dose):
                raise ValueError(f"proposal {pid} is not accepted automatically: "
                                 f"{self._auto_accept_blocked(prop, dose)}")
            self._shown_proposals = None
            self.ledger.decide(pid, "accept", decided_by=decided_by, note=note)
            self.planner.add_visited(prop.candidate.specimen_region)
            self._context_visited(prop.region)
            self.publisher.publish("proposal", {"id": pid, "state": "accepted",
                                                "decided_by": decided_by, "note": note,
                                                "region": prop.region, **dose,
                                                "caution": CAUTION})
            self.publisher.publish("scan-request", request)
            log.info("proposal %s accepted (%s): scan-request published", pid, decided_by)
            return {"id": pid, "state": "accepted", "scan_request": request, **dose,
                    "caution": CAUTION}

    def reject(self, pid, *, why: str | None = None, decided_by: str = "operator") -> dict:
        with self._lock:
            self._open(pid)
            self._shown_proposals = None
            self.ledger.decide(pid, "reject", decided_by=decided_by, note=why)
            self.publisher.publish("proposal", {"id": pid, "state": "rejected",
                                                "decided_by": decided_by, "note": why})
            log.info("proposal %s rejected%s", pid, f": {why}" if why else "")
            return {"id": pid, "state": "rejected"}

    # ------------------------------------------------------------- status

    def status(self) -> dict:
        with self._lock:
            rules = {}
            try:
                rules = dict(self.rules.status() or {})
            except Exception as exc:  # noqa: BLE001 - status must not fail
                rules = {"error": f"{type(exc).__name__}: {exc}"}
            v, sv = self.model.velocity()
            return {"frames": self.n_frames, "flags": self.n_flags, "errors": self.n_errors,
                    "last_error": self.last_error, "rules": rules,
                    "drift": {"velocity_nm_per_s": [float(v[0]), float(v[1])],
                              "sigma_v_nm_per_s": float(sv), "pairs": self.model.n_pairs,
                              "ambiguous": self.tracker.n_ambiguous},
                    "proposals": self.planner.status(), "auto_accept": self.cfg.auto_accept,
                    "beam_current_pa": self.cfg.beam_current_pa,
                    "tracks": self._tracks_status(),
                    "dose": {**self.dose.summary(), "beam_current_pa": self.beam_current_pa,
                             "frames_without_dose": self.n_frames_without_dose,
                             "budget_e_per_a2": self.cfg.dose_budget_e_per_a2}}

    def snapshot_tables(self) -> tuple[tuple, tuple]:
        """``(proposals, flags)`` for the display: open first, then the latest decided.

        Called on every tick of the main loop, so the proposals table is read from
        the ledger only after a proposal was added or decided (all of which
        happens here), not ten times a second.
        """
        with self._lock:
            if self._shown_proposals is None:
                rows = list(self.ledger.proposals())
                open_rows = [r for r in rows if r["state"] == "open"]
                decided = [r for r in rows if r["state"] != "open"]
                decided.sort(key=lambda r: r["updated_at"])
                shown = sorted(open_rows, key=lambda r: -(r["score"] or 0))[:_KEEP_RECENT] + \
                    decided[-3:]
                self._shown_proposals = tuple(_proposal_brief(r) for r in shown)
            return self._shown_proposals, tuple(self.recent_flags)


def _number(pid: str) -> int:
    try:
        return int(str(pid).lstrip("p"))
    except ValueError:
        return 0


def _flag_brief(f: dict) -> dict:
    p = f.get("payload") or {}
    score = f.get("score")
    return {"id": f.get("id"), "frame_id": f.get("frame_id"), "rule": f.get("rule"),
            "kind": f.get("kind"), "score": None if score is None else float(score),
            "message": p.get("message", "")}

