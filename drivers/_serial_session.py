"""One upload conversation with a ramp board over an open link (``serial`` driver).

HELLO and version negotiation, the check of the board's capabilities against
the tables, the trigger and the profile, TRIGGER, each channel's upload, the
read-back and ARM; after a failure, DISARM and a read-back of the output state.
The plans (what is sent) come from :mod:`sweepgen.drivers.serial_board`.
"""

from __future__ import annotations

import time

from sweepgen._format import listed
from sweepgen.drivers._serial_link import Refused, Restart
from sweepgen.errors import InstrumentError
from sweepgen.wire import frames as fr


class Session:
    """One upload of one or more channels over an open link."""

    def __init__(self, link, plans: list, options, delivery, report: dict):
        self.link = link
        self.plans = plans
        self.timing = options.timing
        self.restarts = options.restarts
        self.delivery = delivery
        self.report = report
        self.version = 0
        self.caps = None
        self.trigger = None               # the settings the board acknowledged (version 2)
        self.rates = {}                   # channel -> fr.Rate the board announced for its plan
        self._t = time.monotonic()

    def step(self, name, detail: str, **extra):
        now = time.monotonic()
        self.report["steps"].append({"step": name, "ok": True, "duration": now - self._t, "detail": detail,
                                     **extra})
        self._t = now

    def run(self) -> None:
        self.start()
        for plan in self.plans:
            self.upload_channel(plan)
        self.confirm()
        if self.delivery.arm:
            self.arm()

    def start(self) -> None:
        """HELLO, the capability check, DISARM and (version 2) the trigger settings."""
        self.hello()
        self._call(fr.MsgType.DISARM, b"", "disarm", restart_ok=False)
        self.step("disarm", "output off")
        if self.version == 2:
            self.set_trigger()

    def upload_channel(self, plan) -> None:
        for attempt in range(self.restarts + 1):
            try:
                self.upload(plan)
                return
            except Restart as restart:
                if attempt == self.restarts:
                    raise InstrumentError(f"the board lost the upload {attempt + 1} times (last: {restart.why}); "
                                          f"channel {plan.channel} was not committed", step=restart.step) from None
                self.report["restarts"] += 1
                self.report["steps"].append({"step": restart.step, "ok": False, "detail": restart.why,
                                             "action": "starting over"})
                self.start()

    def _call(self, msg_type, payload, step, timeout=None, restart_ok=True):
        try:
            return self.link.exchange(msg_type, payload, step, timeout)
        except Refused as refused:
            r = refused.refusal
            if restart_ok and r.reason in fr.RESTART:
                raise Restart(step, f"{fr.type_name(msg_type).upper()} refused with {r.describe()}") from None
            raise InstrumentError(f"the board refused {fr.type_name(msg_type).upper()}", step=step,
                                  reply=r.describe()) from None

    # -- HELLO: the version and what the board is -------------------------------------------
    def hello(self) -> None:
        version = fr.PROTOCOL_VERSION
        try:
            data = self.link.exchange(fr.MsgType.HELLO, fr.hello_payload(version), "hello")
        except Refused as refused:
            r = refused.refusal
            if r.reason != fr.Reason.BAD_VERSION or r.detail not in fr.VERSIONS or r.detail >= version:
                raise InstrumentError("the board refused HELLO", step="hello", reply=r.describe()) from None
            version = r.detail                  # the board speaks an older version: speak it
            data = self._call(fr.MsgType.HELLO, fr.hello_payload(version), "hello", restart_ok=False)
        try:
            caps = fr.parse_capabilities(version, data)
        except fr.FrameError as exc:
            raise InstrumentError(f"malformed HELLO reply ({exc})", step="hello") from None
        if caps.version != version:
            raise InstrumentError(f"the board answered HELLO({version}) with version {caps.version}", step="hello")
        problems = self.check_caps_v1(caps) if version == 1 else self.check_caps_v2(caps)
        if problems:
            raise InstrumentError("the board cannot play this upload: " + "; ".join(problems) + "; nothing was "
                                  "uploaded or armed", step="hello")
        self.version, self.caps = version, caps
        self.report["board"] = caps.to_json()
        self.report["table"] = self.plans[0].table_json()        # in the format chosen for this board
        self.report["tables"] = [p.table_json() for p in self.plans]
        self.report["protocol"] = version
        memory = caps.memory
        self.step("hello", f"{caps.name or 'board'}: protocol {version}, memory {memory} samples, "
                           f"payload {caps.max_payload} B", board=caps.to_json())

    def check_caps_v1(self, caps: fr.Capabilities) -> list:
        problems = []
        if self.timing.triggered:
            problems.append(f"it speaks protocol version 1, which has no trigger: it would free-run instead of "
                            f"starting on the {self.timing.source} trigger a pulsed scenario needs")
        if len(self.plans) > 1 or self.plans[0].channel != 1:
            problems.append(f"it speaks protocol version 1, which plays channel 1 only (asked for channels "
                            f"{', '.join(str(p.channel) for p in self.plans)})")
        plan = self.plans[0]
        if plan.format not in caps.formats:
            names = ", ".join(f.name.lower() for f in caps.formats) or "none"
            problems.append(f"it does not take {plan.format.name.lower()} tables (it takes: {names})")
        if plan.count > caps.memory:
            problems.append(f"{plan.count} samples exceed its memory of {caps.memory}")
        if plan.whole_rate is None:
            problems.append(f"{plan.rate:.9g} Sa/s is not a whole number of samples per second (version 1 "
                            "announces rates as integers)")
        elif plan.whole_rate not in caps.rates:
            problems.append(f"it does not play {plan.whole_rate} Sa/s (it plays: {', '.join(map(str, caps.rates))})")
        else:
            self.rates[1] = fr.Rate(plan.whole_rate, 1)
        if caps.max_payload < fr.MIN_PAYLOAD:
            problems.append(f"it accepts payloads of only {caps.max_payload} bytes")
        if plan.limits is not None and plan.generator is not None:
            problems += _profile_problems(plan.generator.output, caps.word_bits, caps.clock)
        return problems

    def check_caps_v2(self, caps: fr.CapabilitiesV2) -> list:
        problems = self._trigger_problems(caps)
        if caps.max_payload < fr.MIN_PAYLOAD:
            problems.append(f"it accepts payloads of only {caps.max_payload} bytes")
        for plan in self.plans:
            if not 1 <= plan.channel <= len(caps.channels):
                problems.append(f"it has {len(caps.channels)} channel(s), no channel {plan.channel}")
                continue
            problems += [f"channel {plan.channel}: {p}" for p in self._channel_problems(plan, caps)]
        return problems

    def _trigger_problems(self, caps) -> list:
        want = self.timing
        offered = ", ".join({0: "free-running", 1: "external", 2: "software"}[int(s)] for s in caps.sources) or "none"
        if fr.SOURCES_BY_NAME[want.source] not in caps.sources:
            why = " a pulsed scenario would free-run instead of starting at each pulse" if want.triggered else ""
            return [f"it cannot start on a{'n' if want.source == 'external' else ''} {want.source} trigger "
                    f"(it offers: {offered});{why}".rstrip(";")]
        problems = []
        if want.source == "external" and fr.Edge[want.edge.upper()] not in caps.edges:
            problems.append(f"its trigger input has no {want.edge} edge")
        delay = want.wire().delay
        if delay and (not caps.delay_step or delay > caps.delay_max):
            problems.append(f"a start delay of {delay} ns is beyond what it offers (at most {caps.delay_max} ns "
                            f"in steps of {caps.delay_step} ns)")
        return problems

    def _channel_problems(self, plan, caps) -> list:
        ch = caps.channels[plan.channel - 1]
        problems = []
        fmt = fr.choose_format(ch.formats, plan.low, plan.high, preferred=plan.format)
        if fmt is None:
            names = ", ".join(f.name.lower() for f in ch.formats) or "none"
            problems.append(f"none of its formats ({names}) holds samples from {plan.low} to {plan.high}")
        else:
            plan.send_as(fmt)
        if plan.count > ch.memory:
            problems.append(f"{plan.count} samples exceed its memory of {ch.memory}")
        rate = fr.find_rate(plan.rate, caps.rates)
        if rate is None:
            problems.append(f"it does not play {plan.rate:.9g} Sa/s (it plays: "
                            f"{', '.join(f'{r.value:.9g}' for r in caps.rates)})")
        else:
            self.rates[plan.channel] = rate
        if plan.low < ch.low or plan.high > ch.high:
            problems.append(f"samples from {plan.low} to {plan.high} leave its output range {ch.low} .. {ch.high}"
                            + (" ({:.6g} .. {:.6g} Hz)".format(*ch.range_hz()) if ch.range_hz() else ""))
        if plan.limits is not None and plan.generator is not None:
            if ch.output != fr.Output.FREQUENCY:
                problems.append("it drives a voltage, the profile a DDS frequency")
            else:
                problems += _profile_problems(plan.generator.output, ch.bits, ch.clock)
        return problems

    # -- TRIGGER --------------------------------------------------------------------------------
    def set_trigger(self) -> None:
        want = self.timing.wire()
        data = self._call(fr.MsgType.TRIGGER, want.pack(), "trigger", restart_ok=False)
        try:
            got = fr.Trigger.unpack(data)
        except fr.FrameError as exc:
            raise InstrumentError(f"malformed TRIGGER reply ({exc})", step="trigger") from None
        step = self.caps.delay_step
        if (got.source, got.mode) != (want.source, want.mode) or (
                want.source == fr.Source.EXTERNAL and got.edge != want.edge) or abs(got.delay - want.delay) > step / 2:
            raise InstrumentError(f"the board set '{got.describe()}', asked for '{want.describe()}'", step="trigger")
        self.trigger = got
        self.report["trigger"] = got.describe()
        self.step("trigger", got.describe())

    # -- one channel's table --------------------------------------------------------------------
    def begin_payload(self, plan) -> bytes:
        if self.version == 1:
            return fr.Begin(plan.send_format, plan.count, plan.send_crc, self.rates[1].num).pack()
        return fr.BeginV2(plan.send_format, plan.channel, plan.count, plan.send_crc, self.rates[plan.channel]).pack()

    def upload(self, plan) -> None:
        link = self.link
        self._call(fr.MsgType.BEGIN, self.begin_payload(plan), "begin")
        fmt = plan.send_format.name.lower()
        self.step("begin", f"channel {plan.channel}: {plan.count} samples {fmt} at {plan.rate:.9g} Sa/s, "
                           f"CRC-32 0x{plan.send_crc:08x}", channel=plan.channel, count=plan.count, format=fmt,
                  rate=plan.rate, crc32=plan.send_crc)
        frames, per_frame = self.send_data(plan)
        self.report["frames"] += frames
        self.step("data", f"channel {plan.channel}: {plan.send_nbytes} bytes in {frames} frames",
                  bytes=plan.send_nbytes, frames=frames, frame_bytes=per_frame)
        # the board computes the whole-table CRC; allow it the time to read the table again
        long_wait = link.reply_timeout(plan.send_nbytes)
        data = self._call(fr.MsgType.END, b"", "verify", timeout=long_wait)
        board_crc = fr.parse_u32(data) if len(data) == 4 else None
        if board_crc != plan.send_crc:
            said = "no CRC" if board_crc is None else f"whole-table CRC-32 0x{board_crc:08x}"
            raise InstrumentError(f"the board reports {said} on channel {plan.channel}, expected "
                                  f"0x{plan.send_crc:08x}; not committed", step="verify")
        verification = self.report["verification"] or {"method": "crc32", "ok": True, "committed": False,
                                                        "expected_crc32": plan.send_crc,
                                                        "instrument_crc32": board_crc}
        verification.setdefault("channels", {})[str(plan.channel)] = board_crc
        self.report["verification"] = verification
        self.step("verify", f"channel {plan.channel}: board computed CRC-32 0x{board_crc:08x} over "
                            f"{plan.send_nbytes} bytes", crc32=board_crc)
        data = self._call(fr.MsgType.COMMIT, b"", "commit", timeout=long_wait)
        try:
            committed = fr.TableId.unpack(data) if self.version == 1 else fr.TableIdV2.unpack(data)
        except fr.FrameError as exc:
            raise InstrumentError(f"malformed COMMIT reply ({exc})", step="commit") from None
        self._check_table(plan, committed, "commit")
        self.step("commit", f"channel {plan.channel}: committed CRC-32 0x{committed.crc:08x}", crc32=committed.crc)

    def send_data(self, plan) -> tuple:
        """DATA frames of whole samples until the board has every byte; returns (frames, bytes per frame)."""
        # check_caps made sure the board takes >= MIN_PAYLOAD bytes: one sample of the widest format fits
        per_frame = min(plan.frame_bytes, self.caps.max_payload - fr.DATA_PREFIX)
        per_frame -= per_frame % plan.send_itemsize
        source = TableBytes(plan)
        offset = frames = rewinds = 0
        progress = self.delivery.progress
        if progress:
            progress(0, plan.send_nbytes)
        while offset < plan.send_nbytes:
            chunk = source.read(offset, per_frame)
            step = f"data at byte {offset}" + (f" of channel {plan.channel}" if len(self.plans) > 1 else "")
            try:
                data = self.link.exchange(fr.MsgType.DATA, fr.data_payload(offset, chunk), step)
            except Refused as refused:
                r = refused.refusal
                if r.reason == fr.Reason.BAD_OFFSET and r.detail <= plan.send_nbytes:
                    self.report["retries"] += 1
                    rewinds += 1
                    if rewinds > plan.retries:
                        raise InstrumentError(f"the board asked for another offset {rewinds} times in a row",
                                              step=step, reply=r.describe()) from None
                    offset = r.detail - r.detail % plan.send_itemsize
                    continue
                if r.reason in fr.RESTART:
                    raise Restart(step, f"DATA refused with {r.describe()}") from None
                raise InstrumentError("the board refused DATA", step=step, reply=r.describe()) from None
            frames += 1
            rewinds = 0
            try:
                acked = fr.parse_u32(data)
            except fr.FrameError as exc:
                raise InstrumentError(f"malformed DATA reply ({exc})", step=step) from None
            if acked < offset + len(chunk):
                raise InstrumentError(f"the board acknowledged only {acked} bytes after a frame ending at "
                                      f"{offset + len(chunk)}", step=step)
            offset += len(chunk)
            if progress:
                progress(offset, plan.send_nbytes)
        return frames, per_frame

    def _check_table(self, plan, table_id, step: str) -> None:
        rate = self.rates[plan.channel]
        if self.version == 1:
            ok = table_id == fr.TableId(plan.send_format, plan.count, plan.send_crc, rate.num)
            said = f"{table_id.rate} Sa/s"
        else:
            ok = ((table_id.format, table_id.channel, table_id.count, table_id.crc)
                  == (plan.send_format, plan.channel, plan.count, plan.send_crc)
                  and table_id.rate.den != 0 and table_id.rate.same(rate))
            said = f"{table_id.rate} Sa/s"
        if not ok:
            raise InstrumentError(f"channel {plan.channel}: the board holds format {table_id.format}, "
                                  f"{table_id.count} samples, CRC-32 0x{table_id.crc:08x} at {said}; expected "
                                  f"format {int(plan.send_format)}, {plan.count} samples, CRC-32 "
                                  f"0x{plan.send_crc:08x} at {rate} Sa/s", step=step)

    # -- read-back and ARM ----------------------------------------------------------------------
    def status(self, step: str):
        data = self._call(fr.MsgType.STATUS, b"", step, restart_ok=False)
        try:
            return fr.parse_status(data)
        except fr.FrameError as exc:
            raise InstrumentError(f"malformed STATUS reply ({exc})", step=step) from None

    def _check_status_tables(self, st, step: str) -> None:
        for plan in self.plans:
            if isinstance(st, fr.Status):
                table_id = st.table
            elif plan.channel <= len(st.tables):
                table_id = st.tables[plan.channel - 1]
            else:
                raise InstrumentError(f"STATUS describes {len(st.tables)} channels, not channel {plan.channel}",
                                      step=step)
            self._check_table(plan, table_id, step)
        if isinstance(st, fr.StatusV2) and self.trigger is not None and st.trigger != self.trigger:
            raise InstrumentError(f"the board reports the trigger '{st.trigger.describe()}', set was "
                                  f"'{self.trigger.describe()}'", step=step)

    def confirm(self) -> None:
        st = self.status("status")
        self._check_status_tables(st, "status")
        if st.armed:
            raise InstrumentError("the board says its output is armed after an upload without --arm",
                                  step="status")
        self.report["verification"]["committed"] = True
        crcs = ", ".join(f"channel {p.channel} CRC-32 0x{p.send_crc:08x}" for p in self.plans)
        self.step("status", f"holds {crcs}, output off", crc32=self.plans[0].send_crc, armed=st.armed)

    def arm(self) -> None:
        data = self._call(fr.MsgType.ARM, b"", "arm", restart_ok=False)
        if self.version == 1:
            played = {1: fr.parse_u32(data) if len(data) == 4 else None}
        else:
            played = {i + 1: fr.parse_u32(data[4 * i:4 * i + 4]) for i in range(len(data) // 4)}
        wrong = [p.channel for p in self.plans if played.get(p.channel) != p.send_crc]
        if wrong:
            raise InstrumentError(f"the board armed a table with another CRC on channel {wrong[0]}", step="arm")
        st = self.status("arm")
        if not st.armed:
            raise InstrumentError("the board acknowledged ARM but reports its output off", step="arm")
        self._check_status_tables(st, "arm")
        self.report["armed"] = True
        self.step("arm", "output ON" + (f" ({self.trigger.describe()})" if self.trigger else ""),
                  crc32=self.plans[0].send_crc)

    def safe_disarm(self) -> str:
        """After a failure: switch the board's output off (every channel of this upload: one switch) and
        read it back; says what happened, naming the channels when there are several.

        The confirmation is the board's answer to this DISARM (matched by
        sequence number and request type, after the input was cleared) and a
        STATUS that reports the output off.
        """
        outputs, are, were = self._outputs()
        them = "it" if are == "is" else "them"
        unconfirmed = f"could not confirm that {outputs} {are} off: check {them} before going on"
        try:
            self.link.retries = min(self.link.retries, 2)
            self.link.flush_input()
            self.link.exchange(fr.MsgType.DISARM, b"", "disarm")
            armed = self.status("disarm").armed
        except Refused as refused:
            self.report["steps"].append({"step": "disarm", "ok": False, "detail": refused.refusal.describe()})
            return f"the board refused DISARM ({refused.refusal.describe()}); {unconfirmed}"
        except Exception as exc:       # the link may be gone: report, never mask the first error
            self.report["steps"].append({"step": "disarm", "ok": False, "detail": str(exc)})
            return unconfirmed
        if armed:
            self.report["steps"].append({"step": "disarm", "ok": False, "detail": "STATUS reports armed"})
            still = "the output" if are == "is" else outputs
            return (f"{still} may still be ON: the board acknowledged DISARM but its STATUS reports the output "
                    f"armed; check {them} by hand before going on")
        self.report["armed"] = False
        self.report["steps"].append({"step": "disarm", "ok": True, "detail": "after a failure, read back"})
        return f"{outputs} {were} switched off"

    def _outputs(self) -> tuple[str, str, str]:
        """The outputs this upload plays, as the switch-off messages name them, with their verbs."""
        channels = sorted({p.channel for p in self.plans})
        if len(channels) < 2:
            return "the board's output", "is", "was"
        return f"the board's outputs (channels {listed(channels)})", "are", "were"


def _profile_problems(output, bits: int, clock: int) -> list:
    """Where a DDS channel's tuning-word bits or clock contradict the generator profile."""
    problems = []
    if bits != output.word_bits:
        problems.append(f"its tuning words have {bits} bits, the profile says {output.word_bits}")
    if abs(clock - output.clock) > 1e-9 * output.clock:
        problems.append(f"its DDS clock is {clock} Hz, the profile says {output.clock:g} Hz")
    return problems


class TableBytes:
    """Random access to the table's little-endian bytes, streaming chunk by chunk."""

    def __init__(self, plan: _Plan, chunk: int | None = None):
        self.plan = plan
        self.chunk = chunk
        self._iter = None
        self._buf = b""
        self._start = 0           # byte offset of _buf[0]

    def _restart(self):
        self._iter = iter(self.plan.table.chunks() if self.chunk is None else self.plan.table.chunks(self.chunk))
        self._buf, self._start = b"", 0

    def read(self, offset: int, n: int) -> bytes:
        import numpy as np

        if self._iter is None or offset < self._start:
            self._restart()
        while offset + n > self._start + len(self._buf):
            try:
                chunk = next(self._iter)
            except StopIteration:
                break
            keep = self._buf[max(0, offset - self._start):]
            self._start += len(self._buf) - len(keep)
            self._buf = keep + np.ascontiguousarray(chunk, dtype=self.plan.send_dtype).tobytes()
        return self._buf[offset - self._start:offset - self._start + n]
