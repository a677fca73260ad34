"""Generator profiles: what plays the table, and how it is reached.

A generator profile (``profiles/generators/*.toml``) describes an
arbitrary-waveform generator on a VISA link (``kind = "awg"``) or a ramp board on
a serial link (``kind = "board"``): its sample rates, memory, record
granularity, output (DAC volts, or DDS frequency words), the load it really
drives, the link, and for an AWG the SCPI command templates of its dialect.

The voltage really delivered at the actuator input follows from the output
termination setting and the real load: a generator with source impedance
``R_s`` set for a load ``R_T`` produces an open-circuit voltage
``V_prog (R_T + R_s)/R_T``, of which ``R_L/(R_L + R_s)`` reaches a load ``R_L``.
Set for 50 Ω and driving a high-impedance input, that is twice the programmed
voltage (common practice of function generators).

Where an instrument limits the amplitude and the offset separately, ``[output]``
gives ``amplitude_max`` (V peak-to-peak) and ``offset_max`` (largest |offset|, V)
instead of, or besides, ``range_min``/``range_max``: a window of at most
``amplitude_max`` centred within ``±offset_max`` (and within the range where one
is given). ``[outputs.N]`` overrides ``[output]`` keys for output N (per-channel
settings: another load, range or resolution).

``[trigger]`` gives the instrument's own names of what sweepgen asks for: the
trigger sources ``external``, ``internal`` and ``software``, the edges
``rising`` and ``falling``. The names go into the ``{trigger_source}`` and
``{edge}`` placeholders; sweepgen assumes none of them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

from sweepgen import catalog
from sweepgen._config import MISSING, Section, load_toml

HIGH_Z = math.inf


@dataclass(frozen=True)
class Sampling:
    rate_min: float                    # samples/s
    rate_max: float                    # samples/s
    rates: tuple | None                # the only rates it plays (None: any in [min, max])
    memory: int                        # samples per channel
    granularity: int                   # record length must be a multiple of this
    min_length: int                    # samples

    def allows(self, rate: float, rel: float = 1e-9) -> bool:
        if self.rates is not None:
            return any(abs(rate - r) <= rel * r for r in self.rates)
        return self.rate_min * (1 - rel) <= rate <= self.rate_max * (1 + rel)


@dataclass(frozen=True)
class Output:
    kind: str                          # "voltage" | "frequency"
    range_min: float                   # V programmed (voltage) or Hz (frequency)
    range_max: float
    dac_bits: int | None = None        # voltage outputs
    termination: float = HIGH_Z        # ohm, the load the instrument is set for
    load: float = HIGH_Z               # ohm, the load it really drives
    source_impedance: float = 50.0     # ohm
    clock: float | None = None         # Hz, DDS reference clock (frequency outputs)
    word_bits: int | None = None       # bits of the DDS frequency tuning word
    amplitude_max: float | None = None   # V peak-to-peak programmed, where limited apart from the offset
    offset_max: float | None = None      # V, largest |offset| programmed, where limited apart

    @property
    def delivered_factor(self) -> float:
        """Volts at the real load per programmed volt."""
        rs = self.source_impedance
        k_open = 1.0 if math.isinf(self.termination) else (self.termination + rs) / self.termination
        k_load = 1.0 if math.isinf(self.load) else self.load / (self.load + rs)
        return k_open * k_load


@dataclass(frozen=True)
class Link:
    kind: str                          # "visa" | "serial"
    address: str                       # VISA resource string, or pyserial URL / device
    throughput: float                  # bytes/s expected, for timeouts
    timeout: float                     # s, base timeout of one exchange
    baud: int | None = None            # serial only


@dataclass(frozen=True)
class Trigger:
    """The instrument's own names for trigger sources and edges (``[trigger]`` of the profile)."""

    names: dict = field(default_factory=dict)     # sweepgen's word -> the instrument's name

    def name(self, word: str) -> str | None:
        """The instrument's name for ``word`` (``external``, ``rising``, ...), None when it has none."""
        return self.names.get(word)


#: sweepgen's words a [trigger] table may name (sources, then edges)
TRIGGER_WORDS = ("external", "internal", "software", "rising", "falling")


@dataclass(frozen=True)
class Generator:
    key: str
    title: str
    kind: str                          # "awg" | "board"
    channels: int
    sampling: Sampling
    output: Output
    link: Link
    commands: object = None            # sweepgen.dialect.Commands for an AWG, None for a board
    path: Path | None = field(default=None, compare=False)
    trigger: Trigger = field(default_factory=Trigger)
    outputs: dict = field(default_factory=dict)    # output number -> Output where [outputs.N] differs

    def for_output(self, number: int) -> "Generator":
        """This generator as seen by output ``number``: its own ``[outputs.N]`` settings, if any."""
        import dataclasses

        own = self.outputs.get(int(number))
        return self if own is None else dataclasses.replace(self, output=own)


def load_generator(ref, *, relative_to=None, file=None, key=None) -> Generator:
    """Load a generator profile by built-in key or path."""
    path = catalog.resolve("generators", ref, relative_to=relative_to, file=file, key=key)
    return generator_from_dict(load_toml(path), path)


def _impedance(sec: Section, name: str, default):
    value = sec.raw(name, default)
    if value is default and default is not None and not isinstance(default, str):
        return default
    if isinstance(value, str) and value.strip().lower() in ("high-z", "highz", "hi-z", "inf"):
        return HIGH_Z
    return sec.quantity(name, "ohm", positive=True, example="50 ohm")


def generator_from_dict(data: dict, path) -> Generator:
    top = Section(data, path, kind="generator")
    title = top.string("title")
    kind = top.string("kind", choices=("awg", "board"))
    channels = top.number("channels", 1, integer=True, minimum=1)
    sampling = _sampling(top)
    output_data = top.raw("output")
    output = _output(top.section("output"))
    outputs = _outputs(top, output_data, channels)
    trigger = _trigger(top.section("trigger", None))
    link = _link(top.section("link"))
    if (kind == "awg") != (link.kind == "visa"):
        raise top.error("link.kind", f"a generator of kind '{kind}' needs link.kind = "
                                     f"\"{'visa' if kind == 'awg' else 'serial'}\"")
    commands = None
    if kind == "awg":
        from sweepgen.dialect import parse_commands

        commands = parse_commands(top.section("commands"))
    elif top.has("commands"):
        raise top.error("commands", "a ramp board speaks the serial frame protocol; remove [commands]")
    top.finish()
    if commands is not None:
        _check_trigger_names(top, commands, trigger)
    return Generator(key=Path(str(path)).stem, title=title, kind=kind, channels=channels, sampling=sampling,
                     output=output, link=link, commands=commands, path=Path(str(path)), trigger=trigger,
                     outputs=outputs)


def _trigger(sec: Section | None) -> Trigger:
    if sec is None:
        return Trigger()
    names = {}
    for word in TRIGGER_WORDS:
        value = sec.string(word, None)
        if value is not None:
            from sweepgen.dialect import format_value

            try:
                format_value("trigger_source", value)
            except ValueError:
                raise sec.error(word, f"expected SCPI character data (letters, digits, '_'), got {value!r}") from None
            names[word] = value
    sec.finish()
    return Trigger(names)


def _check_trigger_names(top: Section, commands, trigger: Trigger) -> None:
    """A template that sends a trigger source or edge needs the instrument's names for them."""
    from sweepgen.dialect import placeholders

    for key, words in (("trigger_source", ("external", "internal", "software")), ("edge", ("rising", "falling"))):
        users = [t for t, text in commands.templates.items() if key in placeholders(text)]
        if users and not any(trigger.name(w) for w in words):
            raise top.error("trigger", f"commands.{users[0]} sends {{{key}}}: name the instrument's own words "
                                       f"for it in [trigger] ({', '.join(words)} = \"...\")")


def _outputs(top: Section, base: dict, channels: int) -> dict:
    """``[outputs.N]``: per-output settings over ``[output]``."""
    sec = top.section("outputs", None)
    if sec is None:
        return {}
    found = {}
    for name in list(sec.data):
        if not name.isdigit() or not 1 <= int(name) <= channels:
            raise sec.error(name, f"expected an output number 1..{channels}")
        own = sec.section(name)           # a table (refused otherwise); its keys are read through the merge
        found[int(name)] = _output(Section({**base, **own.data}, sec.file, own.prefix, kind="generator"))
    sec.finish()
    return found


def _rates(sm: Section) -> tuple:
    """The ``[sampling] rates`` list: the only sample rates the generator plays, sorted."""
    raw = sm.raw("rates")
    if not isinstance(raw, list) or not raw:
        raise sm.error("rates", "expected a non-empty list of sample rates such as [\"1 MSa/s\", \"10 MSa/s\"]")
    rates = tuple(sorted(float(r) for r in sm.quantities("rates", "Hz", example="1 MSa/s")))
    if any(r <= 0 for r in rates):
        raise sm.error("rates", "sample rates must be greater than zero")
    for name in ("rate_min", "rate_max"):
        if sm.has(name):
            raise sm.error(name, "give either 'rates' or 'rate_min'/'rate_max', not both")
    return rates


def _sampling(top: Section) -> Sampling:
    sm = top.section("sampling")
    rates = None
    if sm.has("rates"):
        rates = _rates(sm)
        rate_min, rate_max = rates[0], rates[-1]
    else:
        rate_min = sm.quantity("rate_min", "Hz", positive=True, example="1 kSa/s")
        rate_max = sm.quantity("rate_max", "Hz", positive=True, example="100 MSa/s")
        if rate_max < rate_min:
            raise sm.error("rate_max", f"expected at least rate_min ({rate_min:g} Sa/s)")
    memory = sm.number("memory", integer=True, minimum=1)
    granularity = sm.number("granularity", 1, integer=True, minimum=1)
    min_length = sm.number("min_length", 1, integer=True, minimum=1)
    sm.finish()
    if min_length > memory:
        raise top.error("sampling.min_length", f"expected at most the memory ({memory} samples)")
    return Sampling(rate_min, rate_max, rates, memory, granularity, min_length)


def _output(out: Section) -> Output:
    okind = out.string("kind", "voltage", choices=("voltage", "frequency"))
    if okind == "voltage":
        amp_max = out.quantity("amplitude_max", "V", None, positive=True, example="10 V")
        off_max = out.quantity("offset_max", "V", None, nonnegative=True, example="5 V")
        if (amp_max is None) != (off_max is None):
            raise out.error("offset_max" if off_max is None else "amplitude_max",
                            "give amplitude_max and offset_max together (separate limits of amplitude and offset)")
        reach = None if amp_max is None else off_max + amp_max / 2
        lo = out.quantity("range_min", "V", -reach if reach is not None else MISSING, example="-5 V")
        hi = out.quantity("range_max", "V", reach if reach is not None else MISSING, example="5 V")
        bits = out.number("dac_bits", integer=True, minimum=2, maximum=32)
        termination = _impedance(out, "termination", HIGH_Z)
        load = _impedance(out, "load", HIGH_Z)
        rs = out.quantity("source_impedance", "ohm", 50.0, nonnegative=True, example="50 ohm")
        output = Output("voltage", lo, hi, dac_bits=bits, termination=termination, load=load,
                        source_impedance=rs, amplitude_max=amp_max, offset_max=off_max)
    else:
        clock = out.quantity("clock", "Hz", positive=True, example="1 GHz")
        word_bits = out.number("word_bits", integer=True, minimum=8, maximum=64)
        lo = out.quantity("range_min", "Hz", nonnegative=True, example="1 MHz")
        hi = out.quantity("range_max", "Hz", positive=True, example="400 MHz")
        if hi > clock / 2:
            raise out.error("range_max", f"a DDS cannot synthesise above half its clock ({clock / 2:g} Hz)")
        output = Output("frequency", lo, hi, clock=clock, word_bits=word_bits)
    if not output.range_max > output.range_min:
        raise out.error("range_max", "expected a value above range_min")
    out.finish()
    return output


def _link(ln: Section) -> Link:
    kind = ln.string("kind", choices=("visa", "serial"))
    if kind == "visa":
        address = ln.string("resource")
        baud = None
    else:
        address = ln.string("port")
        baud = ln.number("baud", 115200, integer=True, minimum=1)
    throughput = ln.quantity("throughput", "B/s", positive=True, example="1 MB/s")
    timeout = ln.quantity("timeout", "s", 5.0, positive=True, example="5 s")
    ln.finish()
    return Link(kind, address, throughput, timeout, baud)
