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

from sweepgen._format import listed
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
MODE_CHOICES = ("burst", "repeat")
#: templates sent once for the whole upload unless they name a {channel}
SHARED = ("identify", "reset", "clear", "format", "trigger", "trigger_edge", "trigger_level", "trigger_delay",
          "burst", "repeat")
#: the trigger and playback-mode templates, in the order they are sent, and the value each needs
TRIGGER_STEPS = (("trigger", "trigger_source"), ("trigger_edge", "edge"), ("trigger_level", "level"),
                 ("trigger_delay", "delay"), ("burst", "cycles"), ("repeat", "mode"))


class _Plan:
    """Everything the upload will send, rendered and checked before any connection."""

    def __init__(self, table, generator, options: dict, *, trace: str | None = None):
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
        timing = _timing_values(options)
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
        self.channel = int(info.channel)
        values = {
            "channel": self.channel, "name": trace or commands.trace_name, "count": int(info.count),
            "rate": self.rate, "frequency": self.rate / info.count, "period": info.count / self.rate,
            "format": fmt["format"], "type": fmt["type"], "bits": fmt["bits"],
            "border": scpi.border(commands.byte_order), **timing,
            "amplitude": info.amplitude, "offset": info.offset,
            "high": None if info.amplitude is None else info.offset + info.amplitude / 2,
            "low": None if info.amplitude is None else info.offset - info.amplitude / 2,
        }
        self.values = values
        wanted = {t: v for t, v in TRIGGER_STEPS}
        self.rendered = {name: commands.render(name, **values) for name in commands.templates
                         if values.get(wanted.get(name, "channel")) is not None}
        if timing.get("mode") != "burst":
            self.rendered.pop("burst", None)
        if timing.get("mode") != "repeat":
            self.rendered.pop("repeat", None)
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
        self.crc = None                  # CRC-32 of what was sent, once known
        self.block_bytes = 0             # data bytes of the upload, once sent

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


class _Step(tuple):
    """One step of the upload: ``(step, plan, template)``; ``label`` names it in the report and errors
    (with its output where several are uploaded)."""

    __slots__ = ()

    def __new__(cls, step: str, plan: _Plan, template: str, label: str):
        return super().__new__(cls, (step, plan, template, label))

    step = property(lambda self: self[0])
    plan = property(lambda self: self[1])
    template = property(lambda self: self[2])
    label = property(lambda self: self[3])


def _steps(plans: list, arm: bool) -> list[_Step]:
    """The upload's steps in order; error-queue reads are added by the session.

    Every output is switched off before anything is touched (and, after the error queue is
    cleared, again with its error check and state read-back), every table is loaded and
    verified, then configured; the trigger is set; only then, with ``arm``, are the outputs
    switched on, in the order of ``plans``. A template without ``{channel}`` in :data:`SHARED`
    is sent once.
    """
    c = plans[0].commands
    several = len(plans) > 1

    def each(step, template=None, only=None):
        template = template or step
        if not any(template in p.rendered for p in plans):
            return []
        shared = template in SHARED and "{channel}" not in c.templates.get(template, "")
        targets = plans[:1] if shared else plans
        return [_Step(step, p, template, f"{step}, output {p.channel}" if several and not shared else step)
                for p in targets if template in p.rendered and (only is None or only(p))]

    out = each("identify") + each("output_off") + each("reset") + each("clear") + each("output_off") + each("format")
    for p in plans:
        out += [_Step(step, p, template, f"{step}, output {p.channel}" if several else step)
                for step, template in (("upload", "upload"), ("wait", "wait"))]
        if p.method != "none":
            out.append(_Step("verify", p, p.method, f"verify, output {p.channel}" if several else "verify"))
    for name in ("function", "rate", "amplitude", "offset"):
        out += each(name)
    for name, _ in TRIGGER_STEPS:
        out += each(name)
    if arm:
        out += each("output_on")
    return out


def _dry_log(plans: list, arm: bool) -> list[dict]:
    """The exact command log, with byte counts, without connecting."""
    log = []
    err = plans[0].rendered["error_query"]
    has_state = plans[0].commands.has("output_state")
    checked = False
    for st in _steps(plans, arm):
        plan, step = st.plan, st.label
        if st.template == "upload":
            nbytes = plan.nbytes if plan.mode == "block" else len(plan.ascii_text())
            log.append({"step": step, "kind": "write", "command": plan.upload_text(nbytes),
                        "bytes": plan.upload_bytes(nbytes)})
            continue
        text = plan.rendered[st.template]
        log.append({"step": step, "kind": "query" if "?" in text else "write", "command": text,
                    "bytes": len(text.encode()) + 1})
        if st.step == "clear":
            checked = True
        if checked and "?" not in text or st.step == "wait":
            where = step.replace("wait", "upload", 1) if st.step == "wait" else step
            log.append({"step": where, "kind": "query", "command": err, "bytes": len(err.encode()) + 1,
                        "note": "repeated until the reply matches no_error_pattern"})
        if has_state and (checked and st.step == "output_off" or st.step == "output_on"):
            state = plan.rendered["output_state"]
            log.append({"step": step, "kind": "query", "command": state, "bytes": len(state.encode()) + 1,
                        "note": "must answer " + ("1 or ON" if st.step == "output_on" else "0 or OFF")})
    return log


def _timing_values(options: dict) -> dict:
    """The trigger and playback-mode values of the driver options, checked (:class:`InputError`)."""
    from sweepgen.dialect import format_value

    out = {}
    for key in ("trigger_source", "edge"):
        if options.get(key) is not None:
            try:
                out[key] = format_value(key, str(options[key]))
            except ValueError as exc:
                raise InputError(str(exc), key=key) from None
    for key in ("level", "delay"):
        if options.get(key) is not None:
            try:
                value = float(options[key])
            except (TypeError, ValueError):
                value = float("nan")
            if not np.isfinite(value) or key == "delay" and value < 0:
                raise InputError(f"expected a finite number{' of seconds >= 0' if key == 'delay' else ' (V)'}, "
                                 f"got {options[key]!r}", key=key)
            out[key] = value
    mode = options.get("mode")
    if mode is not None:
        if str(mode) not in MODE_CHOICES:
            raise InputError(f"expected one of {', '.join(MODE_CHOICES)}, got {mode!r}", key="mode")
        out["mode"] = str(mode)
        if mode == "burst":
            try:
                cycles = int(options.get("cycles", 1))
            except (TypeError, ValueError):
                cycles = 0
            if cycles < 1:
                raise InputError(f"expected a whole number >= 1, got {options.get('cycles')!r}", key="cycles")
            out["cycles"] = cycles
    return out


class _WrongInstrument(InstrumentError):
    """The instrument's identity does not match the profile: none of the profile's commands are sent."""


class _StillOn(InstrumentError):
    """The instrument reports its output on after it was told to switch it off."""


#: IEEE 488.2 10.19: *OPC? answers the number 1 when all pending operations are complete (recalled)
_COMPLETE = re.compile(r"^\+?1$")


def _named(channels: list, several: bool) -> str:
    """How a message names outputs: ``the output`` in a one-output upload, else ``output 2`` or
    ``outputs 1, 2 and 4``."""
    if not several:
        return "the output"
    return f"output{'s' if len(channels) > 1 else ''} {listed(channels)}"


def _unconfirmed(plans: list) -> str:
    """The message when no switch-off could be confirmed, naming every output of the upload."""
    verb = "is" if len(plans) == 1 else "are"
    return (f"could not confirm that {_named([p.channel for p in plans], len(plans) > 1)} {verb} off: check "
            f"the instrument before touching the setup")


class _Session:
    """One upload: the plan, the link to the instrument and the running report."""

    def __init__(self, plans: list, delivery: Delivery, report: dict, resource: str):
        self.plans = plans
        self.plan = plan = plans[0]           # the plan of the step being run
        self.label = ""                       # the step being run, as the report names it
        self.delivery = delivery
        self.report = report
        self.link = VisaLink(resource, plan.backend, plan.timeout, self._log)
        self.states = {}                      # output -> its state as last read back (output_state)
        self.still_on = ""                    # the output a failed switch-off left reported ON, named

    def _read_back(self, reads: list) -> None:
        """Record ``(plan, read, on)`` readbacks in ``output_state``: each output's state as last read
        (the switch-off's, or after ``output_on`` the switch-on's); one output's entry alone, several
        as ``{"outputs": [...]}`` in arming order."""
        for plan, read, on in reads:
            self.states[plan.channel] = {"output": plan.channel, "state": "on" if on else "off", **read}
        entries = [self.states[p.channel] for p in self.plans if p.channel in self.states]
        self.report["output_state"] = entries[0] if len(self.plans) == 1 else {"outputs": entries}

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

    def confirm_state(self, step: str, *, on: bool) -> dict:
        """Read the output state back after switching it on: it must answer 1 or ON."""
        query = self.plan.rendered["output_state"]
        reply = self.link.query(step, query)
        state = scpi.parse_boolean(reply)
        if state is None:
            raise InstrumentError("the output-state reply is not 0, 1, OFF or ON", step=step,
                                  reply=reply or "<empty>")
        if state != on:
            raise InstrumentError(f"the instrument reports its output {'OFF' if on else 'ON'} after output "
                                  f"{'on' if on else 'off'}", step=step, reply=reply)
        return {"query": query, "reply": reply}

    # -- the data ------------------------------------------------------------------------------
    def upload(self) -> None:
        plan = self.plan
        step = self.label or "upload"
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
            plan.crc = crc.result() if crc is not None else None
        self.link.sent += total
        plan.block_bytes = self.report["block_bytes"] = nbytes
        duration = time.monotonic() - t0
        self._log(step, "write", plan.upload_text(nbytes), total, duration=duration)
        self.report["upload"] = {"bytes": total, "data_bytes": nbytes, "duration": duration,
                                 "throughput": total / duration if duration > 0 else None,
                                 "fast_path": self.link.raw_socket() is not None}
        if len(self.plans) > 1:
            self.report.setdefault("uploads", []).append({"output": plan.channel, **self.report["upload"]})

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
                error = _upload_lost("while the block was being sent", error.why, step)
            raise error from None
        link.in_step = True

    def sent_crc(self) -> int:
        """CRC-32 of the data bytes sent (binary: the table's bytes in the wire byte order)."""
        plan = self.plan
        if plan.crc is None:
            if np.dtype(plan.info.dtype) == scpi.wire_dtype(plan.info.dtype, plan.byte_order):
                plan.crc = plan.table.crc32          # cached on the table: shared with other users
            else:
                value = 0
                for chunk in plan.wire_chunks():
                    value = zlib.crc32(chunk, value)
                plan.crc = value & 0xFFFFFFFF
        return plan.crc

    def verify(self, template: str) -> dict:
        plan = self.plan
        step = self.label or "verify"
        nbytes = plan.block_bytes
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
            got, count = self._readback(step, command, nbytes, timeout)
            expected = self.sent_crc()
            result = {"method": "readback", "expected_crc32": expected, "instrument_crc32": got,
                      "bytes": count, "ok": got == expected and count == nbytes}
        if not result["ok"]:
            raise InstrumentError(
                f"the stored trace differs from what was sent ({result['method']}: CRC-32 "
                f"0x{result['instrument_crc32']:08x}, sent 0x{result['expected_crc32']:08x})", step=step)
        return result

    def _readback(self, step: str, command: str, nbytes: int, timeout: float) -> tuple[int, int]:
        """CRC-32 and length of the data the instrument sends back for ``command``.

        An ASCII readback may be as long as the text sent plus the usual reply
        allowance; a binary one must announce exactly the bytes sent.
        """
        link = self.link
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
        checked = False
        for st in _steps(self.plans, self.delivery.arm):
            t0 = time.monotonic()
            self.plan, self.label = st.plan, st.label
            detail = self._step(st, checked)
            if st.step == "clear":
                checked = True
            entry = {"step": st.label, "ok": True, "duration": time.monotonic() - t0, **detail}
            self.report["steps"].append(entry)

    def _step(self, st: _Step, checked: bool) -> dict:
        """Run one step of the sequence; returns what the report shows of it."""
        plan, rendered, step = st.plan, st.plan.rendered, st.label
        if st.step == "identify":
            reply = self.link.query(step, rendered["identify"])
            self.report["identity"] = reply
            if not re.search(plan.commands.identity_pattern, reply):
                raise _WrongInstrument(f"this is not the instrument the profile describes (identity "
                                      f"pattern {plan.commands.identity_pattern!r})", step=step, reply=reply)
            return {"identity": reply}
        if st.step == "upload":
            self.upload()
            return {"bytes": self.report["upload"]["bytes"]}
        if st.step == "wait":
            upload = step.replace("wait", "upload", 1)
            try:
                reply = self.wait(step, plan.data_timeout(plan.block_bytes))
            except LinkLost as exc:
                # the table was handed to the link, but the instrument hung up before confirming it:
                # how far it got depends on socket buffers, so the loss is charged to the upload
                raise _upload_lost("after the whole block was sent", exc.why, upload) from None
            self.check_errors(upload)
            return {"reply": reply}
        if st.step == "verify":
            result = self.verify(st.template)
            self._verified(plan, result)
            return dict(result)
        detail = self._command(step, rendered[st.template], checked)
        has_state = plan.commands.has("output_state")
        if st.step == "output_off" and checked and has_state:
            read = self.confirm_off(step)
            self._read_back([(plan, read, False)])
            detail["detail"] = f"read back: {read['query']} answered {read['reply']}"
        if st.step == "output_on":
            self.report["armed"] = True
            if has_state:
                read = self.confirm_state(step, on=True)
                self._read_back([(plan, read, True)])
                detail["detail"] = f"read back: {read['query']} answered {read['reply']}"
        return detail

    def _verified(self, plan: _Plan, result: dict) -> None:
        """Record one table's verification; with several tables, ``verification`` holds each."""
        if len(self.plans) == 1:
            self.report["verification"] = result
            return
        doc = self.report.get("verification") or {"method": result["method"], "ok": True, "outputs": []}
        doc["outputs"].append({"output": plan.channel, **result})
        doc["ok"] = doc["ok"] and result["ok"]
        self.report["verification"] = doc

    def _command(self, step: str, text: str, checked: bool) -> dict:
        detail = {}
        if "?" in text:
            detail["reply"] = self.link.query(step, text)
        else:
            self.link.write(step, text)
        if checked or step == "clear":
            self.check_errors(step)
        return detail

    def safe_off(self) -> str:
        """Switch every output off after a failure; returns what happened (for the message).

        The confirmation must be the answer to the query that asked for it: the
        same connection is used only while it is in step (no reply of an earlier
        query can still be on its way), and only after clearing what it holds;
        otherwise a new connection is opened. The error queue is cleared first and
        read last: an instrument that refuses an output's switch-off (an output it
        does not have, say) has not confirmed anything, and its words are reported.
        """
        link = self.link
        attempts = ["the same connection"] if link.res is not None and link.in_step else []
        attempts.append("a new connection")
        still_on = refused = None
        for attempt in attempts:
            try:
                if attempt == "a new connection":
                    link.close()
                    link.open()
                if not link.clear_input():
                    continue                  # it keeps talking unasked: nothing it says can be trusted
                reads = self._all_off()
            except _StillOn as exc:
                still_on = exc.reply
                self.still_on = _named([self.plan.channel], len(self.plans) > 1)
                continue
            except InstrumentError as exc:
                refused = exc.reply if exc.reply and "error" in str(exc) else refused
                continue
            self.report["armed"] = False
            self._read_back(reads)
            what = ("output" if len(self.plans) == 1 else
                    f"every output ({', '.join(str(p.channel) for p in self.plans)})")
            return f"{what} switched off (confirmed on {attempt})"
        if still_on is not None:
            return (f"{self.still_on} may still be ON: after output off the instrument reports it on (it said: "
                    f"{still_on}); check the output by hand before touching the setup")
        if refused is not None:
            return f"the instrument refused output off (it said: {refused}); {_unconfirmed(self.plans)}"
        return _unconfirmed(self.plans)

    def _all_off(self) -> list:
        """``output_off`` for every output, each read back; the error queue must stay empty. Returns
        the readbacks as ``(plan, read, False)``; they confirm nothing unless the queue stays empty."""
        first = self.plans[0].rendered
        self.link.write("output_off", first["clear"])      # so that the queue read last is about this
        reads = []
        for plan in self.plans:
            self.plan = plan
            self.link.write("output_off", plan.rendered["output_off"])
            reads.append((plan, self.confirm_off("output_off"), False))
        self.check_errors("output_off")
        return reads


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
        "trigger_source": "the instrument's own name of the trigger source (from the profile's [trigger]); "
                          "without it no trigger source is sent",
        "edge": "the instrument's own name of the trigger edge (profile [trigger] rising/falling)",
        "level": "trigger threshold, V",
        "delay": "trigger delay, s: the first sample plays this long after the trigger",
        "mode": "burst (cycles periods per trigger) or repeat (on and on)",
        "cycles": "periods per trigger in burst mode (default 1)",
    }

    def check_destination(self, delivery: Delivery) -> str:
        return _resource(delivery)

    def deliver(self, table, delivery: Delivery) -> dict:
        """Upload one table (see :meth:`deliver_tables`)."""
        return self.deliver_tables([table], delivery)

    def deliver_tables(self, tables: list, delivery: Delivery) -> dict:
        """Upload several tables, one per output, in one session (:func:`_steps`): every output
        off, every table loaded and verified, then configured and triggered, and only with
        ``delivery.arm`` the outputs switched on in the order of ``tables``. Any failure switches
        every output off before the error is raised."""
        options = dict(delivery.options)
        unknown = sorted(set(options) - set(self.options))
        if unknown:
            raise InputError(f"driver 'visa' has no option {unknown[0]!r} (options: {', '.join(self.options)})",
                             key="--option")
        plans = _plans(tables, delivery.generator, options)
        resource = _resource(delivery)
        report = _report(self.name, resource, plans, delivery)
        if delivery.dry_run:
            report["log"] = _dry_log(plans, delivery.arm)
            report["bytes"] = sum(e["bytes"] for e in report["log"])
            report["verification"] = {"method": plans[0].method, "ok": None}
            return report
        t0 = time.monotonic()
        session = _Session(plans, delivery, report, resource)
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
                if isinstance(exc, _StillOn) and outcome.startswith(f"{session.still_on} may still be ON"):
                    outcome = (f"asked again, on a new connection too, it still does: {session.still_on} may "
                               f"still be ON; check the output by hand before touching the setup")
            error = InstrumentError(_message(exc), step=exc.step, reply=exc.reply)
            error.args = (f"{error}; {outcome}",)
            raise error from None
        except BaseException:
            if session.link.res is not None:     # interrupted (Ctrl-C) or an unexpected error mid-way
                session.safe_off()
            raise
        finally:
            session.link.close_all()
        if plans[0].method == "none":
            report["verification"] = {"method": "none", "ok": None,
                                      "note": "the profile has neither a readback nor a checksum template"}
        report["bytes"] = session.link.sent
        report["duration"] = time.monotonic() - t0
        return report


def _plans(tables: list, generator, options: dict) -> list[_Plan]:
    """One plan per table; with several, each trace is named after its output and no output twice."""
    if not tables:
        raise InputError("nothing to upload", key="table")
    channels = [int(t.info.channel) for t in tables]
    if len(set(channels)) != len(channels):
        raise InputError(f"two tables for the same output ({channels})", key="channel")
    if len(tables) == 1:
        return [_Plan(tables[0], generator, options)]
    base = generator.commands.trace_name if getattr(generator, "commands", None) else "SWEEP"
    return [_Plan(t, generator, options, trace=f"{base[:12 - len(str(n))]}{n}") for t, n in zip(tables, channels)]


def _report(name: str, resource: str, plans: list, delivery: Delivery) -> dict:
    def table(plan):
        info = plan.info
        return {"count": plan.count, "sample_rate": plan.rate, "dtype": info.dtype, "channel": info.channel,
                "upload_mode": plan.mode, "byte_order": plan.byte_order, "amplitude": info.amplitude,
                "offset": info.offset}

    report = {"driver": name, "destination": resource, "backend": plans[0].backend,
              "dry_run": bool(delivery.dry_run), "armed": False, "table": table(plans[0]),
              "bytes": 0, "steps": [], "log": [], "verification": None}
    if len(plans) > 1:
        report["tables"] = [table(p) for p in plans]
        report["arm_order"] = [p.channel for p in plans]
    return report


def _resource(delivery: Delivery) -> str:
    """The VISA resource to open: the destination, else the profile's; refused when it cannot name one."""
    if delivery.destination:
        return check_resource(delivery.destination, key="--resource")
    link = delivery.generator.link
    return check_resource(link.address, key="link.resource", file=str(delivery.generator.path or "") or None)


def _upload_lost(when: str, why: str, step: str = "upload") -> LinkLost:
    """The error of a connection lost between the first byte of the block and the completion reply."""
    return LinkLost(why, step=step, message=f"the connection was lost {when}, before the instrument "
                                                  f"confirmed the upload ({why})")


def _message(exc: InstrumentError) -> str:
    """The message of ``exc`` without its step prefix and instrument reply (they are re-added)."""
    text = str(exc)
    if exc.step and text.startswith(f"step '{exc.step}': "):
        text = text[len(f"step '{exc.step}': "):]
    if exc.reply and text.endswith(f" (instrument said: {exc.reply})"):
        text = text[: -len(f" (instrument said: {exc.reply})")]
    return text
