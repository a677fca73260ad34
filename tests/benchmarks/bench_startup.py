"""How fast commands start: each against the libraries it cannot do without (run by hand).

* ``sweepgen --help`` against ``python -c "import click"`` (target: at most 1.5);
* ``sweepgen plan SCENARIO --json`` (target: at most 1.15) and ``sweepgen check
  SCENARIO`` (target: at most 1.3) against ``python -c "import numpy,
  scipy.integrate, pint"``: planning cannot do without NumPy, the ODE
  integrator and the unit parser, so their import is the floor.

Wall time of whole child processes, interleaved, median of ``--repeat`` runs
each (after a warm-up round), every built-in scenario unless ``--scenario``::

    python tests/benchmarks/bench_startup.py [--repeat N] [--scenario KEY ...]
"""

from __future__ import annotations

import argparse
import sys

from _interleave import command, load, medians

SCENARIOS = ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"]
LIBRARIES = "import numpy, scipy.integrate, pint"


def cases(scenarios) -> dict:
    py = sys.executable
    out = {"import click": [py, "-c", "import click"],
           "sweepgen --help": [py, "-m", "sweepgen", "--help"],
           "import numpy, scipy.integrate, pint": [py, "-c", LIBRARIES]}
    for key in scenarios:
        out[f"plan {key} --json"] = [py, "-m", "sweepgen", "plan", key, "--json"]
        out[f"check {key}"] = [py, "-m", "sweepgen", "check", key]
    return {name: (lambda argv=argv: command(argv, ok=(0, 1))) for name, argv in out.items()}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=7)
    ap.add_argument("--scenario", action="append", default=None, help="built-in scenario (repeatable)")
    args = ap.parse_args(argv)
    scenarios = args.scenario or SCENARIOS
    print(load())
    m = medians(cases(scenarios), args.repeat)
    click, libs = m["import click"]["seconds"], m["import numpy, scipy.integrate, pint"]["seconds"]
    print(f"median of {args.repeat} interleaved runs each (wall time)")
    for label, base in (("import click", click), (LIBRARIES, libs)):
        print(f"{'python -c ' + repr(label):44s} {base * 1e3:7.0f} ms  (baseline)")
    rows = [("sweepgen --help", click, 1.5)]
    rows += [(f"{cmd} {key}" + (" --json" if cmd == "plan" else ""), libs, target)
             for key in scenarios for cmd, target in (("plan", 1.15), ("check", 1.3))]
    for name, base, target in rows:
        s = m[name]["seconds"]
        verdict = "met" if s / base <= target else "NOT met"
        print(f"{name:44s} {s * 1e3:7.0f} ms  ratio {s / base:5.2f}  (target <= {target}: {verdict})")


if __name__ == "__main__":
    main()
