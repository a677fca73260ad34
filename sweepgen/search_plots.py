"""Plots of scans and searches: what each design captures, failing designs shown as such.

As in :mod:`sweepgen.plots`, the data are built in small functions that tests
check against the JSON (:func:`scan_line`, :func:`scan_map`, :func:`history_points`)
and the figures in ``*_figure`` functions; ``plot_*`` saves them atomically.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from sweepgen.plots import COLORS, _legend_outside, _pyplot, save

#: what a design's verdict looks like in every plot of this module
VERDICT_STYLE = {"pass": {"color": COLORS["sweep"], "marker": "o", "label": "passes check"},
                 "fail": {"color": COLORS["limit"], "marker": "x", "label": "fails check (rules named in the table)"},
                 "invalid": {"color": COLORS["muted"], "marker": "|", "label": "cannot exist (no sweep)"}}


def _number(value) -> float:
    from sweepgen.scan import quantity_parts

    return quantity_parts(str(value), "", "")[0]


def _label(axis) -> str:
    return f"{axis.key} ({axis.unit})" if axis.unit else axis.key


@dataclass(frozen=True)
class Line:
    """One varied key: the value of each design, its captured fraction and error (NaN where not
    simulated) and its verdict."""

    x: np.ndarray
    y: np.ndarray
    err: np.ndarray
    verdict: np.ndarray


def scan_line(result, objective: str = "captured_fraction") -> Line:
    """The designs of a one-key scan along that key (in grid order)."""
    key = result.axes[0].key
    rows = result.rows
    y = np.array([np.nan if r.get(objective) is None else r[objective] for r in rows], dtype=float)
    err = np.array([np.nan if r.get("captured_error") is None or objective != "captured_fraction"
                    else r["captured_error"] for r in rows], dtype=float)
    return Line(np.array([_number(r["values"][key]) for r in rows]), y, err, np.array([r["verdict"] for r in rows]))


@dataclass(frozen=True)
class Map:
    """Two varied keys: ``z[i, j]`` the objective at ``x[j]``, ``y[i]`` (NaN where not simulated or not
    finished) and the verdict of each cell (``""`` for a design that did not finish)."""

    x: np.ndarray
    y: np.ndarray
    z: np.ndarray
    verdict: np.ndarray


def scan_map(result, objective: str = "captured_fraction") -> Map:
    """The designs of a two-key scan on their grid (first key across, second key up)."""
    ax0, ax1 = result.axes[:2]
    x, y = np.array(ax0.numbers), np.array(ax1.numbers)
    z = np.full((y.size, x.size), np.nan)
    verdict = np.full((y.size, x.size), "", dtype=object)
    for r in result.rows:
        i, j = r["index"] % y.size, r["index"] // y.size      # the last key varies fastest
        verdict[i, j] = r["verdict"]
        if r.get(objective) is not None:
            z[i, j] = r[objective]
    return Map(x, y, z, verdict)


def scan_figure(result, objective: str = "captured_fraction"):
    """A line for one key, a map for two, the objective per design for more."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(7.5, 4.2))
    n = len(result.axes)
    if n == 1:
        _line(ax, scan_line(result, objective), objective)
        ax.set_xlabel(_label(result.axes[0]))
    elif n == 2:
        _map(fig, ax, scan_map(result, objective), objective)
        ax.set_xlabel(_label(result.axes[0]))
        ax.set_ylabel(_label(result.axes[1]))
    else:
        rows = result.rows
        line = Line(np.array([r["index"] for r in rows], dtype=float),
                    np.array([np.nan if r.get(objective) is None else r[objective] for r in rows], dtype=float),
                    np.full(len(rows), np.nan), np.array([r["verdict"] for r in rows]))
        _line(ax, line, objective)
        ax.set_xlabel("design (index in the table)")
    done = "" if not result.interrupted else f" (interrupted: {len(result.rows)} of {result.total} designs)"
    ax.set_title(f"{result.title}\n{result.atoms} atoms per design, seed {result.seed}{done}", fontsize=9)
    return fig


def _line(ax, line: Line, objective: str) -> None:
    ax.plot(line.x, line.y, color=COLORS["muted"], lw=0.8, zorder=1)
    for verdict, style in VERDICT_STYLE.items():
        pick = line.verdict == verdict
        if not pick.any():
            continue
        y = line.y[pick] if verdict != "invalid" else np.zeros(int(pick.sum()))
        ax.errorbar(line.x[pick], y, yerr=np.nan_to_num(line.err[pick]), fmt=style["marker"], ms=6,
                    color=style["color"], label=style["label"], capsize=2, lw=0.8, zorder=2)
    ax.set_ylabel(objective.replace("_", " ") + (" (±1σ)" if objective == "captured_fraction" else ""))
    ax.grid(alpha=0.3)
    _legend_outside(ax)


def _map(fig, ax, grid: Map, objective: str) -> None:
    def edges(v):
        if v.size == 1:
            return np.array([v[0] - 0.5, v[0] + 0.5])
        mid = (v[1:] + v[:-1]) / 2
        return np.concatenate([[2 * v[0] - mid[0]], mid, [2 * v[-1] - mid[-1]]])

    mesh = ax.pcolormesh(edges(grid.x), edges(grid.y), np.ma.masked_invalid(grid.z), cmap="viridis", shading="flat")
    fig.colorbar(mesh, ax=ax, label=objective.replace("_", " "))
    xx, yy = np.meshgrid(grid.x, grid.y)
    for verdict in ("fail", "invalid"):
        pick = grid.verdict == verdict
        if pick.any():
            style = VERDICT_STYLE[verdict]
            look = ({"marker": "x", "color": style["color"]} if verdict == "fail" else
                    {"marker": "s", "facecolors": "white", "edgecolors": style["color"]})
            ax.scatter(xx[pick], yy[pick], s=40, label=style["label"], **look)
    if (grid.verdict == "fail").any() or (grid.verdict == "invalid").any():
        _legend_outside(ax, x=1.25)


def plot_scan(result, file, objective: str = "captured_fraction"):
    """Draw :func:`scan_figure` into ``file`` (PNG or SVG)."""
    return save(scan_figure(result, objective), file)


@dataclass(frozen=True)
class History:
    """A search in the order it ran: each design's objective (NaN unless it passed), verdict, the
    best objective so far among passing designs, and each free key's value as a fraction of its range."""

    evaluation: np.ndarray
    objective: np.ndarray
    verdict: np.ndarray
    best_so_far: np.ndarray
    position: dict


def history_points(result) -> History:
    """The data of :func:`history_figure` from a :class:`sweepgen.optimise.Optimisation`."""
    s = result.search
    hist = s.history
    ok = np.array([h["verdict"] == "pass" and h["objective"] is not None for h in hist], dtype=bool)
    obj = np.array([h["objective"] if o else np.nan for h, o in zip(hist, ok)], dtype=float)
    pick = np.fmin if s.goal.minimise else np.fmax
    best = pick.accumulate(obj) if obj.size else obj
    position = {f.key: np.array([(h["x"][i] - f.low) / (f.high - f.low) for h in hist])
                for i, f in enumerate(s.frees)}
    return History(np.arange(len(hist)), obj, np.array([h["verdict"] for h in hist]), best, position)


def history_figure(result):
    """The objective of every design the search tried, the best so far, and where each free key was."""
    plt = _pyplot()
    data = history_points(result)
    fig, (top, low) = plt.subplots(2, 1, figsize=(7.5, 6), sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    good = data.verdict == "pass"
    top.plot(data.evaluation[good], data.objective[good], "o", ms=4, color=COLORS["sweep"],
             label=VERDICT_STYLE["pass"]["label"])
    top.step(data.evaluation, data.best_so_far, where="post", color=COLORS["design"], label="best so far")
    finite = data.objective[np.isfinite(data.objective)]
    bottom = finite.min() - 0.08 * (np.ptp(finite) or 1.0) if finite.size else 0.0
    for verdict in ("fail", "invalid"):
        pick = data.verdict == verdict
        if pick.any():
            style = VERDICT_STYLE[verdict]
            top.plot(data.evaluation[pick], np.full(int(pick.sum()), bottom), style["marker"], color=style["color"],
                     label=style["label"] + ", drawn below the rest")
    goal = result.search.goal
    top.set_ylabel(goal.key.replace("_", " ") + (" (lower is better)" if goal.minimise else ""))
    top.grid(alpha=0.3)
    _legend_outside(top)
    for key, pos in data.position.items():
        low.plot(data.evaluation, pos, ".", ms=4, label=key)
    low.set_ylabel("free key in its range\n(0 = low, 1 = high)")
    low.set_xlabel("design tried (in the order the search asked)")
    low.set_ylim(-0.05, 1.05)
    low.grid(alpha=0.3)
    _legend_outside(low)
    s = result.search
    top.set_title(f"{s.start.title}\n{s.atoms} atoms per design, seed {s.seed}", fontsize=9)
    return fig


def plot_history(result, file):
    """Draw :func:`history_figure` into ``file`` (PNG or SVG)."""
    return save(history_figure(result), file)
