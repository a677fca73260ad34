"""The public functions of sweepgen (public module; also importable from :mod:`sweepgen` itself).

Each follows one step of the job and returns a result object
(:mod:`sweepgen.results`) whose ``to_json()`` is what the command of the same
name prints with ``--json``. Quantities are SI floats (m/s, Hz, s, Sa/s) or
text with a unit (``"10 MSa/s"``) or pint quantities. Expected errors are
exceptions of :mod:`sweepgen.errors` carrying ``file``, ``key`` and the
message; nothing here prints or exits.

Example
-------
>>> import sweepgen
>>> doc = sweepgen.scenario_dict("rb87-chopped-oven")
>>> doc["chirp"]["force_fraction"] = 0.5
>>> sweepgen.plan(doc).force_fraction
0.5
"""

from __future__ import annotations

import copy
import importlib
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, Callable, Union

from sweepgen.costs import DEFAULT_ATOMS
from sweepgen.errors import CheckFailed, InputError
from sweepgen.results import (CalibrationResult, CheckResult, CompareResult, ExportResult, InspectResult,
                              OptimiseResult, PlanResult, ScanResult, SimulationResult, UploadResult)

#: what names a scenario: a built-in key, a path, a dict with the TOML's keys and unit strings, or a loaded one
ScenarioSource = Union[str, "os.PathLike[str]", Mapping, Any]
#: a quantity: an SI float, text with its unit ("10 MSa/s") or a pint Quantity
QuantityLike = Union[float, int, str, Any]

#: the name a scenario built from a dict goes by in messages (its relative paths start in the current folder)
DICT_NAME = "<dict>"


# ---------------------------------------------------------------------------------------------
# Scenarios
# ---------------------------------------------------------------------------------------------
def load_scenario(source: ScenarioSource, *, name: str | None = None):
    """Load and validate a scenario (units parsed once, to SI).

    Parameters
    ----------
    source : str, path-like, dict or Scenario
        A built-in key (``"rb87-chopped-oven"``), a path to a TOML file, or a
        ``dict`` with the same keys and unit strings as the TOML file (profiles it
        names by path are found from the current folder). A loaded scenario is
        returned as it is.
    name : str, optional
        What messages call a scenario built from a dict (default ``"<dict>"``).

    Returns
    -------
    Scenario

    Raises
    ------
    sweepgen.errors.InputError
        A key is missing, unknown or out of its plausible range (``file``, ``key`` say which).

    Example
    -------
    >>> sc = load_scenario({**scenario_dict("rb87-chopped-oven"), "title": "my beam"})
    >>> sc.title
    'my beam'
    """
    from sweepgen.scenario import Scenario, load_scenario as load, scenario_from_dict

    if isinstance(source, Scenario):
        return source
    if isinstance(source, Mapping):
        return scenario_from_dict(copy.deepcopy(dict(source)), Path(name or DICT_NAME))
    if isinstance(source, (str, os.PathLike)):
        return load(os.fspath(source))
    raise InputError(f"expected a built-in scenario key, a path, a dict or a Scenario, got {type(source).__name__}",
                     key="scenario")


def scenario_dict(source: str | os.PathLike) -> dict:
    """The TOML document of a built-in scenario or a scenario file, as a ``dict`` to change and load.

    Parameters
    ----------
    source : str or path-like
        A built-in key or a path.

    Returns
    -------
    dict
        Keys and values as written (quantities as text with their units, e.g.
        ``doc["chirp"]["start_velocity"] == "260 m/s"``).

    Example
    -------
    >>> scenario_dict("rb87-chopped-oven")["chirp"]["force_fraction"]
    0.6
    """
    from sweepgen import catalog
    from sweepgen._config import load_toml

    return load_toml(catalog.resolve("scenarios", os.fspath(source), key="scenario"))


def _profile(kind: str, ref, key: str):
    """A laser or generator profile: None, a loaded one, or a built-in key / path."""
    if ref is None or not isinstance(ref, (str, os.PathLike)):
        return ref
    from sweepgen.playback import load_profile

    return load_profile(kind, os.fspath(ref), key=key)


def _quantity(value: QuantityLike | None, unit: str, key: str, option: str | None = None) -> float | None:
    """``value`` in ``unit`` as a float: an SI number, text with a unit or a pint Quantity; checked against
    the plausible range of ``option`` (the command-line option of the same meaning)."""
    from sweepgen import plausible, units

    if value is None:
        return None
    text = None
    if isinstance(value, str):
        text, number = value, units.parse(value, unit, key=key)
    elif hasattr(value, "to") and hasattr(value, "magnitude"):
        text, number = str(value), float(value.to(unit).magnitude)
    elif isinstance(value, (int, float)) and not isinstance(value, bool):
        number = float(value)
    else:
        raise InputError(f"expected a number in {unit}, text with a unit or a pint quantity, got {value!r}", key=key)
    if option is not None:
        plausible.check("option", option, number, unit, text, shown_key=key)
    return number


# ---------------------------------------------------------------------------------------------
# Plan, check, simulate
# ---------------------------------------------------------------------------------------------
def plan(scenario: ScenarioSource, *, compare_field: bool = False) -> PlanResult:
    """Plan the detuning sweep of a scenario and judge it by the design rules (``sweepgen plan``).

    Parameters
    ----------
    scenario : str, path-like, dict or Scenario
        See :func:`load_scenario`.
    compare_field : bool
        Also work out the tapered-field slower with the same deceleration and
        light (``sweepgen plan --compare-field``): its numbers are the key
        ``tapered_field``, the slower itself :meth:`PlanResult.field_slower`.

    Returns
    -------
    PlanResult
        ``start_velocity``, ``end_velocity`` (m/s), ``start_detuning``,
        ``end_detuning`` (Hz), ``chirp_rate_max`` (Hz/s), ``chirp_duration`` (s),
        ``slowing_distance`` (m), ...; ``ok`` False when the design breaks a limit.

    Raises
    ------
    sweepgen.errors.PlanError
        The sweep cannot exist (the design atom cannot follow it).
    sweepgen.errors.InputError
        ``compare_field`` and the species file gives no ``[zeeman]`` table.

    Example
    -------
    >>> p = plan("rb87-chopped-oven")
    >>> p.ok, round(p.chirp_duration * 1e3, 2)      # ms
    (True, 6.24)
    """
    from sweepgen.checker import check_plan

    from sweepgen.timing import plan_timing

    report = check_plan(load_scenario(scenario))
    doc = {**report.plan.to_json(), **report.to_json()}
    timing = plan_timing(report.scenario, report.plan)
    if timing is not None:
        doc["timing"] = timing                 # the [timing] and gates on the trigger's axis
    field = None
    if compare_field:
        from sweepgen.tapered import tapered_field

        field = tapered_field(report.plan)
        doc["tapered_field"] = field.to_json()
    return PlanResult(doc, title=report.scenario.title, inner=report, field=field)


def check(scenario: ScenarioSource, *, sample_rate: QuantityLike | None = None, laser=None, generator=None,
          table: str | os.PathLike | None = None) -> CheckResult:
    """Check a scenario against its laser and generator before anything is switched on (``sweepgen check``).

    Parameters
    ----------
    scenario : str, path-like, dict or Scenario
        See :func:`load_scenario`.
    sample_rate : float (Sa/s), str or Quantity, optional
        Instead of the scenario's ``[drive] sample_rate``.
    laser, generator : str or path-like, optional
        Profiles (built-in key or path) instead of the scenario's.
    table : str or path-like, optional
        Check a table written earlier (or its sidecar) in place of the scenario's own sweep.

    Returns
    -------
    CheckResult
        ``ok`` (no rule fails), ``findings``, ``sample_rate`` (Sa/s); ready to
        :meth:`~sweepgen.results.CheckResult.export` or
        :meth:`~sweepgen.results.CheckResult.upload`.

    Example
    -------
    >>> c = check("rb87-chopped-oven")
    >>> c.ok, c.sample_rate
    (True, 8000000.0)
    """
    from sweepgen import playback

    sc = load_scenario(scenario)
    laser, generator = _profile("laser", laser, "laser"), _profile("generator", generator, "generator")
    if table is not None:
        if sample_rate is not None:
            raise InputError("a table plays at its own sample rate; sample_rate does not go with table",
                             key="sample_rate")
        from sweepgen import drivers

        pb = playback.prepare_table(sc, drivers.read_table(os.fspath(table)), laser=laser, generator=generator)
    else:
        rate = _quantity(sample_rate, "Hz", "sample_rate", "--rate")
        pb = playback.prepare(sc, laser=laser, generator=generator, sample_rate=rate)
    return CheckResult(pb.to_json(), title=sc.title, inner=pb)


def simulate(scenario: ScenarioSource, *, atoms: int = DEFAULT_ATOMS, seed: int = 0, ideal: bool = False,
             table: str | os.PathLike | None = None, laser=None, workers: int | None = None,
             progress: Callable | None = None, before_run: Callable | None = None,
             compare_field: bool = False) -> SimulationResult:
    """Fly atoms from the source through the slowing light (``sweepgen simulate``).

    The atoms see the detuning the hardware plays (the sweep through the laser's
    tuning chain, the generator's codes and the actuator response) unless
    ``ideal``; two baselines (no light, light held at the start detuning) use
    the same atoms.

    Parameters
    ----------
    scenario : str, path-like, dict or Scenario
        See :func:`load_scenario`.
    atoms : int
        Atoms drawn from the source.
    seed : int
        Random seed; the same seed gives the same result.
    ideal : bool
        Play the planned sweep itself.
    table : str or path-like, optional
        Play what a table written earlier plays (through ``laser`` or the scenario's).
    laser : str or path-like, optional
        The laser a ``table`` is played through.
    workers : int, optional
        Processes to fly the atoms in (default: one per core); the result does not depend on it.
    progress : callable, optional
        ``progress(done, total)`` as parts of the run finish.
    before_run : callable, optional
        Called as ``before_run(scenario, atoms, seed, how)`` after the checks and
        before any atom flies (the command line asks for confirmation there);
        ``how`` are the keywords of the internal simulation (to time a pilot run).
    compare_field : bool
        Also fly the same atoms through the tapered-field slower (``simulate --compare-field``): the key
        ``tapered_field``; refused before any atom flies when the species has no ``[zeeman]`` table.

    Returns
    -------
    SimulationResult
        ``captured_fraction``, ``final_velocity_mean`` (m/s), ``longitudinal_temperature`` (K), ...

    Raises
    ------
    sweepgen.errors.CheckFailed
        The design breaks a limit (nothing is simulated), or the table does not match its sidecar.
    sweepgen.errors.InputError
        Bad input, or a simulation that would need more than half of this computer's memory.

    Example
    -------
    >>> s = simulate("rb87-chopped-oven", atoms=2000, seed=1)
    >>> 0 < s.captured_fraction < 1
    True
    """
    from sweepgen.checker import check_plan, require_playable
    from sweepgen.playback import played_detuning, played_table
    from sweepgen.simulate import simulate as run

    _check_run(ideal, table, atoms, seed, workers)
    sc = load_scenario(scenario)
    design = require_playable(check_plan(sc), "nothing was simulated")
    sweep = _table_sweep(sc, table, laser) if table is not None else None
    played = played_table(sc, sweep) if sweep is not None else played_detuning(sc, design.plan, ideal=ideal)
    how = {"plan": design.plan, "played": played}
    _check_memory(atoms)
    if compare_field:
        from sweepgen import tapered
        tapered.tapered_field(design.plan)      # no [zeeman] table: refused before any atom flies
    if before_run is not None:
        before_run(sc, atoms, seed, how)
    result = run(sc, atoms=atoms, seed=seed, workers=workers, progress=progress, **how)
    doc = result.to_json()
    if compare_field:
        doc["tapered_field"] = tapered.compare(sc, atoms=atoms, seed=seed, plan=design.plan, chirp=result,
                                               workers=workers).to_json()
    if sweep is not None:
        doc["table"] = {"file": str(sweep.table.path), "table_sha256": sweep.table.table_sha256(),
                        "laser": sweep.laser.key, "representation_error": sweep.error}
    return SimulationResult(doc, title=sc.title, inner=result)


def _check_run(ideal: bool, table, atoms, seed, workers) -> None:
    """The run's own arguments of :func:`simulate`, refused with the key to change."""
    if ideal and table is not None:
        raise InputError("ideal plays the planned sweep and table an old table: give one of them", key="ideal")
    _check_count(atoms, "atoms", "--atoms")
    _check_count(seed, "seed", "--seed", least=0)
    if workers is not None:
        _check_count(workers, "workers", "--workers")


def _check_count(value, key: str, option: str, least: int = 1) -> None:
    from sweepgen import plausible

    if isinstance(value, bool) or not isinstance(value, int) or value < least:
        raise InputError(f"expected a whole number of at least {least}, got {value!r}", key=key)
    plausible.check("option", option, value, "", shown_key=key)


def _check_memory(atoms: int) -> None:
    """Refuse a simulation that cannot fit in half of this computer's memory."""
    from sweepgen import costs
    from sweepgen._format import si

    need, have = costs.simulation_memory(atoms), costs.physical_memory()
    if have is not None and need > have // 2:
        raise InputError(f"{atoms} atoms would need about {si(need, 'B')} of memory, more than half of this "
                         f"computer's {si(have, 'B')}; run several simulations of at most "
                         f"{costs.most_atoms(have // 2)} atoms with different seeds and combine them "
                         f"(each seed gives an independent sample)", key="atoms")


def _table_sweep(sc, table, laser_ref):
    """What a table read back plays through the laser; a table that does not verify is refused."""
    from sweepgen import drivers, playback

    read = drivers.read_table(os.fspath(table))
    if not read.verified:
        bad = ", ".join(c["check"] for c in read.checks if not c["ok"])
        raise CheckFailed(f"{read.path}: does not match its sidecar ({bad}); it was changed or damaged")
    laser = (_profile("laser", laser_ref, "laser") if laser_ref is not None
             else playback.scenario_profiles(sc, required=False)[0])
    if laser is None:
        raise InputError("a table is played through a laser: name one (laser=...) or in the scenario", key="laser")
    return playback.table_sweep(read, laser)


# ---------------------------------------------------------------------------------------------
# Render, export, upload
# ---------------------------------------------------------------------------------------------
def render(scenario: ScenarioSource, *, sample_rate: QuantityLike | None = None, laser=None, generator=None):
    """The sample table the generator would play (checked first; nothing unsafe is rendered).

    Returns
    -------
    RenderedTable
        ``time()`` (s), ``drive()`` (V at the actuator, or Hz), ``detuning()`` (Hz),
        the generator's ``codes`` and ``info`` (sample rate in Sa/s, counts).

    Raises
    ------
    sweepgen.errors.CheckFailed
        A check rule fails.

    Example
    -------
    >>> t = render("rb87-chopped-oven")
    >>> t.info.sample_rate
    8000000.0
    """
    return check(scenario, sample_rate=sample_rate, laser=laser, generator=generator).table()


def export(scenario: ScenarioSource | CheckResult, format: str, folder: str | os.PathLike, *,
           name: str | None = None, options: Mapping[str, str] | None = None,
           sample_rate: QuantityLike | None = None, laser=None, generator=None, progress: Callable | None = None,
           before_write: Callable | None = None) -> ExportResult:
    """Check, render and write the table and its JSON sidecar into ``folder`` (``sweepgen export``).

    Parameters
    ----------
    scenario : str, path-like, dict, Scenario or CheckResult
        See :func:`load_scenario`; a :class:`CheckResult` is written as checked.
    format : str
        File driver: ``"csv"``, ``"raw"``, ``"npy"`` or one a plug-in registers.
    folder : str or path-like
        Created if needed (not its parents). The write is atomic.
    name : str, optional
        File name without extension (default: the scenario's file name).
    options : dict, optional
        Driver options, e.g. ``{"dtype": "uint16", "byte_order": "big"}`` for ``raw``.
    sample_rate, laser, generator : optional
        As in :func:`check`.
    progress : callable, optional
        ``progress(done, total)`` while writing.
    before_write : callable, optional
        ``before_write(checked)`` after every check passed and before anything is written.

    Returns
    -------
    ExportResult
        ``paths`` (data file, sidecar), ``sha256``, ``table_sha256``, ``bytes``.

    Raises
    ------
    sweepgen.errors.CheckFailed
        A rule fails (``findings`` lists them); nothing is written.

    Example
    -------
    >>> import tempfile
    >>> e = export("rb87-chopped-oven", "csv", tempfile.mkdtemp())
    >>> [p.rsplit(".", 1)[1] for p in e.paths]
    ['csv', 'json']
    """
    from sweepgen import playback

    from sweepgen.results import export_options

    file_format = playback.file_format(format)
    options = export_options(options)
    if not isinstance(scenario, CheckResult):
        sc = load_scenario(scenario)
        file_format.check_options({**options, "name": name or playback.default_file_name(sc)})
        scenario = check(sc, sample_rate=sample_rate, laser=laser, generator=generator)
    return scenario.export(format, folder, name=name, options=options, progress=progress, before_write=before_write)


def upload(scenario: ScenarioSource | CheckResult, resource=None, *, serial_port: str | None = None,
           backend: str | None = None, dry_run: bool = False, arm: bool = False, laser=None, generator=None,
           progress: Callable | None = None, before_send: Callable | None = None) -> UploadResult:
    """Check, render and upload the sweep to its generator, verified (``sweepgen upload``).

    Parameters
    ----------
    scenario : str, path-like, dict, Scenario or CheckResult
        See :func:`load_scenario`; a :class:`CheckResult` is uploaded as checked.
    resource : str, optional
        VISA resource string (default: the generator profile's ``link``), e.g.
        ``"TCPIP::127.0.0.1::5025::SOCKET"``.
    serial_port : str, optional
        Serial device or pyserial URL of a ramp board.
    backend : str, optional
        pyvisa backend (default ``"@py"``, pure Python).
    dry_run : bool
        Connect to nothing; ``log`` holds the exact commands.
    arm : bool
        Switch the output on after a verified upload. Outputs stay off otherwise.
    laser, generator : str or path-like, optional
        Profiles instead of the scenario's.
    progress : callable, optional
        ``progress(done, total)`` while sending.
    before_send : callable, optional
        ``before_send(checked, link)`` after every check passed and before anything is sent.

    Returns
    -------
    UploadResult
        ``verified``, ``armed``, ``steps``, ``log``, ``table_sha256``, ``bytes``.

    Raises
    ------
    sweepgen.errors.InputError
        The address cannot name an instrument (before anything else is judged).
    sweepgen.errors.CheckFailed
        A rule fails; nothing is sent.
    sweepgen.errors.InstrumentError
        The instrument refused or failed (``step`` names where); its output is left off.

    Example
    -------
    >>> u = upload("rb87-chopped-oven", dry_run=True)
    >>> u.dry_run, u.verified
    (True, False)
    """
    if not isinstance(scenario, CheckResult):
        scenario = check(scenario, laser=laser, generator=generator)
    return scenario.upload(resource, serial_port=serial_port, backend=backend, dry_run=dry_run, arm=arm,
                           progress=progress, before_send=before_send)


# ---------------------------------------------------------------------------------------------
# Closing the loop with the lab
# ---------------------------------------------------------------------------------------------
def calibrate(measurements: str | os.PathLike, laser: str | os.PathLike, stage: str | int, *,
              output: str | os.PathLike | None = None, overwrite: bool = False, degree: int | None = None,
              outlier_sigma: float = 5.0, drive_range: tuple | None = None,
              transition: QuantityLike | None = None, reference: QuantityLike | None = None, beat_sign: int = 1,
              plot: str | os.PathLike | None = None) -> CalibrationResult:
    """Fit a stage of a laser's tuning chain to measurements and write a new laser profile
    (``sweepgen calibrate``).

    Parameters
    ----------
    measurements : str or path-like
        Delimited text whose header names each column and its unit (``drive (V),detuning (MHz)``), or NeXus HDF5.
    laser : str or path-like
        The laser profile (built-in key or path).
    stage : str or int
        The stage's name, kind or position (1 = first).
    output : str or path-like, optional
        The new profile (default: ``LASER-calibrated.toml`` in the current folder); never overwritten unless ``overwrite``.
    degree : int, optional
        Polynomial degree (default: chosen by cross-validation).
    outlier_sigma : float
        Leave out points this many robust standard deviations off the fit (0 keeps all).
    drive_range : (low, high), optional
        Fit only drives in this range (drive units, V or Hz).
    transition : float (Hz), str or Quantity, optional
        Transition frequency for a ``frequency`` column.
    reference : float (Hz), str or Quantity, optional
        Detuning of the reference laser of a ``beat`` column; ``beat_sign`` +1 when the laser is above it.
    plot : str or path-like, optional
        The plot of data, fit and residuals (default: beside the new profile, ``.png``).

    Returns
    -------
    CalibrationResult
        ``residual_rms``, ``uncertainty`` (Hz), ``profile`` (the file written), ``plot``.

    Example
    -------
    >>> r = calibrate("wavemeter.csv", "demo-ecdl-piezo", "piezo", output="my-laser.toml")  # doctest: +SKIP
    """
    from sweepgen import recalibration
    from sweepgen.plots import plot_calibration, plot_path

    if beat_sign not in (1, -1):
        raise InputError(f"expected +1 or -1, got {beat_sign!r}", key="beat_sign")
    if outlier_sigma is not None:
        _quantity(outlier_sigma, "", "outlier_sigma", "--outlier-sigma")
    if plot is not None:
        plot_path(plot, key="plot")         # refused before the profile is written
    req = recalibration.Request(
        os.fspath(measurements), os.fspath(laser), str(stage), output=None if output is None else os.fspath(output),
        degree=degree, outlier_sigma=outlier_sigma, drive_range=drive_range,
        transition=_quantity(transition, "Hz", "transition", "--transition"),
        reference=_quantity(reference, "Hz", "reference", "--reference"), beat_sign=beat_sign, overwrite=overwrite)
    result = recalibration.calibrate(req)
    path = recalibration.write(result)
    figure = plot_calibration(result, Path(plot) if plot else path.with_suffix(".png"))
    doc = {**recalibration.to_json(result), "plot": str(figure)}
    return CalibrationResult(doc, title=f"{result.stage_name}: {req.measurements}", inner=result)


def inspect(table: str | os.PathLike) -> InspectResult:
    """Read a table back, verify it against its sidecar and decode it (``sweepgen inspect``).

    Parameters
    ----------
    table : str or path-like
        A data file written by :func:`export` (any installed driver) or its JSON sidecar.

    Returns
    -------
    InspectResult
        ``ok`` (the file matches its sidecar), ``quantity``, ``start_detuning``, ``end_detuning`` (Hz),
        ``chirp_rate_max`` (Hz/s), ``sample_rate`` (Sa/s), ``checks``; for a gate's or a marker's
        table (``quantity == "level"``) ``level_min``, ``level_max``, ``levels`` and ``windows`` (each
        ``start``, ``end`` after the trigger, ``duration`` in s, ``level``) instead of the sweep's numbers.

    Example
    -------
    >>> import tempfile
    >>> e = export("rb87-chopped-oven", "npy", tempfile.mkdtemp())
    >>> inspect(e.paths[0]).ok
    True
    """
    from sweepgen import drivers, readback

    read = drivers.read_table(os.fspath(table))
    numbers = readback.analyse(read)
    doc = {"file": str(read.path), "driver": read.driver, "verified": read.verified, "checks": read.checks,
           "table_sha256": read.table_sha256(), "drive_unit": read.drive_unit, **numbers,
           "provenance": read.sidecar.get("provenance"), "tool": read.sidecar.get("tool"),
           "created": read.sidecar.get("created")}
    return InspectResult(doc, title=str(read.path), inner=(read, numbers))


def compare(scenario: ScenarioSource, measured: str | os.PathLike, *, marker: str | None = None,
            marker_time: QuantityLike | None = None, transition: QuantityLike | None = None,
            reference: QuantityLike | None = None, beat_sign: int = 1) -> CompareResult:
    """Compare a measured frequency-versus-time trace with the planned sweep (``sweepgen compare``).

    Parameters
    ----------
    scenario : str, path-like, dict or Scenario
        See :func:`load_scenario`.
    measured : str or path-like
        Columns ``time`` and ``detuning``, ``frequency`` or ``beat``, each with its unit.
    marker : str, optional
        Align by a named event (``trigger``, ``chirp_start``, ...) at ``marker_time`` (s) on the
        trace's axis, or at the first rise of its ``marker`` column; default: cross-correlation.
    transition, reference : float (Hz), str or Quantity, optional
        For ``frequency`` (default c/λ of the species) and ``beat`` columns; ``beat_sign`` as in :func:`calibrate`.

    Returns
    -------
    CompareResult
        ``ok`` (within the tracking tolerance), ``chirp_error_max``, ``chirp_error_rms``, ``tolerance`` (Hz).

    Example
    -------
    >>> c = compare("rb87-chopped-oven", "wavemeter-log.csv")  # doctest: +SKIP
    """
    from scipy import constants

    from sweepgen.compare import compare as run, read_trace, to_json
    from sweepgen.planner import plan as make_plan

    if beat_sign not in (1, -1):
        raise InputError(f"expected +1 or -1, got {beat_sign!r}", key="beat_sign")
    sc = load_scenario(scenario)
    f0 = _quantity(transition, "Hz", "transition", "--transition")
    f0 = constants.c / sc.species.wavelength if f0 is None else f0
    trace = read_trace(os.fspath(measured), transition=f0, reference=_quantity(reference, "Hz", "reference",
                                                                                 "--reference"), beat_sign=beat_sign)
    cmp = run(make_plan(sc), trace, marker=marker, marker_time=_quantity(marker_time, "s", "marker_time", "--marker"))
    return CompareResult(to_json(cmp), title=f"{sc.title} against {trace.path}", inner=(cmp, sc))


# ---------------------------------------------------------------------------------------------
# Many designs
# ---------------------------------------------------------------------------------------------
#: atoms per design of a scan (as ``sweepgen scan``)
SCAN_ATOMS = 2000


def scan(scenario: ScenarioSource, vary: str | Sequence[str] | Mapping[str, str], *, atoms: int = SCAN_ATOMS,
         seed: int = 0, workers: int | None = None, cluster: str | None = None,
         output: str | os.PathLike | None = None, progress: Callable | None = None) -> ScanResult:
    """Check and simulate every design of a grid over keys of a scenario, all with the same seed
    (``sweepgen scan``), so that the differences between designs are not noise.

    Parameters
    ----------
    scenario : str, path-like or dict
        A built-in key, a path or a dict with the TOML's keys (see :func:`load_scenario`).
    vary : str, list of str, or dict
        ``"KEY=START:STOP:N"`` (N values from START to STOP, with their unit), several of them, or
        ``{KEY: "START:STOP:N"}``; every combination is a design.
    atoms : int
        Atoms per design.
    seed : int
        The seed every design uses (common random numbers).
    workers : int, optional
        Local processes (default: one per core; 1 runs in this process).
    cluster : str, optional
        Address of a Dask scheduler to run the designs on instead.
    output : str or path-like, optional
        Folder for ``NAME-scan.csv``, ``NAME-scan.json`` and ``NAME-scan.png`` (default: nothing written).
    progress : callable, optional
        ``progress(done, total)`` after each design.

    Returns
    -------
    ScanResult
        ``rows`` (each design's ``values``, ``verdict``, ``captured_fraction`` with its
        ``captured_error``, ``final_velocity_mean`` in m/s), ``best()``; ``interrupted``
        when Ctrl-C stopped it (the designs that finished are kept).

    Example
    -------
    >>> r = scan("rb87-chopped-oven", {"chirp.force_fraction": "0.5:0.7:3"}, atoms=300)  # doctest: +SKIP
    >>> r.best()["values"]                                                                  # doctest: +SKIP
    {'chirp.force_fraction': 0.6}
    """
    service = importlib.import_module("sweepgen.scan")
    if isinstance(vary, str):
        vary = [vary]
    elif isinstance(vary, Mapping):
        vary = [f"{key}={value}" for key, value in vary.items()]
    axes = [service.parse_vary(str(v)) for v in vary]
    start = scenario
    if isinstance(scenario, Mapping):
        data = copy.deepcopy(dict(scenario))
        start = service.Base(DICT_NAME, data, load_scenario(data).title)
    result = service.scan(start, axes, atoms=atoms, seed=seed, workers=workers, cluster=cluster, progress=progress)
    doc = result.to_json()
    if output is not None:
        from sweepgen.search_plots import plot_scan

        Path(output).mkdir(exist_ok=True)           # the last level only, as export does
        paths = service.write(result, output, result.stem)
        if result.rows:
            paths["plot"] = str(plot_scan(result, Path(output) / f"{result.stem}-scan.png"))
        doc["files"] = paths
    return ScanResult(doc, title=result.title, inner=result)


#: designs an optimisation may try (as ``sweepgen optimise``)
OPTIMISE_EVALUATIONS = 60


def optimise(scenario: ScenarioSource, free: str | Sequence[str] | Mapping[str, str | None], *,
             objective: str = "captured_fraction", minimise: bool = False, atoms: int = SCAN_ATOMS,
             confirm_atoms: int | None = None, evaluations: int = OPTIMISE_EVALUATIONS, seed: int = 0,
             workers: int | None = None, cluster: str | None = None, output: str | os.PathLike | None = None,
             progress: Callable | None = None) -> OptimiseResult:
    """Search free keys of a scenario for the design with the best objective among those that pass
    check (``sweepgen optimise``): SciPy's differential evolution, every design on the same atoms
    (one seed), the winner confirmed beside the starting design with a fresh seed and more atoms.

    Parameters
    ----------
    scenario : str, path-like or dict
        A built-in key, a path or a dict with the TOML's keys (see :func:`load_scenario`).
    free : str, list of str, or dict
        ``"KEY=LOW:HIGH"`` (bounds with their unit) or ``"KEY"`` (half to one and a half times its
        value), several of them, or ``{KEY: "LOW:HIGH" or None}``.
    objective : str
        The number of the simulation's JSON to make as large as possible (``captured_fraction``).
    minimise : bool
        Make it as small as possible instead.
    atoms : int
        Atoms per design during the search.
    confirm_atoms : int, optional
        Atoms of the confirmation (default: 10 × ``atoms``).
    evaluations : int
        About how many designs the search may try.
    seed : int
        The seed every design of the search uses; the confirmation uses a fresh one derived from it.
    workers, cluster
        Local processes (default: one per core; 1 runs in this process), or the address of a Dask
        scheduler to run the designs on instead.
    output : str or path-like, optional
        Folder for ``NAME-best.toml``, ``NAME-optimise.md``, ``.json`` and ``.png`` (numbered, never
        replaced; default: nothing written).
    progress : callable, optional
        ``progress(done, total)`` after each design.

    Returns
    -------
    OptimiseResult
        ``best`` (the winner's ``values``, ``objective``), ``confirmation``, ``improvement`` (with its
        error), ``binding`` (the rules or bounds that stop the search), ``history``, ``finished``
        (False when Ctrl-C stopped it: nothing is confirmed then); :meth:`OptimiseResult.best_scenario`.

    Example
    -------
    >>> r = optimise("rb87-chopped-oven", "chirp.force_fraction=0.4:0.9", atoms=300)  # doctest: +SKIP
    >>> r.best["values"], r.improvement["difference"]                                 # doctest: +SKIP
    """
    service = importlib.import_module("sweepgen.optimise")
    if isinstance(free, str):
        free = [free]
    elif isinstance(free, Mapping):
        free = [key if bounds is None else f"{key}={bounds}" for key, bounds in free.items()]
    goal = service.Goal(objective, minimise).check()
    start = scenario
    if isinstance(scenario, Mapping):
        scan_service = importlib.import_module("sweepgen.scan")
        data = copy.deepcopy(dict(scenario))
        start = scan_service.Base(DICT_NAME, data, load_scenario(data).title)
    result = service.optimise(start, [str(f) for f in free], goal=goal, atoms=atoms, seed=seed, budget=evaluations,
                              confirm_atoms=confirm_atoms, workers=workers, cluster=cluster, progress=progress)
    files = None
    if output is not None:
        from sweepgen import optimise_report

        Path(output).mkdir(exist_ok=True)           # the last level only, as export does
        files = optimise_report.write(result, output, result.search.start.stem)
    doc = result.to_json()                          # after writing: it says whether the file's layout was kept
    if files is not None:
        doc["files"] = files
    return OptimiseResult(doc, title=result.search.start.title, inner=result)

