"""Peak memory of the whole ``sweepgen export`` command at 2^26 samples (run by hand).

``sweepgen export SCENARIO -f raw`` writes one period of 2^26 samples (128 MiB
of int16 codes): the whole command in a child process (loading, planning, every
check rule including the actuator's tracking, rendering, writing, hashing),
its peak resident set size taken from ``os.wait4``. The generator is the
built-in virtual AWG with invented deeper memory and a faster clock, so that
one period holds 2^26 samples; the sample rate is set with ``--rate``.

Baselines, measured in the same run: the bare interpreter and the interpreter with the libraries a planning command cannot do
without (``python -c "import numpy, scipy.integrate, pint"``, 70 MiB above the
bare one by themselves). The target is at most 64 MiB above the latter (the
libraries alone already exceed 64 MiB above the bare interpreter).

Interleaved, median of ``--repeat`` runs each. This script imports only the
standard library, so that its children do not inherit a large peak; the bare
interpreter, smaller than this script, reads its own peak (``VmHWM`` in
``/proc/self/status``), which does not carry the parent's::

    python tests/benchmarks/bench_export_memory.py [--scenario KEY] [--log2 N] [--repeat N]
"""

from __future__ import annotations

import argparse
import importlib.resources
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

from _interleave import LIBRARIES, LIBRARIES_CODE, command, compiled_env, load, medians

TARGET_MIB = 64


def deep_generator(folder: Path, samples: int) -> Path:
    """The built-in virtual AWG with memory for ``samples`` and a 4 GSa/s clock (invented limits)."""
    text = (importlib.resources.files("sweepgen.profiles") / "generators" / "virtual-awg.toml").read_text()
    text = re.sub(r'(?m)^title = .*$', 'title = "benchmark AWG: the virtual AWG with invented deeper memory"', text)
    text = re.sub(r'(?m)^rate_max = .*$', 'rate_max = "4 GSa/s"', text)
    text = re.sub(r'(?m)^memory = .*$', f"memory = {samples}", text)
    path = folder / "deep-awg.toml"
    path.write_text(text)
    return path


BARE = "print(open('/proc/self/status').read().split('VmHWM:')[1].split()[0])"


def bare_interpreter(env) -> dict:
    """The peak RSS of an interpreter that does nothing, as it reads it itself."""
    out = subprocess.run([sys.executable, "-c", BARE], env=env, capture_output=True, text=True, check=True).stdout
    return {"peak_mib": int(out) / 1024}


def period(key: str) -> float:
    code = f"from sweepgen.scenario import load_scenario; print(repr(load_scenario({key!r}).chirp.period))"
    return float(subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenario", default="rb87-chopped-oven")
    ap.add_argument("--log2", type=int, default=26, help="samples per period, as a power of two")
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args(argv)
    samples = 1 << args.log2
    rate = samples / period(args.scenario)
    folder = Path(tempfile.mkdtemp(prefix="sweepgen-bench-"))
    try:
        gen = deep_generator(folder, samples)
        py = sys.executable
        export = [py, "-m", "sweepgen", "export", args.scenario, "-f", "raw", "-o", str(folder / "out"),
                  "--generator", str(gen), "--rate", f"{rate!r} Sa/s"]
        env = compiled_env(folder / "pyc")
        m = medians({"bare": lambda: bare_interpreter(env),
                     "libraries": lambda: command([py, "-c", LIBRARIES_CODE], env=env),
                     "export": lambda: command(export, env=env)}, args.repeat)
        written = (folder / "out" / f"{args.scenario}.bin").stat().st_size
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    bare, libs, peak = (m[k]["peak_mib"] for k in ("bare", "libraries", "export"))
    print(load())
    print(f"sweepgen export {args.scenario} -f raw: 2^{args.log2} samples ({written / 2**20:.0f} MiB written) in "
          f"{m['export']['seconds']:.1f} s; peak RSS {peak:.1f} MiB (median of {args.repeat})")
    print(f"{'bare interpreter':46s} {bare:6.1f} MiB   export above it: {peak - bare:6.1f} MiB")
    verdict = "met" if peak - libs <= TARGET_MIB else "NOT met"
    print(f"python -c '{LIBRARIES}' {libs:6.1f} MiB   export above it: {peak - libs:6.1f} MiB "
          f"(target <= {TARGET_MIB} MiB: {verdict})")


if __name__ == "__main__":
    main()
