"""Plausible ranges: the one table of what each value in a user's file may be.

Every quantity key of every file kind (scenario, species, laser and generator
profiles, measurement files, table sidecars) and every numeric command-line
option has an entry here: the lowest and highest value a real apparatus could
have, and why. A value outside is refused (exit 2) before any computation, in
one line naming the file, the key, the value and the range. The ranges are wide
on purpose: they stop nonsense (a sample rate of ``1e-300 Sa/s``, a wavelength
of ``1e-30 m``, a memory of ``1e300`` samples) that would otherwise overflow the
arithmetic or ask for unbounded time or memory; they do not judge a design
(the checker does that against the user's own limits).

The strict loader (:class:`sweepgen._config.Section`) looks every value up by
its file kind and its dotted key, array indices written ``[]`` (``chain[].clock``)
and user-chosen table names written ``*`` (``channels.*.offset``). A new key
needs an entry here; with :data:`STRICT` set (the test suite sets it), reading a
key without one is an error that says so. The README's table of ranges is
generated from this one (``python -m sweepgen.plausible``) and a test keeps the
two equal.
"""

from __future__ import annotations

import contextlib
import functools
import math
import re
from dataclasses import dataclass

from sweepgen.errors import QUOTE_CHARS, InputError, clip

#: When true, looking up a key that has no entry raises :class:`MissingRange`
#: instead of letting the value through unchecked (the test suite sets it).
STRICT = False


class MissingRange(LookupError):
    """A key was read that has no entry in :data:`RANGES` (a gap in this table, never bad input)."""


@dataclass(frozen=True)
class Range:
    """The plausible values of one key.

    ``low`` and ``high`` are written as in a user file (``"1 Sa/s"``, a bare
    number for dimensionless values, None for no bound) and compared in
    ``unit``. With ``magnitude`` the bounds apply to ``|value|`` (signed
    quantities such as a tuning coefficient); ``open_low``/``open_high`` exclude
    the bound itself.
    """

    low: str | float | None
    high: str | float | None
    unit: str
    reason: str
    magnitude: bool = False
    open_low: bool = False
    open_high: bool = False

    @functools.cached_property
    def bounds(self) -> tuple[float, float]:
        """``(low, high)`` in :attr:`unit` (``-inf``/``inf`` where unbounded)."""
        return (_to_number(self.low, self.unit, -math.inf), _to_number(self.high, self.unit, math.inf))

    def contains(self, value: float) -> bool:
        return bool(self.inside(value))

    def inside(self, values):
        """Whether each of ``values`` (a float or a NumPy array) lies in the range.

        A closed bound of a quantity lets values within 10⁻¹⁴ of it (relative)
        through, so that ``"10 µm"`` is inside a range that starts at ``"10 µm"``
        however the units were converted; bare numbers are compared exactly.
        """
        import numpy as np

        lo, hi = self.bounds
        slack = _SLACK if self.unit else 0.0         # bare numbers are compared exactly
        x = np.abs(values) if self.magnitude else np.asarray(values, dtype=float)
        with np.errstate(invalid="ignore"):
            above = x > lo if self.open_low else x >= lo - slack * abs(lo)
            below = x < hi if self.open_high else x <= hi + slack * abs(hi)
            return above & below & np.isfinite(x)

    def describe(self) -> str:
        """``"from 1 Sa/s to 100 GSa/s"``, ``"a magnitude from ..."``, ``"above 0 and below 1"``."""
        what = "a magnitude " if self.magnitude else ""
        low = f"{'above' if self.open_low else 'at least'} {_shown(self.low)}" if self.low is not None else ""
        high = f"{'below' if self.open_high else 'at most'} {_shown(self.high)}" if self.high is not None else ""
        if not (self.open_low or self.open_high) and low and high:
            return f"{what}from {_shown(self.low)} to {_shown(self.high)}"
        return what + " and ".join(part for part in (low, high) if part)


#: relative tolerance at a closed bound (unit conversions round in the last digits)
_SLACK = 1e-14


def _shown(bound) -> str:
    if isinstance(bound, str):
        return bound
    if isinstance(bound, int):
        return str(bound)
    return str(int(bound)) if float(bound).is_integer() and abs(bound) < 1e16 else f"{bound:g}"


def _to_number(bound, unit: str, missing: float) -> float:
    if bound is None:
        return missing
    if isinstance(bound, str):
        from sweepgen import units

        return units.parse(bound, unit)
    return float(bound)


# ---------------------------------------------------------------------------------------------
# Ranges shared by several keys
# ---------------------------------------------------------------------------------------------
DETUNING = Range("-1 THz", "1 THz", "Hz",
                 "optical detunings: the Doppler shift of a 10 km/s beam at 250 nm is 40 GHz; a terahertz "
                 "is beyond any laser's continuous tuning")
DISTANCE = Range("1 mm", "50 m", "m", "beam-line lengths: from a millimetre to the longest beam lines")
POSITION = Range("-50 m", "50 m", "m", "positions along the beam line, either side of the source")
TIME = Range("0 s", "1000 s", "s", "times within a repetition period (see chirp.period)")
SATURATION = Range(1e-3, 1e5, "",
                   "s0 = I/I_sat: below 10⁻³ the light hardly scatters; 10⁵ is about 1 W focused to a 1 mm "
                   "waist on an alkali D line")
SAMPLE_RATE = Range("1 Sa/s", "100 GSa/s", "Hz",
                    "from the slowest clocked output to the fastest arbitrary-waveform generators")
VELOCITY = Range("1 mm/s", "10 km/s", "m/s",
                 "beam velocities: from an almost stopped atom to the fastest seeded supersonic beams")
VOLTS = Range("-10 kV", "10 kV", "V", "actuator drives: high-voltage piezo amplifiers give up to about a kilovolt")
RF = Range("0 Hz", "100 GHz", "Hz", "radio frequencies made or counted by RF electronics (AOMs, VCOs, DDS, counters)")
RF_DRIVE = Range("0 Hz", "100 GHz", "Hz", "an RF drive (AOM, offset lock, DDS): RF electronics stop near 100 GHz")
COEFFICIENT = Range("1 kHz/V", "1 THz/V", "Hz/V",
                    "tuning coefficients of piezos, diode currents and VCOs lie between about 1 MHz/V and "
                    "a few GHz/V", magnitude=True)
CLOCK = Range("1 MHz", "100 GHz", "Hz", "DDS reference clocks (tens of MHz to a few GHz)")
FIT_RECORD = Range("0 Hz", "1 THz", "Hz", "what a calibration fit is judged by (residuals, uncertainty, hysteresis)")
COUNT = Range(0, 10**9, "", "counts of calibration points")
SHIFT = Range("-1000 s", "1000 s", "s", "a shift from a moment of the period, either way, within a period")
GATE_VOLTS = Range("-50 V", "50 V", "V", "modulator and logic inputs (AOM driver, shutter, TTL) take tens of volts at most")
FRACTION_OPEN = Range(0, 1, "", "a fraction strictly between 0 and 1", open_low=True, open_high=True)

SCENARIO = {
    "source.temperature": Range("0.1 K", "5000 K", "K",
                                "from cryogenic buffer-gas cells (about 1 K) to the hottest refractory-metal ovens"),
    "source.mean_velocity": VELOCITY,
    "source.velocity_spread": Range("1 mm/s", "10 km/s", "m/s", "a 1σ spread, within the beam velocities"),
    "source.pulse_time": TIME,
    "source.pulse_duration": Range("0 s", "10 s", "s", "source pulses last microseconds (ablation) to seconds"),
    "source.radius": Range("0 m", "0.1 m", "m", "source apertures are millimetres; 10 cm is a whole flange"),
    "source.divergence": Range("0 rad", "1 rad", "rad", "up to an uncollimated effusive source", open_low=True),
    "source.collimator.distance": DISTANCE,
    "source.collimator.radius": Range("1 µm", "0.1 m", "m", "collimating apertures are micrometres to centimetres"),
    "light.saturation": SATURATION,
    "light.start": Range("0 m", "50 m", "m", "where the light starts, within the beam line"),
    "light.waist": Range("10 µm", "0.1 m", "m",
                         "a slowing beam's 1/e² radius: smaller is a tweezer, larger than 4-inch optics"),
    "light.focus": POSITION,
    "target.distance": DISTANCE,
    "target.capture_velocity": Range("1 cm/s", "1 km/s", "m/s",
                                     "what traps and targets hold: from magnetic traps (cm/s) to fast targets"),
    "target.aperture": Range("10 µm", "0.5 m", "m", "target apertures from micrometres to a whole chamber"),
    "chirp.start_velocity": VELOCITY,
    "chirp.end_velocity": VELOCITY,
    "chirp.force_fraction": Range(0, 1, "", "η, the fraction of the largest force the design uses",
                                  open_low=True, open_high=True),
    "chirp.margin": Range(0, 1, "", "the old name of chirp.force_fraction", open_low=True, open_high=True),
    "chirp.start_time": TIME,
    "chirp.hold": TIME,
    "chirp.return_time": Range("10 ns", "1000 s", "s", "a return faster than 10 ns is beyond any actuator"),
    "chirp.period": Range("1 µs", "1000 s", "s", "repetition periods from a microsecond to several minutes"),
    "chirp.min_survival": FRACTION_OPEN,
    "drive.sample_rate": SAMPLE_RATE,
    "drive.channel": Range(1, 64, "", "generator output channels"),
    "drive.max_step": Range("1 Hz", "10 GHz", "Hz", "a detuning step per sample, up to a whole sweep"),
    "drive.tracking_fraction": FRACTION_OPEN,
    "drive.preshape_bandwidth": Range("0.01 Hz", "10 GHz", "Hz",
                                      "the bandwidth a pre-shaped drive may use, as response.corner"),
    "channels.*.saturation": SATURATION,
    "channels.*.offset": DETUNING,
    "channels.*.detuning": DETUNING,
    "channels.*.output": Range(1, 64, "", "generator output channels"),
    "channels.*.on_shift": SHIFT,
    "channels.*.off_shift": SHIFT,
    "channels.*.level": Range(0, 1, "", "a fraction of full intensity"),
    "channels.*.dark": GATE_VOLTS,
    "channels.*.bright": GATE_VOLTS,
    "channels.*.input_min": GATE_VOLTS,
    "channels.*.input_max": GATE_VOLTS,
    "channels.*.tolerance": Range("0 s", "1 s", "s", "light left on after the chirp: up to a slow shutter's second"),
    "timing.delay": TIME,
    "timing.cycles": Range(1, 10**9, "", "periods played per trigger"),
    "timing.level": Range("-50 V", "50 V", "V", "trigger thresholds of generator inputs (TTL, NIM, ±10 V)"),
    "timing.markers.*.shift": SHIFT,
    "timing.markers.*.width": Range("1 ns", "1000 s", "s", "marker pulses from a nanosecond to a whole period"),
    "timing.markers.*.output": Range(1, 64, "", "generator output channels"),
    "timing.markers.*.high": GATE_VOLTS,
    "timing.markers.*.low": GATE_VOLTS,
}

SPECIES = {
    "wavelength.value": Range("50 nm", "20 µm", "m",
                              "laser-cooling transitions lie between the vacuum ultraviolet and the mid-infrared"),
    "mass.value": Range("0.9 u", "10000 u", "kg", "from hydrogen to heavy polyatomic molecules"),
    "lifetime.value": Range("0.1 ns", "20 ms", "s",
                            "from the broadest allowed lines (1.6 GHz) to narrow intercombination lines (8 Hz)"),
    "linewidth.value": Range("8 Hz", "1.6 GHz", "Hz",
                             "Γ/2π from narrow intercombination lines to the broadest allowed lines"),
    "saturation_intensity.value": Range("10 nW/cm^2", "100 W/cm^2", "W/m^2",
                                        "from narrow intercombination lines to strong ultraviolet lines"),
    "effective_saturation_intensity.value": Range("10 nW/cm^2", "100 W/cm^2", "W/m^2",
                                                  "as saturation_intensity"),
    "loss_per_photon.value": Range(0, 1, "", "a probability below 1 per photon", open_high=True),
    "max_scattering_rate.fraction": Range(0, 0.5, "", "R_max/Γ is at most 1/2 (a closed two-level transition)",
                                          open_low=True),
    "max_scattering_rate.ground_states": Range(1, 1000, "", "sub-levels of one ground manifold"),
    "max_scattering_rate.excited_states": Range(1, 1000, "", "sub-levels of one excited manifold"),
    "off_resonant_level.splitting": Range("1 kHz", "1 THz", "Hz",
                                          "hyperfine and rotational splittings, either sign", magnitude=True),
    "off_resonant_level.strength": Range(1e-6, 100, "", "a line strength relative to the cycling transition"),
    "off_resonant_level.branching": Range(0, 1, "", "a probability"),
    "zeeman.ground_g": Range(-10, 10, "", "Landé g-factors of atomic and molecular levels lie within a few units"),
    "zeeman.excited_g": Range(-10, 10, "", "as zeeman.ground_g"),
    "zeeman.ground_m": Range(-50, 50, "", "magnetic quantum numbers of the levels used for laser cooling"),
    "zeeman.excited_m": Range(-50, 50, "", "as zeeman.ground_m"),
}

LASER = {
    "limits.mode_hop_free": Range("1 MHz", "10 THz", "Hz", "continuous tuning ranges of lasers and their locks"),
    "limits.max_chirp_rate": Range("1 Hz/s", "1e18 Hz/s", "Hz/s", "up to 1 GHz/ns, beyond any electro-optic chirp"),
    "limits.input_min": (VOLTS, RF_DRIVE),
    "limits.input_max": (VOLTS, RF_DRIVE),
    "limits.max_slew": (Range("1 mV/s", "1 kV/ns", "V/s", "slew rates of drive electronics"),
                        Range("1 Hz/s", "1e18 Hz/s", "Hz/s", "rates of change of an RF drive")),
    "response.corner": Range("0.01 Hz", "10 GHz", "Hz", "actuator bandwidths, from thermal tuning to electro-optics"),
    "response.resonance": Range("0.01 Hz", "10 GHz", "Hz", "actuator resonances, as response.corner"),
    "response.q": Range(0.01, 1e4, "", "quality factors of mechanical and electrical resonances"),
    "chain[].coefficient": COEFFICIENT,
    "chain[].set_point": DETUNING,
    "chain[].set_drive": VOLTS,
    "chain[].drive": VOLTS,
    "chain[].detuning": DETUNING,
    "chain[].range": VOLTS,
    "chain[].coefficients": Range("-10 THz", "10 THz", "Hz", "the coefficients of a fitted tuning curve"),
    "chain[].degree": Range(1, 7, "", "polynomial degrees a calibration may use"),
    "chain[].rms_residual": FIT_RECORD,
    "chain[].max_residual": FIT_RECORD,
    "chain[].uncertainty": FIT_RECORD,
    "chain[].hysteresis": FIT_RECORD,
    "chain[].points": COUNT,
    "chain[].outliers": COUNT,
    "chain[].passes": Range(1, 8, "", "passes through one AOM"),
    "chain[].centre": Range("1 MHz", "20 GHz", "Hz", "AOM centre frequencies (tens of MHz to a few GHz)"),
    "chain[].rf_min": RF,
    "chain[].rf_max": RF,
    "chain[].reference": DETUNING,
    "chain[].multiplier": Range(1, 10**6, "", "frequency multipliers and dividers of a lock's RF path"),
    "chain[].divider": Range(1, 10**6, "", "frequency multipliers and dividers of a lock's RF path"),
    "chain[].beat_min": RF,
    "chain[].beat_max": RF,
    "chain[].frequency": RF,
    "chain[].voltage": VOLTS,
    "chain[].clock": CLOCK,
    "chain[].bits": Range(8, 64, "", "DDS tuning-word widths"),
}

GENERATOR = {
    "channels": Range(1, 64, "", "output channels of one instrument"),
    "sampling.rate_min": SAMPLE_RATE,
    "sampling.rate_max": SAMPLE_RATE,
    "sampling.rates": SAMPLE_RATE,
    "sampling.memory": Range(1, 10**12, "", "samples per channel: the deepest memories hold about 10¹⁰"),
    "sampling.granularity": Range(1, 10**6, "", "record lengths are multiples of at most a few hundred samples"),
    "sampling.min_length": Range(1, 10**12, "", "within the memory"),
    "output.range_min": (Range("-1 kV", "1 kV", "V", "generator outputs, up to high-voltage amplifier outputs"),
                         RF_DRIVE),
    "output.range_max": (Range("-1 kV", "1 kV", "V", "generator outputs, up to high-voltage amplifier outputs"),
                         RF_DRIVE),
    "output.dac_bits": Range(2, 32, "", "DAC resolutions"),
    "output.termination": Range("1 ohm", "1 Gohm", "ohm", "loads an output is set for (or 'high-z')"),
    "output.load": Range("1 ohm", "1 Gohm", "ohm", "loads an output really drives (or 'high-z')"),
    "output.source_impedance": Range("0 ohm", "10 kohm", "ohm", "output impedances of generators"),
    "output.clock": CLOCK,
    "output.word_bits": Range(8, 64, "", "DDS tuning-word widths"),
    "link.baud": Range(50, 10**8, "", "serial line rates, from teleprinters to fast USB bridges"),
    "link.throughput": Range("10 B/s", "100 GB/s", "B/s", "from a slow serial line to the fastest links"),
    "link.timeout": Range("1 ms", "1 h", "s", "a reply later than an hour is a failure, not a wait"),
    "output.amplitude_max": Range("1 mV", "2 kV", "V", "peak-to-peak amplitudes of generator outputs and their amplifiers"),
    "output.offset_max": Range("0 V", "1 kV", "V", "offsets of generator outputs and their amplifiers"),
}
#: [outputs.N] of a generator profile takes the keys of [output], with the same ranges
GENERATOR.update({f"outputs.*.{key[len('output.'):]}": rng for key, rng in list(GENERATOR.items())
                  if key.startswith("output.")})

#: Columns of measurement files (``sweepgen.measurements``), by column kind.
MEASUREMENT = {
    "time": Range("-1 d", "1 d", "s", "a measurement's time axis, within a day of its trigger"),
    "drive": (VOLTS, RF_DRIVE),
    "detuning": DETUNING,
    "frequency": Range("0 Hz", "10 PHz", "Hz", "absolute optical frequencies (wavemeters) up to the vacuum ultraviolet"),
    "beat": Range("-1 THz", "1 THz", "Hz", "beat notes a photodiode and counter can measure"),
    "rf": RF,
}

#: Numbers a table's JSON sidecar gives (read back by ``inspect`` and ``--table``).
SIDECAR = {
    "sample_rate": SAMPLE_RATE,
    "count": Range(1, 10**12, "", "samples in one table, within a generator's memory"),
    "period_count": Range(1, 10**12, "", "samples in one period of the table"),
}

#: Command-line options, by option name.
OPTION = {
    "--rate": SAMPLE_RATE,
    "--atoms": Range(1, 10**9, "", "beyond 10⁹ atoms the statistical error (3·10⁻⁵) is far below any other "
                                 "uncertainty; run several seeds instead"),
    "--seed": Range(0, 2**63 - 1, "", "a 63-bit seed"),
    "--workers": Range(1, 4096, "", "processes on one computer; more than its cores gains nothing"),
    "--transition": Range("14 THz", "6 PHz", "Hz", "c/λ over the plausible wavelengths (50 nm to 20 µm)"),
    "--reference": DETUNING,
    "--range": (VOLTS, RF_DRIVE),
    "--marker": Range("-1 d", "1 d", "s", "a measurement's time axis, within a day of its trigger"),
    "--outlier-sigma": Range(0, 1000, "", "robust standard deviations; 0 keeps every point"),
    "--confirm-atoms": Range(1, 10**9, "", "as --atoms: the confirmation of a search's winner"),
    "--evaluations": Range(1, 100_000, "", "designs one search may try: beyond that, narrow the free keys"),
    "--vary": Range(1, 10_000, "", "values of one varied key (N in KEY=START:STOP:N); a scan runs every "
                                  "combination, at most 100 000 designs"),
}

#: file kind -> key -> Range (or a tuple of Ranges, one per unit)
RANGES = {
    "scenario": SCENARIO,
    "species": SPECIES,
    "laser": LASER,
    "generator": GENERATOR,
    "measurement": MEASUREMENT,
    "sidecar": SIDECAR,
    "option": OPTION,
}

#: what each file kind is called in messages and in the README
KIND_TITLES = {
    "scenario": "Scenario files",
    "species": "Species files",
    "laser": "Laser profiles",
    "generator": "Generator profiles",
    "measurement": "Measurement files (columns)",
    "sidecar": "Table sidecars (JSON)",
    "option": "Command-line options",
}


# ---------------------------------------------------------------------------------------------
# Looking up and checking
# ---------------------------------------------------------------------------------------------
_INDEX = re.compile(r"\[\d+\]")


def pattern_of(key: str) -> str:
    """The table's spelling of a key: array indices become ``[]`` (``chain[2].clock`` → ``chain[].clock``)."""
    return _INDEX.sub("[]", key)


@functools.lru_cache(maxsize=None)
def _wildcards(kind: str) -> list:
    out = []
    for name in RANGES.get(kind, {}):
        if "*" in name:
            regex = "^" + ".+".join(re.escape(part) for part in name.split("*")) + "$"
            out.append((re.compile(regex), name))
    return out


def entry_name(kind: str, key: str) -> str | None:
    """The table key that ``key`` (as written, with indices) falls under, or None."""
    table = RANGES.get(kind, {})
    name = pattern_of(key)
    if name in table:
        return name
    for regex, pattern in _wildcards(kind):
        if regex.match(name):
            return pattern
    return None


#: (kind, table key, unit) of every successful lookup while :func:`recording`
_seen: set | None = None


@contextlib.contextmanager
def recording():
    """Record every ``(kind, table key, unit)`` looked up inside the block (for tests)."""
    global _seen
    previous, _seen = _seen, set()
    try:
        yield _seen
    finally:
        _seen = previous


def lookup(kind: str | None, key: str, unit: str) -> Range | None:
    """The range of ``key`` in a file of ``kind`` for values in ``unit``, or None when there is none.

    Under :data:`STRICT` a missing entry raises :class:`MissingRange`.
    """
    name = entry_name(kind, key) if kind else None
    found = RANGES[kind][name] if name else None
    if isinstance(found, tuple):
        found = next((r for r in found if r.unit == unit), None)
    if found is None:
        if STRICT:
            raise MissingRange(
                f"no plausible range for {kind or '(a Section without a file kind)'} key {pattern_of(key)!r} "
                f"in {unit or 'a bare number'}: add an entry with its reason to sweepgen/plausible.py (RANGES), "
                f"then regenerate the README's table (python -m sweepgen.plausible README.md)")
        return None
    if _seen is not None:
        _seen.add((kind, name, unit))
    return found


def refusal(rng: Range, text, *, file=None, key=None, what: str = "") -> InputError:
    """The one-line refusal of a value outside ``rng``."""
    shown = _shown(text) if isinstance(text, (int, float)) else repr(text)
    got = f"{what}{clip(shown, QUOTE_CHARS)}"
    return InputError(f"expected {rng.describe()} ({rng.reason}), got {got}", file=file, key=key)


def check(kind: str | None, key: str, value: float, unit: str, text=None, *, file=None, shown_key=None) -> None:
    """Refuse ``value`` (in ``unit``; ``text`` as the user wrote it) outside the range of ``key``."""
    rng = lookup(kind, key, unit)
    if rng is not None and not rng.contains(value):
        raise refusal(rng, value if text is None else text, file=file, key=shown_key or key)


def check_values(kind: str, key: str, values, unit: str, *, file=None, shown_key=None, texts=None) -> None:
    """Refuse the first of ``values`` (an array in ``unit``) outside the range of ``key``."""
    import numpy as np

    rng = lookup(kind, key, unit)
    if rng is None:
        return
    values = np.asarray(values, dtype=float)
    bad = np.flatnonzero(~rng.inside(values))
    if bad.size:
        i = int(bad[0])
        text = texts[i] if texts is not None else float(values[i])
        where = shown_key or key
        raise refusal(rng, text, file=file, key=f"{where}[{i}]" if texts is not None else where,
                      what="" if texts is not None else f"value {i + 1} = ")


def check_option(name: str, value: float, text=None, unit: str = "") -> None:
    """Refuse a command-line option's value outside its range (key: the option's name)."""
    check("option", name, value, unit, text)


# ---------------------------------------------------------------------------------------------
# The README's table
# ---------------------------------------------------------------------------------------------
README_BEGIN = "<!-- plausible ranges: generated by python -m sweepgen.plausible; do not edit by hand -->"
README_END = "<!-- end of plausible ranges -->"


def markdown() -> str:
    """The README's tables of ranges (one per file kind), between its two marker lines."""
    lines = [README_BEGIN]
    for kind, table in RANGES.items():
        lines += ["", f"**{KIND_TITLES[kind]}**", "", "| key | plausible range | why |", "|---|---|---|"]
        for key, found in table.items():
            for rng in (found if isinstance(found, tuple) else (found,)):
                shown = rng.describe() + (f" (in {rng.unit})" if isinstance(found, tuple) else "")
                lines.append(f"| `{key}` | {shown} | {rng.reason} |")
    lines += ["", README_END]
    return "\n".join(lines)


def update_readme(path) -> bool:
    """Replace the table between the README's marker lines with :func:`markdown`; True if it changed."""
    from pathlib import Path

    path = Path(path)
    text = path.read_text(encoding="utf-8")
    begin, end = text.find(README_BEGIN), text.find(README_END)
    if begin < 0 or end < begin:
        raise SystemExit(f"{path}: no table of plausible ranges (marker lines) to replace")
    new = text[:begin] + markdown() + text[end + len(README_END):]
    path.write_text(new, encoding="utf-8")
    return new != text


if __name__ == "__main__":            # python -m sweepgen.plausible [README.md]: print, or update in place
    import sys

    if len(sys.argv) > 1:
        print(f"{sys.argv[1]}: {'updated' if update_readme(sys.argv[1]) else 'already up to date'}")
    else:
        print(markdown())
