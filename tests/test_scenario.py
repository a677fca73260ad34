"""Scenario loading: units to SI once, relations checked, hypothesis round trips."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sweepgen import catalog
from sweepgen.errors import DeprecatedKey, InputError
from sweepgen.scenario import Light, load_scenario, scenario_from_dict
from sweepgen.sources import EffusiveSource, GaussianSource

from conftest import examples, scenario_dict, to_toml


def test_builtin_scenario_in_si():
    sc = load_scenario("rb87-chopped-oven")
    assert sc.pulsed and sc.pulse_time == 0.0
    assert isinstance(sc.source, EffusiveSource) and sc.source.temperature == 390.0
    assert sc.chirp.hold == 0.0 and sc.chirp.period == pytest.approx(0.02)
    assert sc.chirp.return_time == pytest.approx(3e-4)
    assert sc.divergence is None and sc.target.aperture == pytest.approx(10e-3)
    em = sc.emission
    assert em.pulse_duration == pytest.approx(0.2e-3) and em.pulse_shape == "flat" and em.radius == pytest.approx(1e-3)
    assert em.collimator.distance == pytest.approx(0.3) and em.collimator.radius == pytest.approx(1e-3)
    assert sc.light.waist == pytest.approx(12e-3)
    # s is measured against the cycling saturation intensity; the atoms see s·I_sat/I_sat,eff (species file)
    assert sc.light.peak == pytest.approx(3.0 * 1.66933 / 3.57713, rel=1e-6)
    (repump,) = sc.repumps
    assert repump.name == "repump" and repump.kind == "frequency" and repump.offset == 0.0 and repump.follows
    assert len(sc.digest) == 64


@settings(max_examples=examples(200))
@given(z=st.one_of(st.floats(-5.0, 5.0), st.just(math.nan)), start=st.floats(-1.0, 1.0),
       waist=st.one_of(st.none(), st.floats(1e-4, 0.05)), focus=st.floats(-3.0, 3.0),
       saturation=st.floats(0.0, 100.0), factor=st.floats(0.1, 10.0))
def test_on_axis_is_saturation_at_for_one_position(z, start, waist, focus, saturation, factor):
    # the float path of the integrations against the array path, bit for bit
    light = Light(saturation=saturation, start=start, waist=waist, focus=focus, wavelength=780e-9,
                  effective_factor=factor)
    assert light.on_axis(z) == float(light.saturation_at(z))
    assert type(light.on_axis(np.float64(z))) is float


def test_relative_species_path(tmp_path):
    (tmp_path / "sp").mkdir()
    (tmp_path / "sp" / "mine.toml").write_text((catalog.builtin_dir("species") / "rb87-d2.toml").read_text())
    path = tmp_path / "s.toml"
    path.write_text(to_toml(scenario_dict(species="sp/mine.toml")))
    assert load_scenario(str(path)).species.key == "mine"


def test_a_path_in_a_file_is_taken_from_that_files_folder_only(tmp_path):
    # the scenario lives in elsewhere/; a species file of the same relative name in the current
    # folder (tmp_path, see conftest) must not stand in for the missing one next to the scenario
    (tmp_path / "sp").mkdir()
    (tmp_path / "sp" / "mine.toml").write_text((catalog.builtin_dir("species") / "rb87-d2.toml").read_text())
    (tmp_path / "elsewhere").mkdir()
    path = tmp_path / "elsewhere" / "s.toml"
    path.write_text(to_toml(scenario_dict(species="sp/mine.toml")))
    with pytest.raises(InputError) as info:
        load_scenario(str(path))
    msg = str(info.value)
    assert "key 'species'" in msg and str(tmp_path / "elsewhere" / "sp" / "mine.toml") in msg


def test_pulse_outside_the_period_says_what_to_change():
    with pytest.raises(InputError) as info:
        scenario_from_dict(scenario_dict(source={"pulse_time": "25 ms"}), "p.toml")
    msg = str(info.value)
    assert "source.pulse_time" in msg and "lengthen chirp.period" in msg


def test_the_old_key_margin_still_reads_with_a_warning():
    old = scenario_dict(chirp={"force_fraction": None, "margin": 0.55})
    with pytest.warns(DeprecatedKey) as caught:
        sc = scenario_from_dict(old, "old.toml")
    assert sc.chirp.force_fraction == 0.55
    warning = caught[0].message
    assert (warning.file, warning.key, warning.replacement) == ("old.toml", "chirp.margin", "chirp.force_fraction")
    assert "old.toml" in str(warning) and "'chirp.force_fraction'" in str(warning)
    with pytest.raises(InputError) as info, pytest.warns(DeprecatedKey):   # the old key keeps its range check
        scenario_from_dict(scenario_dict(chirp={"force_fraction": None, "margin": 1.5}), "old.toml")
    assert info.value.key == "chirp.margin"
    with pytest.raises(InputError) as info:                      # not both names at once
        scenario_from_dict(scenario_dict(chirp={"margin": 0.5}), "both.toml")
    assert info.value.key == "chirp.margin" and "force_fraction" in str(info.value)


def test_digest_changes_with_content(tmp_path):
    a = tmp_path / "a.toml"
    a.write_text(to_toml(scenario_dict()))
    b = tmp_path / "b.toml"
    b.write_text(to_toml(scenario_dict(chirp={"force_fraction": 0.55})))
    assert load_scenario(str(a)).digest != load_scenario(str(b)).digest


@settings(max_examples=examples(60))
@given(v1=st.floats(10.0, 2000.0), frac=st.floats(0.001, 0.999), eta=st.floats(0.001, 0.999),
       temp=st.floats(1.0, 3000.0), gaussian=st.booleans(), hold_us=st.floats(0, 1e4),
       unit=st.sampled_from([("m/s", 1.0), ("km/s", 1e3), ("cm/s", 1e-2)]))
def test_round_trip_values(tmp_path_factory, v1, frac, eta, temp, gaussian, hold_us, unit):
    name, factor = unit
    source = ({"model": "gaussian", "temperature": None, "mean_velocity": f"{v1 / factor!r} {name}",
               "velocity_spread": "30 m/s"} if gaussian else {"temperature": f"{temp!r} K"})
    data = scenario_dict(source=source, chirp={"start_velocity": f"{v1 / factor!r} {name}",
                                               "end_velocity": f"{frac * v1!r} m/s", "force_fraction": eta,
                                               "hold": f"{hold_us!r} us"})
    path = tmp_path_factory.mktemp("rt") / "s.toml"
    path.write_text(to_toml(data))
    sc = load_scenario(str(path))
    assert math.isclose(sc.chirp.start_velocity, v1, rel_tol=1e-12)
    assert math.isclose(sc.chirp.end_velocity, frac * v1, rel_tol=1e-12)
    assert sc.chirp.force_fraction == eta
    assert math.isclose(sc.chirp.hold, hold_us * 1e-6, rel_tol=1e-12, abs_tol=1e-18)
    if gaussian:
        assert isinstance(sc.source, GaussianSource)
    else:
        assert math.isclose(sc.source.temperature, temp, rel_tol=1e-12)


@settings(max_examples=examples(60))
@given(junk=st.one_of(st.text(max_size=12), st.integers(), st.floats(), st.booleans(),
                      st.lists(st.integers(), max_size=3)))
def test_any_junk_value_is_an_input_error_not_a_crash(junk):
    data = scenario_dict(chirp={"start_velocity": junk})
    try:
        sc = scenario_from_dict(data, "junk.toml")
    except InputError as exc:
        assert "junk.toml" in str(exc) and "\n" not in str(exc)
    else:   # only a valid velocity string gets through
        assert sc.chirp.start_velocity > sc.chirp.end_velocity
