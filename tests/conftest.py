"""Shared test helpers, one home each: Hypothesis profiles; scenario, laser and generator
files; a third-party driver plug-in; sample tables and a reader that knows only the sidecar;
a ramp board written from the protocol document; loopback ports, pseudo-terminals and VISA
sessions; the command line in-process."""

from __future__ import annotations

import contextlib
import copy
import dataclasses
import functools
import hashlib
import json
import os
import socket
import struct
import time
import tty
import zlib
from pathlib import Path
from typing import NamedTuple

import numpy as np
import pytest
from hypothesis import settings

# Hypothesis profiles. "thorough" is the default: what ``pytest`` and CI run. "fast" is for
# local runs, selected with Hypothesis's own option ``pytest --hypothesis-profile=fast``.
# Both draw the same examples on every run (derandomized), so that a test run's verdict does
# not depend on luck; "explore" draws fresh random examples, ten times as many, to hunt for
# new failures (Hypothesis prints the failing example and how to reproduce it).
# Tests give their example count through ``examples(n)``: n under the thorough profile.
THOROUGH_EXAMPLES = 100
settings.register_profile("thorough", max_examples=THOROUGH_EXAMPLES, deadline=None,
                          derandomize=True)
settings.register_profile("fast", max_examples=THOROUGH_EXAMPLES // 10, deadline=None,
                          derandomize=True)
settings.register_profile("explore", max_examples=THOROUGH_EXAMPLES * 10, deadline=None)
settings.load_profile("thorough")

# Every value a loader reads must have a plausible range (sweepgen/plausible.py): under the
# tests, reading a key without one is an error that names the key and says where to add it.
from sweepgen import plausible  # noqa: E402

plausible.STRICT = True


def examples(n: int) -> int:
    """``max_examples`` for a property test that runs ``n`` examples under the thorough profile,
    scaled by the loaded profile (a tenth, at least 2, under the fast one)."""
    scaled = round(n * settings.default.max_examples / THOROUGH_EXAMPLES)
    return max(min(n, 2), scaled)


# -- scenario, laser and generator files --------------------------------------------------------
#: 87Rb as a closed two-level transition (tests/species/rb87-two-level.toml): the species of the
#: shared test scenarios, so that tests of the sweep, the chain and the hardware do not depend on
#: the refinements of the force model (effective saturation intensity, depumping); the tests of
#: those name the shipped "rb87-d2".
TWO_LEVEL_RB = str(Path(__file__).resolve().parent / "species" / "rb87-two-level.toml")

BASE_SCENARIO = {
    "title": "test scenario",
    "species": TWO_LEVEL_RB,
    "source": {"model": "effusive", "temperature": "390 K", "pulse_time": "0 ms"},
    "light": {"saturation": 3.0, "start": "0.05 m"},
    "target": {"distance": "1.0 m", "capture_velocity": "20 m/s"},
    "chirp": {"start_velocity": "260 m/s", "end_velocity": "15 m/s", "force_fraction": 0.6, "start_time": "auto",
              "hold": "0.5 ms", "return_time": "0.3 ms", "period": "20 ms"},
}


def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, float):
        return repr(v) if v == v else "nan"
    if isinstance(v, list):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{k} = {_value(x)}" for k, x in v.items()) + "}"
    return str(v)


def _is_table_array(value) -> bool:
    return isinstance(value, list) and bool(value) and all(isinstance(x, dict) for x in value)


def to_toml(data: dict) -> str:
    """A small TOML writer for test fixtures: scalars, lists, tables one or two levels deep and
    arrays of tables (``[[chain]]``)."""
    lines, tables, arrays = [], [], []
    for key, value in data.items():
        if isinstance(value, dict):
            tables.append((key, value))
        elif _is_table_array(value):
            arrays.append((key, value))
        else:
            lines.append(f"{key} = {_value(value)}")
    for name, table in tables:
        lines.append(f"\n[{name}]")
        subtables = []
        for key, value in table.items():
            if isinstance(value, dict):
                subtables.append((key, value))
            else:
                lines.append(f"{key} = {_value(value)}")
        for sub, content in subtables:
            lines.append(f"\n[{name}.{sub}]")
            lines.extend(f"{k} = {_value(v)}" for k, v in content.items())
    for name, array in arrays:
        for table in array:
            lines.append(f"\n[[{name}]]")
            lines.extend(f"{k} = {_value(v)}" for k, v in table.items())
    return "\n".join(lines) + "\n"


def merged(base: dict, **sections) -> dict:
    """A deep copy of ``base`` with sections updated: a dict updates that table, another value
    replaces it; ``None`` removes a key (or a whole section)."""
    data = copy.deepcopy(base)
    for name, change in sections.items():
        if change is None:
            data.pop(name, None)
        elif isinstance(change, dict) and isinstance(data.get(name), dict):
            section = data[name]
            for key, value in change.items():
                if value is None:
                    section.pop(key, None)
                else:
                    section[key] = value
        else:
            data[name] = copy.deepcopy(change)
    return data


def scenario_dict(**sections) -> dict:
    """BASE_SCENARIO with sections updated: ``scenario_dict(chirp={"force_fraction": 0.5})``
    (see :func:`merged`)."""
    return merged(BASE_SCENARIO, **sections)


def make_scenario(**sections):
    """A loaded Scenario from scenario_dict(**sections), without a file."""
    from sweepgen.scenario import scenario_from_dict

    return scenario_from_dict(scenario_dict(**sections), "test.toml")


# A continuous beam checked against its own laser and generator profiles (laser.toml and
# gen.toml beside it, written by write_checked): a piezo-tuned laser on a 14-bit voltage board.
# Invented test hardware; the species data are rb87-d2's, as a two-level atom.
CHECKED_SCENARIO = scenario_dict(
    title="test: continuous Rb beam", laser="laser.toml", generator="gen.toml",
    source={"pulse_time": None},
    chirp={"start_velocity": "200 m/s", "start_time": None, "hold": "0.2 ms", "return_time": "0.5 ms",
           "period": "6 ms"})
PIEZO_LASER = {
    "title": "test piezo laser",
    "limits": {"mode_hop_free": "1 GHz", "max_chirp_rate": "3 GHz/ms", "input_min": "-10 V", "input_max": "10 V",
               "max_slew": "100 V/ms"},
    "response": {"model": "first-order", "corner": "200 kHz"},
    "chain": [{"stage": "analog", "coefficient": "40 MHz/V", "set_point": "-140 MHz"}],
}
VOLTAGE_BOARD = {
    "title": "test generator", "kind": "board", "channels": 1,
    "sampling": {"rate_min": "1 kSa/s", "rate_max": "20 MSa/s", "memory": 1 << 20, "granularity": 8,
                 "min_length": 32},
    "output": {"kind": "voltage", "range_min": "-10 V", "range_max": "10 V", "dac_bits": 14,
               "termination": "high-z", "load": "high-z"},
    "link": {"kind": "serial", "port": "loop://", "throughput": "1 MB/s"},
}


def write_checked(folder, scenario=None, laser=None, gen=None):
    """Write ``scenario.toml``, ``laser.toml`` and ``gen.toml`` (by default CHECKED_SCENARIO,
    PIEZO_LASER and VOLTAGE_BOARD) into ``folder``; returns the scenario's path."""
    (folder / "laser.toml").write_text(to_toml(laser or PIEZO_LASER))
    (folder / "gen.toml").write_text(to_toml(gen or VOLTAGE_BOARD))
    path = folder / "scenario.toml"
    path.write_text(to_toml(scenario or CHECKED_SCENARIO))
    return path


# Complete files: between them, every key of every file kind (tests/test_plausible.py checks that
# each plausible range is read by one of them; add a new key to one of these files). Invented values.
COMPLETE = {
    "scenario": [
        scenario_dict(source={"divergence": "3 mrad", "pulse_time": "0.1 ms"},
                      light={"waist": "5 mm", "focus": "-0.2 m"}, target={"aperture": "10 mm"},
                      chirp={"start_time": "0.4 ms"},
                      drive={"sample_rate": "10 MSa/s", "channel": 2, "max_step": "600 kHz",
                             "tracking_fraction": 0.25, "preshape": True, "preshape_bandwidth": "20 kHz"}),
        scenario_dict(source={"model": "gaussian", "temperature": None, "mean_velocity": "170 m/s",
                              "velocity_spread": "30 m/s", "pulse_time": None},
                      chirp={"start_velocity": "200 m/s", "start_time": None, "force_fraction": None,
                             "margin": 0.6}),                 # margin: the old name, still read
        scenario_dict(species="rb87-d2",
                      source={"pulse_duration": "0.2 ms", "pulse_shape": "gaussian", "radius": "1.5 mm",
                              "collimator": {"distance": "0.2 m", "radius": "1 mm"}},
                      chirp={"min_survival": 0.4},
                      channels={"repump": {"kind": "frequency", "role": "repump", "saturation": 1.0,
                                           "offset": "0 MHz"},
                                "held": {"kind": "frequency", "role": "repump", "saturation": 0.5,
                                         "detuning": "-5 MHz"}}),
        scenario_dict(species="rb87-d2",
                      channels={"repump": {"kind": "frequency", "role": "repump", "saturation": 1.0,
                                           "offset": "0 MHz", "laser": "demo-aom-vco", "output": 2,
                                           "generator": "virtual-awg"},
                                "gate": {"kind": "gate", "on": "chirp_start", "on_shift": "-20 us",
                                         "off": "chirp_end", "off_shift": "50 us", "level": 0.8, "dark": "0 V",
                                         "bright": "1 V", "input_min": "-0.5 V", "input_max": "1.5 V",
                                         "lights": ["main", "repump"], "tolerance": "0.1 ms", "output": 3}},
                      timing={"delay": "0.1 ms", "mode": "burst", "cycles": 2, "source": "external",
                              "edge": "falling", "level": "1.5 V",
                              "markers": {"arrival": {"at": "arrival", "shift": "-10 us", "width": "20 us",
                                                      "output": 4, "high": "3.3 V", "low": "0 V"}}}),
    ],
    "species": [
        {"title": "test atom", "kind": "atom",
         "wavelength": {"value": "780.241209686 nm", "source": "Steck, Rb 87 D line data (recalled)"},
         "mass": {"value": "86.909180527 u", "source": "Steck, Rb 87 D line data (recalled)"},
         "lifetime": {"value": "26.2348 ns", "source": "Steck, Rb 87 D line data (recalled)"},
         "saturation_intensity": {"value": "1.66933 mW/cm^2", "source": "Steck, Rb 87 D line data (recalled)"},
         "effective_saturation_intensity": {"value": "3.57713 mW/cm^2",
                                            "source": "Steck, Rb 87 D line data (recalled)"},
         "max_scattering_rate": {"fraction": 0.5, "source": "two-level value"},
         "off_resonant_level": {"splitting": "-266.65 MHz", "strength": 0.357, "branching": 0.5,
                                "source": "Steck, Rb 87 D line data (recalled)"},
         "zeeman": {"ground_g": 0.5, "ground_m": 2, "excited_g": 0.6666666667, "excited_m": 3,
                    "source": "Steck, Rb 87 D line data (recalled)"}},
        {"title": "test molecule (invented)", "kind": "molecule",
         "wavelength": {"value": "606 nm", "source": "invented"}, "mass": {"value": "59 u", "source": "invented"},
         "linewidth": {"value": "8.3 MHz", "source": "invented"},
         "max_scattering_rate": {"ground_states": 24, "excited_states": 4, "source": "invented"},
         "loss_per_photon": {"value": 2e-5, "source": "invented"}},
    ],
    "laser": [
        {**PIEZO_LASER, "chain": [{**PIEZO_LASER["chain"][0], "set_drive": "0.5 V"}]},
        {"title": "test calibrated piezo", "limits": PIEZO_LASER["limits"],
         "response": {"model": "second-order", "resonance": "25 kHz", "q": 0.8},
         "chain": [{"stage": "calibrated", "drive": ["-10 V", "-5 V", "0 V", "5 V", "10 V"],
                    "detuning": ["-540 MHz", "-340 MHz", "-140 MHz", "60 MHz", "260 MHz"], "degree": 1}]},
        {"title": "test fitted piezo", "limits": PIEZO_LASER["limits"],
         "chain": [{"stage": "calibrated", "fit": "polynomial", "range": ["-10 V", "10 V"],
                    "coefficients": ["-140 MHz", "400 MHz"], "rms_residual": "0.3 MHz", "max_residual": "0.9 MHz",
                    "uncertainty": "0.2 MHz", "hysteresis": "1 MHz", "points": 40, "outliers": 1}]},
        {"title": "test AOM on a VCO",
         "limits": {"max_chirp_rate": "10 GHz/ms", "input_min": "0 V", "input_max": "10 V", "max_slew": "100 V/ms"},
         "chain": [{"stage": "aom", "passes": 2, "order": -1, "centre": "350 MHz", "set_point": "-456 MHz",
                    "rf_min": "80 MHz", "rf_max": "620 MHz"},
                   {"stage": "vco", "coefficient": "75 MHz/V", "frequency": "30 MHz", "voltage": "0 V"}]},
        {"title": "test AOM on a calibrated VCO",
         "limits": {"max_chirp_rate": "10 GHz/ms", "input_min": "0 V", "input_max": "10 V"},
         "chain": [{"stage": "aom", "passes": 1, "order": 1, "centre": "350 MHz", "set_point": "-456 MHz"},
                   {"stage": "vco", "voltage": ["0 V", "5 V", "10 V"], "frequency": ["30 MHz", "400 MHz", "780 MHz"],
                    "degree": 1}]},
        {"title": "test offset lock on a DDS",
         "limits": {"mode_hop_free": "1.2 GHz", "max_chirp_rate": "2 GHz/ms", "input_min": "100 MHz",
                    "input_max": "250 MHz", "max_slew": "500 MHz/ms"},
         "response": {"model": "first-order", "corner": "100 kHz"},
         "chain": [{"stage": "offset_lock", "reference": "-1.6 GHz", "sign": 1, "multiplier": 2,
                    "beat_min": "800 MHz", "beat_max": "2 GHz"},
                   {"stage": "dds", "clock": "1 GHz", "bits": 32}]},
        {"title": "test divided offset lock",
         "limits": {"max_chirp_rate": "2 GHz/ms", "input_min": "100 MHz", "input_max": "250 MHz"},
         "chain": [{"stage": "offset_lock", "reference": "-1.6 GHz", "sign": 1, "divider": 8}]},
    ],
    "generator": [
        VOLTAGE_BOARD,
        {**VOLTAGE_BOARD, "title": "test AWG into 50 ohm", "kind": "awg", "channels": 2,
         "output": {**VOLTAGE_BOARD["output"], "termination": "50 ohm", "load": "1 Mohm",
                    "source_impedance": "50 ohm"},
         "link": {"kind": "visa", "resource": "TCPIP::127.0.0.1::5025::SOCKET", "throughput": "5 MB/s",
                  "timeout": "2 s"},
         "commands": {"identify": "*IDN?", "identity_pattern": "^test,", "clear": "*CLS",
                      "output_off": "OUTP OFF", "upload": "TRAC:DATA {name},{data}", "wait": "*OPC?",
                      "error_query": "SYST:ERR?", "no_error_pattern": "^[+]?0,", "output_on": "OUTP ON"},
         "outputs": {"2": {"range_min": "-5 V", "range_max": "5 V", "dac_bits": 16, "termination": "50 ohm",
                           "load": "50 ohm", "source_impedance": "50 ohm"}}},
        {**VOLTAGE_BOARD, "title": "test AWG with separate amplitude and offset limits", "kind": "awg",
         "channels": 2,
         "output": {"kind": "voltage", "amplitude_max": "10 V", "offset_max": "5 V", "dac_bits": 14},
         "outputs": {"2": {"amplitude_max": "5 V", "offset_max": "2.5 V"}},
         "link": {"kind": "visa", "resource": "TCPIP::127.0.0.1::5025::SOCKET", "throughput": "5 MB/s"},
         "commands": {"identify": "*IDN?", "identity_pattern": "^test,", "clear": "*CLS",
                      "output_off": "OUTP{channel} OFF", "upload": "TRAC:DATA {name},{data}", "wait": "*OPC?",
                      "error_query": "SYST:ERR?", "no_error_pattern": "^[+]?0,", "output_on": "OUTP{channel} ON",
                      "trigger": "TRIG:SOUR {trigger_source}", "trigger_edge": "TRIG:SLOP {edge}"},
         "trigger": {"external": "EXTERN", "internal": "INT", "software": "MAN", "rising": "UP",
                     "falling": "DOWN"}},
        {"title": "test DDS board", "kind": "board", "channels": 2,
         "sampling": {"rates": ["100 kSa/s", "1 MSa/s"], "memory": 262144},
         "output": {"kind": "frequency", "clock": "1 GHz", "word_bits": 32, "range_min": "1 MHz",
                    "range_max": "400 MHz"},
         "outputs": {"2": {"clock": "500 MHz", "word_bits": 48, "range_min": "1 MHz", "range_max": "200 MHz"}},
         "link": {"kind": "serial", "port": "loop://", "baud": 921600, "throughput": "80 kB/s", "timeout": "2 s"}},
    ],
}


def load_kind(kind: str, data: dict, path):
    """Load ``data`` as a file of ``kind`` ("scenario", "species", "laser" or "generator") at ``path``."""
    from sweepgen.generator import generator_from_dict
    from sweepgen.laser import laser_from_dict
    from sweepgen.scenario import scenario_from_dict
    from sweepgen.species import species_from_dict

    loaders = {"scenario": scenario_from_dict, "species": species_from_dict, "laser": laser_from_dict,
               "generator": generator_from_dict}
    return loaders[kind](data, path)


# An AWG with another dialect: long forms, SOURce1/OUTPut1 suffixes, DATA instead of TRACe,
# big-endian blocks, a checksum query instead of a readback (all standard SCPI, but the checksum
# node, which is the virtual instrument's own extension). Invented test profile.
OTHER_DIALECT = {
    "title": "AWG with another dialect (test profile)", "kind": "awg", "channels": 1,
    "sampling": {"rate_min": "1 kSa/s", "rate_max": "50 MSa/s", "memory": 1048576, "granularity": 8,
                 "min_length": 32},
    "output": {"kind": "voltage", "range_min": "-10 V", "range_max": "10 V", "dac_bits": 14},
    "link": {"kind": "visa", "resource": "TCPIP::127.0.0.1::5025::SOCKET", "throughput": "5 MB/s",
             "timeout": "2 s"},
    "commands": {
        "identify": "*IDN?", "identity_pattern": "^sweepgen,other-awg,", "clear": "*CLS",
        "reset": "*RST",
        "output_off": "OUTPut{channel}:STATe 0",
        "format": "FORMat:DATA {type},{bits};BORDer {border}",
        "byte_order": "big", "upload_mode": "block", "trace_name": "CHIRP_A",
        "upload": "DATA:DATA {name},{data}",
        "wait": "*OPC?", "error_query": "SYSTem:ERRor:NEXT?", "no_error_pattern": '^[+]?0,"No error"',
        "checksum": "DATA:CRC? {name}",
        "function": "SOURce{channel}:FUNCtion:SHAPe USER;USER {name}",
        "rate": "SOURce{channel}:FREQuency:CW {frequency}",
        "amplitude": "SOURce{channel}:VOLTage:LEVel:IMMediate:AMPLitude {amplitude}",
        "offset": "SOURce{channel}:VOLTage:LEVel:IMMediate:OFFSet {offset}",
        "trigger": "TRIGger:SEQuence:SOURce {trigger_source}",
        "output_on": "OUTPut{channel}:STATe 1",
    },
    "trigger": {"external": "EXTernal", "internal": "IMMediate"},
}
OTHER_IDENTITY = "sweepgen,other-awg,42,1.0"


@functools.cache
def quick_ramp_board():
    """The built-in demo-ramp-board (32-bit tuning words, 1 GHz clock, 1-400 MHz, 0.1-1 MSa/s)
    with a 0.2 s reply timeout on the driver's side, so that dropped and stalled frames are
    retried quickly (the board's own gap timeout, 0.1 s, stays below it)."""
    from sweepgen.generator import load_generator

    board = load_generator("demo-ramp-board")
    return dataclasses.replace(board, link=dataclasses.replace(board.link, timeout=0.2))


def deliver_to_board(table, url, generator=None, **delivery):
    """Upload ``table`` (or a dict board channel -> table) with the serial driver to the board at ``url`` (a ``socket://`` URL or a
    device path) in 1 KiB frames; ``generator`` defaults to quick_ramp_board(), ``options`` adds to
    the driver options, other keywords go to the Delivery. Returns the driver's report."""
    from sweepgen.drivers.base import Delivery
    from sweepgen.drivers.serial_board import SerialDriver

    options = {"frame_bytes": 1024, **delivery.pop("options", {})}
    tables = table if isinstance(table, (dict, list)) else [table]
    return SerialDriver().deliver_tables(tables, Delivery(url, generator or quick_ramp_board(), options=options,
                                                          **delivery))


# -- a third-party driver plug-in ----------------------------------------------------------------
PLUGIN_SOURCE = '''
from sweepgen.drivers.base import Driver, FileDriver
from sweepgen.errors import DriverError


class TextCodes(FileDriver):
    name = "textcodes"
    extension = "txt"
    description = "codes as decimal text, one per line (test plug-in)"

    def layout(self, table, options):
        return {"dtype": table.info.dtype, "header_bytes": None, "value_to_code": {"offset": 0, "scale": 1}}

    def write(self, table, out, layout, delivery):
        for chunk in table.chunks():
            out.write("".join(f"{c}\\n" for c in chunk.tolist()).encode())


class Exploding(TextCodes):
    name = "exploding"

    def write(self, table, out, layout, delivery):
        for n, chunk in enumerate(table.chunks()):
            if n == 1:
                raise DriverError("the disk filled up after the first chunk (test plug-in)")
            out.write(chunk.tobytes())


class Scope(Driver):
    name = "scope"
    kind = "instrument"

    def deliver(self, table, delivery):
        return {}


NOT_A_DRIVER = 42
'''


def install_driver_plugin(root, module: str, entries: str):
    """Make ``root`` hold a real third-party distribution: ``module.py`` with PLUGIN_SOURCE (drivers
    ``TextCodes``, ``Exploding``, ``Scope`` and a ``NOT_A_DRIVER``) and a ``*.dist-info`` whose
    ``entry_points.txt`` registers ``entries`` (lines ``name = module:Class``) in the group
    ``sweepgen.drivers``. Put ``root`` on sys.path or PYTHONPATH to install it."""
    root.mkdir(parents=True, exist_ok=True)
    (root / f"{module}.py").write_text(PLUGIN_SOURCE)
    info = root / f"{module}-1.0.dist-info"
    info.mkdir()
    (info / "METADATA").write_text(f"Metadata-Version: 2.1\nName: {module}\nVersion: 1.0\n")
    (info / "entry_points.txt").write_text("[sweepgen.drivers]\n" + entries)
    return root


# -- sample tables, and a reader that knows only the sidecar -------------------------------------
def sine_codes(count: int, bits: int = 14, dtype="<i2"):
    """One period of a full-scale sine as signed DAC codes (demo data)."""
    full_scale = 2 ** (bits - 1) - 1
    return np.round(full_scale * np.sin(np.linspace(0, 2 * np.pi, count, endpoint=False))).astype(dtype)


def dds_table(count=3000, rate=1e6, f0=20e6, f1=180e6, clock=1e9, bits=32, dtype="<u4"):
    """A frequency ramp from f0 to f1 as DDS tuning words (demo data); returns (table, words).
    FTW = round(f 2^N / f_clock) (common practice)."""
    from sweepgen.table import Frame, RenderedTable, TableInfo

    freqs = np.linspace(f0, f1, count)
    words = np.round(freqs * 2.0**bits / clock).astype(dtype)
    info = TableInfo(sample_rate=rate, count=count, period_count=count, dtype=dtype, output="frequency",
                     drive_unit="Hz", code_scale=clock / 2.0**bits, code_offset=0.0, amplitude=None, offset=None)

    def source(start, stop):
        return Frame(start, np.arange(start, stop) / rate, freqs[start:stop], freqs[start:stop], words[start:stop])

    return RenderedTable(info, source), words


class SidecarRead(NamedTuple):
    values: np.ndarray       # the numbers in the data file, as floats
    codes: np.ndarray
    drive: np.ndarray
    detuning: np.ndarray
    side: dict               # the sidecar document
    times: np.ndarray        # sample times from the sample rate


def read_by_sidecar(sidecar_path) -> SidecarRead:
    """Decode a data file using only its sidecar (NumPy, json and hashlib: no sweepgen code)."""
    side = json.loads(sidecar_path.read_text())
    path = sidecar_path.parent / side["data_file"]
    raw = path.read_bytes()
    assert hashlib.sha256(raw).hexdigest() == side["sha256"]       # reference: hashlib
    assert len(raw) == side["data_bytes"]
    if side["header_bytes"] is None:                                # text: the value column
        rows = np.loadtxt(path, delimiter=side["delimiter"], skiprows=side["header_lines"], ndmin=2)
        values = rows[:, [c["name"] for c in side["columns"]].index(side["value_column"])]
    else:
        values = np.frombuffer(raw, dtype=np.dtype(side["numpy_dtype"]), offset=side["header_bytes"])
    scaling = side["scaling"]
    values = values.astype(float)
    codes = scaling["code"]["offset"] + scaling["code"]["scale"] * values
    drive = scaling["drive"]["offset"] + scaling["drive"]["scale"] * values
    det = scaling["detuning"]
    if det["kind"] == "linear":
        detuning = det["offset"] + det["scale"] * values
    else:
        detuning = np.interp(values, det["value"], det["detuning"])
    return SidecarRead(values, codes, drive, detuning, side, np.arange(side["count"]) / side["sample_rate"])


# -- a ramp board written from drivers/serial_protocol.md alone -------------------------------------
class DocBoard:
    """A minimal board written from drivers/serial_protocol.md alone: struct and zlib, no sweepgen code.

    Sections of the document it follows: 1 (frames), 1.1 (receiving), 2 (remembered reply),
    3.1-3.7 (messages), 4 (REFUSE layout), 5 (commit rule).
    """

    def __init__(self, *, memory=262144, rates=(1_000_000,), clock=1_000_000_000, word_bits=32,
                 max_payload=512):
        self.memory, self.rates, self.clock, self.word_bits = memory, rates, clock, word_bits
        self.max_payload = max_payload
        self.rx = bytearray()
        self.session = False
        self.state = 0                       # 0 IDLE, 1 RECEIVING, 2 VERIFIED
        self.armed = False
        self.begin = None                    # (format, count, crc, rate)
        self.mem = bytearray()
        self.received = 0
        self.committed = None                # (format, count, crc, rate, bytes)
        self.last = None                     # (seq, type, crc of payload, reply)

    @staticmethod
    def frame(t, seq, payload):
        body = b"\xa5\x5a" + struct.pack("<BBHH", t, seq, len(payload), len(payload) ^ 0xFFFF) + payload
        return body + struct.pack("<I", zlib.crc32(body))

    def ack(self, t, seq, data=b""):
        return self.frame(0x80, seq, bytes([t]) + data)

    def refuse(self, t, seq, reason, detail=0):
        return self.frame(0x81, seq, struct.pack("<BBI", t, reason, detail))

    def receive(self, data):
        """Section 1.1: return the replies to every complete frame in the stream."""
        self.rx += data
        out = []
        while True:
            i = self.rx.find(b"\xa5\x5a")
            if i < 0:
                del self.rx[:max(0, len(self.rx) - 1) if self.rx[-1:] == b"\xa5" else len(self.rx)]
                return out
            del self.rx[:i]
            if len(self.rx) < 8:
                return out
            t, seq, n, check = struct.unpack_from("<BBHH", self.rx, 2)
            if check != n ^ 0xFFFF or n > self.max_payload:
                del self.rx[:1]
                continue
            if len(self.rx) < n + 12:
                return out
            frame = bytes(self.rx[:n + 12])
            if zlib.crc32(frame[:8 + n]) != struct.unpack_from("<I", frame, 8 + n)[0]:
                out.append(self.refuse(t, seq, 0x01))
                del self.rx[:1]
                continue
            del self.rx[:n + 12]
            out.append(self.handle(t, seq, frame[8:8 + n]))

    def handle(self, t, seq, p):
        key = (seq, t, zlib.crc32(p))
        if t != 0x01 and self.last and self.last[:3] == key:
            return self.last[3]
        reply = self.execute(t, seq, p)
        self.last = (*key, reply)
        return reply

    def execute(self, t, seq, p):
        if t == 0x01:                                            # HELLO
            if p != b"\x01":
                return self.refuse(t, seq, 0x04, 1)
            self.session, self.state = True, 0
            caps = struct.pack("<BBBBBHIQ", 1, 1 << 2, self.word_bits, 0, len(self.rates), self.max_payload,
                               self.memory, self.clock)
            return self.ack(t, seq, caps + struct.pack(f"<{len(self.rates)}I", *self.rates) + b"doc board")
        if t == 0x08:                                            # DISARM
            self.armed = False
            return self.ack(t, seq)
        if t == 0x06:                                            # STATUS
            fmt, count, crc, rate = self.committed[:4] if self.committed else (0, 0, 0, 0)
            return self.ack(t, seq, struct.pack("<BBBxIIII", self.state, self.armed, fmt, count, crc, rate,
                                                self.received))
        if not self.session:
            return self.refuse(t, seq, 0x05)
        if t == 0x02:                                            # BEGIN
            fmt, count, crc, rate = struct.unpack("<B3xIII", p)
            if self.armed:
                return self.refuse(t, seq, 0x07)
            if fmt != 3:
                return self.refuse(t, seq, 0x08, 1 << 2)
            if not 1 <= count <= self.memory:
                return self.refuse(t, seq, 0x09, self.memory)
            if rate not in self.rates:
                return self.refuse(t, seq, 0x0A, rate)
            self.begin, self.mem, self.received, self.state = (fmt, count, crc, rate), bytearray(4 * count), 0, 1
            return self.ack(t, seq)
        if t == 0x03:                                            # DATA
            if self.state != 1:
                return self.refuse(t, seq, 0x06, self.state)
            (offset,), chunk = struct.unpack_from("<I", p), p[4:]
            if offset > self.received:
                return self.refuse(t, seq, 0x0B, self.received)
            if offset + len(chunk) > len(self.mem):
                return self.refuse(t, seq, 0x0C, len(self.mem))
            self.mem[offset:offset + len(chunk)] = chunk
            self.received = max(self.received, offset + len(chunk))
            return self.ack(t, seq, struct.pack("<I", self.received))
        if t == 0x04:                                            # END
            if self.state != 1:
                return self.refuse(t, seq, 0x06, self.state)
            if self.received < len(self.mem):
                return self.refuse(t, seq, 0x0D, self.received)
            crc = zlib.crc32(self.mem)
            if crc != self.begin[2]:
                self.state = 0
                return self.refuse(t, seq, 0x0E, crc)
            self.state = 2
            return self.ack(t, seq, struct.pack("<I", crc))
        if t == 0x05:                                            # COMMIT
            if self.state != 2:
                return self.refuse(t, seq, 0x06, self.state)
            self.state = 0
            if zlib.crc32(self.mem) != self.begin[2]:
                return self.refuse(t, seq, 0x0E, zlib.crc32(self.mem))
            self.committed = (*self.begin, bytes(self.mem))
            return self.ack(t, seq, struct.pack("<B3xIII", *self.begin))
        if t == 0x07:                                            # ARM
            if self.committed is None:
                return self.refuse(t, seq, 0x11)
            self.armed = True
            return self.ack(t, seq, struct.pack("<I", self.committed[2]))
        return self.refuse(t, seq, 0x03)


# -- links: loopback ports, pseudo-terminals, VISA sessions ----------------------------------------
def eventually(condition, timeout: float = 10.0, what: str = "the condition") -> None:
    """Wait until ``condition()`` is true, polling every 10 ms; fail after ``timeout`` seconds. For what a
    server does in its own time (notices a close, gives bytes back): no fixed sleep that a loaded
    machine could outlast."""
    deadline = time.monotonic() + timeout
    while not condition():
        if time.monotonic() > deadline:
            pytest.fail(f"{what} did not happen within {timeout} s")
        time.sleep(0.01)


@contextlib.contextmanager
def refused_port():
    """A loopback TCP port that is bound but not listening: connecting to it is refused."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        yield sock.getsockname()[1]


def socket_address(url: str) -> tuple[str, int]:
    """(host, port) of a pyserial ``socket://HOST:PORT`` URL."""
    host, port = url[len("socket://"):].rsplit(":", 1)
    return host, int(port)


def raw_pty():
    """A real pseudo-terminal pair (master, slave) with the slave in raw mode; close both."""
    master, slave = os.openpty()
    tty.setraw(slave)
    return master, slave


@pytest.fixture(scope="module")
def rm():
    """A pyvisa resource manager on the pure-Python backend, one per test module (pyvisa shares
    one session per backend, and a driver closing its own manager would close a longer-lived one)."""
    import pyvisa

    manager = pyvisa.ResourceManager("@py")
    yield manager
    manager.close()


def open_visa(rm, resource: str, timeout_ms=2000):
    """A VISA session on ``resource`` with newline terminations."""
    return rm.open_resource(resource, read_termination="\n", write_termination="\n", timeout=timeout_ms)


# -- the command line, in-process --------------------------------------------------------------
def run_cli(*args):
    """``sweepgen ARGS`` through click's test runner (stdout and stderr apart)."""
    from click.testing import CliRunner

    from sweepgen.cli import main

    return CliRunner().invoke(main, [str(a) for a in args])


@pytest.fixture(autouse=True)
def _run_in_tmp_path(tmp_path, monkeypatch):
    """Every test runs in its own temporary folder. Relative outputs land there, and a
    ``python -m sweepgen`` child process imports the installed package rather than
    the source folder of a checkout (which lacks the drivers and profiles packages)."""
    monkeypatch.chdir(tmp_path)


@pytest.fixture
def write_scenario(tmp_path):
    """Write a scenario built from BASE_SCENARIO into tmp_path; returns its path."""
    counter = {"n": 0}

    def write(data=None, text=None, name=None, **sections):
        counter["n"] += 1
        path = tmp_path / (name or f"scenario{counter['n']}.toml")
        if text is None:
            text = to_toml(data if data is not None else scenario_dict(**sections))
        path.write_text(text, encoding="utf-8")
        return path

    return write
