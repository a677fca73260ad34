"""SCPI command templates of a generator profile (the instrument's dialect), the
IEEE 488.2 definite-length block codec, and SCPI error replies.

Every command sweepgen sends to an arbitrary-waveform generator is a template
from the ``[commands]`` table of its generator profile, so a user adapts the
tool to an instrument by writing a profile, never code. The built-in dialect
(profile ``virtual-awg``) uses only IEEE 488.2 common commands and SCPI-1999
standard subsystems.

Templates
---------
A template is one line of SCPI with ``{placeholders}``. The values put into them
are checked here (:func:`render`): a trace name is SCPI character data (a
letter, then letters, digits or ``_``, at most 12 characters), numbers are
finite and written as plain decimal numbers, so no ``;``, newline, quote or
``#`` can reach the instrument through a value (no command injection). The
placeholders (:data:`PLACEHOLDERS`):

``{channel}``      output channel (1, 2, ...)
``{name}``         trace name (``trace_name`` setting)
``{data}``         the table: an IEEE 488.2 definite-length block, or an ASCII
                   list of codes (``upload_mode``); only in ``upload``
``{format}``       ``INT,16`` / ``UINT,32`` / ``REAL,32`` ... or ``ASC`` (ASCII uploads)
``{type}``, ``{bits}``   the two parts of ``{format}`` (``INT`` and ``16``)
``{border}``       ``NORM`` (most significant byte first) or ``SWAP``
                   (``byte_order`` setting, SCPI ``FORMat:BORDer``)
``{rate}``         sample rate in samples/s
``{frequency}``    repetition frequency of the table, rate/count, in Hz
``{period}``       duration of the table, count/rate, in s
``{count}``        samples in the table
``{amplitude}``    peak-to-peak volts to program; ``{offset}`` its centre (V)
``{high}``, ``{low}``    offset ± amplitude/2 (V)
``{trigger_source}``    ``EXT`` (pulsed sources: start on the source trigger)
                        or ``IMM`` (free running)

Block codec
-----------
IEEE 488.2-1992 section 7.7.6, definite-length arbitrary block: ``#``, one
digit *n* (1-9), *n* digits giving the byte count, then the bytes. The bytes
come straight from NumPy arrays in the requested byte order and can be
streamed chunk by chunk after the header (:func:`block_parts`), so a large
table is never assembled in memory.
"""

from __future__ import annotations

import re
import string
from dataclasses import dataclass, field
from typing import Iterable, Iterator

from sweepgen.errors import InputError

#: Templates that may appear in [commands]; values are command strings with {placeholders}.
TEMPLATE_KEYS = (
    "identify", "reset", "clear", "output_off", "format", "upload", "wait", "error_query",
    "readback", "checksum", "function", "rate", "amplitude", "offset", "trigger", "output_on",
)
#: Settings in [commands] that are not command templates.
SETTING_KEYS = ("identity_pattern", "no_error_pattern", "upload_mode", "trace_name", "byte_order")
REQUIRED = ("identify", "identity_pattern", "output_off", "clear", "upload", "wait", "error_query",
            "no_error_pattern", "output_on")
#: Templates that must be queries (they are answered).
QUERIES = ("identify", "wait", "error_query", "readback", "checksum")

#: Every placeholder a template may use (see the module docstring).
PLACEHOLDERS = frozenset({
    "channel", "name", "data", "format", "type", "bits", "border", "rate", "frequency", "period",
    "count", "amplitude", "offset", "high", "low", "trigger_source",
})

#: SCPI character program data (IEEE 488.2 7.7.1): a letter, then letters, digits, '_'; <= 12 chars.
NAME = re.compile(r"[A-Za-z][A-Za-z0-9_]{0,11}\Z")
_SAFE_TOKEN = re.compile(r"[A-Za-z0-9_.+\-]+(,[A-Za-z0-9_.+\-]+)?\Z")

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


def is_no_error(reply: str, pattern: str) -> bool:
    """True when ``reply`` matches the profile's ``no_error_pattern`` (a regular expression)."""
    return re.search(pattern, reply.strip()) is not None


# ---------------------------------------------------------------------------------------------
# The [commands] table of a profile
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Commands:
    """The command templates and settings of one instrument dialect."""

    templates: dict = field(default_factory=dict)
    identity_pattern: str = ""
    no_error_pattern: str = ""
    upload_mode: str = "block"        # "block" (IEEE 488.2 definite-length) | "ascii"
    trace_name: str = "SWEEP"
    byte_order: str = "little"        # byte order of binary blocks

    def has(self, name: str) -> bool:
        return bool(self.templates.get(name))

    def render(self, key: str, /, **values) -> str:
        """The command for template ``key`` with ``values`` checked and filled in."""
        return render(self.templates[key], key, **values)


def placeholders(template: str) -> list[str]:
    """The placeholder names used in ``template`` (in order)."""
    return [fname for _, fname, _, _ in string.Formatter().parse(template) if fname is not None]


def _check_template(section, name: str, value: str) -> None:
    if "\n" in value or "\r" in value:
        raise section.error(name, "a command template must be one line")
    try:
        used = placeholders(value)
    except ValueError as exc:
        raise section.error(name, f"malformed template {value!r} ({exc}); write braces as {{{{ }}}}") from None
    for field_name in used:
        if field_name not in PLACEHOLDERS:
            raise section.error(name, f"unknown placeholder {{{field_name}}} in {value!r} "
                                      f"(known: {', '.join(sorted(PLACEHOLDERS))})")
    for _, _, spec, conv in string.Formatter().parse(value):
        if spec or conv:
            raise section.error(name, f"placeholders take no format spec or conversion in {value!r}")
    if name == "upload":
        if used.count("data") != 1:
            raise section.error(name, f"the upload template needs exactly one {{data}}, got {value!r}")
    elif "data" in used:
        raise section.error(name, "{data} may only appear in the upload template")
    if name in QUERIES and "?" not in value:
        raise section.error(name, f"expected a query (a command with '?'), got {value!r}")


def parse_commands(section) -> Commands:
    """Read the ``[commands]`` table of a generator profile (a :class:`sweepgen._config.Section`)."""
    templates = {}
    for name in TEMPLATE_KEYS:
        value = section.string(name, None)
        if value is not None:
            _check_template(section, name, value)
            templates[name] = value
    settings = {}
    settings["identity_pattern"] = section.string("identity_pattern", "")
    settings["no_error_pattern"] = section.string("no_error_pattern", "")
    settings["upload_mode"] = section.string("upload_mode", "block", choices=("block", "ascii"))
    settings["trace_name"] = section.string("trace_name", "SWEEP")
    settings["byte_order"] = section.string("byte_order", "little", choices=("little", "big"))
    for name in REQUIRED:
        if not (templates.get(name) or settings.get(name)):
            raise section.error(name, "missing (required in a generator's [commands])")
    for name in ("identity_pattern", "no_error_pattern"):
        try:
            re.compile(settings[name])
        except re.error as exc:
            raise section.error(name, f"not a valid regular expression ({exc})") from None
    if not NAME.match(settings["trace_name"]):
        raise section.error("trace_name", "expected SCPI character data: a letter, then letters, digits "
                                          f"or '_', at most 12 characters, got {settings['trace_name']!r}")
    section.finish()
    return Commands(templates=templates, **settings)


# ---------------------------------------------------------------------------------------------
# Values put into templates
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


def format_value(key: str, value) -> str:
    """Check one placeholder value and return its text; refuses anything that could inject."""
    if key == "name":
        if not isinstance(value, str) or not NAME.match(value):
            raise ValueError(f"trace name must be SCPI character data (a letter, then letters, digits "
                             f"or '_', at most 12 characters), got {value!r}")
        return value
    if key in ("channel", "count", "bits"):
        least = 0 if key == "count" else 1
        if isinstance(value, bool) or not isinstance(value, int) or value < least:
            raise ValueError(f"{key} must be a whole number >= {least}, got {value!r}")
        return str(value)
    if key in ("rate", "frequency", "period", "amplitude", "offset", "high", "low"):
        return format_number(value)
    if key in ("format", "type", "border", "trigger_source"):
        if not isinstance(value, str) or not _SAFE_TOKEN.match(value):
            raise ValueError(f"{key} must be SCPI character data, got {value!r}")
        return value
    raise ValueError(f"unknown placeholder {{{key}}}")


def render(template_text: str, template: str | None = None, /, **values) -> str:
    """Fill ``template_text`` with checked ``values``; ``{data}`` is left in place for the caller.

    Raises :class:`sweepgen.errors.InputError` naming the template when a value
    is missing or unsafe.
    """
    out = []
    for literal, key, _, _ in string.Formatter().parse(template_text):
        out.append(literal)
        if key is None:
            continue
        if key == "data":
            out.append("{data}")
            continue
        if key not in values or values[key] is None:
            raise InputError(f"template {template_text!r} needs a value for {{{key}}}, which this "
                             f"table does not provide", key=f"commands.{template or '?'}")
        try:
            out.append(format_value(key, values[key]))
        except ValueError as exc:
            raise InputError(f"refused to send {template_text!r}: {exc}",
                             key=f"commands.{template or '?'}") from None
    return "".join(out)


def split_data(command: str) -> tuple[str, str]:
    """Split a rendered upload command at ``{data}``: (text before, text after)."""
    before, _, after = command.partition("{data}")
    return before, after


# ---------------------------------------------------------------------------------------------
# Data formats
# ---------------------------------------------------------------------------------------------
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


# ---------------------------------------------------------------------------------------------
# IEEE 488.2 definite-length arbitrary blocks
# ---------------------------------------------------------------------------------------------
class BlockError(ValueError):
    """Malformed IEEE 488.2 block."""


def block_header(nbytes: int) -> bytes:
    """``#<n><nbytes>`` for a definite-length block of ``nbytes`` bytes (IEEE 488.2 7.7.6)."""
    if nbytes < 0:
        raise ValueError("a block cannot hold a negative number of bytes")
    digits = str(int(nbytes))
    if len(digits) > 9:
        raise BlockError(f"a definite-length block holds at most 999999999 bytes, not {nbytes}")
    return f"#{len(digits)}{digits}".encode("ascii")


def encode_block(data) -> bytes:
    """A whole definite-length block (header and bytes) for an array or bytes."""
    import numpy as np

    raw = data if isinstance(data, (bytes, bytearray, memoryview)) else np.ascontiguousarray(data)
    payload = bytes(memoryview(raw).cast("B"))
    return block_header(len(payload)) + payload


def block_parts(chunks: Iterable, nbytes: int) -> Iterator:
    """Yield the header, then each chunk's bytes: a block streamed without assembling it.

    ``chunks`` yields bytes-like objects or NumPy arrays (their bytes as stored);
    their total must be ``nbytes``, else :class:`BlockError` (the instrument would
    wait for the rest or misread the next command).
    """
    import numpy as np

    yield block_header(nbytes)
    sent = 0
    for chunk in chunks:
        raw = chunk if isinstance(chunk, (bytes, bytearray, memoryview)) else np.ascontiguousarray(chunk)
        view = memoryview(raw).cast("B")
        sent += len(view)
        if sent > nbytes:
            raise BlockError(f"the data ran past the announced {nbytes} bytes")
        yield view
    if sent != nbytes:
        raise BlockError(f"the data ended after {sent} of the announced {nbytes} bytes")


def parse_block_header(buffer, start: int = 0) -> tuple[int, int] | None:
    """Parse a block header at ``buffer[start]``.

    Returns ``(payload_start, nbytes)``, or ``None`` if the buffer ends before
    the header is complete. Raises :class:`BlockError` when it is not a
    definite-length block header (``#0`` indefinite blocks included).
    """
    if len(buffer) - start < 2:
        if len(buffer) > start and buffer[start:start + 1] != b"#":
            raise BlockError("a block starts with '#'")
        return None
    if buffer[start:start + 1] != b"#":
        raise BlockError("a block starts with '#'")
    ndigits = buffer[start + 1] - 0x30
    if not 1 <= ndigits <= 9:
        raise BlockError("expected a digit 1-9 after '#' (definite-length block)")
    end = start + 2 + ndigits
    if len(buffer) < end:
        return None
    digits = bytes(buffer[start + 2:end])
    if not digits.isdigit():
        raise BlockError(f"block length {digits!r} is not a decimal number")
    return end, int(digits)


def decode_block(data) -> bytes:
    """The payload of a complete block ``data`` (a trailing newline is allowed)."""
    parsed = parse_block_header(data)
    if parsed is None:
        raise BlockError("the block header is incomplete")
    start, nbytes = parsed
    payload = bytes(data[start:start + nbytes])
    if len(payload) != nbytes:
        raise BlockError(f"the block announces {nbytes} bytes but holds {len(payload)}")
    rest = bytes(data[start + nbytes:])
    if rest not in (b"", b"\n", b"\r\n"):
        raise BlockError(f"{len(rest)} unexpected bytes after the block")
    return payload
