"""One VISA session to an instrument, with bounded replies: the I/O under the ``visa`` driver.

Every reply is read against one overall deadline and up to a stated length
(:mod:`sweepgen.wire.bounds`): an instrument that trickles a byte at a time,
stalls, or talks without end is cut off when its time or its byte allowance
is used up, whichever comes first. On a raw TCP socket of pyvisa's pure-Python
backend (``TCPIP::host::port::SOCKET``) the link reads and writes the socket
itself (pyvisa-py's read starts its timeout again with every byte that
arrives, and its write waits without a timeout); on every other session it
reads in pieces through the VISA library, each piece given only the time left.

A connection the instrument closes or resets is reported as lost at once, in
the step that noticed it, instead of after the full timeout.

After any exchange that failed half way (a timeout, an overlong or cut-off
reply, a lost connection) the link is no longer *in step*: a reply still on
its way would be taken for the answer to the next query. The driver then
opens a new connection before it asks anything it must trust.
"""

from __future__ import annotations

import select
import socket
import time

from sweepgen.errors import InputError, InstrumentError
from sweepgen.wire.bounds import TEXT_REPLY_FLOOR, clamp_deadline

#: bytes asked of the socket or the VISA library at a time
PIECE = 1 << 16
#: time and bytes spent discarding what an instrument sent unasked, before a query that must be trusted
CLEAR_TIME = 0.05
CLEAR_BYTES = 1 << 20


class LinkLost(InstrumentError):
    """The instrument closed or reset the connection (seen on the socket, not inferred from a timeout).

    ``why`` is what the socket said ("Connection reset by peer", "the instrument closed it").
    """

    def __init__(self, why: str, *, step: str, message: str | None = None):
        super().__init__(message or f"the connection was lost ({why})", step=step)
        self.why = why


def visa_errors():
    import pyvisa

    return (pyvisa.errors.VisaIOError, pyvisa.errors.InvalidSession, OSError, ValueError)


def reason(exc: BaseException) -> str:
    return getattr(exc, "strerror", None) or str(exc) or type(exc).__name__


def check_resource(resource, *, key: str, file=None) -> str:
    """Refuse a VISA resource string that cannot name an instrument (exit 2), before connecting."""
    from pyvisa import rname

    if not isinstance(resource, str) or not resource.strip():
        raise InputError("expected a VISA resource string such as TCPIP::192.168.1.20::5025::SOCKET, "
                         "got an empty one", key=key, file=file)
    try:
        parsed = rname.parse_resource_name(resource)
    except rname.InvalidResourceName as exc:
        raise InputError(f"not a VISA resource string: {resource!r} ({exc}); expected e.g. "
                         "TCPIP::192.168.1.20::5025::SOCKET", key=key, file=file) from None
    if parsed.resource_class == "SOCKET":
        port = str(getattr(parsed, "port", ""))
        if not port.isdigit() or not 1 <= int(port) <= 65535:
            raise InputError(f"port {port!r} in {resource!r} is not a TCP port (1 to 65535)", key=key, file=file)
    return resource


class VisaLink:
    """An open VISA resource: writes, bounded queries, block transfers.

    ``log(step, kind, command, nbytes, reply=None, duration=None)`` records each exchange.
    """

    def __init__(self, resource: str, backend: str, timeout: float, log):
        self.resource_name = resource
        self.backend = backend
        self.timeout = clamp_deadline(timeout)
        self.log = log
        self.rm = None
        self.res = None
        self.sent = 0
        self.in_step = False
        self._rx = bytearray()

    # -- connection ----------------------------------------------------------------------------
    def open(self) -> None:
        import pyvisa

        if self.rm is None:
            try:
                self.rm = pyvisa.ResourceManager(self.backend)
            except (ValueError, OSError, LookupError, pyvisa.errors.Error) as exc:
                raise InputError(f"no usable VISA backend {self.backend!r} ({exc})", key="--backend") from None
        self._rx.clear()
        try:
            self.res = self.rm.open_resource(self.resource_name, read_termination="\n", write_termination="\n",
                                             timeout=_ms(self.timeout))
            sock = self.raw_socket()
            if sock is not None:        # small commands and queries go out at once (no Nagle delay)
                sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        except (*visa_errors(), pyvisa.errors.Error, LookupError, OverflowError) as exc:
            raise InstrumentError(f"cannot open {self.resource_name} with VISA backend "
                                  f"{self.backend!r} ({exc})", step="open") from None
        self.in_step = True

    def close(self) -> None:
        self.in_step = False
        if self.res is not None:
            try:
                self.res.close()
            except Exception:      # closing a broken session must not hide the real error
                pass
            self.res = None

    def close_all(self) -> None:
        self.close()
        if self.rm is not None:
            try:
                self.rm.close()
            except Exception:
                pass
            self.rm = None

    def raw_socket(self):
        """The socket of a pyvisa-py raw-socket session, or None (then the VISA library does the I/O)."""
        sessions = getattr(self.res.visalib, "sessions", None) if self.res is not None else None
        if not isinstance(sessions, dict):
            return None
        sock = getattr(sessions.get(self.res.session), "interface", None)
        return sock if isinstance(sock, socket.socket) else None

    def _take_pending(self) -> None:
        """Move what pyvisa-py already received into this link's own buffer."""
        sessions = getattr(self.res.visalib, "sessions", None)
        session = sessions.get(self.res.session) if isinstance(sessions, dict) else None
        pending = getattr(session, "_pending_buffer", None)
        if pending:
            self._rx += pending
            pending.clear()

    # -- errors --------------------------------------------------------------------------------
    def failure(self, step, exc, timeout=None) -> InstrumentError:
        """The error to raise for an exception of the VISA library or the socket."""
        import pyvisa

        self.in_step = False
        if isinstance(exc, OSError):
            error = self._os_error(step, exc)
            if error is not None:
                return error
        lost = self.link_lost(step)        # a closed socket explains a timeout or an I/O error
        if lost is not None:
            return lost
        if isinstance(exc, pyvisa.errors.VisaIOError) and exc.error_code == pyvisa.constants.StatusCode.error_timeout:
            return InstrumentError(f"no answer within {timeout:.3g} s", step=step)
        return InstrumentError(f"the link failed ({exc})", step=step)

    def _os_error(self, step: str, exc: OSError) -> InstrumentError | None:
        """The error for a refused, reset or broken connection; None for other OS errors."""
        if isinstance(exc, ConnectionRefusedError):
            return InstrumentError(f"cannot connect to {self.resource_name} (connection refused: is the "
                                   f"instrument on and listening?)", step=step)
        if isinstance(exc, ConnectionError):        # reset, aborted, broken pipe
            return LinkLost(reason(exc), step=step)
        return None

    def link_lost(self, step: str) -> LinkLost | None:
        """A :class:`LinkLost` if the instrument has closed or reset the connection, else None.

        Looks at a raw socket without waiting and without consuming anything:
        readable with nothing to read is the end of the stream (the instrument
        closed it), an error is a reset. Other sessions: None.
        """
        sock = self.raw_socket()
        if sock is None:
            return None
        try:
            readable, _, _ = select.select([sock], [], [], 0)
            if not readable:
                return None
            data = sock.recv(1, socket.MSG_PEEK | socket.MSG_DONTWAIT)
        except (BlockingIOError, InterruptedError):
            return None
        except OSError as exc:
            return self._os_error(step, exc) or LinkLost(reason(exc), step=step)
        except ValueError as exc:            # the socket was closed on this side
            return LinkLost(reason(exc), step=step)
        if data:
            return None
        return LinkLost("the instrument closed it", step=step)

    def check_link(self, step: str) -> None:
        lost = self.link_lost(step)
        if lost is not None:
            self.in_step = False
            raise lost

    # -- bytes out -----------------------------------------------------------------------------
    def send(self, step: str, data, deadline: float) -> None:
        """Send ``data`` (bytes-like) by ``deadline``; raises ``socket.timeout`` on a raw socket that
        stops taking bytes."""
        sock = self.raw_socket()
        if sock is None:
            self.res.timeout = _ms(deadline - time.monotonic())
            self.res.write_raw(bytes(data) if isinstance(data, memoryview) else data)
            return
        old = sock.gettimeout()
        sock.settimeout(max(deadline - time.monotonic(), 1e-3))
        try:
            sock.sendall(data)
        finally:
            try:
                sock.settimeout(old)
            except OSError:
                pass

    def write(self, step: str, text: str) -> None:
        """One command (no reply expected)."""
        nbytes = self.write_query(step, text)
        self.log(step, "write", text, nbytes)

    # -- bytes in ------------------------------------------------------------------------------
    def _fill(self, step: str, deadline: float, timeout: float, want: int) -> None:
        """Receive at least one and at most ``want`` more bytes into the buffer, by ``deadline``."""
        sock = self.raw_socket()
        if sock is not None:
            self._take_pending()
        while True:
            left = deadline - time.monotonic()
            if left <= 0:
                self.in_step = False
                got = f" (got {len(self._rx)} bytes of it)" if self._rx else ""
                raise InstrumentError(f"no {'complete ' if self._rx else ''}answer within {timeout:.3g} s{got}",
                                      step=step, reply=_show(self._rx) if self._rx else None)
            data = self._recv_socket(sock, step, left, want) if sock is not None else self._recv_visa(step, left, want)
            if data:
                self._rx += data
                return

    def _recv_socket(self, sock, step: str, left: float, want: int) -> bytes:
        try:
            readable, _, _ = select.select([sock], [], [], left)
            if not readable:
                return b""
            data = sock.recv(max(1, min(want, PIECE)))
        except (BlockingIOError, InterruptedError):
            return b""
        except OSError as exc:
            self.in_step = False
            raise self._os_error(step, exc) or LinkLost(reason(exc), step=step) from None
        if not data:
            self.in_step = False
            raise LinkLost("the instrument closed it", step=step)
        return data

    def _recv_visa(self, step: str, left: float, want: int) -> bytes:
        import pyvisa

        self.res.timeout = _ms(left)
        try:
            data, _ = self.res.visalib.read(self.res.session, max(1, min(want, PIECE)))
        except pyvisa.errors.VisaIOError as exc:
            if exc.error_code == pyvisa.constants.StatusCode.error_timeout:
                return b""
            raise self.failure(step, exc) from None
        except visa_errors() as exc:
            raise self.failure(step, exc) from None
        return bytes(data)

    def read_line(self, step: str, deadline: float, timeout: float, limit: int = TEXT_REPLY_FLOOR) -> bytes:
        """A reply up to and including its newline: by ``deadline``, at most ``limit`` bytes."""
        while True:
            nl = self._rx.find(b"\n", 0, limit)
            if nl >= 0:
                line = bytes(self._rx[:nl + 1])
                del self._rx[:nl + 1]
                return line
            if len(self._rx) >= limit:
                self.in_step = False
                raise InstrumentError(f"the reply runs past {limit} bytes without its terminator; the rest "
                                      "was not read", step=step, reply=_show(self._rx))
            self._fill(step, deadline, timeout, limit - len(self._rx))

    def read_exact(self, step: str, n: int, deadline: float, timeout: float) -> bytes:
        while len(self._rx) < n:
            self._fill(step, deadline, timeout, n - len(self._rx))
        data = bytes(self._rx[:n])
        del self._rx[:n]
        return data

    def read_into_crc(self, step: str, n: int, deadline: float, timeout: float, crc_update) -> None:
        """Read exactly ``n`` bytes, handing each piece to ``crc_update`` (nothing is kept)."""
        left = n
        while left:
            if not self._rx:
                self._fill(step, deadline, timeout, left)
            piece = bytes(self._rx[:left])
            del self._rx[:len(piece)]
            crc_update(piece)
            left -= len(piece)

    def query(self, step: str, text: str, timeout: float | None = None, *, limit: int = TEXT_REPLY_FLOOR,
              deadline: float | None = None) -> str:
        """Send a query and return its reply (without the terminator), within ``timeout`` s and ``limit`` bytes."""
        timeout = self.timeout if timeout is None else clamp_deadline(timeout)
        t0 = time.monotonic()
        end = t0 + timeout if deadline is None else min(deadline, t0 + timeout)
        self.write_query(step, text)
        raw = self.read_line(step, end, timeout, limit)
        reply = raw.decode("ascii", "replace").strip()
        self.log(step, "query", text, len(text.encode()) + 1, reply=reply, duration=time.monotonic() - t0)
        return reply

    def write_query(self, step: str, text: str) -> int:
        """Send one line (a command, or a query whose reply the caller reads); returns its bytes."""
        self.check_link(step)
        raw = text.encode() + b"\n"
        try:
            self.send(step, raw, time.monotonic() + self.timeout)
        except socket.timeout:
            self.in_step = False
            raise InstrumentError(f"the instrument took no command bytes within {self.timeout:.3g} s",
                                  step=step) from None
        except visa_errors() as exc:
            raise self.failure(step, exc, self.timeout) from None
        self.sent += len(raw)
        return len(raw)

    def clear_input(self) -> bool:
        """Discard what has arrived unasked; True when the line then falls quiet.

        Used before a query whose answer must be trusted (the output-off
        confirmation), so that nothing received before it can pass for its answer.
        """
        self._rx.clear()
        sock = self.raw_socket()
        if sock is None:
            try:
                self.res.clear()
            except Exception:      # not every session can be cleared; the in-step rule still holds
                return self.in_step
            return self.in_step
        self._take_pending()
        self._rx.clear()
        dropped = 0
        end = time.monotonic() + CLEAR_TIME
        while dropped < CLEAR_BYTES and time.monotonic() < end:
            try:
                readable, _, _ = select.select([sock], [], [], max(end - time.monotonic(), 0))
                if not readable:
                    return True
                data = sock.recv(PIECE)
            except (BlockingIOError, InterruptedError):
                continue
            except OSError:
                return False
            if not data:
                return False
            dropped += len(data)
        return False


def _ms(seconds: float) -> int:
    """A VISA timeout in whole milliseconds (at least 1)."""
    return int(clamp_deadline(seconds) * 1000) + 1


def _show(data) -> str:
    """The start of a reply, for a message."""
    text = bytes(data[:60]).decode("ascii", "replace").strip()
    return text + ("..." if len(data) > 60 else "")
