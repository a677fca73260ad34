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
* ``TRIGger[:SEQuence]:SOURce <source>``: ``IMMediate|EXTernal|BUS``, or the names the
  generator profile's ``[trigger]`` gives its sources (an instrument whose internal
  trigger is called ``INT`` takes ``INT``)
* ``TRIGger[:SEQuence]:SLOPe POSitive|NEGative`` (or the profile's edge names),
  ``TRIGger[:SEQuence]:LEVel <V>``, ``TRIGger[:SEQuence]:DELay <s>``
* ``TRIGger[:SEQuence]:COUNt <n>|INFinity`` and ``INITiate[:IMMediate]:CONTinuous ON|OFF``: with
  ``CONTinuous OFF`` each trigger plays a burst of COUNt periods of the trace; with ``ON``
  the trace plays on and on once started (this instrument's reading of the two nodes)

Every output has its own settings; the profile's ``[outputs.N]`` limits apply to output N
and, where the profile gives them, ``amplitude_max`` and ``offset_max`` limit the
amplitude and the offset separately. :meth:`VirtualInstrument.playing` says what each
output would play; ``on_change`` (a callable taking one line) hears of every change of
an output, a trace, the trigger or the playback mode.

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
:class:`InstrumentServer` puts it on a TCP socket and serves several clients at
once, so a silent client blocks nobody; what it buffers is bounded (message text
at most :data:`LINE_CEILING` bytes, block payload of all connections together at
most :data:`BUFFER_CEILING`).
"""


from __future__ import annotations

import collections
import contextlib
import re
import socket
import threading
import zlib
from dataclasses import dataclass

import numpy as np

from sweepgen.emulators import _scpi_parser as parser
from sweepgen.emulators._scpi_parser import CommandTable, SCPIError
from sweepgen.emulators._scpi_reader import Budget, Closed, MessageReader
from sweepgen.emulators._server import LOOPBACK, LoopbackServer, profile_port
from sweepgen.wire import scpi
from sweepgen.wire.block import block_header

DEFAULT_GENERATOR = "virtual-awg"
DEFAULT_PORT = 5025        # the usual port of raw-socket SCPI instruments (common practice)
QUEUE_LENGTH = 16
REPLY_SEND_TIMEOUT = 60.0             # s: a client that takes no reply bytes for this long is dropped
LINE_CEILING = 16 << 20               # bytes of message text (blocks excluded) any one message may hold
BUFFER_CEILING = 256 << 20            # bytes of block payload all connections together may hold
LOG_LENGTH = 4096                     # messages and output switches remembered



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
                 max_line: int | None = None, on_change=None):
        from sweepgen import __version__

        self.generator = generator
        self.on_change = on_change
        self.faults = faults or Faults()
        self.identity = identity or f"sweepgen,virtual-awg,0,{__version__}"
        memory = generator.sampling.memory
        #: longest message text (blocks excluded) accepted, in bytes: room for an ASCII list of the
        #: whole memory at 12 characters a value (the longest 32-bit integer and its comma), at most
        #: LINE_CEILING
        self.max_line = max_line if max_line is not None else min(65536 + 12 * memory, LINE_CEILING)
        #: largest block accepted, in bytes (memory depth at 8 bytes per value), at most BUFFER_CEILING
        self.max_block = min(8 * memory, BUFFER_CEILING)
        #: block bytes all connections together may hold while their messages are read
        self.buffers = Budget(BUFFER_CEILING)
        self.lock = threading.RLock()
        self.traces: dict[str, _Trace] = {}
        self.errors: list[str] = []
        self.esr = 0
        #: (channel, True/False) each time an output is switched (the latest LOG_LENGTH), for tests and the log
        self.output_events: list[tuple[int, bool]] = []
        self._armed_once = False
        #: program messages received (text, blocks as <n bytes>), the latest LOG_LENGTH
        self.log: collections.deque[str] = collections.deque(maxlen=LOG_LENGTH)
        self._commands = self._command_table()
        self.reset()

    # -- state -------------------------------------------------------------------------------
    def reset(self) -> None:
        """``*RST``: outputs off, defaults; stored traces are kept."""
        with self.lock:
            for n, channel in getattr(self, "channels", {}).items():
                if channel.output:
                    self._output_event(n, False)
            self.channels = {n: Channel() for n in range(1, self.generator.channels + 1)}
            self.format = ("ASC", 0)
            self.border = "NORM"
            self.trigger_source = self._sources()[0][1] if self._named("internal") else "IMM"
            self.slope, self.level, self.delay = self._named("rising") or "POS", 0.0, 0.0
            self.count, self.continuous = 1, True

    @property
    def ever_armed(self) -> bool:
        """True if any output was ever switched on."""
        return self._armed_once

    @property
    def outputs_on(self) -> list[int]:
        return [n for n, ch in self.channels.items() if ch.output]

    def _changed(self, line: str) -> None:
        if self.on_change is not None:
            self.on_change(line)

    def playing(self) -> dict:
        """What each output would play now, and how it starts (for reports and the emulate log)."""
        outputs = {}
        for n, ch in self.channels.items():
            trace = self.traces.get(ch.user or "") if ch.shape == "USER" else None
            outputs[n] = {"on": ch.output, "shape": ch.shape, "trace": ch.user if trace is not None else None,
                          "points": None if trace is None else len(trace.values),
                          "sample_rate": None if trace is None else ch.frequency * len(trace.values),
                          "amplitude": ch.amplitude, "offset": ch.offset}
        mode = "repeat" if self.continuous else f"burst of {self.count}"
        return {"outputs": outputs, "trigger": {"source": self.trigger_source, "slope": self.slope,
                                                "level": self.level, "delay": self.delay, "mode": mode}}

    def _output_event(self, channel: int, on: bool) -> None:
        if on:
            ch = self.channels[channel]
            what = self.playing()["outputs"][channel]
            self._changed(f"output {channel} ON: trace {ch.user or ch.shape}, "
                          f"{what['sample_rate'] or 0:.6g} Sa/s, {ch.amplitude:g} Vpp, offset {ch.offset:g} V, "
                          f"trigger {self.trigger_source} {self.slope}, delay {self.delay:g} s, "
                          f"{'repeat' if self.continuous else f'burst of {self.count}'}")
        else:
            self._changed(f"output {channel} OFF")
        self._armed_once = self._armed_once or on
        self.output_events.append((channel, on))
        if len(self.output_events) > LOG_LENGTH:
            del self.output_events[:LOG_LENGTH // 2]

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
    # -- one program message ---------------------------------------------------------------
    def execute(self, text: str, blocks: list | None = None) -> list[Response]:
        """Run one program message; return the responses of its queries in order."""
        blocks = blocks or []
        responses: list[Response] = []
        with self.lock:
            try:
                units = parser.units(text)
            except SCPIError as exc:
                self.push_error(exc.code, exc.detail)
                return responses
            path: list[tuple[str, str]] = []
            for unit in units:
                try:
                    run, path = self._commands.resolve(unit, blocks, path)
                    result = run()
                    if result is not None:
                        responses.append(result)
                except SCPIError as exc:
                    self.push_error(exc.code, exc.detail)
                    if exc.is_command_error:
                        break                              # discard the rest of the message
        return responses

    def _command_table(self):
        common = {
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
            ("TRIGger[:SEQuence]:SLOPe", False, self._slope_set),
            ("TRIGger[:SEQuence]:SLOPe", True, lambda p, c: self._noparams(p) or Response(self.slope)),
            ("TRIGger[:SEQuence]:LEVel", False, self._level_set),
            ("TRIGger[:SEQuence]:DELay", False, self._delay_set),
            ("TRIGger[:SEQuence]:DELay", True, lambda p, c: self._noparams(p) or
             Response(scpi.format_number(self.delay))),
            ("TRIGger[:SEQuence]:COUNt", False, self._count_set),
            ("INITiate[:IMMediate]:CONTinuous", False, self._continuous_set),
            ("INITiate[:IMMediate]:CONTinuous", True, lambda p, c: self._noparams(p) or
             Response("1" if self.continuous else "0")),
        ]
        return CommandTable(common, table)

    # -- helpers -----------------------------------------------------------------------------
    @staticmethod
    def _noparams(params):
        if params:
            raise SCPIError(-108)
        return None

    def _channel(self, captures, key="SOURCE") -> Channel:
        n = captures.get(key, 1)
        if n not in self.channels:
            raise SCPIError(-114, f"channel {n} (this instrument has {len(self.channels)})")
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
        parser.count(params, 1, 1)
        on = parser.boolean(params[0])
        n = captures.get("OUTPUT", 1)
        channel = self._channel(captures, "OUTPUT")
        if on:
            self._check_playable(channel)
        if channel.output != on:
            channel.output = on
            self._output_event(n, on)

    def _output_of(self, channel: Channel):
        """The profile's output settings for this channel (its own [outputs.N] where given)."""
        n = next(k for k, v in self.channels.items() if v is channel)
        return self.generator.for_output(n).output

    def _check_playable(self, channel: Channel) -> None:
        out = self._output_of(channel)
        if channel.shape == "USER":
            trace = self.traces.get(channel.user or "")
            if trace is None:
                raise SCPIError(-221, "no user trace selected")
            rate = channel.frequency * len(trace.values)
            if not self.generator.sampling.allows(rate):
                raise SCPIError(-221, f"sample rate {rate:.6g} Sa/s outside the instrument's range")
        low = channel.offset - channel.amplitude / 2
        high = channel.offset + channel.amplitude / 2
        if low < out.range_min - 1e-9 or high > out.range_max + 1e-9:
            raise SCPIError(-221, f"offset +- amplitude/2 spans {low:.6g} V to {high:.6g} V, outside "
                               f"{out.range_min:g} V to {out.range_max:g} V")

    # -- FORMat --------------------------------------------------------------------------------
    def _format_set(self, params, captures):
        parser.count(params, 1, 2)
        kind = parser.choice(params[0], {"ASCii": "ASC", "INTeger": "INT", "UINTeger": "UINT", "REAL": "REAL"},
                       "data format")
        if kind == "ASC":
            if len(params) > 1:
                parser.number(params[1], "length")
            self.format = ("ASC", 0)
            return
        default = {"INT": 16, "UINT": 16, "REAL": 32}[kind]
        bits = int(parser.number(params[1], "length")) if len(params) > 1 else default
        allowed = (32, 64) if kind == "REAL" else (8, 16, 32)
        if bits not in allowed:
            raise SCPIError(-224, f"{kind} length must be one of {allowed}")
        self.format = (kind, bits)

    def _format_query(self, params, captures):
        self._noparams(params)
        kind, bits = self.format
        return Response(kind if kind == "ASC" else f"{kind},{bits}")

    def _border_set(self, params, captures):
        parser.count(params, 1, 1)
        self.border = parser.choice(params[0], {"NORMal": "NORM", "SWAPped": "SWAP"}, "byte order")

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
            raise SCPIError(-109, "expected a trace name and data")
        name = parser.trace_name(params[0])
        if params[1][0] == "block":
            if len(params) > 2:
                raise SCPIError(-108, "one block per trace")
            kind = self.format[0]
            if kind == "ASC":
                raise SCPIError(-221, "binary block received while FORMat is ASCii; send FORMat INT|UINT|REAL first")
            payload = params[1][1]
            dtype = self._dtype()
            if len(payload) % dtype.itemsize:
                raise SCPIError(-161, f"{len(payload)} bytes is not a whole number of {dtype.itemsize}-byte values")
            count = len(payload) // dtype.itemsize
            self._check_length(count)
            values = np.frombuffer(payload, dtype=dtype)
        else:
            kind = "ASC"
            texts = [parser.text_of(p) for p in params[1:]]
            count = len(texts)
            self._check_length(count)
            try:
                values = np.array(texts).astype(np.int64)
            except ValueError:
                raise SCPIError(-120, "expected whole-number codes in the list") from None
        low, high = self._code_limits("INT" if kind == "ASC" else kind, values.dtype)
        if kind == "REAL" and not np.isfinite(values).all():
            raise SCPIError(-222, "REAL values must be finite")
        if count and (values.min() < low or values.max() > high):
            raise SCPIError(-222, f"codes must lie within {low:g} ... {high:g}")
        if kind == "ASC":
            values = values.astype(np.int32)
        elif not values.dtype.isnative:
            values = values.astype(values.dtype.newbyteorder("="))
        self.traces[name] = _Trace(values, kind)
        self._changed(f"trace {name} stored: {count} points")
        if self.faults.error_after_upload:
            self.push_error(-240, "waveform memory write failed")

    def _check_length(self, count: int) -> None:
        sm = self.generator.sampling
        if count > sm.memory:
            raise SCPIError(-223, f"{count} points exceed the memory of {sm.memory}")
        if count < sm.min_length:
            raise SCPIError(-222, f"{count} points, at least {sm.min_length} needed")
        if count % sm.granularity:
            raise SCPIError(-222, f"{count} points is not a multiple of {sm.granularity}")

    def _trace(self, params) -> tuple[str, _Trace]:
        parser.count(params, 1, 1)
        name = parser.trace_name(params[0])
        if name not in self.traces:
            raise SCPIError(-224, f"no trace named {name}")
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
            raise SCPIError(-221, f"trace {name} is playing")
        del self.traces[name]

    def _trace_delete_all(self, params, captures):
        self._noparams(params)
        if self.outputs_on:
            raise SCPIError(-221, "an output is on")
        self.traces.clear()

    # -- SOURce --------------------------------------------------------------------------------
    def _shape_set(self, params, captures):
        parser.count(params, 1, 1)
        channel = self._channel(captures)
        shape = parser.choice(params[0], {"SINusoid": "SIN", "SQUare": "SQU", "TRIangle": "TRI", "RAMP": "RAMP",
                                    "DC": "DC", "USER": "USER"}, "function")
        if channel.output and shape != channel.shape:
            raise SCPIError(-221, "switch the output off before changing the function")
        channel.shape = shape

    def _user_set(self, params, captures):
        parser.count(params, 1, 1)
        channel = self._channel(captures)
        name = parser.trace_name(params[0])
        if name not in self.traces:
            raise SCPIError(-224, f"no trace named {name}")
        if channel.output:
            raise SCPIError(-221, "switch the output off before choosing another trace")
        channel.user = name

    def _frequency_set(self, params, captures):
        parser.count(params, 1, 1)
        channel = self._channel(captures)
        value = parser.number(params[0], "frequency")
        if value <= 0:
            raise SCPIError(-222, "frequency must be above zero")
        trace = self.traces.get(channel.user or "") if channel.shape == "USER" else None
        if trace is not None:
            rate = value * len(trace.values)
            if not self.generator.sampling.allows(rate):
                sm = self.generator.sampling
                allowed = (", ".join(f"{r:g}" for r in sm.rates) if sm.rates
                           else f"{sm.rate_min:g} ... {sm.rate_max:g}")
                raise SCPIError(-222, f"sample rate {rate:.6g} Sa/s outside {allowed} Sa/s")
        channel.frequency = value

    def _amplitude_set(self, params, captures):
        parser.count(params, 1, 1)
        channel = self._channel(captures)
        value = parser.number(params[0], "amplitude")
        out = self._output_of(channel)
        most = out.range_max - out.range_min if out.amplitude_max is None else out.amplitude_max
        if not 0 < value <= most + 1e-12:
            raise SCPIError(-222, f"amplitude must be above 0 and at most {most:g} Vpp")
        channel.amplitude = value

    def _offset_set(self, params, captures):
        parser.count(params, 1, 1)
        channel = self._channel(captures)
        value = parser.number(params[0], "offset")
        out = self._output_of(channel)
        lo, hi = ((out.range_min, out.range_max) if out.offset_max is None else (-out.offset_max, out.offset_max))
        if not lo - 1e-12 <= value <= hi + 1e-12:
            raise SCPIError(-222, f"offset must lie within {lo:g} ... {hi:g} V")
        channel.offset = value

    def _named(self, word: str) -> str | None:
        trigger = getattr(self.generator, "trigger", None)
        return trigger.name(word) if trigger is not None else None

    def _sources(self) -> list[tuple[str, str]]:
        """(word, short form) of the trigger sources: the profile's names, else SCPI's."""
        named = [(self._named(w), w) for w in ("internal", "external", "software") if self._named(w)]
        if named:
            return [(name, re.sub(r"[^A-Z0-9]", "", name) or name.upper()) for name, _ in named]
        return [("IMMediate", "IMM"), ("EXTernal", "EXT"), ("BUS", "BUS")]

    def _trigger_set(self, params, captures):
        parser.count(params, 1, 1)
        source = parser.choice(params[0], dict(self._sources()), "trigger source")
        if source != self.trigger_source:
            self._changed(f"trigger source {source}")
        self.trigger_source = source

    def _slope_set(self, params, captures):
        parser.count(params, 1, 1)
        rising, falling = self._named("rising"), self._named("falling")
        names = {rising or "POSitive": rising or "POS", falling or "NEGative": falling or "NEG"}
        self.slope = parser.choice(params[0], names, "trigger slope")

    def _level_set(self, params, captures):
        parser.count(params, 1, 1)
        value = parser.number(params[0], "trigger level")
        if abs(value) > 50:
            raise SCPIError(-222, "trigger level must lie within -50 ... 50 V")
        self.level = value

    def _delay_set(self, params, captures):
        parser.count(params, 1, 1)
        value = parser.number(params[0], "trigger delay")
        if not 0 <= value <= 1000:
            raise SCPIError(-222, "trigger delay must lie within 0 ... 1000 s")
        if value != self.delay:
            self._changed(f"trigger delay {value:g} s")
        self.delay = value

    def _count_set(self, params, captures):
        parser.count(params, 1, 1)
        text = parser.text_of(params[0]).upper()
        value = 0 if text in ("INF", "INFINITY") else parser.number(params[0], "trigger count")
        if text not in ("INF", "INFINITY") and not (value >= 1 and float(value).is_integer()):
            raise SCPIError(-222, "trigger count must be a whole number >= 1 or INFinity")
        self.count = int(value)

    def _continuous_set(self, params, captures):
        parser.count(params, 1, 1)
        before, self.continuous = self.continuous, parser.boolean(params[0])
        if before != self.continuous or not self.continuous:
            self._changed("playback: " + ("repeat" if self.continuous else f"burst of {self.count} per trigger"))


# ---------------------------------------------------------------------------------------------
# The TCP server
# ---------------------------------------------------------------------------------------------
class InstrumentServer(LoopbackServer):
    """Serve a :class:`VirtualInstrument` on a TCP port (loopback by default).

    Bound when constructed (``port=0`` picks a free port); :meth:`start` serves
    in a background thread, :meth:`serve_forever` in the calling one. Several
    clients are served at once, each in its own thread (the instrument's state
    is shared, one message at a time); see :class:`LoopbackServer` for the
    limits that keep one client from blocking or exhausting the others.
    """

    name = "virtual-awg"

    def __init__(self, instrument: VirtualInstrument, host: str = LOOPBACK, port: int = 0, **server_options):
        super().__init__(host, port, **server_options)
        self.instrument = instrument

    @property
    def clients(self) -> int:
        """Connections accepted so far."""
        return self.connections

    @property
    def resource(self) -> str:
        """The VISA resource string of this instrument."""
        return f"TCPIP::{self.host}::{self.port}::SOCKET"

    def serve_connection(self, conn) -> None:
        conn.settimeout(0.1)
        with contextlib.suppress(OSError):
            conn.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 << 20)
        reader = MessageReader(conn, self.instrument, conn)
        try:
            while self._serve_message(conn, reader):
                pass
        finally:
            reader.release()

    def _serve_message(self, conn, reader) -> bool:
        """Read, run and answer one program message; False when the connection ends."""
        inst = self.instrument
        try:
            text, blocks, error = reader.message()
        except Closed:
            return False
        if error is not None:
            with inst.lock:
                inst.push_error(*error)
                inst.log.append(f"<refused: {error[1]}>")
            return True
        shown = re.sub(r"\x00B(\d+)\x00", lambda m: f"<block {len(blocks[int(m.group(1))])} bytes>", text)
        inst.log.append(shown[:200])
        responses = inst.execute(text, blocks)
        del blocks
        reader.release()
        return not responses or self._reply(conn, responses)

    def _reply(self, conn, responses) -> bool:
        faults = self.instrument.faults
        if faults.mute:
            return True
        if faults.delay and conn.wait(faults.delay):
            return False
        conn.settimeout(REPLY_SEND_TIMEOUT)
        try:
            for i, response in enumerate(responses):
                if i:
                    conn.sendall(b";")
                if response.block is not None:
                    conn.sendall(block_header(len(response.block)))
                    conn.sendall(response.block)
                else:
                    conn.sendall(response.text.encode("ascii", "replace"))
            conn.sendall(b"\n")
        except OSError:
            return False
        finally:
            conn.settimeout(0.1)
        return True


def listen_port(generator, port: int | None = None) -> int:
    """``port``, else the port named in the profile's link, else :data:`DEFAULT_PORT`."""
    return profile_port(generator.link.address, DEFAULT_PORT) if port is None else port


def serve_forever(host: str, port: int | None, generator, faults: Faults | None = None, ready=None,
                  identity: str | None = None, log=None) -> None:
    """Serve the virtual instrument until interrupted; ``ready(resource)`` is called once listening.

    ``port=None`` takes the port of the profile's link resource (else :data:`DEFAULT_PORT`);
    ``port=0`` picks a free one. ``log(line)`` receives a line per connection opened and closed
    and per change of state (outputs, traces, trigger, playback mode).
    """
    port = listen_port(generator, port)
    instrument = VirtualInstrument(generator, faults=faults, identity=identity, on_change=log)
    server = InstrumentServer(instrument, host, port, log=log)
    if ready is not None:
        ready(server.resource)
    server.serve_forever()
