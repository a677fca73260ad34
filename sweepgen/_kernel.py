"""The flight's step compiled (numba): one pass over the atoms in flight per step.

The same model as the NumPy step of :mod:`sweepgen._flight` (written out in
:mod:`sweepgen.simulate`), atom by atom instead of array by array: drift, the
saturation at the atom's place, the expected photons at the step's mid-point
velocity, depumping and repumping, the photons and kicks, and the fates. It
draws its random numbers from the run's own :class:`numpy.random.Generator`, in
another order than the NumPy step, so the two give statistically identical
results, not the same numbers. Two draws differ in method, not in law:

* an atom whose photon clock runs out with ``u`` left of the step scatters
  ``1 + Poisson(u)`` photons; here the Poisson count is a run of unit-rate
  exponential arrivals within ``u`` and the fresh clock the one that overshoots
  it (the same law: arrivals of a unit-rate Poisson process, memorylessness);
* atoms that are done are skipped rather than parked far behind the source.

Used when numba is installed (``pip install 'sweepgen[fast]'``); otherwise
:mod:`sweepgen._flight` flies the atoms with NumPy (``AVAILABLE``).
"""

from __future__ import annotations

import math
from typing import NamedTuple

try:
    import numba
except ImportError:          # the NumPy step is used instead
    numba = None

AVAILABLE = numba is not None

ARRIVED, TURNED_BACK, DARK = 1, 2, 3


class Constants(NamedTuple):
    """The run's constants, passed by value (so the compiled step keeps them in registers)."""

    recoil: float            # m/s per photon
    distance: float          # m, the target plane
    light_start: float       # m
    peak: float              # saturation parameter on the axis (the beam's peak)
    focused: bool            # a Gaussian beam (else unbounded light)
    focus: float             # m
    inv_rayleigh: float      # 1/z_R
    inv_waist2: float        # 2/w0²
    k_v: float               # 2·2π/(Γλ): the Doppler term of x per m/s
    k_d: float               # 2·2π/Γ: x per Hz of detuning
    f_gamma: float           # f Γ
    split: float             # Hz, the off-resonant level's splitting
    strength: float          # its relative strength κ
    branching: float         # b
    pumping: bool            # depumping and repumping are followed
    loss: bool               # molecules: photon budgets
    light: bool              # the slowing light is on
    large: float             # expected counts from which the normal law is drawn


def constants(*, recoil, distance, light_start, peak, focused, focus, rayleigh, waist, gamma, wavelength,
              fraction, split, strength, branching, pumping, loss, light, large) -> Constants:
    k_d = 2.0 * 2.0 * math.pi / gamma
    return Constants(float(recoil), float(distance), float(light_start), float(peak), bool(focused),
                     float(focus), 1.0 / rayleigh if focused else 0.0, 2.0 / waist**2 if focused else 0.0,
                     k_d / wavelength, k_d, fraction * gamma, float(split), float(strength), float(branching),
                     bool(pumping), bool(loss), bool(light), float(large))


def _compiled(func):
    return numba.njit(cache=True, nogil=True)(func) if AVAILABLE else func


def _inlined(func):
    """A helper of the step, compiled into it (no call, no reference counting of its arrays per atom)."""
    return numba.njit(cache=True, nogil=True, inline="always")(func) if AVAILABLE else func


@_inlined
def _saturation(k, peak, z, x, y):
    """``peak`` (unbounded light) or ``peak/q · exp(−2r²/(w0² q))`` at ``(z, x, y)`` (a Gaussian beam)."""
    if not k.focused:
        return peak
    u = (z - k.focus) * k.inv_rayleigh
    q = 1.0 + u * u
    return peak / q * math.exp(-(x * x + y * y) * k.inv_waist2 / q)


@_inlined
def _rate(k, xd, v, s):
    """``f Γ s / (1 + s + x²)``, ``x = 2·2π(Δ + v/λ)/Γ`` (:func:`sweepgen.physics.scattering_rate`);
    ``xd`` is the detuning's part of ``x``."""
    x = xd + k.k_v * v
    return k.f_gamma * s / (1.0 + s + x * x)


@_inlined
def _off(k, xd_off, v, s, dt):
    """Expected depumping events in the step, ``b·R_off·dt`` (:func:`sweepgen._flight.off_resonant_counts`)."""
    return k.branching * _rate(k, xd_off, v, k.strength * s) * dt


@_compiled
def _pump_pass(rng, k, rep_s, rep_xd, xd, xd_off, dt, w_v, w_z, w_x, w_y, w_vx, w_vy, w_pump, w_alive, w_dark,
               w_depumped, bright):
    """Depumping and repumping of every atom in flight over the step, into ``bright`` the part of the step
    each spends in the bright level (a pass of its own before the photons', at the same place, saturation
    and mid-point velocity).

    Bright atoms go dark at ``b·R_off``, dark ones return at ``(1 − b)·R_rep``, each
    atom with one unit-rate clock (as :meth:`sweepgen._flight._Propagation._pump`);
    an atom whose clock runs out is followed switch by switch through the rest
    of the step, a fresh ``Exp(1)`` clock after each switch. (The random draws and
    the arrays stay in this loop's own body: numba counts references to the
    generator and to every array on each call of a function they are passed to,
    which costs more than the step itself.)
    """
    for i in range(w_v.size):
        if not w_alive[i]:
            continue
        v, z0 = w_v[i], w_z[i]
        z_mid = z0 + 0.5 * v * dt
        x, y = w_x[i] + w_vx[i] * dt, w_y[i] + w_vy[i] * dt
        s = _saturation(k, k.peak, z_mid, x, y) if z0 >= k.light_start else 0.0
        v_mid = v - 0.5 * k.recoil * _rate(k, xd, v, s) * dt
        was_dark = w_dark[i]
        lam_dark = _off(k, xd_off, v_mid, s, dt)
        lam_back = 0.0
        if (was_dark or w_pump[i] <= lam_dark) and z_mid >= k.light_start:
            # the repump lights: (1 − b)·Σ R_rep·dt (sweepgen._flight.repump_counts)
            for j in range(rep_s.size):
                lam_back += _rate(k, rep_xd[j], v, _saturation(k, rep_s[j], z_mid, x, y))
            lam_back *= (1.0 - k.branching) * dt
        hazard = lam_back if was_dark else lam_dark
        w_pump[i] -= hazard
        if w_pump[i] > 0.0:
            bright[i] = 0.0 if was_dark else 1.0
            continue
        elapsed = (w_pump[i] + hazard) / hazard           # part of the step before the switch
        dark, rest, part = not was_dark, 1.0 - elapsed, 0.0 if was_dark else elapsed
        clock = rng.standard_exponential()
        need = (lam_back if dark else lam_dark) * rest
        while clock < need:
            stay = clock / (lam_back if dark else lam_dark)
            if not dark:
                part += stay
            rest -= stay
            dark = not dark
            clock = rng.standard_exponential()
            need = (lam_back if dark else lam_dark) * rest
        if not dark:
            part += rest
        w_dark[i] = dark
        w_pump[i] = clock - need
        bright[i] = part
        if not was_dark:
            w_depumped[i] = True


@_compiled
def _arrive(k, i, t, dt, z0, v0, w_v, w_z, w_x, w_y, w_vx, w_vy, w_idx, o_velocity, o_time, o_radius, o_transverse):
    """Record atom ``i`` crossing the target plane in the step (linear in the step; ``z0``, ``v0``: its place
    and speed at the step's start). A function of its own, called for the few atoms arriving: the step's
    inlined helpers take numbers only (numba counts references to every array passed, on every call)."""
    z, v = w_z[i], w_v[i]
    frac = (k.distance - z0) / (z - z0)
    j = w_idx[i]
    o_time[j] = t + frac * dt
    o_velocity[j] = v0 + frac * (v - v0)
    back = (1.0 - frac) * dt            # the transverse positions are at the step's end already
    o_radius[j] = math.hypot(w_x[i] - w_vx[i] * back, w_y[i] - w_vy[i] * back)
    o_transverse[j, 0] = w_vx[i]
    o_transverse[j, 1] = w_vy[i]


@_compiled
def nearest(v, dark, alive, centre):
    """Smallest ``|v − centre|`` over the bright atoms in flight."""
    best = math.inf
    for i in range(v.size):
        if alive[i] and not dark[i]:
            d = abs(v[i] - centre)
            if d < best:
                best = d
    return best


@_compiled
def step(rng, k, rep_s, rep_d, t, dt, detuning, large, w_v, w_z, w_x, w_y, w_vx, w_vy, w_clock, w_pump,
         w_photons, w_alive, w_dark, w_depumped, w_budget, w_idx, o_fate, o_velocity, o_time, o_radius,
         o_transverse, finished, bright):
    """One step of every atom in flight; the working-set rows of the atoms done go to ``finished``.

    ``rep_s``, ``rep_d``: the repump lights' saturations and detunings (Hz) in this step; ``bright``
    receives the part of the step each atom spends in the bright level (when pumping is followed).
    Returns how many are done, and how many atoms in flight are in the dark level."""
    done = 0
    n_dark = 0
    recoil = k.recoil
    xd, xd_off = k.k_d * detuning, k.k_d * (detuning - k.split)
    rep_xd = k.k_d * rep_d
    if k.light and k.pumping:
        _pump_pass(rng, k, rep_s, rep_xd, xd, xd_off, dt, w_v, w_z, w_x, w_y, w_vx, w_vy, w_pump, w_alive, w_dark,
                   w_depumped, bright)
    for i in range(w_v.size):
        if not w_alive[i]:
            continue
        v, z0 = w_v[i], w_z[i]
        z = z0 + v * dt
        w_x[i] += w_vx[i] * dt
        w_y[i] += w_vy[i] * dt
        kick = 0.0
        if k.light:
            z_mid = 0.5 * (z0 + z)
            s = _saturation(k, k.peak, z_mid, w_x[i], w_y[i]) if z0 >= k.light_start else 0.0
            v_mid = v - 0.5 * recoil * _rate(k, xd, v, s) * dt
            lam = _rate(k, xd, v_mid, s) * dt
            if k.pumping:
                lam *= bright[i]
            n = 0.0
            if lam <= 0.0:
                pass
            elif large and lam >= k.large:
                # a large mean: the normal law of the same mean and variance λ
                n = max(lam + math.sqrt(lam) * rng.standard_normal(), 0.0)
            else:
                # the atom's clock; when it runs out with ``left`` of the step to go, one photon and then
                # the unit-rate exponential arrivals within ``left`` (1 + Poisson(left)); the arrival that
                # overshoots leaves the fresh clock (memorylessness)
                w_clock[i] -= lam
                if w_clock[i] <= 0.0:
                    left = -w_clock[i]
                    n = 1.0
                    e = rng.standard_exponential()
                    while e <= left:
                        left -= e
                        n += 1.0
                        e = rng.standard_exponential()
                    w_clock[i] = e - left
            if n > 0.0:
                spread = recoil * math.sqrt(n / 3.0)
                kick = spread * rng.standard_normal() - recoil * n
                z += 0.5 * dt * kick
                w_photons[i] += n
                side = spread * rng.standard_normal()
                w_vx[i] += side
                w_x[i] += 0.5 * dt * side
                side = spread * rng.standard_normal()
                w_vy[i] += side
                w_y[i] += 0.5 * dt * side
        w_v[i] = v + kick
        w_z[i] = z
        fate = 0
        if z >= k.distance:
            fate = ARRIVED
            _arrive(k, i, t, dt, z0, v, w_v, w_z, w_x, w_y, w_vx, w_vy, w_idx, o_velocity, o_time, o_radius,
                    o_transverse)
        elif v + kick <= 0.0:
            fate = TURNED_BACK
        elif k.loss and w_photons[i] > w_budget[i]:
            fate = DARK
        if fate:
            o_fate[w_idx[i]] = fate
            finished[done] = i
            done += 1
        elif w_dark[i]:
            n_dark += 1
    return done, n_dark
