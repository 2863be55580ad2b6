"""Random and corrupted inputs: the readers return a valid map or raise FanmapError, nothing else."""

import io
import tempfile
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from hypothesis import HealthCheck, given, settings, strategies as st

from fanmap import _schema as S
from fanmap.errors import FanmapError
from fanmap.reading import open_map

FUZZ = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def assert_valid_map(ds):
    kind = ds.attrs[S.MAP_KIND]
    assert kind in (S.FAN, S.GATES)
    dims = (S.FIELD, S.GATE) if kind == S.FAN else (S.BOTTOM_GATE, S.TOP_GATE)
    assert ds[S.RXX].dims == dims
    for name in list(ds.coords) + list(ds.data_vars):
        assert ds[name].attrs.get("units"), name
        assert ds[name].attrs.get("long_name"), name
    gate_dims = (S.GATE,) if kind == S.FAN else dims
    for dim in gate_dims:
        assert np.all(np.diff(ds[dim].values) > 0)
    assert np.isfinite(ds[S.RXX].values).any()
    assert ds.attrs["source"] and "recognised" in ds.attrs


def read_or_refuse(data, suffix, **options):
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / f"map{suffix}"
        path.write_bytes(data)
        try:
            ds = open_map(path, **options)
        except FanmapError as exc:
            assert str(path) in str(exc) or "unit" in str(exc) or "--" in str(exc)
            return None
        ds = ds.load()
        assert_valid_map(ds)
        ds.close()
        return ds


def _fan_bytes(engine="netcdf4"):
    field = np.linspace(1, 3, 5)
    gate = np.linspace(-1, 1, 11)
    ds = xr.Dataset({"rxx": (("field", "gate"), np.add.outer(field, gate**2), {"units": "ohm"})},
                    coords={"field": ("field", field, {"units": "T"}), "gate": ("gate", gate, {"units": "V"})})
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "f.nc"
        ds.to_netcdf(path, engine=engine)
        return path.read_bytes()


NETCDF4 = _fan_bytes("netcdf4")
NETCDF3 = _fan_bytes("scipy")


@FUZZ
@given(data=st.binary(max_size=2000), suffix=st.sampled_from([".nc", ".h5", ".csv", ".txt", ".npz", ".bin"]))
def test_random_bytes(data, suffix):
    read_or_refuse(data, suffix)


@FUZZ
@given(source=st.sampled_from(["nc4", "nc3"]), cut=st.floats(0.0, 1.0),
       flips=st.lists(st.tuples(st.floats(0.0, 0.999), st.integers(0, 255)), max_size=4))
def test_truncated_or_damaged_netcdf(source, cut, flips):
    data = bytearray(NETCDF4 if source == "nc4" else NETCDF3)
    for where, value in flips:
        data[int(where * len(data))] = value
    data = bytes(data[: max(1, int(cut * len(data)))]) if cut < 0.999 else bytes(data)
    read_or_refuse(data, ".nc")


_TOKENS = st.sampled_from(["B (T)", "Vg [mV]", "Rxx (kOhm)", "Rxy", "B", "Vg", "x", "(", "]", "#", "%",
                           ";", ",", "\t", " ", "\n", "\n\n", "nan", "inf", "-", "1", "0.5", "-3e2",
                           "1e400", "abc", "e^2/h", "ohm/sq", "G", "uV", "\x00"])


@FUZZ
@given(st.lists(_TOKENS, max_size=200))
def test_garbage_text(tokens):
    read_or_refuse("".join(tokens).encode("utf-8"), ".csv")


_VALUES = st.one_of(st.floats(allow_nan=True, allow_infinity=True, width=32),
                    st.sampled_from([0.0, 1.0, -1.0, 1e6, 1e4]))


@FUZZ
@given(header=st.lists(st.sampled_from(["B (T)", "Vg (V)", "Rxx (ohm)", "Rxy (ohm)", "Vtg (V)",
                                        "Vbg (V)", "B (mT)", "Vxx (uV)", "sweep", "T (K)"]),
                       min_size=1, max_size=5, unique=True),
       rows=st.lists(st.lists(_VALUES, min_size=5, max_size=5), min_size=0, max_size=60),
       blank_every=st.integers(0, 12))
def test_structured_text_with_random_values(header, rows, blank_every):
    lines = [", ".join(header)]
    for i, row in enumerate(rows):
        lines.append(", ".join(repr(float(v)) for v in row[: len(header)]))
        if blank_every and i % blank_every == blank_every - 1:
            lines.append("")
    read_or_refuse("\n".join(lines).encode(), ".csv", excitation_current="10 nA")


@FUZZ
@given(shape_b=st.integers(0, 6), shape_v=st.integers(0, 8),
       names=st.lists(st.sampled_from(["R", "Rxx", "rxy", "B", "Vg", "Vtg", "x", "units", "B_units"]),
                      min_size=1, max_size=5, unique=True),
       units=st.lists(st.sampled_from(["T", "V", "mV", "ohm", "kohm", "S", "furlong", "B=T", "Vg=mV", ""]),
                      max_size=4),
       seed=st.integers(0, 2**16))
def test_random_npz(shape_b, shape_v, names, units, seed):
    rng = np.random.default_rng(seed)
    arrays = {}
    for name in names:
        if name == "units":
            arrays[name] = np.array(units, dtype=str)
        elif name == "B_units":
            arrays[name] = np.array(rng.choice(["T", "G", "xyz"]))
        else:
            shapes = [(shape_b,), (shape_v,), (shape_b, shape_v), ()]
            arrays[name] = rng.normal(size=shapes[rng.choice(4, p=[0.3, 0.3, 0.3, 0.1])])
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    read_or_refuse(buffer.getvalue(), ".npz")


@pytest.mark.parametrize("engine", ["netcdf4", "h5netcdf"])
def test_valid_netcdf_still_reads(engine):
    # guard for the fuzzers above: an undamaged file must give a map, not an error
    assert read_or_refuse(_fan_bytes(engine), ".nc") is not None


_NAMES = ["B", "field", "Vg", "gate", "Vtg", "Vbg", "rxx", "R_xy", "Vxx", "sigma_xx", "x", "I", "sweep"]
_UNITS = ["T", "mT", "G", "V", "mV", "ohm", "kOhm", "S", "e^2/h", "uV", "nA", "K", "", "bogus"]


@FUZZ
@given(sizes=st.lists(st.integers(1, 6), min_size=1, max_size=3),
       variables=st.lists(st.tuples(st.sampled_from(_NAMES), st.sampled_from(_UNITS),
                                    st.lists(st.integers(0, 2), max_size=3, unique=True)),
                          min_size=1, max_size=6, unique_by=lambda v: v[0]),
       fill=st.sampled_from(["random", "nan", "constant", "huge"]), seed=st.integers(0, 1000))
def test_random_netcdf_layouts(sizes, variables, fill, seed):
    rng = np.random.default_rng(seed)
    dims = [f"d{i}" for i in range(len(sizes))]
    ds = xr.Dataset()
    for name, unit, axes in variables:
        axes = [a for a in axes if a < len(dims)]
        shape = tuple(sizes[a] for a in axes)
        values = {"random": rng.normal(size=shape), "nan": np.full(shape, np.nan),
                  "constant": np.ones(shape), "huge": rng.normal(size=shape) * 1e7}[fill]
        ds[name] = (tuple(dims[a] for a in axes), values, {"units": unit} if unit else {})
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "layout.nc"
        ds.to_netcdf(path)
        read_or_refuse(path.read_bytes(), ".nc", excitation_current="1 nA")
