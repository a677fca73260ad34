"""``sweepgen demo [DIR]``: the whole job on built-in data."""

from __future__ import annotations

import json
from pathlib import Path

import click

from sweepgen._cli import handles_errors

DEMO_SCENARIO = "rb87-chopped-oven"


@click.command(short_help="Run the whole job on built-in data.")
@click.argument("directory", required=False, default="sweepgen-demo", type=click.Path(file_okay=False))
@handles_errors
def command(directory):
    """Run the whole job on a built-in scenario and write a short report into
    DIRECTORY (default ./sweepgen-demo/).

    \b
    Example:
      sweepgen demo first-look
    """
    from sweepgen._atomic import atomic_write_text
    from sweepgen._cli import jsonable
    from sweepgen.planner import plan
    from sweepgen.plots import plot_plan
    from sweepgen.scenario import load_scenario

    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    sc = load_scenario(DEMO_SCENARIO)
    result = plan(sc)
    atomic_write_text(out / "plan.json", json.dumps(jsonable(result.to_json()), indent=2) + "\n")
    plot_plan(result, out / "sweep.png")
    click.echo(f"demo scenario: {sc.title}")
    click.echo(f"  plan:  {out / 'plan.json'}")
    click.echo(f"  sweep: {out / 'sweep.png'}")
