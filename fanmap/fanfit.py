"""Fit a Landau fan: lever arm, zero-density voltage and the name of every state.

:func:`fit_fan` runs the whole analysis of one fan map:

1. ridges (:mod:`fanmap.ridges`): sub-pixel row minima of log R_xx weighted by depth,
   prominence and a Hessian valley measure, linked into traces;
2. the global vote for the fan origin and the slopes of its lines;
3. a joint weighted least-squares fit of every assigned minimum to
   V = V0(row) + s_j |B| with free slopes (the origin may drift linearly with the row
   index and differ between sweep directions), iterated with robust weights;
   lines that do not pass through the common origin (moiré satellites) are set aside;
4. naming (:mod:`fanmap.naming`): main sequence, Berry phase, absolute scale;
5. the final joint fit with the filling of every line fixed, n = alpha (V - V0),
   nu = n h / (e B): shared alpha and V0; covariance errors and a bootstrap over traces,
   and a systematic part measured on the map (independent halves: low/high field,
   electron/hole side, sweep directions; the sub-pixel refinement; the lines' scatter);
   optionally the Dirac quantum-capacitance term, kept only when an F-test says it helps.
6. for moire maps (material "moire-graphene" or "auto") the origin is the centre of the
   symmetric set of fans, and the joint fit of all families
   (:func:`fanmap.superlattice.analyse_superlattice`) gives alpha, V0 and the twist angle.
"""

import numpy as np
from scipy import stats
from scipy.signal import find_peaks as _find_peaks

from . import __version__
from . import _schema as S
from .errors import FanmapError, InputError, NoFanError
from .materials import get_material
from .naming import name_lines
from .physics import (ELEMENTARY_CHARGE, FLUX_QUANTUM_SINGLE_ELECTRON, HBAR, VON_KLITZING,
                      lever_arm_from_dielectric)
from .results import FanResult, State
from .ridges import (Minima, filling_profile, find_row_minima, link_traces, log_signal,
                     trace_table, valley_strength, vote_origin, vote_slopes)

__all__ = ["fit_fan"]

_MIN_LINE_POINTS = 8
#: A fan line must cross at least this many gate points over the field range; minima that
#: stay put are the flanks of vertical (insulating) ridges, not states.
_MIN_SWEEP_POINTS = 10


# --- input -----------------------------------------------------------------------

def _arrays(fan_map):
    """Gate (increasing), field, R_xx, R_xy and sweep direction as plain arrays."""
    if S.RXX not in getattr(fan_map, "data_vars", {}):
        raise InputError("the map has no 'rxx' variable; name the longitudinal resistance with "
                         "the reading option --signal")
    rxx = fan_map[S.RXX]
    if set(rxx.dims) != {S.FIELD, S.GATE}:
        raise InputError(f"rxx has dimensions {rxx.dims}; a fan map needs ('field', 'gate') "
                         "(gate maps are analysed with 'fanmap gates')")
    rxx = rxx.transpose(S.FIELD, S.GATE)
    gate = np.asarray(fan_map[S.GATE].values, float)
    field = np.asarray(fan_map[S.FIELD].values, float)
    r = np.asarray(rxx.values, float)
    rxy = None
    if S.RXY in fan_map.data_vars:
        rxy = np.asarray(fan_map[S.RXY].transpose(S.FIELD, S.GATE).values, float)
    if gate.size >= 2 and gate[0] > gate[-1]:
        gate, r = gate[::-1], r[:, ::-1]
        rxy = rxy[:, ::-1] if rxy is not None else None
    direction = None
    if S.SWEEP_DIRECTION in fan_map.coords:
        direction = np.sign(np.asarray(fan_map[S.SWEEP_DIRECTION].values, float))
        if direction.shape != field.shape or np.unique(direction[direction != 0]).size < 2:
            direction = None
    if not np.isfinite(r).any():
        raise InputError("rxx is NaN everywhere; check the file and the --signal option")
    if gate.size < 10:
        raise InputError(f"the map has only {gate.size} gate points; a fan needs at least 10")
    rows = np.isfinite(r).sum(axis=1) >= 10
    if rows.sum() < 3:
        raise InputError(f"the map has {rows.sum()} usable field rows; a fan needs gate sweeps "
                         "at several fields (is this a single sweep or a gate map?)")
    if not np.all(np.diff(gate) > 0):
        raise InputError("the gate coordinate is not monotonic; regrid the map first "
                         "(fanmap.prepare)")
    return gate, field, r, rxy, direction


# --- linear least squares --------------------------------------------------------

def _wls(X, y, w, robust=True, iterations=4):
    """Weighted least squares with Tukey-biweight reweighting.

    Returns (beta, covariance scaled by the residual variance, final weights, residuals).
    """
    weights = w.copy()
    # The robust scale comes from the points that take part: with points of zero prior
    # weight (lines set aside) in the median it drops to zero and rejects every point.
    active = w > 0
    for _ in range(iterations if robust else 1):
        sw = np.sqrt(weights)
        beta, *_ = np.linalg.lstsq(X * sw[:, None], y * sw, rcond=None)
        resid = y - X @ beta
        if not robust or not active.any():
            break
        scale = 1.4826 * np.median(np.abs(resid * np.sqrt(w))[active]) + 1e-300
        u = np.clip(resid * np.sqrt(w) / (4.685 * scale), -2.0, 2.0)
        weights = w * np.where(np.abs(u) < 1, (1 - u**2) ** 2, 0.0)
    sw = np.sqrt(weights)
    A = X * sw[:, None]
    dof = max(int((weights > 0).sum()) - X.shape[1], 1)
    chi2 = float(np.sum(weights * resid**2) / dof)
    try:
        cov = np.linalg.inv(A.T @ A) * chi2
    except np.linalg.LinAlgError:
        cov = np.full((X.shape[1], X.shape[1]), np.nan)
    return beta, cov, weights, resid


def _nuisance_columns(rows, n_rows, direction, use_drift, use_hysteresis):
    """Columns of the origin's nuisance terms: V0(row) = V0 + drift r/(R-1) + shift [down sweep].

    V0 is therefore the origin of the first row (in acquisition order) swept up; ``drift``
    is its change over the whole map and ``shift`` the hysteresis of the down sweeps.
    """
    cols, names = [], []
    if use_drift:
        cols.append(rows / max(n_rows - 1, 1))
        names.append("drift")
    if use_hysteresis:
        cols.append((direction[rows] < 0).astype(float))
        names.append("hysteresis")
    return cols, names


# --- assignment of minima to lines --------------------------------------------------

def _tolerances(slopes, field, step, residual_scale, min_spacing_px=4.0):
    """Assignment tolerance (V) of every line at every field, and whether it is resolved there.

    A minimum belongs to a line if it lies within 35 % of the distance to the neighbouring
    line and within max(3 points, 5 residual sigma); where the line and its neighbour are
    closer than ``min_spacing_px`` points the line is not resolved (field-dependent
    resolvability cut) and gives no points.
    """
    order = np.argsort(slopes)
    neighbour = np.full(slopes.size, np.inf)
    if slopes.size > 1:
        gaps = np.diff(slopes[order])
        neighbour[order] = np.minimum(np.r_[np.inf, gaps], np.r_[gaps, np.inf])
    spacing = np.abs(np.asarray(field))[:, None] * neighbour[None, :]
    tolerance = np.minimum(0.35 * spacing, max(3 * step, 5 * residual_scale))
    return tolerance, spacing >= min_spacing_px * step


def _assign(minima, origin_rows, slopes, tolerance, resolved):
    """Index of the line each minimum belongs to (-1: none); see :func:`_tolerances`."""
    if slopes.size == 0:
        return np.full(len(minima), -1)
    distance = minima.gate[:, None] - origin_rows[minima.row][:, None] \
        - slopes[None, :] * minima.field[:, None]
    nearest = np.argmin(np.abs(distance), axis=1)
    offset = np.abs(distance[np.arange(len(minima)), nearest])
    ok = (offset < tolerance[minima.row, nearest]) & resolved[minima.row, nearest]
    return np.where(ok, nearest, -1)


def _significant_lines(minima, line, slopes, origin_rows, field, gate, tolerance, resolved,
                       band):
    """Whether each line holds clearly more minima than chance would put near it.

    Counted are the line's minima within ``band`` (V) of it.  Chance: in each row where
    the line is inside the window and resolved, within the field range its minima span,
    the row's minima density times the width of that band.  A line needs at least twice the chance count, four standard deviations
    above it, and eight points.
    """
    n_rows = field.size
    density = np.bincount(minima.row, minlength=n_rows) / gate.size
    step = float(np.median(np.diff(gate)))
    assigned = line >= 0
    offset = np.abs(minima.gate - origin_rows[minima.row]
                    - slopes[np.maximum(line, 0)] * minima.field)
    close = assigned & (offset < np.minimum(band, tolerance[minima.row, np.maximum(line, 0)]))
    observed = np.bincount(line[close], minlength=slopes.size)
    # Chance is counted over the field range the line's own minima span.
    b = np.abs(field)
    lowest = np.full(slopes.size, np.inf)
    highest = np.full(slopes.size, -np.inf)
    np.minimum.at(lowest, line[close], minima.field[close])
    np.maximum.at(highest, line[close], minima.field[close])
    position = origin_rows[:, None] + slopes[None, :] * b[:, None]
    inside = ((position > gate[0]) & (position < gate[-1]) & resolved
              & (b[:, None] >= lowest[None, :]) & (b[:, None] <= highest[None, :]))
    width = 2 * np.minimum(band, tolerance) / step
    expected = np.sum(inside * density[:, None] * width, axis=0)
    return (observed >= _MIN_LINE_POINTS) & (observed >= 2 * expected) \
        & (observed >= expected + 4 * np.sqrt(expected))


def _minima_signal(rxx, rxy):
    """sigma_xx-like signal R_xx / (R_xx^2 + R_xy^2) in rows where R_xy dominates.

    Where rho_xy >> rho_xx (quantum Hall regime) the minima of sigma_xx sit at the
    fillings themselves, while those of R_xx = sigma_xx / sigma_xy^2 are pulled towards the
    side where sigma_xy is larger.  At low field (rho_xx >> rho_xy) sigma_xx ~ 1/rho_xx would
    turn minima into maxima, so those rows keep R_xx.  The unknown geometry factor of
    R_xx drops out where it matters (R_xx << R_xy).
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        sigma = rxx / (rxx**2 + rxy**2)
    hall_rows = np.nanmedian(np.abs(rxy), axis=1) > 3 * np.nanmedian(np.abs(rxx), axis=1)
    # Scale sigma rows to ohm-like magnitudes so that the log floor behaves the same way.
    return np.where(hall_rows[:, None], sigma * np.nanmedian(np.abs(rxy)) ** 2, rxx)


def _link_by_direction(minima, direction, tolerance):
    """Ridge traces, linked separately within each sweep direction (hysteresis shifts them)."""
    if direction is None:
        link_traces(minima, tolerance=tolerance)
        return
    trace = np.full(len(minima), -1)
    offset = 0
    for sign in (1, -1):
        mask = direction[minima.row] == sign
        part = minima.take(mask)
        n = link_traces(part, tolerance=tolerance)
        trace[mask] = np.where(part.trace >= 0, part.trace + offset, -1)
        offset += n
    minima.trace = trace


def _best_origins(gate_pts, field_pts, votes, gate, bin_width, count=3):
    """Zero-density voltages that make the minima vote most sharply, strongest first.

    A coarse scan over the gate window and one window width on either side (an origin
    outside the measured range, a 2DEG's depletion voltage, is found too), then a fine
    scan around each of the ``count`` highest local maxima of the score.
    """
    span = gate[-1] - gate[0]
    coarse = np.linspace(gate[0] - span, gate[-1] + span, 241)
    scores = vote_origin(gate_pts, field_pts, votes, coarse, bin_width)
    peaks, _ = _find_peaks(np.r_[0.0, scores, 0.0])
    peaks = peaks - 1
    peaks = peaks[np.argsort(scores[peaks])[::-1][:count]]
    d = coarse[1] - coarse[0]
    found = []
    for best in coarse[peaks]:
        fine = np.linspace(best - 2 * d, best + 2 * d, 41)
        found.append(fine[np.argmax(vote_origin(gate_pts, field_pts, votes, fine, bin_width))])
    return np.asarray(found)


def _central_fan(fits, step, min_share=0.3, min_lines=3):
    """The fan at the centre of a symmetric set of fans, or None when there is none.

    Moire satellites start at band fillings +-s n0 on both sides of neutrality, and a
    satellite fan can hold as many minima as the main one.  Among the fans holding at
    least ``min_share`` of the largest one's minima (and ``min_lines`` lines), the one with
    the most pairs of other fans mirrored about it is neutrality; it needs at least one
    pair, and must beat every other fan by one pair.
    """
    points = np.array([int((fit[1] >= 0).sum()) for fit in fits])
    strong = [i for i, fit in enumerate(fits)
              if points[i] >= min_share * points.max() and fit[0].size >= min_lines]
    if len(strong) < 3:
        return None
    origin = np.array([float(np.median(fits[i][3])) for i in strong])
    pairs = np.zeros(len(strong), int)
    for k, centre in enumerate(origin):
        others = np.delete(origin, k)
        mirrored = 2 * centre - others
        close = np.abs(mirrored[:, None] - others[None, :])
        tol = np.maximum(5 * step, 0.05 * np.abs(others - centre))
        pairs[k] = int(np.sum(np.min(close, axis=1) < tol)) // 2
    best = int(np.argmax(pairs))
    if pairs[best] < 1 or np.sum(pairs >= pairs[best]) > 1:
        return None
    return fits[strong[best]]


def _merge_close(slopes, distance):
    """Drop vote peaks within ``distance`` of a stronger one (``slopes`` strongest first)."""
    kept = []
    for s in slopes:
        if all(abs(s - k) > distance for k in kept):
            kept.append(s)
    return np.asarray(kept)


def _free_fit(m, line, slopes_n, origin_cols, names):
    """Joint fit V = V0 + nuisance + s_j B with one free slope per line."""
    sel = line >= 0
    cols = [np.ones(sel.sum())] + [c[sel] for c in origin_cols]
    onehot = np.zeros((sel.sum(), slopes_n))
    onehot[np.arange(sel.sum()), line[sel]] = m.field[sel]
    X = np.column_stack(cols + [onehot])
    beta, cov, weights, resid = _wls(X, m.gate[sel], m.weight[sel])
    k = 1 + len(origin_cols)
    return {"beta": beta, "cov": cov, "origin": beta[:k], "origin_cov": cov[:k, :k],
            "slopes": beta[k:], "slopes_stderr": np.sqrt(np.diag(cov)[k:]),
            "weights": weights, "resid": resid, "sel": sel, "names": ["origin"] + names}


def _reassign(minima, origin_rows, slopes, field, step, residual_scale, cols, names, n_rows,
              dir_rows):
    """Assign the minima to ``slopes`` and refit them: ``(line, free fit, slopes, origin_rows)``."""
    tolerance, resolved = _tolerances(slopes, field, step, residual_scale)
    line = _assign(minima, origin_rows, slopes, tolerance, resolved)
    free = _free_fit(minima, line, slopes.size, cols, names)
    return (line, free, free["slopes"],
            _origin_of_rows(free["origin"], free["names"], n_rows, dir_rows))


def _origin_of_rows(origin, names, n_rows, direction):
    rows = np.arange(n_rows)
    value = np.full(n_rows, origin[0])
    for coef, col in zip(origin[1:], _nuisance_columns(rows, n_rows, direction, "drift" in names,
                                                       "hysteresis" in names)[0]):
        value = value + coef * col
    return value


def _fit_lines(minima, origin_rows, votes, bin_width, field, gate, dir_rows, use_hysteresis):
    """Lines through one trial origin: vote, assign, test, free fit (iterated).

    Returns (slopes, line of each minimum, free fit, origin of each row, residual scale,
    whether the drift term is used); raises NoFanError when fewer than two lines survive.
    """
    n_rows = field.size
    step = float(np.median(np.diff(gate)))
    b_max = np.abs(field).max()
    min_votes = _MIN_LINE_POINTS * np.median(votes)
    slopes = vote_slopes((minima.gate - origin_rows[minima.row]) / minima.field, votes,
                         bin_width, min_votes)
    # Lines of (nearly) zero slope stay put at every field: the flanks of the neutrality (or
    # an insulating) ridge, not states.
    slopes = slopes[np.abs(slopes) * b_max > _MIN_SWEEP_POINTS * step]
    slopes = _merge_close(slopes, 4 * step / b_max)  # closer lines are unresolved
    if slopes.size < 2:
        raise NoFanError("fewer than two lines through a common origin were found; the map "
                         "shows no Landau fan (or too few resolved states to fit one)")
    residual_scale = step
    free, use_drift = None, False
    for iteration in range(6):
        tolerance, resolved = _tolerances(slopes, field, step, residual_scale)
        line = _assign(minima, origin_rows, slopes, tolerance, resolved)
        keep = _significant_lines(minima, line, slopes, origin_rows, field, gate, tolerance,
                                  resolved, band=max(1.5 * step, 3 * residual_scale))
        keep &= np.abs(slopes) * b_max > _MIN_SWEEP_POINTS * step
        if keep.sum() < 2:
            raise NoFanError("fewer than two fan lines have enough resolved minima to fit; "
                             "the map shows no usable Landau fan")
        if not keep.all():
            slopes = slopes[keep]
            continue
        sel = line >= 0
        # Drift along the row index is indistinguishable from a common slope when rows follow
        # the field; then it is left to the final fit with fixed fillings.
        rows_sel = minima.row[sel]
        corr = abs(np.corrcoef(rows_sel, minima.field[sel])[0, 1]) if np.ptp(rows_sel) > 0 else 1
        use_drift = n_rows >= 10 and corr < 0.98
        cols, names = _nuisance_columns(minima.row, n_rows, dir_rows, use_drift, use_hysteresis)
        free = _free_fit(minima, line, slopes.size, cols, names)
        slopes = free["slopes"]
        origin_rows = _origin_of_rows(free["origin"], free["names"], n_rows, dir_rows)
        good = free["weights"] > 0
        residual_scale = 1.4826 * np.median(np.abs(free["resid"][good])) if good.any() else step
        if iteration >= 2:
            break
    if free is None:
        raise NoFanError("the fan lines could not be fitted; the map shows no usable Landau fan")
    return slopes, line, free, origin_rows, residual_scale, use_drift


# --- the fit ------------------------------------------------------------------------

def fit_fan(fan_map, *, material="auto", dielectric=None, bootstrap=200, seed=0,
            min_prominence=4.0, quantum_capacitance="auto", superlattice=True,
            use_conductivity=False):
    """Calibrate a gate from a Landau fan map.

    Parameters
    ----------
    fan_map : xarray.Dataset
        Fan map (dims ``("field", "gate")``, ``rxx`` and optionally ``rxy`` in ohm,
        optional ``sweep_direction`` coordinate), see :mod:`fanmap._schema`.
    material : str
        "auto", "2deg", "graphene-monolayer", "graphene-bilayer" or "moire-graphene".
        The preset fixes the degeneracy when neither R_xy plateaus nor
        broken-symmetry states do.
    dielectric : tuple (thickness_m, relative_permittivity), optional
        Parallel-plate prior on the lever arm, used for the scale only when nothing
        better decides it.
    bootstrap : int
        Resamples of the bootstrap over ridge traces (0: skip).
    seed : int
        Seed of the bootstrap.
    min_prominence : float
        Detection threshold of row minima in units of the row noise.
    quantum_capacitance : "auto", True or False
        Try the Dirac quantum-capacitance term ("auto": for monolayer graphene, or a
        Berry phase pi with a known scale); it is used only when it improves the
        fit significantly (F-test p < 0.001 and 20 % less residual).
    use_conductivity : bool
        Find the minima of R_xx / (R_xx^2 + R_xy^2) (sigma_xx up to a factor) where R_xy
        is present and dominates, instead of R_xx.
    superlattice : bool
        For "moire-graphene" and "auto", hand the result to
        :func:`fanmap.superlattice.analyse_superlattice` when that module exists.

    Returns
    -------
    FanResult
        ``density_per_volt_stderr`` and ``zero_density_voltage_stderr`` are totals (the
        larger of covariance and bootstrap, in quadrature with the measured systematic
        part); the parts are in ``*_covariance_stderr``, ``*_bootstrap_stderr`` and
        ``*_systematic``.  ``extras["settings"]`` records the options of the fit.

    Raises
    ------
    InputError
        The map is not a fan map or holds no usable data.
    NoFanError
        No set of lines through a common origin was found.
    """
    preset = get_material(material)
    gate, field, r, rxy, direction = _arrays(fan_map)
    n_rows = field.size
    b_abs = np.abs(field)
    step = float(np.median(np.diff(gate)))
    warnings = []

    logr, valid = log_signal(_minima_signal(r, rxy) if use_conductivity else r)
    valley = valley_strength(logr)
    minima = find_row_minima(logr, valid, gate, field, min_prominence=min_prominence,
                             valley=valley)
    if len(minima) < 2 * _MIN_LINE_POINTS:
        raise NoFanError(f"only {len(minima)} R_xx minima found in the whole map; no fan to fit. "
                         "Check that the map shows quantum Hall minima (field high enough, "
                         "the right --signal), or lower the detection threshold")
    _link_by_direction(minima, direction, tolerance=2.5 * step)

    # Global vote for the origin and the slopes.
    votes = np.minimum(minima.prominence, 20.0) * (0.5 + 0.5 * minima.valley) * minima.field
    votes /= np.max(votes)
    b_ref = np.percentile(minima.field, 75)
    bin_width = 0.7 * step / b_ref
    dir_rows = direction if direction is not None else np.zeros(n_rows)
    # Each sweep direction votes for its own origin (hysteresis would split every line).
    best_rows = np.empty(n_rows)
    candidates = None
    for sign in ((1, -1) if direction is not None else (0,)):
        rows_of_sign = dir_rows == sign if sign else np.ones(n_rows, bool)
        pts = rows_of_sign[minima.row]
        if pts.sum() < 2 * _MIN_LINE_POINTS:
            raise NoFanError("too few R_xx minima in one sweep direction to find the fan")
        found = _best_origins(minima.gate[pts], minima.field[pts], votes[pts], gate, bin_width,
                              count=7 if material in ("moire-graphene", "auto") else 3)
        best_rows[rows_of_sign] = found[0]
        candidates = found if candidates is None else candidates
    # Several fans may compete (moire satellites): try the strongest few origins and keep the
    # one whose lines hold the most minima, or, on a moire map, the centre of the symmetric
    # pattern of fans (the satellites at +-s n0 flank neutrality).
    fits, failure = [], None
    for shift in candidates - candidates[0]:
        try:
            fits.append(_fit_lines(minima, best_rows + shift, votes, bin_width, field, gate,
                                   dir_rows, direction is not None))
        except NoFanError as exc:
            failure = exc
    if not fits:
        raise failure
    chosen = _central_fan(fits, step) if material in ("moire-graphene", "auto") else None
    if chosen is None:
        chosen = max(fits, key=lambda fit: int((fit[1] >= 0).sum()))
    slopes, line, free, origin_rows, residual_scale, use_drift = chosen
    use_hysteresis = direction is not None
    satellite = np.zeros(0, int)
    cols, names = _nuisance_columns(minima.row, n_rows, dir_rows, use_drift, use_hysteresis)

    # States too faint for the first pass: dips of the map averaged along lines through the
    # fitted origin, confirmed by a more sensitive pass of row minima.
    faint = _faint_lines(logr, valid, valley, gate, field, origin_rows, slopes, step,
                         residual_scale, min_prominence)
    if faint is not None:
        minima = _concatenate(minima, faint[0])
        slopes = np.r_[slopes, faint[1]]
        cols, names = _nuisance_columns(minima.row, n_rows, dir_rows, use_drift, use_hysteresis)
        line, free, slopes, origin_rows = _reassign(
            minima, origin_rows, slopes, field, step, residual_scale, cols, names, n_rows, dir_rows)
    moving = np.abs(slopes) * b_abs.max() > _MIN_SWEEP_POINTS * step
    if not moving.all():
        if moving.sum() < 2:
            raise NoFanError("the minima form no fan: the lines found hardly move with field")
        slopes = slopes[moving]
        line, free, slopes, origin_rows = _reassign(
            minima, origin_rows, slopes, field, step, residual_scale, cols, names, n_rows, dir_rows)

    # Lines that miss the common origin (moire satellites, artefacts) leave the main fit.
    own_offset = np.zeros(slopes.size)
    own_err = np.zeros(slopes.size)
    for j in range(slopes.size):
        pts = np.flatnonzero(line == j)
        y = minima.gate[pts] - origin_rows[minima.row[pts]]
        X = np.column_stack([np.ones(pts.size), minima.field[pts]])
        beta, cov, *_ = _wls(X, y, minima.weight[pts])
        own_offset[j], own_err[j] = beta[0], np.sqrt(cov[0, 0])
    # (8 points: a line bent by the window edge stays; satellites miss by far more)
    through_origin = (np.abs(own_offset) < 8 * step) | (np.abs(own_offset) < 5 * own_err)
    if (~through_origin).any():
        satellite = np.flatnonzero(~through_origin)
        if through_origin.sum() < 2:
            raise NoFanError("the lines found do not share a common origin; no Landau fan")
        slopes = slopes[through_origin]
        line, free, slopes, origin_rows = _reassign(
            minima, origin_rows, slopes, field, step, residual_scale, cols, names, n_rows, dir_rows)

    # Per-line summaries for naming.
    n_lines = slopes.size
    counts = np.bincount(line[line >= 0], minlength=n_lines)
    onsets = np.array([_onset(minima, line == j) for j in range(n_lines)])
    field_min = np.array([minima.field[line == j].min() for j in range(n_lines)])
    field_max = np.array([minima.field[line == j].max() for j in range(n_lines)])
    hall = _hall_fillings(minima, line, n_lines, rxy, r, gate) if rxy is not None else None
    prior = None
    if dielectric is not None:
        thickness, permittivity = dielectric
        prior = float(lever_arm_from_dielectric(thickness, permittivity))
    # The main sequence is the one that survives to the lowest fields: a line that starts
    # late, or much weaker than a neighbour where the two first appear together, is a
    # split-off (broken-symmetry, fractional) state, not part of it.
    # Lines seen in the lowest-field rows, where the third line of the fan appears (25 %
    # margin), and not outdone by a neighbour there.
    third = np.sort(onsets)[min(2, n_lines - 1)]
    subordinate = _subordinate_lines(minima, line, slopes, onsets, origin_rows, gate)
    naming = None
    # The lowest levels may start later (puddles near neutrality delay a bilayer's +-4,
    # +-8 past the margin), and two or three main lines leave the spacing open: where
    # R_xy is measured and does not confirm the first choice, the lines starting below
    # twice that field are tried, and kept if the Hall plateaus confirm them.
    for margin in (1.25, 2.0) if hall is not None else (1.25,):
        early = onsets <= margin * third
        main_weight = early & ~subordinate
        main_weight = (main_weight if main_weight.sum() >= 2 else early).astype(float)
        trial = name_lines(slopes, free["slopes_stderr"], onsets, weights=main_weight,
                           hall_fillings=hall, material=material, lever_arm_prior=prior)
        if naming is None or trial.scale_from == "hall":
            naming = trial
        if naming.scale_from == "hall":
            break
    warnings += naming.warnings

    final = _fixed_fit(minima, line, naming.fillings, n_rows, dir_rows, use_hysteresis,
                       bootstrap, seed)
    ambiguous = naming.degeneracy is None
    c, c_err = final["c"], final["c_err"]
    alpha = 1 / (FLUX_QUANTUM_SINGLE_ELECTRON * c)
    alpha_cov = alpha * c_err / c
    alpha_boot = alpha * final["c_boot"] / c
    # Systematic part, measured on the map: disagreement of independent halves, the
    # choice of sub-pixel refinement and the scatter of the lines' own lever arms.
    line_scatter = final["line_scatter"] if np.isfinite(final["line_scatter"]) else 0.0
    alpha_sys = alpha * float(np.sqrt((final["c_sys"] / c) ** 2 + (final["c_refinement"] / c) ** 2
                                      + line_scatter**2))
    alpha_err = _total_error(alpha_cov, alpha_boot, alpha_sys)
    extras = {"main_sequence_unit": naming.unit, "main_sequence_offset": naming.offset,
              "common_slope_shift": naming.shift,
              "lines": int(n_lines), "points": int(final["points"]),
              "residual_rms": final["residual_rms"]}
    extras.update(final["nuisance"])
    # Relative standard error of alpha from the scatter of the lines' own slopes, and the
    # lines left out of alpha because their minima sit off their filling.
    extras["density_per_volt_line_scatter_relative_stderr"] = final["line_scatter"]
    extras["lines_downweighted"] = [naming.labels[j] for j in range(n_lines)
                                    if np.isfinite(naming.fillings[j])
                                    and final["line_weight"][j] < 0.5]
    if ambiguous:
        # Fillings were in units of g: alpha above is alpha / g.
        for cand in naming.candidates:
            cand["density_per_volt"] = cand["degeneracy"] * alpha
            cand["density_per_volt_stderr"] = cand["degeneracy"] * alpha_err
            cand["capacitance_per_area"] = ELEMENTARY_CHARGE * cand["density_per_volt"]
        alpha = alpha_err = alpha_boot = alpha_cov = alpha_sys = np.nan
    v0_fit, v0_cov, v0_boot = final["v0"], final["v0_err"], final["v0_boot"]
    v0_sys = float(np.hypot(final["v0_sys"], final["v0_line_scatter"]))
    v0_err = _total_error(v0_cov, v0_boot, v0_sys)
    extras["systematic_splits"] = final["splits"]

    if not ambiguous:
        qc = _quantum_capacitance(minima, line, naming.fillings, final, quantum_capacitance,
                                  material, naming.berry_phase)
        if qc is not None:
            extras["quantum_capacitance"] = qc
            if qc["significant"]:
                alpha, alpha_cov = qc["density_per_volt"], qc["density_per_volt_stderr"]
                v0_fit, v0_cov = qc["zero_density_voltage"], qc["zero_density_voltage_stderr"]
                alpha_err = _total_error(alpha_cov, alpha_boot, alpha_sys)
                v0_err = _total_error(v0_cov, v0_boot, v0_sys)
                warnings.append("the lines bend near neutrality: the quantum-capacitance term "
                                f"(v_F = {qc['fermi_velocity']:.3g} m/s) improves the fit "
                                "significantly; alpha is the geometric lever arm")
    if not (gate[0] <= v0_fit <= gate[-1]):
        warnings.append(f"the fan origin V0 = {v0_fit:.4g} V lies outside the gate window "
                        f"[{gate[0]:.4g}, {gate[-1]:.4g}] V; it is extrapolated from the fit")
    if satellite.size:
        warnings.append(f"{satellite.size} line(s) do not pass through the fan origin "
                        "(satellites or artefacts); kept out of the main fit")

    states, state_of_line = [], np.full(n_lines, -1)
    for j in range(n_lines):
        if naming.kinds[j] is None:
            continue
        state_of_line[j] = len(states)
        measured = (slopes[j] - naming.shift) * (naming.scale if not ambiguous else 1 / naming.unit)
        states.append(State(
            filling=naming.labels[j], kind=naming.kinds[j], slope=float(slopes[j]),
            intercept=float(v0_fit), points=int(counts[j]), field_min=float(field_min[j]),
            field_max=float(field_max[j]), filling_value=float(measured),
            filling_stderr=float(free["slopes_stderr"][j]
                                 * (naming.scale if not ambiguous else 1 / naming.unit)),
            onset_field=float(onsets[j]),
            distance_to_fraction_sigma=naming.distance_sigma[j]))
    unexplained = [naming.labels[j] for j in range(n_lines) if naming.kinds[j] is None]
    if unexplained:
        warnings.append(f"{len(unexplained)} line(s) through the origin match no integer or "
                        f"simple fraction (nu = {', '.join(unexplained)}); left unnamed")
    order = np.argsort([s.slope for s in states])
    remap = np.full(len(states) + 1, -1)
    remap[order] = np.arange(len(states))
    states = [states[i] for i in order]
    point_state = np.where(line >= 0, state_of_line[np.maximum(line, 0)], -1)
    point_state = np.where(point_state >= 0, remap[point_state], -1)

    result = FanResult(
        density_per_volt=float(alpha), density_per_volt_stderr=float(alpha_err),
        capacitance_per_area=float(ELEMENTARY_CHARGE * alpha),
        zero_density_voltage=float(v0_fit), zero_density_voltage_stderr=float(v0_err),
        density_offset=float(-alpha * v0_fit), degeneracy=naming.degeneracy,
        berry_phase=naming.berry_phase, scale_from=naming.scale_from, states=states,
        density_per_volt_bootstrap_stderr=float(alpha_boot),
        zero_density_voltage_bootstrap_stderr=float(v0_boot),
        capacitance_per_area_stderr=float(ELEMENTARY_CHARGE * alpha_err),
        density_per_volt_covariance_stderr=float(alpha_cov),
        density_per_volt_systematic=float(alpha_sys),
        zero_density_voltage_covariance_stderr=float(v0_cov),
        zero_density_voltage_systematic=float(v0_sys),
        scale_candidates=naming.candidates, warnings=warnings, material=material,
        extras=extras, source=fan_map.attrs.get("source"), version=__version__,
        ridge_points={"field": minima.field, "gate": minima.gate, "row": minima.row,
                      "state": point_state, "weight": minima.weight, "trace": minima.trace,
                      "prominence": minima.prominence, "traces": trace_table(minima)},
    )
    result.extras["settings"] = {
        "material": material,
        "dielectric": None if dielectric is None else
        {"thickness_m": float(dielectric[0]), "relative_permittivity": float(dielectric[1]),
         "lever_arm_prior": prior},
        "bootstrap": int(bootstrap), "seed": int(seed), "min_prominence": float(min_prominence),
        "quantum_capacitance": quantum_capacitance,
        "quantum_capacitance_used": bool(extras.get("quantum_capacitance", {}).get("significant",
                                                                                 False)),
        "superlattice_search": bool(superlattice and material in ("moire-graphene", "auto")),
        "use_conductivity": bool(use_conductivity),
        "reading": fan_map.attrs.get("recognised"),
    }
    if superlattice and material in ("moire-graphene", "auto"):
        _add_superlattice(fan_map, result, preset)
    return result


def _total_error(covariance, bootstrap, systematic):
    """Total standard error: the larger statistical error (covariance or bootstrap over
    traces) and the systematic part in quadrature."""
    statistical = covariance if not np.isfinite(bootstrap) else max(covariance, bootstrap)
    return float(np.hypot(statistical, systematic if np.isfinite(systematic) else 0.0))


def _concatenate(a, b):
    """One :class:`~fanmap.ridges.Minima` holding the entries of ``a`` and then ``b``."""
    def joined(name):
        parts = [getattr(a, name), getattr(b, name)]
        if any(part is None for part in parts):
            parts = [a.gate if parts[0] is None else parts[0],
                     b.gate if parts[1] is None else parts[1]]
        return np.concatenate(parts)
    return Minima(**{name: joined(name) for name in a.__dataclass_fields__})


def _faint_lines(logr, valid, valley, gate, field, origin_rows, slopes, step, residual_scale,
                 min_prominence):
    """Lines the first pass missed: (their minima, their slopes), or None.

    The map is averaged along trial lines through the fitted origin over the upper half of
    the field range (:func:`fanmap.ridges.filling_profile`); each clear dip of that
    profile away from the known lines is a candidate.  A candidate is kept only if the
    minima of a second row pass at half the detection threshold pile up on it well above
    chance (:func:`_significant_lines`).
    """
    b = np.abs(field)
    rows = np.flatnonzero(b >= np.median(b))
    b_max = b.max()
    lo, hi = slopes.min(), slopes.max()
    margin = 0.1 * (hi - lo)
    grid = np.arange(lo - margin, hi + margin, 0.5 * step / b_max)
    profile, count = filling_profile(logr, gate, field, origin_rows, grid, rows)
    usable = count >= 10
    if usable.sum() < 10:
        return None
    noise = 1.4826 * np.median(np.abs(np.diff(profile[usable]))) / np.sqrt(2) + 1e-12
    dips, _ = _find_peaks(-np.where(usable, profile, 0.0), prominence=4 * noise)
    candidates = grid[dips]
    candidates = candidates[np.all(np.abs(candidates[:, None] - slopes[None, :])
                                   > 4 * step / b_max, axis=1)]
    candidates = candidates[np.abs(candidates) * b_max > _MIN_SWEEP_POINTS * step]
    if candidates.size == 0:
        return None
    sensitive = find_row_minima(logr, valid, gate, field, min_prominence=0.5 * min_prominence,
                                valley=valley)
    trial = np.r_[slopes, candidates]
    tolerance, resolved = _tolerances(trial, field, step, residual_scale)
    line = _assign(sensitive, origin_rows, trial, tolerance, resolved)
    keep = _significant_lines(sensitive, line, trial, origin_rows, field, gate, tolerance,
                              resolved, band=max(1.5 * step, 3 * residual_scale))
    new = np.flatnonzero(keep[slopes.size:]) + slopes.size
    if new.size == 0:
        return None
    return sensitive.take(np.isin(line, new)), trial[new]


def _subordinate_lines(minima, line, slopes, onsets, origin_rows, gate, rows_compared=10,
                       ratio=0.5):
    """Lines that a neighbouring line outlives or outshines at low field.

    For every pair of lines adjacent in slope: a line is *late* if its neighbour has
    minima in five or more rows below half its onset field where the line itself would lie
    inside the gate window; it is *weak* if, over the ``rows_compared`` lowest-field rows
    holding both, its median prominence is below ``ratio`` times the neighbour's.
    Late or weak lines are split-off states (broken-symmetry, fractional), not part of the
    main sequence.
    """
    order = np.argsort(slopes)
    step = float(np.median(np.diff(gate)))
    strength = []
    for j in range(slopes.size):
        pts = np.flatnonzero(line == j)
        strength.append(dict(zip(minima.row[pts], minima.prominence[pts])))
    field_of_row = dict(zip(minima.row, minima.field))
    weak = np.zeros(slopes.size, bool)

    def late(a, b):
        rows = np.array([r for r in strength[b] if field_of_row[r] < 0.5 * onsets[a]], int)
        if rows.size < 5:
            return False
        where = origin_rows[rows] + slopes[a] * np.array([field_of_row[r] for r in rows])
        return int(np.sum((where > gate[0] + 3 * step) & (where < gate[-1] - 3 * step))) >= 5

    for a, b in zip(order[:-1], order[1:]):
        weak[a] |= late(a, b)
        weak[b] |= late(b, a)
        common = sorted(set(strength[a]) & set(strength[b]), key=field_of_row.get)[:rows_compared]
        if len(common) < 3:
            continue
        pa = np.median([strength[a][r] for r in common])
        pb = np.median([strength[b][r] for r in common])
        if pa < ratio * pb:
            weak[a] = True
        elif pb < ratio * pa:
            weak[b] = True
    return weak


def _onset(minima, on_line):
    """Lowest field of a line, from its points in traces of five or more (stray points aside)."""
    traces, counts = np.unique(minima.trace[on_line], return_counts=True)
    long = np.isin(minima.trace, traces[(traces >= 0) & (counts >= 5)]) & on_line
    return float(np.percentile(minima.field[long if long.sum() >= 5 else on_line], 5))


def _hall_fillings(minima, line, n_lines, rxy, rxx, gate):
    """|nu| = R_K / |R_xy| along each line: the plateau value most of its minima sit on.

    R_xy is quantised where R_xx vanishes, so the points counted are those whose
    R_K / |R_xy| lies within 0.05 of an integer; the integer holding most of them is the
    line's filling (in a moire map a line that runs into a satellite family's region
    takes that family's Hall count there, on fewer points).  A line with fewer than three
    such points gets the median over the third of its minima with the lowest R_xx.
    """
    out = np.full(n_lines, np.nan)
    column = np.clip(np.searchsorted(gate, minima.gate), 0, gate.size - 1)
    values = np.abs(rxy[minima.row, column])
    depth = np.abs(rxx[minima.row, column])
    for j in range(n_lines):
        pts = np.flatnonzero(line == j)
        if pts.size < 4:
            continue
        v = values[pts]
        ok = np.isfinite(v) & (v > 0)
        nu = VON_KLITZING / v[ok]
        on_plateau = (nu > 0.5) & (np.abs(nu - np.round(nu)) < 0.05)
        if on_plateau.sum() >= 3:
            levels, counts = np.unique(np.round(nu[on_plateau]), return_counts=True)
            best = levels[np.argmax(counts)]
            out[j] = float(np.median(nu[on_plateau][np.round(nu[on_plateau]) == best]))
            continue
        d = np.where(np.isfinite(depth[pts]), depth[pts], np.inf)
        lowest = pts[d <= np.percentile(d, 100 / 3)]
        v = values[lowest]
        v = v[np.isfinite(v) & (v > 0)]
        if v.size >= 3:
            out[j] = VON_KLITZING / np.median(v)
    return out


def _groups(minima, line):
    """Bootstrap unit of every point: its ridge trace, or its line for loose points."""
    return np.where(minima.trace >= 0, minima.trace, minima.trace.max() + 1 + line)


def _line_weights(line, field, nu, resid, weights, c, n_lines):
    """Tukey-biweight weight of each line from its own relative slope deviation.

    Minima of some states sit systematically off their filling (asymmetric level shapes
    near neutrality, a plateau cut by the window edge): the line's slope is then off by a
    fixed fraction that no point-level weighting sees.  Each line's fractional deviation
    eps_j = (residual slope) / (c nu_j) is compared with the spread of all lines.

    Returns the weights and the standard error of the mean deviation of the kept lines
    (the line-to-line scatter, a check on the statistical errors).
    """
    num = np.bincount(line, weights=weights * resid * field, minlength=n_lines)
    den = np.bincount(line, weights=weights * field**2, minlength=n_lines)
    nu_line = np.zeros(n_lines)
    nu_line[line] = nu
    with np.errstate(invalid="ignore", divide="ignore"):
        eps = np.where(den > 0, num / den / (c * nu_line), 0.0)
    used = (den > 0) & np.isfinite(eps)
    if used.sum() < 4:
        return np.ones(n_lines), np.nan
    spread = max(1.4826 * np.median(np.abs(eps[used] - np.median(eps[used]))), 2e-4)
    u = (eps - np.median(eps[used])) / (4.685 * spread)
    weight = np.where(np.abs(u) < 1, (1 - u**2) ** 2, 0.0) * used + ~used
    kept = used & (weight > 0.5)
    scatter = np.std(eps[kept], ddof=1) / np.sqrt(kept.sum()) if kept.sum() > 2 else np.nan
    return weight, scatter


def _fixed_fit(minima, line, fillings, n_rows, dir_rows, use_hysteresis, bootstrap, seed):
    """Joint fit V = V0 + nuisance + c nu_j |B| with every filling fixed; c = (h/e) / alpha."""
    named = np.isfinite(fillings)
    if named.sum() < 2:
        raise NoFanError("fewer than two fan lines could be named as integer or fractional "
                         "states, so no lever arm follows; check the map, or fix the "
                         "degeneracy with --material")
    sel = (line >= 0) & named[np.maximum(line, 0)]
    nu = fillings[np.maximum(line, 0)]
    rows = minima.row
    use = {"drift": n_rows >= 10, "hysteresis": use_hysteresis}
    line_weight, scatter = np.ones(fillings.size), np.nan
    for _ in range(3):
        cols, names = _nuisance_columns(rows, n_rows, dir_rows, use["drift"], use["hysteresis"])
        X = np.column_stack([np.ones(sel.sum())] + [col[sel] for col in cols]
                            + [(nu * minima.field)[sel]])
        y = minima.gate[sel]
        w = minima.weight[sel] * line_weight[line[sel]]
        beta, cov, weights, resid = _wls(X, y, w)
        err = np.sqrt(np.diag(cov))
        weak = [n for i, n in enumerate(names, start=1) if abs(beta[i]) < 3 * err[i]]
        if weak:
            use[weak[0]] = False
            continue
        new_weight, scatter = _line_weights(line[sel], minima.field[sel], nu[sel], resid,
                                            minima.weight[sel], beta[-1], fillings.size)
        if np.allclose(new_weight, line_weight):
            break
        line_weight = new_weight
    if not (np.all(np.isfinite(beta)) and beta[-1] > 0):
        raise NoFanError("the named fan lines give no consistent lever arm (the joint fit "
                         "failed); check the map, or fix the degeneracy with --material")
    result = {"v0": beta[0], "v0_err": err[0], "c": beta[-1], "c_err": err[-1],
              "points": int((weights > 0).sum()), "line_weight": line_weight,
              "line_scatter": scatter,
              "residual_rms": float(np.sqrt(np.average(resid**2, weights=weights + 1e-300))),
              "nuisance": {}, "X": X, "y": y, "weights": weights, "sel": sel,
              "rss": float(np.sum(weights * resid**2))}
    for i, name in enumerate(names, start=1):
        key = "zero_density_voltage_drift" if name == "drift" else "hysteresis_shift"
        result["nuisance"][key] = float(beta[i])
        result["nuisance"][key + "_stderr"] = float(err[i])
    result.update(_split_systematics(X, y, weights, nu[sel], minima.field[sel],
                                     dir_rows[rows[sel]], beta, err))
    # How far the choice of sub-pixel refinement moves V0 and c: the same fit on the
    # minima refined the other way (asymmetric dips shift all minima of a line alike).
    result["v0_refinement"], result["c_refinement"] = 0.0, 0.0
    if minima.gate_alternative is not None:
        y_alt = minima.gate_alternative[sel]
        sw = np.sqrt(weights)
        b_alt, *_ = np.linalg.lstsq(X * sw[:, None], y_alt * sw, rcond=None)
        if np.all(np.isfinite(b_alt)):
            result["v0_refinement"] = float(abs(b_alt[0] - beta[0]))
            result["c_refinement"] = float(abs(b_alt[-1] - beta[-1]))
    result["v0_boot"], result["c_boot"] = np.nan, np.nan
    if bootstrap:
        groups = _groups(minima, line)[sel]
        labels, index = np.unique(groups, return_inverse=True)
        sw = weights
        A = np.zeros((labels.size, X.shape[1], X.shape[1]))
        b = np.zeros((labels.size, X.shape[1]))
        np.add.at(A, index, (X[:, :, None] * X[:, None, :]) * sw[:, None, None])
        np.add.at(b, index, X * (sw * y)[:, None])
        rng = np.random.default_rng(seed)
        draws = rng.multinomial(labels.size, np.full(labels.size, 1 / labels.size),
                                size=bootstrap).astype(float)
        AA = np.einsum("rg,gij->rij", draws, A)
        bb = np.einsum("rg,gi->ri", draws, b)
        ok = np.abs(np.linalg.det(AA)) > 0
        sols = np.linalg.solve(AA[ok], bb[ok][..., None])[..., 0]
        if sols.shape[0] > 10:
            result["v0_boot"] = float(np.std(sols[:, 0], ddof=1))
            result["c_boot"] = float(np.std(sols[:, -1], ddof=1))
    return result


def _split_systematics(X, y, weights, nu, field, direction, beta, err, min_points=20):
    """Systematic errors of V0 and c from fits of independent halves of the points.

    The points are split three ways: low- against high-field half, electron against hole
    side, up against down sweeps.  Each half is fitted for V0 and c with the nuisance
    terms held at the full fit's values.  Where two halves disagree by more than their
    statistical errors allow, the excess difference, sqrt(d^2 - s1^2 - s2^2), is a
    systematic error (the full difference: the whole map may share the halves' bias) (minima pulled off their fillings by neighbouring levels, a
    field-dependent bend, one side of the fan sitting off); the largest over the splits is
    kept.  Returns ``v0_sys`` and ``c_sys`` (0 where no split is possible or all agree).
    """
    held = y - X[:, 1:-1] @ beta[1:-1] if X.shape[1] > 2 else y
    X2 = X[:, [0, -1]]
    used = weights > 0
    splits = [field >= np.median(field[used]), nu > 0]
    if np.any(direction != 0):
        splits.append(direction < 0)
    out = {"v0_sys": 0.0, "c_sys": 0.0, "splits": {}}
    # Each line's own intercept (its own slope free): their weighted scatter beyond their
    # errors (Birge ratio above one) is a common error of V0.
    intercepts, variances = [], []
    for value in np.unique(nu[used]):
        part = used & (nu == value)
        if part.sum() < min_points or np.ptp(field[part]) <= 0:
            continue
        X1 = np.column_stack([np.ones(part.sum()), field[part]])
        b, cov, *_ = _wls(X1, held[part], weights[part], robust=False)
        if np.isfinite(cov[0, 0]) and cov[0, 0] > 0:
            intercepts.append(b[0])
            variances.append(cov[0, 0])
    out["v0_line_scatter"] = 0.0
    if len(intercepts) >= 3:
        x, wi = np.asarray(intercepts), 1 / np.asarray(variances)
        mean = np.sum(wi * x) / np.sum(wi)
        birge2 = np.sum(wi * (x - mean) ** 2) / (x.size - 1)
        out["v0_line_scatter"] = float(np.sqrt(max(birge2 - 1, 0.0) / np.sum(wi)))
    for name, mask in zip(("field", "side", "direction"), splits):
        halves = []
        for part in (mask & used, ~mask & used):
            if part.sum() < min_points or np.unique(nu[part]).size < 1 \
                    or np.ptp(field[part]) <= 0:
                break
            b, cov, *_ = _wls(X2[part], held[part], weights[part], robust=False)
            if not np.all(np.isfinite(cov)):
                break
            halves.append((b, np.sqrt(np.diag(cov))))
        if len(halves) < 2:
            continue
        (b1, e1), (b2, e2) = halves
        excess = np.sqrt(np.maximum((b1 - b2) ** 2 - (e1**2 + e2**2), 0.0))
        out["splits"][name] = {"v0_difference": float(b1[0] - b2[0]),
                               "c_relative_difference": float((b1[1] - b2[1]) / beta[-1])}
        out["v0_sys"] = max(out["v0_sys"], float(excess[0]))
        out["c_sys"] = max(out["c_sys"], float(excess[1]))
    return out


def _quantum_capacitance(minima, line, fillings, final, mode, material, berry_phase):
    """Fit V = V0 + e n / C + v_F hbar sqrt(pi |n|) sgn(n) / e and test it against the linear fit.

    Kept when an F-test gives p < 0.001, the term removes at least 20 % of the residual
    sum of squares and v_F is a plausible graphene velocity (3e5 ... 3e6 m/s).
    """
    dirac = material == "graphene-monolayer" or (material == "auto" and berry_phase == 1)
    if mode is False or (mode == "auto" and not dirac):
        return None
    X, y, w = final["X"], final["y"], final["weights"]
    n = X[:, -1] / FLUX_QUANTUM_SINGLE_ELECTRON  # nu |B| e / h
    root = np.sign(n) * np.sqrt(np.abs(n)) * HBAR * np.sqrt(np.pi) / ELEMENTARY_CHARGE
    Xq = np.column_stack([X[:, :-1], ELEMENTARY_CHARGE * n, root])
    beta, cov, *_ = _wls(Xq, y, w, robust=False)
    resid = y - Xq @ beta
    rss1 = float(np.sum(w * resid**2))
    dof = max(int((w > 0).sum()) - Xq.shape[1], 1)
    f_value = (final["rss"] - rss1) / (rss1 / dof)
    p_value = float(stats.f.sf(f_value, 1, dof)) if f_value > 0 else 1.0
    inv_c, v_f = beta[-2], beta[-1]
    err = np.sqrt(np.diag(cov))
    capacitance = 1 / inv_c
    # Graphene Fermi velocities lie near 1e6 m/s (Novoselov et al. 2005, from memory); a
    # "significant" velocity far outside 3e5 ... 3e6 m/s is some other distortion.
    # With thousands of points any small distortion passes an F-test; the term must also
    # explain a fifth of the residual variance.
    significant = bool(p_value < 1e-3 and 3e5 < v_f < 3e6 and err[-1] < 0.3 * abs(v_f)
                       and rss1 < 0.8 * final["rss"])
    return {"significant": significant, "fermi_velocity": float(v_f),
            "fermi_velocity_stderr": float(err[-1]), "f_statistic": float(f_value),
            "p_value": p_value, "residual_ratio": rss1 / final["rss"],
            "capacitance_per_area": float(capacitance),
            "density_per_volt": float(capacitance / ELEMENTARY_CHARGE),
            "density_per_volt_stderr": float(err[-2] / inv_c**2 / ELEMENTARY_CHARGE),
            "zero_density_voltage": float(beta[0]),
            "zero_density_voltage_stderr": float(err[0])}


def _add_superlattice(fan_map, result, preset):
    """Hand the fit to the superlattice analysis (moire satellites) when that module exists."""
    try:
        from .superlattice import analyse_superlattice
    except ImportError:
        return
    if not np.isfinite(result.density_per_volt):
        if result.material == "moire-graphene":
            result.warnings.append("superlattice analysis skipped: it needs the absolute scale")
        return
    try:
        finding = analyse_superlattice(fan_map, result, flavours=preset.flavours or 4,
                                       material=result.material)
    except FanmapError as exc:
        if result.material == "moire-graphene":
            raise
        # "auto" only looks for a superlattice; its absence must not sink the main fit.
        result.warnings.append(f"superlattice search skipped: {exc}")
        return
    result.superlattice = finding.superlattice
    summary = finding.superlattice or {}
    origin_s = summary.get("main_fit_origin_band_filling") or 0
    if origin_s and finding.main_states_as_satellites:
        # The strongest fan started at a band filling s != 0: its "integer" states are
        # satellites (t, s); the lines through neutrality come from the superlattice search.
        result.states = [st for st in result.states if st.kind not in ("integer", "broken-symmetry")]
        result.states.extend(finding.main_states_as_satellites)
        result.states.extend(finding.main_fan_lines)
        if result.material == "moire-graphene" or (preset.degeneracy and preset.flavours):
            result.degeneracy, result.berry_phase = preset.degeneracy, preset.berry_phase
        result.extras["main_fan_relabelled"] = (
            f"the strongest fan starts at s = {origin_s:+d}: its lines are satellites; the "
            f"neutrality fan holds {len(finding.main_fan_lines)} line(s)")
    result.states.extend(finding.satellites)
    if summary.get("joint_fit") and np.isfinite(summary.get("density_per_volt", np.nan)):
        # The joint fit of every family (neutrality fan and satellites) holds the
        # calibration; the fit of the fan found first is kept in the extras.
        if origin_s:
            result.warnings.append(
                f"the strongest fan starts at band filling s = {origin_s:+d}, not at "
                "neutrality; alpha and V0 are those of the joint fit of all fans")
        result.extras["first_fan_fit"] = {
            "band_filling": int(origin_s),
            "density_per_volt": result.density_per_volt,
            "density_per_volt_stderr": result.density_per_volt_stderr,
            "zero_density_voltage": result.zero_density_voltage,
            "zero_density_voltage_stderr": result.zero_density_voltage_stderr}
        alpha, v0 = summary["density_per_volt"], summary["zero_density_voltage"]
        alpha_stat = summary["density_per_volt_stderr"]
        v0_stat = summary["zero_density_voltage_stderr"]
        # systematic: measured on the joint fit itself (line scatter, split halves)
        alpha_sys = float(summary.get("density_per_volt_systematic", 0.0))
        v0_sys = float(summary.get("zero_density_voltage_systematic", 0.0))
        result.density_per_volt, result.zero_density_voltage = alpha, v0
        result.density_per_volt_covariance_stderr = summary.get(
            "density_per_volt_covariance_stderr", alpha_stat)
        result.zero_density_voltage_covariance_stderr = summary.get(
            "zero_density_voltage_covariance_stderr", v0_stat)
        result.density_per_volt_bootstrap_stderr = summary.get(
            "density_per_volt_bootstrap_stderr", float("nan"))
        result.zero_density_voltage_bootstrap_stderr = summary.get(
            "zero_density_voltage_bootstrap_stderr", float("nan"))
        result.density_per_volt_systematic, result.zero_density_voltage_systematic = \
            alpha_sys, v0_sys
        result.density_per_volt_stderr = _total_error(
            result.density_per_volt_covariance_stderr, result.density_per_volt_bootstrap_stderr,
            alpha_sys)
        result.zero_density_voltage_stderr = _total_error(
            result.zero_density_voltage_covariance_stderr,
            result.zero_density_voltage_bootstrap_stderr, v0_sys)
        summary["density_per_volt_stderr"] = result.density_per_volt_stderr
        summary["zero_density_voltage_stderr"] = result.zero_density_voltage_stderr
        result.capacitance_per_area = ELEMENTARY_CHARGE * alpha
        result.capacitance_per_area_stderr = ELEMENTARY_CHARGE * result.density_per_volt_stderr
        result.density_offset = -alpha * v0
    result.extras["superlattice_notes"] = list(finding.notes)
    if finding.seen or result.material == "moire-graphene":
        result.warnings.extend(finding.notes)
