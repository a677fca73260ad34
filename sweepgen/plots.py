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
