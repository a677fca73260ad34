"""The virtual instrument: an arbitrary-waveform generator on a real TCP socket.

``sweepgen emulate`` serves it; the tests, the demo and users' dry runs upload
to it through pyvisa exactly as they would to a LAN instrument (VISA resource
``TCPIP::<host>::<port>::SOCKET``, newline-terminated messages). It takes its
limits from a generator profile: memory depth, record granularity and minimum
length, sample-rate range (or list of rates), DAC resolution and output range.

What it speaks
--------------
IEEE 488.2 common commands and SCPI-1999 standard subsystems, in long or short
form, with optional nodes and numeric suffixes (``SOUR1:`` = channel 1),
compound messages (``;``, with the SCPI rule that a header without a leading
``:`` continues the path of the previous one), quoted strings and
definite-length blocks:

* ``*IDN?  *RST  *CLS  *OPC  *OPC?  *WAI  *ESR?  *STB?  *TST?``
* ``SYSTem:ERRor[:NEXT]?`` (``0,"No error"`` when empty), ``SYSTem:ERRor:COUNt?``, ``SYSTem:VERSion?``
* ``OUTPut[n][:STATe] ON|OFF``
* ``FORMat[:DATA] ASCii|INTeger,<bits>|UINTeger,<bits>|REAL,<bits>``, ``FORMat:BORDer NORMal|SWAPped``
* ``TRACe|DATA[:DATA] <name>,<block or list>``, ``TRACe|DATA[:DATA]? <name>``,
  ``TRACe|DATA:POINts? <name>``, ``TRACe|DATA:CATalog?``, ``TRACe|DATA:DELete[:NAME] <name>``,
  ``TRACe|DATA:DELete:ALL``
* ``[SOURce[n]:]FUNCtion[:SHAPe] SINusoid|SQUare|TRIangle|RAMP|DC|USER``,
  ``[SOURce[n]:]FUNCtion:USER <name>`` (the trace a channel plays)
* ``[SOURce[n]:]FREQuency[:CW|:FIXed] <Hz>``: for a user trace this is the
  repetition frequency of the whole trace, so the sample rate is frequency x points
* ``[SOURce[n]:]VOLTage[:LEVel][:IMMediate][:AMPLitude] <V peak-to-peak>``,
  ``[SOURce[n]:]VOLTage[:LEVel][:IMMediate]:OFFSet <V>``
* ``TRIGger[:SEQuence]:SOURce IMMediate|EXTernal|BUS``

One extension node of its own, outside the built-in dialect (SCPI lets a device
add nodes): ``TRACe|DATA:CRC? <name>`` answers the CRC-32 (as ``zlib.crc32``) of
the bytes a readback of that trace would carry in the present ``FORMat``
(for ``ASCii``, of the list text). A profile may use it as its ``checksum``.

Binary blocks are read with the present ``FORMat`` type and ``BORDer``
(NORMal: most significant byte first). Integer codes must lie within the DAC
(signed ``INT``: -2^(b-1) ... 2^(b-1)-1 for b DAC bits; ``UINT``: 0 ... 2^b-1),
``REAL`` values within [-1, 1]. As sweepgen's renderer assumes, signed codes
±(2^(b-1)-1) play offset ± amplitude/2. ``OUTPut ON`` is refused (-221 Settings
conflict) unless the played trace, its sample rate and offset ± amplitude/2
are all within the profile's limits.

Errors go to a queue of 16 (on overflow the newest entry becomes -350 Queue
overflow, SCPI-1999 21.8). A command error (-1xx) discards the rest of its
message (IEEE 488.2 6.1.6.1), so nothing after a bad or injected unit runs.

Fault switches (:class:`Faults`) make it misbehave on purpose for tests.
Clients are served one at a time, in the order they connect.
"""

from __future__ import annotations

import contextlib
import re
import socket
import threading
import time
import zlib
from dataclasses import dataclass

import numpy as np

from sweepgen import scpi

QUEUE_LENGTH = 16
REPLY_SEND_TIMEOUT = 60.0             # s: a client that takes no reply bytes for this long is dropped
MAX_HEADER = 12                       # characters in one SCPI mnemonic (SCPI-1999 6.2.1)
_SPECIAL = re.compile(rb'[\n#"\']')
_TOKEN = re.compile(r"^([A-Za-z]+)(\d*)$")


@dataclass
class Faults:
    """Ways the virtual instrument misbehaves on purpose (all off by default).

    ``drop_after``: close a connection once it has received this many bytes.
    ``delay``: seconds to wait before every reply (an instrument that answers slowly).
    ``mute``: never answer a query.
    ``error_after_upload``: queue ``-240,"Hardware error"`` after each stored trace.
    ``corrupt_readback``: flip one bit of every readback and checksum.
    """

    drop_after: int | None = None
    delay: float = 0.0
    mute: bool = False
    error_after_upload: bool = False
    corrupt_readback: bool = False

    def active(self) -> list[str]:
        names = []
        if self.drop_after is not None:
            names.append(f"drop after {self.drop_after} bytes")
        if self.delay:
            names.append(f"answer after {self.delay:g} s")
        if self.mute:
            names.append("never answer")
        if self.error_after_upload:
            names.append("error after upload")
        if self.corrupt_readback:
            names.append("corrupt readback")
        return names


class _Error(Exception):
    def __init__(self, code: int, detail: str = ""):
        super().__init__(code, detail)
        self.code = code
        self.detail = detail


# ---------------------------------------------------------------------------------------------
# SCPI header patterns: "[SOURce#:]FUNCtion[:SHAPe]"  ('#' = numeric suffix, '|' = alias)
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Node:
    forms: tuple            # ((short, long), ...)
    optional: bool
    suffix: bool
    key: str                # long form of the first alternative, for captured suffixes

    def accepts(self, mnemonic: str, suffix: str) -> bool:
        if suffix and not self.suffix:
            return False
        return any(mnemonic in (short, long) for short, long in self.forms)


def _node(text: str, optional: bool) -> _Node:
    suffix = text.endswith("#")
    text = text.rstrip("#")
    forms = tuple((re.sub(r"[^A-Z]", "", alt), alt.upper()) for alt in text.split("|"))
    return _Node(forms, optional, suffix, forms[0][1])


def _compile(pattern: str) -> tuple:
    nodes = []
    for optional, required in re.findall(r"\[:?([A-Za-z|#]+):?\]|:?([A-Za-z|#]+)", pattern):
        nodes.append(_node(optional or required, bool(optional)))
    return tuple(nodes)


def _match(nodes, tokens, i=0, j=0):
    """Suffixes captured {node key: int} when ``tokens`` match ``nodes``, else None."""
    if i == len(nodes):
        return {} if j == len(tokens) else None
    node = nodes[i]
    if j < len(tokens) and node.accepts(*tokens[j]):
        rest = _match(nodes, tokens, i + 1, j + 1)
        if rest is not None:
            if tokens[j][1]:
                rest[node.key] = int(tokens[j][1])
            return rest
    if node.optional:
        return _match(nodes, tokens, i + 1, j)
    return None


def _choice(param, options: dict, what: str):
    """Character data matched against {"SINusoid": value, ...} (short or long form)."""
    text = _text(param).upper()
    for word, value in options.items():
        if text in (re.sub(r"[^A-Z]", "", word), word.upper()):
            return value
    raise _Error(-224, f"{what} must be one of {', '.join(options)}, got {text[:20]}")


def _text(param) -> str:
    kind, value = param
    if kind != "text":
        raise _Error(-104, "expected character or numeric data")
    return value


def _number(param, what: str) -> float:
    text = _text(param)
    try:
        value = float(text)
    except ValueError:
        raise _Error(-120, f"{what} must be a number, got {text[:20]}") from None
    if not np.isfinite(value):
        raise _Error(-120, f"{what} must be finite")
    return value


def _bool(param) -> bool:
    text = _text(param).upper()
    if text in ("ON", "OFF"):
        return text == "ON"
    try:
        return round(float(text)) != 0
    except ValueError:
        raise _Error(-224, f"expected ON, OFF, 1 or 0, got {text[:20]}") from None


def _name(param) -> str:
    kind, value = param
    if kind == "block":
        raise _Error(-104, "expected a trace name")
    if not scpi.NAME.match(value):
        raise _Error(-141 if kind == "text" else -151, "a trace name is a letter, then letters, digits "
                                                        "or '_', at most 12 characters")
    return value.upper()


def _count(params, low: int, high: int) -> None:
    if len(params) < low:
        raise _Error(-109)
    if len(params) > high:
        raise _Error(-108)


def _split(text: str, sep: str) -> list[str]:
    """Split at ``sep`` outside quoted strings (IEEE 488.2 string data, doubled quotes)."""
    if '"' not in text and "'" not in text:
        return text.split(sep)
    parts, current, quote = [], [], None
    for ch in text:
        if quote:
            current.append(ch)
            if ch == quote:
                quote = None
        elif ch in "\"'":
            quote = ch
            current.append(ch)
        elif ch == sep:
            parts.append("".join(current))
            current = []
        else:
            current.append(ch)
    if quote:
        raise _Error(-102, "unterminated string")
    parts.append("".join(current))
    return parts


def _param(text: str, blocks: list):
    text = text.strip(" \t\r")
    if not text:
        raise _Error(-102, "empty parameter")
    if text.startswith("\x00B") and text.endswith("\x00"):
        return ("block", blocks[int(text[2:-1])])
    if text[0] in "\"'":
        quote = text[0]
        if len(text) < 2 or text[-1] != quote:
            raise _Error(-102, "unterminated string")
        inner = text[1:-1]
        if re.search(f"(?<!{quote}){quote}(?!{quote})", inner.replace(quote * 2, "")):
            raise _Error(-102, "unexpected quote")
        return ("string", inner.replace(quote * 2, quote))
    if re.search(r"[\s\"'\x00]", text):
        raise _Error(-102, f"unexpected character in parameter {text[:20]!r}")
    return ("text", text)


# ---------------------------------------------------------------------------------------------
# The instrument (state machine; no I/O)
# ---------------------------------------------------------------------------------------------
@dataclass
class Channel:
    """Settings of one output channel."""

    output: bool = False
    shape: str = "SIN"
    user: str | None = None          # trace played when shape is USER
    frequency: float = 1e3           # Hz; for USER the repetition frequency of the trace
    amplitude: float = 0.1           # V peak-to-peak
    offset: float = 0.0              # V


@dataclass
class _Trace:
    values: np.ndarray               # native byte order
    kind: str                        # "INT" | "UINT" | "REAL" | "ASC"


@dataclass
class Response:
    """One reply: text, or a block (header + data) for binary readbacks."""

    text: str | None = None
    block: object = None             # bytes-like


class VirtualInstrument:
    """An arbitrary-waveform generator that enforces the limits of ``generator``.

    ``execute(text, blocks)`` runs one program message (``blocks`` holds the
    payloads of its definite-length blocks, referenced from ``text`` as
    ``\\x00B<i>\\x00``) and returns the responses. :class:`InstrumentServer`
    puts it on a TCP socket.
    """

    def __init__(self, generator, *, faults: Faults | None = None, identity: str | None = None,
                 max_line: int | None = None):
        from sweepgen import __version__

        self.generator = generator
        self.faults = faults or Faults()
        self.identity = identity or f"sweepgen,virtual-awg,0,{__version__}"
        memory = generator.sampling.memory
        #: longest message text (blocks excluded) accepted, in bytes: room for an ASCII list of the
        #: whole memory at 12 characters a value (the longest 32-bit integer and its comma)
        self.max_line = max_line if max_line is not None else 65536 + 12 * memory
        #: largest block accepted, in bytes (memory depth at 8 bytes per value)
        self.max_block = 8 * memory
        self.lock = threading.RLock()
        self.traces: dict[str, _Trace] = {}
        self.errors: list[str] = []
        self.esr = 0
        #: (channel, True/False) each time an output is switched, for tests and the log
        self.output_events: list[tuple[int, bool]] = []
        self.log: list[str] = []          # program messages received (text, blocks as <n bytes>)
        self._commands = self._command_table()
        self.reset()

    # -- state -------------------------------------------------------------------------------
    def reset(self) -> None:
        """``*RST``: outputs off, defaults; stored traces are kept."""
        with self.lock:
            for n, channel in getattr(self, "channels", {}).items():
                if channel.output:
                    self.output_events.append((n, False))
            self.channels = {n: Channel() for n in range(1, self.generator.channels + 1)}
            self.format = ("ASC", 0)
            self.border = "NORM"
            self.trigger_source = "IMM"

    @property
    def ever_armed(self) -> bool:
        """True if any output was ever switched on."""
        return any(on for _, on in self.output_events)

    @property
    def outputs_on(self) -> list[int]:
        return [n for n, ch in self.channels.items() if ch.output]

    def push_error(self, code: int, detail: str = "") -> None:
        if -199 <= code <= -100:
            self.esr |= 32            # command error (IEEE 488.2 standard event status register)
        elif -299 <= code <= -200:
            self.esr |= 16            # execution error
        elif -399 <= code <= -300:
            self.esr |= 8             # device-dependent error
        elif -499 <= code <= -400:
            self.esr |= 4             # query error
        if len(self.errors) >= QUEUE_LENGTH:
            self.errors[-1] = scpi.error_text(-350)
        else:
            self.errors.append(scpi.error_text(code, detail))

    # -- one program message ---------------------------------------------------------------
    def execute(self, text: str, blocks: list | None = None) -> list[Response]:
        blocks = blocks or []
        responses: list[Response] = []
        with self.lock:
            try:
                if re.search(r"[^\x20-\x7e\t\r\x00]", text):
                    raise _Error(-101, "non-printable character")
                units = _split(text, ";")
            except _Error as exc:
                self.push_error(exc.code, exc.detail)
                return responses
            path: list[tuple[str, str]] = []
            for unit in units:
                if not unit.strip(" \t\r") and len(units) > 1 and unit is units[-1]:
                    break                                  # a trailing ';'
                try:
                    run, path = self._unit(unit, blocks, path)
                    result = run()
                    if result is not None:
                        responses.append(result)
                except _Error as exc:
                    self.push_error(exc.code, exc.detail)
                    if -199 <= exc.code <= -100:
                        break                              # discard the rest of the message
        return responses

    def _unit(self, unit: str, blocks: list, path: list):
        unit = unit.strip(" \t\r")
        if not unit:
            raise _Error(-102, "empty command")
        m = re.match(r"^(\S+)(?:[ \t]+(.*))?$", unit, re.S)
        header, rest = m.group(1), m.group(2)
        if "\x00" in header:                           # a block glued to the header
            raise _Error(-102, "missing space before the data")
        params = [] if rest is None or not rest.strip() else [_param(p, blocks) for p in _split(rest, ",")]
        query = header.endswith("?")
        base = header[:-1] if query else header
        if base.startswith("*"):
            word = base[1:].upper()
            if not re.fullmatch(r"[A-Z]{1,12}", word):
                raise _Error(-102, f"bad common command {header[:20]!r}")
            handler = self._common.get(word + ("?" if query else ""))
            if handler is None:
                raise _Error(-113, header[:20])
            return (lambda: handler(params)), path
        absolute = base.startswith(":")
        words = base[1:] if absolute else base
        if not words:
            raise _Error(-102, "empty header")
        tokens = []
        for word in words.split(":"):
            tm = _TOKEN.match(word)
            if not tm:
                raise _Error(-102, f"bad header {header[:24]!r}")
            if len(tm.group(1)) > MAX_HEADER:
                raise _Error(-112, tm.group(1)[:24])
            tokens.append((tm.group(1).upper(), tm.group(2)))
        # SCPI-1999 6.2.4: after ';' a header without a leading ':' continues the previous path
        full = tokens if absolute else path + tokens
        found = self._lookup(full, query)
        if found is None:
            raise _Error(-113, header[:24])
        handler, captures = found
        return (lambda: handler(params, captures)), full[:-1]

    def _lookup(self, tokens, query):
        for nodes, is_query, handler in self._commands:
            if is_query != query:
                continue
            captures = _match(nodes, tokens)
            if captures is not None:
                return handler, captures
        return None

    # -- command table ---------------------------------------------------------------------
    def _command_table(self):
        self._common = {
            "IDN?": lambda p: self._noparams(p) or Response(self.identity),
            "RST": lambda p: self._noparams(p) or self.reset(),
            "CLS": lambda p: self._noparams(p) or self._cls(),
            "OPC": lambda p: self._noparams(p) or self._opc(),
            "OPC?": lambda p: self._noparams(p) or Response("1"),
            "WAI": lambda p: self._noparams(p),
            "ESR?": lambda p: self._noparams(p) or self._esr(),
            "STB?": lambda p: self._noparams(p) or Response(str((4 if self.errors else 0)
                                                                  | (32 if self.esr else 0))),
            "TST?": lambda p: self._noparams(p) or Response("0"),
        }
        table = [
            ("SYSTem:ERRor[:NEXT]", True, self._error_next),
            ("SYSTem:ERRor:COUNt", True, lambda p, c: self._noparams(p) or Response(str(len(self.errors)))),
            ("SYSTem:VERSion", True, lambda p, c: self._noparams(p) or Response("1999.0")),
            ("OUTPut#[:STATe]", False, self._output),
            ("OUTPut#[:STATe]", True, lambda p, c: self._noparams(p) or
             Response("1" if self._channel(c, "OUTPUT").output else "0")),
            ("FORMat[:DATA]", False, self._format_set),
            ("FORMat[:DATA]", True, self._format_query),
            ("FORMat:BORDer", False, self._border_set),
            ("FORMat:BORDer", True, lambda p, c: self._noparams(p) or Response(self.border)),
            ("TRACe|DATA[:DATA]", False, self._trace_set),
            ("TRACe|DATA[:DATA]", True, self._trace_query),
            ("TRACe|DATA:POINts", True, self._trace_points),
            ("TRACe|DATA:CATalog", True, self._trace_catalog),
            ("TRACe|DATA:DELete[:NAME]", False, self._trace_delete),
            ("TRACe|DATA:DELete:ALL", False, self._trace_delete_all),
            ("TRACe|DATA:CRC", True, self._trace_crc),
            ("[SOURce#:]FUNCtion[:SHAPe]", False, self._shape_set),
            ("[SOURce#:]FUNCtion[:SHAPe]", True, lambda p, c: self._noparams(p) or
             Response(self._channel(c).shape)),
            ("[SOURce#:]FUNCtion:USER", False, self._user_set),
            ("[SOURce#:]FUNCtion:USER", True, lambda p, c: self._noparams(p) or
             Response(f'"{self._channel(c).user or ""}"')),
            ("[SOURce#:]FREQuency[:CW|FIXed]", False, self._frequency_set),
            ("[SOURce#:]FREQuency[:CW|FIXed]", True, lambda p, c: self._noparams(p) or
             Response(scpi.format_number(self._channel(c).frequency))),
            ("[SOURce#:]VOLTage[:LEVel][:IMMediate][:AMPLitude]", False, self._amplitude_set),
            ("[SOURce#:]VOLTage[:LEVel][:IMMediate][:AMPLitude]", True, lambda p, c: self._noparams(p) or
             Response(scpi.format_number(self._channel(c).amplitude))),
            ("[SOURce#:]VOLTage[:LEVel][:IMMediate]:OFFSet", False, self._offset_set),
            ("[SOURce#:]VOLTage[:LEVel][:IMMediate]:OFFSet", True, lambda p, c: self._noparams(p) or
             Response(scpi.format_number(self._channel(c).offset))),
            ("TRIGger[:SEQuence]:SOURce", False, self._trigger_set),
            ("TRIGger[:SEQuence]:SOURce", True, lambda p, c: self._noparams(p) or
             Response(self.trigger_source)),
        ]
        return [(_compile(pattern), query, handler) for pattern, query, handler in table]

    # -- helpers -----------------------------------------------------------------------------
    @staticmethod
    def _noparams(params):
        if params:
            raise _Error(-108)
        return None

    def _channel(self, captures, key="SOURCE") -> Channel:
        n = captures.get(key, 1)
        if n not in self.channels:
            raise _Error(-114, f"channel {n} (this instrument has {len(self.channels)})")
        return self.channels[n]

    def _cls(self):
        self.errors.clear()
        self.esr = 0

    def _opc(self):
        self.esr |= 1

    def _esr(self):
        value, self.esr = self.esr, 0
        return Response(str(value))

    def _error_next(self, params, captures):
        self._noparams(params)
        return Response(self.errors.pop(0) if self.errors else scpi.error_text(0))

    def _output(self, params, captures):
        _count(params, 1, 1)
        on = _bool(params[0])
        n = captures.get("OUTPUT", 1)
        channel = self._channel(captures, "OUTPUT")
        if on:
            self._check_playable(channel)
        if channel.output != on:
            channel.output = on
            self.output_events.append((n, on))

    def _check_playable(self, channel: Channel) -> None:
        out = self.generator.output
        if channel.shape == "USER":
            trace = self.traces.get(channel.user or "")
            if trace is None:
                raise _Error(-221, "no user trace selected")
            rate = channel.frequency * len(trace.values)
            if not self.generator.sampling.allows(rate):
                raise _Error(-221, f"sample rate {rate:.6g} Sa/s outside the instrument's range")
        low = channel.offset - channel.amplitude / 2
        high = channel.offset + channel.amplitude / 2
        if low < out.range_min - 1e-9 or high > out.range_max + 1e-9:
            raise _Error(-221, f"offset +- amplitude/2 spans {low:.6g} V to {high:.6g} V, outside "
                               f"{out.range_min:g} V to {out.range_max:g} V")

    # -- FORMat --------------------------------------------------------------------------------
    def _format_set(self, params, captures):
        _count(params, 1, 2)
        kind = _choice(params[0], {"ASCii": "ASC", "INTeger": "INT", "UINTeger": "UINT", "REAL": "REAL"},
                       "data format")
        if kind == "ASC":
            if len(params) > 1:
                _number(params[1], "length")
            self.format = ("ASC", 0)
            return
        default = {"INT": 16, "UINT": 16, "REAL": 32}[kind]
        bits = int(_number(params[1], "length")) if len(params) > 1 else default
        allowed = (32, 64) if kind == "REAL" else (8, 16, 32)
        if bits not in allowed:
            raise _Error(-224, f"{kind} length must be one of {allowed}")
        self.format = (kind, bits)

    def _format_query(self, params, captures):
        self._noparams(params)
        kind, bits = self.format
        return Response(kind if kind == "ASC" else f"{kind},{bits}")

    def _border_set(self, params, captures):
        _count(params, 1, 1)
        self.border = _choice(params[0], {"NORMal": "NORM", "SWAPped": "SWAP"}, "byte order")

    def _dtype(self):
        kind, bits = self.format
        letter = {"INT": "i", "UINT": "u", "REAL": "f"}[kind]
        return np.dtype(f"{'>' if self.border == 'NORM' else '<'}{letter}{bits // 8}")

    # -- TRACe ---------------------------------------------------------------------------------
    def _code_limits(self, kind: str, dtype) -> tuple[float, float]:
        bits = self.generator.output.dac_bits
        if kind == "REAL":
            return -1.0, 1.0
        if kind == "UINT":
            b = bits or np.dtype(dtype).itemsize * 8
            return 0, 2 ** b - 1
        b = bits or np.dtype(dtype).itemsize * 8
        return -(2 ** (b - 1)), 2 ** (b - 1) - 1

    def _trace_set(self, params, captures):
        if len(params) < 2:
            raise _Error(-109, "expected a trace name and data")
        name = _name(params[0])
        if params[1][0] == "block":
            if len(params) > 2:
                raise _Error(-108, "one block per trace")
            kind = self.format[0]
            if kind == "ASC":
                raise _Error(-221, "binary block received while FORMat is ASCii; send FORMat INT|UINT|REAL first")
            payload = params[1][1]
            dtype = self._dtype()
            if len(payload) % dtype.itemsize:
                raise _Error(-161, f"{len(payload)} bytes is not a whole number of {dtype.itemsize}-byte values")
            count = len(payload) // dtype.itemsize
            self._check_length(count)
            values = np.frombuffer(payload, dtype=dtype)
        else:
            kind = "ASC"
            texts = [_text(p) for p in params[1:]]
            count = len(texts)
            self._check_length(count)
            try:
                values = np.array(texts).astype(np.int64)
            except ValueError:
                raise _Error(-120, "expected whole-number codes in the list") from None
        low, high = self._code_limits("INT" if kind == "ASC" else kind, values.dtype)
        if kind == "REAL" and not np.isfinite(values).all():
            raise _Error(-222, "REAL values must be finite")
        if count and (values.min() < low or values.max() > high):
            raise _Error(-222, f"codes must lie within {low:g} ... {high:g}")
        if kind == "ASC":
            values = values.astype(np.int32)
        elif not values.dtype.isnative:
            values = values.astype(values.dtype.newbyteorder("="))
        self.traces[name] = _Trace(values, kind)
        if self.faults.error_after_upload:
            self.push_error(-240, "waveform memory write failed")

    def _check_length(self, count: int) -> None:
        sm = self.generator.sampling
        if count > sm.memory:
            raise _Error(-223, f"{count} points exceed the memory of {sm.memory}")
        if count < sm.min_length:
            raise _Error(-222, f"{count} points, at least {sm.min_length} needed")
        if count % sm.granularity:
            raise _Error(-222, f"{count} points is not a multiple of {sm.granularity}")

    def _trace(self, params) -> tuple[str, _Trace]:
        _count(params, 1, 1)
        name = _name(params[0])
        if name not in self.traces:
            raise _Error(-224, f"no trace named {name}")
        return name, self.traces[name]

    def _readback(self, trace: _Trace):
        """The bytes (binary FORMat) or text (ASCii) of a trace as a readback carries them."""
        values = trace.values
        if self.faults.corrupt_readback and len(values):
            values = values.copy()
            i = len(values) // 2
            values[i] = values[i] + 1 if values[i] <= 0 else values[i] - 1
        if self.format[0] == "ASC":
            return scpi.ascii_list(values)
        dtype = self._dtype()
        return np.ascontiguousarray(values.astype(dtype, copy=False))

    def _trace_query(self, params, captures):
        _, trace = self._trace(params)
        data = self._readback(trace)
        if isinstance(data, str):
            return Response(data)
        return Response(block=memoryview(data).cast("B"))

    def _trace_crc(self, params, captures):
        _, trace = self._trace(params)
        data = self._readback(trace)
        raw = data.encode("ascii") if isinstance(data, str) else memoryview(data).cast("B")
        return Response(str(zlib.crc32(raw) & 0xFFFFFFFF))

    def _trace_points(self, params, captures):
        _, trace = self._trace(params)
        return Response(str(len(trace.values)))

    def _trace_catalog(self, params, captures):
        self._noparams(params)
        return Response(",".join(f'"{name}"' for name in self.traces) or '""')

    def _trace_delete(self, params, captures):
        name, _ = self._trace(params)
        if any(ch.user == name and ch.output for ch in self.channels.values()):
            raise _Error(-221, f"trace {name} is playing")
        del self.traces[name]

    def _trace_delete_all(self, params, captures):
        self._noparams(params)
        if self.outputs_on:
            raise _Error(-221, "an output is on")
        self.traces.clear()

    # -- SOURce --------------------------------------------------------------------------------
    def _shape_set(self, params, captures):
        _count(params, 1, 1)
        channel = self._channel(captures)
        shape = _choice(params[0], {"SINusoid": "SIN", "SQUare": "SQU", "TRIangle": "TRI", "RAMP": "RAMP",
                                    "DC": "DC", "USER": "USER"}, "function")
        if channel.output and shape != channel.shape:
            raise _Error(-221, "switch the output off before changing the function")
        channel.shape = shape

    def _user_set(self, params, captures):
        _count(params, 1, 1)
        channel = self._channel(captures)
        name = _name(params[0])
        if name not in self.traces:
            raise _Error(-224, f"no trace named {name}")
        if channel.output:
            raise _Error(-221, "switch the output off before choosing another trace")
        channel.user = name

    def _frequency_set(self, params, captures):
        _count(params, 1, 1)
        channel = self._channel(captures)
        value = _number(params[0], "frequency")
        if value <= 0:
            raise _Error(-222, "frequency must be above zero")
        trace = self.traces.get(channel.user or "") if channel.shape == "USER" else None
        if trace is not None:
            rate = value * len(trace.values)
            if not self.generator.sampling.allows(rate):
                sm = self.generator.sampling
                allowed = (", ".join(f"{r:g}" for r in sm.rates) if sm.rates
                           else f"{sm.rate_min:g} ... {sm.rate_max:g}")
                raise _Error(-222, f"sample rate {rate:.6g} Sa/s outside {allowed} Sa/s")
        channel.frequency = value

    def _amplitude_set(self, params, captures):
        _count(params, 1, 1)
        channel = self._channel(captures)
        value = _number(params[0], "amplitude")
        out = self.generator.output
        if not 0 < value <= out.range_max - out.range_min + 1e-12:
            raise _Error(-222, f"amplitude must be above 0 and at most {out.range_max - out.range_min:g} Vpp")
        channel.amplitude = value

    def _offset_set(self, params, captures):
        _count(params, 1, 1)
        channel = self._channel(captures)
        value = _number(params[0], "offset")
        out = self.generator.output
        if not out.range_min <= value <= out.range_max:
            raise _Error(-222, f"offset must lie within {out.range_min:g} ... {out.range_max:g} V")
        channel.offset = value

    def _trigger_set(self, params, captures):
        _count(params, 1, 1)
        self.trigger_source = _choice(params[0], {"IMMediate": "IMM", "EXTernal": "EXT", "BUS": "BUS"},
                                      "trigger source")


# ---------------------------------------------------------------------------------------------
# The TCP server
# ---------------------------------------------------------------------------------------------
class _Closed(Exception):
    pass


class _Reader:
    """Reads newline-terminated program messages with embedded definite-length blocks."""

    def __init__(self, sock, instrument: VirtualInstrument, stop: threading.Event):
        self.sock = sock
        self.instrument = instrument
        self.stop = stop
        self.buf = bytearray()
        self.received = 0

    def _limit(self, n: int) -> int:
        drop = self.instrument.faults.drop_after
        if drop is None:
            return n
        left = drop - self.received
        if left <= 0:
            raise _Closed()
        return min(n, left)

    def _recv(self) -> None:
        while True:
            if self.stop.is_set():
                raise _Closed()
            try:
                data = self.sock.recv(self._limit(1 << 20))
            except socket.timeout:
                continue
            except OSError:
                raise _Closed() from None
            if not data:
                raise _Closed()
            self.received += len(data)
            self.buf += data
            return

    def _recv_into(self, view: memoryview) -> None:
        got = 0
        while got < len(view):
            if self.stop.is_set():
                raise _Closed()
            try:
                n = self.sock.recv_into(view[got:got + self._limit(len(view) - got)])
            except socket.timeout:
                continue
            except OSError:
                raise _Closed() from None
            if not n:
                raise _Closed()
            self.received += n
            got += n

    def message(self):
        """(text, blocks, error) of the next program message; raises _Closed at the end."""
        parts: list[str] = []
        blocks: list = []
        text_bytes = 0
        overflow = False
        start = scan = 0
        quote = None
        limit = self.instrument.max_line
        while True:
            if quote is not None:
                end = self.buf.find(quote, scan)
                nl = self.buf.find(b"\n", scan)
                if end < 0 and nl < 0:
                    scan = len(self.buf)
                    if len(self.buf) - start + text_bytes > limit:
                        overflow = True
                        del self.buf[:]
                        start = scan = 0
                    self._recv()
                    continue
                if nl >= 0 and (end < 0 or nl < end):
                    quote = None                   # unterminated string: the parser will say so
                    scan = nl
                else:
                    quote = None
                    scan = end + 1
                    continue
            m = _SPECIAL.search(self.buf, scan)
            if m is None:
                scan = len(self.buf)
                if len(self.buf) - start + text_bytes > limit:
                    overflow = True
                    del self.buf[:]
                    start = scan = 0
                self._recv()
                continue
            pos = m.start()
            char = self.buf[pos:pos + 1]
            if char == b"\n":
                if pos - start + text_bytes > limit:
                    overflow = True
                if not overflow:
                    parts.append(self.buf[start:pos].decode("latin-1"))
                del self.buf[:pos + 1]
                if overflow:
                    return None, [], (-223, f"message longer than {limit} bytes")
                return "".join(parts), blocks, None
            if char in (b'"', b"'"):
                quote = char
                scan = pos + 1
                continue
            # '#': a definite-length block when followed by a digit 1-9
            while len(self.buf) < pos + 2:
                self._recv()
            digit = self.buf[pos + 1]
            if not 0x31 <= digit <= 0x39:
                scan = pos + 1                     # '#H..', '#0...': left to the command parser
                continue
            while True:
                try:
                    header = scpi.parse_block_header(self.buf, pos)
                except scpi.BlockError:
                    header = False
                if header is not None:
                    break
                self._recv()
            if header is False:
                scan = pos + 1
                continue
            data_start, nbytes = header
            if nbytes > self.instrument.max_block:
                self._discard_line(pos)
                return None, [], (-223, f"block of {nbytes} bytes exceeds the memory")
            text = self.buf[start:pos].decode("latin-1")
            text_bytes += len(text)
            parts.append(text)
            parts.append(f"\x00B{len(blocks)}\x00")
            payload = bytearray(nbytes)
            have = min(nbytes, len(self.buf) - data_start)
            payload[:have] = self.buf[data_start:data_start + have]
            del self.buf[:data_start + have]
            if have < nbytes:
                self._recv_into(memoryview(payload)[have:])
            blocks.append(payload)
            start = scan = 0

    def _discard_line(self, pos: int) -> None:
        del self.buf[:pos]
        while True:
            nl = self.buf.find(b"\n")
            if nl >= 0:
                del self.buf[:nl + 1]
                return
            del self.buf[:]
            self._recv()


class InstrumentServer:
    """Serve a :class:`VirtualInstrument` on a TCP port (loopback by default).

    Bound when constructed (``port=0`` picks a free port); :meth:`start` serves
    in a background thread, :meth:`serve_forever` in the calling one. Clients
    are served one at a time; the next waits in the listen queue.
    """

    def __init__(self, instrument: VirtualInstrument, host: str = "127.0.0.1", port: int = 0):
        self.instrument = instrument
        self._stop = threading.Event()
        self._thread = None
        self.clients = 0
        self.listener = socket.create_server((host, port), backlog=16)
        self.listener.settimeout(0.1)
        self.host, self.port = self.listener.getsockname()[:2]

    @property
    def resource(self) -> str:
        """The VISA resource string of this instrument."""
        return f"TCPIP::{self.host}::{self.port}::SOCKET"

    def start(self) -> "InstrumentServer":
        self._thread = threading.Thread(target=self.serve_forever, name=f"virtual-awg:{self.port}",
                                        daemon=True)
        self._thread.start()
        return self

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5)
        self.listener.close()

    def __enter__(self):
        return self.start()

    def __exit__(self, *exc):
        self.stop()
        return False

    def serve_forever(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self.listener.accept()
            except socket.timeout:
                continue
            except OSError:
                if self._stop.is_set():
                    return
                raise
            self.clients += 1
            with conn:
                self._serve_client(conn)

    def _serve_client(self, conn) -> None:
        conn.settimeout(0.1)
        conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        with contextlib.suppress(OSError):
            conn.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 << 20)
        reader = _Reader(conn, self.instrument, self._stop)
        while True:
            try:
                text, blocks, error = reader.message()
            except _Closed:
                return
            if error is not None:
                with self.instrument.lock:
                    self.instrument.push_error(*error)
                    self.instrument.log.append(f"<refused: {error[1]}>")
                continue
            shown = re.sub(r"\x00B(\d+)\x00", lambda m: f"<block {len(blocks[int(m.group(1))])} bytes>", text)
            self.instrument.log.append(shown[:200])
            responses = self.instrument.execute(text, blocks)
            if responses and not self._reply(conn, responses):
                return

    def _reply(self, conn, responses) -> bool:
        faults = self.instrument.faults
        if faults.mute:
            return True
        if faults.delay:
            deadline = time.monotonic() + faults.delay
            while time.monotonic() < deadline:
                if self._stop.wait(min(0.05, max(0.0, deadline - time.monotonic()))):
                    return False
        conn.settimeout(REPLY_SEND_TIMEOUT)
        try:
            for i, response in enumerate(responses):
                if i:
                    conn.sendall(b";")
                if response.block is not None:
                    conn.sendall(scpi.block_header(len(response.block)))
                    conn.sendall(response.block)
                else:
                    conn.sendall(response.text.encode("ascii", "replace"))
            conn.sendall(b"\n")
        except OSError:
            return False
        finally:
            conn.settimeout(0.1)
        return True


def serve_forever(host: str, port: int, generator, faults: Faults | None = None, ready=None,
                  identity: str | None = None) -> None:
    """Serve the virtual instrument until interrupted; ``ready(resource)`` is called once listening."""
    server = InstrumentServer(VirtualInstrument(generator, faults=faults, identity=identity), host, port)
    try:
        if ready is not None:
            ready(server.resource)
        server.serve_forever()
    finally:
        server.listener.close()
