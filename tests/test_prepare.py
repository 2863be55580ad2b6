"""Preparation steps on small hand-built maps (invented data) with known answers."""

import numpy as np
import pytest
import xarray as xr
from scipy import constants

from fanmap.errors import InputError
from fanmap.prepare import (
    average_repeats, conductivity, despike, direction_shift, merge_directions, prepare_map,
    regrid, regrid_sweeps, remove_background, smooth, split_directions, symmetrise,
)


def fan_from(field, gate, rxx, rxy=None, direction=None):
    data = {"rxx": (("field", "gate"), rxx, {"units": "ohm", "long_name": "longitudinal resistance"})}
    if rxy is not None:
        data["rxy"] = (("field", "gate"), rxy, {"units": "ohm", "long_name": "Hall resistance"})
    coords = {"field": ("field", field, {"units": "T", "long_name": "magnetic field"}),
              "gate": ("gate", gate, {"units": "V", "long_name": "gate voltage"})}
    if direction is not None:
        coords["sweep_direction"] = ("field", np.asarray(direction))
    return xr.Dataset(data, coords=coords, attrs={"map_kind": "fan"})


def even_odd(field, gate):
    """R_xx even and R_xy odd in B, as Onsager reciprocity requires of a two-terminal-pair
    measurement (Onsager, Phys. Rev. 38, 2265 (1931); Buttiker, IBM J. Res. Dev. 32, 317 (1988);
    both from memory)."""
    b, v = np.meshgrid(field, gate, indexing="ij")
    rxx = 1000.0 * (1.3 + np.cos(2 * np.pi * v * np.abs(b) / 3.0))
    rxy = 900.0 * b * np.tanh(v)
    return rxx, rxy


# --- symmetrisation ----------------------------------------------------------------

def test_symmetrise_removes_known_contact_mixing_to_within_noise():
    # Common practice: misaligned contacts add a fraction of R_xy to R_xx, which symmetrising
    # over +-B removes (see the shared check-values table, "facts of the trade").
    rng = np.random.default_rng(3)
    field = np.linspace(-4, 4, 17)
    gate = np.linspace(-2, 2, 81)
    rxx, rxy = even_odd(field, gate)
    mixing, noise = 0.06, 2.0
    measured_xx = rxx + mixing * rxy + rng.normal(0, noise, rxx.shape)
    measured_xy = rxy + 0.02 * rxx + rng.normal(0, noise, rxx.shape)
    fan = fan_from(field, gate, measured_xx, measured_xy)
    before = np.sqrt(np.mean((measured_xx - rxx) ** 2))
    out, notes = symmetrise(fan)
    assert notes["pairs"] == 8
    assert out.field.values.tolist() == field[field >= 0].tolist()
    truth_xx, truth_xy = even_odd(out.field.values, gate)
    err_xx = np.sqrt(np.mean((out.rxx.values - truth_xx) ** 2))
    err_xy = np.sqrt(np.mean((out.rxy.values[1:] - truth_xy[1:]) ** 2))
    assert before > 30 * noise
    assert err_xx < 1.5 * noise / np.sqrt(2) + 0.3  # averaging two rows halves the noise variance
    assert err_xy < 1.5 * noise / np.sqrt(2) + 0.3
    assert notes["contact_mixing"] == pytest.approx(mixing, abs=0.003)
    assert notes["rxx_antisymmetric_fraction"] > 0.05
    assert np.all(out.rxy.values[0] == 0.0)  # B = 0: no antisymmetric part


def test_symmetrise_simulated_map_with_known_mixing():
    # The simulator adds contact_mixing * R_xy to R_xx; symmetrising must remove it to within the
    # noise (averaging two rows: noise / sqrt(2)) and report the mixing fraction.
    from fanmap.simulate import simulate_fan
    kw = dict(gate=np.linspace(-30, 30, 121), field=np.linspace(1, 9, 12), seed=4, field_sign="both")
    truth = simulate_fan(**kw, noise=0, noise_floor=0)
    noisy = simulate_fan(**kw)
    mixed = simulate_fan(**kw, contact_mixing=0.1)
    positive = truth.field.values > 0
    noise = np.sqrt(np.mean((noisy.rxx.values - truth.rxx.values)[positive] ** 2))
    out, notes = symmetrise(mixed)
    expected = truth.rxx.values[positive]
    before = np.sqrt(np.mean((mixed.rxx.values[positive] - expected) ** 2))
    after = np.sqrt(np.mean((out.rxx.values - expected) ** 2))
    assert after < 1.15 * noise / np.sqrt(2)
    assert before > 3 * after
    assert notes["contact_mixing"] == pytest.approx(0.1, abs=0.003)
    assert notes["pairs"] == 12


def test_symmetrise_aligns_rows_moved_by_drift_and_hysteresis():
    # +B and -B rows measured far apart in time: V0 drifts by 0.6 V across the map and down sweeps
    # sit 0.4 V higher; without alignment the mixing estimate is swamped, with it it comes back
    from fanmap.simulate import simulate_fan
    fan = simulate_fan(gate=np.linspace(-30, 30, 241), field=np.linspace(1, 9, 20), seed=5,
                       field_sign="both", drift=0.6, hysteresis=0.4, contact_mixing=0.03)
    _, plain = symmetrise(fan, align=False)
    _, aligned = symmetrise(fan)
    assert abs(plain["contact_mixing"] - 0.03) > 0.1
    assert aligned["contact_mixing"] == pytest.approx(0.03, abs=0.012)
    assert aligned["pair_shift_max"] == pytest.approx(0.6 + 0.4, abs=0.15)
    assert aligned["rxx_antisymmetric_fraction"] < 0.5 * plain["rxx_antisymmetric_fraction"]


def test_symmetrise_keep_both_and_unpaired_rows():
    field = np.array([-3.0, -2.0, 1.0, 2.0, 3.0])  # +1 T has no partner
    gate = np.linspace(-1, 1, 11)
    rxx, rxy = even_odd(field, gate)
    fan = fan_from(field, gate, rxx, rxy)
    both, notes = symmetrise(fan, keep="both")
    assert both.sizes["field"] == 5 and notes["unpaired_rows"] == 1
    np.testing.assert_allclose(both.rxx.values, rxx)
    np.testing.assert_allclose(both.rxy.values, rxy, atol=1e-9)
    positive, _ = symmetrise(fan)
    assert positive.field.values.tolist() == [1.0, 2.0, 3.0]


def test_symmetrise_mirrors_unpaired_negative_rows():
    field = np.array([-3.0, -2.0, 2.0])
    gate = np.linspace(-1, 1, 5)
    rxx, rxy = even_odd(field, gate)
    out, notes = symmetrise(fan_from(field, gate, rxx, rxy))
    assert notes["mirrored_rows"] == 1
    assert out.field.values.tolist() == [3.0, 2.0]
    np.testing.assert_allclose(out.rxy.values[0], -rxy[0])


def test_symmetrise_needs_both_signs():
    field = np.array([1.0, 2.0])
    gate = np.linspace(-1, 1, 5)
    rxx, rxy = even_odd(field, gate)
    with pytest.raises(InputError, match="both field signs"):
        symmetrise(fan_from(field, gate, rxx, rxy))


# --- repeats and sweep directions ---------------------------------------------------

def test_average_repeats_by_direction():
    gate = np.linspace(-1, 1, 5)
    field = np.array([1.0, 1.0, 2.0, 2.0, 1.0])
    rxx = np.arange(25.0).reshape(5, 5)
    fan = fan_from(field, gate, rxx, direction=[1, -1, 1, -1, 1])
    out, notes = average_repeats(fan)
    assert out.field.values.tolist() == [1.0, 1.0, 2.0, 2.0]
    assert out.sweep_direction.values.tolist() == [1, -1, 1, -1]
    np.testing.assert_allclose(out.rxx.values[0], (rxx[0] + rxx[4]) / 2)
    assert notes["rows_averaged"] == 2
    merged, notes = average_repeats(fan, by_direction=False)
    assert merged.field.values.tolist() == [1.0, 2.0]
    assert "sweep_direction" not in merged.coords


def hysteretic_fan(shift, n_field=12, step=0.02, paired=True):
    gate = np.arange(-2, 2 + step / 2, step)
    field = np.repeat(np.linspace(1, 3, n_field // 2), 2) if paired else np.linspace(1, 3, n_field)
    direction = np.tile([1, -1], n_field // 2)
    b, v = np.meshgrid(field, gate, indexing="ij")
    v_eff = v - np.where(direction[:, None] < 0, shift, 0.0)  # down(V) = up(V - shift)
    rxx = 1000.0 * (1.2 + np.cos(2 * np.pi * v_eff * 2 / b))
    return fan_from(field, gate, rxx, direction=direction)


@pytest.mark.parametrize("shift", [0.1, -0.07, 0.0])
def test_direction_shift_is_measured(shift):
    fan = hysteretic_fan(shift)
    found = direction_shift(fan)
    assert found["pairs"] == 6
    assert found["shift"] == pytest.approx(shift, abs=0.004)  # a fifth of a gate step


@pytest.mark.parametrize("shift", [0.1, -0.05])
def test_direction_shift_between_interleaved_rows(shift):
    # every row at its own field: the lines move between rows, bracketing cancels that motion
    fan = hysteretic_fan(shift, n_field=24, paired=False)
    found = direction_shift(fan)
    assert found["pairs"] == 11
    assert found["shift"] == pytest.approx(shift, abs=0.006)


def test_split_and_merge_directions():
    fan = hysteretic_fan(0.1)
    up, down = split_directions(fan)
    assert up.sizes["field"] == down.sizes["field"] == 6
    merged, notes = merge_directions(fan)
    assert "sweep_direction" not in merged.coords
    assert notes["shift"] == pytest.approx(0.1, abs=0.004)
    inner = slice(20, -20)
    diff = merged.rxx.values[0::2, inner] - merged.rxx.values[1::2, inner]
    raw = fan.rxx.values[0::2, inner] - fan.rxx.values[1::2, inner]
    assert np.sqrt(np.mean(diff**2)) < 0.05 * np.sqrt(np.mean(raw**2))


def test_split_needs_directions():
    fan = fan_from(np.array([1.0, 2.0]), np.linspace(0, 1, 5), np.ones((2, 5)))
    with pytest.raises(InputError, match="sweep_direction"):
        split_directions(fan)


# --- conductivity --------------------------------------------------------------------

def test_conductivity_tensor_matches_matrix_inverse():
    # sigma = rho^-1 for the 2x2 tensor [[rho_xx, rho_xy], [-rho_xy, rho_xx]] (Drude/linear response,
    # standard result); the map's sigma_xy is the (y, x) element, which has the sign of rho_xy.
    rng = np.random.default_rng(0)
    rxx = rng.uniform(10, 1e4, (3, 4))
    rxy = rng.uniform(-2e4, 2e4, (3, 4))
    fan = fan_from(np.array([1.0, 2.0, 3.0]), np.linspace(0, 1, 4), rxx, rxy)
    out, notes = conductivity(fan)
    for i in range(3):
        for j in range(4):
            inverse = np.linalg.inv([[rxx[i, j], rxy[i, j]], [-rxy[i, j], rxx[i, j]]])
            assert float(out.sigma_xx[i, j]) == pytest.approx(inverse[0, 0], rel=1e-12)
            assert float(out.sigma_xy[i, j]) == pytest.approx(inverse[1, 0], rel=1e-12)
    assert out.sigma_xx.attrs["units"] == "S"


def test_conductivity_on_a_plateau_and_geometry_factor():
    # rho_xy = h/(nu e^2) on a plateau (von Klitzing et al. 1980); sigma_xy = nu e^2/h,
    # constants from CODATA 2018 via scipy.constants.
    rk = constants.h / constants.e**2
    fan = fan_from(np.array([5.0]), np.array([0.0, 1.0]), np.array([[0.0, 200.0]]),
                   np.array([[rk / 2, rk / 2]]))
    out, _ = conductivity(fan)
    assert float(out.sigma_xy[0, 0]) / (constants.e**2 / constants.h) == pytest.approx(2.0, rel=1e-12)
    out2, notes = conductivity(fan, geometry_factor=0.5)
    rho = 100.0
    assert float(out2.sigma_xx[0, 1]) == pytest.approx(rho / (rho**2 + (rk / 2) ** 2), rel=1e-12)
    with pytest.raises(InputError, match="--hall"):
        conductivity(fan[["rxx"]])


# --- cleaning ------------------------------------------------------------------------

def test_despike_on_a_simulated_map():
    # single-pixel spikes from the simulator (a random pixel times 3.5 to 8.5): most are found,
    # and a clean map loses almost nothing (sharp resolved maxima are left alone)
    from fanmap.simulate import simulate_fan
    kw = dict(gate=np.linspace(-30, 30, 401), field=np.linspace(1, 9, 40), seed=1, noise=0, noise_floor=0)
    clean = simulate_fan(**kw)
    spiky = simulate_fan(**kw, spikes=20)
    spikes = ~np.isclose(clean.rxx.values, spiky.rxx.values)
    out, notes = despike(spiky, variables=["rxx"])
    changed = ~np.isclose(out.rxx.values, spiky.rxx.values)
    assert (changed & spikes).sum() >= 15
    assert (changed & ~spikes).sum() <= 5  # of 16 040 pixels
    _, clean_notes = despike(clean, variables=["rxx"])
    assert clean_notes["rxx"] <= 5


def test_despike_counts_and_removes_isolated_spikes():
    rng = np.random.default_rng(5)
    field = np.linspace(1, 4, 30)
    gate = np.linspace(-2, 2, 120)
    rxx, _ = even_odd(field, gate)
    rxx = rxx + rng.normal(0, 3.0, rxx.shape)
    clean, notes = despike(fan_from(field, gate, rxx))
    assert notes["rxx"] == 0
    spiky = rxx.copy()
    rows = rng.choice(np.arange(2, 28), 15, replace=False)
    cols = rng.choice(np.arange(3, 117), 15, replace=False)
    spiky[rows, cols] += rng.choice([-1, 1], 15) * 5000.0
    out, notes = despike(fan_from(field, gate, spiky))
    assert notes["rxx"] == 15
    assert np.max(np.abs(out.rxx.values[rows, cols] - rxx[rows, cols])) < 150.0


def test_smooth_keeps_nan_and_constants():
    x = np.full((4, 9), 5.0)
    x[1, 4] = np.nan
    out, _ = smooth(fan_from(np.arange(1.0, 5.0), np.linspace(0, 1, 9), x), gate_sigma=2.0)
    assert np.isnan(out.rxx.values[1, 4])
    np.testing.assert_allclose(out.rxx.values[np.isfinite(x)], 5.0)


def test_remove_background_per_row():
    gate = np.linspace(-1, 1, 21)
    field = np.array([1.0, 2.0])
    rxx = np.array([3 + 2 * gate + 5 * gate**2, 1 - gate**2])
    out, notes = remove_background(fan_from(field, gate, rxx))
    np.testing.assert_allclose(out.rxx_detrended.values, 0.0, atol=1e-9)
    assert out.rxx_detrended.attrs["units"] == "ohm"
    med, _ = remove_background(fan_from(field, gate, rxx), method="median")
    assert float(np.median(med.rxx_detrended.values[0])) == pytest.approx(0.0)


def test_regrid_onto_a_new_grid_keeps_gaps():
    gate = np.linspace(0, 1, 11)
    rxx = np.tile(10 * gate, (2, 1))
    rxx[1, 4:7] = np.nan
    out, notes = regrid(fan_from(np.array([1.0, 2.0]), gate, rxx), np.linspace(0, 1, 21))
    np.testing.assert_allclose(out.rxx.values[0], 10 * np.linspace(0, 1, 21), atol=1e-12)
    assert np.isnan(out.rxx.values[1, 7:13]).all()


def test_regrid_sweeps_report():
    positions = [np.linspace(0, 1, 11), np.linspace(0, 1, 11) + 0.01, np.linspace(0, 0.5, 6)]
    values = {"rxx": [2 * p for p in positions]}
    grid, rows, report = regrid_sweeps(positions, values)
    assert report["interpolated"]
    assert report["short_sweeps"] and report["short_sweeps"][0][0] == 2
    np.testing.assert_allclose(rows["rxx"][1][1:-1], 2 * grid[1:-1], atol=1e-12)
    with pytest.raises(InputError):
        regrid_sweeps([np.array([1.0])], {"rxx": [np.array([1.0])]})


# --- the usual sequence ----------------------------------------------------------------

def test_prepare_map_end_to_end():
    rng = np.random.default_rng(2)
    field = np.repeat(np.linspace(-3, 3, 7), 2)
    direction = np.tile([1, -1], 7)
    gate = np.linspace(-2, 2, 101)
    rxx, rxy = even_odd(field, gate)
    rxx = rxx + 0.05 * rxy + rng.normal(0, 1.0, rxx.shape)
    rxx[4, 50] += 8000.0
    fan = fan_from(field, gate, rxx, rxy, direction)
    out, notes = prepare_map(fan, conductivity=True, background=True, smooth=1.0)
    assert notes["despike"]["rxx"] == 1
    assert notes["directions"]["shift"] == pytest.approx(0.0, abs=0.01)
    assert notes["average_repeats"]["rows_after"] == 14
    assert notes["symmetrise"]["contact_mixing"] == pytest.approx(0.05, abs=0.01)
    assert {"sigma_xx", "sigma_xy", "rxx_detrended"} <= set(out.data_vars)
    assert (out.field.values >= 0).all()
    merged, notes = prepare_map(fan, merge_directions=True)
    assert notes["average_repeats"]["rows_after"] == 7
    assert notes["directions"]["merged"]


def test_prepare_gate_map_skips_fan_steps():
    x = np.ones((5, 6)) + np.arange(6)
    gm = xr.Dataset({"rxx": (("bottom_gate", "top_gate"), x, {"units": "ohm"})},
                    coords={"bottom_gate": np.arange(5.0), "top_gate": np.arange(6.0)},
                    attrs={"map_kind": "gates"})
    out, notes = prepare_map(gm)
    assert set(notes) == {"despike"}
    np.testing.assert_allclose(out.rxx.values, x)
