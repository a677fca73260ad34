"""Where the atoms are in the slowing beam along the design path, and what force they find there.

The planner designs for the beam's axis. A Gaussian beam is weaker off the axis,
``s(z, r) = s(z, 0)·exp(−2r²/w(z)²)``, so an atom far from the axis may find
less than the design force ``a_d(z) = η a_max(s(z, 0))`` and fall out of the
chirp. :func:`beam_overlap` follows a sample of the atomic beam along the design
atom's path and timing:

* each atom leaves the source as the scenario's ``Emission`` says (disc,
  divergence or collimator), with the start velocity of the chirp;
* while slowed it scatters ``dN = −dv/v_r`` photons whose isotropic emissions
  kick its transverse velocity by normals of variance ``v_r² dN/3`` per axis
  (C. J. Foot, *Atomic Physics*, OUP 2005, ch. 9, recalled: transverse heating
  during slowing);
* its distance from the axis at each node of the design trajectory gives the
  force available to it, ``a_max(L·s(z, r))`` (species' effective force; ``L``
  the lowest level of the light that the gates let through during the chirp,
  :func:`sweepgen.lighting.chirp_level`, 1 without a gate).

Results: the fraction of the atoms that find at least the design force at every
point of the path, and, at each point, the median distance of the atoms from the
axis (the checker's ``deceleration`` rule compares the design deceleration with
the force there). An unbounded light (no waist) reaches every atom. The sample
is drawn from a fixed seed, so the numbers are reproducible.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sweepgen import physics
from sweepgen.lighting import chirp_level

#: atoms in the sample: the fraction to within its binomial error sqrt(f(1-f)/SAMPLE), at most 1.6 %, and
#: the median distance from the axis to within its standard error, about 2.3 % (0.72/sqrt(SAMPLE) for
#: distances spread like a Rayleigh law: 1/(2 p(median) sqrt(n))); tests/test_overlap.py checks both against
#: a sample twenty times larger. 1000 atoms (was 2000) keep plan and check quick to start
SAMPLE = 1000
#: seed of the sample (fixed: the check gives the same numbers every time)
SEED = 20240601
#: atoms followed at a time (their temporaries stay small: 256 atoms × 513 nodes = 1 MiB per array)
BLOCK = 256


@dataclass(frozen=True)
class Overlap:
    """The atomic beam in the slowing beam along the design path."""

    fraction: float               # of the atoms finding at least the design force all along the path
    median_radius: np.ndarray     # m, at each node of the design trajectory
    available: np.ndarray         # m/s², a_max at the median radius, at each node
    beam_radius: np.ndarray       # m, 1/e² radius of the slowing beam at each node (inf: unbounded)
    level: float = 1.0            # the light's lowest level during the chirp that the gates let through


def beam_overlap(plan, *, sample: int = SAMPLE, seed: int = SEED) -> Overlap:
    """Follow a sample of the atomic beam along the design path (see the module notes)."""
    sc = plan.scenario
    sp, lt = sc.species, sc.light
    tr = plan.trajectory
    level = chirp_level(plan)            # the gates may let only part of the light through during the chirp
    r = _radii(sc, plan, sample, seed)
    need = tr.deceleration[None, :] * (1.0 - 1e-12)
    enough = np.empty(sample, dtype=bool)
    for a in range(0, sample, BLOCK):
        s = level * lt.saturation_at(tr.position[None, :], r[a:a + BLOCK])
        a_max = physics.max_deceleration(s, sp.gamma, sp.wavelength, sp.mass, sp.rate_fraction)
        enough[a:a + BLOCK] = np.all(a_max >= need, axis=1)
    median = np.median(r, axis=0, overwrite_input=True)          # r is not needed after this
    available = physics.max_deceleration(level * lt.saturation_at(tr.position, median), sp.gamma, sp.wavelength,
                                         sp.mass, sp.rate_fraction)
    if lt.focused:
        u = (tr.position - lt.focus) / lt.rayleigh_range
        width = lt.waist * np.sqrt(1.0 + u * u)
    else:
        width = np.full(tr.position.shape, math.inf)
    return Overlap(fraction=float(np.mean(enough)), median_radius=median, available=available, beam_radius=width,
                   level=level)


def _radii(sc, plan, sample: int, seed: int) -> np.ndarray:
    """Distance from the axis of each sampled atom at each node of the design path, shape (sample, nodes)."""
    sp = sc.species
    tr = plan.trajectory
    rng = np.random.default_rng(seed)
    v0 = np.full(sample, sc.chirp.start_velocity)
    x0, y0, vx0, vy0 = sc.emission.transverse(rng, v0)
    # time since emission at each node: the flight to the chirp's start, then the chirp
    t = plan.z_start / sc.chirp.start_velocity + tr.time
    v_r = physics.recoil_velocity(sp.mass, sp.wavelength)
    photons = np.maximum(-np.diff(tr.velocity), 0.0) / v_r          # per interval of the path
    sigma = v_r * np.sqrt(photons / 3.0)
    dt = np.diff(tr.time)
    r = np.empty((sample, t.size))
    # one block's arrays, filled again by every block (fresh memory costs a page fault per 4 KiB)
    rows = min(BLOCK, sample)
    kicks, steps, x = np.empty((rows, dt.size)), np.empty((rows, dt.size)), np.empty((rows, t.size))
    for axis, (x_start, v_start) in enumerate(((x0, vx0), (y0, vy0))):
        for a in range(0, sample, BLOCK):        # the same normals, in the same order, a block at a time
            n = min(BLOCK, sample - a)
            out = r[a:a + n] if axis == 0 else x[:n]
            _positions(rng.standard_normal(out=kicks[:n]), sigma, dt, x_start[a:a + n], v_start[a:a + n], t[0],
                       steps[:n], out)
            if axis == 1:
                np.hypot(r[a:a + n], out, out=r[a:a + n])
    return r


def _positions(kicks, sigma, dt, x_start, v_start, t0, steps, out) -> np.ndarray:
    """Positions along one transverse axis at each node into ``out``, shape (atoms, nodes), from the
    atoms' standard-normal ``kicks`` on each interval (overwritten, as ``steps``, shape (atoms, intervals))."""
    # velocity on each interval: the start velocity, kicked at the end of every interval before
    kicks *= sigma[None, :]
    np.cumsum(kicks, axis=1, out=kicks)
    steps[:, 0] = v_start
    np.add(v_start[:, None], kicks[:, :-1], out=steps[:, 1:])
    steps *= dt[None, :]
    # x(t_i) = x0 + vx0 t_0 + Σ_j v_j dt_j (velocity constant over each interval, kicked at its end)
    out[:, 0] = 0.0
    np.cumsum(steps, axis=1, out=out[:, 1:])
    out += (x_start + v_start * t0)[:, None]
    return out
