"""The session folder: its layout, the start-up checks and the running-daemon file.

::

    SESSION/
      ledger.sqlite     every frame, flag, proposal and decision (see ledger.py)
      events.jsonl      every event published, one JSON object per line
      frames/FRAME_ID/  columns.csv, cells.csv, summary.json
      incoming/         frames received on the ingest socket, saved before analysis
      daemon.json       pid and socket endpoints of the daemon running on it
      .lock             held (flock) by that daemon; a second daemon refuses to start
"""

from __future__ import annotations

import errno
import json
import os
import time
from dataclasses import dataclass
from pathlib import Path


__all__ = ["SessionPaths", "SetupError", "check_watch_folder", "check_session_folder",
           "SessionLock", "read_daemon_file", "pid_alive"]


class SetupError(RuntimeError):
    """A problem found before the daemon starts (bad folder, port in use, ...); exit code 2."""


@dataclass(frozen=True)
class SessionPaths:
    root: Path

    @property
    def ledger(self) -> Path:
        return self.root / "ledger.sqlite"

    @property
    def events(self) -> Path:
        return self.root / "events.jsonl"

    @property
    def frames(self) -> Path:
        return self.root / "frames"

    @property
    def incoming(self) -> Path:
        return self.root / "incoming"

    @property
    def daemon_file(self) -> Path:
        return self.root / "daemon.json"

    @property
    def lock_file(self) -> Path:
        return self.root / ".lock"


def check_watch_folder(path: str | os.PathLike) -> Path:
    """The watched folder must exist, be a folder and be readable."""
    folder = Path(path).expanduser().resolve()
    if not folder.exists():
        raise SetupError(f"watch folder {folder} does not exist; create it or point --watch at "
                         "the folder the acquisition writes to")
    if not folder.is_dir():
        raise SetupError(f"watch folder {folder} is not a folder")
    if not os.access(folder, os.R_OK | os.X_OK):
        raise SetupError(f"watch folder {folder} is not readable by this user")
    return folder


def check_session_folder(path: str | os.PathLike) -> SessionPaths:
    """Create the session folder (and its sub-folders) if needed and prove it is writable."""
    root = Path(path).expanduser().resolve()
    if root.exists() and not root.is_dir():
        raise SetupError(f"session {root} exists and is not a folder; choose another --session")
    try:
        root.mkdir(parents=True, exist_ok=True)
        paths = SessionPaths(root)
        paths.frames.mkdir(exist_ok=True)
        paths.incoming.mkdir(exist_ok=True)
        probe = root / f".write-test-{os.getpid()}"
        probe.write_bytes(b"ok")
        probe.unlink()
    except OSError as exc:
        raise SetupError(f"session folder {root} is not writable ({exc.strerror}); choose "
                         "another --session or fix its permissions") from None
    return paths


class SessionLock:
    """An exclusive ``flock`` on ``SESSION/.lock`` for the life of the daemon.

    The kernel releases it when the process dies, however it dies, so a
    killed daemon never leaves a stale lock behind.
    """

    def __init__(self, paths: SessionPaths):
        self.paths = paths
        self._fd: int | None = None

    def acquire(self) -> None:
        import fcntl

        fd = os.open(self.paths.lock_file, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            os.close(fd)
            if exc.errno in (errno.EAGAIN, errno.EACCES):
                info = read_daemon_file(self.paths)
                who = f" (pid {info['pid']})" if info else ""
                raise SetupError(f"another daemon{who} is running on session "
                                 f"{self.paths.root}; stop it or choose another --session") \
                    from None
            raise
        self._fd = fd

    def release(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None


def write_daemon_file(paths: SessionPaths, info: dict) -> None:
    from livequant.frames import write_json_atomic  # numpy: not for the operator's commands

    write_json_atomic(paths.daemon_file, {"pid": os.getpid(), "written_at": time.time(), **info})


def read_daemon_file(paths: SessionPaths) -> dict | None:
    """The running daemon's file, or None when absent or unreadable."""
    try:
        data = json.loads(paths.daemon_file.read_text(encoding="utf-8"))
    except (FileNotFoundError, json.JSONDecodeError, UnicodeDecodeError):
        return None
    return data if isinstance(data, dict) else None


def pid_alive(pid: int) -> bool:
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True
