"""``visa`` driver: upload a table to an arbitrary-waveform generator with SCPI over VISA.

Any VISA resource string works (``TCPIP::host::port::SOCKET``, ``TCPIP::host::INSTR``,
``USB::...``, ``GPIB::...``); the pure-Python pyvisa backend (``@py``) is the
default, another is chosen with the ``backend`` option (``upload --backend``).
Every command comes from the ``[commands]`` templates of the generator profile
(:mod:`sweepgen.dialect`), so a new instrument needs a profile, never code.

Sequence (each step's name appears in errors and in the report):

``identify``    query the identity, compare with ``identity_pattern``
``output_off``  switch the output off before touching anything
``clear``       clear status and the error queue
``format``      data format and byte order of the block (optional template)
``upload``      the table as one IEEE 488.2 definite-length block built from NumPy
                bytes and streamed chunk by chunk (or as an ASCII list)
``wait``        completion query (``*OPC?``)
``verify``      read the trace back, or ask for its checksum, and compare the CRC-32
                of the bytes with what was sent (skipped when the profile has neither)
``function``, ``rate``, ``amplitude``, ``offset``, ``trigger``   configuration
``output_on``   only when ``Delivery.arm`` is set

After every command that is not a query the error queue is read until the
profile's ``no_error_pattern`` matches, so an error is charged to the step that
caused it. The link's base timeout (``link.timeout``) covers ordinary
exchanges; steps that move N bytes get ``timeout + 2 N / throughput``
(``link.throughput`` of the profile). Any failure sends ``output_off`` (on a
fresh connection if the old one broke) before the error is raised: the
instrument is left with its output off, and the message names the step and
what the instrument said.

A connection the instrument closes or resets is reported as lost at once, in
the step that noticed it, instead of after the full timeout: before every
exchange the driver looks at the socket, and while waiting for a reply it
watches the socket itself (pyvisa-py would keep polling a closed socket until
the timeout). A loss between the first byte of the block and the completion
reply is always charged to ``upload``: whether the sender notices it while
sending or only while waiting for ``*OPC?`` depends on how much the socket
buffers took, but either way the instrument never confirmed the table.

Speed: pyvisa-py writes a message to a raw socket in 4 KiB pieces with a
``select`` call per piece. For the bulk of a block on such a session the driver
hands the same bytes directly to that session's socket (``sendall``), which
roughly doubles the throughput on a fast link; every other backend and
resource type gets the ordinary ``write_raw``.
"""

from __future__ import annotations

import queue
import re
import select
import socket
import threading
import time
import zlib
from typing import ClassVar

import numpy as np

from sweepgen.dialect import split_data
from sweepgen.drivers.base import Delivery, Driver
from sweepgen.errors import CheckFailed, InputError, InstrumentError
from sweepgen.wire import block, scpi

DEFAULT_BACKEND = "@py"
#: error-queue entries read after one step before giving up (a queue holds 16 or so)
MAX_ERROR_READS = 64
#: table bytes per write when streaming a block
CHUNK_BYTES = 1 << 22
VERIFY_CHOICES = ("auto", "readback", "checksum", "none")
TRIGGER_CHOICES = ("EXT", "IMM", "BUS")


class _Plan:
    """Everything the upload will send, rendered and checked before any connection."""

    def __init__(self, table, generator, options: dict):
        if generator is None or getattr(generator, "commands", None) is None:
            raise InputError("the visa driver needs a generator profile of kind 'awg' with [commands]",
                             key="generator")
        self.table = table
        self.generator = generator
        self.commands = commands = generator.commands
        info = table.info
        self.info = info
        self.backend = str(options.get("backend") or DEFAULT_BACKEND)
        self.verify = str(options.get("verify") or "auto").lower()
        if self.verify not in VERIFY_CHOICES:
            raise InputError(f"expected one of {', '.join(VERIFY_CHOICES)}, got {self.verify!r}", key="verify")
        trigger = str(options.get("trigger_source") or "EXT").upper()
        if trigger not in TRIGGER_CHOICES:
            raise InputError(f"expected one of {', '.join(TRIGGER_CHOICES)}, got {trigger!r}",
                             key="trigger_source")
        self._check_table(info, generator)
        mode = commands.upload_mode
        try:
            fmt = scpi.data_format(info.dtype, mode)
        except ValueError as exc:
            raise InputError(str(exc), key="dtype") from None
        self.mode = mode
        self.byte_order = commands.byte_order
        self.count = info.count
        self.rate = float(info.sample_rate)
        values = {
            "channel": int(info.channel), "name": commands.trace_name, "count": int(info.count),
            "rate": self.rate, "frequency": self.rate / info.count, "period": info.count / self.rate,
            "format": fmt["format"], "type": fmt["type"], "bits": fmt["bits"],
            "border": scpi.border(commands.byte_order), "trigger_source": trigger,
            "amplitude": info.amplitude, "offset": info.offset,
            "high": None if info.amplitude is None else info.offset + info.amplitude / 2,
            "low": None if info.amplitude is None else info.offset - info.amplitude / 2,
        }
        self.values = values
        self.rendered = {name: commands.render(name, **values) for name in commands.templates}
        self.prefix, self.suffix = split_data(self.rendered["upload"])
        if mode == "block":
            self.nbytes = info.count * info.itemsize
            self.header = block.block_header(self.nbytes)
        else:
            self.nbytes = None          # known after the list is formatted
            self.header = b""
        if self.verify == "auto":
            self.method = ("checksum" if commands.has("checksum") else
                           "readback" if commands.has("readback") else "none")
        else:
            self.method = self.verify
            if self.method != "none" and not commands.has(self.method):
                raise InputError(f"verification by {self.method} needs a '{self.method}' template in the "
                                 f"generator profile", key="verify")
        link = generator.link
        self.timeout = float(link.timeout)
        self.throughput = float(link.throughput)

    @staticmethod
    def _check_table(info, generator) -> None:
        sm = generator.sampling
        problems = []
        if info.count > sm.memory:
            problems.append(f"{info.count} samples exceed the memory of {sm.memory}")
        if info.count < sm.min_length:
            problems.append(f"{info.count} samples, the generator needs at least {sm.min_length}")
        if info.count % sm.granularity:
            problems.append(f"{info.count} samples is not a multiple of the granularity {sm.granularity}")
        if not sm.allows(info.sample_rate):
            problems.append(f"{info.sample_rate:g} Sa/s is outside the generator's sample rates")
        if not 1 <= info.channel <= generator.channels:
            problems.append(f"channel {info.channel} does not exist (the generator has {generator.channels})")
        if problems:
            raise CheckFailed(f"the table does not fit generator '{generator.key}': " + "; ".join(problems))

    def data_timeout(self, nbytes: int) -> float:
        """Timeout of a step that moves ``nbytes`` bytes (s)."""
        return self.timeout + 2.0 * nbytes / self.throughput

    # -- the data ------------------------------------------------------------------------------
    def wire_chunks(self):
        """Bytes of the table as they go on the wire (binary blocks), chunk by chunk."""
        samples = max(1, CHUNK_BYTES // self.info.itemsize)
        for chunk in self.table.chunks(samples):
            yield scpi.to_wire(chunk, self.byte_order)

    def ascii_text(self) -> bytes:
        samples = max(1, CHUNK_BYTES // 8)
        parts = [scpi.ascii_list(chunk) for chunk in self.table.chunks(samples)]
        return ",".join(p for p in parts if p).encode("ascii")

    # -- the command log -----------------------------------------------------------------------
    def upload_text(self, nbytes: int) -> str:
        if self.mode == "block":
            return f"{self.prefix}{self.header.decode()}<{nbytes} bytes of data>{self.suffix}"
        return f"{self.prefix}<ASCII list of {self.count} codes, {nbytes} bytes>{self.suffix}"

    def upload_bytes(self, nbytes: int) -> int:
        return len(self.prefix.encode()) + len(self.header) + nbytes + len(self.suffix.encode()) + 1

    def sequence(self, arm: bool) -> list[tuple[str, str]]:
        """(step, template) in order; error-queue reads are added by the session."""
        c = self.commands
        steps = [("identify", "identify"), ("output_off", "output_off")]
        if c.has("reset"):
            steps.append(("reset", "reset"))
        # output off first, at once; after the error queue is cleared it is sent again and its
        # error check counts, so an instrument that refuses "output off" stops the upload here
        steps += [("clear", "clear"), ("output_off", "output_off")]
        if c.has("format"):
            steps.append(("format", "format"))
        steps += [("upload", "upload"), ("wait", "wait")]
        if self.method != "none":
            steps.append(("verify", self.method))
        for name in ("function", "rate", "amplitude", "offset", "trigger"):
            if c.has(name):
                steps.append((name, name))
        if arm:
            steps.append(("output_on", "output_on"))
        return steps

    def dry_log(self, arm: bool) -> list[dict]:
        """The exact command log, with byte counts, without connecting."""
        log = []
        nbytes = self.nbytes if self.mode == "block" else len(self.ascii_text())
        err = self.rendered["error_query"]
        checked = False
        for step, template in self.sequence(arm):
            if template == "upload":
                log.append({"step": step, "kind": "write", "command": self.upload_text(nbytes),
                            "bytes": self.upload_bytes(nbytes)})
                continue
            text = self.rendered[template]
            log.append({"step": step, "kind": "query" if "?" in text else "write", "command": text,
                        "bytes": len(text.encode()) + 1})
            if step == "clear":
                checked = True
            if checked and "?" not in text or step == "wait":
                log.append({"step": "upload" if step == "wait" else step, "kind": "query", "command": err,
                            "bytes": len(err.encode()) + 1,
                            "note": "repeated until the reply matches no_error_pattern"})
        return log


def _visa_errors():
    import pyvisa

    return (pyvisa.errors.VisaIOError, pyvisa.errors.InvalidSession, OSError, ValueError)


class _WrongInstrument(InstrumentError):
    """The instrument's identity does not match the profile: none of the profile's commands are sent."""


class _LinkLost(InstrumentError):
    """The instrument closed or reset the connection (seen on the socket, not inferred from a timeout).

    ``why`` is what the socket said ("Connection reset by peer", "the instrument closed it").
    """

    def __init__(self, why: str, *, step: str, message: str | None = None):
        super().__init__(message or f"the connection was lost ({why})", step=step)
        self.why = why


def _reason(exc: BaseException) -> str:
    return getattr(exc, "strerror", None) or str(exc) or type(exc).__name__


class _Session:
    """One open VISA resource and the running report."""

    def __init__(self, plan: _Plan, delivery: Delivery, report: dict, resource: str):
        self.plan = plan
        self.delivery = delivery
        self.report = report
        self.resource_name = resource
        self.rm = None
        self.res = None
        self.crc = None
        self.sent = 0

    # -- connection ----------------------------------------------------------------------------
    def open(self) -> None:
        import pyvisa

        if self.rm is None:
            try:
                self.rm = pyvisa.ResourceManager(self.plan.backend)
            except (ValueError, OSError, LookupError, pyvisa.errors.Error) as exc:
                raise InputError(f"no usable VISA backend {self.plan.backend!r} ({exc})", key="--backend") from None
        try:
            self.res = self.rm.open_resource(self.resource_name, read_termination="\n",
                                             write_termination="\n",
                                             timeout=int(self.plan.timeout * 1000) + 1)
            sock = self._raw_socket()
            if sock is not None:        # small commands and queries go out at once (no Nagle delay)
                sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        except (*_visa_errors(), pyvisa.errors.Error, LookupError) as exc:
            raise InstrumentError(f"cannot open {self.resource_name} with VISA backend "
                                  f"{self.plan.backend!r} ({exc})", step="open") from None

    def close(self) -> None:
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

    # -- one exchange --------------------------------------------------------------------------
    def _log(self, step, kind, command, nbytes, reply=None, duration=None):
        entry = {"step": step, "kind": kind, "command": command, "bytes": nbytes}
        if reply is not None:
            entry["reply"] = reply if len(reply) <= 200 else reply[:200] + "..."
        if duration is not None:
            entry["duration"] = duration
        self.report["log"].append(entry)

    def _fail(self, step, exc, timeout=None) -> InstrumentError:
        import pyvisa

        if isinstance(exc, OSError):
            error = self._os_error(step, exc)
            if error is not None:
                return error
        lost = self._link_lost(step)        # a closed socket explains a timeout or an I/O error
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
            return _LinkLost(_reason(exc), step=step)
        return None

    # -- is the connection still there? -------------------------------------------------------
    def _pending(self) -> bool:
        """True if pyvisa-py already holds received bytes that were not read yet."""
        sessions = getattr(self.res.visalib, "sessions", None) if self.res is not None else None
        session = sessions.get(self.res.session) if isinstance(sessions, dict) else None
        return bool(getattr(session, "_pending_buffer", None))

    def _link_lost(self, step: str) -> _LinkLost | None:
        """A :class:`_LinkLost` if the instrument has closed or reset the connection, else None.

        Looks at a pyvisa-py raw socket without waiting and without consuming
        anything: readable with nothing to read is the end of the stream (the
        instrument closed it), an error is a reset. Other sessions: None.
        """
        if self.res is None:
            return None
        sock = self._raw_socket()
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
            return self._os_error(step, exc) or _LinkLost(_reason(exc), step=step)
        except ValueError as exc:            # the socket was closed on this side
            return _LinkLost(_reason(exc), step=step)
        if data:
            return None
        return _LinkLost("the instrument closed it", step=step)

    def _check_link(self, step: str) -> None:
        lost = self._link_lost(step)
        if lost is not None:
            raise lost

    def _await_reply(self, step: str, deadline: float, timeout: float) -> None:
        """Wait until a reply starts to arrive, the connection ends, or ``deadline`` passes.

        pyvisa-py keeps polling a socket the instrument has closed until the
        whole timeout has passed; on a raw socket the driver waits itself, so a
        closed or reset connection is reported at once, as such.
        """
        sock = self._raw_socket()
        if sock is None or self._pending():
            return
        while True:
            left = deadline - time.monotonic()
            if left <= 0:
                raise InstrumentError(f"no answer within {timeout:.3g} s", step=step)
            try:
                readable, _, _ = select.select([sock], [], [], left)
            except InterruptedError:
                continue
            if readable:
                self._check_link(step)
                return

    def write(self, step: str, text: str) -> None:
        self.res.timeout = int(self.plan.timeout * 1000) + 1
        self._check_link(step)
        try:
            self.res.write(text)
        except _visa_errors() as exc:
            raise self._fail(step, exc, self.plan.timeout) from None
        self.sent += len(text.encode()) + 1
        self._log(step, "write", text, len(text.encode()) + 1)

    def query(self, step: str, text: str, timeout: float | None = None) -> str:
        timeout = self.plan.timeout if timeout is None else timeout
        t0 = time.monotonic()
        deadline = t0 + timeout
        self._check_link(step)
        try:
            self.res.timeout = int(timeout * 1000) + 1
            self.res.write(text)
            self._await_reply(step, deadline, timeout)
            self.res.timeout = int(max(deadline - time.monotonic(), 0.0) * 1000) + 1
            raw = self.res.read_raw()
        except _visa_errors() as exc:
            raise self._fail(step, exc, timeout) from None
        if not raw.endswith(b"\n"):            # cut off: the connection ended inside the reply
            self._check_link(step)
            raise InstrumentError("the reply ended without its terminator", step=step,
                                  reply=raw.decode("ascii", "replace").strip()[:120])
        reply = raw.decode("ascii", "replace").strip()
        self.sent += len(text.encode()) + 1
        self._log(step, "query", text, len(text.encode()) + 1, reply=reply, duration=time.monotonic() - t0)
        return reply

    def check_errors(self, step: str) -> None:
        """Read the error queue until it is empty; any entry fails ``step``."""
        commands = self.plan.commands
        found = []
        for _ in range(MAX_ERROR_READS):
            reply = self.query(step, self.plan.rendered["error_query"])
            if scpi.is_no_error(reply, commands.no_error_pattern):
                break
            found.append(reply)
        else:
            raise InstrumentError(f"the error queue did not empty after {MAX_ERROR_READS} reads", step=step,
                                  reply="; ".join(found[-3:]))
        if found:
            raise InstrumentError("the instrument reported an error", step=step, reply="; ".join(found))

    # -- the data ------------------------------------------------------------------------------
    def _raw_socket(self):
        """The socket of a pyvisa-py raw-socket session, or None (then write_raw is used)."""
        sessions = getattr(self.res.visalib, "sessions", None)
        if not isinstance(sessions, dict):
            return None
        sock = getattr(sessions.get(self.res.session), "interface", None)
        return sock if isinstance(sock, socket.socket) else None

    def upload(self) -> None:
        plan = self.plan
        step = "upload"
        t0 = time.monotonic()
        if plan.mode == "ascii":
            data = plan.ascii_text()
            chunks = [data]
            nbytes = len(data)
            head = plan.prefix.encode()
        else:
            nbytes = plan.nbytes
            # the block header, then the table's bytes; a chunk that would run past the announced
            # length is refused before it is sent (the instrument would read the excess as commands)
            chunks = block.block_parts(plan.wire_chunks(), nbytes)
            head = plan.prefix.encode() + next(chunks)
        total = len(head) + nbytes + len(plan.suffix.encode()) + 1
        deadline = t0 + plan.data_timeout(total)
        progress = self.delivery.progress
        sock = self._raw_socket()
        old_timeout = sock.gettimeout() if sock is not None else None
        done = 0
        crc = _Crc32() if plan.mode == "ascii" else None   # binary: computed when verifying
        try:
            if sock is not None:
                sock.settimeout(plan.data_timeout(CHUNK_BYTES))
            self.res.timeout = int(plan.data_timeout(CHUNK_BYTES) * 1000) + 1
            self._check_link(step)
            self._send(sock, head)
            for chunk in chunks:
                if crc is not None:
                    crc.update(chunk)
                self._send(sock, chunk)
                done += len(chunk)
                if progress is not None:
                    progress(done, nbytes)
                if time.monotonic() > deadline:
                    raise InstrumentError(f"sent {done} of {nbytes} bytes in {plan.data_timeout(total):.3g} s "
                                          f"(the profile expects {plan.throughput:.3g} B/s)", step=step)
            self._send(sock, plan.suffix.encode() + b"\n")
        except socket.timeout:
            raise InstrumentError(f"the instrument stopped taking data after {done} of {nbytes} bytes",
                                  step=step) from None
        except block.BlockError as exc:
            raise InstrumentError(f"the table does not match its block header: {exc}", step=step) from None
        except _visa_errors() as exc:
            error = self._fail(step, exc, plan.data_timeout(CHUNK_BYTES))
            if isinstance(error, _LinkLost):
                error = _upload_lost("while the block was being sent", error.why)
            raise error from None
        finally:
            crc_value = crc.result() if crc is not None else None
            if sock is not None:
                try:
                    sock.settimeout(old_timeout)
                except OSError:
                    pass
        self.crc = crc_value
        self.sent += total
        self.report["block_bytes"] = nbytes
        duration = time.monotonic() - t0
        self._log(step, "write", plan.upload_text(nbytes), total, duration=duration)
        self.report["upload"] = {"bytes": total, "data_bytes": nbytes, "duration": duration,
                                 "throughput": total / duration if duration > 0 else None,
                                 "fast_path": sock is not None}

    def sent_crc(self) -> int:
        """CRC-32 of the data bytes sent (binary: the table's bytes in the wire byte order)."""
        if self.crc is None:
            plan = self.plan
            if np.dtype(plan.info.dtype) == scpi.wire_dtype(plan.info.dtype, plan.byte_order):
                self.crc = plan.table.crc32          # cached on the table: shared with other users
            else:
                value = 0
                for chunk in plan.wire_chunks():
                    value = zlib.crc32(chunk, value)
                self.crc = value & 0xFFFFFFFF
        return self.crc

    def _send(self, sock, data) -> None:
        if sock is not None:
            sock.sendall(data)
        else:
            self.res.write_raw(bytes(data) if isinstance(data, memoryview) else data)

    def verify(self, template: str) -> dict:
        plan = self.plan
        step = "verify"
        nbytes = self.report.get("block_bytes", 0)
        timeout = plan.data_timeout(nbytes)
        command = plan.rendered[template]
        if template == "checksum":
            reply = self.query(step, command, timeout)
            value = _parse_checksum(reply)
            if value is None:
                raise InstrumentError("the checksum reply is not a number", step=step, reply=reply)
            expected = self.sent_crc()
            result = {"method": "checksum", "expected_crc32": expected, "instrument_crc32": value,
                      "ok": value == expected}
        else:
            got, count = self._readback(command, timeout)
            expected = self.sent_crc()
            result = {"method": "readback", "expected_crc32": expected, "instrument_crc32": got,
                      "bytes": count, "ok": got == expected and count == nbytes}
        if not result["ok"]:
            raise InstrumentError(
                f"the stored trace differs from what was sent ({result['method']}: CRC-32 "
                f"0x{result['instrument_crc32']:08x}, sent 0x{result['expected_crc32']:08x})", step=step)
        return result

    def _readback(self, command: str, timeout: float) -> tuple[int, int]:
        """CRC-32 and length of the data the instrument sends back for ``command``."""
        step = "verify"
        self.res.timeout = int(timeout * 1000) + 1
        t0 = time.monotonic()
        try:
            self._check_link(step)
            self.res.write(command)
            self._await_reply(step, t0 + timeout, timeout)
            if self.plan.mode == "ascii":
                text = self.res.read().strip().encode("ascii", "replace")
                crc, count = zlib.crc32(text) & 0xFFFFFFFF, len(text)
            else:
                # binary data may hold newlines: read it by count, not up to a terminator
                self.res.read_termination = None
                head = self.res.read_bytes(2)
                if head[:1] != b"#" or not head[1:2].isdigit() or head[1:2] == b"0":
                    self.res.read_termination = "\n"     # a text reply: read the rest up to its terminator
                    rest = self.res.read() if not head.endswith(b"\n") else ""
                    raise InstrumentError("the readback is not a definite-length block", step=step,
                                          reply=(head.decode("latin-1") + rest).strip()[:120])
                digits = self.res.read_bytes(int(head[1:2]))
                if not digits.isdigit():
                    raise InstrumentError("malformed readback block header", step=step,
                                          reply=(head + digits).decode("latin-1"))
                count = int(digits)
                crc = 0
                left = count
                while left:
                    piece = self.res.read_bytes(min(left, CHUNK_BYTES), chunk_size=CHUNK_BYTES)
                    crc = zlib.crc32(piece, crc)
                    left -= len(piece)
                crc &= 0xFFFFFFFF
                end = self.res.read_bytes(1)
                self.res.read_termination = "\n"
                if end != b"\n":
                    self.res.read()         # resynchronise on the terminator
        except _visa_errors() as exc:
            raise self._fail(step, exc, timeout) from None
        finally:
            self.res.read_termination = "\n"
        self.sent += len(command.encode()) + 1
        self._log(step, "query", command, len(command.encode()) + 1,
                  reply=f"<{count} bytes, CRC-32 0x{crc:08x}>", duration=time.monotonic() - t0)
        return crc, count

    # -- the sequence --------------------------------------------------------------------------
    def run(self) -> None:
        plan = self.plan
        rendered = plan.rendered
        arm = self.delivery.arm
        checked = False
        for step, template in plan.sequence(arm):
            t0 = time.monotonic()
            detail = {}
            if step == "identify":
                reply = self.query(step, rendered["identify"])
                self.report["identity"] = reply
                if not re.search(plan.commands.identity_pattern, reply):
                    raise _WrongInstrument(f"this is not the instrument the profile describes (identity "
                                          f"pattern {plan.commands.identity_pattern!r})", step=step, reply=reply)
                detail["identity"] = reply
            elif step == "upload":
                self.upload()
                detail["bytes"] = self.report["upload"]["bytes"]
            elif step == "wait":
                try:
                    reply = self.query(step, rendered["wait"],
                                       plan.data_timeout(self.report.get("block_bytes", 0)))
                except _LinkLost as exc:
                    # the table was handed to the link, but the instrument hung up before confirming it:
                    # how far it got depends on socket buffers, so the loss is charged to the upload
                    raise _upload_lost("after the whole block was sent", exc.why) from None
                detail["reply"] = reply
                self.check_errors("upload")
            elif step == "verify":
                result = self.verify(template)
                self.report["verification"] = result
                detail.update(result)
            else:
                text = rendered[template]
                if "?" in text:
                    detail["reply"] = self.query(step, text)
                else:
                    self.write(step, text)
                if step == "clear":
                    checked = True
                if checked:
                    self.check_errors(step)
                if step == "output_on":
                    self.report["armed"] = True
            self.report["steps"].append({"step": step, "ok": True, "duration": time.monotonic() - t0, **detail})

    def safe_off(self) -> str:
        """Switch the output off after a failure; returns what happened (for the message)."""
        plan = self.plan
        off = plan.rendered["output_off"]
        confirm = plan.rendered["wait"]
        for attempt in ("the same connection", "a new connection"):
            try:
                if attempt == "a new connection" or self.res is None:
                    self.close()
                    self.open()
                self.write("output_off", off)
                self.query("output_off", confirm)
                self.report["armed"] = False
                return f"output switched off (confirmed on {attempt})"
            except InstrumentError:
                continue
        return "could not confirm that the output is off: check the instrument before touching the setup"


class _Crc32:
    """CRC-32 (``zlib.crc32``) of a stream of chunks, computed in a helper thread.

    ``zlib.crc32`` and ``socket.sendall`` both release the GIL on large
    buffers, so checksumming a chunk overlaps with sending it.
    """

    def __init__(self):
        self._queue = queue.Queue(maxsize=8)
        self._value = 0
        self._thread = threading.Thread(target=self._run, name="sweepgen-crc32", daemon=True)
        self._thread.start()

    def _run(self):
        value = 0
        while True:
            chunk = self._queue.get()
            if chunk is None:
                break
            value = zlib.crc32(chunk, value)
        self._value = value & 0xFFFFFFFF

    def update(self, chunk) -> None:
        self._queue.put(chunk)

    def result(self) -> int:
        if self._thread.is_alive():
            self._queue.put(None)
            self._thread.join()
        return self._value


def _parse_checksum(reply: str) -> int | None:
    text = reply.strip().strip('"').strip()
    try:
        if text[:2].lower() == "0x":
            return int(text[2:], 16)
        if text[:2].upper() == "#H":
            return int(text[2:], 16)
        return int(text)
    except ValueError:
        return None


class VisaDriver(Driver):
    """Upload to a SCPI arbitrary-waveform generator over any VISA resource."""

    name: ClassVar[str] = "visa"
    kind: ClassVar[str] = "instrument"
    description: ClassVar[str] = ("SCPI arbitrary-waveform generator over VISA (pyvisa, pure-Python backend by "
                                  "default); commands from the generator profile; verified upload")
    options: ClassVar[dict] = {
        "backend": f"pyvisa backend (default {DEFAULT_BACKEND!r}: pure Python; '@ivi' for an installed VISA)",
        "verify": "auto (checksum, else readback, where the profile can), readback, checksum or none",
        "trigger_source": "EXT (start on the source trigger; default) or IMM (free running) or BUS",
    }

    def deliver(self, table, delivery: Delivery) -> dict:
        options = dict(delivery.options)
        unknown = sorted(set(options) - set(self.options))
        if unknown:
            raise InputError(f"driver 'visa' has no option {unknown[0]!r} (options: {', '.join(self.options)})",
                             key="--option")
        plan = _Plan(table, delivery.generator, options)
        resource = delivery.destination or delivery.generator.link.address
        report = {
            "driver": self.name, "destination": resource, "backend": plan.backend,
            "dry_run": bool(delivery.dry_run), "armed": False,
            "table": {"count": plan.count, "sample_rate": plan.rate, "dtype": table.info.dtype,
                      "channel": table.info.channel, "upload_mode": plan.mode, "byte_order": plan.byte_order,
                      "amplitude": table.info.amplitude, "offset": table.info.offset},
            "bytes": 0, "steps": [], "log": [], "verification": None,
        }
        if delivery.dry_run:
            report["log"] = plan.dry_log(delivery.arm)
            report["bytes"] = sum(e["bytes"] for e in report["log"])
            report["verification"] = {"method": plan.method, "ok": None}
            return report
        t0 = time.monotonic()
        session = _Session(plan, delivery, report, resource)
        try:
            session.open()
            session.run()
        except InstrumentError as exc:
            if exc.step == "open":
                outcome = "nothing was sent"
            elif isinstance(exc, _WrongInstrument):
                # commands written for another instrument mean nothing certain here: send none
                outcome = ("nothing else was sent to it (not even output off, whose meaning for this "
                           "instrument is unknown): check its output by hand")
            else:
                outcome = session.safe_off()
            error = InstrumentError(_message(exc), step=exc.step, reply=exc.reply)
            error.args = (f"{error}; {outcome}",)
            raise error from None
        except BaseException:
            if session.res is not None:          # interrupted (Ctrl-C) or an unexpected error mid-way
                session.safe_off()
            raise
        finally:
            session.close_all()
        if plan.method == "none":
            report["verification"] = {"method": "none", "ok": None,
                                      "note": "the profile has neither a readback nor a checksum template"}
        report["bytes"] = session.sent
        report["duration"] = time.monotonic() - t0
        return report


def _upload_lost(when: str, why: str) -> _LinkLost:
    """The error of a connection lost between the first byte of the block and the completion reply."""
    return _LinkLost(why, step="upload", message=f"the connection was lost {when}, before the instrument "
                                                  f"confirmed the upload ({why})")


def _message(exc: InstrumentError) -> str:
    """The message of ``exc`` without its step prefix and instrument reply (they are re-added)."""
    text = str(exc)
    if exc.step and text.startswith(f"step '{exc.step}': "):
        text = text[len(f"step '{exc.step}': "):]
    if exc.reply and text.endswith(f" (instrument said: {exc.reply})"):
        text = text[: -len(f" (instrument said: {exc.reply})")]
    return text
