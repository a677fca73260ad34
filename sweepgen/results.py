"""What the public functions of :mod:`sweepgen` return (public module).

Every result holds the JSON document of its command (``sweepgen plan --json``
and so on) and reads its numbers from it, so the Python API and the command
line give the same numbers:

* attributes: the document's top-level values, SI floats (``plan.start_velocity``
  in m/s, ``simulation.captured_fraction`` as a fraction of 1);
* :meth:`Result.quantity` / :meth:`Result.quantities`: the same values as pint
  quantities with their units;
* :meth:`Result.to_json`: the document, exactly what ``--json`` prints;
* ``repr()`` a short text table, ``_repr_html_`` the same as HTML (Jupyter);
* :meth:`Result.plot`: a matplotlib Figure, or the file written when a path is given.

Example
-------
>>> import sweepgen
>>> p = sweepgen.plan("rb87-chopped-oven")
>>> round(p.start_velocity)
260
>>> p.quantity("chirp_duration").to("ms").units
<Unit('millisecond')>
"""

from __future__ import annotations

import copy
from typing import Any

from sweepgen._format import si
from sweepgen.errors import CheckFailed

__all__ = ["Result", "PlanResult", "CheckResult", "SimulationResult", "ExportResult", "UploadResult",
           "CalibrationResult", "InspectResult", "CompareResult", "ScanResult"]

#: (JSON key, label, unit) of the numbers a plan prints, in the order it prints them
PLAN_ROWS = (
    ("start_velocity", "start velocity", "m/s"),
    ("end_velocity", "end velocity", "m/s"),
    ("force_fraction", "force fraction η", ""),
    ("deceleration_min", "design deceleration, min", "m/s²"),
    ("deceleration_max", "design deceleration, max", "m/s²"),
    ("lag_velocity_start", "lag behind resonance at start", "m/s"),
    ("start_detuning", "start detuning", "Hz"),
    ("end_detuning", "end detuning", "Hz"),
    ("chirp_span", "chirp span", "Hz"),
    ("chirp_rate_max", "largest chirp rate", "Hz/s"),
    ("chirp_duration", "chirp duration", "s"),
    ("slowing_distance", "slowing distance", "m"),
    ("start_position", "design atom at chirp start", "m"),
    ("start_time", "chirp start after trigger", "s"),
    ("arrival_time", "arrival at target", "s"),
    ("photons_per_atom", "photons per atom", "photons"),
    ("max_rate_fraction", "largest scattering rate / Γ", ""),
    ("effective_saturation", "saturation the atoms see on axis", ""),
    ("chirp_light_level", "slowing light let through in the chirp", ""),
    ("beam_overlap", "atomic beam finding the design force", ""),
    ("survival_fraction", "band left bright (dark states, depumping)", ""),
    ("hold_velocity_loss", "velocity the hold takes", "m/s"),
    ("return_velocity_loss", "velocity the return takes", "m/s"),
    ("after_chirp_velocity", "those atoms reach the target at", "m/s"),
    ("doppler_limit", "Doppler limit", "K"),
    ("recoil_velocity", "recoil velocity", "m/s"),
)

#: (JSON key, label, unit) of a simulation's headline numbers ("" = a fraction of all atoms)
SIMULATION_ROWS = (
    ("captured_fraction", "captured at the target", ""),
    ("ideal_captured_fraction", "captured, the plan itself played", ""),
    ("band_fraction", "initially in the chirp's band", ""),
    ("baseline_no_light_fraction", "captured without light (baseline)", ""),
    ("baseline_fixed_frequency_fraction", "captured, light at start detuning", ""),
    ("final_velocity_mean", "final velocity, mean", "m/s"),
    ("final_velocity_spread", "final velocity, spread (1σ)", "m/s"),
    ("longitudinal_temperature", "longitudinal temperature (captured)", "K"),
    ("transverse_temperature", "transverse temperature (captured)", "K"),
    ("doppler_limit", "Doppler limit", "K"),
    ("photons_mean", "photons per captured atom", "photons"),
    ("depumped_fraction", "went dark at least once (depumped)", ""),
    ("too_fast_fraction", "arrived too fast", ""),
    ("not_arrived_fraction", "not arrived (too slow)", ""),
    ("arrival_time_mean", "mean arrival of captured atoms", "s"),
)

#: units of further top-level keys (SI) that results expose as quantities
UNITS = {
    "end_position": "m", "release_position": "m", "after_chirp_stop_time": "s", "lost_fraction": "",
    "transverse_velocity_spread": "m/s", "ideal_final_velocity_mean": "m/s", "sample_rate": "Sa/s",
    "chirp_rate_mean": "Hz/s", "chirp_start": "s", "return_duration": "s", "return_rate_max": "Hz/s",
    "period": "s", "duration": "s", "bytes": "B", "amplitude": "V", "offset": "V",
    "residual_rms": "Hz", "residual_max": "Hz", "residual_rms_optical": "Hz", "uncertainty": "Hz",
    "uncertainty_optical": "Hz", "change_from_old": "Hz", "chirp_error_max": "Hz", "chirp_error_at": "s",
    "chirp_error_rms": "Hz", "chirp_error_mean": "Hz", "error_max": "Hz", "error_rms": "Hz", "tolerance": "Hz",
    "headroom": "", "atoms": "", "seed": "", "count": "samples", "period_count": "samples",
    "level_min": "", "level_max": "", "level_step": "", "delay": "s",
    **{key: unit for key, _, unit in PLAN_ROWS + SIMULATION_ROWS},
}
#: pint spellings of the units sweepgen prints
_PINT_UNIT = {"": "dimensionless", "photons": "dimensionless", "samples": "dimensionless", "m/s²": "m/s**2",
              "Sa/s": "Sa/s", "B": "byte"}


class Result:
    """Base of the results: the command's JSON document with attribute access and displays.

    Subclasses set ``ROWS`` (key, label, unit) for ``repr`` and HTML and may
    draw a figure in ``_figure``.
    """

    ROWS: tuple = ()
    #: what ``plot`` draws (subclasses with a figure say so)
    PLOT = ""

    def __init__(self, doc: dict, *, title: str = "", inner: Any = None):
        from sweepgen._json import plain

        self._doc = plain(doc)          # plain JSON values: arrays become lists, NaN None
        self._title = title
        self._inner = inner

    # -- numbers ---------------------------------------------------------------------------
    def to_json(self) -> dict:
        """The JSON document, exactly what the command prints with ``--json`` (SI units; plain
        JSON values, so ``json.dumps(result.to_json())`` works; a missing number is None)."""
        return copy.deepcopy(self._doc)

    def __getattr__(self, name: str):
        doc = self.__dict__.get("_doc")
        if doc is not None and name in doc:
            return doc[name]
        raise AttributeError(f"{type(self).__name__} has no attribute {name!r} "
                             f"(its numbers: {', '.join(self.keys()) if doc is not None else '—'})")

    def __dir__(self):
        return sorted(set(super().__dir__()) | set(self.keys()))

    def keys(self) -> list[str]:
        """The names of the document's top-level values (each also an attribute)."""
        return [k for k in self._doc if k.isidentifier()]

    def quantity(self, key: str):
        """The value ``key`` as a pint Quantity in its SI unit (``plan.quantity("chirp_rate_max")``).

        Raises
        ------
        KeyError
            ``key`` is not a number of this result with a known unit.
        """
        from sweepgen import units

        value = self._doc.get(key)
        if key not in UNITS or not isinstance(value, (int, float)) or isinstance(value, bool):
            raise KeyError(f"{key!r} is not a number with a unit in this result "
                           f"(numbers: {', '.join(self.quantities())})")
        unit = UNITS[key]
        return units.registry().Quantity(value, _PINT_UNIT.get(unit, unit))

    def quantities(self) -> dict:
        """Every number of the document with a known unit, as pint Quantities (key -> Quantity)."""
        out = {}
        for key, value in self._doc.items():
            if key in UNITS and isinstance(value, (int, float)) and not isinstance(value, bool):
                out[key] = self.quantity(key)
        return out

    # -- displays --------------------------------------------------------------------------
    def table_rows(self) -> list[tuple[str, str]]:
        """``(label, value with unit)`` of the headline numbers, as ``repr`` and HTML show them."""
        return [(label, si(self._doc[key], unit)) for key, label, unit in self.ROWS
                if self._doc.get(key) is not None]

    def __repr__(self) -> str:
        rows = self.table_rows()
        width = max((len(label) for label, _ in rows), default=0)
        lines = [f"<{type(self).__name__}: {self._title}>"]
        lines += [f"  {label.ljust(width)}  {value}" for label, value in rows]
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        body = "".join(f"<tr><td style='text-align:left'>{_escape(label)}</td>"
                       f"<td style='text-align:right'>{_escape(value)}</td></tr>" for label, value in self.table_rows())
        return (f"<table><caption style='text-align:left'><b>{_escape(type(self).__name__)}</b>: "
                f"{_escape(self._title)}</caption>{body}</table>{self._html_more()}")

    def _html_more(self) -> str:
        return ""

    # -- plots -----------------------------------------------------------------------------
    def plot(self, path=None):
        """Draw the result: a matplotlib Figure, or with ``path`` (``.png``/``.svg``) the file written.

        Parameters
        ----------
        path : str or path-like, optional
            Where to save the figure; its folder must exist.

        Returns
        -------
        matplotlib.figure.Figure or pathlib.Path
        """
        if path is None:
            return self._figure()
        from sweepgen.plots import plot_path, save

        plot_path(path)                     # refused before the figure is drawn
        return save(self._figure(), path)

    def _figure(self):
        raise NotImplementedError(f"{type(self).__name__} has nothing to draw")


def _escape(text: str) -> str:
    """``text`` escaped for HTML (html is imported for a notebook's display only, never by a command)."""
    from html import escape

    return escape(text)


def _findings_html(findings) -> str:
    rows = "".join(
        f"<tr><td>{_escape(_STATUS[f.status])}</td><td>{_escape(f.rule)}</td>"
        f"<td>{_escape(si(f.value, f.unit))}</td><td>{_escape(si(f.limit, f.unit))}</td>"
        f"<td>{'—' if f.headroom is None else f'{f.headroom * 100:.0f} %'}</td>"
        f"<td style='text-align:left'>{_escape(f.message)}</td></tr>" for f in findings)
    head = "".join(f"<th>{h}</th>" for h in ("status", "rule", "value", "limit", "headroom", "detail"))
    return f"<table><tr>{head}</tr>{rows}</table>"


_STATUS = {"fail": "FAIL", "warn": "warn", "pass": "ok"}


class _Judged(Result):
    """A result judged by the checker's rules: ``ok``, ``findings``, failures and warnings."""

    @property
    def report(self):
        """The checker's report (internal type; its findings are public through :attr:`findings`)."""
        return self._inner

    @property
    def ok(self) -> bool:
        """True when no rule fails (warnings allowed)."""
        return bool(self._doc["ok"])

    @property
    def findings(self) -> list:
        """Every finding (rule, status, value, limit, unit, headroom, message, advice), failures first."""
        return self.report.ordered()

    def failures(self) -> list:
        """The findings whose rule fails."""
        return self.report.failures()

    def warnings(self) -> list:
        """The findings near their limit (headroom under 20 %)."""
        return self.report.warnings()

    def finding(self, rule: str):
        """The finding of ``rule`` (None when the rule was not judged)."""
        return self.report.finding(rule)

    def _verdict(self) -> str:
        fails = self.failures()
        passed = sum(1 for f in self.findings if f.status == "pass")
        return (("NOT PLAYABLE: " if fails else "ok: ")
                + f"{len(fails)} failed, {len(self.warnings())} warning(s), {passed} passed")

    def __repr__(self) -> str:
        lines = [super().__repr__(), f"  {self._verdict()}"]
        lines += [f"  {_STATUS[f.status]} {f.rule}: {f.message}" for f in self.findings if f.status != "pass"]
        return "\n".join(lines)

    def _html_more(self) -> str:
        return f"<p><b>{_escape(self._verdict())}</b></p>{_findings_html(self.findings)}"


class PlanResult(_Judged):
    """The planned sweep and its design rules (what ``sweepgen plan`` prints).

    Attributes are the numbers of ``sweepgen plan --json`` in SI units, e.g.
    ``start_velocity`` (m/s), ``chirp_rate_max`` (Hz/s), ``chirp_duration`` (s),
    ``slowing_distance`` (m); ``ok`` and ``findings`` judge the design.
    """

    ROWS = PLAN_ROWS

    def __init__(self, doc: dict, *, title: str = "", inner: Any = None, field: Any = None):
        super().__init__(doc, title=title, inner=inner)
        self._field = field

    @property
    def scenario(self):
        """The scenario planned (:class:`sweepgen.Scenario`)."""
        return self.report.scenario

    def field_slower(self):
        """The tapered-field slower with the same deceleration and light (``plan(..., compare_field=True)``
        gives it; its numbers are the key ``tapered_field``). Raises :class:`sweepgen.errors.InputError`
        when the species file gives no ``[zeeman]`` table."""
        if self._field is None:
            from sweepgen.tapered import tapered_field

            self._field = tapered_field(self.report.plan)
        return self._field

    def detuning(self, t):
        """The planned optical detuning (Hz) at times ``t`` (s, one period from the table's first sample)."""
        import numpy as np

        return self.report.plan.schedule().detuning(np.asarray(t, dtype=float))

    def table_rows(self):
        sc = self.scenario
        rows = []
        for key, label, unit in self.ROWS:
            value = self._doc.get(key)
            if value is None or (key == "survival_fraction" and sc.species.loss_per_photon == 0
                                 and sc.species.off_resonant is None) or (key == "chirp_light_level" and value == 1):
                continue
            rows.append((label, si(value, unit)))
        return rows

    def _figure(self):
        from sweepgen.playback import actuator_response
        from sweepgen.plots import plan_figure

        period = self.finding("period")
        if period is not None and period.status == "fail":
            raise CheckFailed("one period cannot hold the sweep (rule period): nothing to draw",
                              findings=self.report.findings)
        plan = self.report.plan
        timing = self._doc.get("timing")
        lanes = None if timing is None else [(lane["label"], [tuple(s) for s in lane["spans"]])
                                             for lane in timing["lanes"]]
        return plan_figure(plan, response=actuator_response(plan), lanes=lanes)


class CheckResult(_Judged):
    """A scenario checked against its laser and generator (what ``sweepgen check`` prints), ready to
    render, export or upload.

    ``ok`` is True when no rule fails; ``findings`` lists every rule's verdict;
    ``sample_rate`` (Sa/s) is the rate chosen (None when none plays the sweep).
    """

    @property
    def report(self):
        """The checker's report (internal type; its findings are public through :attr:`findings`)."""
        return self._inner.report

    @property
    def sample_rate(self) -> float | None:
        """Sa/s: the sample rate the sweep plays at (None when no rate plays it)."""
        return (self._doc.get("playback") or {}).get("sample_rate")

    @property
    def scenario(self):
        """The scenario checked (:class:`sweepgen.Scenario`)."""
        return self._inner.scenario

    def table_rows(self):
        pb = self._inner
        rows = [("laser", f"{pb.laser.key} ({pb.laser.chain.describe()})"), ("generator", pb.generator.key)]
        choice = pb.report.rate_choice
        if choice is not None:
            rows.append(("sample rate", si(choice.sample_rate, "Sa/s")))
        return rows

    def _figure(self):
        from sweepgen.plots import check_figure

        return check_figure(self.report)

    # -- what a checked sweep is for ------------------------------------------------------
    def table(self):
        """The rendered sample table of the main output (drive, codes, times; SI units).

        Raises
        ------
        CheckFailed
            A rule fails: nothing unsafe is rendered.
        """
        return self._inner.table()

    def require_ok(self) -> "CheckResult":
        """Raise :class:`sweepgen.errors.CheckFailed` (with the findings) unless no rule fails."""
        self._inner.require_playable()
        return self

    def link(self, resource: str | None = None, *, serial_port: str | None = None, backend: str | None = None):
        """Where an upload goes: ``resource`` (VISA) or ``serial_port`` (ramp board), else the
        generator profile's address. A bad address raises :class:`sweepgen.errors.InputError`.
        The returned link's ``destination`` is the address; pass it to :meth:`upload`."""
        return self._inner.link(resource=resource, serial_port=serial_port, backend=backend)

    def export(self, format: str, folder, *, name: str | None = None, options: dict | None = None,
               progress=None, before_write=None) -> "ExportResult":
        """Write the table and its JSON sidecar into ``folder`` (the parameters of :func:`sweepgen.export`).

        Example
        -------
        >>> import tempfile
        >>> sweepgen.check("rb87-chopped-oven").export("csv", tempfile.mkdtemp()).bytes > 0  # doctest: +SKIP
        True
        """
        import os

        from sweepgen import playback

        pb = self._inner
        file_format = playback.file_format(format)
        options = {**export_options(options), "name": name or playback.default_file_name(pb.scenario)}
        file_format.check_options(options)
        self.require_ok()
        file_format.check_table(pb.table(), options)
        if before_write is not None:
            before_write(self)
        delivered = pb.export(file_format, os.fspath(folder), options, progress=progress)
        return ExportResult(delivered.to_json(), title=pb.scenario.title, inner=delivered)

    def upload(self, resource=None, *, serial_port: str | None = None, backend: str | None = None,
               dry_run: bool = False, arm: bool = False, progress=None, before_send=None) -> "UploadResult":
        """Upload the table, verified (the parameters of :func:`sweepgen.upload`); ``resource`` may be
        a :meth:`link`.

        Example
        -------
        >>> sweepgen.check("rb87-chopped-oven").upload(dry_run=True).armed  # doctest: +SKIP
        False
        """
        from sweepgen.playback import Link

        pb = self._inner
        link = resource if isinstance(resource, Link) else self.link(resource, serial_port=serial_port,
                                                                     backend=backend)
        self.require_ok()
        pb.table()
        if before_send is not None:
            before_send(self, link)
        delivered = pb.upload(link, arm=arm, dry_run=dry_run, progress=progress)
        return UploadResult(delivered.to_json(), title=pb.scenario.title, inner=delivered)


def export_options(options) -> dict:
    """Driver options as text (``{"dtype": "uint16"}``); the file name is a parameter of its own."""
    from sweepgen.errors import InputError

    options = {str(k): str(v) for k, v in (options or {}).items()}
    if "name" in options:
        raise InputError("give the file name with name=, not among the driver options", key="options")
    return options


class SimulationResult(Result):
    """A Monte Carlo of the atoms through the sweep (what ``sweepgen simulate`` prints).

    Attributes: ``captured_fraction`` (share of all atoms emitted that reach
    the target slower than the capture velocity), ``final_velocity_mean`` and
    ``final_velocity_spread`` (m/s), ``longitudinal_temperature`` (K), the
    baselines, the losses (``lost_by_reason``) and the histograms.
    """

    ROWS = SIMULATION_ROWS

    @property
    def scenario(self):
        """The scenario simulated (:class:`sweepgen.Scenario`)."""
        return self._inner.scenario

    @property
    def run(self):
        """The Monte Carlo run itself (:class:`sweepgen.simulate.SimulationResult`: every atom's fate)."""
        return self._inner

    def _figure(self):
        from sweepgen.plots import simulation_figure

        return simulation_figure(self._inner)


class _Delivered(Result):
    @property
    def info(self):
        """The delivered table's facts: ``count``, ``period_count`` (samples), ``sample_rate`` (Sa/s),
        ``duration`` (s), ``nbytes``, ``drive_unit``."""
        return self._inner.info

    @property
    def verified(self) -> bool:
        """True when the instrument's readback or checksum matched (always False in a dry run)."""
        return bool((self._doc.get("verification") or {}).get("ok"))


class ExportResult(_Delivered):
    """A table written to a file with its sidecar (what ``sweepgen export`` prints).

    ``paths`` lists the data file and the sidecar; ``sha256`` is the data file's
    digest and ``table_sha256`` the digest of its codes.
    """

    ROWS = (("sha256", "file sha256", None), ("table_sha256", "table_sha256", None),
            ("bytes", "bytes", "B"), ("period_count", "samples per period", "samples"))

    def table_rows(self):
        return [("data file", str(self._doc["paths"][0])), ("sidecar", str(self._doc["paths"][1]))] + [
            (label, str(self._doc[key]) if unit is None else si(self._doc[key], unit))
            for key, label, unit in self.ROWS if self._doc.get(key) is not None]


class UploadResult(_Delivered):
    """An upload to an instrument, or its dry run (what ``sweepgen upload`` prints).

    ``log`` holds the exact commands (a dry run sends nothing), ``steps`` what
    each step did, ``verification`` how the table was verified, ``armed``
    whether the output was switched on.
    """

    def table_rows(self):
        d = self._doc
        return [("destination", str(d.get("destination"))), ("driver", str(d.get("driver"))),
                ("bytes", si(d.get("bytes"), "B")), ("table_sha256", str(d.get("table_sha256"))),
                ("dry run", "yes" if d.get("dry_run") else "no"), ("verified", "yes" if self.verified else "no"),
                ("output", "ON" if d.get("armed") else "off")]


class CalibrationResult(Result):
    """A stage of a tuning chain fitted to measurements, written to a new laser profile
    (what ``sweepgen calibrate`` prints): ``residual_rms`` and ``uncertainty`` (Hz),
    ``profile`` (the file written), ``usable_range``."""

    ROWS = (("residual_rms", "residuals, RMS", "Hz"), ("residual_max", "residuals, max", "Hz"),
            ("uncertainty", "fit uncertainty (1σ, max)", "Hz"), ("change_from_old", "change from the old stage", "Hz"))

    def table_rows(self):
        return [("stage", str(self._doc["stage"])), ("profile written", str(self._doc["profile"]))] + super().table_rows()

    def _figure(self):
        from sweepgen.plots import calibration_figure

        return calibration_figure(self._inner)


class InspectResult(Result):
    """A table read back, verified against its sidecar and decoded (what ``sweepgen inspect`` prints):
    the sweep's numbers, or for a gate's or a marker's table (``quantity == "level"``) its levels and
    ``windows``."""

    ROWS = (("start_detuning", "start detuning", "Hz"), ("end_detuning", "end detuning", "Hz"),
            ("chirp_span", "chirp span", "Hz"), ("chirp_rate_max", "largest chirp rate", "Hz/s"),
            ("chirp_duration", "chirp duration", "s"), ("sample_rate", "sample rate", "Sa/s"),
            ("period", "period", "s"))
    LEVEL_ROWS = (("level_min", "lowest level", ""), ("level_max", "highest level", ""),
                  ("window_count", "windows on", ""), ("delay", "first sample after trigger", "s"),
                  ("sample_rate", "sample rate", "Sa/s"), ("period", "period", "s"))

    @property
    def ok(self) -> bool:
        """True when the file matches its sidecar."""
        return bool(self._doc["verified"])

    def table_rows(self):
        head = [("file", str(self._doc["file"])), ("verified", "yes" if self.ok else "NO")]
        if self._doc.get("quantity") != "level":
            return head + super().table_rows()
        return head + [(label, si(self._doc[key], unit)) for key, label, unit in self.LEVEL_ROWS
                       if self._doc.get(key) is not None]

    def _figure(self):
        from sweepgen.plots import table_figure

        read, numbers = self._inner
        return table_figure(read, numbers)


class CompareResult(Result):
    """A measured frequency trace against the planned sweep (what ``sweepgen compare`` prints):
    ``chirp_error_max`` and ``chirp_error_rms`` (Hz) against ``tolerance`` (Hz); ``ok``."""

    ROWS = (("chirp_error_max", "error in the chirp, max", "Hz"), ("chirp_error_rms", "error in the chirp, RMS", "Hz"),
            ("chirp_error_mean", "error in the chirp, mean (offset)", "Hz"), ("tolerance", "tolerance", "Hz"),
            ("headroom", "headroom", ""))

    @property
    def ok(self) -> bool:
        """True when the laser followed the plan within the tolerance during the chirp."""
        return bool(self._doc["ok"])

    def _figure(self):
        from sweepgen.plots import compare_figure

        cmp, scenario = self._inner
        return compare_figure(cmp, scenario=scenario)


def _captured(row: dict) -> str:
    """A design's captured share with its error, as the scan and search results show it."""
    p = row.get("captured_fraction")
    return "—" if p is None else f"{100 * p:.2f} ± {100 * row['captured_error']:.2f} % captured"


class ScanResult(Result):
    """The designs of a scan, each checked and simulated with the same seed (what ``sweepgen scan``
    prints): ``rows`` (each design's ``values``, ``verdict``, ``failing_rules``,
    ``captured_fraction`` and ``captured_error``, ``final_velocity_mean`` in m/s), ``axes``,
    ``interrupted``; :meth:`best` is the passing design that captures most."""

    def best(self, objective: str = "captured_fraction") -> dict | None:
        """The passing row with the largest ``objective`` (None when no design passes)."""
        return self._inner.best(objective)

    def table_rows(self):
        out = []
        for row in self._doc["rows"]:
            values = ", ".join(f"{k} = {v}" for k, v in row["values"].items())
            captured = _captured(row)
            verdict = {"pass": "ok", "fail": "FAIL " + ",".join(row["failing_rules"]),
                       "invalid": "cannot exist"}.get(row["verdict"], row["verdict"])
            out.append((values, f"{captured}, {verdict}"))
        return out

    def _figure(self):
        from sweepgen.search_plots import scan_figure

        return scan_figure(self._inner)


class OptimiseResult(Result):
    """The search for the best design (what ``sweepgen optimise`` prints): ``best`` (the winner's
    ``values`` and ``objective``), ``confirmation`` (the start and the winner again with a fresh seed
    and more atoms), ``improvement`` (``difference`` with its ``error``, ``significant``), ``binding``,
    ``history`` and ``finished``; :meth:`best_scenario` is the winner as a scenario dict."""

    PLOT = "the objective of every design tried, the best so far, and where each free key was"

    def best_scenario(self) -> dict | None:
        """The winning design as a dict of the TOML's keys (for :func:`sweepgen.load_scenario`), or None
        when no design passed check. Profiles the scenario file names by a relative path are named
        relative to the current folder, where a dict's paths are read from."""
        from pathlib import Path

        from sweepgen.optimise_report import moved_profiles
        from sweepgen.scan import set_keys

        best = self._doc.get("best")
        if best is None:
            return None
        start = self._inner.search.start
        return set_keys(start.data, {**best["values"], **moved_profiles(start, Path.cwd())})

    def table_rows(self):
        out = []
        conf = self._doc["confirmation"]
        for name in ("start", "best"):
            row = conf.get(name)
            if row is None:
                continue
            values = ", ".join(f"{k} = {v}" for k, v in row["values"].items()) or "(as in the file)"
            captured = _captured(row)
            out.append((f"{name}: {values}", f"{captured}, {'ok' if row['verdict'] == 'pass' else 'FAIL'}"))
        imp = self._doc.get("improvement")
        if imp is not None:
            out.append(("improvement (confirmed)", f"{100 * imp['difference']:+.2f} ± {100 * imp['error']:.2f} points"))
        return out

    def _figure(self):
        from sweepgen.search_plots import history_figure

        return history_figure(self._inner)

