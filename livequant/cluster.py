"""Frames on a Dask cluster (``dask.distributed``): the same worker code, more machines.

Two ways in:

* ``livequant reprocess`` submits :func:`process_on_worker` (read, analyse,
  write the per-frame files, all on the worker: the archive and the session
  folder are on a disk every worker sees at the same path) and records each
  outcome in the session's ledger on the client.
* ``livequant run --scheduler`` replaces the daemon's process pool by a
  :class:`DaskExecutor`: the daemon reads each frame on its own machine, sends
  the pixels to a worker (:func:`analyze_on_worker`), and writes the outputs
  and runs the rules itself, so only the analysis leaves the machine.

Either way each worker gets a :class:`WorkerSetup` plugin once: it caps the
analysis threads (:func:`livequant.pipeline.limit_threads`, so that the
workers on one host do not oversubscribe its cores) and installs the settings
and the analysis function (:func:`livequant.daemon.worker.configure`), keyed by
a token so that two sessions may share one cluster.  A worker that joins later
gets the plugin too.

Exactly once: the ledger on the client is the only record of what is done.  A
frame is claimed (``processing``) before it is submitted and marked done only
when its future returns; a worker that dies mid-task makes the scheduler run
the task again elsewhere (the outputs are written atomically, so a half-run
leaves nothing half-written), and the one result that comes back is recorded
once.  A task that kills ``distributed.scheduler.allowed-failures`` + 1 workers
comes back as ``KilledWorker`` and the frame is quarantined (``worker-crash``).
"""

from __future__ import annotations

import concurrent.futures as cf
import logging
import os
import threading
import time
import uuid
from dataclasses import replace

import distributed

__all__ = ["WorkerSetup", "DaskExecutor", "connect", "local_cluster", "install_setup",
           "process_on_worker", "analyze_on_worker", "worker_slots"]

log = logging.getLogger("livequant.cluster")

#: token -> (settings, analysis reference, frames folder); filled on each worker by WorkerSetup
_configs: dict[str, tuple] = {}
_active = {"token": None}
_lock = threading.Lock()


def _host(address: str) -> str:
    """``tcp://10.0.0.5:40123`` -> ``10.0.0.5``."""
    rest = address.split("://", 1)[-1]
    return rest.rsplit(":", 1)[0]


class WorkerSetup(distributed.WorkerPlugin):
    """Worker plugin: cap the analysis threads and install settings for `token`.

    Parameters
    ----------
    token : str
        Names this session's settings on the worker.
    settings : Settings
    analyze_ref : str or callable
        The analysis (``"module:function"``), as for the daemon.
    frames_dir : str
        The session's ``frames`` folder (used by :func:`process_on_worker`).
    threads_by_host : dict of str to int
        Analysis threads per worker on each known host; a worker on a host not
        listed uses ``max(1, cores // its Dask threads)`` (alone on its host).
    """

    def __init__(self, token, settings, analyze_ref, frames_dir, threads_by_host=None):
        self.token = token
        self.settings = settings
        self.analyze_ref = analyze_ref
        self.frames_dir = str(frames_dir)
        self.threads_by_host = dict(threads_by_host or {})

    def setup(self, worker):
        from livequant.pipeline import limit_threads, threads_per_worker

        n = self.threads_by_host.get(_host(worker.address))
        if n is None:
            n = threads_per_worker(max(1, int(getattr(worker.state, "nthreads", 1) or 1)))
        limit_threads(n)
        with _lock:
            _configs[self.token] = (self.settings, self.analyze_ref, self.frames_dir)

    def teardown(self, worker):
        with _lock:
            _configs.pop(self.token, None)


def _activate(token: str) -> None:
    """Make `token`'s settings the ones :mod:`livequant.daemon.worker` uses in this process."""
    from livequant.daemon import worker

    with _lock:
        if _active["token"] == token:
            return
        try:
            settings, analyze_ref, frames_dir = _configs[token]
        except KeyError:
            raise RuntimeError(f"this Dask worker has no livequant setup {token!r}; the "
                               "client registers it (WorkerSetup) before submitting") from None
        worker.configure(settings, analyze_ref, frames_dir)
        _active["token"] = token


def process_on_worker(token: str, ref: str, scan_drift_nm_per_s=None, keep_view: bool = True):
    """Task: read, analyse and write one frame on a worker; the daemon's worker code.

    Returns the :class:`~livequant.daemon.worker.Outcome` (without its view unless
    `keep_view`: only the rules need it).
    """
    from livequant.daemon.worker import process_path

    _activate(token)
    out = process_path(ref, scan_drift_nm_per_s)
    return out if keep_view else replace(out, view=None)


def analyze_on_worker(token: str, frame, scan_drift_nm_per_s=None):
    """Task: analyse a frame whose pixels came with the task (``run --scheduler``).

    Returns ``(result_or_outcome, analyze_s)``: the ``FrameResult``, or a
    quarantined ``Outcome`` when the analysis raised.
    """
    from livequant.daemon.worker import analyze_read_frame

    _activate(token)
    t0 = time.perf_counter()
    result = analyze_read_frame(frame, frame.path or frame.frame_id, scan_drift_nm_per_s)
    return result, time.perf_counter() - t0


# ====================================================================== client side


def local_cluster(n_workers: int, **kwargs):
    """A ``LocalCluster`` of `n_workers` single-threaded worker processes on this machine."""
    opts = dict(n_workers=int(n_workers), threads_per_worker=1, processes=True,
                dashboard_address=":0",  # any free port: never a clash with another
                silence_logs=logging.WARNING)
    opts.update(kwargs)
    return distributed.LocalCluster(**opts)


def connect(address: str, *, timeout_s: float = 20.0):
    """A ``Client`` of the scheduler at `address` (``tcp://HOST:PORT``).

    Raises
    ------
    ConnectionError
        When no scheduler answers there in `timeout_s`, with the address.
    """
    try:
        return distributed.Client(address, timeout=timeout_s)
    except (OSError, TimeoutError) as exc:
        raise ConnectionError(f"no Dask scheduler answered at {address} within {timeout_s:g} "
                              f"s ({type(exc).__name__}: {exc}); start one with "
                              "`dask scheduler` and workers with `dask worker ADDRESS`") from None


def worker_slots(client) -> int:
    """Tasks the cluster runs at once (the sum of its workers' threads), at least 1."""
    workers = client.scheduler_info(n_workers=-1)["workers"] if _takes_n_workers(client) \
        else client.scheduler_info()["workers"]
    return max(1, sum(int(w.get("nthreads", 1)) for w in workers.values()))


def _takes_n_workers(client) -> bool:
    import inspect

    try:
        return "n_workers" in inspect.signature(client.scheduler_info).parameters
    except (TypeError, ValueError):
        return False


def _threads_by_host(client) -> dict[str, int]:
    """Analysis threads per worker on each host: the host's cores over its Dask threads."""
    def cores():
        try:
            return len(os.sched_getaffinity(0))
        except AttributeError:
            return os.cpu_count() or 1

    try:
        per_worker = client.run(cores)
        workers = (client.scheduler_info(n_workers=-1) if _takes_n_workers(client)
                   else client.scheduler_info())["workers"]
    except Exception as exc:  # noqa: BLE001 - fall back to each worker's own estimate
        log.warning("could not ask the workers for their cores (%s); each worker assumes it "
                    "is alone on its host", exc)
        return {}
    hosts: dict[str, list[int]] = {}
    slots: dict[str, int] = {}
    for addr, n_cores in per_worker.items():
        host = _host(addr)
        hosts.setdefault(host, []).append(int(n_cores))
        slots[host] = slots.get(host, 0) + int(workers.get(addr, {}).get("nthreads", 1))
    return {h: max(1, max(c) // max(1, slots[h])) for h, c in hosts.items()}


def install_setup(client, settings, analyze_ref, frames_dir, *, threads_by_host=None) -> str:
    """Register the :class:`WorkerSetup` of one session on every worker; return its token."""
    token = uuid.uuid4().hex[:12]
    if threads_by_host is None:
        threads_by_host = _threads_by_host(client)
    client.register_plugin(WorkerSetup(token, settings, analyze_ref, str(frames_dir),
                                       threads_by_host), name=f"livequant-{token}")
    return token


def uninstall_setup(client, token: str) -> None:
    try:
        client.unregister_worker_plugin(f"livequant-{token}")
    except Exception as exc:  # noqa: BLE001 - closing anyway; the workers forget it on restart
        log.debug("could not unregister the worker setup %s: %s", token, exc)


class DaskExecutor:
    """The daemon's pool on a Dask cluster: ``submit(process_path, path, drift)`` -> Future.

    The daemon's tick loop is unchanged: it submits the same call it submits to
    its process pool and gets a ``concurrent.futures.Future`` of an
    :class:`~livequant.daemon.worker.Outcome`.  Here a local thread reads the
    frame (confined to its folder, as the pool worker does), sends its pixels to
    a Dask worker to be analysed, and writes the outputs and builds the rules'
    view on this machine.

    Parameters
    ----------
    client : distributed.Client
    settings, analyze_ref, frames_dir
        As for the process pool's initializer.
    close_client : bool
        Close `client` on :meth:`shutdown` (True when the executor opened it).
    """

    def __init__(self, client, *, settings, analyze_ref, frames_dir, close_client=True):
        from livequant.daemon import worker

        worker.configure(settings, analyze_ref, str(frames_dir))  # reading and writing here
        self.client = client
        self.close_client = close_client
        self.token = install_setup(client, settings, analyze_ref, frames_dir)
        self.n_slots = worker_slots(client)
        self._threads = cf.ThreadPoolExecutor(max_workers=max(4, 2 * self.n_slots + 2),
                                              thread_name_prefix="dask-frame")
        self._remote: set = set()
        self._remote_lock = threading.Lock()
        self._closed = False

    @classmethod
    def connect(cls, address: str, **kwargs) -> "DaskExecutor":
        return cls(connect(address), **kwargs)

    def submit(self, fn, path, scan_drift_nm_per_s=None) -> cf.Future:
        from livequant.daemon.worker import process_path

        if fn is not process_path:
            raise TypeError("DaskExecutor runs the daemon's process_path only")
        if self._closed:
            raise RuntimeError("cannot submit: the Dask executor is shut down")
        return self._threads.submit(self._one, str(path), scan_drift_nm_per_s)

    def _one(self, path: str, scan_drift_nm_per_s):
        from livequant.daemon.worker import Outcome, read_for_analysis, write_and_view

        t0 = time.perf_counter()
        frame = read_for_analysis(path)
        if isinstance(frame, Outcome):
            return frame
        read_s = time.perf_counter() - t0
        fut = self.client.submit(analyze_on_worker, self.token, frame, scan_drift_nm_per_s,
                                 pure=False, key=f"livequant-analyze-{uuid.uuid4().hex}")
        with self._remote_lock:
            self._remote.add(fut)
        try:
            result, analyze_s = fut.result()
        except distributed.KilledWorker as exc:
            return Outcome(path, "quarantined", frame_id=frame.frame_id, reason="worker-crash",
                           message=f"{path}: the Dask workers analysing this frame died "
                                   f"repeatedly ({exc}); out of memory, or a crash in native "
                                   "code")
        finally:
            with self._remote_lock:
                self._remote.discard(fut)
        if isinstance(result, Outcome):
            return result
        return write_and_view(result, frame, path, read_s=read_s, analyze_s=analyze_s)

    def shutdown(self, wait: bool = True, *, cancel_futures: bool = False) -> None:
        if self._closed:
            return
        self._closed = True
        with self._remote_lock:
            remote = list(self._remote)
        if remote and (cancel_futures or not wait):
            try:
                self.client.cancel(remote)
            except Exception as exc:  # noqa: BLE001 - closing anyway
                log.debug("cancelling Dask futures failed: %s", exc)
        self._threads.shutdown(wait=wait, cancel_futures=cancel_futures)
        uninstall_setup(self.client, self.token)
        if self.close_client:
            self.client.close()
