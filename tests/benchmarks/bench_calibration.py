"""A 100 000-point calibration, against plain NumPy on the same numbers.

Run by hand: ``python tests/benchmarks/bench_calibration.py``. Measures, in one
run on one machine (demo data, invented numbers):

* loading a laser profile whose calibrated stage lists 100 000 measured points
  (TOML parsing, units, fitting) against ``float()`` on the same number texts
  plus one ``numpy.polynomial.Polynomial.fit`` (the baseline);
* fitting the same points from a CSV file as ``sweepgen calibrate`` does
  (cross-validated degree, outliers, hysteresis, the new profile written);
* loading the fitted profile and mapping 100 000 detunings to drives and back:
  the cost of a calibrated stage once fitted (target: well under 1 s).
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import numpy as np

N = 100_000


def _profile_text(u, x) -> str:
    head = ('title = "bench"\n[limits]\nmode_hop_free = "1.2 GHz"\nmax_chirp_rate = "3 GHz/ms"\n'
            'input_min = "-5 V"\ninput_max = "5 V"\n[[chain]]\nstage = "calibrated"\n')
    return (head + "drive = [" + ",".join(f'"{v:.6f} V"' for v in u) + "]\n"
            + "detuning = [" + ",".join(f'"{v / 1e6:.6f} MHz"' for v in x) + "]\n")


def timed(func):
    start = time.perf_counter()
    out = func()
    return time.perf_counter() - start, out


def main() -> None:
    from numpy.polynomial import Polynomial

    from sweepgen import units
    from sweepgen.laser import load_laser
    from sweepgen.recalibration import Request, calibrate, write

    units.registry()                                    # pint's import is not the calibration's cost
    rng = np.random.default_rng(1)
    u = np.linspace(-5, 5, N)
    x = -180e6 + 40e6 * u + 0.3e6 * u ** 2 + rng.normal(0, 0.2e6, N)
    folder = Path(tempfile.mkdtemp())
    points = folder / "points.toml"
    points.write_text(_profile_text(u, x))
    csv = folder / "points.csv"
    csv.write_text("drive (V),detuning (MHz)\n" + "".join(f"{a:.6f},{b / 1e6:.6f}\n" for a, b in zip(u, x)))
    texts_u = [f"{v:.6f}" for v in u]
    texts_x = [f"{v / 1e6:.6f}" for v in x]
    base, _ = timed(lambda: Polynomial.fit(np.array([float(t) for t in texts_u]),
                                           np.array([float(t) for t in texts_x]) * 1e6, 3))
    load_points, _ = timed(lambda: load_laser(str(points)))
    fit_time, result = timed(lambda: calibrate(Request(str(csv), "demo-ecdl-piezo", "1", output=str(folder / "fit.toml"))))
    write(result)
    load_fit, laser = timed(lambda: load_laser(str(folder / "fit.toml")))
    det = np.linspace(-300e6, -60e6, N)
    use, _ = timed(lambda: laser.chain.to_detuning(laser.chain.to_drive(det)))
    print(f"baseline: float() + Polynomial.fit of {N} points   {base * 1e3:8.1f} ms")
    print(f"profile with {N} points: load and fit            {load_points * 1e3:8.1f} ms  ratio {load_points / base:.1f}")
    print(f"calibrate from CSV (CV degree, outliers, write)   {fit_time * 1e3:8.1f} ms  ratio {fit_time / base:.1f}")
    print(f"fitted profile: load                              {load_fit * 1e3:8.1f} ms")
    print(f"fitted profile: {N} detunings -> drive -> back   {use * 1e3:8.1f} ms")
    print(f"once fitted, load + map: {(load_fit + use) * 1e3:.1f} ms (target: well under 1000 ms)")


if __name__ == "__main__":
    main()
