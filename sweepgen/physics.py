"""Physics of radiation-pressure slowing, as pure functions in SI units.

Conventions (README.md, "Physics background"):

* atoms move along +z with v > 0; the slowing light propagates along -z;
* detunings are cyclic frequencies in Hz, ``detuning = f_laser - f_0``
  (negative = red); an atom at velocity v sees the light at ``detuning + v/λ``;
* ``gamma`` is the decay rate Γ in s⁻¹ (= 2π × natural linewidth in Hz).

Formulas: the two-level scattering rate and the scattering force follow
C. J. Foot, *Atomic Physics* (OUP 2005), ch. 7 and 9, and H. J. Metcalf and
P. van der Straten, *Laser Cooling and Trapping* (Springer 1999), ch. 2-3 and 6.
Section and equation numbers below are recalled. Constants are CODATA values
from :mod:`scipy.constants`.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import constants as C

TWO_PI = 2.0 * math.pi


def scattering_rate(detuning, velocity, saturation, gamma, wavelength):
    """Photon scattering rate of a two-level atom in one travelling wave.

    ``R = (Γ/2) s / (1 + s + (2·2π(Δ + v/λ)/Γ)²)`` (Foot 2005, eq. 7.68 with the
    Doppler shift of an atom moving against the light, §9.3.1).

    Parameters
    ----------
    detuning : float or ndarray
        Laser detuning Δ from resonance, Hz.
    velocity : float or ndarray
        Atom velocity along +z (the light travels along -z), m/s.
    saturation : float or ndarray
        Saturation parameter s = I/I_sat at the atom.
    gamma : float
        Decay rate Γ, s⁻¹.
    wavelength : float
        Transition wavelength λ, m.

    Returns
    -------
    float or ndarray
        Scattering rate, photons per second.
    """
    seen = detuning + velocity / wavelength
    x = 2.0 * TWO_PI * seen / gamma
    return 0.5 * gamma * saturation / (1.0 + saturation + x * x)


def max_deceleration(saturation, gamma, wavelength, mass):
    """Largest radiation-pressure deceleration at saturation parameter s.

    ``a_max(s) = (ħkΓ / 2m) · s / (1 + s)`` with ``k = 2π/λ`` (Foot 2005, §9.3.1;
    resonant light, no Doppler shift).
    """
    k = TWO_PI / wavelength
    return C.hbar * k * gamma / (2.0 * mass) * saturation / (1.0 + saturation)


def lag_velocity(saturation, force_fraction, gamma, wavelength):
    """Velocity lag of the design atom behind the light's resonant velocity.

    Setting the scattering rate to ``η · R_max(s)`` (η = ``force_fraction``) and solving the Lorentzian on
    its low-velocity (stable) side gives a detuning ``δ = (Γ/2) sqrt((1+s)(1/η-1))``
    (rad/s), i.e. a velocity lag ``Δv = (λΓ/4π) sqrt((1+s)(1/η-1))``
    (Metcalf & van der Straten 1999, §6.2; Foot 2005, §9.3.1).
    """
    return wavelength * gamma / (4.0 * math.pi) * np.sqrt((1.0 + saturation) * (1.0 / force_fraction - 1.0))


def recoil_velocity(mass, wavelength):
    """Recoil velocity ``v_r = h / (m λ)`` of one photon (Foot 2005, §9.3)."""
    return C.h / (mass * wavelength)


def recoil_temperature(mass, wavelength):
    """Recoil temperature ``T_r = m v_r² / k_B`` (the convention of Steck's D-line tables)."""
    v = recoil_velocity(mass, wavelength)
    return mass * v * v / C.k


def doppler_limit(gamma):
    """Doppler cooling limit ``T_D = ħΓ / (2 k_B)`` (Foot 2005, eq. 9.25)."""
    return C.hbar * gamma / (2.0 * C.k)


def doppler_shift(velocity, wavelength):
    """First-order Doppler shift ``v/λ`` in Hz (an atom at v sees the light at detuning + v/λ)."""
    return velocity / wavelength


def photons_to_slow(delta_v, mass, wavelength):
    """Photons needed to change the velocity by ``delta_v``: ``Δv / v_r``."""
    return delta_v / recoil_velocity(mass, wavelength)


def survival_fraction(photons, loss_per_photon):
    """Fraction of molecules left after scattering ``photons`` photons, ``(1 - p)^N``."""
    return np.power(1.0 - loss_per_photon, photons)


def rayleigh_range(waist, wavelength):
    """Rayleigh range ``z_R = π w0² / λ`` of a Gaussian beam (Siegman, *Lasers*, 1986, ch. 17)."""
    return math.pi * waist * waist / wavelength


def gaussian_beam_saturation(z, s0, z_focus, z_rayleigh):
    """On-axis saturation parameter of a focused Gaussian beam.

    ``s(z) = s0 / (1 + ((z - z_focus)/z_R)²)`` (on-axis intensity of a Gaussian
    beam, Siegman 1986, ch. 17).
    """
    u = (np.asarray(z, dtype=float) - z_focus) / z_rayleigh
    return s0 / (1.0 + u * u)


def velocity_width(gamma, wavelength, saturation=0.0):
    """Full width at half maximum of the Lorentzian in velocity, ``λΓ/2π · sqrt(1+s)``.

    The power-broadened line of :func:`scattering_rate` has a full width
    ``(Γ/2π) sqrt(1+s)`` in detuning (Foot 2005, ch. 7); an atom's Doppler shift is
    ``v/λ``, so the width in velocity is λ times that. ``saturation = 0`` gives the
    natural width ``λΓ/2π``.
    """
    return wavelength * gamma / TWO_PI * np.sqrt(1.0 + saturation)


def closed_form_slowing(v_start, v_end, deceleration, wavelength):
    """Constant-deceleration kinematics from ``v_start`` to ``v_end``.

    Returns a dict with ``duration = (v1-v2)/a``, ``distance = (v1²-v2²)/2a``,
    ``span = (v1-v2)/λ`` (Hz) and ``chirp_rate = a/λ`` (Hz/s), the textbook results
    for uniform deceleration (Foot 2005, §9.3.1).
    """
    return {
        "duration": (v_start - v_end) / deceleration,
        "distance": (v_start ** 2 - v_end ** 2) / (2.0 * deceleration),
        "span": (v_start - v_end) / wavelength,
        "chirp_rate": deceleration / wavelength,
    }
