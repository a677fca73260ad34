"""Fuzzing the input side: broken TOML documents and broken values for every key of every file
kind (scenario, species, laser, generator), run through every command that reads them.

The contract for each (README, "A tour of the commands"): exit 2; one line on stderr that starts
``sweepgen: error:`` and names the broken file (and the key, for a broken value); under ``--json``
the error document and nothing else on stdout; no file in the output folder; no traceback.
In-process through click's runner (faithful here: the same group, the same error handling), plus
real processes for the inputs that once broke the interpreter itself (deep nesting).
"""

from __future__ import annotations

import copy
import json
import math
import os
import subprocess
import sys
import tempfile
import warnings
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sweepgen import plausible
from sweepgen._config import MAX_NESTING
from sweepgen.errors import DeprecatedKey

from conftest import (CHECKED_SCENARIO, COMPLETE, PIEZO_LASER, VOLTAGE_BOARD, examples, load_kind, run_cli,
                      to_toml)

FILE_NAMES = {"scenario": "scenario.toml", "species": "species.toml", "laser": "laser.toml",
              "generator": "gen.toml"}
#: command -> (its words, with OUT for the output folder; the file kinds it reads)
COMMANDS = {
    "plan": (["plan", "scenario.toml", "--json"], ("scenario", "species")),
    "check": (["check", "scenario.toml", "--json"], ("scenario", "species", "laser", "generator")),
    "simulate": (["simulate", "scenario.toml", "--atoms", "50", "--json"], ("scenario", "species")),
    "export": (["export", "scenario.toml", "-f", "csv", "-o", "OUT", "--json"],
               ("scenario", "species", "laser", "generator")),
    "upload": (["upload", "scenario.toml", "--dry-run", "--json"], ("scenario", "species", "laser", "generator")),
    "compare": (["compare", "scenario.toml", "trace.csv", "--json"], ("scenario", "species")),
    "calibrate": (["calibrate", "piezo.csv", "--laser", "laser.toml", "--stage", "1", "-o", "OUT/new.toml", "--json"],
                  ("laser",)),
}
#: measurement files every case holds beside its TOML files (invented numbers): a piezo's tuning
#: curve for calibrate, a wavemeter trace for compare
MEASUREMENTS = {
    "piezo.csv": "drive (V),detuning (MHz)\n" + "".join(f"{u},{-140 + 40 * u}\n" for u in range(-5, 6)),
    "trace.csv": "time (ms),detuning (MHz)\n" + "".join(f"{t / 10},{-400 + t}\n" for t in range(200)),
}
SETTINGS = dict(deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def base_files() -> dict:
    """A playable case: the scenario with its own species, laser and generator files beside it."""
    species = copy.deepcopy(COMPLETE["species"][0])
    return {"scenario": {**copy.deepcopy(CHECKED_SCENARIO), "species": "species.toml"}, "species": species,
            "laser": copy.deepcopy(PIEZO_LASER), "generator": copy.deepcopy(VOLTAGE_BOARD)}


def write_case(folder: Path, files: dict, raw: dict | None = None) -> None:
    """Write every file of a case; ``raw`` maps a kind to bytes written instead of its document."""
    for kind, name in FILE_NAMES.items():
        if raw and kind in raw:
            (folder / name).write_bytes(raw[kind])
        else:
            (folder / name).write_text(to_toml(files[kind]), encoding="utf-8")
    for name, text in MEASUREMENTS.items():
        (folder / name).write_text(text, encoding="utf-8")
    (folder / "out").mkdir(exist_ok=True)      # an empty folder to write into: it must stay empty


def run_in(folder: Path, command: str):
    words, _ = COMMANDS[command]
    out = folder / "out"
    args = [w.replace("OUT", str(out)) if w.startswith("OUT") else str(folder / w) if w.endswith((".toml", ".csv"))
            else w for w in words]
    return run_cli(*args), out


def assert_refused(result, out: Path, file_name: str, key: str | None = None) -> dict:
    """The contract of a refused input; returns the error document."""
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    assert "Traceback" not in result.output
    assert result.exit_code == 2, (result.exit_code, result.stdout[-300:], result.stderr[-300:])
    lines = [ln for ln in result.stderr.strip().splitlines() if not ln.startswith("sweepgen: warning: ")]
    assert len(lines) == 1 and lines[0].startswith("sweepgen: error: "), lines   # (a deprecated key warns apart)
    assert file_name in lines[0], lines[0]
    if key is not None:
        assert f"key '{key}" in lines[0], (key, lines[0])
    error = json.loads(result.stdout)["error"]
    assert error["exit_code"] == 2 and error["file"].endswith(file_name)
    if key is not None:
        assert error["key"].startswith(key)
    assert not out.exists() or not any(out.iterdir()), "a refused input wrote files"
    return error


# ---------------------------------------------------------------------------------------------
# Broken values for every key
# ---------------------------------------------------------------------------------------------
def concrete_keys(data, prefix=""):
    """(dotted key with indices, the table holding it, its name there) for every value of a document."""
    for key, value in data.items():
        dotted = f"{prefix}.{key}" if prefix else key
        if isinstance(value, dict):
            yield from concrete_keys(value, dotted)
        elif isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
            for i, item in enumerate(value):
                yield from concrete_keys(item, f"{dotted}[{i}]")
        else:
            yield dotted, data, key


def value_slots():
    """(kind, index into COMPLETE, dotted key, its Range) for every ranged value of the complete files."""
    slots = []
    for kind, files in COMPLETE.items():
        for i, data in enumerate(files):
            with plausible.recording() as seen, warnings.catch_warnings():
                warnings.simplefilter("ignore", DeprecatedKey)
                load_kind(kind, copy.deepcopy(data), FILE_NAMES[kind])
            units = {(name, unit) for k, name, unit in seen if k == kind}
            for dotted, _, _ in concrete_keys(data):
                name = plausible.entry_name(kind, dotted)
                for entry, unit in units:
                    if entry == name:
                        found = plausible.RANGES[kind][name]
                        rng = next(r for r in (found if isinstance(found, tuple) else (found,)) if r.unit == unit)
                        slots.append((kind, i, dotted, rng))
    return slots


SLOTS = value_slots()


def test_every_key_of_every_file_kind_is_fuzzed():
    covered = {(kind, plausible.entry_name(kind, dotted)) for kind, _, dotted, _ in SLOTS}
    assert covered == {(kind, name) for kind in FILE_NAMES for name in plausible.RANGES[kind]}


SLACK = 1e-12      # a closed bound of a quantity lets conversion rounding (10⁻¹⁴ relative) through


def _below(rng):
    lo = rng.bounds[0]
    if not math.isfinite(lo):
        return st.nothing()
    edge = lo if rng.open_low else lo - SLACK * abs(lo)
    if rng.magnitude:
        return st.floats(min_value=0.0, max_value=edge, exclude_max=not rng.open_low) if lo > 0 else st.nothing()
    return st.floats(min_value=-1e300, max_value=edge, exclude_max=not rng.open_low)


def _above(rng):
    hi = rng.bounds[1]
    if not math.isfinite(hi):
        return st.nothing()
    top = st.floats(min_value=hi if rng.open_high else hi + SLACK * abs(hi), max_value=1e300,
                    exclude_min=not rng.open_high)
    return st.one_of(top, top.map(lambda x: -x)) if rng.magnitude else top


def broken_values(rng, original):
    """Values surely wrong for a key whose plausible range is ``rng`` and whose good value is ``original``."""
    numbers = st.one_of(_below(rng), _above(rng))
    words = st.text(alphabet="abcxyzé_ -", min_size=0, max_size=30)
    wrong_type = st.one_of(st.booleans(), st.just([]), st.just({"value": 1}), st.dictionaries(
        st.sampled_from(["a", "b"]), st.integers(0, 3), min_size=1))
    if isinstance(original, list):
        return st.one_of(wrong_type.filter(lambda v: v != []), words,
                         numbers.map(lambda x: [f"{x!r} {rng.unit}".strip() if rng.unit else x, *original[1:]]))
    if rng.unit:
        other = "kg" if rng.unit != "kg" else "m"
        return st.one_of(numbers.map(lambda x: f"{x!r} {rng.unit}"), wrong_type, words,
                         st.sampled_from([f"nan {rng.unit}", f"inf {rng.unit}", f"-inf {rng.unit}", f"1 {other}",
                                          rng.unit, "", 1.0, 7]),
                         st.integers(1, 50).map(lambda n: "9" * (n * 20) + f" {rng.unit}"))
    whole = isinstance(original, int) and not isinstance(original, bool)
    shaped = numbers.map(lambda x: int(x) if whole and abs(x) < 1e18 and int(x) != x else x)
    return st.one_of(shaped.filter(lambda x: not rng.contains(x)), wrong_type, words,
                     st.sampled_from([math.nan, math.inf, -math.inf, "1", "0.5"]))


@st.composite
def broken_case(draw):
    kind, index, dotted, rng = draw(st.sampled_from(SLOTS))
    data = copy.deepcopy(COMPLETE[kind][index])
    for key, table, name in concrete_keys(data):
        if key == dotted:
            break
    table[name] = draw(broken_values(rng, table[name]))
    command = draw(st.sampled_from([c for c, (_, reads) in COMMANDS.items() if kind in reads]))
    return kind, data, dotted, command


def _complete_case(kind: str, data: dict) -> dict:
    files = base_files()
    if kind == "scenario":
        data = {**data, "species": "species.toml", "laser": "laser.toml", "generator": "gen.toml"}
    files[kind] = data
    return files


@pytest.mark.slow
@settings(max_examples=examples(150), **SETTINGS)
@given(case=broken_case())
def test_a_broken_value_of_any_key_is_refused_by_every_command(case):
    kind, data, dotted, command = case
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        write_case(folder, _complete_case(kind, data))
        result, out = run_in(folder, command)
        assert_refused(result, out, FILE_NAMES[kind], dotted)


@pytest.mark.slow
@pytest.mark.parametrize("command", COMMANDS)
def test_every_key_out_of_range_through_every_command(tmp_path, command):
    # deterministic: each ranged key of each file kind the command reads, just above its range
    for kind, index, dotted, rng in SLOTS:
        if kind not in COMMANDS[command][1] or not math.isfinite(rng.bounds[1]):
            continue
        data = copy.deepcopy(COMPLETE[kind][index])
        for key, table, name in concrete_keys(data):
            if key == dotted:
                break
        high = rng.bounds[1]
        value = high * 2 if high > 0 else 1.0
        if isinstance(table[name], int) and not isinstance(table[name], bool):
            value = math.floor(high) + 1
        text = f"{value!r} {rng.unit}" if rng.unit else value
        table[name] = [text, *table[name][1:]] if isinstance(table[name], list) else text
        folder = tmp_path / f"{kind}-{index}-{dotted}"
        folder.mkdir()
        write_case(folder, _complete_case(kind, data))
        result, out = run_in(folder, command)
        error = assert_refused(result, out, FILE_NAMES[kind], dotted)
        assert rng.describe() in error["message"] or "expected" in error["message"]


# ---------------------------------------------------------------------------------------------
# Broken documents
# ---------------------------------------------------------------------------------------------
def _nesting_bomb(depth: int, shape: str) -> str:
    if shape == "array":
        return "bomb = " + "[" * depth + "]" * depth + "\n"
    if shape == "table":
        return "bomb = " + "{a = " * depth + "1" + "}" * depth + "\n"
    if shape == "dotted":
        return "bomb" + ".b" * depth + " = 1\n"
    return "[" + ".".join(["h"] * depth) + "]\n"


@st.composite
def broken_document(draw):
    """(kind, the file's bytes, the command): a document that is surely not a valid file of its kind."""
    kind = draw(st.sampled_from(list(FILE_NAMES)))
    files = base_files()
    text = to_toml(files[kind])
    lines = text.splitlines(keepends=True)
    at = draw(st.integers(0, len(lines)))
    how = draw(st.sampled_from(["nesting", "unknown key", "garbage line", "bad bytes", "duplicate", "scalar table",
                                "truncated string"]))
    if how == "nesting":
        bomb = _nesting_bomb(draw(st.integers(MAX_NESTING + 1, 20000)),
                             draw(st.sampled_from(["array", "table", "dotted", "header"])))
        body = text + bomb
    elif how == "unknown key":
        name = draw(st.from_regex(r"[a-z][a-z0-9_]{0,20}", fullmatch=True).filter(lambda n: n not in text))
        body = f"{name} = 1\n" + text
    elif how == "garbage line":
        body = "".join(lines[:at]) + draw(st.sampled_from(["= = =\n", "[\n", "x = \n", "]]\n", "'''\n"])) + \
               "".join(lines[at:])
    elif how == "bad bytes":
        raw = text.encode()
        cut = draw(st.integers(0, len(raw)))
        return kind, raw[:cut] + draw(st.sampled_from([b"\xff", b"\xc3\x28", b"\xed\xa0\x80", b"\xfe\xff"])) + \
            raw[cut:], draw_command(draw, kind)
    elif how == "duplicate":
        body = text + lines[0]
    elif how == "scalar table":
        table = draw(st.sampled_from([k for k, v in files[kind].items() if isinstance(v, (dict, list))]))
        data = {k: v for k, v in files[kind].items() if k != table}
        body = f"{table} = 3\n" + to_toml(data)
    else:
        body = "".join(lines[:at]) + 'title = "no end\n' + "".join(lines[at:])
    return kind, body.encode("utf-8"), draw_command(draw, kind)


def draw_command(draw, kind):
    return draw(st.sampled_from([c for c, (_, reads) in COMMANDS.items() if kind in reads]))


@settings(max_examples=examples(60), **SETTINGS)
@given(case=broken_document())
def test_a_broken_document_is_refused_by_every_command(case):
    kind, raw, command = case
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        write_case(folder, base_files(), raw={kind: raw})
        result, out = run_in(folder, command)
        assert_refused(result, out, FILE_NAMES[kind])


@pytest.mark.parametrize("kind", FILE_NAMES)
def test_a_byte_order_mark_is_accepted(tmp_path, kind):
    files = base_files()
    write_case(tmp_path, files, raw={kind: b"\xef\xbb\xbf" + to_toml(files[kind]).encode()})
    result, _ = run_in(tmp_path, "check")
    assert result.exit_code == 0, result.stderr


def test_a_file_too_large_is_refused_before_it_is_parsed(tmp_path):
    from sweepgen._config import MAX_TOML_BYTES

    files = base_files()
    raw = to_toml(files["laser"]).encode() + b"# " + b"x" * MAX_TOML_BYTES + b"\n"
    write_case(tmp_path, files, raw={"laser": raw})
    result, out = run_in(tmp_path, "check")
    error = assert_refused(result, out, "laser.toml")
    assert "larger than 8 MiB" in error["message"]


# ---------------------------------------------------------------------------------------------
# Real processes: what once broke the interpreter itself
# ---------------------------------------------------------------------------------------------
def run_process(folder: Path, *args):
    env = {**os.environ, "PYTHONWARNINGS": "default"}       # a warning would show on stderr
    return subprocess.run([sys.executable, "-m", "sweepgen", *args], cwd=folder, capture_output=True, text=True,
                          env=env, timeout=300)


@pytest.mark.slow
@pytest.mark.parametrize("shape", ["array", "table", "dotted", "header"])
def test_nesting_fifty_thousand_deep_in_a_real_process(tmp_path, shape):
    files = base_files()
    write_case(tmp_path, files, raw={"scenario": (to_toml(files["scenario"]) + _nesting_bomb(50000, shape)).encode()})
    proc = run_process(tmp_path, "plan", "scenario.toml", "--json")
    assert proc.returncode == 2 and "Traceback" not in proc.stderr
    assert proc.stderr.count("\n") == 1 and "scenario.toml" in proc.stderr and "nested 50000 deep" in proc.stderr
    assert json.loads(proc.stdout)["error"]["exit_code"] == 2


@pytest.mark.slow
def test_the_issue_inputs_in_real_processes(tmp_path):
    files = base_files()
    write_case(tmp_path, files)
    cases = [(["check", "scenario.toml", "--rate", "1e-300 Sa/s"], "'--rate'"),
             (["export", "scenario.toml", "-f", "csv", "-o", "/dev/null"], "'--output'"),
             (["plan", "scenario.toml", "--plot", str(tmp_path / "no" / "such" / "x.png")], "'--plot'")]
    for args, named in cases:
        proc = run_process(tmp_path, *args)
        assert proc.returncode == 2 and "Traceback" not in proc.stderr, (args, proc.stderr)
        assert proc.stderr.count("\n") == 1 and named in proc.stderr, (args, proc.stderr)
    assert not (tmp_path / "no").exists()


@pytest.mark.skipif(not os.path.exists(os.devnull) or os.name != "posix", reason="a POSIX device file")
@pytest.mark.parametrize("args", [("calibrate", os.devnull, "--laser", "demo-ecdl-piezo", "--stage", "1"),
                                  ("inspect", os.devnull)])
def test_a_device_given_as_a_file_is_named_as_such(args, tmp_path):
    # a device exists but is no file: the refusal says so rather than "file not found"
    result = run_cli(*args, "-o", tmp_path / "new.toml") if args[0] == "calibrate" else run_cli(*args)
    assert result.exit_code == 2 and "not a regular file" in result.output and "not found" not in result.output
    assert not (tmp_path / "new.toml").exists()


# ---------------------------------------------------------------------------------------------
# Tables read back (JSON sidecars) and measurement files
# ---------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def exported(tmp_path_factory):
    """A table exported as raw codes with its sidecar (the whole check and render, once)."""
    folder = tmp_path_factory.mktemp("table")
    files = base_files()
    write_case(folder, files)
    result = run_cli("export", folder / "scenario.toml", "-f", "raw", "-o", folder / "out", "--name", "t")
    assert result.exit_code == 0, result.stderr
    return folder / "out"


#: sidecar keys a reader uses, with values that are surely wrong for each
SIDECAR_BREAKS = {
    "data_file": ["../t.bin", "", 3, None, "/etc/hostname"],
    "sample_rate": [0, -1, 1e-300, 1e300, "8 MSa/s", math.nan, True, None],
    "count": [0, -5, 1.5, 10**13, "160000", None],
    "period_count": [0, 2.5, 10**13, "x"],
    "header_bytes": [-1, 0.5, "0"],
    "numpy_dtype": ["banana", "<U5", "O", 5, "(2,)i2", None],
    "generator.code_dtype": ["<f4", "nope", None],
    "scaling.code.scale": [0, math.inf, "1", None],
    "scaling.code.offset": [math.nan, "0", None],
    "scaling.drive.scale": [math.inf, None, [1]],
    "scaling.drive.offset": [None, {}],
    "scaling.detuning.kind": ["cubic", None, 1],
    "scaling.detuning.scale": [math.nan, "1"],
}


def _set(doc: dict, dotted: str, value) -> None:
    *path, last = dotted.split(".")
    for part in path:
        doc = doc[part]
    if value is None:
        doc.pop(last, None)
    else:
        doc[last] = value


def test_the_intact_table_reads_back_and_verifies(exported):
    from sweepgen import drivers

    assert drivers.read_table(exported / "t.bin").verified


@pytest.mark.slow
@settings(max_examples=examples(60), **SETTINGS)
@given(key=st.sampled_from(list(SIDECAR_BREAKS)), data=st.data())
def test_a_broken_sidecar_is_refused_by_name(exported, key, data):
    value = data.draw(st.sampled_from(SIDECAR_BREAKS[key]))
    doc = json.loads((exported / "t.bin.json").read_text())
    _set(doc, key, value)
    command = data.draw(st.sampled_from(["inspect", "check", "simulate"]))
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        write_case(folder, base_files())
        (folder / "t.bin").write_bytes((exported / "t.bin").read_bytes())
        (folder / "t.bin.json").write_text(json.dumps(doc))
        args = ["inspect", folder / "t.bin"] if command == "inspect" else \
            [command, folder / "scenario.toml", "--table", folder / "t.bin"]
        result = run_cli(*args, "--json")
        assert_refused(result, folder / "out", "t.bin.json", key)


@settings(max_examples=examples(40), **SETTINGS)
@given(row=st.integers(0, 10), column=st.sampled_from([0, 1]),
       value=st.sampled_from(["1e20", "-1e20", "nan", "inf", "x", "", "1,2"]))
def test_a_broken_measurement_file_is_refused(row, column, value):
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        write_case(folder, base_files())
        lines = MEASUREMENTS["piezo.csv"].splitlines()
        cells = lines[1 + row].split(",")
        cells[column] = value
        lines[1 + row] = ",".join(cells)
        (folder / "piezo.csv").write_text("\n".join(lines) + "\n")
        result, out = run_in(folder, "calibrate")
        assert_refused(result, out, "piezo.csv")


@pytest.mark.parametrize("key, value", [("channel", "gate"), ("timing", "soon"), ("channel.quantity", "volume"),
                                        ("timing.delay", "0.1 ms")])
def test_a_sidecars_channel_or_timing_of_the_wrong_form_is_refused_by_name(tmp_path, exported, key, value):
    # what the table holds (channel.quantity) and when it plays (timing.delay) decide how it is read back
    doc = json.loads((exported / "t.bin.json").read_text())
    top, _, inner = key.partition(".")
    doc[top] = {inner: value} if inner else value
    (tmp_path / "t.bin").write_bytes((exported / "t.bin").read_bytes())
    (tmp_path / "t.bin.json").write_text(json.dumps(doc))
    assert_refused(run_cli("inspect", tmp_path / "t.bin", "--json"), tmp_path / "out", "t.bin.json", key)


@pytest.mark.parametrize("text", ["[" * 100000 + "]" * 100000, '{"a": ' * 50000 + "1" + "}" * 50000])
def test_a_sidecar_nested_too_deeply_is_refused(tmp_path, exported, text):
    from sweepgen import drivers
    from sweepgen.errors import InputError

    (tmp_path / "t.bin").write_bytes((exported / "t.bin").read_bytes())
    (tmp_path / "t.bin.json").write_text(text)
    with pytest.raises(InputError, match="nested too deeply|not a sweepgen sidecar"):
        drivers.read_table(tmp_path / "t.bin")


@pytest.mark.parametrize("column,value,unit", [("drive", "1e20", "V"), ("drive", "nan", "V"),
                                               ("detuning", "5e15", "Hz"), ("time", "1e9", "s")])
def test_a_measured_value_outside_its_range_is_refused(tmp_path, column, value, unit):
    from sweepgen import measurements
    from sweepgen.errors import InputError

    other = "detuning (MHz)" if column != "detuning" else "drive (V)"
    path = tmp_path / "m.csv"
    path.write_text(f"{column} ({unit}),{other}\n1,2\n{value},3\n4,5\n")
    with pytest.raises(InputError) as caught:
        measurements.read(path).require(column, unit, "test")
    assert caught.value.file.endswith("m.csv")
    assert column in str(caught.value)


@pytest.mark.parametrize("value", ['"' + "y" * (7 << 20) + '"', '"' + '\\"' * (3 << 20) + '"',
                                   '"""' + '""y' * (2 << 20) + '"""', '"' + "y" * (7 << 20)])
def test_a_string_of_megabytes_is_scanned_for_nesting_in_little_memory(value):
    # the scan that bounds nesting skips strings; a repetition that keeps a backtracking state per
    # character took 380 MB for a 3 MB string (a file may hold 8 MiB)
    import tracemalloc

    from sweepgen._config import nesting

    text = f"a = [[[1]]]\nt = {value}\n" + "b" + ".c" * 40 + " = 1\n"
    tracemalloc.start()
    try:
        depth, line = nesting(text)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 2 * len(text) + (8 << 20)          # the blanked copy of the text, not a multiple of it
    if value.endswith('"'):
        assert (depth, line) == (40, 3)                # the 40 dots of the last line, nothing in the string


def test_control_characters_in_a_message_are_written_as_escapes(tmp_path):
    # a key (or an instrument's reply) may hold terminal commands and line breaks: the error stays one
    # line of printable text
    files = base_files()
    text = '"a\\u001b[31mred\\u0000\\u009bx\\ny" = 1\n' + to_toml(files["scenario"])
    write_case(tmp_path, files, raw={"scenario": text.encode()})
    result, out = run_in(tmp_path, "plan")
    error = assert_refused(result, out, "scenario.toml")
    line = result.stderr.strip()
    assert "key 'a\\x1b[31mred\\x00\\x9bx y'" in line            # the line break collapses to a space
    assert not any(ord(c) < 0x20 or 0x7f <= ord(c) < 0xa0 for c in line)
    assert error["key"] == "a\x1b[31mred\x00\x9bx\ny"             # the JSON document keeps the key as it is
