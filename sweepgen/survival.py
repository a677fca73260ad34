"""Expected survival of the slowed atoms: dark states of molecules, hyperfine depumping of atoms.

:func:`expected_survival` estimates the fraction of the chirp's band (source
atoms between the end and the start velocity, weighted by the source's velocity
distribution) still in the bright level at the end of the chirp, along the
plan's design trajectory (on the beam's axis):

* molecules: each photon leaks to an unrepumped state with probability ``p``;
  an atom captured at ``v`` scatters ``(v − v_end)/v_r`` photons and survives
  ``(1 − p)^N`` (README.md, "Physics background");
* atoms whose species gives an ``[off_resonant_level]`` (splitting ``δ_hf``,
  strength ``κ``, branching ``b`` to the dark level):

  - while slowed, the design atom sees the detuning ``−Δv_lag/λ`` and is pumped
    dark at ``b·R_off`` (:func:`sweepgen.physics.scattering_rate` of the
    off-resonant level). A repump brings it back at ``(1 − b)·R_rep``; a dark
    atom coasts while the chirp runs on, and is lost if it is still dark after
    ``2Δv_lag/a_d`` (the time the chirp's resonance needs to cross from a lag
    above it to a lag below it). So the hazard is
    ``b·R_off·exp(−(1 − b)R_rep·2Δv_lag/a_d)``;
  - before it is captured, an atom of the band slower than the chirp's
    resonance by ``λ|δ_hf|`` (``δ_hf < 0``) is crossed by the off-resonant
    level's resonance at the chirp rate ``β``: integrating the Lorentzian over a
    linear sweep gives ``b f Γ² κs / (4β sqrt(1 + κs))`` depumping events in
    expectation (a standard integral, ``∫ dx/(a² + x²) = π/a``); a repump brings
    it back before the chirp arrives with probability
    ``1 − exp(−(1 − b)R_rep t_gap)``, ``t_gap`` the time between crossing and
    capture.

Every light is taken at the level its gates set along the design path
(:mod:`sweepgen.lighting`): a repump's rate, and the slowing light's off-resonant
excitation, scale with its level ``L`` (saturation ``L·s``; the design atom still
scatters at the design rate, a little nearer resonance, so that far from the
off-resonant level its depumping rate falls as ``L``). A repump whose gate keeps
it dark does not count as repumping.

The numbers are an estimate for the checker's warning; the simulation follows
every atom.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import cumulative_trapezoid

from sweepgen import physics

#: velocity nodes over the band for the band average
BAND_NODES = 401


@dataclass(frozen=True)
class Survival:
    """Expected fraction of the band left bright after slowing, and its parts."""

    fraction: float          # band average
    design: float            # the design atom, captured at the start velocity
    crossed: float           # fraction of the band crossed by the off-resonant level before capture
    mechanism: str           # "none" | "dark states" | "hyperfine depumping"
    repumped: bool


def expected_survival(plan) -> Survival:
    """Expected survival of the chirp's band (see the module notes)."""
    sc = plan.scenario
    sp = sc.species
    off = sp.off_resonant if sp.kind == "atom" else None
    if sp.loss_per_photon <= 0 and off is None:
        return Survival(1.0, 1.0, 0.0, "none", False)
    tr = plan.trajectory
    v_band, weight = _band(sc)
    if off is None:
        v_r = physics.recoil_velocity(sp.mass, sp.wavelength)
        log_keep = math.log1p(-sp.loss_per_photon) / v_r
        each = np.exp(log_keep * (v_band - sc.chirp.end_velocity))
        design = math.exp(log_keep * (sc.chirp.start_velocity - sc.chirp.end_velocity))
        return Survival(_mean(each, weight), design, 0.0, "dark states", False)
    lv = plan.light_levels
    when = plan.chirp_start + tr.time                 # the design path on the trigger's axis
    seen = tr.saturation * lv.along(when, 0)          # the slowing light as its gates let it through
    repumps = [lv.along(when, 1 + j) for j in range(len(sc.repumps))]
    back = _repump_rate(sc, tr, repumps)
    hazard = _slowing_hazard(sc, tr, back, seen)
    cum = cumulative_trapezoid(hazard, tr.time, initial=0.0)
    # an atom captured at v joins the design trajectory where v_s = v (v_s falls with time)
    t_capture = np.interp(v_band, tr.velocity[::-1], tr.time[::-1])
    keep_slowing = np.exp(-(cum[-1] - np.interp(t_capture, tr.time, cum)))
    keep_crossing, crossed = _crossing(sc, tr, back, v_band, t_capture, seen)
    each = keep_slowing * keep_crossing
    return Survival(_mean(each, weight), float(math.exp(-cum[-1])), _mean(crossed, weight),
                    "hyperfine depumping", any(bool(np.any(level > 0.0)) for level in repumps))


def _band(sc):
    """Velocity nodes over the chirp's band and their weights: the source's density times the
    trapezoid rule's node weights, so that weighted sums are integrals over the band."""
    ch = sc.chirp
    v = np.linspace(ch.end_velocity, ch.start_velocity, BAND_NODES)
    rule = np.full(BAND_NODES, v[1] - v[0])
    rule[[0, -1]] *= 0.5
    return v, np.asarray(sc.source.pdf(v), dtype=float) * rule


def _mean(values, weight) -> float:
    total = float(np.sum(weight))
    return float(np.sum(values * weight) / total) if total > 0 else float(np.mean(values))


def _off_rate(sc, seen, s):
    """``b·R_off``: depumping rate at the detuning ``seen`` (from the cycling line) and saturation ``s``."""
    sp = sc.species
    off = sp.off_resonant
    return off.branching * physics.scattering_rate(seen - off.splitting, 0.0, off.strength * s, sp.gamma,
                                                   sp.wavelength, sp.rate_fraction)


def _repump_rate(sc, tr, levels):
    """``(1 − b)·Σ R_rep`` for an atom on the design trajectory (0 without repump), each repump light at
    its ``levels`` along it."""
    sp = sc.species
    total = np.zeros_like(tr.time)
    for ch, level in zip(sc.repumps, levels):
        s = level * ch.saturation * sc.light.saturation_at(tr.position) / max(sc.light.peak, 1e-300)
        detuning = np.array([ch.detuning_with(d) for d in tr.detuning])
        total += physics.scattering_rate(detuning, tr.velocity, s, sp.gamma, sp.wavelength, sp.rate_fraction)
    return (1.0 - sp.off_resonant.branching) * total


def _slowing_hazard(sc, tr, back, s):
    """Rate of losing the design atom to the dark level while it is slowed (per second); ``s`` the slowing
    light's saturation along the path."""
    seen = -tr.lag / sc.species.wavelength
    lose_after = 2.0 * tr.lag / tr.deceleration
    return _off_rate(sc, seen, s) * np.exp(-back * lose_after)


def _crossing(sc, tr, back, v_band, t_capture, saturation):
    """Survival of the crossing of the off-resonant resonance before capture, and which atoms cross
    (``saturation``: the slowing light's along the path)."""
    sp = sc.species
    off = sp.off_resonant
    ones = np.ones_like(v_band)
    if off.splitting >= 0:
        return ones, np.zeros_like(v_band)
    # the off-resonant level's resonant velocity during the chirp: -λ(Δ - δ_hf)
    v_off = -sp.wavelength * (tr.detuning - off.splitting)
    crossed = (v_band <= v_off[0]) & (v_band >= v_off[-1])
    t_cross = np.interp(v_band, v_off[::-1], tr.time[::-1])
    beta = np.interp(t_cross, tr.time, np.abs(tr.chirp_rate))
    s = np.interp(t_cross, tr.time, saturation) * off.strength
    events = off.branching * sp.rate_fraction * sp.gamma ** 2 * s / (4.0 * np.maximum(beta, 1e-300)
                                                                      * np.sqrt(1.0 + s))
    r_back = np.interp(t_cross, tr.time, back)
    dark = -np.expm1(-events) * np.exp(-r_back * np.maximum(t_capture - t_cross, 0.0))
    return np.where(crossed, 1.0 - dark, 1.0), crossed.astype(float)
