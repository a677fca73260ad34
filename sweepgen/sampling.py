"""Sampling the sweep in time (the generator's sample rate) and in value (its codes).

Time
    :func:`choose_sample_rate` picks the sample rate. Fixed by the user
    (``[drive] sample_rate`` in the scenario, or ``--rate``), or automatic: the
    lowest rate that keeps the detuning change per sample at most half the
    tolerance (``[drive] max_step``; default :data:`DEFAULT_STEP_FRACTION` of the
    natural linewidth), rounded up to a 1-2-2.5-4-5-8 value, and never above the
    generator's maximum rate or the rate at which one period still fits in its
    memory. When the generator plays any rate in a range, the rate is then
    nudged so that one period is a whole number of samples and a multiple of the
    record granularity (``sample_rate = period_count / period`` exactly). When it plays
    only listed rates, ``period_count = round(period · rate)`` and the table
    lasts ``period_count / sample_rate``, off the period by less than half a sample
    (reported as ``period_error``); the record is padded up to the granularity
    and minimum length (``count − period_count`` samples, which the renderer
    fills with the period's first value, the start detuning: play such a table
    triggered once per period).

Value
    :func:`quantisation` maps drive values to integer codes,
    ``drive = code_offset + code_scale · code``, with ``drive`` in actuator
    units: the real volts AT THE ACTUATOR (after the generator's
    ``delivered_factor``) or Hz. Voltage outputs use signed DAC codes with full
    scale ``±(2^(bits−1) − 1)`` (dtype ``<i2``, or ``<i4`` above 16 bits); the
    programmed amplitude (V peak-to-peak) and offset are chosen so the sweep
    fills the DAC range. Frequency outputs use DDS frequency tuning words
    ``FTW = round(f · 2^N / f_clock)`` (common practice; dtype ``<u4``, or
    ``<u8`` above 32 bits).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sweepgen._format import si
from sweepgen.errors import CheckFailed

#: Default tolerance on the detuning change per sample and per code: this
#: fraction of the natural linewidth Γ/2π (a step well inside the line does not
#: kick the design atom off the Lorentzian).
DEFAULT_STEP_FRACTION = 0.1
#: Tolerance used when no linewidth is known (Hz): a design choice of this tool,
#: 0.1 × a 10 MHz line, the order of the alkali D lines' natural widths.
FALLBACK_STEP = 1.0e6
#: Automatic rates aim at steps of at most tolerance / STEP_DIVISOR.
STEP_DIVISOR = 2.0
_NICE = (1.0, 2.0, 2.5, 4.0, 5.0, 8.0, 10.0)


@dataclass(frozen=True)
class SampleRateChoice:
    """The decision about the sample rate: the rate, the record length, its padding and why (SI units)."""

    sample_rate: float       # samples/s
    period_count: int        # samples covering one period
    count: int               # samples in the record (padded to granularity and min_length)
    limited_by: str          # which limit decided the rate
    reason: str              # one sentence for people
    max_step: float          # Hz, detuning tolerance per sample used
    step: float              # Hz, largest detuning change per sample at this rate
    period_error: float = 0.0  # s, period_count/sample_rate − period

    @property
    def padding(self) -> int:
        return self.count - self.period_count


def step_tolerance(drive_options, linewidth: float | None = None) -> tuple[float, str]:
    """``(tolerance in Hz, where it comes from)`` for the detuning step per sample / code."""
    if drive_options is not None and getattr(drive_options, "max_step", None):
        return float(drive_options.max_step), "drive.max_step"
    if linewidth:
        return DEFAULT_STEP_FRACTION * linewidth, f"default: {DEFAULT_STEP_FRACTION:g} × natural linewidth"
    return FALLBACK_STEP, "default"


def _nice_up(x: float) -> float:
    """The smallest 1-2-2.5-4-5-8 × 10^k value at or above ``x``."""
    if x <= 0:
        return x
    exp = math.floor(math.log10(x))
    for m in _NICE:
        v = m * 10.0 ** exp
        if v >= x * (1 - 1e-12):
            return v
    return 10.0 ** (exp + 1)


def _pad(n: int, sampling) -> int:
    g = sampling.granularity
    n = max(n, sampling.min_length)
    return -(-n // g) * g


def choose_sample_rate(schedule, chain, generator, drive_options, *, linewidth: float | None = None,
                       strict: bool = True, sample_rate: float | None = None) -> SampleRateChoice:
    """Choose the sample rate and record length for one period of ``schedule``.

    Parameters
    ----------
    schedule : sweepgen.schedule.Schedule
    chain : sweepgen.chain.Chain
        Not needed for the rate itself; kept so callers pass the whole context.
    generator : sweepgen.generator.Generator
    drive_options : sweepgen.scenario.Drive
        ``sample_rate`` (None: automatic) and ``max_step`` (None: default).
    linewidth : float, optional
        Natural linewidth Γ/2π (Hz) for the default step tolerance.
    strict : bool
        Raise :class:`CheckFailed` when a fixed rate is not playable (not a rate
        of the generator, or the period does not fit in memory). The checker
        passes False and reports those as failed rules instead.
    sample_rate : float, optional
        Overrides ``drive_options.sample_rate`` (the ``--rate`` option).

    Raises
    ------
    CheckFailed
        No rate satisfies both the step tolerance and the generator; the
        message says which limit wins.
    """
    sm = generator.sampling
    tol, tol_src = step_tolerance(drive_options, linewidth)
    demand = _Demand(schedule.period, schedule.max_abs_chirp_rate(), tol, tol_src)
    fixed = sample_rate if sample_rate is not None else getattr(drive_options, "sample_rate", None)
    if fixed is not None:
        return _fixed_choice(fixed, "--rate" if sample_rate is not None else "drive.sample_rate", demand,
                             generator, strict)
    if sm.rates is None:
        chosen, period_count, limited = _sample_rate_in_range(demand, generator)
    else:
        chosen, period_count, limited = _listed_sample_rate(demand, generator)
    count = _pad(period_count, sm)
    step = demand.chirp_rate / chosen
    err = period_count / chosen - demand.period
    reason = (f"{si(chosen, 'Sa/s', 6)}: steps of at most {step / 1e3:.4g} kHz per sample (tolerance "
              f"{tol / 1e3:.4g} kHz, {tol_src}); {period_count} samples per period"
              + (f", padded to {count}" if count != period_count else "")
              + (f"; the table lasts {err * 1e9:+.3g} ns longer than the period"
                 if abs(err) > 1e-12 * demand.period else "") + f"; decided by the {limited}")
    return SampleRateChoice(chosen, period_count, count, limited, reason, tol, step, err)


@dataclass(frozen=True)
class _Demand:
    """What the sweep asks of the sample rate: the detuning step per sample stays within ``tolerance``."""

    period: float            # s
    chirp_rate: float        # Hz/s, the largest |dΔ/dt| over the period
    tolerance: float         # Hz per sample
    source: str              # where the tolerance comes from

    @property
    def need(self) -> float:
        """The lowest rate (Sa/s) that keeps the step within the tolerance."""
        return self.chirp_rate / self.tolerance if self.chirp_rate > 0 else 0.0

    def memory_sample_rate(self, sm) -> float:
        """The fastest rate at which one period (a whole number of granules) fits in the memory."""
        return (sm.memory // sm.granularity) * sm.granularity / self.period


def _fixed_choice(fixed: float, src: str, demand: _Demand, generator, strict: bool) -> SampleRateChoice:
    """A rate the person fixed; ``strict`` refuses one the generator does not play or hold."""
    sm, period = generator.sampling, demand.period
    n = max(int(round(period * fixed)), 1)
    count = _pad(n, sm)
    if strict and not sm.allows(fixed):
        allowed = (", ".join(si(r, "Sa/s", 6) for r in sm.rates) if sm.rates
                   else f"{si(sm.rate_min, 'Sa/s', 6)} to {si(sm.rate_max, 'Sa/s', 6)}")
        raise CheckFailed(f"{src} = {si(fixed, 'Sa/s', 6)} is not a rate generator '{generator.key}' plays "
                          f"({allowed})")
    if strict and count > sm.memory:
        raise CheckFailed(f"at {src} = {si(fixed, 'Sa/s', 6)} one period needs {count} samples but generator "
                          f"'{generator.key}' holds {sm.memory}; lower the rate to at most "
                          f"{si(sm.memory / period, 'Sa/s', 6)}")
    return SampleRateChoice(fixed, n, count, f"fixed by {src}", f"rate fixed by {src}", demand.tolerance,
                            demand.chirp_rate / fixed, n / fixed - period)


def _sample_rate_in_range(demand: _Demand, generator) -> tuple[float, int, str]:
    """``(rate, period_count, deciding limit)`` on a generator that plays any rate in a range:
    the rounded-up rate with room (:data:`STEP_DIVISOR`), nudged to a whole number of granules per period."""
    sm, period, need = generator.sampling, demand.period, demand.need
    mem_rate = demand.memory_sample_rate(sm)
    upper = min(sm.rate_max, mem_rate)
    lower = max(need, sm.rate_min, sm.min_length / period)
    if lower > upper * (1 + 1e-12):
        raise CheckFailed(_no_rate_message(demand, sm, generator))
    target = max(need * STEP_DIVISOR, sm.rate_min, sm.min_length / period)
    chosen = _nice_up(target)
    limited = ("detuning step tolerance" if target == need * STEP_DIVISOR else
               "generator minimum rate" if target == sm.rate_min else "generator minimum record length")
    if chosen > upper:
        chosen = upper
        limited = "generator memory" if mem_rate < sm.rate_max else "generator maximum rate"
    # a whole number of samples per period, a multiple of the granularity
    g = sm.granularity
    n = math.ceil(round(period * chosen, 6) / g) * g
    if n / period > upper * (1 + 1e-12):
        n = math.floor(round(period * chosen, 6) / g) * g
    if n >= 1 and lower * (1 - 1e-12) <= n / period <= upper * (1 + 1e-12):
        chosen = n / period
    else:
        n = max(int(round(period * chosen)), 1)
    return chosen, n, limited


def _listed_sample_rate(demand: _Demand, generator) -> tuple[float, int, str]:
    """``(rate, period_count, deciding limit)`` on a generator that plays only listed rates: the
    slowest with room whose period fits in memory, else the fastest that fits."""
    sm, period, need = generator.sampling, demand.period, demand.need
    fits = [r for r in sm.rates if _pad(max(int(round(period * r)), 1), sm) <= sm.memory]
    good = [r for r in fits if r >= need * (1 - 1e-12)]
    if not good:
        raise CheckFailed(_no_rate_message(demand, sm, generator))
    comfy = [r for r in good if r >= need * STEP_DIVISOR]
    chosen = comfy[0] if comfy else good[-1]
    limited = ("detuning step tolerance" if chosen == good[0] and need > 0 else
               "generator's listed rates")
    if not comfy and len(good) and good[-1] == chosen and chosen != sm.rates[-1]:
        limited = "generator memory"
    return chosen, max(int(round(period * chosen)), 1), limited


def _no_rate_message(demand: _Demand, sm, generator) -> str:
    need, period, mem_rate = demand.need, demand.period, demand.memory_sample_rate(sm)
    top = sm.rates[-1] if sm.rates else sm.rate_max
    head = (f"no sample rate of generator '{generator.key}' plays this sweep: keeping the detuning step "
            f"below {demand.tolerance / 1e3:.4g} kHz ({demand.source}) at |dΔ/dt| up to "
            f"{demand.chirp_rate:.4g} Hz/s needs at least {si(need, 'Sa/s', 6)}")
    if need > top and top <= mem_rate:
        return head + (f", but its fastest rate is {si(top, 'Sa/s', 6)} (the rate limit wins); raise "
                       f"drive.max_step, lengthen chirp.return_time, or use a faster generator")
    if need > mem_rate:
        return head + (f", but one period of {period * 1e3:.4g} ms fits in its memory of {sm.memory} samples "
                       f"only up to {si(mem_rate, 'Sa/s', 6)} (the memory wins); shorten chirp.period, raise "
                       f"drive.max_step, or use a generator with more memory")
    return head + (f"; its rates ({si(sm.rate_min, 'Sa/s', 6)} and up) overflow its memory of {sm.memory} "
                   f"samples for a period of {period * 1e3:.4g} ms (the memory wins)")


# ----------------------------------------------------------------------------------
@dataclass(frozen=True)
class Quantisation:
    """How drive values (actuator units) become generator codes: ``drive = code_offset + code_scale·code``."""

    output: str               # "voltage" | "frequency"
    drive_unit: str           # "V" (at the actuator) | "Hz"
    dtype: str                # NumPy dtype string of the codes
    code_scale: float         # drive units per code
    code_offset: float        # drive units at code 0
    code_min: int             # smallest code the table may hold (the sweep's own lowest drive)
    code_max: int
    full_scale: int           # largest |code| of the DAC, or the largest DDS word
    bits: int
    amplitude: float | None = None     # V peak-to-peak to program (voltage outputs)
    offset: float | None = None        # V offset to program (voltage outputs)
    delivered_factor: float = 1.0      # actuator volts per programmed volt


def _round_sig(x: float, digits: int, how) -> float:
    if x == 0 or not math.isfinite(x):
        return x
    scale = 10.0 ** (digits - 1 - math.floor(math.log10(abs(x))))
    return how(x * scale) / scale


def quantisation(drive_min: float, drive_max: float, generator, chain) -> Quantisation:
    """The code mapping that plays drives in ``[drive_min, drive_max]`` on ``generator``.

    Raises
    ------
    CheckFailed
        The chain and the output do not match (volts vs frequency), or the drive
        range leaves the actuator's safe input range (``chain.safe_min/max``) or
        the generator's output range at the real load.
    """
    out = generator.output
    if not drive_max >= drive_min:
        raise ValueError("drive_max below drive_min")
    want = "voltage" if chain.drive_unit == "V" else "frequency"
    if out.kind != want:
        raise CheckFailed(f"the laser's chain ends in {chain.drive_unit} but generator '{generator.key}' has a "
                          f"{out.kind} output; use a generator with a {want} output")
    unit = chain.drive_unit
    if chain.safe_min is not None and (drive_min < chain.safe_min or drive_max > chain.safe_max):
        raise CheckFailed(f"the drive spans {drive_min:.6g} to {drive_max:.6g} {unit}, outside the actuator's "
                          f"safe input range {chain.safe_min:.6g} to {chain.safe_max:.6g} {unit}")
    if out.kind == "voltage":
        k = out.delivered_factor
        lo_p, hi_p = drive_min / k, drive_max / k
        rel = 1e-9 * max(abs(out.range_min), abs(out.range_max))
        if lo_p < out.range_min - rel or hi_p > out.range_max + rel:
            raise CheckFailed(f"the drive needs {lo_p:.6g} to {hi_p:.6g} V programmed ({drive_min:.6g} to "
                              f"{drive_max:.6g} V at the actuator, ×{k:g} at the real load) but generator "
                              f"'{generator.key}' outputs {out.range_min:g} to {out.range_max:g} V")
        bits = out.dac_bits
        fs = 2 ** (bits - 1) - 1
        dtype = "<i2" if bits <= 16 else "<i4"
        offset = _round_sig(0.5 * (lo_p + hi_p), 4, round)
        half = max(hi_p - offset, offset - lo_p)
        floor = 1e-6 * max(abs(out.range_max - out.range_min), 1.0)   # a flat sweep still gets a window
        amplitude = _round_sig(max(2.0 * half, floor), 4, math.ceil)
        room = 2.0 * min(offset - out.range_min, out.range_max - offset)
        if amplitude > room:
            # the rounded window would reach past the output range (a sweep using nearly all of it):
            # centre the window exactly on the sweep, so the programmed window stays inside the range
            offset = 0.5 * (lo_p + hi_p)
            amplitude = max(hi_p - lo_p, floor)
        if out.amplitude_max is not None:
            offset, amplitude = _separate_limits(lo_p, hi_p, offset, amplitude, generator)
        scale = amplitude * k / (2.0 * fs)
        off = offset * k
        cmin = int(np.rint((drive_min - off) / scale))
        cmax = int(np.rint((drive_max - off) / scale))
        return Quantisation("voltage", unit, dtype, scale, off, max(cmin, -fs), min(cmax, fs), fs, bits,
                            amplitude, offset, k)
    # frequency output: DDS words
    if drive_min < out.range_min or drive_max > out.range_max:
        raise CheckFailed(f"the drive spans {drive_min / 1e6:.6g} to {drive_max / 1e6:.6g} MHz but generator "
                          f"'{generator.key}' synthesises {out.range_min / 1e6:g} to {out.range_max / 1e6:g} MHz")
    bits = out.word_bits
    scale = out.clock / 2.0 ** bits
    dtype = "<u4" if bits <= 32 else "<u8"
    cmin = int(np.rint(drive_min / scale))
    cmax = int(np.rint(drive_max / scale))
    return Quantisation("frequency", unit, dtype, scale, 0.0, cmin, cmax, 2 ** bits - 1, bits)


def _separate_limits(lo_p: float, hi_p: float, offset: float, amplitude: float, generator) -> tuple[float, float]:
    """``(offset, amplitude)`` within an output's separate limits (``amplitude_max`` peak-to-peak,
    ``|offset| <= offset_max``), covering the programmed window ``[lo_p, hi_p]``: the rounded
    ``(offset, amplitude)`` given when they fit, else :func:`amplitude_window`; refused otherwise."""
    out = generator.output
    a_max, o_max = out.amplitude_max, out.offset_max
    slack = 1e-12 * max(a_max, 1.0)
    if abs(offset) <= o_max + slack and amplitude <= a_max + slack:
        return offset, amplitude
    offset, amplitude = amplitude_window(lo_p, hi_p, out)
    if amplitude > a_max + slack:
        raise CheckFailed(f"generator '{generator.key}': " + amplitude_text(lo_p, hi_p, offset, amplitude, out))
    return offset, amplitude


def amplitude_window(lo_p: float, hi_p: float, output) -> tuple[float, float]:
    """``(offset, amplitude)``: the narrowest window (V programmed; amplitude peak-to-peak) that covers
    ``[lo_p, hi_p]`` with its offset within ``±output.offset_max``.

    The offset is the drive's centre where the limit allows it, else the limit nearest the centre;
    the amplitude is twice the larger distance from that offset to an end of the drive (at least
    ``1e-6 · amplitude_max``, so that a flat drive still gets a window). The output plays the drive
    when the amplitude is at most ``output.amplitude_max``: the checker's ``generator_amplitude`` rule
    judges this value, and :func:`quantisation` refuses a drive that needs more.
    """
    o_max = output.offset_max
    offset = min(max(0.5 * (lo_p + hi_p), -o_max), o_max) + 0.0          # + 0.0: no -0 V at a zero limit
    amplitude = max(2.0 * max(hi_p - offset, offset - lo_p), 1e-6 * output.amplitude_max)
    return offset, amplitude


def amplitude_text(lo_p: float, hi_p: float, offset: float, amplitude: float, output, keys: str = "output") -> str:
    """The amplitude a drive ``[lo_p, hi_p]`` (V programmed) needs about ``offset`` (from
    :func:`amplitude_window`), in words, naming the profile keys ``{keys}.amplitude_max`` and
    ``{keys}.offset_max``."""
    centre = 0.5 * (lo_p + hi_p)
    where = (f"centred on it at {offset:.6g} V, within {keys}.offset_max ±{output.offset_max:g} V"
             if offset == centre else
             f"about an offset of {offset:.6g} V, the nearest its centre ({centre:.6g} V) that {keys}.offset_max "
             f"±{output.offset_max:g} V allows")
    return (f"the drive needs {lo_p:.6g} to {hi_p:.6g} V programmed: {amplitude:.6g} V peak-to-peak {where}; "
            f"the output plays at most {output.amplitude_max:g} V peak-to-peak ({keys}.amplitude_max)")


def drive_to_codes(drive, q: Quantisation) -> np.ndarray:
    """Codes for drive values (rounded to nearest); raises :class:`CheckFailed` rather than clip."""
    drive = np.asarray(drive, dtype=float)
    codes = np.rint((drive - q.code_offset) / q.code_scale)
    bad = ~np.isfinite(codes) | (codes < q.code_min) | (codes > q.code_max)
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise CheckFailed(f"drive value {drive[i]:.6g} {q.drive_unit} (sample {i}) maps to code {codes[i]:.0f}, "
                          f"outside the checked window {q.code_min}..{q.code_max}; refusing to clip")
    return codes.astype(q.dtype)


def codes_to_drive(codes, q: Quantisation) -> np.ndarray:
    """Drive values (actuator units) the codes play: ``code_offset + code_scale · code``."""
    return q.code_offset + q.code_scale * np.asarray(codes, dtype=float)
