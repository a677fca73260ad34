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


#: largest scattering rate of a two-level atom (a closed cycling transition) as a fraction of Γ
TWO_LEVEL_FRACTION = 0.5


def scattering_rate(detuning, velocity, saturation, gamma, wavelength, rate_fraction=TWO_LEVEL_FRACTION):
    """Photon scattering rate in one travelling wave.

    ``R = f Γ s / (1 + s + (2·2π(Δ + v/λ)/Γ)²)`` with ``f = 1/2`` for a two-level
    atom (Foot 2005, eq. 7.68 with the Doppler shift of an atom moving against
    the light, §9.3.1). A multi-level system with ``n_g`` ground and ``n_e``
    excited sub-levels coupled by the light has the same form with
    ``f = n_e/(n_g + n_e)`` and ``s`` measured against its effective saturation
    intensity (M. R. Tarbutt, New J. Phys. 17, 015007 (2015), rate-equation model,
    recalled); see :func:`multilevel_rate_fraction`.

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
    rate_fraction : float
        ``f``, the largest scattering rate as a fraction of Γ (1/2 for two levels).

    Returns
    -------
    float or ndarray
        Scattering rate, photons per second.
    """
    seen = detuning + velocity / wavelength
    x = 2.0 * TWO_PI * seen / gamma
    return rate_fraction * gamma * saturation / (1.0 + saturation + x * x)


def multilevel_rate_fraction(ground_states, excited_states):
    """Largest scattering rate of a multi-level system as a fraction of Γ, ``n_e/(n_g + n_e)``.

    With all ``n_g`` ground and ``n_e`` excited sub-levels coupled and the light
    strong, the population spreads evenly over all of them and only the excited
    ones scatter (M. R. Tarbutt, New J. Phys. 17, 015007 (2015), recalled). Two
    levels give 1/2; CaF's main cycle (24 ground, 4 excited sub-levels) gives 1/7.
    """
    return excited_states / (ground_states + excited_states)


def max_deceleration(saturation, gamma, wavelength, mass, rate_fraction=TWO_LEVEL_FRACTION):
    """Largest radiation-pressure deceleration at saturation parameter s.

    ``a_max(s) = (ħkΓ f / m) · s / (1 + s)`` with ``k = 2π/λ`` and ``f`` the
    largest scattering rate as a fraction of Γ: ``ħkΓ/2m · s/(1+s)`` for a
    two-level atom (Foot 2005, §9.3.1; resonant light, no Doppler shift).
    """
    k = TWO_PI / wavelength
    return C.hbar * k * gamma * rate_fraction / mass * saturation / (1.0 + saturation)


def off_resonant_ratio(seen_detuning, saturation, gamma, splitting, strength):
    """Excitation rate of the nearest off-resonant excited level over that of the cycling one.

    Two Lorentzians of the same width: the cycling transition at the detuning
    the atom sees, ``δ = Δ + v/λ``, and the neighbouring excited level,
    ``splitting`` (Hz) away, with relative line strength ``κ``:
    ``κ (1 + s + x²) / (1 + κ s + x_off²)``, ``x = 2·2πδ/Γ``,
    ``x_off = 2·2π(δ − splitting)/Γ`` (the ratio of two rates of
    :func:`scattering_rate`; Foot 2005, ch. 7, the two-level rate applied to each
    transition). For δ ≈ 0 and low intensity it is ``κ (Γ/2)²/(2π·splitting)²``.
    """
    x = 2.0 * TWO_PI * np.asarray(seen_detuning, dtype=float) / gamma
    x_off = 2.0 * TWO_PI * (np.asarray(seen_detuning, dtype=float) - splitting) / gamma
    return strength * (1.0 + saturation + x * x) / (1.0 + strength * saturation + x_off * x_off)


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


def gaussian_beam_saturation(z, s0, z_focus, z_rayleigh, radius=0.0, waist=None):
    """Saturation parameter of a Gaussian beam at ``z`` and distance ``radius`` from its axis.

    ``s(z, r) = s0 / q · exp(−2 r² / (w0² q))``, ``q = 1 + ((z − z_focus)/z_R)²``,
    so that the beam radius is ``w(z) = w0 sqrt(q)`` and the on-axis value is
    ``s0 / q`` (TEM00 intensity, Siegman 1986, ch. 17). ``waist`` (w0) is needed
    only off the axis.
    """
    u = (np.asarray(z, dtype=float) - z_focus) / z_rayleigh
    q = 1.0 + u * u
    if waist is None:
        return s0 / q
    r = np.asarray(radius, dtype=float)
    return s0 / q * np.exp(-2.0 * r * r / (waist * waist * q))


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


def zeeman_moment(ground_g, ground_m, excited_g, excited_m):
    """Effective magnetic moment of a transition between two Zeeman sub-levels, J/T.

    ``μ′ = (g_e m_e − g_g m_g) μ_B`` (Foot 2005, §9.3, eq. 9.12, recalled): the
    transition frequency moves by ``μ′B/h`` in a field ``B``. For the stretched
    states of an alkali D2 line (``|F = I+1/2, m_F = F⟩ → |F′ = F+1, m_F′ = F+1⟩``)
    it is one Bohr magneton.
    """
    return (excited_g * excited_m - ground_g * ground_m) * C.physical_constants["Bohr magneton"][0]


def tapered_field_scale(start_velocity, wavelength, moment):
    """``B₀ = h v₀ / (λ μ′)``, T: the field whose Zeeman shift ``μ′B₀/h`` equals the Doppler shift
    ``v₀/λ`` of the start velocity (Foot 2005, §9.3, eq. 9.12, recalled)."""
    return C.h * start_velocity / (wavelength * moment)


def tapered_field_length(start_velocity, deceleration):
    """``L₀ = v₀² / 2a``, m: where an atom starting at ``v₀`` comes to rest at constant deceleration ``a``
    (Foot 2005, §9.3, eq. 9.11, recalled)."""
    return start_velocity ** 2 / (2.0 * deceleration)


def tapered_field(z, b0, l0, bias):
    """``B(z) = B₀ √(1 − z/L₀) + B_bias`` (T) for ``0 ≤ z ≤ L₀`` (Foot 2005, §9.3, eq. 9.12, recalled):
    the field that keeps an atom decelerating at ``a = v₀²/2L₀`` in resonance with light of one
    frequency, its velocity being ``v(z) = v₀ √(1 − z/L₀)``."""
    z = np.asarray(z, dtype=float)
    return b0 * np.sqrt(np.clip(1.0 - z / l0, 0.0, None)) + bias
