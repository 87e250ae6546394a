"""Walls and vortex cores followed across frames of the same specimen region.

Every position is taken to *specimen* coordinates first: stage position
minus the measured drift at the frame's middle time (``DriftModel``), so a
feature that stays put on a drifting specimen keeps its coordinates, and a
change means the feature itself moved.  Pure numerics: the decision loop
(``daemon/decisions.py``) feeds frames in; the built-in rule
``feature_tracks`` turns the tracker's events into flags.

Walls
    An observation is a point on the wall, its unit normal and the sigma of
    its position along the normal (the wall fit's ``sigma_x0`` combined in
    quadrature with the drift model's position sigma -- drift errors of
    different frames are treated as independent, which they are only
    approximately).  It joins the wall track whose line (extrapolated with
    the track's velocity) passes within ``match_distance_nm`` and whose
    normal agrees within ``max_angle_deg``; otherwise it starts a track.  The
    normal position ``s_k = (p_k - p_1) . n_1`` against the time gives the
    velocity by weighted least squares, ``sigma_v`` from the covariance
    (scaled by ``sqrt(chi2/dof)`` when that exceeds 1: a wall that jerks
    about is less certain than its error bars say).
Cores
    Plaquette cores of the topology summary are first merged within
    ``core_merge_nm`` per winding sign (noise splits one core over adjacent
    plaquettes).  A core joins the nearest live track of the same winding
    within ``core_match_nm``.  A new core in a place a previous frame had
    already imaged (``footprint`` margin ``edge_margin_nm``) has *appeared*;
    a live track inside the current frame's footprint with no core for
    ``vanish_frames`` frames in a row has *vanished*.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from livequant.analysis.combine import weighted_mean

__all__ = ["WallObservation", "CoreObservation", "WallTrack", "CoreTrack", "FeatureTracker",
           "merge_cores", "inside_region", "frame_features"]


def inside_region(xy_nm, region: dict, *, margin_nm: float = 0.0) -> np.ndarray:
    """Whether points lie inside a rotated rectangle (shrunk by `margin_nm` on each side)."""
    p = np.atleast_2d(np.asarray(xy_nm, float)) - [region["center_x_nm"], region["center_y_nm"]]
    t = math.radians(region.get("rotation_deg", 0.0))
    u = p @ np.array([math.cos(t), math.sin(t)])
    v = p @ np.array([-math.sin(t), math.cos(t)])
    return (np.abs(u) <= region["width_nm"] / 2 - margin_nm) & \
        (np.abs(v) <= region["height_nm"] / 2 - margin_nm)


@dataclass(frozen=True)
class WallObservation:
    """One frame's wall in specimen coordinates (nm, s)."""

    frame_id: str
    t_s: float
    point_nm: tuple[float, float]
    normal: tuple[float, float]
    sigma_nm: float
    width_nm: float | None = None
    energy_J_per_m2: float | None = None
    stage_point_nm: tuple[float, float] | None = None
    sigma_fit_nm: float | None = None
    sigma_width_nm: float | None = None
    sigma_energy_J_per_m2: float | None = None

    def redrifted(self, drift_nm, sigma_drift_nm: float) -> "WallObservation":
        """The same observation with a better drift estimate (needs ``stage_point_nm``)."""
        if self.stage_point_nm is None:
            return self
        p = tuple(float(v) for v in np.asarray(self.stage_point_nm) - np.asarray(drift_nm))
        return replace(self, point_nm=p,
                       sigma_nm=float(math.hypot(self.sigma_fit_nm or 0.0, sigma_drift_nm)))


@dataclass(frozen=True)
class CoreObservation:
    """One frame's (merged) core in specimen coordinates."""

    frame_id: str
    t_s: float
    point_nm: tuple[float, float]
    winding: int
    stage_point_nm: tuple[float, float] | None = None


@dataclass
class WallTrack:
    """A wall followed over frames; ``s_nm`` is the position along the first normal."""

    track_id: str
    observations: list[WallObservation] = field(default_factory=list)

    @property
    def normal(self) -> np.ndarray:
        return np.asarray(self.observations[0].normal)

    @property
    def origin(self) -> np.ndarray:
        return np.asarray(self.observations[0].point_nm)

    def positions(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(t_s, s_nm, sigma_nm)`` of every observation."""
        t = np.array([o.t_s for o in self.observations])
        s = np.array([(np.asarray(o.point_nm) - self.origin) @ self.normal
                      for o in self.observations])
        sig = np.array([o.sigma_nm for o in self.observations])
        return t, s, sig

    def velocity(self) -> dict:
        """Weighted straight-line fit of the normal position against time.

        Returns ``velocity_nm_per_s``, ``sigma_velocity_nm_per_s`` (None with
        fewer than two frames or times), ``chi2``, ``dof`` and the
        ``displacement_nm`` of the latest observation from the first with its sigma.
        """
        t, s, sig = self.positions()
        out = {"n": int(t.size), "displacement_nm": float(s[-1] - s[0]),
               "sigma_displacement_nm": float(math.hypot(sig[-1], sig[0])) if t.size > 1
               else float(sig[0]),
               "velocity_nm_per_s": None, "sigma_velocity_nm_per_s": None, "chi2": None,
               "dof": 0}
        if t.size < 2 or np.ptp(t) <= 0:
            return out
        w = 1.0 / sig**2
        tm = np.sum(w * t) / np.sum(w)
        sxx = np.sum(w * (t - tm) ** 2)
        v = float(np.sum(w * (t - tm) * s) / sxx)
        s0 = np.sum(w * s) / np.sum(w)
        chi2 = float(np.sum(w * (s - s0 - v * (t - tm)) ** 2))
        dof = int(t.size - 2)
        sv = 1.0 / math.sqrt(sxx)
        if dof > 0 and chi2 / dof > 1:
            sv *= math.sqrt(chi2 / dof)
        out.update(velocity_nm_per_s=v, sigma_velocity_nm_per_s=float(sv), chi2=chi2, dof=dof)
        return out

    def predicted_s(self, t_s: float) -> float:
        t, s, _ = self.positions()
        v = self.velocity()["velocity_nm_per_s"]
        return float(s[-1] + (v or 0.0) * (t_s - t[-1]))

    def session_means(self) -> dict:
        """Weighted means of the width and wall energy over the track's frames, with the
        chi-square consistency test (:func:`livequant.analysis.combine.weighted_mean`)."""
        out = {}
        for key, attr, sattr in (("width_nm", "width_nm", "sigma_width_nm"),
                                 ("energy_J_per_m2", "energy_J_per_m2",
                                  "sigma_energy_J_per_m2")):
            v = [getattr(o, attr) for o in self.observations]
            sv = [getattr(o, sattr) for o in self.observations]
            pairs = [(a, b) for a, b in zip(v, sv) if a is not None and b is not None]
            if pairs:
                try:
                    out[key] = weighted_mean([a for a, _ in pairs], [b for _, b in pairs]).to_json()
                except ValueError:
                    pass
        return out

    def to_json(self) -> dict:
        t, s, sig = self.positions()
        return {"track_id": self.track_id, "kind": "wall", "means": self.session_means(),
                "normal": [float(v) for v in self.normal],
                "origin_nm": [float(v) for v in self.origin],
                "frames": [o.frame_id for o in self.observations],
                "t_s": t.tolist(), "s_nm": s.tolist(), "sigma_s_nm": sig.tolist(),
                **self.velocity()}


@dataclass
class CoreTrack:
    """A vortex core followed over frames; ``alive`` until it vanished."""

    track_id: str
    winding: int
    observations: list[CoreObservation] = field(default_factory=list)
    alive: bool = True
    missed: int = 0
    appeared_in: str | None = None
    vanished_in: str | None = None
    first_seen_in: str | None = None

    @property
    def point(self) -> np.ndarray:
        return np.asarray(self.observations[-1].point_nm)

    def to_json(self) -> dict:
        return {"track_id": self.track_id, "kind": "core", "winding": self.winding,
                "frames": [o.frame_id for o in self.observations],
                "t_s": [o.t_s for o in self.observations],
                "xy_nm": [list(o.point_nm) for o in self.observations], "alive": self.alive,
                "appeared_in": self.appeared_in, "vanished_in": self.vanished_in}


def merge_cores(xy_nm, winding, *, radius_nm: float):
    """Merge cores of the same winding sign closer than `radius_nm` (single linkage).

    Returns ``(xy_nm (K, 2), winding (K,))``: mean position, summed winding sign.
    """
    xy = np.asarray(xy_nm, float).reshape(-1, 2)
    wd = np.sign(np.asarray(winding, int))
    n = len(xy)
    label = np.arange(n)
    if n:
        d = np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1))
        link = (d < radius_nm) & (wd[:, None] == wd[None, :])
        for _ in range(n):  # label propagation to the smallest index: converges in <= n steps
            new = np.min(np.where(link, label[None, :], n), axis=1)
            new = np.minimum(new, label)
            if np.array_equal(new, label):
                break
            label = new
    groups = np.unique(label)
    out_xy = np.array([xy[label == g].mean(axis=0) for g in groups]).reshape(-1, 2)
    out_w = np.array([int(wd[label == g][0]) for g in groups], int)
    return out_xy, out_w


class FeatureTracker:
    """Links walls and cores of successive frames into tracks (see the module docstring).

    Parameters
    ----------
    match_distance_nm : float
        Largest distance of a wall observation from a track's predicted line.
    max_angle_deg : float
        Largest angle between the normals of a wall and its track.
    core_merge_nm, core_match_nm : float
        Merging radius of plaquette cores; largest step of a core between frames.
    edge_margin_nm : float
        A core within this of a frame's edge is not counted as missing or new there.
    vanish_frames : int
        Frames in a row without the core (inside the footprint) before it has vanished.
    """

    def __init__(self, *, match_distance_nm: float = 3.0, max_angle_deg: float = 20.0,
                 core_merge_nm: float = 1.5, core_match_nm: float = 2.0,
                 edge_margin_nm: float = 1.0, vanish_frames: int = 2):
        for name, v in (("match_distance_nm", match_distance_nm),
                        ("core_merge_nm", core_merge_nm), ("core_match_nm", core_match_nm)):
            if not v > 0:
                raise ValueError(f"`{name}` must be > 0, got {v!r}")
        if vanish_frames < 1:
            raise ValueError(f"`vanish_frames` must be >= 1, got {vanish_frames!r}")
        self.match_distance_nm = float(match_distance_nm)
        self.cos_max = math.cos(math.radians(max_angle_deg))
        self.core_merge_nm = float(core_merge_nm)
        self.core_match_nm = float(core_match_nm)
        self.edge_margin_nm = float(edge_margin_nm)
        self.vanish_frames = int(vanish_frames)
        self.walls: list[WallTrack] = []
        self.cores: list[CoreTrack] = []
        self.footprints: list[dict] = []   # specimen regions imaged so far
        self._stage_footprints: dict[str, dict] = {}
        self._footprint_index: dict[str, int] = {}
        self._n = 0

    def _id(self, prefix: str) -> str:
        self._n += 1
        return f"{prefix}{self._n}"

    # ------------------------------------------------------------------ frames

    def redrift(self, frame_id: str, drift_nm, sigma_drift_nm: float) -> None:
        """Re-place one frame's observations with a better drift estimate.

        The decision loop tracks a frame with the drift *predicted* for it
        (the rules need the tracks before the frame is registered) and calls
        this once the frame's own drift is measured.  Walls and footprints
        move; cores keep their (already linked) positions, shifted likewise.
        """
        d = np.asarray(drift_nm, float)
        for tr in self.walls:
            tr.observations = [o.redrifted(d, sigma_drift_nm) if o.frame_id == frame_id else o
                               for o in tr.observations]
        for tr in self.cores:
            tr.observations = [replace(o, point_nm=tuple(float(v) for v in
                                                         np.asarray(o.stage_point_nm) - d))
                               if o.frame_id == frame_id and o.stage_point_nm is not None else o
                               for o in tr.observations]
        fp = self._stage_footprints.get(frame_id)
        if fp is not None:
            k = self._footprint_index[frame_id]
            self.footprints[k] = {**fp, "center_x_nm": fp["center_x_nm"] - float(d[0]),
                                  "center_y_nm": fp["center_y_nm"] - float(d[1])}

    def observe(self, frame_id: str, t_s: float, footprint_specimen: dict, *,
                walls=(), cores_xy_nm=(), cores_winding=(), drift_nm=None) -> dict:
        """Add one frame; returns what changed.

        Parameters
        ----------
        frame_id : str
        t_s : float
            The frame's middle time.
        footprint_specimen : dict
            The frame's region in specimen coordinates (``center_x_nm``, ...).
        walls : iterable of WallObservation
        cores_xy_nm, cores_winding : array_like
            Plaquette cores (specimen nm) and their windings.
        drift_nm : (dx, dy), optional
            The drift used for the specimen coordinates; kept (as stage
            positions) so that :meth:`redrift` can re-place them.

        Returns
        -------
        dict
            ``walls``: ids of the wall tracks observed in this frame;
            ``appeared`` / ``vanished``: core tracks that appeared or vanished now.
        """
        d = np.zeros(2) if drift_nm is None else np.asarray(drift_nm, float)
        seen_walls = [self._add_wall(o) for o in walls]
        xy, wd = merge_cores(cores_xy_nm, cores_winding, radius_nm=self.core_merge_nm)
        appeared, vanished = self._add_cores(frame_id, t_s, footprint_specimen, xy, wd, d)
        self._footprint_index[frame_id] = len(self.footprints)
        self._stage_footprints[frame_id] = {
            **footprint_specimen, "center_x_nm": footprint_specimen["center_x_nm"] + float(d[0]),
            "center_y_nm": footprint_specimen["center_y_nm"] + float(d[1])}
        self.footprints.append(dict(footprint_specimen))
        return {"walls": seen_walls, "appeared": appeared, "vanished": vanished}

    def _add_wall(self, obs: WallObservation) -> str:
        n = np.asarray(obs.normal, float)
        best, best_d = None, math.inf
        for tr in self.walls:
            c = float(n @ tr.normal)
            if abs(c) < self.cos_max:
                continue
            s_obs = float((np.asarray(obs.point_nm) - tr.origin) @ tr.normal)
            d = abs(s_obs - tr.predicted_s(obs.t_s))
            if d < best_d:
                best, best_d = tr, d
        if best is None or best_d > self.match_distance_nm:
            best = WallTrack(self._id("W"))
            self.walls.append(best)
        elif float(n @ best.normal) < 0:  # same wall, normal reported the other way
            obs = replace(obs, normal=tuple(-n))
        best.observations.append(obs)
        return best.track_id

    def _imaged_before(self, xy) -> bool:
        return any(bool(inside_region(xy, fp, margin_nm=self.edge_margin_nm)[0])
                   for fp in self.footprints)

    def _add_cores(self, frame_id, t_s, footprint, xy, wd, d):
        live = [tr for tr in self.cores if tr.alive]
        used_tracks: set[int] = set()
        used_obs: set[int] = set()
        # Greedy matching by distance, same winding only.
        pairs = []
        for k, tr in enumerate(live):
            for m in range(len(xy)):
                if wd[m] == tr.winding:
                    d = float(np.hypot(*(xy[m] - tr.point)))
                    if d <= self.core_match_nm:
                        pairs.append((d, k, m))
        for d, k, m in sorted(pairs):
            if k in used_tracks or m in used_obs:
                continue
            used_tracks.add(k)
            used_obs.add(m)
            live[k].observations.append(CoreObservation(frame_id, t_s, tuple(xy[m]), int(wd[m]),
                                                        tuple(xy[m] + d)))
            live[k].missed = 0
        appeared, vanished = [], []
        for m in range(len(xy)):
            if m in used_obs:
                continue
            tr = CoreTrack(self._id("C"), int(wd[m]),
                           [CoreObservation(frame_id, t_s, tuple(xy[m]), int(wd[m]),
                                            tuple(xy[m] + d))],
                           first_seen_in=frame_id)
            if inside_region(xy[m], footprint, margin_nm=self.edge_margin_nm)[0] and \
                    self._imaged_before(xy[m]):
                tr.appeared_in = frame_id
                appeared.append(tr.track_id)
            self.cores.append(tr)
        for k, tr in enumerate(live):
            if k in used_tracks:
                continue
            if inside_region(tr.point, footprint, margin_nm=self.edge_margin_nm)[0]:
                tr.missed += 1
                if tr.missed >= self.vanish_frames:
                    tr.alive = False
                    tr.vanished_in = frame_id
                    vanished.append(tr.track_id)
        return appeared, vanished

    # ------------------------------------------------------------------ views

    def wall(self, track_id: str) -> WallTrack:
        return next(t for t in self.walls if t.track_id == track_id)

    def core(self, track_id: str) -> CoreTrack:
        return next(t for t in self.cores if t.track_id == track_id)

    def summary(self) -> dict:
        """JSON-ready: every wall and core track."""
        return {"walls": [t.to_json() for t in self.walls],
                "cores": [t.to_json() for t in self.cores]}


def frame_features(view, geometry, t_s: float, drift_nm, sigma_drift_nm: float, *,
                   cores_px=None) -> dict:
    """One frame's wall and cores in specimen coordinates (stage minus `drift_nm`).

    Parameters
    ----------
    view : FrameView
        Its ``summary["cells"]`` gives the wall (``x_pm, y_pm`` in the image,
        ``normal_deg``, ``sigma_x0``, ``width``) and the topology cores.
    geometry : FrameGeometry
    t_s : float
        The frame's middle time.
    drift_nm, sigma_drift_nm
        The drift model's specimen offset of this frame and its sigma.
    cores_px : sequence of (x_px, y_px, winding), optional
        Cores found by a more robust method (the decision loop passes those
        of the ``vortex_cores`` loop windings); default: the plaquette cores of
        the topology summary (which miss cores whose cells fall below the
        summary's signal-to-noise limit).

    Returns
    -------
    dict
        ``walls`` (list of :class:`WallObservation`), ``cores_xy_nm`` (K, 2),
        ``cores_winding`` (K,).
    """
    cells = (view.summary or {}).get("cells") or {}
    px_pm = float(view.pixel_size_pm)
    d = np.asarray(drift_nm, float)
    walls = []
    w = cells.get("wall")
    if w and all(w.get(k) is not None for k in ("x_pm", "y_pm", "normal_deg", "sigma_x0")):
        stage = geometry.px_to_stage(w["x_pm"] / px_pm, w["y_pm"] / px_pm)
        th = math.radians(w["normal_deg"])
        n = math.cos(th) * geometry.e_fast + math.sin(th) * geometry.e_slow
        sigma = math.hypot(w["sigma_x0"] / 1000.0, sigma_drift_nm)
        phys = ((view.summary.get("physics") or {}).get("gl") or {})
        walls.append(WallObservation(view.frame_id, float(t_s), tuple(stage - d), tuple(n),
                                     sigma, width_nm=(w.get("width") or 0) / 1000.0 or None,
                                     energy_J_per_m2=phys.get("energy_J_per_m2"),
                                     stage_point_nm=tuple(float(v) for v in stage),
                                     sigma_fit_nm=w["sigma_x0"] / 1000.0,
                                     sigma_width_nm=(w.get("sigma_width") or 0) / 1000.0
                                     or None,
                                     sigma_energy_J_per_m2=phys.get("sigma_energy_J_per_m2")))
    if cores_px is None:
        cores = ((cells.get("topology") or {}).get("cores")) or []
        cores_px = [(c["x_pm"] / px_pm, c["y_pm"] / px_pm, c["winding"]) for c in cores
                    if c.get("x_pm") is not None and c.get("winding")]
    xy = np.array([[c[0], c[1]] for c in cores_px], float).reshape(-1, 2)
    wd = np.array([int(np.sign(c[2])) for c in cores_px], int)
    stage = geometry.px_to_stage(xy[:, 0], xy[:, 1]).reshape(-1, 2) - d if len(xy) else xy
    return {"walls": walls, "cores_xy_nm": stage, "cores_winding": wd}
