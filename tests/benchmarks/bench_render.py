"""Render throughput against a fair plain-NumPy kernel (run by hand).

One period of a built-in scenario's sweep is rendered into 2^24 samples (the
rate is set to 2^24 / period, bypassing the generator's limits) and its codes
are iterated chunk by chunk, as a file or instrument driver reads them:
schedule -> tuning chain -> quantisation -> codes of the generator's type.

The baseline, timed in the same run, only evaluates the same piecewise
polynomial (``Schedule.poly``) in plain NumPy, chunk by chunk (chunks of the
renderer's size), the way the renderer has to: the few pieces a chunk covers
are located once per chunk (``searchsorted`` on the breakpoints), then each
piece is a polynomial with scalar coefficients, evaluated by Horner's rule in
place; no per-sample gather of coefficients. The renderer does that and more
(the chain, the codes and their range check), so the aim is a ratio (render /
baseline throughput) of at least 0.5.

Interleaved, median of ``--repeat`` runs each (``_interleave.medians``)::

    python tests/benchmarks/bench_render.py [--scenario KEY ...] [--log2 N] [--repeat N]
"""

from __future__ import annotations

import argparse
import dataclasses
import time

import numpy as np

from _interleave import load, medians


def setup(key: str, count: int):
    """``(schedule, table)``: the scenario's sweep rendered into ``count`` samples per period."""
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
    return schedule, render(playing, digest=sc.digest)


def fair_kernel(poly, count: int, rate: float, size: int) -> float:
    """The piecewise polynomial at ``t_i = i / rate``, chunk by chunk: pieces located once per chunk,
    Horner's rule in place on each; returns a checksum."""
    x, c = poly.x, poly.c
    last = len(x) - 2
    total = 0.0
    y = np.empty(size)
    for start in range(0, count, size):
        t = np.arange(start, min(start + size, count), dtype=float)
        t /= rate
        k0 = min(max(int(np.searchsorted(x, t[0], side="right")) - 1, 0), last)
        k1 = min(max(int(np.searchsorted(x, t[-1], side="right")) - 1, 0), last)
        bounds = [0, *np.searchsorted(t, x[k0 + 1:k1 + 1]).tolist(), t.size]
        for k, (a, b) in enumerate(zip(bounds, bounds[1:]), start=k0):
            dt = t[a:b] - x[k]
            piece = y[a:b]
            piece[:] = c[0, k]
            for m in range(1, c.shape[0]):
                piece *= dt
                piece += c[m, k]
        total += y[0]
    return total


def main(argv=None):
    from sweepgen.table import DEFAULT_CHUNK

    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--scenario", action="append", default=None,
                    help="built-in scenario key (repeatable; default: all three demo scenarios)")
    ap.add_argument("--log2", type=int, default=24, help="samples per period, as a power of two")
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args(argv)
    keys = args.scenario or ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"]
    count = 1 << args.log2
    print(load())
    for key in keys:
        schedule, table = setup(key, count)
        rate = table.info.sample_rate

        def render_codes():
            t0 = time.perf_counter()
            n = sum(len(chunk) for chunk in table.chunks())
            assert n == count
            return {"seconds": time.perf_counter() - t0}

        def kernel():
            t0 = time.perf_counter()
            fair_kernel(schedule.poly, count, rate, DEFAULT_CHUNK)
            return {"seconds": time.perf_counter() - t0}

        m = medians({"render": render_codes, "kernel": kernel}, args.repeat)
        r, k = count / m["render"]["seconds"], count / m["kernel"]["seconds"]
        verdict = "met" if r / k >= 0.5 else "NOT met"
        print(f"{key}: render {r / 1e6:.1f} MSa/s, fair NumPy kernel {k / 1e6:.1f} MSa/s, ratio {r / k:.2f} "
              f"(target >= 0.5: {verdict}; 2^{args.log2} samples, chunks of {DEFAULT_CHUNK}, chain "
              f"{table.info.extra['chain']['evaluation']}, median of {args.repeat})")


if __name__ == "__main__":
    main()
