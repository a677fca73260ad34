"""Timing of a scenario: the ``[timing]`` table, its markers and the moments of one period.

Every time here is on ONE axis, the trigger's: time 0 is the edge at the
generator's trigger input (for a pulsed source, the source's trigger; the
source itself fires at ``source.pulse_time`` on this axis, as it always has).
The plan, the tables of every channel, the markers and the plots use it.

Keys (all optional; without ``[timing]`` a scenario plays as before)::

    [timing]
    delay = "0 ms"        # the generator's trigger delay: the table's first sample plays this long
                          # after the trigger edge (at most the chirp start: only the rest before
                          # the chirp may be skipped)
    mode = "burst"        # "burst": each trigger plays `cycles` periods; "repeat": plays on and on
    cycles = 1            # periods per trigger in burst mode
    source = "external"   # "external" (the trigger input), "internal" (free running), "software"
    edge = "rising"       # the trigger input's active edge: "rising" or "falling"
    level = "1.5 V"       # the trigger input's threshold, where the instrument has one

    [timing.markers.arrival]
    at = "arrival"        # a moment (MOMENTS), shifted by `shift`
    shift = "0 ms"
    width = "20 us"       # how long the marker stays high
    output = 3            # the generator output that plays it
    high = "3.3 V"        # the level while high (at the input it drives); low = "0 V" by default

Defaults: a pulsed source triggers ``external`` in ``burst`` mode, a continuous
beam runs ``internal`` in ``repeat`` mode. The source and edge names here are
sweepgen's own words; a generator profile says what its instrument calls them
(``[trigger]`` of the profile, :mod:`sweepgen.generator`).
"""

from __future__ import annotations

from dataclasses import dataclass

from sweepgen._config import Section

#: moments of one period a gate, a marker or the plot may refer to (README glossary)
MOMENTS = ("trigger", "pulse", "chirp_start", "chirp_end", "return_start", "return_end", "arrival")
MODES = ("burst", "repeat")
SOURCES = ("external", "internal", "software")
EDGES = ("rising", "falling")


@dataclass(frozen=True)
class Marker:
    """A pulse on a generator output at a moment of the period (SI units)."""

    name: str
    at: str                  # a name from MOMENTS
    shift: float             # s after that moment (may be negative)
    width: float             # s
    output: int              # generator output number
    high: float              # V while high
    low: float = 0.0         # V otherwise


@dataclass(frozen=True)
class Timing:
    """The ``[timing]`` table of a scenario (defaults filled in)."""

    delay: float = 0.0
    mode: str = "repeat"
    cycles: int = 1
    source: str = "internal"
    edge: str = "rising"
    level: float | None = None
    markers: tuple = ()
    given: bool = False      # whether the scenario has a [timing] table


def timing_from_section(sec: Section | None, *, pulsed: bool) -> Timing:
    """Read ``[timing]`` (absent: the defaults for a pulsed or a continuous source)."""
    mode_default, source_default = ("burst", "external") if pulsed else ("repeat", "internal")
    if sec is None:
        return Timing(mode=mode_default, source=source_default)
    delay = sec.quantity("delay", "s", 0.0, nonnegative=True, example="0.2 ms")
    mode = sec.string("mode", mode_default, choices=MODES)
    cycles = sec.number("cycles", 1, integer=True, minimum=1)
    if mode == "repeat" and sec.has("cycles"):
        raise sec.error("cycles", "cycles counts the periods of one burst; remove it or set mode = \"burst\"")
    source = sec.string("source", source_default, choices=SOURCES)
    edge = sec.string("edge", "rising", choices=EDGES)
    level = sec.quantity("level", "V", None, example="1.5 V")
    markers = sec.section("markers", None)
    found = () if markers is None else tuple(_marker(markers.section(n), n) for n in list(markers.data))
    if markers is not None:
        markers.finish()
    sec.finish()
    return Timing(delay, mode, cycles, source, edge, level, found, given=True)


def moment_choice(sec: Section, name: str, default=None) -> str:
    """A moment name (one of :data:`MOMENTS`)."""
    return sec.string(name, default, choices=MOMENTS)


def _marker(sec: Section, name: str) -> Marker:
    at = moment_choice(sec, "at")
    shift = sec.quantity("shift", "s", 0.0, example="-10 us")
    width = sec.quantity("width", "s", positive=True, example="20 us")
    output = sec.number("output", integer=True, minimum=1)
    high = sec.quantity("high", "V", example="3.3 V")
    low = sec.quantity("low", "V", 0.0, example="0 V")
    sec.finish()
    if high == low:
        raise sec.error("high", "expected a level different from low")
    return Marker(name, at, shift, width, output, high, low)


def moments(plan) -> dict:
    """Times (s, trigger axis) of :data:`MOMENTS` in ``plan``'s period; None where the moment
    does not exist (a continuous beam has no pulse and no arrival of a bunch)."""
    sc = plan.scenario
    ch = sc.chirp
    t0 = plan.chirp_start
    t1 = t0 + plan.chirp_duration
    t2 = t1 + ch.hold
    return {"trigger": 0.0, "pulse": sc.pulse_time, "chirp_start": t0, "chirp_end": t1, "return_start": t2,
            "return_end": t2 + ch.return_time, "arrival": plan.arrival_time}


def gate_window(gate, when: dict) -> tuple[float, float] | None:
    """``(open, close)`` of a gate (:class:`sweepgen.channels.Gate`) on the trigger axis (s), from the
    times of the moments (:func:`moments`); None when a moment does not exist in this period."""
    on, off = when.get(gate.on), when.get(gate.off)
    if on is None or off is None:
        return None
    return on + gate.on_shift, off + gate.off_shift


def lanes(scenario, plan) -> list[tuple[str, list[tuple[float, float]]]]:
    """What happens when, on the trigger axis, one lane each: the source pulse, the played table
    (one period of samples from ``delay``), every gate's open window and every marker's pulse; ``(label, [(start,
    end), ...])`` in seconds. For ``plan`` and its plot."""
    when = moments(plan)
    tm, period = scenario.timing, scenario.chirp.period
    out = []
    if when["pulse"] is not None:
        duration = getattr(scenario.emission, "pulse_duration", None) or period * 2e-3
        out.append(("source pulse", [(when["pulse"], when["pulse"] + duration)]))
    # the table holds one period of samples: from its first sample to a period later (past the period's
    # end by the delay: in a burst those last samples play while the next period begins)
    out.append((f"table (first sample {tm.delay * 1e3:.4g} ms after the trigger)", [(tm.delay, tm.delay + period)]))
    out.append(("chirp", [(when["chirp_start"], when["chirp_end"])]))
    for ch in scenario.channels:
        if ch.kind == "gate":
            window = gate_window(ch.gate, when)
            if window is not None:
                out.append((f"{ch.name}: light on ({', '.join(ch.gate.lights)})", [window]))
    for m in tm.markers:
        at = when.get(m.at)
        if at is not None:
            out.append((f"{m.name}: marker at {m.at}, output {m.output}", [(at + m.shift, at + m.shift + m.width)]))
    return out


def timeline_json(scenario, plan) -> dict:
    """The ``timing`` part of ``plan --json``: the settings, the moments and the lanes (s, trigger axis)."""
    tm = scenario.timing
    return {"delay": tm.delay, "mode": tm.mode, "cycles": tm.cycles, "source": tm.source, "edge": tm.edge,
            "level": tm.level, "moments": moments(plan),
            "lanes": [{"label": label, "spans": [list(s) for s in spans]} for label, spans in lanes(scenario, plan)]}


def plan_timing(scenario, plan) -> dict | None:
    """:func:`timeline_json` for a scenario that says anything about timing (a ``[timing]`` table or
    a gate), else None: what ``plan --json`` adds under ``timing``."""
    if not (scenario.timing.given or any(ch.kind == "gate" for ch in scenario.channels)):
        return None
    return timeline_json(scenario, plan)
