"""The search for the best design: free keys within bounds, the most atoms, subject to check passing.

The optimiser is SciPy's differential evolution (Storn and Price, *J. Global
Optimization* 11, 341, 1997; :func:`scipy.optimize.differential_evolution`): a
population of designs, bounded, without derivatives, that compares designs only
by rank within each generation, so it copes with an objective that is a count
of atoms (a step function of the keys, with its binomial noise) and with
designs that fail a rule. Every design of a generation is independent: the
population is handed to :func:`sweepgen.workers.run` at once (all local cores or
a Dask scheduler), in a fixed order, so the search does not depend on the number
of workers. Every design flies the same atoms (one seed: common random numbers),
which makes the objective a deterministic function of the keys during the
search.

A design that fails a rule (or cannot exist) is never the answer: its energy is
:data:`FAILING` plus how far its failing rules exceed their limits (the sum of
their negative headrooms), so the population is led back to designs that pass.
The winner is confirmed with a fresh seed and more atoms, beside the starting
design with the same fresh seed; the improvement is reported with its standard
error.

The service functions print nothing and exit nothing; ``sweepgen optimise``
parses, calls and prints (and writes the files, :func:`write`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from sweepgen._json import plain
from sweepgen.errors import InputError
from sweepgen.scan import Base, Design, evaluate, objective_keys, quantity_parts, split_option, written

#: energy of a design that fails a rule (a passing design's energy is ∓ its objective)
FAILING = 1e3
#: energy of a design that cannot exist
INVALID = 1e4
#: energy of a passing design whose objective has no value (no atom captured to average over)
NO_VALUE = 1e2
#: how many of the winner's rules nearest their limits the report names
NEAREST = 3
#: a free key binds when it lies within this fraction of its range from a bound
AT_BOUND = 0.01
#: significant digits of a free key's values
DIGITS = 6
#: a free key without bounds may move between these multiples of its starting value
DEFAULT_SPAN = (0.5, 1.5)


@dataclass(frozen=True)
class Free:
    """A free key: bounds in ``unit`` and its value in the starting design (None when the file has none)."""

    key: str
    low: float
    high: float
    unit: str
    start: float | None

    def value(self, x: float):
        """The value as the file holds it, to :data:`DIGITS` significant digits (the design judged is the
        one written)."""
        return written(float(x), self.unit, DIGITS)

    def to_json(self) -> dict:
        return {"key": self.key, "low": self.low, "high": self.high, "unit": self.unit, "start": self.start}


def dotted(data: dict, key: str):
    """The value of a dotted key in a TOML table, or None."""
    here = data
    for part in key.split("."):
        if not isinstance(here, dict) or part not in here:
            return None
        here = here[part]
    return here


def parse_free(text: str, start: Base, option: str = "free") -> Free:
    """``KEY`` or ``KEY=LOW:HIGH`` → a :class:`Free`; without bounds the key moves between
    :data:`DEFAULT_SPAN` times its starting value (in the file's unit)."""
    from sweepgen.scan import endpoints

    key, rest = split_option(text, option)
    current = dotted(start.data, key)
    at = None
    if current is not None and not isinstance(current, (dict, list, bool)):
        at = quantity_parts(str(current), key, option)
    if rest is None:
        if at is None:
            raise InputError(f"{key}: the scenario gives no number to start from; write {key}=LOW:HIGH", key=option)
        low, high, unit = at[0] * DEFAULT_SPAN[0], at[0] * DEFAULT_SPAN[1], at[1]
    else:
        parts = rest.split(":")
        if len(parts) != 2:
            raise InputError(f"{key}: expected KEY=LOW:HIGH (e.g. chirp.force_fraction=0.4:0.8), got {text!r}",
                             key=option)
        low, high, unit = endpoints(key, parts[0], parts[1], option)
    low, high = min(low, high), max(low, high)
    if not high > low:
        raise InputError(f"{key}: expected LOW below HIGH, got {text!r}", key=option)
    start_value = _in_unit(at, unit, key, option) if at is not None else None
    free = Free(key, low, high, unit, start_value)
    for x in (low, high):
        start.load({key: free.value(x)}, option=option)
    return free


def _in_unit(at, unit: str, key: str, option: str):
    """The starting value ``at`` = (number, its unit) in ``unit``."""
    from sweepgen import units

    number, its = at
    if its == unit or not unit or not its:
        return number
    try:
        return units.parse(f"{number!r} {its}", unit)
    except InputError as exc:
        raise InputError(f"{key}: {exc.detail}", key=option) from None


# ---------------------------------------------------------------------------------------------
# The objective
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Goal:
    """What the search aims at: a number of the simulation's JSON, made larger (or smaller)."""

    key: str = "captured_fraction"
    minimise: bool = False

    def check(self) -> "Goal":
        if self.key not in objective_keys():
            raise InputError(f"expected one of {', '.join(objective_keys())}, got {self.key!r}", key="objective")
        return self

    def value(self, row: dict):
        """The objective of a simulated row (None where the simulation has no such number)."""
        if self.key in row and self.key != "simulation":
            return row.get(self.key)
        return (row.get("simulation") or {}).get(self.key)

    def energy(self, row: dict) -> float:
        """What differential evolution minimises: ∓ the objective of a passing design, else a penalty."""
        if row["verdict"] == "invalid":
            return INVALID
        if row["verdict"] == "fail":
            return FAILING + sum(-h for r, h in row["headrooms"].items() if r in row["failing_rules"] and h < 0)
        v = self.value(row)
        if v is None:
            return NO_VALUE
        return float(v) if self.minimise else -float(v)


# ---------------------------------------------------------------------------------------------
# The search
# ---------------------------------------------------------------------------------------------
@dataclass
class Search:
    """A search in progress: the designs evaluated so far (in the order the optimiser asked)."""

    start: Base
    frees: list
    goal: Goal
    atoms: int
    seed: int
    workers: int | None = None
    cluster: str | None = None
    progress: object = None
    budget: int = 0
    history: list = field(default_factory=list)

    def design(self, x, *, atoms=None, seed=None) -> Design:
        values = {f.key: f.value(v) for f, v in zip(self.frees, x)}
        return Design(self.start.path, self.start.data, values, atoms or self.atoms,
                      self.seed if seed is None else seed, simulate_failing=False)

    def run(self, designs: list, fn=evaluate) -> list:
        """``fn`` (default: the rows) of ``designs``, through the shared runner; progress counts every design
        of the search."""
        from sweepgen import workers as runner

        done = len(self.history)

        def progress(n, total):
            if self.progress is not None:
                self.progress(min(done + n, self.budget), self.budget)

        return runner.run(fn, designs, workers=self.workers, cluster=self.cluster, progress=progress)

    def energies(self, func, population) -> list:
        """The map differential evolution calls with a whole generation (``func`` is not used: the
        designs run through :meth:`run`)."""
        from sweepgen import workers as runner

        xs = [np.asarray(x, dtype=float) for x in population]
        try:
            rows = self.run([self.design(x) for x in xs])
        except runner.Interrupted as stop:
            self.record([xs[i] for i in sorted(stop.finished)], [stop.finished[i] for i in sorted(stop.finished)])
            raise
        self.record(xs, rows)
        return [self.goal.energy(r) for r in rows]

    def record(self, xs, rows) -> None:
        for x, row in zip(xs, rows):
            self.history.append({"evaluation": len(self.history), "x": [float(v) for v in x],
                                 "energy": self.goal.energy(row), "objective": self.goal.value(row), **row})

    def best(self):
        """The passing design with the lowest energy so far (None when none passed)."""
        good = [h for h in self.history if h["verdict"] == "pass"]
        return min(good, key=lambda h: h["energy"]) if good else None


def generations(budget: int, dims: int) -> tuple[int, int]:
    """``(popsize, maxiter)`` of differential evolution for about ``budget`` designs: a population
    of at least 6 and 4 per free key (SciPy's ``popsize`` is per key), as many generations as fit."""
    per_key = max(4, math.ceil(6 / dims))
    population = per_key * dims
    return per_key, max(1, budget // population - 1)


def search(search: Search) -> bool:
    """Run differential evolution over the free keys; returns False when Ctrl-C stopped it (the
    history holds what finished)."""
    from scipy.optimize import differential_evolution

    from sweepgen import workers as runner

    bounds = [(f.low, f.high) for f in search.frees]
    per_key, maxiter = generations(search.budget, len(search.frees))
    search.budget = per_key * len(search.frees) * (maxiter + 1)
    x0 = [f.start for f in search.frees]
    inside = all(v is not None and f.low <= v <= f.high for f, v in zip(search.frees, x0))
    rng = np.random.default_rng(np.random.SeedSequence([search.seed, SEARCH_STREAM]))
    try:
        differential_evolution(lambda x: 0.0, bounds, popsize=per_key, maxiter=maxiter, tol=0.0, polish=False,
                               init="latinhypercube", updating="deferred", workers=search.energies,
                               x0=x0 if inside else None, rng=rng)
    except runner.Interrupted:
        return False
    return True


#: entropy added to the seed for the search's own draws, and for the confirmation's fresh seed
SEARCH_STREAM = 1
CONFIRM_STREAM = 2


def fresh_seed(seed: int) -> int:
    """A seed independent of ``seed`` (63 bits, from :class:`numpy.random.SeedSequence`)."""
    return int(np.random.SeedSequence([seed, CONFIRM_STREAM]).generate_state(1, dtype=np.uint64)[0] >> np.uint64(1))


# ---------------------------------------------------------------------------------------------
# The answer
# ---------------------------------------------------------------------------------------------
@dataclass
class Optimisation:
    """A finished (or stopped) search, its winner confirmed beside the starting design."""

    search: Search
    finished: bool
    start_row: dict | None = None          # the starting design, fresh seed, confirm_atoms
    best_row: dict | None = None           # the winner, the same fresh seed and atoms
    confirm_atoms: int = 0
    confirm_seed: int = 0
    extras: dict = field(default_factory=dict)    # further comparisons (e.g. a tapered-field slower)

    @property
    def best(self):
        return self.search.best()

    def improvement(self) -> dict | None:
        """The winner's objective minus the start's, confirmed, with the standard error of the
        difference (the two binomial errors in quadrature: the conservative error of two independent
        estimates) and whether it lies beyond two of them."""
        if self.start_row is None or self.best_row is None or self.search.goal.key != "captured_fraction":
            return None
        a, b = self.start_row, self.best_row
        if a["captured_fraction"] is None or b["captured_fraction"] is None:
            return None
        delta = b["captured_fraction"] - a["captured_fraction"]
        error = math.hypot(a["captured_error"], b["captured_error"])
        return {"start": a["captured_fraction"], "start_error": a["captured_error"],
                "best": b["captured_fraction"], "best_error": b["captured_error"],
                "difference": delta, "error": error, "significant": delta > 2 * error}

    def nearest(self) -> list:
        """The winner's :data:`NEAREST` rules closest to their limits: ``{"rule", "headroom"}``, smallest first."""
        row = self.best_row or self.best
        if row is None:
            return []
        return [{"rule": r, "headroom": h} for r, h in sorted(row["headrooms"].items(), key=lambda kv: kv[1])][:NEAREST]

    def binding(self) -> list:
        """What limits the winner: its rules within the checker's warning distance of their limits
        (headroom below :data:`sweepgen.checker.WARN_HEADROOM`, smallest first) and the free keys at one
        of their bounds."""
        from sweepgen.checker import WARN_HEADROOM

        row = self.best_row or self.best
        if row is None:
            return []
        out = [b for b in self.nearest() if b["headroom"] < WARN_HEADROOM]
        for f in self.search.frees:
            x = quantity_parts(str(row["values"][f.key]), f.key, "")[0]
            for name, edge in (("low", f.low), ("high", f.high)):
                if abs(x - edge) <= AT_BOUND * (f.high - f.low):
                    out.append({"free": f.key, "bound": name, "value": edge, "unit": f.unit})
        return out

    def to_json(self) -> dict:
        s = self.search
        best = self.best
        return {
            "scenario": s.start.path, "title": s.start.title,
            "objective": {"key": s.goal.key, "minimise": s.goal.minimise},
            "free": [f.to_json() for f in s.frees], "atoms": s.atoms, "seed": s.seed,
            "optimiser": "scipy.optimize.differential_evolution (best1bin, Latin hypercube start, no polish)",
            "evaluations": len(s.history), "finished": self.finished,
            "where": _where(s),
            "best": None if best is None else {"values": best["values"], "objective": best["objective"],
                                               "evaluation": best["evaluation"]},
            "confirmation": {"atoms": self.confirm_atoms, "seed": self.confirm_seed,
                             "start": self.start_row, "best": self.best_row},
            "improvement": self.improvement(), "binding": self.binding(), "nearest_limits": self.nearest(),
            "history": [{k: h[k] for k in ("evaluation", "values", "verdict", "failing_rules", "objective",
                                            "energy")} for h in s.history],
            **self.extras,
        }


def _where(s: Search) -> dict:
    from sweepgen.scan import placement

    return placement(s.workers, s.cluster, 2 ** 31)


def optimise(ref, frees_text, *, goal: Goal = Goal(), atoms: int, seed: int = 0, budget: int = 60,
             confirm_atoms: int | None = None, workers=None, cluster=None, progress=None) -> Optimisation:
    """Search the free keys of scenario ``ref`` (a built-in key, a path or a :class:`sweepgen.scan.Base`;
    ``--free`` texts) for the design with the best
    ``goal`` that passes check; confirm it with a fresh seed and ``confirm_atoms`` (default 10 ×
    ``atoms``) beside the starting design. Ctrl-C ends the search: the result holds what finished
    (``finished`` False) and nothing is confirmed."""
    from sweepgen import workers as runner
    from sweepgen.scan import Base, base

    start = ref if isinstance(ref, Base) else base(ref)
    frees = [parse_free(t, start) for t in frees_text]
    keys = [f.key for f in frees]
    if len(set(keys)) != len(keys):
        raise InputError("a key is given twice", key="free")
    s = Search(start, frees, goal.check(), atoms, seed, workers, cluster, progress, budget)
    done = search(s)
    result = Optimisation(s, done, confirm_atoms=confirm_atoms or 10 * atoms, confirm_seed=fresh_seed(seed))
    if done and s.best() is not None:
        try:
            confirm(result)
        except runner.Interrupted:
            result.finished, result.start_row, result.best_row = False, None, None
    return result


def confirm(result: Optimisation) -> None:
    """The winner and the starting design again, with the fresh seed and the confirmation's atoms, and
    the winner beside a tapered-field slower of the same deceleration (:func:`confirmation`), at once."""
    s = result.search
    best = s.best()
    first = Design(s.start.path, s.start.data, {}, result.confirm_atoms, result.confirm_seed,
                   simulate_failing=True)
    winner = s.design(best["x"], atoms=result.confirm_atoms, seed=result.confirm_seed)
    result.start_row, result.best_row, field = s.run([("design", first), ("design", winner), ("field", winner)],
                                                     confirmation)
    result.extras["tapered_field"] = field


def confirmation(task) -> dict:
    """One task of the confirmation: ``("design", d)`` → :func:`sweepgen.scan.evaluate`; ``("field", d)`` →
    :func:`field_comparison`."""
    kind, design = task
    return evaluate(design) if kind == "design" else field_comparison(design)


def field_comparison(design: Design) -> dict:
    """The design's chirp and a tapered-field slower with its deceleration and light, on the same atoms
    (:func:`sweepgen.tapered.compare`); ``{"unavailable": why}`` when there is none to work out (a species
    without g-factors, a design that cannot exist)."""
    from sweepgen import tapered
    from sweepgen.errors import SweepgenError

    try:
        doc = tapered.compare(design.scenario(), atoms=design.atoms, seed=design.seed, workers=1).to_json()
    except SweepgenError as exc:
        return {"unavailable": getattr(exc, "detail", None) or str(exc)}
    return plain(doc)
