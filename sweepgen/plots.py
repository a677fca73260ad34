"""Plots (matplotlib, imported only here and only when a plot is asked for).

Each function takes computed results and a file name; the format follows the
extension (PNG or SVG). No screen is needed (the Agg backend is used).
"""

from __future__ import annotations

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


def save(fig, file) -> Path:
    """Save a figure atomically by extension (.png or .svg); returns the path."""
    from sweepgen._atomic import atomic_path

    path = Path(file)
    fmt = path.suffix.lower().lstrip(".")
    if fmt not in ("png", "svg"):
        raise InputError(f"plot file must end in .png or .svg, got {path.name!r}", key="--plot")
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format=fmt, dpi=130, bbox_inches="tight")
    _pyplot().close(fig)
    return path


def plot_plan(plan, file, *, response=None) -> Path:
    """Detuning versus time over one period, with the design atom's own resonance
    and, when given, the actuator's simulated response (``(t, detuning)``)."""
    plt = _pyplot()
    sched = plan.schedule()
    t = np.linspace(0.0, sched.period, 4001)
    fig, (ax, axv) = plt.subplots(2, 1, figsize=(8, 6.5), sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    ax.plot(t * 1e3, sched.detuning(t) / 1e6, color=COLORS["sweep"], lw=2, label="laser detuning Δ(t)")
    ax.plot(t * 1e3, plan.design_resonance(t) / 1e6, color=COLORS["design"], lw=1.2, ls="--",
            label="resonance of the design atom, −v_s/λ")
    if response is not None:
        rt, rd = response
        ax.plot(np.asarray(rt) * 1e3, np.asarray(rd) / 1e6, color=COLORS["response"], lw=1,
                label="actuator response (simulated)")
    for seg in sched.segments:
        if seg.kind != "rest":
            ax.axvspan(seg.start * 1e3, seg.end * 1e3, alpha=0.06,
                       color={"chirp": COLORS["sweep"], "hold": COLORS["design"], "return": COLORS["muted"]}[seg.kind])
    ax.set_ylabel("detuning (MHz)")
    ax.set_title(plan.scenario.title, fontsize=10)
    ax.legend(fontsize=8, loc="lower right")
    ax.grid(alpha=0.3)
    tr = plan.trajectory
    tt = (tr.time + plan.chirp_start) * 1e3
    axv.plot(tt, tr.velocity, color=COLORS["design"], lw=2, label="design atom velocity")
    axv.plot(tt, tr.velocity + tr.lag, color=COLORS["sweep"], lw=1, ls=":", label="resonant velocity −λΔ")
    axv.set_xlabel("time after trigger (ms)")
    axv.set_ylabel("velocity (m/s)")
    axv.grid(alpha=0.3)
    ax2 = axv.twinx()
    ax2.plot(tt, tr.position, color=COLORS["muted"], lw=1)
    ax2.set_ylabel("design atom position (m)", color=COLORS["muted"])
    axv.legend(fontsize=8, loc="upper right")
    return save(fig, file)


def plot_check(report, file) -> Path:
    """Each finding's headroom to its limit as a horizontal bar, one per rule with a limit
    (``sweepgen.checker.CheckReport``): failures red, warnings orange, passes
    green; the dashed line marks where a rule starts to warn (20 % headroom)."""
    from sweepgen.checker import WARN_HEADROOM

    plt = _pyplot()
    rows = [f for f in report.findings if f.headroom is not None and np.isfinite(f.headroom)]
    color = {"fail": COLORS["limit"], "warn": COLORS["design"], "pass": COLORS["response"]}
    fig, ax = plt.subplots(figsize=(8, 0.32 * max(len(rows), 3) + 1.2))
    labels = [f.rule if f.rule != "stage_range" else f"stage_range: {f.message.split(':')[0]}" for f in rows]
    headroom = [max(min(f.headroom, 1.0), -1.0) * 100 for f in rows]
    y = np.arange(len(rows))[::-1]
    ax.barh(y, headroom, color=[color[f.status] for f in rows], height=0.7)
    ax.set_yticks(y)
    ax.set_yticklabels(labels, fontsize=8)
    ax.axvline(0, color="black", lw=0.8)
    ax.axvline(WARN_HEADROOM * 100, color=COLORS["muted"], lw=0.8, ls="--")
    ax.set_xlim(-100, 100)
    ax.set_xlabel("headroom to the limit (%; below 0 = limit exceeded, clipped to ±100 %)")
    ok = "no rule fails" if report.ok else f"{len(report.failures())} rule(s) fail"
    title = getattr(getattr(report, "scenario", None), "title", "")
    ax.set_title(f"{title}\n{ok}", fontsize=9)
    ax.grid(axis="x", alpha=0.3)
    return save(fig, file)


def plot_simulation(result, file) -> Path:
    """Velocity distributions before (at the source) and after (at the target plane:
    with the sweep, without light, with the light held at the start detuning), and for
    a pulsed source the arrival times at the target (all arrivals and captured atoms).
    ``result`` is a :class:`sweepgen.simulate.SimulationResult`."""
    plt = _pyplot()
    sc = result.scenario
    h = result.histograms()
    doc = result.to_json()
    pulsed = "arrival_time_edges" in h
    if pulsed:
        fig, (ax, axt) = plt.subplots(2, 1, figsize=(8, 7), gridspec_kw={"height_ratios": [3, 2]})
    else:
        fig, ax = plt.subplots(1, 1, figsize=(8, 4.5))
    edges = np.asarray(h["velocity_edges"])
    n = max(int(doc["atoms"]), 1)

    def steps(counts, **kw):
        ax.stairs(np.asarray(counts) / n, edges, **kw)

    steps(h["initial"], color=COLORS["muted"], lw=1.2, label="at the source")
    steps(h["final_no_light"], color=COLORS["limit"], lw=1, ls=":", label="at the target, no light")
    steps(h["final_fixed_frequency"], color=COLORS["design"], lw=1, ls="--",
          label="at the target, light held at the start detuning")
    steps(h["final"], color=COLORS["sweep"], lw=2, fill=False, label="at the target, with the sweep")
    ch = sc.chirp
    ax.axvspan(ch.end_velocity, ch.start_velocity, color=COLORS["band"], alpha=0.07, label="chirp band")
    ax.axvline(sc.target.capture_velocity, color=COLORS["response"], lw=1.2,
               label=f"capture velocity ({sc.target.capture_velocity:g} m/s)")
    ax.set_xlabel("velocity along the beam (m/s)")
    ax.set_ylabel("fraction of atoms per bin")
    cap = doc["captured_fraction"]
    ax.set_title(f"{sc.title}\ncaptured {100 * cap:.2f} % of {doc['atoms']} atoms "
                 f"(no light {100 * doc['baseline_no_light_fraction']:.2f} %, "
                 f"fixed frequency {100 * doc['baseline_fixed_frequency_fraction']:.2f} %)", fontsize=9)
    ax.legend(fontsize=7, loc="upper right")
    ax.grid(alpha=0.3)
    if pulsed:
        tedges = np.asarray(h["arrival_time_edges"]) * 1e3
        axt.stairs(np.asarray(h["arrival_time"]) / n, tedges, color=COLORS["muted"], lw=1.2,
                   label="all arrivals")
        axt.stairs(np.asarray(h["arrival_time_captured"]) / n, tedges, color=COLORS["sweep"], lw=2,
                   label="captured atoms")
        if result.arrival_design is not None:
            axt.axvline(result.arrival_design * 1e3, color=COLORS["design"], lw=1, ls="--",
                        label="planned arrival of the design atom")
        axt.set_xlabel("arrival time at the target after the trigger (ms)")
        axt.set_ylabel("fraction of atoms per bin")
        axt.legend(fontsize=7, loc="upper right")
        axt.grid(alpha=0.3)
    fig.tight_layout()
    return save(fig, file)


def plot_drive(report, file) -> Path:
    """The drive signal over one period with the limits drawn in: the actuator's
    safe input range (laser profile) and the generator's output range as it
    arrives at the actuator (after the termination/load factor). ``report`` is a
    :class:`sweepgen.checker.CheckReport` of a sweep that could be planned."""
    plt = _pyplot()
    plan, laser, gen = report.plan, report.laser, report.generator
    sched = plan.schedule()
    chain = laser.chain
    unit = chain.drive_unit
    scale, label = (1.0, "V") if unit == "V" else (1e-6, "MHz")
    t = np.linspace(0.0, sched.period, 4001)
    drive = chain.to_drive(sched.detuning(t))
    fig, ax = plt.subplots(figsize=(8, 4.2))
    ax.plot(t * 1e3, drive * scale, color=COLORS["sweep"], lw=2, label=f"planned drive ({chain.describe()})")
    tracking = getattr(report, "tracking", None)
    if tracking is not None:
        ax.plot(tracking.time * 1e3, tracking.drive * scale, color=COLORS["response"], lw=0.8,
                drawstyle="steps-post", label="as played (quantised samples)")
    lim = laser.limits
    ax.axhline(lim.input_max * scale, color=COLORS["limit"], lw=1.4, ls="--", label="actuator safe input range")
    ax.axhline(lim.input_min * scale, color=COLORS["limit"], lw=1.4, ls="--")
    out = gen.output
    factor = out.delivered_factor if out.kind == "voltage" else 1.0
    lo, hi = sorted((out.range_min * factor, out.range_max * factor))
    where = "at the actuator" if out.kind == "voltage" else "of the DDS"
    ax.axhline(hi * scale, color=COLORS["muted"], lw=1, ls=":", label=f"generator output range {where}")
    ax.axhline(lo * scale, color=COLORS["muted"], lw=1, ls=":")
    span = max(drive.max() - drive.min(), 1e-12)
    top = max(drive.max(), min(lim.input_max, hi)) + 0.15 * span
    bottom = min(drive.min(), max(lim.input_min, lo)) - 0.15 * span
    ax.set_ylim(bottom * scale, top * scale)
    ax.set_xlabel("time after trigger (ms)")
    ax.set_ylabel(f"drive at the actuator ({label})")
    ax.set_title(f"{laser.title}\non {gen.title}", fontsize=9)
    ax.legend(fontsize=7, loc="best")
    ax.grid(alpha=0.3)
    return save(fig, file)


def plot_calibration(result, file) -> Path:
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
    return save(fig, file)


def plot_table(table, numbers, file) -> Path:
    """A table read back (``sweepgen.readback.ReadTable``): detuning and drive versus time."""
    plt = _pyplot()
    t = table.time()
    step = max(1, len(t) // 20000)
    fig, (ax, axd) = plt.subplots(2, 1, figsize=(8, 6), sharex=True)
    ax.plot(t[::step] * 1e3, table.detuning()[::step] / 1e6, color=COLORS["sweep"], lw=1.2)
    if numbers.get("chirp_start") is not None:
        a = numbers["chirp_start"]
        ax.axvspan(a * 1e3, (a + numbers["chirp_duration"]) * 1e3, color=COLORS["sweep"], alpha=0.06)
    ax.set_ylabel("detuning (MHz)")
    ax.set_title(f"{table.path.name} ({table.driver}, {table.count} samples)", fontsize=10)
    ax.grid(alpha=0.3)
    axd.plot(t[::step] * 1e3, table.drive()[::step], color=COLORS["design"], lw=1.2)
    axd.set_ylabel(f"drive ({table.drive_unit})")
    axd.set_xlabel("time after trigger (ms)")
    axd.grid(alpha=0.3)
    return save(fig, file)


def plot_compare(cmp, file) -> Path:
    """Measured and planned detuning on the schedule's time axis, and the tracking error with the
    tolerance (``sweepgen.compare.Comparison``)."""
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
    axe.set_xlabel("time after trigger, schedule axis (ms)")
    axe.legend(fontsize=8)
    axe.grid(alpha=0.3)
    return save(fig, file)
