"""Occupation of a broadened, thermally smeared spectrum on an energy grid.

For one field (one row of a fan map) the levels are dropped onto a uniform
energy grid and convolved, in Fourier space, with the level shape (Gaussian
or Lorentzian) and with the exact thermal kernel -df/dE, whose transform is
x / sinh(x), x = pi k_B T omega.  Three widths are used: the full width sets
the density n(mu) (and so the chemical potential), a narrower extended-state
band sets the scattering rate (sigma_xx), and a still narrower one the Hall
count (quantised sigma_xy).  The chemical potential of each pixel is found by
interpolating the monotonic n(mu) table.
"""

from dataclasses import dataclass

import numpy as np

from . import physics as ph

__all__ = ["RowTable", "row_table", "evaluate"]

_MIN_POINTS = 512
_MAX_POINTS = 8192
# Grid spacing as a fraction of the narrowest smoothing width: ripple from the
# discrete grid is then below 1e-6 of the signal (Gaussian transform at 2 pi / dE).
_SPACING_PER_WIDTH = 0.5


@dataclass
class RowTable:
    """Tables of one row on an energy grid (J): density n(E) and Hall density (m^-2), and the
    thermally smeared extended-state density of states (J^-1 m^-2, None at B = 0)."""

    energy: np.ndarray
    density: np.ndarray
    hall_density: np.ndarray
    extended: np.ndarray | None
    reference_dos: object      # callable: zero-field DOS at a density


def _kernel(omega, width, shape):
    if shape == "lorentzian":
        return np.exp(-width * np.abs(omega))
    return np.exp(-0.5 * (omega * width) ** 2)


def _thermal(omega, temperature):
    x = np.pi * ph.BOLTZMANN * temperature * omega
    with np.errstate(invalid="ignore", divide="ignore"):
        out = x / np.sinh(x)
    out[~np.isfinite(out)] = 0.0
    out[x == 0] = 1.0
    return out


def row_table(model, field, density_range, temperature, *, shape="gaussian",
              hall_fraction=0.35):
    """Build the :class:`RowTable` of ``model`` at ``field`` for densities in ``density_range``.

    ``field`` may be zero: the smooth zero-field density of states is used then.
    """
    n_min, n_max = density_range
    kt = ph.BOLTZMANN * temperature
    zero_field = abs(field) < 1e-6
    gamma = model.width(field)
    widths = np.array([gamma, model.extended_fraction * gamma, hall_fraction * gamma])
    smear = np.sqrt(widths**2 + (1.8 * kt) ** 2)
    tail = (40.0 if shape == "lorentzian" else 8.0) * gamma + 12 * kt

    if zero_field:
        # invert the smooth density at the ends of the range
        probe = np.linspace(-1, 1, 20001) * _energy_scale(model, max(abs(n_min), abs(n_max)))
        dens = model.smooth_density(probe)
        e_lo = np.interp(n_min, dens, probe, left=probe[0])
        e_hi = np.interp(n_max, dens, probe, right=probe[-1])
        levels = None
    else:
        energies, weights, floor_nu = model.levels(field, density_range)
        flux = ph.flux_density_per_flavour(field)
        top = floor_nu * flux + np.cumsum(weights) * flux
        k_lo = int(np.clip(np.searchsorted(top, n_min), 0, energies.size - 1))
        k_hi = int(np.clip(np.searchsorted(top, n_max), 0, energies.size - 1))
        e_lo = energies[max(k_lo - 1, 0)]
        e_hi = energies[min(k_hi + 1, energies.size - 1)]
        levels = (energies, weights * flux, floor_nu * flux)
    e_lo -= tail + 3 * smear[0]
    e_hi += tail + 3 * smear[0]
    spacing = _SPACING_PER_WIDTH * smear.min()
    points = int(2 ** np.ceil(np.log2(max((e_hi - e_lo) / spacing, _MIN_POINTS))))
    points = min(points, _MAX_POINTS)
    energy = np.linspace(e_lo, e_hi, points)
    step = energy[1] - energy[0]

    smooth = model.smooth_dos(energy) * step
    if levels is None:
        weights_on_grid = smooth
        base = model.smooth_density(energy[0])
    else:
        energies, dens, floor = levels
        below = energies < energy[0]
        inside = ~below & (energies <= energy[-1])
        base = floor + dens[below].sum()
        pos = (energies[inside] - energy[0]) / step
        idx = np.minimum(np.floor(pos).astype(int), points - 2)
        frac = pos - idx
        weights_on_grid = (np.bincount(idx, dens[inside] * (1 - frac), minlength=points)
                           + np.bincount(idx + 1, dens[inside] * frac, minlength=points))

    # Densities come from the staircase of filled states, extended by constants on both
    # sides so that level tails crossing the grid edges are neither lost nor wrapped.
    size, pad = 2 * points, points // 2
    omega = 2 * np.pi * np.fft.rfftfreq(size, step)
    thermal = _thermal(omega, temperature)
    stairs = base + np.cumsum(weights_on_grid) - 0.5 * weights_on_grid
    stairs = np.concatenate([np.full(pad, base), stairs, np.full(size - pad - points, stairs[-1])])
    # a linear ramp (unchanged by a symmetric kernel) takes out the jump where the periodic
    # transform wraps round, which long Lorentzian tails would otherwise carry into the grid
    ramp = np.linspace(stairs[0], stairs[-1], size)
    stairs_spectrum = np.fft.rfft(stairs - ramp)
    ramp = ramp[pad:pad + points]
    spectrum = np.fft.rfft(weights_on_grid, size)

    def convolve(transform, width, shift=0):
        out = np.fft.irfft(transform * _kernel(omega, width, shape) * thermal, size)
        return out[shift:shift + points]

    density = convolve(stairs_spectrum, widths[0], pad) + ramp
    hall_density = convolve(stairs_spectrum, widths[2], pad) + ramp
    extended = convolve(spectrum, widths[1])
    # a vanishing floor of localised states keeps n(E) strictly increasing
    density = density + 1e-9 * max(np.ptp(density), 1.0) * np.linspace(0, 1, points)
    extended = None if levels is None else np.clip(extended, 0, None) / step
    return RowTable(energy, density, hall_density, extended, model.reference_dos)


def _energy_scale(model, density):
    """An energy (J) comfortably above the zero-field Fermi energy at ``density``."""
    scale = 1e-4 * ph.ELEMENTARY_CHARGE
    while model.smooth_density(scale) < 1.5 * density + 1e10:
        scale *= 2
    return scale * 1.5


def evaluate(table, density):
    """Chemical potential (J), Hall density (m^-2) and scattering ratio at each ``density``.

    The scattering ratio is the extended-state density of states at mu over the
    zero-field one at the same density (1 at B = 0).
    """
    mu = np.interp(density, table.density, table.energy)
    hall = np.interp(mu, table.energy, table.hall_density)
    if table.extended is None:
        return mu, hall, np.ones_like(mu)
    reference = table.reference_dos(density)
    floor = 1e-3 * np.max(reference)
    scattering = (np.interp(mu, table.energy, table.extended) + floor) / (reference + floor)
    return mu, hall, scattering
