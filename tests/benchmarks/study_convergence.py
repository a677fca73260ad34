"""Convergence study of the simulation's time step (run by hand; minutes of processor time).

Each shipped scenario is simulated with the plan itself played (the default of the core ``simulate``, so
the figures do not depend on a generator profile) at the time step's yardstick
``STEP_FRACTION`` and at half of it, with the same seed, and the statistics the
user reads are compared: the captured fraction, the captured atoms' mean final
velocity and its spread, the turned-back and not-arrived fractions, the
photons per captured atom. Each difference is printed in units of its standard
error (the two runs taken as independent: binomial ``sqrt(f(1-f)/n)`` for a
fraction, ``σ/sqrt(n)`` for a mean, from the fourth moment for a spread, combined in
quadrature), so ``|z| < 2`` for every statistic means halving the step moves
nothing beyond its statistical error.

    python tests/benchmarks/study_convergence.py [--atoms N] [--fraction F] [--scenario KEY ...] [--workers N]
"""

from __future__ import annotations

import argparse
import json
import math
import time

import numpy as np

from sweepgen.scenario import load_scenario
from sweepgen.simulate import STEP_FRACTION, simulate

SCENARIOS = ("rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas")


def statistics(doc: dict) -> dict:
    """``{name: (value, standard error)}`` of the figures compared."""
    n = doc["atoms"]
    f = doc["captured_fraction"]
    n_cap = max(f * n, 1.0)
    sigma = doc["final_velocity_spread"]

    def frac(p):
        return p, math.sqrt(max(p * (1 - p), 1.0 / n) / n)

    return {
        "captured_fraction": frac(f),
        "final_velocity_mean": (doc["final_velocity_mean"], sigma / math.sqrt(n_cap)),
        "final_velocity_spread": (sigma, doc["_spread_error"]),
        "turned_back_fraction": frac(doc["lost_by_reason"]["turned_back"]),
        "not_arrived_fraction": frac(doc["not_arrived_fraction"]),
        "photons_mean": (doc["photons_mean"], doc.get("_photons_sd", math.nan) / math.sqrt(n_cap)),
    }


def spread_error(v) -> float:
    """Standard error of a sample's standard deviation from its fourth moment (no normality assumed):
    ``var(s²) ≈ (μ₄ − σ⁴)/n`` and ``SE(s) ≈ SE(s²)/(2s)`` (the delta method; e.g. Kendall and Stuart,
    *The Advanced Theory of Statistics*, vol. 1, §10.5, recalled section)."""
    if v.size < 4:
        return math.nan
    d = v - v.mean()
    m2, m4 = float(np.mean(d**2)), float(np.mean(d**4))
    return math.sqrt(max(m4 - m2 * m2, 0.0) / v.size) / (2.0 * math.sqrt(m2))


def run(key: str, atoms: int, fraction: float, seed: int, workers) -> dict:
    sc = load_scenario(key)
    t0 = time.perf_counter()
    result = simulate(sc, atoms=atoms, seed=seed, baselines=False, step_fraction=fraction,
                      workers=workers)
    doc = result.to_json()
    cap = result.captured()
    photons = result.flight.photons[cap]
    doc["_photons_sd"] = float(photons.std(ddof=1)) if photons.size > 1 else math.nan
    doc["_spread_error"] = spread_error(result.flight.final_velocity[cap])
    doc["_seconds"] = time.perf_counter() - t0
    return doc


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--atoms", type=int, default=10**6)
    ap.add_argument("--fraction", type=float, default=STEP_FRACTION, help="the coarser step's yardstick")
    ap.add_argument("--seed", type=int, default=11)
    ap.add_argument("--workers", type=int, default=None)
    ap.add_argument("--scenario", nargs="*", default=list(SCENARIOS))
    ap.add_argument("--json", default=None, help="also write the figures to this file")
    args = ap.parse_args(argv)
    report = {}
    for key in args.scenario:
        coarse = run(key, args.atoms, args.fraction, args.seed, args.workers)
        fine = run(key, args.atoms, args.fraction / 2, args.seed, args.workers)
        a, b = statistics(coarse), statistics(fine)
        print(f"{key}: {args.atoms} atoms, step fraction {args.fraction:g} vs {args.fraction / 2:g} "
              f"({coarse['time_step']['atom_steps']:,} vs {fine['time_step']['atom_steps']:,} atom-steps, "
              f"{coarse['_seconds']:.0f} s vs {fine['_seconds']:.0f} s)")
        rows = {}
        for name in a:
            (x, sx), (y, sy) = a[name], b[name]
            z = (y - x) / math.hypot(sx, sy) if math.hypot(sx, sy) > 0 else 0.0
            rows[name] = {"coarse": x, "fine": y, "error": math.hypot(sx, sy), "z": z}
            print(f"  {name:24s} {x:12.6g} {y:12.6g}  difference {y - x:+.3g} = {z:+.2f} standard errors")
        report[key] = {"atoms": args.atoms, "fraction": args.fraction, "statistics": rows,
                       "atom_steps": [coarse["time_step"]["atom_steps"], fine["time_step"]["atom_steps"]]}
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(report, fh, indent=1)


if __name__ == "__main__":
    main()
