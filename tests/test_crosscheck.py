"""Cross-checks of the calibration against textbook relations and exact model maps.

Outside references (see the shared check-values table):
- Onsager (1952): oscillation frequency in 1/B, B_F = n h / (g e).
- Lifshitz & Kosevich (1956); Shoenberg, *Magnetic Oscillations in Metals* (1984):
  thermal damping X / sinh X with X = 2 pi^2 k_B T m* / (hbar e B); Dingle factor
  exp(-2 pi^2 k_B T_D m* / (hbar e B)).
- Drude model: low-field Hall resistance R_xy = B / (n e) for one carrier type.
- Landau index phase (as used in Zhang et al., Nature 438, 201 (2005)): N = B_F/B_N - gamma,
  gamma = 1/2 for Berry phase pi, 0 for 0 or 2 pi.
- GaAs conduction-band effective mass 0.067 m_e (handbook value, common practice).

The model maps below are built directly from those formulas with scipy.constants
(CODATA 2018), independently of the code under test.
"""

import json

import numpy as np
import pytest
import xarray as xr
from scipy import constants as C

from fanmap import crosscheck as cc
from fanmap.errors import InputError
from fanmap.results import FanResult, to_jsonable


def lk_fan_map(*, alpha=1e15, v0=-2.0, g=2, gamma=0.0, mass=0.067, temperature=0.3,
               dingle=1.0, gates=None, fields=None, mobility=50.0, hall=True, puddle=0.0,
               noise=0.0, saturate=True, seed=0):
    """Fan map of one band: Drude R_xy and Lifshitz-Kosevich R_xx oscillations.

    rho_xx = rho_0 [1 - A cos(2 pi (B_F/B - gamma))] with A = 4 R_T R_D (2-D form), minima at
    |nu| = g (N + gamma); with ``saturate`` A is replaced by tanh(A) so that rho stays positive
    at high field (then only the low-field fundamental keeps the LK amplitude).  R_xy = B n /
    (e (n^2 + n*^2)) is the Drude form smoothed near neutrality by a puddle density n*.
    """
    gates = np.linspace(0, 3, 31) if gates is None else gates
    fields = np.linspace(0, 6, 601) if fields is None else fields
    n = alpha * (gates - v0)
    b = np.maximum(np.abs(fields), 1e-9)[:, None]
    bf = np.abs(n) * C.h / (g * C.e)                       # Onsager, written out
    x = 2 * np.pi**2 * C.k * temperature * mass * C.m_e / (C.hbar * C.e * b)
    x_d = 2 * np.pi**2 * C.k * dingle * mass * C.m_e / (C.hbar * C.e * b)
    with np.errstate(over="ignore"):                       # sinh overflows where B -> 0
        amp = 4 * (x / np.sinh(x)) * np.exp(-x_d)
    if saturate:
        amp = np.tanh(amp)
    rho0 = 1 / (C.e * np.sqrt(n**2 + puddle**2) * mobility)
    rxx = rho0 * (1 - amp * np.cos(2 * np.pi * (bf / b - gamma)))
    rng = np.random.default_rng(seed)
    rxx = rxx * (1 + noise * rng.standard_normal(rxx.shape))
    data = {"rxx": (("field", "gate"), rxx, {"units": "ohm", "long_name": "longitudinal resistance"})}
    if hall:
        rxy = fields[:, None] * n / (C.e * (n**2 + puddle**2))
        data["rxy"] = (("field", "gate"), rxy, {"units": "ohm", "long_name": "Hall resistance"})
    return xr.Dataset(
        data, coords={"field": ("field", fields, {"units": "T", "long_name": "magnetic field"}),
                      "gate": ("gate", gates, {"units": "V", "long_name": "gate voltage"})},
        attrs={"map_kind": "fan", "temperature": temperature})


def graphene_map(**kw):
    opts = dict(alpha=7e14, v0=1.5, g=4, gamma=0.5, mass=0.04, gates=np.linspace(-40, 40, 41),
                fields=np.linspace(0, 9, 451), puddle=2e14, dingle=5.0)
    opts.update(kw)
    return lk_fan_map(**opts)


# --- textbook relations ---------------------------------------------------------------

def test_onsager_relation():
    # Onsager (1952): B_F = n h / (g e).  3e15 m^-2 spin-degenerate: 6.2035 T.
    n = 3e15
    assert cc.onsager_frequency(n, 2) == pytest.approx(n * C.h / (2 * C.e), rel=1e-12)
    assert cc.onsager_frequency(n, 2) == pytest.approx(6.2035, abs=1e-4)
    assert cc.onsager_density(cc.onsager_frequency(n, 4), 4) == pytest.approx(n, rel=1e-12)


def test_lifshitz_kosevich_thermal_factor():
    # Lifshitz & Kosevich (1956); Shoenberg (1984): R_T = X / sinh X, X = 2 pi^2 k_B T m*/(hbar e B).
    t, b, m = np.array([0.5, 2.0, 10.0]), 1.3, 0.067
    x = 2 * np.pi**2 * C.k * t * m * C.m_e / (C.hbar * C.e * b)
    np.testing.assert_allclose(cc.lk_thermal_damping(t, b, m), x / np.sinh(x), rtol=1e-12)
    # Coefficient 2 pi^2 k_B m_e/(hbar e) = 14.69 T/K (Shoenberg 1984 quotes 14.69 T/K).
    assert cc.LK_COEFFICIENT == pytest.approx(14.69, abs=0.01)
    assert cc.lk_thermal_damping(1e-9, 1.0, 0.067) == pytest.approx(1.0)
    assert cc.dingle_damping(2.0, 0.067, 1.5) == pytest.approx(
        np.exp(-2 * np.pi**2 * C.k * 1.5 * 0.067 * C.m_e / (C.hbar * C.e * 2.0)), rel=1e-12)


# --- Hall density -----------------------------------------------------------------------

def test_hall_density_exact_drude():
    # Drude: R_xy = B/(n e) gives back n = alpha (V - V0) exactly.
    m = lk_fan_map()
    h = cc.hall_density(m)
    np.testing.assert_allclose(h["density"], 1e15 * (h["gate"] + 2.0), rtol=1e-9)
    cal = cc.hall_calibration(m, geometry_factor=1.0)
    assert cal["density_per_volt"] == pytest.approx(1e15, rel=1e-9)
    assert cal["zero_density_voltage"] == pytest.approx(-2.0, abs=1e-9)
    # mu = 1/(e n rho_xx): the map was built with 50 m^2/(V s) and a square geometry.
    assert cal["mobility_median"] == pytest.approx(50.0, rel=1e-9)


def test_hall_window_stops_before_plateaus():
    # Plateaus R_xy = h/(nu e^2) (von Klitzing et al. 1980) above 2 T on a Drude line below.
    m = lk_fan_map()
    n = 1e15 * (m.gate.values + 2.0)
    b = m.field.values[:, None]
    nu = n * C.h / (C.e * np.maximum(b, 1e-9))
    stepped = C.h / (C.e**2 * 2 * np.maximum(np.round(nu / 2), 1))
    m["rxy"] = m.rxy.where(b < 2.0, stepped)
    h = cc.hall_density(m)
    assert np.all(h["window_max"] < 2.3)
    np.testing.assert_allclose(h["density"], n, rtol=2e-3)


def test_two_carrier_region_left_out_and_warned():
    m = graphene_map()
    cal = cc.hall_calibration(m, geometry_factor=1.0)
    assert any("two carriers" in w for w in cal["warnings"])
    near = np.abs(cal["gate"] - 1.5) < 5
    assert not cal["used"][near].any()
    assert cal["density_per_volt"] == pytest.approx(7e14, rel=3e-3)


def test_hall_needs_rxy():
    with pytest.raises(InputError, match="no Hall signal"):
        cc.hall_density(lk_fan_map(hall=False))


# --- oscillation frequency and index plot ----------------------------------------------------

@pytest.mark.parametrize("noise", [0.0, 0.01])
def test_oscillation_lever_arm_within_stated_error(noise):
    m = lk_fan_map(noise=noise)
    o = cc.oscillation_calibration(m, degeneracy=2)
    bf = 1e15 * (o["gate"] + 2.0) * C.h / (2 * C.e)       # Onsager
    np.testing.assert_allclose(o["frequency"], bf, rtol=2e-3)
    # Truth within 3 stated standard errors.
    assert abs(o["density_per_volt"] - 1e15) < 3 * o["density_per_volt_stderr"]
    assert abs(o["zero_density_voltage"] + 2.0) < 3 * o["zero_density_voltage_stderr"]
    # The stated error (statistical plus systematic) stays useful: below 1 %.
    assert o["density_per_volt_stderr"] < 1e-2 * 1e15


def test_frequency_systematic_covers_exact_traces():
    # The systematic FREQUENCY_SYSTEMATIC (in Rayleigh resolutions) covers the bias of the
    # spectral peak on exact, noise-free LK traces with strong and weak damping, gate by gate.
    for dingle in (1.0, 3.0):
        o = cc.oscillation_calibration(lk_fan_map(dingle=dingle), degeneracy=2)
        bf = 1e15 * (o["gate"] + 2.0) * C.h / (2 * C.e)        # Onsager
        bias = np.abs(o["frequency"] - bf) / o["frequency_resolution"]
        assert np.nanmax(bias) < cc.FREQUENCY_SYSTEMATIC
        assert np.all(np.abs(o["frequency"] - bf)[o["used"]] < 3 * o["frequency_stderr"][o["used"]])


@pytest.mark.parametrize("gamma", [0.0, 0.5])
def test_index_plot_intercept(gamma):
    # Minima at |nu| = g (N + gamma): the plot N vs 1/B_N returns gamma and B_F = n h/(g e).
    m = lk_fan_map(gamma=gamma)
    p = cc.landau_index_plot(m, 2.5, degeneracy=2)
    assert p["intercept"] == pytest.approx(gamma, abs=0.02)
    assert abs(p["intercept"] - gamma) < 3 * p["intercept_stderr"] + 0.01
    assert p["frequency"] == pytest.approx(4.5e15 * C.h / (2 * C.e), rel=2e-3)
    # Convention: integer N, with nu = g (N + gamma) at each minimum.
    assert np.all(p["index"] == np.round(p["index"]))
    nu = 4.5e15 * C.h / (C.e * p["field"])
    np.testing.assert_allclose(nu, p["filling"], atol=0.05)


def test_index_plot_skips_spin_split_minima():
    # Extra minima half-way between the main ones (spin splitting at high field) stay off-grid.
    m = lk_fan_map(fields=np.linspace(0, 6, 1201))
    n = 1e15 * (m.gate.values + 2.0)
    b = np.maximum(m.field.values, 1e-9)[:, None]
    bf = n * C.h / (2 * C.e)
    split = 0.4 * np.clip(b - 3.0, 0, None) / 3.0 * np.cos(4 * np.pi * bf / b)
    m["rxx"] = m.rxx * (1 - split)
    p = cc.landau_index_plot(m, 2.5)
    assert p["intercept"] == pytest.approx(0.0, abs=0.03)
    assert np.all(np.diff(p["index"]) >= 1)


def test_graphene_all_methods_agree_with_truth():
    m = graphene_map(noise=0.005)
    r = cc.run_crosschecks(m, material="graphene-monolayer", geometry_factor=1.0)
    for name in ("hall", "oscillation"):
        value, err = r[f"{name}_density_per_volt"], r[f"{name}_density_per_volt_stderr"]
        assert abs(value - 7e14) < 3 * err, name
        v0, v0_err = r[f"{name}_zero_density_voltage"], r[f"{name}_zero_density_voltage_stderr"]
        assert abs(v0 - 1.5) < 3 * v0_err, name
    assert r["index_plot_intercept"] == pytest.approx(0.5, abs=0.03)
    assert r["oscillation_degeneracy"] == 4
    assert r["degeneracy_from_hall_ratio"] == pytest.approx(4, abs=0.05)
    assert r["agree"], r["disagreements"]
    json.dumps(to_jsonable(r), allow_nan=False)


# --- temperature series --------------------------------------------------------------------

def test_effective_mass_and_dingle_from_temperature_series():
    # GaAs m* = 0.067 m_e (handbook); weak oscillations, exact LK amplitude (no saturation).
    fields = np.linspace(0.05, 1.5, 600)
    maps = [lk_fan_map(temperature=t, fields=fields, dingle=3.0, saturate=False, hall=False,
                       gates=np.linspace(1, 3, 3)) for t in (0.4, 1.0, 2.0, 3.0, 4.5)]
    e = cc.effective_mass_from_series(maps)
    assert e["effective_mass"] == pytest.approx(0.067, rel=0.03)
    assert abs(e["effective_mass"] - 0.067) < 3 * e["effective_mass_stderr"] + 1e-4
    assert e["fields"].size >= 3
    assert e["dingle_temperature"] == pytest.approx(3.0, rel=0.05)
    tau = C.hbar / (2 * np.pi * C.k * e["dingle_temperature"])
    assert e["quantum_lifetime"] == pytest.approx(tau, rel=1e-9)
    # 2-D amplitude prefactor 4 (Coleridge et al. 1989, from memory).
    assert e["dingle_prefactor"] == pytest.approx(4.0, rel=0.1)


def test_quantum_lifetime_from_one_map():
    # Dingle factor exp(-2 pi^2 k_B T_D m*/(hbar e B)) (Shoenberg 1984) with the LK thermal
    # factor at the map's temperature divided out; tau_q = hbar / (2 pi k_B T_D).
    m = lk_fan_map(temperature=1.0, fields=np.linspace(0.05, 1.5, 600), dingle=3.0,
                   saturate=False, hall=False, gates=np.linspace(1, 3, 4))
    q = cc.quantum_lifetime(m, gate=3.0, effective_mass=0.067)
    assert abs(q["dingle_temperature"] - 3.0) < 3 * q["dingle_temperature_stderr"]
    assert q["dingle_temperature"] == pytest.approx(3.0, rel=0.05)
    assert q["quantum_lifetime"] == pytest.approx(C.hbar / (2 * np.pi * C.k * 3.0), rel=0.05)
    r = cc.run_crosschecks(m, material="2deg", effective_mass=0.067)
    assert r["quantum_lifetime"]["dingle_temperature"] == pytest.approx(3.0, rel=0.05)


def test_temperature_series_needs_temperatures():
    maps = [lk_fan_map(temperature=t) for t in (0.5, 1.0)]
    with pytest.raises(InputError, match="three or more"):
        cc.effective_mass_from_series(maps)


# --- comparison and the whole run ----------------------------------------------------------

def _fan_result(alpha, v0, stderr=1e12):
    return FanResult(density_per_volt=alpha, density_per_volt_stderr=stderr,
                     capacitance_per_area=C.e * alpha, zero_density_voltage=v0,
                     zero_density_voltage_stderr=1e-3, density_offset=0.0, degeneracy=2,
                     berry_phase=0, scale_from="material", material="2deg")


def test_comparison_flags_a_wrong_fan_lever_arm():
    m = lk_fan_map(noise=0.005)
    good = cc.run_crosschecks(m, _fan_result(1e15, -2.0), geometry_factor=1.0)
    assert good["agree"], good["disagreements"]
    assert [row["method"] for row in good["comparison"]] == ["fan", "hall", "oscillation"]
    bad = cc.run_crosschecks(m, _fan_result(1.05e15, -2.0), geometry_factor=1.0)
    assert not bad["agree"]
    assert any("fan and hall" in d for d in bad["disagreements"])


def test_missing_hall_channel_keeps_other_methods():
    r = cc.run_crosschecks(lk_fan_map(hall=False), material="2deg")
    assert np.isnan(r["hall_density_per_volt"])
    assert any("no Hall signal" in w for w in r["warnings"])
    assert r["oscillation_density_per_volt"] == pytest.approx(1e15, rel=2e-3)
    assert r["index_plot_intercept"] == pytest.approx(0.0, abs=0.03)


def test_degeneracy_from_hall_ratio_when_unknown():
    r = cc.run_crosschecks(lk_fan_map(), material="auto", geometry_factor=1.0)
    assert r["oscillation_degeneracy"] == 2
    assert "Hall" in r["oscillation_degeneracy_from"]


def test_no_oscillations_is_a_clear_warning():
    m = lk_fan_map(dingle=200.0)          # damped away
    r = cc.run_crosschecks(m, material="2deg", geometry_factor=1.0)
    assert np.isnan(r["oscillation_density_per_volt"])
    assert any("oscillation frequency not measured" in w for w in r["warnings"])
    assert r["hall_density_per_volt"] == pytest.approx(1e15, rel=1e-6)


def test_fields_in_gauss_rejected():
    m = lk_fan_map()
    m = m.assign_coords(field=m.field * 1e4)
    with pytest.raises(InputError, match="tesla"):
        cc.hall_density(m)


# --- simulated maps (fanmap.simulate, known truth) -------------------------------------------
# Tolerance: the truth must lie within 3 stated standard errors (a 3-sigma test fails by
# chance in 0.3 % of cases; the maps are seeded, so the outcome is fixed and no floor is
# needed).  Small maps: 100 gate voltages x 250 fields, a few seconds each.

from fanmap.simulate import simulate_fan, simulate_temperature_series  # noqa: E402

MEV = 1e-3 * C.e


def _within(value, err, truth, k=3.0):
    return np.isfinite(value) and np.isfinite(err) and abs(value - truth) <= k * err


@pytest.mark.parametrize("material, gate, field, intercept", [
    # Landau index phase (Zhang et al. 2005): gamma = 1/2 for Berry phase pi (monolayer),
    # 0 for 2 pi (bilayer; Novoselov et al. 2006) and for a 2DEG (von Klitzing et al. 1980).
    ("graphene-monolayer", np.linspace(-40, 40, 100), None, 0.5),
    ("graphene-bilayer", np.linspace(-6, 6, 100), None, 0.0),
    ("2deg", np.linspace(-0.6, 0.3, 60), np.linspace(0.02, 4, 400), 0.0),
])
def test_simulated_maps_three_methods_agree_with_truth(material, gate, field, intercept):
    m = simulate_fan(material, gate=gate, field=field, seed=1)
    alpha, v0 = m.attrs["truth_density_per_volt"], m.attrs["truth_zero_density_voltage"]
    r = cc.run_crosschecks(m, material=material)
    for name in ("hall", "oscillation"):
        assert _within(r[f"{name}_density_per_volt"], r[f"{name}_density_per_volt_stderr"],
                       alpha), name
        assert _within(r[f"{name}_zero_density_voltage"],
                       r[f"{name}_zero_density_voltage_stderr"], v0), name
        # Stated errors are useful, not inflated to pass: below 1 % of alpha.
        assert r[f"{name}_density_per_volt_stderr"] < 0.01 * alpha
    assert _within(r["index_plot_intercept"], r["index_plot_intercept_stderr"], intercept)
    assert r["index_plot_intercept_stderr"] < 0.05
    assert r["agree"], r["disagreements"]
    plot = r["index_plot"]
    assert plot["index"].size == plot["inverse_field"].size >= 4


def test_simulated_2deg_spin_resolved_oscillations_use_the_hall_ratio():
    # With 0.056 T field steps the only resolved oscillations of the simulated GaAs 2DEG are
    # spin split (odd fillings from 0.4-2 T): the frequency counts single levels.
    m = simulate_fan("2deg", gate=np.linspace(-0.6, 0.3, 100), seed=0)
    r = cc.run_crosschecks(m, material="2deg")
    assert r["oscillation_degeneracy"] == 1
    assert any("resolve 1-fold levels" in w for w in r["warnings"])
    assert _within(r["oscillation_density_per_volt"], r["oscillation_density_per_volt_stderr"],
                   m.attrs["truth_density_per_volt"])


def test_simulated_temperature_series_gives_gaas_mass():
    # GaAs m* = 0.067 m_e (handbook value, common practice); the simulator smears the
    # levels with the exact Fermi function, so the LK damping X/sinh X emerges, not imposed.
    maps = simulate_temperature_series("2deg", temperatures=(0.3, 0.6, 1.0, 1.5, 2.2, 3.0),
                                       gate=np.linspace(-0.5, 0.3, 4),
                                       field=np.linspace(0.1, 1.0, 200), broadening=0.8 * MEV)
    assert maps[0].attrs["truth_effective_mass"] == pytest.approx(0.067)
    e = cc.effective_mass_from_series(maps)
    assert e["effective_mass"] == pytest.approx(0.067, rel=0.03)
    assert e["fields"].size >= 3
    # And through run_crosschecks, as the CLI does.
    r = cc.run_crosschecks(maps[0], material="2deg", temperature_series=maps[1:])
    assert r["effective_mass"]["effective_mass"] == pytest.approx(0.067, rel=0.03)


# --- command line -------------------------------------------------------------------------

def test_check_command_writes_json_and_compares(tmp_path, capsys):
    from fanmap.cli import main
    from fanmap.simulate import write_map

    path = tmp_path / "bilayer.nc"
    write_map(simulate_fan("graphene-bilayer", gate=np.linspace(-6, 6, 80), seed=2), path)
    out = tmp_path / "checks.json"
    assert main(["check", str(path), "--material", "graphene-bilayer", "--json", str(out),
                 "--geometry-factor", "0.5"]) == 0
    text = capsys.readouterr().out
    assert "hall" in text and "oscillation" in text and "index-plot intercept" in text
    data = json.loads(out.read_text())
    for key in ("hall_density_per_volt", "oscillation_density_per_volt", "index_plot_intercept"):
        assert data[key] is not None and data[key + "_stderr"] is not None
    assert data["index_plot"]["index"] and data["index_plot"]["inverse_field"]
    assert data["geometry_factor"] == 0.5


def test_check_command_bad_input_exits_nonzero(tmp_path, capsys):
    from fanmap.cli import main

    assert main(["check", str(tmp_path / "missing.nc")]) == 2
    assert "error" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:              # argparse: usage error, exit 2
        main(["check", str(tmp_path / "missing.nc"), "--hall-window", "2:1"])
    assert exc.value.code == 2
    assert "LOW < HIGH" in capsys.readouterr().err


def test_check_command_temperature_series(tmp_path, capsys):
    # Three or more maps at different temperatures: the effective mass (GaAs 0.067 m_e,
    # handbook) from exact LK maps written to netCDF and read back by the command.
    from fanmap.cli import main

    fields = np.linspace(0.05, 1.5, 600)
    paths = []
    for t in (0.4, 1.0, 2.0, 3.0, 4.5):
        path = tmp_path / f"fan_{t}K.nc"
        lk_fan_map(temperature=t, fields=fields, dingle=3.0, saturate=False,
                   gates=np.linspace(1, 3, 4)).to_netcdf(path)
        paths.append(str(path))
    out = tmp_path / "checks.json"
    assert main(["check", *paths, "--material", "2deg", "--no-fit", "--json", str(out),
                 "--temperatures", "0.4,1,2,3,4.5"]) == 0
    assert "effective mass" in capsys.readouterr().out
    mass = json.loads(out.read_text())["effective_mass"]
    assert mass["effective_mass"] == pytest.approx(0.067, rel=0.03)
