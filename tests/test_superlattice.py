"""Superlattice analysis: moire geometry against outside values, and exact-answer moire fans.

The hand-built maps below put Lorentzian dips of R_xx along n = t eB/h + s n0
(the Diophantine relation of Landau levels in a periodic potential) over a
smooth background, so the right answer (n0, every (t, s)) is known exactly.
"""

import json

import numpy as np
import pytest
import xarray as xr
from scipy import signal

from fanmap import physics as ph
from fanmap import ridges
from fanmap.errors import InputError, NoFanError
from fanmap.fanfit import fit_fan
from fanmap.results import FanResult, State, to_jsonable
from fanmap.simulate import simulate_fan
from fanmap.superlattice import analyse_superlattice, superlattice_geometry

ALPHA = 6.0e16      # m^-2 V^-1, a ~30 nm hBN gate (invented device)
V0 = 0.02           # V
MAIN = (-12, -8, -4, 4, 8, 12)
# Landau levels keep the fourfold flavour degeneracy from full filling and are twofold from
# half filling (Cao et al., Nature 556, 80 (2018), from memory): slopes t in steps of 4 and 2.
FULL = ((4, 4), (8, 4), (-4, 4), (-8, 4), (4, -4), (8, -4), (-4, -4), (-8, -4))
HALF = ((2, 2), (-2, 2), (4, 2), (2, -2), (-2, -2), (-4, -2))


def cell_density(angle_deg):
    return ph.moire_cell_density(ph.moire_wavelength(np.radians(angle_deg)))


def moire_map(angle_deg=1.1, satellites=FULL, *, superlattice=True, zero_field_peaks=True,
              horizontal=(), seed=0, noise=0.01, rows=81, columns=361, max_field=8.0):
    """A fan map with main-fan lines, satellite lines and optional horizontal dips."""
    rng = np.random.default_rng(seed)
    n0 = cell_density(angle_deg)
    half_span = 1.6 * 4 * n0 / ALPHA
    gate = np.linspace(-half_span, half_span, columns)
    field = np.linspace(0.0, max_field, rows)
    n = ALPHA * (gate - V0)[None, :]
    flux = field[:, None] / ph.FLUX_QUANTUM_SINGLE_ELECTRON
    width = 1.5 * ALPHA * (gate[1] - gate[0])
    r = 1e3 + 9e3 / (1 + (n / (0.03 * ALPHA)) ** 2) + 0 * flux
    if superlattice and zero_field_peaks:
        for s, height in ((4, 5e3), (-4, 5e3), (2, 1.5e3), (-2, 1.5e3)):
            r = r + height / (1 + ((n - s * n0) / (0.015 * ALPHA)) ** 2) * np.exp(-flux * 0 -
                                                                              field[:, None] / 3)
    onset = 1.0 / (1 + np.exp(-(field[:, None] - 1.0) / 0.15))
    dip = sum(0.8 * onset / (1 + ((n - nu * flux) / width) ** 2) for nu in MAIN)
    if superlattice:
        for t, s in satellites:
            dip = dip + 0.6 * onset / (1 + ((n - t * flux - s * n0) / width) ** 2)
    for b in horizontal:
        dip = dip + 0.4 / (1 + ((field[:, None] - b) / 0.04) ** 2) + 0 * n
    r = r * np.exp(-np.clip(dip, 0, 3)) * (1 + noise * rng.standard_normal(r.shape))
    return xr.Dataset(
        {"rxx": (("field", "gate"), r, {"units": "ohm", "long_name": "longitudinal resistance"})},
        coords={"field": ("field", field, {"units": "T", "long_name": "magnetic field"}),
                "gate": ("gate", gate, {"units": "V", "long_name": "gate voltage"})},
        attrs={"map_kind": "fan"})


def hand_fit(fan_map):
    """A main-fan result with the exact alpha and V0 and per-row minima as ridge points."""
    logr = np.log10(fan_map.rxx.values)
    gate = fan_map.gate.values
    step = gate[1] - gate[0]
    fields, gates, weights = [], [], []
    for i, b in enumerate(fan_map.field.values):
        if b < 0.3:
            continue
        idx, props = signal.find_peaks(-logr[i], prominence=0.05)
        for p, prom in zip(idx, props["prominences"]):
            den = logr[i, p - 1] - 2 * logr[i, p] + logr[i, p + 1] if 0 < p < gate.size - 1 else 0
            offset = 0.5 * (logr[i, p - 1] - logr[i, p + 1]) / den if den else 0.0
            fields.append(b)
            gates.append(gate[p] + offset * step)
            weights.append(prom)
    fields, gates = np.array(fields), np.array(gates)
    per_filling = 1 / (ALPHA * ph.FLUX_QUANTUM_SINGLE_ELECTRON)
    states = [State(filling=str(nu), kind="integer", slope=nu * per_filling, intercept=V0,
                    points=0, field_min=1.0, field_max=float(fan_map.field.max()))
              for nu in MAIN]
    state = np.full(fields.size, -1)
    for i, nu in enumerate(MAIN):
        state[np.abs(gates - (V0 + nu * per_filling * fields)) < step] = i
    return FanResult(
        density_per_volt=ALPHA, density_per_volt_stderr=1e-3 * ALPHA,
        capacitance_per_area=ph.capacitance_from_lever_arm(ALPHA), zero_density_voltage=V0,
        zero_density_voltage_stderr=1e-4, density_offset=-ALPHA * V0, degeneracy=4,
        berry_phase=2, scale_from="material", states=states, material="moire-graphene",
        ridge_points={"field": fields, "gate": gates, "state": state,
                      "weight": np.array(weights)})


# --- geometry against outside values --------------------------------------------------

def test_magic_angle_full_filling_density():
    # Cao et al., Nature 556, 43 (2018), from memory: theta ~ 1.05-1.1 deg gives
    # n_s ~ 2.7e12 cm^-2 (shared check-values table); tolerance wide for "from memory".
    g = superlattice_geometry(cell_density(1.1))
    assert g["density"] * 1e-4 == pytest.approx(2.7e12, rel=0.06)
    n0 = 2.7e16 / 4
    back = superlattice_geometry(n0)
    assert 1.03 < back["twist_angle_deg"] < 1.12


@pytest.mark.parametrize("angle", [0.5, 0.9, 1.1, 1.5, 3.0])
def test_geometry_formulas_agree(angle):
    # Standard geometry: lambda = a / (2 sin(theta/2)) ~ a / theta; triangular moire cell of
    # area (sqrt(3)/2) lambda^2 holds one carrier at n0 (common practice, a = 0.246 nm).
    wavelength = ph.moire_wavelength(np.radians(angle))
    assert ph.moire_wavelength(np.radians(angle), small_angle=True) == pytest.approx(
        wavelength, rel=np.radians(angle) ** 2 / 20)
    assert 1 / ph.moire_cell_density(wavelength) == pytest.approx(np.sqrt(3) / 2 * wavelength**2)
    g = superlattice_geometry(ph.moire_cell_density(wavelength), flavours=4)
    assert g["twist_angle_deg"] == pytest.approx(angle, rel=1e-9)
    assert g["wavelength"] == pytest.approx(wavelength, rel=1e-12)
    assert g["density"] == pytest.approx(ph.moire_full_filling_density(np.radians(angle)))
    # small-angle and exact formulas agree to far better than 0.01 deg below 3 deg
    assert abs(g["twist_angle_small_angle_deg"] - angle) < 1e-3


def test_geometry_uncertainty_propagation():
    # theta ~ a sqrt(sqrt(3) n0 / 2), so sigma_theta / theta = sigma_n0 / (2 n0) to first order.
    n0 = cell_density(1.2)
    g = superlattice_geometry(n0, 0.02 * n0)
    assert g["twist_angle_deg_stderr"] == pytest.approx(0.01 * 1.2, rel=1e-3)
    assert g["wavelength_stderr"] == pytest.approx(0.01 * g["wavelength"], rel=1e-9)
    assert g["density_stderr"] == pytest.approx(4 * 0.02 * n0)


def test_geometry_without_lattice_constant_has_no_angle():
    g = superlattice_geometry(cell_density(1.0), flavours=2, lattice_constant=None)
    assert g["twist_angle_deg"] is None and g["density"] == pytest.approx(2 * cell_density(1.0))
    with pytest.raises(InputError):
        superlattice_geometry(-1.0)


# --- exact-answer moire fans ----------------------------------------------------------

@pytest.mark.parametrize("angle", [0.9, 1.1, 1.5])
@pytest.mark.parametrize("satellites", [FULL, FULL + HALF], ids=["s4", "s2s4"])
def test_hand_built_moire_fan(angle, satellites):
    fan_map = moire_map(angle, satellites)
    finding = analyse_superlattice(fan_map, hand_fit(fan_map), material="moire-graphene")
    assert finding.seen
    sl = finding.superlattice
    assert abs(sl["twist_angle_deg"] - angle) < 0.01
    assert sl["density"] == pytest.approx(4 * cell_density(angle), rel=0.01)
    assert sl["cell_density_stderr"] > 0 and sl["twist_angle_deg_stderr"] > 0
    named = sorted((int(s.filling), s.band_filling) for s in finding.satellites)
    assert named == sorted(satellites)
    assert all(s.kind == "satellite" for s in finding.satellites)
    assert sl["band_fillings"] == sorted({s for _, s in satellites})


def test_auto_reports_no_superlattice_on_a_plain_fan():
    fan_map = moire_map(superlattice=False)
    finding = analyse_superlattice(fan_map, hand_fit(fan_map), material="auto")
    assert not finding.seen and finding.superlattice is None and finding.satellites == []
    assert finding.notes[0] == "no superlattice seen"


def test_single_offset_line_is_not_a_superlattice():
    fan_map = moire_map(satellites=((4, 4),), zero_field_peaks=False)
    finding = analyse_superlattice(fan_map, hand_fit(fan_map), material="auto")
    assert not finding.seen and finding.satellites == []
    assert len(finding.offset_lines) == 1


def test_outermost_family_with_twofold_levels_is_half_filling():
    # Full filling outside the gate window: the outermost family has slopes in steps of 2,
    # so it is half filling (s = +-2), not full filling.
    fan_map = moire_map(1.1, HALF, zero_field_peaks=False)
    finding = analyse_superlattice(fan_map, hand_fit(fan_map), material="moire-graphene")
    assert finding.superlattice["density"] == pytest.approx(4 * cell_density(1.1), rel=0.01)
    assert sorted((int(s.filling), s.band_filling) for s in finding.satellites) == sorted(HALF)
    assert any("half filling" in note for note in finding.notes)


def test_zero_field_peaks_at_band_fillings():
    fan_map = moire_map(1.1, FULL + HALF)
    finding = analyse_superlattice(fan_map, hand_fit(fan_map))
    kinds = {p["band_filling"]: p for p in finding.zero_field_peaks}
    assert set(kinds) == {-4, -2, 2, 4}
    assert kinds[4]["kind"] == kinds[-4]["kind"] == "full-filling insulator"
    assert kinds[2]["kind"] == kinds[-2]["kind"] == "correlated (partial filling)"
    assert all(p["agrees_with_satellites"] for p in finding.zero_field_peaks)
    assert kinds[4]["density"] == pytest.approx(4 * cell_density(1.1), rel=0.02)
    assert finding.superlattice["zero_field_peaks_agree"] is True


def test_horizontal_features_give_the_cell_area_and_stay_out_of_the_fan():
    n0 = cell_density(1.1)
    fields = [ph.FLUX_QUANTUM_SINGLE_ELECTRON * n0 / q for q in (5, 6)]   # flux h/(q e) per cell
    fan_map = moire_map(1.1, horizontal=fields)
    finding = analyse_superlattice(fan_map, hand_fit(fan_map))
    assert {f["flux_per_cell"] for f in finding.horizontal_features} == {"1/5", "1/6"}
    for f in finding.horizontal_features:
        assert f["implied_cell_area"] == pytest.approx(1 / n0, rel=0.02)
    assert finding.superlattice["cell_area_from_horizontal_features"] == pytest.approx(
        1 / n0, rel=0.02)
    assert sorted((int(s.filling), s.band_filling) for s in finding.satellites) == sorted(FULL)


def test_horizontal_features_alone_give_a_period_in_inverse_field():
    n0 = cell_density(1.1)
    fields = [ph.FLUX_QUANTUM_SINGLE_ELECTRON * n0 / q for q in (4, 5, 6)]
    fan_map = moire_map(superlattice=False, horizontal=fields)
    finding = analyse_superlattice(fan_map, hand_fit(fan_map))
    assert not finding.seen
    assert [f["flux_per_cell"] for f in finding.horizontal_features] == ["1/6", "1/5", "1/4"]
    for f in finding.horizontal_features:
        assert f["implied_cell_area"] == pytest.approx(1 / n0, rel=0.03)


def test_other_flavour_count_and_material():
    fan_map = moire_map(1.1)
    finding = analyse_superlattice(fan_map, hand_fit(fan_map), flavours=4,
                                   material="graphene-bilayer")
    assert finding.seen and finding.superlattice["twist_angle_deg"] is None
    two = analyse_superlattice(fan_map, hand_fit(fan_map), flavours=2, material="auto")
    # with two flavours the outermost family is full filling s = +-2, so n0 doubles
    assert two.superlattice["cell_density"] == pytest.approx(2 * cell_density(1.1), rel=0.01)
    assert {s.band_filling for s in two.satellites} == {-2, 2}


def test_result_is_json_ready():
    fan_map = moire_map(1.1)
    finding = analyse_superlattice(fan_map, hand_fit(fan_map))
    text = json.dumps(to_jsonable(finding), allow_nan=False)
    assert '"kind": "satellite"' in text


def test_bad_input_gets_clear_errors():
    fan_map = moire_map(1.1, rows=12, columns=41)
    result = hand_fit(fan_map)
    result.ridge_points = None
    with pytest.raises(InputError, match="ridge points"):
        analyse_superlattice(fan_map, result)
    with pytest.raises(InputError, match="rxx"):
        analyse_superlattice(fan_map.drop_vars("rxx").assign(x=fan_map.rxx), hand_fit(fan_map))
    broken = hand_fit(fan_map)
    broken.density_per_volt = float("nan")
    with pytest.raises(NoFanError):
        analyse_superlattice(fan_map, broken)
    with pytest.raises(InputError, match="flavours"):
        analyse_superlattice(fan_map, hand_fit(fan_map), flavours=0)


# --- simulated moire fans (fanmap.simulate, truth in truth_* attributes) ------------------

def truth_satellites(fan_map, min_field_range=0.0):
    """(t, s) of truth_satellites that stay inside the gate window over ``min_field_range`` T.

    The simulator lists a satellite once its gap is resolved, also when the line only
    clips a corner of the map; those few points cannot be fitted as a line.
    """
    attrs = fan_map.attrs
    alpha = float(attrs["truth_density_per_volt"])
    v0 = float(attrs["truth_zero_density_voltage"])
    n0 = float(attrs["truth_cell_density"])
    density = alpha * (fan_map.gate.values[[0, -1]] - v0)
    field = np.abs(fan_map.field.values)
    out = set()
    for item in str(attrs["truth_satellites"]).split(","):
        if not item:
            continue
        t, s = (int(x) for x in item.split(":"))
        n = s * n0 + t * field / ph.FLUX_QUANTUM_SINGLE_ELECTRON
        inside = field[(n > density.min()) & (n < density.max())]
        if inside.size and np.ptp(inside) >= min_field_range:
            out.add((t, s))
    return out


def truth_scale_fit(fan_map):
    """Main-fan result with the simulator's true alpha, V0 and main fillings.

    The ridge points come from the project's ridge finder; only the main fan
    fit is replaced by the truth, so these tests measure the superlattice step.
    """
    attrs = fan_map.attrs
    alpha = float(attrs["truth_density_per_volt"])
    v0 = float(attrs["truth_zero_density_voltage"])
    logr, valid = ridges.log_signal(fan_map.rxx.values)
    minima = ridges.find_row_minima(logr, valid, fan_map.gate.values, fan_map.field.values)
    per_filling = 1 / (alpha * ph.FLUX_QUANTUM_SINGLE_ELECTRON)
    step = float(fan_map.gate[1] - fan_map.gate[0])
    state = np.full(len(minima), -1)
    states = []
    for i, nu in enumerate(int(x) for x in np.atleast_1d(attrs["truth_main_fillings"])):
        on = np.abs(minima.gate - (v0 + nu * per_filling * minima.field)) < step
        state[on] = i
        states.append(State(str(nu), "integer", nu * per_filling, v0, int(on.sum()),
                            float(minima.field[on].min()) if on.any() else float("nan"),
                            float(minima.field.max())))
    return FanResult(
        density_per_volt=alpha, density_per_volt_stderr=1e-3 * alpha,
        capacitance_per_area=ph.capacitance_from_lever_arm(alpha), zero_density_voltage=v0,
        zero_density_voltage_stderr=1e-3, density_offset=-alpha * v0, degeneracy=4,
        berry_phase=2, scale_from="material", states=states,
        ridge_points={"field": minima.field, "gate": minima.gate, "row": minima.row,
                      "state": state, "weight": minima.weight})


def simulated(angle, correlated, hall, seed=5):
    return simulate_fan("moire-graphene", twist_angle_deg=angle, correlated_states=correlated,
                        hall=hall, seed=seed, gate=np.linspace(-6, 6, 500),
                        field=np.linspace(0.25, 8, 160))


@pytest.mark.parametrize("angle,hall", [(0.9, True), (1.1, False), (1.3, True), (1.5, False)])
@pytest.mark.parametrize("correlated", [False, True], ids=["s4", "s2s4"])
def test_simulated_moire_fans(angle, hall, correlated):
    fan_map = simulated(angle, correlated, hall)
    finding = analyse_superlattice(fan_map, truth_scale_fit(fan_map), material="moire-graphene")
    attrs = fan_map.attrs
    sl = finding.superlattice
    assert abs(sl["twist_angle_deg"] - float(attrs["truth_twist_angle_deg"])) < 0.01
    assert sl["density"] == pytest.approx(float(attrs["truth_full_filling_density"]), rel=0.01)
    # the search reaches the steepest slope the map resolves (the simulator lists lines up
    # to |t| = 48 at small angles)
    truth = truth_satellites(fan_map, min_field_range=1.0)
    found = {(int(s.filling), s.band_filling) for s in finding.satellites}
    bands = set(int(s) for s in np.atleast_1d(attrs["truth_band_fillings"]))
    # every satellite found starts at a true band filling, with the slope step of that
    # filling (fourfold levels from full filling, twofold from half filling)
    assert {s for _, s in found} <= bands
    assert all(t % (4 if abs(s) == 4 else 2) == 0 for t, s in found)
    # most inserted lines are named; the inward lines from full filling into the flat band
    # are short and bend near other levels in the simulated spectrum, and can be missed
    assert len(found & truth) >= 0.6 * len(truth)


@pytest.mark.parametrize("material", ["graphene-monolayer", "graphene-bilayer", "2deg"])
def test_no_satellite_on_simulated_fans_without_superlattice(material):
    fan_map = simulate_fan(material, seed=5, gate=None, field=None)
    finding = analyse_superlattice(fan_map, truth_scale_fit(fan_map), material="auto")
    assert not finding.seen and finding.satellites == [] and finding.superlattice is None


@pytest.mark.parametrize("correlated", [False, True], ids=["s4", "s2s4"])
def test_fit_fan_reports_the_twist_angle(correlated):
    # The whole fit on a simulated map with the Hall channel: fanmap.fanfit.fit_fan hands
    # the map to the superlattice analysis and keeps its satellites among the states.
    fan_map = simulate_fan("moire-graphene", twist_angle_deg=1.3, correlated_states=correlated,
                           hall=True, seed=3)
    result = fit_fan(fan_map, material="moire-graphene")
    assert abs(result.superlattice["twist_angle_deg"] - 1.3) < 0.01
    assert result.superlattice["twist_angle_deg_stderr"] > 0
    # (a main fit that started on a satellite family comes back relabelled as satellites)
    satellites = {(int(s.filling), s.band_filling) for s in result.states
                  if s.kind == "satellite"}
    assert truth_satellites(fan_map, min_field_range=1.0) <= satellites


def test_small_angle_fan_with_half_filling_families_keeps_its_main_fan():
    # Regression: at 0.9 deg with s = +-2 families the neutrality fan shows only +-4 over
    # most of the field range (+-8, +-12 end at the s = +-2 gap), and the fit read +-4 as
    # the lowest level of a Berry-phase-pi sequence (+-2): alpha came out 48 % low.
    # Fourfold levels nu = +-4N from neutrality in twisted bilayer graphene (Cao et al.,
    # Nature 556, 43 (2018), from memory).  Lines beside the band-insulator peaks are
    # re-read on the raw R_xx, and the satellite search is repeated on the joint scale.
    fan_map = simulate_fan("moire-graphene", twist_angle_deg=0.9, correlated_states=True,
                           hall=True, seed=3)
    attrs = fan_map.attrs
    result = fit_fan(fan_map, material="moire-graphene", bootstrap=50)
    assert result.density_per_volt == pytest.approx(attrs["truth_density_per_volt"], rel=0.003)
    sl = result.superlattice
    assert abs(sl["twist_angle_deg"] - 0.9) < 0.01
    assert sl["density"] == pytest.approx(float(attrs["truth_full_filling_density"]), rel=0.01)
    labels = {s.filling for s in result.states if s.kind == "integer"}
    assert {"4", "-4"} <= labels and not {"2", "-2"} & labels
    found = {(int(s.filling), s.band_filling) for s in result.states if s.kind == "satellite"}
    truth = truth_satellites(fan_map, min_field_range=1.0)
    # no false satellite: beyond the list (lines resolved over >= 1 T) only steeper levels of
    # the same full-filling families, fourfold as the listed ones
    extra = found - set(truth_satellites(fan_map))
    assert all(abs(s) == 4 and t % 4 == 0 and abs(t) > 44 for t, s in extra)
    assert len(found & truth) >= 0.9 * len(truth)
    # the steep lines from full filling (|t| up to 48 here) live only in the low-field rows
    # whose minima crowd to a few points apart; they are found too
    steep = {(t, s) for t, s in truth if abs(t) > 24}
    assert steep and steep <= found


@pytest.mark.parametrize("material,labels", [("moire-graphene", ["4", "-4"]),
                                             ("graphene-bilayer", ["4", "-4"]),
                                             ("graphene-monolayer", ["2", "-2"])])
def test_lowest_levels_alone_are_named_by_the_preset_offset(material, labels):
    # Two lines +-s alone fit nu = +-g/2 (gamma = 1/2) as well as nu = +-g (gamma = 0); the
    # preset decides: monolayer +-4(N + 1/2) (Novoselov et al., Nature 438, 197 (2005)),
    # bilayer and twisted bilayer +-4N (Novoselov et al., Nature Physics 2, 177 (2006)).
    from fanmap.naming import name_lines

    naming = name_lines(np.array([0.15, -0.15]), np.full(2, 1e-4), np.array([1.5, 1.5]),
                        material=material)
    assert naming.labels == labels
    assert all(kind == "integer" for kind in naming.kinds)


def test_resolvable_slope_follows_the_sampling_of_the_map():
    # |t|max = W / (dV/dB (B_res + L)), dV/dB = 1/(alpha h/e) with h/e from scipy.constants
    # (CODATA); B_res = 3 gate steps over flavours flux quanta, L = 12 % of the field span.
    from scipy import constants

    from fanmap.superlattice import resolvable_slope

    alpha = 6.0e15
    gate, field = np.linspace(-6, 6, 501), np.linspace(0.04, 8, 200)
    per_tesla = 1 / (alpha * constants.h / constants.e)
    expected = int(12 / (per_tesla * (3 * 0.024 / (4 * per_tesla) + 0.12 * 7.96)))
    assert resolvable_slope(gate, field, alpha, flavours=4) == expected
    # a coarser gate resolves fewer steep lines, a narrower window too
    assert resolvable_slope(gate[::4], field, alpha) < expected
    assert resolvable_slope(gate[200:301], field, alpha) < expected
