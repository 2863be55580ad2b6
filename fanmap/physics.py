"""Physics of gated quantum Hall devices, in SI units.

Plain functions over scalars or NumPy arrays.  Constants come from
:mod:`scipy.constants` (CODATA 2018, exact in the 2019 SI).  Densities are in
m^-2, fields in T, voltages in V, energies in J, capacitances per area in
F m^-2 and lever arms in m^-2 V^-1.

Sign convention: positive density means electrons (gate voltage above the
zero-density voltage), negative density holes.
"""

import numpy as np
from scipy import constants as _c

__all__ = [
    "ELEMENTARY_CHARGE", "PLANCK", "HBAR", "ELECTRON_MASS", "BOHR_MAGNETON",
    "VACUUM_PERMITTIVITY", "BOLTZMANN",
    "FLUX_QUANTUM_SINGLE_ELECTRON", "VON_KLITZING", "CONDUCTANCE_QUANTUM_SINGLE",
    "GRAPHENE_LATTICE_CONSTANT",
    "flux_density_per_flavour", "density_from_filling", "filling_from_density",
    "field_from_filling",
    "capacitance_from_lever_arm", "lever_arm_from_capacitance",
    "parallel_plate_capacitance", "dielectric_thickness", "lever_arm_from_dielectric",
    "hall_resistance", "hall_filling",
    "cyclotron_energy", "landau_levels_2deg", "landau_levels_graphene_monolayer",
    "landau_levels_graphene_bilayer",
    "moire_wavelength", "twist_angle_from_wavelength", "moire_cell_density",
    "moire_full_filling_density", "twist_angle_from_full_filling",
    "graphene_quantum_capacitance", "dirac_fermi_energy",
    "gate_voltage_from_density_dirac", "density_from_gate_voltage_dirac",
    "dual_gate_density", "dual_gate_displacement", "dual_gate_voltages",
]

ELEMENTARY_CHARGE = _c.e
PLANCK = _c.h
HBAR = _c.hbar
ELECTRON_MASS = _c.m_e
BOHR_MAGNETON = _c.physical_constants["Bohr magneton"][0]
VACUUM_PERMITTIVITY = _c.epsilon_0
BOLTZMANN = _c.k

#: h/e, the flux quantum of a single electron (CODATA's "magnetic flux quantum" is h/2e).
FLUX_QUANTUM_SINGLE_ELECTRON = _c.h / _c.e
#: R_K = h/e^2, in ohm.
VON_KLITZING = _c.physical_constants["von Klitzing constant"][0]
#: e^2/h, in S.
CONDUCTANCE_QUANTUM_SINGLE = _c.e**2 / _c.h
#: Graphene lattice constant, 0.246 nm (common practice).
GRAPHENE_LATTICE_CONSTANT = 0.246e-9


# --- filling factor, density, field -----------------------------------------

def flux_density_per_flavour(field):
    """Density of one fully filled Landau level of one flavour, eB/h (m^-2).

    Examples
    --------
    >>> f"{flux_density_per_flavour(1.0):.4e}"
    '2.4180e+14'
    """
    return np.abs(field) / FLUX_QUANTUM_SINGLE_ELECTRON


def density_from_filling(filling, field):
    """Carrier density n = nu e B / h (m^-2) at filling factor ``filling``.

    Examples
    --------
    >>> f"{density_from_filling(2, 10.0):.3e}"
    '4.836e+15'
    """
    return np.asarray(filling) * flux_density_per_flavour(field)


def filling_from_density(density, field):
    """Filling factor nu = n h / (e B)."""
    return np.asarray(density) / flux_density_per_flavour(field)


def field_from_filling(density, filling):
    """Field B = n h / (e nu) at which density ``density`` has filling ``filling``."""
    return np.asarray(density) * FLUX_QUANTUM_SINGLE_ELECTRON / np.asarray(filling)


# --- gate electrostatics -----------------------------------------------------

def capacitance_from_lever_arm(lever_arm):
    """Capacitance per area C = e alpha (F m^-2) from a lever arm alpha (m^-2 V^-1)."""
    return ELEMENTARY_CHARGE * np.asarray(lever_arm)


def lever_arm_from_capacitance(capacitance):
    """Lever arm alpha = C / e (m^-2 V^-1) from a capacitance per area (F m^-2)."""
    return np.asarray(capacitance) / ELEMENTARY_CHARGE


def parallel_plate_capacitance(thickness, permittivity):
    """Geometric capacitance per area eps0 eps_r / d (F m^-2).

    Examples
    --------
    300 nm of SiO2 (eps_r = 3.9):

    >>> f"{lever_arm_from_capacitance(parallel_plate_capacitance(300e-9, 3.9)) / 1e14:.3f}"
    '7.184'
    """
    return VACUUM_PERMITTIVITY * np.asarray(permittivity) / np.asarray(thickness)


def dielectric_thickness(capacitance, permittivity):
    """Thickness d = eps0 eps_r / C (m) of a dielectric with capacitance per area C."""
    return VACUUM_PERMITTIVITY * np.asarray(permittivity) / np.asarray(capacitance)


def lever_arm_from_dielectric(thickness, permittivity):
    """Lever arm alpha = eps0 eps_r / (e d) (m^-2 V^-1)."""
    return lever_arm_from_capacitance(parallel_plate_capacitance(thickness, permittivity))


# --- Hall quantisation -------------------------------------------------------

def hall_resistance(filling):
    """Plateau resistance h / (nu e^2) (ohm) at filling factor ``filling``."""
    return VON_KLITZING / np.asarray(filling, dtype=float)


def hall_filling(resistance):
    """Filling factor nu = R_K / R_xy of a Hall resistance (ohm)."""
    return VON_KLITZING / np.asarray(resistance, dtype=float)


# --- Landau-level spectra ----------------------------------------------------

def cyclotron_energy(field, effective_mass):
    """hbar e B / m* (J); ``effective_mass`` in units of the electron mass.

    Examples
    --------
    GaAs, m* = 0.067 m_e, at 1 T:

    >>> f"{cyclotron_energy(1.0, 0.067) / ELEMENTARY_CHARGE * 1e3:.3f}"
    '1.728'
    """
    return HBAR * ELEMENTARY_CHARGE * np.abs(field) / (effective_mass * ELECTRON_MASS)


def landau_levels_2deg(field, effective_mass, n_levels, g_factor=0.0, exchange=0.0):
    """Spin-resolved Landau levels of a parabolic 2DEG.

    Returns ``(energies, degeneracies)``: for each orbital index N < ``n_levels``
    the two spin branches E = hbar w_c (N + 1/2) -/+ (g mu_B B + exchange)/2,
    each of degeneracy 1 (in units of eB/h).  ``exchange`` (J) is an extra
    splitting added to the bare Zeeman energy; with both zero the two branches
    coincide, giving the spin-degenerate sequence nu = 2N.
    """
    index = np.arange(n_levels)
    orbital = cyclotron_energy(field, effective_mass) * (index + 0.5)
    split = 0.5 * (abs(g_factor) * BOHR_MAGNETON * np.abs(field) + exchange)
    energies = np.sort(np.concatenate([orbital - split, orbital + split]))
    return energies, np.ones_like(energies)


def landau_levels_graphene_monolayer(field, n_levels, fermi_velocity=1.0e6):
    """Landau levels E_N = sgn(N) v_F sqrt(2 e hbar |N| B) of monolayer graphene.

    Returns ``(energies, degeneracies)`` for N = -(n_levels-1) ... n_levels-1,
    each fourfold (spin and valley), so that the gaps sit at nu = +-4(N + 1/2).

    Examples
    --------
    >>> e, g = landau_levels_graphene_monolayer(1.0, 2)
    >>> f"{e[-1] / ELEMENTARY_CHARGE * 1e3:.1f}"
    '36.3'
    """
    index = np.arange(-(n_levels - 1), n_levels)
    energies = np.sign(index) * fermi_velocity * np.sqrt(
        2 * ELEMENTARY_CHARGE * HBAR * np.abs(index) * np.abs(field))
    return energies, np.full(energies.shape, 4.0)


def landau_levels_graphene_bilayer(field, n_levels, effective_mass=0.033):
    """Landau levels E_N = sgn(N) hbar w_c sqrt(|N|(|N|-1)) of bilayer graphene.

    The N = 0 and N = 1 orbitals are degenerate at zero energy, so the zero
    level is eightfold and the gaps sit at nu = +-4N (N >= 1).  Returned as
    ``(energies, degeneracies)`` with one eightfold zero level and fourfold
    levels for 2 <= |N| < n_levels.  ``effective_mass`` in units of m_e
    (0.033 m_e is a common value, from memory).
    """
    index = np.arange(2, n_levels)
    hw = cyclotron_energy(field, effective_mass)
    upper = hw * np.sqrt(index * (index - 1.0))
    energies = np.concatenate([-upper[::-1], [0.0], upper])
    degeneracies = np.concatenate([np.full(upper.size, 4.0), [8.0], np.full(upper.size, 4.0)])
    return energies, degeneracies


# --- moire geometry ----------------------------------------------------------

def moire_wavelength(twist_angle, lattice_constant=GRAPHENE_LATTICE_CONSTANT, small_angle=False):
    """Moire wavelength lambda = a / (2 sin(theta/2)) (m); ``twist_angle`` in radians.

    ``small_angle=True`` uses lambda = a / theta.
    """
    theta = np.asarray(twist_angle, dtype=float)
    if small_angle:
        return lattice_constant / theta
    return lattice_constant / (2 * np.sin(theta / 2))


def twist_angle_from_wavelength(wavelength, lattice_constant=GRAPHENE_LATTICE_CONSTANT,
                                small_angle=False):
    """Inverse of :func:`moire_wavelength`: twist angle (radians)."""
    ratio = lattice_constant / np.asarray(wavelength, dtype=float)
    if small_angle:
        return ratio
    return 2 * np.arcsin(ratio / 2)


def moire_cell_density(wavelength):
    """Density of one carrier per moire cell, n0 = 2 / (sqrt(3) lambda^2) (m^-2)."""
    return 2.0 / (np.sqrt(3.0) * np.asarray(wavelength, dtype=float) ** 2)


def moire_full_filling_density(twist_angle, flavours=4, lattice_constant=GRAPHENE_LATTICE_CONSTANT):
    """Full-filling density n_s = flavours * n0 of a graphene moire (m^-2).

    Examples
    --------
    >>> f"{moire_full_filling_density(np.radians(1.1)) / 1e16:.2f}"
    '2.81'
    """
    return flavours * moire_cell_density(moire_wavelength(twist_angle, lattice_constant))


def twist_angle_from_full_filling(full_filling_density, flavours=4,
                                  lattice_constant=GRAPHENE_LATTICE_CONSTANT):
    """Twist angle (radians) whose full-filling density is ``full_filling_density``."""
    n0 = np.asarray(full_filling_density, dtype=float) / flavours
    wavelength = np.sqrt(2.0 / (np.sqrt(3.0) * n0))
    return twist_angle_from_wavelength(wavelength, lattice_constant)


# --- Dirac quantum capacitance -------------------------------------------------

def graphene_quantum_capacitance(density, fermi_velocity=1.0e6):
    """C_q = 2 e^2 sqrt(|n|) / (hbar v_F sqrt(pi)) (F m^-2) of monolayer graphene."""
    return (2 * ELEMENTARY_CHARGE**2 / (HBAR * fermi_velocity * np.sqrt(np.pi))
            * np.sqrt(np.abs(density)))


def dirac_fermi_energy(density, fermi_velocity=1.0e6):
    """E_F = sgn(n) hbar v_F sqrt(pi |n|) (J) of a fourfold Dirac band."""
    density = np.asarray(density, dtype=float)
    return np.sign(density) * HBAR * fermi_velocity * np.sqrt(np.pi * np.abs(density))


def gate_voltage_from_density_dirac(density, capacitance, zero_density_voltage=0.0,
                                    fermi_velocity=1.0e6):
    """Gate voltage V = V0 + e n / C + E_F(n) / e that induces density ``density``."""
    return (zero_density_voltage + ELEMENTARY_CHARGE * np.asarray(density) / capacitance
            + dirac_fermi_energy(density, fermi_velocity) / ELEMENTARY_CHARGE)


def density_from_gate_voltage_dirac(gate_voltage, capacitance, zero_density_voltage=0.0,
                                    fermi_velocity=1.0e6):
    """Density induced by a gate including the Dirac quantum-capacitance term.

    Solves e|V - V0| = e^2 x^2 / C + hbar v_F sqrt(pi) x for x = sqrt(|n|).
    """
    drive = np.asarray(gate_voltage, dtype=float) - zero_density_voltage
    a = ELEMENTARY_CHARGE / capacitance
    b = HBAR * fermi_velocity * np.sqrt(np.pi) / ELEMENTARY_CHARGE
    x = (-b + np.sqrt(b * b + 4 * a * np.abs(drive))) / (2 * a)
    return np.sign(drive) * x * x


# --- dual gates ----------------------------------------------------------------

def dual_gate_density(top_voltage, bottom_voltage, top_capacitance, bottom_capacitance,
                      top_offset=0.0, bottom_offset=0.0):
    """n = (C_t (V_t - V_t0) + C_b (V_b - V_b0)) / e (m^-2)."""
    return (top_capacitance * (np.asarray(top_voltage) - top_offset)
            + bottom_capacitance * (np.asarray(bottom_voltage) - bottom_offset)) / ELEMENTARY_CHARGE


def dual_gate_displacement(top_voltage, bottom_voltage, top_capacitance, bottom_capacitance,
                           top_offset=0.0, bottom_offset=0.0):
    """D = (C_t (V_t - V_t0) - C_b (V_b - V_b0)) / 2 (C m^-2).

    Convention of this project: D > 0 when the top gate is the more positive
    one (field pointing from top gate towards the bottom gate); divide by
    eps0 for V/m.
    """
    return (top_capacitance * (np.asarray(top_voltage) - top_offset)
            - bottom_capacitance * (np.asarray(bottom_voltage) - bottom_offset)) / 2.0


def dual_gate_voltages(density, displacement, top_capacitance, bottom_capacitance,
                       top_offset=0.0, bottom_offset=0.0):
    """Inverse of the two functions above: ``(V_t, V_b)`` for given (n, D)."""
    charge = ELEMENTARY_CHARGE * np.asarray(density)
    top = (charge / 2 + np.asarray(displacement)) / top_capacitance + top_offset
    bottom = (charge / 2 - np.asarray(displacement)) / bottom_capacitance + bottom_offset
    return top, bottom
