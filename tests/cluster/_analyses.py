"""Analyses for the cluster tests, importable by the Dask workers (``module:function``)."""

from __future__ import annotations

import os
from pathlib import Path

from livequant.pipeline import analyze_frame


def dying_analyze(frame, settings):
    """The real analysis, except that the worker process dies the first time it analyses
    a frame whose sidecar names a `die_marker` file (created just before dying).

    A worker killed mid-task, at a known moment: ``os._exit`` ends the process at once,
    no clean-up, as an out-of-memory kill would.  A frame whose sidecar has
    ``fail_analysis`` makes the analysis raise (a bug in the analysis, not a crash).
    """
    extra = frame.meta.extra or {}
    if extra.get("fail_analysis"):
        raise RuntimeError("synthetic analysis failure for the test")
    if extra.get("always_die"):
        os._exit(17)  # a frame that kills every worker it is given
    marker = extra.get("die_marker")
    if marker and not Path(marker).exists():
        Path(marker).write_text(str(os.getpid()))
        os._exit(17)
    return analyze_frame(frame, settings)


def numba_threads() -> int:
    """Compute threads the analysis may use in this worker process."""
    import numba

    return numba.get_num_threads()
