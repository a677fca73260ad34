"""The refinements of the physics model against the outside world.

Sources of the expected values, named beside each assertion:

* the largest scattering rate of a multi-level system, Γ·n_e/(n_g + n_e)
  (M. R. Tarbutt, New J. Phys. 17, 015007 (2015), recalled; REFERENCES.md);
* saturation intensities of the alkali D2 lines (D. A. Steck's tables, recalled; REFERENCES.md);
* the two-level Lorentzian and its far wing (C. J. Foot, Atomic Physics, OUP 2005, ch. 7);
* a two-state Markov process (bright ⇄ dark at constant rates r_d, r_b) spends a fraction
  r_d/(r_d + r_b) of the time dark (textbook probability);
* the fraction of a uniform disc inside a radius r is (r/R)² (geometry), with the radius where a
  TEM00 beam s0·exp(−2r²/w²) still gives the design force (A. E. Siegman, Lasers, 1986, ch. 17);
* reference integrations with scipy.integrate.solve_ivp of the textbook force law
  dv/dt = −v_r R (Foot 2005, §9.3);
* distributions of emission times against scipy.stats (uniform, norm).
"""

import math

import numpy as np
import pytest
from scipy import constants as C
from scipy import stats
from scipy.integrate import solve_ivp

from sweepgen import physics
from sweepgen.planner import plan
from sweepgen.simulate import DetuningProgram, draw_atoms, propagate, simulate
from sweepgen.species import load_species

from conftest import TWO_LEVEL_RB, make_scenario

NARROW = {"model": "gaussian", "mean_velocity": "200 m/s", "velocity_spread": "0.1 m/s", "pulse_time": "0 ms",
          "temperature": None}


def binomial_sigma(f, n):
    return math.sqrt(max(f * (1.0 - f), 1.0 / n) / n)


def species_with_level(tmp_path, splitting, strength, branching):
    """The two-level 87Rb test species with an off-resonant excited level added."""
    text = open(TWO_LEVEL_RB).read() + (f'\n[off_resonant_level]\nsplitting = "{splitting}"\nstrength = {strength}\n'
                                         f'branching = {branching}\nsource = "test data"\n')
    path = tmp_path / "depumped.toml"
    path.write_text(text)
    return str(path)


# -- 1. effective force per species ----------------------------------------------------------
def test_multilevel_rate_fraction_for_a_stated_level_scheme():
    # Tarbutt 2015 (recalled): R_max = Γ n_e/(n_g + n_e); CaF's main cycle, 24 + 4 sub-levels: Γ/7
    assert physics.multilevel_rate_fraction(24, 4) == pytest.approx(1.0 / 7.0, rel=1e-15)
    assert physics.multilevel_rate_fraction(1, 1) == 0.5            # two levels: Γ/2
    sp = load_species("caf-a-x")
    assert sp.rate_fraction == pytest.approx(4.0 / 28.0, rel=1e-15)
    # the planner brakes at η ħkΓ n_e/((n_g + n_e) m) s/(1 + s) (CODATA ħ)
    sc = make_scenario(species="caf-a-x", source={"pulse_time": None}, light={"saturation": 4.0, "start": "0.1 m"},
              target={"distance": "1.3 m", "capture_velocity": "12 m/s"},
              chirp={"start_time": None, "start_velocity": "150 m/s", "end_velocity": "10 m/s", "force_fraction": 0.35,
                     "period": "100 ms"})
    a = 0.35 * C.hbar * (2 * math.pi / sp.wavelength) * sp.gamma * (4 / 28) / sp.mass * 4.0 / 5.0
    p = plan(sc)
    assert p.to_json()["deceleration_max"] == pytest.approx(a, rel=1e-12)
    assert p.slowing_distance == pytest.approx((150 ** 2 - 10 ** 2) / (2 * a), rel=1e-8)


@pytest.mark.parametrize("key,cycling,effective", [
    ("rb87-d2", 1.66933, 3.57713),     # Steck, Rubidium 87 D Line Data (recalled)
    ("cs133-d2", 1.1023, 2.706),       # Steck, Cesium D Line Data (recalled)
    ("na23-d2", 6.2600, 13.41),        # Steck, Sodium D Line Data (recalled)
])
def test_saturation_intensities_are_steck_values(key, cycling, effective):
    sp = load_species(key)
    to_mw_cm2 = 1e3 / 1e4                # W/m² → mW/cm²
    assert sp.saturation_intensity * to_mw_cm2 == pytest.approx(cycling, rel=1e-5)
    assert sp.effective_saturation_intensity * to_mw_cm2 == pytest.approx(effective, rel=1e-4)
    assert "cycling" in sp.saturation_definition
    # a scenario's s is measured against the cycling value; the atoms see s·I_sat/I_sat,eff
    sc = make_scenario(species=key)
    assert sc.light.peak == pytest.approx(3.0 * cycling / effective, rel=1e-5)


def test_older_species_files_keep_working_with_the_two_level_defaults():
    sp = load_species(TWO_LEVEL_RB)
    assert sp.rate_fraction == 0.5 and sp.saturation_factor == 1.0 and sp.off_resonant is None


# -- 3. depumping and repump -------------------------------------------------------------------
def test_off_resonant_ratio_is_that_of_two_lorentzians():
    gamma = 2 * math.pi * 6.0666e6
    # far wing, low intensity: κ (Γ/2)² / (2π δ_hf)² (Foot 2005, ch. 7, the Lorentzian's wing)
    far = physics.off_resonant_ratio(0.0, 1e-9, gamma, -266.65e6, 5 / 14)
    assert far == pytest.approx(5 / 14 * (6.0666e6 / 2) ** 2 / 266.65e6 ** 2, rel=2e-4)
    # at any detuning and intensity: κ (1 + s + x²)/(1 + κs + x_off²), x = 2δ/(Γ/2π)
    for seen, s in [(-3e6, 1.4), (2e6, 10.0), (-40e6, 0.3)]:
        x, x_off = 2 * seen / 6.0666e6, 2 * (seen + 266.65e6) / 6.0666e6
        ref = (5 / 14) * (1 + s + x * x) / (1 + 5 / 14 * s + x_off * x_off)
        assert physics.off_resonant_ratio(seen, s, gamma, -266.65e6, 5 / 14) == pytest.approx(ref, rel=1e-12)


def _mean_path(sc, detuning, rates):
    """The mean atom through the light at a constant detuning, integrated with scipy: z, v and the
    integral of each of ``rates(v)`` over time (solve_ivp, Foot 2005 §9.3 force law)."""
    sp = sc.species
    v_r = C.h / (sp.mass * sp.wavelength)

    def rhs(_t, y):
        r = rates(y[1])
        return [y[1], -v_r * r[0], *r[1:]]

    def arrive(_t, y):
        return y[0] - sc.target.distance

    arrive.terminal = True
    v0 = sc.source.mean_velocity
    sol = solve_ivp(rhs, (0.0, 1.0), [sc.light.start, v0, *([0.0] * (len(rates(v0)) - 1))], events=arrive,
                    rtol=1e-10, atol=1e-12)
    return sol.y_events[0][0]


def test_depumping_follows_the_off_resonant_rate(tmp_path):
    # Light resonant with a narrow beam over the last 10 mm before the target, held at one detuning;
    # an off-resonant level 800 MHz away, strength 1, every decay dark: P(dark) = 1 − exp(−∫ R_off dt).
    sp_path = species_with_level(tmp_path, "-800 MHz", 1.0, 1.0)
    sc = make_scenario(species=sp_path, source=NARROW, light={"saturation": 50.0, "start": "0.99 m"},
              target={"capture_velocity": "300 m/s"})
    sp = sc.species
    detuning = -200.0 / sp.wavelength
    n = 3000
    atoms = draw_atoms(sc, n, np.random.default_rng(3))
    flight = propagate(sc, atoms, DetuningProgram.fixed(detuning), np.random.default_rng(4))

    def rates(v):
        on = physics.scattering_rate(detuning, v, 50.0, sp.gamma, sp.wavelength)
        seen = detuning + v / sp.wavelength
        off = physics.scattering_rate(seen + 800e6, 0.0, 50.0, sp.gamma, sp.wavelength)
        return [on, off]

    hazard = _mean_path(sc, detuning, rates)[2]
    expected = -math.expm1(-hazard)
    assert 0.3 < expected < 0.7
    assert flight.depumped.mean() == pytest.approx(expected, abs=4 * binomial_sigma(expected, n) + 0.01)
    # the same through the ratio per scattered photon: b·R_off/R = b·off_resonant_ratio
    v_mid = 197.0
    ratio = physics.off_resonant_ratio(detuning + v_mid / sp.wavelength, 50.0, sp.gamma, -800e6, 1.0)
    assert ratio == pytest.approx(rates(v_mid)[1] / rates(v_mid)[0], rel=1e-12)


def test_a_repump_holds_the_dark_fraction_of_a_two_state_process(tmp_path):
    # Depumping at r_d = b R_off, repumping at r_b = (1 − b) R_rep: after many switches (μs) an atom is
    # dark with probability r_d/(r_d + r_b) (two-state Markov process), here at the target plane.
    sp_path = species_with_level(tmp_path, "-100 MHz", 1.0, 0.9)
    detuning = -200.0 / load_species(sp_path).wavelength
    sc = make_scenario(species=sp_path, source=NARROW, light={"saturation": 50.0, "start": "0.99 m"},
              target={"capture_velocity": "300 m/s"},
              channels={"repump": {"kind": "frequency", "role": "repump", "saturation": 20.0,
                                   "detuning": f"{detuning} Hz"}})
    sp = sc.species
    n = 4000
    flight = propagate(sc, draw_atoms(sc, n, np.random.default_rng(5)), DetuningProgram.fixed(detuning),
                       np.random.default_rng(6))

    def switch(v):
        seen = detuning + v / sp.wavelength
        r_d = 0.9 * physics.scattering_rate(seen + 100e6, 0.0, 50.0, sp.gamma, sp.wavelength)
        r_b = 0.1 * physics.scattering_rate(detuning, v, 20.0, sp.gamma, sp.wavelength)
        return r_d, r_b

    def rates(v):
        r_d, r_b = switch(v)
        bright = r_b / (r_d + r_b)
        return [bright * physics.scattering_rate(detuning, v, 50.0, sp.gamma, sp.wavelength)]

    v_end = _mean_path(sc, detuning, rates)[1]
    r_d, r_b = switch(v_end)
    expected = r_d / (r_d + r_b)
    assert 0.15 < expected < 0.5
    assert flight.dark.mean() == pytest.approx(expected, abs=4 * binomial_sigma(expected, n) + 0.01)
    assert flight.depumped.mean() > 0.99          # every atom went dark at least once on the way


def test_depumping_without_repump_loses_the_slowed_atoms_and_a_repump_brings_them_back():
    # the shipped 87Rb species (F'=2 266.65 MHz below F'=3, Steck, recalled) on a narrow beam
    quiet = {"hold": "0 ms", "period": "100 ms"}
    base = dict(species="rb87-d2", source={**NARROW, "mean_velocity": "150 m/s"}, chirp=quiet)
    without = simulate(make_scenario(**base), atoms=600, seed=2, baselines=False).to_json()
    repump = {"repump": {"kind": "frequency", "role": "repump", "saturation": 1.0, "offset": "0 MHz"}}
    with_repump = simulate(make_scenario(**base, channels=repump), atoms=600, seed=2, baselines=False).to_json()
    assert without["captured_fraction"] < 0.2 and without["lost_by_reason"]["dark_state"] > 0.8
    assert with_repump["captured_fraction"] > 0.95


# -- 2. beams with a cross-section -----------------------------------------------------------------
def _disc_closed_form(s0, eta, waist, radius):
    """Fraction of a uniform disc of ``radius`` within the radius where s0·exp(−2r²/w²) still gives
    η of the on-axis force: s_t/(1 + s_t) = η s0/(1 + s0)."""
    target = eta * s0 / (1 + s0)
    s_t = target / (1 - target)
    r_t = waist * math.sqrt(math.log(s0 / s_t) / 2.0)
    return min((r_t / radius) ** 2, 1.0)


DISC = dict(source={**NARROW, "mean_velocity": "150 m/s", "radius": "3 mm"},
            light={"saturation": 5.0, "start": "0.05 m", "waist": "2.5 mm"},
            target={"capture_velocity": "135 m/s"},
            chirp={"start_velocity": "160 m/s", "end_velocity": "130 m/s", "force_fraction": 0.5, "hold": "0 ms",
                   "period": "100 ms"})


def test_the_checker_finds_the_part_of_a_disc_source_where_the_beam_gives_the_design_force():
    # a uniform disc source, atoms parallel to the axis: (r_t/R)² of them find the design force
    sc = make_scenario(**DISC)
    expected = _disc_closed_form(5.0, 0.5, 2.5e-3, 3e-3)
    assert 0.5 < expected < 0.8
    # recoil heating moves atoms by ~0.05 mm over this short chirp: a small allowance
    assert plan(sc).overlap.fraction == pytest.approx(expected, abs=0.03)
    # the simulation captures those and a few more (atoms a little short of the force still keep up
    # with so short a chirp) and far fewer than with unbounded light
    n = 2000
    captured = simulate(sc, atoms=n, seed=8, baselines=False).to_json()["captured_fraction"]
    assert expected - 4 * binomial_sigma(expected, n) < captured < 0.9


def test_each_atom_scatters_at_the_intensity_of_its_own_place():
    # a disc of parallel atoms crosses 3 mm of a Gaussian beam held resonant with them: an atom at r
    # scatters ∫ R(s0 exp(−2r²/w²), v) dt photons (the rate of Foot 2005 eq. 7.68, integrated along the
    # mean path with scipy), here from about 190 on the axis to a few at 3 mm
    sc = make_scenario(source={**NARROW, "radius": "3 mm"}, light={"saturation": 2.0, "start": "0.997 m", "waist": "2 mm"},
              target={"capture_velocity": "300 m/s"})
    sp = sc.species
    detuning = -200.0 / sp.wavelength
    n = 4000
    atoms = draw_atoms(sc, n, np.random.default_rng(9))
    flight = propagate(sc, atoms, DetuningProgram.fixed(detuning), np.random.default_rng(10))
    r = np.hypot(atoms.x, atoms.y)
    grid = np.linspace(0.0, 3e-3, 31)
    reference = []
    for radius in grid:
        s = 2.0 * math.exp(-2 * radius ** 2 / 2e-3 ** 2)
        reference.append(_photons_along(sc, detuning, s))
    expect = np.interp(r, grid, reference)
    for lo, hi in [(0.0, 0.8e-3), (0.8e-3, 1.6e-3), (1.6e-3, 2.4e-3), (2.4e-3, 3e-3)]:
        inside = (r >= lo) & (r < hi)
        got, ref = flight.photons[inside].mean(), expect[inside].mean()
        # Poisson counts: standard error sqrt(ref/n_bin)
        assert got == pytest.approx(ref, abs=5 * math.sqrt(ref / inside.sum()) + 0.01 * ref)


def _photons_along(sc, detuning, s):
    """Photons scattered while crossing the light at a constant detuning and saturation (solve_ivp)."""
    sp = sc.species
    v_r = C.h / (sp.mass * sp.wavelength)

    def rhs(_t, y):
        rate = physics.scattering_rate(detuning, y[1], s, sp.gamma, sp.wavelength)
        return [y[1], -v_r * rate, rate]

    def arrive(_t, y):
        return y[0] - sc.target.distance

    arrive.terminal = True
    sol = solve_ivp(rhs, (0.0, 1.0), [sc.light.start, sc.source.mean_velocity, 0.0], events=arrive,
                    rtol=1e-10, atol=1e-12)
    return float(sol.y_events[0][0][2])


def test_an_unbounded_light_reaches_every_atom_of_the_disc():
    sc = make_scenario(**{**DISC, "light": {"saturation": 5.0, "start": "0.05 m"}})
    assert simulate(sc, atoms=500, seed=8, baselines=False).to_json()["captured_fraction"] == 1.0
    assert plan(sc).overlap.fraction == 1.0


def test_a_collimator_sets_the_angles():
    # uniform points in the source disc and in the collimator disc: the angle's x component is the
    # difference of two independent disc coordinates over the distance (geometry)
    sc = make_scenario(source={"radius": "1 mm", "collimator": {"distance": "0.25 m", "radius": "2 mm"}})
    atoms = draw_atoms(sc, 20000, np.random.default_rng(1))
    theta = atoms.vx / atoms.velocity
    assert np.max(np.abs(theta)) <= 3e-3 / 0.25 + 1e-12
    # variance of a coordinate of a uniform disc is R²/4
    assert np.var(theta) == pytest.approx((1e-3 ** 2 + 2e-3 ** 2) / 4 / 0.25 ** 2, rel=0.05)
    assert np.var(atoms.x) == pytest.approx(1e-3 ** 2 / 4, rel=0.05)


# -- 4. finite source pulses ---------------------------------------------------------------------
@pytest.mark.parametrize("shape", ["flat", "gaussian"])
def test_pulse_emission_times(shape):
    sc = make_scenario(source={"pulse_time": "1 ms", "pulse_duration": "0.4 ms", "pulse_shape": shape})
    t = draw_atoms(sc, 5000, np.random.default_rng(2)).emission_time
    if shape == "flat":
        ref = stats.uniform(loc=1e-3, scale=0.4e-3)                           # scipy.stats.uniform
    else:
        ref = stats.norm(loc=1.2e-3, scale=0.4e-3 / (2 * math.sqrt(2 * math.log(2))))   # FWHM 0.4 ms
    assert stats.kstest(t, ref.cdf).pvalue > 1e-3
    # the design atom leaves at the pulse's leading edge: the plan does not depend on the duration
    short = plan(make_scenario(source={"pulse_time": "1 ms"}))
    assert plan(sc).to_json()["start_time"] == pytest.approx(short.to_json()["start_time"], rel=1e-12)


def test_a_long_pulse_lowers_the_capture():
    quiet = {"hold": "0 ms", "period": "100 ms"}
    short = make_scenario(source={"pulse_time": "1 ms"}, chirp=quiet)
    long = make_scenario(source={"pulse_time": "1 ms", "pulse_duration": "3 ms"}, chirp=quiet)
    n = 1500
    a = simulate(short, atoms=n, seed=3, baselines=False).to_json()["captured_fraction"]
    b = simulate(long, atoms=n, seed=3, baselines=False).to_json()["captured_fraction"]
    assert a - b > 4 * math.hypot(binomial_sigma(a, n), binomial_sigma(b, n))


def test_a_pulse_must_end_within_the_period():
    from sweepgen.errors import InputError

    with pytest.raises(InputError) as info:
        make_scenario(source={"pulse_time": "15 ms", "pulse_duration": "6 ms"})
    assert "source.pulse_time" in str(info.value)
    with pytest.raises(InputError) as info:
        make_scenario(source={"pulse_time": None, "pulse_duration": "1 ms"}, chirp={"start_time": None})
    assert "source.pulse_duration" in str(info.value)


# -- 5. after the chirp -----------------------------------------------------------------------------
def test_velocity_lost_during_a_hold_at_constant_detuning():
    # uniform light: the hold at the end detuning keeps braking atoms that left the chirp at the end
    # velocity; scipy.integrate.solve_ivp of dv/dt = −v_r R(Δ_end, v, s) over the hold (Foot 2005 §9.3)
    sc = make_scenario(source={"pulse_time": None}, chirp={"start_time": None, "hold": "0.3 ms", "return_time": "0.2 ms"})
    p = plan(sc)
    sp = sc.species
    v_r = C.h / (sp.mass * sp.wavelength)
    s = sc.light.peak

    def rhs(_t, y):
        return [-v_r * physics.scattering_rate(p.end_detuning, y[0], s, sp.gamma, sp.wavelength)]

    ref = solve_ivp(rhs, (0.0, 0.3e-3), [15.0], rtol=1e-11, atol=1e-12).y[0, -1]
    doc = p.to_json()
    assert doc["hold_velocity_loss"] == pytest.approx(15.0 - ref, rel=1e-6)
    assert doc["return_velocity_loss"] > 0
    # the light at rest at the start detuning brakes it a little more on its way to the target
    assert 0 < doc["after_chirp_velocity"] < 15.0 - doc["hold_velocity_loss"] - doc["return_velocity_loss"]
    assert not doc["after_chirp_stopped"]


def test_a_long_hold_stops_the_slowed_atoms_in_the_plan_and_in_the_simulation():
    quiet = {"period": "100 ms", "hold": "3 ms"}
    sc = make_scenario(source={**NARROW, "mean_velocity": "150 m/s", "pulse_time": "0 ms"}, chirp=quiet,
              target={"distance": "1.0 m"})
    doc = plan(sc).to_json()
    assert doc["after_chirp_stopped"] and 0 < doc["after_chirp_stop_time"] < 3e-3
    assert doc["after_chirp_velocity"] == 0.0 and doc["hold_velocity_loss"] == pytest.approx(15.0)
    sim = simulate(make_scenario(source={**NARROW, "mean_velocity": "150 m/s", "pulse_duration": "2 ms"}, chirp=quiet),
                   atoms=800, seed=1, baselines=False).to_json()
    assert sim["lost_by_reason"]["turned_back"] > 0.2


# -- 8. honest temperatures ------------------------------------------------------------------------
def test_temperatures_of_the_captured_atoms_are_about_their_own_mean():
    sc = make_scenario(source={**NARROW, "mean_velocity": "150 m/s"}, chirp={"hold": "0 ms", "period": "100 ms"})
    r = simulate(sc, atoms=800, seed=5, baselines=False)
    doc = r.to_json()
    cap = r.captured()
    v = r.flight.final_velocity[cap]
    # m·var/k_B about the captured atoms' own mean (CODATA k_B); a shift of all velocities changes nothing
    assert doc["longitudinal_temperature"] == pytest.approx(sc.species.mass * np.var(v, ddof=1) / C.k, rel=1e-12)
    assert doc["longitudinal_temperature"] == pytest.approx(
        sc.species.mass * np.var(v + 100.0, ddof=1) / C.k, rel=1e-9)
    # the Doppler limit ħΓ/2k_B is printed beside them (Foot 2005, eq. 9.25)
    assert doc["doppler_limit"] == pytest.approx(C.hbar * sc.species.gamma / (2 * C.k), rel=1e-12)
    # a point source straight along the axis: the transverse motion is the emission recoils' alone,
    # variance N v_r²/3 per axis (isotropic emission, Foot 2005 ch. 9, recalled), so T⊥ = m v_r² N/(3 k_B)
    sp = sc.species
    v_r = C.h / (sp.mass * sp.wavelength)
    n_ph = r.flight.photons[cap].mean()
    assert doc["transverse_temperature"] == pytest.approx(sp.mass * v_r ** 2 * n_ph / (3 * C.k),
                                                          rel=4 / math.sqrt(cap.sum()))


# -- 6. simulate what is played ------------------------------------------------------------------------
def test_a_sampled_program_is_linear_between_samples_and_finds_its_extremes():
    from sweepgen.programs import SampledProgram

    rng = np.random.default_rng(4)
    values = np.cumsum(rng.normal(size=1000))
    prog = SampledProgram(values, 0.01)
    dt = 0.01 / 1000
    t = rng.uniform(-0.02, 0.03, 500)
    # numpy.interp over one period and the first sample of the next (the program repeats)
    grid = np.arange(1001) * dt
    ref = np.interp(t % 0.01, grid, np.append(values, values[0]))
    np.testing.assert_allclose([prog.at(x) for x in t], ref, rtol=0, atol=1e-9)
    for t0 in (-0.003, 0.0, 0.0042, 0.0099):
        for width in (1e-7, 3e-5, 2e-3, 0.011):
            dense = np.array([prog.at(x) for x in np.linspace(t0, t0 + width, 3001)])
            lo, hi = prog.extremes(t0, t0 + width)
            assert lo <= dense.min() + 1e-12 and hi >= dense.max() - 1e-12
            assert lo >= values.min() and hi <= values.max()


@pytest.mark.slow
def test_simulate_plays_what_the_hardware_plays(tmp_path):
    # a slow first-order actuator (1 kHz corner): the laser lags the plan by about chirp rate × τ
    # (Ogata, steady ramp lag, REFERENCES.md); the atoms fly through that, and the plan is flown beside
    from conftest import CHECKED_SCENARIO, PIEZO_LASER, merged, write_checked
    from sweepgen.programs import SampledProgram
    from sweepgen.scenario import load_scenario
    from sweepgen.playback import played_detuning

    slow = merged(PIEZO_LASER, response={"model": "first-order", "corner": "1 kHz"},
                  limits={"max_chirp_rate": "10 THz/s", "max_slew": "1 kV/ms"})
    quick = merged(CHECKED_SCENARIO, source={"model": "gaussian", "mean_velocity": "150 m/s", "pulse_time": "0 ms",
                                            "velocity_spread": "10 m/s", "temperature": None},
                   chirp={"start_time": "auto", "period": "30 ms"})
    sc = load_scenario(str(write_checked(tmp_path, quick, slow)))
    p = plan(sc)
    played = played_detuning(sc, p)
    assert played.hardware and isinstance(played.program, SampledProgram)
    tau = 1 / (2 * math.pi * 1e3)
    assert played.tracking_error == pytest.approx(p.chirp_rate_max * tau, rel=0.05)
    assert not played_detuning(sc, p, ideal=True).hardware
    doc = simulate(sc, atoms=400, seed=3, baselines=False, played=played).to_json()
    assert doc["played"]["detuning"] == "hardware" and "first-order" in doc["played"]["reason"]
    assert doc["ideal_captured_fraction"] > 0.5
    # the lagging laser stays redder than planned: the atoms leave it faster
    assert doc["final_velocity_mean"] > doc["ideal_final_velocity_mean"] + 1.0
    ideal = simulate(sc, atoms=400, seed=3, baselines=False).to_json()   # the plan, by default
    assert ideal["played"]["detuning"] == "plan" and "ideal_captured_fraction" not in ideal
