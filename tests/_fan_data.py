"""Small hand-built fan maps and results for the figure and report tests (invented demo data)."""

import numpy as np
import xarray as xr

from fanmap import _schema as S
from fanmap.physics import FLUX_QUANTUM_SINGLE_ELECTRON, VON_KLITZING, filling_from_density
from fanmap.results import FanResult, State

ALPHA = 7.2e14      # m^-2 V^-1
V0 = 1.5            # V
FILLINGS = (-14, -10, -6, -2, 2, 6, 10, 14)


def synthetic_fan(n_field=40, n_gate=161, alpha=ALPHA, v0=V0, nan_fraction=0.0, seed=0,
                  hall=False):
    """A monolayer-like R_xx fan: dips at nu = +-2, 6, 10, ... on a smooth background.

    ``hall=True`` adds R_xy on ideal plateaus h/(nu e^2) at the nearest of those fillings.
    """
    gate = np.linspace(-30.0, 30.0, n_gate)
    field = np.linspace(0.5, 9.0, n_field)
    nu = filling_from_density(alpha * (gate[None, :] - v0), field[:, None])
    dips = sum(np.exp(-0.5 * ((nu - f) / 0.6) ** 2) for f in FILLINGS)
    rxx = 300.0 * (1 + 0.5 * field[:, None]) * (1.05 - np.clip(dips, 0, 1))
    rxx += 4000.0 * np.exp(-0.5 * (nu / 1.2) ** 2)
    rxx *= 1 + 0.01 * np.random.default_rng(seed).standard_normal(rxx.shape)
    if nan_fraction:
        mask = np.random.default_rng(seed + 1).random(rxx.shape) < nan_fraction
        rxx[mask] = np.nan
    data = {S.RXX: ((S.FIELD, S.GATE), rxx, {"units": "ohm", "long_name": S.LONG_NAMES[S.RXX]})}
    if hall:
        levels = np.asarray(FILLINGS, dtype=float)
        plateau = levels[np.argmin(np.abs(nu[..., None] - levels), axis=-1)]
        data[S.RXY] = ((S.FIELD, S.GATE), VON_KLITZING / plateau,
                       {"units": "ohm", "long_name": S.LONG_NAMES[S.RXY]})
    return xr.Dataset(
        data,
        coords={S.FIELD: (S.FIELD, field, {"units": "T", "long_name": S.LONG_NAMES[S.FIELD]}),
                S.GATE: (S.GATE, gate, {"units": "V", "long_name": S.LONG_NAMES[S.GATE]})},
        attrs={S.MAP_KIND: S.FAN, "source": "demo-device-A.nc"},
    )


def synthetic_result(alpha=ALPHA, v0=V0, with_points=True, extra_states=True, seed=0):
    """A FanResult matching :func:`synthetic_fan`, with ridge points on every line."""
    unit = alpha * FLUX_QUANTUM_SINGLE_ELECTRON    # (alpha h / e), V^-1 T^-1 per filling
    states = [State(str(f), "integer", f / unit, v0, 30, 0.8 if abs(f) < 10 else 2.0, 9.0,
                    float(f), 0.01) for f in FILLINGS]
    if extra_states:
        states.append(State("3", "broken-symmetry", 3 / unit, v0, 12, 6.0, 9.0, 3.0, 0.02,
                            onset_field=6.0))
        states.append(State("7/3", "fractional", (7 / 3) / unit, v0, 8, 7.0, 9.0, 2.333, 0.02,
                            onset_field=7.0, distance_to_fraction_sigma=0.4))
        states.append(State("1", "satellite", 1 / unit, v0 + 4.0, 10, 3.0, 9.0, 1.0, 0.05,
                            band_filling=-4))
    rng = np.random.default_rng(seed)
    ridge = None
    if with_points:
        fields, gates, index = [], [], []
        for i, s in enumerate(states):
            b = np.linspace(s.field_min, s.field_max, s.points)
            fields.append(b)
            gates.append(s.intercept + s.slope * b + 0.004 * rng.standard_normal(b.size))
            index.append(np.full(b.size, i))
        fields.append(rng.uniform(1, 9, 5))
        gates.append(rng.uniform(-30, 30, 5))
        index.append(np.full(5, -1))
        ridge = {"field": np.concatenate(fields), "gate": np.concatenate(gates),
                 "state": np.concatenate(index), "weight": np.ones(sum(map(len, fields)))}
    return FanResult(
        density_per_volt=alpha, density_per_volt_stderr=0.004 * alpha,
        capacitance_per_area=alpha * 1.602176634e-19, zero_density_voltage=v0,
        zero_density_voltage_stderr=0.02, density_offset=-alpha * v0, degeneracy=4,
        berry_phase=1, scale_from="material sequence (graphene-monolayer preset)",
        states=states, capacitance_per_area_stderr=0.004 * alpha * 1.602176634e-19,
        warnings=["state 7/3 rests on 8 points only"], material="graphene-monolayer",
        # Index plot as fanmap.crosscheck writes it: N = B_F / B - gamma, B_F = 10 T, gamma = 1/2.
        crosschecks={"index_plot": {"inverse_field": (np.arange(8) + 0.5) / 10.0,
                                    "index": np.arange(8), "gate": 12.0,
                                    "frequency": 10.0, "intercept": 0.5, "intercept_stderr": 0.03},
                     "hall_density_per_volt": 0.99 * alpha,
                     "hall_density_per_volt_stderr": 0.01 * alpha},
        source="demo-device-A.nc", version="0.1.0", ridge_points=ridge,
    )


def synthetic_gate_map(field=0.0, top_capacitance=1.2e-3, bottom_capacitance=0.8e-3,
                       top_offset=0.1, bottom_offset=-0.2):
    """A dual-gate R_xx map with a neutrality ridge along n = 0 (capacitances in F m^-2)."""
    from scipy import constants

    top = np.linspace(-4, 4, 41)
    bottom = np.linspace(-6, 6, 61)
    n = (top_capacitance * (top[None, :] - top_offset)
         + bottom_capacitance * (bottom[:, None] - bottom_offset)) / constants.e
    rxx = 200 + 5000 * np.exp(-0.5 * (n / 2e15) ** 2)
    return xr.Dataset(
        {S.RXX: ((S.BOTTOM_GATE, S.TOP_GATE), rxx, {"units": "ohm", "long_name": "R"})},
        coords={S.TOP_GATE: (S.TOP_GATE, top, {"units": "V", "long_name": "top gate voltage"}),
                S.BOTTOM_GATE: (S.BOTTOM_GATE, bottom,
                                {"units": "V", "long_name": "bottom gate voltage"}),
                S.FIELD: ((), field, {"units": "T"})},
        attrs={S.MAP_KIND: S.GATES, "source": f"demo-dual-gate-{field:g}T.nc"})


def synthetic_gate_result():
    """The GateResult that matches :func:`synthetic_gate_map`."""
    from fanmap.results import GateResult

    return GateResult(1.2e-3, 1e-5, 0.8e-3, 1e-5, 1.5, 0.01, 0.1, 0.01, -0.2, 0.01, 4,
                      "neutrality ridge", "D = (Ct(Vt-Vt0) - Cb(Vb-Vb0))/2",
                      extras={"ridge_points": {"top_gate": [0.1, 1.0],
                                               "bottom_gate": [-0.2, -1.7]}})
