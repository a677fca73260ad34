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

import bisect
from dataclasses import dataclass

import numpy as np

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
    """Optical detuning (Hz) versus time over one repeating period.

    ``poly`` is the piecewise polynomial over one period: a
    ``scipy.interpolate.PPoly``, or the pair ``(breakpoints, coefficients)`` in
    its layout (``c[m, k]`` of piece ``k`` in powers of ``t − x[k]``, highest
    first). The schedule evaluates it itself, in PPoly's own order of
    operations (the same numbers), and builds the PPoly (:attr:`poly`, the
    import of :mod:`scipy.interpolate` with it) only for those who ask.
    """

    def __init__(self, segments, poly, period: float, start_detuning: float, end_detuning: float):
        self.segments = tuple(segments)
        x, c = poly if isinstance(poly, tuple) else (poly.x, poly.c)
        self._poly = None if isinstance(poly, tuple) else poly
        self._x = np.ascontiguousarray(x, dtype=float)
        self._c = np.ascontiguousarray(c, dtype=float)
        # the derivative's coefficients, as PPoly.derivative makes them
        order = self._c.shape[0]
        self._dc = (self._c[:-1] * np.arange(order - 1, 0, -1)[:, None] if order > 1
                    else np.zeros((1, self._c.shape[1])))
        self.period = float(period)
        self.start_detuning = float(start_detuning)
        self.end_detuning = float(end_detuning)
        self._scalars = {}

    @property
    def poly(self):
        """The piecewise polynomial as a ``scipy.interpolate.PPoly`` (made on first use)."""
        if self._poly is None:
            from scipy.interpolate import PPoly

            self._poly = PPoly(self._c, self._x, extrapolate=True)
        return self._poly

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
        knots = tr.time + t0
        for i, piece in enumerate(_hermite(knots, tr.detuning, tr.chirp_rate).T):
            xs.append((knots[i], knots[i + 1]))
            cs.append(piece)
        const(t1, t2, d1)
        if ch.return_time > 0:
            span = d0 - d1
            T = ch.return_time
            xs.append((t2, t3))
            cs.append(np.array([-2.0 * span / T ** 3, 3.0 * span / T ** 2, 0.0, d1]))
        const(t3, ch.period, d0)
        breaks = np.array([x[0] for x in xs] + [xs[-1][1]])
        if not np.all(np.diff(breaks) > 0):
            raise PlanError("the planned sweep's pieces do not follow one another in time",
                            file=str(plan.scenario.path), key="chirp")
        poly = (breaks, np.stack(cs, axis=1))
        segments = [Segment("rest", 0.0, t0), Segment("chirp", t0, t1), Segment("hold", t1, t2),
                    Segment("return", t2, t3), Segment("rest", t3, ch.period)]
        return cls([s for s in segments if s.end > s.start], poly, ch.period, d0, d1)

    # -- evaluation --------------------------------------------------------------
    def _wrap(self, t):
        t = np.asarray(t, dtype=float)
        return np.mod(t, self.period)

    def detuning(self, t):
        """Detuning in Hz at times ``t`` (s, any real values; the schedule repeats); a float for a float."""
        return self._evaluate(0, t)

    __call__ = detuning

    def sampled(self, sample_rate: float) -> "SampledPolynomial":
        """The detuning at the instants ``t_i = i / sample_rate``, chunk by chunk (see
        :class:`SampledPolynomial`)."""
        return SampledPolynomial(self._x, self._c, sample_rate, self.period)

    def chirp_rate(self, t):
        """The chirp rate dΔ/dt in Hz/s at times ``t``."""
        return self._evaluate(1, t)

    def _evaluate(self, order: int, t):
        """The detuning (``order`` 0) or its derivative (1) at times ``t`` (wrapped into the period),
        summed as PPoly sums them: from the constant term up, the powers of ``t − x[k]`` built by
        multiplication."""
        x, c = self._x, (self._c, self._dc)[order]
        if isinstance(t, (float, int)) and not isinstance(t, bool):
            breaks, pieces = self._scalar_pieces(order)
            tw = float(t) % self.period
            k = min(max(bisect.bisect_right(breaks, tw) - 1, 0), len(breaks) - 2)
            s = tw - breaks[k]
            *higher, value = pieces[k]
            z = 1.0
            for coefficient in reversed(higher):
                z *= s
                value = value + coefficient * z
            return np.float64(value)
        tw = self._wrap(t)
        k = np.clip(np.searchsorted(x, tw, side="right") - 1, 0, len(x) - 2)
        s = tw - x[k]
        value, z = c[-1, k], np.ones_like(s)
        for m in range(c.shape[0] - 2, -1, -1):
            z = z * s
            value = value + c[m, k] * z
        return value

    def _scalar_pieces(self, order: int):
        """``(breakpoints, pieces)`` as Python floats, for one time at a time (made once)."""
        if order not in self._scalars:
            c = (self._c, self._dc)[order]
            self._scalars[order] = (self._x.tolist(), [tuple(piece) for piece in c.T.tolist()])
        return self._scalars[order]

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
            best = max(best, float(np.max(np.abs(self.chirp_rate(t)))))
        return best

    @property
    def breakpoints(self) -> np.ndarray:
        """Piece boundaries of the polynomial (s)."""
        return self._x

    @property
    def coefficients(self) -> np.ndarray:
        """Coefficients ``c[k, i]`` of piece i in powers of (t - x[i]), highest first (as in PPoly)."""
        return self._c

    @property
    def derivative_coefficients(self) -> np.ndarray:
        """The chirp rate's coefficients, in the layout of :attr:`coefficients`."""
        return self._dc


class SampledPolynomial:
    """A piecewise polynomial of one period at the instants ``t_i = i / sample_rate``, chunk by chunk.

    The polynomial is kept as ``scipy.interpolate.PPoly`` keeps it: breakpoints
    ``x`` and coefficients ``c[m, k]`` of piece ``k`` in powers of ``t − x[k]``,
    highest first; piece ``k`` covers ``[x[k], x[k+1])``, the first and last
    pieces extend beyond the ends. Times at or past ``period`` wrap around it.

    Consecutive samples cover few pieces: they are located once per block of
    :attr:`BLOCK` samples (``searchsorted`` on the breakpoints), then each piece
    is a polynomial with scalar coefficients, evaluated by Horner's rule in
    place, with no gather of coefficients per sample. A block that covers more
    than :attr:`MAX_PIECES` pieces gathers them per sample instead, which is
    then cheaper; both give the same numbers.
    """

    MAX_PIECES = 16
    #: samples evaluated at a time (their temporaries, 256 KiB each, stay in the processor's cache)
    BLOCK = 1 << 15

    def __init__(self, x, c, sample_rate: float, period: float):
        self.x = np.ascontiguousarray(x, dtype=float)
        self.c = np.ascontiguousarray(c, dtype=float)
        self.sample_rate = float(sample_rate)
        self.period = float(period)
        self._last = len(self.x) - 2

    def __call__(self, start: int, stop: int, out=None) -> np.ndarray:
        """Values at samples ``start .. stop − 1`` (written into ``out`` when given), a block of
        :attr:`BLOCK` samples at a time."""
        out = np.empty(max(stop - start, 0)) if out is None else out
        for a in range(start, stop, self.BLOCK):
            b = min(a + self.BLOCK, stop)
            self._block(a, b, out[a - start:b - start])
        return out

    def _block(self, start: int, stop: int, out) -> None:
        t = np.arange(start, stop, dtype=float)
        t /= self.sample_rate
        wrap = int(np.searchsorted(t, self.period))
        self._sorted(t[:wrap], out[:wrap])
        if wrap < t.size:                     # past the period: increasing again if within the next one
            evaluate = self._sorted if t[-1] < 2.0 * self.period else self._gathered
            evaluate(np.mod(t[wrap:], self.period), out[wrap:])

    def _piece(self, t: float) -> int:
        return min(max(int(np.searchsorted(self.x, t, side="right")) - 1, 0), self._last)

    def _sorted(self, t, out) -> None:
        """Values at increasing times ``t`` into ``out``; ``t`` is overwritten."""
        if t.size == 0:
            return
        x, c = self.x, self.c
        k0, k1 = self._piece(t[0]), self._piece(t[-1])
        if k1 - k0 > self.MAX_PIECES:
            self._gathered(t, out)
            return
        bounds = [0, *np.searchsorted(t, x[k0 + 1:k1 + 1]).tolist(), t.size]
        for k, a, b in zip(range(k0, k1 + 1), bounds, bounds[1:]):
            if b <= a:
                continue
            dt, y = t[a:b], out[a:b]
            dt -= x[k]
            if c.shape[0] == 1:
                y.fill(c[0, k])
                continue
            np.multiply(dt, c[0, k], out=y)
            y += c[1, k]
            for m in range(2, c.shape[0]):
                y *= dt
                y += c[m, k]

    def _gathered(self, t, out) -> None:
        """Values at any times ``t`` into ``out``, each sample's piece found and its coefficients
        gathered; ``t`` is overwritten."""
        x, c = self.x, self.c
        k = np.clip(np.searchsorted(x, t, side="right") - 1, 0, self._last)
        t -= x[k]
        out[:] = c[0, k]
        for m in range(1, c.shape[0]):
            out *= t
            out += c[m, k]


def _hermite(x, y, slope):
    """Coefficients of the cubic Hermite pieces through ``(x, y)`` with derivatives ``slope``, in
    PPoly's layout: the arithmetic of ``scipy.interpolate.CubicHermiteSpline``, to the last bit."""
    dx = np.diff(x)
    secant = np.diff(y) / dx
    t = (slope[:-1] + slope[1:] - 2 * secant) / dx
    return np.stack((t / dx, (secant - slope[:-1]) / dx - t, slope[:-1], y[:-1]))
