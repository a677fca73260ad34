"""Throughput of the atom Monte Carlo against the NumPy normal-random-number floor (run by hand).

The simulation (``sweepgen.simulate.propagate``, the light on, the planned sweep) is
timed on a scenario, and its throughput is counted in atom-steps per second: one
atom (still in flight) advanced by one time step. The floor is NumPy drawing one
standard normal number per atom-step (``Generator.standard_normal`` in blocks of
the run's mean number of atoms in flight), measured in the same run.

A third figure shows what the physics costs in random numbers alone: the very
draws the run asked for (same kinds, same sizes, same order: normals for the
counts and emissions, Poisson counts and exponential clocks of the atoms whose
clock ran out), replayed without any of the simulation's arithmetic. Its ratio
against the floor is the most any implementation that draws these numbers with
NumPy could reach.

The three are interleaved, repeat by repeat, so that a busy machine slows them
alike, and the best of the repeats of each is compared. All three run in this
one thread, so they are timed in processor time (``time.process_time``), which
other work on a shared machine disturbs less than the wall clock.

The step is computed by the default kernel (compiled with numba when it is
installed); ``--kernel numpy`` times the NumPy step instead.

``--cores`` times the whole simulation (:func:`sweepgen.simulate.simulate`,
the plan played, no baselines: one flight per atom) of 10⁵ atoms of every
shipped scenario on all cores against one core (``workers=1``), interleaved,
median of ``--repeat`` rounds after a warm-up round, in wall time (the aim is
>= 1.8 on two cores). The parts, and so the work, are the same either way.

    python tests/benchmarks/bench_simulate.py [--scenario KEY_OR_PATH] [--atoms N] [--repeat N] [--kernel K]
    python tests/benchmarks/bench_simulate.py --cores [--atoms N] [--repeat N]

Prints the throughputs and their ratios (simulation / floor; the issue's aim is >= 0.5 per core).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

import importlib

from sweepgen.planner import plan
from sweepgen.scenario import load_scenario
from sweepgen.simulate import DetuningProgram, draw_atoms, propagate

SCENARIOS = ("rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas")


class Recorder:
    """A ``numpy.random.Generator`` stand-in that records every draw it hands out."""

    def __init__(self, rng):
        self.rng = rng
        self.calls = []

    def _draw(self, name, *args, **kwargs):
        result = getattr(self.rng, name)(*args, **kwargs)
        self.calls.append((name, args, kwargs))
        return result

    def standard_normal(self, *args, **kwargs):
        return self._draw("standard_normal", *args, **kwargs)

    def standard_exponential(self, *args, **kwargs):
        return self._draw("standard_exponential", *args, **kwargs)

    def poisson(self, *args, **kwargs):
        return self._draw("poisson", *args, **kwargs)


def replay(calls, rng) -> float:
    """Seconds to make the recorded draws again."""
    t0 = time.process_time()
    for name, args, kwargs in calls:
        getattr(rng, name)(*args, **kwargs)
    return time.process_time() - t0


def floor_time(block: int, total: int, rng) -> float:
    """Seconds to draw ``total`` normal numbers in blocks of ``block``."""
    block = max(int(block), 1)
    reps = max(total // block, 1)
    t0 = time.process_time()
    for _ in range(reps):
        rng.standard_normal(block)
    return (time.process_time() - t0) * total / (reps * block)


def cores(atoms: int, repeat: int) -> None:
    """Wall time of 10⁵ atoms (``atoms``) of each shipped scenario on all cores against one core."""
    from _interleave import load, medians

    from sweepgen.workers import cores as count

    simulation = importlib.import_module("sweepgen.simulate")
    print(load())
    for key in SCENARIOS:
        sc = load_scenario(key)
        p = plan(sc)

        def timed(workers, sc=sc, p=p):
            t0 = time.perf_counter()
            r = simulation.simulate(sc, atoms=atoms, seed=1, plan=p, baselines=False, workers=workers)
            return {"seconds": time.perf_counter() - t0, "atom_steps": r.flight.atom_steps}

        m = medians({"one core": lambda: timed(1), "all cores": lambda: timed(None)}, repeat)
        one, every = m["one core"]["seconds"], m["all cores"]["seconds"]
        print(f"{key}: {atoms} atoms, {m['one core']['atom_steps']:,.0f} atom-steps, one core {one:6.1f} s, "
              f"all {count()} cores {every:6.1f} s: ratio {one / every:4.2f} (aim >= 1.8 on 2 cores; "
              f"median of {repeat})")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenario", default="rb87-chopped-oven")
    ap.add_argument("--atoms", type=int, default=None, help="default 20000 (10⁵ with --cores)")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--kernel", default=None, help="compiled or numpy (default: compiled when numba is installed)")
    ap.add_argument("--cores", action="store_true", help="all cores against one core, every shipped scenario")
    args = ap.parse_args(argv)
    if args.cores:
        return cores(args.atoms or 100_000, args.repeat)
    args.atoms = args.atoms or 20000

    sc = load_scenario(args.scenario)
    program = DetuningProgram(plan(sc).schedule())
    atoms = draw_atoms(sc, args.atoms, np.random.default_rng(0))
    recorder = Recorder(np.random.default_rng(2))
    flight = propagate(sc, atoms, program, recorder, kernel="numpy")   # the draws the model asks for
    total, steps = flight.atom_steps, flight.steps
    block = total // steps
    rng_other = np.random.default_rng(1)
    sims, floors, draws = [], [], []
    for _ in range(args.repeat):
        t0 = time.process_time()
        again = propagate(sc, atoms, program, np.random.default_rng(2), kernel=args.kernel)
        sims.append(time.process_time() - t0)
        total = again.atom_steps
        floors.append(floor_time(block, total, rng_other))
        draws.append(replay(recorder.calls, rng_other))
    sim, flo, drw = (total / min(x) for x in (sims, floors, draws))
    counts = {}
    for name, a, kw in recorder.calls:
        size = a[0] if a and not isinstance(a[0], np.ndarray) else (a[0].size if a else kw.get("size", 0))
        counts[name] = counts.get(name, 0) + int(np.prod(size))
    per = ", ".join(f"{counts.get(k, 0) / total:.3f} {k.replace('standard_', '')}"
                    for k in ("standard_normal", "poisson", "standard_exponential"))
    print(f"scenario: {sc.title}; step kernel: {again.kernel}")
    print(f"atoms: {args.atoms}, steps: {steps}, atom-steps: {total:,}, mean atoms in flight: {block}")
    print(f"draws per atom-step: {per}")
    print(f"simulation: {sim / 1e6:8.2f} M atom-steps/s  (best of {args.repeat})")
    print(f"floor:      {flo / 1e6:8.2f} M normal draws/s  (one per atom-step, same blocks)")
    print(f"draws only: {drw / 1e6:8.2f} M atom-steps/s  (the NumPy step's own random numbers, nothing else)")
    print(f"ratio:      {sim / flo:8.3f}  (aim >= 0.5; the draws alone would give {drw / flo:.3f})")


if __name__ == "__main__":
    main()
