"""How fast commands start: each against the libraries it cannot do without (run by hand).

* ``sweepgen --help`` against ``python -c "import click"`` (target: at most 1.5);
* ``sweepgen plan SCENARIO --json`` (target: at most 1.15) and ``sweepgen check
  SCENARIO`` (target: at most 1.3) against ``python -c "import numpy,
  scipy.integrate, pint"``: planning cannot do without NumPy, the ODE
  integrator and the unit parser, so their import is the floor.

Wall time of whole child processes, interleaved, median of ``--repeat`` runs
each (after a warm-up round, which also compiles byte-code, as installing does:
see ``_interleave.compiled_env``), every built-in scenario unless ``--scenario``::

    python tests/benchmarks/bench_startup.py [--repeat N] [--scenario KEY ...]
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile

from _interleave import LIBRARIES, LIBRARIES_CODE, command, compiled_env, load, medians

SCENARIOS = ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"]


def cases(scenarios, env) -> dict:
    py = sys.executable
    out = {"import click": [py, "-c", "import click"],
           "sweepgen --help": [py, "-m", "sweepgen", "--help"],
           LIBRARIES: [py, "-c", LIBRARIES_CODE]}
    for key in scenarios:
        out[f"plan {key} --json"] = [py, "-m", "sweepgen", "plan", key, "--json"]
        out[f"check {key}"] = [py, "-m", "sweepgen", "check", key]
    return {name: (lambda argv=argv: command(argv, env=env, ok=(0, 1))) for name, argv in out.items()}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=7)
    ap.add_argument("--scenario", action="append", default=None, help="built-in scenario (repeatable)")
    args = ap.parse_args(argv)
    scenarios = args.scenario or SCENARIOS
    print(load())
    cache = tempfile.mkdtemp(prefix="sweepgen-bench-pyc-")
    try:
        m = medians(cases(scenarios, compiled_env(cache)), args.repeat)
    finally:
        shutil.rmtree(cache, ignore_errors=True)
    wall = {name: r["seconds"] for name, r in m.items()}
    cpu = {name: r["cpu_seconds"] for name, r in m.items()}
    print(f"median of {args.repeat} interleaved runs each; the targets are on wall time, processor time "
          f"(user + system) is shown beside it, being less disturbed by other work on the machine")
    for name in ("import click", LIBRARIES):
        print(f"{'python -c ' + repr(name):48s} {wall[name] * 1e3:6.0f} ms wall {cpu[name] * 1e3:6.0f} ms cpu"
              f"  (baseline)")
    rows = [("sweepgen --help", "import click", 1.5)]
    rows += [(f"{cmd} {key}" + (" --json" if cmd == "plan" else ""), LIBRARIES, target)
             for key in scenarios for cmd, target in (("plan", 1.15), ("check", 1.3))]
    for name, base, target in rows:
        ratio = wall[name] / wall[base]
        verdict = "met" if ratio <= target else "NOT met"
        print(f"{name:48s} {wall[name] * 1e3:6.0f} ms wall {cpu[name] * 1e3:6.0f} ms cpu  ratio {ratio:5.2f} "
              f"(cpu {cpu[name] / cpu[base]:4.2f}; target <= {target}: {verdict})")

if __name__ == "__main__":
    main()
