"""The planner against closed forms (Foot 2005 §9.3.1, recalled section) and an
independent computation in the position domain, plus hypothesis properties."""

import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy import constants as C
from scipy import integrate, optimize

from sweepgen import physics
from sweepgen.errors import PlanError
from sweepgen.planner import fit_advice, plan
from sweepgen.scenario import load_scenario, scenario_from_dict

from conftest import examples, make_scenario, scenario_dict


def test_uniform_light_matches_closed_form():
    sc = make_scenario(source={"pulse_time": None}, chirp={"start_time": None})
    p = plan(sc)
    sp = sc.species
    a = 0.6 * physics.max_deceleration(3.0, sp.gamma, sp.wavelength, sp.mass)
    cf = physics.closed_form_slowing(260.0, 15.0, a, sp.wavelength)
    doc = p.to_json()
    assert doc["deceleration_min"] == pytest.approx(a, rel=1e-12)
    assert doc["chirp_duration"] == pytest.approx(cf["duration"], rel=1e-8)
    assert doc["slowing_distance"] == pytest.approx(cf["distance"], rel=1e-8)
    assert doc["chirp_span"] == pytest.approx(cf["span"], rel=1e-9)
    assert doc["chirp_rate_max"] == pytest.approx(cf["chirp_rate"], rel=1e-9)
    lag = physics.lag_velocity(3.0, 0.6, sp.gamma, sp.wavelength)
    assert doc["start_detuning"] == pytest.approx(-(260.0 + lag) / sp.wavelength, rel=1e-12)
    assert doc["start_time"] is None and doc["arrival_time"] is None
    assert doc["start_position"] == pytest.approx(0.05)


def test_reference_example_through_the_planner():
    # constant-deceleration closed form (Foot 2005 §9.3.1), worked example: 87Rb, s → ∞, η = 0.5, 300 → 10 m/s: 5.172 ms, 0.8016 m, 371.68 MHz, 71.87 MHz/ms
    # (s = 10⁵, the largest plausible saturation, stands for s → ∞: s/(1+s) = 1 − 10⁻⁵, inside the tolerances)
    sc = make_scenario(source={"pulse_time": None}, light={"saturation": 1e5, "start": "0 m"},
              target={"distance": "2 m"},
              chirp={"start_time": None, "force_fraction": 0.5, "start_velocity": "300 m/s", "end_velocity": "10 m/s"})
    doc = plan(sc).to_json()
    assert doc["chirp_duration"] == pytest.approx(5.172e-3, rel=2e-4)
    assert doc["slowing_distance"] == pytest.approx(0.8016, rel=2e-4)
    assert doc["chirp_span"] == pytest.approx(371.68e6, rel=2e-5)
    assert doc["chirp_rate_max"] == pytest.approx(71.87e9, rel=2e-4)


def test_pulsed_auto_ends_at_target_and_times():
    sc = make_scenario()
    p = plan(sc)
    doc = p.to_json()
    assert p.z_end == pytest.approx(1.0, abs=1e-9)
    assert doc["start_time"] == pytest.approx(p.z_start / 260.0)
    assert doc["arrival_time"] == pytest.approx(doc["start_time"] + doc["chirp_duration"], rel=1e-9)
    # photons: Δv / v_r with v_r = h/(mλ) (CODATA h)
    sp = sc.species
    assert doc["photons_per_atom"] == pytest.approx(245.0 * sp.mass * sp.wavelength / C.h, rel=1e-12)
    assert doc["recoil_velocity"] == pytest.approx(C.h / (sp.mass * sp.wavelength))
    assert doc["doppler_limit"] == pytest.approx(C.hbar * sp.gamma / (2 * C.k))


def test_pulsed_explicit_start_time():
    sc = make_scenario(chirp={"start_time": "1 ms"}, source={"pulse_time": "0.5 ms"})
    p = plan(sc)
    assert p.z_start == pytest.approx(260.0 * 0.5e-3)
    d = p.slowing_distance
    assert p.to_json()["arrival_time"] == pytest.approx(1e-3 + p.chirp_duration + (1.0 - p.z_start - d) / 15.0)


def test_explicit_start_too_late_is_a_plan_that_does_not_fit():
    """The sweep exists (it is planned) but breaks the target's distance: the checker's
    slowing_distance rule fails it and says how to fix it."""
    sc = make_scenario(chirp={"start_time": "2 ms"}, source={"pulse_time": "0.5 ms"})
    p = plan(sc)
    assert not p.fits and p.slowing_distance == pytest.approx(0.6675, rel=1e-4)
    assert p.z_start == pytest.approx(260.0 * 1.5e-3)
    # the design atom crosses the target during the chirp: 1 m - 0.39 m = 0.61 m after the chirp start
    # at v(t) = 260 m/s - a t (constant deceleration, uniform light)
    tr = p.trajectory
    a = float(tr.deceleration[0])
    t_cross = (260.0 - math.sqrt(260.0 ** 2 - 2 * a * (1.0 - p.z_start))) / a
    assert p.arrival_time == pytest.approx(2e-3 + t_cross, rel=1e-9)
    assert "start the chirp earlier (about 1.779 ms" in fit_advice(p)


def test_no_earlier_start_is_offered_when_it_would_lie_before_the_light():
    # pulse at 10 ms, target 0.70 m: the 0.6675 m slowing distance fits only if the design atom starts
    # at 0.0325 m, before the light start (0.05 m), so no earlier start time can help
    sc = make_scenario(source={"pulse_time": "10 ms"}, target={"distance": "0.7 m"},
                       chirp={"start_time": "10.5 ms", "period": "40 ms"})
    p = plan(sc)
    assert not p.fits
    advice = fit_advice(p)
    assert "lower chirp.start_velocity (now 260 m/s)" in advice and "start the chirp earlier" not in advice


def test_explicit_start_before_light_cannot_exist_and_is_refused_with_numbers():
    sc = make_scenario(chirp={"start_time": "0.1 ms"})
    with pytest.raises(PlanError) as info:
        plan(sc)
    msg = str(info.value)
    assert info.value.exit_code == 2
    assert "chirp.start_time" in msg and "before the light start" in msg and "0.05" in msg


@pytest.mark.parametrize("source", [{"pulse_time": "0 ms"}, {"pulse_time": None}])
def test_distance_too_short_is_planned_from_the_light_start(source):
    sc = make_scenario(target={"distance": "0.5 m"}, source=source,
                       chirp={"start_time": "auto" if source["pulse_time"] else None})
    p = plan(sc)
    assert p.z_start == pytest.approx(0.05) and p.z_end == pytest.approx(0.05 + 0.6675, rel=1e-4)
    assert not p.fits


def _focused_reference(s0, w0, zf, z0, v1, v2, eta, sp):
    """Independent computation in the position domain: v(z)² = v1² − 2∫a_d dz with the
    closed-form integral of s/(1+s) for a Gaussian beam; t = ∫ dz/v. The largest force is
    ħkΓ f/m with the species' largest scattering rate fΓ (1/2 for two levels)."""
    zr = math.pi * w0 ** 2 / sp.wavelength
    amax = C.hbar * 2 * math.pi / sp.wavelength * sp.gamma * sp.rate_fraction / sp.mass
    q = math.sqrt(1 + s0)

    def work(z):   # ∫_{z0}^{z} a_d dz'
        f = lambda x: s0 * zr / q * math.atan((x - zf) / (zr * q))
        return eta * amax * (f(z) - f(z0))

    L = optimize.brentq(lambda z: 2 * work(z) - (v1 ** 2 - v2 ** 2), z0, z0 + 100) - z0
    t = integrate.quad(lambda z: 1 / math.sqrt(max(v1 ** 2 - 2 * work(z), 1e-30)), z0, z0 + L, limit=200)[0]
    return L, t


def test_focused_light_matches_independent_position_domain_integral():
    sc = make_scenario(source={"pulse_time": None}, chirp={"start_time": None},
              light={"saturation": 3.0, "start": "0.1 m", "waist": "0.5 mm", "focus": "0 m"})
    p = plan(sc)
    L, t = _focused_reference(3.0, 0.5e-3, 0.0, 0.10, 260.0, 15.0, 0.6, sc.species)
    assert p.slowing_distance == pytest.approx(L, rel=1e-6)
    assert p.chirp_duration == pytest.approx(t, rel=1e-5)


def test_focused_auto_start_root_find():
    sc = make_scenario(light={"saturation": 4.0, "waist": "0.6 mm", "focus": "0.2 m"})
    p = plan(sc)
    assert p.z_end == pytest.approx(1.0, abs=1e-6)
    L, t = _focused_reference(4.0, 0.6e-3, 0.2, p.z_start, 260.0, 15.0, 0.6, sc.species)
    assert p.slowing_distance == pytest.approx(L, rel=1e-6)
    assert p.chirp_duration == pytest.approx(t, rel=1e-5)


species_keys = st.sampled_from(["rb87-d2", "cs133-d2", "na23-d2", "k39-d2"])


@settings(max_examples=examples(25))
@given(key=species_keys, s0=st.floats(0.3, 20.0), eta=st.floats(0.2, 0.9), v1=st.floats(60.0, 500.0),
       frac=st.floats(0.02, 0.7), focused=st.booleans(), waist=st.floats(0.4e-3, 3e-3))
def test_planner_properties(key, s0, eta, v1, frac, focused, waist):
    v2 = frac * v1
    light = {"saturation": s0, "start": "0 m"}
    if focused:
        light.update(waist=f"{waist!r} m", focus="0 m")
    data = scenario_dict(species=key, light=light, source={"pulse_time": None},
                         target={"distance": "30 m"},
                         chirp={"start_time": None, "force_fraction": eta, "start_velocity": f"{v1!r} m/s",
                                "end_velocity": f"{v2!r} m/s", "period": "10 s"})
    sc = scenario_from_dict(data, "prop.toml")
    try:
        p = plan(sc)
    except PlanError:
        assume(False)
    tr = p.trajectory
    lam = sc.species.wavelength
    # detuning rises monotonically through the chirp toward resonance
    assert np.all(tr.chirp_rate > 0)
    assert np.all(np.diff(tr.detuning) > 0)
    assert tr.detuning[-1] < 0
    # span = (v_start − v_end)/λ plus the change of lag
    assert p.chirp_span == pytest.approx((v1 - v2) / lam + (tr.lag[0] - tr.lag[-1]) / lam, rel=1e-9)
    # slowing distance = ∫ v dt
    assert p.slowing_distance == pytest.approx(integrate.simpson(tr.velocity, x=tr.time), rel=1e-6)
    # the schedule reproduces the trajectory's detuning at its nodes
    sched = p.schedule()
    assert np.allclose(sched.detuning(tr.time + p.chirp_start), tr.detuning, rtol=0, atol=1e-6 * abs(tr.detuning[0]))
