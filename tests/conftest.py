"""Shared test helpers: Hypothesis profiles, small scenario files written into ``tmp_path``."""

from __future__ import annotations

import copy

import pytest
from hypothesis import settings

# Hypothesis profiles. "thorough" is the default: what ``pytest`` and CI run. "fast" is for
# local runs, selected with Hypothesis's own option ``pytest --hypothesis-profile=fast``.
# Tests give their example count through ``examples(n)``: n under the thorough profile.
THOROUGH_EXAMPLES = 100
settings.register_profile("thorough", max_examples=THOROUGH_EXAMPLES, deadline=None)
settings.register_profile("fast", max_examples=THOROUGH_EXAMPLES // 10, deadline=None)
settings.load_profile("thorough")


def examples(n: int) -> int:
    """``max_examples`` for a property test that runs ``n`` examples under the thorough profile,
    scaled by the loaded profile (a tenth, at least 2, under the fast one)."""
    scaled = round(n * settings.default.max_examples / THOROUGH_EXAMPLES)
    return max(min(n, 2), scaled)

BASE_SCENARIO = {
    "title": "test scenario",
    "species": "rb87-d2",
    "source": {"model": "effusive", "temperature": "390 K", "pulse_time": "0 ms"},
    "light": {"saturation": 3.0, "start": "0.05 m"},
    "target": {"distance": "1.0 m", "capture_velocity": "20 m/s"},
    "chirp": {"start_velocity": "260 m/s", "end_velocity": "15 m/s", "margin": 0.6, "start_time": "auto",
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
    return str(v)


def to_toml(data: dict) -> str:
    """A small TOML writer for test fixtures (scalars, lists, one or two levels of tables)."""
    lines, tables = [], []
    for key, value in data.items():
        if isinstance(value, dict):
            tables.append((key, value))
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
    return "\n".join(lines) + "\n"


def scenario_dict(**sections) -> dict:
    """BASE_SCENARIO with sections updated: ``scenario_dict(chirp={"margin": 0.5})``.
    A value of ``None`` removes a key (or a whole section)."""
    data = copy.deepcopy(BASE_SCENARIO)
    for name, change in sections.items():
        if change is None:
            data.pop(name, None)
        elif isinstance(change, dict):
            section = data.setdefault(name, {})
            for key, value in change.items():
                if value is None:
                    section.pop(key, None)
                else:
                    section[key] = value
        else:
            data[name] = change
    return data


def install_driver_plugin(root, module: str, source: str, entries: str):
    """Make ``root`` hold a real third-party distribution: ``module.py`` with ``source`` and a
    ``*.dist-info`` whose ``entry_points.txt`` registers ``entries`` (lines ``name = module:Class``)
    in the group ``sweepgen.drivers``. Put ``root`` on sys.path or PYTHONPATH to install it."""
    root.mkdir(parents=True, exist_ok=True)
    (root / f"{module}.py").write_text(source)
    info = root / f"{module}-1.0.dist-info"
    info.mkdir()
    (info / "METADATA").write_text(f"Metadata-Version: 2.1\nName: {module}\nVersion: 1.0\n")
    (info / "entry_points.txt").write_text("[sweepgen.drivers]\n" + entries)
    return root


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
