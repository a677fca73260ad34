"""``serial`` driver: upload a table to a ramp board with sweepgen's frame protocol.

The link is opened with pyserial's ``serial_for_url``, so any pyserial URL works:
a device path (``/dev/ttyACM0``, ``COM3``), ``socket://host:port``, ``rfc2217://``
and so on. The protocol (frames, messages, reason codes, timeouts, the commit
rule) is specified in ``serial_protocol.md`` beside this module.

Sequence: check the table before anything is sent (format, length, rate, and for
DDS boards every tuning word inside the board's output range; the whole-table
CRC-32 over the little-endian bytes); open the link; HELLO (compare the board's
capabilities with the generator profile); DISARM; BEGIN; DATA frames with
progress; END (the board must report the same whole-table CRC); COMMIT (only
then); STATUS (the committed table must be ours); ARM only when
``Delivery.arm`` is set. Each frame is sent again on a timeout, a damaged reply
or a FRAME_CRC/BUSY refusal, up to ``retries`` times; the upload starts over
from HELLO when the board lost it (reset, TABLE_CRC, ...), up to ``restarts``
times. Any failure sends DISARM (best effort) before the error is raised: the
board is left with its output off.
"""

from __future__ import annotations

import collections
import time
import zlib
from typing import ClassVar

from sweepgen.drivers.base import Delivery, Driver
from sweepgen.errors import CheckFailed, InputError, InstrumentError
from sweepgen.wire import frames as fr
from sweepgen.wire.bounds import clamp_deadline, transfer_deadline

DEFAULT_RETRIES = 5
DEFAULT_RESTARTS = 2
DEFAULT_FRAME_BYTES = 4096
DEFAULT_TIMEOUT = 2.0          # s, without a generator profile
DEFAULT_THROUGHPUT = 10e3      # B/s, without a generator profile or baud rate
DEFAULT_BAUD = 115200          # baud, when the profile names none (a common UART rate, common practice)
BITS_PER_BYTE = 10             # on the line: start bit, 8 data bits, stop bit (8N1, as serial_protocol.md specifies)
_REPLY_ALLOWANCE = 128         # bytes a reply may take beyond the request, for timeouts


class _Refused(Exception):
    """The board refused a request for a reason other than 'send it again'."""

    def __init__(self, step: str, refusal: fr.Refusal):
        super().__init__(refusal.describe())
        self.step = step
        self.refusal = refusal


class _Restart(Exception):
    """The board lost the upload; start over from HELLO."""

    def __init__(self, step: str, why: str):
        super().__init__(why)
        self.step = step
        self.why = why


class _Plan:
    """What will be sent, established before the link is opened."""

    def __init__(self, table, generator, options: dict):
        info = table.info
        self.table = table
        _check_options(options)
        try:
            self.format = fr.format_for_dtype(info.dtype)
        except fr.FrameError as exc:
            raise InputError(f"{exc}; render the table for a ramp board", key="generator") from None
        self.dtype = self.format.dtype
        self.itemsize = self.format.itemsize
        self.count = int(info.count)
        self.nbytes = self.count * self.itemsize
        if self.count < 1:
            raise CheckFailed("the table is empty; nothing to upload")
        if self.count > 0xFFFFFFFF or self.nbytes > 0xFFFFFFFF:
            raise CheckFailed(f"{self.count} samples do not fit the protocol's 32-bit lengths")
        rate = float(info.sample_rate)
        self.rate = int(round(rate))
        if not rate > 0 or abs(rate - self.rate) > 1e-6 * rate or self.rate > 0xFFFFFFFF:
            raise CheckFailed(f"sample rate {rate:g} Sa/s is not a whole number of samples per second "
                              "(the protocol announces rates as integers)")
        self.generator = generator
        if generator is not None:
            sampling = generator.sampling
            if self.count > sampling.memory:
                raise CheckFailed(f"{self.count} samples exceed the board memory of {sampling.memory} "
                                  f"samples ({generator.key})")
            if not sampling.allows(rate):
                raise CheckFailed(f"sample rate {rate:g} Sa/s is not one the board plays ({generator.key})")
        self.limits = self._word_limits(info, generator)
        self.retries = _option_int(options, "retries", DEFAULT_RETRIES, 0)
        self.restarts = _option_int(options, "restarts", DEFAULT_RESTARTS, 0)
        frame_bytes = _option_int(options, "frame_bytes", DEFAULT_FRAME_BYTES, self.itemsize)
        self.frame_bytes = frame_bytes - frame_bytes % self.itemsize
        self.crc = self._scan()

    @staticmethod
    def _word_limits(info, generator):
        """Lowest and highest DDS tuning word inside the output range (FTW = round(f 2^N / f_clk))."""
        if generator is None or generator.output.kind != "frequency" or info.output != "frequency":
            return None
        out = generator.output
        scale = 2.0 ** out.word_bits / out.clock      # DDS tuning word per Hz (common practice)
        return int(round(out.range_min * scale)), int(round(out.range_max * scale)), out

    def _scan(self) -> int:
        """Whole-table CRC-32 of the little-endian bytes; refuse words outside the output range."""
        import numpy as np

        crc = 0
        start = 0
        for chunk in self.table.chunks():
            codes = np.ascontiguousarray(chunk, dtype=self.dtype)
            if self.limits is not None and codes.size:
                lo, hi, out = self.limits
                bad = np.flatnonzero((codes < lo) | (codes > hi))
                if bad.size:
                    i = int(bad[0])
                    f = int(codes[i]) * out.clock / 2.0 ** out.word_bits
                    raise CheckFailed(f"sample {start + i}: tuning word {int(codes[i])} is {f:.6g} Hz, outside the "
                                      f"board's output range [{out.range_min:g}, {out.range_max:g}] Hz; "
                                      "nothing was sent")
            crc = zlib.crc32(codes.tobytes(), crc)
            start += codes.size
        if start != self.count:
            raise CheckFailed(f"the table yielded {start} samples, its header says {self.count}")
        return crc & 0xFFFFFFFF

    def begin(self) -> fr.Begin:
        return fr.Begin(self.format, self.count, self.crc, self.rate)


def _check_options(options: dict) -> None:
    unknown = sorted(set(options) - set(SerialDriver.options))
    if unknown:
        raise InputError(f"the serial driver has no option {unknown[0]!r} (options: "
                         f"{', '.join(sorted(SerialDriver.options))})", key="--option")


def _option_int(options: dict, key: str, default: int, minimum: int) -> int:
    value = options.get(key, default)
    number = None
    if isinstance(value, int) and not isinstance(value, bool):
        number = value
    elif isinstance(value, str) and value.strip().isdigit():
        number = int(value)
    if number is None or number < minimum:
        raise InputError(f"expected a whole number >= {minimum}, got {value!r}", key=f"--option {key}")
    return number


class _TableBytes:
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
            self._buf = keep + np.ascontiguousarray(chunk, dtype=self.plan.dtype).tobytes()
        return self._buf[offset - self._start:offset - self._start + n]


class _Link:
    """Frames over one pyserial port: send a request, wait for its reply, retry."""

    POLL = 0.02               # s, pyserial read timeout; waiting loops until the reply deadline

    def __init__(self, port, *, retries: int, timeout: float, throughput: float, report: dict):
        self.port = port
        self.retries = retries
        self.timeout = timeout
        self.throughput = throughput
        self.report = report
        self.decoder = fr.Decoder(fr.MAX_REPLY)
        self.queue: collections.deque = collections.deque()
        self.seq = 0
        self.sent = 0             # bytes written to the link, retransmissions included

    def reply_timeout(self, nbytes: int) -> float:
        """Base timeout of the link plus the time to move ``nbytes`` and a reply at its throughput,
        clamped (:mod:`sweepgen.wire.bounds`)."""
        return transfer_deadline(self.timeout, nbytes + _REPLY_ALLOWANCE, self.throughput, factor=1.0)

    def flush_input(self) -> None:
        """Forget every byte received so far (decoded, half-decoded or still in the port's buffer)."""
        try:
            self.port.reset_input_buffer()
        except Exception:            # a broken link: the decoder below still starts afresh
            pass
        self.decoder.reset()
        self.queue.clear()

    def _write(self, raw: bytes, step: str) -> None:
        import serial

        try:
            self.port.write(raw)
            self.sent += len(raw)
        except (serial.SerialException, OSError) as exc:
            raise InstrumentError(f"the link failed while sending ({exc})", step=step) from None

    def _next(self, deadline: float, step: str):
        """The next frame (or BadFrame) from the board, or None at the deadline."""
        import serial

        while not self.queue:
            if time.monotonic() >= deadline:
                return None
            try:
                # what the frame needs, or what is already waiting (a board that talks without end is
                # read in pieces, not byte by byte)
                data = self.port.read(max(self.decoder.wanted(), min(self.port.in_waiting, 1 << 16)))
            except (serial.SerialException, OSError) as exc:
                raise InstrumentError(f"the link failed while waiting for a reply ({exc})", step=step) from None
            if data:
                self.queue.extend(self.decoder.feed(data))
        return self.queue.popleft()

    def exchange(self, msg_type: int, payload: bytes, step: str, timeout: float | None = None) -> bytes:
        """Send one request until the board acknowledges it; return the ACK's reply data.

        Raises :class:`_Refused` for a refusal other than FRAME_CRC/BUSY, and
        :class:`InstrumentError` when the retries are used up.
        """
        self.seq = (self.seq + 1) & 0xFF
        seq = self.seq
        raw = fr.encode(msg_type, seq, payload)
        wait = timeout if timeout is not None else self.reply_timeout(len(raw))
        problem = "no reply"
        last_refusal = None
        for attempt in range(self.retries + 1):
            if attempt:
                self.report["retries"] += 1
            self._write(raw, step)
            outcome = self._await(msg_type, seq, time.monotonic() + wait, step)
            if isinstance(outcome, bytes):
                return outcome
            if isinstance(outcome, fr.Refusal):
                if outcome.reason not in fr.RETRY_SAME:
                    raise _Refused(step, outcome)
                last_refusal = outcome
                problem = f"refused with {fr.reason_name(outcome.reason)}"
            elif outcome == "damaged":
                problem = "the reply failed its CRC"
            else:
                problem = f"no reply within {wait:.3g} s"
        raise InstrumentError(f"{problem} after {self.retries + 1} attempts "
                              f"({fr.type_name(msg_type).upper()} frame, sequence number {seq})",
                              step=step, reply=last_refusal.describe() if last_refusal else None)

    def _await(self, msg_type, seq, deadline, step):
        """The reply to request ``seq``: ACK data (bytes), a Refusal, "damaged" or None (timeout)."""
        while True:
            item = self._next(deadline, step)
            if item is None:
                return None
            if isinstance(item, fr.BadFrame):
                self.report["damaged_replies"] += 1
                return "damaged"
            if item.seq != seq:
                continue                      # a late reply to an earlier request
            try:
                if item.type == fr.MsgType.ACK:
                    request, data = fr.parse_ack(item.payload)
                    if request == msg_type:
                        return data
                elif item.type == fr.MsgType.REFUSE:
                    refusal = fr.Refusal.unpack(item.payload)
                    if refusal.request_type == msg_type:
                        return refusal
            except fr.FrameError:
                self.report["damaged_replies"] += 1
                return "damaged"


class SerialDriver(Driver):
    """Upload to a ramp board over a serial link (any pyserial URL) with the frame protocol."""

    name: ClassVar[str] = "serial"
    kind: ClassVar[str] = "instrument"
    description: ClassVar[str] = ("ramp board on a serial link (device path or any pyserial URL), "
                                  "framed protocol with CRC-32, verified commit")
    options: ClassVar[dict] = {
        "retries": f"times one frame is sent again on a timeout or refusal (default {DEFAULT_RETRIES})",
        "restarts": f"times the upload starts over when the board lost it (default {DEFAULT_RESTARTS})",
        "frame_bytes": f"table bytes per DATA frame, at most what the board accepts (default {DEFAULT_FRAME_BYTES})",
    }

    def check_destination(self, delivery: Delivery) -> str:
        return _url(delivery)

    def deliver(self, table, delivery: Delivery) -> dict:
        generator = delivery.generator
        plan = _Plan(table, generator, dict(delivery.options))
        link_cfg = getattr(generator, "link", None)
        baud = getattr(link_cfg, "baud", None) or DEFAULT_BAUD
        timeout = clamp_deadline(getattr(link_cfg, "timeout", None) or DEFAULT_TIMEOUT)
        throughput = (getattr(link_cfg, "throughput", None)
                      or (baud / BITS_PER_BYTE if link_cfg else DEFAULT_THROUGHPUT))
        url = _url(delivery)
        report = {
            "driver": self.name, "destination": url, "dry_run": bool(delivery.dry_run), "armed": False,
            "table": {"count": plan.count, "format": plan.format.name.lower(), "sample_rate": plan.rate,
                      "bytes": plan.nbytes, "crc32": plan.crc},
            "bytes": plan.nbytes, "frames": 0, "retries": 0, "restarts": 0, "damaged_replies": 0,
            "steps": [], "verification": None,
        }
        n_data = -(-plan.nbytes // plan.frame_bytes)
        if delivery.dry_run:
            report["log"] = _dry_log(plan, n_data, delivery.arm)
            report["steps"] = [{"step": "check", "ok": True,
                                "detail": f"{plan.count} samples, CRC-32 0x{plan.crc:08x}, nothing sent"}]
            report["bytes"] = sum(e["bytes"] for e in report["log"])
            report["verification"] = {"method": "crc32", "ok": None}
            return report
        t0 = time.monotonic()
        port = _open(url, baud, transfer_deadline(timeout, plan.frame_bytes + fr.OVERHEAD, throughput, factor=1.0),
                     "--serial-port" if delivery.destination else "link.port")
        report["steps"].append({"step": "open", "ok": True, "duration": time.monotonic() - t0, "detail": url})
        link = _Link(port, retries=plan.retries, timeout=timeout, throughput=throughput, report=report)
        session = _Session(link, plan, delivery, report)
        try:
            session.run()
        except InstrumentError as exc:
            note = session.safe_disarm()
            exc.args = (f"{exc.args[0]}; {note}",)
            raise
        except BaseException:
            session.safe_disarm()
            raise
        finally:
            try:
                port.close()
            except Exception:
                pass
        report["bytes"] = link.sent
        report["duration"] = time.monotonic() - t0
        return report


def _url(delivery: Delivery) -> str:
    """The port to open: the destination, else the profile's; refused when it cannot name one."""
    if delivery.destination is not None and delivery.destination != "":
        return check_url(delivery.destination, key="--serial-port")
    generator = delivery.generator
    address = getattr(getattr(generator, "link", None), "address", "")
    if not address:
        raise InputError("no serial port given and the generator profile names none", key="--serial-port")
    return check_url(address, key="link.port", file=str(generator.path) if getattr(generator, "path", None) else None)


def check_url(url, *, key: str, file=None) -> str:
    """Refuse a serial device or pyserial URL that cannot name a port (exit 2), before opening it.

    ``socket://`` and ``rfc2217://`` URLs need a host and a TCP port from 1 to 65535.
    """
    from urllib.parse import urlsplit

    if not isinstance(url, str) or not url.strip():
        raise InputError("expected a serial device or pyserial URL such as /dev/ttyACM0 or "
                         "socket://127.0.0.1:7450, got an empty one", key=key, file=file)
    scheme = url.split("://", 1)[0].lower() if "://" in url else ""
    if scheme in ("socket", "rfc2217"):
        parts = urlsplit(url)
        try:
            port = parts.port
        except ValueError:
            port = None
        if not parts.hostname or port is None or not 1 <= port <= 65535:
            raise InputError(f"expected {scheme}://HOST:PORT with a TCP port from 1 to 65535, got {url!r}",
                             key=key, file=file)
    elif scheme and not _url_handler(scheme):
        raise InputError(f"not a serial device or pyserial URL: {url!r} (invalid URL, protocol {scheme!r} not known)",
                         key=key, file=file)
    return url


def _url_handler(scheme: str) -> bool:
    """Whether pyserial has a handler for ``scheme://`` URLs (the packages it searches itself)."""
    import importlib.util

    import serial

    for package in serial.protocol_handler_packages:
        try:
            if importlib.util.find_spec(f"{package}.protocol_{scheme}") is not None:
                return True
        except (ImportError, ValueError):
            continue
    return False


def _open(url: str, baud: int, write_timeout: float, key: str):
    """The pyserial port for ``url``: a URL pyserial does not know is bad input, a port it cannot
    open an instrument failure."""
    import serial

    try:
        return serial.serial_for_url(url, baudrate=baud, timeout=_Link.POLL, write_timeout=write_timeout)
    except ValueError as exc:
        raise InputError(f"not a serial device or pyserial URL: {url!r} ({exc})", key=key) from None
    except (serial.SerialException, OSError) as exc:
        raise InstrumentError(f"cannot open {url} ({exc})", step="open") from None


class _Session:
    """One upload over an open link."""

    def __init__(self, link: _Link, plan: _Plan, delivery: Delivery, report: dict):
        self.link = link
        self.plan = plan
        self.delivery = delivery
        self.report = report
        self.caps = None
        self.bytes = _TableBytes(plan)
        self._t = time.monotonic()

    def step(self, name, detail: str, **extra):
        now = time.monotonic()
        self.report["steps"].append({"step": name, "ok": True, "duration": now - self._t, "detail": detail,
                                     **extra})
        self._t = now

    def run(self) -> None:
        self.hello()
        self._call(fr.MsgType.DISARM, b"", "disarm", restart_ok=False)
        self.step("disarm", "output off")
        for attempt in range(self.plan.restarts + 1):
            try:
                self.upload()
                break
            except _Restart as restart:
                if attempt == self.plan.restarts:
                    raise InstrumentError(f"the board lost the upload {attempt + 1} times (last: {restart.why}); "
                                          "nothing was committed", step=restart.step) from None
                self.report["restarts"] += 1
                self.report["steps"].append({"step": restart.step, "ok": False, "detail": restart.why,
                                             "action": "starting over"})
                self.hello()
                self._call(fr.MsgType.DISARM, b"", "disarm", restart_ok=False)
        self.confirm()
        if self.delivery.arm:
            self.arm()

    def _call(self, msg_type, payload, step, timeout=None, restart_ok=True):
        try:
            return self.link.exchange(msg_type, payload, step, timeout)
        except _Refused as refused:
            r = refused.refusal
            if restart_ok and r.reason in fr.RESTART:
                raise _Restart(step, f"{fr.type_name(msg_type).upper()} refused with {r.describe()}") from None
            raise InstrumentError(f"the board refused {fr.type_name(msg_type).upper()}", step=step,
                                  reply=r.describe()) from None

    def hello(self) -> None:
        data = self._call(fr.MsgType.HELLO, fr.hello_payload(), "hello", restart_ok=False)
        try:
            caps = fr.Capabilities.unpack(data)
        except fr.FrameError as exc:
            raise InstrumentError(f"malformed HELLO reply ({exc})", step="hello") from None
        self.check_caps(caps)
        self.caps = caps
        self.step("hello", f"{caps.name or 'board'}: protocol {caps.version}, memory {caps.memory} samples, "
                           f"payload {caps.max_payload} B", board=caps.to_json())
        self.report["board"] = caps.to_json()

    def check_caps(self, caps: fr.Capabilities) -> None:
        plan = self.plan
        problems = []
        if caps.version != fr.PROTOCOL_VERSION:
            problems.append(f"it speaks protocol version {caps.version}, not {fr.PROTOCOL_VERSION}")
        if plan.format not in caps.formats:
            names = ", ".join(f.name.lower() for f in caps.formats) or "none"
            problems.append(f"it does not take {plan.format.name.lower()} tables (it takes: {names})")
        if plan.count > caps.memory:
            problems.append(f"{plan.count} samples exceed its memory of {caps.memory}")
        if plan.rate not in caps.rates:
            problems.append(f"it does not play {plan.rate} Sa/s (it plays: {', '.join(map(str, caps.rates))})")
        if caps.max_payload < fr.MIN_PAYLOAD:
            problems.append(f"it accepts payloads of only {caps.max_payload} bytes")
        gen = plan.generator
        if gen is not None and gen.output.kind == "frequency" and self.plan.limits is not None:
            if caps.word_bits != gen.output.word_bits:
                problems.append(f"its tuning words have {caps.word_bits} bits, the profile says "
                                f"{gen.output.word_bits}")
            if abs(caps.clock - gen.output.clock) > 1e-9 * gen.output.clock:
                problems.append(f"its DDS clock is {caps.clock} Hz, the profile says {gen.output.clock:g} Hz")
        if problems:
            raise InstrumentError("the board does not match the table or the generator profile: "
                                  + "; ".join(problems), step="hello")

    def upload(self) -> None:
        plan, link = self.plan, self.link
        self._call(fr.MsgType.BEGIN, plan.begin().pack(), "begin")
        self.step("begin", f"{plan.count} samples {plan.format.name.lower()} at {plan.rate} Sa/s, "
                           f"CRC-32 0x{plan.crc:08x}", count=plan.count, format=plan.format.name.lower(),
                  rate=plan.rate, crc32=plan.crc)
        # whole samples per frame; check_caps made sure the board takes >= MIN_PAYLOAD bytes, so at
        # least one sample of the widest format (8 bytes) fits
        per_frame = min(plan.frame_bytes, self.caps.max_payload - fr.DATA_PREFIX)
        per_frame -= per_frame % plan.itemsize
        offset = 0
        frames = 0
        rewinds = 0
        progress = self.delivery.progress
        if progress:
            progress(0, plan.nbytes)
        while offset < plan.nbytes:
            chunk = self.bytes.read(offset, per_frame)
            step = f"data at byte {offset}"
            try:
                data = link.exchange(fr.MsgType.DATA, fr.data_payload(offset, chunk), step)
            except _Refused as refused:
                r = refused.refusal
                if r.reason == fr.Reason.BAD_OFFSET and r.detail <= plan.nbytes:
                    self.report["retries"] += 1
                    rewinds += 1
                    if rewinds > plan.retries:
                        raise InstrumentError(f"the board asked for another offset {rewinds} times in a row",
                                              step=step, reply=r.describe()) from None
                    offset = r.detail - r.detail % plan.itemsize
                    continue
                if r.reason in fr.RESTART:
                    raise _Restart(step, f"DATA refused with {r.describe()}") from None
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
                progress(offset, plan.nbytes)
        self.report["frames"] += frames
        self.step("data", f"{plan.nbytes} bytes in {frames} frames", bytes=plan.nbytes, frames=frames,
                  frame_bytes=per_frame)
        # the board computes the whole-table CRC; allow it the time to read the table again
        long_wait = link.reply_timeout(plan.nbytes)
        data = self._call(fr.MsgType.END, b"", "verify", timeout=long_wait)
        board_crc = fr.parse_u32(data) if len(data) == 4 else None
        if board_crc != plan.crc:
            said = "no CRC" if board_crc is None else f"whole-table CRC-32 0x{board_crc:08x}"
            raise InstrumentError(f"the board reports {said}, expected 0x{plan.crc:08x}; not committed",
                                  step="verify")
        self.report["verification"] = {"method": "crc32", "expected_crc32": plan.crc, "instrument_crc32": board_crc,
                                       "ok": True, "committed": False}
        self.step("verify", f"board computed CRC-32 0x{board_crc:08x} over {plan.nbytes} bytes", crc32=board_crc)
        data = self._call(fr.MsgType.COMMIT, b"", "commit", timeout=long_wait)
        try:
            committed = fr.TableId.unpack(data)
        except fr.FrameError as exc:
            raise InstrumentError(f"malformed COMMIT reply ({exc})", step="commit") from None
        self._check_table(committed, "commit")
        self.step("commit", f"committed CRC-32 0x{committed.crc:08x}", crc32=committed.crc)

    def _check_table(self, table_id: fr.TableId, step: str) -> None:
        plan = self.plan
        expected = fr.TableId(plan.format, plan.count, plan.crc, plan.rate)
        if table_id != expected:
            raise InstrumentError(f"the board holds format {table_id.format}, {table_id.count} samples, CRC-32 "
                                  f"0x{table_id.crc:08x} at {table_id.rate} Sa/s; expected format "
                                  f"{expected.format}, {expected.count} samples, CRC-32 0x{expected.crc:08x} "
                                  f"at {expected.rate} Sa/s", step=step)

    def status(self, step: str) -> fr.Status:
        data = self._call(fr.MsgType.STATUS, b"", step, restart_ok=False)
        try:
            return fr.Status.unpack(data)
        except fr.FrameError as exc:
            raise InstrumentError(f"malformed STATUS reply ({exc})", step=step) from None

    def confirm(self) -> None:
        st = self.status("status")
        self._check_table(st.table, "status")
        if st.armed:
            raise InstrumentError("the board says its output is armed after an upload without --arm",
                                  step="status")
        self.report["verification"]["committed"] = True
        self.step("status", f"holds CRC-32 0x{st.table.crc:08x}, output off", crc32=st.table.crc, armed=st.armed)

    def arm(self) -> None:
        data = self._call(fr.MsgType.ARM, b"", "arm", restart_ok=False)
        if len(data) != 4 or fr.parse_u32(data) != self.plan.crc:
            raise InstrumentError("the board armed a table with another CRC", step="arm")
        st = self.status("arm")
        if not st.armed:
            raise InstrumentError("the board acknowledged ARM but reports its output off", step="arm")
        self._check_table(st.table, "arm")
        self.report["armed"] = True
        self.step("arm", "output ON", crc32=st.table.crc)

    def safe_disarm(self) -> str:
        """After a failure: switch the board's output off and read it back; says what happened.

        The confirmation is the board's answer to this DISARM (matched by
        sequence number and request type, after the input was cleared) and a
        STATUS that reports the output off.
        """
        unconfirmed = "could not confirm that the board's output is off: check it before going on"
        try:
            self.link.retries = min(self.link.retries, 2)
            self.link.flush_input()
            self.link.exchange(fr.MsgType.DISARM, b"", "disarm")
            armed = self.status("disarm").armed
        except _Refused as refused:
            self.report["steps"].append({"step": "disarm", "ok": False, "detail": refused.refusal.describe()})
            return f"the board refused DISARM ({refused.refusal.describe()}); {unconfirmed}"
        except Exception as exc:       # the link may be gone: report, never mask the first error
            self.report["steps"].append({"step": "disarm", "ok": False, "detail": str(exc)})
            return unconfirmed
        if armed:
            self.report["steps"].append({"step": "disarm", "ok": False, "detail": "STATUS reports armed"})
            return ("the output may still be ON: the board acknowledged DISARM but its STATUS reports the output "
                    "armed; check it by hand before going on")
        self.report["armed"] = False
        self.report["steps"].append({"step": "disarm", "ok": True, "detail": "after a failure, read back"})
        return "the board's output was switched off"


def _dry_log(plan: _Plan, n_data: int, arm: bool) -> list:
    """The frames an upload would send, with byte counts (for ``--dry-run``)."""
    begin = plan.begin()
    last = plan.nbytes - (n_data - 1) * plan.frame_bytes
    data_bytes = (n_data - 1) * (fr.OVERHEAD + fr.DATA_PREFIX + plan.frame_bytes) + fr.OVERHEAD + fr.DATA_PREFIX + last

    def entry(step, message, nbytes, detail=""):
        return {"step": step, "kind": "frame", "message": message, "bytes": nbytes, "detail": detail}

    log = [
        entry("hello", "HELLO", fr.OVERHEAD + 1, f"protocol version {fr.PROTOCOL_VERSION}"),
        entry("disarm", "DISARM", fr.OVERHEAD, "output off"),
        entry("begin", "BEGIN", fr.OVERHEAD + len(begin.pack()),
              f"{plan.format.name.lower()}, {plan.count} samples, CRC-32 0x{plan.crc:08x}, {plan.rate} Sa/s"),
        entry("data", "DATA", data_bytes,
              f"{n_data} frames of up to {plan.frame_bytes} table bytes ({plan.nbytes} bytes in all)"),
        entry("verify", "END", fr.OVERHEAD, "the board checks the whole-table CRC"),
        entry("commit", "COMMIT", fr.OVERHEAD, "only after the CRC matched"),
        entry("status", "STATUS", fr.OVERHEAD, "the committed table must be this one"),
    ]
    if arm:
        log += [entry("arm", "ARM", fr.OVERHEAD, "output on"), entry("arm", "STATUS", fr.OVERHEAD, "armed?")]
    return log
