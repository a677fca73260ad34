"""Further lights of a scenario beyond the main slowing light: ``[channels.NAME]`` tables.

One schema, one loader, one :class:`Channel` object that the planner, the
checker, the simulation and the playback read. ``NAME`` is the user's word
(``repump``, ...). A scenario without ``[channels]`` has only the main light.

``kind = "frequency"``: a light whose frequency is driven. It either follows the
main sweep at a fixed offset (``offset = "0 MHz"``) or holds one detuning
(``detuning = "-5 MHz"``). A channel's detunings are measured from the
transition it drives, as the main light's are from the slowing transition, so
``offset = "0 MHz"`` keeps it resonant with the same velocity class as the main
light at every moment (as a sideband of the slowing laser at the transitions'
frequency difference does; common practice). ``role = "repump"`` says that
the light pumps atoms back from the dark ground level of the species'
``[off_resonant_level]`` (README.md, "Physics background", hyperfine depumping
and repump). Physics keys:

``saturation``
    peak ``s = I/I_sat`` on the axis of the repump transition; the repump shares
    the slowing light's beam geometry (light start, waist, focus; common practice:
    both lights come out of the same fibre).

Where a channel is played (both kinds):

``output``
    the generator output (1, 2, ...) that plays it; without it the channel is
    light the simulation knows about but no table is made for it (a sideband
    of the slowing laser, for example).
``laser`` (frequency channels)
    the channel's own laser profile: its tuning chain maps the channel's
    detuning to its drive, its limits judge it. Needed with ``output``.
``generator``
    another generator profile that plays this channel (default: the
    scenario's generator).

``kind = "gate"``: the light's amplitude in time. It is ``level`` (a fraction of
full intensity, default 1) from the moment ``on`` (shifted by ``on_shift``) to
the moment ``off`` (shifted by ``off_shift``) and dark otherwise; moments are
those of :data:`sweepgen.timing.MOMENTS` (``chirp_start``, ``chirp_end``,
``return_start``, ...). ``lights`` names the lights it switches (``main`` and
frequency channels; default ``["main"]``). The drive is a straight line between
``dark`` (V for no light) and ``bright`` (V for full intensity), measured at the
modulator's input; ``input_min``/``input_max`` is that input's safe range
(default: between dark and bright). ``tolerance`` (default 0.1 ms) is how long
after the chirp's end the light may stay on before the checker fails it.
"""

from __future__ import annotations

from dataclasses import dataclass

from sweepgen._config import Section
from sweepgen.timing import moment_choice

KINDS = ("frequency", "gate")
ROLES = ("repump",)
#: the name of the main light (the slowing light) where channels name lights
MAIN_LIGHT = "main"
#: default of a gate's ``tolerance`` (s): light left on after the chirp's end before the check fails
GATE_TOLERANCE = 1e-4


@dataclass(frozen=True)
class Gate:
    """When a gate channel lets light through, and the drive that does it (SI units, V)."""

    on: str                        # a moment (sweepgen.timing.MOMENTS)
    off: str
    on_shift: float = 0.0          # s after the moment
    off_shift: float = 0.0
    level: float = 1.0             # fraction of full intensity while open
    dark: float = 0.0              # V for no light
    bright: float = 1.0            # V for full intensity
    input_min: float = 0.0         # V, the modulator input's safe range
    input_max: float = 1.0
    lights: tuple = (MAIN_LIGHT,)  # the lights it switches
    tolerance: float = GATE_TOLERANCE

    def drive(self, level):
        """Drive (V) for an intensity fraction: a straight line from dark to bright."""
        return self.dark + level * (self.bright - self.dark)


@dataclass(frozen=True)
class Channel:
    """One further channel of the scenario (SI units, Hz for detunings)."""

    name: str
    kind: str                      # "frequency" | "gate"
    role: str | None = None        # "repump" (frequency channels) or None
    saturation: float | None = None  # peak I/I_sat on axis (frequency channels)
    offset: float | None = None    # Hz: follows the main sweep, Δ_channel(t) = Δ(t) + offset
    detuning: float | None = None  # Hz: held at this detuning
    output: int | None = None      # generator output that plays it (None: not played)
    laser_ref: str | None = None   # its own laser profile (frequency channels that are played)
    generator_ref: str | None = None   # another generator (None: the scenario's)
    gate: Gate | None = None       # gate channels

    @property
    def follows(self) -> bool:
        """Whether the channel follows the main sweep (else it holds one detuning)."""
        return self.offset is not None

    @property
    def played(self) -> bool:
        """Whether a generator output plays this channel."""
        return self.output is not None

    def detuning_with(self, main_detuning: float) -> float:
        """The channel's detuning (Hz) when the main light has ``main_detuning``."""
        return main_detuning + self.offset if self.follows else self.detuning


def channels_from_section(sec: Section | None, species) -> tuple[Channel, ...]:
    """Read ``[channels.NAME]`` tables (absent: no channel)."""
    if sec is None:
        return ()
    out = []
    for name in list(sec.data):
        if name == MAIN_LIGHT:
            raise sec.error(name, f"'{MAIN_LIGHT}' is the slowing light's name; choose another channel name")
        ch = sec.section(name)
        kind = ch.string("kind", choices=KINDS)
        out.append(_frequency(ch, name, species) if kind == "frequency" else _gate(ch, name))
    sec.finish()
    lights = {MAIN_LIGHT} | {c.name for c in out if c.kind == "frequency"}
    for c in out:
        if c.gate is not None:
            for light in c.gate.lights:
                if light not in lights:
                    raise sec.error(f"{c.name}.lights", f"no light named {light!r} (lights: "
                                                        f"{', '.join(sorted(lights))})")
    return tuple(out)


def _placement(ch: Section) -> dict:
    output = ch.number("output", None, integer=True, minimum=1)
    generator = ch.string("generator", None)
    if generator is not None and output is None:
        raise ch.error("generator", "a generator plays a channel on an output: add output = N")
    return {"output": output, "generator_ref": generator}


def _frequency(ch: Section, name: str, species) -> Channel:
    role = ch.string("role", None, choices=ROLES)
    saturation = ch.number("saturation", positive=True)
    if ch.has("offset") == ch.has("detuning"):
        raise ch.error("offset", "give exactly one of offset (follow the main sweep at this offset) or "
                                 "detuning (hold this detuning)")
    offset = ch.quantity("offset", "Hz", None, example="0 MHz")
    detuning = ch.quantity("detuning", "Hz", None, example="-5 MHz")
    laser = ch.string("laser", None)
    place = _placement(ch)
    ch.finish()
    if place["output"] is not None and laser is None:
        raise ch.error("laser", "a channel played on an output needs its own laser profile (its tuning chain "
                                "and limits): add laser = \"...\" (a built-in key or a path)")
    if role == "repump" and species.off_resonant is None:
        raise ch.error("role", f"species '{species.key}' has no dark ground level to pump back from "
                               f"(no [off_resonant_level] in its file); remove the channel or describe the level")
    return Channel(name=name, kind="frequency", role=role, saturation=saturation, offset=offset,
                   detuning=detuning, laser_ref=laser, **place)


def _gate(ch: Section, name: str) -> Channel:
    on, off = moment_choice(ch, "on"), moment_choice(ch, "off")
    on_shift = ch.quantity("on_shift", "s", 0.0, example="-10 us")
    off_shift = ch.quantity("off_shift", "s", 0.0, example="50 us")
    level = ch.number("level", 1.0, minimum=0.0, maximum=1.0)
    dark = ch.quantity("dark", "V", example="0 V")
    bright = ch.quantity("bright", "V", example="1 V")
    if dark == bright:
        raise ch.error("bright", "expected a drive different from dark")
    lo = ch.quantity("input_min", "V", min(dark, bright), example="0 V")
    hi = ch.quantity("input_max", "V", max(dark, bright), example="1 V")
    if not hi > lo:
        raise ch.error("input_max", f"expected a value above input_min ({lo:g} V)")
    lights = ch.raw("lights", [MAIN_LIGHT])
    if not isinstance(lights, list) or not lights or not all(isinstance(x, str) for x in lights):
        raise ch.error("lights", "expected a non-empty list of light names such as [\"main\", \"repump\"]")
    tolerance = ch.quantity("tolerance", "s", GATE_TOLERANCE, nonnegative=True, example="0.1 ms")
    place = _placement(ch)
    ch.finish()
    if place["output"] is None:
        raise ch.error("output", "missing (required): the generator output that plays the gate")
    gate = Gate(on, off, on_shift, off_shift, level, dark, bright, lo, hi, tuple(lights), tolerance)
    return Channel(name=name, kind="gate", gate=gate, **place)
