"""Frame sources: a watched folder and a ZeroMQ ingest socket.

Both only *find* frames and put a :class:`Candidate` (a path that is complete
on disk) on one bounded queue; the daemon's intake thread records candidates
in the ledger, which is the real, unbounded and persistent queue.  No source
ever drops a frame: when the queue is full the folder source keeps the file
pending and the socket source stops receiving (ZeroMQ then holds the sender
back at its high-water mark), and in both cases the file is on disk, so a
restart finds it.

Completeness (DESIGN.md): a frame is complete when its sidecar ``NAME.json``
exists (writers write the image first and the sidecar last, each by rename),
or, with no sidecar, when the image has not changed for ``settle_time_s``.
A writer that does not rename creates the sidecar empty and then fills it:
an empty sidecar counts as not there yet (else the frame would be handed out
once with it empty and again with its content), and the settle clock then
runs from the newer of the image's and the sidecar's changes.
"""

from __future__ import annotations

import logging
import os
import queue
import re
import stat
import threading
import time
from dataclasses import dataclass
from pathlib import Path

from livequant.daemon._socket_thread import SocketThread
from livequant.daemon.security import apply_curve_server
from livequant.containers import FRAME_FILE_SUFFIXES
from livequant.frames import (MAX_FRAME_PIXELS, FrameError, resolve_meta,
                              sidecar_path, write_frame)

__all__ = ["Candidate", "FolderSource", "SocketSource", "image_files", "put_until",
           "incoming_candidates"]

log = logging.getLogger(__name__)

_SAFE_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,127}$")


@dataclass(frozen=True)
class Candidate:
    """A frame found complete on disk.

    ``complete_at`` is the unix time at which it was found complete (for a
    socket frame: when it was received); end-to-end latency counts from here.
    """

    path: str
    origin: str
    complete_at: float


def put_until(q: queue.Queue, item, stop: threading.Event, *, poll_s: float = 0.2) -> bool:
    """Put `item` on a bounded queue, waiting while it is full; False if `stop` was set first."""
    while not stop.is_set():
        try:
            q.put(item, timeout=poll_s)
            return True
        except queue.Full:
            continue
    return False


def image_files(folder: Path) -> list[Path]:
    """Frame image files directly in `folder` (hidden and temporary names are skipped)."""
    out = []
    try:
        entries = list(os.scandir(folder))
    except FileNotFoundError:
        return out
    for entry in entries:
        name = entry.name
        if name.startswith(".") or not name.lower().endswith(FRAME_FILE_SUFFIXES):
            continue
        if entry.is_file():
            out.append(Path(entry.path))
    return sorted(out)


_warned_not_regular: set[str] = set()


def _not_regular(path: Path, what: str) -> None:
    """Log once per path that a pipe, device or socket is named like a frame file."""
    if str(path) not in _warned_not_regular:
        _warned_not_regular.add(str(path))
        log.warning("%s: the %s is not a regular file (a pipe, device or socket); ignored: "
                    "reading it could block for ever", path, what)


def _signature(path: Path) -> tuple | None:
    """(size, mtime_ns) of the image and of its sidecar (None when absent); None if gone.

    Also None, with a warning, when the image or its sidecar is not a regular
    file: hashing or reading a pipe named ``x.tif`` would block ingest for ever.
    """
    try:
        st = path.stat()
    except (FileNotFoundError, NotADirectoryError):
        return None
    if not stat.S_ISREG(st.st_mode):
        _not_regular(path, "image")
        return None
    try:
        sc = sidecar_path(path).stat()
        side = (sc.st_size, sc.st_mtime_ns)
    except (FileNotFoundError, NotADirectoryError):
        side = None
    else:
        if not stat.S_ISREG(sc.st_mode):
            _not_regular(sidecar_path(path), "sidecar")
            return None
    return (st.st_size, st.st_mtime_ns, side)


class FolderSource:
    """Watch one folder (not recursive) for frame files.

    On start it lists the folder, so frames written while the daemon was down
    are caught up; afterwards watchdog events trigger a look at the file, and a
    re-listing every ``rescan_interval_s`` catches anything an event missed
    (overflowing OS queues, network shares) and advances settling files.

    Parameters
    ----------
    folder : Path
    out : queue.Queue
        Bounded queue of :class:`Candidate`.
    settle_time_s : float
        How long a sidecar-less image must stay unchanged to count as complete.
    rescan_interval_s : float
    force_polling : bool
        Use watchdog's polling observer (for network file systems).
    """

    def __init__(self, folder: Path, out: queue.Queue, *, settle_time_s: float,
                 rescan_interval_s: float, force_polling: bool = False):
        self.folder = Path(folder)
        self.out = out
        self.settle_time_s = float(settle_time_s)
        self.rescan_interval_s = float(rescan_interval_s)
        self.force_polling = force_polling
        self.origin = "folder"
        self._notices: queue.Queue = queue.Queue(maxsize=4096)
        self._stop = threading.Event()
        self._rescan = threading.Event()
        self._thread: threading.Thread | None = None
        self._observer = None
        # path -> (signature, monotonic time the signature was first seen)
        self._pending: dict[Path, tuple[tuple, float]] = {}
        # path -> signature last handed out (so a re-listing does not repeat it)
        self._emitted: dict[Path, tuple] = {}
        self.n_events = 0

    # ----------------------------------------------------------- lifecycle

    def start(self) -> None:
        self._rescan.set()  # the first pass of the loop is the catch-up listing
        self._thread = threading.Thread(target=self._run, name=f"source-{self.origin}",
                                        daemon=True)
        self._thread.start()
        self._start_observer()

    def _start_observer(self) -> None:
        from watchdog.events import FileSystemEventHandler

        source = self

        class _Handler(FileSystemEventHandler):
            # Tiny and never raises: watchdog's dispatcher does not catch handler
            # errors, and one stray exception would end folder ingestion.
            def on_any_event(self, event):
                try:
                    if event.is_directory:
                        return
                    source.n_events += 1
                    for p in (event.src_path, getattr(event, "dest_path", "")):
                        if p:
                            source._notices.put_nowait(os.fsdecode(p))
                except queue.Full:
                    source._rescan.set()  # a full listing will find the file instead
                except Exception:  # noqa: BLE001 - see above; logged, and a re-listing recovers
                    log.exception("watch handler failed on %r; re-listing the folder", event)
                    source._rescan.set()

        if self.force_polling:
            from watchdog.observers.polling import PollingObserver as Observer
        else:
            from watchdog.observers import Observer
        self._observer = Observer(timeout=0.5)
        self._observer.schedule(_Handler(), str(self.folder), recursive=False)
        self._observer.daemon = True
        self._observer.start()

    def stop(self, timeout: float = 5.0) -> None:
        self._stop.set()
        if self._observer is not None:
            self._observer.stop()
            self._observer.join(timeout)
        if self._thread is not None:
            self._thread.join(timeout)

    def is_alive(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    @property
    def n_pending(self) -> int:
        """Files seen but not yet complete (settling)."""
        return len(self._pending)

    # ----------------------------------------------------------- the loop

    def _run(self) -> None:
        next_listing = 0.0
        poll_s = max(0.05, min(self.rescan_interval_s, self.settle_time_s / 4))
        while not self._stop.is_set():
            try:
                note = self._notices.get(timeout=poll_s)
            except queue.Empty:
                note = None
            if note is not None:
                self._note(Path(note))
                while True:  # drain the burst
                    try:
                        self._note(Path(self._notices.get_nowait()))
                    except queue.Empty:
                        break
            now = time.monotonic()
            if self._rescan.is_set() or now >= next_listing:
                self._rescan.clear()
                for path in image_files(self.folder):
                    self._note(path)
                next_listing = now + self.rescan_interval_s
            self._advance()

    def _note(self, path: Path) -> None:
        """Consider a path named by an event or a listing."""
        name = path.name
        if name.startswith("."):
            return
        lower = name.lower()
        if lower.endswith(".json"):
            # A sidecar arrived: the frame it belongs to may now be complete.
            for suffix in FRAME_FILE_SUFFIXES:
                image = path.with_suffix(suffix)
                if image.exists():
                    self._note(image)
            return
        if not lower.endswith(FRAME_FILE_SUFFIXES) or path.parent != self.folder:
            return
        sig = _signature(path)
        if sig is None:
            self._pending.pop(path, None)
            return
        if self._emitted.get(path) == sig:
            return
        held = self._pending.get(path)
        if held is None or held[0] != sig:
            self._pending[path] = (sig, time.monotonic())

    def _advance(self) -> None:
        """Hand out pending files that have become complete."""
        if not self._pending:
            return
        now_mono, now_wall = time.monotonic(), time.time()
        for path, (sig, since) in list(self._pending.items()):
            current = _signature(path)
            if current is None:
                del self._pending[path]
                continue
            if current != sig:
                self._pending[path] = (current, now_mono)
                continue
            side = current[2]
            has_sidecar = side is not None and side[0] > 0   # empty: still being written
            # Unchanged for the settle time, by our own clock or by the files'
            # timestamps (a frame written long before the daemon started); a
            # sidecar that just appeared (empty) restarts the wait.
            newest_ns = max(current[1], side[1] if side is not None else 0)
            settled = max(now_mono - since, now_wall - newest_ns / 1e9) >= self.settle_time_s
            if not (has_sidecar or settled):
                continue
            if not put_until(self.out, Candidate(str(path), self.origin, now_wall), self._stop):
                return  # stopping: still pending; the next start lists it again
            del self._pending[path]
            self._emitted[path] = current


def incoming_candidates(incoming: Path) -> list[Candidate]:
    """Frames saved by the socket source, for the catch-up on start.

    Only the daemon writes ``incoming`` and always with a sidecar, so a frame
    without one was cut short by a crash between image and sidecar; it is
    complete (the image was renamed into place) and is taken as it is.
    """
    now = time.time()
    return [Candidate(str(p), "socket", now) for p in image_files(Path(incoming))]


class SocketSource(SocketThread):
    """Receive frames on a ZeroMQ PULL socket and save each into ``incoming``.

    A frame message (DESIGN.md) is decoded, its metadata resolved, and the
    frame written to ``incoming/FRAME_ID.tif`` with its sidecar before it is
    queued, so a received frame survives any crash.  Messages that are not
    valid frames are rejected with a logged reason and counted; the daemon
    keeps running.  A frame whose id is already in ``incoming`` is rejected
    too (reason ``duplicate-frame-id``): it would overwrite another frame.

    The socket is created, used and closed by this source's thread only.
    """

    thread_name = "source-socket"
    label = "ingest socket"

    def __init__(self, context, endpoint: str, incoming: Path, out: queue.Queue, *,
                 frame_defaults: dict, on_reject=None, bind_port: int | None = None,
                 max_message_bytes: int | None = None, curve=None):
        self.context = context
        self._init_thread(endpoint)
        # Largest message part accepted.  ZeroMQ checks the size announced in the
        # wire header and drops the sender's connection before allocating the
        # body, so an absurd message never reaches memory.  Default: the largest
        # frame the readers accept, as float64, plus room for the header.
        self.max_message_bytes = int(max_message_bytes or MAX_FRAME_PIXELS * 8 + (1 << 16))
        self.curve = curve
        self.incoming = Path(incoming)
        self.out = out
        self.frame_defaults = dict(frame_defaults)
        self.on_reject = on_reject
        self.n_received = 0
        self.n_rejected = 0

    def _make_socket(self, zmq):
        sock = self.context.socket(zmq.PULL)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.MAXMSGSIZE, self.max_message_bytes)
        apply_curve_server(sock, self.curve)
        # Keep the in-memory backlog to a few frames: past it ZeroMQ holds the
        # sender back instead of buffering gigabytes here.
        sock.setsockopt(zmq.RCVHWM, 4)
        return sock

    def _on_readable(self, sock) -> None:
        parts = sock.recv_multipart(copy=True)
        self.n_received += 1
        self._handle(parts)

    def _handle(self, parts: list[bytes]) -> None:
        from livequant.wire import decode_frame_message

        received_at = time.time()
        try:
            pixels, sidecar = decode_frame_message(parts)
            default_id = f"socket-{time.strftime('%Y%m%dT%H%M%S')}-{self.n_received:06d}"
            frame_id = sidecar.frame_id or default_id
            if not _SAFE_ID.match(frame_id):
                raise FrameError(f"frame message: `frame_id` {frame_id!r} cannot name a file; "
                                 "use letters, digits, '.', '_' and '-' (at most 128)",
                                 reason="bad-frame-id")
            target = self.incoming / f"{frame_id}.tif"
            if target.exists():
                raise FrameError(f"frame message: frame id {frame_id!r} was already received "
                                 f"({target}); give each frame its own id",
                                 reason="duplicate-frame-id")
            # Resolve now only to keep the sidecar complete; a missing pixel size
            # is left for the worker, which quarantines the saved frame with that reason.
            meta = sidecar.model_dump(exclude_none=True, mode="json")
            meta.update(sidecar.model_extra or {})
            meta["frame_id"] = frame_id
            try:
                resolve_meta(sidecar, default_id=frame_id, defaults=self.frame_defaults,
                             where=f"frame message {frame_id}")
            except FrameError as exc:
                log.warning("%s (saved; it will be quarantined)", exc)
            path = write_frame(self.incoming, frame_id, pixels, meta, fmt="tif")
        except FrameError as exc:
            self.n_rejected += 1
            log.warning("ingest socket: rejected a message: %s", exc)
            if self.on_reject is not None:
                self.on_reject(exc.reason, str(exc))
            return
        put_until(self.out, Candidate(str(path), "socket", received_at), self._stop)
