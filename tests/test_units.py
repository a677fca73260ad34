"""Quantities at the boundary: parsing, dimension checks and clear errors."""

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sweepgen import units
from sweepgen.errors import InputError

from conftest import examples


@pytest.mark.parametrize("text,unit,expected", [
    ("300 m/s", "m/s", 300.0),
    ("6.07 MHz", "Hz", 6.07e6),
    ("-250 MHz/V", "Hz/V", -2.5e8),
    ("20 degC", "K", 293.15),
    ("10 MSa/s", "Hz", 1e7),
    ("1.66933 mW/cm^2", "W/m^2", 16.6933),
    ("0.5 ms", "s", 5e-4),
    ("8 mrad", "rad", 8e-3),
    ("1 kohm", "ohm", 1000.0),
])
def test_parse(text, unit, expected):
    assert units.parse(text, unit) == pytest.approx(expected)


@pytest.mark.parametrize("value,unit,fragment", [
    ("300 m", "m/s", "wrong dimension"),
    (300, "m/s", "has no unit"),
    ("fast", "m/s", "cannot read"),
    ("nan m/s", "m/s", "finite"),
    ("inf K", "K", "finite"),
    ("38 Mrad/s", "Hz", "angular frequency"),
    ("1 turn/s", "Hz", "angular frequency"),      # pint reads a turn as 2π rad: refused, not 2π Hz
    ("2 rad", "", "angle unit"),
    ("MHz", "Hz", "number followed by its unit"),  # a unit alone is not read as 1 MHz
    ("", "m", "empty"),
    (True, "m", "expected"),
])
def test_errors_name_file_and_key(value, unit, fragment):
    with pytest.raises(InputError) as info:
        units.parse(value, unit, file="scenario.toml", key="chirp.start_velocity")
    message = str(info.value)
    assert fragment in message
    assert message.startswith("scenario.toml: key 'chirp.start_velocity': ")
    assert "\n" not in message


@settings(max_examples=examples(60))
@given(x=st.floats(-1e12, 1e12, allow_nan=False), prefix=st.sampled_from(["", "k", "M", "G", "m", "u"]))
def test_round_trip_prefixes(x, prefix):
    factor = {"": 1, "k": 1e3, "M": 1e6, "G": 1e9, "m": 1e-3, "u": 1e-6}[prefix]
    assert math.isclose(units.parse(f"{x!r} {prefix}Hz", "Hz"), x * factor, rel_tol=1e-12, abs_tol=1e-300)


def _conversions(ureg, names):
    """``{name: (dimensionality, 0 and 1 of it in base units)}`` for unit names in a registry."""
    out = {}
    for name in names:
        try:
            zero, one = (ureg.Quantity(v, name).to_base_units() for v in (0.0, 1.0))
        except Exception:                              # names that are not units by themselves
            out[name] = None
            continue
        out[name] = (str(one.dimensionality), zero.magnitude, one.magnitude)
    return out


@pytest.mark.slow
def test_registry_from_its_disk_cache_equals_a_fresh_one(tmp_path):
    folder = tmp_path / "cache"
    fresh = units.build_registry(None)
    units.build_registry(folder)                       # fills the cache
    assert list(folder.glob("*.pickle"))
    cached = units.build_registry(folder)              # built from it
    # reference: pint's own registry parsed from its definition file, unit by unit (a registry
    # iterates over its unit names)
    names = sorted(fresh)
    assert len(names) > 1000
    assert _conversions(cached, names) == _conversions(fresh, names)
    assert cached.Quantity(10.0, "MSa/s").to("Hz").magnitude == pytest.approx(1e7)


@pytest.mark.slow
def test_a_damaged_or_unwritable_cache_costs_speed_not_correctness(tmp_path):
    folder = tmp_path / "cache"
    units.build_registry(folder)
    for pickled in folder.glob("*.pickle"):            # cut short, as by a crash while writing
        pickled.write_bytes(pickled.read_bytes()[:100])
    ureg = units.build_registry(folder)
    assert ureg.Quantity(3.0, "MHz").to("Hz").magnitude == pytest.approx(3e6)
    assert not any(p.stat().st_size == 100 for p in folder.glob("*.pickle"))   # cleared, not kept
    blocked = tmp_path / "a-file"
    blocked.write_text("not a folder")
    ureg = units.build_registry(blocked / "cache")     # cannot be made
    assert ureg.Quantity(20.0, "degC").to("K").magnitude == pytest.approx(293.15)


UNIT_TEXTS = [("m/s", "m/s"), ("km/h", "m/s"), ("MHz", "Hz"), ("MHz/V", "Hz/V"), ("GHz/ms", "Hz/s"),
              ("MSa/s", "Hz"), ("mW/cm^2", "W/m^2"), ("ms", "s"), ("us", "s"), ("mm", "m"), ("inch", "m"),
              ("mrad", "rad"), ("kohm", "ohm"), ("amu", "kg"), ("nm", "m"), ("K", "K"), ("%", "")]


@settings(max_examples=examples(100))
@given(x=st.floats(-1e12, 1e12, allow_nan=False), pair=st.sampled_from(UNIT_TEXTS))
def test_a_remembered_factor_gives_what_pint_gives(x, pair):
    text, unit = pair
    units.parse(f"1 {text}", unit)                      # remembered from here on
    assert units.factors().get(text, unit) is not None
    # reference: pint's own conversion, bit for bit
    ureg = units.registry()
    assert units.parse(f"{x!r} {text}", unit) == float(ureg.Quantity(x, text).to(unit).magnitude)


def test_remembered_factors_need_no_registry_and_survive_the_process(tmp_path, monkeypatch):
    path = tmp_path / "factors.json"
    first = units.Factors(path)
    monkeypatch.setattr(units, "factors", lambda: first)
    assert units.parse("300 m/s", "m/s") == 300.0 and units.parse("6.07 MHz", "Hz") == pytest.approx(6.07e6)
    units.parse("20 degC", "K")                         # an offset: never remembered
    assert first.get("degC", "K") is None
    first.save()
    again = units.Factors(path)
    monkeypatch.setattr(units, "factors", lambda: again)

    def no_registry():
        raise AssertionError("the registry was built")

    monkeypatch.setattr(units, "registry", no_registry)
    assert units.parse("2.5 MHz", "Hz") == 2.5e6 and units.parse("-7 m/s", "m/s") == -7.0
    with pytest.raises(AssertionError, match="registry was built"):
        units.parse("3 MHz", "m/s")                     # another wanted unit: pint decides
    path.write_text("{not json")                        # a damaged file is ignored
    assert units.Factors(path).get("MHz", "Hz") is None


def test_the_cache_folder_names_the_pint_that_is_imported():
    # read from pint's metadata without importing pint; reference: pint's own __version__
    pint = units.import_pint()
    assert units.pint_version() == pint.__version__
    assert units.cache_folder().name == f"pint-{pint.__version__}"
