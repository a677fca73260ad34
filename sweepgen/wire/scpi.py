"""SCPI program data and replies: numbers, lists, data formats, error-queue replies.

What travels on an SCPI link besides the commands themselves (those are the
generator profile's templates, :mod:`sweepgen.dialect`): character data (a
trace name), decimal numbers, lists of numbers, the ``FORMat`` words of a
binary transfer, and the replies of the error queue (SCPI-1999 21.8). The
definite-length blocks of IEEE 488.2 are in :mod:`sweepgen.wire.block`.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

#: SCPI character program data (IEEE 488.2 7.7.1): a letter, then letters, digits, '_'; <= 12 chars.
NAME = re.compile(r"[A-Za-z][A-Za-z0-9_]{0,11}\Z")

# SCPI-1999 volume 2 chapter 21 and IEEE 488.2 section 11 error numbers (recalled).
ERRORS = {
    0: "No error",
    -100: "Command error",
    -101: "Invalid character",
    -102: "Syntax error",
    -103: "Invalid separator",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -112: "Program mnemonic too long",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -120: "Numeric data error",
    -141: "Invalid character data",
    -151: "Invalid string data",
    -160: "Block data error",
    -161: "Invalid block data",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -223: "Too much data",
    -224: "Illegal parameter value",
    -240: "Hardware error",
    -350: "Queue overflow",
    -400: "Query error",
}


def error_text(code: int, detail: str = "") -> str:
    """The reply to ``SYSTem:ERRor?`` for ``code``: ``-222,"Data out of range;detail"``.

    SCPI-1999 lets a device append device-dependent information after a ``;``
    inside the quoted string; quotes in it are doubled (IEEE 488.2 string data).
    """
    text = ERRORS.get(code, "Error")
    if detail:
        text = f"{text};{detail}"
    return f'{code},"' + text.replace('"', '""') + '"'


@dataclass(frozen=True)
class ErrorReply:
    """One parsed reply to an error query."""

    code: int | None          # None when the reply is not of the form <number>,"<text>"
    message: str
    raw: str


def parse_error(reply: str) -> ErrorReply:
    """Parse a ``SYSTem:ERRor?`` reply ``<code>,"<message>"`` (SCPI-1999 21.8)."""
    raw = reply.strip()
    m = re.match(r'^\s*([+-]?\d+)\s*,\s*"?(.*?)"?\s*$', raw, re.S)
    if not m:
        return ErrorReply(None, raw, raw)
    return ErrorReply(int(m.group(1)), m.group(2).replace('""', '"'), raw)


def parse_boolean(reply: str) -> bool | None:
    """A Boolean reply: ``1``/``ON`` is True, ``0``/``OFF`` False, anything else None.

    SCPI-1999 answers a Boolean query with the number 0 or 1 (recalled); some
    instruments answer ``OFF``/``ON``, and a number may carry a ``+``.
    """
    text = reply.strip().upper()
    if text in ("1", "+1", "ON"):
        return True
    if text in ("0", "+0", "OFF"):
        return False
    return None


def is_no_error(reply: str, pattern: str) -> bool:
    """True when ``reply`` matches the profile's ``no_error_pattern`` (a regular expression)."""
    return re.search(pattern, reply.strip()) is not None


# ---------------------------------------------------------------------------------------------
# Numbers and data formats
# ---------------------------------------------------------------------------------------------
def format_number(value) -> str:
    """A finite number as SCPI decimal numeric program data (IEEE 488.2 7.7.2)."""
    if isinstance(value, bool):
        raise ValueError(f"expected a number, got {value!r}")
    if isinstance(value, int):
        return str(value)
    value = float(value)
    if value != value or value in (float("inf"), float("-inf")):
        raise ValueError(f"expected a finite number, got {value!r}")
    text = format(value, ".12g")
    return "0" if text == "-0" else text


_TYPES = {"i": "INT", "u": "UINT", "f": "REAL"}


def data_format(dtype, mode: str = "block") -> dict:
    """SCPI ``FORMat`` words for a NumPy dtype: ``{"format", "type", "bits"}``.

    ``int16`` -> ``INT,16``; ``uint32`` -> ``UINT,32``; ``float32`` -> ``REAL,32``;
    ASCII uploads -> ``ASC`` (SCPI-1999 ``FORMat[:DATA] <type>[,<length>]``).
    """
    import numpy as np

    dt = np.dtype(dtype)
    if dt.kind not in _TYPES:
        raise ValueError(f"no SCPI data format for dtype {dt}")
    kind, bits = _TYPES[dt.kind], dt.itemsize * 8
    if mode == "ascii":
        return {"format": "ASC", "type": "ASC", "bits": bits}
    return {"format": f"{kind},{bits}", "type": kind, "bits": bits}


def border(byte_order: str) -> str:
    """SCPI ``FORMat:BORDer`` word: NORMal = most significant byte first (big-endian)."""
    return "NORM" if byte_order == "big" else "SWAP"


def wire_dtype(dtype, byte_order: str):
    """``dtype`` with the byte order of the wire (``"little"`` or ``"big"``)."""
    import numpy as np

    return np.dtype(dtype).newbyteorder("<" if byte_order == "little" else ">")


def to_wire(codes, byte_order: str) -> memoryview:
    """The bytes of ``codes`` in ``byte_order``, without a copy when already in that order."""
    import numpy as np

    arr = np.ascontiguousarray(codes)
    arr = arr.astype(wire_dtype(arr.dtype, byte_order), copy=False)
    return memoryview(arr).cast("B")


def ascii_list(codes) -> str:
    """Codes as an SCPI list of decimal numbers: ``1,-2,3``."""
    import numpy as np

    arr = np.asarray(codes)
    if arr.size == 0:
        return ""
    if arr.dtype.kind == "f":
        return ",".join(format_number(float(v)) for v in arr)
    return ",".join(map(str, arr.tolist()))


def parse_ascii_list(text: str, dtype):
    """Parse an SCPI list of numbers into an array of ``dtype`` (ValueError when malformed)."""
    import numpy as np

    text = text.strip()
    if not text:
        return np.empty(0, dtype)
    parts = text.split(",")
    kind = np.dtype(dtype).kind
    if kind == "f":
        return np.array([float(p) for p in parts], dtype=dtype)
    values = np.array([int(p) for p in parts], dtype=np.int64)
    return values.astype(dtype)
