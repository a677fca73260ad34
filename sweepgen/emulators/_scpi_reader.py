"""Program messages off a socket: newline-terminated text with definite-length blocks inside.

A message ends at a newline outside quoted strings and outside blocks; an
IEEE 488.2 definite-length block (``#<n><count><bytes>``) may hold any bytes,
newlines included, so its payload is read by count. The reader hands the
instrument the message text with each block replaced by a marker
``\\x00B<i>\\x00`` and the payloads beside it.

What it buffers is bounded: text beyond ``max_line`` bytes is dropped (the
message is refused as too long); a block announcing more than ``max_block``
bytes is skipped up to the end of its line without being stored; and all
connections together hold at most the instrument's :class:`Budget` of block
bytes: a block that does not fit is read and thrown away, and refused.
"""

from __future__ import annotations

import re
import socket
import threading
from dataclasses import dataclass, field

from sweepgen.wire.block import BlockError, parse_block_header

_SPECIAL = re.compile(rb'[\n#"\']')


class Closed(Exception):
    """The connection ended (the client closed it, it broke, or the server is stopping)."""


class Budget:
    """Bytes of block payload all connections together may hold (shared, thread-safe)."""

    def __init__(self, total: int):
        self.total = int(total)
        self.held = 0
        self._lock = threading.Lock()

    def take(self, n: int) -> bool:
        with self._lock:
            if self.held + n > self.total:
                return False
            self.held += n
            return True

    def give(self, n: int) -> None:
        with self._lock:
            self.held -= n


@dataclass
class _Pending:
    """The message being read."""

    parts: list = field(default_factory=list)     # text pieces and block markers
    blocks: list = field(default_factory=list)    # block payloads
    text_bytes: int = 0                           # text already moved to parts
    overflow: bool = False                        # text beyond max_text was dropped
    start: int = 0                                # buffer index where the unmoved text starts
    scan: int = 0                                 # buffer index to search from
    quote: bytes | None = None                    # inside a quoted string


class MessageReader:
    """Reads program messages from ``sock`` for one connection.

    ``limits`` provides ``max_line`` (longest message text, blocks excluded),
    ``max_block`` (largest block), ``buffers`` (the shared :class:`Budget`) and
    ``faults.drop_after`` (close after this many bytes, a fault switch), read
    afresh for every message. ``stop.is_set()`` ends the reading. The block
    bytes of a message stay charged to the budget until :meth:`release`.
    """

    def __init__(self, sock, limits, stop):
        self.sock = sock
        self.limits = limits
        self.stop = stop
        self.buf = bytearray()
        self.received = 0
        self.held = 0

    def release(self) -> None:
        """Give the block bytes of the last message back to the shared budget."""
        if self.held:
            self.limits.buffers.give(self.held)
            self.held = 0

    # -- bytes in ---------------------------------------------------------------------------
    def _allowance(self, n: int) -> int:
        drop = self.limits.faults.drop_after
        if drop is None:
            return n
        left = drop - self.received
        if left <= 0:
            if hasattr(self.sock, "closing_reason"):
                self.sock.closing_reason = f"dropped after {drop} bytes (fault switch)"
            raise Closed()
        return min(n, left)

    def _recv(self) -> None:
        while True:
            if self.stop.is_set():
                raise Closed()
            try:
                data = self.sock.recv(self._allowance(1 << 20))
            except socket.timeout:
                continue
            except OSError:
                raise Closed() from None
            if not data:
                raise Closed()
            self.received += len(data)
            self.buf += data
            return

    def _recv_into(self, view: memoryview) -> None:
        got = 0
        while got < len(view):
            if self.stop.is_set():
                raise Closed()
            try:
                n = self.sock.recv_into(view[got:got + self._allowance(len(view) - got)])
            except socket.timeout:
                continue
            except OSError:
                raise Closed() from None
            if not n:
                raise Closed()
            self.received += n
            got += n

    # -- one message ------------------------------------------------------------------------
    def message(self):
        """``(text, blocks, error)`` of the next program message; raises :class:`Closed` at the end.

        ``error`` is ``(code, detail)`` for a message refused as a whole (too
        long, or a block larger than the memory); then ``text`` is None.
        """
        self.release()
        m = _Pending()
        while True:
            if m.quote is not None and not self._past_string(m):
                continue
            found = _SPECIAL.search(self.buf, m.scan)
            if found is None:
                self._more(m)
                continue
            pos = found.start()
            char = self.buf[pos:pos + 1]
            if char == b"\n":
                return self._finish(m, pos)
            if char in (b'"', b"'"):
                m.quote, m.scan = char, pos + 1
                continue
            error = self._block(m, pos)
            if error is not None:
                return None, [], error

    def _more(self, m: _Pending) -> None:
        """Nothing complete yet: drop text beyond the limit, then wait for more bytes."""
        m.scan = len(self.buf)
        if len(self.buf) - m.start + m.text_bytes > self.limits.max_line:
            m.overflow = True
            del self.buf[:]
            m.start = m.scan = 0
        self._recv()

    def _past_string(self, m: _Pending) -> bool:
        """Move past the quoted string being read; False when more bytes had to come first."""
        end = self.buf.find(m.quote, m.scan)
        nl = self.buf.find(b"\n", m.scan)
        if end < 0 and nl < 0:
            self._more(m)
            return False
        m.quote = None
        if nl >= 0 and (end < 0 or nl < end):
            m.scan = nl                       # unterminated string: the parser will say so
        else:
            m.scan = end + 1
        return True

    def _finish(self, m: _Pending, pos: int):
        limit = self.limits.max_line
        if pos - m.start + m.text_bytes > limit:
            m.overflow = True
        if not m.overflow:
            m.parts.append(self.buf[m.start:pos].decode("latin-1"))
        del self.buf[:pos + 1]
        if m.overflow:
            return None, [], (-223, f"message longer than {limit} bytes")
        return "".join(m.parts), m.blocks, None

    def _block(self, m: _Pending, pos: int):
        """At a '#': read a definite-length block into ``m``; an error tuple when it is refused."""
        while len(self.buf) < pos + 2:
            self._recv()
        if not 0x31 <= self.buf[pos + 1] <= 0x39:
            m.scan = pos + 1                  # '#H..', '#0...': left to the command parser
            return None
        header = self._block_header(pos)
        if header is None:
            m.scan = pos + 1
            return None
        data_start, nbytes = header
        if nbytes > self.limits.max_block:
            self._discard_line(pos)
            return (-223, f"block of {nbytes} bytes exceeds the memory")
        if not self.limits.buffers.take(nbytes):
            self._skip(data_start, nbytes)
            self._discard_line(0)
            budget = self.limits.buffers
            return (-223, f"block of {nbytes} bytes refused: other connections hold {budget.held} of the "
                          f"{budget.total} bytes this instrument buffers; send it again")
        self.held += nbytes
        text = self.buf[m.start:pos].decode("latin-1")
        m.text_bytes += len(text)
        m.parts += [text, f"\x00B{len(m.blocks)}\x00"]
        payload = bytearray(nbytes)
        have = min(nbytes, len(self.buf) - data_start)
        payload[:have] = self.buf[data_start:data_start + have]
        del self.buf[:data_start + have]
        if have < nbytes:
            self._recv_into(memoryview(payload)[have:])
        m.blocks.append(payload)
        m.start = m.scan = 0
        return None

    def _block_header(self, pos: int):
        """``(data_start, nbytes)`` of the block header at ``pos``, or None when it is not one."""
        while True:
            try:
                header = parse_block_header(self.buf, pos)
            except BlockError:
                return None
            if header is not None:
                return header
            self._recv()

    def _skip(self, data_start: int, nbytes: int) -> None:
        """Read and throw away a block's ``nbytes`` bytes that start at ``data_start``."""
        have = min(nbytes, len(self.buf) - data_start)
        del self.buf[:data_start + have]
        left = nbytes - have
        scratch = memoryview(bytearray(min(left, 1 << 20)))
        while left:
            piece = scratch[:min(left, len(scratch))]
            self._recv_into(piece)
            left -= len(piece)

    def _discard_line(self, pos: int) -> None:
        del self.buf[:pos]
        while True:
            nl = self.buf.find(b"\n")
            if nl >= 0:
                del self.buf[:nl + 1]
                return
            del self.buf[:]
            self._recv()
