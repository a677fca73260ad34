"""The flight's step compiled (numba): one pass over the atoms in flight per step.

:func:`run_steps` runs these steps one after another: from one moment at which
Python must act (atoms to take in, a working set to compact and sort, none left
in flight, the end of the run) to the next, with the step rule of
:meth:`sweepgen._flight._Propagation.choose_step` and the main light's detuning
evaluated from a program's tables (:meth:`sweepgen.programs.DetuningProgram.tables`,
:meth:`sweepgen.programs.SampledProgram.tables`) as the programs' own methods do
(tests/test_kernel.py holds them equal). (All compiled functions live in this one
file: numba's cache of a function is renewed when its own file changes, not when a
function it calls changes in another.)

The same model as the NumPy step of :mod:`sweepgen._flight` (written out in
:mod:`sweepgen.simulate`), atom by atom instead of array by array: drift, the
saturation at the atom's place, the expected photons at the step's mid-point
velocity, depumping and repumping, the photons and kicks, and the fates. Its
random numbers come from a generator compiled into the step (:func:`stream`:
NumPy's SFC64 seeded from the run's :class:`numpy.random.Generator`, with the
ziggurat's normal and exponential draws; a draw costs a quarter to a half of a
draw from the run's generator), in another order than the NumPy step, so the two give
statistically identical results, not the same numbers.

A step makes two passes over the working set. The first (:func:`expected`) works
out every atom's expected photons and depumping events with no branch and no call
(the Gaussian beam's exponential is :func:`_exp`), so that the compiler does four
atoms at once with vector instructions; the second draws, atom by atom. Two draws
differ in method from the NumPy step, not in law:

* an atom whose photon clock runs out with ``u`` left of the step scatters
  ``1 + Poisson(u)`` photons; here the Poisson count is drawn by inversion
  (:func:`_poisson`) and the fresh clock is a new ``Exp(1)`` draw, independent of
  the count (the same law: memorylessness);
* atoms that are done are skipped rather than parked far behind the source.

Used when numba is installed (``pip install 'sweepgen[fast]'``); otherwise
:mod:`sweepgen._flight` flies the atoms with NumPy (``AVAILABLE``).
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from sweepgen.programs import CONSTANT, SAMPLED, SCHEDULE

try:
    import numba
    from llvmlite import ir as _ir
    from numba.extending import intrinsic as _intrinsic
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
#: the same without reassociation, for the step's first pass and its exponential (which splits ln2 in two
#: parts that reassociation would merge, costing it accuracy)
_VECTOR = _FAST - {"reassoc"}


# -- the step's random numbers: a small generator compiled into the step -------------------------
# The generator's state travels through the step's helpers as a tuple of four 64-bit words, so that
# a draw costs a couple of nanoseconds (no call into another library, no array per draw). The
# generator is NumPy's SFC64 (:class:`numpy.random.SFC64`; the same words, tests/test_kernel.py), and
# the normal and exponential laws are drawn by the ziggurat of G. Marsaglia and W. W. Tsang,
# J. Stat. Softw. 5(8) (2000), the way :class:`numpy.random.Generator` lays it out: one 64-bit word per
# draw (8 of its bits choose the layer), the rare draws outside a layer's box finished by
# :func:`_normal_rare` and :func:`_exponential_rare`.
_U = np.uint64
# the right edges for 256 layers (Marsaglia & Tsang 2000; recalled, and the tables built from them agree
# with NumPy's to 1e-13, tests/test_kernel.py)
_NORMAL_R = 3.6541528853610088
_EXPONENTIAL_R = 7.69711747013104972


def _ziggurat(right, density, inverse, tail, bits):
    """Tables of a 256-layer ziggurat of the decreasing ``density`` (unnormalised; ``inverse`` its inverse)
    with right edge ``right`` and the area ``tail`` beyond it: ``(k, w, f)``, the integers a draw of
    ``bits`` bits is compared with, the layers' widths per unit of that draw and the density at their
    edges. Every layer, and the base strip with the tail, has the area ``v = right·f(right) + tail``
    (Marsaglia & Tsang 2000)."""
    v = right * density(right) + tail
    x = np.empty(256)
    x[255] = right
    for i in range(255, 1, -1):
        x[i - 1] = inverse(v / x[i] + density(x[i]))
    m = 2.0 ** bits
    k, w, f = np.zeros(256, dtype=np.uint64), x / m, np.array([density(xi) for xi in x])
    base = v / density(right)                  # the base strip's width, tail included
    k[0], w[0], f[0] = int(right / base * m), base / m, 1.0
    k[2:] = (x[1:255] / x[2:] * m).astype(np.uint64)
    return k, w, f


_KI, _WI, _FI = _ziggurat(_NORMAL_R, lambda x: math.exp(-0.5 * x * x), lambda y: math.sqrt(-2.0 * math.log(y)),
                          math.sqrt(math.pi / 2.0) * math.erfc(_NORMAL_R / math.sqrt(2.0)), 52)
_KE, _WE, _FE = _ziggurat(_EXPONENTIAL_R, lambda x: math.exp(-x), lambda y: -math.log(y), math.exp(-_EXPONENTIAL_R), 53)


def stream(rng: np.random.Generator) -> np.ndarray:
    """The compiled step's generator state (four 64-bit words), seeded from ``rng`` through
    :class:`numpy.random.SeedSequence`: the run's seed fixes it, and it is independent of ``rng``'s own draws."""
    seed = np.random.SeedSequence(rng.integers(0, 2**63, size=4).tolist())
    return np.random.SFC64(seed).state["state"]["state"].astype(np.uint64)


def _compiled(func, fastmath=_FAST):
    return numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=fastmath)(func) if AVAILABLE else func


def _inlined_vector(func):
    """A helper of a vectorised pass (:func:`_vector`), compiled into it."""
    return _inlined(func, _VECTOR)


def _vector(func):
    """A pass over the atoms with no branch and no call, compiled so that it is vectorised (:data:`_VECTOR`)."""
    return _compiled(func, _VECTOR)


def _inlined(func, fastmath=_FAST):
    """A helper of the step, compiled into it (no call, no reference counting of its arrays per atom)."""
    return numba.njit(cache=True, nogil=True, error_model="numpy", fastmath=fastmath, inline="always")(func) \
        if AVAILABLE else func


def _exact(func):
    """A rare branch of a draw, compiled on its own with exact floating point (so that it decides as NumPy's)."""
    return numba.njit(cache=True, nogil=True, error_model="numpy")(func) if AVAILABLE else func


@_inlined
def _word(s):
    """The next 64-bit word of the generator ``s`` (SFC64, as :class:`numpy.random.SFC64`) and its next state."""
    a, b, c, w = s
    word = a + b + w
    return word, (b ^ (b >> _U(11)), c + (c << _U(3)), ((c << _U(24)) | (c >> _U(40))) + word, w + _U(1))


@_inlined
def _uniform(s):
    """A uniform draw in [0, 1) (53 bits) and the next state."""
    word, s = _word(s)
    return np.float64(word >> _U(11)) * (1.0 / 9007199254740992.0), s


@_inlined
def _normal_try(s):
    """One try of the normal ziggurat: ``(x, layer, bits, inside its layer's box, next state)``; the low 8
    bits of the word choose the layer, the next its sign, 52 more ``x``."""
    word, s = _word(s)
    layer, word = word & _U(0xff), word >> _U(8)
    bits = (word >> _U(1)) & _U(0x000fffffffffffff)
    x = np.float64(bits) * _WI[layer] * (1.0 - 2.0 * np.float64(word & _U(1)))
    return x, layer, bits, bits < _KI[layer], s


@_exact
def _normal_rare(s, layer, bits, x):
    """A normal draw that fell outside its layer's box (``x`` from ``bits`` in ``layer``): the wedge's test,
    or a draw from the tail beyond the right edge (layer 0), else a fresh draw."""
    while True:
        if layer == 0:
            while True:
                u, s = _uniform(s)
                e, s = _uniform(s)
                tail = -math.log1p(-u) / _NORMAL_R
                if -2.0 * math.log1p(-e) > tail * tail:
                    return (-(_NORMAL_R + tail) if (bits >> _U(8)) & _U(1) else _NORMAL_R + tail), s
        else:
            u, s = _uniform(s)
            if (_FI[layer - 1] - _FI[layer]) * u + _FI[layer] < math.exp(-0.5 * x * x):
                return x, s
        x, layer, bits, inside, s = _normal_try(s)
        if inside:
            return x, s


@_inlined
def _normal(s):
    """A standard normal draw and the next state (the ziggurat; 99 % of draws end in the box)."""
    x, layer, bits, inside, s = _normal_try(s)
    if inside:
        return x, s
    return _normal_rare(s, layer, bits, x)


@_inlined
def _exponential_try(s):
    """One try of the exponential ziggurat: ``(x, layer, inside its layer's box, next state)``; bits 3 to 10
    of the word choose the layer, the 53 above them ``x``."""
    word, s = _word(s)
    word >>= _U(3)
    layer, word = word & _U(0xff), word >> _U(8)
    return np.float64(word) * _WE[layer], layer, word < _KE[layer], s


@_exact
def _exponential_rare(s, layer, x):
    """An exponential draw that fell outside its layer's box: the tail beyond the right edge (layer 0), the
    wedge's test, else a fresh draw."""
    while True:
        u, s = _uniform(s)
        if layer == 0:
            return _EXPONENTIAL_R - math.log1p(-u), s
        if (_FE[layer - 1] - _FE[layer]) * u + _FE[layer] < math.exp(-x):
            return x, s
        x, layer, inside, s = _exponential_try(s)
        if inside:
            return x, s


@_inlined
def _exponential(s):
    """A unit-rate exponential draw and the next state (the ziggurat; 99 % of draws end in the box)."""
    x, layer, inside, s = _exponential_try(s)
    if inside:
        return x, s
    return _exponential_rare(s, layer, x)


NORMAL, EXPONENTIAL, UNIFORM, POISSON = range(4)


@_compiled
def draws(state, n, law, mean=0.0):
    """``n`` draws of ``law`` (:data:`NORMAL`, :data:`EXPONENTIAL`, :data:`UNIFORM`, or :data:`POISSON` of
    ``mean``) from the generator ``state`` (:func:`stream`; advanced in place): the step's own draws, for
    tests against NumPy's and SciPy's."""
    s = (state[0], state[1], state[2], state[3])
    out = np.empty(n)
    for i in range(n):
        if law == NORMAL:
            out[i], s = _normal(s)
        elif law == EXPONENTIAL:
            out[i], s = _exponential(s)
        elif law == POISSON:
            out[i], s = _poisson(s, mean)
        else:
            out[i], s = _uniform(s)
    state[0], state[1], state[2], state[3] = s
    return out


@_compiled
def words(state, n):
    """The generator's next ``n`` 64-bit words (``state`` advanced in place)."""
    s = (state[0], state[1], state[2], state[3])
    out = np.empty(n, dtype=np.uint64)
    for i in range(n):
        out[i], s = _word(s)
    state[0], state[1], state[2], state[3] = s
    return out


if AVAILABLE:
    @_intrinsic
    def _as_float(typingctx, bits):
        """The float64 whose bits are the int64 ``bits`` (a reinterpretation, no conversion)."""
        def codegen(context, builder, signature, args):
            return builder.bitcast(args[0], _ir.DoubleType())
        return numba.types.float64(numba.types.int64), codegen

    @_intrinsic
    def _as_int(typingctx, value):
        """The int64 whose bits are those of the float64 ``value`` (a reinterpretation, no conversion)."""
        def codegen(context, builder, signature, args):
            return builder.bitcast(args[0], _ir.IntType(64))
        return numba.types.int64(numba.types.float64), codegen

# ln2 split as in fdlibm's e_exp.c (recalled; their sum is ln2 to 1e-26): the leading part ends in zero bits,
# so its product with an exponent |n| < 2¹¹ is exact
_LN2_HI, _LN2_LO = 6.93147180369123816490e-01, 1.90821492927058770002e-10
_SHIFT = 6755399441055744.0                 # 1.5·2⁵²: an integer |n| < 2⁵¹ added to it sits in its last bits
_SHIFT_BITS = int(np.float64(_SHIFT).view(np.int64))
_E = tuple(1.0 / math.factorial(i) for i in range(14))


@_inlined_vector
def _exp(x):
    """``e^x`` (``x ≤ 709``) in a few arithmetic operations, inlined, with no branch the compiler cannot
    turn into a selection (``math.exp`` is a call into the C library, which keeps a loop from being
    vectorised).

    ``x = n ln2 + r`` with ``n`` the nearest integer to ``x/ln2`` and ``|r| ≤ ln2/2``, ``ln2`` split into
    a leading part exact in a product with ``n`` and the rest (W. J. Cody and W. Waite, *Software Manual
    for the Elementary Functions*, Prentice-Hall 1980; recalled); ``e^r`` by its Taylor series to
    ``r¹³`` (the remainder below ``(ln2/2)¹⁴/14! ≈ 4·10⁻¹⁸``), evaluated in pairs (Estrin), times
    ``2ⁿ`` built from its bits. Within 4 units in the last place of ``numpy.exp`` (tests/test_kernel.py)
    where it is compiled without reassociation, as in :func:`expected`; inlined into the draws (the
    Poisson count's ``e^mu``, ``mu ≤ 30``) reassociation may merge the two parts of ln2: measured
    within 1.4·10⁻¹⁵ relative there (2.4·10⁻¹⁴ at −708), immaterial to the comparison it serves.
    Below −708 (``e^x < 3.4·10⁻³⁰⁸``, where the light is nil) it gives 0.
    """
    if x < -708.0:
        return 0.0
    n = np.floor(x * 1.4426950408889634 + 0.5)
    r = (x - n * _LN2_HI) - n * _LN2_LO
    r2 = r * r
    r4 = r2 * r2
    e = _E
    q0 = (e[0] + r * e[1]) + r2 * (e[2] + r * e[3])
    q1 = (e[4] + r * e[5]) + r2 * (e[6] + r * e[7])
    q2 = (e[8] + r * e[9]) + r2 * (e[10] + r * e[11])
    p = q0 + r4 * (q1 + r4 * (q2 + r4 * (e[12] + r * e[13])))
    return p * _as_float((_as_int(n + _SHIFT) - _SHIFT_BITS + 1023) << 52)


@_inlined
def _along(k, z):
    """``q = 1 + ((z − z_f)/z_R)²`` of a Gaussian beam at ``z`` (1 for unbounded light)."""
    if not k.focused:
        return 1.0
    u = (z - k.focus) * k.inv_rayleigh
    return 1.0 + u * u


@_inlined
def _beam(k, q, x, y):
    """The beam's factor at ``(x, y)`` where it has ``q``: ``1/q · exp(−2r²/(w0² q))``, the saturation
    there per unit of the peak's (1 for unbounded light)."""
    if not k.focused:
        return 1.0
    return _exp(-(x * x + y * y) * k.inv_waist2 / q) / q


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
def _follow(s, dark, rest, part, lam_dark, lam_back):
    """Depumping and repumping through the last ``rest`` of a step from the level ``dark``, with a fresh
    ``Exp(1)`` clock: ``(dark, clock left, bright part, switched, generator)``.

    Bright atoms go dark at ``b·R_off``, dark ones return at ``(1 − b)·R_rep``
    (``lam_dark``, ``lam_back``: expected events in the whole step); the atom is
    followed switch by switch, a fresh clock after each; ``part`` (the bright part
    of the step so far) grows by the bright time.
    """
    switched = False
    clock, s = _exponential(s)
    need = (lam_back if dark else lam_dark) * rest
    while clock < need:
        stay = clock / (lam_back if dark else lam_dark)
        if not dark:
            part += stay
        rest -= stay
        dark = not dark
        switched = True
        clock, s = _exponential(s)
        need = (lam_back if dark else lam_dark) * rest
    if not dark:
        part += rest
    return dark, clock - need, part, switched, s


@_inlined
def _switches(s, pump, was_dark, lam_dark, lam_back):
    """Depumping and repumping over one step with the atom's clock ``pump`` (as
    :meth:`sweepgen._flight._Propagation._pump`): ``(dark, clock, bright part, generator)`` at its end."""
    hazard = lam_back if was_dark else lam_dark
    pump -= hazard
    if pump > 0.0:
        return was_dark, pump, 0.0 if was_dark else 1.0, s
    elapsed = (pump + hazard) / hazard           # part of the step before the switch
    dark, clock, part, _, s = _follow(s, not was_dark, 1.0 - elapsed, 0.0 if was_dark else elapsed, lam_dark,
                                      lam_back)
    return dark, clock, part, s


@_inlined
def _repump(k, rep_s, rep_xd, v, z_mid, beam, dt):
    """Expected returns to the bright level in the step, ``(1 − b)·Σ R_rep·dt``
    (:func:`sweepgen._flight.repump_counts`), the lights' saturations ``rep_s`` times the beam's factor
    ``beam`` at the atom; none before the light starts."""
    if z_mid < k.light_start:
        return 0.0
    total = 0.0
    for j in range(rep_s.size):
        total += _rate(k, rep_xd[j], v, rep_s[j] * beam)
    return total * (1.0 - k.branching) * dt


@_inlined
def _arrivals(s, rest):
    """Unit-rate exponential arrivals within ``rest``: ``(count, clock left, generator)`` (the arrival that
    overshoots leaves the fresh clock; memorylessness). The count is Poisson(``rest``)."""
    n = 0.0
    e, s = _exponential(s)
    while e <= rest:
        rest -= e
        n += 1.0
        e, s = _exponential(s)
    return n, e - rest, s


@_inlined
def _poisson(s, mu):
    """A Poisson(``mu``) count and the generator, by inversion of one uniform ``u``: the count is the
    number of partial sums ``S_j = Σ_{i≤j} mu^i/i!`` at or below ``u·e^mu`` (the cumulative probabilities
    times ``e^mu``; L. Devroye, *Non-Uniform Random Variate Generation*, Springer 1986, §X.3, recalled).
    The first eight are compared without a branch (no mispredicted loop exit for the usual counts of a
    few photons); a count beyond them goes on term by term. Above ``mu = 30`` (never in a step whose
    large means take the normal law) the unit-rate arrivals within ``mu`` are counted instead."""
    if mu > 30.0:
        n, _, s = _arrivals(s, mu)
        return n, s
    u, s = _uniform(s)
    w = u * _exp(mu)
    m2 = mu * mu
    m3, m4 = m2 * mu, m2 * m2
    s1 = 1.0 + mu
    s3 = s1 + m2 * 0.5 + m3 * (1.0 / 6.0)
    s5 = s3 + m4 * (1.0 / 24.0) + m4 * mu * (1.0 / 120.0)
    s7 = s5 + m4 * m2 * (1.0 / 720.0) + m4 * m3 * (1.0 / 5040.0)
    s2 = s1 + m2 * 0.5
    s4 = s3 + m4 * (1.0 / 24.0)
    s6 = s5 + m4 * m2 * (1.0 / 720.0)
    n = float((1.0 <= w) + (s1 <= w) + (s2 <= w) + (s3 <= w) + (s4 <= w) + (s5 <= w) + (s6 <= w) + (s7 <= w))
    if n == 8.0:
        term, total = m4 * m3 * (1.0 / 5040.0), s7
        while True:
            term *= mu / n
            total += term
            if total > w:
                break
            n += 1.0
    return n, s


@_inlined
def _photons(s, k, lam, large, clock):
    """Photons of one atom in the step (expected ``lam``), its clock afterwards and the generator.

    A large mean (``large`` and ``lam ≥ k.large``) draws the normal law of the same
    mean and variance and leaves the clock waiting (memoryless). Otherwise the
    clock runs down by ``lam``; when it runs out with ``left`` of the step to go,
    one photon and then the arrivals within ``left``: ``1 + Poisson(left)``
    (:func:`_poisson`), and a fresh ``Exp(1)`` clock (memorylessness).
    """
    if lam <= 0.0:
        return 0.0, clock, s
    if large and lam >= k.large:
        xi, s = _normal(s)
        n = lam + math.sqrt(lam) * xi
        return (n if n > 0.0 else 0.0), clock, s
    clock -= lam
    if clock > 0.0:
        return 0.0, clock, s
    n, s = _poisson(s, -clock)
    clock, s = _exponential(s)
    return n + 1.0, clock, s


@_inlined
def _kicks(s, recoil, n):
    """The velocity kicks of ``n`` photons: ``(along z, x, y, generator)``. One recoil against the motion per photon,
    plus the sum of ``n`` isotropic emissions (mean 0, variance ``n/3`` recoils² per axis, uncorrelated)."""
    spread = recoil * math.sqrt(n / 3.0)
    along, s = _normal(s)
    side_x, s = _normal(s)
    side_y, s = _normal(s)
    return spread * along - recoil * n, spread * side_x, spread * side_y, s


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


@_vector
def expected(k, dt, xd, xd_off, peak, w_v, w_z, w_x, w_y, w_vx, w_vy, lam, lam_dark, beam):
    """The step's first pass, over every atom of the working set (those done too: no branch, so that the
    pass is vectorised): the expected photons ``lam`` of a bright atom, its expected depumping events
    ``lam_dark`` (at the mid-point velocity) and the beam's transverse factor over ``q`` at its place
    (``beam``, for the repump lights), where the drifted atom is (as :func:`step`); ``peak`` is the
    saturation on the axis in this step (the beam's times the light's level)."""
    half = 0.5 * dt
    for i in range(w_v.size):
        v, z0 = w_v[i], w_z[i]
        x = w_x[i] + w_vx[i] * dt
        y = w_y[i] + w_vy[i] * dt
        q = _along(k, z0 + v * half)
        g = _beam(k, q, x, y)
        sat = peak * g if z0 >= k.light_start else 0.0
        v_mid = v - half * k.recoil * _rate(k, xd, v, sat)
        lam[i] = _rate(k, xd, v_mid, sat) * dt
        lam_dark[i] = _off(k, xd_off, v_mid, sat, dt)
        beam[i] = g


@_compiled
def step(words, k, peak, rep_s, rep_d, t, dt, detuning, large, w_v, w_z, w_x, w_y, w_vx, w_vy, w_clock, w_pump,
         w_photons, w_alive, w_dark, w_depumped, w_budget, w_idx, o_fate, o_velocity, o_time, o_radius,
         o_transverse, finished):
    """One step of every atom in flight (drift, rates, depumping and repumping, photons and kicks, fates),
    drawing from the generator ``words`` (:func:`stream`); the working-set rows of the atoms done go to
    ``finished``. The expected events come first for all atoms at once (:func:`expected`), then the
    draws atom by atom. ``rep_s``, ``rep_d``: the repump lights' saturations and detunings (Hz) in this
    step, ``peak`` the slowing light's saturation on the axis (both times their levels in the step).
    Returns how many are done, and how many atoms in flight are in the dark level."""
    s = (words[0], words[1], words[2], words[3])
    done = n_dark = 0
    recoil = k.recoil
    rep_xd = k.k_d * rep_d
    half = 0.5 * dt
    size = w_v.size
    lams, darks, beams = np.empty(size), np.empty(size), np.empty(size)
    if k.light:
        expected(k, dt, k.k_d * detuning, k.k_d * (detuning - k.split), peak, w_v, w_z, w_x, w_y, w_vx, w_vy, lams,
                 darks, beams)
    for i in range(size):
        if not w_alive[i]:
            continue
        v, z0 = w_v[i], w_z[i]
        z = z0 + v * dt
        x = w_x[i] + w_vx[i] * dt
        y = w_y[i] + w_vy[i] * dt
        kick = 0.0
        if k.light and (z0 >= k.light_start or w_dark[i]):
            was_dark = w_dark[i]
            lam = lams[i]
            if k.pumping:
                lam_dark = darks[i]
                goes_dark = not was_dark and w_pump[i] <= lam_dark      # the clock runs out in the step
                lam_back = 0.0
                if was_dark or goes_dark:
                    lam_back = _repump(k, rep_s, rep_xd, v, z0 + v * half, beams[i], dt)
                w_dark[i], w_pump[i], part, s = _switches(s, w_pump[i], was_dark, lam_dark, lam_back)
                if goes_dark:
                    w_depumped[i] = True
                lam *= part
            n, w_clock[i], s = _photons(s, k, lam, large, w_clock[i])
            if n > 0.0:
                kick, side_x, side_y, s = _kicks(s, recoil, n)
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
    words[0], words[1], words[2], words[3] = s
    return done, n_dark


# -- the run of steps: the step rule and the detuning, compiled --------------------------------
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


#: s: a time this close before an edge of the lights' levels counts as past it (:data:`sweepgen.lighting.EDGE_EPS`)
EDGE_EPS = 1e-12


@_compiled
def segment(edges, period, t):
    """The stretch of the lights' levels holding the instant just after ``t``
    (:meth:`sweepgen.lighting.LightLevels.segment`; the edges are few, so a scan)."""
    n = edges.size
    if n == 0:
        return 0
    tw = (t + EDGE_EPS) % period
    for j in range(n):
        if edges[j] > tw:
            return j - 1 if j > 0 else n - 1
    return n - 1


@_compiled
def next_edge(edges, period, t):
    """The first time after ``t`` at which a light's level changes (:meth:`sweepgen.lighting.LightLevels.next_edge`)."""
    n = edges.size
    if n == 0:
        return math.inf
    u = t + EDGE_EPS
    tw = u % period
    for j in range(n):
        if edges[j] > tw:
            return u - tw + edges[j]
    return u - tw + period + edges[0]


@_compiled
def _choose(k, p, rule, state, t, vmax, w_v, w_dark, w_alive, edge, level):
    """The step and the detuning at its mid-point: :meth:`sweepgen._flight._Propagation.choose_step`
    (``edge``: the next change of the lights' levels; ``level``: the slowing light's until then)."""
    max_move, t_end, next_emission, all_emitted, lead, dv_max, s_peak, gamma, wavelength, fraction, split, off = rule
    dt_try = min(max_move / max(vmax, 1e-9), t_end - t)
    if not all_emitted:
        dt_try = min(dt_try, max(next_emission - lead - t, lead))
    if not k.light:
        return dt_try, 0.0
    dt = min(dt_try, 1.5 * state[DT_PREV], edge - t)
    s_peak *= level
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
def run_steps(words, k, p, rule, edges, levels, period, rep_s, rep_follows, rep_offset, rep_fixed, state, t, r_peak,
              park_z, w_v, w_z, w_x, w_y, w_vx, w_vy, w_clock, w_pump, w_photons, w_alive, w_dark, w_depumped,
              w_budget, w_lit, w_idx, o_fate, o_velocity, o_time, o_radius, o_transverse, o_photons, o_dark,
              o_depumped, finished):
    """Steps of the compiled flight from ``t`` until Python must act; returns the time reached.

    It stops after the step at which no atom is left in flight, the run's end is
    reached, atoms are due to be taken in (``rule``'s next emission within a lead),
    the parked atoms make up a sixteenth of the working set, or ``state[SORT_DUE]``
    steps have been made: the very conditions :meth:`sweepgen._flight._Propagation.take_in`
    and :func:`sweepgen._flight.propagate` act on. The atoms done are recorded in
    the ``o_`` arrays and parked, as :meth:`sweepgen._flight._Propagation._record`
    and :meth:`sweepgen._flight._Working.park` do; ``state`` carries the step record.
    ``edges``, ``levels``, ``period``: the lights' levels (:class:`sweepgen.lighting.LightLevels`).
    """
    t_end, next_emission, all_emitted, lead = rule[1], rule[2], rule[3], rule[4]
    rep_d, rep_now = np.empty(rep_s.size), np.empty(rep_s.size)
    size = w_v.size
    while True:
        vmax = w_v.max()            # the parked atoms' 1 m/s included, as in the step-by-step rule
        seg = segment(edges, period, t)
        dt, detuning = _choose(k, p, rule, state, t, vmax, w_v, w_dark, w_alive, next_edge(edges, period, t),
                               levels[0, seg])
        state[DT_PREV] = dt
        state[SMALLEST] = min(state[SMALLEST], dt)
        state[STEPS] += 1.0
        state[ATOM_STEPS] += size - state[PARKED]
        for r in range(rep_s.size):
            rep_d[r] = detuning + rep_offset[r] if rep_follows[r] else rep_fixed[r]
            rep_now[r] = rep_s[r] * levels[1 + r, seg]
        done, n_dark = step(words, k, k.peak * levels[0, seg], rep_now, rep_d, t, dt, detuning,
                            dt * r_peak >= k.large, w_v, w_z, w_x, w_y, w_vx, w_vy, w_clock, w_pump, w_photons,
                            w_alive, w_dark, w_depumped, w_budget, w_idx, o_fate, o_velocity, o_time, o_radius,
                            o_transverse, finished)
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

