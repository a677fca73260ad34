"""What the benchmarks share: interleaved runs, their medians, and a command's time and peak memory.

Run by hand (pytest does not collect this folder). The machine is shared and
its load drifts, so a measurement and its baseline are never timed one after
the other: :func:`medians` runs the cases in turn, round after round (the order
rotates each round, so no case always follows the same neighbour), after one
warm-up round that is thrown away (it fills disk caches and byte-code), and
keeps the median of each figure.

:func:`command` runs a command in a child process and measures its wall time
and its peak resident set size (``ru_maxrss`` of that child alone, from
``os.wait4``). Linux carries a parent's peak into a forked child, so a script
that measures memory must stay small itself: import only the standard library
before calling it.
"""

from __future__ import annotations

import os
import statistics
import subprocess
import tempfile
import time
from typing import Callable

#: rounds when a benchmark does not say (the issue asks for the median of at least five)
REPEAT = 5
#: the libraries a planning command cannot do without (the floor of bench_startup and bench_export_memory)
LIBRARIES = "import numpy, scipy.integrate, pint"
#: ... imported as sweepgen imports them: pint without its optional Dask support, which it would import
#: whenever Dask is installed (sweepgen.units.import_pint), so an environment with the cluster extra
#: measures the same floor as one without
LIBRARIES_CODE = "import sys; sys.modules['dask'] = None; import numpy, scipy.integrate, pint"


def medians(cases: dict[str, Callable[[], dict]], repeat: int = REPEAT, *, warmup: int = 1) -> dict[str, dict]:
    """``{case: {figure: median}}`` of ``repeat`` interleaved runs of each case.

    Each case is a callable returning a dict of figures (``{"seconds": ...}``).
    """
    if repeat < 1:
        raise ValueError("repeat must be at least 1")
    names = list(cases)
    runs: dict[str, list[dict]] = {name: [] for name in names}
    for round_ in range(warmup + repeat):
        shift = round_ % len(names)
        for name in names[shift:] + names[:shift]:
            result = cases[name]()
            if round_ >= warmup:
                runs[name].append(result)
    return {name: {key: statistics.median(r[key] for r in results) for key in results[0]}
            for name, results in runs.items()}


def compiled_env(folder) -> dict:
    """The environment with Python's byte-code cached under ``folder``.

    An installed package has its modules compiled to byte-code (pip does it at
    install time). A checkout installed in editable mode, in an environment that
    sets ``PYTHONDONTWRITEBYTECODE``, would compile sweepgen's modules again at
    every start, which users do not pay; caching every module's byte-code in one
    separate folder (``PYTHONPYCACHEPREFIX``) leaves the checkout untouched and
    treats the baseline's libraries and sweepgen alike.
    """
    env = dict(os.environ, PYTHONPYCACHEPREFIX=str(folder))
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    return env


def command(argv, *, cwd=None, env=None, ok=(0,)) -> dict:
    """Run ``argv``; ``{"seconds": wall time, "cpu_seconds": its processor time, "peak_mib": its peak RSS}``.

    Output is thrown away; an exit status outside ``ok`` raises with the
    command's error output.
    """
    with tempfile.TemporaryFile() as err:
        start = time.perf_counter()
        proc = subprocess.Popen(argv, cwd=cwd, env=env, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                stderr=err)
        _, status, usage = os.wait4(proc.pid, 0)
        seconds = time.perf_counter() - start
        proc.returncode = os.waitstatus_to_exitcode(status)
        if proc.returncode not in ok:
            err.seek(0)
            raise RuntimeError(f"{' '.join(map(str, argv))} exited with {proc.returncode}:\n"
                               f"{err.read().decode(errors='replace')}")
    return {"seconds": seconds, "cpu_seconds": usage.ru_utime + usage.ru_stime,
            "peak_mib": usage.ru_maxrss / 1024}                               # ru_maxrss is in KiB on Linux


def load() -> str:
    """The machine's load averages, to print beside the figures."""
    one, five, fifteen = os.getloadavg()
    return f"load {one:.2f} {five:.2f} {fifteen:.2f} on {os.cpu_count()} cores"
