"""Laser profiles: the four built-ins, and strict loading of users' files."""

import pytest

from sweepgen.errors import InputError
from sweepgen.laser import load_laser

BUILTIN = ["demo-ecdl-piezo", "demo-diode-current", "demo-aom-vco", "demo-offset-dds"]

GOOD = """title = "test laser"
[limits]
mode_hop_free = "1 GHz"
max_chirp_rate = "3 GHz/ms"
input_min = "-10 V"
input_max = "10 V"
[response]
model = "first-order"
corner = "20 kHz"
[[chain]]
stage = "analog"
coefficient = "40 MHz/V"
set_point = "-140 MHz"
"""


@pytest.mark.parametrize("key", BUILTIN)
def test_builtin_lasers_load(key):
    laser = load_laser(key)
    assert laser.key == key and laser.title and "demo hardware" in laser.title
    assert laser.limits.input_max > laser.limits.input_min
    assert laser.chain.safe_min == laser.limits.input_min


def test_builtin_kinds_and_units():
    assert load_laser("demo-ecdl-piezo").response.model == "second-order"
    current = load_laser("demo-diode-current")
    assert current.chain.stages[0].coefficient < 0          # negative current tuning
    aom = load_laser("demo-aom-vco")
    assert [s.kind for s in aom.chain.stages] == ["aom", "vco"] and aom.limits.mode_hop_free is None
    dds = load_laser("demo-offset-dds")
    assert dds.chain.drive_unit == "Hz" and dds.limits.input_min == pytest.approx(100e6)


def test_user_file_by_path(tmp_path):
    path = tmp_path / "mine.toml"
    path.write_text(GOOD)
    laser = load_laser(str(path))
    assert laser.key == "mine" and laser.limits.max_chirp_rate == pytest.approx(3e12)
    assert laser.response.corner == pytest.approx(20e3)
    assert load_laser("mine.toml", relative_to=tmp_path).path == path


@pytest.mark.parametrize("edit, key, words", [
    (("input_max = \"10 V\"", "input_max = \"10 MHz\""), "limits.input_max", "wrong dimension"),
    (("input_max = \"10 V\"", "input_max = \"-20 V\""), "limits.input_max", "above input_min"),
    (("max_chirp_rate = \"3 GHz/ms\"", "max_chirp_rate = \"3 GHz\""), "limits.max_chirp_rate", "wrong dimension"),
    (("[limits]", "[limits]\nspeed = \"1 m/s\""), "limits.speed", "unknown key"),
    (("corner = \"20 kHz\"", "corner = \"-20 kHz\""), "response.corner", "greater than zero"),
    (("model = \"first-order\"", "model = \"third-order\""), "response.model", "expected one of"),
    (("stage = \"analog\"", "stage = \"magic\""), "chain[0].stage", "expected one of"),
    (("set_point = \"-140 MHz\"\n", ""), "chain[0].set_point", "missing"),
    (("title = \"test laser\"\n", ""), "title", "missing"),
])
def test_bad_laser_profiles_name_file_and_key(tmp_path, edit, key, words):
    path = tmp_path / "bad.toml"
    path.write_text(GOOD.replace(*edit))
    with pytest.raises(InputError) as exc:
        load_laser(str(path))
    text = str(exc.value)
    assert str(path) in text and f"key '{key}'" in text and words in text
    assert "\n" not in text


def test_unknown_laser_key_lists_builtins():
    with pytest.raises(InputError, match="demo-ecdl-piezo"):
        load_laser("no-such-laser")
