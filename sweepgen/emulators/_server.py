"""The loopback server both emulators share: listen, accept, serve each connection.

A subclass says how one connection is served (:meth:`LoopbackServer.serve_connection`);
the base binds the port when constructed (``port=0`` picks a free one), serves
in a background thread (:meth:`start`, also as a context manager) or in the
calling one (:meth:`serve_forever`), and stops on :meth:`stop`. It listens on
the loopback address unless another host is given.
"""

from __future__ import annotations

import contextlib
import re
import socket
import threading

LOOPBACK = "127.0.0.1"
ACCEPT_POLL = 0.1          # s: how often the accept loop looks at the stop flag


def profile_port(address: str, default: int) -> int:
    """The TCP port named in a profile's link address (``TCPIP::host::PORT::SOCKET`` or
    ``socket://host:PORT``), else ``default``."""
    m = re.search(r"::(\d+)::SOCKET$", address or "", re.I) or re.search(r":(\d+)$", address or "")
    return int(m.group(1)) if m else default


class LoopbackServer:
    """A TCP server for an emulator; subclasses implement :meth:`serve_connection`."""

    #: thread name prefix, for debugging
    name = "sweepgen-emulator"

    def __init__(self, host: str = LOOPBACK, port: int = 0, *, stop: threading.Event | None = None,
                 backlog: int = 16):
        self.listener = socket.create_server((host, port), backlog=backlog)
        self.listener.settimeout(ACCEPT_POLL)
        self.host, self.port = self.listener.getsockname()[:2]
        self._stop = stop if stop is not None else threading.Event()
        self._thread = None
        #: connections accepted so far
        self.connections = 0

    @property
    def stopping(self) -> threading.Event:
        """Set when the server is asked to stop; connection handlers watch it."""
        return self._stop

    def serve_connection(self, conn: socket.socket) -> None:
        """Serve one accepted connection until it ends or :attr:`stopping` is set."""
        raise NotImplementedError

    def serve_forever(self) -> None:
        """Accept and serve connections until :meth:`stop` (or Ctrl-C in the calling thread)."""
        try:
            while not self._stop.is_set():
                try:
                    conn, _ = self.listener.accept()
                except socket.timeout:
                    continue
                except OSError:
                    if self._stop.is_set():
                        return
                    raise
                self.connections += 1
                with conn:
                    conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                    self.serve_connection(conn)
        finally:
            with contextlib.suppress(OSError):
                self.listener.close()

    def start(self):
        """Serve in a daemon thread; returns the server."""
        self._thread = threading.Thread(target=self.serve_forever, name=f"{self.name}:{self.port}", daemon=True)
        self._thread.start()
        return self

    def stop(self, timeout: float = 5.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)
        with contextlib.suppress(OSError):
            self.listener.close()

    def __enter__(self):
        return self.start() if self._thread is None else self

    def __exit__(self, *exc):
        self.stop()
        return False
