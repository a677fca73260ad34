"""The sweep over one period, as segments of a piecewise polynomial.

Every later stage (tuning chain, checker, renderer, simulation) reads the sweep
through :class:`Schedule` only. Over one period (time 0 = the trigger; a pulsed
source fires at ``pulse_time``) the detuning is:

* ``rest``: the start detuning until the chirp starts;
* ``chirp``: the planned sweep (cubic Hermite pieces of the integrated
  trajectory, exact for uniform light where the sweep is a straight line);
* ``hold``: the end detuning;
* ``return``: a smooth step back to the start detuning, ``3x² - 2x³`` with
  ``x = τ/T_return`` (zero slope at both ends);
* ``rest``: the start detuning until the period ends.

The schedule is periodic: ``detuning(t)`` takes any real times.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicHermiteSpline, PPoly

from sweepgen.errors import PlanError


@dataclass(frozen=True)
class Segment:
    kind: str      # "rest" | "chirp" | "hold" | "return"
    start: float   # s, on the period's axis
    end: float     # s

    @property
    def duration(self) -> float:
        return self.end - self.start


class Schedule:
    """Optical detuning (Hz) versus time over one repeating period."""

    def __init__(self, segments, poly: PPoly, period: float, start_detuning: float, end_detuning: float):
        self.segments = tuple(segments)
        self.poly = poly
        self.period = float(period)
        self.start_detuning = float(start_detuning)
        self.end_detuning = float(end_detuning)
        self._chirp_rate = poly.derivative()

    # -- construction ------------------------------------------------------------
    @classmethod
    def from_plan(cls, plan) -> "Schedule":
        ch = plan.scenario.chirp
        tr = plan.trajectory
        t0 = plan.chirp_start
        t1 = t0 + plan.chirp_duration
        t2 = t1 + ch.hold
        t3 = t2 + ch.return_time
        if t3 > ch.period * (1 + 1e-12):
            raise PlanError(
                f"one period ({ch.period * 1e3:.4g} ms) is shorter than chirp start + chirp + hold + return "
                f"({t0 * 1e3:.4g} + {plan.chirp_duration * 1e3:.4g} + {ch.hold * 1e3:.4g} + "
                f"{ch.return_time * 1e3:.4g} = {t3 * 1e3:.4g} ms); lengthen chirp.period or shorten the others",
                file=str(plan.scenario.path), key="chirp.period")
        d0, d1 = plan.start_detuning, plan.end_detuning
        xs, cs = [], []

        def const(a, b, value):
            if b > a:
                xs.append((a, b))
                cs.append(np.array([0.0, 0.0, 0.0, value]))

        const(0.0, t0, d0)
        chirp = CubicHermiteSpline(tr.time + t0, tr.detuning, tr.chirp_rate)
        for i in range(len(chirp.x) - 1):
            xs.append((chirp.x[i], chirp.x[i + 1]))
            cs.append(chirp.c[:, i].copy())
        const(t1, t2, d1)
        if ch.return_time > 0:
            span = d0 - d1
            T = ch.return_time
            xs.append((t2, t3))
            cs.append(np.array([-2.0 * span / T ** 3, 3.0 * span / T ** 2, 0.0, d1]))
        const(t3, ch.period, d0)
        breaks = np.array([x[0] for x in xs] + [xs[-1][1]])
        coeffs = np.stack(cs, axis=1)
        poly = PPoly(coeffs, breaks, extrapolate=True)
        segments = [Segment("rest", 0.0, t0), Segment("chirp", t0, t1), Segment("hold", t1, t2),
                    Segment("return", t2, t3), Segment("rest", t3, ch.period)]
        return cls([s for s in segments if s.end > s.start], poly, ch.period, d0, d1)

    # -- evaluation --------------------------------------------------------------
    def _wrap(self, t):
        t = np.asarray(t, dtype=float)
        return np.mod(t, self.period)

    def detuning(self, t):
        """Detuning in Hz at times ``t`` (s, any real values; the schedule repeats)."""
        return self.poly(self._wrap(t))

    __call__ = detuning

    def chirp_rate(self, t):
        """The chirp rate dΔ/dt in Hz/s at times ``t``."""
        return self._chirp_rate(self._wrap(t))

    def segment(self, kind: str) -> Segment | None:
        """The first segment of a kind, or None."""
        for seg in self.segments:
            if seg.kind == kind:
                return seg
        return None

    def kinds(self, t):
        """The segment kind at each time (an array of strings), for masks and plots."""
        t = self._wrap(t)
        out = np.empty(t.shape, dtype=object)
        for seg in self.segments:
            out[(t >= seg.start) & (t < seg.end)] = seg.kind
        out[t >= self.segments[-1].end] = self.segments[-1].kind
        return out

    def max_abs_chirp_rate(self, kind: str | None = None, samples: int = 20001) -> float:
        """Largest |dΔ/dt| over one segment kind (or the whole period)."""
        segs = [s for s in self.segments if kind is None or s.kind == kind]
        best = 0.0
        for seg in segs:
            t = np.linspace(seg.start, seg.end, samples)
            t[-1] = np.nextafter(seg.end, seg.start)
            best = max(best, float(np.max(np.abs(self._chirp_rate(t)))))
        return best

    @property
    def breakpoints(self) -> np.ndarray:
        """Piece boundaries of the polynomial (s)."""
        return self.poly.x

    @property
    def coefficients(self) -> np.ndarray:
        """Coefficients ``c[k, i]`` of piece i in powers of (t - x[i]), highest first (as in PPoly)."""
        return self.poly.c
