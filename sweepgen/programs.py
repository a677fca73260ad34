"""The detuning the atoms see, as the simulation asks for it: one value per time step.

Two kinds, one interface (``period``, ``at(t)``, ``extremes(t0, t1)``):

* :class:`DetuningProgram`: the planned schedule (or one constant detuning);
* :class:`SampledProgram`: a detuning sampled on a uniform grid over one period,
  such as the laser's detuning as the hardware plays it (the drive quantised to
  the generator's codes and filtered by the actuator response,
  :func:`sweepgen.response.track`), joined linearly between samples.

Both repeat with their period, so any real time is valid.
"""

from __future__ import annotations

import bisect
from dataclasses import dataclass
import math

import numpy as np

#: the kinds of program tables (:meth:`DetuningProgram.tables`, :meth:`SampledProgram.tables`)
CONSTANT, SCHEDULE, SAMPLED = 0, 1, 2
_NONE, _NONE2 = np.empty(0), np.empty((0, 0))


class DetuningProgram:
    """The detuning seen by the atoms: a schedule, or one constant detuning.

    The simulation asks for one detuning per time step, so a schedule's piecewise
    polynomial (``Schedule.breakpoints`` and ``Schedule.coefficients``, the very
    polynomial behind ``Schedule.detuning``) is evaluated here on Python floats,
    which is much faster for one time at a time (tests check that it agrees with
    ``Schedule.detuning``). The extremes over an interval lie at its ends, at a
    segment boundary inside it, or where the derivative of the polynomial vanishes
    inside it (a chirp need not be monotone when the light gets stronger along the
    path, so those critical times are included among the boundaries).
    """

    def __init__(self, schedule=None, constant: float | None = None):
        if (schedule is None) == (constant is None):
            raise ValueError("give a schedule or a constant detuning")
        self.schedule = schedule
        self.constant = constant
        if schedule is not None:
            self.period = float(schedule.period)
            edges = [x for seg in schedule.segments for x in (seg.start, seg.end)]
            critical = np.asarray(schedule.poly.derivative().roots(extrapolate=False), dtype=float)
            critical = critical[np.isfinite(critical) & (critical > 0) & (critical < self.period)]
            self.bounds = [float(b) for b in np.unique(np.concatenate([edges, critical]))]
            self._bounds2 = self.bounds + [b + self.period for b in self.bounds]
            self._bounds2_parts = [(False, b) for b in self.bounds] + [(True, b) for b in self.bounds]
            self._x = [float(b) for b in schedule.breakpoints]
            coeffs = np.asarray(schedule.coefficients, dtype=float)
            self._c = [tuple(float(c) for c in coeffs[:, i]) for i in range(coeffs.shape[1])]

    def tables(self) -> tuple:
        """The program as plain numbers and arrays, for the compiled flight (:func:`sweepgen._kernel.run_steps`):
        ``(kind, period, constant, breakpoints, coefficients, boundaries twice, samples, block minima,
        block maxima, block)`` (the ones a kind does not use are empty)."""
        if self.schedule is None:
            return (CONSTANT, 1.0, float(self.constant), _NONE, _NONE2, _NONE, _NONE, _NONE, _NONE, 1)
        return (SCHEDULE, self.period, 0.0, np.array(self._x), np.array(self._c, dtype=float),
                np.array(self._bounds2), _NONE, _NONE, _NONE, 1)

    @classmethod
    def fixed(cls, detuning: float) -> "DetuningProgram":
        return cls(constant=float(detuning))

    def at(self, t: float) -> float:
        """Detuning (Hz) at time ``t`` (s, any real value: the schedule repeats)."""
        if self.schedule is None:
            return self.constant
        tw = t % self.period
        x = self._x
        i = bisect.bisect_right(x, tw) - 1
        if i < 0:
            i = 0
        elif i >= len(self._c):
            i = len(self._c) - 1
        dx = tw - x[i]
        value = 0.0
        for c in self._c[i]:
            value = value * dx + c
        return value

    def extremes(self, t0: float, t1: float) -> tuple[float, float]:
        """Smallest and largest detuning over ``[t0, t1]``."""
        if self.schedule is None:
            return self.constant, self.constant
        P = self.period
        a, b = self.at(t0), self.at(t1)
        lo, hi = min(a, b), max(a, b)
        if t1 - t0 >= P:
            times = list(self.bounds)
        else:
            # the boundaries strictly inside (t0, t1), found by bisection in this period and the next
            k0 = math.floor(t0 / P) * P
            b2 = self._bounds2
            i = max(bisect.bisect_left(b2, t0 - k0) - 1, 0)
            j = bisect.bisect_right(b2, t1 - k0) + 1
            times = []
            for nxt, bd in self._bounds2_parts[i:j]:
                tb = ((k0 + P) if nxt else k0) + bd
                if t0 < tb < t1:
                    times.append(tb)
        for tb in times:
            # both sides of a boundary (the periodic wrap at P may be a jump)
            for tt in (tb, math.nextafter(tb, -math.inf)):
                d = self.at(tt)
                lo, hi = min(lo, d), max(hi, d)
        return lo, hi


class SampledProgram:
    """A periodic detuning given at ``n`` uniform samples ``t_i = i·period/n``, linear in between.

    The extremes over an interval are those of its end values and of the samples
    strictly inside it (a piecewise-linear function takes its extremes at its
    nodes); blocks of :attr:`BLOCK` samples keep their own extremes so that a long
    interval costs a few array reductions.
    """

    BLOCK = 64

    def __init__(self, detuning, period: float):
        self.values = np.asarray(detuning, dtype=float)
        if self.values.ndim != 1 or self.values.size < 2:
            raise ValueError("expected at least two samples")
        self.period = float(period)
        self.n = self.values.size
        self.dt = self.period / self.n
        pad = (-self.n) % self.BLOCK
        padded = np.concatenate([self.values, np.full(pad, self.values[-1])])
        blocks = padded.reshape(-1, self.BLOCK)
        self._bmin, self._bmax = blocks.min(axis=1), blocks.max(axis=1)
        self._list = self.values.tolist()

    def later(self, delay: float) -> "SampledProgram":
        """The same detuning played ``delay`` later (s; periodic): sample ``i`` of the result is this
        program at ``i·period/n − delay``, joined linearly as before. A delay of whole samples moves the
        samples exactly; otherwise the result's samples lie on this program's lines, so the two differ only
        within a sample of a kink, by less than one sample's step."""
        if delay % self.period == 0.0:
            return self
        whole = round(delay / self.dt)
        if abs(delay / self.dt - whole) < 1e-9:
            return SampledProgram(np.roll(self.values, whole % self.n), self.period)
        t = (np.arange(self.n) * self.dt - delay) % self.period
        nodes = np.arange(self.n + 1) * self.dt
        return SampledProgram(np.interp(t, nodes, np.append(self.values, self.values[0])), self.period)

    def tables(self) -> tuple:
        """The program as plain numbers and arrays (:meth:`DetuningProgram.tables`)."""
        return (SAMPLED, self.period, 0.0, _NONE, _NONE2, _NONE, self.values, self._bmin, self._bmax, self.BLOCK)

    def at(self, t: float) -> float:
        """Detuning (Hz) at time ``t`` (s, any real value)."""
        u = (t % self.period) / self.dt
        i = int(u)
        if i >= self.n:
            i = self.n - 1
        frac = u - i
        a = self._list[i]
        b = self._list[i + 1] if i + 1 < self.n else self._list[0]
        return a + (b - a) * frac

    def extremes(self, t0: float, t1: float) -> tuple[float, float]:
        """Smallest and largest detuning over ``[t0, t1]``."""
        a, b = self.at(t0), self.at(t1)
        lo, hi = min(a, b), max(a, b)
        i0 = math.floor(t0 / self.dt) + 1           # first sample strictly after t0
        i1 = math.ceil(t1 / self.dt) - 1            # last sample strictly before t1
        if i1 < i0:
            return lo, hi
        if i1 - i0 + 1 >= self.n:
            return min(lo, float(self._bmin.min())), max(hi, float(self._bmax.max()))
        j0, j1 = i0 % self.n, i1 % self.n
        parts = [(j0, j1)] if j0 <= j1 else [(j0, self.n - 1), (0, j1)]
        for p, q in parts:
            mn, mx = self._range(p, q)
            lo, hi = min(lo, mn), max(hi, mx)
        return lo, hi

    def _range(self, p: int, q: int) -> tuple[float, float]:
        """Extremes of samples ``p..q`` (inclusive, ``p <= q``)."""
        B = self.BLOCK
        bp, bq = -(-p // B), (q + 1) // B            # whole blocks bp .. bq-1
        if bq <= bp:
            seg = self.values[p:q + 1]
            return float(seg.min()), float(seg.max())
        mn = float(self._bmin[bp:bq].min())
        mx = float(self._bmax[bp:bq].max())
        for seg in (self.values[p:bp * B], self.values[bq * B:q + 1]):
            if seg.size:
                mn, mx = min(mn, float(seg.min())), max(mx, float(seg.max()))
        return mn, mx


@dataclass(frozen=True)
class Played:
    """Which detuning the atoms see: the hardware's (through chain, codes and actuator) or the plan's."""

    program: object                 # DetuningProgram or SampledProgram
    hardware: bool                  # True: the detuning the hardware plays
    reason: str                     # why the plan is played, or what plays the hardware
    tracking_error: float | None = None   # Hz, largest |played − planned| during the chirp
    sample_rate: float | None = None      # Sa/s of the played table
    failed_rules: tuple = ()              # the playback's check rules that fail (what is played breaks them)

    def to_json(self) -> dict:
        return {"detuning": "hardware" if self.hardware else "plan", "reason": self.reason,
                "tracking_error_max": self.tracking_error, "sample_rate": self.sample_rate,
                "failed_rules": list(self.failed_rules)}
