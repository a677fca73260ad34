"""Actuator response: closed-form step responses, scipy.signal references, the periodic steady state."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from sweepgen._config import Section
from sweepgen.errors import InputError
from sweepgen.response import Response, response_from_section, track

from conftest import examples


def held_step(response, rate, samples):
    """The steady-state response to a square wave of ``samples`` zeros then ``samples`` ones, over
    the ones: a step from rest once each half is long enough for the response to settle."""
    x = np.repeat([0.0, 1.0], samples)
    return response.steady_state(x, rate)[samples:]


def test_first_order_step_is_one_minus_exp():
    r = Response("first-order", corner=20e3)
    tau = 1 / (2 * math.pi * 20e3)
    t = np.linspace(0, 10 * tau, 501)
    # closed form of a single pole: 1 - exp(-t/τ) (textbook first-order system)
    assert np.allclose(r.step(t), 1 - np.exp(-t / tau), rtol=0, atol=1e-14)
    # the sampled (zero-order-hold) response to a held step is exact at the sample instants
    rate = 100 / tau
    y = held_step(r, rate, 4000)                       # 40 τ per half: the other half decays to e^-40
    ts = np.arange(4000) / rate
    assert np.allclose(y, 1 - np.exp(-ts / tau), rtol=0, atol=1e-12)


@pytest.mark.parametrize("q", [0.3, 0.5, 0.8, 5.0])
def test_second_order_step_matches_scipy_signal_step(q):
    r = Response("second-order", resonance=25e3, q=q)
    t = np.linspace(0, 40 / (2 * math.pi * 25e3) * max(q, 1), 2001)
    # reference implementation: scipy.signal.step of H(s) = ω0²/(s² + ω0/Q s + ω0²)
    w0 = 2 * math.pi * 25e3
    _, ref = signal.step(signal.lti([w0 ** 2], [1, w0 / q, w0 ** 2]), T=t)
    assert np.allclose(r.step(t), ref, atol=1e-6)
    # and the sampled response to a held step agrees at the samples (twice as long a hold: the
    # slow pole of Q = 0.3 is still 2e-6 from its end after the first)
    y = held_step(r, 1.0 / (t[1] - t[0]), 2 * t.size)[:t.size]
    assert np.allclose(y, ref, atol=1e-6)


def test_critically_damped_closed_form():
    r = Response("second-order", resonance=1e3, q=0.5)
    w0 = 2 * math.pi * 1e3
    t = np.linspace(0, 5e-3, 101)
    _, ref = signal.step(signal.lti([w0 ** 2], [1, 2 * w0, w0 ** 2]), T=t)   # scipy.signal reference
    assert np.allclose(r.step(t), ref, atol=1e-6)


@settings(max_examples=examples(30))
@given(corner=st.floats(min_value=1e3, max_value=1e6), slope=st.floats(min_value=1e6, max_value=1e12))
def test_ramp_lag_is_rate_times_tau(corner, slope):
    # final-value theorem for a ramp through 1/(1 + sτ): the lag tends to slope·τ (textbook)
    r = Response("first-order", corner=corner)
    tau = r.time_constant
    rate = 50 / tau
    n = 2000                                           # a sawtooth of 40 τ: the jump back has decayed
    t = np.arange(n) / rate
    y = r.steady_state(slope * t, rate)
    # a held ramp lags half a sample more than the continuous one
    lag = slope * t[-1] - y[-1]
    assert lag == pytest.approx(r.ramp_lag(slope) + slope / (2 * rate), rel=2e-3)


@pytest.mark.parametrize("model", [{"model": "second-order", "resonance": 25e3, "q": 0.8},
                                   {"model": "second-order", "resonance": 1.5e3, "q": 40.0},
                                   {"model": "second-order", "resonance": 1e3, "q": 0.5},
                                   {"model": "first-order", "corner": 20e3}])
@pytest.mark.parametrize("rate", [1e5, 8e6])
def test_zero_order_hold_agrees_with_scipy_signal(model, rate):
    r = Response(**model)
    theta = np.array([0.0, 1e-6, 1e-3, 0.1, 1.0, 3.0])
    # reference implementation: scipy.signal.cont2discrete (zero-order hold) of H(s), then freqz
    b, a, _ = signal.cont2discrete(r.transfer(), 1.0 / rate, method="zoh")
    _, ref = signal.freqz(np.squeeze(b), a, worN=theta)
    assert np.allclose(r.frequency_response(theta, rate), ref, rtol=1e-7, atol=0)


@pytest.mark.parametrize("model", [{"model": "second-order", "resonance": 1.5e3, "q": 40.0},
                                   {"model": "first-order", "corner": 1e3}])
def test_unit_dc_gain_at_any_sampling(model):
    # H(s = 0) = 1 for both models, so the held, sampled system passes a constant drive unchanged
    # however fast it is sampled (where e^{AT} rounds towards the identity)
    r = Response(**model)
    for rate in (1e4, 1e8, 1e11):
        assert abs(r.frequency_response(np.array([0.0]), rate)[0] - 1.0) < 1e-12
    x = np.full(1000, 7.5)
    x[0] = -2.5                                        # a large offset from the first value
    assert np.allclose(r.steady_state(x, 1e11)[1:].mean(), 7.5 - 10.0 / 1000, rtol=1e-9)


@pytest.mark.parametrize("model", [{"model": "second-order", "resonance": 5e3, "q": 30.0},
                                   {"model": "first-order", "corner": 100.0}])
def test_periodic_steady_state_repeats(model):
    r = Response(**model)
    rate = 1e6
    n = 500                                     # a 0.5 ms period, far shorter than the ringing or decay
    assert r.time_constant > 3 * n / rate       # (2Q/ω0 = 1.9 ms; 1/ω_c = 1.6 ms)
    x = np.where(np.arange(n) < n // 2, 1.0, -1.0)
    y = r.steady_state(x, rate)
    # two periods have the same steady state, twice
    y2 = r.steady_state(np.concatenate([x, x]), rate)
    assert np.allclose(y, y2[:n], atol=1e-9) and np.allclose(y, y2[n:], atol=1e-9)
    # reference implementation: scipy.signal.lsim (zero-order hold) started at rest and run until the
    # start-up transient has decayed (e^-40); its last period is the steady state
    num, den = r.transfer()
    periods = int(np.ceil(40 * r.time_constant * rate / n))
    u = np.tile(x, periods) - x[0]
    _, ref, _ = signal.lsim(signal.lti(num, den), u, np.arange(u.size) / rate, interp=False)
    assert np.allclose(y, ref[-n:] + x[0], atol=1e-6)
    # and scipy.signal.lfilter of the discretised filter, from rest over as many periods
    b, a, _ = signal.cont2discrete((num, den), 1.0 / rate, method="zoh")
    ref = signal.lfilter(np.squeeze(b), a, u)
    assert np.allclose(y, ref[-n:] + x[0], atol=1e-9)
    assert np.allclose(Response().steady_state(x, rate), x)


def test_response_section_parsing():
    r = response_from_section(Section({"model": "second-order", "resonance": "25 kHz", "q": 0.8}, "l.toml",
                                      "response", kind="laser"))
    assert r.resonance == 25e3 and r.q == 0.8
    assert response_from_section(None).model == "none"
    with pytest.raises(InputError, match="response.corner"):
        response_from_section(Section({"model": "first-order"}, "l.toml", "response", kind="laser"))
    with pytest.raises(InputError, match="response.q"):
        response_from_section(Section({"model": "second-order", "resonance": "1 kHz", "q": -1}, "l.toml",
                                      "response", kind="laser"))


def test_simulate_ideal_actuator_follows_the_schedule():
    from sweepgen.chain import AnalogStage, Chain
    from sweepgen.planner import plan
    from sweepgen.scenario import load_scenario

    sched = plan(load_scenario("na23-continuous-focused")).schedule()
    chain = Chain([AnalogStage("in", 100e6, -400e6, 0.0, "V")])
    tr = track(sched, chain, Response(), 2e6)
    assert np.allclose(tr.actual, tr.planned, atol=1e-3)
    assert tr.time.size == round(sched.period * 2e6)
