"""Board emulator: the board side of the serial frame protocol, with fault switches.

The emulator behaves like a small ramp board described by a generator profile
(``kind = "board"``), speaking protocol version 2 (or 1, as a board of that
version would; a board of version 2 also speaks 1 to a host that asks for it).
It answers HELLO with the profile's channels, memory, formats, output range, DDS
clock, sample rates and its trigger sources, receives a table for a channel,
checks its whole-table CRC, commits it only when that CRC matches, takes
trigger settings, and arms and disarms. The protocol state lives in
:mod:`sweepgen.emulators._board_protocol`. It never commits a table whose
CRC does not match (checked at END and again at COMMIT), so tests can compare
:attr:`BoardEmulator.committed` with the rendered table.

Three ways to run it:

* :class:`BoardEmulator` -- the state machine, usable on any byte stream:
  :meth:`BoardEmulator.serve_fd` (a file descriptor, e.g. the master side of a
  pseudo-terminal from ``os.openpty()``), :meth:`BoardEmulator.serve_socket`, or
  :meth:`BoardEmulator.serve_stream` with your own read/write functions;
* :class:`BoardServer` -- a loopback TCP server in a background thread, reachable
  as ``socket://127.0.0.1:PORT`` with pyserial;
* :func:`serve_forever` -- the same server in the calling thread (``sweepgen
  emulate --board``).

Fault switches (the ``faults`` dict; every count is "the first N times", or
``"always"`` for a persistent fault):

============== ======================================================================
key            effect on an eligible frame
============== ======================================================================
corrupt        one bit of the received frame is flipped (line noise): the frame fails
               its CRC and is refused with FRAME_CRC
drop           the frame is lost: no reply
refuse         the frame is refused with BUSY
stall          the board answers only after ``stall_time`` seconds
reset          the board resets on this frame: the frame is lost, the session and the
               unfinished upload are forgotten, the output is off (the committed table
               is kept, as in non-volatile memory); frames arriving before the next
               HELLO are not reset again (they are refused with NO_SESSION)
corrupt_reply  one bit of the reply is flipped on its way back
corrupt_memory a DATA frame's bytes are stored with one bit flipped (a memory fault):
               END then finds the whole-table CRC wrong and refuses with TABLE_CRC
============== ======================================================================

Further keys: ``on`` -- the message type(s) a fault applies to (``"data"`` by
default, a list of names, or ``"any"``); ``skip`` -- eligible frames that pass
unharmed before the faults begin (default 1, so that faults strike in the middle
of a transfer); ``stall_time`` -- seconds (default twice the profile's
``link.timeout``). When several faults are set, each eligible frame takes the
first one with a count left, in the order of the table above.
"""

from __future__ import annotations

import os
import select
import socket
import threading
import time
from dataclasses import dataclass

from sweepgen.emulators._board_faults import ALWAYS, FAULT_KINDS, FAULTS, FaultPlan
from sweepgen.emulators._board_protocol import (ALL_SOURCES, DEFAULT_MAX_PAYLOAD, MAX_TABLE_BYTES, BoardState,
                                                CommittedTable, capabilities_for)
from sweepgen.emulators._server import IDLE_TIMEOUT, LOOPBACK, MAX_CONNECTIONS, LoopbackServer, profile_port
from sweepgen.wire import frames as fr

__all__ = ["ALWAYS", "FAULTS", "FAULT_KINDS", "BoardEmulator", "BoardServer", "BoardThread", "CommittedTable",
           "FaultPlan", "Stream", "capabilities_for", "listen_port", "serve_forever"]

DEFAULT_GENERATOR = "demo-ramp-board"
DEFAULT_PORT = 7450        # sweepgen's own choice (as in demo-ramp-board's link)
GAP_TIMEOUT = 0.1          # s: a partial frame is discarded after this much silence
EVENT_LOG = 4096           # events remembered (the latest)


def _load_generator(generator):
    if generator is None or isinstance(generator, (str, os.PathLike)):
        from sweepgen.generator import load_generator

        return load_generator(DEFAULT_GENERATOR if generator is None else generator)
    return generator


class BoardEmulator(BoardState):
    """The board side of the protocol, as a state machine plus stream servers.

    Parameters
    ----------
    generator : Generator, str or None
        The board's profile (a loaded generator, a built-in key or a path);
        default ``demo-ramp-board``. Version 2 announces one channel per
        output of the profile (``channels``), each with its ``[output]``.
    faults : dict, optional
        Fault switches (module docstring).
    max_payload : int
        Longest frame payload the board accepts (announced in HELLO).
    version : int
        The highest protocol version the board speaks (1 or 2; a board of
        version 2 also speaks 1).
    sources : sequence of str
        The trigger sources it offers in version 2 (``free``, ``external``,
        ``software``); ``("free",)`` is a board that cannot be triggered.
    log : callable, optional
        Receives a line for each state change (upload begun, verified,
        committed, trigger set, armed, disarmed, reset).
    """

    def __init__(self, generator=None, *, faults: dict | None = None, max_payload: int = DEFAULT_MAX_PAYLOAD,
                 name: str = "sweepgen board emulator", gap_timeout: float = GAP_TIMEOUT,
                 version: int = fr.PROTOCOL_VERSION, sources=ALL_SOURCES, log=None):
        generator = _load_generator(generator)
        if not fr.MIN_PAYLOAD <= max_payload <= fr.MAX_PAYLOAD:
            raise ValueError(f"max_payload must lie in [{fr.MIN_PAYLOAD}, {fr.MAX_PAYLOAD}]")
        super().__init__(generator, max_payload=max_payload, name=name, version=version, sources=sources)
        self.log = log
        self.faults = FaultPlan.parse(faults, default_stall=2.0 * self.generator.link.timeout)
        self.gap_timeout = gap_timeout
        self._stream = self.new_stream()     # the one stream of serve_fd and of feed() without a stream
        self.resets = 0
        self._lock = threading.Lock()
        self._power_up()

    @property
    def decoder(self) -> fr.Decoder:
        """The frame decoder of the board's own stream (a pseudo-terminal, or feed() without a stream)."""
        return self._stream.decoder

    def new_stream(self) -> "Stream":
        """Receiving state for one more byte stream (each connection of :class:`BoardServer` has one)."""
        return Stream(fr.Decoder(self.caps.max_payload))

    # -- state -----------------------------------------------------------------------------
    def _power_up(self) -> None:
        self._end_session()
        self.decoder.reset()

    def reset(self) -> None:
        """A board reset: session, unfinished upload and the armed state are lost (tables and
        trigger settings are kept, as in non-volatile memory)."""
        self.resets += 1
        self._power_up()
        self._event("reset")

    # -- bytes in, replies out ---------------------------------------------------------------
    def feed(self, data: bytes, now: float | None = None, stream: "Stream | None" = None) -> list:
        """Process bytes received on ``stream`` (default: the board's own); return
        ``[(delay_s, reply_bytes), ...]`` to send back on it in order."""
        now = time.monotonic() if now is None else now
        stream = stream or self._stream
        decoder = stream.decoder
        with self._lock:
            if stream.last_byte is not None and decoder.pending and now - stream.last_byte > self.gap_timeout:
                self._event("gap", discarded=decoder.pending)
                decoder.reset()
            stream.last_byte = now
            out = []
            for item in decoder.feed(data):
                out.extend(self._receive(item))
            if len(self.events) > EVENT_LOG:
                del self.events[:EVENT_LOG // 2]
            return out

    def _damaged(self, msg_type: int, seq: int) -> list:
        """A frame that failed its CRC: FRAME_CRC when its header names a request, else no reply."""
        self._event("frame_crc", type=msg_type, seq=seq)
        if msg_type not in fr.REQUESTS:
            return []
        return [(0.0, self._refuse(msg_type, seq, fr.Reason.FRAME_CRC, 0, "frame CRC does not match"))]

    def _receive(self, item) -> list:
        if isinstance(item, fr.BadFrame):
            return self._damaged(item.type, item.seq)
        frame = item
        fault = self.faults.pick(frame.type)
        if fault == "reset" and not self.session:
            self.faults.refund(fault)         # a board that has just reset has nothing to lose
            fault = None
        delay = 0.0
        if fault:
            self._event("fault", kind=fault, type=frame.name, seq=frame.seq)
        if fault == "corrupt":
            raw = bytearray(fr.encode(frame.type, frame.seq, frame.payload))
            raw[fr.HEADER_SIZE + len(frame.payload) // 2 if frame.payload else len(raw) - 1] ^= 0x10
            try:
                frame = fr.decode(raw)          # the real check: a flipped bit fails the CRC
            except fr.FrameError:
                return self._damaged(frame.type, frame.seq)
        elif fault == "drop":
            return []
        elif fault == "refuse":
            return [(0.0, self._refuse(frame.type, frame.seq, fr.Reason.BUSY, 0, "busy, send again"))]
        elif fault == "stall":
            delay = self.faults.stall_time
        elif fault == "reset":
            self.reset()
            return []
        reply = self.execute(frame, corrupt_memory=(fault == "corrupt_memory"))
        if fault == "corrupt_reply":
            bad = bytearray(reply)
            bad[len(bad) // 2] ^= 0x01
            return [(delay, bytes(bad))]
        return [(delay, reply)]

    # -- serving byte streams -----------------------------------------------------------------
    def serve_stream(self, read_some, write_all, stop: threading.Event, stream: "Stream | None" = None) -> None:
        """Serve until ``stop`` is set or ``read_some`` reports the end of the stream.

        ``read_some(timeout)`` returns received bytes, ``None`` when nothing came
        within ``timeout`` seconds, or ``b""`` at the end of the stream;
        ``write_all(data)`` sends bytes. ``stream`` is the receiving state
        (:meth:`new_stream`; default the board's own).
        """
        while not stop.is_set():
            data = read_some(0.05)
            if data == b"":
                return
            if data is None:
                continue
            for delay, reply in self.feed(data, stream=stream):
                if delay and stop.wait(delay):
                    return
                write_all(reply)

    def serve_fd(self, fd: int, stop: threading.Event) -> None:
        """Serve on a file descriptor (e.g. the master side of ``os.openpty()``)."""

        def read_some(timeout):
            ready, _, _ = select.select([fd], [], [], timeout)
            if not ready:
                return None
            try:
                return os.read(fd, 65536)
            except OSError:          # a pseudo-terminal whose other side is closed
                time.sleep(timeout)
                return None

        def write_all(data):
            view = memoryview(data)
            while view:
                n = os.write(fd, view)
                view = view[n:]

        self.serve_stream(read_some, write_all, stop)

    def serve_socket(self, sock: socket.socket, stop: threading.Event) -> None:
        """Serve one connected socket (with a stream of its own) until the peer closes it or
        ``stop`` is set."""

        def read_some(timeout):
            ready, _, _ = select.select([sock], [], [], timeout)
            if not ready:
                return None
            try:
                return sock.recv(65536)
            except OSError:
                return b""

        def write_all(data):
            try:
                sock.sendall(data)
            except OSError:
                pass                # the host went away; the next read ends the connection

        self.serve_stream(read_some, write_all, stop, self.new_stream())

    def start_fd(self, fd: int) -> "BoardThread":
        """Serve ``fd`` in a daemon thread; stop it with the returned handle."""
        return BoardThread(self, target=lambda stop: self.serve_fd(fd, stop))


@dataclass
class Stream:
    """Receiving state of one byte stream: its frame decoder and when it last brought a byte."""

    decoder: fr.Decoder
    last_byte: float | None = None


class BoardThread:
    """A board served in a background thread: ``stop()`` ends it (also as a context manager)."""

    def __init__(self, board: BoardEmulator, target):
        self.board = board
        self._stop = threading.Event()
        self._thread = threading.Thread(target=target, args=(self._stop,), daemon=True,
                                        name="sweepgen-board")
        self._thread.start()

    def stop(self, timeout: float = 5.0) -> None:
        self._stop.set()
        self._thread.join(timeout)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.stop()
        return False


class BoardServer(LoopbackServer):
    """The board emulator on a TCP port.

    Several hosts may connect at once, each with its own frame decoder (bytes
    of different connections never mix into one frame), sharing the one board;
    see :class:`LoopbackServer` for the limits that keep one host from blocking
    or exhausting the others. The board's state (its committed table) persists
    across connections, as a powered board's does when a host closes and
    reopens the port.
    """

    name = "sweepgen-board-server"

    def __init__(self, generator=None, *, host: str = LOOPBACK, port: int = 0,
                 faults: dict | None = None, board: BoardEmulator | None = None,
                 stop: threading.Event | None = None, max_connections: int = MAX_CONNECTIONS,
                 idle_timeout: float | None = IDLE_TIMEOUT, log=None, **board_options):
        self.board = (board if board is not None
                      else BoardEmulator(generator, faults=faults, log=log, **board_options))
        super().__init__(host, port, stop=stop, max_connections=max_connections, idle_timeout=idle_timeout,
                         log=log)

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"socket://{host}:{self.port}"

    def serve_connection(self, conn) -> None:
        self.board.serve_socket(conn, conn)


def listen_port(generator, port: int | None = None) -> int:
    """``port``, else the port named in the profile's link, else :data:`DEFAULT_PORT`."""
    return profile_port(generator.link.address, DEFAULT_PORT) if port is None else port


def serve_forever(host: str, port: int | None, generator, faults: dict | None = None, ready=None, *,
                  stop: threading.Event | None = None, log=None, **board_options) -> None:
    """Serve the board emulator on ``host:port`` until interrupted (``sweepgen emulate --board``).

    Parameters
    ----------
    host, port : str, int or None
        Where to listen (``port = 0`` picks a free port; None: the port of the
        profile's link, else :data:`DEFAULT_PORT`).
    generator : Generator, str or None
        The board's profile (loaded, a key or a path; None: ``demo-ramp-board``).
    faults : dict, optional
        Fault switches (see the module docstring).
    ready : callable, optional
        Called once with the port number when the server listens.
    stop : threading.Event, optional
        Setting it ends the server (otherwise it runs until Ctrl-C).
    log : callable, optional
        Receives a line per connection opened and closed and per state change of the board.
    board_options
        ``version`` and ``sources`` of :class:`BoardEmulator`.
    """
    generator = _load_generator(generator)
    port = listen_port(generator, port)
    server = BoardServer(generator, host=host, port=port, faults=faults, stop=stop, log=log, **board_options)
    if ready is not None:
        ready(server.port)
    try:
        server.serve_forever()
    finally:
        server.stop()
