"""Rendering the schedule into generator codes: exact ranges, streaming, padding, safety."""

from __future__ import annotations

import dataclasses
import math
import tracemalloc

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy.interpolate import PPoly

from sweepgen.errors import CheckFailed
from sweepgen.generator import load_generator
from sweepgen.laser import load_laser
from sweepgen.planner import plan
from sweepgen.playback import channel_playback
from sweepgen.render import code_polynomial, detuning_extremes, detuning_scaling, drive_range, render
from sweepgen.sampling import SampleRateChoice, drive_to_codes, quantisation
from sweepgen.scenario import load_scenario
from sweepgen.schedule import SampledPolynomial, Schedule, Segment

from conftest import examples

SCENARIOS = ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"]


def setup(key):
    sc = load_scenario(key)
    schedule = plan(sc).schedule()
    laser = load_laser(str(sc.laser_path()))
    gen = load_generator(str(sc.generator_path()))
    return sc, schedule, laser, gen


def rendered(sc, schedule, laser, gen, rate_choice=None):
    """The table of what the playback service chooses to play (or of ``rate_choice``)."""
    playing = channel_playback(schedule, laser, gen, sc.drive, linewidth=sc.species.linewidth)
    if rate_choice is not None:
        playing = dataclasses.replace(playing, rate_choice=rate_choice)
    return render(playing, digest=sc.digest)


@pytest.fixture(scope="module", params=SCENARIOS)
def case(request):
    return setup(request.param)


# -- pieces -------------------------------------------------------------------------------------
def random_schedule(seed, pieces):
    rng = np.random.default_rng(seed)
    x = np.concatenate([[0.0], np.sort(rng.uniform(0, 1e-2, pieces - 1)), [1e-2]])
    x = np.unique(x)
    c = rng.normal(0, 1, (4, len(x) - 1)) * np.array([[1e15], [1e12], [1e9], [1e8]])
    poly = PPoly(c, x)
    return Schedule([Segment("chirp", 0.0, 1e-2)], poly, 1e-2, float(poly(0.0)), float(poly(1e-2)))


@settings(max_examples=examples(40))
@given(seed=st.integers(0, 2**32 - 1), pieces=st.integers(1, 12))
def test_detuning_extremes_bound_a_dense_sampling_and_are_attained(seed, pieces):
    schedule = random_schedule(seed, pieces)
    lo, hi = detuning_extremes(schedule)
    t = np.linspace(0, schedule.period, 200001)
    dense = schedule.poly(t)
    span = dense.max() - dense.min()
    # exact extremes (calculus): never inside the sampled range, and a dense grid gets close to them
    assert lo <= dense.min() + 1e-9 * span and hi >= dense.max() - 1e-9 * span
    assert dense.min() - lo <= 1e-4 * span and hi - dense.max() <= 1e-4 * span


@settings(max_examples=examples(40))
@given(seed=st.integers(0, 2**32 - 1), pieces=st.integers(1, 12), lo=st.floats(-2e-3, 5e-3),
       hi=st.floats(5e-3, 1.2e-2))
def test_detuning_extremes_agree_with_ppoly_roots(seed, pieces, lo, hi):
    base = random_schedule(seed, pieces)
    # breakpoints need not cover the period exactly: the end pieces extend, as in PPoly
    x = base.breakpoints.copy()
    x[0] = lo if lo < x[1] else x[0]
    x[-1] = hi if hi > x[-2] else x[-1]
    poly = PPoly(base.coefficients, x)
    schedule = Schedule([Segment("chirp", 0.0, 1e-2)], poly, 1e-2, 0.0, 0.0)
    # reference: the stationary points from scipy.interpolate.PPoly.roots of the derivative, the
    # breakpoints and the period's ends, each piece's value there from PPoly itself
    roots = poly.derivative().roots(discontinuity=False, extrapolate=True)
    t = np.concatenate([x, [0.0, 1e-2], roots[np.isfinite(roots)]])
    t = t[(t >= 0.0) & (t <= 1e-2)]
    values = np.concatenate([poly(t), poly(np.clip(np.nextafter(t, -np.inf), 0.0, None))])
    span = np.ptp(values) + 1.0
    got = detuning_extremes(schedule)
    assert got[0] == pytest.approx(values.min(), abs=1e-9 * span)
    assert got[1] == pytest.approx(values.max(), abs=1e-9 * span)


@settings(max_examples=examples(40))
@given(seed=st.integers(0, 2**32 - 1), pieces=st.integers(1, 40), start=st.integers(0, 12000),
       n=st.integers(1, 3000), rate=st.floats(1e4, 1e7))
def test_sampled_polynomial_equals_ppoly(seed, pieces, start, n, rate):
    schedule = random_schedule(seed, pieces)
    poly = schedule.poly
    got = SampledPolynomial(poly.x, poly.c, rate, schedule.period)(start, start + n)
    t = np.arange(start, start + n) / rate
    expected = poly(np.mod(t, schedule.period))          # reference: scipy.interpolate.PPoly, wrapped
    assert np.allclose(got, expected, rtol=1e-12, atol=1e-12 * np.abs(expected).max())


def test_sampled_polynomial_on_breakpoints_takes_the_piece_that_starts_there():
    x = np.array([0.0, 0.25, 0.5, 1.0])                  # samples at i/8 fall on them exactly
    c = np.random.default_rng(1).normal(0, 1, (4, 3))     # pieces that do not join
    got = SampledPolynomial(x, c, 8.0, 1.0)(0, 20)
    assert np.allclose(got, PPoly(c, x)(np.mod(np.arange(20) / 8.0, 1.0)), rtol=1e-13, atol=1e-13)


def test_detuning_scaling_of_a_calibrated_chain_is_within_one_step_at_every_code():
    sc, schedule, laser, gen = setup("na23-continuous-focused")
    lo, hi = drive_range(schedule, laser.chain)
    q = quantisation(lo, hi, gen, laser.chain)
    c_lo, c_hi = sorted(drive_to_codes(np.array([lo, hi]), q).astype(int))
    ds = detuning_scaling(laser.chain, q, c_lo, c_hi)
    assert ds["kind"] == "lookup"
    codes = np.arange(c_lo, c_hi + 1, dtype=float)
    exact = laser.chain.to_detuning(q.code_offset + q.code_scale * codes)
    step = np.abs(np.gradient(exact))                                # Hz per code, local
    err = np.abs(np.interp(codes, ds["code"], ds["detuning"]) - exact)
    assert np.all(err <= step)                                       # the contract: within one DAC step
    assert err.max() <= ds["max_error"] + 1e-6


def test_detuning_scaling_of_a_linear_chain_is_a_line():
    sc, schedule, laser, gen = setup("rb87-chopped-oven")
    lo, hi = drive_range(schedule, laser.chain)
    q = quantisation(lo, hi, gen, laser.chain)
    ds = detuning_scaling(laser.chain, q, -8000, 8000)
    assert ds["kind"] == "linear"
    # analog stage: Δ = set_point + coefficient · V (laser profile demo-ecdl-piezo: 40 MHz/V, -180 MHz)
    assert ds["scale"] == pytest.approx(40e6 * q.code_scale, rel=1e-12)
    assert ds["offset"] == pytest.approx(-180e6 + 40e6 * q.code_offset, rel=1e-12)


def _codes_before_rounding(schedule, laser, q, count):
    """``(from code_polynomial, exact through the chain)`` at ``count`` samples over one period."""
    x, c, how = code_polynomial(schedule, laser.chain, q)
    rate = count / schedule.period
    got = SampledPolynomial(x, c, rate, schedule.period)(0, count)
    exact = (laser.chain.to_drive(schedule.detuning(np.arange(count) / rate)) - q.code_offset) / q.code_scale
    return got, exact, how


def test_code_polynomial_matches_the_chain(case):
    sc, schedule, laser, gen = case
    q = quantisation(*drive_range(schedule, laser.chain), gen, laser.chain)
    got, exact, how = _codes_before_rounding(schedule, laser, q, 1 << 16)
    assert how == "linear" or how.startswith("piecewise cubic")
    assert np.max(np.abs(got - exact)) <= 1e-3                      # TABLE_TOLERANCE: a thousandth of a code


def test_a_curved_chain_is_followed_by_cubic_pieces_in_time():
    sc, schedule, laser, gen = setup("na23-continuous-focused")      # a calibrated VCO stage
    q = quantisation(*drive_range(schedule, laser.chain), gen, laser.chain)
    x, c, how = code_polynomial(schedule, laser.chain, q)
    assert how.startswith("piecewise cubic") and len(x) > len(schedule.poly.x)
    got, exact, _ = _codes_before_rounding(schedule, laser, q, (1 << 20) + 1)   # samples off the pieces' ends
    assert np.max(np.abs(got - exact)) <= 1e-3
    # a straight line in detuning would be many codes off: the curve matters here
    det = np.linspace(*detuning_extremes(schedule), 1001)
    u = (laser.chain.to_drive(det) - q.code_offset) / q.code_scale
    assert np.max(np.abs(u - np.linspace(u[0], u[-1], det.size))) > 10


# -- the table ---------------------------------------------------------------------------------
def test_render_equals_the_plain_pipeline(case):
    """The streamed codes equal schedule -> chain -> codes evaluated directly at t = i / rate."""
    sc, schedule, laser, gen = case
    table = rendered(sc, schedule, laser, gen)
    info = table.info
    t = np.arange(info.period_count) / info.sample_rate
    drive = laser.chain.to_drive(schedule.detuning(t))
    q = quantisation(*drive_range(schedule, laser.chain), gen, laser.chain)
    expected = drive_to_codes(drive, q)
    got = table.codes()
    assert got.dtype == np.dtype(info.dtype) and len(got) == info.count
    diff = np.abs(got[: info.period_count].astype(np.int64) - expected.astype(np.int64))
    # identical except, for a tabulated (calibrated) chain, a value within 1e-3 code of a rounding edge
    assert diff.max() <= 1 and np.count_nonzero(diff) <= 1e-3 * info.period_count
    # one period exactly, and the table loops without a jump
    assert info.period_count / info.sample_rate == pytest.approx(schedule.period, abs=0.5 / info.sample_rate)
    assert abs(int(got[-1]) - int(got[0])) <= 1


def test_frames_carry_time_detuning_drive(case):
    sc, schedule, laser, gen = case
    table = rendered(sc, schedule, laser, gen)
    frame = list(table.frames(4096))[3]
    assert frame.start == 3 * 4096
    assert np.allclose(frame.time, (frame.start + np.arange(4096)) / table.info.sample_rate, rtol=1e-15)
    assert np.allclose(frame.detuning, schedule.detuning(frame.time), rtol=1e-12, atol=1e-3)
    drive_of_codes = table.info.code_offset + table.info.code_scale * frame.codes.astype(float)
    assert np.max(np.abs(drive_of_codes - frame.drive)) <= 0.5 * table.info.code_scale * (1 + 1e-6)


@pytest.fixture(scope="module")
def rb_table():
    sc, schedule, laser, gen = setup("rb87-chopped-oven")
    table = rendered(sc, schedule, laser, gen)
    return table, table.codes()


@settings(max_examples=examples(15))
@given(size=st.integers(50, 70000))
def test_codes_do_not_depend_on_the_chunk_size(rb_table, size):
    table, codes = rb_table
    assert np.array_equal(np.concatenate(list(table.chunks(size))), codes)


def test_padding_repeats_the_first_sample():
    sc, schedule, laser, gen = setup("rb87-chopped-oven")
    rc = SampleRateChoice(1e6, 20000, 20000 + 37, "test", "test", 1e6, 1.0)
    table = rendered(sc, schedule, laser, gen, rc)
    frames = list(table.frames(10000))
    codes = np.concatenate([f.codes for f in frames])
    det = np.concatenate([f.detuning for f in frames])
    assert len(codes) == 20037
    assert np.all(codes[20000:] == codes[0]) and np.all(det[20000:] == det[0])


def test_memory_does_not_grow_with_the_table_length():
    sc, schedule, laser, gen = setup("rb87-chopped-oven")
    n = 1 << 22
    rc = SampleRateChoice(n / schedule.period, n, n, "test", "test", 1e6, 1.0)
    table = rendered(sc, schedule, laser, gen, rc)
    tracemalloc.start()
    total = 0
    for chunk in table.chunks():
        total += len(chunk)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert total == n
    # a 2^22-sample table is 8 MiB of codes and 100 MiB of float intermediates; streamed, a few chunks
    assert peak < 4 * 2**20


# -- safety ------------------------------------------------------------------------------------
def narrowed(laser, lo, hi):
    return dataclasses.replace(laser, limits=dataclasses.replace(laser.limits, input_min=lo, input_max=hi))


def test_a_drive_outside_the_safe_input_range_is_refused():
    sc, schedule, laser, gen = setup("rb87-chopped-oven")
    lo, hi = drive_range(schedule, laser.chain)
    with pytest.raises(CheckFailed) as err:
        rendered(sc, schedule, narrowed(laser, lo, hi - 0.01), gen)
    assert [f["rule"] for f in err.value.findings] == ["render.safe_input"]
    assert "safe input range" in str(err.value)


def test_a_drive_outside_the_generator_output_is_refused():
    sc, schedule, laser, gen = setup("rb87-chopped-oven")
    lo, hi = drive_range(schedule, laser.chain)
    small = dataclasses.replace(gen, output=dataclasses.replace(gen.output, range_min=-1.0, range_max=1.0))
    with pytest.raises(CheckFailed) as err:
        rendered(sc, schedule, laser, small)
    assert [f["rule"] for f in err.value.findings] == ["render.output_range"]


def test_fifty_ohm_setting_into_high_impedance_doubles_the_drive():
    """Set for 50 Ω, driving high-Z: twice the programmed voltage arrives (common practice)."""
    sc, schedule, laser, gen = setup("rb87-chopped-oven")
    lo, hi = drive_range(schedule, laser.chain)
    out = dataclasses.replace(gen.output, termination=50.0, range_min=-0.6 * max(abs(lo), abs(hi)),
                              range_max=0.6 * max(abs(lo), abs(hi)))
    table = rendered(sc, schedule, laser, dataclasses.replace(gen, output=out))
    assert table.info.amplitude == pytest.approx((hi - lo) / 2, rel=1e-3)   # programmed = half the drive


def test_the_range_check_is_exact_at_the_edge():
    sc, schedule, laser, gen = setup("rb87-chopped-oven")
    lo, hi = drive_range(schedule, laser.chain)
    step = 1e-3
    table = rendered(sc, schedule, narrowed(laser, lo - step, hi + step), gen)
    codes = table.codes()
    drive = table.info.code_offset + table.info.code_scale * codes.astype(float)
    assert drive.min() >= lo - step and drive.max() <= hi + step


def test_drive_range_matches_the_chain_at_the_sweep_ends():
    sc, schedule, laser, gen = setup("rb87-chopped-oven")
    lo, hi = drive_range(schedule, laser.chain)
    ends = laser.chain.to_drive(np.array([schedule.start_detuning, schedule.end_detuning]))
    assert lo == pytest.approx(ends.min()) and hi == pytest.approx(ends.max())
    # analog stage of demo-ecdl-piezo: drive = (Δ − set point)/(40 MHz/V), so the span is the chirp span / 40 MHz/V
    assert math.isclose(hi - lo, (schedule.end_detuning - schedule.start_detuning) / 40e6, rel_tol=1e-9)
