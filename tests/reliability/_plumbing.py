"""Analysis wrappers for the reliability tests (importable by spawned worker processes).

They run the real pipeline; what they add is a fault of the environment, never of
the analysis: a disk that is full while a marker file exists.
"""

from __future__ import annotations

import errno
import os
import time

from livequant.pipeline import analyze_frame

_installed: dict[str, str] = {}


def _install_full_disk(marker: str) -> None:
    """From now on in this process, fsync fails with ENOSPC while `marker` exists.

    A full disk shows at fsync or write (the page cache accepts the bytes first),
    so that is where it is simulated; chmod would not stop root, who runs CI.
    """
    if _installed.get("marker") == marker:
        return
    if "real" not in _installed:
        _installed["real"] = os.fsync
    real_fsync = _installed["real"]

    def fsync(fd):
        if os.path.exists(marker):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_fsync(fd)

    os.fsync = fsync
    _installed["marker"] = marker


def analyze_on_a_full_disk(frame, settings):
    """The real analysis; the outputs' disk is full while the sidecar's
    ``disk_full_while`` file exists."""
    marker = frame.meta.extra.get("disk_full_while")
    if marker:
        _install_full_disk(str(marker))
    return analyze_frame(frame, settings)


def analyze_slowly(frame, settings):
    """The real analysis, then a pause of the sidecar's ``extra_s`` seconds (a slower
    machine or a bigger frame), so frames arrive faster than they are analysed."""
    result = analyze_frame(frame, settings)
    time.sleep(float(frame.meta.extra.get("extra_s", 0.0)))
    return result
