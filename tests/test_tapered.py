"""The tapered-field (Zeeman) alternative: field profile, species g-factors, simulation, commands."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from conftest import run_cli, scenario_dict
from scipy import constants as C

from sweepgen import physics, tapered
from sweepgen.errors import InputError
from sweepgen.planner import plan
from sweepgen.scenario import load_scenario, scenario_from_dict
from sweepgen.species import load_species, species_from_dict

MU_B = C.physical_constants["Bohr magneton"][0]
NA_WAVELENGTH = 589.1583264e-9          # m, Steck, Sodium D Line Data (recalled; REFERENCES.md)


def test_bohr_magneton_over_h_is_codata():
    # μ_B/h = 1.399 62 MHz/G = 13.9962 GHz/T (CODATA via scipy.constants; REFERENCES.md)
    assert physics.zeeman_moment(0.5, 2, 2 / 3, 3) / C.h == pytest.approx(13.9962e9, rel=1e-5)


def test_field_scale_matches_foot_sodium_example():
    # C. J. Foot, Atomic Physics (OUP 2005), §9.3, eqs. 9.11-9.12 (recalled): sodium at 1000 m/s with
    # μ′ = μ_B needs B₀ ≈ 1.2 kG = 0.12 T (REFERENCES.md, computed there from h v₀ / (λ μ_B))
    b0 = physics.tapered_field_scale(1000.0, NA_WAVELENGTH, MU_B)
    assert b0 == pytest.approx(0.12, rel=0.02)
    assert b0 == pytest.approx(1000.0 / NA_WAVELENGTH / 13.9962e9, rel=1e-5)


def test_field_profile_formula():
    # eq. 9.12: B₀ at the entrance, B₀/√2 half-way along L₀, zero at L₀, offset by the bias everywhere
    b = physics.tapered_field(np.array([0.0, 0.5, 1.0, 2.0]), 0.1, 1.0, -0.02)
    assert b == pytest.approx([0.08, 0.1 / math.sqrt(2) - 0.02, -0.02, -0.02])
    # eq. 9.11: L₀ = v₀²/2a (sodium, a = a_max/2 = 4.53e5 m/s², REFERENCES.md a_max 9.06e5 m/s²: 1.10 m)
    assert physics.tapered_field_length(1000.0, 9.06e5 / 2) == pytest.approx(1.104, rel=1e-3)


@pytest.mark.parametrize("key", ["na23-d2", "rb87-d2", "cs133-d2", "k39-d2"])
def test_alkali_stretched_transitions_have_one_bohr_magneton(key):
    # Steck's alkali data (and Tiecke for K-39), recalled: g_F of the stretched states give μ′ = μ_B
    sp = load_species(key)
    assert sp.zeeman.moment == pytest.approx(MU_B, rel=1e-9)
    assert "recalled" in sp.sources["zeeman"]


def test_species_without_zeeman_table_is_refused_clearly():
    sc = load_scenario("caf-buffer-gas")
    with pytest.raises(InputError, match=r"no \[zeeman\] table") as info:
        tapered.tapered_field(plan(sc))
    assert info.value.key == "zeeman" and info.value.file.endswith("caf-a-x.toml")      # the file it is missing from


def test_zeeman_table_that_does_not_shift_is_refused():
    data = {"title": "t", "wavelength": {"value": "780 nm", "source": "s"}, "mass": {"value": "87 u", "source": "s"},
            "lifetime": {"value": "26 ns", "source": "s"},
            "zeeman": {"ground_g": 0.5, "ground_m": 2, "excited_g": 1.0, "excited_m": 1, "source": "s"}}
    with pytest.raises(InputError, match="zeeman.excited_m"):
        species_from_dict(data, "t.toml")


def _sodium(start_velocity="1000 m/s", **chirp):
    return scenario_from_dict(scenario_dict(
        species="na23-d2", source={"temperature": "700 K", "pulse_time": None},
        light={"saturation": 3.0, "start": "0.05 m"}, target={"distance": "2.0 m", "capture_velocity": "40 m/s"},
        chirp={"start_velocity": start_velocity, "end_velocity": "30 m/s", "force_fraction": 0.5,
               "start_time": None, "period": "20 ms", **chirp}), "sodium.toml")


def test_tapered_field_of_a_sodium_plan():
    p = plan(_sodium())
    f = tapered.tapered_field(p)
    # B₀ as in Foot's sodium example (0.12 T for 1000 m/s), the bias that holds the light at the start detuning
    assert f.b0 == pytest.approx(0.12, rel=0.02)
    assert f.bias == pytest.approx(-f.b0, rel=1e-9)
    # deceleration η a_max s/(1+s) with a_max = ħkΓ/2m (REFERENCES.md: 9.06e5 m/s² for sodium) and the
    # saturation the atoms see, s = 3 × 6.2600 / 13.41 (Steck's cycling and isotropic I_sat, REFERENCES.md)
    s = 3 * 6.26 / 13.41
    assert f.deceleration == pytest.approx(0.5 * 9.06e5 * s / (1 + s), rel=2e-3)
    assert f.l0 == pytest.approx(1000.0 ** 2 / (2 * f.deceleration))
    assert f.length == pytest.approx((1000.0 ** 2 - 30.0 ** 2) / (2 * f.deceleration))
    assert f.length == pytest.approx(p.slowing_distance, rel=1e-3)      # uniform light: the same distance
    assert f.peak_field == pytest.approx(f.b0 * (1 - 30.0 / 1000.0), rel=1e-9)
    assert f.field(np.array([f.start - 1e-3, f.end + 1e-3])) == pytest.approx([0.0, 0.0])


def test_design_atom_stays_at_the_plans_lag_all_along_the_field():
    # the resonance condition behind eq. 9.12: Δ_L + v(z)/λ − μ′B(z)/h = −Δv_lag/λ, the chirp's own lag
    p = plan(_sodium())
    f = tapered.tapered_field(p)
    lam = p.species.wavelength
    z = np.linspace(f.start, f.end, 101)
    seen = f.laser_detuning + f.velocity(z) / lam - f.shift_per_tesla * f.field(z)
    assert seen == pytest.approx(-p.trajectory.lag[0] / lam, abs=1e-6 * p.species.linewidth)


@pytest.mark.slow
def test_a_field_is_flown_by_the_step_that_shifts_each_atom():
    """The compiled step gives every atom the light's one detuning; a field shifts it atom by atom
    (``shift_at``), so a field program is flown by the NumPy step (with the compiled one, the
    tapered-field slower captured nothing)."""
    from sweepgen import _flight
    from sweepgen.simulate import draw_atoms

    sc = _sodium("500 m/s")
    field = tapered.tapered_field(plan(sc))
    rng = np.random.default_rng(1)
    flight = _flight.propagate(tapered.in_field(sc), draw_atoms(sc, 20, rng),
                               tapered.FieldProgram(field, sc.chirp.period), rng)
    assert flight.kernel == "numpy"


@pytest.mark.slow
def test_simulated_field_slower_brings_atoms_to_the_end_velocity():
    sc = _sodium("500 m/s")
    cmp = tapered.compare(sc, atoms=600, seed=4)
    doc = cmp.to_json()
    assert doc["field_captured_fraction"] > 5 * doc["field_captured_error"]
    # the field brings them down from the source's hundreds of m/s to about the end velocity (30 m/s)
    assert 10.0 < doc["field_final_velocity_mean"] < 40.0
    assert json.loads(json.dumps(doc))["field"]["peak_field"] == pytest.approx(cmp.field.peak_field)


def test_plan_compare_field_json_and_refusal(tmp_path):
    res = run_cli("plan", "na23-continuous-focused", "--compare-field", "--json")
    doc = json.loads(res.stdout)
    assert doc["tapered_field"]["moment_bohr_magnetons"] == pytest.approx(1.0)
    assert doc["tapered_field"]["peak_field"] > 0
    res = run_cli("plan", "caf-buffer-gas", "--compare-field")
    assert res.exit_code == 2 and "zeeman" in res.stderr and "Traceback" not in res.stderr


@pytest.mark.slow
def test_plan_field_plot_and_simulate_compare_field(tmp_path):
    from sweepgen.plots import field_curves

    res = run_cli("plan", "na23-continuous-focused", "--field-plot", "field.png")
    assert res.exit_code == 0, res.stderr
    assert (tmp_path / "field.png").stat().st_size > 1000
    assert "peak field" in res.stdout
    p = plan(load_scenario("na23-continuous-focused"))
    c = field_curves(p, tapered.tapered_field(p))
    assert c["field"][0] == pytest.approx(0.0, abs=1e-12) and c["field_velocity"][-1] == pytest.approx(30.0)
    res = run_cli("simulate", "na23-continuous-focused", "--atoms", 300, "--compare-field", "--json")
    assert res.exit_code == 0, res.stderr
    doc = json.loads(res.stdout)["tapered_field"]
    assert doc["atoms"] == 300 and 0 <= doc["field_captured_fraction"] <= 1
