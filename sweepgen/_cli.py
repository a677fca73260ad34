"""Shared pieces of the command-line interface: errors, JSON, tables, numbers.

Data goes to stdout, messages and errors to stderr. Expected errors
(:class:`sweepgen.errors.SweepgenError`) become one line on stderr and their exit
code (2 bad input, 1 a check failed or an instrument refused); no traceback.
"""

from __future__ import annotations

import functools
import math
import sys

import click

from sweepgen._json import dumps
from sweepgen.errors import SweepgenError

_PREFIXES = [(1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "µ"),
             (1e-9, "n"), (1e-12, "p")]
_NO_PREFIX = {"%", "", "photons", "m/s²", "m/s^2", "samples", "bits", "V/s"}


def handles_errors(func):
    """Decorator for command callbacks: expected errors become one line and an exit code."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        try:
            return func(*args, **kwargs)
        except SweepgenError as exc:
            fail(str(exc), exc.exit_code)
        except KeyboardInterrupt:
            click.echo("sweepgen: interrupted", err=True)
            sys.exit(130)

    return wrapper


def fail(message: str, code: int):
    """Print ``sweepgen: error: message`` on stderr and exit with ``code``."""
    text = " ".join(str(message).split())
    click.echo(f"sweepgen: error: {text}", err=True)
    sys.exit(code)


def emit_json(doc) -> None:
    """Write one JSON document to stdout, and nothing else."""
    click.echo(dumps(doc), nl=False)


def si(value, unit: str = "", digits: int = 4) -> str:
    """Format a number with an SI prefix: ``si(7.187e10, "Hz/s") -> '71.87 GHz/s'``."""
    if value is None:
        return "—"
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    if unit in _NO_PREFIX or value == 0:
        return f"{value:.{digits}g} {unit}".rstrip()
    mag = abs(value)
    for factor, prefix in _PREFIXES:
        if mag >= factor * 0.9995:
            return f"{value / factor:.{digits}g} {prefix}{unit}"
    factor, prefix = _PREFIXES[-1]
    return f"{value / factor:.{digits}g} {prefix}{unit}"


def table(rows, headers=None) -> str:
    """A compact left-aligned text table (columns separated by two spaces)."""
    rows = [[str(c) for c in r] for r in rows]
    if headers:
        rows = [list(headers)] + rows
    if not rows:
        return ""
    widths = [max(len(r[i]) for r in rows if i < len(r)) for i in range(max(len(r) for r in rows))]
    lines = []
    for n, r in enumerate(rows):
        lines.append("  ".join(c.ljust(widths[i]) for i, c in enumerate(r)).rstrip())
        if headers and n == 0:
            lines.append("  ".join("-" * w for w in widths))
    return "\n".join(lines)


json_option = click.option("--json", "as_json", is_flag=True, help="Print one JSON document on stdout (SI units).")


def load_and_check(scenario_ref, *, rate=None, laser_ref=None, generator_ref=None):
    """Load a scenario and check it, with the CLI's overrides; returns (scenario, report).

    ``scenario_ref`` is a built-in key, a path or an already loaded scenario.
    ``rate`` is the ``--rate`` text (a sample rate with its unit), ``laser_ref`` and
    ``generator_ref`` replace the scenario's profiles (``--laser``, ``--generator``).
    """
    from sweepgen import units
    from sweepgen.checker import check
    from sweepgen.errors import InputError
    from sweepgen.generator import load_generator
    from sweepgen.laser import load_laser
    from sweepgen.scenario import Scenario, load_scenario

    sc = scenario_ref if isinstance(scenario_ref, Scenario) else load_scenario(scenario_ref)
    rate_value = None
    if rate is not None:
        rate_value = units.parse(rate, "Hz", key="--rate", example="10 MSa/s")
        if not rate_value > 0:
            raise InputError(f"expected a sample rate above zero, got {rate!r}", key="--rate")
    laser = load_laser(laser_ref, key="--laser") if laser_ref else None
    gen = load_generator(generator_ref, key="--generator") if generator_ref else None
    return sc, check(sc, laser, gen, rate=rate_value)
