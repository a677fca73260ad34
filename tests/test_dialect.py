"""sweepgen.dialect: template values and the [commands] table of a generator profile."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sweepgen import dialect
from sweepgen._config import Section
from sweepgen.errors import InputError

from conftest import examples


# --- values put into templates -------------------------------------------------------------------
@pytest.mark.parametrize("name", ['SW"EEP', "SWEEP\n", "SWEEP;*RST", "SWEEP\nOUTP ON", "SW'EEP", "1SWEEP", "",
                                  "A" * 13, "SWE EP", "SWEEP,#15abcde", "SWÉEP"])
def test_render_refuses_injection_through_the_trace_name(name):
    with pytest.raises(InputError, match="commands.upload"):
        dialect.render("TRAC:DATA {name},{data}", "upload", name=name)


@settings(max_examples=examples(200))
@given(st.text(max_size=16))
def test_any_accepted_name_cannot_break_out_of_its_command(name):
    try:
        text = dialect.render("SOUR1:FUNC:USER {name}", "function", name=name)
    except InputError:
        return
    assert text == f"SOUR1:FUNC:USER {name}"
    assert not set(name) & set(";\"'\n\r#, \t")


@pytest.mark.parametrize("value", [float("nan"), float("inf"), "1;*RST", True])
def test_render_refuses_non_numbers(value):
    with pytest.raises(InputError):
        dialect.render("SOUR1:VOLT {amplitude}", "amplitude", amplitude=value)


def test_render_values_and_data_placeholder():
    assert dialect.render("SOUR{channel}:FREQ {frequency}", "rate", channel=2, frequency=50.0) == "SOUR2:FREQ 50"
    assert dialect.render("SOUR1:VOLT:OFFS {offset}", "offset", offset=-0.02952) == "SOUR1:VOLT:OFFS -0.02952"
    text = dialect.render("TRAC:DATA {name},{data}", "upload", name="SWEEP")
    assert dialect.split_data(text) == ("TRAC:DATA SWEEP,", "")
    with pytest.raises(InputError, match="needs a value for {amplitude}"):
        dialect.render("SOUR1:VOLT {amplitude}", "amplitude", amplitude=None)


# --- the [commands] table ---------------------------------------------------------------------
BASE = {
    "identify": "*IDN?", "identity_pattern": "^x,", "clear": "*CLS", "output_off": "OUTP OFF",
    "upload": "TRAC:DATA {name},{data}", "wait": "*OPC?", "error_query": "SYST:ERR?",
    "no_error_pattern": "^[+]?0,", "output_on": "OUTP ON",
}


def commands(**change):
    data = {**BASE, **change}
    data = {k: v for k, v in data.items() if v is not None}
    return dialect.parse_commands(Section(data, "gen.toml", "commands"))


def test_parse_commands_accepts_the_minimal_set():
    c = commands()
    assert c.has("upload") and not c.has("readback")
    assert c.upload_mode == "block" and c.byte_order == "little" and c.trace_name == "SWEEP"


@pytest.mark.parametrize("change, key, message", [
    ({"upload": "TRAC:DATA {name},{block}"}, "commands.upload", "unknown placeholder"),
    ({"upload": "TRAC:DATA {name}"}, "commands.upload", "exactly one {data}"),
    ({"rate": "FREQ {data}"}, "commands.rate", "only appear in the upload"),
    ({"identify": "*IDN"}, "commands.identify", "expected a query"),
    ({"rate": "FREQ {rate:.3f}"}, "commands.rate", "no format spec"),
    ({"rate": "FREQ {rate"}, "commands.rate", "malformed"),
    ({"output_on": None}, "commands.output_on", "missing"),
    ({"no_error_pattern": "(["}, "commands.no_error_pattern", "regular expression"),
    ({"trace_name": "MY;TRACE"}, "commands.trace_name", "character data"),
    ({"upload_mode": "hex"}, "commands.upload_mode", "expected one of"),
    ({"reset_all": "*RST"}, "commands.reset_all", "unknown key"),
])
def test_parse_commands_refuses_bad_templates(change, key, message):
    with pytest.raises(InputError, match=message) as info:
        commands(**change)
    assert info.value.key == key and info.value.file == "gen.toml"
