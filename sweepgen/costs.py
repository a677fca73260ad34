"""What a simulation will cost before it starts: its memory, and its time on this computer.

The Monte Carlo (:func:`sweepgen.simulate.simulate`) keeps a few arrays per
atom, for the run with the sweep and for its two baselines, so its memory grows
linearly with the number of atoms: :data:`BYTES_PER_ATOM`, measured with
``tracemalloc`` on the shipped scenarios (400 to 420 bytes per atom at 16 000
atoms; ``tests/benchmarks/bench_simulation_memory.py`` measures it again) and
rounded up. Its time depends on the scenario (photons per atom, the time step)
and the computer, so it is measured: a run of :data:`PILOT_ATOMS` atoms, scaled
linearly. The cost per atom falls as the number of atoms grows (each time step
has a fixed part), so the scaled time is an upper estimate.
"""

from __future__ import annotations

import os
import time

#: default number of atoms (a few seconds for a shipped pulsed scenario); here, not in simulate.py,
#: so that ``sweepgen simulate --help`` shows it without importing NumPy
DEFAULT_ATOMS = 10000
#: bytes of working memory per simulated atom (measured 400-420, see the module doc)
BYTES_PER_ATOM = 500
#: memory the simulation needs whatever the number of atoms (the schedule, histograms, ...)
BASE_BYTES = 50 << 20
#: atoms of the short run that measures the time per atom
PILOT_ATOMS = 2000


def simulation_memory(atoms: int) -> int:
    """Bytes a simulation of ``atoms`` atoms needs (an estimate, see the module doc)."""
    return BASE_BYTES + BYTES_PER_ATOM * int(atoms)


def physical_memory() -> int | None:
    """Bytes of memory of this computer (None where the system does not say)."""
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (AttributeError, ValueError, OSError):
        return None


def most_atoms(memory: int) -> int:
    """The most atoms whose simulation fits in ``memory`` bytes."""
    return max((int(memory) - BASE_BYTES) // BYTES_PER_ATOM, 0)


def simulation_time(pilot, atoms: int) -> float:
    """Seconds a simulation of ``atoms`` atoms takes at most on this computer, from a run of
    :data:`PILOT_ATOMS` atoms scaled linearly (an upper estimate, see the module doc);
    ``pilot(n)`` runs the simulation with ``n`` atoms (:func:`sweepgen.simulate.simulate`)."""
    start = time.perf_counter()
    pilot(PILOT_ATOMS)
    return (time.perf_counter() - start) * int(atoms) / PILOT_ATOMS
