"""The ramp-board emulator's protocol state: what a board does with each intact request.

Versions 1 and 2 of ``drivers/serial_protocol.md``: a session speaks the
version its HELLO named; a board of version 2 also speaks 1 (channel 1, the
version-1 layouts). :class:`BoardState` executes requests and keeps the
committed tables, the trigger settings and the armed flag; the byte streams,
fault switches and servers live in :mod:`sweepgen.emulators.board`.
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass
from fractions import Fraction

from sweepgen.wire import frames as fr

DEFAULT_MAX_PAYLOAD = 4096 + fr.DATA_PREFIX
MAX_TABLE_BYTES = 256 << 20   # bytes of table the emulator holds while receiving (its announced memory obeys it)
DELAY_STEP = 10               # ns: the emulated board's start-delay resolution (demo hardware)
DELAY_MAX = 1_000_000_000     # ns: its longest start delay (demo hardware)
ALL_SOURCES = ("free", "external", "software")
#: events that change what the board holds or plays (printed by ``sweepgen emulate --board``)
STATE_EVENTS = ("hello", "begin", "verified", "commit", "trigger", "arm", "fire", "disarm", "reset",
                "table_crc")


@dataclass(frozen=True)
class CommittedTable:
    """The table a board holds for playing on one channel."""

    format: fr.Format
    count: int
    crc: int
    rate: float          # Sa/s
    data: bytes
    channel: int = 1
    fraction: fr.Rate | None = None    # the rate as the board was told it

    def codes(self):
        """The samples as a NumPy array (little-endian, the table's format)."""
        import numpy as np

        return np.frombuffer(self.data, dtype=self.format.dtype)


def rate_fraction(rate: float) -> fr.Rate:
    """``rate`` Sa/s as the simplest fraction within 1e-12 of it (a profile's rates are decimal numbers)."""
    for limit in (1, 1000, 1 << 20, 0xFFFFFFFF):
        f = Fraction(rate).limit_denominator(limit)
        if abs(f - Fraction(rate)) <= Fraction(rate) * Fraction(1, 10**12) and f.numerator <= 0xFFFFFFFF:
            return fr.Rate(f.numerator, f.denominator)
    raise ValueError(f"rate {rate!r} Sa/s does not fit a fraction of two u32 numbers")


def source_members(sources) -> tuple:
    try:
        return tuple(sorted({fr.SOURCES_BY_NAME[str(s).strip().lower()] for s in sources}))
    except KeyError:
        raise ValueError(f"trigger sources are among {', '.join(ALL_SOURCES)}, got {list(sources)}") from None


def _channel_caps(generator) -> fr.ChannelCaps:
    out = generator.output
    if out.kind == "frequency":
        bits = int(out.word_bits)
        formats = (fr.Format.UINT32, fr.Format.UINT64) if bits <= 32 else (fr.Format.UINT64,)
        scale = 2.0 ** bits / out.clock          # FTW = round(f 2^N / f_clock) (common practice)
        return fr.ChannelCaps(fr.Output.FREQUENCY, formats, bits, 0, int(round(out.range_min * scale)),
                              int(round(out.range_max * scale)), int(round(out.clock)))
    bits = int(out.dac_bits or 16)
    formats = (fr.Format.INT16,) if bits <= 16 else (fr.Format.UINT32,)
    low, high = (-(1 << (bits - 1)), (1 << (bits - 1)) - 1) if bits <= 16 else (0, (1 << bits) - 1)
    return fr.ChannelCaps(fr.Output.VOLTAGE, formats, bits, 0, low, high, 0, int(round(out.range_min * 1e6)),
                          int(round(out.range_max * 1e6)))


def capabilities_for(generator, *, max_payload: int = DEFAULT_MAX_PAYLOAD, name: str = "sweepgen board emulator",
                     version: int = fr.PROTOCOL_VERSION, sources=ALL_SOURCES):
    """What a board described by ``generator`` announces in its HELLO reply of ``version``.

    Version 2: one channel block per output of the profile (``channels``), each
    with the profile's ``[output]``; version 1: its first channel.
    """
    sampling = generator.sampling
    rates = sampling.rates if sampling.rates else (sampling.rate_min, sampling.rate_max)
    ch = _channel_caps(generator)

    def memory(formats):
        # the memory announced is what the emulator will buffer: at most MAX_TABLE_BYTES, and a u32
        return min(int(sampling.memory), MAX_TABLE_BYTES // max(f.itemsize for f in formats), 0xFFFFFFFF)

    if version == 1:
        dds = ch.output == fr.Output.FREQUENCY
        formats = ch.formats[:1] if dds else (fr.Format.INT16, fr.Format.UINT16)
        whole = tuple(int(round(r)) for r in rates if abs(r - round(r)) <= 1e-9 * r)[:255]
        return fr.Capabilities(1, formats, ch.bits if dds else 0, 0 if dds else ch.bits, int(max_payload),
                               memory(formats), ch.clock, whole, name)
    n = max(1, min(int(generator.channels), fr.MAX_CHANNELS))
    blocks = []
    for number in range(1, n + 1):           # each output with its own [outputs.N] settings, if any
        c = _channel_caps(generator.for_output(number) if hasattr(generator, "for_output") else generator)
        blocks.append(fr.ChannelCaps(c.output, c.formats, c.bits, memory(c.formats), c.low, c.high, c.clock,
                                     c.low_uv, c.high_uv))
    srcs = source_members(sources)
    edges = (fr.Edge.RISING, fr.Edge.FALLING) if fr.Source.EXTERNAL in srcs else ()
    return fr.CapabilitiesV2(tuple(blocks), srcs, edges, int(max_payload), DELAY_STEP, DELAY_MAX,
                             tuple(rate_fraction(r) for r in rates[:255]), name)


class BoardState:
    """A board's protocol state and the execution of intact requests (document sections 2 and 3)."""

    def __init__(self, generator, *, max_payload: int, name: str, version: int, sources):
        if version not in fr.VERSIONS:
            raise ValueError(f"the emulator speaks protocol versions {fr.VERSIONS}, not {version}")
        self.generator = generator
        self.version = version                   # the highest version this board speaks
        self.caps_by_version = {v: capabilities_for(generator, max_payload=max_payload, name=name, version=v,
                                                    sources=sources) for v in fr.VERSIONS if v <= version}
        self.caps = self.caps_by_version[version]
        self.tables: dict[int, CommittedTable] = {}
        self.trigger = fr.Trigger()
        self.armed = False
        self.events: list[tuple] = []            # (event, details) in order, for tests and logs
        self.log = None                          # receives a line per state change
        self.commits = 0
        self._session_version = 0
        self._status_version = 1

    @property
    def committed(self) -> CommittedTable | None:
        """The committed table of channel 1."""
        return self.tables.get(1)

    @property
    def session(self) -> bool:
        return bool(self._session_version)

    @property
    def n_channels(self) -> int:
        return len(self.caps.channels) if self.version == 2 else 1

    def _event(self, name: str, **details) -> None:
        self.events.append((name, details))
        if self.log is not None and name in STATE_EVENTS:
            said = ", ".join(f"{k} {v:#010x}" if k == "crc" else str(v) if k == "said" else f"{k} {v}"
                             for k, v in details.items())
            self.log(f"board: {name}{' (' + said + ')' if said else ''}")

    def _forget_upload(self) -> None:
        self.state = fr.State.IDLE
        self.pending = None
        self.buffer = bytearray()
        self.received = 0

    def _end_session(self) -> None:
        self._session_version = 0
        self._forget_upload()
        self.armed = False
        self._last_key = None
        self._last_reply = None

    # -- replies -----------------------------------------------------------------------------
    def _refuse(self, request_type, seq, reason, detail=0, text="") -> bytes:
        self._event("refuse", type=fr.type_name(request_type), seq=seq, reason=fr.reason_name(reason),
                    detail=detail)
        return fr.encode(fr.MsgType.REFUSE, seq, fr.Refusal(request_type, reason, detail, text).pack())

    def _ack(self, request_type, seq, data=b"") -> bytes:
        return fr.encode(fr.MsgType.ACK, seq, fr.ack_payload(request_type, data))

    def execute(self, frame: fr.Frame, *, corrupt_memory: bool = False) -> bytes:
        """The reply to an intact request; a retransmitted BEGIN, DATA, END or COMMIT gets the
        remembered reply without being executed again (section 2)."""
        key = (frame.seq, frame.type, zlib.crc32(frame.payload))
        if frame.type in fr.REMEMBERED and key == self._last_key and self._last_reply is not None:
            self._event("repeat", type=frame.name, seq=frame.seq)
            return self._last_reply
        reply = self._dispatch(frame, corrupt_memory)
        if frame.type in fr.REMEMBERED:
            self._last_key, self._last_reply = key, reply
        elif frame.type == fr.MsgType.HELLO:
            self._last_key = self._last_reply = None
        return reply

    # -- the order of the checks (section 3): type, length, reserved bytes, session, the rest ----
    def _dispatch(self, frame: fr.Frame, corrupt_memory: bool) -> bytes:
        t, seq, p = frame.type, frame.seq, frame.payload
        R = fr.Reason
        refuse = lambda reason, detail=0, text="": self._refuse(t, seq, reason, detail, text)  # noqa: E731
        v = self._session_version or self._status_version
        if t not in (fr.REQUESTS if self.version == 2 and v == 2 else fr.REQUESTS_V1):
            return refuse(R.UNKNOWN_TYPE, 0, f"unknown message type 0x{t:02x}")
        wrong = self._length_problem(t, p, v)
        if wrong is not None:
            return refuse(R.BAD_LENGTH, wrong, f"{frame.name} takes {wrong} bytes")
        if v == 2:
            for at in fr.RESERVED_BYTES.get(t, ()):
                if p[at]:
                    return refuse(R.RESERVED, at, f"reserved byte {at} is not zero")
        if t == fr.MsgType.HELLO:
            return self._hello(frame, refuse)
        if t == fr.MsgType.DISARM:
            self.armed = False
            self._event("disarm")
            return self._ack(t, seq)
        if t == fr.MsgType.STATUS:
            return self._ack(t, seq, self._status(v))
        if not self.session:
            return refuse(R.NO_SESSION, 0, "no hello since power-up or reset")
        handler = {fr.MsgType.BEGIN: self._begin, fr.MsgType.END: self._end, fr.MsgType.COMMIT: self._commit,
                   fr.MsgType.ARM: self._arm, fr.MsgType.TRIGGER: self._set_trigger, fr.MsgType.FIRE: self._fire}
        if t == fr.MsgType.DATA:
            return self._data(frame, refuse, corrupt_memory)
        return handler[t](frame, refuse)

    @staticmethod
    def _length_problem(t, p, version) -> int | None:
        """The payload length a request must have when ``p`` has another (None: it is right)."""
        fixed = {fr.MsgType.HELLO: 1, fr.MsgType.BEGIN: 16 if version == 1 else 20, fr.MsgType.END: 0,
                 fr.MsgType.COMMIT: 0, fr.MsgType.STATUS: 0, fr.MsgType.ARM: 0, fr.MsgType.DISARM: 0,
                 fr.MsgType.TRIGGER: 8, fr.MsgType.FIRE: 0}
        if t == fr.MsgType.DATA:
            return 0 if len(p) <= fr.DATA_PREFIX else None
        return fixed[t] if len(p) != fixed[t] else None

    def _hello(self, frame, refuse) -> bytes:
        asked = frame.payload[0]
        if asked not in self.caps_by_version:
            return refuse(fr.Reason.BAD_VERSION, self.version, f"this board speaks versions 1 to {self.version}")
        self._session_version = self._status_version = asked
        self._forget_upload()
        self._event("hello", version=asked)
        return self._ack(frame.type, frame.seq, self.caps_by_version[asked].pack())

    def _table_v1(self) -> fr.TableId:
        c = self.tables.get(1)
        return fr.TableId(0, 0, 0, 0) if c is None else fr.TableId(c.format, c.count, c.crc, int(round(c.rate)))

    def _table_v2(self, channel: int) -> fr.TableIdV2:
        c = self.tables.get(channel)
        if c is None:
            return fr.TableIdV2(0, channel, 0, 0, fr.Rate(0, 1))
        return fr.TableIdV2(c.format, channel, c.count, c.crc, c.fraction)

    def _status(self, version) -> bytes:
        if version == 1:
            return fr.Status(self.state, self.armed, self._table_v1(), self.received).pack()
        pending = self.pending[0] if self.pending is not None else 0
        return fr.StatusV2(self.state, self.armed, pending, self.received, self.trigger,
                           tuple(self._table_v2(c) for c in range(1, self.n_channels + 1))).pack()

    def _channel_caps(self, channel: int):
        return self.caps.channels[channel - 1] if self._session_version == 2 else None

    def _begin(self, frame, refuse) -> bytes:
        R = fr.Reason
        if self._session_version == 1:
            b1 = fr.Begin.unpack(frame.payload)
            channel, b = 1, fr.BeginV2(b1.format, 1, b1.count, b1.crc, fr.Rate(b1.rate, 1))
            caps = self.caps_by_version[1]
            formats, memory, rates = caps.formats, caps.memory, [fr.Rate(r, 1) for r in caps.rates]
        else:
            b = fr.BeginV2.unpack(frame.payload)
            channel = b.channel
            if not 1 <= channel <= self.n_channels:
                return refuse(R.BAD_CHANNEL, self.n_channels, f"no channel {channel}")
            ch = self._channel_caps(channel)
            formats, memory, rates = ch.formats, ch.memory, self.caps.rates
        if self.armed:
            return refuse(R.ARMED, 0, "disarm first")
        mask = fr.formats_mask(formats)
        if b.format not in [f.value for f in fr.Format] or not mask & fr.Format(b.format).bit:
            return refuse(R.BAD_FORMAT, mask, "format not supported")
        if not 1 <= b.count <= memory:
            return refuse(R.BAD_COUNT, memory, "count is zero or exceeds the memory")
        rate = next((r for r in rates if b.rate.den and r.same(b.rate)), None)
        if rate is None:
            return refuse(R.BAD_RATE, b.rate.num, "not a rate this board plays")
        self.state, self.pending, self.received = fr.State.RECEIVING, (channel, b), 0
        self.buffer = bytearray(b.nbytes)
        self._event("begin", channel=channel, count=b.count, crc=b.crc, rate=str(b.rate),
                    format=fr.Format(b.format).name.lower())
        return self._ack(frame.type, frame.seq)

    def _data(self, frame, refuse, corrupt_memory) -> bytes:
        R = fr.Reason
        if self.state != fr.State.RECEIVING:
            return refuse(R.BAD_STATE, self.state, "no upload in progress")
        offset, chunk = fr.parse_data(frame.payload)
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
        """Index of the first sample outside the channel's output range (None: all inside)."""
        import numpy as np

        channel, b = self.pending
        ch = self.caps.channels[channel - 1] if self.version == 2 else None
        if ch is None:
            out = self.generator.output
            if out.kind != "frequency":
                return None
            scale = 2.0 ** out.word_bits / out.clock
            low, high = int(round(out.range_min * scale)), int(round(out.range_max * scale))
        else:
            low, high = ch.low, ch.high
        codes = np.frombuffer(bytes(self.buffer), dtype=fr.Format(b.format).dtype)
        bad = np.flatnonzero((codes < low) | (codes > high))
        return int(bad[0]) if bad.size else None

    def _end(self, frame, refuse) -> bytes:
        R = fr.Reason
        if self.state != fr.State.RECEIVING:
            return refuse(R.BAD_STATE, self.state, "no upload in progress")
        if self.received < len(self.buffer):
            return refuse(R.INCOMPLETE, self.received, "table incomplete")
        crc = zlib.crc32(self.buffer) & 0xFFFFFFFF
        if crc != self.pending[1].crc:
            self._forget_upload()
            self._event("table_crc", computed=crc)
            return refuse(R.TABLE_CRC, crc, "whole-table CRC does not match; table discarded")
        bad = self._check_range()
        if bad is not None:
            self._forget_upload()
            return refuse(R.RANGE, bad, "sample outside the output range; table discarded")
        self.state = fr.State.VERIFIED
        self._event("verified", channel=self.pending[0], crc=crc)
        return self._ack(frame.type, frame.seq, fr.u32(crc))

    def _commit(self, frame, refuse) -> bytes:
        R = fr.Reason
        if self.armed:
            return refuse(R.ARMED, 0, "disarm first")
        if self.state != fr.State.VERIFIED:
            return refuse(R.BAD_STATE, self.state, "no verified table to commit")
        crc = zlib.crc32(self.buffer) & 0xFFFFFFFF      # checked again: memory may have changed
        channel, b = self.pending
        data = bytes(self.buffer)
        self._forget_upload()
        if crc != b.crc:
            self._event("table_crc", computed=crc)
            return refuse(R.TABLE_CRC, crc, "whole-table CRC does not match; table discarded")
        self.tables[channel] = CommittedTable(fr.Format(b.format), b.count, crc, b.rate.value, data, channel, b.rate)
        self.commits += 1
        self._event("commit", channel=channel, count=b.count, crc=crc, rate=str(b.rate))
        if self._session_version == 1:
            return self._ack(frame.type, frame.seq, self._table_v1().pack())
        return self._ack(frame.type, frame.seq, self._table_v2(channel).pack())

    def _arm(self, frame, refuse) -> bytes:
        R = fr.Reason
        if self.state != fr.State.IDLE:
            return refuse(R.BAD_STATE, self.state, "an upload is in progress")
        playing = self.tables if self._session_version == 2 else {k: v for k, v in self.tables.items() if k == 1}
        if not playing:
            return refuse(R.NO_TABLE, 0, "no committed table")
        if self.armed:
            self._event("arm_again")          # ARM while armed: acknowledged, playback goes on unchanged
        else:
            self.armed = True
            self._event("arm", channels=",".join(map(str, sorted(playing))), trigger=self.trigger.describe())
        if self._session_version == 1:
            return self._ack(frame.type, frame.seq, fr.u32(self.tables[1].crc))
        crcs = [self.tables[c].crc if c in self.tables else 0 for c in range(1, self.n_channels + 1)]
        return self._ack(frame.type, frame.seq, b"".join(fr.u32(c) for c in crcs))

    def _set_trigger(self, frame, refuse) -> bytes:
        R = fr.Reason
        want = fr.Trigger.unpack(frame.payload)
        caps = self.caps
        if self.armed:
            return refuse(R.ARMED, 0, "disarm first")
        offered = fr.mask_of(caps.sources) | fr.mask_of(caps.edges) << 8
        if (want.source not in [int(s) for s in caps.sources] or want.mode not in (0, 1, 2)
                or want.source == fr.Source.EXTERNAL and want.edge not in [int(e) for e in caps.edges]):
            return refuse(R.BAD_TRIGGER, offered, "trigger source, edge or mode not offered")
        step = caps.delay_step
        delay = 0 if not step else int(round(want.delay / step)) * step
        if want.delay and (not step or delay > caps.delay_max):
            return refuse(R.BAD_DELAY, caps.delay_max if step else 0, "start delay too long")
        edge = want.edge if want.source == fr.Source.EXTERNAL else fr.Edge.RISING
        self.trigger = fr.Trigger(want.source, edge, want.mode, delay)
        self._event("trigger", said=self.trigger.describe())
        return self._ack(frame.type, frame.seq, self.trigger.pack())

    def _fire(self, frame, refuse) -> bytes:
        R = fr.Reason
        if not self.armed:
            return refuse(R.BAD_STATE, self.state, "not armed")
        if self.trigger.source != fr.Source.SOFTWARE:
            return refuse(R.BAD_TRIGGER, fr.mask_of(self.caps.sources), "the trigger source is not software")
        self._event("fire")
        return self._ack(frame.type, frame.seq)
