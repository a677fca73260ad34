"""The ``sweepgen`` command line: the one layer that imports click.

Each command lives in its own module of this package and is imported only when
it runs (or when help lists it), so that ``sweepgen --help`` starts quickly.
Commands parse their options, call a service (mostly
:mod:`sweepgen.playback`) and print; :mod:`sweepgen.cli._common` holds what
they share (errors, JSON, tables, options, the progress bar). To add a command,
write ``sweepgen/cli/NAME.py`` defining a click command called ``command`` and
add it to ``COMMANDS`` below. Nothing outside this package imports from it.
"""

from __future__ import annotations

import importlib
import warnings

import click

from sweepgen import __version__
from sweepgen.errors import DeprecatedKey

#: command name -> (module of this package, one-line help shown in the listing)
COMMANDS = {
    "plan": ("plan", "Plan the sweep for a scenario and print its numbers."),
    "check": ("check", "Check a sweep against its laser and generator before switching on."),
    "simulate": ("simulate", "Monte Carlo of the atoms through the sweep: what arrives, how slow."),
    "export": ("export", "Write the sample table (csv, raw, npy or a plug-in format) and its sidecar."),
    "upload": ("upload", "Upload the sweep to a generator (SCPI over VISA, or a ramp board), verified."),
    "emulate": ("emulate", "Serve the virtual instrument (or ramp-board emulator) on a TCP port."),
    "calibrate": ("calibrate", "Fit a stage of a laser's tuning chain to measurements; write a new profile."),
    "inspect": ("inspect", "Read a table back: verify it, decode it, print its numbers."),
    "scan": ("scan", "Check and simulate a grid of designs (keys varied), with the same seed for each."),
    "optimise": ("optimise", "Search free keys for the design that delivers the most atoms and passes check."),
    "compare": ("compare", "Compare a measured frequency trace with the planned sweep."),
    "profiles": ("profiles", "List the built-in species, lasers, generators and scenarios."),
    "demo": ("demo", "Run the whole job on built-in data and write a report."),
}


class LazyGroup(click.Group):
    """A group that imports a command's module only when that command is used, runs it guarded
    (:func:`sweepgen.cli._common.guarded`: one line per error, the JSON error document, numerical
    warnings silenced) and prints sweepgen's own warnings (a deprecated key) as one line on stderr."""

    def parse_args(self, ctx, args):
        ctx.meta["sweepgen.args"] = list(args)
        return super().parse_args(ctx, args)

    def invoke(self, ctx):
        from sweepgen.cli._common import guarded

        with guarded(ctx.meta.get("sweepgen.args", ())), warnings.catch_warnings():
            warnings.simplefilter("default", DeprecatedKey)      # each one once
            shown = warnings.showwarning

            def show(message, category, filename, lineno, file=None, line=None):
                if issubclass(category, DeprecatedKey):
                    click.echo(f"sweepgen: warning: {message}", err=True)
                else:
                    shown(message, category, filename, lineno, file, line)

            warnings.showwarning = show
            return super().invoke(ctx)

    def list_commands(self, ctx):
        return list(COMMANDS)

    def get_command(self, ctx, name):
        if name not in COMMANDS:
            return None
        module = importlib.import_module(f"{__name__}.{COMMANDS[name][0]}")
        return module.command

    def format_commands(self, ctx, formatter):
        rows = [(name, help_) for name, (_, help_) in COMMANDS.items()]
        with formatter.section("Commands"):
            formatter.write_dl(rows)


@click.group(cls=LazyGroup, context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, "--version", prog_name="sweepgen")
def main():
    """Plan, check, simulate and play frequency-chirped laser sweeps that slow
    atomic and molecular beams.

    \b
    Example:
      sweepgen demo                 # the whole job on built-in data
      sweepgen plan rb87-chopped-oven  # the sweep for a built-in scenario
    """
