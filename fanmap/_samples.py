"""The shipped sample maps: an invented measurement campaign, regenerated bit for bit.

Scenario (invented): the Larkspur Quantum Transport Lab's "Nightjar" cryostat (a
14 T magnet with a 1.5 K variable-temperature insert) and its "Wren" dilution
refrigerator (50 mK, 14 T).  Devices: MX-07 (monolayer graphene on 285 nm SiO2,
cooldown 3), BL-12 (hBN-encapsulated bilayer, graphite back gate, cooldown 5, and
its dual-gated twin BL-12D), GA-3 (gated GaAs heterostructure, cooldown 2 in Wren)
and TW-2 (twisted bilayer near 1.1 degrees, cooldown 1).
"""

from pathlib import Path

import numpy as np

from ._atomic import write_text_atomic
from .simulate import simulate_fan, simulate_gate_map, write_map

__all__ = ["SAMPLES", "make_sample", "write_samples"]

#: name -> (description, function building the dataset)
SAMPLES = {
    "mx07_monolayer_fan.nc": (
        "MX-07, monolayer graphene on 285 nm SiO2, Nightjar cooldown 3, 1.7 K: back-gate fan "
        "-40...40 V, 0.07...14 T, R_xx and R_xy",
        lambda: simulate_fan("graphene-monolayer", gate=np.linspace(-40, 40, 400),
                             field=np.linspace(14 / 200, 14, 200), seed=3,
                             zero_density_voltage=4.6)),
    "mx07_monolayer_fan_both_signs.nc": (
        "MX-07, same cooldown, a quick fan at -9...+9 T with the usual troubles: alternating "
        "sweep directions with 0.4 V hysteresis, 0.6 V drift of V0, 2 % R_xy mixed into R_xx, "
        "correlated noise, spikes, NaN gaps, uneven field steps and an interrupted last sweep",
        lambda: simulate_fan("graphene-monolayer", gate=np.linspace(-40, 40, 320),
                             field=np.linspace(0.1, 9, 90), field_sign="both", seed=4,
                             zero_density_voltage=4.6, hysteresis=0.4, drift=0.6,
                             contact_mixing=0.02, correlated_noise=0.01, spikes=25, nan_gaps=8,
                             interrupted=0.55, irregular_field=0.3)),
    "bl12_bilayer_fan.nc": (
        "BL-12, hBN-encapsulated bilayer graphene, 40 nm hBN to a graphite back gate, Nightjar "
        "cooldown 5, 1.6 K: fan -6...6 V, 0.06...12 T, R_xx only",
        lambda: simulate_fan("graphene-bilayer", gate=np.linspace(-6, 6, 400),
                             field=np.linspace(12 / 200, 12, 200), hall=False, seed=5)),
    "ga3_gaas_fan.nc": (
        "GA-3, gated GaAs/AlGaAs heterostructure (gate 120 nm above the 2DEG, depletion at "
        "-0.75 V outside the sweep), Wren cooldown 2, 50 mK: fan -0.6...0.3 V, 0.07...14 T, "
        "R_xx and R_xy with fractional states",
        lambda: simulate_fan("2deg", gate=np.linspace(-0.6, 0.3, 400),
                             field=np.linspace(14 / 200, 14, 200), seed=2)),
    "tw2_moire_fan.nc": (
        "TW-2, twisted bilayer graphene near 1.1 degrees, 30 nm hBN to a graphite gate, Nightjar "
        "cooldown 1, 1.5 K: fan -6...6 V, 0...8 T with a B = 0 row, R_xx and R_xy",
        lambda: simulate_fan("moire-graphene", gate=np.linspace(-6, 6, 400),
                             field=np.linspace(8 / 160, 8, 160), zero_field_row=True, seed=1)),
    "bl12d_dual_gate_0T.nc": (
        "BL-12D, dual-gated bilayer (25 nm hBN top gate, 285 nm SiO2 + 30 nm hBN bottom gate), "
        "Nightjar cooldown 5, 1.6 K, B = 0: R_xx vs top and bottom gate, with gate-dependent "
        "contact resistance",
        lambda: simulate_gate_map("graphene-bilayer", field=0.0, contact_resistance=60.0,
                                  seed=6)),
    "bl12d_dual_gate_6T.nc": (
        "BL-12D, same cooldown, B = 6 T: R_xx and R_xy vs top and bottom gate",
        lambda: simulate_gate_map("graphene-bilayer", field=6.0, hall=True, seed=7)),
}

_TRUTH_SHOWN = (
    "truth_density_per_volt", "truth_zero_density_voltage", "truth_degeneracy",
    "truth_berry_phase", "truth_main_fillings", "truth_broken_symmetry_fillings",
    "truth_fractional_fillings", "truth_twist_angle_deg", "truth_cell_density",
    "truth_full_filling_density", "truth_band_fillings", "truth_satellites",
    "truth_top_capacitance", "truth_bottom_capacitance", "truth_top_offset",
    "truth_bottom_offset", "truth_field", "truth_temperature", "truth_effective_mass",
    "truth_drift", "truth_hysteresis", "truth_contact_mixing", "truth_seed",
)

REGENERATE = "fanmap simulate --samples sample_maps"


def make_sample(name):
    """Build the sample map ``name`` (a key of :data:`SAMPLES`) in memory."""
    return SAMPLES[name][1]()


def _format(value):
    if isinstance(value, str):
        return value or "(none)"
    array = np.atleast_1d(value)
    if array.dtype.kind in "iu":
        return ", ".join(str(v) for v in array)
    if array.size == 1 and np.isnan(array[0]):
        return "n/a"
    return ", ".join(f"{v:.6g}" for v in array)


def write_samples(directory):
    """Write every sample map and the README describing them into ``directory``."""
    directory = Path(directory)
    lines = [
        "# Sample maps (synthetic)",
        "",
        "Every map here is **synthetic**: made by the fanmap simulator (`fanmap.simulate`) for an",
        "invented measurement campaign. The lab, cryostats, devices and cooldowns are invented;",
        "no measured data is included. The true values the simulator used are stored in each",
        "file's `truth_*` attributes (SI units) and listed below.",
        "",
        "Scenario: the Larkspur Quantum Transport Lab measures in its \"Nightjar\" cryostat",
        "(14 T, 1.5 K insert) and its \"Wren\" dilution refrigerator (50 mK, 14 T).",
        "",
        "Regenerate all of them, bit for bit (same arrays, same attributes), with:",
        "",
        "```",
        REGENERATE,
        "```",
        "",
    ]
    written = []
    for name, (description, _) in SAMPLES.items():
        ds = make_sample(name)
        write_map(ds, directory / name, single_precision=True)
        written.append(directory / name)
        dims = " x ".join(f"{d} {n}" for d, n in ds.sizes.items())
        lines += [f"## `{name}`", "", description + ".", "",
                  f"Variables: {', '.join(ds.data_vars)}; {dims} points.", ""]
        lines += [f"- `{key}`: {_format(ds.attrs[key])}" for key in _TRUTH_SHOWN
                  if key in ds.attrs]
        lines.append("")
    lines += ["Sign convention of R_xy: positive for electrons at positive field. Gate maps use",
              "D = (C_t (V_t - V_t0) - C_b (V_b - V_b0)) / 2 (positive when the top gate is the more",
              "positive one).", ""]
    write_text_atomic(directory / "README.md", "\n".join(lines))
    return written
