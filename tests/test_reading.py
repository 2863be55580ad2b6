"""Reading maps from netCDF, text and npz files: round trips, recognition, options, bad input.

The maps here are small hand-built datasets (invented data, for the round trips only);
the unit factors they exercise are checked against the SI definitions in test_units.py.
"""

import json

import numpy as np
import pytest
import xarray as xr
from scipy import constants

from fanmap import _schema as S
from fanmap.cli import main
from fanmap.errors import FanmapError, InputError
from fanmap.reading import describe_map, open_map


@pytest.fixture(scope="module")
def simulated():
    """A small simulated monolayer fan (fanmap.simulate, invented device) with R_xy."""
    from fanmap.simulate import simulate_fan
    return simulate_fan("graphene-monolayer", gate=np.linspace(-30.0, 30.0, 61),
                        field=np.linspace(1.0, 9.0, 9), seed=11)


def hand_fan(n_field=7, n_gate=41):
    field = np.linspace(1.0, 4.0, n_field)
    gate = np.linspace(-3.0, 3.0, n_gate)
    b, v = np.meshgrid(field, gate, indexing="ij")
    rxx = 1000.0 * (1.2 + np.cos(2 * np.pi * v / b))
    rxy = 800.0 * b * np.tanh(v)
    return xr.Dataset(
        {"rxx": (("field", "gate"), rxx, {"units": "ohm", "long_name": "longitudinal resistance"}),
         "rxy": (("field", "gate"), rxy, {"units": "ohm", "long_name": "Hall resistance"})},
        coords={"field": ("field", field, {"units": "T", "long_name": "magnetic field"}),
                "gate": ("gate", gate, {"units": "V", "long_name": "gate voltage"})},
        attrs={"map_kind": "fan", "truth_density_per_volt": 7.2e14})


def write_long(path, fan, *, sep=", ", header=None, scale=None, alternate=False, drop_last=0,
               jitter=0.0, comments=("# invented demo map",), blank=True):
    """Write a fan map as long-format text, one point per line, blank lines between sweeps."""
    scale = scale or {"B": 1.0, "Vg": 1.0, "Rxx": 1.0, "Rxy": 1.0}
    header = header or ["B (T)", "Vg (V)", "Rxx (ohm)", "Rxy (ohm)"]
    lines = list(comments) + [sep.join(header)]
    field, gate = fan.field.values, fan.gate.values
    for i, b in enumerate(field):
        order = np.arange(gate.size)
        if alternate and i % 2:
            order = order[::-1]
        if i == field.size - 1 and drop_last:
            order = order[:-drop_last]
        for j in order:
            g = gate[j] + jitter * ((i % 3) - 1)
            row = (b * scale["B"], g * scale["Vg"], fan.rxx.values[i, j] * scale["Rxx"],
                   fan.rxy.values[i, j] * scale["Rxy"])
            lines.append(sep.join(repr(float(x)) for x in row))
        if blank:
            lines.append("")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def assert_same_map(read, fan, rtol=1e-9):
    assert read[S.RXX].dims == (S.FIELD, S.GATE)
    np.testing.assert_allclose(read.field.values, fan.field.values, rtol=rtol)
    np.testing.assert_allclose(read.gate.values, fan.gate.values, rtol=rtol, atol=1e-12)
    np.testing.assert_allclose(read.rxx.values, fan.rxx.values, rtol=rtol)
    if "rxy" in fan:
        np.testing.assert_allclose(read.rxy.values, fan.rxy.values, rtol=rtol, atol=1e-9)
    for name in list(read.coords) + list(read.data_vars):
        assert read[name].attrs.get("units"), name
        assert read[name].attrs.get("long_name"), name


# --- round trips ---------------------------------------------------------------------

@pytest.mark.parametrize("engine", ["netcdf4", "h5netcdf"])
def test_simulated_map_round_trip_netcdf(tmp_path, simulated, engine):
    path = tmp_path / "sim.nc"
    simulated.to_netcdf(path, engine=engine)
    read = open_map(path)
    assert_same_map(read, simulated)
    np.testing.assert_array_equal(read.sweep_direction.values, simulated.sweep_direction.values)
    for key, value in simulated.attrs.items():
        if key.startswith("truth_") and np.size(value) and not isinstance(value, str):
            np.testing.assert_allclose(np.asarray(read.attrs[key], dtype=float),
                                       np.asarray(value, dtype=float))


def test_simulated_map_round_trip_text(tmp_path, simulated):
    path = write_long(tmp_path / "sim.csv", simulated, header=["B (kG)", "Vg (mV)", "Rxx (kOhm)", "Rxy (kOhm)"],
                      scale={"B": 10.0, "Vg": 1e3, "Rxx": 1e-3, "Rxy": 1e-3})
    assert_same_map(open_map(path), simulated)


def test_simulated_map_round_trip_npz(tmp_path, simulated):
    path = tmp_path / "sim.npz"
    np.savez(path, Rxx=simulated.rxx.values, Rxy=simulated.rxy.values, B=simulated.field.values,
             Vg=simulated.gate.values)
    (tmp_path / "sim.npz.json").write_text(json.dumps({"Rxx": "ohm", "Rxy": "ohm", "B": "T", "Vg": "V"}))
    assert_same_map(open_map(path), simulated)


@pytest.mark.parametrize("engine, fmt", [("netcdf4", "NETCDF4"), ("h5netcdf", "NETCDF4"),
                                         ("netcdf4", "NETCDF3_64BIT")])
def test_netcdf_round_trip(tmp_path, engine, fmt):
    fan = hand_fan()
    path = tmp_path / "fan.nc"
    fan.to_netcdf(path, engine=engine, format=fmt)
    read = open_map(path)
    assert_same_map(read, fan)
    assert read.attrs["map_kind"] == "fan"
    assert read.attrs["source"] == str(path)
    assert read.attrs["truth_density_per_volt"] == pytest.approx(7.2e14)
    assert "signal: 'rxx'" in read.attrs["recognised"]


@pytest.mark.parametrize("sep", [", ", "\t", "   "])
def test_text_round_trip_each_delimiter(tmp_path, sep):
    fan = hand_fan()
    path = write_long(tmp_path / "fan.txt", fan, sep=sep)
    assert_same_map(open_map(path), fan)


def test_text_round_trip_with_scaled_units(tmp_path):
    fan = hand_fan()
    path = write_long(tmp_path / "fan.csv", fan, header=["B [mT]", "Vg [mV]", "Rxx (kOhm)", "Rxy (kOhm)"],
                      scale={"B": 1e3, "Vg": 1e3, "Rxx": 1e-3, "Rxy": 1e-3})
    read = open_map(path)
    assert_same_map(read, fan)
    assert "mV" in read.attrs["recognised"] and "kOhm" in read.attrs["recognised"]


def test_npz_round_trip_with_json_sidecar(tmp_path):
    fan = hand_fan()
    path = tmp_path / "fan.npz"
    np.savez(path, R_xx=fan.rxx.values * 1e-3, R_xy=fan.rxy.values, B=fan.field.values * 1e4,
             Vg=fan.gate.values)
    (tmp_path / "fan.json").write_text(json.dumps({"units": {"R_xx": "kohm", "R_xy": "ohm", "B": "G",
                                                             "Vg": "V"}}))
    read = open_map(path)
    assert_same_map(read, fan)
    assert "sidecar" in read.attrs["recognised"]


def test_npz_round_trip_with_units_array_in_file_order(tmp_path):
    fan = hand_fan()
    path = tmp_path / "fan.npz"
    np.savez(path, rxx=fan.rxx.values, B=fan.field.values, Vg=fan.gate.values * 1e3,
             units=np.array(["ohm", "T", "mV"]))
    assert_same_map(open_map(path), fan[["rxx"]])


def test_npz_long_format(tmp_path):
    fan = hand_fan()
    b, v = np.meshgrid(fan.field.values, fan.gate.values, indexing="ij")
    path = tmp_path / "long.npz"
    np.savez(path, B=b.ravel(), Vg=v.ravel(), Rxx=fan.rxx.values.ravel(),
             units=np.array(["B=T", "Vg=V", "Rxx=ohm"]))
    assert_same_map(open_map(path), fan[["rxx"]])


def test_both_axis_orders_and_directions(tmp_path):
    fan = hand_fan()
    flipped = fan.transpose("gate", "field").isel(gate=slice(None, None, -1),
                                                   field=slice(None, None, -1))
    path = tmp_path / "flipped.nc"
    flipped.to_netcdf(path)
    read = open_map(path)
    # gate made ascending; field rows kept in the file's (acquisition) order
    expected = fan.isel(field=slice(None, None, -1))
    assert_same_map(read, expected)
    assert "transposed" in read.attrs["recognised"]
    assert "descending" in read.attrs["recognised"]


def test_unsorted_gate_axis_is_sorted(tmp_path):
    fan = hand_fan()
    rng = np.random.default_rng(1)
    shuffled = fan.isel(gate=rng.permutation(fan.sizes["gate"]))
    path = tmp_path / "shuffled.nc"
    shuffled.to_netcdf(path)
    read = open_map(path)
    assert_same_map(read, fan)
    assert "not monotonic" in read.attrs["recognised"]


def test_irregular_gate_grid_kept(tmp_path):
    fan = hand_fan()
    gate = np.sort(np.concatenate([np.linspace(-3, 0, 10, endpoint=False), np.linspace(0, 3, 31)]))
    fan = fan.interp(gate=gate)
    path = tmp_path / "irregular.nc"
    fan.to_netcdf(path)
    read = open_map(path)
    np.testing.assert_allclose(read.gate.values, gate)
    assert "irregular" in describe_map(read)


def test_field_sweeps_at_fixed_gate(tmp_path):
    # long format where the field is the fast axis: rows come out in field order
    fan = hand_fan()
    lines = ["Vg (V)\tB (T)\tRxx (ohm)"]
    for j, g in enumerate(fan.gate.values):
        for i, b in enumerate(fan.field.values):
            lines.append(f"{g:.17g}\t{b:.17g}\t{fan.rxx.values[i, j]:.17g}")
        lines.append("")
    path = tmp_path / "fieldsweeps.tsv"
    path.write_text("\n".join(lines))
    read = open_map(path)
    assert_same_map(read, fan[["rxx"]])
    assert "field was the swept axis" in read.attrs["recognised"]


# --- unit spellings in files --------------------------------------------------------------

@pytest.mark.parametrize("unit, factor", [("V", 1.0), ("mV", 1e-3), ("kV", 1e3)])
def test_gate_unit_spellings(tmp_path, unit, factor):
    fan = hand_fan()
    path = write_long(tmp_path / "g.csv", fan, header=["B (T)", f"Vg [{unit}]", "Rxx (ohm)", "Rxy (ohm)"],
                      scale={"B": 1, "Vg": 1 / factor, "Rxx": 1, "Rxy": 1})
    assert_same_map(open_map(path), fan)


@pytest.mark.parametrize("unit, factor", [("T", 1.0), ("mT", 1e-3), ("G", 1e-4), ("kG", 0.1)])
def test_field_unit_spellings(tmp_path, unit, factor):
    # 1 G = 1e-4 T (SI Brochure, non-SI units; from memory)
    fan = hand_fan()
    path = write_long(tmp_path / "b.csv", fan, header=[f"B ({unit})", "Vg (V)", "Rxx (ohm)", "Rxy (ohm)"],
                      scale={"B": 1 / factor, "Vg": 1, "Rxx": 1, "Rxy": 1})
    assert_same_map(open_map(path), fan)


@pytest.mark.parametrize("unit, factor", [("ohm", 1.0), ("Ohm", 1.0), ("Ω", 1.0), ("kohm", 1e3),
                                          ("kOhm", 1e3), ("kΩ", 1e3), ("Mohm", 1e6), ("h/e^2", None)])
def test_resistance_unit_spellings(tmp_path, unit, factor):
    # h/e^2 = R_K from CODATA 2018 via scipy.constants
    factor = factor or constants.h / constants.e**2
    fan = hand_fan()
    path = write_long(tmp_path / "r.csv", fan, header=["B (T)", "Vg (V)", f"Rxx ({unit})", f"Rxy ({unit})"],
                      scale={"B": 1, "Vg": 1, "Rxx": 1 / factor, "Rxy": 1 / factor})
    assert_same_map(open_map(path), fan)


@pytest.mark.parametrize("unit, current, volt", [("V", "1 uA", 1.0), ("mV", "100 nA", 1e-3),
                                                 ("uV", "10 nA", 1e-6), ("µV", "1e-8", 1e-6),
                                                 ("nV", "1 nA", 1e-9)])
def test_lockin_voltages_with_excitation_current_option(tmp_path, unit, current, volt):
    # R = V / I (Ohm's law)
    fan = hand_fan()
    amps = float(current.split()[0]) * {"uA": 1e-6, "nA": 1e-9}.get(current.split()[-1], 1.0) \
        if " " in current else float(current)
    path = write_long(tmp_path / "v.csv", fan, header=["B (T)", "Vg (V)", f"Vxx ({unit})", f"Vxy ({unit})"],
                      scale={"B": 1, "Vg": 1, "Rxx": amps / volt, "Rxy": amps / volt})
    with pytest.raises(InputError, match="--excitation-current"):
        open_map(path)
    read = open_map(path, excitation_current=current)
    assert_same_map(read, fan)
    assert "lock-in voltage" in read.attrs["recognised"]


def test_excitation_current_from_a_comment_attribute(tmp_path):
    fan = hand_fan()
    path = write_long(tmp_path / "v.csv", fan, header=["B (T)", "Vg (V)", "Vxx (uV)", "Vxy (uV)"],
                      scale={"B": 1, "Vg": 1, "Rxx": 1e-8 / 1e-6, "Rxy": 1e-8 / 1e-6},
                      comments=("# lock-in run", "# excitation_current = 10 nA"))
    read = open_map(path)
    assert_same_map(read, fan)
    assert "excitation current: 1e-08 A" in read.attrs["recognised"]


def test_conductivity_in_e2_over_h_is_inverted_as_a_tensor(tmp_path):
    # On a plateau sigma_xx = 0, sigma_xy = nu e^2/h gives rho_xy = h/(nu e^2): for nu = 2,
    # R_K / 2 = 12 906.4037 ohm (CODATA 2018 via scipy.constants); von Klitzing et al. 1980.
    field = np.array([8.0, 9.0])
    gate = np.array([-1.0, 0.0, 1.0])
    sxx = np.array([[0.0, 0.5, 0.0], [0.0, 0.5, 0.0]])
    sxy = np.array([[2.0, 1.0, 2.0], [2.0, 1.0, 2.0]])
    path = tmp_path / "sigma.nc"
    xr.Dataset({"sigma_xx": (("B", "Vg"), sxx, {"units": "e^2/h"}),
                "sigma_xy": (("B", "Vg"), sxy, {"units": "e^2/h"})},
               coords={"B": ("B", field, {"units": "T"}), "Vg": ("Vg", gate, {"units": "V"})}).to_netcdf(path)
    read = open_map(path)
    rk = constants.h / constants.e**2
    assert float(read.rxy[0, 0]) == pytest.approx(rk / 2, rel=1e-12)
    assert float(read.rxx[0, 0]) == pytest.approx(0.0, abs=1e-9)
    g0 = constants.e**2 / constants.h
    expected_rxx = 0.5 * g0 / ((0.5 * g0) ** 2 + (1.0 * g0) ** 2)
    assert float(read.rxx[0, 1]) == pytest.approx(expected_rxx, rel=1e-12)
    assert "tensor" in read.attrs["recognised"]


def test_two_terminal_conductance_in_siemens(tmp_path):
    fan = hand_fan()
    b, v = np.meshgrid(fan.field.values, fan.gate.values, indexing="ij")
    path = tmp_path / "g.npz"
    np.savez(path, G=1e3 / fan.rxx.values, B=fan.field.values, Vg=fan.gate.values,
             units=np.array(["G=mS", "B=T", "Vg=V"]))
    read = open_map(path)
    np.testing.assert_allclose(read.rxx.values, fan.rxx.values, rtol=1e-12)


def test_sheet_resistivity_is_marked(tmp_path):
    fan = hand_fan()
    path = write_long(tmp_path / "rho.csv", fan, header=["B (T)", "Vg (V)", "rho_xx (ohm/sq)", "Rxy (ohm)"])
    read = open_map(path)
    assert read.rxx.attrs["sheet_resistivity"] == 1
    assert "per square" in read.rxx.attrs["long_name"]


# --- text conventions -------------------------------------------------------------------

def test_comment_styles_and_header_in_comment(tmp_path):
    fan = hand_fan(n_field=3, n_gate=5)
    b, v = np.meshgrid(fan.field.values, fan.gate.values, indexing="ij")
    table = np.column_stack([b.ravel(), v.ravel(), fan.rxx.values.ravel()])
    path = tmp_path / "saved.dat"
    np.savetxt(path, table, header="B (T)  Vg (V)  Rxx (ohm)")
    text = "% written by hand\n; another comment\n" + path.read_text()
    path.write_text(text)
    assert_same_map(open_map(path), fan[["rxx"]])


def test_semicolon_with_decimal_comma(tmp_path):
    fan = hand_fan(n_field=3, n_gate=5)
    lines = ["B (T);Vg (V);Rxx (ohm)"]
    for i, b in enumerate(fan.field.values):
        for j, g in enumerate(fan.gate.values):
            lines.append(";".join(f"{x:.10f}".replace(".", ",") for x in (b, g, fan.rxx.values[i, j])))
    path = tmp_path / "eu.csv"
    path.write_text("\n".join(lines))
    assert_same_map(open_map(path), fan[["rxx"]], rtol=1e-8)


def test_whitespace_header_with_bracketed_units(tmp_path):
    fan = hand_fan(n_field=3, n_gate=5)
    path = write_long(tmp_path / "ws.txt", fan, sep="  ", header=["B (T)", "Vg [mV]", "Rxx (kOhm)", "Rxy (Ohm)"],
                      scale={"B": 1, "Vg": 1e3, "Rxx": 1e-3, "Rxy": 1})
    assert_same_map(open_map(path), fan)


def test_ragged_last_sweep_is_nan_padded_and_reported(tmp_path):
    fan = hand_fan()
    path = write_long(tmp_path / "ragged.csv", fan, drop_last=15)
    read = open_map(path)
    assert np.isnan(read.rxx.values[-1, -15:]).all()
    np.testing.assert_allclose(read.rxx.values[-1, :-15], fan.rxx.values[-1, :-15])
    np.testing.assert_allclose(read.rxx.values[:-1], fan.rxx.values[:-1])
    assert "ragged" in read.attrs["recognised"]


def test_interrupted_last_line_is_ignored_and_reported(tmp_path):
    fan = hand_fan()
    path = write_long(tmp_path / "cut.csv", fan)
    path.write_text(path.read_text().rstrip("\n") + "\n4.0, 1.5, 12")
    read = open_map(path)
    assert "interrupted" in read.attrs["recognised"]


def test_alternating_sweeps_get_a_direction_coordinate(tmp_path):
    fan = hand_fan()
    path = write_long(tmp_path / "alt.csv", fan, alternate=True, blank=False)
    read = open_map(path)
    assert_same_map(read, fan)
    assert read.sweep_direction.values.tolist() == [1, -1, 1, -1, 1, -1, 1]
    assert "alternate" in read.attrs["recognised"]


def test_jittered_gate_values_are_regridded(tmp_path):
    # a signal linear in gate is reproduced exactly by linear interpolation
    fan = hand_fan()
    b, v = np.meshgrid(fan.field.values, fan.gate.values, indexing="ij")
    fan["rxx"].values[:] = 500.0 + 40.0 * v + 3.0 * b
    fan["rxy"].values[:] = 100.0 * v * b
    path = write_long(tmp_path / "jitter.csv", fan, jitter=0.02)  # 0.02 V of 0.15 V steps
    read = open_map(path)
    assert read.sizes["gate"] == fan.sizes["gate"]
    inner = slice(1, -1)
    # each sweep's values were written at gate positions shifted by its jitter
    shift = 0.02 * (np.arange(fan.sizes["field"]) % 3 - 1)[:, None]
    expected = 500.0 + 40.0 * (read.gate.values[inner] - shift) + 3.0 * read.field.values[:, None]
    np.testing.assert_allclose(read.rxx.values[:, inner], expected, rtol=1e-9)
    assert "interpolated" in read.attrs["recognised"]


def test_gaps_stay_nan_and_are_reported(tmp_path):
    fan = hand_fan()
    path = write_long(tmp_path / "gap.csv", fan, jitter=0.01)
    lines = path.read_text().splitlines()
    # drop 6 consecutive points from the middle of the third sweep
    header_end = 2
    start = header_end + 2 * (fan.sizes["gate"] + 1) + 15
    del lines[start:start + 6]
    path.write_text("\n".join(lines) + "\n")
    read = open_map(path)
    row = read.rxx.values[2]
    assert np.isnan(row).sum() >= 4
    assert np.isfinite(read.rxx.values[[0, 1, 3]]).all()
    assert "gaps" in read.attrs["recognised"]


def test_sweep_index_column_is_used(tmp_path):
    fan = hand_fan(n_field=4, n_gate=6)
    lines = ["sweep, B (T), Vg (V), Rxx (ohm)"]
    for i, b in enumerate(fan.field.values):
        for j, g in enumerate(fan.gate.values):
            lines.append(f"{i}, {b:.17g}, {g:.17g}, {fan.rxx.values[i, j]:.17g}")
    path = tmp_path / "indexed.csv"
    path.write_text("\n".join(lines))
    read = open_map(path)
    assert_same_map(read, fan[["rxx"]])
    assert "numbered by 'sweep'" in read.attrs["recognised"]


def test_repeated_header_with_same_units_starts_a_block(tmp_path):
    fan = hand_fan(n_field=4, n_gate=6)
    path = write_long(tmp_path / "cat.csv", fan, blank=False)
    lines = path.read_text().splitlines()
    lines.insert(2 + 2 * fan.sizes["gate"], lines[1])
    path.write_text("\n".join(lines))
    assert_same_map(open_map(path), fan)


# --- recognition and the override options -----------------------------------------------

def test_unusual_names_are_recognised(tmp_path):
    fan = hand_fan()
    renamed = fan.rename({"field": "Bz", "gate": "Vbg", "rxx": "R_xx", "rxy": "R_xy"})
    path = tmp_path / "renamed.nc"
    renamed.to_netcdf(path)
    read = open_map(path)
    assert_same_map(read, fan)
    assert read.rxx.attrs["original_name"] == "R_xx"


def test_signal_recognised_by_long_name(tmp_path):
    fan = hand_fan()
    ds = fan.rename({"rxx": "ch1", "rxy": "ch2"})
    ds["ch1"].attrs = {"units": "ohm", "long_name": "longitudinal resistance"}
    ds["ch2"].attrs = {"units": "ohm", "long_name": "Hall resistance"}
    path = tmp_path / "channels.nc"
    ds.to_netcdf(path)
    assert_same_map(open_map(path), fan)


def test_override_signal_and_hall(tmp_path):
    fan = hand_fan()
    ds = fan.rename({"rxx": "A", "rxy": "B2"})
    for name in ("A", "B2"):
        ds[name].attrs = {}
    path = tmp_path / "anon.nc"
    ds.to_netcdf(path)
    with pytest.raises(InputError, match="--signal"):
        open_map(path)
    read = open_map(path, signal="B2", hall="A")
    np.testing.assert_allclose(read.rxx.values, fan.rxy.values)
    np.testing.assert_allclose(read.rxy.values, fan.rxx.values)
    assert "signal: 'B2' (option)" in read.attrs["recognised"]
    assert "none in the file, assumed ohm" in read.attrs["recognised"]
    assert "rxy" not in open_map(path, signal="A", hall="none")


def test_override_axes_and_units(tmp_path):
    fan = hand_fan()
    lines = ["x, y, z"]
    for i, b in enumerate(fan.field.values):
        for j, g in enumerate(fan.gate.values):
            lines.append(f"{b * 1e3:.17g}, {g * 1e3:.17g}, {fan.rxx.values[i, j] / 1e3:.17g}")
        lines.append("")
    path = tmp_path / "xyz.csv"
    path.write_text("\n".join(lines))
    with pytest.raises(InputError, match="--gate NAME --field NAME"):
        open_map(path, signal="z")
    read = open_map(path, signal="z", gate="y", field="x", units={"x": "mT", "y": "mV"},
                    signal_units="kohm")
    assert_same_map(read, fan[["rxx"]])
    read2 = open_map(path, signal="z", gate="y", field="x", field_units="mT", gate_units="mV",
                     signal_units="kohm")
    assert_same_map(read2, fan[["rxx"]])


def test_wrong_units_in_file_are_overridden(tmp_path):
    fan = hand_fan()
    path = write_long(tmp_path / "wrong.csv", fan, header=["B (T)", "Vg (V)", "Rxx (ohm)", "Rxy (ohm)"],
                      scale={"B": 1, "Vg": 1e3, "Rxx": 1, "Rxy": 1})  # gate written in mV but labelled V
    with pytest.raises(InputError, match="--gate-units"):
        open_map(path)
    assert_same_map(open_map(path, gate_units="mV"), fan)


def hand_gate_map(tmp_path, attrs=None, swap=False):
    top = np.linspace(-2, 2, 9)
    bottom = np.linspace(-5, 5, 11)
    tt, bb = np.meshgrid(top, bottom)
    rxx = 1e3 / (0.1 + (0.3 * tt + 0.1 * bb) ** 2)
    ds = xr.Dataset({"Rxx": (("Vbg", "Vtg"), rxx, {"units": "ohm"})},
                    coords={"Vbg": ("Vbg", bottom, {"units": "V"}), "Vtg": ("Vtg", top, {"units": "V"})},
                    attrs=attrs or {})
    if swap:
        ds = ds.transpose("Vtg", "Vbg")
    path = tmp_path / "gates.nc"
    ds.to_netcdf(path)
    return path, rxx, top, bottom


def test_gate_map_with_field_attribute(tmp_path):
    path, rxx, top, bottom = hand_gate_map(tmp_path, attrs={"field": "9 T"}, swap=True)
    read = open_map(path)
    assert read.attrs["map_kind"] == "gates"
    assert read.rxx.dims == ("bottom_gate", "top_gate")
    np.testing.assert_allclose(read.rxx.values, rxx)
    np.testing.assert_allclose(read.top_gate.values, top)
    assert float(read.field) == pytest.approx(9.0)
    assert read.field.attrs["units"] == "T"


def test_gate_map_field_option_and_gate_swap(tmp_path):
    path, rxx, top, bottom = hand_gate_map(tmp_path)
    read = open_map(path, field_value="500 mT", top_gate="Vbg", bottom_gate="Vtg")
    assert float(read.field) == pytest.approx(0.5)
    np.testing.assert_allclose(read.rxx.values, rxx.T)
    assert "not in the file" not in read.attrs["recognised"]
    plain = open_map(path)
    assert "field" not in plain.coords
    assert "--field-value" in plain.attrs["recognised"]


def test_kind_option_forces_a_fan_from_two_voltages(tmp_path):
    path, rxx, top, bottom = hand_gate_map(tmp_path)
    with pytest.raises(InputError, match="field axis"):
        open_map(path, kind="fan")


def test_lazy_opening_is_dask_backed(tmp_path):
    fan = hand_fan()
    path = tmp_path / "big.nc"
    fan.to_netcdf(path)
    read = open_map(path, lazy=True)
    assert read.rxx.chunks is not None
    assert_same_map(read.load(), fan)
    read.close()


# --- bad input ------------------------------------------------------------------------

def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        open_map(tmp_path / "absent.nc")


def test_truncated_netcdf(tmp_path):
    fan = hand_fan()
    path = tmp_path / "full.nc"
    fan.to_netcdf(path)
    data = path.read_bytes()
    cut = tmp_path / "cut.nc"
    cut.write_bytes(data[: len(data) // 2])
    with pytest.raises(InputError, match="cut.nc.*corrupt or truncated"):
        open_map(cut)


def test_garbage_text(tmp_path):
    path = tmp_path / "junk.csv"
    path.write_text("hello world\nthis is not, a table\n")
    with pytest.raises(InputError, match="junk.csv"):
        open_map(path)


def test_bad_line_in_the_middle_is_named(tmp_path):
    fan = hand_fan(n_field=3, n_gate=5)
    path = write_long(tmp_path / "bad.csv", fan)
    lines = path.read_text().splitlines()
    lines[4] = "1.0, abc, 3"
    path.write_text("\n".join(lines))
    with pytest.raises(InputError, match="line\\(s\\) 5"):
        open_map(path)


def test_all_nan_map(tmp_path):
    fan = hand_fan()
    fan["rxx"].values[:] = np.nan
    path = tmp_path / "nan.nc"
    fan.to_netcdf(path)
    with pytest.raises(InputError, match="NaN everywhere.*--signal"):
        open_map(path)


def test_single_sweep_is_not_a_fan(tmp_path):
    fan = hand_fan().isel(field=[0])
    path = write_long(tmp_path / "one.csv", fan)
    with pytest.raises(InputError, match="single sweep"):
        open_map(path)


def test_duplicated_gate_axis(tmp_path):
    fan = hand_fan()
    gate = fan.gate.values.copy()
    gate[5] = gate[4]
    fan = fan.assign_coords(gate=gate)
    path = tmp_path / "dup.nc"
    fan.to_netcdf(path)
    with pytest.raises(InputError, match="repeats values"):
        open_map(path)


@pytest.mark.parametrize("column, value, option", [("Vg (V)", 1e4, "--gate-units"),
                                                   ("B (T)", 1e6, "--field-units")])
def test_absurd_values(tmp_path, column, value, option):
    fan = hand_fan(n_field=3, n_gate=5)
    scale = {"B": 1, "Vg": 1, "Rxx": 1, "Rxy": 1}
    scale["Vg" if column.startswith("Vg") else "B"] = value
    path = write_long(tmp_path / "absurd.csv", fan, scale=scale)
    with pytest.raises(InputError, match=option):
        open_map(path)


def test_unknown_units(tmp_path):
    fan = hand_fan(n_field=3, n_gate=5)
    path = write_long(tmp_path / "furlong.csv", fan, header=["B (furlong)", "Vg (V)", "Rxx (ohm)", "Rxy (ohm)"])
    with pytest.raises(InputError, match="furlong"):
        open_map(path, field="B")


def test_units_of_the_wrong_kind(tmp_path):
    fan = hand_fan(n_field=3, n_gate=5)
    path = write_long(tmp_path / "kind.csv", fan, header=["B (T)", "Vg (V)", "Rxx (T)", "Rxy (ohm)"])
    with pytest.raises(InputError):
        open_map(path, signal="Rxx")


def test_mixed_units_in_one_file(tmp_path):
    fan = hand_fan(n_field=3, n_gate=5)
    path = write_long(tmp_path / "mixed.csv", fan, blank=False)
    lines = path.read_text().splitlines()
    lines.insert(2 + fan.sizes["gate"], "B (T), Vg (mV), Rxx (ohm), Rxy (ohm)")
    path.write_text("\n".join(lines))
    with pytest.raises(InputError, match="mixed units"):
        open_map(path)


def test_one_axis_only(tmp_path):
    path = tmp_path / "curve.csv"
    path.write_text("Vg (V), Rxx (ohm)\n" + "\n".join(f"{v}, {1 + v * v}" for v in range(10)))
    with pytest.raises(InputError, match="cannot tell what the axes are"):
        open_map(path)


def test_unknown_option_names(tmp_path):
    fan = hand_fan()
    path = tmp_path / "f.nc"
    fan.to_netcdf(path)
    with pytest.raises(InputError, match="--signal 'Rxx' is not in the file"):
        open_map(path, signal="Rxx")
    with pytest.raises(InputError, match="kind"):
        open_map(path, kind="spiral")


# --- command line ----------------------------------------------------------------------

def test_show_command(tmp_path, capsys):
    fan = hand_fan()
    path = write_long(tmp_path / "fan.csv", fan, header=["B (T)", "Vg [mV]", "Rxx (kOhm)", "Rxy (ohm)"],
                      scale={"B": 1, "Vg": 1e3, "Rxx": 1e-3, "Rxy": 1})
    assert main(["show", str(path)]) == 0
    out = capsys.readouterr().out
    assert "fan map from" in out and "units of 'Vg': mV" in out and "recognised:" in out
    assert main(["show", str(path), "--prepare", "--hall", "none"]) == 0
    out = capsys.readouterr().out
    assert "despike" in out and "rxy" not in out.split("signals:")[1].split("recognised:")[0]


def test_show_command_errors_exit_nonzero(tmp_path, capsys):
    path = tmp_path / "junk.nc"
    path.write_bytes(b"CDF\x01garbage")
    assert main(["show", str(path)]) == 2
    err = capsys.readouterr().err
    assert "junk.nc" in err and "corrupt" in err
    assert main(["show", str(path), "--units", "x=T", "--excitation-current", "1 nA"]) == 2


def test_error_type_is_the_projects(tmp_path):
    path = tmp_path / "x.npz"
    path.write_bytes(b"PK\x03\x04 not really a zip")
    with pytest.raises(FanmapError):
        open_map(path)


# --- more layouts -------------------------------------------------------------------------

def test_measured_current_column_divides_point_by_point(tmp_path):
    # R = V / I (Ohm's law) with the current measured at every point
    fan = hand_fan(n_field=4, n_gate=9)
    rng = np.random.default_rng(0)
    current = rng.uniform(9e-9, 11e-9, fan.rxx.shape)
    lines = ["B (T), Vg (V), Vxx (uV), I (nA)"]
    for i, b in enumerate(fan.field.values):
        for j, g in enumerate(fan.gate.values):
            lines.append(f"{b}, {g}, {fan.rxx.values[i, j] * current[i, j] * 1e6:.17g}, {current[i, j] * 1e9:.17g}")
        lines.append("")
    path = tmp_path / "iv.csv"
    path.write_text("\n".join(lines))
    read = open_map(path)
    np.testing.assert_allclose(read.rxx.values, fan.rxx.values, rtol=1e-12)
    assert "measured point by point in 'I'" in read.attrs["recognised"]


def test_simulated_gate_map_round_trip(tmp_path):
    from fanmap.simulate import simulate_gate_map
    gm = simulate_gate_map("graphene-bilayer", top_gate=np.linspace(-4, 4, 21),
                           bottom_gate=np.linspace(-40, 40, 17), field=2.0, seed=2)
    path = tmp_path / "gm.nc"
    gm.transpose("top_gate", "bottom_gate").to_netcdf(path)
    read = open_map(path)
    assert read.attrs["map_kind"] == "gates"
    assert read.rxx.dims == ("bottom_gate", "top_gate")
    np.testing.assert_allclose(read.rxx.values, gm.rxx.values)
    assert float(read.field) == pytest.approx(2.0)


def test_gate_map_in_long_format(tmp_path):
    top = np.linspace(-2, 2, 9)
    bottom = np.linspace(-5, 5, 6)
    lines = ["# field = 4 T", "Vbg (V)\tVtg (mV)\tRxx (kOhm)"]
    truth = np.empty((bottom.size, top.size))
    for i, vb in enumerate(bottom):
        for j, vt in enumerate(top):
            truth[i, j] = 1e3 / (0.1 + (0.3 * vt + 0.1 * vb) ** 2)
            lines.append(f"{vb}\t{vt * 1e3}\t{truth[i, j] / 1e3:.17g}")
        lines.append("")
    path = tmp_path / "gates.tsv"
    path.write_text("\n".join(lines))
    read = open_map(path)
    assert read.attrs["map_kind"] == "gates"
    np.testing.assert_allclose(read.top_gate.values, top)
    np.testing.assert_allclose(read.rxx.values, truth, rtol=1e-12)
    assert float(read.field) == pytest.approx(4.0)


def test_length_one_field_dimension_becomes_the_scalar_field(tmp_path):
    path, rxx, top, bottom = hand_gate_map(tmp_path)
    ds = xr.open_dataset(path).load()
    ds = ds.expand_dims(B=[1.5]).assign_coords(B=("B", [1.5], {"units": "T"}))
    path2 = tmp_path / "with_b.nc"
    ds.to_netcdf(path2)
    read = open_map(path2)
    assert float(read.field) == pytest.approx(1.5)
    np.testing.assert_allclose(read.rxx.values, rxx)


def test_per_row_gate_values_in_netcdf_are_regridded(tmp_path):
    # a 2-D gate variable: each sweep's own gate readings, slightly different per row
    fan = hand_fan()
    b, v = np.meshgrid(fan.field.values, fan.gate.values, indexing="ij")
    readback = v + 0.01 * ((np.arange(fan.sizes["field"]) % 3) - 1)[:, None]
    signal = 500.0 + 40.0 * readback + 3.0 * b
    path = tmp_path / "readback.nc"
    xr.Dataset({"Rxx": (("sweep", "point"), signal, {"units": "ohm"}),
                "Vg": (("sweep", "point"), readback, {"units": "V"})},
               coords={"B": ("sweep", fan.field.values, {"units": "T"})}).to_netcdf(path)
    read = open_map(path)
    assert read.rxx.dims == ("field", "gate")
    inner = slice(1, -1)
    expected = 500.0 + 40.0 * read.gate.values[inner] + 3.0 * read.field.values[:, None]
    np.testing.assert_allclose(read.rxx.values[:, inner], expected, rtol=1e-9)
    assert "differs from sweep to sweep" in read.attrs["recognised"]


def test_mixed_units_across_files(tmp_path):
    from fanmap.reading import open_maps
    fan = hand_fan(n_field=3, n_gate=9)
    with_units = write_long(tmp_path / "a.csv", fan, header=["B (T)", "Vg (mV)", "Rxx (ohm)", "Rxy (ohm)"],
                            scale={"B": 1, "Vg": 1e2, "Rxx": 1, "Rxy": 1})
    without = write_long(tmp_path / "b.csv", fan, header=["B (T)", "Vg", "Rxx (ohm)", "Rxy (ohm)"],
                         scale={"B": 1, "Vg": 1e2, "Rxx": 1, "Rxy": 1})
    with pytest.raises(InputError, match="mixed units across files.*--gate-units"):
        open_maps([with_units, without])
    both = open_maps([with_units, without], units={"Vg": "mV"})
    np.testing.assert_allclose(both[0].gate.values, both[1].gate.values)
    volts = write_long(tmp_path / "c.csv", fan)
    assert len(open_maps([with_units, volts])) == 2  # explicit and different: converted, fine


def test_constant_columns_are_not_axes(tmp_path):
    # a fan with the top gate held fixed, and a gate map with a constant field column
    fan = hand_fan(n_field=3, n_gate=9)
    lines = ["B (T), Vtg (V), Vbg (V), Rxx (ohm)"]
    for i, b in enumerate(fan.field.values):
        for j, g in enumerate(fan.gate.values):
            lines.append(f"{b}, 1.5, {g}, {fan.rxx.values[i, j]:.17g}")
    path = tmp_path / "fixed_top.csv"
    path.write_text("\n".join(lines))
    read = open_map(path)
    assert read.attrs["map_kind"] == "fan"
    assert_same_map(read, fan[["rxx"]])
    assert read.attrs["fixed_Vtg"] == pytest.approx(1.5)

    lines = ["B (mT), Vtg (V), Vbg (V), Rxx (ohm)"]
    for vb in (-1.0, 0.0, 1.0):
        for vt in (-2.0, -1.0, 0.0, 1.0):
            lines.append(f"500, {vt}, {vb}, {1 + vt * vt + vb}")
    path = tmp_path / "gates_with_b.csv"
    path.write_text("\n".join(lines))
    read = open_map(path)
    assert read.attrs["map_kind"] == "gates"
    assert float(read.field) == pytest.approx(0.5)
    np.testing.assert_allclose(read.rxx.values[0], [1 + vt * vt - 1.0 for vt in (-2.0, -1.0, 0.0, 1.0)])


def test_interrupted_last_sweep_in_a_gridded_file(tmp_path):
    from fanmap.simulate import simulate_fan
    fan = simulate_fan(gate=np.linspace(-30, 30, 61), field=np.linspace(1, 9, 6), seed=1, interrupted=0.6)
    path = tmp_path / "interrupted.nc"
    fan.to_netcdf(path)
    read = open_map(path)
    assert "the last sweep stops early: its final 24 of 61 points" in read.attrs["recognised"]
    assert "lazy opening applies to netCDF only" in open_map(write_long(tmp_path / "x.csv", hand_fan()),
                                                             lazy=True).attrs["recognised"]


def test_lockin_channel_names_and_jittered_gate_set_points(tmp_path):
    # field swept at each gate set point; the gate is read back with jitter
    fan = hand_fan(n_field=11, n_gate=5)
    rng = np.random.default_rng(4)
    lines = ["magnet_field (T)\tdac_ch1 (V)\tlockin_amplitude (uV)"]
    for j, g in enumerate(fan.gate.values):
        readback = g + rng.normal(0, 1e-5)
        for i, b in enumerate(fan.field.values):
            lines.append(f"{b}\t{readback}\t{fan.rxx.values[i, j] * 1e-8 * 1e6:.17g}")
    path = tmp_path / "lockin.tsv"
    path.write_text("\n".join(lines))
    read = open_map(path, excitation_current="10 nA")
    assert read.sizes["gate"] == 5
    np.testing.assert_allclose(read.gate.values, fan.gate.values, atol=1e-4)
    np.testing.assert_allclose(read.rxx.values, fan.rxx.values, rtol=1e-9)
    assert "signal: 'lockin_amplitude'" in read.attrs["recognised"]
