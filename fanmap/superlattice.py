"""Superlattice (moire) fans: satellite lines, band fillings, cell density, twist angle.

In a moire device the Landau fan does not converge on one point.  Extra
families of quantum Hall minima start where the superlattice band holds s
carriers per moire cell,

    n = t eB/h + s n0,

with integer Landau slope t and band filling s (the Diophantine relation of
a Landau level in a periodic potential).  :func:`analyse_superlattice` takes
the ridge points the main fan fit keeps (``FanResult.ridge_points``), finds
the straight lines whose B -> 0 intercepts are off the main fan origin, fits
each on its own, and then fits one cell density n0 that makes every
intercept an integer (or, where the data demand it, a simple fraction)
multiple s of n0, jointly with the main fan's lever arm alpha and
zero-density voltage V0.  From n0 follow the full-filling density
n_s = flavours * n0, the moire wavelength and, for graphene moires, the
twist angle.  The function also marks zero-field resistance peaks at band
fillings and reports horizontal features (constant field across a range of
density, at simple fractions of a flux quantum per cell) with the cell area
they imply, without forcing them into the fan.

All quantities are SI (m^-2, m, V, T); angles in degrees where the name
says ``_deg``.
"""

import dataclasses
from dataclasses import dataclass, field
from fractions import Fraction

import numpy as np
from scipy import ndimage, signal

from . import _schema as S
from .errors import InputError, NoFanError
from .physics import (FLUX_QUANTUM_SINGLE_ELECTRON, GRAPHENE_LATTICE_CONSTANT,
                      twist_angle_from_wavelength)
from .results import State

__all__ = ["SuperlatticeFinding", "analyse_superlattice", "resolvable_slope",
           "superlattice_geometry"]

_PHI0 = FLUX_QUANTUM_SINGLE_ELECTRON
#: Presets for which a superlattice is expected; "auto" searches and says what it saw.
_MOIRE_MATERIALS = ("moire-graphene",)
_MAIN_KINDS = ("integer", "broken-symmetry")
#: A satellite line must hold this fraction of the field span of the map ...
_MIN_SPAN_FRACTION = 0.12
#: ... and at least this many points (and this fraction of the rows).
_MIN_POINTS, _MIN_POINTS_FRACTION = 8, 0.06
#: Neighbouring minima closer than this many gate points are not told apart (the ridge
#: finder's smallest separation, :func:`fanmap.ridges.find_row_minima`).
_MIN_SEPARATION_POINTS = 3


@dataclass
class SuperlatticeFinding:
    """What :func:`analyse_superlattice` found on one fan map.

    Attributes
    ----------
    superlattice : dict or None
        The ``FanResult.superlattice`` entry: ``density`` (n_s, full filling),
        ``cell_density`` (n0), ``wavelength``, ``twist_angle_deg``, each with
        ``_stderr``, plus the flavour count, the joint lever arm and
        zero-density voltage and how the uncertainties were obtained.
        None when no superlattice was seen.
    satellites : list of State
        One per satellite line, ``kind="satellite"``, ``filling`` = t (text),
        ``band_filling`` = s.
    zero_field_peaks : list of dict
        Resistance peaks of the lowest-field rows away from neutrality.
    horizontal_features : list of dict
        Minima at constant field across a range of density.
    notes : list of str
        Warnings and the plain-language verdict ("no superlattice seen", ...).
    seen : bool
        Whether a superlattice was seen.
    offset_lines : list of dict
        Every line found off the main fan origin, including any that did not
        fit the lattice (those are not reported as satellites).
    main_fan_lines : list of State
        Lines through the neutrality point that the main fan fit missed
        (found only when that fit took a satellite family for its origin).
    main_states_as_satellites : list of State
        When the main fan fit's origin is a satellite family (the
        superlattice entry ``main_fit_origin_band_filling`` is then non-zero),
        its states relabelled as the satellites (t, s) they are.
    """

    superlattice: dict | None
    satellites: list = field(default_factory=list)
    zero_field_peaks: list = field(default_factory=list)
    horizontal_features: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    seen: bool = False
    offset_lines: list = field(default_factory=list)
    main_fan_lines: list = field(default_factory=list)
    main_states_as_satellites: list = field(default_factory=list)


# --- geometry ------------------------------------------------------------------

def superlattice_geometry(cell_density, cell_density_stderr=0.0, *, flavours=4,
                          lattice_constant=GRAPHENE_LATTICE_CONSTANT):
    """Full-filling density, moire wavelength and twist angle from the cell density n0.

    Parameters
    ----------
    cell_density : float
        n0, one carrier per moire cell (m^-2).
    cell_density_stderr : float
        Standard error of n0, propagated to every output (first order).
    flavours : int
        Carriers per cell at full filling (4 for graphene moires).
    lattice_constant : float or None
        Lattice constant of the twisted layers (m); None skips the twist angle
        (for aligned heterostructures the lattice mismatch enters instead).

    Returns
    -------
    dict
        ``density`` (n_s), ``cell_density``, ``cell_area``, ``wavelength``,
        ``twist_angle_deg`` (exact, lambda = a / (2 sin(theta/2))) and
        ``twist_angle_small_angle_deg`` (lambda = a / theta), each with
        ``_stderr`` where it applies.

    Examples
    --------
    >>> import numpy as np
    >>> from fanmap.physics import moire_cell_density, moire_wavelength
    >>> n0 = moire_cell_density(moire_wavelength(np.radians(1.1)))
    >>> g = superlattice_geometry(n0, 0.01 * n0)
    >>> f"{g['twist_angle_deg']:.4f} +- {g['twist_angle_deg_stderr']:.4f}"
    '1.1000 +- 0.0055'
    >>> f"{g['density'] * 1e-4:.3e}"
    '2.813e+12'
    """
    n0 = float(cell_density)
    sigma = float(cell_density_stderr)
    if not np.isfinite(n0) or n0 <= 0:
        raise InputError(f"cell density must be a positive number of m^-2, got {cell_density!r}")
    wavelength = np.sqrt(2.0 / (np.sqrt(3.0) * n0))
    out = {
        "density": flavours * n0, "density_stderr": flavours * sigma,
        "cell_density": n0, "cell_density_stderr": sigma,
        "cell_area": 1.0 / n0, "cell_area_stderr": sigma / n0**2,
        "wavelength": wavelength, "wavelength_stderr": 0.5 * wavelength * sigma / n0,
        "flavours": int(flavours),
        "lattice_constant": lattice_constant,
        "twist_angle_deg": None, "twist_angle_deg_stderr": None,
        "twist_angle_small_angle_deg": None,
    }
    if lattice_constant is not None:
        if lattice_constant / wavelength > 2:
            raise InputError(f"cell density {n0:.3e} m^-2 is too high for a moire of "
                             f"lattice constant {lattice_constant:.3e} m")
        theta = np.degrees(twist_angle_from_wavelength(wavelength, lattice_constant))
        # d theta / d n0 by a central difference: the exact formula has no neat closed form.
        step = 1e-6 * n0
        up = np.degrees(twist_angle_from_wavelength(np.sqrt(2 / (np.sqrt(3) * (n0 + step))),
                                                    lattice_constant))
        down = np.degrees(twist_angle_from_wavelength(np.sqrt(2 / (np.sqrt(3) * (n0 - step))),
                                                      lattice_constant))
        out["twist_angle_deg"] = float(theta)
        out["twist_angle_deg_stderr"] = float(abs(up - down) / (2 * step) * sigma)
        out["twist_angle_small_angle_deg"] = float(np.degrees(
            twist_angle_from_wavelength(wavelength, lattice_constant, small_angle=True)))
    return {k: (float(v) if isinstance(v, (float, np.floating)) else v) for k, v in out.items()}


def resolvable_slope(gate, field, density_per_volt, flavours=4):
    """Steepest Landau slope |t| of a satellite line that a fan map can resolve.

    A line n = s n0 + t eB/h runs across the gate window (width W) within a field
    range of at most W / (|t| dV/dB), dV/dB = 1 / (alpha h/e) per unit t.  Its minima
    are told apart from the next level of the same family -- at most ``flavours``
    flux quanta away -- only where that level is at least three gate steps away, i.e.
    above B_res = 3 dV (alpha h/e) / flavours.  The search needs a line over a field
    range L (12 % of the map's field span and at least 8 rows, as
    :func:`analyse_superlattice` requires), so |t| <= W / (dV/dB (B_res + L)).

    Parameters
    ----------
    gate : ndarray
        Gate voltages (V).
    field : ndarray
        Field of every row (T).
    density_per_volt : float
        Lever arm alpha (m^-2 V^-1).
    flavours : int
        Largest level degeneracy of a satellite family (4 in graphene moires).

    Returns
    -------
    int

    Examples
    --------
    >>> gate, field = np.linspace(-6, 6, 500), np.linspace(0.03, 8, 250)
    >>> resolvable_slope(gate, field, 6.3e15)
    219
    """
    gate = np.sort(np.unique(np.asarray(gate, dtype=float)))
    b = np.unique(np.abs(np.asarray(field, dtype=float)))
    b = b[b > 0]
    if gate.size < 2 or b.size < 2:
        return 1
    step = float(np.median(np.diff(gate)))
    per_tesla = 1.0 / (abs(float(density_per_volt)) * _PHI0)   # gate slope of t = 1 (V/T)
    b_res = _MIN_SEPARATION_POINTS * step / (max(int(flavours), 1) * per_tesla)
    rows = max(_MIN_POINTS, int(_MIN_POINTS_FRACTION * b.size))
    needed = max(_MIN_SPAN_FRACTION * np.ptp(np.abs(field)), rows * float(np.median(np.diff(b))))
    return max(1, int(np.ptp(gate) / (per_tesla * (b_res + needed))))


# --- the analysis --------------------------------------------------------------

def analyse_superlattice(fan_map, fan_result, *, flavours=4, material="auto",
                         lattice_constant=GRAPHENE_LATTICE_CONSTANT, max_slope=None,
                         max_band_filling=None, bootstrap=300, seed=0):
    """Find satellite fans, fit the moire cell density and derive the twist angle.

    Parameters
    ----------
    fan_map : xarray.Dataset
        Fan map (dims ``field``, ``gate``; ``rxx`` in ohm).
    fan_result : fanmap.results.FanResult
        The main fan fit of the same map; its ``density_per_volt``,
        ``zero_density_voltage``, ``states`` and ``ridge_points`` are used.
    flavours : int
        Carriers per moire cell at full filling (4 for graphene moires; 2 for
        a spin-degenerate single-valley band, e.g. some TMD heterobilayers).
    material : str
        ``"moire-graphene"`` (twist angle of a twisted graphene bilayer),
        ``"auto"`` (search; the twist angle assumes a twisted graphene
        bilayer, and the notes say whether a superlattice was seen) or any
        other preset (searched, but no twist angle is derived).
    lattice_constant : float or None
        Lattice constant for the twist angle (m); None gives no twist angle.
    max_slope : int, optional
        Largest |t| searched for satellite lines (default: the steepest slope the map
        can resolve, see :func:`resolvable_slope`).
    max_band_filling : int, optional
        Largest |s| accepted (default ``flavours``: satellites beyond full filling
        of the first band are rare and too easily explained by chance).
    bootstrap : int
        Bootstrap resamples over lines for the uncertainties (0: covariance only).
    seed : int
        Seed of the bootstrap.

    Returns
    -------
    SuperlatticeFinding
    """
    gate, fields, rxx = _check_map(fan_map)
    alpha = float(fan_result.density_per_volt)
    v0 = float(fan_result.zero_density_voltage)
    if not np.isfinite(alpha) or alpha == 0 or not np.isfinite(v0):
        raise NoFanError("the main fan fit has no finite lever arm and zero-density voltage; "
                         "a superlattice can only be analysed on top of a main fan fit")
    flavours = int(flavours)
    if flavours < 1:
        raise InputError(f"flavours must be a positive integer, got {flavours}")
    max_band_filling = flavours if max_band_filling is None else int(max_band_filling)
    notes = []
    if material not in ("auto",) + _MOIRE_MATERIALS:
        notes.append(f"material {material!r} expects no superlattice; searched anyway, "
                     "no twist angle derived")
        lattice_constant = None

    settings = fan_result.extras.get("settings") or {}
    points = _ridge_points(fan_result)
    if not settings.get("use_conductivity"):
        from .ridges import log_signal

        # the fit's clipped log signal, on the gate axis in increasing order
        order = np.argsort(gate)
        sorted_gate, sorted_rxx = gate[order], rxx[:, order]
        clipped_log, valid = log_signal(sorted_rxx)
        points["gate"] = _reread_clipped_minima(points, sorted_gate, sorted_rxx, clipped_log)
        # (only fanmap.fanfit.fit_fan's ridge finder drops crowded rows; its ridge points
        # carry their map rows and its settings the detection threshold)
        if "min_prominence" in settings and "row" in fan_result.ridge_points:
            points = _add_crowded_rows(points, sorted_gate, fields, clipped_log, valid,
                                       float(settings["min_prominence"]))
    gate_step = float(np.median(np.abs(np.diff(np.sort(np.unique(gate))))))
    scale = _Scale(alpha=alpha, v0=v0, gate_step=gate_step)
    if max_slope is None:
        max_slope = resolvable_slope(gate, fields, alpha, flavours)
    main_states = [(i, st) for i, st in enumerate(fan_result.states)
                   if st.kind != "satellite"]

    onsets = [st.field_min for _, st in main_states if np.isfinite(st.field_min)]
    main_fillings = [_filling_number(st.filling) for _, st in main_states if st.kind == "integer"]
    main_fillings = [abs(int(round(f))) for f in main_fillings if f and float(f).is_integer()]
    rng = np.random.default_rng(seed)
    found = None
    for _ in range(2):
        trial_notes = list(notes)
        lines, lattice = _search_lattice(points, main_states, scale, gate, fields, max_slope,
                                         min(onsets) if onsets else 0.0, flavours,
                                         max_band_filling, main_fillings, trial_notes)
        if lattice is None:
            break
        joint = _joint_fit(points, lines, lattice, main_states, scale, bootstrap, rng)
        found = (lines, lattice, joint, trial_notes)
        # Slopes are read as integers t in units of the main fit's lever arm: when the joint
        # fit moves it enough to misread the steepest lines, search again on the joint scale.
        change = joint["density_per_volt"] / scale.alpha - 1
        steepest = max(abs(line["t"]) for line in lines)
        if lattice["main_band_filling"] or not joint["joint"] or abs(change) * steepest < 0.25:
            break
        scale = _Scale(alpha=joint["density_per_volt"], v0=joint["zero_density_voltage"],
                       gate_step=gate_step)
    if found is not None:
        lines, lattice, joint, notes = found
    else:
        notes = trial_notes
    superlattice = None
    satellites, main_fan_lines, relabelled = [], [], []
    if lattice is not None:
        superlattice = _superlattice_dict(joint, flavours, lattice_constant, lattice, fan_result,
                                          notes)
        if material == "auto" and lattice_constant is not None:
            notes.append("twist angle assumes a twisted graphene bilayer "
                         f"(lattice constant {lattice_constant * 1e9:.3f} nm)")
        satellites = _satellite_states(lines, lattice)
        main_fan_lines = [_state_of(lines[j], "integer", None) for j in lattice["neutral"]]
        if lattice["main_band_filling"]:
            relabelled = [dataclasses.replace(st, kind="satellite",
                                              band_filling=int(lattice["main_band_filling"]))
                          for _, st in main_states if st.kind in _MAIN_KINDS]
    elif lines:
        notes.append(f"{len(lines)} line(s) off the main fan origin, but no consistent set of "
                     "band fillings: not reported as satellites")
    all_slopes = [abs(line["t"]) for line in lines] + main_fillings
    if len(all_slopes) >= 6 and flavours > 1 and np.gcd.reduce(all_slopes) >= 2 * flavours:
        notes.append(f"every line's slope t is a multiple of {int(np.gcd.reduce(all_slopes))}: "
                     "the main fan's lever arm is probably too large by a whole factor (a "
                     "Hall channel or a dielectric prior fixes the scale)")

    cell_density = superlattice["cell_density"] if superlattice else None
    cell_sigma = superlattice["cell_density_stderr"] if superlattice else None
    if superlattice is not None:
        # densities from here on are counted from neutrality as the joint fit found it
        scale = _Scale(alpha=superlattice["density_per_volt"],
                       v0=superlattice["zero_density_voltage"], gate_step=gate_step)
        for line in lines:
            line["intercept_density"] = float(scale.density(line["intercept"]))
            line["intercept_density_stderr"] = abs(scale.alpha) * line["intercept_stderr"]
    peaks = _zero_field_peaks(gate, fields, rxx, scale, cell_density, cell_sigma, flavours,
                              lattice, lines, notes)
    horizontal = _horizontal_features(gate, fields, rxx, scale, cell_density, cell_sigma,
                                      notes)
    if superlattice is not None:
        areas = [h["implied_cell_area"] for h in horizontal if h["flux_per_cell"] is not None]
        if areas:
            superlattice["cell_area_from_horizontal_features"] = float(np.median(areas))
        checked = [p["agrees_with_satellites"] for p in peaks
                   if p["agrees_with_satellites"] is not None]
        superlattice["zero_field_peaks_agree"] = all(checked) if checked else None
        if checked and not all(checked):
            notes.append("a zero-field peak at a satellite band filling does not sit at the "
                         "satellite intercept")

    seen = superlattice is not None
    if seen:
        notes.insert(0, f"superlattice seen: {len(satellites)} satellite line(s) at band "
                        f"fillings s = {', '.join(_fmt_s(s) for s in lattice['band_fillings'])}")
    else:
        notes.insert(0, "no superlattice seen")
    return SuperlatticeFinding(superlattice=superlattice, satellites=satellites,
                               zero_field_peaks=peaks, horizontal_features=horizontal,
                               notes=notes, seen=seen,
                               offset_lines=[_line_summary(line, _line_band_filling(lattice, j))
                                             for j, line in enumerate(lines)],
                               main_fan_lines=main_fan_lines,
                               main_states_as_satellites=relabelled)


def _search_lattice(points, main_states, scale, gate, fields, max_slope, main_onset, flavours,
                    max_band_filling, main_fillings, notes):
    """Offset lines and the lattice of their intercepts on one scale: (lines, lattice or None)."""
    free = _unassigned_points(points, main_states, scale)
    lines = _find_offset_lines(points, free, scale, gate, fields, max_slope, main_onset)
    lattice = _fit_lattice(lines, scale, flavours, max_band_filling, notes,
                           main_origin_hint=_main_origin_hint(main_states, flavours),
                           main_degeneracy=int(np.gcd.reduce(main_fillings))
                           if len(main_fillings) >= 3 else None)
    if lattice is not None:
        _drop_off_step_lines(lattice, lines, flavours, notes)
        if len(lattice["assigned"]) < 2:
            notes.append("fewer than two satellite lines keep their family's Landau-level step: "
                         "not reported as a superlattice")
            lattice = None
    return lines, lattice


# --- input -------------------------------------------------------------------------

@dataclass(frozen=True)
class _Scale:
    alpha: float       # m^-2 V^-1
    v0: float          # V
    gate_step: float   # V

    @property
    def volts_per_tesla(self):
        """Gate slope of a line of unit filling, 1 / (alpha h/e)."""
        return 1.0 / (self.alpha * _PHI0)

    def density(self, gate):
        return self.alpha * (np.asarray(gate) - self.v0)


def _check_map(fan_map):
    for name in (S.FIELD, S.GATE):
        if name not in fan_map.coords:
            raise InputError(f"fan map has no {name!r} coordinate; pass a fan map "
                             "(dims field, gate) as read by fanmap.reading.open_map")
    if S.RXX not in fan_map:
        raise InputError("fan map has no 'rxx' variable; the superlattice analysis needs R_xx")
    rxx = fan_map[S.RXX].transpose(S.FIELD, S.GATE).values.astype(float)
    gate = np.asarray(fan_map[S.GATE].values, dtype=float)
    fields = np.asarray(fan_map[S.FIELD].values, dtype=float)
    if gate.size < 8 or fields.size < 4:
        raise NoFanError(f"fan map of {fields.size} x {gate.size} points is too small "
                         "for a superlattice analysis")
    return gate, fields, rxx


def _ridge_points(fan_result):
    rp = fan_result.ridge_points
    if not rp:
        raise InputError("the fan result carries no ridge points; pass the result of "
                         "fanmap.fanfit.fit_fan, which keeps them in FanResult.ridge_points")
    # lines of the fan are V = V0 + slope |B| (the fitter's convention)
    b = np.abs(np.asarray(rp["field"], dtype=float))
    v = np.asarray(rp["gate"], dtype=float)
    state = np.asarray(rp.get("state", np.full(b.size, -1)), dtype=int)
    weight = np.asarray(rp.get("weight", np.ones(b.size)), dtype=float)
    if "row" in rp:
        row = np.asarray(rp["row"], dtype=int)
    else:
        row = np.unique(b, return_inverse=True)[1]
    if not (b.size == v.size == state.size == weight.size == row.size):
        raise InputError("ridge points of the fan result have arrays of different lengths")
    ok = np.isfinite(b) & np.isfinite(v) & np.isfinite(weight) & (weight > 0) & (b != 0)
    b, v, state, weight, row = b[ok], v[ok], state[ok], weight[ok], row[ok]
    median = float(np.median(weight)) if weight.size else 1.0
    return {"field": b, "gate": v, "state": state, "weight": weight / median, "row": row,
            "raw_weight_median": median}


def _add_crowded_rows(points, gate, fields, logr, valid, min_prominence):
    """Ridge points of the rows the fan fit dropped as crowded, added as free points.

    The fan fit drops a row whose minima sit, on median, closer than twice the smallest
    separation (aliases of unresolved levels would spoil its origin vote).  At low field a
    moire map crowds the remote-band and flat-band levels that closely while each dip is
    still several points from the next and deep: steep satellite lines live only there.
    Those rows are read again with only the smallest separation (three points) enforced;
    their minima vote for satellite lines only, never for the main fan.  ``gate`` is
    increasing and ``logr``, ``valid`` are the fit's log signal on it.
    """
    from .ridges import find_row_minima, valley_strength

    valley = valley_strength(logr)
    kept = set(np.unique(points["row"]).tolist())
    relaxed = find_row_minima(logr, valid, gate, fields, min_prominence=min_prominence,
                              valley=valley, crowded_separation=0)
    new = ~np.isin(relaxed.row, list(kept)) & np.isfinite(relaxed.weight) & (relaxed.weight > 0)
    if not new.any():
        return points
    scale = points["raw_weight_median"]
    return {"field": np.r_[points["field"], relaxed.field[new]],
            "gate": np.r_[points["gate"], relaxed.gate[new]],
            "state": np.r_[points["state"], np.full(int(new.sum()), -1)],
            "weight": np.r_[points["weight"], relaxed.weight[new] / scale],
            "row": np.r_[points["row"], relaxed.row[new]], "raw_weight_median": scale}


def _reread_clipped_minima(points, gate, rxx, clipped_log):
    """Ridge positions re-read on the raw R_xx where the fit's log signal clipped the dip.

    The fan fit clips log R_xx at a floor of a few times the noise and places a
    flat-bottomed dip at the midpoint of its walls.  Satellite and neutrality lines of a
    moire map run beside band-insulator peaks, whose steep walls pull that midpoint by
    several gate steps.  Where the raw dip under the clipped run has one clear bottom
    (values falling towards it from both ends), the vertex of the parabola through its
    lowest three raw points replaces the midpoint; noise on a true zero plateau has no
    such shape and keeps the fit's position.  ``gate`` is increasing, ``rxx`` and
    ``clipped_log`` (the fit's log signal) are on it.
    """
    raw = _log_resistance(rxx)
    clipped = np.isfinite(raw) & (clipped_log > raw + 1e-9)
    out = points["gate"].copy()
    rows = points["row"]
    ok = (rows >= 0) & (rows < rxx.shape[0])
    col = np.clip(np.rint(np.interp(out, gate, np.arange(gate.size))).astype(int), 0, gate.size - 1)
    for k in np.flatnonzero(ok):
        i, c = rows[k], col[k]
        # the clipped run at the point, or at a neighbour of it
        if clipped[i, c]:
            lo = c
        elif c > 0 and clipped[i, c - 1]:
            lo = c - 1
        elif c < gate.size - 1 and clipped[i, c + 1]:
            lo = c + 1
        else:
            continue
        hi = lo
        while lo > 0 and clipped[i, lo - 1]:
            lo -= 1
        while hi < gate.size - 1 and clipped[i, hi + 1]:
            hi += 1
        seg = raw[i, lo:hi + 1]
        if not np.isfinite(seg).all():
            continue
        j = int(np.argmin(seg))
        # one clear bottom: falling towards it from both ends of the run
        if np.any(np.diff(seg[:j + 1]) > 0) or np.any(np.diff(seg[j:]) < 0):
            continue
        j += lo
        if j <= 0 or j >= gate.size - 1 or not np.isfinite(raw[i, j - 1:j + 2]).all():
            continue
        offset = np.clip(_parabolic_offset(raw[i], j), -0.5, 0.5)
        out[k] = float(np.interp(j + offset, np.arange(gate.size), gate))
    return out


def _unassigned_points(points, main_states, scale):
    """Mask of ridge points that belong to no main-fan line."""
    free = np.ones(points["field"].size, bool)
    tol = 2.0 * scale.gate_step
    main_index = {i for i, _ in main_states}
    free &= ~np.isin(points["state"], list(main_index))
    for _, st in main_states:
        if np.isfinite(st.slope) and np.isfinite(st.intercept):
            free &= np.abs(points["gate"] - (st.intercept + st.slope * points["field"])) > tol
    return free


def _main_origin_hint(main_states, flavours):
    """Band filling at which the main fan itself seems to start (0: neutrality).

    A fan from neutrality of a graphene moire is ambipolar with levels of the
    full flavour degeneracy.  One whose lines run (almost) all to one side
    starts at a band edge, s = +-flavours, and runs into the remote band; one
    whose slopes step by flavours/2 starts at half filling (twofold levels).
    """
    fillings = [_filling_number(st.filling) for _, st in main_states if st.kind == "integer"]
    fillings = [int(round(f)) for f in fillings if f and float(f).is_integer()]
    up = sum(f > 0 for f in fillings)
    down = sum(f < 0 for f in fillings)
    if max(up, down) >= 2 and 4 * min(up, down) <= max(up, down):
        return flavours if up > down else -flavours
    if len(fillings) >= 3 and flavours % 2 == 0 and \
            np.gcd.reduce(np.abs(fillings)) == flavours // 2:
        return flavours // 2
    return 0


# --- satellite lines -----------------------------------------------------------------

def _find_offset_lines(points, free, scale, gate, fields, max_slope, main_onset=0.0):
    """Straight lines with integer Landau slope t whose intercept is off the fan origin.

    Every free ridge point votes, for each trial t, for the B = 0 intercept
    u = V - t B / (alpha h/e) of the line of slope t through it; points on
    one line pile up in one bin, points of other lines smear out.  The
    strongest pile is fitted as a free line, its points claimed, and so on.
    ``main_onset`` is the lowest field at which the main fan resolves a line.
    """
    b, v, row = points["field"], points["gate"], points["row"]
    k = scale.volts_per_tesla
    step = scale.gate_step
    tol = 2.0 * step
    row_fields = np.unique(np.abs(fields[fields != 0]))
    n_rows = row_fields.size
    span = np.ptp(np.abs(fields))
    min_points = max(_MIN_POINTS, int(_MIN_POINTS_FRACTION * n_rows))
    min_span = _MIN_SPAN_FRACTION * span
    origin_tol = 4.0 * step

    gate_lo, gate_hi = np.min(gate), np.max(gate)
    b_max = np.max(np.abs(fields))
    candidates = []
    idx = np.flatnonzero(free)
    if idx.size < min_points:
        return []
    for t in range(-max_slope, max_slope + 1):
        if t == 0:
            continue
        u = v[idx] - t * k * b[idx]
        # bins over every intercept a line of slope t crossing the window can have, so that
        # the median count is the background even when few points are free
        reach = t * k * b_max
        edges = np.arange(gate_lo - max(reach, 0) - 2 * step, gate_hi - min(reach, 0) + 3 * step,
                          step)
        if edges.size < 4:
            continue
        counts, _ = np.histogram(u, edges)
        # pairs of neighbouring bins hold a line's points (scatter below a step) over the
        # least background: short steep lines among the crowded remote-band levels stand out
        window = counts[:-1] + counts[1:]
        background = np.median(window)
        height = max(min_points, background + 5 * np.sqrt(background + 1))
        peaks, _ = signal.find_peaks(window, height=height, distance=2)
        for p in peaks:
            near = np.abs(u - edges[p + 1]) <= step   # the points of the two bins
            candidates.append((window[p], t, float(np.median(u[near]))))
    candidates.sort(key=lambda c: -c[0])

    claimed = ~free
    lines = []
    for _, t, u0 in candidates:
        line = _grow_line(b, v, row, points["weight"], claimed, t, u0, k, tol, min_points)
        if line is None or line["points"] < min_points:
            continue
        # the vote only seeds the line: among neighbouring integers (steep lines pile up
        # for t +- 1 too) the free fit of its points decides
        if round(line["slope_filling"]) != 0:
            t = int(round(line["slope_filling"]))
        # A line seen only far from B = 0 is a long extrapolation (often a chain of
        # crossings), unless the gate window cuts it off at its low-field end.
        start = line["intercept"] + line["slope"] * line["field_min"]
        cut_by_window = min(abs(start - gate_lo), abs(start - gate_hi)) < 3 * step
        if np.ptp(b[line["members"]]) < max(min_span, 0 if cut_by_window else
                                            0.4 * line["field_max"]):
            continue
        # a real line is resolved on most rows it crosses; crossings of other lines that
        # happen to align are sparse (and, among the many steep trial slopes, often just
        # above the smallest point count)
        rows_spanned = np.sum((row_fields >= line["field_min"]) & (row_fields <= line["field_max"]))
        if line["points"] <= 0.5 * rows_spanned:
            continue
        # quantised slopes: a background valley drifts with a slope some 10 % off an integer
        slope_tol = max(0.05 + 0.03 * abs(t), 3 * line["slope_filling_stderr"])
        off_slope = abs(line["slope_filling"] - t)
        if off_slope > slope_tol and not (
                off_slope < 0.5 and off_slope <= 2 * slope_tol
                and _held_slope_rms(b, v, line, t * k) <= 0.6 * step):
            # (a short line whose low-field end sits a step off, on a sloping background,
            # misses the integer by more; the line of integer slope then still describes
            # its points as well as a straight line must)
            continue
        if abs(line["intercept"] - scale.v0) < origin_tol:
            continue
        if line["rms"] > 0.6 * step:
            continue   # not straight: a background valley or a chain of crossings
        if np.percentile(b[line["members"]], 20) < 0.25 * main_onset:
            continue   # a minimum that persists to far below where any Landau level is
            # resolved is a valley between zero-field peaks, not a Landau gap
        line["t"] = t
        line["intercept_density"] = scale.alpha * (line["intercept"] - scale.v0)
        line["intercept_density_stderr"] = abs(scale.alpha) * line["intercept_stderr"]
        claimed[line["members"]] = True
        lines.append(line)
    return lines


def _held_slope_rms(b, v, line, slope):
    """RMS gate residual (V) of a line's points about the best line of the given slope."""
    m = line["members"]
    resid = v[m] - slope * b[m]
    return float(np.sqrt(np.mean((resid - np.mean(resid)) ** 2)))


def _grow_line(b, v, row, weight, claimed, t, u0, k, tol, min_points=3):
    """Collect the points of one line (one per field row) and fit it freely.

    The vote fixes the slope t; the intercept is first refined with that slope
    held, so that a neighbouring line merging with this one at low field cannot
    drag the start of the fit away.  Then slope and intercept are fitted with
    outliers clipped, and the window shrinks to the line's own scatter.  A seed
    with fewer than ``min_points`` free points near it is given up at once: the
    fit only ever keeps a subset of them.
    """

    def members_near(intercept, slope, window):
        resid = v - (intercept + slope * b)
        near = np.flatnonzero(~claimed & (np.abs(resid) < window))
        order = np.lexsort((np.abs(resid[near]), row[near]))   # closest point of each row
        near = near[order]
        keep = np.ones(near.size, bool)
        keep[1:] = row[near][1:] != row[near][:-1]
        return near[keep], resid

    slope, intercept = t * k, u0
    members, resid = members_near(intercept, slope, tol)
    if members.size < 3:
        return None
    intercept += np.median(resid[members])
    members, resid = members_near(intercept, slope, tol)
    if members.size < max(min_points, 3):
        return None
    # Tukey-biweight reweighting: points of a merging neighbour get zero weight
    robust = np.ones(members.size)
    for _ in range(6):
        res = resid[members]
        sigma = max(1.4826 * np.median(np.abs(res - np.median(res))), 0.05 * tol)
        z = res / (4.685 * sigma)
        robust = np.where(np.abs(z) < 1, (1 - z**2) ** 2, 0.0)
        if np.count_nonzero(robust) < 3:
            return None
        fit = _line_fit(b[members], v[members], weight[members] * robust + 1e-300)
        if fit is None:
            return None
        intercept, slope = fit[0], fit[1]
        resid = v - (intercept + slope * b)
    members = members[robust > 0]
    if members.size < 3 or np.unique(b[members]).size < 3:
        return None
    fit = _line_fit(b[members], v[members], weight[members])
    if fit is None:
        return None
    a, s, cov, rms = fit
    return {"members": members, "points": int(members.size), "intercept": float(a),
            "slope": float(s), "intercept_stderr": float(np.sqrt(cov[0, 0])),
            "slope_stderr": float(np.sqrt(cov[1, 1])), "rms": float(rms),
            "slope_filling": float(s / k), "slope_filling_stderr": float(np.sqrt(cov[1, 1]) / k),
            "field_min": float(np.min(np.abs(b[members]))),
            "field_max": float(np.max(np.abs(b[members]))),
            "weight": float(weight[members].sum())}


def _line_fit(x, y, w):
    """Weighted straight-line fit y = a + s x with covariance (scaled by the residuals).

    Closed form about the weighted mean of x (called tens of thousands of times
    per moire map; a general least-squares solver took most of the search).
    """
    total = np.sum(w)
    if not total > 0:
        return None
    x_mean, y_mean = np.sum(w * x) / total, np.sum(w * y) / total
    dx = x - x_mean
    sxx = np.sum(w * dx * dx)
    if not sxx > 1e-12 * total * max(np.max(np.abs(x)), 1e-300) ** 2:
        return None     # all points at one x: no slope
    slope = np.sum(w * dx * (y - y_mean)) / sxx
    intercept = y_mean - slope * x_mean
    resid = y - (intercept + slope * x)
    s2 = np.sum(w * resid**2) / max(x.size - 2, 1)
    var_slope = s2 / sxx
    cov = np.array([[s2 / total + x_mean**2 * var_slope, -x_mean * var_slope],
                    [-x_mean * var_slope, var_slope]])
    return intercept, slope, cov, float(np.sqrt(np.mean(resid**2)))


# --- the lattice: one n0 for every intercept --------------------------------------------

def _families(lines, scale):
    """Group lines whose intercepts coincide (lines from one band filling)."""
    order = sorted(range(len(lines)), key=lambda j: lines[j]["intercept_density"])
    families = []
    for j in order:
        c = lines[j]["intercept_density"]
        tol = _intercept_tol(lines[j], scale)
        if families and abs(c - families[-1]["density"]) < max(tol, families[-1]["tol"]):
            fam = families[-1]
            fam["lines"].append(j)
            w = np.array([1 / _intercept_tol(lines[i], scale) ** 2 for i in fam["lines"]])
            cs = np.array([lines[i]["intercept_density"] for i in fam["lines"]])
            fam["density"] = float(np.sum(w * cs) / w.sum())
            fam["tol"] = float(max(1 / np.sqrt(w.sum()) * 1.5, 1.5 * abs(scale.alpha) * scale.gate_step))
        else:
            families.append({"density": c, "tol": tol, "lines": [j]})
    return families


def _intercept_tol(line, scale):
    """Tolerance on a line's intercept density: 3 sigma, at least 1.5 gate steps."""
    return max(3 * line["intercept_density_stderr"], 1.5 * abs(scale.alpha) * scale.gate_step)


def _fit_lattice(lines, scale, flavours, max_band_filling, notes, main_origin_hint=0,
                 main_degeneracy=None):
    """Choose n0 (and s per family) so that every intercept is a multiple s n0.

    The real-number GCD is ambiguous by integer factors; the outermost
    family is taken to be full filling, |s| = flavours, as is usual in
    graphene moires (band insulators give the strongest satellites), unless
    its Landau levels are twofold (half filling, full filling outside the
    window).  The main fan fit may also have taken a satellite family for
    its origin: ``main_origin_hint`` is the band filling the main fan itself
    suggests (0: neutrality; +-flavours: a one-sided fan running from a band
    edge; +-flavours/2: twofold levels).  Then neutrality is the centre of
    the symmetric pattern of families.  Only when all this fails does the
    plain GCD (largest n0 that fits) decide.
    """
    if len(lines) < 2:
        return None
    families = _families(lines, scale)
    floor = 1.5 * abs(scale.alpha) * scale.gate_step
    densities = [fam["density"] for fam in families] + [0.0]
    # every family in turn, outermost first, may be the one at full filling: a stray short
    # line beyond the true outermost family then costs only the points it fails to explain
    outward = sorted({abs(fam["density"]) for fam in families if abs(fam["density"]) > floor},
                     reverse=True)
    hypotheses = [(0.0, outer / k, k) for outer in outward for k in range(1, max_band_filling + 1)]
    if not hypotheses:
        return None
    low, high = min(densities), max(densities)
    if abs(0.5 * (low + high)) > floor:
        for edge in sorted({flavours, max(flavours // 2, 1)}, reverse=True):
            hypotheses.append((0.5 * (low + high), (high - low) / (2 * edge), None))

    evaluated = []
    for origin, n0, k in hypotheses:
        main_s = 0
        if origin != 0.0:
            main_s = _band_filling(-origin / n0, floor / n0, fractions=False)
            if main_s is None or abs(main_s) > max_band_filling:
                continue
        fills, explained, sides = [], 0.0, set()
        for fam in families:
            # a fractional filling needs a family of two or more lines to be believed
            s = _band_filling((fam["density"] - origin) / n0, fam["tol"] / n0,
                              fractions=len(fam["lines"]) >= 2)
            if s is not None and abs(s) > max_band_filling:
                s = None
            fills.append(s)
            if s is not None:
                explained += sum(lines[j]["points"] for j in fam["lines"]) * (
                    1.0 if isinstance(s, int) else 0.5)
                if abs(s) == flavours:
                    sides.add(np.sign(s))
        if abs(main_s) == flavours:
            sides.add(np.sign(main_s))
        evaluated.append({"origin": origin, "n0": n0, "k": k, "fills": fills,
                          "main_s": main_s, "explained": explained, "full_sides": len(sides)})
    through_origin = [h for h in evaluated if h["origin"] == 0.0]
    best = max(h["explained"] for h in through_origin)
    if best <= 0:
        return None
    # Landau levels of a graphene moire keep the flavour degeneracy at neutrality and full
    # filling and are twofold at half filling: readings that contradict the slope steps of
    # the families (and of the main fan) give way to those that do not.
    for h in evaluated:
        h["mismatch"] = _degeneracy_mismatch(h, families, lines, flavours, main_degeneracy)
    fewest = min(h["mismatch"] for h in evaluated if h["explained"] >= 0.999 * best)
    pool = [h for h in through_origin if h["explained"] >= 0.999 * best
            and h["mismatch"] == fewest]
    shifted = [h for h in evaluated if h["origin"] != 0.0 and h["explained"] >= 0.999 * best
               and h["mismatch"] == fewest]
    if not pool and shifted:
        notes.append("the slope steps of the families place neutrality away from the main "
                     "fan's origin")

    chosen = None
    if main_origin_hint:
        hinted = [h for h in shifted if h["main_s"] == main_origin_hint
                  or (abs(main_origin_hint) < flavours and abs(h["main_s"]) == abs(main_origin_hint))]
        if hinted:
            chosen = hinted[0]
    if chosen is None:
        chosen = next((h for h in pool if h["k"] == flavours), None)
        if chosen is None and not pool and shifted:
            chosen = shifted[0]
        half = next((h for h in pool if h["k"] == flavours // 2), None) if flavours > 1 else None
        # the outermost families taken as half filling must show twofold levels themselves
        if half is not None and (chosen is None or _twofold_at(chosen, flavours, families, lines)) \
                and _twofold_at(half, flavours // 2, families, lines):
            chosen = half
            notes.append(f"the outermost satellite family has twofold Landau levels, as at "
                         f"half filling, so it is taken as |s| = {flavours // 2}; full filling "
                         "lies outside the gate window")
    full = [h for h in shifted if h["full_sides"] == 2]
    if chosen is None:
        chosen = full[0] if full else None
    if chosen is None:
        chosen = pool[0] if pool else max(evaluated, key=lambda h: h["explained"])
        notes.append(f"the outermost satellite family is not at |s| = {flavours} (full "
                     "filling); n0 taken as the largest cell density that makes every "
                     "intercept a multiple of it: check against the zero-field peaks")
    if chosen["main_s"]:
        notes.append(f"the main fan fit's origin is the s = {chosen['main_s']:+d} satellite "
                     "family, not charge neutrality: the band fillings are counted from the "
                     "centre of the symmetric pattern of families, and the superlattice "
                     "zero_density_voltage is the neutrality point")
    assigned, neutral = {}, []
    for fam, s in zip(families, chosen["fills"]):
        if s is None:
            notes.append(f"line family at n = {fam['density'] * 1e-4:.3e} cm^-2 is not at a "
                         "band filling of the lattice: not reported as satellites")
        elif s == 0:
            neutral.extend(fam["lines"])   # lines of the true main fan, missed by its fit
        else:
            for j in fam["lines"]:
                assigned[j] = s
    if neutral:
        notes.append(f"{len(neutral)} line(s) through the neutrality point were missed by the "
                     "main fan fit")
    if any(not isinstance(s, int) for s in assigned.values()):
        notes.append("fractional band fillings needed to explain some intercepts")
    if len(assigned) < 2:
        return None
    fillings = set(assigned.values()) | ({chosen["main_s"]} if chosen["main_s"] else set())
    return {"cell_density_guess": chosen["n0"], "origin_density": chosen["origin"],
            "main_band_filling": chosen["main_s"], "assigned": assigned, "neutral": neutral,
            "band_fillings": sorted(fillings, key=float), "families": families}


def _degeneracy_mismatch(hypothesis, families, lines, flavours, main_degeneracy):
    """Families whose slope step contradicts their band filling under this reading."""
    if flavours % 2:
        return 0

    def contradicts(s, step):
        if step is None or s is None or not isinstance(s, int):
            return False
        if abs(s) == flavours // 2:
            return step % flavours == 0          # fourfold steps at half filling
        if s == 0 or abs(s) == flavours:
            return step == flavours // 2         # twofold steps at neutrality or full filling
        return False

    count = 0
    for fam, s in zip(families, hypothesis["fills"]):
        slopes = [abs(lines[j]["t"]) for j in fam["lines"]]
        step = int(np.gcd.reduce(slopes)) if len(slopes) >= 3 else None
        count += contradicts(s, step)
    count += contradicts(hypothesis["main_s"], main_degeneracy)
    return count


def _drop_off_step_lines(lattice, lines, flavours, notes):
    """Drop satellites whose slope t breaks their family's Landau-level step (in place).

    Levels from neutrality and full filling (|s| = 0, flavours) keep the whole flavour
    degeneracy, those from half filling half of it (common practice for graphene moires):
    a line whose t is no multiple of that step is a chance alignment, mostly among the
    steep lines where families crowd.
    """
    if flavours % 2:
        return
    dropped = []
    for j, s in list(lattice["assigned"].items()):
        a = abs(float(s))
        step = flavours if a in (0, flavours) else flavours // 2 if a == flavours / 2 else None
        if step and int(lines[j]["t"]) % step:
            dropped.append(f"({int(lines[j]['t'])}, {_fmt_s(s)})")
            del lattice["assigned"][j]
    if dropped:
        notes.append(f"{len(dropped)} line(s) left out: their slope breaks the Landau-level step "
                     f"of their band filling {', '.join(dropped)}")


def _twofold_at(hypothesis, level, families, lines):
    """Whether every family this reading puts at |s| = level has twofold Landau levels.

    Landau levels from full filling (into the remote band) keep the full
    flavour degeneracy, those from half filling in a graphene moire are
    twofold (Cao et al., Nature 556, 80 (2018), from memory); the spacing of
    the slopes t of a family (their greatest common divisor) measures it.
    """
    at_level = [fam for fam, s in zip(families, hypothesis["fills"])
                if s is not None and abs(s) == level]
    if not at_level:
        return False
    for fam in at_level:
        slopes = [abs(lines[j]["t"]) for j in fam["lines"]]
        if len(slopes) < 3 or np.gcd.reduce(slopes) != 2:
            return False
    return True


def _band_filling(x, tol, fractions=True):
    """Nearest integer to x within tol, else the nearest half or third, else None."""
    s = round(x)
    if abs(x - s) <= tol:
        return int(s)
    for q in ((2, 3) if fractions else ()):
        frac = Fraction(round(x * q), q)
        if frac.denominator == q and abs(x - float(frac)) <= tol and abs(x - s) > 3 * tol:
            return frac
    return None


def _joint_fit(points, lines, lattice, main_states, scale, bootstrap, rng):
    """Joint weighted least squares of V0, 1/alpha and n0/alpha.

    Every ridge point of a main-fan state (filling nu) and of a satellite
    (t, s) satisfies V = V0 + (1/alpha) (t B e/h) + (n0/alpha) s, which is
    linear in the three parameters; the covariance comes from the fit, a
    bootstrap over whole lines checks it (points along a line are correlated).
    Without main-fan points the main fit's V0 and alpha are held fixed.
    """
    b, v, w = points["field"], points["gate"], points["weight"]
    groups = []   # (kind, design rows, targets, weights), one per line
    main_s = float(lattice["main_band_filling"])
    inside = _inside_neutrality_fan(v, lattice, scale)
    for i, st in main_states:
        nu = _filling_number(st.filling)
        sel = (points["state"] == i) & inside
        if st.kind not in _MAIN_KINDS or not nu or sel.sum() < 3:
            continue
        X = np.column_stack([np.ones(sel.sum()), nu * b[sel] / _PHI0, np.full(sel.sum(), main_s)])
        groups.append(("main", X, v[sel], w[sel]))
    for j in lattice["neutral"]:
        m = lines[j]["members"]
        X = np.column_stack([np.ones(m.size), lines[j]["t"] * b[m] / _PHI0, np.zeros(m.size)])
        groups.append(("main", X, v[m], w[m]))
    for j, s in lattice["assigned"].items():
        m = lines[j]["members"]
        X = np.column_stack([np.ones(m.size), lines[j]["t"] * b[m] / _PHI0,
                             np.full(m.size, float(s))])
        groups.append(("satellite", X, v[m], w[m]))
    main_idx = [i for i, g in enumerate(groups) if g[0] == "main"]
    sat_idx = [i for i, g in enumerate(groups) if g[0] == "satellite"]
    joint = len(main_idx) > 0
    free = [0, 1, 2] if joint else [2]
    fixed = np.array([scale.v0 + lattice["origin_density"] / scale.alpha, 1.0 / scale.alpha, 0.0])
    groups = _biweight(groups, free, fixed, scale.gate_step)
    main_idx = [i for i, g in enumerate(groups) if g[0] == "main"]
    sat_idx = [i for i, g in enumerate(groups) if g[0] == "satellite"]
    A_parts = [(g[1] * g[3][:, None]).T @ g[1] for g in groups]
    y_parts = [(g[1] * g[3][:, None]).T @ g[2] for g in groups]

    def solve(sel):
        A = sum(A_parts[i] for i in sel)
        y = sum(y_parts[i] for i in sel)
        theta = fixed.copy()
        rhs = y[free] - A[np.ix_(free, [k for k in range(3) if k not in free])] @ \
            fixed[[k for k in range(3) if k not in free]]
        theta[free] = np.linalg.solve(A[np.ix_(free, free)], rhs)
        return theta, A

    theta, A = solve(range(len(groups)))
    X = np.concatenate([g[1] for g in groups])
    y = np.concatenate([g[2] for g in groups])
    wt = np.concatenate([g[3] for g in groups])
    resid = y - X @ theta
    s2 = np.sum(wt * resid**2) / max(y.size - len(free), 1)
    cov = np.zeros((3, 3))
    cov[np.ix_(free, free)] = np.linalg.inv(A[np.ix_(free, free)]) * s2
    v0, beta, gamma = theta
    grad_n0 = np.array([0.0, -gamma / beta**2, 1.0 / beta])
    grad_alpha = np.array([0.0, -1.0 / beta**2, 0.0])
    result = {"cell_density": float(gamma / beta),
              "cell_density_fit_stderr": float(np.sqrt(grad_n0 @ cov @ grad_n0)),
              "density_per_volt": float(1.0 / beta),
              "density_per_volt_stderr": float(np.sqrt(grad_alpha @ cov @ grad_alpha))
              if joint else float("nan"),
              "zero_density_voltage": float(v0),
              "zero_density_voltage_stderr": float(np.sqrt(cov[0, 0])) if joint else float("nan"),
              "joint": joint, "rms_residual_gate": float(np.sqrt(np.mean(resid**2))),
              "points": int(y.size)}

    boot = []
    if len(sat_idx) >= 3:
        for _ in range(int(bootstrap)):
            sel = list(rng.choice(sat_idx, len(sat_idx)))
            if main_idx:
                sel += list(rng.choice(main_idx, len(main_idx)))
            try:
                th, _ = solve(sel)
            except np.linalg.LinAlgError:
                continue
            boot.append((th[2] / th[1], 1.0 / th[1], th[0]))
    boot = np.asarray(boot).reshape(-1, 3)
    enough = boot.shape[0] >= 20
    result["cell_density_bootstrap_stderr"] = (float(np.std(boot[:, 0], ddof=1)) if enough
                                               else float("nan"))
    result["density_per_volt_covariance_stderr"] = result["density_per_volt_stderr"]
    result["zero_density_voltage_covariance_stderr"] = result["zero_density_voltage_stderr"]
    result["density_per_volt_bootstrap_stderr"] = (float(np.std(boot[:, 1], ddof=1))
                                                   if enough and joint else float("nan"))
    result["zero_density_voltage_bootstrap_stderr"] = (float(np.std(boot[:, 2], ddof=1))
                                                       if enough and joint else float("nan"))
    statistical = result["cell_density_fit_stderr"]
    result["stderr_from"] = "covariance"
    if result["cell_density_bootstrap_stderr"] > statistical:
        statistical = result["cell_density_bootstrap_stderr"]
        result["stderr_from"] = "bootstrap over lines"
    # Lines bend where levels cross and minima are pulled by neighbours; that shifts all lines
    # alike, which neither the covariance nor a bootstrap sees.  The scatter of the lines'
    # own slopes about their integers, and of each family's own n0, measures it.
    slope_dev = [lines[j]["slope_filling"] / lines[j]["t"] - 1 for j in lattice["assigned"]]
    per_family = {}
    for j, s in lattice["assigned"].items():
        per_family.setdefault(float(s), []).append(
            (lines[j]["intercept"] - v0) / (beta * float(s)))
    family_n0 = [np.median(v) for v in per_family.values()]
    systematic_rel = (np.std(slope_dev, ddof=1) / np.sqrt(len(slope_dev))
                      if len(slope_dev) >= 3 else 0.0)
    family_spread = (np.std(family_n0, ddof=1) / np.sqrt(len(family_n0))
                     if len(family_n0) >= 2 else 0.0)
    result["cell_density_systematic_stderr"] = float(np.hypot(
        systematic_rel * result["cell_density"], family_spread))
    # Systematic errors of alpha and V0: the slope scatter above, and how far independent
    # halves of the points (low against high field, either side of each fan) disagree
    # beyond their statistical errors.
    alpha_sys, v0_sys = systematic_rel * result["density_per_volt"], 0.0
    if joint:
        xi = np.concatenate([g[1][:, 1] for g in groups])
        b_all = xi * _PHI0
        for mask in (np.abs(b_all) >= np.median(np.abs(b_all)), xi > 0):
            halves = []
            for part in (mask, ~mask):
                if part.sum() < 20:
                    break
                Ap = (X[part] * wt[part, None]).T @ X[part]
                try:
                    th = np.linalg.solve(Ap, (X[part] * wt[part, None]).T @ y[part])
                    cp = np.linalg.inv(Ap) * s2
                except np.linalg.LinAlgError:
                    break
                halves.append((np.array([1.0 / th[1], th[0]]),
                               np.array([np.sqrt(cp[1, 1]) / th[1] ** 2, np.sqrt(cp[0, 0])])))
            if len(halves) < 2:
                continue
            (h1, e1), (h2, e2) = halves
            excess = np.sqrt(np.maximum((h1 - h2) ** 2 - e1**2 - e2**2, 0.0))
            alpha_sys = max(alpha_sys, float(excess[0]))
            v0_sys = max(v0_sys, float(excess[1]))
    result["density_per_volt_systematic"] = float(alpha_sys)
    result["zero_density_voltage_systematic"] = float(v0_sys)
    result["cell_density_stderr"] = float(np.hypot(statistical,
                                                   result["cell_density_systematic_stderr"]))
    result["stderr_from"] += " and line scatter"
    return result


def _inside_neutrality_fan(gate, lattice, scale):
    """Mask of gate voltages between the innermost satellite families on either side.

    The Landau levels of the neutrality fan live in the band between neutrality and the
    first gap at a band filling; beyond it the minima belong to the satellite families, so
    main-fan points there are chance alignments with the main fit's lines (two gate steps
    of margin).  Only when the main fit's origin is neutrality.
    """
    mask = np.ones(np.shape(gate), bool)
    if lattice["main_band_filling"]:
        return mask
    n0 = lattice["cell_density_guess"]
    fills = [float(s) for s in lattice["assigned"].values()]
    density = scale.density(gate)
    margin = 2 * abs(scale.alpha) * scale.gate_step
    above = [s for s in fills if s > 0]
    below = [s for s in fills if s < 0]
    if above:
        mask &= density < min(above) * n0 - margin
    if below:
        mask &= density > max(below) * n0 + margin
    return mask


def _biweight(groups, free, fixed, gate_step, rounds=6):
    """Tukey-biweight the points of the joint fit: bent line ends and stray points drop out."""
    X = np.concatenate([g[1] for g in groups])
    y = np.concatenate([g[2] for g in groups])
    w = np.concatenate([g[3] for g in groups])
    held = [k for k in range(3) if k not in free]
    robust = np.ones(y.size)
    for _ in range(rounds):
        ww = w * robust
        A = (X * ww[:, None]).T @ X
        rhs = (X * ww[:, None]).T @ y
        theta = fixed.copy()
        try:
            theta[free] = np.linalg.solve(A[np.ix_(free, free)],
                                          rhs[free] - A[np.ix_(free, held)] @ fixed[held])
        except np.linalg.LinAlgError:
            return groups
        resid = y - X @ theta
        sigma = max(1.4826 * np.median(np.abs(resid - np.median(resid))), 0.1 * gate_step)
        z = resid / (4.685 * sigma)
        robust = np.where(np.abs(z) < 1, (1 - z**2) ** 2, 0.0)
    out, start = [], 0
    for kind, Xg, yg, wg in groups:
        r = robust[start:start + yg.size]
        start += yg.size
        keep = r > 0
        if keep.sum() >= 3:
            out.append((kind, Xg[keep], yg[keep], wg[keep] * r[keep]))
    return out


def _filling_number(text):
    try:
        return float(Fraction(str(text)))
    except (ValueError, ZeroDivisionError):
        return None


def _superlattice_dict(joint, flavours, lattice_constant, lattice, fan_result, notes):
    geometry = superlattice_geometry(joint["cell_density"], joint["cell_density_stderr"],
                                     flavours=flavours, lattice_constant=lattice_constant)
    out = dict(geometry)
    out.update({
        "band_fillings": [_jsonable_s(s) for s in lattice["band_fillings"]],
        "main_fit_origin_band_filling": int(lattice["main_band_filling"]),
        "satellite_count": len(lattice["assigned"]),
        "cell_density_fit_stderr": joint["cell_density_fit_stderr"],
        "cell_density_bootstrap_stderr": joint["cell_density_bootstrap_stderr"],
        "cell_density_systematic_stderr": joint["cell_density_systematic_stderr"],
        "stderr_from": joint["stderr_from"],
        "joint_fit": joint["joint"],
        "density_per_volt": joint["density_per_volt"],
        "density_per_volt_stderr": joint["density_per_volt_stderr"],
        "zero_density_voltage": joint["zero_density_voltage"],
        "zero_density_voltage_stderr": joint["zero_density_voltage_stderr"],
        **{key: joint[key] for key in (
            "density_per_volt_covariance_stderr", "density_per_volt_bootstrap_stderr",
            "density_per_volt_systematic", "zero_density_voltage_covariance_stderr",
            "zero_density_voltage_bootstrap_stderr", "zero_density_voltage_systematic")},
        "rms_residual_gate": joint["rms_residual_gate"],
        "full_filling_gate_voltages": [
            joint["zero_density_voltage"] - geometry["density"] / joint["density_per_volt"],
            joint["zero_density_voltage"] + geometry["density"] / joint["density_per_volt"]],
    })
    if geometry["twist_angle_deg"] is not None:
        diff = abs(geometry["twist_angle_deg"] - geometry["twist_angle_small_angle_deg"])
        if diff > geometry["twist_angle_deg_stderr"]:
            notes.append(f"small-angle and exact twist formulas differ by {diff:.2g} deg, more "
                         "than the uncertainty: the exact value is reported")
    if fan_result.scale_from == "ambiguous":
        notes.append("the main fan's absolute scale is ambiguous: the superlattice densities and "
                     "twist angle scale with the lever arm chosen and are only as sure as it is")
    if joint["joint"]:
        a0, sa = fan_result.density_per_volt, fan_result.density_per_volt_stderr
        sj = joint["density_per_volt_stderr"]
        sigma = np.hypot(sa if np.isfinite(sa) else 0.0, sj)
        if sigma > 0 and abs(joint["density_per_volt"] - a0) > 3 * sigma:
            notes.append("the joint fit with the satellites moves the lever arm by more than "
                         "3 standard errors from the main fan fit")
    return out


def _satellite_states(lines, lattice):
    order = sorted(lattice["assigned"], key=lambda j: (float(lattice["assigned"][j]),
                                                       lines[j]["t"]))
    return [_state_of(lines[j], "satellite", _jsonable_s(lattice["assigned"][j])) for j in order]


def _state_of(line, kind, band_filling):
    return State(filling=str(line["t"]), kind=kind, slope=line["slope"],
                 intercept=line["intercept"], points=line["points"], field_min=line["field_min"],
                 field_max=line["field_max"], filling_value=line["slope_filling"],
                 filling_stderr=line["slope_filling_stderr"], onset_field=line["field_min"],
                 band_filling=band_filling)


def _line_summary(line, band_filling):
    return {"t": line["t"], "band_filling": band_filling, "slope": line["slope"],
            "intercept": line["intercept"], "intercept_density": line["intercept_density"],
            "intercept_density_stderr": line["intercept_density_stderr"],
            "slope_filling": line["slope_filling"],
            "slope_filling_stderr": line["slope_filling_stderr"], "points": line["points"],
            "field_min": line["field_min"], "field_max": line["field_max"]}


def _line_band_filling(lattice, j):
    if lattice is None:
        return None
    if j in lattice["assigned"]:
        return _jsonable_s(lattice["assigned"][j])
    return 0 if j in lattice["neutral"] else None


def _jsonable_s(s):
    return int(s) if isinstance(s, int) else float(s)


def _fmt_s(s):
    return f"{s:+d}" if isinstance(s, int) else f"{'+' if s > 0 else ''}{s}"


# --- zero-field peaks ----------------------------------------------------------------

def _log_resistance(rxx):
    """log10 |R_xx|, with non-positive and missing values as NaN."""
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.log10(np.abs(rxx))
    out[~np.isfinite(out)] = np.nan
    return out


def _zero_field_peaks(gate, fields, rxx, scale, n0, n0_sigma, flavours, lattice, lines, notes):
    """Resistance peaks of the lowest-field rows, away from neutrality, at band fillings."""
    absb = np.abs(fields)
    if absb.min() > 0.5:
        notes.append(f"no zero-field row: band-filling peaks taken from the lowest field, "
                     f"{absb.min():.2f} T")
    low_profile = _low_field_profile(gate, fields, rxx)
    if low_profile is None:
        return []
    g, profile, smooth, field_used = low_profile
    noise = 1.4826 * np.median(np.abs(np.diff(profile) - np.median(np.diff(profile)))) / np.sqrt(2)
    prominence = max(8 * noise, 0.02)
    idx, props = signal.find_peaks(smooth, prominence=prominence)
    if idx.size == 0:
        return []
    widths = signal.peak_widths(smooth, idx, rel_height=0.5)[0]
    step = scale.gate_step
    family_density = {}
    if lattice is not None:
        for j, s in lattice["assigned"].items():
            family_density.setdefault(s, []).append(float(scale.density(lines[j]["intercept"])))
    peaks = []
    for p, prom, width in zip(idx, props["prominences"], widths):
        centre = g[p] + _parabolic_offset(smooth, p) * step
        density = scale.density(centre)
        half_width = 0.5 * width * step * abs(scale.alpha)
        if abs(centre - scale.v0) < max(4 * step, 0.5 * width * step):
            continue   # the neutrality peak itself
        entry = {"gate": float(centre), "density": float(density), "band_filling": None,
                 "kind": "not at a band filling", "agrees_with_satellites": None,
                 "prominence_decades": float(prom), "half_width_density": float(half_width),
                 "field": field_used}
        if n0 is not None:
            x = density / n0
            s = round(x)
            tol = max(half_width, 3 * abs(scale.alpha) * step, 3 * abs(s) * (n0_sigma or 0.0))
            if s != 0 and abs(density - s * n0) <= tol:
                entry["band_filling"] = int(s)
                entry["kind"] = ("full-filling insulator" if abs(s) == flavours else
                                 "correlated (partial filling)" if abs(s) < flavours else
                                 "beyond full filling")
                seen_at = family_density.get(s)
                # None: no satellite family starts at this filling to compare with
                entry["agrees_with_satellites"] = (
                    None if not seen_at else bool(abs(density - np.mean(seen_at)) <= tol))
        peaks.append(entry)
    if n0 is None and len(peaks) >= 2:
        dens = np.array([p["density"] for p in peaks])
        pairs = [(a, b) for a in dens[dens > 0] for b in dens[dens < 0]
                 if abs(a + b) < 0.1 * abs(a)]
        if pairs:
            notes.append("zero-field peaks sit symmetrically about neutrality at "
                         f"|n| = {abs(pairs[0][0]) * 1e-4:.3e} cm^-2, as at superlattice band "
                         "fillings, but no satellite lines were found")
    if n0 is not None:
        beyond = [p for p in peaks if abs(p["density"]) > 1.1 * flavours * n0
                  and p["band_filling"] is not None]
        if beyond:
            notes.append("a zero-field peak lies beyond the outermost satellite family: "
                         "full filling may be higher than assumed")
    return peaks


def _low_field_profile(gate, fields, rxx):
    """(gate, log10 R, smoothed log10 R, field) of the lowest-field rows, sorted by gate."""
    absb = np.abs(fields)
    low = absb <= absb.min() + max(0.02 * np.ptp(absb), 1e-9)
    order = np.argsort(gate)
    g = gate[order]
    with np.errstate(all="ignore"):
        profile = np.nanmean(_log_resistance(rxx[low][:, order]), axis=0)
    good = np.isfinite(profile)
    if good.sum() < 8:
        return None
    profile = np.interp(g, g[good], profile[good])
    return g, profile, ndimage.gaussian_filter1d(profile, 1.0), float(absb[low].mean())


def _parabolic_offset(y, i):
    """Sub-sample offset of the extremum of y at index i from a parabola through 3 points."""
    if i <= 0 or i >= y.size - 1:
        return 0.0
    den = y[i - 1] - 2 * y[i] + y[i + 1]
    return float(0.5 * (y[i - 1] - y[i + 1]) / den) if den != 0 else 0.0


# --- horizontal features ---------------------------------------------------------------

def _horizontal_features(gate, fields, rxx, scale, n0, n0_sigma, notes, max_denominator=12):
    """Minima at one field across a wide range of gate voltage.

    Brown-Zak-type features sit at rational flux per moire cell,
    B (1/n0) = (p/q) h/e, and so are periodic in 1/B; they are not fan lines.
    Each column is detrended along the field, each field row is searched for
    long runs of columns with a local minimum along the field at that row.
    """
    order_b = np.argsort(fields)
    order_g = np.argsort(gate)
    b = fields[order_b]
    z = _log_resistance(rxx[order_b][:, order_g])
    if b.size < 7:
        return []
    column_median = np.nanmedian(z, axis=0)
    z = np.where(np.isfinite(z), z, column_median[None, :])
    z = np.where(np.isfinite(z), z, np.nanmedian(z) if np.isfinite(z).any() else 0.0)
    resid = z - ndimage.gaussian_filter1d(z, 3.0, axis=0, mode="nearest")
    noise = 1.4826 * np.median(np.abs(resid - np.median(resid, axis=0)), axis=0) + 1e-12
    minimum = np.zeros_like(resid, bool)
    minimum[1:-1] = ((resid[1:-1] < resid[:-2]) & (resid[1:-1] <= resid[2:])
                     & (resid[1:-1] < -2.0 * noise))
    min_run = max(10, int(0.2 * gate.size))
    found = []
    for i in range(1, b.size - 1):
        row = ndimage.binary_closing(minimum[i], structure=np.ones(3))
        labels, count = ndimage.label(row)
        for lab in range(1, count + 1):
            cols = np.flatnonzero(labels == lab)
            if cols.size < min_run:
                continue
            depth = float(-np.mean(resid[i, cols]))
            found.append((i, cols[0], cols[-1], depth))
    # the same feature may light up two neighbouring rows: keep the deeper one
    found.sort(key=lambda f: -f[3])
    kept = []
    for f in found:
        if not any(abs(f[0] - k[0]) <= 1 and f[1] <= k[2] and k[1] <= f[2] for k in kept):
            kept.append(f)
    # runs on one row interrupted by, e.g., the neutrality peak are one feature
    kept.sort(key=lambda f: (f[0], f[1]))
    merged = []
    for f in kept:
        if merged and abs(f[0] - merged[-1][0]) <= 1:
            i, lo, hi, depth, pieces = merged[-1]
            merged[-1] = (i, min(lo, f[1]), max(hi, f[2]), max(depth, f[3]),
                          pieces + [(f[1], f[2])])
        else:
            merged.append((f[0], f[1], f[2], f[3], [(f[1], f[2])]))
    kept = merged
    g = gate[order_g]
    features = []
    for i, lo, hi, depth, pieces in kept:
        prof = np.mean(resid[i - 1:i + 2, lo:hi + 1], axis=1)
        di = _parabolic_offset(prof, 1)
        bf = float(b[i] + di * (b[min(i + 1, b.size - 1)] - b[i - 1]) / 2)
        features.append({"field": bf, "gate_min": float(g[lo]), "gate_max": float(g[hi]),
                         "density_min": float(scale.density(g[lo])),
                         "density_max": float(scale.density(g[hi])),
                         "gate_ranges": [[float(g[p]), float(g[q])] for p, q in pieces],
                         "depth_decades": depth, "flux_per_cell": None,
                         "implied_cell_area": None,
                         "field_step": float(np.median(np.diff(b)))})
    if not features:
        return []
    if n0 is not None:
        for f in features:
            flux = abs(f["field"]) / (_PHI0 * n0)
            tol = (f["field_step"] / (_PHI0 * n0) + flux * (n0_sigma or 0.0) / n0) * 1.5
            frac = min(_flux_fractions(max_denominator), key=lambda x: abs(flux - float(x)))
            if abs(flux - float(frac)) <= tol:
                f["flux_per_cell"] = f"{frac.numerator}/{frac.denominator}"
                f["implied_cell_area"] = float(frac) * _PHI0 / abs(f["field"])
    else:
        period = _inverse_field_period(features)
        if period is not None:
            for f in features:
                q = round(1.0 / (abs(f["field"]) * period))
                f["flux_per_cell"] = f"1/{q}"
                f["implied_cell_area"] = _PHI0 / (q * abs(f["field"]))
            notes.append(f"{len(features)} horizontal features periodic in 1/B imply a moire "
                         f"cell of {_PHI0 * period * 1e18:.1f} nm^2 (not fan lines)")
    unexplained = [f for f in features if f["flux_per_cell"] is None]
    if unexplained:
        notes.append(f"{len(unexplained)} horizontal feature(s) at no simple flux per cell "
                     "(could be an instrument artefact of a single sweep)")
    return features


def _flux_fractions(max_denominator):
    """Flux per cell where Brown-Zak features are expected: 1/q, and p/q for q <= 4."""
    fracs = {Fraction(1, q) for q in range(1, max_denominator + 1)}
    fracs |= {Fraction(p, q) for q in range(2, 5) for p in range(1, 2 * q)}
    return sorted(fracs)


def _inverse_field_period(features):
    """Largest period P in 1/B such that every feature sits at 1/B = q P (q integer)."""
    if len(features) < 2:
        return None
    inv = np.array([1.0 / abs(f["field"]) for f in features])
    tol = np.array([f["field_step"] / f["field"] ** 2 for f in features])
    base = inv.min()
    for q in range(1, 13):
        period = base / q
        ratio = inv / period
        if np.all(np.abs(ratio - np.round(ratio)) * period <= 1.5 * tol):
            return float(period)
    return None
