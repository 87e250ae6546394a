"""The daemon: wires sources, ledger, worker pool, publisher and command socket.

Threads and processes (one owner for each socket and each queue end)::

    watchdog observer ─┐                       ┌─> worker process 1 ─┐
    folder source ─────┼─> intake queue ─> intake thread ─> ledger   │  (paths in,
    socket source ─────┘   (bounded)       (hash, register)   │      │   outcomes out)
                                                              ▼      │
    main thread: tick loop ── claim ── submit ──> ProcessPool ─> worker process N
        │   ◄─────────────── completed futures ──────────────────────┘
        ├─ ledger: done / quarantined, then publisher: frame / status events
        ├─ snapshot (read by the display and the command server)
        └─ heartbeat, liveness of the other threads
    command server thread (REP) ── handlers read the snapshot / set flags

The main thread is the only one that claims frames, submits work and
handles results, so the order of state changes of a frame is simple to
reason about: ``queued -> processing`` (claim, then submit) and
``processing -> done`` (after the worker wrote the outputs) or back to
``queued`` (shutdown, crashed worker).
"""

from __future__ import annotations

import concurrent.futures as cf
import logging
import multiprocessing
import os
import queue
import signal
import threading
import time
from collections import deque
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path
from typing import Callable

from livequant.config import ConfigError, Settings
from livequant.containers import ref_name
from livequant.daemon.commands import DECISION_SCHEMAS, CommandServer
from livequant.daemon.decisions import DecisionLoop
from livequant.daemon.ledger import Ledger
from livequant.daemon.publisher import EventPublisher
from livequant.daemon.register import file_sha256, register_file
from livequant.daemon.security import bind_policy, start_authenticator
from livequant.daemon.series import SeriesAggregator
from livequant.daemon.session import (SessionLock, SetupError, check_session_folder,
                                      check_watch_folder, write_daemon_file)
from livequant.daemon.sources import (Candidate, FolderSource, SocketSource,
                                      incoming_candidates, put_until)
from livequant.daemon.status import LastFrame, Snapshot, last_frame_from_summary
from livequant.daemon.worker import DEFAULT_ANALYZE, Outcome, init_worker, process_path
from livequant.pipeline import threads_per_worker
from livequant.proposals.propose import CAUTION

__all__ = ["Daemon", "SetupError", "file_sha256"]

log = logging.getLogger("livequant.daemon")

_HANDLED_SIGNALS = (signal.SIGINT, signal.SIGTERM)
_RATE_WINDOW_S = 60.0


class Daemon:
    """One live session.

    Parameters
    ----------
    settings : Settings
        Validated settings (``settings.daemon`` for this class, ``workers`` for
        the pool size, the rest for the analysis).
    session : path
        Session folder (created if missing).
    watch : path, optional
        Folder the acquisition writes frames to.  None: socket ingest only.
    analyze : str or callable
        The per-frame analysis, ``"module:function"`` or a picklable
        module-level function taking ``(frame, settings)`` and returning a
        ``FrameResult``.  Defaults to :func:`livequant.pipeline.analyze_frame`.
    log_heartbeat : bool
        Log a one-line status at every heartbeat (service mode, no display).
    rules, session_context : optional
        The decision rules (``evaluate(view, session_view) -> list[Flag]``,
        ``status()``) and their session context; default from the settings
        (:func:`livequant.daemon.decisions.make_rules`).

    Use :meth:`run` (blocking, with signal handling) or, in tests,
    :meth:`start` / :meth:`tick` / :meth:`shutdown`.
    """

    def __init__(self, settings: Settings, *, session: str | os.PathLike,
                 watch: str | os.PathLike | None = None,
                 analyze: str | Callable = DEFAULT_ANALYZE, log_heartbeat: bool = True,
                 rules=None, session_context=None):
        self.settings = settings
        self.cfg = settings.daemon
        self.session_arg = Path(session)
        self.watch_arg = None if watch is None else Path(watch)
        self.analyze = analyze
        self.log_heartbeat = log_heartbeat
        self.n_workers = settings.workers or (os.cpu_count() or 1)
        self.max_in_flight = self.cfg.max_in_flight or self.n_workers + 1

        self.should_exit = threading.Event()
        self.force_exit = threading.Event()
        self.paused = threading.Event()
        self._wake = threading.Event()
        self._intake: queue.Queue = queue.Queue(maxsize=self.cfg.intake_queue_size)
        self._completed: queue.Queue = queue.Queue()
        self._in_flight: dict[int, cf.Future] = {}
        self._newest_claimed = 0
        self._one_at_a_time = False  # after a worker crash, until a frame succeeds
        # Frames in flight when a worker died, not yet run alone: re-run one at a
        # time, before anything else, so the one that kills its worker is found.
        self._suspects: set[int] = set()
        self._solo: int | None = None  # the suspect running alone now
        self._hold_until = 0.0       # dispatch paused after an output write failure
        self._done_times: deque[float] = deque(maxlen=1000)
        self._warnings: deque[str] = deque(maxlen=8)
        self._last: LastFrame | None = None
        self._started_mono = time.monotonic()
        self._next_heartbeat = 0.0
        self._state = "starting"
        self._captured_signals: list[int] = []
        self._started = False
        self._stopped = False
        self.n_worker_crashes = 0
        self._extra_commands: dict[str, Callable[[dict], dict]] = {}
        self._extra_schemas: dict = {}
        self._rules_arg = rules
        self._session_context_arg = session_context
        self.decisions: DecisionLoop | None = None
        self.series: SeriesAggregator | None = None
        self._view_errors: set[str] = set()
        self.add_command("proposals", self._cmd_proposals, schema=DECISION_SCHEMAS["proposals"])
        self.add_command("accept", self._cmd_accept, schema=DECISION_SCHEMAS["accept"])
        self.add_command("reject", self._cmd_reject, schema=DECISION_SCHEMAS["reject"])

        self.paths = None
        self.watch = None
        self.ledger: Ledger | None = None
        self.publisher: EventPublisher | None = None
        self.commands: CommandServer | None = None
        self.folder_source: FolderSource | None = None
        self.socket_source: SocketSource | None = None
        self.pool: cf.ProcessPoolExecutor | None = None
        self._zmq = None
        self._auth = None  # CURVE authenticator thread (security.py), when CURVE is on
        self._lock: SessionLock | None = None
        self._intake_thread: threading.Thread | None = None
        self._intake_stop = threading.Event()
        self.endpoints: dict[str, str] = {}
        self.snapshot = Snapshot(state="starting", session=str(self.session_arg),
                                 counts={}, watch=None if watch is None else str(watch))

    # ================================================================ start

    def start(self) -> None:
        """Check folders, open the ledger, bind sockets, start threads and the pool.

        Raises
        ------
        SetupError
            For a missing or unreadable watch folder, an unwritable session
            folder, a session already in use, or a port that cannot be bound.
            Nothing is left running when it raises.
        """
        try:
            self._start()
        except BaseException:
            self._close_everything(requeue=True)
            raise

    def _start(self) -> None:
        import zmq

        self.watch = None if self.watch_arg is None else check_watch_folder(self.watch_arg)
        self.paths = check_session_folder(self.session_arg)
        if self.watch is not None and self.watch == self.paths.incoming:
            raise SetupError("--watch must not be the session's incoming folder")
        self._lock = SessionLock(self.paths)
        self._lock.acquire()
        self.ledger = Ledger(self.paths.ledger)
        n_back = self.ledger.recover()
        if n_back:
            log.info("%d frame(s) left in processing by the last run are queued again", n_back)

        host = self.cfg.host
        # Loopback only, unless allowed explicitly and then with CURVE (security.py).
        curve = bind_policy(self.cfg)
        self._zmq = zmq.Context()
        if curve is not None:
            self._auth = start_authenticator(self._zmq, curve)
        try:
            self.publisher = EventPublisher(self._zmq, f"tcp://{host}:{self.cfg.events_port}",
                                            self.paths.events, curve=curve)
            self.endpoints["events"] = self.publisher.start()
            try:
                self.decisions = DecisionLoop(self.settings, self.ledger, self.publisher,
                                              rules=self._rules_arg,
                                              session_context=self._session_context_arg,
                                              warn=self._warn)
            except ConfigError as exc:  # a broken rule plugin stops start-up, not frame 1
                raise SetupError(f"rules: {exc}") from None
            self.decisions.resume()
            self.series = SeriesAggregator(self.settings, self.ledger, self.publisher,
                                           self.paths.root / "series",
                                           register=self._register_aggregate, warn=self._warn)
            self.commands = CommandServer(self._zmq, f"tcp://{host}:{self.cfg.commands_port}",
                                          self._command_handlers(), curve=curve,
                                          schemas=self._extra_schemas)
            self.endpoints["commands"] = self.commands.start()
            if self.cfg.ingest_socket:
                self.socket_source = SocketSource(
                    self._zmq, f"tcp://{host}:{self.cfg.ingest_port}", self.paths.incoming,
                    self._intake, frame_defaults=self.settings.frame_defaults.as_dict(),
                    on_reject=self._on_rejected_message, curve=curve,
                    max_message_bytes=int(self.cfg.max_message_mb * (1 << 20)))
                self.endpoints["ingest"] = self.socket_source.start()
        except OSError as exc:
            raise SetupError(str(exc)) from None

        self.pool = self._new_pool()
        self._intake_thread = threading.Thread(target=self._intake_loop, name="intake",
                                               daemon=True)
        self._intake_thread.start()
        self.series.start()
        # Socket frames saved before a crash but never registered.
        for cand in incoming_candidates(self.paths.incoming):
            put_until(self._intake, cand, self._intake_stop)
        if self.watch is not None:
            self.folder_source = FolderSource(
                self.watch, self._intake, settle_time_s=self.cfg.settle_time_s,
                rescan_interval_s=self.cfg.rescan_interval_s,
                force_polling=self.cfg.force_polling)
            self.folder_source.start()

        write_daemon_file(self.paths, {
            "session": str(self.paths.root),
            "watch": None if self.watch is None else str(self.watch),
            "endpoints": dict(self.endpoints),
            "workers": self.n_workers,
            # public, so clients can connect; the secret key never leaves its file
            "curve_server_public": None if curve is None else curve.public.decode("ascii"),
        })
        self._started = True
        self._state = "running"
        self._started_mono = time.monotonic()
        self._republish_missed()
        self.publisher.publish("status", {"event": "started", "session": str(self.paths.root),
                                          "watch": None if self.watch is None
                                          else str(self.watch),
                                          "endpoints": dict(self.endpoints),
                                          "workers": self.n_workers})
        log.info("session %s: watching %s; events %s, commands %s%s; %d worker(s)",
                 self.paths.root, self.watch or "(no folder)", self.endpoints["events"],
                 self.endpoints["commands"],
                 f", ingest {self.endpoints['ingest']}" if "ingest" in self.endpoints else "",
                 self.n_workers)
        self._take_snapshot()

    def _new_pool(self) -> cf.ProcessPoolExecutor:
        if self.cfg.scheduler:  # a Dask cluster analyses; all else stays here (cluster.py)
            from livequant.cluster import DaskExecutor

            try:
                pool = DaskExecutor.connect(self.cfg.scheduler, settings=self.settings,
                                            analyze_ref=self.analyze,
                                            frames_dir=self.paths.frames)
            except ConnectionError as exc:
                raise SetupError(str(exc)) from None
            self.n_workers = pool.n_slots
            self.max_in_flight = self.cfg.max_in_flight or pool.n_slots + 1
            return pool
        # spawn: a fresh interpreter per worker, safe beside our threads and the
        # ZeroMQ context (fork would copy both mid-flight).
        return cf.ProcessPoolExecutor(
            max_workers=self.n_workers, mp_context=multiprocessing.get_context("spawn"),
            initializer=init_worker,
            initargs=(self.settings, self.analyze, str(self.paths.frames),
                      threads_per_worker(self.n_workers)))

    def _republish_missed(self) -> None:
        """Publish summaries of frames marked done whose event a crash cut off.

        A crash between appending a frame's event and marking it published
        leaves the event in the file already: that one is only marked (its
        ``daemon.ledger_seq`` names the ledger row), so the record never holds
        one frame twice."""
        import json

        missed = self.ledger.unpublished_done()
        logged = _logged_frame_seqs(self.publisher.events_file) if missed else set()
        for seq, frame_id in missed:
            if seq in logged:
                self.ledger.mark_published(seq)
                continue
            summary_file = self.paths.frames / str(frame_id) / "summary.json"
            try:
                summary = json.loads(summary_file.read_text(encoding="utf-8"))
            except (OSError, ValueError) as exc:
                log.warning("frame %s is done but its summary cannot be read again (%s)",
                            frame_id, exc)
                continue
            self.publisher.publish("frame", summary)
            self.ledger.mark_published(seq)

    # ================================================================ intake

    def _intake_loop(self) -> None:
        """Record candidates in the ledger (hashing happens here, off the main loop)."""
        while not self._intake_stop.is_set() or not self._intake.empty():
            try:
                cand = self._intake.get(timeout=0.2)
            except queue.Empty:
                continue
            try:
                self._register(cand)
            except Exception as exc:  # noqa: BLE001 - one bad file must not end intake
                log.exception("could not register %s", cand.path)
                self._warn(f"intake: {Path(cand.path).name}: {type(exc).__name__}: {exc}")

    def _register(self, cand: Candidate) -> None:
        # One ledger row per image: a container (HDF5/EMD, MRC, TIFF stack) gives several.
        try:
            registered = register_file(self.ledger, cand.path, origin=cand.origin,
                                       complete_at=cand.complete_at)
        except FileNotFoundError:
            log.info("%s vanished before it was registered", cand.path)
            return
        for ref, reg in registered:  # empty when seen before and not changed
            if reg.action == "duplicate":
                msg = (f"{ref_name(ref)}: same image as {ref_name(reg.duplicate_of)}; not "
                       "analysed again")
                self._warn(msg)
                self.publisher.publish("status", {"event": "quarantined", "path": ref,
                                                  "reason": "duplicate", "message": msg})
            elif reg.action == "requeued":
                log.info("%s changed since it was analysed; queued again", ref_name(ref))
            if reg.action in ("queued", "requeued"):
                self._wake.set()

    def _register_aggregate(self, path: Path) -> None:
        """A series aggregate written to the session: queue it like a frame (series thread)."""
        put_until(self._intake, Candidate(str(path), "series", time.time()), self._intake_stop)

    def _on_rejected_message(self, reason: str, message: str) -> None:
        self._warn(f"socket: {message}")
        self.publisher.publish("status", {"event": "rejected-message", "reason": reason,
                                          "message": message})

    # ================================================================ main loop

    def run(self, *, display=None) -> int:
        """Start, tick until asked to stop, shut down.  Returns an exit code.

        `display` is an optional context manager (the terminal display) entered
        around the loop; it reads :attr:`snapshot`.
        """
        self.start()
        with self._capture_signals():
            try:
                if display is None:
                    self.loop()
                else:
                    with display:
                        self.loop()
            finally:
                self.shutdown()
        return 0

    def loop(self) -> None:
        """Tick until :meth:`handle_exit` is called (after :meth:`start`)."""
        while not self.should_exit.is_set():
            self.tick()
            self._wake.wait(self.cfg.tick_s)
            self._wake.clear()

    def tick(self) -> None:
        """One turn of the main loop: results, dispatch, snapshot, heartbeat, liveness."""
        self._handle_completed()
        self._dispatch()
        self._take_snapshot()
        self._check_threads()
        now = time.monotonic()
        if now >= self._next_heartbeat:
            self._next_heartbeat = now + self.cfg.heartbeat_s
            self._heartbeat()

    def _dispatch(self) -> None:
        if self.paused.is_set() or self.should_exit.is_set() or self.pool is None:
            return
        if time.monotonic() < self._hold_until:
            return
        alone = self._one_at_a_time or self._suspects or self._solo in self._in_flight
        limit = 1 if alone else self.max_in_flight
        while len(self._in_flight) < limit:
            claimed = self._claim_next()
            if claimed is None:
                return
            seq, path, _origin = claimed
            self._newest_claimed = max(self._newest_claimed, seq)
            try:
                fut = self.pool.submit(process_path, path, self._scan_drift_velocity())
            except (BrokenProcessPool, RuntimeError) as exc:
                self.ledger.requeue(seq, uncharge=True)  # it never ran
                self._pool_broke(f"submit failed: {exc}")
                return
            self._in_flight[seq] = fut
            fut.add_done_callback(lambda f, s=seq: self._on_future_done(s, f))

    def _claim_next(self) -> tuple[int, str, str] | None:
        """The next frame to run: a suspect of a worker crash first (alone), else the queue's."""
        while self._suspects:
            seq = min(self._suspects)
            self._suspects.discard(seq)
            claimed = self.ledger.claim_seq(seq)
            if claimed is not None:
                self._solo = seq  # nothing else is dispatched until it is finished
                return claimed
        return self.ledger.claim(newest_first=self.cfg.newest_first,
                                 newer_than_seq=self._newest_claimed)

    def _scan_drift_velocity(self) -> tuple[float, float] | None:
        """The drift velocity the workers undo inside each frame, once it is measured."""
        cfg = self.settings.analysis.scan_drift
        if not cfg.enabled or self.decisions is None:
            return None
        return self.decisions.drift_velocity(min_pairs=cfg.min_drift_pairs)

    def _on_future_done(self, seq: int, fut: cf.Future) -> None:
        # Runs on the pool's management thread: only hand over, never touch the ledger.
        self._completed.put((seq, fut))
        self._wake.set()

    def _handle_completed(self) -> None:
        crashed: list[int] = []
        while True:
            try:
                seq, fut = self._completed.get_nowait()
            except queue.Empty:
                break
            if self._in_flight.get(seq) is not fut:
                continue  # already requeued (forced shutdown)
            del self._in_flight[seq]
            if fut.cancelled():
                self.ledger.requeue(seq)
                continue
            exc = fut.exception()
            if exc is None:
                self._handle_outcome(seq, fut.result())
            elif isinstance(exc, BrokenProcessPool):
                crashed.append(seq)
            else:
                # Not the frame's fault (e.g. the outputs could not be written):
                # keep it queued, hold dispatch a moment, and say so.
                self.ledger.requeue(seq)
                self._hold_until = time.monotonic() + 5.0
                self._warn(f"frame {seq}: {type(exc).__name__}: {exc} (kept queued)")
                log.error("frame %s failed outside the analysis: %s: %s; kept queued, "
                          "retrying in 5 s", seq, type(exc).__name__, exc)
        if crashed:
            self._pool_broke("a worker process died", crashed=crashed)

    def _handle_outcome(self, seq: int, out: Outcome) -> None:
        if out.state == "done":
            self._one_at_a_time = False
            t = out.timings_s
            if not self.ledger.finish(seq, frame_id=out.frame_id, read_s=t.get("read"),
                                      analyze_s=t.get("analyze"), write_s=t.get("write")):
                log.info("%s changed while it was analysed; queued again", out.path)
                return
            row = self.ledger.row(seq)
            latency = None if row is None else time.time() - row.complete_at
            summary = dict(out.summary or {})
            summary["daemon"] = {"path": out.path, "latency_s": latency,
                                 "worker_timings_s": dict(t), "ledger_seq": seq}
            self.publisher.publish("frame", summary)
            self.ledger.mark_published(seq)
            self._done_times.append(time.monotonic())
            self._last = last_frame_from_summary(summary, latency_s=latency)
            if summary.get("status") not in (None, "ok"):
                self._warn(f"{out.frame_id}: {summary.get('status')}: "
                           f"{summary.get('message', '')}")
            self._decide(out, None if row is None else row.complete_at)
            if self.series is not None:
                self.series.on_done(out)
        else:
            self._one_at_a_time = False
            if not self.ledger.quarantine(seq, reason=out.reason or "unknown",
                                          message=out.message or "", frame_id=out.frame_id):
                log.info("%s changed while it was analysed; queued again", out.path)
                return
            self._warn(f"quarantined {ref_name(out.path)}: {out.reason}")
            log.warning("quarantined %s: %s", out.path, out.message)
            self.publisher.publish("status", {"event": "quarantined", "path": out.path,
                                              "frame_id": out.frame_id, "reason": out.reason,
                                              "message": out.message})

    def _decide(self, out: Outcome, complete_at: float | None) -> None:
        """Rules, drift and proposals for a done frame; nothing here may stop the daemon."""
        if self.decisions is None:
            return
        if out.view is None:
            if out.view_error and out.view_error not in self._view_errors:
                # Once per kind of failure: a custom analysis may never give views.
                self._view_errors.add(out.view_error)
                log.warning("%s: no view for the decision loop (%s)", out.frame_id,
                            out.view_error)
                self._warn(f"{out.frame_id}: no view for the rules ({out.view_error})")
            return
        try:
            self.decisions.on_frame(out.view, complete_at=complete_at)
        except Exception as exc:  # noqa: BLE001 - on_frame guards its steps; belt and braces
            self.decisions.n_errors += 1
            log.exception("decision loop failed on %s", out.frame_id)
            self._warn(f"decisions: {out.frame_id}: {type(exc).__name__}: {exc}")

    def _worker_crashed(self, seq: int, *, alone: bool) -> None:
        """A frame in flight when its worker died: charge it only if it was `alone`.

        With other frames in flight any of them may have killed the worker, so
        none is charged an attempt; each is re-run alone (a suspect) and the one
        that kills its worker when alone is charged, and quarantined after
        ``daemon.max_attempts`` such deaths.
        """
        if not alone:
            self.ledger.requeue(seq, uncharge=True)
            self._suspects.add(seq)
            return
        row = self.ledger.row(seq)
        if row is not None and row.attempts >= self.cfg.max_attempts:
            msg = (f"{row.path}: the worker process died {row.attempts} times on this frame, "
                   "each time with no other frame in flight (out of memory, or a crash in "
                   "native code)")
            self.ledger.quarantine(seq, reason="worker-crash", message=msg)
            self._warn(f"quarantined {ref_name(row.path)}: worker-crash")
            self.publisher.publish("status", {"event": "quarantined", "path": row.path,
                                              "reason": "worker-crash", "message": msg})
        else:
            self.ledger.requeue(seq)
            self._suspects.add(seq)  # retried alone next

    def _pool_broke(self, why: str, *, crashed: list[int] = ()) -> None:
        """Replace a broken pool; the frames in flight go back to the queue.

        `crashed` are frames whose futures already reported the broken pool; the
        rest of :attr:`_in_flight` died with them.  Only a frame that was alone in
        flight is charged an attempt (see :meth:`_worker_crashed`).
        """
        self.n_worker_crashes += 1
        victims = list(crashed)
        for seq, fut in list(self._in_flight.items()):
            del self._in_flight[seq]
            if fut.done() and not fut.cancelled() and fut.exception() is None:
                self._handle_outcome(seq, fut.result())  # it finished before the crash
            else:
                victims.append(seq)
        alone = len(victims) == 1
        self._warn(f"worker pool restarted: {why}" + ("" if len(victims) < 2 else
                   f" ({len(victims)} frames in flight, each re-run alone)"))
        log.error("worker pool broken (%s) with %d frame(s) in flight; %s", why, len(victims),
                  "that frame is charged an attempt" if alone else
                  "none is charged; each is re-run alone to find the one that kills its worker")
        for seq in victims:
            self._worker_crashed(seq, alone=alone)
        old, self.pool = self.pool, None
        if old is not None:
            old.shutdown(wait=False, cancel_futures=True)
        if not self.should_exit.is_set():
            self.pool = self._new_pool()
            # One at a time until a frame succeeds (and while suspects remain).
            self._one_at_a_time = True

    # ================================================================ status

    def _warn(self, text: str) -> None:
        self._warnings.append(f"{time.strftime('%H:%M:%S')} {text}")

    def _rate(self) -> float:
        now = time.monotonic()
        recent = [t for t in self._done_times if now - t <= _RATE_WINDOW_S]
        if len(recent) < 2:
            return 0.0
        span = now - recent[0]
        return (len(recent) - 1) / span if span > 0 else 0.0

    def _take_snapshot(self) -> None:
        counts = self.ledger.counts() if self.ledger is not None else {}
        oldest = self.ledger.oldest_queued_complete_at() if self.ledger is not None else None
        state = self._state
        if state == "running" and self.paused.is_set():
            state = "paused"
        proposals, flags, decisions = (), (), {}
        if self.decisions is not None and self.ledger is not None:
            try:
                proposals, flags = self.decisions.snapshot_tables()
                decisions = self.decisions.status()
            except Exception as exc:  # noqa: BLE001 - a snapshot must always be made
                log.exception("decision-loop snapshot failed")
                decisions = {"error": f"{type(exc).__name__}: {exc}"}
        self.snapshot = Snapshot(
            state=state,
            session=str(self.paths.root if self.paths else self.session_arg),
            watch=None if self.watch is None else str(self.watch),
            counts=counts,
            uptime_s=time.monotonic() - self._started_mono,
            in_flight=len(self._in_flight),
            settling=self.folder_source.n_pending if self.folder_source else 0,
            workers=self.n_workers,
            frames_per_s=self._rate(),
            lag_s=0.0 if oldest is None else max(0.0, time.time() - oldest),
            last=self._last,
            warnings=tuple(self._warnings),
            endpoints=dict(self.endpoints),
            rejected_messages=self.socket_source.n_rejected if self.socket_source else 0,
            proposals=proposals,
            flags=flags,
            decisions=decisions,
            series=self.series.status() if self.series is not None else (),
        )

    def _heartbeat(self) -> None:
        s = self.snapshot
        if self.publisher is not None:
            self.publisher.publish("status", {"event": "heartbeat", **_brief(s)})
        if self.log_heartbeat:
            log.info("%s", status_line(s))

    def _check_threads(self) -> None:
        for name, part in (("folder source", self.folder_source),
                           ("ingest socket", self.socket_source),
                           ("command socket", self.commands), ("publisher", self.publisher)):
            if part is not None and not part.is_alive() and not self.should_exit.is_set():
                # Fail loudly: a dead source means frames would silently stop coming.
                log.error("the %s thread died; stopping the daemon", name)
                self._warn(f"{name} thread died")
                self.handle_exit()
        if (self._intake_thread is not None and not self._intake_thread.is_alive()
                and not self.should_exit.is_set()):
            log.error("the intake thread died; stopping the daemon")
            self.handle_exit()

    # ================================================================ commands

    def add_command(self, name: str, handler: Callable[[dict], dict], *,
                    schema=None) -> None:
        """Answer `name` on the command socket (call before :meth:`start`).

        `handler` runs on the command thread with the request dict and returns a
        dict for the reply; it raises ``ValueError`` or ``KeyError`` for a bad
        request (sent back as the error).  `schema`, a pydantic model, checks
        every request before the handler sees it (an invalid one gets an error
        reply naming the field).
        """
        if self._started:
            raise RuntimeError("add_command() must be called before start()")
        if name in self._command_handlers():
            raise ValueError(f"command {name!r} is built in")
        self._extra_commands[name] = handler
        if schema is not None:
            self._extra_schemas[name] = schema

    def _command_handlers(self) -> dict:
        return {
            "status": lambda req: {"status": self.snapshot.as_dict()},
            "pause": self._cmd_pause,
            "resume": self._cmd_resume,
            "shutdown": self._cmd_shutdown,
            **self._extra_commands,
        }

    def _cmd_pause(self, req: dict) -> dict:
        if not self.paused.is_set():
            self.paused.set()
            log.info("paused: frames are still recorded and queued, not analysed")
            self.publisher.publish("status", {"event": "paused"})
        return {"state": "paused"}

    def _cmd_resume(self, req: dict) -> dict:
        if self.paused.is_set():
            self.paused.clear()
            log.info("resumed")
            self.publisher.publish("status", {"event": "resumed"})
            self._wake.set()
        return {"state": "running"}

    def _decision_loop(self) -> DecisionLoop:
        if self.decisions is None:
            raise ValueError("the decision loop is not running yet")
        return self.decisions

    def _cmd_proposals(self, req: dict) -> dict:
        return {"proposals": self._decision_loop().list(req.get("state")), "caution": CAUTION,
                "beam_current_pa": self.settings.proposals.beam_current_pa}

    def _cmd_accept(self, req: dict) -> dict:
        return self._decision_loop().accept(req.get("id"), note=req.get("note"))

    def _cmd_reject(self, req: dict) -> dict:
        why = req.get("why")
        if why is not None and not isinstance(why, str):
            raise ValueError("`why` must be a string")
        return self._decision_loop().reject(req.get("id"), why=why)

    def _cmd_shutdown(self, req: dict) -> dict:
        self.handle_exit()
        return {"state": "draining"}

    # ================================================================ stopping

    def handle_exit(self, sig: int | None = None, frame=None) -> None:
        """First call: drain and stop.  Second call: stop now (in-flight frames re-queued)."""
        if self.should_exit.is_set():
            self.force_exit.set()
            log.warning("forced stop: frames in flight go back to the queue")
        else:
            self.should_exit.set()
            if self._in_flight:
                log.warning("stopping: waiting for %d frame(s) in flight (up to %g s); "
                            "Ctrl+C again to stop at once", len(self._in_flight),
                            self.cfg.grace_s)
            else:
                log.info("stopping")
        self._wake.set()

    class _SignalCapture:
        def __init__(self, daemon: "Daemon"):
            self.daemon = daemon
            self.previous: dict[int, object] = {}

        def __enter__(self):
            if threading.current_thread() is threading.main_thread():
                for sig in _HANDLED_SIGNALS:
                    self.previous[sig] = signal.signal(sig, self._handler)
            return self

        def _handler(self, sig, frame):
            self.daemon._captured_signals.append(sig)
            self.daemon.handle_exit(sig, frame)

        def __exit__(self, *exc):
            for sig, handler in self.previous.items():
                signal.signal(sig, handler)
            return False

    def _capture_signals(self) -> "_SignalCapture":
        # Borrow SIGINT/SIGTERM for the life of the loop and give them back, so a
        # Ctrl+C after the daemon stopped behaves as the caller expects.
        return Daemon._SignalCapture(self)

    @property
    def captured_signals(self) -> tuple[int, ...]:
        return tuple(self._captured_signals)

    def shutdown(self) -> None:
        """Stop ingest, drain or re-queue the frames in flight, close everything.  Idempotent."""
        if self._stopped:
            return
        self.should_exit.set()
        self._state = "draining"
        if self.publisher is not None and self._started:
            self.publisher.publish("status", {"event": "draining",
                                              "in_flight": len(self._in_flight)})
        # 1. No new frames: stop the sources, then let intake record what they found.
        if self.folder_source is not None:
            self.folder_source.stop()
        if self.socket_source is not None:
            self.socket_source.stop()
        if self.series is not None:
            self.series.stop(timeout_s=self.cfg.grace_s)
        self._intake_stop.set()
        if self._intake_thread is not None:
            self._intake_thread.join(10)
        # 2. Finish what is in flight, up to the grace time (a second signal cuts it short).
        deadline = time.monotonic() + self.cfg.grace_s
        while self._in_flight and not self.force_exit.is_set() and time.monotonic() < deadline:
            self._handle_completed()
            if self._in_flight:
                self._wake.wait(0.1)
                self._wake.clear()
        self._handle_completed()
        self._close_everything(requeue=True)

    def _close_everything(self, *, requeue: bool) -> None:
        if self._stopped:
            return
        self._stopped = True
        if self._in_flight and self.ledger is not None:
            n = len(self._in_flight)
            for seq, fut in list(self._in_flight.items()):
                fut.cancel()
                self.ledger.requeue(seq)
            self._in_flight.clear()
            log.warning("%d frame(s) in flight were queued again; they run at the next start", n)
        if self.pool is not None:
            procs = list(getattr(self.pool, "_processes", {}).values())
            self.pool.shutdown(wait=False, cancel_futures=True)
            # Workers still busy were told nothing by shutdown(wait=False); their
            # frames are already back in the queue, so end them instead of waiting.
            for p in procs:
                if p.is_alive():
                    p.terminate()
            for p in procs:
                p.join(5)
            self.pool = None
        self._intake_stop.set()
        for part in (self.folder_source, self.socket_source):
            if part is not None:
                part.stop()
        if self.commands is not None:
            self.commands.stop()
        self._state = "stopped"
        if self.ledger is not None:
            try:
                self._take_snapshot()
            except Exception:  # noqa: BLE001 - closing anyway; logged
                log.exception("final snapshot failed")
        if self.publisher is not None:
            if self._started:
                self.publisher.publish("status", {"event": "stopped", **_brief(self.snapshot)})
            self.publisher.close()
        if self.paths is not None and self._started:
            try:
                self.paths.daemon_file.unlink()
            except FileNotFoundError:
                pass
        if self.ledger is not None:
            self.ledger.close()
        if self._auth is not None:
            self._auth.stop()  # before term(): its socket would hold the context open
        if self._zmq is not None:
            threads = [t for t in (getattr(p, "_thread", None) for p in
                                   (self.publisher, self.commands, self.socket_source)) if t]
            if any(t.is_alive() for t in threads):
                # term() would wait for their sockets forever; the OS cleans up at exit.
                log.warning("a socket thread did not stop in time; leaving the ZeroMQ context "
                            "open")
            else:
                self._zmq.term()
        if self._lock is not None:
            self._lock.release()


def _brief(s: Snapshot) -> dict:
    return {"state": s.state, "counts": dict(s.counts), "in_flight": s.in_flight,
            "frames_per_s": s.frames_per_s, "lag_s": s.lag_s}


def status_line(s: Snapshot) -> str:
    """One line for logs and the no-display mode."""
    c = s.counts
    last = ""
    if s.last is not None:
        a = f" a={s.last.a_pm:.1f}pm" if s.last.a_pm is not None else ""
        last = f"; last {s.last.frame_id}: {s.last.n_columns} columns{a}"
    return (f"[{s.state}] done {c.get('done', 0)}, queued {c.get('queued', 0)}, "
            f"processing {c.get('processing', 0)}, quarantined {c.get('quarantined', 0)}; "
            f"{s.frames_per_s:.2f} frames/s, lag {s.lag_s:.1f} s{last}")


def _logged_frame_seqs(events_file, tail_bytes: int = 8 << 20) -> set[int]:
    """Ledger rows whose frame event is in the last `tail_bytes` of the events
    file (a crash leaves at most the frames then in flight unmarked, and their
    events are at the end)."""
    import json

    seqs: set[int] = set()
    try:
        with open(events_file, "rb") as fh:
            fh.seek(0, os.SEEK_END)
            size = fh.tell()
            fh.seek(max(0, size - tail_bytes))
            tail = fh.read()
    except FileNotFoundError:
        return seqs
    for line in tail.splitlines():
        if b'"ledger_seq"' not in line:
            continue
        try:
            event = json.loads(line)
        except ValueError:  # the first line of the tail may be cut
            continue
        seq = (event.get("data") or {}).get("daemon", {}).get("ledger_seq")
        if event.get("topic") == "frame" and isinstance(seq, int):
            seqs.add(seq)
    return seqs
