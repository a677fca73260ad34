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
