"""The lifecycle shared by every thread that owns one ZeroMQ socket."""

from __future__ import annotations

import threading

__all__ = ["SocketThread"]


class SocketThread:
    """A thread that creates, uses and closes one socket (sockets never cross threads).

    Subclasses set ``thread_name`` and ``label``, and implement ``_run``, which
    must set ``self.bound_endpoint`` (or ``self._error``) and then
    ``self._ready`` once the socket is bound, and return when ``self._stop``
    is set.
    """

    thread_name = "socket"
    label = "socket"

    def _init_thread(self, endpoint: str) -> None:
        self.endpoint = endpoint
        self._stop = threading.Event()
        self._ready = threading.Event()
        self._thread: threading.Thread | None = None
        self._error: BaseException | None = None
        self.bound_endpoint: str | None = None

    def start(self, timeout: float = 10.0) -> str:
        """Bind the socket (on the thread itself) and return the bound endpoint."""
        self._thread = threading.Thread(target=self._run, name=self.thread_name, daemon=True)
        self._thread.start()
        if not self._ready.wait(timeout):
            raise RuntimeError(f"{self.label} {self.endpoint}: not ready after {timeout} s")
        if self._error is not None:
            raise self._error
        return self.bound_endpoint

    def stop(self, timeout: float = 5.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)

    def is_alive(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def _run(self) -> None:  # pragma: no cover - always overridden
        raise NotImplementedError
