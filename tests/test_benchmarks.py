"""The benchmarks (tests/benchmarks, run by hand) still run: each at the smallest size, in a child process.

They time nothing here; a benchmark that no longer imports or calls what it
measures (an API renamed under it, say) fails here rather than on the day
someone needs its figure. Each run must end with its ratio line.
"""

import subprocess
import sys
from pathlib import Path

import pytest

BENCHMARKS = Path(__file__).parent / "benchmarks"

RUNS = [
    (["bench_simulate.py", "--atoms", "300", "--repeat", "1"], "ratio:"),
    (["bench_simulate.py", "--cores", "--atoms", "300", "--repeat", "1"], "ratio"),
    (["bench_scan.py", "--designs", "2", "--atoms", "200", "--repeat", "1"], "same rows:          True"),
    (["bench_render.py", "--log2", "12", "--repeat", "1"], "ratio"),
    (["bench_export_memory.py", "--log2", "18", "--repeat", "1"], "export above it"),
    (["bench_startup.py", "--repeat", "1", "--scenario", "rb87-chopped-oven"], "check rb87-chopped-oven"),
    (["bench_upload.py", "--log2", "10", "--repeat", "1"], "ratio"),
    (["bench_calibration.py"], "ratio"),
    (["bench_simulation_memory.py", "--atoms", "1000"], "ratio to BYTES_PER_ATOM"),
    (["study_convergence.py", "--atoms", "1000"], "standard errors"),
]


@pytest.mark.slow
@pytest.mark.parametrize("args, last_words", RUNS, ids=[" ".join(a) for a, _ in RUNS])
def test_benchmark_runs_at_the_smallest_size(args, last_words):
    done = subprocess.run([sys.executable, *args], cwd=BENCHMARKS, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-2000:]
    assert last_words in done.stdout, done.stdout[-2000:]
