"""The Monte Carlo of the atoms (sweepgen.simulate) against closed forms.

Sources of the expected values, named beside each assertion:

* ballistic flight without light: arrival at t_e + D/v, speed unchanged (kinematics);
* momentum conservation: photons scattered = (v_initial - v_final)/v_r
  (Foot 2005 §9.3, recalled section: photons needed to slow by Δv are Δv/v_r);
* dark-state loss: survival (1 - p)^N after N photons (README.md, Physics background);
* isotropic emission recoil: per-axis variance N v_r²/3 after N photons (the
  variance of cos θ for an isotropic direction is 1/3, a textbook result);
* a point source with Gaussian angles of 1σ θ: distance from the axis at distance
  D is Rayleigh-distributed with scale Dθ (reference: scipy.stats.rayleigh);
* the expected photons per step: R·dt with R of physics.scattering_rate
  (README.md, Physics background; Foot 2005 eq. 7.68, recalled number);
* photons of a clock that ran out: 1 + Poisson(overshoot), fresh clock Exp(1)
  (reference: scipy.stats.poisson, scipy.stats.expon);
* statistical tolerances: binomial standard errors sqrt(f(1-f)/n), standard
  errors of means and of standard deviations (σ/sqrt(2n)), from the sample sizes.
"""

import importlib
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import constants as C
from scipy import stats

from sweepgen import physics
from sweepgen.planner import plan
from sweepgen.scenario import load_scenario
from sweepgen._flight import _clock_counts, _Rates, saturation_seen
from sweepgen.simulate import (ARRIVED, DARK, HORIZON_FACTOR, STEP_FRACTION, Atoms, DetuningProgram, draw_atoms,
                               expected_counts, propagate, simulate, velocity_width)

from conftest import examples, make_scenario

# A pulsed narrow beam well inside the chirp's band (15 .. 260 m/s); no hold, and a long
# period so that slowed atoms arrive before the next chirp.
NARROW = {"model": "gaussian", "mean_velocity": "150 m/s", "velocity_spread": "5 m/s", "pulse_time": "0 ms",
          "temperature": None}
QUIET = {"hold": "0 ms", "period": "100 ms"}


def binomial_sigma(f, n):
    return math.sqrt(max(f * (1.0 - f), 1.0 / n) / n)


# -- the detuning the atoms see -----------------------------------------------------------
def test_detuning_program_is_the_schedule():
    sc = make_scenario()
    sched = plan(sc).schedule()
    prog = DetuningProgram(sched)
    t = np.random.default_rng(5).uniform(-0.03, 0.07, 3000)
    mine = np.array([prog.at(x) for x in t])
    np.testing.assert_allclose(mine, sched.detuning(t), rtol=1e-12, atol=1e-3)   # Hz
    # extremes over windows bracket a dense sampling of the schedule
    for t0 in (0.0, 0.0012, 0.004, 0.0065, 0.0195):
        for width in (1e-6, 3e-4, 2e-3, 0.05):
            lo, hi = prog.extremes(t0, t0 + width)
            dense = sched.detuning(np.linspace(t0, t0 + width, 20001))
            assert lo <= dense.min() + 1e-3 and hi >= dense.max() - 1e-3
            assert lo >= sched.start_detuning - 1e-3 and hi <= sched.end_detuning + 1e-3


_SCHED = plan(make_scenario()).schedule()


@settings(max_examples=examples(60))
@given(st.floats(-0.05, 0.07), st.floats(1e-7, 0.03))
def test_detuning_extremes_property_any_window(t0, width):
    # the window may start before zero and run over the period's end (the schedule repeats)
    sched = _SCHED
    prog = DetuningProgram(sched)
    lo, hi = prog.extremes(t0, t0 + width)
    t = np.linspace(t0, t0 + width, 4001)
    dense = sched.detuning(t)
    assert lo <= dense.min() + 1e-3 and hi >= dense.max() - 1e-3
    # and no looser than the schedule's change between two samples (a value the schedule takes there),
    # except at the period's wrap, where the detuning jumps back to the start detuning
    slack = float(np.max(np.abs(sched.chirp_rate(t)))) * (t[1] - t[0]) + 1e-3
    assert lo >= min(dense.min() - slack, sched.start_detuning - 1e-3)
    assert hi <= max(dense.max() + slack, sched.end_detuning + 1e-3)


# -- the expected photons per step ------------------------------------------------------------
@settings(max_examples=examples(60))
@given(st.lists(st.tuples(st.floats(-50.0, 900.0), st.floats(-0.2, 1.2), st.floats(-3e-3, 3e-3),
                          st.floats(-3e-3, 3e-3)), min_size=1, max_size=30),
       st.floats(-8e8, 0.0), st.floats(1e-8, 1e-4), st.sampled_from([0.3, 3.0, 20.0]), st.booleans(),
       st.sampled_from(["rb87-d2", "caf-a-x"]))
def test_expected_counts_are_the_scattering_rate_times_the_step(atoms, detuning, dt, s0, focused, species):
    light = {"saturation": s0, "start": "0.05 m"}
    if focused:
        light.update(waist="0.4 mm", focus="0.1 m")
    sc = make_scenario(light=light, species=species)
    sp, lt = sc.species, sc.light
    v, z, x, y = (np.array([a[i] for a in atoms]) for i in range(4))
    lit = (z >= lt.start).astype(float)
    # README.md, Physics background: R(Δ, v, s(z, r)) of physics.scattering_rate with the species'
    # largest rate f·Γ, at the effective saturation of the Gaussian beam at (z, r), times the step
    r = np.hypot(x, y)
    s_ref = lt.saturation_at(z, r)
    reference = physics.scattering_rate(detuning, v, s_ref, sp.gamma, sp.wavelength, sp.rate_fraction) * dt
    work = [np.empty(v.size) for _ in range(3)]
    s = saturation_seen(z, x, y, lit, lt, lt.peak, work[0], work[1])
    np.testing.assert_allclose(s, s_ref, rtol=1e-12, atol=0.0)
    got = expected_counts(v, s, detuning, dt, _Rates(sc), work[1], work[2])
    np.testing.assert_allclose(got, reference, rtol=1e-11, atol=0.0)


@pytest.mark.parametrize("overshoot", [0.05, 0.7, 4.0, 9.9])
def test_a_clock_that_ran_out_gives_one_plus_poisson_photons_and_a_fresh_clock(overshoot):
    n = 20000
    k = np.empty(n)
    clock = _clock_counts(np.full(n, overshoot), np.random.default_rng(5), k)
    assert np.all(k >= 1) and np.all(k == np.round(k))
    # counts against scipy.stats.poisson: the frequency of each count within 5 binomial standard errors
    values, seen = np.unique(k - 1, return_counts=True)
    expected = stats.poisson(overshoot).pmf(values)
    assert np.all(np.abs(seen / n - expected) <= 5 * np.sqrt(expected * (1 - expected) / n) + 1e-4)
    # fresh clocks: Exp(1) (scipy.stats.expon), Kolmogorov-Smirnov at the 0.1 % level
    assert stats.kstest(clock, stats.expon.cdf).pvalue > 1e-3


# -- light off: ballistic flight ------------------------------------------------------------
@pytest.mark.parametrize("pulsed", [True, False])
def test_with_the_light_off_every_atom_keeps_its_speed(pulsed):
    if pulsed:
        sc = make_scenario()
    else:
        sc = make_scenario(source={"pulse_time": None}, chirp={"start_time": None})
    rng = np.random.default_rng(11)
    atoms = draw_atoms(sc, 2000, rng)
    flight = propagate(sc, atoms, DetuningProgram(plan(sc).schedule()), rng, light=False)
    arrived = flight.fate == ARRIVED
    # every atom fast enough to arrive within the horizon arrives, at its own speed (kinematics)
    t_end = atoms.emission_time.max() + HORIZON_FACTOR * sc.target.distance / sc.target.capture_velocity
    expect = atoms.emission_time + sc.target.distance / atoms.velocity < t_end
    assert np.array_equal(arrived, expect)
    np.testing.assert_array_equal(flight.final_velocity[arrived], atoms.velocity[arrived])
    np.testing.assert_allclose(flight.arrival_time[arrived],
                               atoms.emission_time[arrived] + sc.target.distance / atoms.velocity[arrived],
                               rtol=1e-12)
    assert np.all(flight.photons == 0)


@settings(max_examples=examples(25))
@given(st.lists(st.floats(5.0, 2000.0), min_size=1, max_size=40),
       st.lists(st.floats(0.0, 0.0199), min_size=1, max_size=40))
def test_light_off_property_any_velocities_and_emission_times(speeds, times):
    sc = make_scenario(source={"pulse_time": None}, chirp={"start_time": None})
    n = min(len(speeds), len(times))
    v = np.array(speeds[:n])
    te = np.array(times[:n])
    atoms = Atoms.on_axis(v, te)
    flight = propagate(sc, atoms, DetuningProgram(plan(sc).schedule()), np.random.default_rng(0), light=False)
    arrived = flight.fate == ARRIVED
    t_end = te.max() + HORIZON_FACTOR * sc.target.distance / sc.target.capture_velocity
    assert np.array_equal(arrived, te + sc.target.distance / v < t_end)
    np.testing.assert_array_equal(flight.final_velocity[arrived], v[arrived])
    np.testing.assert_allclose(flight.arrival_time[arrived], te[arrived] + sc.target.distance / v[arrived],
                               rtol=1e-12)


def test_light_off_transverse_positions_follow_the_rayleigh_law():
    # Point source, angles N(0, θ) per axis; no light, so no kicks: r = D·|θ| is Rayleigh with scale Dθ.
    theta, aperture = 8e-3, 10e-3
    sc = make_scenario(source={"divergence": "8 mrad"}, target={"aperture": "10 mm"})
    n = 4000
    r = simulate(sc, atoms=n, seed=3)
    doc = r.to_json()
    p_out = stats.rayleigh(scale=sc.target.distance * theta).sf(aperture)        # scipy.stats.rayleigh
    out = r.outside_aperture(r.no_light).mean()
    assert out == pytest.approx(p_out, abs=4 * binomial_sigma(p_out, n))
    angle = np.hypot(r.atoms.vx, r.atoms.vy) / r.atoms.velocity
    assert np.allclose(r.no_light.radius[r.no_light.fate == ARRIVED],
                       sc.target.distance * angle[r.no_light.fate == ARRIVED], rtol=1e-9)
    # the no-light baseline: slow enough and inside the aperture, from the same atoms
    slow = (r.atoms.velocity <= sc.target.capture_velocity)
    inside = sc.target.distance * angle <= aperture
    assert doc["baseline_no_light_fraction"] == pytest.approx((slow & inside).mean(), abs=1e-12)


# -- capture by the chirp -------------------------------------------------------------------
@pytest.fixture(scope="module")
def narrow_run():
    sc = make_scenario(source=NARROW, chirp=QUIET)
    return sc, simulate(sc, atoms=1500, seed=7)


def test_a_source_narrower_than_the_band_is_captured_whole(narrow_run):
    sc, r = narrow_run
    doc = r.to_json()
    assert doc["band_fraction"] == 1.0
    # README.md, Physics background: the chirp collects every atom between end and start velocity
    assert doc["captured_fraction"] == 1.0
    assert doc["lost_fraction"] == 0.0 and doc["too_fast_fraction"] == 0.0
    # acceptance criterion of this model: with no hold the mean final velocity lies within two
    # natural velocity widths λΓ/2π of the end velocity
    width = velocity_width(sc.species)
    assert abs(doc["final_velocity_mean"] - sc.chirp.end_velocity) <= 2 * width
    # far below the no-light and fixed-frequency baselines (the reason the technique exists)
    assert doc["baseline_no_light_fraction"] == 0.0
    assert doc["baseline_fixed_frequency_fraction"] < 0.05


def test_photons_per_slowed_atom_follow_momentum_conservation(narrow_run):
    sc, r = narrow_run
    sp = sc.species
    v_r = physics.recoil_velocity(sp.mass, sp.wavelength)
    assert v_r == pytest.approx(5.8845e-3, rel=1e-4)         # Steck 87Rb table (recalled)
    cap = r.captured()
    dv = r.atoms.velocity[cap] - r.flight.final_velocity[cap]
    expected = physics.photons_to_slow(dv, sp.mass, sp.wavelength)     # Δv / v_r per atom
    doc = r.to_json()
    # Per atom the count differs from Δv/v_r only by the emission recoils' z components, whose sum
    # has standard deviation sqrt(N/3) photons; over n atoms the mean differs by sqrt(N/3/n).
    n = cap.sum()
    tol = 5.0 * math.sqrt(expected.mean() / 3.0 / n)
    assert doc["photons_mean"] == pytest.approx(expected.mean(), abs=tol)
    assert doc["photons_mean"] == pytest.approx(expected.mean(), rel=0.02)     # and within 2 % (acceptance criterion)
    per_atom = r.flight.photons[cap] - expected
    assert per_atom.std() == pytest.approx(math.sqrt(expected.mean() / 3.0), rel=0.15)


def test_emission_recoil_heats_the_transverse_motion_as_n_over_three(tmp_path):
    # Divergence so small that the ballistic part is negligible: v_x at the target is the sum of
    # the emission recoils' x components, variance N v_r²/3 (isotropic emission).
    sc = make_scenario(source={**NARROW, "divergence": "1e-9 rad"}, chirp=QUIET)
    n = 1200
    r = simulate(sc, atoms=n, seed=21, baselines=False)
    cap = r.captured()
    sp = sc.species
    v_r = physics.recoil_velocity(sp.mass, sp.wavelength)
    N = r.flight.photons[cap]
    vx = r.flight.transverse_velocity[cap, 0]
    sigma = v_r * math.sqrt(N.mean() / 3.0)
    assert vx.std() == pytest.approx(sigma, rel=5.0 / math.sqrt(2 * cap.sum()))
    assert abs(vx.mean()) < 5 * sigma / math.sqrt(cap.sum())
    # the transverse spread the atoms pick up moves them off axis: nobody stays on it
    assert np.all(r.flight.radius[cap] > 0)


def test_atoms_a_bit_above_the_start_velocity_are_pulled_in_before_the_chirp():
    # The light is on at the start detuning before the chirp starts (README.md, Physics background, schedule).
    # Its power-broadened line (full width λΓ/2π·sqrt(1+s) = 9.5 m/s here) reaches above the
    # start velocity and brakes atoms there into the chirp's reach: they are captured although
    # they start faster than the start velocity. Atoms many widths above it are not.
    sc = make_scenario()
    lag = physics.lag_velocity(sc.light.peak, 0.6, sc.species.gamma, sc.species.wavelength)
    v_res = sc.chirp.start_velocity + lag       # resonant velocity of the light before the chirp
    above = make_scenario(source={**NARROW, "mean_velocity": f"{v_res + 3.0} m/s", "velocity_spread": "0.5 m/s"},
                 chirp=QUIET)
    far = make_scenario(source={**NARROW, "mean_velocity": "330 m/s", "velocity_spread": "0.5 m/s"}, chirp=QUIET)
    n = 600
    got_above = simulate(above, atoms=n, seed=2, baselines=False).to_json()
    got_far = simulate(far, atoms=n, seed=2, baselines=False).to_json()
    assert got_above["band_fraction"] == 0.0 and got_far["band_fraction"] == 0.0
    assert got_above["captured_fraction"] > 0.9
    assert got_far["captured_fraction"] == 0.0


def test_molecules_survive_as_one_minus_p_to_the_n():
    sc = make_scenario(species="caf-a-x", source={**NARROW, "mean_velocity": "160 m/s", "velocity_spread": "2 m/s"},
              light={"saturation": 4.0, "start": "0.15 m"}, target={"distance": "1.3 m", "capture_velocity": "12 m/s"},
              chirp={"start_velocity": "190 m/s", "end_velocity": "10 m/s", "force_fraction": 0.35, "hold": "0 ms",
                     "return_time": "0.1 ms", "period": "100 ms"})
    p = sc.species.loss_per_photon
    assert p > 0
    n = 2000
    r = simulate(sc, atoms=n, seed=4, baselines=False)
    f = r.flight
    survivors = f.fate == ARRIVED
    # every molecule of this narrow beam scatters nearly the same number of photons (the survivors'
    # count, spread ~1 %); the surviving fraction is then (1 - p)^N
    N = f.photons[survivors].mean()
    expected = (1.0 - p) ** N
    spread = abs((1.0 - p) ** (N * 1.02) - expected)
    assert survivors.mean() == pytest.approx(expected, abs=4 * binomial_sigma(expected, n) + spread)
    assert (f.fate == DARK).mean() == pytest.approx(1.0 - survivors.mean(), abs=1e-12)
    # lost molecules were lost after fewer photons than the survivors scattered
    assert np.median(f.photons[f.fate == DARK]) < N


# -- the run as a whole -----------------------------------------------------------------------
def test_same_seed_same_result_and_another_seed_differs():
    sc = make_scenario(source={"divergence": "5 mrad"}, target={"aperture": "8 mm"})
    a = simulate(sc, atoms=300, seed=9).to_json()
    b = simulate(sc, atoms=300, seed=9).to_json()
    c = simulate(sc, atoms=300, seed=10).to_json()
    strip = lambda d: {k: v for k, v in d.items() if k != "histograms"}
    assert strip(a) == strip(b)
    assert all(np.array_equal(a["histograms"][k], b["histograms"][k]) for k in a["histograms"])
    assert strip(a) != strip(c)


def test_json_keys_and_units():
    sc = make_scenario()
    r = simulate(sc, atoms=400, seed=1)
    doc = r.to_json()
    for key in ("atoms", "seed", "captured_fraction", "band_fraction", "final_velocity_mean",
                "final_velocity_spread", "longitudinal_temperature", "transverse_temperature", "doppler_limit",
                "photons_mean", "lost_fraction", "depumped_fraction", "baseline_no_light_fraction",
                "baseline_fixed_frequency_fraction", "histograms"):
        assert key in doc
    assert set(doc["lost_by_reason"]) == {"turned_back", "left_aperture", "dark_state"}
    assert doc["atoms"] == 400 and doc["seed"] == 1
    # temperatures of the captured atoms about their own mean: m σ² / k_B (CODATA k_B via scipy.constants)
    cap = r.captured()
    assert doc["longitudinal_temperature"] == pytest.approx(
        sc.species.mass * doc["final_velocity_spread"] ** 2 / C.k, rel=1e-12)
    vt = r.flight.transverse_velocity[cap]
    assert doc["transverse_temperature"] == pytest.approx(
        sc.species.mass * (vt[:, 0].var(ddof=1) + vt[:, 1].var(ddof=1)) / (2 * C.k), rel=1e-12)
    # the Doppler limit ħΓ/2k_B beside them; Steck's 87Rb table: 145.57 µK (recalled)
    assert doc["doppler_limit"] == pytest.approx(145.57e-6, rel=1e-4)
    # every atom is in exactly one class
    total = (doc["captured_fraction"] + doc["lost_fraction"] + doc["too_fast_fraction"]
             + doc["not_arrived_fraction"])
    assert total == pytest.approx(1.0, abs=1e-12)
    h = doc["histograms"]
    assert h["initial"].sum() == 400
    assert len(h["velocity_edges"]) == len(h["final"]) + 1
    arrived = int(np.isfinite(r.flight.arrival_time).sum())
    assert 0.99 * arrived <= h["arrival_time"].sum() <= arrived     # bins up to the 99.5 % quantile
    assert h["arrival_time_captured"].sum() == pytest.approx(doc["captured_fraction"] * 400, abs=4)


def test_the_time_step_follows_the_rule():
    sc = make_scenario(chirp={"hold": "0 ms"})
    sp = sc.species
    atoms = draw_atoms(sc, 800, np.random.default_rng(8))
    prog = DetuningProgram(plan(sc).schedule())
    coarse = propagate(sc, atoms, prog, np.random.default_rng(1))
    fine = propagate(sc, atoms, prog, np.random.default_rng(1), step_fraction=STEP_FRACTION / 4)
    width = velocity_width(sp)
    assert coarse.largest_velocity_change <= STEP_FRACTION * width * (1 + 1e-9)
    assert fine.largest_velocity_change <= STEP_FRACTION / 4 * width * (1 + 1e-9)
    assert fine.steps > 2.5 * coarse.steps


@pytest.mark.slow
@pytest.mark.parametrize("key", [
    "rb87-chopped-oven",
    "na23-continuous-focused",
    "caf-buffer-gas",
])
def test_the_chirp_captures_more_than_the_light_held_at_the_start_detuning(key):
    sc = load_scenario(key)
    n = 3000
    doc = simulate(sc, atoms=n, seed=1).to_json()
    cap, fixed = doc["captured_fraction"], doc["baseline_fixed_frequency_fraction"]
    # significant at 3 binomial standard errors of the difference
    assert cap - fixed > 3 * math.hypot(binomial_sigma(cap, n), binomial_sigma(fixed, n))


def test_extremes_include_a_turning_point_inside_a_piece():
    # a schedule whose chirp turns back inside one polynomial piece (possible when the light gets
    # stronger along the path): the extreme lies at the turning point, not at a boundary

    from scipy.interpolate import PPoly

    from sweepgen.schedule import Schedule, Segment

    poly = PPoly(np.array([[-4.0], [4.0], [0.0]]), np.array([0.0, 1.0]))   # Δ(t) = 4t − 4t², peak 1 at t = 0.5
    sched = Schedule([Segment("chirp", 0.0, 1.0)], poly, 1.0, 0.0, 0.0)
    prog = DetuningProgram(sched)
    lo, hi = prog.extremes(0.2, 0.9)
    assert hi == pytest.approx(1.0) and lo == pytest.approx(min(4 * 0.2 - 4 * 0.04, 4 * 0.9 - 4 * 0.81))


@pytest.mark.slow
@pytest.mark.parametrize("key", ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"])
def test_quartering_the_step_changes_nothing_beyond_the_statistical_error(key):
    # the integrator is converged: with a step four times finer the captured fraction and the captured
    # atoms' mean final velocity change by less than three standard errors of their difference
    # (binomial sqrt(f(1-f)/n) and σ/sqrt(n) for each run, two independent runs)
    sc = load_scenario(key)
    n = 3000
    runs = [simulate(sc, atoms=n, seed=5, baselines=False, step_fraction=f).to_json()
            for f in (STEP_FRACTION, STEP_FRACTION / 4)]
    coarse, fine = runs
    f = coarse["captured_fraction"]
    assert f > 0.01
    assert abs(fine["captured_fraction"] - f) < 3 * math.sqrt(2) * binomial_sigma(f, n)
    n_cap = f * n
    se = coarse["final_velocity_spread"] / math.sqrt(n_cap)
    assert abs(fine["final_velocity_mean"] - coarse["final_velocity_mean"]) < 3 * math.sqrt(2) * se
    assert fine["time_step"]["steps"] > 2.5 * coarse["time_step"]["steps"]


# -- parts on every core (sweepgen.workers) ------------------------------------------------------
def _doc_without_timing(result):
    doc = result.to_json()
    doc.pop("played")
    return doc


def test_the_same_seed_gives_the_same_result_with_any_number_of_workers(monkeypatch):
    simulation = importlib.import_module("sweepgen.simulate")     # the module (sweepgen.simulate is the public function)

    monkeypatch.setattr(simulation, "CHUNK_ATOMS", 250)
    sc = make_scenario(source=NARROW, chirp=QUIET)
    seen = []
    one = simulate(sc, atoms=900, seed=4, workers=1, progress=lambda d, t: seen.append((d, t)))
    two = simulate(sc, atoms=900, seed=4, workers=2)
    assert seen == [(k, 4) for k in range(1, 5)]          # four parts: 225 atoms each
    np.testing.assert_array_equal(one.atoms.velocity, two.atoms.velocity)
    for a, b in ((one.flight, two.flight), (one.no_light, two.no_light), (one.fixed_frequency, two.fixed_frequency)):
        np.testing.assert_array_equal(a.fate, b.fate)
        np.testing.assert_array_equal(a.final_velocity, b.final_velocity)
        np.testing.assert_array_equal(a.photons, b.photons)
        assert (a.steps, a.atom_steps) == (b.steps, b.atom_steps)
    assert str(_doc_without_timing(one)) == str(_doc_without_timing(two))


def test_parts_are_fixed_by_the_atom_count_and_seeded_from_spawned_sequences():
    from sweepgen.simulate import CHUNK_ATOMS, chunks

    sc = make_scenario()
    parts = chunks(sc, 2 * CHUNK_ATOMS + 1, 7, (None, None, None))
    sizes = [c.atoms for c in parts]
    assert len(sizes) == 3 and sum(sizes) == 2 * CHUNK_ATOMS + 1 and max(sizes) - min(sizes) <= 1
    expected = np.random.SeedSequence(7).spawn(3)
    assert [c.seed.spawn_key for c in parts] == [s.spawn_key for s in expected]
    assert [c.atoms for c in chunks(sc, CHUNK_ATOMS, 7, (None, None, None))] == [CHUNK_ATOMS]


def test_a_single_part_flies_the_streams_of_the_seed_itself():
    # up to CHUNK_ATOMS atoms the run is what it was before parts: streams SeedSequence(seed).spawn(5)
    # (atoms, light, no light, fixed frequency, plan)
    sc = make_scenario(source=NARROW, chirp=QUIET)
    r = simulate(sc, atoms=400, seed=9)
    streams = np.random.SeedSequence(9).spawn(5)
    atoms = draw_atoms(sc, 400, np.random.default_rng(streams[0]))
    flight = propagate(sc, atoms, DetuningProgram(plan(sc).schedule()), np.random.default_rng(streams[1]))
    np.testing.assert_array_equal(r.flight.final_velocity, flight.final_velocity)
    assert r.flight.steps == flight.steps


def test_the_played_reason_prints_the_sample_rate_with_a_prefix():
    # a person reads this line (simulate's human output, the demo's summary): 8 MSa/s, not 8e+06 Sa/s
    from sweepgen.planner import plan
    from sweepgen.scenario import load_scenario
    from sweepgen.playback import played_detuning

    sc = load_scenario("rb87-chopped-oven")
    played = played_detuning(sc, plan(sc))
    assert played.sample_rate == 8e6 and " at 8 MSa/s, " in played.reason


@pytest.mark.slow
def test_halving_the_step_moves_no_statistic_of_a_large_run_beyond_its_error():
    # the convergence study (tests/benchmarks/study_convergence.py, 10⁶ atoms, README "Performance") at a
    # fifth of its size: 2·10⁵ atoms of the 87Rb scenario, the plan played, the default step against half of
    # it (two runs of the same seed; errors taken as of independent runs: binomial sqrt(f(1-f)/n),
    # σ/sqrt(n) for means). At 10⁶ atoms halving 0.1 moved this mean final velocity by 2.5 errors.
    sc = load_scenario("rb87-chopped-oven")
    n = 200_000
    runs = [simulate(sc, atoms=n, seed=3, baselines=False, step_fraction=f)
            for f in (STEP_FRACTION, STEP_FRACTION / 2)]
    figures = []
    for r in runs:
        cap = r.captured()
        v, photons = r.flight.final_velocity[cap], r.flight.photons[cap]
        f = float(cap.mean())
        figures.append({"captured": (f, math.sqrt(f * (1 - f) / n)),
                        "mean velocity": (float(v.mean()), float(v.std(ddof=1)) / math.sqrt(v.size)),
                        "photons": (float(photons.mean()), float(photons.std(ddof=1)) / math.sqrt(v.size))})
    for name, (x, sx) in figures[0].items():
        y, sy = figures[1][name]
        assert abs(x - y) < 3 * math.hypot(sx, sy), (name, x, y)
