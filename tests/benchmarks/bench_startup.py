"""Start-up time of ``sweepgen --help`` against ``python -c "import click"``.

Run by hand: ``python tests/benchmarks/bench_startup.py``. Prints the median of
several runs of each and their ratio (target: at most 1.5). Both are measured
in the same run on the same machine, so the ratio does not depend on its speed.
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import time

RUNS = 15


def median_seconds(argv) -> float:
    times = []
    for _ in range(RUNS):
        start = time.perf_counter()
        subprocess.run(argv, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> None:
    baseline = median_seconds([sys.executable, "-c", "import click"])
    ours = median_seconds([sys.executable, "-m", "sweepgen", "--help"])
    listing = median_seconds([sys.executable, "-m", "sweepgen", "plan", "--help"])
    print(f"python -c 'import click'     {baseline * 1e3:8.1f} ms (baseline)")
    print(f"sweepgen --help              {ours * 1e3:8.1f} ms  ratio {ours / baseline:.2f} (target <= 1.5)")
    print(f"sweepgen plan --help         {listing * 1e3:8.1f} ms  ratio {listing / baseline:.2f}")


if __name__ == "__main__":
    main()
