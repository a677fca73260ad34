"""The flight's step compiled (numba): one pass over the atoms in flight per step.

:mod:`sweepgen._stepping` runs these steps one after another in compiled code.

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
* atoms that are done are skipped rather than parked far behind the source;
* a bright atom far from resonance first runs its photon and pump clocks down by
  bounds of its expected events, which need no exponential (:func:`_bound`), and
  only when one of them runs out are its exact rates computed and the event kept
  with probability exact/bound (:func:`_thinned`; thinning, the same law).

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


#: the floating-point liberties the compiled step takes: reassociation, reciprocals, fused multiply-add
#: and fast library maths, but not the assumption that no value is infinite or NaN (parked atoms wait at
#: infinite clocks)
_FAST = {"reassoc", "arcp", "contract", "afn", "nsz"}
#: a bright atom whose bounded expected photons and depumping events in a step are both below this is
#: tried against the bounds first (:func:`_bound`, :func:`_thinned`); nearer resonance the rates are exact
THIN = 0.5


def _compiled(func):
    return numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=_FAST)(func) if AVAILABLE else func


def _inlined(func):
    """A helper of the step, compiled into it (no call, no reference counting of its arrays per atom)."""
    return numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=_FAST, inline="always")(func) if AVAILABLE else func


@_inlined
def _along(k, z):
    """``q = 1 + ((z − z_f)/z_R)²`` of a Gaussian beam at ``z`` (1 for unbounded light)."""
    if not k.focused:
        return 1.0
    u = (z - k.focus) * k.inv_rayleigh
    return 1.0 + u * u


@_inlined
def _saturation(k, peak, q, x, y):
    """``peak`` (unbounded light) or ``peak/q · exp(−2r²/(w0² q))`` at ``(x, y)`` where the beam has ``q``."""
    if not k.focused:
        return peak
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


@_inlined
def _bound(scale, peak, q, x_start, x_reach):
    """An upper bound of the expected events ``scale·s/(1 + s + x²)`` of a step, without the exponential.

    ``s ≤ peak/q`` (on the beam's axis the transverse factor is 1), and the
    mid-point ``x`` lies in ``[x_start − x_reach, x_start]`` (the mid-point velocity
    is at most ``x_reach`` of ``x`` below the start velocity), where ``x²`` is
    smallest at zero or at the end nearer it. ``scale·p/(q(1 + x²) + p)`` is that
    rate with ``p = peak``, rearranged to one division."""
    lo = x_start - x_reach
    if lo <= 0.0 <= x_start:
        x2 = 0.0
    elif x_start < 0.0:
        x2 = x_start * x_start
    else:
        x2 = lo * lo
    return scale * peak / (q * (1.0 + x2) + peak)


@_inlined
def _bounds(k, scale, q, x_start, x_shift, x_reach):
    """Bounds (:func:`_bound`) of a bright atom's expected photons and depumping events in the step;
    ``x_shift`` takes ``x`` from the cycling level to the off-resonant one."""
    lam_b = _bound(scale, k.peak, q, x_start, x_reach)
    if not k.pumping:
        return lam_b, 0.0
    return lam_b, k.branching * _bound(scale, k.strength * k.peak, q, x_start + x_shift, x_reach)


@_inlined
def _follow(rng, dark, rest, part, lam_dark, lam_back):
    """Depumping and repumping through the last ``rest`` of a step from the level ``dark``, with a fresh
    ``Exp(1)`` clock: ``(dark, clock left, bright part, switched)``.

    Bright atoms go dark at ``b·R_off``, dark ones return at ``(1 − b)·R_rep``
    (``lam_dark``, ``lam_back``: expected events in the whole step); the atom is
    followed switch by switch, a fresh clock after each; ``part`` (the bright part
    of the step so far) grows by the bright time.
    """
    switched = False
    clock = rng.standard_exponential()
    need = (lam_back if dark else lam_dark) * rest
    while clock < need:
        stay = clock / (lam_back if dark else lam_dark)
        if not dark:
            part += stay
        rest -= stay
        dark = not dark
        switched = True
        clock = rng.standard_exponential()
        need = (lam_back if dark else lam_dark) * rest
    if not dark:
        part += rest
    return dark, clock - need, part, switched


@_inlined
def _switches(rng, pump, was_dark, lam_dark, lam_back):
    """Depumping and repumping over one step with the atom's clock ``pump`` (as
    :meth:`sweepgen._flight._Propagation._pump`): ``(dark, clock, bright part)`` at its end."""
    hazard = lam_back if was_dark else lam_dark
    pump -= hazard
    if pump > 0.0:
        return was_dark, pump, 0.0 if was_dark else 1.0
    elapsed = (pump + hazard) / hazard           # part of the step before the switch
    dark, clock, part, _ = _follow(rng, not was_dark, 1.0 - elapsed, 0.0 if was_dark else elapsed, lam_dark,
                                   lam_back)
    return dark, clock, part


@_inlined
def _repump(k, rep_s, rep_xd, v, z_mid, q, x, y, dt):
    """Expected returns to the bright level in the step, ``(1 − b)·Σ R_rep·dt``
    (:func:`sweepgen._flight.repump_counts`); none before the light starts."""
    if z_mid < k.light_start:
        return 0.0
    total = 0.0
    for j in range(rep_s.size):
        total += _rate(k, rep_xd[j], v, _saturation(k, rep_s[j], q, x, y))
    return total * (1.0 - k.branching) * dt


@_inlined
def _arrivals(rng, rest):
    """Unit-rate exponential arrivals within ``rest``: ``(count, clock left)`` (the arrival that overshoots
    leaves the fresh clock; memorylessness). The count is Poisson(``rest``)."""
    n = 0.0
    e = rng.standard_exponential()
    while e <= rest:
        rest -= e
        n += 1.0
        e = rng.standard_exponential()
    return n, e - rest


@_inlined
def _photons(rng, k, lam, large, clock):
    """Photons of one atom in the step (expected ``lam``) and its clock afterwards.

    A large mean (``large`` and ``lam ≥ k.large``) draws the normal law of the same
    mean and variance and leaves the clock waiting (memoryless). Otherwise the
    clock runs down by ``lam``; when it runs out with ``left`` of the step to go,
    one photon and then the arrivals within ``left`` (``1 + Poisson(left)``).
    """
    if lam <= 0.0:
        return 0.0, clock
    if large and lam >= k.large:
        n = lam + math.sqrt(lam) * rng.standard_normal()
        return (n if n > 0.0 else 0.0), clock
    clock -= lam
    if clock > 0.0:
        return 0.0, clock
    n, clock = _arrivals(rng, -clock)
    return n + 1.0, clock


@_inlined
def _thinned(rng, k, rep_s, rep_xd, xd, xd_off, v, z_mid, q, x, y, dt, lam_b, dark_b, clock0, pump0, clock, pump):
    """A bright atom whose photon or pump clock ran out against the bounds ``lam_b``, ``dark_b`` of its
    expected events (clocks ``clock0``, ``pump0`` before the step, ``clock``, ``pump`` after it):
    ``(photons, clock, pump, dark, went dark)``.

    Thinning (P. A. W. Lewis and G. S. Shedler, Naval Res. Logist. Q. 26, 403
    (1979)): the clock that ran out marks a candidate event at the part
    ``clock0/lam_b`` of the step, kept with probability exact/bound; from there on
    the exact process runs with a fresh clock (memorylessness). So the photons
    are Poisson(``λ·part``) and the switches those of :func:`_switches`, in law.
    """
    s = _saturation(k, k.peak, q, x, y)
    v_mid = v - 0.5 * dt * k.recoil * _rate(k, xd, v, s)
    lam = _rate(k, xd, v_mid, s) * dt
    dark, went, part = False, False, 1.0
    if pump <= 0.0:
        lam_dark = _off(k, xd_off, v_mid, s, dt)
        lam_back = _repump(k, rep_s, rep_xd, v, z_mid, q, x, y, dt)
        e = pump0 / dark_b
        went = rng.random() * dark_b < lam_dark
        dark, pump, part, switched = _follow(rng, went, 1.0 - e, e, lam_dark, lam_back)
        went = went or switched
    lam *= part
    n = 0.0
    if clock <= 0.0:
        e = clock0 / lam_b
        n = 1.0 if rng.random() * lam_b < lam else 0.0
        more, clock = _arrivals(rng, lam * (1.0 - e))
        n += more
    return n, clock, pump, dark, went


@_inlined
def _kicks(rng, recoil, n):
    """The velocity kicks of ``n`` photons: ``(along z, x, y)``. One recoil against the motion per photon,
    plus the sum of ``n`` isotropic emissions (mean 0, variance ``n/3`` recoils² per axis, uncorrelated)."""
    spread = recoil * math.sqrt(n / 3.0)
    kick = spread * rng.standard_normal() - recoil * n
    return kick, spread * rng.standard_normal(), spread * rng.standard_normal()


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
def nearest_two(v, dark, alive, centre, other):
    """Smallest ``|v − centre|`` and ``|v − other|`` over the bright atoms in flight, in one pass."""
    best = best_other = math.inf
    for i in range(v.size):
        if alive[i] and not dark[i]:
            d, d_other = abs(v[i] - centre), abs(v[i] - other)
            if d < best:
                best = d
            if d_other < best_other:
                best_other = d_other
    return best, best_other


@_compiled
def nearest_two(v, dark, alive, centre, other):
    """Smallest ``|v − centre|`` and ``|v − other|`` over the bright atoms in flight, in one pass."""
    best = best_other = math.inf
    for i in range(v.size):
        if alive[i] and not dark[i]:
            d, d_other = abs(v[i] - centre), abs(v[i] - other)
            if d < best:
                best = d
            if d_other < best_other:
                best_other = d_other
    return best, best_other


@_compiled
def step(rng, k, rep_s, rep_d, t, dt, detuning, large, w_v, w_z, w_x, w_y, w_vx, w_vy, w_clock, w_pump,
         w_photons, w_alive, w_dark, w_depumped, w_budget, w_idx, o_fate, o_velocity, o_time, o_radius,
         o_transverse, finished):
    """One step of every atom in flight, in one pass (drift, rates, depumping and repumping, photons and kicks,
    fates); the working-set rows of the atoms done go to ``finished``. A bright atom far from resonance is
    first tried against bounds of its rates (:func:`_bounds`, :func:`_thinned`). ``rep_s``, ``rep_d``: the
    repump lights' saturations and detunings (Hz) in this step. Returns how many are done, and how many
    atoms in flight are in the dark level."""
    done = 0
    n_dark = 0
    recoil = k.recoil
    xd, xd_off = k.k_d * detuning, k.k_d * (detuning - k.split)
    rep_xd = k.k_d * rep_d
    half = 0.5 * dt
    scale = k.f_gamma * dt
    # how far below the start velocity's x the mid-point's can be: half a step at the largest rate
    x_reach = k.k_v * half * recoil * k.f_gamma * k.peak / (1.0 + k.peak)
    for i in range(w_v.size):
        if not w_alive[i]:
            continue
        v, z0 = w_v[i], w_z[i]
        z = z0 + v * dt
        x = w_x[i] + w_vx[i] * dt
        y = w_y[i] + w_vy[i] * dt
        kick = 0.0
        lit = z0 >= k.light_start
        if k.light and (lit or w_dark[i]):
            z_mid = z0 + v * half
            q = _along(k, z_mid)
            was_dark = w_dark[i]
            n = 0.0
            exact = True
            if not was_dark:
                lam_b, dark_b = _bounds(k, scale, q, xd + k.k_v * v, xd_off - xd, x_reach)
                if lam_b < THIN and dark_b < THIN:
                    exact = False
                    clock, pump = w_clock[i] - lam_b, w_pump[i] - dark_b
                    if clock <= 0.0 or pump <= 0.0:
                        n, clock, pump, w_dark[i], went = _thinned(rng, k, rep_s, rep_xd, xd, xd_off, v, z_mid, q,
                                                                   x, y, dt, lam_b, dark_b, w_clock[i], w_pump[i],
                                                                   clock, pump)
                        if went:
                            w_depumped[i] = True
                    w_clock[i], w_pump[i] = clock, pump
            if exact:
                s = _saturation(k, k.peak, q, x, y) if lit else 0.0
                v_mid = v - half * recoil * _rate(k, xd, v, s)
                lam = _rate(k, xd, v_mid, s) * dt
                if k.pumping:
                    lam_dark = _off(k, xd_off, v_mid, s, dt)
                    goes_dark = not was_dark and w_pump[i] <= lam_dark      # the clock runs out in the step
                    lam_back = 0.0
                    if was_dark or goes_dark:
                        lam_back = _repump(k, rep_s, rep_xd, v, z_mid, q, x, y, dt)
                    w_dark[i], w_pump[i], part = _switches(rng, w_pump[i], was_dark, lam_dark, lam_back)
                    if goes_dark:
                        w_depumped[i] = True
                    lam *= part
                n, w_clock[i] = _photons(rng, k, lam, large, w_clock[i])
            if n > 0.0:
                kick, side_x, side_y = _kicks(rng, recoil, n)
                z += half * kick
                w_photons[i] += n
                w_vx[i] += side_x
                x += half * side_x
                w_vy[i] += side_y
                y += half * side_y
        w_x[i], w_y[i], w_v[i], w_z[i] = x, y, v + kick, z
        fate = ARRIVED if z >= k.distance else TURNED_BACK if v + kick <= 0.0 else \
            DARK if k.loss and w_photons[i] > w_budget[i] else 0
        if fate == ARRIVED:
            _arrive(k, i, t, dt, z0, v, w_v, w_z, w_x, w_y, w_vx, w_vy, w_idx, o_velocity, o_time, o_radius,
                    o_transverse)
        if fate:
            o_fate[w_idx[i]] = fate
            finished[done] = i
            done += 1
        elif w_dark[i]:
            n_dark += 1
    return done, n_dark
