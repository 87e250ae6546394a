"""Reanalyse an archive of frames on a Dask cluster, recorded in a session's ledger.

:func:`reprocess` is what ``livequant reprocess`` runs:

1. the sources (files, folders, globs; containers expanded into their images)
   are recorded in ``SESSION/ledger.sqlite`` exactly as the daemon records
   frames, so a frame already done is skipped (unless ``force``);
2. queued frames are claimed (``processing``) and submitted to the cluster as
   :func:`livequant.cluster.process_on_worker` tasks, a bounded number at a
   time; each worker reads, analyses and writes ``SESSION/frames/ID/`` with
   the daemon's own worker code, so the files are the daemon's files;
3. each outcome is recorded on this side (done / quarantined with its reason);
   with ``rules`` the decision rules run over each done frame and their flags
   go to the ledger (no proposals: an archive has no instrument to send them to);
4. ``SESSION/cells.parquet`` and ``SESSION/columns.parquet`` gather every done
   frame (:mod:`livequant.tables`).

The session folder and the archive must be visible to every worker at the
same paths (a shared disk); with the default LocalCluster they are.
"""

from __future__ import annotations

import concurrent.futures as cf
import glob
import logging
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

from livequant.containers import FRAME_FILE_SUFFIXES

__all__ = ["reprocess", "expand_sources", "ReprocessSummary"]

log = logging.getLogger("livequant.reprocess")


def expand_sources(sources) -> list[Path]:
    """Frame and container files named by `sources` (files, folders, glob patterns).

    A folder contributes its frame files (not its sub-folders; name them, or use
    ``DIR/**/*.h5``-style patterns).  Sidecars, hidden and temporary files are
    skipped.  Files come out sorted, each once.

    Raises
    ------
    ValueError
        For a source that names nothing (a missing path, an empty glob), naming it.
    """
    found: list[Path] = []
    for src in sources:
        text = os.fspath(src)
        p = Path(text)
        if p.is_dir():
            found += [q for q in sorted(p.iterdir()) if _is_frame_file(q)]
        elif p.is_file():
            if not _is_frame_file(p, hidden_ok=True):
                raise ValueError(f"{p}: not a frame or container file (expected "
                                 f"{', '.join(FRAME_FILE_SUFFIXES)})")
            found.append(p)
        elif glob.has_magic(text):
            matches = [Path(m) for m in sorted(glob.glob(text, recursive=True))]
            files = [m for m in matches if m.is_file() and _is_frame_file(m)]
            if not files:
                raise ValueError(f"{text}: the pattern matches no frame or container file")
            found += files
        else:
            raise ValueError(f"{text}: no such file or folder")
    return list(dict.fromkeys(f.resolve() for f in found))


def _is_frame_file(p: Path, hidden_ok: bool = False) -> bool:
    return (p.is_file() and (hidden_ok or not p.name.startswith("."))
            and p.name.lower().endswith(FRAME_FILE_SUFFIXES))


@dataclass
class ReprocessSummary:
    """What one run did (``--json`` prints :meth:`to_json`)."""

    session: str
    files: int = 0
    frames: int = 0
    skipped_done: int = 0
    queued: int = 0
    done: int = 0
    quarantined: int = 0
    duplicates: int = 0
    failed: int = 0
    flags: int = 0
    workers: int = 0
    scheduler: str = ""
    elapsed_s: float = 0.0
    processing_s: float = 0.0
    quarantine: list = field(default_factory=list)
    errors: list = field(default_factory=list)
    tables: dict = field(default_factory=dict)
    ledger_counts: dict = field(default_factory=dict)

    @property
    def frames_per_s(self) -> float:
        """Frames finished per second of processing (from the first task sent to the last
        result; start-up, hashing and the tables not counted)."""
        n = self.done + self.quarantined
        return n / self.processing_s if self.processing_s > 0 else 0.0

    def to_json(self) -> dict:
        d = {k: getattr(self, k) for k in self.__dataclass_fields__}
        d["frames_per_s"] = self.frames_per_s
        return d


class _NoEvents:
    """The decision loop publishes flags; an archive run has no events socket."""

    def publish(self, topic, data) -> None:
        pass


def reprocess(sources, session, settings, *, client=None, scheduler: str | None = None,
              n_workers: int | None = None, force: bool = False, rules: bool = False,
              progress: bool = False, tables: bool = True, max_in_flight: int | None = None,
              analyze: str = "livequant.pipeline:analyze_frame") -> ReprocessSummary:
    """Reanalyse the frames of `sources` into the session folder `session`.

    Parameters
    ----------
    sources : iterable of str or path
        Files, folders or glob patterns (:func:`expand_sources`).
    session : path-like
        Session folder (created if missing; an existing one is resumed).
    settings : Settings
    client : distributed.Client, optional
        Use this client (tests share one cluster).  Otherwise `scheduler`, then
        ``settings.daemon.scheduler``, else a LocalCluster of `n_workers`
        (default ``settings.workers`` or one per core), closed at the end.
    force : bool
        Analyse frames already done or quarantined again (as a new version).
    rules : bool
        Run the decision rules over each frame analysed now; flags to the ledger.
    progress : bool
        Show a progress bar on stderr (frames done, rate, time left, quarantined).
    tables : bool
        Write ``cells.parquet`` / ``columns.parquet`` at the end.
    max_in_flight : int, optional
        Tasks submitted at once (default twice the cluster's threads).
    analyze : str
        Advanced: the per-frame analysis, ``"module:function"`` (as ``livequant run
        --analyze``); the default is :func:`livequant.pipeline.analyze_frame`.

    Returns
    -------
    ReprocessSummary

    Raises
    ------
    ValueError
        For a source that names nothing.
    livequant.daemon.SetupError
        For an unusable session folder or one a daemon is running on.
    ConnectionError
        When no scheduler answers at the address given.
    """
    from livequant.cluster import connect, install_setup, local_cluster, uninstall_setup, \
        worker_slots
    from livequant.daemon.ledger import Ledger
    from livequant.daemon.register import record_scan
    from livequant.daemon.session import SessionLock, check_session_folder

    t_start = time.monotonic()
    files = expand_sources(sources)
    paths = check_session_folder(Path(session))
    lock = SessionLock(paths)
    lock.acquire()
    ledger = Ledger(paths.ledger)
    summary = ReprocessSummary(session=str(paths.root), files=len(files))
    cluster = own_client = None
    try:
        n_back = ledger.recover()
        if n_back:
            log.info("%d frame(s) left in processing by an earlier run are queued again", n_back)
        # a scheduler first: a wrong address fails before the archive is hashed
        if client is None and (scheduler or settings.daemon.scheduler):
            address = scheduler or settings.daemon.scheduler
            client = own_client = connect(address)
            summary.scheduler = address
        elif client is not None:
            summary.scheduler = str(client.scheduler.address)
        now = time.time()
        # hashing reads the archive once: a few files at a time (the disk, not the CPU,
        # is the limit), recorded in file order so frames are analysed in that order
        with cf.ThreadPoolExecutor(max_workers=_HASH_THREADS) as pool:
            for path, scan in zip(files, pool.map(lambda p: _scan(ledger, p, force), files)):
                if isinstance(scan, FileNotFoundError):
                    summary.errors.append(f"{path}: vanished before it was recorded")
                    continue
                regs = record_scan(ledger, scan, origin="archive", complete_at=now,
                                   force=force)
                summary.duplicates += sum(r.action == "duplicate" for _, r in regs)
        counts = ledger.counts()
        summary.queued = counts["queued"]
        summary.frames = sum(counts.values())
        summary.skipped_done = counts["done"]

        decisions = _decision_loop(settings, ledger) if rules else None
        if summary.queued:
            if client is None:  # a LocalCluster, only when there is work for it
                n = n_workers or settings.workers or (os.cpu_count() or 1)
                cluster = local_cluster(n)
                client = own_client = _client(cluster)
                summary.scheduler = f"LocalCluster({n})"
            slots = summary.workers = worker_slots(client)
            token = install_setup(client, settings, analyze, paths.frames)
            t_run = time.monotonic()
            try:
                _run(client, token, ledger, summary, decisions,
                     limit=max_in_flight or 2 * slots, progress=progress)
            finally:
                summary.processing_s = time.monotonic() - t_run
                uninstall_setup(client, token)
        if decisions is not None:
            summary.flags = decisions.n_flags
        if tables:
            summary.tables = _write_tables(paths.root)
    finally:
        summary.ledger_counts = ledger.counts()
        summary.elapsed_s = time.monotonic() - t_start
        ledger.close()
        lock.release()
        if own_client is not None:
            own_client.close()
        if cluster is not None:
            cluster.close()
    return summary


#: Files hashed at once while the sources are recorded.
_HASH_THREADS = 4


def _scan(ledger, path, force):
    from livequant.daemon.register import scan_file

    try:
        return scan_file(ledger, path, force=force)
    except FileNotFoundError as exc:
        return exc


def _client(cluster):
    import distributed

    return distributed.Client(cluster)


def _write_tables(root: Path) -> dict:
    from livequant.tables import write_session_tables

    return write_session_tables(root)


def _decision_loop(settings, ledger):
    """The daemon's decision loop with proposals and drift off: rules -> flags only."""
    from livequant.daemon.decisions import DecisionLoop

    archive = settings.model_copy(update={
        "proposals": settings.proposals.model_copy(update={"enabled": False}),
        "drift": settings.drift.model_copy(update={"enabled": False})})
    return DecisionLoop(archive, ledger, _NoEvents())


def _run(client, token, ledger, summary: ReprocessSummary, decisions, *, limit: int,
         progress: bool) -> None:
    """Claim, submit, record: until the queue is empty (or a failure not the frames').

    A frame whose workers died (``KilledWorker``) while other frames were in flight
    is not charged: the scheduler also counts the frames merely assigned to a dying
    worker.  It is run again at the end, alone on the cluster, and quarantined as
    ``worker-crash`` only if its workers die again then.
    """
    import distributed

    from livequant.cluster import process_on_worker

    in_flight: dict[str, tuple[int, str]] = {}
    pending = distributed.as_completed()
    stop = False
    suspects: list[tuple[int, str]] = []
    bar = _Progress(summary.queued) if progress else None

    def submit(seq, ref):
        fut = client.submit(process_on_worker, token, ref, None, decisions is not None,
                            key=f"livequant-{token}-{seq}-{time.monotonic_ns()}", pure=False)
        in_flight[fut.key] = (seq, ref)
        pending.add(fut)

    def fill():
        while not stop and len(in_flight) < limit:
            claimed = ledger.claim(newest_first=False, newer_than_seq=0)
            if claimed is None:
                return
            seq, ref, _origin = claimed
            submit(seq, ref)

    def handle(fut, *, alone: bool) -> None:
        nonlocal stop
        seq, ref = in_flight.pop(fut.key)
        if fut.status == "finished":
            _record(ledger, seq, fut.result(), summary, decisions)
        elif fut.status == "cancelled":
            ledger.requeue(seq)
            stop = True
        else:
            exc = fut.exception()
            if exc is None and not alone:
                # no error: its result was lost with a worker that died after it
                # finished (status "lost"); the frame is not at fault, run it again
                log.warning("%s: its result was lost with a worker; it runs again", ref)
                suspects.append((seq, ref))
            elif isinstance(exc, distributed.KilledWorker) and not alone:
                log.warning("%s: its workers died while other frames ran; it runs again "
                            "alone at the end", ref)
                suspects.append((seq, ref))
            elif isinstance(exc, distributed.KilledWorker):
                msg = (f"{ref}: the Dask workers analysing this frame died repeatedly, "
                       f"also with no other frame on the cluster ({exc}); out of memory, or "
                       "a crash in native code")
                ledger.quarantine(seq, reason="worker-crash", message=msg)
                summary.quarantined += 1
                summary.quarantine.append({"ref": ref, "reason": "worker-crash",
                                           "message": msg})
            else:
                # Not the frame's fault (outputs not writable, disk full): it stays
                # queued for the next run, and no more frames are started now.
                ledger.requeue(seq)
                summary.failed += 1
                summary.errors.append(f"{ref}: {type(exc).__name__}: {exc}")
                log.error("%s failed outside the analysis: %s: %s; kept queued, stopping",
                          ref, type(exc).__name__, exc)
                stop = True
        fut.release()
        if bar is not None:
            bar.update(summary)

    try:
        fill()
        for fut in pending:
            handle(fut, alone=False)
            fill()
        # the suspects, one at a time with nothing else on the cluster
        while suspects and not stop:
            seq, ref = suspects.pop(0)
            submit(seq, ref)
            for fut in pending:
                handle(fut, alone=True)
    finally:
        for seq, _ref in suspects:
            ledger.requeue(seq)  # not run alone yet: back to the queue for the next run
        for key, (seq, _ref) in in_flight.items():
            ledger.requeue(seq)  # interrupted: back to the queue for the next run
        if in_flight:
            try:
                client.cancel([f for f in pending.futures if f.key in in_flight])
            except Exception:  # noqa: BLE001 - the frames are queued again anyway
                log.debug("cancelling the remaining tasks failed", exc_info=True)
        if bar is not None:
            bar.close()


def _record(ledger, seq: int, out, summary: ReprocessSummary, decisions) -> None:
    if out.state == "done":
        t = out.timings_s
        if ledger.finish(seq, frame_id=out.frame_id, read_s=t.get("read"),
                         analyze_s=t.get("analyze"), write_s=t.get("write")):
            summary.done += 1
            if decisions is not None and out.view is not None:
                decisions.on_frame(out.view)
    else:
        if ledger.quarantine(seq, reason=out.reason or "unknown", message=out.message or "",
                             frame_id=out.frame_id):
            summary.quarantined += 1
            summary.quarantine.append({"ref": out.path, "reason": out.reason,
                                       "message": out.message})


class _Progress:
    """A rich progress bar on stderr: frames done of total, rate, time left, quarantined."""

    def __init__(self, total: int):
        from rich.console import Console
        from rich.progress import (BarColumn, MofNCompleteColumn, Progress, TextColumn,
                                   TimeElapsedColumn, TimeRemainingColumn)

        self.t0 = time.monotonic()
        self.progress = Progress(
            TextColumn("reprocess"), BarColumn(), MofNCompleteColumn(),
            TextColumn("{task.fields[rate]:.2f} frames/s"), TimeElapsedColumn(),
            TextColumn("ETA"), TimeRemainingColumn(),
            TextColumn("[yellow]{task.fields[quarantined]} quarantined"),
            console=Console(stderr=True), transient=False)
        self.task = self.progress.add_task("frames", total=total, rate=0.0, quarantined=0)
        self.progress.start()

    def update(self, summary: ReprocessSummary) -> None:
        n = summary.done + summary.quarantined
        dt = time.monotonic() - self.t0
        self.progress.update(self.task, completed=n, rate=n / dt if dt > 0 else 0.0,
                             quarantined=summary.quarantined)

    def close(self) -> None:
        self.progress.stop()
