"""Independent cross-checks of a fan calibration.

A lever arm is trusted when independent methods agree.  From the same fan map
this module gives the classical checks:

* **Hall density** from the low-field Hall slope, n_H = 1 / (e dR_xy/dB)
  (Drude, one carrier type; R_xy = rho_xy in a Hall bar), then alpha and V0
  from n_H versus V_g, and the mobility mu = 1 / (e |n| rho_xx);
* **oscillation frequency**: R_xx versus 1/B at each gate voltage, whose
  frequency B_F gives n = g e B_F / h (Onsager), then alpha and V0;
* **Landau index plot**: minima B_N at one gate voltage, N versus 1/B_N, whose
  intercept gives the Berry phase;
* **temperature series**: the effective mass from the Lifshitz-Kosevich
  thermal damping X / sinh X, and the Dingle temperature and quantum lifetime
  from the field dependence of the amplitude;
* a **comparison table** of alpha and V0 from the fan, Hall and oscillation
  methods with a flag where two disagree by more than three standard errors.

:func:`run_crosschecks` runs them all and returns the JSON-ready dictionary
stored in :attr:`fanmap.results.FanResult.crosschecks`.

Landau index convention
-----------------------
Each R_xx minimum gets the integer index N of g-fold levels filled below the
Fermi level, counting from the lowest level, so that the minimum sits at
|nu| = g (N + gamma): monolayer graphene nu = 2, 6, 10 are N = 0, 1, 2 with
gamma = 1/2; a 2DEG's nu = 2, 4 are N = 1, 2 and bilayer graphene's
nu = 4, 8 are N = 1, 2 with gamma = 0.  Then N = B_F / B_N - gamma, and
``index_plot_intercept`` is gamma (the fitted line meets the N axis at
-gamma), folded into (-1/4, 3/4].  Minima that do not fall on this grid (spin
or valley split states) are left out and listed.
"""

import math

import numpy as np
from scipy import ndimage, optimize

from . import _oscillations as osc
from . import physics as ph
from ._linefit import fit_line, fit_line_clipped, fit_v_shape
from ._schema import FIELD, GATE, RXX, RXY, SWEEP_DIRECTION
from .errors import InputError
from .materials import get_material

__all__ = [
    "LK_COEFFICIENT", "onsager_frequency", "onsager_density", "lk_thermal_damping",
    "dingle_damping", "hall_density", "hall_calibration", "oscillation_calibration",
    "landau_index_plot", "effective_mass_from_series", "quantum_lifetime",
    "compare_calibrations", "run_crosschecks",
]

#: Systematic error of an oscillation frequency, in units of its Rayleigh resolution
#: 1 / (1/B_min - 1/B_max), treated as common to all gate voltages.  When the waveform
#: sharpens into the quantum Hall regime or splits along a trace, the phase of its
#: fundamental drifts and the spectral peak moves by a fraction of the resolution; window
#: changes do not reveal it.  Measured on the shipped simulated fans (minima at exact
#: fillings): median 0.005-0.007 resolutions for graphene mono- and bilayers, 0.033 (90 %:
#: 0.07) for the spin-split GaAs 2DEG; 0.04 covers the bulk of them.
FREQUENCY_SYSTEMATIC = 0.04

#: Systematic error of an index-plot intercept (index units): the half-height centre of a
#: minimum moves when the oscillation amplitude changes across the well; on exact
#: Lifshitz-Kosevich traces with strong damping the intercept comes out 0.010 low (tests).
INDEX_SYSTEMATIC = 0.01

#: Relative deviation from n = alpha (V - V0) tolerated at the edge of the neutrality gap.
HALL_LINEARITY = 1e-3

#: 2 pi^2 k_B m_e / (hbar e) in T/K: X = LK_COEFFICIENT * (m*/m_e) * T / B.
LK_COEFFICIENT = 2 * np.pi**2 * ph.BOLTZMANN * ph.ELECTRON_MASS / (ph.HBAR * ph.ELEMENTARY_CHARGE)


# --- the textbook relations ------------------------------------------------------

def onsager_frequency(density, degeneracy):
    """Oscillation frequency in 1/B, B_F = n h / (g e) (T), of ``degeneracy``-fold levels.

    Examples
    --------
    A spin-degenerate 2DEG with 3e15 m^-2 (3e11 cm^-2):

    >>> f"{onsager_frequency(3e15, 2):.3f}"
    '6.204'
    """
    return np.abs(np.asarray(density, dtype=float)) * ph.FLUX_QUANTUM_SINGLE_ELECTRON / degeneracy


def onsager_density(frequency, degeneracy):
    """Carrier density |n| = g e B_F / h (m^-2) from an oscillation frequency B_F (T)."""
    return degeneracy * np.asarray(frequency, dtype=float) / ph.FLUX_QUANTUM_SINGLE_ELECTRON


def lk_thermal_damping(temperature, field, effective_mass):
    """Lifshitz-Kosevich thermal factor X / sinh X, X = 2 pi^2 k_B T m* / (hbar e B).

    ``effective_mass`` in units of m_e; tends to 1 as T -> 0.

    Examples
    --------
    GaAs (m* = 0.067 m_e) at 1.5 K and 1 T:

    >>> f"{lk_thermal_damping(1.5, 1.0, 0.067):.4f}"
    '0.7117'
    """
    x = LK_COEFFICIENT * np.asarray(effective_mass, dtype=float) * np.asarray(
        temperature, dtype=float) / np.abs(np.asarray(field, dtype=float))
    x = np.maximum(x, 1e-12)
    with np.errstate(over="ignore"):
        return np.where(x < 700, x / np.sinh(np.minimum(x, 700)), 0.0)


def dingle_damping(field, effective_mass, dingle_temperature):
    """Dingle factor exp(-2 pi^2 k_B T_D m* / (hbar e B)) = exp(-pi / (omega_c tau_q))."""
    return np.exp(-LK_COEFFICIENT * effective_mass * dingle_temperature / np.abs(field))


# --- traces ----------------------------------------------------------------------

def _traces(fan_map, name, *, odd=False):
    """``(fields >= 0 ascending, gates ascending, values[field, gate])`` of one signal.

    Rows at +B and -B are combined: averaged for R_xx (even in B),
    antisymmetrised for R_xy (odd in B, Onsager reciprocity); repeated fields
    are averaged.
    """
    if name not in fan_map:
        raise InputError(f"the map has no {name!r} variable")
    field = np.asarray(fan_map[FIELD].values, dtype=float)
    gate = np.asarray(fan_map[GATE].values, dtype=float)
    values = np.asarray(fan_map[name].transpose(FIELD, GATE).values, dtype=float)
    if field.size and np.nanmax(np.abs(field)) > 100:
        raise InputError(f"fields up to {np.nanmax(np.abs(field)):g} T: the field axis is not in "
                         "tesla; read the map with the right field units")
    key, inverse = np.unique(np.round(np.abs(field), 9), return_inverse=True)
    sign = np.where(field < 0, -1.0, 1.0) if odd else np.ones_like(field)
    finite = np.isfinite(values)
    sums = np.zeros((key.size, gate.size))
    counts = np.zeros((key.size, gate.size))
    np.add.at(sums, inverse, np.where(finite, values * sign[:, None], 0.0))
    np.add.at(counts, inverse, finite)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = sums / counts
    order = np.argsort(gate)
    return key, gate[order], out[:, order]


def _up_sweeps_only(fan_map):
    """The map's up sweeps when both sweep directions are present (hysteresis), and a note.

    Interleaved up and down sweeps shifted by a hysteresis would put a zigzag
    into every R(B) trace at fixed gate voltage.  A coordinate
    ``acquisition_row`` (0 ... rows-1, acquisition order) is added either way,
    for referring V0 to the time of the rows used.
    """
    rows = fan_map.sizes[FIELD]
    fan_map = fan_map.assign_coords(acquisition_row=(FIELD, np.arange(rows)))
    if SWEEP_DIRECTION not in fan_map.coords:
        return fan_map, None
    direction = np.asarray(fan_map[SWEEP_DIRECTION].values)
    if not ((direction > 0).any() and (direction < 0).any()):
        return fan_map, None
    note = (f"sweep directions alternate: the cross-checks use the {int((direction > 0).sum())} "
            "up sweeps only (a hysteresis between directions would mix two fans)")
    return fan_map.isel({FIELD: np.flatnonzero(direction > 0)}), note


def _mean_row_position(fan_map, lo, hi):
    """Mean acquisition position r/(R-1) in [0, 1] of the rows with lo <= |B| <= hi."""
    if "acquisition_row" not in fan_map.coords or not np.all(np.isfinite([lo, hi])):
        return float("nan")
    rows = np.asarray(fan_map["acquisition_row"].values, dtype=float)
    field = np.abs(np.asarray(fan_map[FIELD].values, dtype=float))
    inside = (field >= lo) & (field <= hi)
    total = max(float(rows.max()), 1.0)
    return float(np.mean(rows[inside]) / total) if inside.any() else float("nan")


def _field_step(fields):
    steps = np.diff(fields)
    steps = steps[steps > 0]
    return float(np.median(steps)) if steps.size else float("nan")


# --- Hall density ------------------------------------------------------------------

def _hall_windows(fields, rxy, tolerance, min_points):
    """Hall slope over the widest low-field window where R_xy stays linear, per gate.

    Prefix sums give the least-squares line over [0, B_k] for every k at once;
    the window grows while each new point lies within ``tolerance`` (relative)
    plus three times the noise (from second differences of the trace, robust to
    plateau steps) of the line fitted to the points below it.
    """
    n_f, n_g = rxy.shape
    finite = np.isfinite(rxy)
    b = np.where(finite, fields[:, None], 0.0)
    y = np.where(finite, rxy, 0.0)
    w = finite.astype(float)
    s0, sx, sy = np.cumsum(w, 0), np.cumsum(b, 0), np.cumsum(y, 0)
    sxx, sxy, syy = np.cumsum(b * b, 0), np.cumsum(b * y, 0), np.cumsum(y * y, 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        det = s0 * sxx - sx**2
        slope = (s0 * sxy - sx * sy) / det
        intercept = (sy - slope * sx) / s0
        sse = np.maximum(syy - intercept * sy - slope * sxy, 0.0)
        slope_var = sse / np.maximum(s0 - 2, 1) * s0 / det
    second = np.diff(rxy, 2, axis=0)
    noise = 1.4826 * np.nanmedian(np.abs(second), axis=0) / np.sqrt(6.0) if n_f > 2 else np.zeros(n_g)
    noise = np.nan_to_num(noise)
    predicted = np.full_like(rxy, np.nan)
    predicted[1:] = intercept[:-1] + slope[:-1] * fields[1:, None]
    miss = np.abs(rxy - predicted)
    allowed = ~(miss > tolerance * np.abs(rxy) + 3 * noise)     # NaN (unjudged) passes
    allowed |= s0 <= min_points          # windows too small to judge never stop the growth
    last = np.zeros(n_g, dtype=int)
    linear_everywhere = np.zeros(n_g, dtype=bool)
    for j in range(n_g):
        bad = np.flatnonzero(~allowed[:, j])
        k = (bad[0] - 1) if bad.size else n_f - 1
        first_judged = np.flatnonzero(s0[:, j] >= min_points)
        if first_judged.size == 0:
            last[j] = -1
            continue
        linear_everywhere[j] = k >= first_judged[0]
        last[j] = max(k, first_judged[0])
    idx = np.clip(last, 0, n_f - 1)
    cols = np.arange(n_g)
    # The window of half the field (at least min_points values) for the window dependence.
    half = np.searchsorted(fields, 0.5 * fields[idx], side="right") - 1
    half = np.maximum(half, np.argmax(s0 >= min_points, axis=0))
    half_slope = np.where((last >= 0) & (half < idx), slope[np.clip(half, 0, n_f - 1), cols],
                          np.nan)
    result = {
        "half_slope": half_slope,
        "slope": np.where(last >= 0, slope[idx, cols], np.nan),
        "slope_stderr": np.where(last >= 0, np.sqrt(slope_var[idx, cols]), np.nan),
        "window_max": np.where(last >= 0, fields[idx], np.nan),
        "linear": linear_everywhere,
    }
    return result


def hall_density(fan_map, *, field_window=None, linearity_tolerance=0.01, min_points=4):
    """Low-field Hall density n_H = 1 / (e dR_xy/dB) at every gate voltage.

    Parameters
    ----------
    fan_map : xarray.Dataset
        Fan map with ``rxy`` (ohm); ±B rows are antisymmetrised.
    field_window : (float, float), optional
        Field range (T) of the slope fit.  By default the window starts at the
        lowest field and grows, per gate voltage, while R_xy stays linear
        within ``linearity_tolerance`` (below the onset of plateaus).
    linearity_tolerance : float
        Allowed rms deviation from a straight line, as a fraction of R_xy at
        the window's upper edge.
    min_points : int
        Fewest field values in a window.

    Returns
    -------
    dict
        ``gate`` (V), ``density`` (m^-2, positive for electrons with the
        convention R_xy = B / (n e)), ``density_stderr``, ``hall_coefficient``
        dR_xy/dB (ohm/T), ``window_max`` (T, upper field of each window) and
        ``linear`` (False where even the smallest window was not linear).

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> b = np.linspace(0, 1, 11); v = np.array([1.0, 2.0])
    >>> n = 1e15 * v
    >>> m = xr.Dataset({"rxx": (("field", "gate"), np.ones((11, 2))),
    ...                 "rxy": (("field", "gate"), b[:, None] / (n * 1.602176634e-19))},
    ...                coords={"field": b, "gate": v})
    >>> (hall_density(m)["density"] / 1e15).round(6).tolist()
    [1.0, 2.0]
    """
    if RXY not in fan_map:
        raise InputError("no Hall signal: the map has no 'rxy' variable, so the Hall density "
                         "cannot be measured; read the map with the Hall channel named (--hall)")
    fields, gates, rxy = _traces(fan_map, RXY, odd=True)
    if field_window is not None:
        lo, hi = sorted(float(v) for v in field_window)
        keep = (fields >= lo) & (fields <= hi)
        if keep.sum() < 3:
            raise InputError(f"the Hall field window {lo:g}-{hi:g} T holds {keep.sum()} field "
                             "values; give a window with at least three")
        fields, rxy = fields[keep], rxy[keep]
        fits = [fit_line(fields, rxy[:, j]) for j in range(gates.size)]
        lower = fields <= lo + 0.5 * (hi - lo)
        halves = [fit_line(fields[lower], rxy[lower, j]) if lower.sum() >= 3 else None
                  for j in range(gates.size)]
        windows = {
            "slope": np.array([f.slope for f in fits]),
            "slope_stderr": np.array([f.slope_stderr for f in fits]),
            "half_slope": np.array([h.slope if h else np.nan for h in halves]),
            "window_max": np.full(gates.size, hi),
            "linear": np.ones(gates.size, dtype=bool),
        }
    else:
        windows = _hall_windows(fields, rxy, linearity_tolerance, min_points)
    slope = windows["slope"]
    with np.errstate(divide="ignore", invalid="ignore"):
        density = 1.0 / (ph.ELEMENTARY_CHARGE * slope)
        stderr = np.abs(density) * windows["slope_stderr"] / np.abs(slope)
        half = 1.0 / (ph.ELEMENTARY_CHARGE * windows["half_slope"])
        shift = np.where(np.isfinite(half), np.abs(density - half), 0.0)
    return {
        "gate": gates, "density": density, "density_stderr": stderr,
        "hall_coefficient": slope, "window_max": windows["window_max"],
        "linear": windows["linear"], "window_shift": shift,
    }


def _two_carrier_mask(gates, density, exclusion_factor):
    """True where a gate voltage is far enough from neutrality for one carrier type.

    Near neutrality electrons and holes coexist and the Hall coefficient
    1/(n e) turns over and changes sign instead of diverging.  The turning
    points of |R_H| on either side of the sign change mark the two-carrier
    region; points with |n_H| below ``exclusion_factor`` times the larger
    turning-point density are excluded.  Returns ``(keep, floor, note, segment)``,
    ``segment`` marking the single-band stretch around neutrality before the exclusion.
    """
    ok = np.isfinite(density)
    coeff = np.where(ok, 1.0 / density, np.nan)
    idx = np.flatnonzero(ok)
    keep = ok.copy()
    note = None
    if idx.size < 3:
        return keep, None, note, ok.copy()
    # Signs of the Hall coefficient after a running median, so that noise near neutrality
    # does not count as sign changes; real ones (neutrality, superlattice band edges) span
    # many gate voltages.
    width = max(5, idx.size // 40) | 1
    signs = np.sign(ndimage.median_filter(coeff[idx], size=width, mode="nearest"))
    # Neutrality is a change from holes to electrons with rising gate voltage; a band edge
    # of a superlattice first flips the other way.  Of several, the one with the longest
    # single-band stretch (up to the nearest opposite flips) wins.
    rising = np.flatnonzero((signs[:-1] < 0) & (signs[1:] > 0))
    falling = np.flatnonzero((signs[:-1] > 0) & (signs[1:] < 0))
    flips = rising if rising.size else np.flatnonzero(signs[1:] != signs[:-1])
    magnitude = np.abs(coeff[idx])
    if flips.size:
        spans = []
        for f in flips:
            below, above = falling[falling < f], falling[falling > f]
            spans.append((below[-1] + 1 if below.size else 0,
                          above[0] if above.size else idx.size - 1))
        best = int(np.argmax([hi - lo for lo, hi in spans]))
        flip, (first, last) = flips[best], spans[best]
        keep[idx[:first]] = False
        keep[idx[last + 1:]] = False
        if flips.size > 1:
            note = (
                f"Hall: the Hall density changes from holes to electrons {flips.size} times "
                f"(superlattice band edges?); the one at {gates[idx[flip]]:.3g} V was taken as "
                "neutrality and may be a band edge: compare V0 with the fan fit")
        left, right = idx[first: flip + 1], idx[flip + 1: last + 1]
        turning = [side[np.argmax(np.abs(coeff[side]))] for side in (left, right) if side.size]
    else:
        peak = int(np.argmax(magnitude))
        if peak in (0, idx.size - 1):
            return keep, None, note, ok.copy()   # monotonic: neutrality outside the gate range
        turning = [idx[peak]]
    segment = keep.copy()
    floor = max(abs(density[t]) for t in turning)
    lo, hi = min(gates[t] for t in turning), max(gates[t] for t in turning)
    keep &= (np.abs(density) >= exclusion_factor * floor) & ~((gates >= lo) & (gates <= hi))
    return keep, floor, note, segment


def _fit_single_carrier(gates, density, sigma, keep, rounds=4):
    """Fit n_H = alpha (V - V0) and widen the neutrality gap while its edge is not linear.

    After each fit, the run of points next to V0 on either side whose relative
    deviation from the line exceeds max(3 x median deviation, 1e-3) is left
    out: there the second carrier type still bends the Hall density.  (1e-3 is
    :data:`HALL_LINEARITY`.)
    """
    keep = keep.copy()
    for _ in range(rounds):
        fit, kept = fit_line_clipped(gates[keep], density[keep], sigma[keep], absolute_sigma=True)
        used = np.zeros(gates.size, dtype=bool)
        used[np.flatnonzero(keep)[kept]] = True
        if fit.points < 5 or not np.isfinite(fit.slope):
            return fit, used
        line = fit.intercept + fit.slope * gates
        deviation = np.abs(density - line) / np.abs(line)
        limit = max(3 * np.median(deviation[used]), HALL_LINEARITY)
        grown = keep.copy()
        v0 = fit.root
        for side in (gates > v0, gates < v0):
            idx = np.flatnonzero(side & used)
            idx = idx[np.argsort(np.abs(gates[idx] - v0))]
            for i in idx:
                if deviation[i] <= limit:
                    break
                grown[i] = False
        if grown.sum() == keep.sum() or grown.sum() < 5:
            return fit, used
        keep = grown
    return fit, used


def hall_calibration(fan_map, *, field_window=None, geometry_factor=None,
                     exclusion_factor=4.0, linearity_tolerance=0.01):
    """Lever arm and zero-density voltage from the Hall density, and the mobility.

    n_H(V_g) from :func:`hall_density` is fitted with n = alpha (V_g - V0),
    leaving out the two-carrier region near neutrality (see
    :func:`_two_carrier_mask`) and outliers beyond four robust sigmas.  Each
    gate's error includes the change of its slope when the window is halved.  The
    mobility mu = 1 / (e |n_H| rho_xx) uses R_xx at the lowest field, with
    rho_xx = R_xx * ``geometry_factor`` (width / length of the Hall bar
    between the voltage probes).

    Returns
    -------
    dict
        ``density_per_volt`` (m^-2 V^-1), ``zero_density_voltage`` (V), each
        with ``_stderr``; ``field_window`` (T, median upper window edge);
        per-gate arrays ``gate``, ``density``, ``density_stderr``, ``used``;
        ``mobility`` (m^2 V^-1 s^-1, per gate), ``mobility_median``,
        ``mobility_field`` (T); ``warnings``.
    """
    warnings = []
    hall = hall_density(fan_map, field_window=field_window,
                        linearity_tolerance=linearity_tolerance)
    gates, density = hall["gate"], hall["density"]
    keep, floor, note, segment = _two_carrier_mask(gates, density, exclusion_factor)
    if note:
        warnings.append(note)
    if not np.all(hall["linear"][np.isfinite(density)]):
        bad = int(np.sum(~hall["linear"] & np.isfinite(density)))
        warnings.append(f"Hall: R_xy is not linear even over the lowest fields at {bad} gate "
                        "voltages; their slope comes from the smallest window")
    # Per-gate error: the slope's statistical error and, in quadrature, the linearity allowed
    # at the edge of the neutrality gap (HALL_LINEARITY of n), which a smooth two-carrier
    # tail can leave in every point; errors are absolute (the scatter only scales them up).
    sigma = np.sqrt(np.nan_to_num(hall["density_stderr"], nan=np.inf) ** 2
                    + (HALL_LINEARITY * density) ** 2 + hall["window_shift"] ** 2)
    fit, used = _fit_single_carrier(gates, density, sigma, keep)
    if fit.points < 3 or not np.isfinite(fit.slope):
        raise InputError("Hall: fewer than three single-carrier gate voltages; the Hall density "
                         "cannot be fitted (give --hall-window or check the Hall channel)")
    if floor is not None:
        dropped = int(np.sum(np.isfinite(density) & ~keep))
        warnings.append(
            f"Hall: {dropped} gate voltages near neutrality left out (two carriers: the Hall "
            f"coefficient turns over at |n| = {floor * 1e-4:.3g} cm^-2, points below "
            f"{exclusion_factor:g} times that are not single-carrier)")
    # The slope's dependence on the window (two carriers with mu B no longer small, the
    # onset of plateaus) tends to have one sign at every gate voltage, so its median is
    # also added as a common error of alpha.
    common = float(np.nanmedian((hall["window_shift"] / np.abs(density))[used]))
    alpha, alpha_err = fit.slope, math.hypot(fit.slope_stderr, common * abs(fit.slope))
    # A common relative error of |n| moves V0 unless both branches balance about it.
    v0, v0_err = fit.root, math.hypot(fit.root_stderr,
                                      common * abs(np.mean(gates[used] - fit.root)))
    fields, _, rxx = _traces(fan_map, RXX)
    low = int(np.argmin(fields))
    if geometry_factor is None:
        geometry_factor = 1.0
        warnings.append("mobility: square geometry assumed (rho_xx = R_xx); pass the Hall bar's "
                        "width/length as geometry_factor for a true mobility")
    rho = rxx[low] * geometry_factor
    with np.errstate(divide="ignore", invalid="ignore"):
        mobility = np.where(used, 1.0 / (ph.ELEMENTARY_CHARGE * np.abs(density) * rho), np.nan)
    if fields[low] > 0.05:
        warnings.append(f"mobility: lowest field is {fields[low]:g} T, not zero; "
                        "magnetoresistance may bias it")
    window = float(np.nanmedian(hall["window_max"][used]))
    return {
        "density_per_volt": alpha,
        "density_per_volt_stderr": alpha_err,
        "zero_density_voltage": v0,
        "zero_density_voltage_stderr": v0_err,
        "field_window": [float(fields.min()), window],
        "gate": gates, "density": density, "density_stderr": hall["density_stderr"],
        "used": used,
        "mobility": mobility,
        "mobility_median": float(np.nanmedian(mobility)) if used.any() else float("nan"),
        "mobility_field": float(fields[low]),
        "geometry_factor": float(geometry_factor),
        "warnings": warnings,
    }


# --- oscillation frequency -------------------------------------------------------------

def _spectral_peak(b, s, lo, hi, **kw):
    """Hann-windowed spectral peak of the oscillations between fields lo and hi.

    ``s`` is the conductivity-like trace (:func:`_conductivity`); the transform
    is taken of its logarithm, clipped (:func:`_log_window`): in the quantum
    Hall regime this keeps the sharp minima from filling the spectrum with
    harmonics and shifting the fundamental, and at low field it is the plain
    relative oscillation.
    """
    x, v = osc.uniform_inverse_field(b, _log_window(b, s, lo, hi), lo, hi)
    if not np.all(np.isfinite(v)):
        return float("nan"), float("nan"), float("nan"), 0.0
    return osc.dominant_frequency(x, osc.relative_oscillation(x, v), min_cycles=1.5, **kw)


def _log_window(b, s, lo, hi):
    """log of sigma B^2 (flat at high field, where sigma_xx ~ 1/B^2), clipped within [lo, hi].

    The clip (1e-3 of the window's maximum) keeps quantum Hall zeros and noise from
    dominating; it is taken inside the analysed window so that the large
    low-field conductivity outside it does not clip everything.
    """
    inside = (b >= lo) & (b <= hi)
    out = np.full(b.shape, np.nan)
    out[inside] = osc.log_clipped(s[inside] * b[inside] ** 2)
    return out


def _conductivity(fan_map, geometry_factor=None):
    """``(fields, gates, sigma-like[field, gate])`` of a fan map (see conductivity_like)."""
    fields, gates, rxx = _traces(fan_map, RXX)
    rxy = None
    if RXY in fan_map:
        rxy = _traces(fan_map, RXY, odd=True)[2]
        if not np.isfinite(rxy).any():
            rxy = None
    with np.errstate(divide="ignore"):
        x = np.where(fields > 0, 1.0 / fields, np.nan)[:, None]
    return fields, gates, osc.conductivity_like(
        x, rxx, rxy, 1.0 if geometry_factor is None else geometry_factor)


def _gate_frequency(fields, trace, field_step, *, field_range=None, points_per_period=6.0,
                    min_cycles=3.0, min_significance=6.0, near=None):
    """Oscillation frequency (T) of one R_xx(B) trace, or None with a reason.

    Pass 1 looks at ever wider high-field windows until the Hann-windowed
    spectrum shows ``min_cycles`` oscillations; pass 2 extends the window down
    to the lowest field where that frequency is still sampled
    ``points_per_period`` times.  With ``near`` (T) the peak is searched
    within 25 % of that frequency instead (used to put every gate voltage on
    the same harmonic).

    The standard error combines, in quadrature, the statistical error of a
    spectral peak (Cramer-Rao bound for a sinusoid in white noise: 0.39
    resolutions over the peak's significance), the spread of the peak when
    the window is shortened at either end (leakage of harmonics, mirror image
    and background move with the window), and the difference from the slope
    of the minima positions in 1/B (a waveform whose shape changes along the
    trace drifts the phase of its fundamental, which the minima do not
    follow).  So the error is measured on the data, not assumed.
    """
    ok = np.isfinite(trace) & (fields > 0)
    b, r = fields[ok], trace[ok]
    if field_range is not None:
        inside = (b >= field_range[0]) & (b <= field_range[1])
        b, r = b[inside], r[inside]
    if b.size < 8:
        return None, "fewer than 8 field values"
    hi, floor = b.max(), b.min()
    if near is not None:
        lo = max(floor, osc.resolvable_field(near, field_step, points_per_period))
        if np.sum(b >= lo) < 8:
            return None, "fewer than 8 field values"
        f, amplitude, res, sig = _spectral_peak(b, r, lo, hi, max_frequency=1.25 * near)
        if np.isfinite(f) and abs(f - near) > 0.25 * near:
            f = float("nan")
    else:
        guess = None
        lo = hi
        while lo > floor:
            lo = max(lo * 0.7, floor)
            if np.sum(b >= lo) < 8:
                continue
            f, amplitude, res, sig = _spectral_peak(
                b, r, lo, hi, max_frequency=lo**2 / (points_per_period * field_step))
            if np.isfinite(f) and sig >= min_significance and f >= min_cycles * res:
                guess = f
                break
        if guess is None:
            return None, f"fewer than {min_cycles:g} resolved oscillations"
        for _ in range(3):              # widen the window as long as the frequency allows
            new_lo = max(floor, osc.resolvable_field(f, field_step, points_per_period))
            if new_lo >= lo:
                break
            lo = new_lo
            f, amplitude, res, sig = _spectral_peak(
                b, r, lo, hi, max_frequency=max(lo**2 / (points_per_period * field_step), 1.5 * f))
            if not np.isfinite(f):
                break
    # Below 1e-6 of the background an "oscillation" is rounding error, not a measurement.
    if not np.isfinite(f) or sig < min_significance or f < min_cycles * res or amplitude < 1e-6:
        return None, "no significant oscillation"
    shifted = []
    for a, z in ((lo * 1.15, hi), (lo, max(hi / 1.4, lo * 1.5))):
        if f * (1 / a - 1 / z) >= min_cycles and np.sum((b >= a) & (b <= z)) >= 8:
            g = _spectral_peak(b, r, a, z, max_frequency=1.5 * f)[0]
            if np.isfinite(g) and abs(g - f) < 0.5 * f:
                shifted.append(g)
    spread = float(np.std([f, *shifted], ddof=1)) if shifted else float(res)
    minima = _minima_fit(b, r, f, lo, hi, field_step)
    from_minima = float("nan")
    if minima is not None and minima[2].sum() >= 4:
        from_minima = 1.0 / minima[0].slope
        if abs(from_minima - f) > 0.25 * f:       # minima on another harmonic: no comparison
            from_minima = float("nan")
    drift = abs(from_minima - f) if np.isfinite(from_minima) else 0.0
    stderr = math.sqrt((0.39 * res / sig) ** 2 + spread**2 + drift**2)
    return {"frequency": f, "frequency_stderr": stderr, "minima_frequency": from_minima,
            "amplitude": amplitude, "resolution": res, "significance": sig,
            "field_min": lo, "field_max": hi, "cycles": f * (1 / lo - 1 / hi)}, None


def oscillation_calibration(fan_map, *, degeneracy=None, field_range=None,
                            points_per_period=6.0, min_cycles=3.0, geometry_factor=None,
                            max_gates=160):
    """Lever arm from the Shubnikov-de Haas frequency at every gate voltage.

    At each gate voltage the conductivity-like trace (sigma_xx from R_xx and
    R_xy, or R_xx/B^2 without a Hall signal) is taken on a log scale, divided
    by its smooth background, resampled uniformly in 1/B, Hann-windowed and
    Fourier transformed (zero-padded, peak refined); the frequency B_F gives |n| = g e B_F / h (Onsager).  Then
    |n| = |alpha (V_g - V0)| is fitted through the sign change, so that
    electrons and holes both count.

    Parameters
    ----------
    degeneracy : int, optional
        g of the levels; without it only the frequency per volt is given.
    field_range : (float, float), optional
        Field range (T) to use; by default from the lowest field where the
        oscillations are sampled ``points_per_period`` times to the highest.
    geometry_factor : float, optional
        Width / length of the Hall bar (rho_xx = R_xx W/L) for sigma_xx; 1 by default.
    max_gates : int
        At most this many gate voltages, evenly spread, are analysed (the others
        are NaN); more add little to the straight-line fit and cost time.

    Returns
    -------
    dict
        ``frequency_per_volt`` (T/V) and, with a degeneracy, ``density_per_volt``,
        ``zero_density_voltage``, each with ``_stderr``; per gate ``gate``,
        ``frequency`` (T, NaN where none was resolved), ``density`` (signed,
        m^-2), ``used``; ``warnings``.
    """
    fields, gates, sigma = _conductivity(fan_map, geometry_factor)
    step = _field_step(fields[fields > 0])
    freq = np.full(gates.size, np.nan)
    resolution = np.full(gates.size, np.nan)
    freq_err = np.full(gates.size, np.nan)
    window = np.full((gates.size, 2), np.nan)
    reasons = {}
    # Evenly spread gate voltages beyond max_gates add little to a straight-line fit.
    analysed = np.unique(np.round(np.linspace(0, gates.size - 1,
                                              min(gates.size, max_gates))).astype(int))
    for j in analysed:
        found, why = _gate_frequency(fields, sigma[:, j], step, field_range=field_range,
                                     points_per_period=points_per_period, min_cycles=min_cycles)
        if found is None:
            reasons[why] = reasons.get(why, 0) + 1
            continue
        freq[j], resolution[j] = found["frequency"], found["resolution"]
        window[j] = found["field_min"], found["field_max"]
        # The systematic part is also a per-gate error: how much of it is common is unknown.
        freq_err[j] = math.hypot(found["frequency_stderr"],
                                 FREQUENCY_SYSTEMATIC * found["resolution"])
    warnings = [f"oscillations: no frequency at {count} gate voltages ({why})"
                for why, count in reasons.items()]
    fit, signs, used = _fit_v_clipped(gates, freq, freq_err)
    # The strongest peak may be another harmonic at some gate voltages (split or sharp minima):
    # put every gate on the harmonic that the fan as a whole follows.
    if np.isfinite(fit.slope):
        expected = np.abs(fit.intercept + fit.slope * gates)
        ratio = freq / expected
        order = np.round(np.where(ratio >= 1, ratio, 1 / ratio))
        off = np.isfinite(ratio) & (order >= 2) & (np.abs(np.where(
            ratio >= 1, ratio, 1 / ratio) - order) < 0.15 * order)
        for j in np.flatnonzero(off):
            found, _ = _gate_frequency(fields, sigma[:, j], step, field_range=field_range,
                                       points_per_period=points_per_period,
                                       min_cycles=min_cycles, near=expected[j])
            freq[j], freq_err[j] = ((found["frequency"], math.hypot(
                found["frequency_stderr"], FREQUENCY_SYSTEMATIC * found["resolution"]))
                if found else (np.nan, np.nan))
        if off.any():
            warnings.append(f"oscillations: at {int(off.sum())} gate voltages the strongest peak "
                            "was another harmonic; the peak of the fan's own frequency was used")
            fit, signs, used = _fit_v_clipped(gates, freq, freq_err)
    if fit.points < 3 or not np.isfinite(fit.slope):
        raise InputError("oscillations: fewer than three gate voltages show resolved "
                         "Shubnikov-de Haas oscillations; give a field range or a map with "
                         "finer field steps")
    # Correlated over gate voltages, so not averaged down by the fit: see FREQUENCY_SYSTEMATIC.
    # A common frequency offset cancels between the branches of an ambipolar fan but moves
    # the extrapolated V0 of a one-sided one by offset / slope.
    systematic = FREQUENCY_SYSTEMATIC * np.nanmedian((resolution / freq)[used]) if used.any() \
        else float("nan")
    slope_stderr = math.hypot(fit.slope_stderr, systematic * fit.slope)
    v0_stderr = fit.root_stderr
    if np.unique(signs[used]).size == 1:
        v0_stderr = math.hypot(v0_stderr, systematic * np.nanmean(freq[used]) / fit.slope)
    result = {
        "frequency_per_volt": fit.slope,
        "frequency_per_volt_stderr": slope_stderr,
        "frequency_per_volt_statistical_stderr": fit.slope_stderr,
        "frequency_intercept": fit.intercept,
        "field_range": [float(np.nanmedian(window[used, 0])), float(np.nanmedian(window[used, 1]))]
        if used.any() else [float("nan"), float("nan")],
        "signs": signs,
        "zero_density_voltage": fit.root,
        "zero_density_voltage_stderr": v0_stderr,
        "gate": gates, "frequency": freq, "frequency_stderr": freq_err,
        "frequency_resolution": resolution, "used": used,
        "warnings": warnings,
    }
    _apply_degeneracy(result, degeneracy)
    if not degeneracy:
        warnings.append("oscillations: level degeneracy unknown, so no density; "
                        "give a material or a degeneracy")
    return result


def _apply_degeneracy(result, degeneracy):
    """Densities n = g e B_F / h of an :func:`oscillation_calibration` result, in place."""
    result["degeneracy"] = degeneracy
    if degeneracy:
        result["density_per_volt"] = float(onsager_density(result["frequency_per_volt"],
                                                           degeneracy))
        result["density_per_volt_stderr"] = float(onsager_density(
            result["frequency_per_volt_stderr"], degeneracy))
        result["density"] = result["signs"] * onsager_density(result["frequency"], degeneracy)
    else:
        result["density_per_volt"] = result["density_per_volt_stderr"] = float("nan")
        result["density"] = np.full(result["frequency"].shape, np.nan)


def _fit_v_clipped(x, y, sigma, clip=4.0, rounds=5):
    """:func:`fit_v_shape` (absolute errors) after rejecting points beyond ``clip`` robust sigmas.

    The rejection runs on relative residuals |y - line| / y of fits with equal
    relative weights, not on the stated errors: a peak of the wrong origin (a
    spike train, a beat) can carry a small error when its windows happen to
    agree, and would pull a weighted fit.  The final fit uses ``sigma``.
    """
    kept = np.isfinite(x) & np.isfinite(y) & np.isfinite(sigma)
    relative = np.abs(y)
    fit, signs = fit_v_shape(np.where(kept, x, np.nan), y, relative)
    for _ in range(rounds):
        if not np.isfinite(fit.slope) or kept.sum() < 5:
            break
        resid = (signs * np.abs(y) - fit.intercept - fit.slope * x) / relative
        spread = 1.4826 * np.median(np.abs(resid[kept]))
        new = kept & (np.abs(resid) <= clip * spread) if spread > 0 else kept
        if new.sum() == kept.sum() or new.sum() < 3:
            break
        kept = new
        fit, signs = fit_v_shape(np.where(kept, x, np.nan), y, relative)
    fit, signs = fit_v_shape(np.where(kept, x, np.nan), y, sigma, absolute_sigma=True)
    return fit, signs, kept


# --- Landau index plot -----------------------------------------------------------------------

def _assign_indices(centres, frequency, tolerance):
    """Integer offsets of minima on a grid of period 1/frequency in 1/B; -1 marks off-grid ones."""
    phase = np.mod(centres * frequency, 1.0)
    bins = np.linspace(0, 1, 21)
    counts = np.histogram(phase, bins)[0]
    counts = counts + np.roll(counts, 1) + np.roll(counts, -1)
    mode = bins[np.argmax(counts)] + 0.025
    near = np.abs(np.mod(phase - mode + 0.5, 1.0) - 0.5) <= 0.25
    centre = np.angle(np.mean(np.exp(2j * np.pi * phase[near]))) / (2 * np.pi)
    offset = np.mod(phase - centre + 0.5, 1.0) - 0.5
    on_grid = np.abs(offset) <= tolerance
    return np.where(on_grid, np.round(centres * frequency - centre), -1).astype(int), on_grid


def _minima_fit(b, r, frequency, lo, hi, field_step, *, min_relative_depth=0.05,
                grid_tolerance=0.2):
    """Straight-line fit 1/B_N = (N_rel + c) / B_F of the minima of one trace, or None.

    ``r`` is the conductivity-like trace (:func:`_conductivity`), whose wells are
    symmetric; minima are located in its clipped logarithm, put on a grid of period 1/frequency (off-grid ones, such as split states, are
    dropped) and fitted with weights from the field step, twice (the second
    time on the grid of the fitted frequency).  Returns ``(fit, index,
    on_grid, centres)`` with relative integer indices.
    """
    x, v = osc.uniform_inverse_field(b, _log_window(b, r, lo, hi), lo, hi)
    centres, depths = osc.minima_positions(x, osc.relative_oscillation(x, v), frequency)
    if depths.size:
        centres = centres[depths >= min_relative_depth * depths.max()]
    fit = None
    index, on_grid = np.empty(0, dtype=int), np.zeros(centres.size, dtype=bool)
    for _ in range(2):
        if centres.size < 3:
            break
        index, on_grid = _assign_indices(centres, frequency, grid_tolerance)
        if on_grid.sum() < 3:
            break
        # Field-step error of a minimum in 1/B grows as dB / B^2 (coarser x-steps at low field);
        # minima pulled by a neighbouring split state as it sets in are clipped.
        fit, kept = fit_line_clipped(index[on_grid], centres[on_grid],
                                     field_step * centres[on_grid] ** 2)
        if not fit.slope > 0:
            return None
        on_grid[np.flatnonzero(on_grid)[~kept]] = False
        frequency = 1.0 / fit.slope
    if fit is None:
        return None
    return fit, index, on_grid, centres


def landau_index_plot(fan_map, gate, *, frequency=None, field_range=None, points_per_period=8.0,
                      min_relative_depth=0.05, grid_tolerance=0.2, degeneracy=None,
                      geometry_factor=None):
    """Index plot N versus 1/B_N of the R_xx minima at one gate voltage.

    Minima are located in sigma_xx (from R_xx and R_xy, with
    ``geometry_factor`` = width/length; R_xx/B^2 without a Hall signal), whose
    wells are symmetric about each gap (those of R_xx lean towards lower
    filling), on a log scale; each minimum's centre is the midpoint of its
    half-height flanks.

    Parameters
    ----------
    gate : float
        Gate voltage (V); the nearest column is used.
    frequency : float, optional
        Oscillation frequency (T) for spacing the indices; measured if not given.
    min_relative_depth : float
        Minima shallower than this fraction of the deepest are ignored.
    grid_tolerance : float
        Largest distance (in index units) of a minimum from the grid.

    Returns
    -------
    dict
        ``gate`` (V), ``index`` N (see the module's convention),
        ``inverse_field`` 1/B_N (1/T), ``field`` B_N (T), ``frequency`` (slope
        B_F, T) and ``intercept`` gamma, each with ``_stderr``;
        ``off_grid_inverse_field`` of left-out minima; ``filling`` g (N + gamma)
        when ``degeneracy`` is given; ``warnings``.
    """
    fields, gates, sigma = _conductivity(fan_map, geometry_factor)
    j = int(np.argmin(np.abs(gates - gate)))
    step = _field_step(fields[fields > 0])
    warnings = []
    if frequency is None:
        found, why = _gate_frequency(fields, sigma[:, j], step, field_range=field_range)
        if found is None:
            raise InputError(f"index plot at {gates[j]:g} V: {why}")
        frequency = found["frequency"]
    ok = np.isfinite(sigma[:, j]) & (fields > 0)
    b, r = fields[ok], sigma[ok, j]
    lo, hi = b.min(), b.max()
    if field_range is not None:
        lo, hi = max(lo, field_range[0]), min(hi, field_range[1])
    lo = max(lo, osc.resolvable_field(frequency, step, points_per_period))
    found = _minima_fit(b, r, frequency, lo, hi, step, min_relative_depth=min_relative_depth,
                        grid_tolerance=grid_tolerance)
    if found is None or found[2].sum() < 4:
        count = 0 if found is None else int(found[2].sum())
        raise InputError(f"index plot at {gates[j]:g} V: only {count} minima on one "
                         "grid; at least four are needed")
    fit, index, on_grid, centres = found
    ratio = fit.intercept / fit.slope            # = N_offset + gamma
    ratio_var = (fit.intercept_stderr**2 / fit.slope**2
                 + fit.intercept**2 * fit.slope_stderr**2 / fit.slope**4
                 - 2 * fit.intercept * fit.covariance / fit.slope**3)
    shift = math.floor(ratio + 0.25)             # gamma = ratio - shift in [-1/4, 3/4)
    gamma = ratio - shift
    index = index[on_grid] + shift
    if index.min() < 0:
        warnings.append(f"index plot at {gates[j]:g} V: negative indices; a minimum beyond the "
                        "lowest level was counted")
    x_on = centres[on_grid]
    order = np.argsort(index)
    result = {
        "gate": float(gates[j]),
        "index": index[order],
        "inverse_field": x_on[order],
        "field": 1.0 / x_on[order],
        "frequency": float(1.0 / fit.slope),
        "frequency_stderr": float(fit.slope_stderr / fit.slope**2),
        "intercept": float(gamma),
        "intercept_stderr": float(math.hypot(np.sqrt(max(ratio_var, 0.0)), INDEX_SYSTEMATIC)),
        "off_grid_inverse_field": centres[~on_grid],
        "warnings": warnings,
    }
    if degeneracy:
        result["filling"] = degeneracy * (result["index"] + gamma)
    return result


# --- temperature series: effective mass and quantum lifetime ----------------------------------

def _temperature_of(fan_map):
    for key in ("temperature", "truth_temperature"):
        if key in fan_map.attrs:
            return float(np.asarray(fan_map.attrs[key]).ravel()[0])
    raise InputError(f"map {fan_map.attrs.get('source', '')!s} has no 'temperature' attribute (K); "
                     "pass the temperatures explicitly")


def _envelopes(fan_maps, gate, frequency, lo, hi):
    """Amplitude envelope of the fundamental of R_xx/background - 1 for each map at one gate."""
    out = []
    for fan_map in fan_maps:
        fields, gates, rxx = _traces(fan_map, RXX)
        j = int(np.argmin(np.abs(gates - gate)))
        ok = np.isfinite(rxx[:, j]) & (fields > 0)
        x, v = osc.uniform_inverse_field(fields[ok], rxx[ok, j], lo, hi)
        centres, amp = osc.envelope(x, osc.relative_oscillation(x, v), frequency)
        out.append((centres, amp))
    return out


def _fit_thermal(temps, amps, field):
    """Fit A(T) = A0 X/sinh X for m* (units of m_e) at one field; returns (m, stderr)."""
    def model(t, a0, m):
        return a0 * lk_thermal_damping(t, field, m)
    grid = np.geomspace(1e-3, 10, 400)
    best, best_sse = grid[0], np.inf
    for m in grid:                       # coarse scan with the best A0 for each mass
        shape = lk_thermal_damping(temps, field, m)
        a0 = np.dot(shape, amps) / np.dot(shape, shape)
        sse = np.sum((amps - a0 * shape) ** 2)
        if sse < best_sse:
            best, best_sse = m, sse
    shape = lk_thermal_damping(temps, field, best)
    p0 = [np.dot(shape, amps) / np.dot(shape, shape), best]
    try:
        popt, pcov = optimize.curve_fit(model, temps, amps, p0=p0, bounds=([0, 1e-4], [np.inf, 50]))
    except (RuntimeError, ValueError):
        return float("nan"), float("nan")
    stderr = float(np.sqrt(pcov[1, 1])) if np.all(np.isfinite(pcov)) else float("nan")
    if temps.size <= 2:
        stderr = float("nan")
    return float(popt[1]), stderr


def effective_mass_from_series(fan_maps, *, gate=None, temperatures=None, field_range=None,
                               max_relative_amplitude=0.3, min_filled_levels=5.0, fields=6,
                               points_per_period=8.0):
    """Effective mass from the Lifshitz-Kosevich thermal damping of a temperature series.

    At one gate voltage the amplitude A(B, T) of the fundamental oscillation of
    R_xx / background - 1 is measured (demodulation over one period) at several
    fields in the weak-oscillation regime (A below ``max_relative_amplitude`` at
    the lowest temperature, where the LK form holds); at each field
    A(T) = A0 X/sinh X with X = 2 pi^2 k_B T m* / (hbar e B) gives m*, and
    the masses are averaged.  The lowest-temperature envelope then gives the
    Dingle temperature (:func:`quantum_lifetime`).

    Parameters
    ----------
    fan_maps : sequence of xarray.Dataset
        Maps of the same device at different temperatures.
    temperatures : sequence of float, optional
        Temperatures (K); by default each map's ``temperature`` attribute.
    gate : float, optional
        Gate voltage (V); by default the lowest-density one (of up to 15 tried) that
        allows the fit.
    min_filled_levels : float
        Fields are used only where B_F / B (the number of filled levels) is at least this.
    fields : int
        Number of fields at which the mass is fitted.

    Returns
    -------
    dict
        ``effective_mass`` (m_e) and ``effective_mass_stderr``, per-field
        ``fields`` (T), ``masses``, ``masses_stderr``; ``gate``,
        ``temperatures``, ``frequency`` (T); the Dingle keys of
        :func:`quantum_lifetime`; ``warnings``.
    """
    fan_maps = list(fan_maps)
    if temperatures is None:
        temperatures = [_temperature_of(m) for m in fan_maps]
    temps = np.asarray(temperatures, dtype=float)
    if temps.size != len(fan_maps):
        raise InputError(f"{len(fan_maps)} maps but {temps.size} temperatures")
    if np.unique(temps).size < 3:
        raise InputError("an effective-mass fit needs maps at three or more temperatures")
    order = np.argsort(temps)
    temps, fan_maps = temps[order], [fan_maps[i] for i in order]
    coldest = fan_maps[0]
    b_all, gates, sigma = _conductivity(coldest)
    step = _field_step(b_all[b_all > 0])
    if gate is None:
        # Low densities first: their oscillations are resolved down to lower fields, where
        # they are weak enough for the Lifshitz-Kosevich form.
        candidates = []
        for j in np.linspace(0, gates.size - 1, min(gates.size, 15)).astype(int):
            found, _ = _gate_frequency(b_all, sigma[:, j], step, field_range=field_range)
            if found:
                candidates.append((found["frequency"], gates[j], found))
        if not candidates:
            raise InputError("no gate voltage of the coldest map shows resolved oscillations")
        problems = []
        for _, vg, found in sorted(candidates, key=lambda c: c[0]):
            try:
                return _mass_at_gate(fan_maps, temps, vg, found, step, b_all, field_range,
                                     max_relative_amplitude, fields, points_per_period,
                                     min_filled_levels)
            except InputError as exc:
                problems.append(f"{vg:g} V: {exc}")
        raise InputError("no gate voltage allows an effective-mass fit (" + "; ".join(problems[:3])
                         + "); measure to lower fields or with finer field steps")
    j = int(np.argmin(np.abs(gates - gate)))
    found, why = _gate_frequency(b_all, sigma[:, j], step, field_range=field_range)
    if found is None:
        raise InputError(f"effective mass at {gate:g} V: {why}")
    return _mass_at_gate(fan_maps, temps, gates[j], found, step, b_all, field_range,
                         max_relative_amplitude, fields, points_per_period, min_filled_levels)


def _mass_at_gate(fan_maps, temps, gate, found, step, b_all, field_range,
                  max_relative_amplitude, fields, points_per_period, min_filled_levels):
    """The effective-mass and Dingle fits of :func:`effective_mass_from_series` at one gate."""
    frequency = found["frequency"]
    lo = max(b_all[b_all > 0].min(), osc.resolvable_field(frequency, step, points_per_period))
    hi = b_all.max()
    if field_range is not None:
        lo, hi = max(lo, field_range[0]), min(hi, field_range[1])
    env = _envelopes(fan_maps, gate, frequency, lo, hi)
    x_cold, a_cold = env[0]
    if x_cold.size == 0:
        raise InputError("the field range holds less than one oscillation period")
    warnings = []
    # The Lifshitz-Kosevich form needs many filled levels (B_F / B of them) and weak oscillations.
    weak = ((a_cold <= max_relative_amplitude) & (a_cold >= 0.02 * max_relative_amplitude)
            & (x_cold * frequency >= min_filled_levels))
    if weak.sum() < 2:
        raise InputError("no weak-oscillation field range (relative amplitude below "
                         f"{max_relative_amplitude:g} with at least {min_filled_levels:g} filled "
                         "levels) at the lowest temperature")
    x_weak = x_cold[weak]
    # Sample points one period apart so that the fitted amplitudes are independent.
    spacing = max((x_weak.max() - x_weak.min()) / max(fields - 1, 1), 1.0 / frequency)
    picks = np.arange(x_weak.min(), x_weak.max() + 0.5 * spacing, spacing)
    masses, errors, used_fields = [], [], []
    for xp in picks:
        amps = np.array([np.interp(xp, xc, a) for xc, a in env])
        m, s = _fit_thermal(temps, amps, 1.0 / xp)
        if np.isfinite(m):
            masses.append(m)
            errors.append(s)
            used_fields.append(1.0 / xp)
    masses, errors = np.array(masses), np.array(errors)
    if masses.size == 0:
        raise InputError("the thermal damping fit failed at every field")
    if np.all(np.isfinite(errors)) and np.all(errors > 0):
        mean, stderr = _weighted_mean(masses, errors)
    else:
        mean = float(np.mean(masses))
        stderr = float(np.std(masses, ddof=1) / np.sqrt(masses.size)) if masses.size > 1 \
            else float("nan")
    if temps.max() * LK_COEFFICIENT * mean / max(used_fields) < 1.0:
        warnings.append("effective mass: the damping at the highest temperature is weak "
                        "(X < 1); warmer maps would pin the mass better")
    result = {
        "effective_mass": mean, "effective_mass_stderr": stderr,
        "fields": np.array(used_fields), "masses": masses, "masses_stderr": errors,
        "gate": float(gate), "temperatures": temps, "frequency": float(frequency),
        "warnings": warnings,
    }
    dingle = _dingle_fit(x_cold[weak], a_cold[weak], frequency, mean, stderr, temps[0])
    result.update(dingle)
    return result


def _dingle_fit(x, amplitude, frequency, mass, mass_stderr, temperature):
    """Dingle plot: ln(A / (X/sinh X)) versus 1/B has slope -2 pi^2 k_B T_D m* / (hbar e)."""
    keep = np.concatenate([[True], np.diff(np.floor((x - x[0]) * frequency)) > 0])
    xs, amps = x[keep], amplitude[keep]
    y = np.log(amps / lk_thermal_damping(temperature, 1.0 / xs, mass))
    fit = fit_line(xs, y)
    if fit.points < 3 or not np.isfinite(fit.slope):
        return {"dingle_temperature": float("nan"), "dingle_temperature_stderr": float("nan"),
                "quantum_lifetime": float("nan"), "quantum_lifetime_stderr": float("nan")}
    t_d = -fit.slope / (LK_COEFFICIENT * mass)
    t_d_err = math.hypot(fit.slope_stderr / (LK_COEFFICIENT * mass),
                         t_d * (mass_stderr if np.isfinite(mass_stderr) else 0.0) / mass)
    tau = ph.HBAR / (2 * np.pi * ph.BOLTZMANN * t_d) if t_d > 0 else float("nan")
    return {
        "dingle_temperature": float(t_d), "dingle_temperature_stderr": float(t_d_err),
        "quantum_lifetime": float(tau),
        "quantum_lifetime_stderr": float(abs(tau) * t_d_err / abs(t_d)) if t_d else float("nan"),
        # 2-D theory (Coleridge et al. 1989; from memory): delta rho / rho = 4 D_T D_D cos(...)
        "dingle_prefactor": float(np.exp(fit.intercept)),
    }


def quantum_lifetime(fan_map, *, gate, effective_mass, temperature=None, effective_mass_stderr=0.0,
                     field_range=None, max_relative_amplitude=0.3, points_per_period=8.0):
    """Dingle temperature T_D and quantum lifetime tau_q = hbar / (2 pi k_B T_D) from one map.

    The amplitude envelope of the fundamental at ``gate``, divided by the
    thermal factor X/sinh X at ``temperature`` (K; default the map's
    ``temperature`` attribute), decays as exp(-2 pi^2 k_B T_D m* / (hbar e B)).

    Returns
    -------
    dict
        ``dingle_temperature`` (K), ``quantum_lifetime`` (s), each with
        ``_stderr``, and ``dingle_prefactor`` (4 in the 2-D theory).
    """
    if temperature is None:
        temperature = _temperature_of(fan_map)
    fields, gates, sigma = _conductivity(fan_map)
    j = int(np.argmin(np.abs(gates - gate)))
    step = _field_step(fields[fields > 0])
    found, why = _gate_frequency(fields, sigma[:, j], step, field_range=field_range)
    if found is None:
        raise InputError(f"quantum lifetime at {gate:g} V: {why}")
    lo = max(fields[fields > 0].min(),
             osc.resolvable_field(found["frequency"], step, points_per_period))
    hi = fields.max()
    if field_range is not None:
        lo, hi = max(lo, field_range[0]), min(hi, field_range[1])
    (x, amp), = _envelopes([fan_map], gates[j], found["frequency"], lo, hi)
    weak = (amp <= max_relative_amplitude) & (amp > 0)
    return _dingle_fit(x[weak], amp[weak], found["frequency"], effective_mass,
                       effective_mass_stderr, temperature)


# --- comparison -------------------------------------------------------------------------

def compare_calibrations(estimates, threshold=3.0):
    """Side-by-side table of calibrations and their pairwise agreement.

    Parameters
    ----------
    estimates : list of dict
        Each with ``method`` and any of ``density_per_volt``,
        ``zero_density_voltage`` and their ``_stderr``.
    threshold : float
        Disagreement flag: |difference| > threshold * combined standard error.

    Returns
    -------
    (rows, pairs, disagreements)
        ``pairs`` holds one dict per method pair and quantity with the
        difference, its standard error, the distance in standard errors and
        ``disagree``; ``disagreements`` lists the flagged ones as text.

    Examples
    --------
    >>> rows, pairs, bad = compare_calibrations([
    ...     {"method": "fan", "density_per_volt": 1.00, "density_per_volt_stderr": 0.01},
    ...     {"method": "hall", "density_per_volt": 1.10, "density_per_volt_stderr": 0.01}])
    >>> pairs[0]["sigma"] > 3, bad[0].startswith("density_per_volt")
    (True, True)
    """
    quantities = ("density_per_volt", "zero_density_voltage")
    rows = [{"method": e["method"], **{k: e.get(k, float("nan")) for q in quantities
                                       for k in (q, q + "_stderr")}} for e in estimates]
    pairs, disagreements = [], []
    for i in range(len(rows)):
        for k in range(i + 1, len(rows)):
            a, b = rows[i], rows[k]
            for q in quantities:
                va, vb = a[q], b[q]
                sa, sb = a[q + "_stderr"], b[q + "_stderr"]
                if not (np.isfinite(va) and np.isfinite(vb)):
                    continue
                diff = vb - va
                combined = math.hypot(sa if np.isfinite(sa) else 0.0, sb if np.isfinite(sb) else 0.0)
                sigma = abs(diff) / combined if combined > 0 else (0.0 if diff == 0 else math.inf)
                flag = bool(sigma > threshold)
                pairs.append({"methods": [a["method"], b["method"]], "quantity": q,
                              "difference": diff, "difference_stderr": combined,
                              "sigma": sigma, "disagree": flag})
                if flag:
                    disagreements.append(f"{q}: {a['method']} and {b['method']} differ by "
                                         f"{sigma:.1f} standard errors")
    return rows, pairs, disagreements


# --- everything -----------------------------------------------------------------------

def _resolve_degeneracy(degeneracy, fan_result, material):
    if degeneracy:
        return int(degeneracy), "option"
    if fan_result is not None and fan_result.degeneracy:
        return int(fan_result.degeneracy), "fan fit"
    mat = get_material(material)
    if mat.degeneracy:
        return int(mat.degeneracy), f"material {mat.name}"
    return None, None


def _expected_intercept(fan_result, material):
    phase = fan_result.berry_phase if fan_result is not None else None
    if phase is None:
        phase = get_material(material).berry_phase
    if phase is None:
        return float("nan")
    return 0.5 if phase % 2 == 1 else 0.0


def _pick_index_gates(gates, frequency, used, count):
    """Up to ``count`` gate voltages spread over those with resolved oscillations."""
    valid = np.flatnonzero(np.isfinite(frequency) & used)
    if valid.size == 0:
        return []
    strong = valid[frequency[valid] >= np.quantile(frequency[valid], 0.3)]
    picks = np.unique(strong[np.linspace(0, strong.size - 1, min(count, strong.size)).astype(int)])
    return [float(gates[p]) for p in picks]


def _weighted_mean(values, errors):
    """Mean of estimates that may scatter beyond their errors (random-effects combination).

    The between-estimate variance tau^2 (DerSimonian & Laird, Control. Clin. Trials 7,
    177 (1986)) is added to every error before weighting, so that one estimate with an
    over-small error cannot dominate a scattered set.
    """
    values, errors = np.asarray(values, float), np.asarray(errors, float)
    ok = np.isfinite(values) & np.isfinite(errors) & (errors > 0)
    if not ok.any():
        return float("nan"), float("nan")
    v, s2 = values[ok], errors[ok] ** 2
    w = 1.0 / s2
    mean = np.sum(w * v) / np.sum(w)
    q = np.sum(w * (v - mean) ** 2)
    tau2 = max(0.0, (q - (v.size - 1)) / (np.sum(w) - np.sum(w**2) / np.sum(w))) if v.size > 1 else 0.0
    w = 1.0 / (s2 + tau2)
    mean = float(np.sum(w * v) / np.sum(w))
    return mean, float(np.sqrt(1.0 / np.sum(w)))


def run_crosschecks(fan_map, fan_result=None, *, degeneracy=None, material="auto",
                    hall_field_window=None, geometry_factor=None, oscillation_field_range=None,
                    index_gates=None, index_gate_count=5, temperature_series=None,
                    temperatures=None, effective_mass=None, temperature=None,
                    threshold=3.0):
    """Run every cross-check on one fan map and compare them with the fan fit.

    Each method runs on its own: one that cannot run (no Hall channel, no
    resolved oscillations, ...) leaves its keys NaN and says why in
    ``warnings``, and the others still run.

    Parameters
    ----------
    fan_map : xarray.Dataset
        Fan map (``rxx``, optionally ``rxy``).
    fan_result : FanResult, optional
        The fan fit; its alpha and V0 join the comparison, and its degeneracy
        and Berry phase are used unless given.
    degeneracy : int, optional
        Level degeneracy g for the oscillation density (else from the fan
        fit, the material, or the ratio of the Hall and oscillation densities).
    material : str
        Material preset (for g and the expected index-plot intercept).
    hall_field_window : (float, float), optional
        Field range (T) of the Hall slope; automatic by default.
    geometry_factor : float, optional
        Width / length of the Hall bar between the R_xx probes.
    oscillation_field_range : (float, float), optional
        Field range (T) for the oscillation methods.
    index_gates : list of float, optional
        Gate voltages (V) of the index plots; by default up to
        ``index_gate_count`` spread over the gates with resolved oscillations.
    temperature_series : sequence of xarray.Dataset, optional
        Further maps of the device at other temperatures (``fan_map`` is
        included automatically) for the effective mass.
    temperatures : sequence of float, optional
        Temperatures (K) of ``[fan_map, *temperature_series]``.
    effective_mass, temperature : float, optional
        m* (m_e) and T (K) for a Dingle analysis of ``fan_map`` alone.
    threshold : float
        Disagreement flag in standard errors.

    Returns
    -------
    dict
        JSON-ready (through :func:`fanmap.results.to_jsonable`), SI units; NaN where a
        method could not run:

        - ``hall_density_per_volt``, ``hall_zero_density_voltage`` (each with
          ``_stderr``; V0 referred to the fan fit's first row when it found a drift,
          as measured in ``hall_zero_density_voltage_at_rows``), ``hall_field_window``
          (T), ``mobility`` (median, m^2 V^-1 s^-1), ``mobility_field``,
          ``geometry_factor``, ``hall`` (per gate: ``gate``, ``density``,
          ``density_stderr``, ``used``, ``mobility``);
        - ``oscillation_density_per_volt``, ``oscillation_zero_density_voltage``
          (each with ``_stderr`` and ``_at_rows`` as above),
          ``oscillation_frequency_per_volt`` (T/V, with ``_stderr``),
          ``oscillation_degeneracy`` and ``oscillation_degeneracy_from``,
          ``degeneracy_from_hall_ratio`` (n_H / (e B_F/h)), ``oscillation`` (per
          gate: ``gate``, ``frequency``, ``density``, ``used``);
        - ``index_plot_intercept`` (gamma, with ``_stderr``; combined over the
          plots), ``index_plot_expected_intercept``, ``index_plots`` (one dict of
          :func:`landau_index_plot` per gate voltage) and ``index_plot`` (the one
          with most minima, for a figure: ``index`` N and ``inverse_field`` 1/B_N);
        - ``effective_mass`` (dict of :func:`effective_mass_from_series`, with a
          temperature series) or ``quantum_lifetime`` (dict of
          :func:`quantum_lifetime`, with ``effective_mass``);
        - ``comparison`` (rows: ``method``, ``density_per_volt``,
          ``zero_density_voltage`` and their ``_stderr``), ``comparison_pairs``,
          ``disagreements`` (text), ``agree``, ``threshold_sigma``;
        - ``material``, ``warnings``.
    """
    if fan_result is not None and material == "auto" and fan_result.material:
        material = fan_result.material
    get_material(material)          # unknown names fail before any work
    fan_map, sweep_note = _up_sweeps_only(fan_map)
    nan = float("nan")
    out = {
        "hall_density_per_volt": nan, "hall_density_per_volt_stderr": nan,
        "hall_zero_density_voltage": nan, "hall_zero_density_voltage_stderr": nan,
        "oscillation_density_per_volt": nan, "oscillation_density_per_volt_stderr": nan,
        "oscillation_zero_density_voltage": nan, "oscillation_zero_density_voltage_stderr": nan,
        "oscillation_degeneracy": None, "oscillation_degeneracy_from": None,
        "index_plot_intercept": nan, "index_plot_intercept_stderr": nan,
        "index_plot_expected_intercept": _expected_intercept(fan_result, material),
        "mobility": nan, "geometry_factor": geometry_factor,
        "material": material,
    }
    warnings = [sweep_note] if sweep_note else []

    hall = None
    try:
        hall = hall_calibration(fan_map, field_window=hall_field_window,
                                geometry_factor=geometry_factor)
    except InputError as exc:
        warnings.append(f"Hall density not measured: {exc}")
    if hall is not None:
        warnings += hall.pop("warnings")
        out.update({
            "hall_density_per_volt": hall["density_per_volt"],
            "hall_density_per_volt_stderr": hall["density_per_volt_stderr"],
            "hall_zero_density_voltage": hall["zero_density_voltage"],
            "hall_zero_density_voltage_stderr": hall["zero_density_voltage_stderr"],
            "hall_field_window": hall["field_window"],
            "mobility": hall["mobility_median"], "mobility_field": hall["mobility_field"],
            "geometry_factor": hall["geometry_factor"],
            "hall": {k: hall[k] for k in ("gate", "density", "density_stderr", "used", "mobility")},
        })

    g, g_from = _resolve_degeneracy(degeneracy, fan_result, material)
    oscill = None
    try:
        oscill = oscillation_calibration(fan_map, degeneracy=g, geometry_factor=geometry_factor,
                                         field_range=oscillation_field_range)
    except InputError as exc:
        warnings.append(f"oscillation frequency not measured: {exc}")
    if oscill is not None:
        ratio = _degeneracy_ratio(hall, oscill)
        if ratio is not None:
            out["degeneracy_from_hall_ratio"] = ratio
        whole = int(round(ratio)) if ratio is not None else 0
        if whole >= 1 and abs(ratio - whole) < 0.1 and whole != g:
            if g is not None:
                warnings.append(
                    f"oscillations: the Hall density is {ratio:.3f} times e B_F/h, so the "
                    f"oscillations resolve {whole}-fold levels, not the {g}-fold ones of the "
                    f"{g_from} (spin or valley split where they are sampled); g = {whole} used")
            g, g_from = whole, "ratio of Hall to oscillation density"
            _apply_degeneracy(oscill, g)
        elif g is not None and ratio is not None and abs(ratio - g) > 0.1 * g:
            warnings.append(f"oscillations: the Hall density is {ratio:.2f} times e B_F/h, "
                            f"not the degeneracy {g} used")
        warnings += [w for w in oscill.pop("warnings")
                     if g is None or "degeneracy unknown" not in w]
        out.update({
            "oscillation_density_per_volt": oscill["density_per_volt"],
            "oscillation_density_per_volt_stderr": oscill["density_per_volt_stderr"],
            "oscillation_zero_density_voltage": oscill["zero_density_voltage"],
            "oscillation_zero_density_voltage_stderr": oscill["zero_density_voltage_stderr"],
            "oscillation_frequency_per_volt": oscill["frequency_per_volt"],
            "oscillation_frequency_per_volt_stderr": oscill["frequency_per_volt_stderr"],
            "oscillation_degeneracy": g, "oscillation_degeneracy_from": g_from,
            "oscillation": {k: oscill[k] for k in ("gate", "frequency", "density", "used")},
        })

    if oscill is not None:
        if index_gates is None:
            index_gates = _pick_index_gates(oscill["gate"], oscill["frequency"], oscill["used"],
                                            index_gate_count)
        plots = []
        for vg in index_gates:
            j = int(np.argmin(np.abs(oscill["gate"] - vg)))
            # The fan's own frequency where this gate's peak was rejected as an outlier.
            f = oscill["frequency"][j] if oscill["used"][j] else abs(
                oscill["frequency_intercept"] + oscill["frequency_per_volt"] * oscill["gate"][j])
            try:
                plots.append(landau_index_plot(
                    fan_map, vg, frequency=f if np.isfinite(f) else None,
                    field_range=oscillation_field_range, degeneracy=g,
                    geometry_factor=geometry_factor))
            except InputError as exc:
                warnings.append(f"index plot not drawn: {exc}")
        for p in plots:
            warnings += p.pop("warnings")
        if plots:
            gamma, gamma_err = _weighted_mean([p["intercept"] for p in plots],
                                              [p["intercept_stderr"] for p in plots])
            out["index_plot_intercept"] = gamma
            out["index_plot_intercept_stderr"] = gamma_err
            out["index_plots"] = plots
            out["index_plot"] = max(plots, key=lambda p: p["index"].size)
            expected = out["index_plot_expected_intercept"]
            if np.isfinite(expected) and np.isfinite(gamma_err) and \
                    abs(gamma - expected) > threshold * max(gamma_err, 1e-12):
                warnings.append(f"index plot: intercept {gamma:.3f} ± {gamma_err:.3f} differs "
                                f"from {expected:g} expected for {material}")

    if temperature_series:
        try:
            mass = effective_mass_from_series([fan_map, *temperature_series],
                                              temperatures=temperatures,
                                              field_range=oscillation_field_range)
            warnings += mass.pop("warnings")
            out["effective_mass"] = mass
        except InputError as exc:
            warnings.append(f"effective mass not measured: {exc}")
    elif effective_mass is not None and out.get("index_plot"):
        try:
            out["quantum_lifetime"] = quantum_lifetime(
                fan_map, gate=out["index_plot"]["gate"], effective_mass=effective_mass,
                temperature=temperature, field_range=oscillation_field_range)
        except InputError as exc:
            warnings.append(f"quantum lifetime not measured: {exc}")

    _refer_to_first_row(out, fan_map, fan_result, hall, oscill, warnings)
    estimates = []
    if fan_result is not None:
        estimates.append({
            "method": "fan",
            "density_per_volt": fan_result.density_per_volt,
            "density_per_volt_stderr": fan_result.density_per_volt_stderr,
            "zero_density_voltage": fan_result.zero_density_voltage,
            "zero_density_voltage_stderr": fan_result.zero_density_voltage_stderr,
        })
    for name in ("hall", "oscillation"):
        if np.isfinite(out[f"{name}_density_per_volt"]) or \
                np.isfinite(out[f"{name}_zero_density_voltage"]):
            estimates.append({
                "method": name,
                "density_per_volt": out[f"{name}_density_per_volt"],
                "density_per_volt_stderr": out[f"{name}_density_per_volt_stderr"],
                "zero_density_voltage": out[f"{name}_zero_density_voltage"],
                "zero_density_voltage_stderr": out[f"{name}_zero_density_voltage_stderr"],
            })
    rows, pairs, disagreements = compare_calibrations(estimates, threshold)
    out["comparison"] = rows
    out["comparison_pairs"] = pairs
    out["disagreements"] = disagreements
    out["agree"] = not disagreements
    out["threshold_sigma"] = threshold
    out["warnings"] = warnings
    return out


def _refer_to_first_row(out, fan_map, fan_result, hall, oscill, warnings):
    """Refer the Hall and oscillation V0 to the fan fit's reference row, in place.

    The fan fit reports V0 of the first row swept up and, when it finds them, a
    linear drift over the map and a hysteresis shift of the down sweeps.  Each
    check measures V0 at the mean acquisition time of the rows it used; with
    the fan's drift the two become comparable.  The values as measured stay
    under ``*_zero_density_voltage_at_rows`` with the mean row position.
    """
    extras = (fan_result.extras or {}) if fan_result is not None else {}
    drift = extras.get("zero_density_voltage_drift")
    for name, result in (("hall", hall), ("oscillation", oscill)):
        if result is None:
            continue
        lo, hi = result["field_range"] if name == "oscillation" else result["field_window"]
        position = _mean_row_position(fan_map, lo, hi)
        key = f"{name}_zero_density_voltage"
        out[f"{key}_at_rows"] = out[key]
        out[f"{name}_row_position"] = position
        if drift is not None and np.isfinite(drift) and np.isfinite(position) and drift != 0:
            out[key] = out[key] - drift * position
            warnings.append(f"{name}: V0 measured at mean row position {position:.2f} of the map "
                            f"is referred to the first row with the fan fit's drift "
                            f"{drift:+.3g} V over the map")


def _degeneracy_ratio(hall, oscill):
    """Median of n_H / (e B_F / h) over gates where both methods measured: the degeneracy g."""
    if hall is None:
        return None
    both = hall["used"] & oscill["used"]
    if both.sum() < 3:
        return None
    flux = onsager_density(oscill["frequency"][both], 1)
    return float(np.median(np.abs(hall["density"][both]) / flux))
