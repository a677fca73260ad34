"""compare: a synthetic measured trace with a known lag, noise and an injected tracking error
(invented demo data) against the planned sweep."""

import numpy as np
import pytest
from scipy import constants

from sweepgen.compare import Trace, compare, read_trace, to_json
from sweepgen.errors import InputError
from sweepgen.planner import plan
from sweepgen.scenario import load_scenario


@pytest.fixture(scope="module")
def planned():
    p = plan(load_scenario("rb87-chopped-oven"))
    return p, p.schedule()


def synthetic(schedule, lag, *, error=0.0, noise=50e3, seed=1, rate=500e3, span=0.045):
    """A trace on the instrument's axis: schedule time = trace time + lag."""
    rng = np.random.default_rng(seed)
    t = np.arange(0.0, span, 1 / rate) + 0.37        # the instrument's clock starts anywhere
    det = schedule.detuning(t + lag) + rng.normal(0, noise, t.size)
    chirp = schedule.segment("chirp")
    mid = 0.5 * (chirp.start + chirp.end)
    bump = np.abs(((t + lag) % schedule.period) - mid) < 0.2e-3     # 0.4 ms into the middle of the chirp
    det[bump] += error
    return Trace("synthetic", t, det, None, "detuning"), bump


def test_cross_correlation_finds_a_known_lag(planned):
    p, s = planned
    trace, _ = synthetic(s, lag=0.0123 - 0.37)
    cmp = compare(p, trace)
    off = (cmp.lag - (0.0123 - 0.37) + s.period / 2) % s.period - s.period / 2      # lags modulo the period
    assert off == pytest.approx(0.0, abs=1e-7)                                       # 0.1 µs of 20 ms
    # only the noise is left: RMS 50 kHz (the generating sigma), well inside the tolerance
    assert cmp.stats["chirp_error_rms"] == pytest.approx(50e3, rel=0.1)
    assert cmp.ok


def test_an_injected_tracking_error_is_caught(planned):
    p, s = planned
    cmp0 = compare(p, synthetic(s, lag=0.004)[0])
    tol = cmp0.tolerance
    trace, bump = synthetic(s, lag=0.004, error=1.5 * tol)
    cmp = compare(p, trace)
    assert not cmp.ok
    assert cmp.stats["chirp_error_max"] == pytest.approx(1.5 * tol, abs=5 * 50e3)
    at = cmp.stats["chirp_error_at"] % s.period
    chirp = s.segment("chirp")
    assert abs(at - 0.5 * (chirp.start + chirp.end)) <= 0.2e-3
    doc = to_json(cmp)
    assert doc["ok"] is False and doc["headroom"] < 0


def test_marker_alignment(planned, tmp_path):
    p, s = planned
    rng = np.random.default_rng(2)
    t = np.arange(0, 0.03, 2e-6)
    lag = -0.005                                    # the trigger comes at trace time 5 ms
    det = s.detuning(t + lag) + rng.normal(0, 30e3, t.size)
    marker = ((t + lag) % s.period < 1e-4).astype(float)
    path = tmp_path / "trace.csv"
    f0 = constants.c / 780.241209686e-9               # the species' transition: c/λ (rb87-d2)
    path.write_text("time (ms),frequency (GHz),marker\n"
                    + "".join(f"{a * 1e3:.6f},{(f0 + d) / 1e9:.9f},{m:g}\n" for a, d, m in zip(t, det, marker)))
    trace = read_trace(path, transition=f0)
    cmp = compare(p, trace, marker="trigger")
    assert cmp.lag == pytest.approx(lag, abs=2e-6)
    cmp2 = compare(p, trace, marker="chirp_start", marker_time=s.segment("chirp").start - lag)
    assert cmp2.lag == pytest.approx(lag, abs=1e-12)
    assert cmp.ok and cmp2.ok
    # the same trace by cross-correlation: the lag modulo the period, in [0, period), and said so
    cmp3 = compare(p, trace)
    assert cmp3.alignment["period"] == s.period and 0 <= cmp3.lag < s.period
    assert cmp3.lag == pytest.approx(lag % s.period, abs=2e-6)
    with pytest.raises(InputError, match="transition"):
        read_trace(path)


def test_a_trace_that_spans_a_day_is_folded_in_bounded_memory(planned):
    # three periods of samples and one more a day later: the fold's grid (period / 16384) over the
    # whole span would be 7·10¹⁰ points (525 GiB); the fold takes the first FOLD_PERIODS periods
    import tracemalloc

    p, s = planned
    trace, _ = synthetic(s, lag=0.004, span=0.06)
    t = np.append(trace.time, trace.time[0] + 86000.0)
    det = np.append(trace.detuning, s.detuning(t[-1:] + 0.004))
    tracemalloc.start()
    try:
        cmp = compare(p, Trace("day", t, det, None, "detuning"))
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 200 << 20
    off = (cmp.lag - 0.004 + s.period / 2) % s.period - s.period / 2
    assert off == pytest.approx(0.0, abs=1e-7) and cmp.ok


def test_a_scenarios_own_marker_and_the_periods_moments_align_a_trace(planned):
    # a trace whose marker column recorded the scenario's marker output: it rises at the marker's moment
    # plus its shift (here 10 us before the arrival), and the trace is aligned by that marker's name
    import dataclasses

    from sweepgen.timing import Marker, moments

    p, s = planned
    mark = Marker("bunch", "arrival", -10e-6, 20e-6, 4, 3.3)
    sc = dataclasses.replace(p.scenario, timing=dataclasses.replace(p.scenario.timing, markers=(mark,)))
    pm = plan(sc)
    rises = moments(pm)["arrival"] - 10e-6                     # on the trigger's axis
    lag = 0.004
    trace = synthetic(s, lag=lag)[0]
    at = rises - lag                                           # on the trace's axis (trace time = trigger time - lag)
    assert compare(pm, trace, marker="bunch", marker_time=at).lag == pytest.approx(lag, abs=1e-12)
    assert compare(pm, trace, marker="arrival", marker_time=at + 10e-6).lag == pytest.approx(lag, abs=1e-12)
    assert compare(pm, trace, marker="pulse", marker_time=sc.pulse_time - lag).lag == pytest.approx(lag, abs=1e-12)
    with pytest.raises(InputError, match="bunch"):
        compare(pm, trace, marker="bunches", marker_time=at)   # the error lists the scenario's marker names
