"""What the commands share: errors, JSON, tables, options, the progress bar.

Data goes to stdout, messages and errors to stderr. Expected errors
(:class:`sweepgen.errors.SweepgenError`) become one line on stderr and their exit
code (2 bad input, 1 a check failed or an instrument refused); no traceback.
Heavy modules are imported inside the functions that need them, so that
``sweepgen --help`` stays fast.
"""

from __future__ import annotations

import contextlib
import functools
import sys

import click

from sweepgen._json import dumps
from sweepgen.errors import SweepgenError


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


def echo_warnings(report) -> None:
    """The checker's warnings, one line each on stderr (also with ``--json``): shown before a
    command writes a table or touches an instrument."""
    for f in report.warnings():
        click.echo(f"warning: {f.rule}: {f.message}" + (f" (to change: {f.advice})" if f.advice else ""), err=True)


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


@contextlib.contextmanager
def progress_bar(length: int, label: str, *, show: bool):
    """Yield a ``progress(done, total)`` callback that draws a bar of ``length`` steps on stderr
    (``done/total`` is scaled to it), or None when ``show`` is false."""
    if not show:
        yield None
        return
    with click.progressbar(length=length, label=label, file=sys.stderr, show_eta=True) as bar:
        shown = 0

        def progress(done, total):
            nonlocal shown
            now = done * length // max(total, 1)
            bar.update(now - shown)
            shown = now

        yield progress


# -- shared options ----------------------------------------------------------------------------
json_option = click.option("--json", "as_json", is_flag=True, help="Print one JSON document on stdout (SI units).")
rate_option = click.option("--rate", "rate", default=None, metavar="RATE",
                           help="Sample rate with its unit (e.g. '10 MSa/s'); overrides [drive] sample_rate.")
laser_option = click.option("--laser", "laser_ref", default=None, metavar="LASER",
                            help="Laser profile (built-in key or path) instead of the scenario's.")
generator_option = click.option("--generator", "generator_ref", default=None, metavar="GENERATOR",
                                help="Generator profile (built-in key or path) instead of the scenario's.")


def prepare_playback(scenario, *, rate=None, laser_ref=None, generator_ref=None):
    """The playback service for a scenario with the options ``--rate``, ``--laser`` and ``--generator``.

    ``scenario`` is a built-in key, a path or an already loaded scenario;
    ``rate`` is the ``--rate`` text (a sample rate with its unit). Returns a
    :class:`sweepgen.playback.Playback`.
    """
    from sweepgen import playback, units
    from sweepgen.errors import InputError
    from sweepgen.scenario import Scenario, load_scenario

    sc = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    sample_rate = None
    if rate is not None:
        sample_rate = units.parse(rate, "Hz", key="--rate", example="10 MSa/s")
        if not sample_rate > 0:
            raise InputError(f"expected a sample rate above zero, got {rate!r}", key="--rate")
    laser = playback.load_profile("laser", laser_ref, key="--laser") if laser_ref else None
    gen = playback.load_profile("generator", generator_ref, key="--generator") if generator_ref else None
    return playback.prepare(sc, laser=laser, generator=gen, sample_rate=sample_rate)


def read_table_file(table_file):
    """A table read back for ``--table`` (:class:`sweepgen.readback.ReadTable`)."""
    from sweepgen import drivers

    return drivers.read_table(table_file)


def prepare_table_playback(scenario, table_file, *, rate=None, laser_ref=None, generator_ref=None):
    """The playback service for ``check --table``: an old table against today's profiles."""
    from sweepgen import playback
    from sweepgen.errors import InputError

    if rate is not None:
        raise InputError("a table plays at its own sample rate; --rate does not go with --table", key="--rate")
    laser = playback.load_profile("laser", laser_ref, key="--laser") if laser_ref else None
    gen = playback.load_profile("generator", generator_ref, key="--generator") if generator_ref else None
    return playback.prepare_table(scenario, read_table_file(table_file), laser=laser, generator=gen)
