"""Plots (matplotlib, imported only here and only when a plot is asked for).

Each function takes computed results and a file name; the format follows the
extension (PNG or SVG). No screen is needed (the Agg backend is used).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from sweepgen.errors import InputError

COLORS = {"sweep": "#1f5f8b", "design": "#d9822b", "response": "#3a9d5d", "limit": "#b03a2e",
          "band": "#9b59b6", "muted": "#7f8c8d"}


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


def plot_path(file, key: str = "path") -> Path:
    """``file`` as a plot to write, checked before anything is computed or written: a .png or .svg
    file (not a folder) in a folder that exists (no folder is created). ``key`` names the parameter
    in the error (the command line's ``--plot``, the API's ``path`` or ``plot``)."""
    path = Path(file)
    if path.suffix.lower() not in (".png", ".svg"):
        raise InputError(f"a plot file must end in .png or .svg, got {str(file)!r}", key=key)
    if path.is_dir():
        raise InputError(f"{str(file)!r} is a folder; name the plot file", key=key)
    if not path.parent.is_dir():
        raise InputError(f"the folder {str(path.parent)!r} does not exist; sweepgen creates no folders for "
                         "plots (create it first)", key=key)
    return path


def save(fig, file) -> Path:
    """Save a figure atomically by extension (.png or .svg; :func:`plot_path`); returns the path."""
    from sweepgen._atomic import atomic_path

    path = plot_path(file)
    fmt = path.suffix.lower().lstrip(".")
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format=fmt, dpi=130, bbox_inches="tight")
    _pyplot().close(fig)
    return path


def time_label(scenario) -> str:
    """The time axis of one period: after the trigger for a pulsed source; a continuous beam has no
    trigger, and its period starts with the chirp (the table's first sample)."""
    if scenario.pulsed:
        return "time after the trigger (ms)"
    return "time in the period, from the chirp start (ms)"


def _legend_outside(ax, *args, x: float = 1.01):
    """A legend to the right of the axes (``x`` in axes fractions), where it covers no data."""
    return ax.legend(*args, loc="upper left", bbox_to_anchor=(x, 1.0), borderaxespad=0.0, fontsize=8)


def plan_figure(plan, *, response=None, lanes=None):
    """The figure of :func:`plot_plan` (a matplotlib Figure, for saving or inspection)."""
    plt = _pyplot()
    sched = plan.schedule()
    t = np.linspace(0.0, sched.period, 4001)
    if lanes:
        fig, (ax, axv, axt) = plt.subplots(3, 1, figsize=(10, 6.5 + 0.3 * len(lanes)), sharex=True,
                                           gridspec_kw={"height_ratios": [3, 2, 0.25 * len(lanes) + 0.4]})
        _timing_lanes(axt, lanes)
    else:
        fig, (ax, axv) = plt.subplots(2, 1, figsize=(10, 6.5), sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    ax.plot(t * 1e3, sched.detuning(t) / 1e6, color=COLORS["sweep"], lw=2, label="laser detuning Δ(t)")
    ax.plot(t * 1e3, plan.design_resonance(t) / 1e6, color=COLORS["design"], lw=1.2, ls="--",
            label="resonance of the design atom, −v_s/λ")
    if response is not None:
        rt, rd = response
        ax.plot(np.asarray(rt) * 1e3, np.asarray(rd) / 1e6, color=COLORS["response"], lw=1,
                label="actuator response (simulated)")
    shades = {"chirp": COLORS["sweep"], "hold": COLORS["design"], "return": COLORS["muted"]}
    for seg in sched.segments:
        if seg.kind != "rest":
            ax.axvspan(seg.start * 1e3, seg.end * 1e3, alpha=0.08, color=shades[seg.kind], label=seg.kind)
    ax.set_ylabel("detuning (MHz)")
    ax.set_title(plan.scenario.title, fontsize=10)
    _legend_outside(ax, x=1.12)          # aligned with the lower legend, which clears the right axis
    ax.grid(alpha=0.3)
    tr = plan.trajectory
    tt = (tr.time + plan.chirp_start) * 1e3
    axv.plot(tt, tr.velocity, color=COLORS["design"], lw=2, label="design atom velocity")
    axv.plot(tt, tr.velocity + tr.lag, color=COLORS["sweep"], lw=1, ls=":", label="resonant velocity −λΔ")
    ax2 = axv.twinx()
    ax2.plot(tt, tr.position, color=COLORS["muted"], lw=1, label="design atom position (right axis)")
    ax2.set_ylabel("design atom position (m)", color=COLORS["muted"])
    axv.set_xlabel(time_label(plan.scenario))
    axv.set_ylabel("velocity (m/s)")
    axv.grid(alpha=0.3)
    (h1, l1), (h2, l2) = axv.get_legend_handles_labels(), ax2.get_legend_handles_labels()
    _legend_outside(axv, h1 + h2, l1 + l2, x=1.12)
    if lanes:
        axv.set_xlabel("")
        axt.set_xlabel(time_label(plan.scenario))
    return fig


def _timing_lanes(ax, lanes) -> None:
    """One row per lane of :func:`sweepgen.timing.lanes`: when each thing is on, in ms."""
    for row, (label, spans) in enumerate(lanes[::-1]):
        ax.broken_barh([(a * 1e3, max(b - a, 0.0) * 1e3) for a, b in spans], (row - 0.35, 0.7),
                       color=COLORS["sweep"] if row % 2 else COLORS["design"], alpha=0.7)
    ax.set_yticks(range(len(lanes)))
    ax.set_yticklabels([label for label, _ in lanes[::-1]], fontsize=7)
    ax.set_ylim(-0.6, len(lanes) - 0.4)
    ax.grid(axis="x", alpha=0.3)


def plot_plan(plan, file, *, response=None, lanes=None) -> Path:
    """Detuning versus time over one period, with the design atom's own resonance
    and, when given, the actuator's simulated response (``(t, detuning)``) and the
    timing lanes (:func:`sweepgen.timing.lanes`: the table, gates, markers); legends
    beside the axes, never over the sweep."""
    return save(plan_figure(plan, response=response, lanes=lanes), file)


def headroom_rows(report) -> list:
    """The bars of :func:`plot_check`: ``(label, headroom in %, status)`` for each finding with a
    headroom, in the order of the text report (failures, warnings, passes)."""
    rows = []
    for f in report.ordered():
        if f.headroom is None or not np.isfinite(f.headroom):
            continue
        label = f.rule if f.rule != "stage_range" else f"stage_range: {f.message.split(':')[0]}"
        rows.append((label, 100.0 * f.headroom, f.status))
    return rows


def plot_check(report, file) -> Path:
    """:func:`check_figure` saved to ``file`` (PNG or SVG by extension)."""
    return save(check_figure(report), file)


def check_figure(report):
    """Each finding's headroom to its limit as a horizontal bar, one per rule with a limit
    (``sweepgen.checker.CheckReport``), failures first as in the text report: failures red,
    warnings orange, passes green, each bar labelled with its headroom; the dashed line marks
    where a rule starts to warn (20 % headroom)."""
    from sweepgen.checker import WARN_HEADROOM

    plt = _pyplot()
    rows = headroom_rows(report)
    color = {"fail": COLORS["limit"], "warn": COLORS["design"], "pass": COLORS["response"]}
    fig, ax = plt.subplots(figsize=(8, 0.32 * max(len(rows), 3) + 1.2))
    y = np.arange(len(rows))[::-1]
    shown = [max(min(h, 100.0), -100.0) for _, h, _ in rows]
    ax.barh(y, shown, color=[color[s] for _, _, s in rows], height=0.7)
    for yi, (_, h, _), x in zip(y, rows, shown):
        ax.text(x + (2 if x >= 0 else -2), yi, f"{h:.0f} %", va="center", ha="left" if x >= 0 else "right",
                fontsize=7)
    ax.set_yticks(y)
    ax.set_yticklabels([label for label, _, _ in rows], fontsize=8)
    ax.axvline(0, color="black", lw=0.8)
    ax.axvline(WARN_HEADROOM * 100, color=COLORS["muted"], lw=0.8, ls="--")
    ax.set_xlim(-115, 115)
    ax.set_xlabel("headroom: room left to the limit, % of the limit (below 0: exceeded; bars clipped at ±100 %)")
    ok = "no rule fails" if report.ok else f"{len(report.failures())} rule(s) fail"
    title = getattr(getattr(report, "scenario", None), "title", "")
    ax.set_title(f"{title}\n{ok}", fontsize=9)
    ax.grid(axis="x", alpha=0.3)
    return fig


@dataclass(frozen=True)
class Curve:
    """One histogram of a simulation plot: ``values`` per bin of ``edges``, as fractions of ALL the
    atoms the source emitted (so a curve's sum is its share of every atom)."""

    key: str
    label: str
    edges: np.ndarray
    values: np.ndarray


def simulation_curves(result) -> dict:
    """The data of :func:`plot_simulation`, from the ``simulate --json`` histograms of ``result``.

    Returns ``{"velocity": [...], "slow": [...], "arrival": [...] (pulsed) or None, "atoms": N}``,
    lists of :class:`Curve`. ``final`` curves hold every atom crossing the target plane (in or out
    of the aperture), ``captured`` curves the captured atoms only (at or below the capture velocity,
    inside the aperture when one is set): each of these sums to ``captured_fraction``.
    """
    h = result.histograms()
    n = max(int(result.atoms.velocity.size), 1)

    def curve(key, label, edges, counts):
        return Curve(key, label, np.asarray(edges, dtype=float), np.asarray(counts, dtype=float) / n)

    ve, se = h["velocity_edges"], h["slow_edges"]
    out = {"atoms": n, "arrival": None, "velocity": [
        curve("source", "source, as emitted", ve, h["initial"]),
        curve("no_light", "target plane, no light", ve, h["final_no_light"]),
        curve("fixed", "target plane, light held at the start detuning", ve, h["final_fixed_frequency"]),
        curve("final", "target plane, with the sweep", ve, h["final"]),
        curve("captured", "captured, with the sweep", ve, h["final_captured"])],
        "slow": [curve("final", "target plane, with the sweep", se, h["slow_final"]),
                 curve("captured", "captured, with the sweep", se, h["slow_captured"])]}
    if "arrival_time_edges" in h:
        te = h["arrival_time_edges"]
        out["arrival"] = [curve("final", "target plane, with the sweep", te, h["arrival_time"]),
                          curve("captured", "captured, with the sweep", te, h["arrival_time_captured"])]
    return out


def curve_legend_title(scenario) -> str:
    """What "target plane" and "captured" mean in a simulation plot's legends."""
    tg = scenario.target
    where = ", inside the aperture" if tg.aperture is not None else ""
    return (f"target plane: every atom crossing it{' (in or out of the aperture)' if where else ''}\n"
            f"captured: at most {tg.capture_velocity:g} m/s{where}")


#: how each kind of curve of a simulation plot is drawn (the source filled underneath, the captured
#: atoms filled on top, so that neither hides under the lines)
CURVE_STYLE = {
    "source": {"color": COLORS["muted"], "fill": True, "alpha": 0.3, "lw": 0, "zorder": 1},
    "no_light": {"color": COLORS["limit"], "lw": 1, "ls": ":", "zorder": 2},
    "fixed": {"color": COLORS["design"], "lw": 1, "ls": "--", "zorder": 2},
    "final": {"color": COLORS["sweep"], "lw": 1.5, "zorder": 3},
    "captured": {"color": COLORS["response"], "fill": True, "alpha": 0.75, "lw": 0, "zorder": 4},
}


def simulation_figure(result):
    """The figure of :func:`plot_simulation` (a matplotlib Figure, for saving or inspection)."""
    plt = _pyplot()
    sc = result.scenario
    doc = result.to_json()
    data = simulation_curves(result)
    n = data["atoms"]
    panels = 3 if data["arrival"] else 2
    fig, axes = plt.subplots(panels, 1, figsize=(10, 3.3 * panels + 0.6))
    per_bin = f"atoms per bin, fraction of all {n} emitted"
    for ax, key in zip(axes, ("velocity", "slow", "arrival")):
        for c in data[key]:
            ax.stairs(c.values * 100, c.edges * (1e3 if key == "arrival" else 1.0), label=c.label,
                      **CURVE_STYLE[c.key])
        ax.set_ylabel(f"{per_bin} (%)", fontsize=8)
        ax.grid(alpha=0.3)
    ax, axs = axes[0], axes[1]
    ch = sc.chirp
    ax.axvspan(ch.end_velocity, ch.start_velocity, color=COLORS["band"], alpha=0.07, label="chirp band")
    for a in (ax, axs):
        a.axvline(sc.target.capture_velocity, color=COLORS["band"], lw=1.2,
                  label=f"capture velocity ({sc.target.capture_velocity:g} m/s)")
        a.set_xlabel("velocity along the beam (m/s)")
    ax.set_title(f"{sc.title}\ncaptured {100 * doc['captured_fraction']:.2f} % of {n} atoms (no light "
                 f"{100 * doc['baseline_no_light_fraction']:.2f} %, light held at the start detuning "
                 f"{100 * doc['baseline_fixed_frequency_fraction']:.2f} %)", fontsize=9)
    axs.set_title(f"the slow end, finer bins: captured atoms arrive at {_mean_spread(doc)}", fontsize=9)
    if data["arrival"]:
        axt = axes[2]
        if result.arrival_design is not None:
            axt.axvline(result.arrival_design * 1e3, color=COLORS["design"], lw=1, ls="--",
                        label="planned arrival of the design atom")
        axt.set_yscale("log")
        axt.set_ylabel(f"{per_bin} (%, log scale)", fontsize=8)
        axt.set_xlabel("arrival time at the target, " + time_label(sc).replace("time ", "", 1))
    for i, a in enumerate(axes):
        legend = _legend_outside(a)
        if i == 0:
            legend.set_title(curve_legend_title(sc), prop={"size": 7})
    fig.tight_layout()
    return fig


def _mean_spread(doc) -> str:
    mean, spread = doc.get("final_velocity_mean"), doc.get("final_velocity_spread")
    if mean is None or not np.isfinite(mean):
        return "no velocity (none captured)"
    if spread is None or not np.isfinite(spread):
        return f"{mean:.3g} m/s"
    return f"{mean:.3g} m/s on average, spread {spread:.3g} m/s (1σ)"


def plot_simulation(result, file) -> Path:
    """Velocity distributions at the source and at the target plane (with the sweep, without
    light, with the light held at the start detuning) and of the captured atoms alone, the
    slow end on finer bins, and for a pulsed source the arrival times at the target (log
    scale); every histogram as a fraction of all the atoms emitted. ``result`` is a
    :class:`sweepgen.simulate.SimulationResult`."""
    return save(simulation_figure(result), file)


def plot_drive(report, file) -> Path:
    """The drive signal over one period with the limits drawn in: the actuator's
    safe input range (laser profile) and the generator's output range as it
    arrives at the actuator (after the termination/load factor). ``report`` is a
    :class:`sweepgen.checker.CheckReport` of a sweep that could be planned."""
    return save(drive_figure(report), file)


def drive_figure(report):
    """The figure of :func:`plot_drive` (a matplotlib Figure, for saving or inspection)."""
    plt = _pyplot()
    plan, laser, gen = report.plan, report.laser, report.generator
    sched = plan.schedule()
    chain = laser.chain
    unit = chain.drive_unit
    scale, label = (1.0, "V") if unit == "V" else (1e-6, "MHz")
    t = np.linspace(0.0, sched.period, 4001)
    drive = chain.to_drive(sched.detuning(t))
    fig, ax = plt.subplots(figsize=(10, 4.2))
    ax.plot(t * 1e3, drive * scale, color=COLORS["sweep"], lw=2, label=f"planned drive ({chain.describe()})")
    tracking = getattr(report, "tracking", None)
    if tracking is not None:
        when = report.played_times()                  # the trigger's axis, as the planned drive
        order = np.argsort(when, kind="stable")
        ax.plot(when[order] * 1e3, tracking.drive[order] * scale, color=COLORS["response"], lw=0.8,
                drawstyle="steps-post", label="as played (quantised samples)")
    lim = laser.limits
    ax.axhline(lim.input_max * scale, color=COLORS["limit"], lw=1.4, ls="--",
               label=f"actuator safe input range ({lim.input_min * scale:g} to {lim.input_max * scale:g} {label})")
    ax.axhline(lim.input_min * scale, color=COLORS["limit"], lw=1.4, ls="--")
    out = gen.output
    factor = out.delivered_factor if out.kind == "voltage" else 1.0
    lo, hi = sorted((out.range_min * factor, out.range_max * factor))
    where = "at the actuator" if out.kind == "voltage" else "of the DDS"
    ax.axhline(hi * scale, color=COLORS["muted"], lw=1, ls=":",
               label=f"generator output range {where} ({lo * scale:g} to {hi * scale:g} {label})")
    ax.axhline(lo * scale, color=COLORS["muted"], lw=1, ls=":")
    span = max(drive.max() - drive.min(), 1e-12)
    top = max(drive.max(), min(lim.input_max, hi)) + 0.15 * span
    bottom = min(drive.min(), max(lim.input_min, lo)) - 0.15 * span
    ax.set_ylim(bottom * scale, top * scale)
    ax.set_xlabel(time_label(plan.scenario))
    ax.set_ylabel(f"drive at the actuator ({label})")
    ax.set_title(f"{laser.title}\non {gen.title}", fontsize=9)
    _legend_outside(ax)
    ax.grid(alpha=0.3)
    return fig


def plot_calibration(result, file) -> Path:
    """:func:`calibration_figure` saved to ``file`` (PNG or SVG by extension)."""
    return save(calibration_figure(result), file)


def calibration_figure(result):
    """Measured points, the fitted tuning curve with its uncertainty band, and the residuals in
    frequency (``sweepgen.recalibration.Result``); outliers and up/down sweeps marked."""
    plt = _pyplot()
    fit = result.fit
    u, x = result.drive, result.upstream
    grid = np.linspace(fit.drive_min, fit.drive_max, 801)
    unc = fit.fit.uncertainty(grid)
    fig, (ax, axr) = plt.subplots(2, 1, figsize=(8, 6.5), sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    used = fit.used
    ax.plot(u[used], x[used] / 1e6, ".", ms=2, color=COLORS["sweep"], alpha=0.5, label="measured")
    if (~used).any():
        ax.plot(u[~used], x[~used] / 1e6, "x", color=COLORS["limit"], label=f"outliers ({(~used).sum()}, left out)")
    ax.plot(grid, fit.poly(grid) / 1e6, color=COLORS["design"], lw=1.5, label=f"fit, degree {fit.degree}")
    ax.set_ylabel(("RF frequency" if result.index else "detuning") + " (MHz)")
    ax.set_title(f"{result.stage_name}: {result.request.measurements}", fontsize=10)
    ax.legend(fontsize=8)
    ax.grid(alpha=0.3)
    res = fit.residuals
    axr.plot(u[used], res[used] / 1e3, ".", ms=2, color=COLORS["sweep"], alpha=0.5, label="residual")
    axr.fill_between(grid, -unc / 1e3, unc / 1e3, color=COLORS["design"], alpha=0.3,
                     label="fit uncertainty (1σ)")
    if fit.hysteresis is not None:
        axr.axhline(fit.hysteresis["max"] / 2e3, color=COLORS["band"], ls="--", lw=1,
                    label="half the up − down hysteresis")
        axr.axhline(-fit.hysteresis["max"] / 2e3, color=COLORS["band"], ls="--", lw=1)
    axr.set_xlabel(f"drive ({result.drive_unit})")
    axr.set_ylabel("residual (kHz)")
    axr.legend(fontsize=8)
    axr.grid(alpha=0.3)
    return fig


def plot_table(table, numbers, file) -> Path:
    """:func:`table_figure` saved to ``file`` (PNG or SVG by extension)."""
    return save(table_figure(table, numbers), file)


def table_figure(table, numbers):
    """A table read back (``sweepgen.readback.ReadTable``): detuning (a gate's or a marker's table: its
    level) and drive versus time after the trigger, the chirp (or the windows on) shaded."""
    plt = _pyplot()
    t = table.time()
    step = max(1, len(t) // 20000)
    fig, (ax, axd) = plt.subplots(2, 1, figsize=(8, 6), sharex=True)
    if table.quantity == "level":
        ax.plot(t[::step] * 1e3, table.level()[::step], color=COLORS["sweep"], lw=1.2, drawstyle="steps-post")
        spans = [(w["start"], w["end"]) for w in numbers["windows"]]
        ax.set_ylabel("level")
    else:
        ax.plot(t[::step] * 1e3, table.detuning()[::step] / 1e6, color=COLORS["sweep"], lw=1.2)
        a = numbers.get("chirp_start")
        spans = [] if a is None else [(a, a + numbers["chirp_duration"])]
        ax.set_ylabel("detuning (MHz)")
    for a, b in spans:
        ax.axvspan(a * 1e3, b * 1e3, color=COLORS["sweep"], alpha=0.06)
    ax.set_title(f"{table.path.name} ({table.driver}, {table.count} samples)", fontsize=10)
    ax.grid(alpha=0.3)
    axd.plot(t[::step] * 1e3, table.drive()[::step], color=COLORS["design"], lw=1.2)
    axd.set_ylabel(f"drive ({table.drive_unit})")
    axd.set_xlabel("time after the trigger (ms)")
    axd.grid(alpha=0.3)
    return fig


def plot_compare(cmp, file, *, scenario=None) -> Path:
    """:func:`compare_figure` saved to ``file`` (PNG or SVG by extension)."""
    return save(compare_figure(cmp, scenario=scenario), file)


def compare_figure(cmp, *, scenario=None):
    """Measured and planned detuning on the schedule's time axis, and the tracking error with the
    tolerance (``sweepgen.compare.Comparison``; ``scenario`` names the time axis)."""
    plt = _pyplot()
    t = (cmp.trace.time + cmp.lag) * 1e3
    fig, (ax, axe) = plt.subplots(2, 1, figsize=(8, 6.5), sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    ax.plot(t, cmp.planned / 1e6, color=COLORS["design"], lw=1.5, label="planned")
    ax.plot(t, cmp.trace.detuning / 1e6, color=COLORS["sweep"], lw=0.8, label="measured (aligned)")
    ax.set_ylabel("detuning (MHz)")
    ax.set_title(f"{cmp.trace.path}: {cmp.alignment['method']}, lag {cmp.lag * 1e3:.6g} ms", fontsize=10)
    ax.legend(fontsize=8)
    ax.grid(alpha=0.3)
    err = cmp.error
    axe.plot(t, err / 1e6, color=COLORS["muted"], lw=0.6, label="error, whole trace")
    axe.plot(t[cmp.in_chirp], err[cmp.in_chirp] / 1e6, ".", ms=1.5, color=COLORS["sweep"], label="error in the chirp")
    for sign in (1, -1):
        axe.axhline(sign * cmp.tolerance / 1e6, color=COLORS["limit"], ls="--", lw=1,
                    label="tolerance" if sign > 0 else None)
    axe.set_ylabel("measured − planned (MHz)")
    axe.set_xlabel((time_label(scenario) if scenario is not None else "time on the plan's axis (ms)")
                   + ", the trace aligned to it")
    axe.legend(fontsize=8)
    axe.grid(alpha=0.3)
    return fig
def field_curves(plan, field, points: int = 401) -> dict:
    """The data of :func:`field_figure` (SI units): the tapered field ``B(z)`` over the slower, the
    design atom's velocity versus position in both methods."""
    z = np.linspace(field.start, field.end, points)
    tr = plan.trajectory
    return {"z": z, "field": field.field(z), "field_velocity": field.velocity(z),
            "chirp_position": np.asarray(tr.position), "chirp_velocity": np.asarray(tr.velocity)}


def field_figure(plan, field):
    """The tapered-field slower beside the chirp: its field profile (upper panel) and the design atom's
    velocity versus position in both methods (lower panel)."""
    plt = _pyplot()
    c = field_curves(plan, field)
    fig, (ax, axv) = plt.subplots(2, 1, figsize=(10, 6.5), sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    ax.plot(c["z"], c["field"] * 1e3, color=COLORS["response"], lw=2,
            label=f"B(z) = B₀√(1 − z/L₀) + B_bias\nB₀ = {field.b0 * 1e3:.4g} mT, L₀ = {field.l0:.4g} m")
    ax.axhline(0.0, color=COLORS["muted"], lw=0.8)
    ax.set_ylabel("field along the beam (mT)")
    ax.set_title(f"{plan.scenario.title}: tapered-field alternative", fontsize=10)
    _legend_outside(ax)
    ax.grid(alpha=0.3)
    axv.plot(c["chirp_position"], c["chirp_velocity"], color=COLORS["sweep"], lw=2, label="chirp: design atom")
    axv.plot(c["z"], c["field_velocity"], color=COLORS["response"], lw=1.5, ls="--",
             label="tapered field: design atom")
    axv.set_xlabel("distance from the source (m)")
    axv.set_ylabel("velocity (m/s)")
    axv.grid(alpha=0.3)
    _legend_outside(axv)
    return fig


def plot_field(plan, field, file) -> Path:
    """Save :func:`field_figure` (PNG or SVG by extension)."""
    return save(field_figure(plan, field), file)
