"""The schedule: segments over one period, periodic, smooth return."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sweepgen.errors import PlanError
from sweepgen.planner import plan

from conftest import examples, make_scenario


@pytest.fixture(scope="module")
def pulsed():
    p = plan(make_scenario())
    return p, p.schedule()


def test_segments_in_order_and_cover_the_period(pulsed):
    p, s = pulsed
    kinds = [seg.kind for seg in s.segments]
    assert kinds == ["rest", "chirp", "hold", "return", "rest"]
    assert s.segments[0].start == 0.0 and s.segments[-1].end == pytest.approx(20e-3)
    for a, b in zip(s.segments, s.segments[1:]):
        assert a.end == pytest.approx(b.start)
    assert s.segment("chirp").start == pytest.approx(p.chirp_start)
    assert s.segment("chirp").duration == pytest.approx(p.chirp_duration)
    assert s.segment("hold").duration == pytest.approx(0.5e-3)
    assert s.segment("return").duration == pytest.approx(0.3e-3)


def test_values_at_segment_edges(pulsed):
    p, s = pulsed
    chirp, hold, ret = s.segment("chirp"), s.segment("hold"), s.segment("return")
    assert s.detuning(0.0) == pytest.approx(p.start_detuning)
    assert s.detuning(chirp.start) == pytest.approx(p.start_detuning)
    assert s.detuning(chirp.end) == pytest.approx(p.end_detuning)
    assert s.detuning((hold.start + hold.end) / 2) == pytest.approx(p.end_detuning)
    assert s.detuning(ret.end) == pytest.approx(p.start_detuning)
    # the return is smooth: zero slope at both ends, monotone in between
    assert s.chirp_rate(ret.start + 1e-12) == pytest.approx(0.0, abs=1e-3 * abs(p.chirp_span) / ret.duration)
    assert s.chirp_rate(ret.end - 1e-12) == pytest.approx(0.0, abs=1e-3 * abs(p.chirp_span) / ret.duration)
    t = np.linspace(ret.start, ret.end, 1001)
    assert np.all(np.diff(s.detuning(t)) <= 0)
    # largest return rate of the cubic smooth step 3x²−2x³ is 1.5·span/T
    assert s.max_abs_chirp_rate("return") == pytest.approx(1.5 * p.chirp_span / ret.duration, rel=1e-6)


def test_continuity_everywhere(pulsed):
    _, s = pulsed
    for x in s.breakpoints[1:-1]:
        left, right = s.detuning(x - 1e-12), s.detuning(x + 1e-12)
        assert left == pytest.approx(right, abs=1.0)   # Hz, across every piece boundary


@settings(max_examples=examples(40))
@given(t=st.floats(-1.0, 1.0), k=st.integers(-50, 50))
def test_periodic(pulsed, t, k):
    _, s = pulsed
    assert s.detuning(t + k * s.period) == pytest.approx(s.detuning(t), abs=1e-3)


def test_vectorised_shapes(pulsed):
    _, s = pulsed
    t = np.linspace(0, 0.05, 12).reshape(3, 4)
    assert s.detuning(t).shape == (3, 4)
    assert s.kinds(t).shape == (3, 4)
    # the kind at each segment's midpoint, also one period later
    mids = np.array([(seg.start + seg.end) / 2 for seg in s.segments])
    expected = [seg.kind for seg in s.segments]
    assert list(s.kinds(mids)) == expected
    assert list(s.kinds(mids + s.period)) == expected


def test_period_too_short_is_refused():
    p = plan(make_scenario(chirp={"period": "5 ms"}))
    with pytest.raises(PlanError) as info:
        p.schedule()
    assert "chirp.period" in str(info.value) and "6.933 ms" in str(info.value)


def test_zero_hold_and_continuous_source_start_with_the_chirp():
    sc = make_scenario(source={"pulse_time": None}, chirp={"start_time": None, "hold": "0 s"})
    s = plan(sc).schedule()
    assert [seg.kind for seg in s.segments] == ["chirp", "return", "rest"]


def test_the_schedule_evaluates_its_pieces_as_scipy_does(pulsed):
    from scipy.interpolate import CubicHermiteSpline, PPoly

    p, s = pulsed
    tr = p.trajectory
    # reference implementation: scipy.interpolate, the same numbers to the last bit
    chirp = CubicHermiteSpline(tr.time + p.chirp_start, tr.detuning, tr.chirp_rate)
    first = int(np.searchsorted(s.breakpoints, p.chirp_start))
    assert np.array_equal(s.coefficients[:, first:first + chirp.c.shape[1]], chirp.c)
    ppoly = PPoly(s.coefficients, s.breakpoints)
    t = np.concatenate([np.random.default_rng(3).uniform(-0.05, 0.05, 5000), s.breakpoints])
    wrapped = np.mod(t, s.period)
    assert np.array_equal(s.detuning(t), ppoly(wrapped))
    assert np.array_equal(s.chirp_rate(t), ppoly.derivative()(wrapped))
    assert all(s.detuning(float(v)) == s.detuning(np.array([v]))[0] for v in t[::50])
    assert np.array_equal(s.poly.c, s.coefficients)        # the PPoly, for those who ask
