"""The playback service: a scenario, checked, becomes what the generator plays.

One call, :func:`prepare`, runs the chain from the files to the verdict and
keeps everything computed on the way::

    scenario ─► laser and generator profiles ─► plan ─► design rules
             ─► what each output plays (ChannelPlayback): drive range,
                sample-rate choice, quantisation; computed here, once
             ─► laser, generator, sample-rate, quantisation and tracking rules
    Playback ─► table() ─► export(...) through a file driver
                         └► upload(link(...)) to an instrument, with its trigger

The commands ``check``, ``export``, ``upload`` and ``demo`` go through it: they
parse their options, call it and print. Nothing is recomputed after
:func:`prepare`; the checker's rules, the renderer and the deliveries read the
same :class:`ChannelPlayback`.

A scenario plays today on one output, the main channel (:data:`MAIN`, the
slowing light's detuning sweep). :attr:`Playback.channels` maps channel names
to what each plays, so further outputs take their place beside it. All
numbers are SI (Hz, Sa/s, s, drive units V or Hz); result objects have
``to_json()``.
"""

from __future__ import annotations

import dataclasses
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from sweepgen import checker, sampling
from sweepgen._format import si
from sweepgen.channels import MAIN_LIGHT
from sweepgen.errors import CheckFailed, InputError
from sweepgen.generator import load_generator
from sweepgen.laser import load_laser
from sweepgen.preshape import preshaped_playback
from sweepgen.programs import DetuningProgram, Played, SampledProgram
from sweepgen.render import drive_range, render
from sweepgen.scenario import Scenario, load_scenario

#: the name of the main channel: the slowing light's detuning sweep (the lights' name for it)
MAIN = MAIN_LIGHT


# ---------------------------------------------------------------------------------------------
# Profiles: the one home of "which laser and generator play this scenario"
# ---------------------------------------------------------------------------------------------
def load_profile(kind: str, ref: str, *, key: str | None = None):
    """A laser (``kind="laser"``) or generator profile a person named directly.

    ``ref`` is a built-in key or a path from the current folder; ``key`` names
    where it was given (an option, an argument) in error messages.
    """
    loaders = {"laser": load_laser, "generator": load_generator}
    if kind not in loaders:
        raise ValueError(f"no profile kind {kind!r}")
    return loaders[kind](ref, key=key or kind)


def scenario_profiles(scenario: Scenario, laser=None, generator=None, *, required: bool = True):
    """``(laser, generator)`` that play ``scenario``: the ones given, else the ones it names.

    Profiles a scenario names are found relative to its folder
    (:meth:`Scenario.laser_path`). With ``required`` a scenario that names no
    laser or generator is an :class:`InputError`; without it that profile is None.
    """
    if laser is None and (required or scenario.laser_ref is not None):
        laser = load_laser(str(scenario.laser_path()))
    if generator is None and (required or scenario.generator_ref is not None):
        generator = load_generator(str(scenario.generator_path()))
    return laser, generator


# ---------------------------------------------------------------------------------------------
# What one output plays
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class ChannelPlayback:
    """What one generator output plays over one period (SI units).

    ``drive_range`` is exact (the schedule's extremes through the chain);
    ``rate_choice`` is None when no sample rate plays the sweep and
    ``quantisation`` None when no code window does (the drive leaves the safe
    input or the output range, or the output kind does not fit the chain); the
    refusals say why. The checker judges these, the renderer plays them.
    """

    name: str                                   # channel name (MAIN for the slowing light)
    output: int                                 # generator output number (1-based)
    schedule: object                            # sweepgen.schedule.Schedule
    laser: object                               # sweepgen.laser.Laser
    generator: object                           # sweepgen.generator.Generator
    drive_range: tuple[float, float]            # drive units (V at the actuator, or Hz)
    rate_choice: sampling.SampleRateChoice | None
    quantisation: sampling.Quantisation | None
    rate_refusal: str = ""
    quantisation_refusal: str = ""
    kind: str = "frequency"                     # "frequency" (a detuning) | "gate" | "marker" (a level)
    preshaped: object = None                    # sweepgen.preshape.PreShaped when the drive is pre-shaped

    @property
    def drive_unit(self) -> str:
        return self.laser.chain.drive_unit

    @property
    def address(self) -> str:
        """Where it plays, in words: ``output 2 of virtual-awg``."""
        return f"output {self.output} of {self.generator.key}"

    @property
    def quantity(self) -> str:
        """What the schedule holds: ``detuning`` (Hz) or ``level`` (fraction of full intensity or high)."""
        return "detuning" if self.kind == "frequency" else "level"

    def to_json(self) -> dict:
        out = {"name": self.name, "kind": self.kind, "generator": self.generator.key, "output": self.output,
               "laser": self.laser.key, "drive_unit": self.drive_unit, "drive_range": list(self.drive_range)}
        if self.rate_choice is not None:
            out.update(sample_rate=self.rate_choice.sample_rate, count=self.rate_choice.count)
        if self.quantisation is not None:
            out.update(amplitude=self.quantisation.amplitude, offset=self.quantisation.offset)
        return out


@dataclass(frozen=True)
class MarkerTimes:
    """A marker's pulse on the trigger axis (s)."""

    name: str
    output: int
    start: float
    end: float


@dataclass(frozen=True)
class PlayTiming:
    """How and when a playback starts, on one time axis (0 = the trigger edge; SI units).

    ``source``/``edge`` are sweepgen's words; ``source_name``/``edge_name``
    the generator profile's own names for them (None: the profile names none,
    e.g. a ramp board). ``moments`` maps :data:`sweepgen.timing.MOMENTS` to
    times (None where the period has no such moment); the table's first sample
    plays at ``delay``.
    """

    source: str                    # "external" | "internal" | "software"
    source_name: str | None
    edge: str                      # "rising" | "falling"
    edge_name: str | None
    level: float | None            # V, the trigger input's threshold
    delay: float                   # s from the trigger edge to the first sample
    mode: str                      # "burst" | "repeat"
    cycles: int                    # periods per trigger (burst)
    period: float                  # s
    moments: dict
    markers: tuple = ()            # MarkerTimes, ...

    @property
    def triggered(self) -> bool:
        """Whether each playback waits for a trigger (a pulsed source), rather than running free."""
        return self.source != "internal"

    def to_json(self) -> dict:
        return {"source": self.source, "source_name": self.source_name, "edge": self.edge,
                "edge_name": self.edge_name, "level": self.level, "delay": self.delay, "mode": self.mode,
                "cycles": self.cycles, "period": self.period, "moments": dict(self.moments),
                "markers": [{"name": m.name, "output": m.output, "start": m.start, "end": m.end}
                            for m in self.markers]}


def play_timing(scenario, plan, generator) -> PlayTiming:
    """The scenario's ``[timing]`` resolved against its plan and the generator's own trigger names."""
    from sweepgen.timing import moments

    tm = scenario.timing
    names = getattr(generator, "trigger", None)
    when = moments(plan)
    markers = []
    for m in tm.markers:
        at = when.get(m.at)
        if at is not None:
            markers.append(MarkerTimes(m.name, m.output, at + m.shift, at + m.shift + m.width))
    return PlayTiming(tm.source, names.name(tm.source) if names else None, tm.edge,
                      names.name(tm.edge) if names else None, tm.level, tm.delay, tm.mode, tm.cycles,
                      scenario.chirp.period, when, tuple(markers))


# ---------------------------------------------------------------------------------------------
# Schedules of further channels, on the trigger axis, and the table's own axis
# ---------------------------------------------------------------------------------------------
def offset_schedule(schedule, offset: float):
    """``schedule`` moved by a constant ``offset`` (Hz): a channel following the main sweep."""
    from sweepgen.schedule import Schedule

    c = schedule.coefficients.copy()
    c[-1] += offset
    return Schedule(schedule.segments, (schedule.breakpoints, c), schedule.period,
                    schedule.start_detuning + offset, schedule.end_detuning + offset)


def level_schedule(period: float, intervals, base: float = 0.0):
    """A piecewise-constant schedule over ``[0, period]``: ``base``, and ``(start, end, value)`` where given.

    Intervals lie within the period and do not overlap (the checker refuses others first)."""
    from sweepgen.schedule import Schedule, Segment

    edges, values, segments = [0.0], [], []
    t = 0.0
    for a, b, value in sorted(intervals):
        a, b = max(a, t), min(b, period)
        if b <= a:
            continue
        for start, end, v, kind in ((t, a, base, "dark"), (a, b, value, "open")):
            if end > start:
                edges.append(end)
                values.append(v)
                segments.append(Segment(kind, start, end))
        t = b
    if period > t:
        edges.append(period)
        values.append(base)
        segments.append(Segment("dark", t, period))
    c = np.zeros((4, len(values)))
    c[-1] = values
    return Schedule(segments, (np.array(edges), c), period, values[0], values[-1])


def delayed(schedule, delay: float):
    """``schedule`` on the table's axis: its first sample plays ``delay`` after the trigger edge.

    Only a stretch at the start that holds one value may be skipped (the checker's
    ``timing.delay`` rule); it moves to the end of the period, where the next
    period's start would have played it.
    """
    from sweepgen.schedule import Schedule, Segment

    if delay <= 0:
        return schedule
    x, c, period = schedule.breakpoints, schedule.coefficients, schedule.period
    first = schedule.detuning(0.0)
    skipped = x[:-1] < delay
    if np.any(c[:-1, skipped]) or np.any(c[-1, skipped] != first):
        raise CheckFailed(f"the trigger delay {delay * 1e3:.6g} ms would skip a part of the period that changes")
    keep = x[1:] > delay
    edges = np.concatenate([[0.0], x[1:][keep] - delay, [period]])
    coeffs = np.concatenate([c[:, keep], np.array([[0.0], [0.0], [0.0], [first]])], axis=1)
    segments = [Segment(s.kind, max(s.start - delay, 0.0), s.end - delay) for s in schedule.segments
                if s.end > delay] + [Segment(schedule.segments[0].kind, period - delay, period)]
    return Schedule(segments, (edges, coeffs), period, first, schedule.end_detuning)


def undelayed(schedule, delay: float):
    """``schedule`` given on the table's axis, on the trigger's (:func:`delayed` undone): what plays at
    ``t`` of the table plays at ``t + delay`` after the trigger, and the last ``delay`` of the period
    comes first (the period before it is still playing). A piece that the period's end cuts in two is
    split, the second part's polynomial written about its own start (the same curve)."""
    from sweepgen.schedule import Schedule, Segment

    if delay <= 0:
        return schedule
    x, c, period = schedule.breakpoints, schedule.coefficients, schedule.period
    cut = period - delay
    k = int(np.searchsorted(x, cut, side="right")) - 1
    if x[k] < cut:
        x = np.insert(x, k + 1, cut)
        c = np.insert(c, k + 1, _about(c[:, k], cut - x[k]), axis=1)
    tail = x[:-1] >= cut
    edges = np.concatenate([x[:-1][tail] - cut, x[:-1][~tail] + delay, [period]])
    coeffs = np.concatenate([c[:, tail], c[:, ~tail]], axis=1)
    segments = ([Segment(g.kind, max(g.start - cut, 0.0), g.end - cut) for g in schedule.segments if g.end > cut]
                + [Segment(g.kind, g.start + delay, min(g.end, cut) + delay) for g in schedule.segments
                   if g.start < cut])
    return Schedule(segments, (edges, coeffs), period, schedule.start_detuning, schedule.end_detuning)


def _about(c, u0: float) -> np.ndarray:
    """The coefficients (highest power first) of the polynomial ``c`` written in powers of ``u − u0``:
    its ``k``-th derivative at ``u0`` over ``k!`` (Taylor)."""
    order = c.size
    return np.array([np.polyval(np.polyder(c, k), u0) / math.factorial(k) if k else np.polyval(c, u0)
                     for k in range(order - 1, -1, -1)])


def gate_laser(name: str, gate):
    """The actuator of a gate or marker: a straight line from level 0 (``dark``) to 1 (``bright``) volts,
    with its safe input range; no tuning, no response."""
    import math

    from sweepgen.chain import AnalogStage, Chain
    from sweepgen.laser import Laser, Limits
    from sweepgen.response import Response

    stage = AnalogStage(f"{name} input", 1.0 / (gate.bright - gate.dark), 0.0, gate.dark, "V", up_unit="1")
    chain = Chain([stage], safe_min=gate.input_min, safe_max=gate.input_max, input="level")
    limits = Limits(None, math.inf, gate.input_min, gate.input_max)
    return Laser(key=name, title=f"{name}: level 0 at {gate.dark:g} V, 1 at {gate.bright:g} V", chain=chain,
                 limits=limits, response=Response())


def channel_playback(schedule, laser, generator, drive, *, linewidth: float | None = None,
                     sample_rate: float | None = None, name: str = MAIN) -> ChannelPlayback:
    """Drive range, sample-rate choice and quantisation of ``schedule`` on ``generator``.

    ``drive`` is the scenario's ``[drive]`` options (:class:`sweepgen.scenario.Drive`);
    ``sample_rate`` (Sa/s) overrides its ``sample_rate``; ``linewidth`` (Hz)
    sets the default detuning step tolerance. A fixed sample rate the generator does
    not play is kept (the checker fails it with the numbers).
    """
    chain = laser.chain
    lo, hi = drive_range(schedule, chain)
    choice, rate_refusal = None, ""
    try:
        choice = sampling.choose_sample_rate(schedule, chain, generator, drive, linewidth=linewidth,
                                             strict=False, sample_rate=sample_rate)
    except CheckFailed as exc:
        rate_refusal = str(exc)
    quant, quant_refusal = None, ""
    try:
        quant = sampling.quantisation(lo, hi, generator, chain)
    except CheckFailed as exc:
        quant_refusal = str(exc)
    return ChannelPlayback(name, drive.channel, schedule, laser, generator, (lo, hi), choice, quant,
                           rate_refusal, quant_refusal)


def played_on(schedule, laser, generator, output: int, choice, *, name: str, kind: str) -> ChannelPlayback:
    """What a further channel plays at the main channel's sample-rate choice (one time base)."""
    lo, hi = drive_range(schedule, laser.chain)
    quant, refusal = None, ""
    try:
        quant = sampling.quantisation(lo, hi, generator, laser.chain)
    except CheckFailed as exc:
        refusal = str(exc)
    return ChannelPlayback(name, output, schedule, laser, generator, (lo, hi), choice, quant, "", refusal, kind)


def further_channels(sc: Scenario, plan, main: ChannelPlayback, timing: PlayTiming) -> dict:
    """What each further output plays: frequency channels through their own lasers, gates and markers
    as levels; all at the main channel's sample rate, on the table's axis (``timing.delay``).

    A gate or marker whose moments do not fall inside one period is left out here; the checker's
    timing rules fail it with the reason."""
    from sweepgen.channels import Gate
    from sweepgen.timing import gate_window

    out = {}
    base = plan.schedule()
    for ch in sc.channels:
        if not ch.played:
            continue
        gen = _channel_generator(sc, ch.generator_ref, main.generator).for_output(ch.output)
        if ch.kind == "frequency":
            laser = load_laser(ch.laser_ref, relative_to=sc.base_dir, file=str(sc.path),
                               key=f"channels.{ch.name}.laser")
            schedule = offset_schedule(base, ch.offset) if ch.follows else level_schedule(base.period, (), ch.detuning)
        else:
            window = gate_window(ch.gate, timing.moments)
            if window is None:
                continue
            laser, schedule = gate_laser(ch.name, ch.gate), level_schedule(base.period, [(*window, ch.gate.level)])
        try:
            schedule = delayed(schedule, timing.delay)
        except CheckFailed:
            continue                       # it changes before the first sample: the timing rules fail it
        out[ch.name] = played_on(schedule, laser, gen, ch.output, main.rate_choice, name=ch.name, kind=ch.kind)
    for m, spec in zip(timing.markers, _marker_specs(sc, timing)):
        if not timing.delay <= m.start < m.end <= timing.period:
            continue
        gate = Gate("trigger", "trigger", dark=spec.low, bright=spec.high, input_min=min(spec.low, spec.high),
                    input_max=max(spec.low, spec.high))
        schedule = level_schedule(timing.period, [(m.start, m.end, 1.0)])
        out[m.name] = played_on(delayed(schedule, timing.delay), gate_laser(m.name, gate),
                                main.generator.for_output(m.output), m.output, main.rate_choice,
                                name=m.name, kind="marker")
    return out


def _marker_specs(sc: Scenario, timing: PlayTiming) -> list:
    names = {m.name for m in timing.markers}
    return [m for m in sc.timing.markers if m.name in names]


def _channel_generator(sc: Scenario, ref: str | None, main_generator):
    if ref is None:
        return main_generator
    return load_generator(ref, relative_to=sc.base_dir, file=str(sc.path), key="channels.generator")


# ---------------------------------------------------------------------------------------------
# The service
# ---------------------------------------------------------------------------------------------
def prepare(scenario, *, laser=None, generator=None, sample_rate: float | None = None) -> "Playback":
    """Check ``scenario`` and work out what it plays.

    Parameters
    ----------
    scenario : Scenario or str
        A loaded scenario, a built-in key or a path.
    laser, generator : optional
        Loaded profiles used instead of the scenario's (see :func:`load_profile`).
    sample_rate : float, optional
        Sa/s, instead of the scenario's ``[drive] sample_rate``.

    Returns
    -------
    Playback
        ``ok`` is False when a rule fails; bad input (unreadable files, a
        profile missing) raises :class:`sweepgen.errors.InputError` instead.
    """
    sc = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    laser, generator = scenario_profiles(sc, laser, generator)
    report = checker.CheckReport([], scenario=sc, laser=laser, generator=generator)
    plan = checker.check_design(report)
    channels, timing = {}, None
    if plan is not None:
        timing = play_timing(sc, plan, generator)
        found = checker.timing_findings(sc, timing, generator)
        report.findings.extend(found)
        if any(f.rule == "timing.delay" and f.status == "fail" for f in found):
            timing = dataclasses.replace(timing, delay=0.0)        # judged on the trigger's axis; never rendered
        main = preshaped_playback(channel_playback(delayed(plan.schedule(), timing.delay), laser, generator,
                                                   sc.drive, linewidth=sc.species.linewidth,
                                                   sample_rate=sample_rate), sc.drive)
        checker.check_hardware(report, main, timing.delay)
        channels[MAIN] = main
        if main.rate_choice is not None:
            channels.update(further_channels(sc, plan, main, timing))
            for name, playing in channels.items():
                if name != MAIN:
                    report.findings.extend(checker.channel_findings(playing))
            report.findings.extend(checker.output_findings(channels))
    return Playback(sc, laser, generator, report, channels, timing)


# ---------------------------------------------------------------------------------------------
# A table read back, played by today's laser
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class TableSweep:
    """What an old table plays through a laser: its drive mapped by the laser's chain TODAY."""

    table: object              # sweepgen.readback.ReadTable
    laser: object
    schedule: object           # sweepgen.schedule.Schedule of the detuning it plays
    error: float               # Hz: the schedule's largest difference from the table's samples
    sample_rate: float


def table_sweep(table, laser) -> TableSweep:
    """The detuning ``table`` plays through ``laser``: its drive (from the sidecar's scaling, V at the
    actuator or Hz) through the laser's chain as it is now, as a schedule over one period."""
    from sweepgen import readback

    doc = table.sidecar
    channel = table.channel
    if channel.get("name", MAIN) != MAIN:
        raise InputError(f"this is the table of channel '{channel['name']}' ({channel.get('kind', 'a further')} "
                         f"channel); a table read back is judged and flown as the main sweep: give the main "
                         f"sweep's table (the file without '-{channel['name']}')", file=str(table.path),
                         key="channel.name")
    unit = table.drive_unit
    if unit != laser.chain.drive_unit:
        raise InputError(f"the table drives in {unit} but laser '{laser.key}' takes {laser.chain.drive_unit}",
                         file=str(table.path), key="scaling.drive.unit")
    n = readback.period_samples(table)
    drive = table.drive()[:n]
    with np.errstate(all="ignore"):
        detuning = laser.chain.to_detuning(drive)
    if not np.all(np.isfinite(detuning)):
        raise InputError(f"the drive this scaling gives is not finite through laser '{laser.key}' "
                         f"(from {np.min(drive):.6g} to {np.max(drive):.6g} {unit})",
                         file=f"{table.path}.json", key="scaling.drive")
    gain = np.abs(laser.chain.gain(np.array([detuning.min(), detuning.max()])))
    step = abs(doc["scaling"]["drive"]["scale"]) / float(gain.min())       # Hz of detuning per code
    schedule, error = readback.table_schedule(detuning, table.sample_rate, n, step)
    return TableSweep(table, laser, schedule, error, table.sample_rate)


def prepare_table(scenario, table, *, laser=None, generator=None) -> "Playback":
    """Check an old table (read back) in place of the scenario's own sweep, against today's profiles.

    The design rules judge the scenario's plan; the hardware rules judge what the
    table plays through today's laser at its own sample rate; ``table_integrity``
    and ``table_match`` say whether the file is intact and still follows the plan.
    """
    sc = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    laser, generator = scenario_profiles(sc, laser, generator)
    report = checker.CheckReport([], scenario=sc, laser=laser, generator=generator)
    plan = checker.check_design(report)
    sweep = table_sweep(table, laser)
    report.findings.extend(checker.table_findings(plan or report.plan, table, sweep, sc.timing.delay))
    main = channel_playback(sweep.schedule, laser, generator, sc.drive, linewidth=sc.species.linewidth,
                            sample_rate=table.sample_rate)
    if main.rate_choice is not None:
        import dataclasses

        where = f"the table {table.path.name}"
        main = dataclasses.replace(main, rate_choice=dataclasses.replace(
            main.rate_choice, limited_by=f"fixed by {where}",
            reason=main.rate_choice.reason.replace("--rate", where)))
    checker.check_hardware(report, main, sc.timing.delay)
    return Playback(sc, laser, generator, report, {MAIN: main})


@dataclass(frozen=True)
class Link:
    """How an upload reaches its instrument: driver, destination, trigger.

    ``timing`` is the playback's :class:`PlayTiming` (trigger source, edge,
    level, delay, burst or repeat, markers); ``trigger_source`` is the generator
    profile's own name for the trigger source it asks for (``[trigger]`` of the
    profile; None where the profile names none, as for a ramp board, whose
    driver reads ``timing``).
    """

    driver: str                          # "visa" | "serial"
    destination: str                     # VISA resource string or pyserial URL
    trigger_source: str | None = None
    backend: str | None = None           # pyvisa backend (None: the driver's default)
    timing: PlayTiming | None = None

    def options(self) -> dict:
        """The driver options (``Delivery.options``)."""
        out = {}
        if self.trigger_source is not None:
            out["trigger_source"] = self.trigger_source
        if self.backend is not None:
            out["backend"] = self.backend
        tm = self.timing
        if self.driver == "visa" and tm is not None:
            extra = {"edge": tm.edge_name, "level": tm.level, "delay": tm.delay or None, "mode": tm.mode,
                     "cycles": tm.cycles if tm.mode == "burst" else None}
            out.update({k: v for k, v in extra.items() if v is not None})
        elif self.driver == "serial" and tm is not None:
            out["timing"] = tm           # the serial driver maps it onto the board's TRIGGER settings
        return out


@dataclass
class Playback:
    """A checked scenario and what it plays; :func:`prepare` makes it."""

    scenario: Scenario
    laser: object
    generator: object
    report: checker.CheckReport
    channels: dict                       # name -> ChannelPlayback, MAIN first (empty when the design fails)
    timing: PlayTiming | None = None     # trigger, delay, burst/repeat, moments, markers (None: no plan)
    _tables: dict = field(default_factory=dict, repr=False)

    @property
    def ok(self) -> bool:
        return self.report.ok

    @property
    def plan(self):
        return self.report.plan

    @property
    def main(self) -> ChannelPlayback | None:
        return self.channels.get(MAIN)

    def to_json(self) -> dict:
        """The ``check --json`` document: ``ok``, ``findings`` and ``playback``; with several outputs or a
        ``[timing]`` table also ``channels`` (what each output plays) and ``timing``."""
        doc = self.report.to_json()
        if self.timing is not None and (len(self.channels) > 1 or self.scenario.timing.given):
            doc["channels"] = [p.to_json() for p in self.channels.values()]
            doc["timing"] = self.timing.to_json()
        return doc

    def require_playable(self) -> "Playback":
        """Raise :class:`CheckFailed` (exit 1) unless no rule fails."""
        checker.require_playable(self.report)
        return self

    def table(self, channel: str = MAIN):
        """The rendered table of one channel (:class:`sweepgen.table.RenderedTable`), made once.

        Refuses (:class:`CheckFailed`) when a rule fails: nothing unsafe is rendered.
        """
        if channel not in self._tables:
            self.require_playable()
            playing = self.channels[channel]
            table = render(playing, digest=self.scenario.digest, delay=self.timing.delay if self.timing else 0.0)
            if len(self.channels) > 1 or self.timing is not None and self.timing.delay:
                table.info.extra["channel"] = {"name": channel, "kind": playing.kind, "output": playing.output,
                                               "generator": playing.generator.key, "quantity": playing.quantity}
                table.info.extra["timing"] = self.timing.to_json()
            self._tables[channel] = table
        return self._tables[channel]

    # -- delivery ---------------------------------------------------------------------------
    def export(self, file_format: "FileFormat", directory, options: dict, *, progress=None) -> "Delivered":
        """Write each channel's table and its sidecar into ``directory`` with a file driver.

        ``options`` are the driver's; ``name`` is the file name without
        extension (see :func:`default_file_name`) of the main table; a further
        channel's files are named ``NAME-CHANNEL``. Every sidecar says which
        channel, output and generator its table is for, and the timing.
        """
        from sweepgen import sidecar
        from sweepgen.drivers.base import Delivery

        self.require_playable()
        reports = {}
        for name, playing in self.channels.items():
            table = self.table(name)
            own = dict(options)
            if name != MAIN:
                own["name"] = f"{options.get('name') or default_file_name(self.scenario)}-{name}"
            laser = playing.laser if playing.kind == "frequency" else None
            delivery = Delivery(destination=str(directory), generator=playing.generator, options=own,
                                progress=progress if name == MAIN else None,
                                sidecar=sidecar.provenance(self.scenario, laser, playing.generator))
            reports[name] = file_format.driver.deliver(table, delivery)
        report = reports[MAIN]
        if len(reports) > 1:
            report = {**report, "channels": [{"name": n, "output": self.channels[n].output, "paths": r["paths"],
                                              "table_sha256": r.get("table_sha256")} for n, r in reports.items()]}
        return Delivered(self, "file", file_format.name, str(directory), self.table().info, report)

    def link(self, *, resource: str | None = None, serial_port: str | None = None,
             backend: str | None = None) -> Link:
        """The link an upload takes: a ramp board over serial, any other generator over VISA.

        ``resource`` / ``serial_port`` replace the profile's ``[link]`` address;
        ``backend`` chooses the pyvisa backend. A contradiction, or an address that
        cannot name an instrument, is an :class:`InputError`.
        """
        from sweepgen import drivers
        from sweepgen.drivers.base import Delivery

        link = self._link(resource, serial_port, backend)
        given = resource if link.driver == "visa" else serial_port      # None: the profile's, named as its key
        drivers.load(link.driver)().check_destination(Delivery(destination=given, generator=self.generator))
        return link

    def _link(self, resource, serial_port, backend) -> Link:
        gen = self.generator
        _refuse_empty(resource=resource, serial_port=serial_port)
        if serial_port is None and gen.kind != "board":
            timing = self.timing
            return Link("visa", resource or gen.link.address, backend=backend, timing=timing,
                        trigger_source=None if timing is None else timing.source_name)
        if gen.kind != "board":
            raise InputError(f"generator '{gen.key}' is an arbitrary-waveform generator on a VISA link; "
                             f"--serial-port is for ramp boards (use --resource)", key="--serial-port")
        if resource is not None:
            raise InputError(f"generator '{gen.key}' is a ramp board on a serial link; use --serial-port",
                             key="--resource")
        if backend is not None:
            raise InputError("--backend chooses the VISA backend; a ramp board is reached through pyserial",
                             key="--backend")
        return Link("serial", serial_port or gen.link.address, timing=self.timing)

    def upload(self, link: Link, *, arm: bool = False, dry_run: bool = False, progress=None) -> "Delivered":
        """Upload every channel's table over ``link``, verified; outputs switch on only with ``arm``.

        All tables are loaded and verified before any output is switched on; the outputs are
        switched on in the order of :attr:`channels` (the main light, the further channels as
        the scenario lists them, then the markers); any fault switches every output off.
        """
        from sweepgen import drivers
        from sweepgen.drivers.base import Delivery

        names = self.uploaded_channels()
        driver = drivers.load(link.driver)()
        tables = [self.table(name) for name in names]
        delivery = Delivery(destination=link.destination, generator=self.generator, arm=arm, dry_run=dry_run,
                            progress=progress, options=link.options())
        if len(tables) > 1:
            if not hasattr(driver, "deliver_tables"):
                raise InputError(f"the {link.driver} driver uploads one table; this scenario plays "
                                 f"{len(tables)} outputs ({', '.join(names)})", key="channels")
            report = driver.deliver_tables(tables, delivery)
            report["channels"] = [{"name": n, "output": self.channels[n].output,
                                   "table_sha256": t.sha256} for n, t in zip(names, tables)]
        else:
            report = driver.deliver(tables[0], delivery)
        report = self.record(report, tables[0])
        return Delivered(self, "instrument", link.driver, link.destination, tables[0].info, report)

    def uploaded_channels(self) -> list[str]:
        """The channels an upload sends, in arming order; refuses channels on another generator
        (an upload reaches one instrument: export those)."""
        self.require_playable()
        elsewhere = [n for n, p in self.channels.items() if p.generator.key != self.generator.key]
        if elsewhere:
            raise InputError(f"channel(s) {', '.join(elsewhere)} play on another generator; an upload reaches "
                             f"one instrument: upload the scenario's outputs here and export the others",
                             key="channels")
        return list(self.channels)

    def provenance(self, table) -> dict:
        """What was played, by digest: the table's codes (``table_sha256``, as in sidecars) and the
        scenario and profile files (SHA-256 of each), to tie a measured trace to them."""
        from sweepgen import sidecar

        return {"table_sha256": table.sha256,
                "provenance": {"scenario_digest": self.scenario.digest,
                               **sidecar.provenance(self.scenario, self.laser, self.generator)}}

    def record(self, report: dict, table) -> dict:
        """An upload report with the provenance added, in the JSON and first in its log."""
        prov = self.provenance(table)
        files = "; ".join(f"{k} {v['file']} sha256 {v['sha256']}" for k, v in prov["provenance"].items()
                          if isinstance(v, dict))
        text = f"table sha256 {prov['table_sha256']}; {files}"
        entry = {"step": "provenance", "kind": "record", "bytes": 0, "command": text, "message": text}
        return {**report, **prov, "log": [entry, *report.get("log", [])]}


@dataclass(frozen=True)
class FileFormat:
    """A file format: the name it is registered under and its driver (an instance)."""

    name: str
    driver: object

    def check_options(self, options: dict) -> None:
        """Refuse options the driver does not know, or values it does not take, before any work
        (:class:`InputError`)."""
        if hasattr(self.driver, "check_options"):
            self.driver.check_options(options)

    def check_table(self, table, options: dict) -> None:
        """Refuse options that do not fit this table (e.g. a 16-bit ``dtype`` for 32-bit DDS words)
        before anything is printed or written (:class:`InputError`)."""
        if hasattr(self.driver, "layout"):
            self.driver.layout(table, self.driver.check_options(dict(options)))


def file_format(name: str) -> FileFormat:
    """The file driver registered as ``name`` (entry-point group ``sweepgen.drivers``)."""
    from sweepgen import drivers

    return FileFormat(name, drivers.load(name, kind="file")())


def default_file_name(scenario: Scenario) -> str:
    """The scenario's file name, reduced to characters every file system takes."""
    stem = re.sub(r"[^A-Za-z0-9_.+-]+", "-", Path(str(scenario.path)).stem).strip(".-")
    return stem or "sweep"


@dataclass(frozen=True)
class Delivered:
    """What one delivery did: the table's facts (SI) and the driver's report."""

    playback: Playback
    kind: str                   # "file" | "instrument"
    driver: str
    destination: str
    info: object                # sweepgen.table.TableInfo of the delivered table
    report: dict                # the driver's own report (files, bytes, steps, verification, ...)

    @property
    def verified(self) -> bool:
        return bool((self.report.get("verification") or {}).get("ok"))

    def to_json(self) -> dict:
        """The ``export --json`` or ``upload --json`` document."""
        pb, info = self.playback, self.info
        head = {"scenario": str(pb.scenario.path), "title": pb.scenario.title}
        warnings = [f.to_json() for f in pb.report.warnings()]
        if self.kind != "file":
            return {**head, "generator": pb.generator.key, "laser": pb.laser.key, **self.report,
                    "warnings": warnings}
        return {"ok": True, "written": True, **head, "laser": pb.laser.key, "generator": pb.generator.key,
                "format": self.driver, **self.report,
                "period_count": info.period_count, "padding": info.count - info.period_count,
                "drive_unit": info.drive_unit, "code_scale": info.code_scale, "code_offset": info.code_offset,
                "amplitude": info.amplitude, "offset": info.offset, "warnings": warnings}


# ---------------------------------------------------------------------------------------------
# The actuator's response, for plots of a plan
# ---------------------------------------------------------------------------------------------
def actuator_response(plan, laser=None, generator=None):
    """The simulated laser detuning over one period, ``(t, detuning_hz)``, or None without a laser.

    ``laser`` and ``generator`` default to the ones the plan's scenario names.
    With a generator the drive is played as it would be (its sample rate and
    codes, the same :func:`channel_playback` the checker judges); without one
    it is simulated unquantised at :func:`sweepgen.response.preview_sample_rate`;
    a pre-shaped drive (``[drive] preshape``) is played pre-shaped.
    ``plots.plot_plan(plan, file, response=actuator_response(plan))`` overlays it.
    """
    from sweepgen import response

    laser, generator = scenario_profiles(plan.scenario, laser, generator, required=False)
    if laser is None:
        return None
    schedule = plan.schedule()
    quant = None
    if generator is None:
        sample_rate = response.preview_sample_rate(laser.response, schedule.period)
    else:
        playing = preshaped_playback(channel_playback(schedule, laser, generator, plan.scenario.drive,
                                                      linewidth=plan.species.linewidth), plan.scenario.drive)
        if playing.rate_choice is None:
            raise CheckFailed(playing.rate_refusal)
        sample_rate, quant = playing.rate_choice.sample_rate, playing.quantisation
        schedule = playing.schedule                           # the pre-shaped drive's, when asked for
    tr = response.track(schedule, laser.chain, laser.response, sample_rate, quant=quant)
    return tr.time, tr.actual


def _refuse_empty(**addresses) -> None:
    """An address given empty is refused, never replaced by the profile's address."""
    for name, given in addresses.items():
        if given is not None and not given.strip():
            raise InputError("expected an address, got an empty one (leave the option out to use the "
                             "generator profile's)", key=f"--{name.replace('_', '-')}")

# ---------------------------------------------------------------------------------------------
# What the atoms see: the detuning a playback plays, for the simulation
# ---------------------------------------------------------------------------------------------
def played_detuning(scenario, plan, *, ideal: bool = False) -> Played:
    """The main light's detuning as the atoms see it.

    With ``ideal`` the plan's schedule. Otherwise what the hardware plays, from
    the playback service (:func:`prepare`, the very models the
    checker judges): the planned detuning through the laser's tuning chain, at
    the generator's sample rate, quantised to its codes and filtered by the
    actuator response (:func:`sweepgen.response.track`), joined linearly
    between samples. Without a laser and generator, or when the generator
    cannot play the sweep at all, the plan is played and ``reason`` says why.
    """
    schedule = plan.schedule()
    if ideal:
        return Played(DetuningProgram(schedule), False, "the plan itself (--ideal)")
    if scenario.laser_ref is None or scenario.generator_ref is None:
        return Played(DetuningProgram(schedule), False, "the scenario names no laser and generator, so the "
                                                        "plan itself is played")
    return played_from(prepare(scenario), schedule)


def played_table(scenario, sweep) -> Played:
    """What a table read back plays (``sweep``: :class:`TableSweep`): through the
    laser's chain, at the table's own sample rate and codes, filtered by the actuator response
    (:func:`prepare_table`); without a generator profile, the table's detuning
    as it is, without the actuator response."""
    delay = scenario.timing.delay             # the table's first sample plays then (the trigger's axis)
    if scenario.generator_ref is None:
        return Played(DetuningProgram(undelayed(sweep.schedule, delay)), False,
                      f"the table {sweep.table.path.name} through laser '{sweep.laser.key}', without the actuator "
                      f"response (the scenario names no generator)")
    pb = prepare_table(scenario, sweep.table, laser=sweep.laser)
    return played_from(pb, undelayed(sweep.schedule, delay), f"the table's detuning through laser "
                                                                f"'{sweep.laser.key}'")


def played_from(pb, schedule=None, fallback: str = "the plan itself") -> Played:
    """The detuning a checked playback (:class:`Playback`) plays, from its
    tracking (computed once, by the checker's ``tracking`` rule), moved onto the trigger's axis (the
    table's first sample plays the report's ``delay`` after the trigger); ``schedule`` (on the
    trigger's axis; default: the plan's, with ``fallback`` naming it) when the generator cannot play it."""
    schedule = pb.plan.schedule() if schedule is None else schedule
    tracking = pb.report.tracking
    if tracking is None:
        main = pb.main
        why = (main.rate_refusal if main is not None and main.rate_refusal else
               "; ".join(f.message for f in pb.report.failures()[:1]))
        return Played(DetuningProgram(schedule), False, f"the generator cannot play the sweep ({why}), so "
                                                        f"{fallback} is played")
    delay = pb.report.delay                # the table's first sample plays then (the checker's tracking)
    in_chirp = schedule.kinds((tracking.time + delay) % schedule.period) == "chirp"
    error = float(np.max(np.abs(tracking.error[in_chirp]))) if np.any(in_chirp) else 0.0
    quantised = "quantised to its codes, " if pb.report.quantisation is not None else ""
    shaped = "a pre-shaped drive " if pb.main is not None and pb.main.preshaped is not None else ""
    reason = (f"laser '{pb.laser.key}' driven by generator '{pb.generator.key}' at {si(pb.report.rate_choice.sample_rate, 'Sa/s')}, "
              f"{shaped}{quantised}through the actuator response ({pb.laser.response.model})")
    program = SampledProgram(tracking.actual, schedule.period).later(delay)      # on the trigger's axis
    failed = tuple(dict.fromkeys(f.rule for f in pb.report.failures()))
    return Played(program, True, reason, error, pb.report.rate_choice.sample_rate, failed)
