"""Board emulator: the board side of the serial frame protocol, with fault switches.

The emulator behaves like a small ramp board described by a generator profile
(``kind = "board"``): it answers HELLO with the profile's memory, formats, DDS
clock and sample rates, receives a table, checks its whole-table CRC, commits it
only when that CRC matches, and arms and disarms. It never commits a table whose
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
import zlib
from dataclasses import dataclass

from sweepgen.emulators._board_faults import ALWAYS, FAULT_KINDS, FAULTS, FaultPlan
from sweepgen.emulators._server import IDLE_TIMEOUT, LOOPBACK, MAX_CONNECTIONS, LoopbackServer, profile_port
from sweepgen.wire import frames as fr

__all__ = ["ALWAYS", "FAULTS", "FAULT_KINDS", "BoardEmulator", "BoardServer", "BoardThread", "CommittedTable",
           "FaultPlan", "Stream", "capabilities_for", "listen_port", "serve_forever"]

DEFAULT_GENERATOR = "demo-ramp-board"
DEFAULT_PORT = 7450        # sweepgen's own choice (as in demo-ramp-board's link)
DEFAULT_MAX_PAYLOAD = 4096 + fr.DATA_PREFIX
GAP_TIMEOUT = 0.1          # s: a partial frame is discarded after this much silence
MAX_TABLE_BYTES = 256 << 20   # bytes of table the emulator holds while receiving (its announced memory obeys it)
EVENT_LOG = 4096           # events remembered (the latest)


# --------------------------------------------------------------------------- the board


@dataclass(frozen=True)
class CommittedTable:
    """The table a board holds for playing."""

    format: fr.Format
    count: int
    crc: int
    rate: int
    data: bytes

    def codes(self):
        """The samples as a NumPy array (little-endian, the table's format)."""
        import numpy as np

        return np.frombuffer(self.data, dtype=self.format.dtype)


def capabilities_for(generator, *, max_payload: int = DEFAULT_MAX_PAYLOAD,
                     name: str = "sweepgen board emulator") -> fr.Capabilities:
    """What a board described by ``generator`` announces in its HELLO reply."""
    out = generator.output
    if out.kind == "frequency":
        bits = int(out.word_bits)
        formats = (fr.Format.UINT32,) if bits <= 32 else (fr.Format.UINT64,)
        word_bits, dac_bits, clock = bits, 0, int(round(out.clock))
    else:
        formats = (fr.Format.INT16, fr.Format.UINT16)
        word_bits, dac_bits, clock = 0, int(out.dac_bits or 16), 0
    sampling = generator.sampling
    rates = sampling.rates if sampling.rates else (sampling.rate_min, sampling.rate_max)
    # the memory announced is what the emulator will buffer: at most MAX_TABLE_BYTES, and a u32
    memory = min(int(sampling.memory), MAX_TABLE_BYTES // max(f.itemsize for f in formats), 0xFFFFFFFF)
    return fr.Capabilities(fr.PROTOCOL_VERSION, formats, word_bits, dac_bits, int(max_payload),
                           memory, clock, tuple(int(round(r)) for r in rates[:255]), name)


def _load_generator(generator):
    if generator is None or isinstance(generator, (str, os.PathLike)):
        from sweepgen.generator import load_generator

        return load_generator(DEFAULT_GENERATOR if generator is None else generator)
    return generator


class BoardEmulator:
    """The board side of the protocol, as a state machine plus stream servers.

    Parameters
    ----------
    generator : Generator, str or None
        The board's profile (a loaded generator, a built-in key or a path);
        default ``demo-ramp-board``.
    faults : dict, optional
        Fault switches (module docstring).
    max_payload : int
        Longest frame payload the board accepts (announced in HELLO).
    """

    def __init__(self, generator=None, *, faults: dict | None = None, max_payload: int = DEFAULT_MAX_PAYLOAD,
                 name: str = "sweepgen board emulator", gap_timeout: float = GAP_TIMEOUT):
        self.generator = _load_generator(generator)
        if not fr.MIN_PAYLOAD <= max_payload <= fr.MAX_PAYLOAD:
            raise ValueError(f"max_payload must lie in [{fr.MIN_PAYLOAD}, {fr.MAX_PAYLOAD}]")
        self.caps = capabilities_for(self.generator, max_payload=max_payload, name=name)
        self.faults = FaultPlan.parse(faults, default_stall=2.0 * self.generator.link.timeout)
        self.gap_timeout = gap_timeout
        self._stream = self.new_stream()     # the one stream of serve_fd and of feed() without a stream
        self.committed: CommittedTable | None = None
        self.armed = False
        self.events: list[tuple] = []        # (event, details) in order, for tests and logs
        self.commits = 0                     # tables committed so far
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
        self.session = False
        self.state = fr.State.IDLE
        self.pending: fr.Begin | None = None
        self.buffer = bytearray()
        self.received = 0
        self.armed = False
        self._last_key = None
        self._last_reply = None
        self.decoder.reset()

    def reset(self) -> None:
        """A board reset: session, unfinished upload and the armed state are lost."""
        self.resets += 1
        self._power_up()
        self.events.append(("reset", {}))

    def _range_limits(self):
        out = self.generator.output
        if out.kind != "frequency":
            return None
        scale = 2.0 ** out.word_bits / out.clock
        return int(round(out.range_min * scale)), int(round(out.range_max * scale))

    # -- bytes in, replies out ---------------------------------------------------------------
    def feed(self, data: bytes, now: float | None = None, stream: "Stream | None" = None) -> list:
        """Process bytes received on ``stream`` (default: the board's own); return
        ``[(delay_s, reply_bytes), ...]`` to send back on it in order."""
        now = time.monotonic() if now is None else now
        stream = stream or self._stream
        decoder = stream.decoder
        with self._lock:
            if stream.last_byte is not None and decoder.pending and now - stream.last_byte > self.gap_timeout:
                self.events.append(("gap", {"discarded": decoder.pending}))
                decoder.reset()
            stream.last_byte = now
            out = []
            for item in decoder.feed(data):
                out.extend(self._receive(item))
            if len(self.events) > EVENT_LOG:
                del self.events[:EVENT_LOG // 2]
            return out

    def _receive(self, item) -> list:
        if isinstance(item, fr.BadFrame):
            self.events.append(("frame_crc", {"type": item.type, "seq": item.seq}))
            return [(0.0, self._refuse(item.type, item.seq, fr.Reason.FRAME_CRC, 0, "frame CRC does not match"))]
        frame = item
        fault = self.faults.pick(frame.type)
        if fault == "reset" and not self.session:
            self.faults.refund(fault)         # a board that has just reset has nothing to lose
            fault = None
        delay = 0.0
        if fault:
            self.events.append(("fault", {"kind": fault, "type": frame.name, "seq": frame.seq}))
        if fault == "corrupt":
            raw = bytearray(fr.encode(frame.type, frame.seq, frame.payload))
            raw[fr.HEADER_SIZE + len(frame.payload) // 2 if frame.payload else len(raw) - 1] ^= 0x10
            try:
                frame = fr.decode(raw)          # the real check: a flipped bit fails the CRC
            except fr.FrameError:
                self.events.append(("frame_crc", {"type": frame.type, "seq": frame.seq}))
                return [(0.0, self._refuse(frame.type, frame.seq, fr.Reason.FRAME_CRC, 0,
                                           "frame CRC does not match"))]
        elif fault == "drop":
            return []
        elif fault == "refuse":
            return [(0.0, self._refuse(frame.type, frame.seq, fr.Reason.BUSY, 0, "busy, send again"))]
        elif fault == "stall":
            delay = self.faults.stall_time
        elif fault == "reset":
            self.reset()
            return []
        reply = self._execute(frame, corrupt_memory=(fault == "corrupt_memory"))
        if fault == "corrupt_reply":
            bad = bytearray(reply)
            bad[len(bad) // 2] ^= 0x01
            return [(delay, bytes(bad))]
        return [(delay, reply)]

    def _refuse(self, request_type, seq, reason, detail=0, text="") -> bytes:
        self.events.append(("refuse", {"type": fr.type_name(request_type), "seq": seq,
                                       "reason": fr.reason_name(reason), "detail": detail}))
        return fr.encode(fr.MsgType.REFUSE, seq, fr.Refusal(request_type, reason, detail, text).pack())

    def _ack(self, request_type, seq, data=b"") -> bytes:
        return fr.encode(fr.MsgType.ACK, seq, fr.ack_payload(request_type, data))

    def _execute(self, frame: fr.Frame, *, corrupt_memory: bool = False) -> bytes:
        key = (frame.seq, frame.type, zlib.crc32(frame.payload))
        if frame.type != fr.MsgType.HELLO and key == self._last_key and self._last_reply is not None:
            self.events.append(("repeat", {"type": frame.name, "seq": frame.seq}))
            return self._last_reply           # a retransmission: same reply, not executed again
        reply = self._dispatch(frame, corrupt_memory)
        self._last_key, self._last_reply = key, reply
        return reply

    def _dispatch(self, frame: fr.Frame, corrupt_memory: bool) -> bytes:
        t, seq, p = frame.type, frame.seq, frame.payload
        R = fr.Reason
        refuse = lambda reason, detail=0, text="": self._refuse(t, seq, reason, detail, text)  # noqa: E731
        if t not in fr.REQUESTS:
            return refuse(R.UNKNOWN_TYPE, 0, f"unknown message type 0x{t:02x}")
        empty = (fr.MsgType.END, fr.MsgType.COMMIT, fr.MsgType.STATUS, fr.MsgType.ARM, fr.MsgType.DISARM)
        if t in empty and p:
            return refuse(R.BAD_LENGTH, 0, f"{frame.name} takes no payload")
        if t == fr.MsgType.HELLO:
            if len(p) != 1:
                return refuse(R.BAD_LENGTH, 1, "hello takes 1 byte")
            if p[0] != fr.PROTOCOL_VERSION:
                return refuse(R.BAD_VERSION, fr.PROTOCOL_VERSION, f"this board speaks version {fr.PROTOCOL_VERSION}")
            self.session = True
            self.state, self.pending, self.buffer, self.received = fr.State.IDLE, None, bytearray(), 0
            self.events.append(("hello", {}))
            return self._ack(t, seq, self.caps.pack())
        if t == fr.MsgType.DISARM:
            self.armed = False
            self.events.append(("disarm", {}))
            return self._ack(t, seq)
        if t == fr.MsgType.STATUS:
            return self._ack(t, seq, fr.Status(self.state, self.armed, self._table_id(), self.received).pack())
        if not self.session:
            return refuse(R.NO_SESSION, 0, "no hello since power-up or reset")
        if t == fr.MsgType.BEGIN:
            return self._begin(frame, refuse)
        if t == fr.MsgType.DATA:
            return self._data(frame, refuse, corrupt_memory)
        if t == fr.MsgType.END:
            return self._end(frame, refuse)
        if t == fr.MsgType.COMMIT:
            return self._commit(frame, refuse)
        if t == fr.MsgType.ARM:
            if self.state != fr.State.IDLE:
                return refuse(R.BAD_STATE, self.state, "an upload is in progress")
            if self.committed is None:
                return refuse(R.NO_TABLE, 0, "no committed table")
            self.armed = True
            self.events.append(("arm", {"crc": self.committed.crc}))
            return self._ack(t, seq, fr.u32(self.committed.crc))
        raise AssertionError(t)    # every request type is handled above

    def _table_id(self) -> fr.TableId:
        c = self.committed
        return fr.TableId(0, 0, 0, 0) if c is None else fr.TableId(c.format, c.count, c.crc, c.rate)

    def _begin(self, frame, refuse) -> bytes:
        R = fr.Reason
        try:
            b = fr.Begin.unpack(frame.payload)
        except fr.FrameError:
            return refuse(R.BAD_LENGTH, 16, "begin takes 16 bytes")
        if self.armed:
            return refuse(R.ARMED, 0, "disarm first")
        mask = fr.formats_mask(self.caps.formats)
        if b.format not in [f.value for f in fr.Format] or not mask & fr.Format(b.format).bit:
            return refuse(R.BAD_FORMAT, mask, "format not supported")
        if not 1 <= b.count <= self.caps.memory:
            return refuse(R.BAD_COUNT, self.caps.memory, "count is zero or exceeds the memory")
        if b.rate not in self.caps.rates:
            return refuse(R.BAD_RATE, b.rate, "not a rate this board plays")
        self.state, self.pending, self.received = fr.State.RECEIVING, b, 0
        self.buffer = bytearray(b.nbytes)
        self.events.append(("begin", {"count": b.count, "crc": b.crc, "rate": b.rate, "format": b.format}))
        return self._ack(frame.type, frame.seq)

    def _data(self, frame, refuse, corrupt_memory) -> bytes:
        R = fr.Reason
        if self.state != fr.State.RECEIVING:
            return refuse(R.BAD_STATE, self.state, "no upload in progress")
        try:
            offset, chunk = fr.parse_data(frame.payload)
        except fr.FrameError:
            return refuse(R.BAD_LENGTH, 0, "data needs an offset and at least one byte")
        if offset > self.received:
            return refuse(R.BAD_OFFSET, self.received, "gap before this frame")
        end = offset + len(chunk)
        if end > len(self.buffer):
            return refuse(R.OVERFLOW, len(self.buffer), "beyond the announced table")
        self.buffer[offset:end] = chunk
        if corrupt_memory:
            self.buffer[offset + len(chunk) // 2] ^= 0x04
        self.received = max(self.received, end)
        return self._ack(frame.type, frame.seq, fr.u32(self.received))

    def _check_range(self) -> int | None:
        limits = self._range_limits()
        if limits is None:
            return None
        import numpy as np

        codes = np.frombuffer(bytes(self.buffer), dtype=fr.Format(self.pending.format).dtype)
        bad = np.flatnonzero((codes < limits[0]) | (codes > limits[1]))
        return int(bad[0]) if bad.size else None

    def _end(self, frame, refuse) -> bytes:
        R = fr.Reason
        if self.state != fr.State.RECEIVING:
            return refuse(R.BAD_STATE, self.state, "no upload in progress")
        if self.received < len(self.buffer):
            return refuse(R.INCOMPLETE, self.received, "table incomplete")
        crc = zlib.crc32(self.buffer) & 0xFFFFFFFF
        if crc != self.pending.crc:
            self.state, self.pending, self.buffer, self.received = fr.State.IDLE, None, bytearray(), 0
            self.events.append(("table_crc", {"computed": crc}))
            return refuse(R.TABLE_CRC, crc, "whole-table CRC does not match; table discarded")
        bad = self._check_range()
        if bad is not None:
            self.state, self.pending, self.buffer, self.received = fr.State.IDLE, None, bytearray(), 0
            return refuse(R.RANGE, bad, "sample outside the output range; table discarded")
        self.state = fr.State.VERIFIED
        self.events.append(("verified", {"crc": crc}))
        return self._ack(frame.type, frame.seq, fr.u32(crc))

    def _commit(self, frame, refuse) -> bytes:
        R = fr.Reason
        if self.armed:
            return refuse(R.ARMED, 0, "disarm first")
        if self.state != fr.State.VERIFIED:
            return refuse(R.BAD_STATE, self.state, "no verified table to commit")
        crc = zlib.crc32(self.buffer) & 0xFFFFFFFF      # checked again: memory may have changed
        b = self.pending
        self.state, self.pending, self.received = fr.State.IDLE, None, 0
        data, self.buffer = bytes(self.buffer), bytearray()
        if crc != b.crc:
            self.events.append(("table_crc", {"computed": crc}))
            return refuse(R.TABLE_CRC, crc, "whole-table CRC does not match; table discarded")
        self.committed = CommittedTable(fr.Format(b.format), b.count, crc, b.rate, data)
        self.commits += 1
        self.events.append(("commit", {"count": b.count, "crc": crc, "rate": b.rate}))
        return self._ack(frame.type, frame.seq, self._table_id().pack())

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
        self.board = board if board is not None else BoardEmulator(generator, faults=faults, **board_options)
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
                  stop: threading.Event | None = None, log=None) -> None:
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
        Receives a line per connection opened and closed.
    """
    generator = _load_generator(generator)
    port = listen_port(generator, port)
    server = BoardServer(generator, host=host, port=port, faults=faults, stop=stop, log=log)
    if ready is not None:
        ready(server.port)
    try:
        server.serve_forever()
    finally:
        server.stop()
