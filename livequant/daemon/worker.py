"""What a worker process does with one frame: read, analyse, write outputs.

The daemon hands a worker only the path of a frame (not its pixels), so the
main process never holds more than a message's worth of image data and the
memory of the whole daemon stays bounded by a few frames whatever the
backlog.  The worker writes the per-frame outputs itself (``summary.json``
last) and returns a small :class:`Outcome`; the daemon marks the frame done in
the ledger only after that, so a frame is never ``done`` without its files.

Settings and the analysis function are installed once per process by
:func:`init_worker` (the pool initializer), not sent with every frame.
"""

from __future__ import annotations

import importlib
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from livequant.containers import read_any, split_ref
from livequant.frames import FrameError

__all__ = ["Outcome", "init_worker", "configure", "process_path", "read_for_analysis",
           "analyze_read_frame", "write_and_view", "resolve_callable", "DEFAULT_ANALYZE"]

#: The analysis run on every frame, as ``"module:attribute"``.
DEFAULT_ANALYZE = "livequant.pipeline:analyze_frame"

_state: dict[str, Any] = {}


@dataclass(frozen=True)
class Outcome:
    """The result of one frame, as sent back from the worker.

    ``state`` is ``"done"`` or ``"quarantined"``; for a quarantined frame
    ``reason`` is a short tag (``FrameError.reason``, or ``analysis-error``)
    and ``message`` says what went wrong.  ``view`` is the frame's
    :class:`~livequant.rules.types.FrameView` for the decision loop (small:
    columnar tables and a binned thumbnail, never the full image), or None
    with ``view_error`` saying why it could not be built.
    """

    path: str
    state: str
    frame_id: str | None = None
    summary: dict | None = None
    reason: str | None = None
    message: str | None = None
    timings_s: dict = field(default_factory=dict)
    view: Any = None
    view_error: str | None = None


def resolve_callable(ref: str | Callable) -> Callable:
    """Turn ``"package.module:function"`` into the function (or pass a callable through).

    Raises
    ------
    ValueError
        For a string not of the form ``module:attribute``, a module that
        cannot be imported, or a missing attribute; each says which.
    """
    if callable(ref):
        return ref
    module_name, sep, attr = str(ref).partition(":")
    if not sep or not module_name or not attr:
        raise ValueError(f"`analyze` must look like 'package.module:function', got {ref!r}")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise ValueError(f"`analyze` {ref!r}: cannot import module {module_name!r} ({exc})") \
            from exc
    try:
        return getattr(module, attr)
    except AttributeError:
        raise ValueError(f"`analyze` {ref!r}: module {module_name!r} has no attribute "
                         f"{attr!r}") from None


def init_worker(settings, analyze_ref, frames_dir: str, n_threads: int | None = None) -> None:
    """Pool initializer: remember settings, analysis function and output folder.

    `n_threads` caps the compute threads of this worker's analysis, so that the
    workers together do not run more threads than there are cores (numba starts
    one per core in every process; oversubscribed, two workers on two cores ran
    about 30 % slower in total).
    """
    import signal

    # Ctrl+C reaches the whole process group; the daemon decides what to do with
    # the frames in flight, so a worker must not die half-way through one.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    configure(settings, analyze_ref, frames_dir)
    if n_threads is not None:
        from livequant.pipeline import limit_threads

        limit_threads(n_threads)


def configure(settings, analyze_ref, frames_dir: str) -> None:
    """Remember settings, analysis function and output folder in this process.

    :func:`init_worker` calls it in each pool process; a Dask worker calls it
    through its setup plugin (:mod:`livequant.cluster`), which does not touch
    signals (a Dask worker's signal handling belongs to its nanny).
    """
    _state["settings"] = settings
    _state["analyze"] = resolve_callable(analyze_ref)
    _state["takes_scan_drift"] = _takes_scan_drift(_state["analyze"])
    _state["frames_dir"] = Path(frames_dir)
    _state["defaults"] = settings.frame_defaults.as_dict()


def _takes_scan_drift(fn) -> bool:
    """Whether the analysis function accepts ``scan_drift_nm_per_s`` (user ones may not)."""
    import inspect

    try:
        params = inspect.signature(fn).parameters
    except (TypeError, ValueError):
        return False
    return "scan_drift_nm_per_s" in params or any(
        p.kind is inspect.Parameter.VAR_KEYWORD for p in params.values())


def process_path(path: str, scan_drift_nm_per_s=None) -> Outcome:
    """Read, analyse and write the outputs of one frame file (runs in a worker).

    `scan_drift_nm_per_s` is the daemon's current drift velocity (stage nm/s),
    passed on to the analysis to undo the frame's in-scan distortion when the
    analysis function accepts it.

    A frame the readers reject (:class:`FrameError`) and an exception inside the
    analysis both come back as ``state="quarantined"`` with the reason: one bad
    frame must not stop the session.  Errors writing the outputs (disk full,
    permissions) are not the frame's fault and propagate, so the daemon keeps the
    frame queued and reports the failure.
    """
    t0 = time.perf_counter()
    frame = read_for_analysis(path)
    if isinstance(frame, Outcome):
        return frame
    t1 = time.perf_counter()
    result = analyze_read_frame(frame, path, scan_drift_nm_per_s)
    if isinstance(result, Outcome):
        return result
    return write_and_view(result, frame, path, read_s=t1 - t0,
                          analyze_s=time.perf_counter() - t1)


# The three steps of process_path, also run apart: with a Dask scheduler the daemon
# reads and writes on its own machine and only the analysis runs on a cluster worker.

def read_for_analysis(path: str):
    """The frame at `path` (file or ``FILE#KEY``), or a quarantined Outcome saying why not."""
    try:
        # Confined to the folder the frame was found in: a link out of it is refused.
        # `path` may name one image of a container (FILE#KEY, livequant.containers).
        return read_any(path, defaults=_state["defaults"], confine_to=split_ref(path)[0].parent)
    except FrameError as exc:
        return Outcome(path, "quarantined", reason=exc.reason, message=str(exc))


def analyze_read_frame(frame, path: str, scan_drift_nm_per_s=None):
    """The configured analysis of `frame`, or a quarantined Outcome (``analysis-error``)."""
    try:
        analyze = _state["analyze"]
        if scan_drift_nm_per_s is not None and _state["takes_scan_drift"]:
            return analyze(frame, _state["settings"], scan_drift_nm_per_s=scan_drift_nm_per_s)
        return analyze(frame, _state["settings"])
    except Exception as exc:  # noqa: BLE001 - becomes the frame's quarantine reason
        tb = traceback.format_exception_only(type(exc), exc)[-1].strip()
        return Outcome(path, "quarantined", frame_id=frame.frame_id, reason="analysis-error",
                       message=f"{path}: analysis failed: {tb}")


def write_and_view(result, frame, path: str, *, read_s: float, analyze_s: float) -> Outcome:
    """Write the frame's outputs (``summary.json`` last), build its view: a done Outcome.

    Errors writing (disk full, permissions) propagate: they are not the frame's fault.
    """
    from livequant.outputs import write_frame_outputs

    t2 = time.perf_counter()
    write_frame_outputs(result, _state["frames_dir"])
    t3 = time.perf_counter()
    view, view_error = _frame_view(result, frame)
    return Outcome(path, "done", frame_id=result.frame_id, summary=result.summary(),
                   timings_s={"read": read_s, "analyze": analyze_s, "write": t3 - t2,
                              "view": time.perf_counter() - t3},
                   view=view, view_error=view_error)


def _frame_view(result, frame):
    """The decision loop's view of a frame; a failure is reported, never fatal."""
    from livequant.rules.types import FrameView

    try:
        return FrameView.from_result(result, image=frame.pixels), None
    except Exception as exc:  # noqa: BLE001 - the frame is done; only the decisions miss it
        return None, f"{type(exc).__name__}: {exc}"
