"""Fractional quantum Hall states of a 2DEG as composite-fermion Landau levels.

Within the lowest spin-resolved Landau level (partial filling x = nu mod 1 of
the levels 0 < nu < 2) electrons bind two flux quanta and become composite
fermions in the effective field B* = B (1 - 2x) (Jain, Phys. Rev. Lett. 63,
199 (1989)).  Composite fermions fill p = x / |1 - 2x| Landau levels of their
own, with cyclotron energy hbar e |B*| / m_CF; gaps at integer p are the
fractions x = p / (2p + 1) (1/3, 2/5, 3/7 ...) and p / (2p - 1) (2/3, 3/5 ...),
and 1 + x above nu = 1 (4/3, 5/3 ...).  The composite-fermion mass grows as
sqrt(B) (interaction origin): m_CF = c sqrt(B / 1 T) m_e with c ~ 0.14, which
gives the 1/3 gap of about 10 K at 10 T seen in good GaAs samples (from memory).

The composite-fermion levels are Gaussian-broadened (width ``broadening``,
independent of field) and smeared exactly by -df/dE, written as the Fourier
series of a broadened comb: the relative density of states at the composite
Fermi level,

    D / D0 = 1 + 2 sum_s (-1)^s exp(-2 pi^2 s^2 (Gamma / E_CF)^2) R_T(s) cos(2 pi s p),

with R_T(s) = X_s / sinh X_s, X_s = 2 pi^2 s k_B T / E_CF, scales the
scattering rate (sigma_xx), and its integral, a smoothed staircase in p,
gives the Hall filling p_H / (2 p_H +- 1) (quantised sigma_xy on plateaus).
"""

import numpy as np

from . import physics as ph

__all__ = ["composite_fermion_energy", "composite_fermion_transport", "fraction_sequence"]

_HARMONICS = 60


def composite_fermion_energy(field, partial_filling, mass_coefficient):
    """Composite-fermion cyclotron energy (J) at ``field`` (T) and partial filling x."""
    effective = np.abs(field) * np.abs(1 - 2 * np.asarray(partial_filling, dtype=float))
    mass = mass_coefficient * np.sqrt(np.abs(field))
    return ph.cyclotron_energy(effective, mass)


def fraction_sequence(max_p=6):
    """Fillings (as ``(p, q)`` pairs) of the composite-fermion sequences in 0 < nu < 2.

    Examples
    --------
    >>> fraction_sequence(2)
    [(1, 3), (2, 5), (2, 3), (3, 5), (4, 3), (7, 5), (5, 3), (8, 5)]
    """
    lower = [(p, 2 * p + 1) for p in range(1, max_p + 1)]
    upper = [(p, 2 * p - 1) for p in range(2, max_p + 2)]
    first = lower + upper
    return first + [(p + q, q) for p, q in first]


def composite_fermion_transport(filling, field, temperature, *, mass_coefficient=0.14,
                                broadening=0.08e-3 * ph.ELEMENTARY_CHARGE):
    """Scattering factor and Hall filling of pixels at ``filling`` (0 < nu < 2).

    Returns ``(factor, hall_filling)``; pixels outside 0 < nu < 2 get factor 1
    and their own filling.
    """
    nu = np.asarray(filling, dtype=float)
    factor = np.ones_like(nu)
    hall = nu.copy()
    inside = (nu > 0) & (nu < 2) & (abs(field) > 0)
    if not inside.any():
        return factor, hall
    whole = np.floor(nu[inside])
    x = nu[inside] - whole
    below_half = x < 0.5
    with np.errstate(divide="ignore", invalid="ignore"):
        p = np.where(below_half, x / (1 - 2 * x), x / (2 * x - 1))
    energy = composite_fermion_energy(field, x, mass_coefficient)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ratio = broadening / energy
        # harmonics beyond s r = 2.5 / pi are damped below 1e-5
        finite = ratio[np.isfinite(ratio) & (ratio > 0)]
        count = int(np.clip(np.ceil(2.5 / (np.pi * finite.min())), 4, _HARMONICS)) \
            if finite.size else 4
        s = np.arange(1, count + 1)[:, None]
        dingle = np.exp(-2 * np.pi**2 * s**2 * ratio**2)
        xt = 2 * np.pi**2 * s * ph.BOLTZMANN * temperature / energy
        thermal = np.where(xt > 0, xt / np.sinh(xt), 1.0)
    amplitude = np.nan_to_num((-1.0) ** s * dingle * thermal)
    wave = np.exp(2j * np.pi * s * np.nan_to_num(p))
    dos = 1 + 2 * np.sum(amplitude * wave.real, axis=0)
    staircase = np.nan_to_num(p) + np.sum(amplitude * wave.imag / (np.pi * s), axis=0)
    factor[inside] = np.clip(dos, 1e-6, None)
    with np.errstate(divide="ignore", invalid="ignore"):
        hall_x = np.where(below_half, staircase / (2 * staircase + 1),
                          staircase / (2 * staircase - 1))
    hall_x = np.where(np.isfinite(p) & np.isfinite(hall_x), hall_x, x)
    hall[inside] = whole + hall_x
    return factor, hall
