"""Prepare a labelled map for analysis: regrid, average, align, symmetrise, clean.

Each step is a plain function ``step(ds, ...) -> (ds, notes)`` on a map that
follows the contract in :mod:`fanmap._schema`; :func:`prepare_map` runs the
usual sequence and collects the notes (what was done and the numbers a
physicist wants to see: spikes removed, the hysteresis shift between sweep
directions, the residual asymmetry after symmetrising).

Examples
--------
>>> import numpy as np, xarray as xr
>>> grid, rows, report = regrid_sweeps(
...     [np.array([0.0, 1.0, 2.0, 3.0]), np.array([0.01, 1.01, 2.01])],
...     {"rxx": [np.array([1.0, 2.0, 3.0, 4.0]), np.array([1.0, 2.0, 3.0])]})
>>> grid.tolist()
[0.0, 1.0, 2.0, 3.0]
>>> rows["rxx"][1].round(2).tolist()   # a step beyond the second sweep's end: NaN
[0.99, 1.99, 2.99, nan]
"""

import numpy as np
import xarray as xr
from scipy import ndimage

from . import _schema as S
from .errors import InputError

__all__ = [
    "regrid_sweeps", "regrid", "average_repeats", "split_directions", "direction_shift",
    "merge_directions", "symmetrise", "conductivity", "despike", "smooth",
    "remove_background", "prepare_map",
]


# --- regridding --------------------------------------------------------------

def _clean_sweep(pos, vals):
    """Sort one sweep by position and average points measured at the same position."""
    order = np.argsort(pos, kind="stable")
    pos = pos[order]
    vals = {k: v[order] for k, v in vals.items()}
    unique, inverse, counts = np.unique(pos, return_inverse=True, return_counts=True)
    if unique.size == pos.size:
        return pos, vals, 0
    out = {}
    for k, v in vals.items():
        total = np.bincount(inverse, weights=np.nan_to_num(v), minlength=unique.size)
        n = np.bincount(inverse, weights=np.isfinite(v).astype(float), minlength=unique.size)
        with np.errstate(invalid="ignore", divide="ignore"):
            out[k] = np.where(n > 0, total / np.maximum(n, 1), np.nan)
    return unique, out, int(pos.size - unique.size)


def regrid_sweeps(positions, values, *, grid=None, max_gap=1.5, edge=0.5):
    """Put sweeps with slightly different axis values onto one common grid.

    Parameters
    ----------
    positions : list of 1-D arrays
        Axis values of each sweep (any order, any length).
    values : dict of name -> list of 1-D arrays
        Signals measured at those positions, one array per sweep.
    grid : 1-D array, optional
        The common grid.  By default the sweeps' own positions when they all
        agree (no interpolation at all), otherwise an even grid over the
        union of the sweeps with the median step.
    max_gap : float
        A stretch between two measured points wider than ``max_gap`` grid
        steps is a gap: grid points inside it stay NaN, never interpolated.

    Returns
    -------
    grid : 1-D array (ascending)
    rows : dict of name -> 2-D array (sweep, grid)
    report : dict
        ``interpolated`` (bool), ``max_offset_steps`` (largest shift of a
        sweep's points from the grid, in steps), ``gap_points`` (grid points
        left NaN inside gaps), ``short_sweeps`` (list of (index, covered
        fraction)), ``duplicates_averaged``.
    """
    if len(positions) == 0:
        raise InputError("no sweeps to regrid")
    cleaned, dups = [], 0
    for i, pos in enumerate(positions):
        pos = np.asarray(pos, dtype=float)
        vals = {k: np.asarray(v[i], dtype=float) for k, v in values.items()}
        ok = np.isfinite(pos)
        pos, vals, n_dup = _clean_sweep(pos[ok], {k: v[ok] for k, v in vals.items()})
        dups += n_dup
        cleaned.append((pos, vals))
    nonempty = [p for p, _ in cleaned if p.size]
    if not nonempty:
        raise InputError("every sweep is empty (no finite axis values)")
    steps = [np.median(np.diff(p)) for p in nonempty if p.size > 1]
    if not steps:
        raise InputError("every sweep has a single point; a map needs sweeps of several points")
    step = float(np.median(steps))
    if not step > 0:
        raise InputError("the sweep axis does not change within a sweep")
    interpolated = True
    if grid is None:
        longest = max(nonempty, key=len)
        same = all(p.size <= longest.size for p in nonempty)
        if same:
            for p in nonempty:
                # a sweep is on the grid of the longest sweep if its points are a run of it
                j = int(np.argmin(np.abs(longest - p[0])))
                seg = longest[j:j + p.size]
                if seg.size != p.size or np.max(np.abs(seg - p)) > 1e-9 * max(step, 1e-300) * 1e3:
                    same = False
                    break
        full = [p for p in nonempty if p.size == longest.size]
        if same:
            grid = longest.copy()
            interpolated = False
        elif 2 * len(full) >= len(nonempty) and np.max(np.ptp(np.stack(full), axis=0)) < step:
            # jittered copies of one nominal grid: use the point-by-point median as the grid
            grid = np.median(np.stack(full), axis=0)
        else:
            lo = min(p[0] for p in nonempty)
            hi = max(p[-1] for p in nonempty)
            n = int(round((hi - lo) / step)) + 1
            grid = np.linspace(lo, hi, max(n, 2))
    grid = np.asarray(grid, dtype=float)
    gstep = float(np.median(np.diff(grid))) if grid.size > 1 else step
    rows = {k: np.full((len(cleaned), grid.size), np.nan) for k in values}
    gap_points = 0
    short = []
    max_offset = 0.0
    for i, (pos, vals) in enumerate(cleaned):
        if pos.size == 0:
            short.append((i, 0.0))
            continue
        if not interpolated:
            j = int(np.argmin(np.abs(grid - pos[0])))
            for k in values:
                rows[k][i, j:j + pos.size] = vals[k]
        else:
            idx = np.searchsorted(pos, grid)
            # up to half a step beyond a sweep's ends counts as inside (jitter, not extrapolation)
            inside = (grid >= pos[0] - edge * gstep) & (grid <= pos[-1] + edge * gstep)
            lo_i = np.clip(idx - 1, 0, pos.size - 1)
            hi_i = np.clip(idx, 0, pos.size - 1)
            width = pos[hi_i] - pos[lo_i]
            exact = np.isclose(grid, pos[hi_i], rtol=0, atol=1e-9 * gstep)
            in_gap = inside & ~exact & (width > max_gap * gstep)
            gap_points += int(np.count_nonzero(in_gap))
            use = inside & ~in_gap
            k = np.clip(np.searchsorted(grid, pos), 1, max(grid.size - 1, 1))
            offset = np.minimum(np.abs(grid[k] - pos), np.abs(grid[k - 1] - pos))
            max_offset = max(max_offset, float(offset.max() / gstep))
            for k in values:
                v = vals[k]
                if pos.size == 1:
                    rows[k][i, exact] = v[0]
                    continue
                interp = np.interp(grid, pos, v)
                ends = (grid < pos[0]) | (grid > pos[-1])
                if ends.any():
                    first = (v[1] - v[0]) / (pos[1] - pos[0])
                    last = (v[-1] - v[-2]) / (pos[-1] - pos[-2])
                    interp = np.where(grid < pos[0], v[0] + first * (grid - pos[0]), interp)
                    interp = np.where(grid > pos[-1], v[-1] + last * (grid - pos[-1]), interp)
                # a NaN at either neighbour makes the interpolated value NaN
                nan_near = ~np.isfinite(v[lo_i]) | ~np.isfinite(v[hi_i])
                interp[nan_near & ~exact] = np.nan
                interp[exact] = v[hi_i][exact]
                rows[k][i] = np.where(use, interp, np.nan)
        covered = float(np.count_nonzero((grid >= pos[0] - 0.5 * gstep) & (grid <= pos[-1] + 0.5 * gstep))
                        / grid.size)
        if covered < 0.98:
            short.append((i, covered))
    report = {"interpolated": interpolated, "max_offset_steps": max_offset, "gap_points": gap_points,
              "short_sweeps": short, "duplicates_averaged": dups, "step": gstep}
    return grid, rows, report


def regrid(ds, gate, *, max_gap=1.5):
    """Interpolate every row of a fan map onto a new gate grid (V), leaving gaps NaN.

    Grid points farther than ``max_gap`` old steps from measured data, or
    between a measured point and a NaN, stay NaN.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> fan = xr.Dataset({"rxx": (("field", "gate"), [[1.0, 2.0, 3.0]], {"units": "ohm"})},
    ...                  coords={"field": [1.0], "gate": [0.0, 1.0, 2.0]})
    >>> out, notes = regrid(fan, [0.5, 1.5, 2.5])
    >>> out.rxx.values.tolist()
    [[1.5, 2.5, nan]]
    """
    gate = np.asarray(gate, dtype=float)
    row_dim, col_dim = ds[S.RXX].dims
    old = ds[col_dim].values.astype(float)
    step = float(np.median(np.abs(np.diff(old)))) if old.size > 1 else 1.0
    names = _signals(ds)
    positions = [old] * ds.sizes[row_dim]
    values = {n: list(np.asarray(ds[n].values, dtype=float)) for n in names}
    new_grid, rows, report = regrid_sweeps(positions, values, grid=gate,
                                           max_gap=max_gap * step / _step(gate), edge=0.0)
    out = ds.drop_vars(names + [col_dim]).assign_coords({col_dim: (col_dim, new_grid, ds[col_dim].attrs)})
    for n in names:
        out[n] = ((row_dim, col_dim), rows[n], ds[n].attrs)
    return out, {"gap_points": report["gap_points"], "points": int(new_grid.size)}


def _step(grid):
    return float(np.median(np.abs(np.diff(grid)))) if np.size(grid) > 1 else 1.0


def _signals(ds):
    return [n for n in (S.RXX, S.RXY) if n in ds.data_vars]


def _require_fan(ds, what):
    if ds.attrs.get(S.MAP_KIND, S.FAN) != S.FAN or S.FIELD not in ds[S.RXX].dims:
        raise InputError(f"{what} needs a fan map (dims field, gate)")


def _field_tolerance(field):
    unique = np.unique(np.round(np.asarray(field, dtype=float), 12))
    steps = np.diff(unique)
    steps = steps[steps > 0]
    return 0.25 * float(np.min(steps)) if steps.size else 1e-9


# --- repeats and sweep directions ----------------------------------------------

def average_repeats(ds, *, by_direction=True):
    """Average rows measured at the same field (and, by default, in the same sweep direction).

    Rows keep the order of their first occurrence.  Returns ``(ds, notes)``
    with the number of rows averaged and the rms difference between repeats.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> fan = xr.Dataset({"rxx": (("field", "gate"), [[1.0, 2.0], [3.0, 4.0], [5.0, 6.0]])},
    ...                  coords={"field": [1.0, 1.0, 2.0], "gate": [0.0, 1.0]})
    >>> out, notes = average_repeats(fan)
    >>> out.rxx.values.tolist(), notes["rows_averaged"]
    ([[2.0, 3.0], [5.0, 6.0]], 2)
    """
    _require_fan(ds, "averaging repeated sweeps")
    field = ds[S.FIELD].values.astype(float)
    direction = (ds[S.SWEEP_DIRECTION].values if (by_direction and S.SWEEP_DIRECTION in ds.coords)
                 else np.ones(field.size, dtype=int))
    tol = _field_tolerance(field)
    groups, keys = [], []
    for i, (b, d) in enumerate(zip(field, direction)):
        for g, (kb, kd) in enumerate(keys):
            if kd == d and abs(kb - b) <= tol:
                groups[g].append(i)
                break
        else:
            keys.append((b, d))
            groups.append([i])
    repeated = [g for g in groups if len(g) > 1]
    notes = {"rows_before": int(field.size), "rows_after": len(groups),
             "rows_averaged": int(sum(len(g) for g in repeated))}
    if not repeated:
        return ds, notes
    out_vars = {}
    spread = []
    for n in _signals(ds):
        x = np.asarray(ds[n].values, dtype=float)
        rows = []
        for g in groups:
            with np.errstate(invalid="ignore"), _quiet():
                rows.append(np.nanmean(x[g], axis=0))
            if len(g) > 1 and n == S.RXX:
                spread.append(np.nanstd(x[g], axis=0))
        out_vars[n] = ((S.FIELD, S.GATE), np.asarray(rows), ds[n].attrs)
    first = [g[0] for g in groups]
    coords = {S.FIELD: (S.FIELD, np.array([np.mean(field[g]) for g in groups]), ds[S.FIELD].attrs),
              S.GATE: ds[S.GATE]}
    if S.SWEEP_DIRECTION in ds.coords:
        d = ds[S.SWEEP_DIRECTION].values[first]
        if by_direction:
            coords[S.SWEEP_DIRECTION] = (S.FIELD, d, ds[S.SWEEP_DIRECTION].attrs)
    out = xr.Dataset(out_vars, coords=coords, attrs=dict(ds.attrs))
    if spread:
        notes["repeat_rms_ohm"] = float(np.sqrt(np.nanmean(np.concatenate(spread) ** 2)))
    return out, notes


class _quiet:
    """Silence the 'mean of empty slice' warnings of all-NaN columns."""

    def __enter__(self):
        import warnings
        self._ctx = warnings.catch_warnings()
        self._ctx.__enter__()
        warnings.simplefilter("ignore", RuntimeWarning)

    def __exit__(self, *exc):
        return self._ctx.__exit__(*exc)


def split_directions(ds):
    """The up (+1) and down (-1) sweeps of a fan map as two maps (``sweep_direction`` required)."""
    _require_fan(ds, "splitting sweep directions")
    if S.SWEEP_DIRECTION not in ds.coords:
        raise InputError("the map has no sweep_direction coordinate: all sweeps run one way")
    d = ds[S.SWEEP_DIRECTION].values
    return ds.isel({S.FIELD: np.flatnonzero(d > 0)}), ds.isel({S.FIELD: np.flatnonzero(d < 0)})


def _normalised_derivative(row):
    row = np.asarray(row, dtype=float)
    ok = np.isfinite(row)
    if ok.sum() < 4:
        return None
    filled = np.interp(np.arange(row.size), np.flatnonzero(ok), row[ok])
    d = np.gradient(filled)
    d[~ok] = 0.0
    scale = np.std(d)
    return d / scale if scale > 0 else None


def _row_lag(a, b, max_lag):
    """Sub-pixel lag k with b[i + k] ~ a[i] (cross-correlation peak, parabolic refinement)."""
    lags = np.arange(-max_lag, max_lag + 1)
    corr = np.empty(lags.size)
    n = a.size
    for j, k in enumerate(lags):
        if k >= 0:
            corr[j] = np.dot(a[:n - k], b[k:]) / max(n - k, 1)
        else:
            corr[j] = np.dot(a[-k:], b[:n + k]) / max(n + k, 1)
    j = int(np.argmax(corr))
    if 0 < j < lags.size - 1:
        c0, c1, c2 = corr[j - 1], corr[j], corr[j + 1]
        denom = c0 - 2 * c1 + c2
        frac = 0.5 * (c0 - c2) / denom if denom != 0 else 0.0
        return lags[j] + frac, c1
    return float(lags[j]), corr[j]


def direction_shift(ds, *, variable=S.RXX, max_shift=None):
    """Gate shift between down and up sweeps (hysteresis), from paired rows at the same field.

    Positive means features of the down sweeps sit at higher gate voltage:
    ``down(V) ~ up(V - shift)``.  Returns a dict with ``shift`` and
    ``shift_stderr`` (V) and the number of row pairs used.
    """
    up, down = split_directions(ds)
    if up.sizes[S.FIELD] == 0 or down.sizes[S.FIELD] == 0:
        raise InputError("direction shift needs both up and down sweeps")
    gate = ds[S.GATE].values.astype(float)
    step = _step(gate)
    max_lag = int(round((max_shift / step) if max_shift else max(2, gate.size // 8)))
    max_lag = max(1, min(max_lag, gate.size // 2))
    up_field = up[S.FIELD].values.astype(float)
    up_rows = [_normalised_derivative(r) for r in np.asarray(up[variable].values, dtype=float)]
    field_step = _step(np.unique(ds[S.FIELD].values))
    tol = _field_tolerance(ds[S.FIELD].values)
    lags = []
    for i, b in enumerate(down[S.FIELD].values.astype(float)):
        c = _normalised_derivative(down[variable].values[i])
        if c is None:
            continue
        exact = np.flatnonzero(np.abs(up_field - b) <= tol)
        if exact.size and up_rows[exact[0]] is not None:
            lags.append(_row_lag(up_rows[exact[0]], c, max_lag)[0])
            continue
        # no up sweep at this field: interpolate the lags to the two up sweeps that bracket it,
        # which cancels the motion of the fan lines with field to first order
        below = np.flatnonzero((up_field < b) & (up_field > b - 2.5 * field_step))
        above = np.flatnonzero((up_field > b) & (up_field < b + 2.5 * field_step))
        if not below.size or not above.size:
            continue
        lo = below[np.argmax(up_field[below])]
        hi = above[np.argmin(up_field[above])]
        if up_rows[lo] is None or up_rows[hi] is None:
            continue
        lag_lo = _row_lag(up_rows[lo], c, max_lag)[0]
        lag_hi = _row_lag(up_rows[hi], c, max_lag)[0]
        w = (b - up_field[lo]) / (up_field[hi] - up_field[lo])
        lags.append(lag_lo + w * (lag_hi - lag_lo))
    if not lags:
        raise InputError("no up and down sweeps at matching fields to compare")
    lags = np.asarray(lags) * step
    shift = float(np.median(lags))
    mad = 1.4826 * float(np.median(np.abs(lags - shift)))
    stderr = (mad if mad > 0 else float(np.std(lags))) / np.sqrt(lags.size)
    return {"shift": shift, "shift_stderr": float(stderr), "pairs": int(lags.size)}


def _shift_rows(x, gate, offsets):
    """Row i re-sampled at gate + offsets[i] (NaN where that needs data beyond the row or a NaN)."""
    out = np.full_like(x, np.nan)
    for i, off in enumerate(offsets):
        row = x[i]
        pos = gate + off
        idx = np.clip(np.searchsorted(gate, pos), 1, gate.size - 1)
        lo, hi = row[idx - 1], row[idx]
        w = (pos - gate[idx - 1]) / (gate[idx] - gate[idx - 1])
        val = lo + w * (hi - lo)
        inside = (pos >= gate[0]) & (pos <= gate[-1])
        out[i] = np.where(inside & np.isfinite(lo) & np.isfinite(hi), val, np.nan)
    return out


def merge_directions(ds, *, align=True):
    """Merge up and down sweeps into one map, first aligning them by half the shift each way.

    Returns ``(ds, notes)``; ``notes["shift"]`` is the hysteresis shift (V)
    that was removed (see :func:`direction_shift`).
    """
    if S.SWEEP_DIRECTION not in ds.coords:
        return ds, {"merged": False, "reason": "one sweep direction only"}
    notes = {"merged": True}
    out = ds
    if align:
        found = direction_shift(ds)
        notes.update(found)
        d = ds[S.SWEEP_DIRECTION].values
        # down(V) ~ up(V - s): read down at V + s/2 and up at V - s/2
        offsets = np.where(d < 0, found["shift"] / 2, -found["shift"] / 2)
        gate = ds[S.GATE].values.astype(float)
        out = ds.copy()
        for n in _signals(ds):
            out[n] = (ds[n].dims, _shift_rows(np.asarray(ds[n].values, dtype=float), gate, offsets),
                      ds[n].attrs)
    return out.drop_vars(S.SWEEP_DIRECTION), notes


# --- Onsager symmetrisation --------------------------------------------------------

def _pair_lags(pos_rows, neg_rows, n_gate):
    """Sub-pixel lag of each -B row against its +B row (0 where a row is too empty to tell)."""
    max_lag = max(1, n_gate // 8)
    lags = np.zeros(len(pos_rows))
    for k, (pos, neg) in enumerate(zip(pos_rows, neg_rows)):
        a = _normalised_derivative(pos)
        b = _normalised_derivative(neg)
        if a is not None and b is not None:
            lags[k] = _row_lag(a, b, max_lag)[0]
    return lags


def _mixing_fraction(anti_xx, anti_xy):
    """Least-squares fraction c in R_xx,odd = c R_xy,odd (the contact mixing)."""
    ok = np.isfinite(anti_xx) & np.isfinite(anti_xy)
    denom = float(np.sum(anti_xy[ok] ** 2))
    return float(np.sum(anti_xx[ok] * anti_xy[ok]) / denom) if denom > 0 else float("nan")


def _consensus_offsets(offsets, separation, hysteresis_sign, step):
    """Smooth per-pair gate offsets with a model: drift linear in the time between the two rows,
    plus a hysteresis shift where the rows were swept in opposite directions.

    Single-pair estimates scatter (contact mixing and dense low-field rows move the correlation
    peak); the robust fit over all pairs does not.  Offsets under a fifth of a gate step are dropped.
    """
    offsets = np.asarray(offsets, dtype=float)
    design = np.column_stack([np.ones_like(offsets), np.asarray(separation, dtype=float),
                              np.asarray(hysteresis_sign, dtype=float)])
    design = design[:, [0] + [j for j in (1, 2) if np.ptp(design[:, j]) > 0]]
    if offsets.size < design.shape[1] + 2:
        model = np.full_like(offsets, np.median(offsets))
    else:
        keep = np.ones(offsets.size, dtype=bool)
        for _ in range(3):
            coef, *_ = np.linalg.lstsq(design[keep], offsets[keep], rcond=None)
            model = design @ coef
            resid = offsets - model
            spread = 1.4826 * np.median(np.abs(resid[keep]))
            keep = np.abs(resid) <= max(3 * spread, 0.5 * step)
            if keep.sum() < design.shape[1] + 1:
                break
    return np.where(np.abs(model) < 0.2 * step, 0.0, model)


def symmetrise(ds, *, keep="positive", align=True):
    """Symmetrise R_xx and antisymmetrise R_xy over +-B (Onsager reciprocity).

    R_xx(B) <- (R_xx(B) + R_xx(-B)) / 2 and R_xy(B) <- (R_xy(B) - R_xy(-B)) / 2
    for every pair of rows at opposite fields (same sweep direction when the
    map has both).  This removes the part of R_xy mixed into R_xx by
    misaligned contacts (and vice versa).  ``keep="positive"`` returns one
    row per |B| (rows without a partner kept as measured, negative ones
    mirrored with R_xy -> -R_xy); ``keep="both"`` keeps every row.  With
    ``align`` each -B row is first shifted in gate onto its +B partner (by
    cross-correlating their R_xx), since a drifting V0 or hysteresis moves the
    features between the two measurements; the shifts are reported.

    Returns ``(ds, notes)`` with ``pairs``, the residual asymmetry
    ``rxx_antisymmetric_fraction`` (rms of the antisymmetric part over rms
    of the symmetric part) and ``contact_mixing`` (least-squares fraction of
    R_xy found in R_xx).
    """
    _require_fan(ds, "symmetrising over +-B")
    if keep not in ("positive", "both"):
        raise InputError(f"keep must be 'positive' or 'both', not {keep!r}")
    field = ds[S.FIELD].values.astype(float)
    direction = (ds[S.SWEEP_DIRECTION].values if S.SWEEP_DIRECTION in ds.coords
                 else np.ones(field.size, dtype=int))
    tol = _field_tolerance(np.abs(field))
    zero = np.abs(field) <= tol
    partner = np.full(field.size, -1)
    for i in np.flatnonzero(field > tol):
        candidates = np.flatnonzero((np.abs(field + field[i]) <= tol) & (partner < 0) & (field < 0))
        if candidates.size == 0:
            continue
        same = candidates[direction[candidates] == direction[i]]
        j = int((same if same.size else candidates)[0])
        partner[i], partner[j] = j, i
    pos_pairs = np.flatnonzero((partner >= 0) & (field > 0))
    if pos_pairs.size == 0:
        raise InputError("no pairs of rows at opposite fields: symmetrising needs both field signs")
    rxx = np.asarray(ds[S.RXX].values, dtype=float)
    rxy = np.asarray(ds[S.RXY].values, dtype=float) if S.RXY in ds else None
    new_xx, new_xy = rxx.copy(), None if rxy is None else rxy.copy()
    notes = {"pairs": int(pos_pairs.size)}
    neg_xx = rxx[partner[pos_pairs]]
    neg_xy = None if rxy is None else rxy[partner[pos_pairs]]
    if align:
        # rows at +B and -B were measured at different times: a drifting (or hysteretic) V0
        # moves every feature; re-sample the -B row onto the +B row before combining
        gate = ds[S.GATE].values.astype(float)
        step = _step(gate)
        # +1 where the +B row went up and the -B row down: down(V) = up(V - shift)
        hysteresis_sign = (direction[pos_pairs] - direction[partner[pos_pairs]]) / 2
        separation = pos_pairs - partner[pos_pairs]
        mixing = 0.0
        # the mixed-in R_xy is odd in B and would bias the alignment: estimate the shifts on
        # R_xx - c R_xy, then c from the aligned rows, and repeat
        for _ in range(4 if rxy is not None else 1):
            pos_clean = rxx[pos_pairs] - (mixing * rxy[pos_pairs] if rxy is not None else 0.0)
            neg_clean = rxx[partner[pos_pairs]] - (mixing * neg_xy if rxy is not None else 0.0)
            offsets = _consensus_offsets(_pair_lags(pos_clean, neg_clean, gate.size) * step,
                                         separation, hysteresis_sign, step)
            neg_xx = _shift_rows(rxx[partner[pos_pairs]], gate, offsets)
            if rxy is None:
                break
            shifted_xy = _shift_rows(neg_xy, gate, offsets)
            mixing = _mixing_fraction((rxx[pos_pairs] - neg_xx) / 2, (rxy[pos_pairs] - shifted_xy) / 2)
            if not np.isfinite(mixing):
                mixing = 0.0
        if neg_xy is not None:
            neg_xy = _shift_rows(neg_xy, gate, offsets)
        notes["pair_shift_median"] = float(np.median(offsets))
        notes["pair_shift_max"] = float(np.max(np.abs(offsets)))
        notes["pairs_shifted"] = int(np.count_nonzero(offsets))
    sym_xx = (rxx[pos_pairs] + neg_xx) / 2
    anti_xx = (rxx[pos_pairs] - neg_xx) / 2
    new_xx[pos_pairs] = sym_xx
    new_xx[partner[pos_pairs]] = sym_xx
    with _quiet():
        notes["rxx_antisymmetric_fraction"] = float(np.sqrt(np.nanmean(anti_xx**2) / np.nanmean(sym_xx**2)))
    if rxy is not None:
        anti_xy = (rxy[pos_pairs] - neg_xy) / 2
        sym_xy = (rxy[pos_pairs] + neg_xy) / 2
        new_xy[pos_pairs] = anti_xy
        new_xy[partner[pos_pairs]] = -anti_xy
        new_xy[zero] = 0.0
        notes["contact_mixing"] = _mixing_fraction(anti_xx, anti_xy)
        with _quiet():
            notes["rxy_symmetric_fraction"] = float(np.sqrt(np.nanmean(sym_xy**2) / np.nanmean(anti_xy**2)))
    unpaired = np.flatnonzero((partner < 0) & ~zero)
    notes["unpaired_rows"] = int(unpaired.size)
    out = ds.copy()
    out[S.RXX] = (ds[S.RXX].dims, new_xx, ds[S.RXX].attrs)
    if rxy is not None:
        out[S.RXY] = (ds[S.RXY].dims, new_xy, ds[S.RXY].attrs)
    if keep == "both":
        return out, notes
    keep_rows = np.flatnonzero((field > tol) | zero | ((field < -tol) & (partner < 0)))
    out = out.isel({S.FIELD: keep_rows})
    mirrored = out[S.FIELD].values < -tol
    if mirrored.any():
        out = out.assign_coords({S.FIELD: (S.FIELD, np.abs(out[S.FIELD].values), ds[S.FIELD].attrs)})
        if S.RXY in out:
            out[S.RXY].values[mirrored] *= -1
        notes["mirrored_rows"] = int(mirrored.sum())
    return out, notes


# --- conductivity -----------------------------------------------------------------

def conductivity(ds, *, geometry_factor=1.0):
    """Add the sheet conductivity tensor ``sigma_xx``, ``sigma_xy`` (S).

    rho_xx = R_xx * geometry_factor, with geometry_factor = W / L (channel
    width over the distance between the voltage probes; 1 when ``rxx`` is
    already a sheet resistivity), rho_xy = R_xy, and
    sigma_xx = rho_xx / (rho_xx^2 + rho_xy^2),
    sigma_xy = rho_xy / (rho_xx^2 + rho_xy^2).

    Examples
    --------
    On a quantum Hall plateau (rho_xx = 0) sigma_xy = 1 / rho_xy:

    >>> import numpy as np, xarray as xr
    >>> fan = xr.Dataset({"rxx": (("field", "gate"), [[0.0]]), "rxy": (("field", "gate"), [[12906.4]])},
    ...                  coords={"field": [5.0], "gate": [1.0]})
    >>> out, _ = conductivity(fan)
    >>> f"{float(out.sigma_xy[0, 0]) * 12906.4:.6f}"
    '1.000000'
    """
    if S.RXY not in ds:
        raise InputError("the conductivity tensor needs R_xy; name the Hall channel with --hall NAME")
    if not geometry_factor > 0:
        raise InputError(f"geometry factor must be positive, got {geometry_factor!r}")
    notes = {"geometry_factor": float(geometry_factor)}
    factor = geometry_factor
    if ds[S.RXX].attrs.get("sheet_resistivity"):
        factor = 1.0
        notes["geometry_factor"] = 1.0
        notes["reason"] = "rxx is already a sheet resistivity"
    rho_xx = ds[S.RXX] * factor
    rho_xy = ds[S.RXY]
    denom = rho_xx**2 + rho_xy**2
    out = ds.copy()
    out["sigma_xx"] = (rho_xx / denom).assign_attrs(units="S", long_name="longitudinal sheet conductivity")
    out["sigma_xy"] = (rho_xy / denom).assign_attrs(units="S", long_name="Hall sheet conductivity")
    return out, notes


# --- cleaning -----------------------------------------------------------------------

def _fill_nan_rows(x):
    filled = x.copy()
    for i, row in enumerate(filled):
        ok = np.isfinite(row)
        if ok.any() and not ok.all():
            filled[i] = np.interp(np.arange(row.size), np.flatnonzero(ok), row[ok])
        elif not ok.any():
            filled[i] = 0.0
    return filled


def despike(ds, *, threshold=8.0, isolation=3.0, variables=None):
    """Replace single-point spikes by the mean of their two neighbours; returns ``(ds, notes)``.

    A point is a spike when it jumps away from both neighbours in its gate
    sweep by the same sign and by more than ``threshold`` times the sweep's
    noise (robust, from second differences: 1.4826 * MAD / sqrt(1.5)), while
    the neighbours agree with each other (the jump is not a steep slope or a
    sharp but resolved peak), and the jump is ``isolation`` times larger than
    anything within two gate points in the neighbouring field rows: real
    features are lines that continue from row to row, glitches are not.
    ``notes`` counts the replaced points per variable.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> x = 100 + np.random.default_rng(1).normal(size=(5, 40))
    >>> x[2, 17] = 900.0
    >>> fan = xr.Dataset({"rxx": (("field", "gate"), x)}, coords={"field": np.arange(5.0), "gate": np.arange(40.0)})
    >>> out, notes = despike(fan)
    >>> notes["rxx"], bool(abs(float(out.rxx[2, 17]) - 100) < 5)
    (1, True)
    """
    variables = variables or _signals(ds)
    row_dim, col_dim = ds[S.RXX].dims
    out = ds.copy()
    notes = {}
    footprint = np.ones((3, 5), dtype=bool)
    footprint[1] = False  # compare with the rows above and below only
    for n in variables:
        x = np.asarray(ds[n].values, dtype=float)
        finite = np.isfinite(x)
        cleaned = _fill_nan_rows(x)
        d2 = np.full_like(cleaned, np.nan)
        d2[:, 1:-1] = cleaned[:, 1:-1] - 0.5 * (cleaned[:, :-2] + cleaned[:, 2:])
        d2[~finite] = np.nan
        with _quiet():
            scale = 1.4826 * np.nanmedian(np.abs(d2), axis=1, keepdims=True) / np.sqrt(1.5)
            floor = 1e-9 * np.nanmedian(np.abs(np.where(finite, x, np.nan)), axis=1, keepdims=True)
        scale = np.fmax(np.nan_to_num(scale), np.nan_to_num(floor))
        count = 0
        for _ in range(3):  # neighbouring spikes hide each other: repeat after each removal
            left = np.zeros_like(cleaned)
            right = np.zeros_like(cleaned)
            left[:, 1:-1] = cleaned[:, 1:-1] - cleaned[:, :-2]
            right[:, 1:-1] = cleaned[:, 1:-1] - cleaned[:, 2:]
            jump = np.where(np.sign(left) == np.sign(right), np.minimum(np.abs(left), np.abs(right)), 0.0)
            asym = np.zeros_like(cleaned)
            asym[:, 1:-1] = np.abs(cleaned[:, :-2] - cleaned[:, 2:])
            neighbours = ndimage.maximum_filter(jump, footprint=footprint, mode="constant", cval=0.0)
            flagged = finite & (jump > threshold * scale) & (asym < 0.5 * jump) \
                & (jump > isolation * neighbours) & (scale > 0)
            flagged[:, 1:-1] &= finite[:, :-2] & finite[:, 2:]
            if x.shape[0] < 2 or not flagged.any():
                break
            count += int(flagged.sum())
            between = cleaned.copy()
            between[:, 1:-1] = 0.5 * (cleaned[:, :-2] + cleaned[:, 2:])
            cleaned = np.where(flagged, between, cleaned)
        notes[n] = count
        if count:
            out[n] = ((row_dim, col_dim), np.where(finite, cleaned, np.nan), ds[n].attrs)
    return out, notes


def smooth(ds, *, gate_sigma=1.0, field_sigma=0.0, variables=None):
    """Gaussian smoothing in pixels (NaN-aware: NaN points neither spread nor get filled)."""
    variables = variables or _signals(ds)
    out = ds.copy()
    sigma = (field_sigma, gate_sigma)
    for n in variables:
        x = np.asarray(ds[n].values, dtype=float)
        ok = np.isfinite(x)
        num = ndimage.gaussian_filter(np.where(ok, x, 0.0), sigma, mode="nearest")
        den = ndimage.gaussian_filter(ok.astype(float), sigma, mode="nearest")
        with np.errstate(invalid="ignore", divide="ignore"):
            y = np.where(ok, num / den, np.nan)
        out[n] = (ds[n].dims, y, ds[n].attrs)
    return out, {"gate_sigma_pixels": float(gate_sigma), "field_sigma_pixels": float(field_sigma)}


def remove_background(ds, *, variable=S.RXX, method="polynomial", degree=2):
    """Add ``<variable>_detrended``: each row minus its own smooth background (for display).

    ``method="polynomial"`` subtracts a least-squares polynomial of ``degree``
    in gate voltage, ``"median"`` the row median.
    """
    if method not in ("polynomial", "median"):
        raise InputError(f"background method must be 'polynomial' or 'median', not {method!r}")
    x = np.asarray(ds[variable].values, dtype=float)
    gate = ds[ds[variable].dims[1]].values.astype(float)
    out_rows = np.full_like(x, np.nan)
    for i, row in enumerate(x):
        ok = np.isfinite(row)
        if ok.sum() == 0:
            continue
        if method == "median" or ok.sum() <= degree + 1:
            out_rows[i] = row - np.nanmedian(row)
        else:
            coef = np.polynomial.polynomial.polyfit(gate[ok], row[ok], degree)
            out_rows[i] = row - np.polynomial.polynomial.polyval(gate, coef)
    out = ds.copy()
    name = f"{variable}_detrended"
    out[name] = (ds[variable].dims, out_rows,
                 {"units": ds[variable].attrs.get("units", "ohm"),
                  "long_name": f"{ds[variable].attrs.get('long_name', variable)} minus per-row background "
                               "(for display)"})
    return out, {"variable": name, "method": method}


# --- the usual sequence -------------------------------------------------------------

# prepare_map's keywords share the names of the steps
_despike, _merge_directions, _average_repeats = despike, merge_directions, average_repeats
_symmetrise, _smooth, _conductivity = symmetrise, smooth, conductivity

def prepare_map(ds, *, despike=True, symmetrise=True, merge_directions=False, average_repeats=True,
                smooth=None, conductivity=False, geometry_factor=1.0, background=False):
    """Run the usual preparation steps; returns ``(prepared map, notes)``.

    Order: spike removal; for fans the hysteresis shift between sweep
    directions (reported; removed when ``merge_directions``), averaging of
    repeated rows, +-B symmetrisation when both field signs were measured;
    then optional smoothing (``smooth`` = Gaussian sigma in gate pixels), the
    conductivity tensor, and a per-row background-removed copy of R_xx.
    Steps that do not apply (no R_xy, one field sign) are skipped and the
    reason is noted.  The values are loaded into memory.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> rng = np.random.default_rng(0)
    >>> fan = xr.Dataset({"rxx": (("field", "gate"), 100 + rng.normal(size=(6, 50)), {"units": "ohm"})},
    ...                  coords={"field": np.linspace(1, 3, 6), "gate": np.linspace(-1, 1, 50)},
    ...                  attrs={"map_kind": "fan"})
    >>> fan.rxx[2, 20] = 1e4
    >>> out, notes = prepare_map(fan)
    >>> notes["despike"]["rxx"], notes["symmetrise"]
    (1, 'skipped: one field sign only')
    """
    notes = {}
    out = ds.copy(deep=False).load()
    fan = out.attrs.get(S.MAP_KIND, S.FAN) == S.FAN and S.FIELD in out[S.RXX].dims
    if despike:
        out, notes["despike"] = _despike(out)
    if fan and S.SWEEP_DIRECTION in out.coords:
        if merge_directions:
            out, notes["directions"] = _merge_directions(out)
        else:
            try:
                notes["directions"] = {"merged": False, **direction_shift(out)}
            except InputError as exc:
                notes["directions"] = {"merged": False, "shift": None, "reason": str(exc)}
    if fan and average_repeats:
        out, notes["average_repeats"] = _average_repeats(out)
    if fan and symmetrise:
        field = out[S.FIELD].values
        if (field > 0).any() and (field < 0).any():
            try:
                out, notes["symmetrise"] = _symmetrise(out)
            except InputError as exc:
                notes["symmetrise"] = f"skipped: {exc}"
        else:
            notes["symmetrise"] = "skipped: one field sign only"
    if smooth:
        out, notes["smooth"] = _smooth(out, gate_sigma=float(smooth))
    if conductivity:
        if S.RXY in out:
            out, notes["conductivity"] = _conductivity(out, geometry_factor=geometry_factor)
        else:
            notes["conductivity"] = "skipped: no R_xy"
    if background:
        out, notes["background"] = remove_background(out)
    out.attrs["prepared"] = ", ".join(notes)
    return out, notes
