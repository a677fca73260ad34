"""The lights' levels that gate channels set in time (sweepgen.lighting), and what the simulation and the
follow-up after the chirp make of them.

Physics checked: the saturation parameter is the intensity over the saturation intensity, s = I/I_sat
(e.g. C. J. Foot, Atomic Physics, Oxford 2005, §7.6, recalled section), so a light let through at a
fraction L of its intensity acts as the same light with saturation L·s; a light that is dark exerts no
force, so an atom flies on at constant velocity (Newton's first law: the follow-up after the chirp must
give back exactly the velocity it started with).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from sweepgen import _kernel
from sweepgen.channels import Channel, Gate
from sweepgen.lighting import EDGE_EPS, LightLevels, light_levels
from sweepgen.planner import plan
from sweepgen.scenario import load_scenario
from sweepgen.simulate import DetuningProgram, draw_atoms, propagate
from sweepgen.timing import moments


def gated(sc, *gates):
    """``sc`` with further gate channels: ``(name, on, off, level, lights, on_shift, off_shift)`` each."""
    extra = tuple(Channel(name=name, kind="gate", output=3 + i,
                          gate=Gate(on, off, on_shift, off_shift, level, lights=tuple(lights)))
                  for i, (name, on, off, level, lights, on_shift, off_shift) in enumerate(gates))
    return dataclasses.replace(sc, channels=sc.channels + extra)


@pytest.fixture(scope="module")
def rb():
    sc = load_scenario("rb87-chopped-oven")             # has a repump channel following the sweep
    return sc, plan(sc)


def test_a_gate_sets_its_lights_level_inside_its_window_and_dark_outside(rb):
    sc, p = rb
    when = moments(p)
    sc = gated(sc, ("gate", "chirp_start", "chirp_end", 0.8, ["main"], -20e-6, 50e-6))
    lv = light_levels(sc, p)
    a, b = when["chirp_start"] - 20e-6, when["chirp_end"] + 50e-6
    assert lv.names == ("main", "repump") and lv.gated
    np.testing.assert_allclose(lv.edges, [a, b])
    for t, main in ((0.5 * a, 0.0), (0.5 * (a + b), 0.8), (0.5 * (b + lv.period), 0.0)):
        assert tuple(lv.at(t)) == (main, 1.0)                    # the repump is not behind this gate
    assert lv.next_edge(0.0) == pytest.approx(a) and lv.next_edge(a) == pytest.approx(b)
    assert lv.next_edge(b) == pytest.approx(lv.period + a)          # the next period's opening
    assert lv.at(a - 0.1 * EDGE_EPS)[0] == 0.8                      # landing on an edge to rounding is past it
    assert lv.at(a + lv.period)[0] == 0.8 and lv.at(b - 3 * lv.period)[0] == 0.0      # every period alike


def test_gates_in_series_multiply_and_a_window_is_clipped_to_the_period(rb):
    sc, p = rb
    sc = gated(sc, ("wide", "trigger", "chirp_end", 0.5, ["main", "repump"], -1.0, 0.0),   # opens before 0
               ("narrow", "chirp_start", "chirp_end", 0.4, ["main"], 0.0, 0.0))
    lv = light_levels(sc, p)
    when = moments(p)
    inside = 0.5 * (when["chirp_start"] + when["chirp_end"])
    assert lv.at(inside) == pytest.approx([0.2, 0.5])
    assert lv.at(0.5 * when["chirp_start"]) == pytest.approx([0.0, 0.5])     # open from 0: clipped, as played
    assert lv.at(when["chirp_end"] + 1e-6) == pytest.approx([0.0, 0.0])


def test_a_gate_that_never_opens_keeps_its_lights_dark_and_no_gate_means_full_light(rb):
    sc, p = rb
    never = light_levels(gated(sc, ("gate", "trigger", "trigger", 1.0, ["main"], 0.0, 0.0)), p)
    assert never.edges.size == 0 and tuple(never.at(0.3)) == (0.0, 1.0)
    full = light_levels(sc, p)
    assert not full.gated and full.next_edge(0.1) == math.inf and tuple(full.at(0.1)) == (1.0, 1.0)


def test_the_compiled_lookups_agree_with_the_levels(rb):
    sc, p = rb
    lv = light_levels(gated(sc, ("gate", "chirp_start", "return_end", 0.7, ["main"], -20e-6, 0.0)), p)
    times = np.random.default_rng(1).uniform(-2 * lv.period, 3 * lv.period, 2000)
    times = np.concatenate([times, lv.edges, lv.edges - 0.5 * EDGE_EPS, lv.edges + lv.period])
    for t in times:
        assert _kernel.segment(lv.edges, lv.period, t) == lv.segment(t)
        assert _kernel.next_edge(lv.edges, lv.period, t) == pytest.approx(lv.next_edge(t), abs=1e-15)


@pytest.mark.parametrize("kernel", ["compiled", "numpy"])
def test_a_dark_light_scatters_nothing(rb, kernel):
    # the gate never opens: not one photon, and every atom that arrives keeps its velocity
    sc, p = rb
    sc = gated(sc, ("gate", "trigger", "trigger", 1.0, ["main"], 0.0, 0.0))
    atoms = draw_atoms(sc, 1000, np.random.default_rng(2))
    flight = propagate(sc, atoms, DetuningProgram(p.schedule()), np.random.default_rng(3),
                       levels=light_levels(sc, p), kernel=kernel)
    arrived = np.isfinite(flight.arrival_time)
    assert flight.photons.sum() == 0 and arrived.sum() > 500
    np.testing.assert_array_equal(flight.final_velocity[arrived], atoms.velocity[arrived])


def test_simulate_flies_the_atoms_through_the_scenarios_gates(rb):
    from sweepgen.simulate import simulate

    sc, _ = rb
    result = simulate(gated(sc, ("gate", "trigger", "trigger", 1.0, ["main"], 0.0, 0.0)), atoms=400, seed=1,
                      workers=1, baselines=False)
    assert result.flight.photons.sum() == 0
    assert simulate(sc, atoms=400, seed=1, workers=1, baselines=False).flight.photons.sum() > 0


def _mean_photons(sc, p, levels, kernel, seed):
    atoms = draw_atoms(sc, 3000, np.random.default_rng(4))
    flight = propagate(sc, atoms, DetuningProgram(p.schedule()), np.random.default_rng(seed), levels=levels,
                       kernel=kernel)
    x = flight.photons
    return float(x.mean()), float(x.std(ddof=1)) / math.sqrt(x.size)


@pytest.mark.slow
@pytest.mark.parametrize("kernel", ["compiled", "numpy"])
def test_a_light_at_a_fraction_of_its_intensity_acts_as_that_fraction_of_its_saturation(rb, kernel):
    # a gate open the whole period at level 0.4 (main and repump) against the ungated scenario whose
    # lights have 0.4 times the saturation (s = I/I_sat): photons per atom agree within 4 standard errors;
    # and they differ clearly from the light at full intensity (the check can fail)
    sc, p = rb
    dim = gated(sc, ("gate", "trigger", "trigger", 0.4, ["main", "repump"], -1.0, 1.0))
    weaker = dataclasses.replace(sc, light=dataclasses.replace(sc.light, saturation=0.4 * sc.light.saturation),
                                 channels=tuple(dataclasses.replace(c, saturation=0.4 * c.saturation)
                                                for c in sc.channels))
    (x, sx), (y, sy) = (_mean_photons(dim, p, light_levels(dim, p), kernel, 5),
                        _mean_photons(weaker, p, None, kernel, 6))
    (z, sz) = _mean_photons(sc, p, None, kernel, 7)
    assert abs(x - y) < 4 * math.hypot(sx, sy), (x, y)
    assert abs(x - z) > 10 * math.hypot(sx, sz), (x, z)


@pytest.mark.slow
def test_compiled_and_numpy_steps_agree_with_a_gate(rb):
    # the repump and the slowing light behind one gate at 0.8 that closes 50 us after the chirp: the two
    # steps (independent implementations of the same model) agree within four standard errors
    from test_kernel import _figures

    sc, p = rb
    sc = gated(sc, ("gate", "chirp_start", "chirp_end", 0.8, ["main", "repump"], -20e-6, 50e-6))
    atoms = draw_atoms(sc, 4000, np.random.default_rng(3))
    runs = {k: propagate(sc, atoms, DetuningProgram(p.schedule()), np.random.default_rng(seed),
                         levels=light_levels(sc, p), kernel=k) for k, seed in (("compiled", 10), ("numpy", 20))}
    a, b = (_figures(sc, runs[k]) for k in ("compiled", "numpy"))
    for name in a:
        (x, sx), (y, sy) = a[name], b[name]
        if sx == sy == 0.0 or math.isnan(x):
            continue
        assert abs(x - y) < 4 * math.hypot(sx, sy), (name, x, y)


def test_after_the_chirp_a_light_switched_off_takes_nothing():
    # the Na scenario's light takes ~10 m/s from the released atom during the hold; with a gate that closes
    # at the chirp's end the atom drifts on and arrives with the end velocity itself
    sc = load_scenario("na23-continuous-focused")
    p = plan(sc)
    assert p.after_chirp.hold_velocity_loss > 1.0
    off = gated(sc, ("gate", "chirp_start", "chirp_end", 1.0, ["main"], -20e-6, 0.0))
    after = plan(off).after_chirp
    assert after.hold_velocity_loss == 0.0 and after.return_velocity_loss == 0.0 and not after.stopped
    assert after.arrival_velocity == sc.chirp.end_velocity
    # closing halfway through the hold: part of the loss, from the same force while it was open
    half = plan(gated(sc, ("gate", "chirp_start", "chirp_end", 1.0, ["main"], -20e-6, 0.5 * sc.chirp.hold)))
    assert 0.0 < half.after_chirp.hold_velocity_loss < p.after_chirp.hold_velocity_loss


def test_full_levels_are_the_default(rb):
    sc, _ = rb
    lv = LightLevels.full(("main", "repump"), 0.02)
    assert not lv.gated and lv.segment(0.7) == 0 and lv.at(0.7).tolist() == [1.0, 1.0]


def test_a_light_dimmed_during_the_chirp_is_judged_by_the_force_it_gives(rb):
    # the largest force at the atoms is a_max(L·s) = A·L s/(1 + L s) (A = ħkΓf/m, Foot 2005 §9.3.1, recalled)
    # for a light let through at level L; the deceleration rule compares the design with that force
    from scipy import constants as C

    from sweepgen.checker import _deceleration

    sc, p = rb
    sp = sc.species
    dim = plan(gated(sc, ("gate", "chirp_start", "chirp_end", 0.4, ["main"], -20e-6, 50e-6)))
    A = C.hbar * 2 * math.pi / sp.wavelength * sp.gamma * sp.rate_fraction / sp.mass
    a_full = p.overlap.available
    s = a_full / (A - a_full)                                  # the saturation at the median radius
    assert dim.overlap.level == 0.4
    np.testing.assert_allclose(dim.overlap.available, A * 0.4 * s / (1 + 0.4 * s), rtol=1e-9)
    full, dimmed = _deceleration(p), _deceleration(dim)
    assert full.status == "pass" and dimmed.status == "fail", (full.value, dimmed.value)
    assert "the gates let 0.4 of its intensity through during the chirp" in dimmed.message
    # a gate that opens late (mid-chirp) leaves the design no light at all for part of it
    late = plan(gated(sc, ("gate", "chirp_start", "chirp_end", 1.0, ["main"], 1e-3, 50e-6)))
    none = _deceleration(late)
    assert late.overlap.level == 0.0 and none.status == "fail"
    assert "cannot be met: the light gives no force" in none.message and " inf of" not in none.message
    # the plan shows the saturation the atoms see through the gate (L·s), and the level only when gated
    doc, doc_dim = p.to_json(), dim.to_json()
    assert doc_dim["effective_saturation"] == pytest.approx(0.4 * doc["effective_saturation"], rel=1e-12)
    assert (doc["chirp_light_level"], doc_dim["chirp_light_level"]) == (1.0, 0.4)


def test_the_plan_text_names_the_level_only_behind_a_gate(rb):
    from sweepgen import api

    sc, _ = rb
    label = "slowing light let through in the chirp"
    rows = dict(api.plan(sc).table_rows())
    rows_dim = dict(api.plan(gated(sc, ("gate", "chirp_start", "chirp_end", 0.4, ["main"], -20e-6, 50e-6)))
                    .table_rows())
    assert label not in rows and rows_dim[label] == "0.4"
    assert float(rows_dim["saturation the atoms see on axis"]) == pytest.approx(
        0.4 * float(rows["saturation the atoms see on axis"]), rel=1e-3)


@pytest.mark.slow
def test_the_monte_carlo_bears_out_the_verdict_on_a_dimmed_light(rb):
    # the checker fails the design at level 0.4 (above): the atoms it would slow fall out of the chirp
    from sweepgen.simulate import simulate

    sc, _ = rb
    full = simulate(sc, atoms=3000, seed=2, workers=1, baselines=False).captured().mean()
    dim = gated(sc, ("gate", "chirp_start", "chirp_end", 0.4, ["main"], -20e-6, 50e-6))
    dimmed = simulate(dim, atoms=3000, seed=2, workers=1, baselines=False).captured().mean()
    assert full > 0.1 and dimmed < 0.4 * full, (full, dimmed)


def test_the_survival_estimate_takes_each_light_at_its_level(rb):
    # the depumping estimate (sweepgen.survival) along the design path: a repump kept dark by its gate is no
    # repump at all; a repump of saturation 0.02 let through at 0.1 is the repump of 0.002 (s = I/I_sat); and
    # far from the off-resonant level (|2δ/Γ| ≈ 88 for 87Rb) its excitation rate is proportional to the
    # slowing light's intensity, so a slowing light at level L depumps the design atom L times as much
    # (the Lorentzian's far wing, Foot 2005 §7.6, recalled)
    from sweepgen.checker import _survival

    sc, _ = rb
    norepump = dataclasses.replace(sc, channels=())
    dark = gated(sc, ("gate", "chirp_start", "chirp_end", 0.0, ["repump"], -20e-6, 50e-6))
    sv_dark, sv_none = plan(dark).survival, plan(norepump).survival
    assert sv_dark.fraction == sv_none.fraction < 0.5 and not sv_dark.repumped and plan(sc).survival.repumped
    finding = _survival(plan(dark))
    assert finding.status == "warn" and "the repump light's gates keep it dark" in finding.message

    def weak(s):
        return dataclasses.replace(sc, channels=tuple(dataclasses.replace(c, saturation=s) for c in sc.channels))

    dimmed = plan(gated(weak(0.02), ("gate", "chirp_start", "chirp_end", 0.1, ["repump"], -20e-6, 50e-6)))
    assert dimmed.survival.fraction == pytest.approx(plan(weak(0.002)).survival.fraction, rel=1e-12)
    full = plan(norepump).survival.design
    half = plan(gated(norepump, ("gate", "chirp_start", "chirp_end", 0.5, ["main"], -20e-6, 50e-6))).survival.design
    assert math.log(half) / math.log(full) == pytest.approx(0.5, rel=2e-3)


def test_no_step_crosses_a_change_of_level(rb):
    # a step that would cross the gate's opening ends on it, in the NumPy rule and in the compiled one, and
    # the level of the step after it is the open gate's
    from sweepgen import _flight

    sc, p = rb
    sc = gated(sc, ("gate", "chirp_start", "chirp_end", 0.8, ["main", "repump"], -20e-6, 50e-6))
    lv = light_levels(sc, p)
    atoms = draw_atoms(sc, 300, np.random.default_rng(2))
    program = DetuningProgram(p.schedule())
    t = lv.edges[0] - 3e-8
    for cls in (_flight._Propagation, _flight._Compiled):
        run = cls(sc, atoms, program, np.random.default_rng(3), True, lv, _flight.STEP_FRACTION)
        run.take_in(t)
        if cls is _flight._Propagation:
            dt, _ = run.choose_step(t)
        else:
            state = np.array([math.inf, math.inf, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0])
            dt, _ = _kernel._choose(run.k, run.tables, run.rule(), state, t, float(run.w.v.max()), run.w.v,
                                    run.w.dark, run.w.alive, _kernel.next_edge(lv.edges, lv.period, t),
                                    lv.levels[0, _kernel.segment(lv.edges, lv.period, t)])
        assert dt == pytest.approx(3e-8, rel=1e-6), (cls.__name__, dt)
        assert tuple(lv.at(t + dt)) == (0.8, 0.8) and tuple(lv.at(t)) == (0.0, 0.0)
