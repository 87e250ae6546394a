"""The lifecycle shared by every thread that owns one ZeroMQ socket."""

from __future__ import annotations

import threading

__all__ = ["SocketThread", "bind"]


def bind(sock, endpoint: str) -> str:
    """Bind `sock`; a port of 0 picks a free port.  Returns the endpoint actually bound."""
    import zmq

    base, _, port = endpoint.rpartition(":")
    try:
        if port == "0":
            sock.bind(f"{base}:*")
        else:
            sock.bind(endpoint)
    except zmq.ZMQError as exc:
        raise OSError(f"cannot bind {endpoint}: {exc.strerror}; is another daemon running, or "
                      "is the port in use? choose another in the [daemon] settings") from None
    return sock.getsockopt(zmq.LAST_ENDPOINT).decode()


class SocketThread:
    """A thread that creates, uses and closes one socket (sockets never cross threads).

    Subclasses set ``thread_name`` and ``label`` and either implement
    ``_make_socket(zmq)`` (a configured, unbound socket) and
    ``_on_readable(sock)`` (one incoming message) for the common receive loop,
    or override ``_run`` and use :meth:`_open` for the bind-and-report step.
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

    def _open(self, make_socket):
        """Create and bind the socket on this thread; report to :meth:`start`.

        Returns the bound socket, or None after recording the error (which
        :meth:`start` raises in the caller's thread).
        """
        import zmq

        sock = None
        try:
            sock = make_socket(zmq)
            self.bound_endpoint = bind(sock, self.endpoint)
        except BaseException as exc:  # reported to start(), which raises it
            if sock is not None:
                sock.close(linger=0)
            self._error = exc
            self._ready.set()
            return None
        self._ready.set()
        return sock

    def _run(self) -> None:
        """Receive until stopped: poll, hand each readable event to ``_on_readable``."""
        sock = self._open(self._make_socket)
        if sock is None:
            return
        try:
            while not self._stop.is_set():
                if sock.poll(200):
                    self._on_readable(sock)
        finally:
            sock.close(linger=0)

    def _make_socket(self, zmq):  # pragma: no cover - overridden by receivers
        raise NotImplementedError

    def _on_readable(self, sock) -> None:  # pragma: no cover - overridden by receivers
        raise NotImplementedError
