"""The serial ramp-board frame protocol: frames, messages and their byte layouts.

Pure functions and small data classes, no I/O. Both sides use this module: the
``serial`` driver (:mod:`sweepgen.drivers.serial_board`) and the board emulator
(:mod:`sweepgen.emulators.board`). The protocol itself is specified in
``drivers/serial_protocol.md`` (shipped as ``sweepgen/drivers/serial_protocol.md``);
the constants and layouts here follow that document, which is the reference.

A frame (all integers little-endian)::

    offset  size  field
    0       2     sync bytes A5 5A
    2       1     message type
    3       1     sequence number (0..255)
    4       2     payload length N (u16)
    6       2     N XOR 0xFFFF (u16), a check on the length
    8       N     payload
    8+N     4     CRC-32 of bytes 0 .. 8+N-1 (u32)

The CRC-32 is the ISO-HDLC / IEEE 802.3 one computed by :func:`zlib.crc32`.
"""

from __future__ import annotations

import enum
import struct
import zlib
from dataclasses import dataclass

#: the highest protocol version sweepgen speaks; it speaks every version in VERSIONS
PROTOCOL_VERSION = 2
VERSIONS = (1, 2)
SYNC = b"\xa5\x5a"
HEADER_SIZE = 8
TRAILER_SIZE = 4
OVERHEAD = HEADER_SIZE + TRAILER_SIZE
#: every board accepts at least this payload length, before and after HELLO
MIN_PAYLOAD = 64
#: largest payload the length field can describe
MAX_PAYLOAD = 0xFFFF
#: bytes at the start of a DATA payload before the table bytes (the u32 offset)
DATA_PREFIX = 4
#: longest human-readable text a board puts in a refusal or as its name
MAX_TEXT = 64
#: most output channels a version-2 board announces
MAX_CHANNELS = 8
#: longest reply payload a board sends: a version-2 HELLO reply with 8 channels, 255 rates and a full
#: name (a version-1 HELLO reply is at most 1 + 19 + 4 * 255 + 64 = 1104 bytes)
MAX_REPLY = 1 + 16 + 40 * MAX_CHANNELS + 8 * 255 + MAX_TEXT

_HEADER = struct.Struct("<2sBBHH")


class FrameError(ValueError):
    """Bytes that are not one valid frame, or a payload with the wrong layout."""


class MsgType(enum.IntEnum):
    """Message types. Requests go host -> board; ACK and REFUSE go board -> host."""

    HELLO = 0x01
    BEGIN = 0x02
    DATA = 0x03
    END = 0x04
    COMMIT = 0x05
    STATUS = 0x06
    ARM = 0x07
    DISARM = 0x08
    TRIGGER = 0x09        # version 2
    FIRE = 0x0A           # version 2
    ACK = 0x80
    REFUSE = 0x81


REQUESTS = frozenset(t for t in MsgType if t < 0x80)
#: requests of version 1 (a version-1 session refuses the others as UNKNOWN_TYPE)
REQUESTS_V1 = frozenset(t for t in REQUESTS if t <= MsgType.DISARM)
#: requests whose reply a board remembers and sends again for a retransmission (section 2):
#: the ones that change the upload; HELLO, STATUS, DISARM, TRIGGER, ARM and FIRE are always executed
REMEMBERED = frozenset({MsgType.BEGIN, MsgType.DATA, MsgType.END, MsgType.COMMIT})


class Reason(enum.IntEnum):
    """Reason codes of a REFUSE reply (see the protocol document for the host's reaction)."""

    FRAME_CRC = 0x01      # the frame failed its CRC: send it again
    BAD_LENGTH = 0x02     # the payload length is wrong for the message type
    UNKNOWN_TYPE = 0x03   # not a request type this board knows
    BAD_VERSION = 0x04    # protocol version not spoken (detail: the board's version)
    NO_SESSION = 0x05     # no HELLO since power-up or reset
    BAD_STATE = 0x06      # not allowed in the current state (detail: the state)
    ARMED = 0x07          # disarm first
    BAD_FORMAT = 0x08     # table format not supported (detail: the formats bit mask)
    BAD_COUNT = 0x09      # sample count zero or above the memory (detail: memory in samples)
    BAD_RATE = 0x0A       # sample rate not one the board plays
    BAD_OFFSET = 0x0B     # a gap before this DATA frame (detail: bytes received so far)
    OVERFLOW = 0x0C       # DATA beyond the announced table length (detail: table bytes)
    INCOMPLETE = 0x0D     # END before every byte arrived (detail: bytes received so far)
    TABLE_CRC = 0x0E      # whole-table CRC does not match BEGIN's (detail: CRC the board computed)
    RANGE = 0x0F          # a sample the board cannot play (detail: index of the first one)
    BUSY = 0x10           # the board cannot take the frame now: send it again
    NO_TABLE = 0x11       # ARM without a committed table
    BAD_TRIGGER = 0x12    # trigger source, edge or mode not offered (detail: sources | edges << 8)
    RESERVED = 0x13       # a reserved byte is not zero (detail: its offset in the payload)
    BAD_CHANNEL = 0x14    # no such output channel (detail: the number of channels)
    BAD_DELAY = 0x15      # start delay above the longest the board offers (detail: longest, ns)


#: refusals after which the host sends the same frame again (same sequence number)
RETRY_SAME = frozenset({Reason.FRAME_CRC, Reason.BUSY})
#: refusals after which the host starts the upload again from HELLO
RESTART = frozenset({Reason.NO_SESSION, Reason.BAD_STATE, Reason.TABLE_CRC, Reason.INCOMPLETE})


class State(enum.IntEnum):
    """Upload state of a board."""

    IDLE = 0
    RECEIVING = 1
    VERIFIED = 2


class Format(enum.IntEnum):
    """Sample formats of a table (all little-endian)."""

    INT16 = 1    # signed DAC / drive codes
    UINT16 = 2   # unsigned DAC codes
    UINT32 = 3   # DDS frequency tuning words up to 32 bits
    UINT64 = 4   # DDS frequency tuning words up to 64 bits

    @property
    def dtype(self) -> str:
        return _FORMAT_DTYPE[self]

    @property
    def itemsize(self) -> int:
        return int(self.dtype[-1])

    @property
    def bit(self) -> int:
        """This format's bit in the formats mask of the HELLO reply."""
        return 1 << (self - 1)


_FORMAT_DTYPE = {Format.INT16: "<i2", Format.UINT16: "<u2", Format.UINT32: "<u4", Format.UINT64: "<u8"}


def format_for_dtype(dtype) -> Format:
    """The table format carrying samples of NumPy dtype ``dtype`` (any byte order).

    Raises :class:`FrameError` for a dtype the protocol has no format for.
    """
    import numpy as np

    dt = np.dtype(dtype)
    key = (dt.kind, dt.itemsize)
    table = {("i", 2): Format.INT16, ("u", 2): Format.UINT16, ("u", 4): Format.UINT32,
             ("u", 8): Format.UINT64}
    if key not in table:
        raise FrameError(f"no table format for samples of type {dt.name} ({dt.str}) "
                         "(the protocol carries int16, uint16, uint32 or uint64)")
    return table[key]


def formats_mask(formats) -> int:
    mask = 0
    for f in formats:
        mask |= Format(f).bit
    return mask


def formats_from_mask(mask: int) -> tuple:
    return tuple(f for f in Format if mask & f.bit)


# --------------------------------------------------------------------------- frames


@dataclass(frozen=True)
class Frame:
    """One decoded frame: message type, sequence number and payload."""

    type: int
    seq: int
    payload: bytes = b""

    @property
    def name(self) -> str:
        return type_name(self.type)


@dataclass(frozen=True)
class BadFrame:
    """A frame whose header was plausible but whose CRC failed (type and seq as read)."""

    type: int
    seq: int
    length: int


def type_name(value: int) -> str:
    try:
        return MsgType(value).name.lower()
    except ValueError:
        return f"0x{value:02x}"


def reason_name(value: int) -> str:
    try:
        return Reason(value).name
    except ValueError:
        return f"reason 0x{value:02x}"


def encode(msg_type: int, seq: int, payload: bytes = b"") -> bytes:
    """The bytes of one frame.

    The CRC-32 (``zlib.crc32``, ISO-HDLC) covers everything before it: sync,
    header and payload.
    """
    if not 0 <= msg_type <= 0xFF:
        raise FrameError(f"message type {msg_type} does not fit in one byte")
    if not 0 <= seq <= 0xFF:
        raise FrameError(f"sequence number {seq} does not fit in one byte")
    n = len(payload)
    if n > MAX_PAYLOAD:
        raise FrameError(f"payload of {n} bytes exceeds {MAX_PAYLOAD}")
    body = _HEADER.pack(SYNC, msg_type, seq, n, n ^ 0xFFFF) + bytes(payload)
    return body + struct.pack("<I", zlib.crc32(body) & 0xFFFFFFFF)


def decode(data: bytes) -> Frame:
    """Decode exactly one frame (no bytes before or after it)."""
    data = bytes(data)
    if len(data) < OVERHEAD:
        raise FrameError(f"{len(data)} bytes are too few for a frame (at least {OVERHEAD})")
    sync, msg_type, seq, n, n_check = _HEADER.unpack_from(data)
    if sync != SYNC:
        raise FrameError(f"frame does not start with the sync bytes {SYNC.hex(' ')}")
    if n ^ 0xFFFF != n_check:
        raise FrameError("length check does not match the length")
    if len(data) != OVERHEAD + n:
        raise FrameError(f"frame of payload length {n} must be {OVERHEAD + n} bytes, got {len(data)}")
    (crc,) = struct.unpack_from("<I", data, HEADER_SIZE + n)
    if zlib.crc32(data[:HEADER_SIZE + n]) & 0xFFFFFFFF != crc:
        raise FrameError("frame CRC does not match")
    return Frame(msg_type, seq, data[HEADER_SIZE:HEADER_SIZE + n])


class Decoder:
    """Incremental frame decoder for a byte stream, resynchronising after noise.

    Feed it bytes as they arrive; it returns the complete frames (and
    :class:`BadFrame` for frames that failed their CRC). The rules are those of
    the protocol document: look for the sync bytes; a header whose length check
    fails or whose length exceeds ``max_payload`` is no frame (drop one byte and
    search again); a frame that fails its CRC is reported and one byte is dropped
    before searching again.
    """

    def __init__(self, max_payload: int = MAX_PAYLOAD):
        self.max_payload = int(max_payload)
        self._buf = bytearray()
        self.discarded = 0          # bytes dropped while searching for frames

    def reset(self) -> None:
        self.discarded += len(self._buf)
        self._buf.clear()

    @property
    def pending(self) -> int:
        """Bytes held that do not yet form a complete frame."""
        return len(self._buf)

    def wanted(self) -> int:
        """How many more bytes complete the frame being read (at least 1)."""
        buf = self._buf
        if len(buf) < HEADER_SIZE:
            return HEADER_SIZE - len(buf) if buf[:1] == SYNC[:1] or not buf else 1
        n = buf[4] | (buf[5] << 8)
        return max(1, OVERHEAD + n - len(buf))

    def feed(self, data: bytes) -> list:
        self._buf += data
        out = []
        buf = self._buf
        while True:
            start = buf.find(SYNC)
            if start < 0:
                keep = 1 if buf[-1:] == SYNC[:1] else 0
                self.discarded += len(buf) - keep
                del buf[:len(buf) - keep]
                return out
            if start:
                self.discarded += start
                del buf[:start]
            if len(buf) < HEADER_SIZE:
                return out
            _, msg_type, seq, n, n_check = _HEADER.unpack_from(buf)
            if n ^ 0xFFFF != n_check or n > self.max_payload:
                self.discarded += 1
                del buf[:1]
                continue
            if len(buf) < OVERHEAD + n:
                return out
            (crc,) = struct.unpack_from("<I", buf, HEADER_SIZE + n)
            if zlib.crc32(memoryview(buf)[:HEADER_SIZE + n]) & 0xFFFFFFFF == crc:
                out.append(Frame(msg_type, seq, bytes(buf[HEADER_SIZE:HEADER_SIZE + n])))
                del buf[:OVERHEAD + n]
            else:
                out.append(BadFrame(msg_type, seq, n))
                self.discarded += 1
                del buf[:1]


# --------------------------------------------------------------------------- payloads


def _text(raw: bytes) -> str:
    return raw.decode("utf-8", errors="replace")


def _clip_text(text: str) -> bytes:
    raw = text.encode("utf-8")[:MAX_TEXT]
    return raw.decode("utf-8", errors="ignore").encode("utf-8")


def hello_payload(version: int = PROTOCOL_VERSION) -> bytes:
    return struct.pack("<B", version)


def parse_hello(payload: bytes) -> int:
    if len(payload) != 1:
        raise FrameError(f"HELLO payload must be 1 byte, got {len(payload)}")
    return payload[0]


_CAPS = struct.Struct("<BBBBBHIQ")


@dataclass(frozen=True)
class Capabilities:
    """What a board says about itself in its HELLO reply."""

    version: int
    formats: tuple                  # Format members
    word_bits: int                  # DDS tuning word bits, 0 if none
    dac_bits: int                   # DAC bits, 0 if none
    max_payload: int                # longest frame payload it accepts
    memory: int                     # samples
    clock: int                      # Hz, DDS reference clock, 0 if none
    rates: tuple                    # Sa/s (integers)
    name: str = ""

    def pack(self) -> bytes:
        if not 1 <= len(self.rates) <= 255:
            raise FrameError("a board announces between 1 and 255 sample rates")
        return (_CAPS.pack(self.version, formats_mask(self.formats), self.word_bits, self.dac_bits,
                           len(self.rates), self.max_payload, self.memory, self.clock)
                + struct.pack(f"<{len(self.rates)}I", *self.rates) + _clip_text(self.name))

    @classmethod
    def unpack(cls, data: bytes) -> "Capabilities":
        if len(data) < _CAPS.size:
            raise FrameError(f"HELLO reply too short ({len(data)} bytes)")
        version, mask, word_bits, dac_bits, n_rates, max_payload, memory, clock = _CAPS.unpack_from(data)
        end = _CAPS.size + 4 * n_rates
        if len(data) < end:
            raise FrameError(f"HELLO reply announces {n_rates} rates but is only {len(data)} bytes")
        rates = struct.unpack_from(f"<{n_rates}I", data, _CAPS.size)
        return cls(version, formats_from_mask(mask), word_bits, dac_bits, max_payload, memory, clock,
                   tuple(rates), _text(data[end:]))

    def to_json(self) -> dict:
        return {"protocol": self.version, "name": self.name,
                "formats": [Format(f).name.lower() for f in self.formats],
                "memory": self.memory, "max_payload": self.max_payload, "clock": self.clock or None,
                "word_bits": self.word_bits or None, "dac_bits": self.dac_bits or None,
                "rates": list(self.rates)}


_BEGIN = struct.Struct("<B3xIII")


@dataclass(frozen=True)
class Begin:
    """BEGIN: a table of ``count`` samples of ``format``, whole-table CRC, played at ``rate``."""

    format: int
    count: int
    crc: int
    rate: int

    @property
    def nbytes(self) -> int:
        return self.count * Format(self.format).itemsize

    def pack(self) -> bytes:
        return _BEGIN.pack(self.format, self.count, self.crc, self.rate)

    @classmethod
    def unpack(cls, data: bytes) -> "Begin":
        if len(data) != _BEGIN.size:
            raise FrameError(f"BEGIN payload must be {_BEGIN.size} bytes, got {len(data)}")
        return cls(*_BEGIN.unpack(data))


def data_payload(offset: int, chunk: bytes) -> bytes:
    return struct.pack("<I", offset) + bytes(chunk)


def parse_data(payload: bytes) -> tuple:
    """``(offset, bytes)`` of a DATA payload."""
    if len(payload) <= DATA_PREFIX:
        raise FrameError("DATA payload must hold an offset and at least one byte")
    (offset,) = struct.unpack_from("<I", payload)
    return offset, payload[DATA_PREFIX:]


def ack_payload(request_type: int, data: bytes = b"") -> bytes:
    return bytes([request_type]) + bytes(data)


def parse_ack(payload: bytes) -> tuple:
    """``(request_type, reply data)`` of an ACK payload."""
    if not payload:
        raise FrameError("ACK payload must name the request type")
    return payload[0], payload[1:]


_REFUSE = struct.Struct("<BBI")


@dataclass(frozen=True)
class Refusal:
    """A REFUSE reply: which request, why (:class:`Reason`), a number and a text."""

    request_type: int
    reason: int
    detail: int = 0
    text: str = ""

    def pack(self) -> bytes:
        return _REFUSE.pack(self.request_type, self.reason, self.detail) + _clip_text(self.text)

    @classmethod
    def unpack(cls, payload: bytes) -> "Refusal":
        if len(payload) < _REFUSE.size:
            raise FrameError(f"REFUSE payload too short ({len(payload)} bytes)")
        request_type, reason, detail = _REFUSE.unpack_from(payload)
        return cls(request_type, reason, detail, _text(payload[_REFUSE.size:]))

    def describe(self) -> str:
        text = f"{reason_name(self.reason)} (detail {self.detail})"
        return f"{text}: {self.text}" if self.text else text


_TABLE = struct.Struct("<B3xIII")


@dataclass(frozen=True)
class TableId:
    """A committed table as a board reports it (COMMIT reply, STATUS reply)."""

    format: int      # 0: no table
    count: int
    crc: int
    rate: int

    def pack(self) -> bytes:
        return _TABLE.pack(self.format, self.count, self.crc, self.rate)

    @classmethod
    def unpack(cls, data: bytes) -> "TableId":
        if len(data) != _TABLE.size:
            raise FrameError(f"table description must be {_TABLE.size} bytes, got {len(data)}")
        return cls(*_TABLE.unpack(data))


_STATUS = struct.Struct("<BBBxIIII")


@dataclass(frozen=True)
class Status:
    """STATUS reply: upload state, armed flag, the committed table, bytes of the pending upload."""

    state: int
    armed: bool
    table: TableId
    received: int

    def pack(self) -> bytes:
        return _STATUS.pack(self.state, int(self.armed), self.table.format, self.table.count,
                            self.table.crc, self.table.rate, self.received)

    @classmethod
    def unpack(cls, data: bytes) -> "Status":
        if len(data) != _STATUS.size:
            raise FrameError(f"STATUS reply must be {_STATUS.size} bytes, got {len(data)}")
        state, armed, fmt, count, crc, rate, received = _STATUS.unpack(data)
        return cls(state, bool(armed), TableId(fmt, count, crc, rate), received)


def u32(value: int) -> bytes:
    return struct.pack("<I", value)


def parse_u32(data: bytes) -> int:
    if len(data) != 4:
        raise FrameError(f"expected a 4-byte number, got {len(data)} bytes")
    return struct.unpack("<I", data)[0]


# --------------------------------------------------------------------------- version 2


class Source(enum.IntEnum):
    """What starts a version-2 board's playback (its bit in the sources mask is ``1 << value``)."""

    FREE = 0         # free-running: plays as soon as it is armed, back to back
    EXTERNAL = 1     # an edge on the trigger input
    SOFTWARE = 2     # a FIRE request


#: trigger sources by the names the host's timing uses
SOURCES_BY_NAME = {"free": Source.FREE, "external": Source.EXTERNAL, "software": Source.SOFTWARE}


class Edge(enum.IntEnum):
    RISING = 0
    FALLING = 1


class Mode(enum.IntEnum):
    EACH = 0         # every trigger plays the table once (free-running: back to back, without end)
    ONCE = 1         # the table plays once, on the first trigger after ARM
    CONTINUOUS = 2   # the first trigger after ARM starts it; it then plays back to back without end


def mask_of(members) -> int:
    out = 0
    for m in members:
        out |= 1 << int(m)
    return out


def members_of(enum_cls, mask: int) -> tuple:
    return tuple(m for m in enum_cls if mask & (1 << int(m)))


_RATE = struct.Struct("<II")


@dataclass(frozen=True)
class Rate:
    """A sample rate as a fraction ``num / den`` Sa/s (both u32, ``den`` >= 1), exact for clock/divider rates."""

    num: int
    den: int = 1

    @property
    def value(self) -> float:
        return self.num / self.den

    def same(self, other: "Rate") -> bool:
        """Whether both fractions are the same rate (compared by cross-multiplication, exactly)."""
        return self.num * other.den == other.num * self.den

    def pack(self) -> bytes:
        if not (0 < self.num <= 0xFFFFFFFF and 0 < self.den <= 0xFFFFFFFF):
            raise FrameError(f"rate {self.num}/{self.den} does not fit two u32 numbers above zero")
        return _RATE.pack(self.num, self.den)

    @classmethod
    def unpack_from(cls, data: bytes, offset: int = 0) -> "Rate":
        return cls(*_RATE.unpack_from(data, offset))

    def __str__(self) -> str:
        return f"{self.num}" if self.den == 1 else f"{self.num}/{self.den} (= {self.value:.9g})"


def find_rate(rate: float, rates, rel: float = 1e-9):
    """The announced :class:`Rate` within ``rel`` of ``rate`` Sa/s, or None."""
    for r in rates:
        if abs(r.value - rate) <= rel * rate:
            return r
    return None


class Output(enum.IntEnum):
    """What a version-2 channel's samples drive."""

    FREQUENCY = 1    # DDS tuning words
    VOLTAGE = 2      # DAC codes


_CHANNEL = struct.Struct("<BBBxIqqQii")


@dataclass(frozen=True)
class ChannelCaps:
    """One output channel of a version-2 board: formats, memory and output range (in sample values)."""

    output: int                     # Output
    formats: tuple                  # Format members
    bits: int                       # tuning-word or DAC bits
    memory: int                     # samples
    low: int                        # lowest sample value it plays
    high: int                       # highest sample value it plays
    clock: int = 0                  # Hz, DDS reference clock (frequency channels)
    low_uv: int = 0                 # µV at ``low`` (voltage channels)
    high_uv: int = 0                # µV at ``high`` (voltage channels)

    def pack(self) -> bytes:
        return _CHANNEL.pack(self.output, formats_mask(self.formats), self.bits, self.memory, self.low,
                             self.high, self.clock, self.low_uv, self.high_uv)

    @classmethod
    def unpack_from(cls, data: bytes, offset: int) -> "ChannelCaps":
        out, mask, bits, memory, low, high, clock, low_uv, high_uv = _CHANNEL.unpack_from(data, offset)
        return cls(out, formats_from_mask(mask), bits, memory, low, high, clock, low_uv, high_uv)

    def range_hz(self) -> tuple | None:
        """The output range in Hz of a frequency channel: f = W f_clock / 2^bits (common practice)."""
        if self.output != Output.FREQUENCY or not self.clock:
            return None
        return self.low * self.clock / 2.0 ** self.bits, self.high * self.clock / 2.0 ** self.bits

    def to_json(self) -> dict:
        out = {"output": Output(self.output).name.lower() if self.output in (1, 2) else self.output,
               "formats": [Format(f).name.lower() for f in self.formats], "bits": self.bits,
               "memory": self.memory, "low": self.low, "high": self.high}
        if self.output == Output.FREQUENCY:
            out.update(clock=self.clock, range_hz=list(self.range_hz() or ()))
        else:
            out.update(range_v=[self.low_uv * 1e-6, self.high_uv * 1e-6])
        return out


_CAPS2 = struct.Struct("<BBBBHBxII")


@dataclass(frozen=True)
class CapabilitiesV2:
    """What a version-2 board says about itself in its HELLO reply (section 3.1 of the document)."""

    channels: tuple                 # ChannelCaps, channel 1 first
    sources: tuple                  # Source members it offers
    edges: tuple                    # Edge members its trigger input offers
    max_payload: int
    delay_step: int                 # ns; 0: no start delay
    delay_max: int                  # ns
    rates: tuple                    # Rate
    name: str = ""
    version: int = 2

    def pack(self) -> bytes:
        if not 1 <= len(self.channels) <= MAX_CHANNELS:
            raise FrameError(f"a board announces between 1 and {MAX_CHANNELS} channels")
        if not 1 <= len(self.rates) <= 255:
            raise FrameError("a board announces between 1 and 255 sample rates")
        head = _CAPS2.pack(self.version, len(self.channels), mask_of(self.sources), mask_of(self.edges),
                           self.max_payload, len(self.rates), self.delay_step, self.delay_max)
        return (head + b"".join(c.pack() for c in self.channels) + b"".join(r.pack() for r in self.rates)
                + _clip_text(self.name))

    @classmethod
    def unpack(cls, data: bytes) -> "CapabilitiesV2":
        if len(data) < _CAPS2.size:
            raise FrameError(f"HELLO reply too short ({len(data)} bytes)")
        version, n_ch, sources, edges, max_payload, n_rates, step, dmax = _CAPS2.unpack_from(data)
        end = _CAPS2.size + _CHANNEL.size * n_ch + _RATE.size * n_rates
        if not 1 <= n_ch <= MAX_CHANNELS or not n_rates or len(data) < end:
            raise FrameError(f"HELLO reply announces {n_ch} channels and {n_rates} rates in {len(data)} bytes")
        channels = tuple(ChannelCaps.unpack_from(data, _CAPS2.size + _CHANNEL.size * i) for i in range(n_ch))
        at = _CAPS2.size + _CHANNEL.size * n_ch
        rates = tuple(Rate.unpack_from(data, at + _RATE.size * i) for i in range(n_rates))
        if any(r.den == 0 for r in rates):
            raise FrameError("HELLO reply announces a rate with denominator 0")
        return cls(channels, members_of(Source, sources), members_of(Edge, edges), max_payload, step, dmax,
                   rates, _text(data[end:]), version)

    @property
    def memory(self) -> int:
        return min(c.memory for c in self.channels)

    def to_json(self) -> dict:
        return {"protocol": self.version, "name": self.name, "max_payload": self.max_payload,
                "channels": [c.to_json() for c in self.channels],
                "trigger_sources": [s.name.lower() for s in self.sources],
                "edges": [e.name.lower() for e in self.edges],
                "delay_step_ns": self.delay_step, "delay_max_ns": self.delay_max,
                "rates": [r.value for r in self.rates]}


_BEGIN2 = struct.Struct("<BBxxIIII")


@dataclass(frozen=True)
class BeginV2:
    """Version-2 BEGIN: a table for ``channel`` (1-based) and its rate as a fraction."""

    format: int
    channel: int
    count: int
    crc: int
    rate: Rate

    @property
    def nbytes(self) -> int:
        return self.count * Format(self.format).itemsize

    def pack(self) -> bytes:
        return _BEGIN2.pack(self.format, self.channel, self.count, self.crc, self.rate.num, self.rate.den)

    @classmethod
    def unpack(cls, data: bytes) -> "BeginV2":
        if len(data) != _BEGIN2.size:
            raise FrameError(f"BEGIN payload must be {_BEGIN2.size} bytes, got {len(data)}")
        fmt, channel, count, crc, num, den = _BEGIN2.unpack(data)
        return cls(fmt, channel, count, crc, Rate(num, den))


#: payload offsets of the reserved bytes of each version-2 request (must be zero)
RESERVED_BYTES = {MsgType.BEGIN: (2, 3), MsgType.TRIGGER: (3,)}

_TABLE2 = struct.Struct("<BBxxIIII")


@dataclass(frozen=True)
class TableIdV2:
    """A committed table of one channel as a version-2 board reports it (COMMIT and STATUS replies)."""

    format: int          # 0: no table
    channel: int
    count: int
    crc: int
    rate: Rate

    def pack(self) -> bytes:
        return _TABLE2.pack(self.format, self.channel, self.count, self.crc, self.rate.num, self.rate.den)

    @classmethod
    def unpack_from(cls, data: bytes, offset: int = 0) -> "TableIdV2":
        fmt, channel, count, crc, num, den = _TABLE2.unpack_from(data, offset)
        return cls(fmt, channel, count, crc, Rate(num, den))

    @classmethod
    def unpack(cls, data: bytes) -> "TableIdV2":
        if len(data) != _TABLE2.size:
            raise FrameError(f"table description must be {_TABLE2.size} bytes, got {len(data)}")
        return cls.unpack_from(data)


_TRIGGER = struct.Struct("<BBBxI")


@dataclass(frozen=True)
class Trigger:
    """TRIGGER settings: what starts playback, the edge, once or repeated, start delay in ns."""

    source: int = Source.FREE
    edge: int = Edge.RISING
    mode: int = Mode.EACH
    delay: int = 0

    def pack(self) -> bytes:
        return _TRIGGER.pack(self.source, self.edge, self.mode, self.delay)

    @classmethod
    def unpack(cls, data: bytes) -> "Trigger":
        if len(data) != _TRIGGER.size:
            raise FrameError(f"trigger settings must be {_TRIGGER.size} bytes, got {len(data)}")
        return cls(*_TRIGGER.unpack(data))

    def describe(self) -> str:
        src = {0: "free-running", 1: "external", 2: "software"}.get(self.source, f"source {self.source}")
        edge = f", {Edge(self.edge).name.lower()} edge" if self.source == Source.EXTERNAL and self.edge in (0, 1) else ""
        mode = {0: "on every trigger", 1: "once", 2: "continuously"}.get(self.mode, f"mode {self.mode}")
        if self.source == Source.FREE and self.mode != Mode.ONCE:
            mode = "back to back"
        return f"{src}{edge}, {mode}, start delay {self.delay} ns"


_STATUS2 = struct.Struct("<BBBBI")


@dataclass(frozen=True)
class StatusV2:
    """Version-2 STATUS reply: state, armed, pending channel, received bytes, trigger, every channel's table."""

    state: int
    armed: bool
    pending: int            # channel of the unfinished upload (0: none)
    received: int
    trigger: Trigger
    tables: tuple           # TableIdV2 of channel 1, 2, ...

    def pack(self) -> bytes:
        return (_STATUS2.pack(self.state, int(self.armed), len(self.tables), self.pending, self.received)
                + self.trigger.pack() + b"".join(t.pack() for t in self.tables))

    @classmethod
    def unpack(cls, data: bytes) -> "StatusV2":
        if len(data) < _STATUS2.size + _TRIGGER.size:
            raise FrameError(f"STATUS reply too short ({len(data)} bytes)")
        state, armed, n_ch, pending, received = _STATUS2.unpack_from(data)
        head = _STATUS2.size + _TRIGGER.size
        if len(data) != head + _TABLE2.size * n_ch or not 1 <= n_ch <= MAX_CHANNELS:
            raise FrameError(f"STATUS reply of {len(data)} bytes does not describe {n_ch} channels")
        tables = tuple(TableIdV2.unpack_from(data, head + _TABLE2.size * i) for i in range(n_ch))
        return cls(state, bool(armed), pending, received, Trigger.unpack(data[_STATUS2.size:head]), tables)


def parse_status(data: bytes):
    """A STATUS reply of either version, told apart by its length (20 bytes: version 1)."""
    return Status.unpack(data) if len(data) == _STATUS.size else StatusV2.unpack(data)


def parse_capabilities(version: int, data: bytes):
    """The HELLO reply of a session of ``version``."""
    return Capabilities.unpack(data) if version == 1 else CapabilitiesV2.unpack(data)


def choose_format(formats, low: int, high: int, preferred=None):
    """The table format to send samples from ``low`` to ``high`` in: ``preferred`` when offered and
    wide enough, else the narrowest offered format that holds every sample unchanged (None: none does)."""
    import numpy as np

    def holds(f):
        info = np.iinfo(np.dtype(Format(f).dtype))
        return info.min <= low and high <= info.max

    if preferred is not None and preferred in formats and holds(preferred):
        return Format(preferred)
    fitting = sorted((Format(f) for f in formats if holds(f)), key=lambda f: (f.itemsize, f))
    return fitting[0] if fitting else None
