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

PROTOCOL_VERSION = 1
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
#: longest reply payload a board sends (a HELLO reply with 255 rates and a full name)
MAX_REPLY = 1 + 19 + 4 * 255 + MAX_TEXT

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
    ACK = 0x80
    REFUSE = 0x81


REQUESTS = frozenset(t for t in MsgType if t < 0x80)


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
