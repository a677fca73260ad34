"""Longitudinal velocity distributions of beam sources.

* :class:`EffusiveSource`: an oven with a thin aperture. The flux through the
  aperture is the Maxwell–Boltzmann density weighted by v, so the flux density
  is ``f(v) = 2 v³/α⁴ exp(-v²/α²)`` with ``α = sqrt(2 k_B T / m)``
  (N. F. Ramsey, *Molecular Beams*, OUP 1956, ch. II). It is the chi
  distribution with four degrees of freedom and scale ``α/√2``.
* :class:`GaussianSource`: buffer-gas and supersonic beams, a normal
  distribution of mean ``u`` and spread ``σ`` truncated to v > 0.

All functions take and return NumPy arrays; sampling takes a
:class:`numpy.random.Generator` so results are reproducible from a seed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import constants as C
from scipy import special


@dataclass(frozen=True)
class EffusiveSource:
    """Flux-weighted Maxwell–Boltzmann distribution of an effusive oven."""

    temperature: float   # K
    mass: float          # kg

    @property
    def alpha(self) -> float:
        """Most probable speed in the oven, ``α = sqrt(2 k_B T / m)``."""
        return math.sqrt(2.0 * C.k * self.temperature / self.mass)

    def pdf(self, v):
        """Flux density ``2 v³/α⁴ exp(-v²/α²)`` for v ≥ 0 (zero below)."""
        v = np.asarray(v, dtype=float)
        x = v / self.alpha
        return np.where(v >= 0, 2.0 * x ** 3 * np.exp(-x * x) / self.alpha, 0.0)

    def cdf(self, v):
        """``1 - (1 + x²) exp(-x²)``, ``x = v/α`` (integral of :meth:`pdf`)."""
        v = np.asarray(v, dtype=float)
        x2 = (np.maximum(v, 0.0) / self.alpha) ** 2
        return -np.expm1(-x2) - x2 * np.exp(-x2)

    def sample(self, rng: np.random.Generator, n: int):
        """Draw ``n`` velocities: ``v = α sqrt(G)``, G ~ Gamma(2, 1)."""
        return self.alpha * np.sqrt(rng.gamma(2.0, 1.0, size=n))

    def mean(self) -> float:
        """Mean flux velocity ``(3√π/4) α`` (Ramsey 1956)."""
        return 0.75 * math.sqrt(math.pi) * self.alpha


@dataclass(frozen=True)
class GaussianSource:
    """Normal velocity distribution (buffer-gas or supersonic beam), truncated to v > 0."""

    mean_velocity: float    # m/s
    velocity_spread: float  # m/s, one standard deviation

    @property
    def _norm(self) -> float:
        # probability mass of the untruncated normal above zero
        return 0.5 * special.erfc(-self.mean_velocity / (math.sqrt(2.0) * self.velocity_spread))

    def pdf(self, v):
        v = np.asarray(v, dtype=float)
        z = (v - self.mean_velocity) / self.velocity_spread
        dens = np.exp(-0.5 * z * z) / (math.sqrt(2.0 * math.pi) * self.velocity_spread)
        return np.where(v > 0, dens / self._norm, 0.0)

    def cdf(self, v):
        v = np.asarray(v, dtype=float)
        s = math.sqrt(2.0) * self.velocity_spread
        low = 0.5 * special.erfc(self.mean_velocity / s)
        full = 0.5 * special.erfc(-(np.maximum(v, 0.0) - self.mean_velocity) / s)
        return (full - low) / self._norm

    def sample(self, rng: np.random.Generator, n: int):
        """Draw ``n`` velocities; draws at v ≤ 0 are redrawn (truncation)."""
        out = rng.normal(self.mean_velocity, self.velocity_spread, size=n)
        bad = out <= 0
        while bad.any():
            out[bad] = rng.normal(self.mean_velocity, self.velocity_spread, size=int(bad.sum()))
            bad = out <= 0
        return out

    def mean(self) -> float:
        """Mean of the untruncated normal, ``u`` (the truncation at v > 0 shifts it up slightly)."""
        return self.mean_velocity


# -- when, where and in which directions the source emits ------------------------------------
#: FWHM of a normal distribution in units of its standard deviation, 2 sqrt(2 ln 2)
FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
PULSE_SHAPES = ("flat", "gaussian")


@dataclass(frozen=True)
class Collimator:
    """A collimating aperture: a disc of ``radius`` at ``distance`` from the source, on the axis."""

    distance: float     # m
    radius: float       # m


@dataclass(frozen=True)
class Emission:
    """When, where and in which directions the source emits (all optional but the pulse time).

    * time: a continuous beam (``pulse_time`` None) emits uniformly over the
      period; a pulsed source starts at ``pulse_time``: a ``flat`` pulse lasts
      ``pulse_duration``; a ``gaussian`` pulse has that full width at half
      maximum and its leading half-maximum point at ``pulse_time``. Either way
      the pulse's leading edge is ``pulse_time`` (the design atom's emission time).
    * place: uniform over a disc of ``radius`` around the axis (0: a point);
    * direction: angles ``θx, θy ~ N(0, divergence)`` per axis, or the lines from
      the source disc through a ``collimator`` disc (the atoms that pass it: a
      uniform point in each disc, the small-angle limit of an emitter with a
      cosine law, whose flux through a distant disc is uniform over it; Ramsey
      1956, ch. II), or straight along the axis.
    """

    pulse_time: float | None = None     # s
    pulse_duration: float = 0.0         # s
    pulse_shape: str = "flat"
    radius: float = 0.0                 # m
    divergence: float | None = None     # rad, 1σ per axis
    collimator: Collimator | None = None

    def times(self, rng: np.random.Generator, n: int, period: float) -> np.ndarray:
        """Emission times on the period's axis (s)."""
        if self.pulse_time is None:
            return rng.uniform(0.0, period, n)
        d = self.pulse_duration
        if d <= 0:
            return np.full(n, float(self.pulse_time))
        if self.pulse_shape == "flat":
            return self.pulse_time + d * rng.random(n)
        return self.pulse_time + 0.5 * d + rng.normal(0.0, d / FWHM_PER_SIGMA, n)

    def transverse(self, rng: np.random.Generator, velocity: np.ndarray):
        """Transverse positions at ``z = 0`` and velocities: ``(x, y, v_x, v_y)`` (m, m/s)."""
        n = velocity.size
        x, y = _disc(rng, n, self.radius)
        if self.collimator is not None:
            xc, yc = _disc(rng, n, self.collimator.radius)
            tx, ty = (xc - x) / self.collimator.distance, (yc - y) / self.collimator.distance
        elif self.divergence is not None:
            tx, ty = rng.normal(0.0, self.divergence, (2, n))
        else:
            tx = ty = np.zeros(n)
        return x, y, velocity * tx, velocity * ty


def _disc(rng, n, radius):
    """``n`` points uniform over a disc of ``radius`` (radius sqrt(U), uniform angle)."""
    if radius <= 0:
        return np.zeros(n), np.zeros(n)
    r = radius * np.sqrt(rng.random(n))
    phi = 2.0 * math.pi * rng.random(n)
    return r * np.cos(phi), r * np.sin(phi)
