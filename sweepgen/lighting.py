"""When each light shines: the levels the scenario's gates set in time.

A gate channel (:mod:`sweepgen.channels`) lets its lights through at ``level`` (a
fraction of full intensity) from its opening to its closing moment
(:func:`sweepgen.timing.gate_window`) and keeps them dark otherwise, every period,
as its table plays it: the window clipped to the period
(:func:`sweepgen.playback.level_schedule`). A light that no gate switches shines
at full intensity all the time; a light behind several gates gets the product of
their levels (each is a modulator in its path). A gate whose moment does not
exist in the period (a continuous beam has no pulse) never opens: its table is
not made, and the checker's ``NAME.window`` rule fails it.

The saturation parameter is the intensity over the saturation intensity
(``s = I/I_sat``), so a light at level ``L`` has the saturation ``L·s``: the
simulation (:mod:`sweepgen._flight`) and the follow-up after the chirp
(:mod:`sweepgen.afterchirp`) scale each light by its level, and end their steps
at the edges where a level changes; the beam overlap and the checker's
``deceleration`` rule count on the slowing light's lowest level during the chirp
(:func:`chirp_level`); the survival estimate (:mod:`sweepgen.survival`) takes
each light at its level along the design path.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sweepgen.channels import MAIN_LIGHT
from sweepgen.timing import gate_window, moments

#: s: a time this close before an edge already counts as past it (a step that ends at an edge lands on it
#: only to rounding), far below any step of the simulation
EDGE_EPS = 1e-12


@dataclass(frozen=True)
class LightLevels:
    """Each light's level (fraction of full intensity) over one period, piecewise constant.

    ``levels[i, j]`` is light ``names[i]``'s level from ``edges[j]`` to the next
    edge (the last one until the first edge of the next period); with no edge,
    ``levels[:, 0]`` holds all the time. The main light is ``names[0]``.
    """

    names: tuple
    period: float
    edges: np.ndarray
    levels: np.ndarray

    @classmethod
    def full(cls, names=(MAIN_LIGHT,), period: float = 1.0) -> "LightLevels":
        """Every light at full intensity all the time (no gate)."""
        return cls(tuple(names), float(period), np.empty(0), np.ones((len(names), 1)))

    @property
    def gated(self) -> bool:
        """Whether any light is ever below full intensity."""
        return bool(np.any(self.levels != 1.0))

    def segment(self, t: float) -> int:
        """The index ``j`` of the stretch holding the instant just after ``t``."""
        if self.edges.size == 0:
            return 0
        tw = (t + EDGE_EPS) % self.period
        return (int(np.searchsorted(self.edges, tw, side="right")) - 1) % self.edges.size

    def at(self, t: float) -> np.ndarray:
        """Every light's level just after ``t`` (s, trigger axis), in the order of ``names``."""
        return self.levels[:, self.segment(t)]

    def along(self, times, light: int = 0) -> np.ndarray:
        """Light ``names[light]``'s level just after each of ``times`` (an array)."""
        times = np.asarray(times, dtype=float)
        if self.edges.size == 0:
            return np.full(times.shape, float(self.levels[light, 0]))
        tw = (times + EDGE_EPS) % self.period
        j = (np.searchsorted(self.edges, tw, side="right") - 1) % self.edges.size
        return self.levels[light, j]

    def lowest(self, t0: float, t1: float, light: int = 0) -> float:
        """The lowest level of light ``names[light]`` over ``[t0, t1]``."""
        low, t = float(self.at(t0)[light]), t0
        while True:
            t = self.next_edge(t)
            if t >= t1:
                return low
            low = min(low, float(self.at(t)[light]))

    def stretches(self) -> dict:
        """Each light's levels over one period: ``{name: [(start, end, level), ...]}`` (s, trigger axis),
        neighbouring stretches of the same level joined (``simulate --json``'s ``light_levels``)."""
        if self.edges.size == 0:
            return {name: [(0.0, self.period, float(self.levels[i, 0]))] for i, name in enumerate(self.names)}
        starts = [0.0] + list(self.edges)
        ends = list(self.edges) + [self.period]
        out = {}
        for i, name in enumerate(self.names):
            runs = []
            for a, b in zip(starts, ends):
                if b <= a:
                    continue
                level = float(self.at(a)[i])
                if runs and runs[-1][2] == level:
                    runs[-1] = (runs[-1][0], b, level)
                else:
                    runs.append((a, b, level))
            out[name] = runs
        return out

    def next_edge(self, t: float) -> float:
        """The first time after ``t`` at which a level changes (``inf`` when none ever does)."""
        if self.edges.size == 0:
            return math.inf
        u = t + EDGE_EPS
        tw = u % self.period
        k = int(np.searchsorted(self.edges, tw, side="right"))
        return u - tw + (self.edges[k] if k < self.edges.size else self.period + self.edges[0])


def chirp_level(plan) -> float:
    """The slowing light's lowest level during ``plan``'s chirp (1 without a gate): the fraction of its
    intensity the design's force can count on."""
    lv = plan.light_levels
    return lv.lowest(plan.chirp_start, plan.chirp_start + plan.chirp_duration) if lv.gated else 1.0


def light_levels(scenario, plan) -> LightLevels:
    """The levels of the main light and of the scenario's repump lights (in the order of
    ``scenario.repumps``) that its gates set, over one period of ``plan``."""
    names = (MAIN_LIGHT,) + tuple(ch.name for ch in scenario.repumps)
    period = float(scenario.chirp.period)
    when = moments(plan)
    gates = [(ch.gate, _clipped(gate_window(ch.gate, when), period)) for ch in scenario.channels
             if ch.kind == "gate"]
    if not any(light in g.lights for g, _ in gates for light in names):
        return LightLevels.full(names, period)
    cuts = sorted({0.0} | {x for _, w in gates if w is not None for x in w if 0.0 < x < period})
    ends = cuts[1:] + [period]
    levels = np.array([[_level(name, gates, 0.5 * (a + b)) for a, b in zip(cuts, ends)] for name in names])
    change = np.any(levels != np.roll(levels, 1, axis=1), axis=0)     # where a stretch differs from the one before
    if not change.any():
        return LightLevels(names, period, np.empty(0), levels[:, :1].copy())
    return LightLevels(names, period, np.array(cuts)[change], levels[:, change].copy())


def _clipped(window, period: float):
    """A gate's window as its table plays it: within ``[0, period]`` (None: it never opens)."""
    if window is None:
        return None
    a, b = max(window[0], 0.0), min(window[1], period)
    return (a, b) if b > a else None


def _level(light: str, gates, t: float) -> float:
    """The level of ``light`` at ``t`` within the period: the product over the gates that switch it."""
    level = 1.0
    for gate, window in gates:
        if light in gate.lights:
            level *= gate.level if window is not None and window[0] <= t < window[1] else 0.0
    return level
