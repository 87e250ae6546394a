"""``livequant demo``: the simulated instrument and the daemon, one command.

The demo runs the whole loop on this machine with no microscope:

1. a simulated instrument (:mod:`sim_instrument`) surveys the invented
   ``demo`` specimen (a ferroelectric film with walls, a vortex pair and
   interfaces) along a tour of overlapping frames, writing each frame into
   ``SESSION/acquired/`` the way an acquisition program would (ground truth
   into ``SESSION/truth/``, never watched);
2. the daemon watches that folder, analyses every frame, runs the rules and
   proposes regions to look at again;
3. the simulated instrument also listens for ``scan-request`` events and
   acquires every accepted proposal at higher magnification (with
   ``--auto-accept`` the daemon accepts its own proposals -- meant for the
   simulated instrument only);
4. the demo ends as soon as its work is done -- the survey tour acquired,
   every frame analysed, every accepted proposal revisited and analysed, and
   no open proposal waiting for the operator -- or after ``duration_s``,
   whichever comes first; the daemon drains its queue and stops, and the demo
   prints a summary and writes the session report of maps
   (``SESSION/report/index.html``), showing its progress.

The instrument's clock follows the wall clock (``engine.catch_up`` before every
frame), so the specimen drifts in real time as it would at the microscope.
"""

from __future__ import annotations

import logging
import tempfile
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable

if TYPE_CHECKING:  # numpy is imported where it is used: `livequant --help` reads DemoOptions
    import numpy as np

__all__ = ["DemoOptions", "DemoOutcome", "run_demo", "tour_positions", "demo_settings"]

log = logging.getLogger("livequant.demo")


@dataclass(frozen=True)
class DemoOptions:
    """What the demo does; every field has the default the command line uses."""

    session: str | None = None            # None: a new temporary folder
    scenario: str = "demo"
    duration_s: float = 90.0              # survey and revisits stop after this, seconds
    frames: int = 14                      # survey frames (the tour is cut to this many)
    shape_px: tuple[int, int] = (1024, 1024)
    fov_nm: float = 20.0
    overlap_nm: float = 6.0               # overlap of consecutive survey frames, for drift
    cadence_s: float = 3.0                # one survey frame every this many seconds (at least)
    dwell_time_us: float = 4.0            # survey dwell: enough dose to see polar cores in one frame
    auto_accept: bool = False
    seed: int = 7
    drain_s: float = 60.0                 # after duration_s, wait at most this for the queue
    config_file: str | None = None
    workers: int | None = None
    report: bool = True


@dataclass
class DemoOutcome:
    session: str
    counts: dict = field(default_factory=dict)
    n_survey_frames: int = 0
    n_revisit_frames: int = 0
    flags_by_kind: dict = field(default_factory=dict)
    proposals_by_state: dict = field(default_factory=dict)
    report: str | None = None
    report_error: str | None = None
    instrument_error: str | None = None
    elapsed_s: float = 0.0

    def as_dict(self) -> dict[str, Any]:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


def tour_positions(n_frames: int, *, fov_nm: float, overlap_nm: float) -> np.ndarray:
    """Stage centres (x, y) in nm of the demo specimen's survey tour.

    The tour starts left of the vortex-antivortex pair (at y = 60 nm), runs
    right along it and across the 180-degree wall at x = -40 nm, then turns
    down along that wall through the film to the electrode and substrate
    interfaces (y = -56 and -60 nm).  Consecutive frames overlap by
    `overlap_nm`, so the drift can be measured between them.
    """
    import numpy as np

    step = fov_nm - overlap_nm
    if step <= 0:
        raise ValueError(f"`overlap_nm` ({overlap_nm}) must be smaller than `fov_nm` ({fov_nm})")
    xs = np.arange(-106.0, -36.0 + 1e-9, step)
    row = [(x, 60.0) for x in xs]
    x_end = row[-1][0]
    col = [(x_end, y) for y in np.arange(60.0 - step, -52.0 - 1e-9, -step)]
    tour = np.array(row + col, dtype=float)
    return tour[:max(1, int(n_frames))]


def demo_settings(options: DemoOptions):
    """Settings for the demo: the user's files, then the demo's own needs on top."""
    from livequant.config import load_settings

    overrides: dict[str, Any] = {
        # any free ports: a demo must not collide with a daemon already running here
        "daemon.events_port": 0, "daemon.commands_port": 0, "daemon.ingest_port": 0,
        "daemon.ingest_socket": False,
        "daemon.heartbeat_s": 5.0,
        "workers": options.workers,
    }
    if options.auto_accept:
        overrides["proposals.auto_accept"] = True
    settings = load_settings(options.config_file, overrides=overrides)
    if settings.proposals.beam_current_pa is None:
        # the simulated instrument's probe current: the demo can show each proposal's dose
        from sim_instrument.scenario import load_scenario

        current = float(load_scenario(options.scenario).instrument.beam_current_pa)
        settings = settings.model_copy(update={
            "proposals": settings.proposals.model_copy(update={"beam_current_pa": current})})
    if settings.analysis.material is None:   # the demo specimen's film, unless you chose one
        settings = settings.model_copy(update={
            "analysis": settings.analysis.model_copy(update={"material": "PbTiO3"})})
    return settings


class _Locked:
    """Serialise calls to the scan engine and the frame writer: one beam, one scan at a time."""

    def __init__(self, target, lock: threading.Lock):
        self._target, self._lock = target, lock

    def __getattr__(self, name):
        value = getattr(self._target, name)
        if not callable(value):
            return value

        def locked(*args, **kwargs):
            with self._lock:
                return value(*args, **kwargs)
        return locked


class _Instrument:
    """The simulated microscope: a survey tour, and accepted scan requests as they come.

    Two threads share one engine behind a lock: the survey paces itself
    through the tour while the request listener (subscribed from the start,
    so no request published during the survey is missed) acquires each
    accepted proposal between survey frames.
    """

    def __init__(self, options: DemoOptions, *, out_dir: Path, truth_dir: Path,
                 endpoint: Callable[[], str | None], stop: threading.Event):
        self.options = options
        self.out_dir, self.truth_dir = out_dir, truth_dir
        self.endpoint = endpoint
        self.stop = stop
        self.survey_ids: list[str] = []
        self.revisit_ids: list[str] = []
        self.survey_done = threading.Event()   # the tour is over (finished, stopped or failed)
        self.errors: list[str] = []
        self._threads: list[threading.Thread] = []

    @property
    def error(self) -> str | None:
        return "; ".join(self.errors) or None

    def start(self) -> None:
        from sim_instrument.engine import ScanEngine
        from sim_instrument.outputs import FolderSink
        from sim_instrument.specimen import Specimen

        o = self.options
        lock = threading.Lock()
        self.engine = _Locked(ScanEngine(Specimen.from_scenario(o.scenario), seed=o.seed,
                                         frame_prefix="survey"), lock)
        self.sink = _Locked(FolderSink(self.out_dir, truth_dir=self.truth_dir), lock)
        self._deadline = time.monotonic() + o.duration_s
        for name, target in (("sim-survey", self._survey), ("sim-requests", self._serve)):
            t = threading.Thread(target=self._guard, args=(target,), name=name, daemon=True)
            t.start()
            self._threads.append(t)

    def join(self, timeout: float | None = None) -> None:
        end = None if timeout is None else time.monotonic() + timeout
        for t in self._threads:
            t.join(None if end is None else max(0.0, end - time.monotonic()))

    def _guard(self, target) -> None:
        try:
            target()
        except Exception as exc:  # noqa: BLE001 - reported in the demo's summary and log
            self.errors.append(f"{type(exc).__name__}: {exc}")
            log.exception("the simulated instrument failed")

    def _survey(self) -> None:
        try:
            self._tour()
        finally:
            self.survey_done.set()

    def _tour(self) -> None:
        o = self.options
        for x_nm, y_nm in tour_positions(o.frames, fov_nm=o.fov_nm, overlap_nm=o.overlap_nm):
            if self.stop.is_set() or time.monotonic() >= self._deadline:
                break
            started = time.monotonic()
            self.engine.catch_up()  # the specimen drifts with the wall clock, as at the instrument
            acq = self.engine.acquire((x_nm, y_nm), o.fov_nm, o.shape_px,
                                      dwell_time_us=o.dwell_time_us)
            self.sink.send(acq.pixels, acq.sidecar, acq.truth)
            self.survey_ids.append(acq.frame_id)
            log.info("survey frame %s at stage (%.1f, %.1f) nm", acq.frame_id, x_nm, y_nm)
            self.stop.wait(max(0.0, o.cadence_s - (time.monotonic() - started)))

    def _serve(self) -> None:
        from sim_instrument.modes import run_serve

        endpoint = self.endpoint()
        remaining = self._deadline - time.monotonic()
        if endpoint is None or remaining <= 0:
            return
        # The specimen keeps drifting while the instrument waits for a request.
        run_serve(self.engine, [self.sink], endpoint, duration_s=remaining, stop=self.stop,
                  on_frame=lambda acq: self.revisit_ids.append(acq.frame_id),
                  realtime_clock=True)


def run_demo(options: DemoOptions, *, display_factory: Callable | None = None) -> DemoOutcome:
    """Run the simulated instrument and the daemon until the demo's time is up.

    Parameters
    ----------
    options : DemoOptions
    display_factory : callable, optional
        ``display_factory(daemon) -> context manager`` for the terminal display.

    Raises
    ------
    livequant.config.ConfigError, livequant.daemon.SetupError
        Bad settings or an unusable session folder.
    """
    from livequant.daemon import Daemon, Ledger

    t_start = time.monotonic()
    session = Path(options.session) if options.session else Path(
        tempfile.mkdtemp(prefix="livequant-demo-"))
    session.mkdir(parents=True, exist_ok=True)
    settings = demo_settings(options)
    log.info("demo session %s; from another terminal: livequant proposals --session %s "
             "(then accept ID / reject ID)%s", session, session,
             "; auto-accept is on (simulated instrument)" if options.auto_accept else "")
    acquired = session / "acquired"
    acquired.mkdir(exist_ok=True)
    daemon = Daemon(settings, session=session, watch=acquired,
                    log_heartbeat=display_factory is None)
    stop = threading.Event()

    def events_endpoint() -> str | None:
        # The daemon binds any free port; wait until it is up.
        while not stop.is_set():
            ep = daemon.endpoints.get("events")
            if ep and daemon.snapshot.state in ("running", "paused"):
                return ep
            if daemon.should_exit.is_set():
                return None
            stop.wait(0.1)
        return None

    instrument = _Instrument(options, out_dir=acquired, truth_dir=session / "truth",
                             endpoint=events_endpoint, stop=stop)

    def supervise() -> None:
        # Wait for the daemon, run the instrument for the demo's time, let the
        # daemon drain what it was given, then stop it -- also when anything here
        # fails, so the demo never hangs.
        try:
            if events_endpoint() is None:
                return
            instrument.start()
            _until_done(daemon, instrument, session, options)
            stop.set()
            instrument.join(30.0)
            deadline = time.monotonic() + options.drain_s
            while time.monotonic() < deadline and not daemon.should_exit.is_set():
                snap = daemon.snapshot
                busy = snap.counts.get("queued", 0) + snap.counts.get("processing", 0)
                if busy == 0 and snap.in_flight == 0 and snap.settling == 0:
                    break
                time.sleep(0.2)
        except Exception as exc:  # noqa: BLE001 - reported in the summary, then stop
            instrument.errors.append(f"{type(exc).__name__}: {exc}")
            log.exception("the demo's supervisor failed")
        finally:
            stop.set()
            daemon.handle_exit()

    supervisor = threading.Thread(target=supervise, name="demo-supervisor", daemon=True)
    supervisor.start()
    display = display_factory(daemon) if display_factory is not None else None
    try:
        daemon.run(display=display)
    finally:
        stop.set()
        supervisor.join(10.0)

    outcome = DemoOutcome(session=str(session), n_survey_frames=len(instrument.survey_ids),
                          n_revisit_frames=len(instrument.revisit_ids),
                          instrument_error=instrument.error)
    with Ledger(session / "ledger.sqlite", readonly=True) as ledger:
        outcome.counts = ledger.counts()
        for f in ledger.flags():
            outcome.flags_by_kind[f["kind"]] = outcome.flags_by_kind.get(f["kind"], 0) + 1
        for p in ledger.proposals():
            outcome.proposals_by_state[p["state"]] = outcome.proposals_by_state.get(
                p["state"], 0) + 1
    if options.report:
        _write_report(session, outcome, settings)
    outcome.elapsed_s = time.monotonic() - t_start
    return outcome


def work_left(snap, proposals: dict[str, int], *, acquired: int, revisits: int,
              survey_done: bool, auto_accept: bool) -> str | None:
    """What the demo still waits for, or None when its work is done (pure).

    Parameters
    ----------
    snap : Snapshot
        The daemon's latest snapshot.
    proposals : dict
        Proposals per state from the ledger.
    acquired, revisits : int
        Frames the simulated instrument wrote (all of them) and revisits among them.
    survey_done : bool
        The survey tour is over.
    auto_accept : bool
        Proposals are accepted by the daemon itself (no operator to wait for).
    """
    if not survey_done:
        return "the survey"
    c = snap.counts
    if snap.total < acquired or snap.settling:
        return "frames still being written"
    if c.get("queued", 0) or c.get("processing", 0) or snap.in_flight:
        return "frames still being analysed"
    if proposals.get("accepted", 0) > revisits:
        return "accepted proposals not yet revisited"
    if proposals.get("open", 0):
        return ("open proposals being accepted" if auto_accept else
                "open proposals waiting for the operator")
    return None


def _until_done(daemon, instrument: "_Instrument", session: Path, options: DemoOptions) -> None:
    """Wait until the demo's work is done (:func:`work_left`), its time is up or it stops."""
    from livequant.daemon import Ledger

    deadline = time.monotonic() + max(0.0, options.duration_s)
    said, idle_checks = None, 0
    while not daemon.should_exit.is_set() and time.monotonic() < deadline:
        # the snapshot first: a frame it counts as done has had its proposals written
        # to the ledger already (the main loop runs the rules before the next snapshot)
        snap = daemon.snapshot
        proposals: dict[str, int] = {}
        ledger_path = session / "ledger.sqlite"
        if instrument.survey_done.is_set() and ledger_path.exists():
            with Ledger(ledger_path, readonly=True) as ledger:
                for p in ledger.proposals():
                    proposals[p["state"]] = proposals.get(p["state"], 0) + 1
        left = work_left(snap, proposals,
                         acquired=len(instrument.survey_ids) + len(instrument.revisit_ids),
                         revisits=len(instrument.revisit_ids),
                         survey_done=instrument.survey_done.is_set(),
                         auto_accept=options.auto_accept)
        idle_checks = idle_checks + 1 if left is None else 0
        if idle_checks >= 2:     # twice in a row, half a second apart: nothing in between
            log.info("the demo's work is done: ending %.0f s before --duration-s",
                     deadline - time.monotonic())
            return
        if left is not None and left != said and instrument.survey_done.is_set():
            log.info("survey done; waiting for %s (at most %.0f s more)%s", left,
                     deadline - time.monotonic(),
                     ": keys a / r on the panel, or livequant accept / reject"
                     if "operator" in left else "")
            said = left
        daemon.should_exit.wait(0.5)


def _write_report(session: Path, outcome: DemoOutcome, settings) -> None:
    from livequant.report import build_report
    from livequant.report.progress import console_progress

    try:
        with console_progress("report") as progress:
            built = build_report(session, gain=settings.analysis.refine.gain_counts_per_electron,
                                 progress=progress)
    except Exception as exc:  # noqa: BLE001 - the demo's results stand without the report
        outcome.report_error = f"{type(exc).__name__}: {exc}"
        log.exception("the session report could not be written")
        return
    outcome.report = str(built["index"])


def format_outcome(outcome: DemoOutcome) -> str:
    """The demo's closing summary for a person."""
    c = outcome.counts
    lines = [
        f"demo session: {outcome.session}",
        f"frames: {outcome.n_survey_frames} survey + {outcome.n_revisit_frames} revisits "
        f"acquired; {c.get('done', 0)} analysed, {c.get('quarantined', 0)} quarantined, "
        f"{c.get('queued', 0) + c.get('processing', 0)} left queued",
    ]
    if outcome.flags_by_kind:
        lines.append("flags: " + ", ".join(f"{k} {v}" for k, v in
                                            sorted(outcome.flags_by_kind.items())))
    else:
        lines.append("flags: none")
    if outcome.proposals_by_state:
        lines.append("proposals: " + ", ".join(f"{k} {v}" for k, v in
                                                sorted(outcome.proposals_by_state.items())))
    if outcome.report:
        lines.append(f"report: {outcome.report}")
    if outcome.report_error:
        lines.append(f"report failed: {outcome.report_error}")
    if outcome.instrument_error:
        lines.append(f"simulated instrument failed: {outcome.instrument_error}")
    lines.append(f"elapsed: {outcome.elapsed_s:.0f} s")
    return "\n".join(lines)

