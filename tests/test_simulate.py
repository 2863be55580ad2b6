"""The map simulator against outside values; each check names its source.

Sources: the shared check-values table.  R_K = h/e^2 from scipy.constants (CODATA 2018 via
fanmap.physics); quantum Hall sequences: von Klitzing et al., PRL 45, 494 (1980) (2DEG),
Novoselov et al., Nature 438, 197 (2005) and Zhang et al., Nature 438, 201 (2005)
(monolayer), Novoselov et al., Nature Physics 2, 177 (2006) (bilayer); fractions:
Tsui et al., PRL 48, 1559 (1982) and Jain, PRL 63, 199 (1989); thermal damping:
Lifshitz & Kosevich (1956) as given in Shoenberg, Magnetic Oscillations in Metals (1984).
"""

import numpy as np
import pytest
import xarray as xr
from scipy import constants
from scipy.optimize import minimize_scalar
from scipy.signal import argrelmin

from pathlib import Path

from fanmap import physics as ph
from fanmap._samples import REGENERATE, SAMPLES, make_sample
from fanmap.cli import main
from fanmap.errors import InputError
from fanmap.simulate import (simulate_fan, simulate_gate_map, simulate_temperature_series,
                             write_map)

CLEAN = dict(noise=0.0, noise_floor=0.0)
SAMPLE_DIR = Path(__file__).resolve().parents[1] / "sample_maps"
R_K = constants.h / constants.e**2  # CODATA 2018 (exact in the 2019 SI), via scipy.constants


def filling(ds, row):
    """Filling factor of every pixel of ``row`` from the true lever arm and V0."""
    b = float(ds.field[row])
    n = ds.attrs["truth_density_per_volt"] * (ds.gate.values - ds.attrs["truth_zero_density_voltage"])
    return n / ph.flux_density_per_flavour(b)


def rho_xx(ds):
    return ds.rxx.values / ds.attrs["truth_aspect_ratio"]


def minima_fillings(ds, row, depth=0.5):
    """Fillings of the local minima of rho_xx in ``row`` deeper than ``depth`` x neighbourhood."""
    r = np.log(rho_xx(ds)[row])
    idx = argrelmin(r, order=4)[0]
    keep = [i for i in idx if r[i] < np.max(r[max(i - 25, 0):i + 25]) + np.log(depth)]
    return filling(ds, row)[keep]


# --- quantised Hall resistance ----------------------------------------------------------

@pytest.mark.parametrize("material, fields, expected", [
    ("graphene-monolayer", np.linspace(6, 9, 4), [2, 6, -2, -6]),
    ("2deg", np.linspace(4, 12, 5), [1, 2, 3, 4]),
])
def test_hall_plateaus_sit_at_von_klitzing_values(material, fields, expected):
    # R_xy = h / (nu e^2) where rho_xx ~ 0 (von Klitzing 1980; R_K from scipy.constants)
    ds = simulate_fan(material, field=fields, fractional=False, **CLEAN)
    rxy, rho = ds.rxy.values, rho_xx(ds)
    zero = rho < 1e-3 * np.abs(rxy)  # "rho_xx near zero": Hall angle within 1e-3 of 90 degrees
    assert zero.sum() > 20
    nu_plateau = R_K / rxy[zero]
    nearest = np.round(nu_plateau)
    assert np.all(np.abs(rxy[zero] - R_K / nearest) < 0.005 * np.abs(R_K / nearest))
    assert set(expected) <= set(nearest.astype(int))


def test_lorentzian_levels_give_minima_at_the_same_sequence():
    # the sequence +-4(N + 1/2) does not depend on the level shape (Novoselov 2005); Lorentzian
    # tails fill the gaps, so R_xx minima are shallower than with Gaussian levels, and the
    # states in the tails shift the minima by up to ~0.3 in filling (a known weakness of
    # Lorentzian levels, whose tails hold a non-vanishing share of every level)
    kw = dict(field=[6.0, 6.3], broken_symmetry={}, **CLEAN)
    lorentz = simulate_fan("graphene-monolayer", broadening_shape="lorentzian", **kw)
    gauss = simulate_fan("graphene-monolayer", **kw)
    found = minima_fillings(lorentz, 0)
    for nu in (-6, -2, 2, 6):
        assert np.min(np.abs(found - nu)) < 0.4, (nu, found)
    assert np.min(rho_xx(lorentz)[0]) > 10 * np.min(rho_xx(gauss)[0])


def test_fractional_hall_plateaus_at_composite_fermion_fillings():
    # R_xy = h / (nu e^2) at nu = 1/3, 2/3, 2/5 (Tsui et al. 1982; Jain 1989)
    ds = simulate_fan("2deg", gate=np.linspace(-0.6, -0.2, 200), field=[13.5, 14.0], **CLEAN)
    rxy, rho = ds.rxy.values, rho_xx(ds)
    for frac in (1 / 3, 2 / 5, 2 / 3):
        target = R_K / frac
        on = (np.abs(rxy - target) < 0.005 * target) & (rho < 1e-3 * np.abs(rxy))
        assert on.sum() >= 2, frac
    fractions = ds.attrs["truth_fractional_fillings"].split(",")
    assert {"1/3", "2/5", "2/3", "3/5"} <= set(fractions)


# --- minima at the published sequences ------------------------------------------------------

@pytest.mark.parametrize("material, allowed, forbidden, field", [
    # monolayer: +-4(N + 1/2); no minimum at 0 or +-4 without broken symmetry (Novoselov 2005)
    ("graphene-monolayer", [-10, -6, -2, 2, 6, 10], [-4, 0, 4], 5.0),
    # bilayer: +-4N, N >= 1; eightfold zero level: no minimum at 0 (Novoselov 2006)
    ("graphene-bilayer", [-12, -8, -4, 4, 8, 12], [0, -2, 2], 3.0),
    # spin-degenerate 2DEG: 2N (von Klitzing 1980)
    ("2deg", [4, 6, 8, 10], [5, 7, 9], 2.0),
])
def test_rho_xx_minima_at_the_material_sequence(material, allowed, forbidden, field):
    ds = simulate_fan(material, field=[field, field * 1.05], broken_symmetry={}, g_factor=0.0,
                      fractional=False, **CLEAN)
    found = minima_fillings(ds, 0)
    in_window = [nu for nu in allowed if filling(ds, 0).min() < nu < filling(ds, 0).max()]
    assert len(in_window) >= 3
    for nu in in_window:
        assert np.min(np.abs(found - nu)) < 0.15, (nu, found)
    for nu in forbidden:
        assert found.size == 0 or np.min(np.abs(found - nu)) > 0.5, (nu, found)


def test_broken_symmetry_states_appear_only_above_their_onset():
    # monolayer nu = 0 and +-1 appear at high field only (common practice: onset fields)
    ds = simulate_fan("graphene-monolayer", gate=np.linspace(-15, 25, 400),
                      field=[3.0, 14.0], broken_symmetry={1: 7.0, -1: 7.0}, **CLEAN)
    low, high = minima_fillings(ds, 0), minima_fillings(ds, 1)
    assert np.min(np.abs(high - 1)) < 0.15 and np.min(np.abs(high + 1)) < 0.15
    assert low.size == 0 or np.min(np.abs(low - 1)) > 0.5
    assert list(ds.attrs["truth_broken_symmetry_fillings"]) == [-1, 1]


def test_nu_zero_is_insulating_at_high_field():
    # graphene nu = 0 at high field: R_xx grows large (common practice)
    ds = simulate_fan("graphene-monolayer", gate=np.linspace(-10, 20, 300), field=[2.0, 14.0],
                      **CLEAN)
    neutral = np.argmin(np.abs(filling(ds, 1)))
    assert ds.rxx.values[1, neutral] > 10 * ds.rxx.values[0, neutral]
    assert ds.rxx.values[1, neutral] > 1e5


def test_low_field_drude_limit():
    # rho_xx = 1/(n e mu) and R_xy = B/(n e) at low field (Drude, standard result)
    ds = simulate_fan("graphene-monolayer", gate=np.linspace(20, 40, 50), field=[0.0, 0.05],
                      residual_density=0.0, **CLEAN)
    n = ds.attrs["truth_density_per_volt"] * (ds.gate.values - ds.attrs["truth_zero_density_voltage"])
    expected = 1 / (n * constants.e * ds.attrs["truth_mobility"])
    assert np.allclose(rho_xx(ds)[0], expected, rtol=1e-4)  # leakage adds < 1e-4
    assert np.allclose(ds.rxy.values[1], 0.05 / (n * constants.e), rtol=0.01)
    assert np.all(ds.rxy.values[0] == 0)


# --- thermal damping ------------------------------------------------------------------------

def _first_harmonic(ds, row):
    """Amplitude of the cos(pi nu) component of rho_xx n (spin-degenerate 2DEG)."""
    nu = filling(ds, row)
    n = nu * ph.flux_density_per_flavour(float(ds.field[row]))
    signal = rho_xx(ds)[row] * n
    signal = signal / signal.mean() - 1
    whole = (nu >= np.ceil(nu.min() / 2) * 2) & (nu < np.floor(nu.max() / 2) * 2)
    return np.abs(np.mean(signal[whole] * np.exp(1j * np.pi * nu[whole])))


@pytest.mark.parametrize("field", [0.5, 1.0])
def test_temperature_series_follows_lifshitz_kosevich_mass_within_3_percent(field):
    # A(T) ~ X / sinh X, X = 2 pi^2 k_B T m* / (hbar e B) (Lifshitz & Kosevich 1956);
    # GaAs m* = 0.067 m_e (handbook value, common practice)
    temps = (0.4, 0.8, 1.2, 1.6, 2.0, 2.5)
    maps = simulate_temperature_series("2deg", temps, gate=np.linspace(-0.6, 0.3, 1500),
                                       field=[field], **CLEAN)
    amps = np.array([_first_harmonic(m, 0) for m in maps])
    assert amps.max() < 0.3  # small-amplitude regime, where the LK form holds

    def lk(t, mass):
        x = (2 * np.pi**2 * constants.k * t * mass * constants.m_e
             / (constants.hbar * constants.e * field))
        return x / np.sinh(x)

    def misfit(mass):
        model = lk(np.array(temps), mass)
        scale = np.sum(amps * model) / np.sum(model**2)
        return np.sum((np.log(amps) - np.log(scale * model)) ** 2)

    best = minimize_scalar(misfit, bounds=(0.02, 0.2), method="bounded").x
    assert best == pytest.approx(0.067, rel=0.03)
    assert [m.attrs["truth_temperature"] for m in maps] == list(temps)


# --- superlattice and gate maps -------------------------------------------------------------

def test_moire_zero_field_peaks_at_band_fillings():
    # full filling n_s = 4 n0, n0 = 2/(sqrt(3) lambda^2), lambda = a/(2 sin(theta/2)) (standard
    # geometry); peaks at s = +-4 and, with correlated states, +-2 (Cao et al. 2018, from memory)
    ds = simulate_fan("moire-graphene", field=[0.0, 0.5], **CLEAN)
    ns = float(ph.moire_full_filling_density(np.radians(1.1)))
    assert ds.attrs["truth_full_filling_density"] == pytest.approx(ns, rel=1e-9)
    n = ds.attrs["truth_density_per_volt"] * (ds.gate.values - ds.attrs["truth_zero_density_voltage"])
    r = ds.rxx.values[0]
    peaks = n[argrelmin(-np.log(r), order=10)[0]]
    for s in (-4, -2, 0, 2, 4):
        assert np.min(np.abs(peaks - s * ns / 4)) < 0.03 * ns, s


def test_moire_satellite_minimum_from_full_filling():
    # satellite fan n = t eB/h + s n0 (Streda; common practice for moire fans)
    ds = simulate_fan("moire-graphene", gate=np.linspace(3, 6, 300), field=[4.0, 4.5, 5.0],
                      **CLEAN)
    n0 = ds.attrs["truth_cell_density"]
    n = ds.attrs["truth_density_per_volt"] * (ds.gate.values - ds.attrs["truth_zero_density_voltage"])
    r = np.log(ds.rxx.values[0])
    minima = n[argrelmin(r, order=3)[0]]
    target = 4 * n0 + 4 * ph.flux_density_per_flavour(4.0)
    assert np.min(np.abs(minima - target)) < 0.05 * ph.flux_density_per_flavour(4.0) * 4
    assert "4:4" in ds.attrs["truth_satellites"].split(",")


def test_moire_fans_fourfold_from_neutrality_twofold_from_half_filling():
    # twisted bilayer near the magic angle: Landau levels from neutrality fourfold
    # (nu = +-4, +-8, +-12, ...), from the correlated states at s = +-2 twofold and pointing
    # away from neutrality; the s = 2 state is insulating, sigma_xy = 0 (Cao et al., Nature
    # 556, 43 (2018), from memory; Streda: sigma_xy = e dn/dB along a gap)
    b = 3.0
    ds = simulate_fan("moire-graphene", gate=np.linspace(-0.5, 4.5, 1500), field=[b], **CLEAN)
    n0, flux = ds.attrs["truth_cell_density"], ph.flux_density_per_flavour(b)
    n = ds.attrs["truth_density_per_volt"] * (ds.gate.values - ds.attrs["truth_zero_density_voltage"])
    r = rho_xx(ds)[0]
    minima = n[argrelmin(np.log(r), order=3)[0]]
    from_neutrality = minima[(minima > 0.1 * n0) & (minima < 1.95 * n0)] / flux
    assert from_neutrality.size >= 4
    assert np.allclose(from_neutrality, 4 * np.round(from_neutrality / 4), atol=0.15)
    assert np.unique(np.round(from_neutrality / 4)).size == from_neutrality.size
    from_half = (minima[(minima > 2.05 * n0) & (minima < 2.9 * n0)] - 2 * n0) / flux
    assert from_half.size >= 3 and np.all(from_half > 0)
    assert np.allclose(from_half, 2 * np.round(from_half / 2), atol=0.15)
    # plateau of the outward t = 2 line at h / (2 e^2) (von Klitzing; R_K from scipy.constants)
    line = np.argmin(np.abs(n - (2 * n0 + 2 * flux)))
    assert ds.rxy.values[0, line] == pytest.approx(R_K / 2, rel=0.005)
    at_half = np.argmin(np.abs(n - 2 * n0))
    rxx, rxy = r[at_half], ds.rxy.values[0, at_half]
    assert abs(rxy / (rxx**2 + rxy**2)) * R_K < 0.05 and rxx > 10 * np.median(r)
    # one row spans no field range, so no satellite is listed as resolved
    assert ds.attrs["truth_satellites"] == ""


def test_moire_truth_lists_the_lines_resolved_over_a_field_range():
    # truth_satellites holds exactly the lines with a resolved gap over >= 1 T inside the window
    field = np.linspace(0.5, 6.0, 23)
    ds = simulate_fan("moire-graphene", gate=np.linspace(-6, 6, 200), field=field, **CLEAN)
    truth = set(ds.attrs["truth_satellites"].split(","))
    assert {"2:2", "4:2", "-2:-2", "4:4", "8:4", "-4:4"} <= truth
    assert not any(item.endswith(":2") and item.startswith("-") for item in truth)  # no inward s=2
    # a line that only clips the window's corner (t = 40 from full filling) is not listed
    assert "40:4" not in truth
    assert float(ds.attrs["truth_satellite_min_field_range"]) == 1.0


def test_gate_map_neutrality_line_and_gap_growing_with_displacement():
    # n = (C_t dV_t + C_b dV_b)/e and the bilayer gap grows with |D| (Zhang et al. 2009, from memory)
    gm = simulate_gate_map(top_gate=np.linspace(-8, 8, 801), bottom_gate=np.linspace(-80, 80, 9),
                           **CLEAN)
    ct, cb = gm.attrs["truth_top_capacitance"], gm.attrs["truth_bottom_capacitance"]
    vt0, vb0 = gm.attrs["truth_top_offset"], gm.attrs["truth_bottom_offset"]
    peaks = []
    for i, vb in enumerate(gm.bottom_gate.values):
        row = gm.rxx.values[i]
        j = np.argmax(row)
        peaks.append(row[j])
        expected_vt = vt0 - cb * (vb - vb0) / ct
        assert abs(gm.top_gate.values[j] - expected_vt) < 0.2
    centre = np.argmin(np.abs(gm.bottom_gate.values - vb0))
    assert peaks[0] > 10 * peaks[centre] and peaks[-1] > 10 * peaks[centre]
    assert gm.rxx.dims == ("bottom_gate", "top_gate") and float(gm.field) == 0.0


def test_gate_map_contact_resistance_depends_on_bottom_gate_only():
    kw = dict(top_gate=np.linspace(-4, 4, 30), bottom_gate=np.linspace(-60, 60, 20), **CLEAN)
    plain, with_contacts = simulate_gate_map(**kw), simulate_gate_map(contact_resistance=100.0, **kw)
    extra = with_contacts.rxx.values - plain.rxx.values
    assert np.all(extra > 0)
    assert np.allclose(extra, extra[:, :1], rtol=1e-6)


# --- reproducibility and artefacts ------------------------------------------------------------

SMALL = dict(gate=np.linspace(-30, 30, 80), field=np.linspace(1, 9, 12))


def test_same_seed_same_map_other_seed_other_noise():
    kw = dict(SMALL, spikes=5, nan_gaps=2, correlated_noise=0.01, irregular_field=0.3)
    a, b, c = simulate_fan(seed=7, **kw), simulate_fan(seed=7, **kw), simulate_fan(seed=8, **kw)
    xr.testing.assert_identical(a, b)
    assert not np.allclose(np.nan_to_num(a.rxx.values), np.nan_to_num(c.rxx.values))


@pytest.mark.parametrize("hysteresis", [0.0, 0.5])
def test_interrupted_last_sweep_has_a_nan_tail_in_sweep_order(hysteresis):
    ds = simulate_fan(interrupted=0.4, hysteresis=hysteresis, alternate_sweeps=True,
                      **dict(SMALL, field=np.linspace(1, 9, 11)), **CLEAN)
    last = ds.rxx.values[-1]
    up = int(ds.sweep_direction[-1]) > 0
    assert np.isnan(last).sum() == 80 - 32
    assert np.all(np.isfinite(last[:32] if up else last[-32:]))
    assert np.all(np.isfinite(ds.rxx.values[:-1]))
    assert np.isnan(ds.rxy.values[-1]).sum() == 48


def test_nan_gaps_are_short_runs():
    ds = simulate_fan(nan_gaps=6, seed=3, **SMALL)
    missing = np.isnan(ds.rxx.values)
    assert 6 <= missing.sum() <= 36
    for row in missing:
        runs = np.diff(np.flatnonzero(np.diff(np.concatenate([[0], row.astype(int), [0]]))))[::2]
        assert np.all(runs <= 12)


def test_drift_moves_the_fan_origin_linearly_in_time():
    kw = dict(gate=np.linspace(-30, 30, 600), field=[6.0, 6.0, 6.0], broken_symmetry={}, **CLEAN)
    still, moving = simulate_fan(**kw), simulate_fan(drift=2.0, **kw)
    # the nu = 6 minimum of the last row shifts by the whole drift, the middle row by half
    window = np.abs(filling(still, 0) - 6) < 2
    g = still.gate.values[window]
    for row, shift in ((1, 1.0), (2, 2.0)):
        moved = g[np.argmin(moving.rxx.values[row][window])] - g[np.argmin(still.rxx.values[row][window])]
        assert moved == pytest.approx(shift, abs=0.15)
    assert moving.attrs["truth_drift"] == 2.0


def test_hysteresis_alternates_sweeps_and_shifts_down_sweeps():
    ds = simulate_fan(hysteresis=0.8, gate=np.linspace(-30, 30, 600), field=[6.0, 6.0],
                      broken_symmetry={}, **CLEAN)
    assert list(ds.sweep_direction.values) == [1, -1]
    window = np.abs(filling(ds, 0) - 6) < 2
    g = ds.gate.values[window]
    shift = g[np.argmin(ds.rxx.values[1][window])] - g[np.argmin(ds.rxx.values[0][window])]
    assert shift == pytest.approx(0.8, abs=0.15)


def test_contact_mixing_adds_a_fraction_of_rxy():
    plain = simulate_fan(**SMALL, **CLEAN)
    mixed = simulate_fan(contact_mixing=0.03, **SMALL, **CLEAN)
    assert np.allclose(mixed.rxx - plain.rxx, 0.03 * plain.rxy, rtol=1e-9, atol=1e-9)


def test_spikes_are_isolated_outliers():
    plain = simulate_fan(**SMALL, **CLEAN)
    spiky = simulate_fan(spikes=7, **SMALL, **CLEAN)
    ratio = spiky.rxx.values / plain.rxx.values
    assert np.sum(ratio > 2) == 7 and np.sum(ratio != 1) == 7


def test_noise_levels():
    plain = simulate_fan(**SMALL, **CLEAN)
    noisy = simulate_fan(noise=0.01, noise_floor=0.0, **SMALL)
    rel = noisy.rxx.values / plain.rxx.values - 1
    assert np.std(rel) == pytest.approx(0.01, rel=0.15)
    corr = simulate_fan(noise=0.0, noise_floor=0.0, correlated_noise=0.01, correlation_length=30,
                        **SMALL)
    rel = corr.rxx.values / plain.rxx.values - 1
    lag1 = np.mean(rel[:, 1:] * rel[:, :-1]) / np.mean(rel**2)
    assert lag1 > 0.9


def test_field_options_irregular_steps_zero_row_and_both_signs():
    irregular = simulate_fan(irregular_field=0.4, **SMALL, **CLEAN)
    steps = np.diff(irregular.field.values)
    assert steps.std() > 0.05 * steps.mean()
    assert irregular.field.values[[0, -1]] == pytest.approx([1, 9])
    zero = simulate_fan(zero_field_row=True, **SMALL, **CLEAN)
    assert zero.field.values[0] == 0 and np.all(zero.rxy.values[0] == 0)
    both = simulate_fan(field_sign="both", **SMALL, **CLEAN)
    assert both.field.values[0] == -9 and both.field.values[-1] == 9
    # Onsager reciprocity: R_xx(B) = R_xx(-B), R_xy(B) = -R_xy(-B) (standard result)
    half = both.sizes["field"] // 2
    assert np.allclose(both.rxx.values[:half][::-1], both.rxx.values[half:], rtol=1e-9)
    assert np.allclose(both.rxy.values[:half][::-1], -both.rxy.values[half:], rtol=1e-9)
    negative = simulate_fan(field_sign=-1, **SMALL, **CLEAN)
    assert np.all(negative.field.values < 0)
    assert np.allclose(negative.rxy.values, -simulate_fan(**SMALL, **CLEAN).rxy.values)
    mixed = simulate_fan(field_sign="both", contact_mixing=0.05, **SMALL, **CLEAN)
    assert not np.allclose(mixed.rxx.values[:half][::-1], mixed.rxx.values[half:], rtol=1e-3)


def test_quantum_capacitance_bends_density_near_neutrality():
    # n(V) from e(V - V0) = e^2 n / C + E_F(n) (Dirac quantum capacitance, Fang et al. 2007,
    # from memory): the density is below alpha (V - V0) by the E_F / e term
    kw = dict(gate=np.linspace(-3, 3, 200), density_per_volt=7e15, zero_density_voltage=0.0,
              field=[0.0, 1.0], residual_density=0.0, **CLEAN)
    plain, bent = simulate_fan(**kw), simulate_fan(quantum_capacitance=True, **kw)
    assert np.all(bent.rxx.values[0][150:] > plain.rxx.values[0][150:])
    assert bent.attrs["truth_quantum_capacitance"] == 1


# --- output -----------------------------------------------------------------------------------

def test_schema_units_and_truth_survive_netcdf(tmp_path):
    ds = simulate_fan("2deg", gate=np.linspace(-0.6, 0.3, 60), field=np.linspace(1, 14, 10))
    for name in list(ds.variables):
        if name != "sweep_direction":
            assert "units" in ds[name].attrs and "long_name" in ds[name].attrs
    assert ds.attrs["map_kind"] == "fan"
    path = tmp_path / "fan.nc"
    write_map(ds, path)
    back = xr.open_dataset(path)
    assert back.attrs["truth_fractional_fillings"] == ds.attrs["truth_fractional_fillings"]
    assert list(back.attrs["truth_main_fillings"]) == list(ds.attrs["truth_main_fillings"])
    assert np.array_equal(back.rxx.values, ds.rxx.values)
    assert [p.name for p in tmp_path.iterdir()] == ["fan.nc"]


def test_failed_write_leaves_no_file(tmp_path):
    ds = simulate_fan(**SMALL)
    ds.attrs["truth_bad"] = {"not": "storable"}
    with pytest.raises(Exception):
        write_map(ds, tmp_path / "bad.nc")
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("kwargs, message", [
    (dict(material="auto"), "cannot be simulated"),
    (dict(material="graphene-trilayer"), "unknown material"),
    (dict(gate=[3, 2, 1, 0]), "increasing"),
    (dict(interrupted=1.5), "interrupted"),
    (dict(material="graphene-bilayer", fractional=True), "2deg"),
    (dict(field_sign=2), "field_sign"),
    (dict(hall_fraction=0.8, extended_fraction=0.5), "hall_fraction"),
    (dict(temperature=-1.0), "positive"),
])
def test_bad_options_raise_clear_errors(kwargs, message):
    with pytest.raises(InputError, match=message):
        simulate_fan(**{**dict(field=[1.0, 2.0]), **kwargs})


def test_command_line_writes_a_map_and_rejects_bad_input(tmp_path, capsys):
    out = tmp_path / "fan.nc"
    code = main(["simulate", "--material", "2deg", "--out", str(out),
                 "--gate", "-0.6", "0.3", "40", "--fields", "1", "9", "6", "--png",
                 str(tmp_path / "fan.png")])
    assert code == 0
    assert xr.open_dataset(out).rxx.shape == (6, 40)
    assert (tmp_path / "fan.png").stat().st_size > 1000
    assert main(["simulate", "--material", "2deg"]) == 2
    assert "--out" in capsys.readouterr().err
    plain = tmp_path / "plain.nc"
    assert main(["simulate", "--material", "2deg", "--out", str(plain), "--fields", "10", "14",
                 "3", "--no-fractional", "--no-broken-symmetry", "--seed", "4"]) == 0
    attrs = xr.open_dataset(plain).attrs
    assert attrs["truth_fractional_fillings"] == "" and attrs["truth_seed"] == 4


def test_temperature_series_needs_two_temperatures():
    with pytest.raises(InputError, match="two temperatures"):
        simulate_temperature_series("2deg", (1.0,), field=[1.0])


# --- shipped samples -------------------------------------------------------------------------

@pytest.mark.slow
@pytest.mark.parametrize("name", sorted(SAMPLES))
def test_shipped_sample_regenerates_to_the_same_arrays(name):
    path = SAMPLE_DIR / name
    assert path.stat().st_size < 2e6
    shipped = xr.open_dataset(path)
    fresh = make_sample(name)
    for var in fresh.data_vars:
        assert np.array_equal(shipped[var].values, fresh[var].values.astype(np.float32),
                              equal_nan=True), var
    for coord in fresh.coords:
        assert np.array_equal(shipped[coord].values, fresh[coord].values), coord
    for key, value in fresh.attrs.items():
        if isinstance(value, str):
            assert shipped.attrs[key] == value, key
        else:
            # netCDF gives one-element lists back as scalars
            assert np.array_equal(np.atleast_1d(shipped.attrs[key]), np.atleast_1d(value),
                                  equal_nan=True), key
    assert shipped.attrs["map_kind"] in ("fan", "gates")


def test_sample_readme_names_every_map_and_the_command():
    readme = (SAMPLE_DIR / "README.md").read_text()
    assert "synthetic" in readme and REGENERATE in readme
    for name in SAMPLES:
        assert name in readme
