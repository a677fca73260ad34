"""A measured frequency-versus-time trace against the planned sweep (``sweepgen compare``).

The trace (a wavemeter log, a beat-note counter, a cavity transmission trace
converted to frequency) is read by :mod:`sweepgen.measurements`: a ``time``
column and one of ``detuning``, ``frequency`` (absolute optical frequency: the
detuning is ``f − c/λ`` of the scenario's species, or ``f − f0`` with ``f0``
given) or ``beat`` (``Δ = reference + sign · beat``).

Its time axis is the instrument's own, so it is first aligned with the
schedule's (time 0 = the trigger):

* **cross-correlation** (default): the trace, resampled on a grid of
  :data:`BINS` points per period and folded onto one period, is correlated with
  the periodic plan (FFT, circular); the best few lags are then refined by
  least squares (the lag that minimises the mean squared difference);
* **a named marker**: the plan's event (``trigger``, ``chirp_start``,
  ``chirp_end``, ``return_start``, ``return_end``) happens at a given time of
  the trace, or at the first rising edge of its ``marker`` column.

The tracking error is ``measured − planned`` at the trace's samples; its
maximum and RMS during the chirp are compared with the checker's tracking
tolerance (``[drive] tracking_fraction`` × the smallest lag detuning).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from sweepgen._format import si
from sweepgen.errors import InputError, display_path
from sweepgen.timing import moments as timing_moments

#: grid points per period for the cross-correlation
BINS = 1 << 14
#: correlation peaks refined by least squares
CANDIDATES = 5
#: periods of the trace folded for the cross-correlation (the refinement uses the whole trace): a day's
#: trace on the fold's grid would be 10¹¹ points
FOLD_PERIODS = 64
#: a trace further from the chirp than this fraction of its span (RMS, at the best alignment) measures
#: another sweep (a laser that does not sweep at all is a ramp's RMS, span/√12 ≈ 0.29 span, from it)
MISFIT_FRACTION = 0.25
EVENTS = ("trigger", "chirp_start", "chirp_end", "return_start", "return_end")


@dataclass
class Trace:
    path: str
    time: np.ndarray           # s, the instrument's time axis
    detuning: np.ndarray       # Hz
    marker: np.ndarray | None
    measured: str              # which column: detuning | frequency | beat


@dataclass
class Comparison:
    trace: Trace
    lag: float                 # s: schedule time = trace time + lag
    alignment: dict
    planned: np.ndarray        # Hz at the trace's samples
    in_chirp: np.ndarray       # bool
    tolerance: float           # Hz
    stats: dict = field(default_factory=dict)

    @property
    def error(self) -> np.ndarray:
        return self.trace.detuning - self.planned

    @property
    def ok(self) -> bool:
        return self.stats["chirp_error_max"] <= self.tolerance


def read_trace(path, *, transition: float | None = None, reference: float | None = None,
               beat_sign: int = 1) -> Trace:
    """A measured trace from a file; detunings in Hz, times in s."""
    from sweepgen import measurements

    m = measurements.read(path)
    t = m.require("time", "s", "when each value was measured")
    col = m.find("detuning", "frequency", "beat")
    if col is None:
        m.require("detuning", "Hz", "the light's detuning at each time: detuning, frequency or beat")
    values = m.values(col, "Hz", f"{col.kind} of the light at each time")
    if col.kind == "frequency":
        if transition is None:
            raise InputError(f"{display_path(str(path))}: {col.label} holds absolute optical frequencies and no "
                             "transition frequency is known", key="transition")
        values = values - transition
    elif col.kind == "beat":
        if reference is None:
            raise InputError(f"{display_path(str(path))}: {col.label} holds beat notes; the reference laser's "
                             "detuning is needed", key="reference")
        values = reference + beat_sign * values
    order = np.argsort(t, kind="stable")
    t, values = t[order], values[order]
    if len(t) < 8 or not np.ptp(t) > 0:
        raise InputError(f"too few samples ({len(t)}) or no time span; a trace needs at least 8 samples over time",
                         file=str(path))
    marker = m.find("marker")
    return Trace(str(path), t, values, None if marker is None else marker.values[order], col.kind)


def event_time(schedule, event: str, plan=None) -> float:
    """Time of a named event (s after the trigger): the schedule's ``trigger``, ``chirp_start``,
    ``chirp_end``, ``return_start``, ``return_end``; with ``plan``, also the period's ``pulse`` and
    ``arrival`` (:func:`sweepgen.timing.moments`) and the rising edge of each of the scenario's own
    ``[timing.markers.NAME]`` (its moment plus its ``shift``), so that a trace that recorded a marker
    output is aligned by its name."""
    markers = {m.name: m for m in plan.scenario.timing.markers} if plan is not None else {}
    moments = timing_moments(plan) if plan is not None else {}
    if event in markers:
        m = markers[event]
        at = moments.get(m.at)
        if at is None:
            raise InputError(f"marker {event} is at '{m.at}', which this period does not have", key="marker")
        return at + m.shift
    if event in ("pulse", "arrival") and event in moments:
        if moments[event] is None:
            raise InputError(f"this period has no {event} (a continuous beam has none)", key="marker")
        return moments[event]
    if event not in EVENTS:
        known = list(EVENTS) + (["pulse", "arrival"] + sorted(markers) if plan is not None else [])
        raise InputError(f"expected one of {', '.join(known)}, got {event!r}", key="marker")
    if event == "trigger":
        return 0.0
    kind, edge = event.rsplit("_", 1)
    seg = schedule.segment(kind)
    if seg is None:
        raise InputError(f"the sweep has no {kind} segment", key="marker")
    return seg.start if edge == "start" else seg.end


def rising_edge(trace: Trace) -> float:
    """Time of the first rising edge of the trace's marker column (midway between its levels)."""
    if trace.marker is None:
        raise InputError(f"{display_path(trace.path)} has no marker column: give the event's time on the trace's "
                         "axis as well", key="marker_time")
    mk = trace.marker
    mid = 0.5 * (mk.min() + mk.max())
    up = np.flatnonzero((mk[1:] > mid) & (mk[:-1] <= mid))
    if mk.max() == mk.min() or up.size == 0:
        raise InputError(f"the marker column of {display_path(trace.path)} never rises: give the event's time on "
                         "the trace's axis as well", key="marker_time")
    i = int(up[0])
    f = (mid - mk[i]) / (mk[i + 1] - mk[i])
    return float(trace.time[i] + f * (trace.time[i + 1] - trace.time[i]))


def _mse(schedule, trace: Trace, lag: float) -> float:
    return float(np.mean((trace.detuning - schedule.detuning(trace.time + lag)) ** 2))


def align_xcorr(schedule, trace: Trace) -> tuple[float, dict]:
    """Lag (schedule time − trace time) by folded circular cross-correlation, refined by least squares.
    A periodic plan fixes it only modulo the period: it is given in ``[0, period)`` (a marker's lag, from
    a known moment, is the lag itself and may differ from it by whole periods)."""
    from scipy.optimize import minimize_scalar

    period = schedule.period
    h = period / BINS
    t0 = trace.time[0]
    grid = np.arange(t0, min(trace.time[-1], t0 + FOLD_PERIODS * period), h)
    m = np.interp(grid, trace.time, trace.detuning)
    phase = np.arange(len(grid)) % BINS
    # the mean trace over one period: a trace of 2.2 periods must not weigh a fifth of the period threefold
    count = np.bincount(phase, minlength=BINS)
    fold = np.bincount(phase, weights=m, minlength=BINS) / np.maximum(count, 1)
    fold[count > 0] -= fold[count > 0].mean()
    p = schedule.detuning(np.arange(BINS) * h)
    p -= p.mean()
    corr = np.fft.irfft(np.conj(np.fft.rfft(fold)) * np.fft.rfft(p), n=BINS)
    best = np.argsort(corr)[::-1][:CANDIDATES]
    results = []
    for j in best:
        coarse = (j * h - t0) % period
        r = minimize_scalar(lambda lag: _mse(schedule, trace, lag), bounds=(coarse - 2 * h, coarse + 2 * h),
                            method="bounded", options={"xatol": h * 1e-3})
        results.append((float(r.fun), float(r.x) % period))
    mse, lag = min(results)
    return lag, {"method": "cross-correlation", "lag": lag, "period": period, "grid_step": h,
                 "rms_at_lag": math.sqrt(mse)}


def compare(plan, trace: Trace, *, marker: str | None = None, marker_time: float | None = None,
            schedule=None) -> Comparison:
    """Align ``trace`` with the plan's schedule (or ``schedule``) and measure the tracking error."""
    from sweepgen.checker import tracking_tolerance

    sched = plan.schedule() if schedule is None else schedule
    if marker is not None:
        event = event_time(sched, marker, plan)    # a wrong event name is reported before the trace's marker
        at = rising_edge(trace) if marker_time is None else marker_time
        lag = event - at
        alignment = {"method": "marker", "event": marker, "trace_time": at, "lag": lag,
                     "from": "marker column" if marker_time is None else "given time"}
    else:
        lag, alignment = align_xcorr(sched, trace)
    t = trace.time + lag
    planned = sched.detuning(t)
    in_chirp = sched.kinds(t) == "chirp"
    if not np.any(in_chirp):
        raise InputError("the aligned trace holds no sample during the chirp; measure over the chirp "
                         "(or check the marker)", file=trace.path)
    cmp = Comparison(trace, lag, alignment, planned, in_chirp, tracking_tolerance(plan))
    err = cmp.error
    ec = err[in_chirp]
    i = int(np.argmax(np.abs(ec)))
    cmp.stats = {"samples": int(len(err)), "chirp_samples": int(in_chirp.sum()),
                 "chirp_error_max": float(np.abs(ec).max()), "chirp_error_at": float(t[in_chirp][i] % sched.period),
                 "chirp_error_rms": float(np.sqrt(np.mean(ec ** 2))), "chirp_error_mean": float(ec.mean()),
                 "error_max": float(np.abs(err).max()), "error_rms": float(np.sqrt(np.mean(err ** 2)))}
    _refuse_misfit(plan, cmp)
    return cmp


def _refuse_misfit(plan, cmp: Comparison) -> None:
    """Bad input, not a tracking failure: a trace that even at its best alignment stays further from
    the chirp (RMS) than :data:`MISFIT_FRACTION` of the chirp's span does not measure this plan."""
    rms, span = cmp.stats["chirp_error_rms"], abs(plan.chirp_span)
    if rms > MISFIT_FRACTION * span:
        raise InputError(f"the trace does not fit the planned sweep: at the best alignment ({cmp.alignment['method']}) "
                         f"it is {si(rms, 'Hz')} RMS from the chirp, {rms / span:.0%} of the chirp's span "
                         f"{si(span, 'Hz')}; is it a measurement of this scenario (its period and detunings), "
                         f"with the right marker, reference, beat sign or transition? (a laser that did not "
                         f"sweep at all looks like this too)",
                         file=cmp.trace.path, key=cmp.trace.measured)


def to_json(cmp: Comparison) -> dict:
    """The ``compare --json`` document (SI units, Hz for detunings)."""
    s = cmp.stats
    return {"ok": cmp.ok, "measured": cmp.trace.path, "measured_column": cmp.trace.measured,
            "alignment": cmp.alignment, "lag": cmp.lag, "tolerance": cmp.tolerance,
            "chirp_error_max": s["chirp_error_max"], "chirp_error_rms": s["chirp_error_rms"],
            "chirp_error_mean": s["chirp_error_mean"], "chirp_error_at": s["chirp_error_at"],
            "error_max": s["error_max"], "error_rms": s["error_rms"], "samples": s["samples"],
            "chirp_samples": s["chirp_samples"],
            "headroom": (cmp.tolerance - s["chirp_error_max"]) / cmp.tolerance}
