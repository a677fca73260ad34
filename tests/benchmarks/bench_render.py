"""Render throughput against plain NumPy, and peak memory while exporting a large table (run by hand).

Throughput
    One period of a built-in scenario's sweep is rendered into 2^24 samples
    (the rate is set to 2^24 / period, bypassing the generator's limits) and
    the codes are iterated chunk by chunk, as a driver does: schedule ->
    tuning chain -> codes, with the frame's time, detuning and drive arrays.
    The baseline, timed in the same run, evaluates only the same piecewise
    polynomial (``Schedule.poly``) in plain NumPy, chunk by chunk:
    ``searchsorted`` for the piece, then Horner's rule with the gathered
    coefficients. Best of ``--repeat`` runs each, interleaved. The aim is a
    ratio (render / baseline) of at least 0.5.

Memory
    A child process loads everything, prepares a 2^26-sample table, records
    its peak resident set size (``resource.getrusage``, ``ru_maxrss``), exports
    the table with the ``raw`` driver into a temporary folder, and reports the
    peak again. The aim is less than 64 MiB above the state before the export.

    python tests/benchmarks/bench_render.py [--scenario KEY] [--log2 N] [--memory-log2 N] [--repeat N]
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import subprocess
import sys
import time


def setup(key: str, count: int):
    from sweepgen.generator import load_generator
    from sweepgen.laser import load_laser
    from sweepgen.planner import plan
    from sweepgen.playback import channel_playback
    from sweepgen.render import render
    from sweepgen.sampling import SampleRateChoice
    from sweepgen.scenario import load_scenario

    sc = load_scenario(key)
    schedule = plan(sc).schedule()
    laser = load_laser(str(sc.laser_path()))
    gen = load_generator(str(sc.generator_path()))
    rate = count / schedule.period
    choice = SampleRateChoice(rate, count, count, "benchmark", "benchmark", 1.0, 1.0)
    playing = channel_playback(schedule, laser, gen, sc.drive, linewidth=sc.species.linewidth)
    playing = dataclasses.replace(playing, rate_choice=choice)
    return schedule, render(playing, digest=sc.digest), rate


def baseline(poly, count: int, rate: float, size: int) -> float:
    """Plain NumPy chunked evaluation of the piecewise polynomial; returns a checksum."""
    import numpy as np

    x, c = poly.x, poly.c
    last = len(x) - 2
    total = 0.0
    for start in range(0, count, size):
        t = np.arange(start, min(start + size, count)) / rate
        k = np.clip(np.searchsorted(x, t, side="right") - 1, 0, last)
        dt = t - x[k]
        y = c[0, k]
        for m in range(1, c.shape[0]):
            y = y * dt + c[m, k]
        total += y[0]
    return total


def rendered(table) -> int:
    n = 0
    for chunk in table.chunks():
        n += len(chunk)
    return n


def throughput(key: str, log2: int, repeat: int) -> dict:
    from sweepgen.table import DEFAULT_CHUNK

    count = 1 << log2
    schedule, table, rate = setup(key, count)
    best_render = best_base = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        assert rendered(table) == count
        t1 = time.perf_counter()
        baseline(schedule.poly, count, rate, DEFAULT_CHUNK)
        t2 = time.perf_counter()
        best_render = min(best_render, t1 - t0)
        best_base = min(best_base, t2 - t1)
    return {"scenario": key, "samples": count, "chunk": DEFAULT_CHUNK,
            "chain": table.info.extra["chain"]["evaluation"],
            "render": count / best_render, "baseline": count / best_base, "ratio": best_base / best_render}


CHILD = r"""
import json, resource, sys, tempfile, shutil, time
sys.path.insert(0, {here!r})
before_imports = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
import bench_render
from sweepgen.drivers.base import Delivery
from sweepgen.drivers.raw_file import RawDriver
schedule, table, rate = bench_render.setup({key!r}, 1 << {log2})
folder = tempfile.mkdtemp(prefix="sweepgen-bench-")
try:
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t0 = time.perf_counter()
    report = RawDriver().deliver(table, Delivery(folder, options={{"name": "big"}}))
    seconds = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
finally:
    shutil.rmtree(folder)
print(json.dumps({{"before_imports_kib": before_imports, "before_kib": before, "after_kib": after,
                  "bytes": report["bytes"], "seconds": seconds}}))
"""


def memory(key: str, log2: int) -> dict:
    import os

    here = os.path.dirname(os.path.abspath(__file__))
    code = CHILD.format(here=here, key=key, log2=log2)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    doc = json.loads(out.stdout.strip().splitlines()[-1])
    doc["rise_mib"] = (doc["after_kib"] - doc["before_kib"]) / 1024      # ru_maxrss is in KiB on Linux
    doc["rise_from_interpreter_mib"] = (doc["after_kib"] - doc["before_imports_kib"]) / 1024
    return doc


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--scenario", action="append", default=None,
                    help="built-in scenario key (repeatable; default: all three demo scenarios)")
    ap.add_argument("--log2", type=int, default=24, help="samples for the throughput run, as a power of two")
    ap.add_argument("--memory-log2", type=int, default=26, help="samples exported in the memory run")
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args(argv)
    keys = args.scenario or ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"]
    # first, while this process is still small: Linux keeps ru_maxrss across fork and exec, so a
    # child started by a big parent would report the parent's peak
    m = memory(keys[0], args.memory_log2)
    for key in keys:
        r = throughput(key, args.log2, args.repeat)
        print(f"{key}: render {r['render'] / 1e6:.1f} MSa/s, plain NumPy polynomial {r['baseline'] / 1e6:.1f} "
              f"MSa/s, ratio {r['ratio']:.2f} (aim >= 0.5; 2^{args.log2} samples, chunks of {r['chunk']}, "
              f"chain {r['chain']})")
    print(f"export of 2^{args.memory_log2} samples ({m['bytes'] / 2**20:.0f} MiB, {keys[0]}, raw) in "
          f"{m['seconds']:.1f} s: peak RSS {m['rise_mib']:.1f} MiB above the state before the export "
          f"(aim < 64 MiB; {m['before_kib'] / 1024:.0f} MiB then); {m['rise_from_interpreter_mib']:.1f} MiB "
          f"above the bare interpreter, imports included")


if __name__ == "__main__":
    main()
