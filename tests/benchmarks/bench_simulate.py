"""Throughput of the atom Monte Carlo against the NumPy normal-random-number floor (run by hand).

The simulation (``sweepgen.simulate.propagate``, the light on, the planned sweep) is
timed on a scenario, and its throughput is counted in atom-steps per second: one
atom (still in flight) advanced by one time step. The floor is NumPy drawing one
standard normal number per atom-step (``Generator.standard_normal`` in blocks of
the run's mean number of atoms in flight), measured in the same run, interleaved
with the repeats of the simulation so that a busy machine slows both alike.

    python tests/benchmarks/bench_simulate.py [--scenario KEY_OR_PATH] [--atoms N] [--repeat N]

Prints both throughputs and their ratio (simulation / floor; the issue's aim is >= 0.5).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from sweepgen.planner import plan
from sweepgen.scenario import load_scenario
from sweepgen.simulate import DetuningProgram, draw_atoms, propagate


def floor_rate(block: int, total: int, rng) -> float:
    """Normal draws per second, drawing ``total`` numbers in blocks of ``block``."""
    block = max(int(block), 1)
    reps = max(total // block, 1)
    t0 = time.perf_counter()
    for _ in range(reps):
        rng.standard_normal(block)
    return reps * block / (time.perf_counter() - t0)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenario", default="rb87-chopped-oven")
    ap.add_argument("--atoms", type=int, default=20000)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)

    sc = load_scenario(args.scenario)
    program = DetuningProgram(plan(sc).schedule())
    atoms = draw_atoms(sc, args.atoms, np.random.default_rng(0))
    rng_floor = np.random.default_rng(1)
    sims, floors = [], []
    for i in range(args.repeat):
        t0 = time.perf_counter()
        flight = propagate(sc, atoms, program, np.random.default_rng(2))
        elapsed = time.perf_counter() - t0
        sims.append(flight.atom_steps / elapsed)
        mean_in_flight = flight.atom_steps / flight.steps
        floors.append(floor_rate(mean_in_flight, flight.atom_steps, rng_floor))
    sim, flo = max(sims), max(floors)
    print(f"scenario: {sc.title}")
    print(f"atoms: {args.atoms}, steps: {flight.steps}, atom-steps: {flight.atom_steps:,}, "
          f"mean atoms in flight: {mean_in_flight:.0f}")
    print(f"simulation: {sim / 1e6:8.2f} M atom-steps/s  (best of {args.repeat})")
    print(f"floor:      {flo / 1e6:8.2f} M normal draws/s  (one per atom-step, same blocks)")
    print(f"ratio:      {sim / flo:8.3f}  (aim >= 0.5)")


if __name__ == "__main__":
    main()
