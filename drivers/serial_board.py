"""``serial`` driver: upload tables to a ramp board with sweepgen's frame protocol.

The link is opened with pyserial's ``serial_for_url``, so any pyserial URL works:
a device path (``/dev/ttyACM0``, ``COM3``), ``socket://host:port``, ``rfc2217://``
and so on. The protocol (frames, messages, reason codes, timeouts, the commit
rule, versions 1 and 2) is specified in ``serial_protocol.md`` beside this module.

Sequence: check every table before anything is sent (format, length, rate, and
for DDS boards every tuning word inside the board's output range; the
whole-table CRC-32 over the little-endian bytes); open the link; HELLO with the
highest version sweepgen speaks, and the board's own version when it speaks an
older one; compare the board's capabilities with the tables, the trigger and
the generator profile (a pulsed scenario on a board that cannot be triggered
is refused here, before anything is uploaded or armed); DISARM; TRIGGER
(version 2); for each channel BEGIN, DATA frames with progress, END (the board
must report the same whole-table CRC), COMMIT (only then); STATUS (every
committed table must be ours, the output off); ARM only when ``Delivery.arm`` is
set. Each frame is sent again on a timeout, a damaged reply or a FRAME_CRC/BUSY
refusal, up to ``retries`` times; a channel's upload starts over from HELLO when
the board lost it (reset, TABLE_CRC, ...), up to ``restarts`` times. Any failure
sends DISARM and reads the output state back before the error is raised, and
says whether the output was confirmed off.
"""

from __future__ import annotations

import time
import zlib
from dataclasses import dataclass
from typing import ClassVar

from sweepgen.drivers._serial_link import Link
from sweepgen.drivers._serial_session import Session
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

@dataclass(frozen=True)
class BoardTiming:
    """What starts a board's playback: ``Delivery.options["timing"]`` (the playback service's timing,
    mapped by :meth:`from_timing`, or one of these).

    ``source`` is ``free`` (plays as soon as it is armed: a continuous beam),
    ``external`` (an edge on the trigger input: a pulsed source) or
    ``software``; ``mode`` is ``each`` (every trigger plays the table once),
    ``once`` (only the first trigger after arming) or ``continuous`` (the
    first trigger starts it, then it plays back to back); ``delay`` (s) is the
    start delay from the trigger to the first sample.
    """

    source: str = "free"
    edge: str = "rising"
    mode: str = "each"
    delay: float = 0.0

    def __post_init__(self):
        if self.source not in fr.SOURCES_BY_NAME or self.edge not in ("rising", "falling"):
            raise ValueError(f"no trigger source {self.source!r} or edge {self.edge!r}")
        if self.mode not in ("each", "once", "continuous"):
            raise ValueError(f"no playing mode {self.mode!r}")
        if not 0 <= self.delay <= 4.0:
            raise ValueError(f"start delay {self.delay!r} s is outside [0, 4] s (a u32 of ns)")

    @property
    def triggered(self) -> bool:
        return self.source != "free"

    @classmethod
    def from_timing(cls, timing) -> "BoardTiming":
        """The board's settings for the playback service's timing (``Playback.timing``): an external
        source starts on its edge, an internal one free-runs, a software one waits for FIRE; a burst
        of one period plays the table on each trigger, ``repeat`` plays on and on from the first."""
        if isinstance(timing, BoardTiming):
            return timing
        source = {"external": "external", "internal": "free", "software": "software",
                  "free": "free"}.get(str(getattr(timing, "source", "free")).lower())
        if source is None:
            raise InputError(f"a ramp board has no trigger source {getattr(timing, 'source', None)!r} "
                             "(it offers external, free-running and software)", key="timing.source")
        edge = str(getattr(timing, "edge", None) or "rising").lower()
        burst = str(getattr(timing, "mode", None) or "burst").lower() == "burst"
        cycles = int(getattr(timing, "cycles", None) or 1)
        if burst and cycles != 1:
            raise CheckFailed(f"a ramp board plays its table once per trigger, not a burst of {cycles} periods "
                              "(timing.cycles); use one cycle or mode = \"repeat\"")
        return cls(source, edge, "each" if burst else "continuous", float(getattr(timing, "delay", None) or 0.0))

    def wire(self) -> fr.Trigger:
        """The TRIGGER request's settings (delay in whole ns)."""
        return fr.Trigger(fr.SOURCES_BY_NAME[self.source], fr.Edge[self.edge.upper()], fr.Mode[self.mode.upper()],
                          int(round(self.delay * 1e9)))


class _Options:
    """The driver options, checked once for every channel."""

    def __init__(self, options: dict):
        options = dict(options)
        timing = options.pop("timing", None)
        if isinstance(timing, str):
            options["timing"] = timing          # given as text by a person: refused below
        _check_options(options)
        self.timing = BoardTiming() if timing is None or isinstance(timing, str) else BoardTiming.from_timing(timing)
        self.retries = _option_int(options, "retries", DEFAULT_RETRIES, 0)
        self.restarts = _option_int(options, "restarts", DEFAULT_RESTARTS, 0)
        self.frame_bytes = _option_int(options, "frame_bytes", DEFAULT_FRAME_BYTES, 8)


class _Plan:
    """What will be sent on one channel, established before the link is opened."""

    def __init__(self, table, generator, options: _Options, channel: int = 1):
        info = table.info
        self.table = table
        self.channel = int(channel)
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
        self.rate = float(info.sample_rate)
        if not 0 < self.rate < 2.0**32:
            raise CheckFailed(f"sample rate {self.rate:g} Sa/s does not fit the protocol's 32-bit rates")
        self.generator = generator
        if generator is not None:
            sampling = generator.sampling
            if self.count > sampling.memory:
                raise CheckFailed(f"{self.count} samples exceed the board memory of {sampling.memory} "
                                  f"samples ({generator.key})")
            if not sampling.allows(self.rate):
                raise CheckFailed(f"sample rate {self.rate:g} Sa/s is not one the board plays ({generator.key})")
        self.limits = self._word_limits(info, generator)
        self.retries, self.restarts = options.retries, options.restarts
        self.frame_bytes = max(options.frame_bytes - options.frame_bytes % self.itemsize, self.itemsize)
        self.low = self.high = 0
        self.crc = self._scan()
        self.send_as(self.format)

    @property
    def whole_rate(self) -> int | None:
        """The rate as a whole number of Sa/s (what version 1 can say), or None."""
        r = int(round(self.rate))
        return r if abs(self.rate - r) <= 1e-9 * self.rate else None

    def send_as(self, fmt: fr.Format) -> None:
        """Send the samples in ``fmt`` (chosen among the board's formats; every sample fits unchanged)."""
        self.send_format = fr.Format(fmt)
        self.send_dtype = self.send_format.dtype
        self.send_itemsize = self.send_format.itemsize
        self.send_nbytes = self.count * self.send_itemsize
        self.send_crc = self.crc if self.send_format == self.format else self._crc_as(self.send_dtype)
        self.frame_bytes = max(self.frame_bytes - self.frame_bytes % self.send_itemsize, self.send_itemsize)

    @staticmethod
    def _word_limits(info, generator):
        """Lowest and highest DDS tuning word inside the output range (FTW = round(f 2^N / f_clk))."""
        if generator is None or generator.output.kind != "frequency" or info.output != "frequency":
            return None
        out = generator.output
        scale = 2.0 ** out.word_bits / out.clock      # DDS tuning word per Hz (common practice)
        return int(round(out.range_min * scale)), int(round(out.range_max * scale)), out

    def _scan(self) -> int:
        """Whole-table CRC-32 of the little-endian bytes and the extreme samples; refuse words outside
        the output range."""
        import numpy as np

        crc, start = 0, 0
        low, high = None, None
        for chunk in self.table.chunks():
            codes = np.ascontiguousarray(chunk, dtype=self.dtype)
            if codes.size:
                self._check_words(codes, start)
                lo, hi = int(codes.min()), int(codes.max())
                low, high = (lo, hi) if low is None else (min(low, lo), max(high, hi))
            crc = zlib.crc32(codes.tobytes(), crc)
            start += codes.size
        if start != self.count:
            raise CheckFailed(f"the table yielded {start} samples, its header says {self.count}")
        self.low, self.high = low or 0, high or 0
        return crc & 0xFFFFFFFF

    def _check_words(self, codes, start: int) -> None:
        import numpy as np

        if self.limits is None:
            return
        lo, hi, out = self.limits
        bad = np.flatnonzero((codes < lo) | (codes > hi))
        if bad.size:
            i = int(bad[0])
            f = int(codes[i]) * out.clock / 2.0 ** out.word_bits
            raise CheckFailed(f"sample {start + i}: tuning word {int(codes[i])} is {f:.6g} Hz, outside the "
                              f"board's output range [{out.range_min:g}, {out.range_max:g}] Hz; nothing was sent")

    def _crc_as(self, dtype) -> int:
        import numpy as np

        crc = 0
        for chunk in self.table.chunks():
            crc = zlib.crc32(np.ascontiguousarray(chunk, dtype=self.dtype).astype(dtype).tobytes(), crc)
        return crc & 0xFFFFFFFF

    def table_json(self) -> dict:
        return {"channel": self.channel, "count": self.count, "format": self.send_format.name.lower(),
                "sample_rate": self.rate, "bytes": self.send_nbytes, "crc32": self.send_crc}


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


class SerialDriver(Driver):
    """Upload to a ramp board over a serial link (any pyserial URL) with the frame protocol."""

    name: ClassVar[str] = "serial"
    kind: ClassVar[str] = "instrument"
    description: ClassVar[str] = ("ramp board on a serial link (device path or any pyserial URL), "
                                  "framed protocol with CRC-32, verified commit, several channels and a trigger")
    options: ClassVar[dict] = {
        "retries": f"times one frame is sent again on a timeout or refusal (default {DEFAULT_RETRIES})",
        "restarts": f"times the upload starts over when the board lost it (default {DEFAULT_RESTARTS})",
        "frame_bytes": f"table bytes per DATA frame, at most what the board accepts (default {DEFAULT_FRAME_BYTES})",
    }

    def check_destination(self, delivery: Delivery) -> str:
        return _url(delivery)

    def deliver(self, table, delivery: Delivery) -> dict:
        """Upload one table to its channel (``table.info.channel``, default 1)."""
        return self.deliver_tables([table], delivery)

    def deliver_tables(self, tables, delivery: Delivery) -> dict:
        """Upload several tables, every one verified and committed before any output is armed.

        ``tables`` is a sequence of tables, each for the board channel its
        ``info.channel`` names (1-based; default 1), or a mapping channel ->
        table. Channels are uploaded in ascending order; ARM (only with
        ``delivery.arm``) starts them together on the trigger.
        """
        generator = delivery.generator
        options = _Options(delivery.options)
        by_channel = _by_channel(tables)
        plans = [_Plan(by_channel[c], _for_output(generator, c), options, c) for c in sorted(by_channel)]
        link_cfg = getattr(generator, "link", None)
        baud = getattr(link_cfg, "baud", None) or DEFAULT_BAUD
        timeout = clamp_deadline(getattr(link_cfg, "timeout", None) or DEFAULT_TIMEOUT)
        throughput = (getattr(link_cfg, "throughput", None)
                      or (baud / BITS_PER_BYTE if link_cfg else DEFAULT_THROUGHPUT))
        url = _url(delivery)
        report = {
            "driver": self.name, "destination": url, "dry_run": bool(delivery.dry_run), "armed": False,
            "table": plans[0].table_json(), "tables": [p.table_json() for p in plans],
            "trigger": options.timing.wire().describe(),
            "bytes": sum(p.nbytes for p in plans), "frames": 0, "retries": 0, "restarts": 0,
            "damaged_replies": 0, "steps": [], "verification": None,
        }
        if delivery.dry_run:
            return _dry_report(report, plans, options, delivery.arm)
        t0 = time.monotonic()
        widest = max(p.frame_bytes for p in plans)
        port = _open(url, baud, transfer_deadline(timeout, widest + fr.OVERHEAD, throughput, factor=1.0),
                     "--serial-port" if delivery.destination else "link.port")
        report["steps"].append({"step": "open", "ok": True, "duration": time.monotonic() - t0, "detail": url})
        link = Link(port, retries=options.retries, timeout=timeout, throughput=throughput, report=report)
        session = Session(link, plans, options, delivery, report)
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


def _for_output(generator, channel: int):
    """The profile as output ``channel`` sees it (its own ``[outputs.N]`` settings, if any)."""
    return generator.for_output(channel) if hasattr(generator, "for_output") else generator


def _by_channel(tables) -> dict:
    """Board channel -> table from a mapping or a sequence of tables (``info.channel``, default 1)."""
    if isinstance(tables, dict):
        by_channel = {int(c): t for c, t in tables.items()}
    else:
        by_channel = {}
        for t in tables:
            channel = int(getattr(t.info, "channel", None) or 1)
            if channel in by_channel:
                raise InputError(f"two tables for board channel {channel}", key="channel")
            by_channel[channel] = t
    if not by_channel:
        raise CheckFailed("no table to upload")
    bad = [c for c in by_channel if not 1 <= c <= fr.MAX_CHANNELS]
    if bad:
        raise InputError(f"board channel {bad[0]} is outside 1 .. {fr.MAX_CHANNELS}", key="channel")
    return by_channel


def _url(delivery: Delivery) -> str:
    """The port to open: the destination, else the profile's; refused when it cannot name one."""
    if delivery.destination is not None and delivery.destination != "":
        return check_url(delivery.destination, key="--serial-port")
    generator = delivery.generator
    address = getattr(getattr(generator, "link", None), "address", "")
    path = getattr(generator, "path", None)
    if not address:
        raise InputError("no serial port given (--serial-port) and the generator profile names none; expected a "
                         "serial device or pyserial URL such as socket://127.0.0.1:7450", key="link.port",
                         file=str(path) if path else None)
    return check_url(address, key="link.port", file=str(path) if path else None)


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
        _check_url_options(scheme, parts.query, url, key=key, file=file)
    elif scheme and not _url_handler(scheme):
        raise InputError(f"not a serial device or pyserial URL: {url!r} (invalid URL, protocol {scheme!r} not known)",
                         key=key, file=file)
    return url


#: the options pyserial's socket:// and rfc2217:// handlers take after '?' (pyserial's URL handlers
#: documentation), each with a test of its value
_URL_OPTIONS = {
    "socket": {"logging": lambda v: v in ("debug", "info", "warning", "error")},
    "rfc2217": {"logging": lambda v: v in ("debug", "info", "warning", "error"), "ign_set_control": lambda v: v == "",
                "poll_modem": lambda v: v == "", "timeout": lambda v: v.replace(".", "", 1).isdigit()},
}


def _check_url_options(scheme: str, query: str, url: str, *, key: str, file=None) -> None:
    """Refuse an option after '?' that pyserial's handler does not take, before opening the port."""
    from urllib.parse import parse_qsl

    known = _URL_OPTIONS[scheme]
    for name, value in parse_qsl(query, keep_blank_values=True):
        if name not in known or not known[name](value):
            raise InputError(f"{url!r}: option {name}={value!r} after '?' is not one a {scheme}:// URL takes "
                             f"({', '.join(known)}; logging is debug, info, warning or error)", key=key, file=file)


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
        return serial.serial_for_url(url, baudrate=baud, timeout=Link.POLL, write_timeout=write_timeout)
    except ValueError as exc:
        raise InputError(f"not a serial device or pyserial URL: {url!r} ({exc})", key=key) from None
    except (serial.SerialException, OSError) as exc:
        raise InstrumentError(f"cannot open {url} ({exc})", step="open") from None


def _dry_report(report: dict, plans: list, options: _Options, arm: bool) -> dict:
    """What a dry run reports: the checks passed and the frames an upload would send (version 2)."""
    report["log"] = _dry_log(plans, options, arm)
    report["steps"] = [{"step": "check", "ok": True,
                        "detail": "; ".join(f"channel {p.channel}: {p.count} samples, CRC-32 0x{p.crc:08x}"
                                            for p in plans) + ", nothing sent"}]
    report["bytes"] = sum(e["bytes"] for e in report["log"])
    report["verification"] = {"method": "crc32", "ok": None}
    return report


def _dry_log(plans: list, options: _Options, arm: bool) -> list:
    """The frames an upload to a version-2 board would send, with byte counts (for ``--dry-run``)."""

    def entry(step, message, nbytes, detail=""):
        return {"step": step, "kind": "frame", "message": message, "bytes": nbytes, "detail": detail}

    log = [entry("hello", "HELLO", fr.OVERHEAD + 1, f"protocol version {fr.PROTOCOL_VERSION}"),
           entry("disarm", "DISARM", fr.OVERHEAD, "output off"),
           entry("trigger", "TRIGGER", fr.OVERHEAD + 8, options.timing.wire().describe())]
    for p in plans:
        n_data = -(-p.nbytes // p.frame_bytes)
        last = p.nbytes - (n_data - 1) * p.frame_bytes
        data_bytes = n_data * (fr.OVERHEAD + fr.DATA_PREFIX) + (n_data - 1) * p.frame_bytes + last
        log += [
            entry("begin", "BEGIN", fr.OVERHEAD + 20, f"channel {p.channel}: {p.format.name.lower()}, {p.count} "
                  f"samples, CRC-32 0x{p.crc:08x}, {p.rate:.9g} Sa/s"),
            entry("data", "DATA", data_bytes,
                  f"{n_data} frames of up to {p.frame_bytes} table bytes ({p.nbytes} bytes in all)"),
            entry("verify", "END", fr.OVERHEAD, "the board checks the whole-table CRC"),
            entry("commit", "COMMIT", fr.OVERHEAD, "only after the CRC matched"),
        ]
    log.append(entry("status", "STATUS", fr.OVERHEAD, "every committed table must be ours, output off"))
    if arm:
        log += [entry("arm", "ARM", fr.OVERHEAD, "output on"), entry("arm", "STATUS", fr.OVERHEAD, "armed?")]
    return log
