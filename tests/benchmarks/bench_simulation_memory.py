"""Memory of the atom Monte Carlo per atom, against the estimate ``simulate`` states before a large run.

``sweepgen simulate --atoms N`` above a million atoms states the memory it expects,
``sweepgen.costs.simulation_memory`` (``BYTES_PER_ATOM`` per atom), and refuses a run that
would need more than half of the computer's memory. This measures the peak of the memory
the simulation allocates (``tracemalloc``, which NumPy reports its arrays to) at two sizes,
so that the fixed part drops out, on each shipped scenario (run by hand):

    python tests/benchmarks/bench_simulation_memory.py [--atoms N]

Prints the measured bytes per atom and its ratio to ``BYTES_PER_ATOM`` (the estimate holds
while the ratio stays below 1).
"""

from __future__ import annotations

import argparse
import tracemalloc

from sweepgen import catalog, costs
from sweepgen.scenario import load_scenario
from sweepgen.simulate import simulate


def peak(scenario, atoms: int) -> int:
    tracemalloc.start()
    try:
        simulate(scenario, atoms=atoms, seed=0)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--atoms", type=int, default=16000)
    args = parser.parse_args()
    small = args.atoms // 4
    for key in catalog.builtin_keys("scenarios"):
        sc = load_scenario(key)
        per_atom = (peak(sc, args.atoms) - peak(sc, small)) / (args.atoms - small)
        print(f"{key:28s} {per_atom:7.0f} B/atom   ratio to BYTES_PER_ATOM ({costs.BYTES_PER_ATOM}): "
              f"{per_atom / costs.BYTES_PER_ATOM:.2f}")


if __name__ == "__main__":
    main()
