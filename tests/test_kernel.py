"""The compiled step (sweepgen._kernel, numba) against the NumPy step of sweepgen._flight.

The two draw different random numbers, so they are compared as samples: for the
shipped scenarios (a focused beam with depumping and a repump; a molecule with a
photon budget; a continuous beam), the same initial atoms flown by each with
independent seeds give fractions and means that agree within four standard
errors of their difference (binomial sqrt(f(1-f)/n) and σ/sqrt(n) for each run).
Without numba the NumPy step is chosen by itself (checked in a child process
where importing numba fails).
"""

import json
import math
import subprocess
import sys

import numpy as np
import pytest

from sweepgen import _flight
from sweepgen.lighting import LightLevels
from sweepgen.planner import plan
from sweepgen.scenario import load_scenario
from sweepgen.simulate import ARRIVED, DARK, DetuningProgram, draw_atoms, propagate

numba = pytest.importorskip("numba")


def _figures(sc, flight):
    """``{name: (value, standard error)}`` of the statistics compared."""
    n = flight.fate.size
    slow = (flight.fate == ARRIVED) & (flight.final_velocity <= sc.target.capture_velocity)

    def frac(mask):
        f = float(mask.mean())
        return f, math.sqrt(max(f * (1 - f), 1.0 / n) / n)

    def mean(x):
        return float(x.mean()), float(x.std(ddof=1)) / math.sqrt(x.size)

    return {"captured": frac(slow), "dark": frac(flight.fate == DARK), "ended dark": frac(flight.dark),
            "depumped": frac(flight.depumped), "slow velocity": mean(flight.final_velocity[slow]),
            "photons": mean(flight.photons), "arrival": mean(flight.arrival_time[slow])}


@pytest.mark.slow
@pytest.mark.parametrize("key", ["rb87-chopped-oven", "caf-buffer-gas", "na23-continuous-focused"])
def test_compiled_and_numpy_steps_agree_within_the_statistical_error(key):
    sc = load_scenario(key)
    program = DetuningProgram(plan(sc).schedule())
    atoms = draw_atoms(sc, 4000, np.random.default_rng(3))
    runs = {k: propagate(sc, atoms, program, np.random.default_rng(seed), kernel=k)
            for k, seed in (("compiled", 10), ("numpy", 20))}
    assert runs["compiled"].kernel == "compiled" and runs["numpy"].kernel == "numpy"
    a, b = (_figures(sc, runs[k]) for k in ("compiled", "numpy"))
    for name in a:
        (x, sx), (y, sy) = a[name], b[name]
        if sx == sy == 0.0 or math.isnan(x):
            assert x == y or (math.isnan(x) and math.isnan(y)), name
            continue
        assert abs(x - y) < 4 * math.hypot(sx, sy), (name, x, y)
    # the same step rule: the step counts agree to a few per cent (the rule sees the same atoms)
    assert abs(runs["compiled"].steps / runs["numpy"].steps - 1) < 0.1


def test_compiled_step_is_reproducible_and_default_with_numba():
    sc = load_scenario("rb87-chopped-oven")
    program = DetuningProgram(plan(sc).schedule())
    atoms = draw_atoms(sc, 500, np.random.default_rng(1))
    one, two = (propagate(sc, atoms, program, np.random.default_rng(5)) for _ in range(2))
    assert _flight.KERNEL == "compiled" and one.kernel == "compiled"
    np.testing.assert_array_equal(one.final_velocity, two.final_velocity)
    np.testing.assert_array_equal(one.photons, two.photons)


def test_clock_run_out_gives_one_plus_poisson_photons():
    # the compiled clock: an atom whose clock runs out with u left scatters 1 + Poisson(u) photons
    # (reference: numpy's Poisson sampler); a step at one fixed expected count for many atoms
    from sweepgen import _kernel

    n, lam = 200_000, 0.7
    rng = np.random.default_rng(2)
    k = _kernel.constants(recoil=1e-9, distance=1e9, light_start=-1e9, peak=1.0, focused=False, focus=0.0,
                          rayleigh=1.0, waist=1.0, gamma=1.0, wavelength=1.0, fraction=1.0, split=0.0, strength=0.0,
                          branching=0.0, pumping=False, loss=False, light=True, large=1e9)
    # rate f Γ s/(1 + s + x²) with x = 0 (v = 0, detuning 0): s/(1+s) = 1/2 for s = 1 → λ = dt/2
    v = np.full(n, 1e-300)
    clock = rng.standard_exponential(n)
    photons = np.zeros(n)
    args = [v, np.zeros(n), np.zeros(n), np.zeros(n), np.zeros(n), np.zeros(n), clock, np.ones(n), photons,
            np.ones(n, bool), np.zeros(n, bool), np.zeros(n, bool), np.empty(0), np.arange(n), np.zeros(n, np.int8),
            np.zeros(n), np.zeros(n), np.zeros(n), np.zeros((n, 2)), np.empty(n, np.intp)]
    _kernel.step(_kernel.stream(rng), k, k.peak, np.empty(0), np.empty(0), 0.0, 2 * lam, 0.0, False, *args)
    # photons in one step: Poisson(λ) for a unit-rate clock started afresh (the first photon when the clock
    # runs out, then 1 + Poisson(overshoot) = Poisson(λ) in all)
    counts = np.bincount(photons.astype(int), minlength=4)[:4] / n
    from scipy import stats

    expected = stats.poisson.pmf(np.arange(4), lam)
    assert np.all(np.abs(counts - expected) < 4 * np.sqrt(expected / n)), (counts, expected)
    # and the clocks left are again Exp(1) (memorylessness): mean 1, variance 1
    assert abs(clock.mean() - 1.0) < 4 / np.sqrt(n) and abs(clock.var() - 1.0) < 8 / np.sqrt(n)


def _one_step(k, n, dt, detuning, rng, x0=0.0):
    """Every atom of ``n`` (at rest, z = 0, x = ``x0``) through one compiled step; photons, depumped, clocks."""
    from sweepgen import _kernel

    clock, pump, photons = rng.standard_exponential(n), rng.standard_exponential(n), np.zeros(n)
    depumped = np.zeros(n, bool)
    args = [np.full(n, 1e-300), np.zeros(n), np.full(n, x0), np.zeros(n), np.zeros(n), np.zeros(n), clock, pump,
            photons, np.ones(n, bool), np.zeros(n, bool), depumped, np.empty(0), np.arange(n), np.zeros(n, np.int8),
            np.zeros(n), np.zeros(n), np.zeros(n), np.zeros((n, 2)), np.empty(n, np.intp)]
    _kernel.step(_kernel.stream(rng), k, k.peak, np.empty(0), np.empty(0), 0.0, dt, detuning, False, *args)
    return photons, depumped, clock


def test_atoms_far_from_resonance_scatter_poisson_photons_at_the_exact_rate():
    # an atom off the beam's axis sees s = 1/2 (the Gaussian factor exp(-2 x0²/w0²) = 1/2 from the step's own
    # exponential), detuned so that x = 2·2πΔ/Γ = 3: λ = f Γ dt s/(1 + s + x²) = dt/21 = 0.2 per step;
    # the counts of one step must be Poisson(0.2) (reference: scipy.stats.poisson), and the clocks left Exp(1)
    from scipy import stats

    from sweepgen import _kernel

    n, lam, waist = 200_000, 0.2, 1.0
    x0 = waist * math.sqrt(math.log(2.0) / 2.0)          # exp(-2 x0²/w0²) = 1/2
    k = _kernel.constants(recoil=1e-12, distance=1e9, light_start=-1e9, peak=1.0, focused=True, focus=0.0,
                          rayleigh=1e12, waist=waist, gamma=1.0, wavelength=1.0, fraction=1.0, split=0.0,
                          strength=0.0, branching=0.0, pumping=False, loss=False, light=True, large=1e9)
    dt = 21 * lam
    photons, _, clock = _one_step(k, n, dt, 3.0 / (4 * math.pi), np.random.default_rng(4), x0)
    counts = np.bincount(photons.astype(int), minlength=4)[:4] / n
    expected = stats.poisson.pmf(np.arange(4), lam)
    assert np.all(np.abs(counts - expected) < 4 * np.sqrt(expected / n)), (counts, expected)
    assert abs(clock.mean() - 1.0) < 4 / np.sqrt(n)           # the clocks left are Exp(1) again


def test_depumping_happens_at_the_exact_rate():
    # a bright atom far from both resonances goes dark in a step with probability 1 − exp(−b R_off dt)
    # (no repump: it stays dark); the off-resonant level at x_off = −5 with strength κ = 1/2, the atom off
    # the axis where s = 1/2: b R_off dt = b f Γ dt κs/(1 + κs + 25); the main level far (x = 20)
    from sweepgen import _kernel

    n, b, kappa = 200_000, 0.5, 0.5
    k = _kernel.constants(recoil=1e-12, distance=1e9, light_start=-1e9, peak=1.0, focused=True, focus=0.0,
                          rayleigh=1e12, waist=1.0, gamma=1.0, wavelength=1.0, fraction=1.0, split=25.0 / (4 * math.pi),
                          strength=kappa, branching=b, pumping=True, loss=False, light=True, large=1e9)
    dt = 5.0
    lam_dark = b * dt * kappa * 0.5 / (1 + kappa * 0.5 + 25.0)
    x0 = math.sqrt(math.log(2.0) / 2.0)                  # exp(-2 x0²/w0²) = 1/2
    _, depumped, _ = _one_step(k, n, dt, 20.0 / (4 * math.pi), np.random.default_rng(6), x0)
    p = 1 - math.exp(-lam_dark)
    assert abs(depumped.mean() - p) < 4 * math.sqrt(p * (1 - p) / n), (depumped.mean(), p)


def test_step_exponential_agrees_with_numpys():
    # the step's inlined exponential (sweepgen._kernel._exp: the Gaussian beam, the Poisson count's e^mu)
    # against numpy.exp over its whole range, -708 <= x <= 709: within 4 units in the last place (relative
    # 8.9e-16); 0 below -708, where numpy.exp gives less than 3.4e-308
    from sweepgen import _kernel

    rng = np.random.default_rng(3)
    xs = np.concatenate([-rng.random(20_000) * 708.0, -rng.random(5_000) * 1.0, -rng.random(5_000) * 1e-6,
                         rng.random(5_000) * 30.0, rng.random(2_000) * 709.0,
                         [0.0, -0.0, -1e-300, -math.log(2.0) / 2, -math.log(2.0) * 1.5, -707.99999, -708.0, 709.0]])
    got = np.array([_kernel._exp(x) for x in xs])
    want = np.exp(xs)
    assert np.max(np.abs(got / want - 1.0)) <= 4 * np.finfo(float).eps
    assert _kernel._exp(0.0) == 1.0
    assert _kernel._exp(-708.5) == 0.0 and _kernel._exp(-1e300) == 0.0


def test_step_expectations_equal_the_numpy_steps():
    # the compiled step's first pass (sweepgen._kernel.expected: every atom's expected photons, depumping
    # events and beam factor at once) against the NumPy step's functions for the same drifted atoms:
    # the Rb demo (a Gaussian beam, an off-resonant level), atoms before and after the light's start,
    # on and off the axis; equal to rounding (the compiled pass may reassociate)
    from sweepgen import _kernel

    sc = load_scenario("rb87-chopped-oven")
    program = DetuningProgram(plan(sc).schedule())
    run = _flight._Compiled(sc, draw_atoms(sc, 10, np.random.default_rng(0)), program,
                            np.random.default_rng(1), True, LightLevels.full(("main", "repump"), program.period),
                            _flight.STEP_FRACTION)
    rng = np.random.default_rng(2)
    n, dt, detuning = 5000, 2e-6, -350e6
    v, z = rng.uniform(1.0, 320.0, n), rng.uniform(0.0, 1.0, n)
    x, y, vx, vy = rng.normal(0, 4e-3, n), rng.normal(0, 4e-3, n), rng.normal(0, 2.0, n), rng.normal(0, 2.0, n)
    lam, lam_dark, beam = np.empty(n), np.empty(n), np.empty(n)
    k = run.k
    _kernel.expected(k, dt, k.k_d * detuning, k.k_d * (detuning - k.split), k.peak, v, z, x, y, vx, vy, lam,
                     lam_dark, beam)
    z_mid, x_end, y_end = z + 0.5 * v * dt, x + vx * dt, y + vy * dt
    lit = (z >= sc.light.start).astype(float)
    rates, lt = run.rates, sc.light
    s = _flight.saturation_seen(z_mid, x_end, y_end, lit, lt, lt.peak, np.empty(n), np.empty(n))
    v_mid = np.empty(n)
    want = _flight.midpoint_counts(v, s, detuning, dt, rates, run.recoil, np.empty(n), v_mid, np.empty(n))
    want_dark = _flight.off_resonant_counts(v_mid, s, detuning, dt, rates, np.empty(n), np.empty(n))
    want_beam = _flight.saturation_seen(z_mid, x_end, y_end, np.ones(n), lt, 1.0, np.empty(n), np.empty(n))
    assert 0.1 < lit.mean() < 1.0 and want.max() > 1.0 and want_dark.max() > 0.0
    np.testing.assert_allclose(lam, want, rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(lam_dark, want_dark, rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(beam, want_beam, rtol=1e-12, atol=1e-300)


def _programs():
    """The shipped scenarios' planned sweeps, a constant detuning and a sampled detuning with a jump."""
    from sweepgen.programs import SampledProgram

    out = [DetuningProgram(plan(load_scenario(key)).schedule())
           for key in ("rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas")]
    out.append(DetuningProgram.fixed(-123e6))
    samples = np.concatenate([np.linspace(-400e6, -50e6, 700), np.linspace(-50e6, -390e6, 301)])
    out.append(SampledProgram(samples + np.random.default_rng(0).normal(0, 1e5, samples.size), 2e-3))
    return out


@pytest.mark.parametrize("index", range(5))
def test_compiled_detuning_equals_the_programs_own(index):
    # the compiled run's detuning (sweepgen._kernel.run_steps, from the program's tables) against the program's
    # Python methods, at times over several periods (before zero too) and over intervals shorter and longer
    # than a period: equal to rounding (the compiled code may reassociate)
    from sweepgen import _kernel

    program = _programs()[index]
    p = program.tables()
    period = getattr(program, "period", 1.0)
    rng = np.random.default_rng(index)
    scale = 1e-12 * 1e9
    for t0 in rng.uniform(-2 * period, 5 * period, 300):
        assert abs(_kernel.at(p, t0) - program.at(t0)) <= scale
        for width in (1e-4 * period, 0.05 * period, 0.7 * period, 1.3 * period):
            lo, hi = _kernel.extremes(p, t0, t0 + width)
            want_lo, want_hi = program.extremes(t0, t0 + width)
            assert abs(lo - want_lo) <= scale and abs(hi - want_hi) <= scale, (t0, width)


def test_compiled_run_of_steps_flies_as_the_step_by_step_run():
    # the compiled run of steps (one call per take-in) against the same compiled step called once per
    # step from Python: the same step rule and detuning, so the same steps and, from the same seed, the
    # same atoms
    sc = load_scenario("rb87-chopped-oven")
    program = DetuningProgram(plan(sc).schedule())
    atoms = draw_atoms(sc, 1500, np.random.default_rng(1))
    run = propagate(sc, atoms, program, np.random.default_rng(9))

    class Stepwise(_flight._Compiled):
        def steps_until(self, t):
            return _flight._Propagation.steps_until(self, t)

    saved = _flight._Compiled
    _flight._Compiled = Stepwise
    try:
        step_by_step = propagate(sc, atoms, program, np.random.default_rng(9))
    finally:
        _flight._Compiled = saved
    assert run.steps == step_by_step.steps and run.atom_steps == step_by_step.atom_steps
    np.testing.assert_allclose(run.final_velocity, step_by_step.final_velocity, rtol=1e-9)
    np.testing.assert_array_equal(run.fate, step_by_step.fate)


@pytest.mark.slow
def test_without_numba_the_numpy_step_is_used():
    code = (
        "import sys, json\n"
        "sys.modules['numba'] = None\n"          # importing numba now fails, as when it is not installed
        "from sweepgen import _flight, _kernel\n"
        "from sweepgen.scenario import load_scenario\n"
        "from sweepgen.simulate import simulate\n"
        "doc = simulate(load_scenario('rb87-chopped-oven'), atoms=300, seed=1, baselines=False).to_json()\n"
        "try:\n"
        "    from sweepgen.simulate import propagate\n"
        "    propagate(None, None, None, None, kernel='compiled')\n"
        "    refused = False\n"
        "except ValueError:\n"
        "    refused = True\n"
        "print(json.dumps({'available': _kernel.AVAILABLE, 'default': _flight.KERNEL,\n"
        "                  'used': doc['time_step']['kernel'], 'refused': refused,\n"
        "                  'captured': doc['captured_fraction']}))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    got = json.loads(out.stdout.strip().splitlines()[-1])
    assert got == {"available": False, "default": "numpy", "used": "numpy", "refused": True,
                   "captured": got["captured"]}
    assert 0.0 < got["captured"] < 1.0


# -- the step's generator (sweepgen._kernel: SFC64 and the ziggurat, compiled into the step) ---------------
def _state(seed):
    """The kernel's generator state for NumPy's SFC64 seeded with ``seed``."""
    return np.random.SFC64(seed).state["state"]["state"].astype(np.uint64)


def test_step_generator_gives_the_words_of_numpys_sfc64():
    # reference: numpy.random.SFC64 (the generator's own implementation in NumPy), word for word
    from sweepgen import _kernel

    state = _state(11)
    assert np.array_equal(_kernel.words(state, 100_000), np.random.SFC64(11).random_raw(100_000))
    # the state carries on between calls as NumPy's does
    reference = np.random.SFC64(11)
    reference.random_raw(100_000)
    assert np.array_equal(_kernel.words(state, 1000), reference.random_raw(1000))


@pytest.mark.parametrize("law, name", [("NORMAL", "standard_normal"), ("EXPONENTIAL", "standard_exponential"),
                                       ("UNIFORM", "random")])
def test_step_draws_follow_numpys_generator_draw_for_draw(law, name):
    # reference: numpy.random.Generator(SFC64), which draws normals and exponentials by the same ziggurat
    # (G. Marsaglia and W. W. Tsang, J. Stat. Softw. 5(8), 2000). Our layer tables are computed here from
    # the ziggurat's defining equations (double precision), NumPy's were computed once elsewhere; they
    # agree to about 1e-14, so every draw, the rare wedge and tail draws included, matches NumPy's to that
    # precision (a wrong table entry, bit layout or rejection test would put draws far apart)
    from sweepgen import _kernel

    n = 1_000_000
    ours = _kernel.draws(_state(5), n, getattr(_kernel, law))
    theirs = getattr(np.random.Generator(np.random.SFC64(5)), name)(n)
    assert np.allclose(ours, theirs, rtol=1e-12, atol=0.0)
    if law == "UNIFORM":
        assert np.array_equal(ours, theirs)


def test_step_draws_have_the_normal_and_exponential_laws_tails_included():
    # reference: scipy.stats (Kolmogorov-Smirnov against the exact laws) and the tail probabilities beyond the
    # ziggurat's right edges, where the rare branch draws (normal: 2 Φ(-r); exponential: exp(-r))
    from scipy import stats

    from sweepgen import _kernel

    n = 2_000_000
    normal = _kernel.draws(_state(21), n, _kernel.NORMAL)
    exponential = _kernel.draws(_state(22), n, _kernel.EXPONENTIAL)
    assert stats.kstest(normal[:200_000], "norm").pvalue > 1e-3
    assert stats.kstest(exponential[:200_000], "expon").pvalue > 1e-3
    for draws_, edge, p in ((np.abs(normal), _kernel._NORMAL_R, 2 * stats.norm.sf(_kernel._NORMAL_R)),
                            (exponential, _kernel._EXPONENTIAL_R, math.exp(-_kernel._EXPONENTIAL_R))):
        beyond = int((draws_ > edge).sum())
        assert abs(beyond - n * p) < 5 * math.sqrt(n * p), (beyond, n * p)


@pytest.mark.parametrize("mean", [0.05, 0.9, 2.7, 6.5, 12.0, 29.0, 45.0])
def test_step_poisson_counts_follow_the_poisson_law(mean):
    # the step's photon count after a clock runs out (sweepgen._kernel._poisson: inversion, the first eight
    # cumulative sums compared at once, then term by term; arrival counting above 30) against
    # scipy.stats.poisson: every count whose expected number is at least 20 within 5 standard deviations,
    # the rest pooled, and the mean and variance; the means cover the branch-free part, the term-by-term
    # part (6.5 and up) and the arrivals (45)
    from scipy import stats

    from sweepgen import _kernel

    n = 200_000
    counts = _kernel.draws(_state(int(mean * 100)), n, _kernel.POISSON, mean)
    assert np.array_equal(counts, np.round(counts)) and counts.min() >= 0
    observed = np.bincount(counts.astype(int))
    expected = n * stats.poisson.pmf(np.arange(observed.size), mean)
    big = expected >= 20
    observed_big = observed[big]
    assert np.all(np.abs(observed_big - expected[big]) < 5 * np.sqrt(expected[big])), (mean, observed_big)
    rest, rest_expected = n - observed_big.sum(), n - expected[big].sum()
    assert abs(rest - rest_expected) < 5 * math.sqrt(rest_expected) + 5, (rest, rest_expected)
    assert abs(counts.mean() - mean) < 5 * math.sqrt(mean / n)
    assert abs(counts.var() - mean) < 5 * mean * math.sqrt(2.0 / n) + 5 * math.sqrt(mean / n)


def test_step_generator_is_seeded_from_the_runs_generator():
    # the same run seed gives the same stream; another seed another one
    from sweepgen import _kernel

    one, two = (_kernel.stream(np.random.default_rng(3)) for _ in range(2))
    assert np.array_equal(one, two)
    assert not np.array_equal(one, _kernel.stream(np.random.default_rng(4)))
