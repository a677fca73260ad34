"""Scans: a scenario's keys varied over a grid, every design checked and simulated alike.

A design is the scenario's own TOML table with some keys set to other values
(dotted names as in the file, values with their units as a person writes them),
read by the same strict loader as the file itself, so a value that the file could
not hold is refused in the same words. Every design is judged by the full check
(:func:`sweepgen.playback.prepare`; the design rules alone, :func:`sweepgen.checker.check_plan`,
when the scenario names no laser and generator) and simulated with the *same* seed:
common random numbers, so that the differences between designs are not noise
(Glasserman, *Monte Carlo Methods in Financial Engineering*, 2003, §4.2: a common
random number stream makes a difference's variance the smaller the more alike
the designs are). The simulation spawns its streams from
:class:`numpy.random.SeedSequence`, so a design's result depends on its seed
alone, never on the number of workers or where it ran.

:func:`scan` runs a grid of designs through :func:`sweepgen.workers.run` (all local
cores by default, or a Dask scheduler); :func:`evaluate` is one design, a
top-level function that any worker process can run. The service prints nothing
and exits nothing: the command ``sweepgen scan`` parses, calls and prints.
"""

from __future__ import annotations

import copy
import csv
import io
import itertools
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

from sweepgen import plausible
from sweepgen._json import plain
from sweepgen.errors import InputError, SweepgenError

#: largest number of designs in one scan (the values of one key: plausible.OPTION["--vary"])
MAX_DESIGNS = 100_000
#: a key's name as written in a scenario file (dotted, no array indices)
_KEY = re.compile(r"^[A-Za-z_][A-Za-z0-9_-]*(\.[A-Za-z_][A-Za-z0-9_-]*)*$")
_NUMBER = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")


# ---------------------------------------------------------------------------------------------
# Keys and their values
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Axis:
    """One varied key: ``values`` as written into the file (``"200 m/s"``, or a bare number),
    ``numbers`` the same in ``unit`` (the unit the person wrote; ``""`` for a bare number)."""

    key: str
    values: tuple
    numbers: tuple
    unit: str

    def to_json(self) -> dict:
        return {"key": self.key, "unit": self.unit, "values": list(self.values)}


def split_option(text: str, option: str) -> tuple[str, str | None]:
    """``KEY=REST`` → ``(KEY, REST)``; ``KEY`` alone → ``(KEY, None)``; the key must look like one."""
    key, sep, rest = str(text).partition("=")
    key = key.strip()
    if not _KEY.match(key):
        raise InputError(f"expected a scenario key written as in the file (e.g. chirp.force_fraction), "
                         f"got {key!r}", key=option)
    return key, (rest if sep else None)


def quantity_parts(text: str, key: str, option: str) -> tuple[float, str]:
    """``"200 m/s"`` → ``(200.0, "m/s")``; ``"0.6"`` → ``(0.6, "")``."""
    match = _NUMBER.match(text)
    if not match or not math.isfinite(float(match.group(1))):
        raise InputError(f"{key}: expected a number with its unit (e.g. 200 m/s), got {text.strip()!r}",
                         key=option)
    return float(match.group(1)), match.group(2)


def endpoints(key: str, low: str, high: str, option: str) -> tuple[float, float, str]:
    """Two values of ``key`` in one unit: the first one written with a unit (a bare number takes the
    other's unit); pint converts the second into it."""
    from sweepgen import units

    (a, ua), (b, ub) = quantity_parts(low, key, option), quantity_parts(high, key, option)
    unit = ua or ub
    if ua and ub and ua != ub:
        try:
            b = units.parse(f"{b:g} {ub}", ua, example=f"{a:g} {ua}")
        except InputError as exc:
            raise InputError(f"{key}: {exc.detail}", key=option) from None
    return a, b, unit


def written(number: float, unit: str, digits: int = 12):
    """A value as the file holds it (``digits`` significant digits): a string with its unit, or a bare number."""
    text = f"{number:.{digits}g}"
    if unit:
        return f"{text} {unit}"
    value = float(text)
    return int(value) if value.is_integer() and "e" not in text and "." not in text else value


def parse_vary(text: str, option: str = "vary") -> Axis:
    """``KEY=START:STOP:N`` → an :class:`Axis` of N values from START to STOP (evenly spaced)."""
    key, rest = split_option(text, option)
    parts = rest.split(":") if rest is not None else []
    if len(parts) != 3:
        raise InputError(f"{key}: expected KEY=START:STOP:N (e.g. chirp.start_velocity=200 m/s:300 m/s:5), "
                         f"got {text!r}", key=option)
    start, stop, unit = endpoints(key, parts[0], parts[1], option)
    try:
        n = int(parts[2].strip())
    except ValueError:
        raise InputError(f"{key}: expected a whole number of values after the last ':', got {parts[2]!r}",
                         key=option) from None
    rng = plausible.lookup("option", "--vary", "")
    if not rng.contains(n):
        raise InputError(f"{key}: expected {rng.describe()} values ({rng.reason}), got {n}", key=option)
    import numpy as np

    numbers = tuple(float(x) for x in (np.linspace(start, stop, n) if n > 1 else [start]))
    return Axis(key, tuple(written(x, unit) for x in numbers), numbers, unit)


def set_keys(data: dict, values: dict, *, option: str = "vary") -> dict:
    """A copy of the scenario table ``data`` with each dotted key of ``values`` set (tables made as
    needed); a key running through a value that is not a table is refused."""
    out = copy.deepcopy(data)
    for key, value in values.items():
        *tables, name = key.split(".")
        here = out
        for i, part in enumerate(tables):
            here = here.setdefault(part, {})
            if not isinstance(here, dict):
                raise InputError(f"{key}: {'.'.join(tables[:i + 1])} is a value, not a table", key=option)
        here[name] = value
    return out


# ---------------------------------------------------------------------------------------------
# The scenario as a table
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Base:
    """The scenario a scan or search starts from: its file, its table and its title."""

    path: str
    data: dict
    title: str
    stem: str = "scenario"      # the file name the outputs start with

    def load(self, values: dict | None = None, *, option: str = "vary"):
        """The scenario with ``values`` set (:class:`sweepgen.scenario.Scenario`); a value the file
        could not hold is refused naming the option and the key."""
        from sweepgen.scenario import scenario_from_dict

        data = set_keys(self.data, values or {}, option=option)
        if not values:
            return scenario_from_dict(data, self.path)
        try:
            return scenario_from_dict(data, self.path)
        except InputError as exc:
            shown = ", ".join(f"{k}={v}" for k, v in values.items())
            where = f"{exc.key}: " if exc.key and exc.key not in values else ""
            raise InputError(f"{shown}: {where}{exc.detail}", key=option) from None


def base(ref) -> Base:
    """The scenario ``ref`` (a built-in key or a path) as its TOML table, after loading it once."""
    from sweepgen import catalog
    from sweepgen._config import load_toml_bytes
    from sweepgen.playback import default_file_name
    from sweepgen.scenario import scenario_from_dict

    path = catalog.resolve("scenarios", str(ref))
    data, raw = load_toml_bytes(path)
    sc = scenario_from_dict(data, path, raw=raw)
    return Base(str(path), data, sc.title, default_file_name(sc))


def check_axes(start: Base, axes, option: str = "vary") -> None:
    """Refuse axes that name one key twice, or whose first or last value the file could not hold."""
    keys = [a.key for a in axes]
    for k in keys:
        if keys.count(k) > 1:
            raise InputError(f"{k}: given twice", key=option)
    for axis in axes:
        for value in {axis.values[0], axis.values[-1]}:
            start.load({axis.key: value}, option=option)


# ---------------------------------------------------------------------------------------------
# One design
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Design:
    """One design to judge and simulate: the start's table with ``values`` set (a picklable task)."""

    path: str
    data: dict
    values: dict
    atoms: int
    seed: int
    simulate_failing: bool = True       # also fly the atoms through a design that fails a rule

    def scenario(self):
        return Base(self.path, self.data, "").load(self.values)


#: simulation keys that become the row's own columns
ROW_KEYS = ("captured_fraction", "final_velocity_mean", "final_velocity_spread", "arrival_time_mean")


def evaluate(design: Design) -> dict:
    """Check and simulate one design; a row of the scan's table (JSON-able).

    ``verdict`` is ``"pass"`` (no rule fails), ``"fail"`` (``failing_rules`` names them) or
    ``"invalid"`` (the design cannot exist: ``message`` says why). ``captured_error`` is the
    binomial standard error ``sqrt(p(1-p)/N)`` of the captured fraction. Numbers that do not
    exist (the mean velocity of no captured atom) are None.
    """
    row = {"values": dict(design.values), "verdict": "invalid", "failing_rules": [], "headrooms": {},
           "message": "", "atoms": design.atoms, "seed": design.seed}
    row.update({k: None for k in ROW_KEYS})
    row["captured_error"] = None
    try:
        sc = design.scenario()
        report, played = judge(sc)
    except SweepgenError as exc:
        row["message"] = getattr(exc, "detail", None) or str(exc)
        return row
    row["verdict"] = "pass" if report.ok else "fail"
    row["failing_rules"] = [f.rule for f in report.failures()]
    row["headrooms"] = {f.rule: f.headroom for f in report.findings if f.headroom is not None}
    if report.ok or design.simulate_failing:
        row.update(simulated(sc, report.plan, played, design.atoms, design.seed))
    return plain(row)


def judge(sc):
    """``(report, played)``: the full check when the scenario names a laser and a generator (and the
    detuning their hardware plays), else the design rules alone (and None: the plan is played)."""
    from sweepgen import checker

    if sc.laser_ref is None or sc.generator_ref is None:
        return checker.check_plan(sc), None
    from sweepgen import playback

    pb = playback.prepare(sc)
    played = playback.played_from(pb) if pb.channels else None
    return pb.report, played


def simulated(sc, plan, played, atoms: int, seed: int) -> dict:
    """The row's simulation columns, and every number of the simulation's JSON under ``simulation``."""
    from sweepgen.simulate import simulate

    # one process per design: the designs are the parallel work, so the atoms of one fly in this process
    doc = simulate(sc, atoms=atoms, seed=seed, plan=plan, played=played, baselines=False, workers=1).to_json()
    p = doc["captured_fraction"]
    out = {k: doc.get(k) for k in ROW_KEYS}
    out["captured_error"] = math.sqrt(p * (1.0 - p) / atoms)
    out["simulation"] = {k: v for k, v in doc.items()
                         if isinstance(v, (int, float)) and not isinstance(v, bool) and k != "seed"}
    return out


def objective_keys() -> tuple:
    """The simulation's numbers a search can aim at (``simulate --json``'s top-level numbers)."""
    return ("captured_fraction", "band_fraction", "final_velocity_mean", "final_velocity_spread",
            "longitudinal_temperature", "transverse_temperature", "photons_mean", "lost_fraction",
            "depumped_fraction", "too_fast_fraction", "not_arrived_fraction", "arrival_time_mean",
            "transverse_velocity_spread", "ideal_captured_fraction")


# ---------------------------------------------------------------------------------------------
# A scan
# ---------------------------------------------------------------------------------------------
@dataclass
class ScanResult:
    """The designs of a scan and their rows (in grid order: the last key varies fastest).

    ``interrupted`` is True when the scan was stopped: ``rows`` then holds the designs that
    finished (each with its ``index`` in the grid) and ``total`` how many there were."""

    scenario: str
    title: str
    stem: str
    axes: list
    atoms: int
    seed: int
    rows: list
    total: int
    interrupted: bool = False
    where: dict = field(default_factory=dict)

    def to_json(self) -> dict:
        """The ``scan --json`` document (and the JSON file the scan writes)."""
        return {"scenario": self.scenario, "title": self.title, "axes": [a.to_json() for a in self.axes],
                "atoms": self.atoms, "seed": self.seed, "designs": self.total, "finished": len(self.rows),
                "interrupted": self.interrupted, "where": self.where, "rows": self.rows}

    def best(self, objective: str = "captured_fraction"):
        """The passing row with the largest ``objective`` (None when no design passes)."""
        good = [r for r in self.rows if r["verdict"] == "pass" and r.get(objective) is not None]
        return max(good, key=lambda r: r[objective]) if good else None

    def csv_text(self) -> str:
        """The table as CSV: index, each key's number (in its unit, named in the header), verdict,
        failing rules (';'-separated), the simulation's columns."""
        buf = io.StringIO()
        out = csv.writer(buf, lineterminator="\n")
        heads = [f"{a.key} ({a.unit})" if a.unit else a.key for a in self.axes]
        cols = ["captured_fraction", "captured_error", "final_velocity_mean", "final_velocity_spread",
                "arrival_time_mean"]
        out.writerow(["index", *heads, "verdict", "failing_rules",
                      *[f"{c} ({u})" if u else c for c, u in zip(cols, ("", "", "m/s", "m/s", "s"))]])
        for row in self.rows:
            nums = [quantity_parts(str(row["values"][a.key]), a.key, "")[0] for a in self.axes]
            out.writerow([row["index"], *[f"{x:.12g}" for x in nums], row["verdict"],
                          ";".join(row["failing_rules"]), *[_cell(row[c]) for c in cols]])
        return buf.getvalue()


def _cell(value) -> str:
    """A number for the CSV; empty when there is none (not simulated, or no atom to average)."""
    return f"{value:.9g}" if value is not None and math.isfinite(value) else ""


def grid(axes) -> list[dict]:
    """Every combination of the axes' values, the last axis varying fastest."""
    return [dict(zip([a.key for a in axes], combo)) for combo in itertools.product(*[a.values for a in axes])]


def scan(ref, axes, *, atoms: int, seed: int = 0, workers: int | None = None, cluster: str | None = None,
         progress=None) -> ScanResult:
    """Check and simulate every design of the grid of ``axes`` over scenario ``ref``, with the same seed.

    ``ref`` is a built-in key, a path or a :class:`Base` (a table built elsewhere). Runs on all local cores by default (``workers`` to choose) or on the Dask scheduler at
    ``cluster`` (:func:`sweepgen.workers.run`). Ctrl-C returns the designs that finished,
    with ``interrupted`` set.
    """
    from sweepgen import workers as runner

    designs = math.prod(len(a.values) for a in axes)     # counted before the grid is built (10⁸ took 8 GB)
    if designs > MAX_DESIGNS:
        raise InputError(f"{designs} designs; at most {MAX_DESIGNS} in one scan (use fewer values)", key="vary")
    start = ref if isinstance(ref, Base) else base(ref)
    check_axes(start, axes)
    combos = grid(axes)
    tasks = [Design(start.path, start.data, c, atoms, seed) for c in combos]
    result = ScanResult(start.path, start.title, start.stem, list(axes), atoms, seed, [], len(tasks),
                        where=placement(workers, cluster, len(tasks)))
    try:
        rows = dict(enumerate(runner.run(evaluate, tasks, workers=workers, cluster=cluster, progress=progress)))
    except runner.Interrupted as stop:
        rows, result.interrupted = stop.finished, True
    result.rows = [{"index": i, **rows[i]} for i in sorted(rows)]
    return result


def placement(workers, cluster, tasks: int) -> dict:
    """Where the work runs, for the JSON: a cluster's address, or the local processes used."""
    from sweepgen import workers as runner

    if cluster is not None:
        return {"cluster": cluster}
    n = runner.cores() if workers is None else int(workers)
    return {"local_processes": max(1, min(n, tasks))}


def write(result: ScanResult, folder, stem: str) -> dict:
    """Write ``STEM-scan.csv`` and ``STEM-scan.json`` into ``folder`` (atomically); their paths."""
    from sweepgen._atomic import atomic_write_text
    from sweepgen._json import dumps

    folder = Path(folder)
    paths = {"csv": folder / f"{stem}-scan.csv", "json": folder / f"{stem}-scan.json"}
    atomic_write_text(paths["csv"], result.csv_text())
    atomic_write_text(paths["json"], dumps(result.to_json()))
    return {k: str(v) for k, v in paths.items()}
