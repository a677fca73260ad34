"""The compiled flight's run of steps (numba): the step rule and the detuning, step after step.

:func:`run_steps` advances a compiled flight (:class:`sweepgen._flight._Compiled`)
from one moment at which Python must act (atoms to take in, a working set to
compact and sort, none left in flight, the end of the run) to the next, so that a
run costs a call per such moment rather than several per step. Its step rule is
that of :meth:`sweepgen._flight._Propagation.choose_step`, and :func:`at` and
:func:`extremes` evaluate the main light's detuning from a program's tables
(:meth:`sweepgen.programs.DetuningProgram.tables`,
:meth:`sweepgen.programs.SampledProgram.tables`) as the programs' own methods do,
in the same floating-point operations (tests/test_kernel.py holds them equal).
"""

from __future__ import annotations

import math

import numpy as np

from sweepgen._kernel import _compiled, nearest_two, step
from sweepgen.programs import CONSTANT, SAMPLED, SCHEDULE

#: the run's state carried between calls (a float array): its entries
DT_PREV, SMALLEST, DV_SEEN, STEPS, ATOM_STEPS, PARKED, N_DARK, SORT_DUE = range(8)


@_compiled
def at(p, t):
    """The detuning (Hz) at ``t`` of the program with tables ``p`` (:meth:`sweepgen.programs.DetuningProgram.at`,
    :meth:`sweepgen.programs.SampledProgram.at`)."""
    kind, period, constant, x, c, bounds2, values, bmin, bmax, block = p
    if kind == CONSTANT:
        return constant
    if kind == SCHEDULE:
        tw = t % period
        i = np.searchsorted(x, tw, side="right") - 1
        if i < 0:
            i = 0
        elif i >= c.shape[0]:
            i = c.shape[0] - 1
        dx = tw - x[i]
        value = 0.0
        for j in range(c.shape[1]):
            value = value * dx + c[i, j]
        return value
    n = values.size
    u = (t % period) / (period / n)
    i = int(u)
    if i >= n:
        i = n - 1
    frac = u - i
    a = values[i]
    b = values[i + 1] if i + 1 < n else values[0]
    return a + (b - a) * frac


@_compiled
def _both_sides(p, tb, lo, hi):
    """``lo``, ``hi`` widened by the detuning at ``tb`` and just before it (the periodic wrap may be a jump)."""
    for tt in (tb, np.nextafter(tb, -np.inf)):
        d = at(p, tt)
        lo, hi = min(lo, d), max(hi, d)
    return lo, hi


@_compiled
def _sampled_range(values, bmin, bmax, block, p, q):
    """Extremes of samples ``p..q`` (inclusive) from whole blocks and the samples at their edges
    (:meth:`sweepgen.programs.SampledProgram._range`)."""
    bp, bq = -(-p // block), (q + 1) // block
    if bq <= bp:
        return values[p:q + 1].min(), values[p:q + 1].max()
    mn, mx = bmin[bp:bq].min(), bmax[bp:bq].max()
    if p < bp * block:
        mn, mx = min(mn, values[p:bp * block].min()), max(mx, values[p:bp * block].max())
    if bq * block < q + 1:
        mn, mx = min(mn, values[bq * block:q + 1].min()), max(mx, values[bq * block:q + 1].max())
    return mn, mx


@_compiled
def extremes(p, t0, t1):
    """Smallest and largest detuning over ``[t0, t1]`` (:meth:`sweepgen.programs.DetuningProgram.extremes`,
    :meth:`sweepgen.programs.SampledProgram.extremes`)."""
    kind, period, constant, x, c, bounds2, values, bmin, bmax, block = p
    if kind == CONSTANT:
        return constant, constant
    a, b = at(p, t0), at(p, t1)
    lo, hi = min(a, b), max(a, b)
    if kind == SCHEDULE:
        nb = bounds2.size // 2
        if t1 - t0 >= period:
            for m in range(nb):
                lo, hi = _both_sides(p, bounds2[m], lo, hi)
            return lo, hi
        k0 = math.floor(t0 / period) * period
        i = max(np.searchsorted(bounds2, t0 - k0, side="left") - 1, 0)
        j = min(np.searchsorted(bounds2, t1 - k0, side="right") + 1, 2 * nb)
        for m in range(i, j):
            tb = (k0 + bounds2[m]) if m < nb else ((k0 + period) + bounds2[m - nb])
            if t0 < tb < t1:
                lo, hi = _both_sides(p, tb, lo, hi)
        return lo, hi
    n = values.size
    dt = period / n
    i0 = math.floor(t0 / dt) + 1
    i1 = math.ceil(t1 / dt) - 1
    if i1 < i0:
        return lo, hi
    if i1 - i0 + 1 >= n:
        return min(lo, bmin.min()), max(hi, bmax.max())
    j0, j1 = i0 % n, i1 % n
    if j0 <= j1:
        mn, mx = _sampled_range(values, bmin, bmax, block, j0, j1)
    else:
        mn, mx = _sampled_range(values, bmin, bmax, block, j0, n - 1)
        mn2, mx2 = _sampled_range(values, bmin, bmax, block, 0, j1)
        mn, mx = min(mn, mn2), max(mx, mx2)
    return min(lo, mn), max(hi, mx)


@_compiled
def _choose(k, p, rule, state, t, vmax, w_v, w_dark, w_alive):
    """The step and the detuning at its mid-point: :meth:`sweepgen._flight._Propagation.choose_step`."""
    max_move, t_end, next_emission, all_emitted, lead, dv_max, s_peak, gamma, wavelength, fraction, split, off = rule
    dt_try = min(max_move / max(vmax, 1e-9), t_end - t)
    if not all_emitted:
        dt_try = min(dt_try, max(next_emission - lead - t, lead))
    if not k.light:
        return dt_try, 0.0
    dt = min(dt_try, 1.5 * state[DT_PREV])
    d_lo, d_hi = extremes(p, t, t + dt)
    centre = -0.5 * wavelength * (d_lo + d_hi)
    near, near_off = nearest_two(w_v, w_dark, w_alive, centre, centre + wavelength * split)
    if off:
        near = min(near, near_off)
    gap = max(near - 0.5 * wavelength * (d_hi - d_lo) - dv_max, 0.0)
    x = 2.0 * 2.0 * math.pi * (0.0 + gap / wavelength) / gamma      # physics.scattering_rate at detuning 0
    r_bound = fraction * gamma * s_peak / (1.0 + s_peak + x * x)
    if k.recoil * r_bound * dt > dv_max:
        dt = dv_max / (k.recoil * r_bound)
    state[DV_SEEN] = max(state[DV_SEEN], k.recoil * r_bound * dt)
    return dt, at(p, t + 0.5 * dt)


@_compiled
def run_steps(rng, k, p, rule, rep_s, rep_follows, rep_offset, rep_fixed, state, t, r_peak, park_z, w_v, w_z, w_x,
              w_y, w_vx, w_vy, w_clock, w_pump, w_photons, w_alive, w_dark, w_depumped, w_budget, w_lit, w_idx, o_fate,
              o_velocity, o_time, o_radius, o_transverse, o_photons, o_dark, o_depumped, finished):
    """Steps of the compiled flight from ``t`` until Python must act; returns the time reached.

    It stops after the step at which no atom is left in flight, the run's end is
    reached, atoms are due to be taken in (``rule``'s next emission within a lead),
    the parked atoms make up a sixteenth of the working set, or ``state[SORT_DUE]``
    steps have been made: the very conditions :meth:`sweepgen._flight._Propagation.take_in`
    and :func:`sweepgen._flight.propagate` act on. The atoms done are recorded in
    the ``o_`` arrays and parked, as :meth:`sweepgen._flight._Propagation._record`
    and :meth:`sweepgen._flight._Working.park` do; ``state`` carries the step record.
    """
    t_end, next_emission, all_emitted, lead = rule[1], rule[2], rule[3], rule[4]
    rep_d = np.empty(rep_s.size)
    size = w_v.size
    while True:
        vmax = w_v.max()            # the parked atoms' 1 m/s included, as in the step-by-step rule
        dt, detuning = _choose(k, p, rule, state, t, vmax, w_v, w_dark, w_alive)
        state[DT_PREV] = dt
        state[SMALLEST] = min(state[SMALLEST], dt)
        state[STEPS] += 1.0
        state[ATOM_STEPS] += size - state[PARKED]
        for j in range(rep_s.size):
            rep_d[j] = detuning + rep_offset[j] if rep_follows[j] else rep_fixed[j]
        done, n_dark = step(rng, k, rep_s, rep_d, t, dt, detuning, dt * r_peak >= k.large, w_v, w_z, w_x, w_y,
                            w_vx, w_vy, w_clock, w_pump, w_photons, w_alive, w_dark, w_depumped, w_budget, w_idx,
                            o_fate, o_velocity, o_time, o_radius, o_transverse, finished)
        state[N_DARK] = n_dark
        for m in range(done):
            i = finished[m]
            j = w_idx[i]
            o_photons[j], o_dark[j], o_depumped[j] = w_photons[i], w_dark[i], w_depumped[i]
            w_v[i], w_z[i], w_lit[i], w_alive[i], w_dark[i], w_pump[i] = 1.0, park_z, 0.0, False, False, math.inf
            if w_budget.size:
                w_budget[i] = math.inf
        state[PARKED] += done
        t = t + dt
        parked = state[PARKED]
        if size - parked == 0 or t >= t_end:
            return t
        if (not all_emitted and next_emission <= t + lead) or (parked and 16 * parked >= size):
            return t
        if state[STEPS] >= state[SORT_DUE]:
            return t

