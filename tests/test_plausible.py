"""The table of plausible ranges (sweepgen/plausible.py): every key read has an entry, every entry
is read, every entry refuses a value outside it by name, and the README shows the same table."""

from __future__ import annotations

import copy
import math
import re
import warnings
from pathlib import Path

import pytest

from sweepgen import plausible
from sweepgen.errors import DeprecatedKey, InputError

from conftest import COMPLETE, load_kind

TOML_KINDS = ("scenario", "species", "laser", "generator")
README = Path(__file__).resolve().parent.parent / "README.md"


def ranges_of(kind):
    """(table key, Range) for every entry of ``kind``, one per unit where an entry has several."""
    for name, found in plausible.RANGES[kind].items():
        for rng in found if isinstance(found, tuple) else (found,):
            yield name, rng


def reads():
    """Which complete file reads which entry: {(kind, table key, unit): (kind, index of the file)}."""
    found = {}
    for kind, files in COMPLETE.items():
        for i, data in enumerate(files):
            with plausible.recording() as seen, warnings.catch_warnings():
                warnings.simplefilter("ignore", DeprecatedKey)
                load_kind(kind, copy.deepcopy(data), f"{kind}.toml")
            for entry in seen:
                if entry[0] == kind:          # a scenario also reads its species: that one is not this file's
                    found.setdefault(entry, (kind, i))
    return found


READS = reads()


def test_every_range_is_read_by_a_complete_file():
    # Reading a key without an entry is an error under the tests (plausible.STRICT, set in conftest),
    # so loading COMPLETE checks that every key read has a range; here the converse: no entry is stale.
    stale = [f"{kind} {name!r} ({rng.unit or 'bare number'})" for kind in TOML_KINDS for name, rng in ranges_of(kind)
             if (kind, name, rng.unit) not in READS]
    assert not stale, (f"plausible ranges never read by the complete files of tests/conftest.py (COMPLETE): {stale}; "
                       f"add the key to one of those files, or remove the entry from sweepgen/plausible.py")


def test_a_key_without_a_range_is_caught_and_says_where_to_add_it():
    assert plausible.STRICT                      # set by tests/conftest.py for the whole suite
    with pytest.raises(plausible.MissingRange, match=r"'chirp\.brand_new'.*sweepgen/plausible\.py"):
        plausible.lookup("scenario", "chirp.brand_new", "s")
    with pytest.raises(plausible.MissingRange, match="without a file kind"):
        plausible.lookup(None, "x", "s")


@pytest.mark.parametrize("kind", plausible.RANGES)
def test_every_range_is_well_formed(kind):
    for name, rng in ranges_of(kind):
        lo, hi = rng.bounds
        assert lo < hi, (kind, name)
        assert rng.reason and not rng.reason.endswith("."), (kind, name)
        assert (lo >= 0) or not rng.magnitude, (kind, name)


def test_key_spellings():
    assert plausible.pattern_of("chain[12].clock") == "chain[].clock"
    assert plausible.entry_name("laser", "chain[3].coefficient") == "chain[].coefficient"
    assert plausible.entry_name("laser", "chain.coefficient") is None
    assert plausible.entry_name("scenario", "chirp.period") == "chirp.period"


def test_bounds_allow_for_unit_conversion_but_nothing_beyond():
    waist = plausible.RANGES["scenario"]["light.waist"]
    from sweepgen import units

    assert waist.contains(units.parse("10 µm", "m")) and waist.contains(units.parse("0.01 mm", "m"))
    assert not waist.contains(units.parse("9.99 µm", "m"))
    coef = plausible.RANGES["laser"]["chain[].coefficient"]
    assert coef.contains(-40e6) and coef.contains(40e6) and not coef.contains(0.0) and not coef.contains(-2e12)
    assert not plausible.RANGES["scenario"]["chirp.margin"].contains(1.0)        # open bound
    assert not waist.contains(math.nan) and not waist.contains(math.inf)


def outside(rng, side, original):
    """A value just outside ``rng`` on ``side`` ("low" or "high"), in the form ``original`` has."""
    lo, hi = rng.bounds
    bound = lo if side == "low" else hi
    if not math.isfinite(bound):
        return None
    if isinstance(original, int) and not isinstance(original, bool):
        if side == "low":
            return math.ceil(lo) - (0 if rng.open_low and lo.is_integer() else 1)
        return math.floor(hi) + (0 if rng.open_high and hi.is_integer() else 1)
    if (side == "low" and rng.open_low) or (side == "high" and rng.open_high):
        x = bound
    elif side == "low":
        x = bound / 2 if bound > 0 else bound * 2 if bound < 0 else -1.0
    else:
        x = bound * 2 if bound > 0 else bound / 2 if bound < 0 else 1.0
    return f"{x!r} {rng.unit}" if rng.unit else x


def concrete_keys(data, prefix=""):
    """(dotted key with indices, container, name) of every value in a parsed TOML document."""
    for key, value in data.items():
        dotted = f"{prefix}.{key}" if prefix else key
        if isinstance(value, dict):
            yield from concrete_keys(value, dotted)
        elif isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
            for i, item in enumerate(value):
                yield from concrete_keys(item, f"{dotted}[{i}]")
        else:
            yield dotted, data, key


CASES = [(kind, name, rng, side) for kind in TOML_KINDS for name, rng in ranges_of(kind) for side in ("low", "high")]


@pytest.mark.parametrize("kind,name,rng,side", CASES,
                         ids=[f"{c[0]}:{c[1]}:{c[2].unit or '1'}:{c[3]}" for c in CASES])
def test_a_value_outside_the_range_is_refused_by_name(kind, name, rng, side):
    _, index = READS[(kind, name, rng.unit)]
    data = copy.deepcopy(COMPLETE[kind][index])
    for dotted, container, key in concrete_keys(data):
        if plausible.entry_name(kind, dotted) == name:
            break
    original = container[key]
    value = outside(rng, side, original[0] if isinstance(original, list) else original)
    if value is None:
        pytest.skip("no bound on this side")
    container[key] = [value, *original[1:]] if isinstance(original, list) else value
    with pytest.raises(InputError) as caught, warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecatedKey)
        load_kind(kind, data, f"broken-{kind}.toml")
    message = str(caught.value)
    assert message.startswith(f"broken-{kind}.toml: key '{dotted}")
    if caught.value.detail.startswith("expected " + rng.describe()):   # the range, with its reason
        assert rng.reason in message


def test_the_issue_examples_are_refused_with_the_range():
    cases = [("scenario", {"drive": {"sample_rate": "1e-300 Sa/s"}}, "drive.sample_rate", "from 1 Sa/s to 100 GSa/s"),
             ("species", {"wavelength": {"value": "1e-30 m", "source": "x"}}, "wavelength.value", "from 50 nm"),
             ("generator", {"sampling": {"memory": 1e300}}, "sampling.memory", "got 1e+300"),
             ("generator", {"link": {"throughput": "1e-300 B/s"}}, "link.throughput", "from 10 B/s"),
             ("generator", {"link": {"timeout": "1e300 s"}}, "link.timeout", "to 1 h")]
    for kind, change, key, text in cases:
        data = copy.deepcopy(COMPLETE[kind][0])
        for section, values in change.items():
            data[section] = {**data.get(section, {}), **values}
        with pytest.raises(InputError, match=re.escape(text)) as caught:
            load_kind(kind, data, "f.toml")
        assert caught.value.key == key


def test_the_readme_shows_the_table():
    text = README.read_text(encoding="utf-8")
    begin, end = text.find(plausible.README_BEGIN), text.find(plausible.README_END)
    assert begin >= 0 and end > begin, "README.md has no table of plausible ranges"
    shown = text[begin:end + len(plausible.README_END)]
    assert shown == plausible.markdown(), ("README.md's table of plausible ranges differs from sweepgen/plausible.py; "
                                           "regenerate it: python -m sweepgen.plausible README.md")
