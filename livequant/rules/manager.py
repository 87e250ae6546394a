"""Rule discovery, validation and isolation; the session context rules read.

:class:`RuleManager` registers every rule (built-in, entry points of group
``livequant``, ``*.py`` files of ``rules.plugin_dirs``) with one pluggy
``PluginManager``, checks them all before the first frame, and then calls
each rule's :func:`~livequant.rules.hookspecs.livequant_frame_rules` on its
own, so one failing rule never costs the others their flags nor stops the
daemon.

:class:`SessionContext` is the daemon's mutable record of the session (running
descriptor statistics, earlier flags, visited stage regions); rules only ever
see its frozen :class:`SessionView`.
"""

from __future__ import annotations

import dataclasses
import importlib.util
import inspect
import logging
import math
import sys
import types
from collections import deque
from dataclasses import dataclass, field
from importlib.metadata import entry_points
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np
import pluggy

from livequant.analysis.cells import DESCRIPTORS
from livequant.config import ConfigError, Settings
from livequant.rules import hookspecs
from livequant.rules.types import Flag, FrameView

__all__ = ["RuleManager", "SessionContext", "SessionView", "DescriptorStats", "BUILTIN_RULES",
           "MAD_TO_SIGMA"]

log = logging.getLogger(__name__)

#: 1 / Phi^-1(3/4): the median absolute deviation times this estimates the standard
#: deviation of a normal distribution (Rousseeuw & Croux, J. Am. Stat. Assoc. 88, 1273 (1993)).
MAD_TO_SIGMA = 1.482602218505602

#: Built-in rules: name -> "module:class" (each class is instantiated per manager).
BUILTIN_RULES: dict[str, str] = {
    "domain_walls": "livequant.rules.builtin.domain_walls:DomainWallRule",
    "vortex_cores": "livequant.rules.builtin.vortex_cores:VortexCoreRule",
    "interfaces": "livequant.rules.builtin.interfaces:InterfaceRule",
    "anomalies": "livequant.rules.builtin.anomalies:AnomalyRule",
    "feature_tracks": "livequant.rules.builtin.feature_tracks:FeatureTrackRule",
}

#: Descriptors whose running statistics the session keeps (the names of cells.csv).
TRACKED_DESCRIPTORS: tuple[str, ...] = tuple(name for name, _, _ in DESCRIPTORS)
_WITH_SIGMA = frozenset(name for name, has_sigma, _ in DESCRIPTORS if has_sigma)
_BUFFERED = TRACKED_DESCRIPTORS + tuple("sigma_" + n for n in TRACKED_DESCRIPTORS
                                        if n in _WITH_SIGMA)

#: The hooks a rule may implement (livequant.rules.hookspecs).
HOOK_NAMES: tuple[str, ...] = tuple(n for n in hookspecs.__all__ if n.startswith("livequant_"))


# ---------------------------------------------------------------- session context


@dataclass(frozen=True)
class DescriptorStats:
    """Robust running statistics of one descriptor over the session's cells.

    Attributes
    ----------
    median : float
        Median of the recent cells' values (NaN before any).
    scale : float
        ``1.4826 * MAD`` (the standard deviation for normal data), same unit.
    n : int
        Cells the statistics are computed from (at most ``rules.stats_max_cells``).
    n_total : int
        Finite values seen in the whole session.
    median_sigma : float
        Median of the same cells' own uncertainties (``sigma_<name>``; NaN for
        a descriptor without one).  ``scale^2 - median_sigma^2`` estimates the
        spread the specimen itself contributes.
    """

    median: float
    scale: float
    n: int
    n_total: int
    median_sigma: float = math.nan

    @property
    def intrinsic_scale(self) -> float:
        """``sqrt(max(scale^2 - median_sigma^2, 0))``: the spread beyond measurement noise."""
        if not math.isfinite(self.median_sigma):
            return self.scale
        return math.sqrt(max(self.scale**2 - self.median_sigma**2, 0.0))


@dataclass(frozen=True)
class SessionView:
    """Read-only snapshot of the session that a rule receives.

    Attributes
    ----------
    n_frames : int
        Frames the context has been updated with (before the current one).
    stats : mapping of str to DescriptorStats
        Per descriptor of :data:`livequant.analysis.cells.DESCRIPTORS`.
    flags : tuple of Flag
        The most recent flags (at most ``rules.history``), oldest first.
    visited : tuple of mapping
        Stage regions already imaged or proposed: ``center_x_nm``,
        ``center_y_nm``, ``width_nm``, ``height_nm``, ``rotation_deg``.
    tracks : mapping
        The feature tracker's view of the current frame (set by the decision
        loop before the rules run; empty without one): ``frame_id``,
        ``walls`` (tracks observed in it, each with ``x_px, y_px`` in this
        frame), ``appeared`` and ``vanished`` (core tracks, with ``x_px, y_px``).
    """

    n_frames: int = 0
    stats: Mapping[str, DescriptorStats] = field(default_factory=dict)
    flags: tuple[Flag, ...] = ()
    visited: tuple[Mapping, ...] = ()
    tracks: Mapping = field(default_factory=dict)


_VISITED_KEYS = ("center_x_nm", "center_y_nm", "width_nm", "height_nm")


def imaging_condition(meta) -> str:
    """The imaging condition a frame's statistics belong to: detector, pixel size, dwell,
    scan rotation.

    Noise and fitting bias of every descriptor depend on the dose per column
    and the sampling, so a survey frame at 20 pm and 2 us and a revisit at
    10 pm and 4 us are judged against their own kind (3 significant digits).
    The scan rotation matters too: drift during the slow scan stretches the
    lattice along the slow axis (0.012 nm/s over a 6.3 s, 10.3 nm tall frame:
    -0.7 %), so a revisit turned 90 degrees to follow a wall reads ``a_pm``
    2.7 pm low against survey frames -- measured on the demo, where it raised
    every ``a_pm`` anomaly beside the wall.
    """
    px = getattr(meta, "pixel_size_pm", None)
    dwell = getattr(meta, "dwell_time_us", None)
    det = getattr(meta, "detector", None) or "?"
    rot = getattr(meta, "scan_rotation_deg", None) or 0.0
    return (f"{det} {px:.3g} pm" if px else f"{det} ? pm") + \
        (f" {dwell:.3g} us" if dwell else " ? us") + f" {round(rot) % 360:d} deg"


class _Buffers:
    """Ring buffers of recent cell values of every tracked descriptor (one condition)."""

    def __init__(self, max_cells: int):
        self.max_cells = max_cells
        self.values = {name: np.full(max_cells, np.nan) for name in _BUFFERED}
        self.next = {name: 0 for name in _BUFFERED}
        self.filled = {name: 0 for name in _BUFFERED}
        self.total = {name: 0 for name in _BUFFERED}
        self.stats: dict[str, DescriptorStats] = {
            name: DescriptorStats(math.nan, math.nan, 0, 0) for name in TRACKED_DESCRIPTORS}


class SessionContext:
    """The daemon's record of the session, updated after each frame's rules ran.

    Owned by one thread (the daemon's main thread); rules get :meth:`readonly`.

    Parameters
    ----------
    history : int
        Flags kept for the rules to see.
    max_cells : int
        Recent cell values kept per descriptor for the running median and MAD
        (a ring buffer: memory stays bounded in a long session).
    history_visited : int
        Visited regions kept.
    max_conditions : int
        Imaging conditions (:func:`imaging_condition`) whose statistics are
        kept apart; the least recently used is dropped beyond this.
    """

    def __init__(self, *, history: int = 500, max_cells: int = 50_000,
                 history_visited: int = 10_000, max_conditions: int = 16):
        if history < 1 or max_cells < 1:
            raise ValueError(f"`history` and `max_cells` must be >= 1, got {history}, {max_cells}")
        self._flags: deque[Flag] = deque(maxlen=int(history))
        self._visited: deque[Mapping] = deque(maxlen=int(history_visited))
        self._max_cells = int(max_cells)
        self._max_conditions = int(max_conditions)
        self._conditions: dict[str, _Buffers] = {}   # insertion order = least recent first
        self._last_condition: str | None = None
        self._n_frames = 0
        self._views: dict[str | None, SessionView] = {}
        self._tracks: Mapping = types.MappingProxyType({})

    @classmethod
    def from_settings(cls, settings: Settings) -> "SessionContext":
        return cls(history=settings.rules.history, max_cells=settings.rules.stats_max_cells)

    def update(self, view: FrameView, flags: Sequence[Flag]) -> None:
        """Add one frame's cells to its imaging condition's statistics, its flags to the history."""
        self._n_frames += 1
        self._flags.extend(flags)
        cells = view.cells
        key = imaging_condition(view.meta)
        buf = self._conditions.pop(key, None) or _Buffers(self._max_cells)
        self._conditions[key] = buf                      # most recent last
        while len(self._conditions) > self._max_conditions:
            self._conditions.pop(next(iter(self._conditions)))
        self._last_condition = key
        if cells is not None:
            for name in TRACKED_DESCRIPTORS:
                if name not in cells:
                    continue
                values = np.asarray(cells[name], float)
                ok = np.isfinite(values)
                sigma = cells.get("sigma_" + name) if name in _WITH_SIGMA else None
                if sigma is not None:
                    sigma = np.asarray(sigma, float)
                    ok &= np.isfinite(sigma)
                if not ok.any():
                    continue
                self._add_values(buf, name, values[ok])
                if sigma is not None:
                    self._add_values(buf, "sigma_" + name, sigma[ok])
                self._refresh(buf, name)
        self._views = {}

    def _add_values(self, b: _Buffers, name: str, v: np.ndarray) -> None:
        b.total[name] += int(v.size)
        v = v[-self._max_cells:]
        buf, pos = b.values[name], b.next[name]
        end = pos + v.size
        if end <= self._max_cells:
            buf[pos:end] = v
        else:
            k = self._max_cells - pos
            buf[pos:] = v[:k]
            buf[:end - self._max_cells] = v[k:]
        b.next[name] = end % self._max_cells
        b.filled[name] = min(b.filled[name] + v.size, self._max_cells)

    def _refresh(self, b: _Buffers, name: str) -> None:
        data = b.values[name][:b.filled[name]]
        med = float(np.median(data))
        scale = MAD_TO_SIGMA * float(np.median(np.abs(data - med)))
        sig = math.nan
        if name in _WITH_SIGMA:
            sig = float(np.median(b.values["sigma_" + name][:b.filled[name]]))
        b.stats[name] = DescriptorStats(med, scale, int(data.size), b.total[name], sig)

    def add_visited(self, region_stage: Mapping) -> None:
        """Record a stage region already imaged or proposed (keys of :class:`SessionView`)."""
        missing = [k for k in _VISITED_KEYS if k not in region_stage]
        if missing:
            raise ValueError(f"a visited region needs {', '.join(_VISITED_KEYS)}; "
                             f"missing {', '.join(missing)} in {dict(region_stage)!r}")
        entry = {k: float(region_stage[k]) for k in _VISITED_KEYS}
        entry["rotation_deg"] = float(region_stage.get("rotation_deg", 0.0))
        self._visited.append(types.MappingProxyType(entry))
        self._views = {}

    def set_tracks(self, tracks: Mapping) -> None:
        """The feature tracker's view of the frame about to be evaluated (JSON-like)."""
        self._tracks = types.MappingProxyType(dict(tracks))
        self._views = {}

    @property
    def conditions(self) -> list[str]:
        """Imaging conditions with statistics, least recently updated first."""
        return list(self._conditions)

    def readonly(self, condition: str | None = None) -> SessionView:
        """A frozen snapshot (cached until the next update).

        ``stats`` are those of `condition` (:func:`imaging_condition` of the
        frame about to be judged; empty for a condition not seen before), or
        of the most recently updated condition when None.
        """
        key = self._last_condition if condition is None else condition
        view = self._views.get(key)
        if view is None:
            buf = self._conditions.get(key) if key is not None else None
            stats = dict(buf.stats) if buf is not None else {
                name: DescriptorStats(math.nan, math.nan, 0, 0) for name in TRACKED_DESCRIPTORS}
            view = self._views[key] = SessionView(
                n_frames=self._n_frames, stats=types.MappingProxyType(stats),
                flags=tuple(self._flags), visited=tuple(self._visited), tracks=self._tracks)
        return view


# ---------------------------------------------------------------- one feature, one flag

def _as_box(region, grow_px: float = 0.0) -> dict:
    return {"center_x_nm": region.x_px, "center_y_nm": region.y_px,
            "width_nm": region.width_px + 2 * grow_px, "height_nm": region.height_px + 2 * grow_px,
            "rotation_deg": region.angle_deg}


def attach_anomalies(flags: Sequence[Flag], *, margin_px: float = 0.0,
                     min_covered: float = 0.5) -> list[Flag]:
    """Anomalies are what no typed rule explains: fold those on a typed flag into it.

    An ``anomaly`` flag whose centre lies inside a typed flag's region (any
    other kind, grown by `margin_px` on every side), or of whose area those
    grown regions together cover at least `min_covered`, is dropped; the typed flag
    (the one covering most of it) records it in its evidence as
    ``attached_anomalies`` (descriptor and direction of each) and
    ``n_attached_anomalies``.  A wall flanked by a fitting artefact, or a
    core with a suppressed displacement, is then one flag, not three.
    """
    from livequant.proposals.geometry import overlap_area

    typed = [k for k, f in enumerate(flags) if f.kind != "anomaly"]
    if not typed:
        return list(flags)
    grown = {k: _as_box(flags[k].region, margin_px) for k in typed}
    attached: dict[int, list[str]] = {}
    keep = []
    for f in flags:
        if f.kind != "anomaly":
            keep.append(f)
            continue
        box = _as_box(f.region)
        area = box["width_nm"] * box["height_nm"]
        best, best_cover, total, inside_any = None, 0.0, 0.0, False
        for k in typed:
            g = grown[k]
            t = math.radians(g["rotation_deg"])
            dx, dy = f.region.x_px - g["center_x_nm"], f.region.y_px - g["center_y_nm"]
            u, v = dx * math.cos(t) + dy * math.sin(t), -dx * math.sin(t) + dy * math.cos(t)
            inside = abs(u) <= g["width_nm"] / 2 and abs(v) <= g["height_nm"] / 2
            cover = overlap_area(box, g) / area if area > 0 else 0.0
            total += cover
            inside_any |= inside
            if (inside or cover > 0) and (best is None or (inside, cover) > best_cover):
                best, best_cover = k, (inside, cover)
        # Covered by one typed flag, or by several together (a layer between two
        # interfaces: the electrode's missing polarization is the interfaces' finding).
        if not (inside_any or total >= min_covered):
            best = None
        if best is None:
            keep.append(f)
        else:
            e = f.evidence
            attached.setdefault(best, []).append(
                f"{e.get('descriptor', '?')} {e.get('direction', '')}".strip())
    out = []
    for f in keep:
        k = next((k for k in attached if flags[k] is f), None)
        if k is not None:
            f = dataclasses.replace(f, evidence={**f.evidence,
                                                 "attached_anomalies": list(attached[k]),
                                                 "n_attached_anomalies": len(attached[k])})
        out.append(f)
    return out


# ---------------------------------------------------------------- the manager


@dataclass
class _RuleState:
    name: str
    source: str
    failures: int = 0
    consecutive: int = 0
    flags: int = 0
    disabled: bool = False
    last_error: str = ""


def _import_object(spec: str):
    module_name, _, attr = spec.partition(":")
    module = importlib.import_module(module_name)
    return getattr(module, attr) if attr else module


def _instantiate(obj):
    """A module or an instance is registered as it is; a class is instantiated first."""
    return obj() if inspect.isclass(obj) else obj


def _load_file(path: Path) -> types.ModuleType:
    """Import one plugin file under a private module name (not added to sys.path)."""
    mod_name = f"livequant_plugin_{path.stem}"
    spec = importlib.util.spec_from_file_location(mod_name, path)
    if spec is None or spec.loader is None:
        raise ConfigError(f"rule plugin {path}: cannot be imported as a Python module")
    module = importlib.util.module_from_spec(spec)
    sys.modules[mod_name] = module
    try:
        spec.loader.exec_module(module)
    except Exception as exc:
        sys.modules.pop(mod_name, None)
        raise ConfigError(f"rule plugin {path} failed to import: {type(exc).__name__}: {exc}") \
            from exc
    return module


def _plugin_object(module: types.ModuleType):
    """The object to register for a plugin module: ``create_plugin()`` if it defines one."""
    factory = getattr(module, "create_plugin", None)
    return factory() if callable(factory) else module


class RuleManager:
    """Loads the rules, validates them at start-up, runs each one in isolation.

    Parameters
    ----------
    settings : Settings, optional
        Default: the field defaults (``Settings()``).

    Attributes
    ----------
    names : list of str
        The registered rules in calling order.

    Notes
    -----
    Build with :meth:`from_settings` (all sources) or register objects by
    hand with :meth:`register` and call :meth:`configure` (tests, notebooks).
    """

    def __init__(self, settings: Settings | None = None):
        self.settings = settings if settings is not None else Settings()
        self._pm = pluggy.PluginManager(hookspecs.PROJECT)
        self._pm.add_hookspecs(hookspecs)
        self._states: dict[str, _RuleState] = {}
        self._configured = False
        for name in self.settings.rules.blocked:
            self._pm.set_blocked(name)
        self._max_fail = self.settings.rules.max_consecutive_failures

    # ---- loading

    @classmethod
    def from_settings(cls, settings: Settings) -> "RuleManager":
        """Built-ins, entry points (group ``livequant``) and ``rules.plugin_dirs``, validated.

        Raises
        ------
        ConfigError
            Naming the rule or file: an unknown built-in name, a missing plugin
            folder, a plugin that fails to import, a misspelled hook or
            argument, or a ``livequant_configure`` that raises.
        """
        mgr = cls(settings)
        rs = settings.rules
        unknown = [n for n in rs.enabled if n not in BUILTIN_RULES]
        if unknown:
            raise ConfigError(f"`rules.enabled`: unknown built-in rule(s) {', '.join(unknown)}; "
                              f"known: {', '.join(BUILTIN_RULES)}")
        for name in rs.enabled:
            mgr.register(_instantiate(_import_object(BUILTIN_RULES[name])), name=name,
                         source="builtin")
        mgr._load_entry_points()
        for folder in rs.plugin_dirs:
            mgr.load_folder(folder)
        mgr.configure()
        return mgr

    def _load_entry_points(self) -> None:
        for ep in entry_points(group=hookspecs.PROJECT):
            if self._pm.is_blocked(ep.name):
                log.info("rule %s (entry point) is blocked by rules.blocked", ep.name)
                continue
            try:
                obj = _instantiate(ep.load())
            except Exception as exc:
                raise ConfigError(f"rule plugin {ep.name!r} (entry point {ep.value}) failed to "
                                  f"load: {type(exc).__name__}: {exc}") from exc
            dist = getattr(ep, "dist", None)
            src = f"entry point {ep.value}" + (f" ({dist.name})" if dist is not None else "")
            self.register(obj, name=ep.name, source=src)

    def load_folder(self, folder) -> list[str]:
        """Register every ``*.py`` file of `folder` (files starting with ``_`` are skipped)."""
        path = Path(folder).expanduser()
        if not path.is_dir():
            raise ConfigError(f"`rules.plugin_dirs`: {path} is not a folder (check the path; "
                              "relative paths start from the working directory)")
        added = []
        for file in sorted(path.glob("*.py")):
            if file.name.startswith("_"):
                continue
            if self._pm.is_blocked(file.stem):
                log.info("rule %s (%s) is blocked by rules.blocked", file.stem, file)
                continue
            module = _load_file(file)
            try:
                obj = _plugin_object(module)
            except Exception as exc:
                raise ConfigError(f"rule plugin {file}: create_plugin() raised "
                                  f"{type(exc).__name__}: {exc}") from exc
            self.register(obj, name=file.stem, source=str(file))
            added.append(file.stem)
        return added

    def register(self, plugin, *, name: str, source: str = "api") -> None:
        """Register one rule object (module or instance) under `name`.

        Its hook implementations are checked against the specs at once
        (misspelled hooks, unknown arguments): a :class:`ConfigError` names it.
        A rule registered after :meth:`configure` is configured immediately.
        """
        if name in self._states:
            raise ConfigError(f"two rules are named {name!r} ({self._states[name].source} and "
                              f"{source}); rename one or block one with rules.blocked")
        if self._pm.is_blocked(name):
            log.info("rule %s (%s) is blocked by rules.blocked", name, source)
            return
        try:
            self._pm.register(plugin, name=name)
            self._check(name)
        except ConfigError:
            self._pm.unregister(name=name)
            raise
        except (pluggy.PluginValidationError, ValueError) as exc:
            if self._pm.get_plugin(name) is not None:
                self._pm.unregister(name=name)
            raise ConfigError(f"rule plugin {name!r} ({source}) is invalid: {exc}") from exc
        self._states[name] = _RuleState(name=name, source=source)
        if self._configured:
            self._configure_one(name)

    def _check(self, name: str) -> None:
        """Misspelled or unmarked hooks fail here, before the first frame."""
        plugin = self._pm.get_plugin(name)
        for attr in dir(plugin):
            if not attr.startswith("livequant_"):
                continue
            if attr not in HOOK_NAMES:
                raise ConfigError(f"rule plugin {name!r} defines {attr!r}, which is not a "
                                  f"livequant hook (misspelled?); hooks: {', '.join(HOOK_NAMES)}")
            if not self._pm.parse_hookimpl_opts(plugin, attr):
                raise ConfigError(f"rule plugin {name!r}: {attr} lacks the @hookimpl marker "
                                  "(from livequant import hookimpl)")
        try:
            self._pm.check_pending()
        except pluggy.PluginValidationError as exc:
            raise ConfigError(f"rule plugin {name!r}: {exc}") from exc
        if not hasattr(plugin, "livequant_frame_rules"):
            log.warning("rule plugin %s implements no livequant_frame_rules: it will never flag",
                        name)

    def configure(self) -> None:
        """Call ``livequant_configure`` of every rule (once), in registration order."""
        try:
            self._pm.check_pending()   # a misspelled hook stops start-up, not the first frame
        except pluggy.PluginValidationError as exc:
            raise ConfigError(f"rule plugin {exc.plugin!r}: {exc}") from exc
        for name in list(self._states):
            self._configure_one(name)
        self._configured = True

    def _configure_one(self, name: str) -> None:
        for impl in self._pm.hook.livequant_configure.get_hookimpls():
            if impl.plugin_name != name:
                continue
            try:
                impl.function(**self._kwargs(impl, config=self.settings))
            except Exception as exc:
                raise ConfigError(f"rule plugin {name!r} ({self._states[name].source}) rejected "
                                  f"its configuration: {type(exc).__name__}: {exc}") from exc

    @staticmethod
    def _kwargs(impl, **available) -> dict:
        return {arg: available[arg] for arg in impl.argnames}

    # ---- running

    @property
    def names(self) -> list[str]:
        return list(self._states)

    def evaluate(self, view: FrameView, context: SessionView) -> list[Flag]:
        """Every enabled rule's flags for one frame; never raises for a rule's fault.

        Each rule runs on its own.  A rule that raises, or returns something
        other than a list of :class:`Flag`, is logged with its name and the
        frame id, counted, and skipped for this frame; after
        ``rules.max_consecutive_failures`` failures in a row it is disabled.
        """
        out: list[Flag] = []
        # get_hookimpls() lists them in registration order (pluggy's own call would run them
        # last-registered first and stop at the first exception).
        for impl in self._pm.hook.livequant_frame_rules.get_hookimpls():
            state = self._states.get(impl.plugin_name)
            if state is None or state.disabled:
                continue
            try:
                result = impl.function(**self._kwargs(impl, view=view, context=context,
                                                       config=self.settings))
                flags = self._validate(result)
            except Exception as exc:  # isolation is the point: see the module docstring
                self._failed(state, view, exc)
                continue
            state.consecutive = 0
            state.flags += len(flags)
            out.extend(dataclasses.replace(f, rule=state.name, frame_id=view.frame_id)
                       for f in flags)
        kinds = {f.kind == "anomaly" for f in out}
        if kinds != {True, False}:
            return out          # nothing to fold: no anomaly, or no typed flag
        grid = view.cell_grid if view.cells is not None and "i" in view.cells else None
        cell_px = float(grid.cell_px) if grid is not None and math.isfinite(grid.cell_px) else 0.0
        return attach_anomalies(out, margin_px=self.settings.rules.anomaly_attach_margin_cells
                                * cell_px)

    @staticmethod
    def _validate(result) -> list[Flag]:
        if result is None:
            return []
        if isinstance(result, Flag) or not isinstance(result, Iterable):
            raise TypeError(f"livequant_frame_rules must return a list of Flag, got "
                            f"{type(result).__name__}")
        flags = list(result)
        bad = [type(f).__name__ for f in flags if not isinstance(f, Flag)]
        if bad:
            raise TypeError(f"livequant_frame_rules returned non-Flag items: {', '.join(bad)}")
        return flags

    def _failed(self, state: _RuleState, view: FrameView, exc: Exception) -> None:
        state.failures += 1
        state.consecutive += 1
        state.last_error = f"{type(exc).__name__}: {exc}"
        log.error("rule %s failed on frame %s (%d in a row, %d in all); its flags for this "
                  "frame are skipped: %s", state.name, view.frame_id, state.consecutive,
                  state.failures, state.last_error, exc_info=exc)
        if state.consecutive >= self._max_fail:
            state.disabled = True
            log.error("rule %s disabled for the rest of the session after %d failures in a row "
                      "(rules.max_consecutive_failures)", state.name, state.consecutive)

    def status(self) -> dict:
        """JSON-ready: the rules (name, source, counts, disabled), and totals."""
        rules = [{"name": s.name, "source": s.source, "failures": s.failures,
                  "consecutive_failures": s.consecutive, "flags": s.flags,
                  "disabled": s.disabled, "last_error": s.last_error or None}
                 for s in self._states.values()]
        return {"rules": rules, "disabled": [s.name for s in self._states.values() if s.disabled],
                "failures_total": sum(s.failures for s in self._states.values()),
                "blocked": list(self.settings.rules.blocked),
                "max_consecutive_failures": self._max_fail}

    def enable(self, name: str) -> None:
        """Re-enable a rule disabled after failures (resets its run of failures)."""
        state = self._states[name]
        state.disabled, state.consecutive = False, 0

    def get_plugin(self, name: str) -> Any:
        return self._pm.get_plugin(name)
