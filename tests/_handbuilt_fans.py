"""Hand-built fan maps with an exact answer, for the ridge, fit and naming tests.

Every state is a Gaussian dip of R_xx centred exactly on nu = alpha (h/e) (V - V0) / B over a
background that changes by decades across the map; R_xy (when asked) sits on h/(nu e^2)
of the nearest state below |nu|.  Invented numbers, for tests only.
"""

import numpy as np
import xarray as xr

from fanmap.physics import FLUX_QUANTUM_SINGLE_ELECTRON, VON_KLITZING


def handbuilt_fan(fillings, *, alpha=7.2e14, v0=2.0, gate=(-40.0, 40.0, 200), field=(1.0, 12.0, 120),
                  width=0.15, noise=0.02, decades=2.0, hall=False, onsets=None, seed=0,
                  direction_shift=0.0, drift=0.0):
    """A fan map as an xarray.Dataset following the map contract.

    ``onsets`` maps a filling to the field below which its dip is absent.
    ``direction_shift`` moves V0 by ``direction_shift`` on every second row (down sweeps);
    ``drift`` moves V0 linearly by ``drift`` volts from the first to the last row.
    """
    gate = np.linspace(*gate) if isinstance(gate, tuple) else np.asarray(gate, float)
    field = np.linspace(*field) if isinstance(field, tuple) else np.asarray(field, float)
    rows = np.arange(field.size)
    direction = np.where(rows % 2 == 0, 1.0, -1.0)
    origin = v0 + (direction < 0) * direction_shift + drift * rows / max(rows[-1], 1)
    nu = alpha * FLUX_QUANTUM_SINGLE_ELECTRON * (gate[None, :] - origin[:, None]) / field[:, None]
    dip = np.zeros_like(nu)
    for f in fillings:
        present = np.ones_like(field) if onsets is None or f not in onsets else field >= onsets[f]
        dip = np.maximum(dip, present[:, None] * np.exp(-((nu - f) / width) ** 2))
    span = gate[-1] - gate[0]
    background = 10 ** (3 + decades * (gate[None, :] - gate[0]) / span * field[:, None] / field[-1])
    rng = np.random.default_rng(seed)
    rxx = background * (1.02 - dip) * (1 + noise * rng.standard_normal(nu.shape))
    data = {"rxx": (("field", "gate"), rxx, {"units": "ohm", "long_name": "longitudinal resistance"})}
    if hall:
        levels = np.sort(np.abs([f for f in fillings if float(f).is_integer()]))
        plateau = np.full_like(nu, np.nan)
        for f in levels:
            plateau = np.where(np.abs(nu) >= f - 0.5, f, plateau)
        with np.errstate(divide="ignore", invalid="ignore"):
            rxy = np.sign(nu) * VON_KLITZING / plateau
        data["rxy"] = (("field", "gate"), np.nan_to_num(rxy, nan=0.0),
                       {"units": "ohm", "long_name": "Hall resistance"})
    coords = {"field": ("field", field, {"units": "T", "long_name": "magnetic field"}),
              "gate": ("gate", gate, {"units": "V", "long_name": "gate voltage"})}
    if direction_shift:
        coords["sweep_direction"] = ("field", direction, {"units": "1", "long_name": "sweep direction"})
    return xr.Dataset(data, coords=coords, attrs={"map_kind": "fan"})
