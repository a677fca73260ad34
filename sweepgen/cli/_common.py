"""What the commands share: errors, JSON, tables, options, the progress bar.

Data goes to stdout, messages and errors to stderr. Expected errors
(:class:`sweepgen.errors.SweepgenError`) and usage errors become one line on
stderr and their exit code (2 bad input or usage, 1 a check failed or an
instrument refused); no traceback. With ``--json``, a command that stops on such
an error before printing its document prints the error document
``{"error": {"file", "key", "message", "exit_code"}}`` on stdout instead, so
stdout always holds exactly one JSON document. Heavy modules are imported
inside the functions that need them, so that ``sweepgen --help`` stays fast.
"""

from __future__ import annotations

import contextlib
import functools
import sys
import warnings

import click

from sweepgen._json import dumps
from sweepgen.errors import SweepgenError

#: keys of ``click.Context.meta`` (shared by a command's context and the group's)
WANTS_JSON = "sweepgen.wants_json"
EMITTED = "sweepgen.emitted_json"


def handles_errors(func):
    """Decorator for command callbacks: expected errors become one line and an exit code."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        try:
            return func(*args, **kwargs)
        except SweepgenError as exc:
            fail(exc)
        except KeyboardInterrupt:
            click.echo("sweepgen: interrupted", err=True)
            sys.exit(130)

    return wrapper


@contextlib.contextmanager
def guarded(args):
    """Run a command: ``args`` are its words after the group's options. Numerical warnings
    from inside the physics are silenced (a result that matters is checked for being
    finite where it is made), and expected errors, including click's usage errors,
    become one line on stderr (plus the JSON error document under ``--json``)."""
    ctx = click.get_current_context()
    words = list(args)
    ctx.meta[WANTS_JSON] = "--json" in (words[:words.index("--")] if "--" in words else words)
    with warnings.catch_warnings():     # also NumPy's floating-point warnings (its default mode is "warn")
        warnings.simplefilter("ignore")
        try:
            yield
        except SweepgenError as exc:
            fail(exc)
        except click.UsageError as exc:
            fail_usage(exc)


def error_document(exc) -> dict:
    """``{"error": {"file", "key", "message", "exit_code"}}`` for an expected error."""
    return {"error": {"file": getattr(exc, "file", None), "key": getattr(exc, "key", None),
                      "message": getattr(exc, "detail", None) or str(exc), "exit_code": exc.exit_code}}


def fail(exc: SweepgenError):
    """Print ``sweepgen: error: message`` on stderr (and, under ``--json`` when no document was
    printed yet, the error document on stdout), then exit with the error's code."""
    ctx = click.get_current_context(silent=True)
    if ctx is not None and ctx.meta.get(WANTS_JSON) and not ctx.meta.get(EMITTED):
        emit_json(error_document(exc))
    text = " ".join(str(exc).split()).translate(_CONTROL)
    click.echo(f"sweepgen: error: {text}", err=True)
    sys.exit(exc.exit_code)


#: control characters in a message (an instrument's reply, a key of a user file) written as escapes,
#: so that what reaches the terminal is one line of text and never a terminal command
_CONTROL = {c: f"\\x{c:02x}" for c in [*range(0x20), *range(0x7f, 0xa0)]}


def fail_usage(exc: click.UsageError):
    """A usage error of click (unknown option, value out of an option's range) as one line, exit 2."""
    from sweepgen.errors import InputError

    param = getattr(exc, "param", None)
    key = getattr(exc, "option_name", None)
    if param is not None:
        key = max(param.opts, key=len) if getattr(param, "opts", None) else param.human_readable_name
    command = exc.ctx.command_path if exc.ctx is not None else "sweepgen"
    error = InputError(f"{exc.format_message()} (see '{command} --help')")
    error.key = key
    fail(error)


@contextlib.contextmanager
def options_named(**options):
    """Errors of the API about a parameter (``atoms``) name the command's option instead (``--atoms``);
    an error about a key of a file (the scenario's own ``laser``) keeps naming the file and its key."""
    from sweepgen.errors import InputError

    try:
        yield
    except InputError as exc:
        if exc.key not in options or type(exc) is not InputError or exc.file is not None:
            raise
        raise InputError(exc.detail, file=exc.file, key=options[exc.key]) from None


def emit_json(doc) -> None:
    """Write one JSON document to stdout, and nothing else."""
    ctx = click.get_current_context(silent=True)
    if ctx is not None:
        ctx.meta[EMITTED] = True
    click.echo(dumps(doc), nl=False)


def echo_warnings(report) -> None:
    """The checker's warnings, one line each on stderr (also with ``--json``): shown before a
    command writes a table or touches an instrument."""
    for f in report.warnings():
        click.echo(f"warning: {f.rule}: {f.message}" + (f" (to change: {f.advice})" if f.advice else ""), err=True)


def option_quantity(text, unit: str, name: str, example: str):
    """The value of option ``name`` (text with a unit) in ``unit``, within its plausible range;
    None when the option was not given."""
    from sweepgen import plausible, units

    if text is None:
        return None
    value = units.parse(text, unit, key=name, example=example)
    plausible.check_option(name, value, text, unit)
    return value


def bounded(name: str):
    """A click callback refusing a number outside the plausible range of option ``name``."""

    def callback(ctx, param, value):
        from sweepgen import plausible

        if value is not None:
            plausible.check_option(name, value)
        return value

    return callback


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


class LateProgress:
    """A progress callback whose bar opens only when its length is known (:meth:`start`, called from
    the API's ``before_write`` / ``before_send`` hook); before that, progress is not drawn."""

    def __init__(self, stack: contextlib.ExitStack, label: str | None = None, show: bool = False):
        self._stack, self._bar = stack, None
        self._label, self._show = label, show

    def start(self, length: int, label: str, *, show: bool) -> None:
        self._bar = self._stack.enter_context(progress_bar(length, label, show=show))

    def __call__(self, done, total) -> None:
        if self._bar is None and self._label is not None:
            self.start(total, self._label, show=self._show)      # the total is known from the first call
        if self._bar is not None:
            self._bar(done, total)


@contextlib.contextmanager
def late_progress(label: str | None = None, *, show: bool = False):
    """Yield a :class:`LateProgress`; its bar is closed when the block ends. With ``label`` the bar
    opens by itself at the first progress report (when ``show``)."""
    with contextlib.ExitStack() as stack:
        yield LateProgress(stack, label, show)


# -- shared options ----------------------------------------------------------------------------
class PlotFile(click.ParamType):
    """A plot to write: a .png or .svg file in a folder that exists (no folder is created)."""

    name = "FILE"

    def convert(self, value, param, ctx):
        from sweepgen.errors import InputError
        from sweepgen.plots import plot_path

        try:
            plot_path(value)
        except InputError as exc:
            self.fail(exc.detail, param, ctx)
        return str(value)


class OutputFolder(click.ParamType):
    """A folder to write into: an existing folder, or a new one whose parent exists (only the
    last level is created, when the command writes)."""

    name = "DIR"

    def convert(self, value, param, ctx):
        from pathlib import Path

        path = Path(value)
        if path.exists() and not path.is_dir():
            self.fail(f"{value!r} exists and is not a folder", param, ctx)
        if not path.exists() and not path.parent.is_dir():
            self.fail(f"the parent folder of {value!r} does not exist; sweepgen creates only the last "
                      f"level (create the parents first)", param, ctx)
        return str(value)

json_option = click.option("--json", "as_json", is_flag=True, help="Print one JSON document on stdout (SI units).")
rate_option = click.option("--rate", "rate", default=None, metavar="RATE",
                           help="Sample rate with its unit (e.g. '10 MSa/s'); overrides [drive] sample_rate.")
laser_option = click.option("--laser", "laser_ref", default=None, metavar="LASER",
                            help="Laser profile (built-in key or path) instead of the scenario's.")
generator_option = click.option("--generator", "generator_ref", default=None, metavar="GENERATOR",
                                help="Generator profile (built-in key or path) instead of the scenario's.")


def profile_option(kind: str, ref):
    """The laser or generator profile an option (``--laser``, ``--generator``) names, loaded; None
    when the option was not given. Errors name the option."""
    if ref is None:
        return None
    from sweepgen import playback

    return playback.load_profile(kind, ref, key=f"--{kind}")
