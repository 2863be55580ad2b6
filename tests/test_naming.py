"""Naming states from slopes: published sequences, Berry phases, the Hall scale, fractions."""

import numpy as np
import pytest
from scipy import constants

from fanmap.materials import main_sequence
from fanmap.naming import (choose_scale, classify_fillings, main_sequence_unit, name_lines,
                           nearest_fraction)
from fanmap.physics import FLUX_QUANTUM_SINGLE_ELECTRON, VON_KLITZING

K = 2.5   # alpha h / e in T/V for these slope tables (invented)


def _slopes(fillings):
    return np.asarray(fillings, float) / K


@pytest.mark.parametrize("material, gamma, berry", [
    # nu = +-4(N + 1/2), Berry phase pi: Novoselov et al., Nature 438, 197 (2005);
    # Zhang et al., Nature 438, 201 (2005).
    ("graphene-monolayer", 0.5, 1),
    # nu = +-4N, eightfold zero level, Berry phase 2 pi: Novoselov et al., Nature Physics 2,
    # 177 (2006).
    ("graphene-bilayer", 0.0, 2),
])
def test_published_graphene_sequences_give_their_berry_phase(material, gamma, berry):
    nu = main_sequence(material, 20)
    s = _slopes(nu)
    n = name_lines(s, np.full(s.size, 1e-5), np.ones(s.size), material="auto")
    assert n.offset == gamma and n.berry_phase == berry
    assert n.unit == pytest.approx(4 / K, rel=1e-6)
    assert n.scale_from == "ambiguous" and n.degeneracy is None
    assert {c["degeneracy"] for c in n.candidates} == {1, 2, 4, 8}
    # with the preset the published fillings come back exactly
    n = name_lines(s, np.full(s.size, 1e-5), np.ones(s.size), material=material)
    assert n.labels == [str(v) for v in nu] and set(n.kinds) == {"integer"}


def test_bilayer_zero_level_gap_of_eight():
    # No +-2 states at low field: the step across neutrality is 8 (McCann & Fal'ko 2006).
    s = _slopes([-8, -4, 4, 8])
    u, gamma, shift, _ = main_sequence_unit(s, np.full(4, 1e-5), np.ones(4))
    assert (u * K, gamma) == (pytest.approx(4.0), 0.0)
    assert (s[2] - s[1]) * K == pytest.approx(8.0)


def test_hall_scale_from_von_klitzing_constant():
    # R_xy = h/(nu e^2) with R_K from scipy.constants (CODATA 2018): nu = R_K / R_xy.
    rk = constants.physical_constants["von Klitzing constant"][0]
    assert VON_KLITZING == pytest.approx(rk, rel=1e-12)
    nu = np.array([2, 6, 10, -2, -6])
    hall = rk / (rk / np.abs(nu))   # plateau resistances read back as fillings
    g, source, warnings = choose_scale(4 / K, 0.5, _slopes(nu), hall_fillings=hall,
                                       hall_slopes=_slopes(nu))
    assert (g, source) == (4, "hall")


def test_hall_overrides_a_wrong_preset_with_a_warning():
    nu = np.array([2, 4, 6, 8])
    g, source, warnings = choose_scale(2 / K, 0.0, _slopes(nu), hall_fillings=nu.astype(float),
                                       hall_slopes=_slopes(nu), material="graphene-bilayer")
    assert (g, source) == (2, "hall") and warnings


def test_quarter_split_fixes_the_scale_but_a_half_split_does_not():
    main = _slopes([2, 6, 10])
    g, source, _ = choose_scale(4 / K, 0.5, main, extra_slopes=_slopes([1, 3, 4]),
                                extra_stderr=np.full(3, 1e-5))
    assert (g, source) == (4, "broken-symmetry")
    g, source, warnings = choose_scale(2 / K, 0.0, _slopes([2, 4, 6]), extra_slopes=_slopes([1, 3]),
                                       extra_stderr=np.full(2, 1e-5))
    assert (g, source) == (None, "ambiguous") and any("halve" in w for w in warnings)


def test_dielectric_prior_300nm_sio2():
    # 300 nm SiO2, eps_r = 3.9: alpha = 7.19e14 m^-2 V^-1 (parallel plate; ~7.2e10 cm^-2 V^-1
    # in Novoselov et al., Science 306, 666 (2004), from memory).
    alpha = 7.19e14
    unit = 4 / (alpha * FLUX_QUANTUM_SINGLE_ELECTRON)
    g, source, _ = choose_scale(unit, 0.5, [unit / 2], lever_arm_prior=alpha * 1.1)
    assert (g, source) == (4, "dielectric")
    g, source, warnings = choose_scale(unit, 0.5, [unit / 2], lever_arm_prior=alpha * 1.42)
    assert source == "ambiguous" and warnings


def test_common_slope_shift_from_field_ordered_drift():
    nu = np.array([-10, -6, -2, 2, 6, 10])
    s = _slopes(nu) + 0.03            # a drift of V0 that grows with the row (and field)
    u, gamma, shift, _ = main_sequence_unit(s, np.full(6, 1e-5), np.ones(6))
    assert (u * K, gamma, shift) == (pytest.approx(4.0), 0.5, pytest.approx(0.03))


def test_fractions_composite_fermion_sequence():
    # nu = p/(2p+1): 1/3, 2/5, 3/7 (Jain, PRL 63, 199 (1989)); 1/3 first seen by Tsui et al.,
    # PRL 48, 1559 (1982).
    nu = np.array([1 / 3, 2 / 5, 3 / 7, 2 / 3]) + 0.002
    f, labels, kinds, dist = classify_fillings(nu, np.full(4, 0.002), 2, 0.0)
    assert labels == ["1/3", "2/5", "3/7", "2/3"] and set(kinds) == {"fractional"}
    assert all(d == pytest.approx(1.0) for d in dist)
    assert nearest_fraction(0.4001) == nearest_fraction(2 / 5)


def test_no_fraction_claimed_without_significance_or_at_high_filling():
    f, labels, kinds, _ = classify_fillings(np.array([1.03, 0.5, 10.4]), np.array([0.02, 0.2, 0.001]),
                                            2, 0.0)
    assert kinds[0] == "broken-symmetry"      # within 0.08 of the integer 1
    assert kinds[1] is None                   # 0.5 +- 0.2 is not significant
    assert kinds[2] is None                   # no fractions at nu ~ 10
