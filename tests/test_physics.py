"""Physics core against outside values; each check names its source.

Sources are listed in the shared check-values table; "from memory" marks a
value written down without the source at hand, checked with a wider tolerance.
"""

import numpy as np
import pytest
from scipy import constants

from fanmap import physics as ph
from fanmap.materials import get_material, main_sequence
from fanmap.errors import InputError


def test_von_klitzing_constant_from_codata():
    # CODATA 2018 / 2019 SI via scipy.constants: R_K = 25 812.807 45 ohm.
    assert ph.VON_KLITZING == pytest.approx(25812.80745, abs=1e-5)
    assert ph.VON_KLITZING == pytest.approx(constants.h / constants.e**2, rel=1e-12)


def test_single_electron_flux_quantum_is_h_over_e_not_h_over_2e():
    # CODATA 2018: h/e = 4.135 667 696e-15 Wb; CODATA's "mag. flux quantum" is h/2e.
    assert ph.FLUX_QUANTUM_SINGLE_ELECTRON == pytest.approx(4.135667696e-15, rel=1e-9)
    codata_h_over_2e = constants.physical_constants["mag. flux quantum"][0]
    assert ph.FLUX_QUANTUM_SINGLE_ELECTRON == pytest.approx(2 * codata_h_over_2e, rel=1e-12)


def test_landau_degeneracy_per_flavour_at_one_tesla():
    # Derived from exact h and e (2019 SI): eB/h = 2.417 989e14 m^-2 at 1 T.
    assert ph.flux_density_per_flavour(1.0) == pytest.approx(2.417989e14, rel=1e-6)


def test_conductance_quantum():
    # e^2/h = 3.874 046e-5 S, derived from exact h and e.
    assert ph.CONDUCTANCE_QUANTUM_SINGLE == pytest.approx(3.874046e-5, rel=1e-6)


def test_filling_density_field_round_trip():
    n = ph.density_from_filling(6, 8.0)
    assert ph.filling_from_density(n, 8.0) == pytest.approx(6)
    assert ph.field_from_filling(n, 6) == pytest.approx(8.0)


def test_hall_plateau_resistance():
    # von Klitzing, Dorda, Pepper, PRL 45, 494 (1980): rho_xy = h/(nu e^2) on plateaus.
    assert ph.hall_resistance(2) == pytest.approx(constants.h / (2 * constants.e**2))
    assert ph.hall_filling(ph.hall_resistance(-6)) == pytest.approx(-6)


def test_sio2_300nm_lever_arm():
    # Novoselov et al., Science 306, 666 (2004) (from memory): 7.2e10 cm^-2 V^-1 for 300 nm SiO2;
    # parallel plate with eps_r = 3.9 (handbook) gives 7.19e10.
    alpha = ph.lever_arm_from_dielectric(300e-9, 3.9)
    assert alpha * 1e-4 == pytest.approx(7.19e10, rel=2e-3)
    assert alpha * 1e-4 == pytest.approx(7.2e10, rel=0.02)


def test_capacitance_lever_arm_thickness_round_trip():
    c = ph.parallel_plate_capacitance(285e-9, 3.9)
    assert ph.capacitance_from_lever_arm(ph.lever_arm_from_capacitance(c)) == pytest.approx(c)
    assert ph.dielectric_thickness(c, 3.9) == pytest.approx(285e-9)


def test_gaas_cyclotron_energy():
    # GaAs m* = 0.067 m_e (handbook) gives hbar e B / m* = 1.728 meV per tesla.
    energy = ph.cyclotron_energy(1.0, 0.067) / constants.e
    assert energy * 1e3 == pytest.approx(1.728, rel=1e-3)


def test_2deg_levels_spin_degenerate_without_zeeman():
    energies, deg = ph.landau_levels_2deg(2.0, 0.067, 3)
    hw = ph.cyclotron_energy(2.0, 0.067)
    assert np.allclose(energies, hw * np.array([0.5, 0.5, 1.5, 1.5, 2.5, 2.5]))
    assert deg.sum() == 6


def test_2deg_zeeman_splitting():
    energies, _ = ph.landau_levels_2deg(5.0, 0.067, 1, g_factor=-0.44)
    # Bare Zeeman energy |g| mu_B B (GaAs g = -0.44, handbook value, common practice).
    assert energies[1] - energies[0] == pytest.approx(0.44 * ph.BOHR_MAGNETON * 5.0)


def test_graphene_first_landau_level_at_one_tesla():
    # Standard result E_N = v_F sqrt(2 e hbar N B): E_1 = 36.3 meV at 1 T for v_F = 1e6 m/s.
    energies, deg = ph.landau_levels_graphene_monolayer(1.0, 2, fermi_velocity=1.0e6)
    assert energies[-1] / constants.e * 1e3 == pytest.approx(36.3, abs=0.05)
    assert energies[1] == 0.0 and np.all(deg == 4)


def test_graphene_levels_scale_as_sqrt_nb():
    e1, _ = ph.landau_levels_graphene_monolayer(1.0, 5)
    e4, _ = ph.landau_levels_graphene_monolayer(4.0, 5)
    assert np.allclose(e4, 2 * e1)
    assert e1[-1] == pytest.approx(2 * e1[5])  # N = 4 vs N = 1: sqrt(4) = 2


def test_bilayer_zero_level_is_eightfold():
    # McCann & Fal'ko, PRL 96, 086805 (2006): N = 0, 1 degenerate at zero energy.
    energies, deg = ph.landau_levels_graphene_bilayer(5.0, 6)
    assert deg[energies == 0].tolist() == [8.0]
    assert np.all(deg[energies != 0] == 4)


def test_graphene_sequences_and_berry_phases():
    # Novoselov et al. / Zhang et al., Nature 438 (2005): nu = +-4(N + 1/2), Berry phase pi.
    assert main_sequence("graphene-monolayer", 14).tolist() == [-14, -10, -6, -2, 2, 6, 10, 14]
    assert get_material("graphene-monolayer").berry_phase == 1
    # Novoselov et al., Nature Physics 2, 177 (2006): nu = +-4N, N >= 1; Berry phase 2 pi.
    assert main_sequence("graphene-bilayer", 12).tolist() == [-12, -8, -4, 4, 8, 12]
    assert get_material("graphene-bilayer").berry_phase == 2
    # Spin-degenerate 2DEG: nu = 2N (von Klitzing et al. 1980).
    assert main_sequence("2deg", 10).tolist() == [2, 4, 6, 8, 10]


def test_unknown_material_is_a_clear_error():
    with pytest.raises(InputError, match="choose one of"):
        get_material("graphite")


def test_magic_angle_superlattice_density():
    # Cao et al., Nature 556, 43 (2018), from memory: theta ~ 1.05-1.1 deg gives n_s ~ 2.7e12 cm^-2.
    ns_low = ph.moire_full_filling_density(np.radians(1.05)) * 1e-4
    ns_high = ph.moire_full_filling_density(np.radians(1.1)) * 1e-4
    assert ns_low < 2.7e12 < ns_high * 1.05
    assert ns_low == pytest.approx(2.7e12, rel=0.1)


def test_moire_small_angle_and_exact_formulas_agree():
    # Standard geometry: lambda = a / (2 sin(theta/2)) -> a / theta for small theta.
    theta = np.radians(1.1)
    exact = ph.moire_wavelength(theta)
    approx = ph.moire_wavelength(theta, small_angle=True)
    assert exact == pytest.approx(approx, rel=1e-4)
    assert exact * 1e9 == pytest.approx(12.8, abs=0.05)
    ns = ph.moire_full_filling_density(theta)
    assert ph.twist_angle_from_full_filling(ns) == pytest.approx(theta, rel=1e-12)
    assert ph.twist_angle_from_wavelength(exact) == pytest.approx(theta, rel=1e-12)


def test_graphene_quantum_capacitance_formula():
    # Standard result (Fang et al., APL 91, 092109 (2007), from memory): C_q = 2e^2 sqrt(n)/(hbar v_F sqrt(pi)).
    n = 1e16
    expected = 2 * constants.e**2 / (constants.hbar * 1e6 * np.sqrt(np.pi)) * np.sqrt(n)
    assert ph.graphene_quantum_capacitance(n) == pytest.approx(expected)
    # Consistency: C_q = e^2 dn/dE_F.
    dn = 1e12
    de = ph.dirac_fermi_energy(n + dn) - ph.dirac_fermi_energy(n - dn)
    assert constants.e**2 * 2 * dn / de == pytest.approx(expected, rel=1e-6)


def test_dirac_gate_relation_round_trip():
    c = ph.parallel_plate_capacitance(20e-9, 3.4)
    v = np.linspace(-3, 3, 13)
    n = ph.density_from_gate_voltage_dirac(v, c, 0.2)
    assert np.allclose(ph.gate_voltage_from_density_dirac(n, c, 0.2), v)
    # Far from neutrality the geometric term dominates: n -> C (V - V0)/e.
    assert n[-1] == pytest.approx(c * 2.8 / constants.e, rel=0.1)


def test_dual_gate_round_trip():
    ct, cb = 1.2e-3, 0.4e-3
    n, d = 2e16, 1e-3
    vt, vb = ph.dual_gate_voltages(n, d, ct, cb, 0.1, -0.3)
    assert ph.dual_gate_density(vt, vb, ct, cb, 0.1, -0.3) == pytest.approx(n)
    assert ph.dual_gate_displacement(vt, vb, ct, cb, 0.1, -0.3) == pytest.approx(d)
