"""``visa`` driver: upload a table to an arbitrary-waveform generator with SCPI over VISA.

Any VISA resource string works (``TCPIP::host::port::SOCKET``, ``TCPIP::host::INSTR``,
``USB::...``, ``GPIB::...``); the pure-Python pyvisa backend (``@py``) is the
default, another is chosen with the ``backend`` option (``upload --backend``).
A resource string that cannot name an instrument (empty, unparsable, a TCP port
outside 1-65535) is refused before anything is opened. Every command comes from
the ``[commands]`` templates of the generator profile (:mod:`sweepgen.dialect`),
so a new instrument needs a profile, never code.

Sequence (each step's name appears in errors and in the report):

``identify``    query the identity, compare with ``identity_pattern``
``output_off``  switch the output off before touching anything; after ``clear``
                it is sent again, its error check counts, and where the profile
                has an ``output_state`` query the state is read back: it must be off
``clear``       clear status and the error queue
``format``      data format and byte order of the block (optional template)
``upload``      the table as one IEEE 488.2 definite-length block built from NumPy
                bytes and streamed chunk by chunk (or as an ASCII list)
``wait``        completion query (``*OPC?``): it must answer 1
``verify``      read the trace back, or ask for its checksum, and compare the CRC-32
                of the bytes with what was sent (skipped when the profile has neither)
``function``, ``rate``, ``amplitude``, ``offset``, ``trigger``   configuration
``output_on``   only when ``Delivery.arm`` is set

After every command that is not a query the error queue is read until the
profile's ``no_error_pattern`` matches, so an error is charged to the step that
caused it.

Every reply has one overall deadline and a length limit (:mod:`sweepgen.wire.bounds`):
ordinary replies get the link's base timeout (``link.timeout``) and 4 KiB;
steps that move N bytes get ``timeout + 2 N / throughput`` (``link.throughput``
of the profile), clamped to 0.1 s ... 1 h; a readback must announce exactly the
bytes sent; the error queue is drained within twice the base timeout.

Any failure switches the output off before the error is raised, and the
message says whether that was confirmed. The confirmation is the answer to the
query that asked for it: the profile's ``output_state`` query (it must answer
0 or OFF), else the completion query after ``output_off``. It is asked on the
same connection only while that connection is in step (no reply to an earlier
query can still be on its way) and after clearing what it holds; otherwise on
a new connection. An instrument that cannot confirm is reported as such, with
the advice to check the output by hand.

A connection the instrument closes or resets is reported as lost at once, in
the step that noticed it, instead of after the full timeout
(:mod:`sweepgen.drivers._visa_link`). A loss between the first byte of the block
and the completion reply is always charged to ``upload``: whether the sender
notices it while sending or only while waiting for ``*OPC?`` depends on how much
the socket buffers took, but either way the instrument never confirmed the table.

Speed: pyvisa-py writes a message to a raw socket in 4 KiB pieces with a
``select`` call per piece. On such a session the driver hands the bytes
directly to that session's socket (``sendall``), which roughly doubles the
throughput on a fast link; every other backend and resource type gets the
ordinary ``write_raw``.
"""

from __future__ import annotations

import queue
import re
import socket
import threading
import time
import zlib
from typing import ClassVar

import numpy as np

from sweepgen.dialect import split_data
from sweepgen.drivers._visa_link import LinkLost, VisaLink, check_resource, visa_errors
from sweepgen.drivers.base import Delivery, Driver
from sweepgen.errors import CheckFailed, InputError, InstrumentError
from sweepgen.wire import block, scpi
from sweepgen.wire.bounds import clamp_deadline, reply_limit, transfer_deadline

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
        self.timeout = clamp_deadline(float(link.timeout))
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
        """Deadline of a step that moves ``nbytes`` bytes (s), clamped (:mod:`sweepgen.wire.bounds`)."""
        return transfer_deadline(self.timeout, nbytes, self.throughput)

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
        # (where the profile can ask, the session then reads the state back)
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
            if checked and step == "output_off" and self.commands.has("output_state"):
                state = self.rendered["output_state"]
                log.append({"step": step, "kind": "query", "command": state, "bytes": len(state.encode()) + 1,
                            "note": "must answer 0 or OFF"})
        return log


class _WrongInstrument(InstrumentError):
    """The instrument's identity does not match the profile: none of the profile's commands are sent."""


class _StillOn(InstrumentError):
    """The instrument reports its output on after it was told to switch it off."""


#: IEEE 488.2 10.19: *OPC? answers the number 1 when all pending operations are complete (recalled)
_COMPLETE = re.compile(r"^\+?1$")
#: the message when no switch-off could be confirmed
UNCONFIRMED = "could not confirm that the output is off: check the instrument before touching the setup"


class _Session:
    """One upload: the plan, the link to the instrument and the running report."""

    def __init__(self, plan: _Plan, delivery: Delivery, report: dict, resource: str):
        self.plan = plan
        self.delivery = delivery
        self.report = report
        self.link = VisaLink(resource, plan.backend, plan.timeout, self._log)
        self.crc = None

    def _log(self, step, kind, command, nbytes, reply=None, duration=None):
        entry = {"step": step, "kind": kind, "command": command, "bytes": nbytes}
        if reply is not None:
            entry["reply"] = reply if len(reply) <= 200 else reply[:200] + "..."
        if duration is not None:
            entry["duration"] = duration
        self.report["log"].append(entry)

    # -- checked replies -----------------------------------------------------------------------
    def check_errors(self, step: str) -> None:
        """Read the error queue until it is empty; any entry fails ``step``.

        The whole drain gets twice the link's timeout, however many entries it reads.
        """
        commands = self.plan.commands
        deadline = time.monotonic() + clamp_deadline(2 * self.plan.timeout)
        found = []
        for _ in range(MAX_ERROR_READS):
            reply = self.link.query(step, self.plan.rendered["error_query"], deadline=deadline)
            if scpi.is_no_error(reply, commands.no_error_pattern):
                break
            found.append(reply)
        else:
            raise InstrumentError(f"the error queue did not empty after {MAX_ERROR_READS} reads", step=step,
                                  reply="; ".join(found[-3:]))
        if found:
            raise InstrumentError("the instrument reported an error", step=step, reply="; ".join(found))

    def wait(self, step: str, timeout: float | None = None) -> str:
        """The completion query (``*OPC?``); anything but 1 fails ``step``."""
        reply = self.link.query(step, self.plan.rendered["wait"], timeout)
        if not _COMPLETE.match(reply):
            raise InstrumentError("the completion query did not answer 1", step=step, reply=reply or "<empty>")
        return reply

    def confirm_off(self, step: str) -> dict:
        """Ask whether the output is off: the profile's output-state query where there is one,
        else the completion query after the switch-off. Returns what was asked and answered."""
        rendered = self.plan.rendered
        if not self.plan.commands.has("output_state"):
            return {"query": rendered["wait"], "reply": self.wait(step)}
        reply = self.link.query(step, rendered["output_state"])
        state = scpi.parse_boolean(reply)
        if state is None:
            raise InstrumentError("the output-state reply is not 0, 1, OFF or ON", step=step,
                                  reply=reply or "<empty>")
        if state:
            raise _StillOn("the instrument reports its output ON after output off", step=step, reply=reply)
        return {"query": rendered["output_state"], "reply": reply}

    # -- the data ------------------------------------------------------------------------------
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
        crc = _Crc32() if plan.mode == "ascii" else None   # binary: computed when verifying
        try:
            self._stream(step, head, chunks, nbytes, plan.data_timeout(total), crc)
        finally:
            crc_value = crc.result() if crc is not None else None
        self.crc = crc_value
        self.link.sent += total
        self.report["block_bytes"] = nbytes
        duration = time.monotonic() - t0
        self._log(step, "write", plan.upload_text(nbytes), total, duration=duration)
        self.report["upload"] = {"bytes": total, "data_bytes": nbytes, "duration": duration,
                                 "throughput": total / duration if duration > 0 else None,
                                 "fast_path": self.link.raw_socket() is not None}

    def _stream(self, step, head, chunks, nbytes, allowed: float, crc) -> None:
        """Send the upload message within ``allowed`` seconds, reporting progress."""
        link = self.link
        progress = self.delivery.progress
        deadline = time.monotonic() + allowed
        done = 0
        link.check_link(step)
        link.in_step = False                  # until the whole message is out
        try:
            link.send(step, head, deadline)
            for chunk in chunks:
                if crc is not None:
                    crc.update(chunk)
                link.send(step, chunk, deadline)
                done += len(chunk)
                if progress is not None:
                    progress(done, nbytes)
            link.send(step, self.plan.suffix.encode() + b"\n", deadline)
        except socket.timeout:
            raise InstrumentError(f"the instrument took {done} of {nbytes} bytes in {allowed:.3g} s and then "
                                  f"no more (the profile expects {self.plan.throughput:.3g} B/s)",
                                  step=step) from None
        except block.BlockError as exc:
            raise InstrumentError(f"the table does not match its block header: {exc}", step=step) from None
        except visa_errors() as exc:
            error = link.failure(step, exc, allowed)
            if isinstance(error, LinkLost):
                error = _upload_lost("while the block was being sent", error.why)
            raise error from None
        link.in_step = True

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

    def verify(self, template: str) -> dict:
        plan = self.plan
        step = "verify"
        nbytes = self.report.get("block_bytes", 0)
        timeout = plan.data_timeout(nbytes)
        command = plan.rendered[template]
        if template == "checksum":
            reply = self.link.query(step, command, timeout)
            value = _parse_checksum(reply)
            if value is None:
                raise InstrumentError("the checksum reply is not a number", step=step, reply=reply)
            expected = self.sent_crc()
            result = {"method": "checksum", "expected_crc32": expected, "instrument_crc32": value,
                      "ok": value == expected}
        else:
            got, count = self._readback(command, nbytes, timeout)
            expected = self.sent_crc()
            result = {"method": "readback", "expected_crc32": expected, "instrument_crc32": got,
                      "bytes": count, "ok": got == expected and count == nbytes}
        if not result["ok"]:
            raise InstrumentError(
                f"the stored trace differs from what was sent ({result['method']}: CRC-32 "
                f"0x{result['instrument_crc32']:08x}, sent 0x{result['expected_crc32']:08x})", step=step)
        return result

    def _readback(self, command: str, nbytes: int, timeout: float) -> tuple[int, int]:
        """CRC-32 and length of the data the instrument sends back for ``command``.

        An ASCII readback may be as long as the text sent plus the usual reply
        allowance; a binary one must announce exactly the bytes sent.
        """
        step, link = "verify", self.link
        t0 = time.monotonic()
        deadline = t0 + timeout
        link.write_query(step, command)
        if self.plan.mode == "ascii":
            text = link.read_line(step, deadline, timeout, reply_limit(nbytes)).strip()
            crc, count = zlib.crc32(text) & 0xFFFFFFFF, len(text)
        else:
            count = self._block_header(step, nbytes, deadline, timeout)
            running = _Crc32()
            try:
                link.read_into_crc(step, count, deadline, timeout, running.update)
            finally:
                crc = running.result()
            end = link.read_exact(step, 1, deadline, timeout)
            if end != b"\n":
                link.read_line(step, deadline, timeout)      # resynchronise on the terminator
        self._log(step, "query", command, len(command.encode()) + 1,
                  reply=f"<{count} bytes, CRC-32 0x{crc:08x}>", duration=time.monotonic() - t0)
        return crc, count

    def _block_header(self, step: str, nbytes: int, deadline: float, timeout: float) -> int:
        """Read a readback's block header; its byte count must be ``nbytes``."""
        link = self.link
        head = link.read_exact(step, 2, deadline, timeout)
        if head[:1] != b"#" or not head[1:2].isdigit() or head[1:2] == b"0":
            rest = b"" if head.endswith(b"\n") else link.read_line(step, deadline, timeout)
            raise InstrumentError("the readback is not a definite-length block", step=step,
                                  reply=(head + rest).decode("latin-1").strip()[:120])
        digits = link.read_exact(step, int(head[1:2]), deadline, timeout)
        if not digits.isdigit():
            link.in_step = False
            raise InstrumentError("malformed readback block header", step=step,
                                  reply=(head + digits).decode("latin-1"))
        count = int(digits)
        if count != nbytes:
            link.in_step = False
            raise InstrumentError(f"the readback announces {count} bytes, {nbytes} were sent; not read",
                                  step=step)
        return count

    # -- the sequence --------------------------------------------------------------------------
    def run(self) -> None:
        plan = self.plan
        checked = False
        for step, template in plan.sequence(self.delivery.arm):
            t0 = time.monotonic()
            detail = self._step(step, template, checked)
            if step == "clear":
                checked = True
            self.report["steps"].append({"step": step, "ok": True, "duration": time.monotonic() - t0, **detail})

    def _step(self, step: str, template: str, checked: bool) -> dict:
        """Run one step of the sequence; returns what the report shows of it."""
        plan, rendered = self.plan, self.plan.rendered
        if step == "identify":
            reply = self.link.query(step, rendered["identify"])
            self.report["identity"] = reply
            if not re.search(plan.commands.identity_pattern, reply):
                raise _WrongInstrument(f"this is not the instrument the profile describes (identity "
                                      f"pattern {plan.commands.identity_pattern!r})", step=step, reply=reply)
            return {"identity": reply}
        if step == "upload":
            self.upload()
            return {"bytes": self.report["upload"]["bytes"]}
        if step == "wait":
            try:
                reply = self.wait(step, plan.data_timeout(self.report.get("block_bytes", 0)))
            except LinkLost as exc:
                # the table was handed to the link, but the instrument hung up before confirming it:
                # how far it got depends on socket buffers, so the loss is charged to the upload
                raise _upload_lost("after the whole block was sent", exc.why) from None
            self.check_errors("upload")
            return {"reply": reply}
        if step == "verify":
            result = self.verify(template)
            self.report["verification"] = result
            return dict(result)
        detail = self._command(step, rendered[template], checked)
        if step == "output_off" and checked and plan.commands.has("output_state"):
            self.report["output_state"] = read = self.confirm_off(step)
            detail["detail"] = f"read back: {read['query']} answered {read['reply']}"
        return detail

    def _command(self, step: str, text: str, checked: bool) -> dict:
        detail = {}
        if "?" in text:
            detail["reply"] = self.link.query(step, text)
        else:
            self.link.write(step, text)
        if checked or step == "clear":
            self.check_errors(step)
        if step == "output_on":
            self.report["armed"] = True
        return detail

    def safe_off(self) -> str:
        """Switch the output off after a failure; returns what happened (for the message).

        The confirmation must be the answer to the query that asked for it: the
        same connection is used only while it is in step (no reply of an earlier
        query can still be on its way), and only after clearing what it holds;
        otherwise a new connection is opened.
        """
        link = self.link
        attempts = ["the same connection"] if link.res is not None and link.in_step else []
        attempts.append("a new connection")
        still_on = None
        for attempt in attempts:
            try:
                if attempt == "a new connection":
                    link.close()
                    link.open()
                if not link.clear_input():
                    continue                  # it keeps talking unasked: nothing it says can be trusted
                link.write("output_off", self.plan.rendered["output_off"])
                read = self.confirm_off("output_off")
            except _StillOn as exc:
                still_on = exc.reply
                continue
            except InstrumentError:
                continue
            self.report["armed"] = False
            self.report["output_state"] = read
            return f"output switched off (confirmed on {attempt})"
        if still_on is not None:
            return (f"the output may still be ON: after output off the instrument reports it on (it said: "
                    f"{still_on}); check the output by hand before touching the setup")
        return UNCONFIRMED


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

    def check_destination(self, delivery: Delivery) -> str:
        return _resource(delivery)

    def deliver(self, table, delivery: Delivery) -> dict:
        options = dict(delivery.options)
        unknown = sorted(set(options) - set(self.options))
        if unknown:
            raise InputError(f"driver 'visa' has no option {unknown[0]!r} (options: {', '.join(self.options)})",
                             key="--option")
        plan = _Plan(table, delivery.generator, options)
        resource = _resource(delivery)
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
            session.link.open()
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
            if session.link.res is not None:     # interrupted (Ctrl-C) or an unexpected error mid-way
                session.safe_off()
            raise
        finally:
            session.link.close_all()
        if plan.method == "none":
            report["verification"] = {"method": "none", "ok": None,
                                      "note": "the profile has neither a readback nor a checksum template"}
        report["bytes"] = session.link.sent
        report["duration"] = time.monotonic() - t0
        return report


def _resource(delivery: Delivery) -> str:
    """The VISA resource to open: the destination, else the profile's; refused when it cannot name one."""
    if delivery.destination:
        return check_resource(delivery.destination, key="--resource")
    link = delivery.generator.link
    return check_resource(link.address, key="link.resource", file=str(delivery.generator.path or "") or None)


def _upload_lost(when: str, why: str) -> LinkLost:
    """The error of a connection lost between the first byte of the block and the completion reply."""
    return LinkLost(why, step="upload", message=f"the connection was lost {when}, before the instrument "
                                                  f"confirmed the upload ({why})")


def _message(exc: InstrumentError) -> str:
    """The message of ``exc`` without its step prefix and instrument reply (they are re-added)."""
    text = str(exc)
    if exc.step and text.startswith(f"step '{exc.step}': "):
        text = text[len(f"step '{exc.step}': "):]
    if exc.reply and text.endswith(f" (instrument said: {exc.reply})"):
        text = text[: -len(f" (instrument said: {exc.reply})")]
    return text
