"""Speed-up of a scan on every core against the same scan in one process (run by hand).

A scan of 16 designs (``chirp.force_fraction`` from 0.45 to 0.75) of 20 000 atoms
each, through :func:`sweepgen.scan.scan`, with ``workers=1`` (every design in
this process, one after the other) and with one worker process per core
(:func:`sweepgen.workers.cores`). The two are interleaved round by round
(``_interleave.medians``) and timed by the wall clock, which is what parallel
work shortens. The rows of both are compared: the same seed gives the same
table on any number of workers.

    python tests/benchmarks/bench_scan.py [--scenario KEY_OR_PATH] [--designs N] [--atoms N] [--repeat N]

Prints both times and the speed-up (the issue's aim: at least 0.85 × the number of cores).
"""

from __future__ import annotations

import argparse
import importlib
import time

from _interleave import medians

from sweepgen import workers

scan = importlib.import_module("sweepgen.scan")     # the package's name ``scan`` is the function


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenario", default="rb87-chopped-oven")
    ap.add_argument("--designs", type=int, default=16)
    ap.add_argument("--atoms", type=int, default=20000)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)

    axis = scan.parse_vary(f"chirp.force_fraction=0.45:0.75:{args.designs}")
    cores = workers.cores()
    rows = {}

    def case(n):
        def run():
            t0 = time.perf_counter()
            rows[n] = scan.scan(args.scenario, [axis], atoms=args.atoms, seed=1, workers=n).rows
            return {"seconds": time.perf_counter() - t0}
        return run

    figures = medians({"one process": case(1), f"{cores} processes": case(cores)}, repeat=args.repeat, warmup=0)
    one, all_ = figures["one process"]["seconds"], figures[f"{cores} processes"]["seconds"]
    print(f"scan of {args.designs} designs x {args.atoms} atoms ({args.scenario}), median of {args.repeat}")
    print(f"  1 process:          {one:8.2f} s")
    print(f"  {cores} processes:        {all_:8.2f} s")
    print(f"  speed-up:           {one / all_:8.2f}  (aim: >= {0.85 * cores:.2f} = 0.85 x {cores} cores)")
    print(f"  same rows:          {rows[1] == rows[cores]}")


if __name__ == "__main__":
    main()
