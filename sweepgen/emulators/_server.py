"""The loopback server both emulators share: listen, accept, serve each client in its own thread.

A subclass says how one connection is served (:meth:`LoopbackServer.serve_connection`);
the base binds the port when constructed (``port=0`` picks a free one), serves
in a background thread (:meth:`start`, also as a context manager) or in the
calling one (:meth:`serve_forever`), and stops on :meth:`stop`. It listens on
the loopback address unless another host is given.

No client can block the others or exhaust the server:

* each connection is served in its own thread, so a client that sends half a
  message and falls silent holds up nobody else;
* at most ``max_connections`` are served at once; when all are taken, one is
  closed to make room: one that never sent a byte, else the one silent the
  longest if silent for at least :data:`EVICT_AFTER` s; otherwise the newcomer
  is turned away;
* a connection silent for ``idle_timeout`` s is closed.

``log(line)`` (optional) receives one line when a connection opens and one
when it closes, saying why.
"""

from __future__ import annotations

import contextlib
import itertools
import re
import socket
import threading
import time

LOOPBACK = "127.0.0.1"
ACCEPT_POLL = 0.1          # s: how often the accept loop looks at the stop flag
MAX_CONNECTIONS = 8        # clients served at once
IDLE_TIMEOUT = 300.0       # s: a connection silent this long is closed
EVICT_AFTER = 1.0          # s: with every slot taken, a connection silent this long makes room for a newcomer


def profile_port(address: str, default: int) -> int:
    """The TCP port named in a profile's link address (``TCPIP::host::PORT::SOCKET`` or
    ``socket://host:PORT``), else ``default``."""
    m = re.search(r"::(\d+)::SOCKET$", address or "", re.I) or re.search(r":(\d+)$", address or "")
    return int(m.group(1)) if m else default


class Connection:
    """One client's socket, as a connection handler sees it.

    It offers the socket calls a handler needs (``recv``, ``recv_into``,
    ``sendall``, ``settimeout``, ``setsockopt``, ``fileno``), notes when the
    client was last heard, and :meth:`is_set` tells the handler to stop: the
    server is stopping, the connection was closed to make room, or the client
    has been silent for the idle timeout.
    """

    def __init__(self, sock: socket.socket, peer, number: int, server: "LoopbackServer"):
        self.sock = sock
        self.peer = peer
        self.number = number
        self.server = server
        self.opened = self.last_heard = time.monotonic()
        self.received = 0
        self.closing_reason = None

    # -- what handlers call ------------------------------------------------------------------
    def recv(self, n: int) -> bytes:
        data = self.sock.recv(n)
        self._heard(len(data))
        return data

    def recv_into(self, view) -> int:
        n = self.sock.recv_into(view)
        self._heard(n)
        return n

    def sendall(self, data) -> None:
        self.sock.sendall(data)

    def settimeout(self, value) -> None:
        self.sock.settimeout(value)

    def setsockopt(self, *args) -> None:
        self.sock.setsockopt(*args)

    def fileno(self) -> int:
        return self.sock.fileno()

    def is_set(self) -> bool:
        """True when the handler should stop serving this connection."""
        if self.closing_reason is not None or self.server.stopping.is_set():
            return True
        idle = self.server.idle_timeout
        if idle is not None and time.monotonic() - self.last_heard > idle:
            self.closing_reason = f"silent for {idle:g} s"
            return True
        return False

    def wait(self, seconds: float) -> bool:
        """Sleep up to ``seconds``; True (at once) if the handler should stop."""
        end = time.monotonic() + seconds
        while not self.is_set():
            left = end - time.monotonic()
            if left <= 0:
                return False
            time.sleep(min(left, 0.05))
        return True

    # -- bookkeeping ---------------------------------------------------------------------------
    def _heard(self, n: int) -> None:
        if n:
            self.received += n
            self.last_heard = time.monotonic()

    @property
    def silent_for(self) -> float:
        return time.monotonic() - self.last_heard

    def evict(self, reason: str) -> None:
        """Close from another thread: the handler's pending call fails and it stops."""
        self.closing_reason = reason
        with contextlib.suppress(OSError):
            self.sock.shutdown(socket.SHUT_RDWR)


class LoopbackServer:
    """A TCP server for an emulator; subclasses implement :meth:`serve_connection`."""

    #: thread name prefix, for debugging
    name = "sweepgen-emulator"

    def __init__(self, host: str = LOOPBACK, port: int = 0, *, stop: threading.Event | None = None,
                 backlog: int = 16, max_connections: int = MAX_CONNECTIONS,
                 idle_timeout: float | None = IDLE_TIMEOUT, log=None):
        self.listener = socket.create_server((host, port), backlog=backlog)
        self.listener.settimeout(ACCEPT_POLL)
        self.host, self.port = self.listener.getsockname()[:2]
        self._stop = stop if stop is not None else threading.Event()
        self._thread = None
        self.max_connections = max_connections
        self.idle_timeout = idle_timeout
        self.log = log
        self._lock = threading.Lock()
        self._live: dict[int, tuple[Connection, threading.Thread]] = {}
        self._numbers = itertools.count(1)
        #: connections accepted so far
        self.connections = 0

    @property
    def stopping(self) -> threading.Event:
        """Set when the server is asked to stop; connection handlers watch it."""
        return self._stop

    def serve_connection(self, conn: Connection) -> None:
        """Serve one accepted connection until it ends or ``conn.is_set()``."""
        raise NotImplementedError

    def _say(self, line: str) -> None:
        if self.log is not None:
            self.log(line)

    # -- accepting -----------------------------------------------------------------------------
    def serve_forever(self) -> None:
        """Accept and serve connections until :meth:`stop` (or Ctrl-C in the calling thread)."""
        try:
            while not self._stop.is_set():
                try:
                    sock, peer = self.listener.accept()
                except socket.timeout:
                    continue
                except OSError:
                    if self._stop.is_set():
                        return
                    raise
                self._admit(sock, peer)
        finally:
            with contextlib.suppress(OSError):
                self.listener.close()
            self._stop.set()
            self._join_all(2.0)

    def _admit(self, sock: socket.socket, peer) -> None:
        where = f"{peer[0]}:{peer[1]}" if isinstance(peer, tuple) else str(peer)
        with self._lock:
            self._live = {n: item for n, item in self._live.items() if item[1].is_alive()}
            if len(self._live) >= self.max_connections and not self._make_room():
                self._say(f"connection from {where} turned away: all {self.max_connections} connections "
                          "are busy")
                with contextlib.suppress(OSError):
                    sock.close()
                return
            number = next(self._numbers)
            conn = Connection(sock, peer, number, self)
            thread = threading.Thread(target=self._serve, args=(conn, where), daemon=True,
                                      name=f"{self.name}:{self.port}#{number}")
            self._live[number] = (conn, thread)
            self.connections += 1
        thread.start()

    def _make_room(self) -> bool:
        """Close a connection to make room; True if one was closed.

        The one silent the longest among those that never sent a byte goes at
        once (a connection opened and left idle holds nothing); otherwise the
        one silent the longest, if silent for :data:`EVICT_AFTER` s.
        """
        conns = [conn for conn, _ in self._live.values()]
        mute = [conn for conn in conns if conn.received == 0]
        conn = max(mute or conns, key=lambda c: c.silent_for)
        if not mute and conn.silent_for < EVICT_AFTER:
            return False
        what = "it never sent anything" if conn.received == 0 else f"silent for {conn.silent_for:.1f} s"
        conn.evict(f"closed to make room for a new client: {what}")
        self._live.pop(conn.number)
        return True

    def _serve(self, conn: Connection, where: str) -> None:
        self._say(f"connection {conn.number} from {where} opened")
        try:
            with conn.sock:
                conn.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                self.serve_connection(conn)
        except OSError:
            pass                              # the client went away mid-call
        finally:
            why = conn.closing_reason or ("server stopped" if self._stop.is_set() else "closed by the client")
            self._say(f"connection {conn.number} from {where} closed ({why}; "
                      f"{conn.received} bytes received in {time.monotonic() - conn.opened:.1f} s)")

    # -- threads -------------------------------------------------------------------------------
    def start(self):
        """Serve in a daemon thread; returns the server."""
        self._thread = threading.Thread(target=self.serve_forever, name=f"{self.name}:{self.port}", daemon=True)
        self._thread.start()
        return self

    def _join_all(self, timeout: float) -> None:
        with self._lock:
            threads = [thread for _, thread in self._live.values()]
        end = time.monotonic() + timeout
        for thread in threads:
            if thread.ident is not None and thread is not threading.current_thread():   # started, not this one
                thread.join(max(0.0, end - time.monotonic()))

    def stop(self, timeout: float = 5.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)
        with contextlib.suppress(OSError):
            self.listener.close()
        self._join_all(timeout)

    def __enter__(self):
        return self.start() if self._thread is None else self

    def __exit__(self, *exc):
        self.stop()
        return False
