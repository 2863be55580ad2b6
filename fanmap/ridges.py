"""Minima ridges of a Landau fan.

Four plain steps over arrays, used in this order by :func:`fanmap.fanfit.fit_fan`:

1. :func:`log_signal` turns R_xx rows into a log signal with single-pixel spikes
   removed and NaN gaps bridged (the gaps are remembered, minima found there are dropped);
   working on log R keeps a background that varies by decades from hiding minima.
2. :func:`find_row_minima` finds the sub-pixel minima of every row, each with its depth,
   prominence, width and a multi-scale Hessian valley strength from :func:`valley_strength`.
3. :func:`link_traces` links minima across neighbouring rows into ridge traces.
4. :func:`vote_origin` and :func:`vote_slopes` are the global transform: every minimum
   votes for the slope of the line joining it to a trial origin (V0, B = 0); the right
   origin makes the votes of each state pile up in one sharp peak, so faint states that
   no single row shows clearly still add up.  :func:`filling_profile` averages the
   whole map along trial lines through the origin, which picks out states too faint
   for row minima altogether.

Gate voltages are in V, fields in T.  Lines of the fan are V = V0 + s |B|.
"""

from dataclasses import dataclass

import numpy as np
from scipy import ndimage, signal as _signal

_LEVEL = 0.25  # height (fraction of prominence) where a wide dip's midpoint is taken

__all__ = ["Minima", "log_signal", "valley_strength", "find_row_minima", "link_traces",
           "trace_table",
           "vote_origin", "vote_slopes", "filling_profile"]


@dataclass
class Minima:
    """Sub-pixel minima of every row of a fan map (one entry per minimum).

    Attributes
    ----------
    row : ndarray of int
        Row (field index, acquisition order) of each minimum.
    field : ndarray
        |B| of the row (T).
    gate : ndarray
        Sub-pixel gate voltage of the minimum (V).
    depth : ndarray
        How far the minimum lies below the row's median log signal (decades).
    prominence : ndarray
        Prominence of the dip in units of the row's noise.
    width : ndarray
        Width of the dip a quarter of its prominence above its bottom (V).
    valley : ndarray
        Hessian valley strength at the minimum, 0 ... 1.
    weight : ndarray
        Inverse variance of the position (V^-2), for the least-squares fit.
    trace : ndarray of int
        Index of the ridge trace the minimum belongs to (-1: none), see :func:`link_traces`.
    gate_alternative : ndarray, optional
        The position by the other sub-pixel refinement (the quarter-height midpoint for a
        narrow dip, the parabola vertex for a wide one): the spread between the two
        measures how far the choice of refinement moves the minima.
    """

    row: np.ndarray
    field: np.ndarray
    gate: np.ndarray
    depth: np.ndarray
    prominence: np.ndarray
    width: np.ndarray
    valley: np.ndarray
    weight: np.ndarray
    trace: np.ndarray
    gate_alternative: np.ndarray | None = None

    def __len__(self):
        return self.row.size

    def take(self, index):
        """A new :class:`Minima` holding only the entries selected by ``index``."""
        return Minima(**{name: (None if getattr(self, name) is None
                                else getattr(self, name)[index])
                         for name in self.__dataclass_fields__})


def _absolute_noise(r):
    """Noise (same units as ``r``) where the signal is lowest: MAD of second differences."""
    second = r[:, 2:] - 2 * r[:, 1:-1] + r[:, :-2]
    low = r[:, 1:-1] <= np.nanpercentile(r, 10) if np.isfinite(r).any() else None
    values = second[low & np.isfinite(second)] if low is not None else np.zeros(0)
    if values.size < 10:
        return 0.0
    return 1.4826 * np.median(np.abs(values - np.median(values))) / np.sqrt(6.0)


def log_signal(resistance, despike=True):
    """Base-10 log of R row by row, spikes removed and NaN gaps bridged.

    Parameters
    ----------
    resistance : array_like, shape (rows, gate)
        R_xx (ohm); NaN marks missing points.
    despike : bool
        Replace a point standing more than five row-noise units above the median of
        itself and its two gate neighbours by that median (single-point spikes).
        Single-point dips are kept: at low field a real state may be one point wide,
        and a drop-out, unlike a state, forms no line across rows.

    Values below five times the noise of the lowest part of the map are clipped there,
    so a zero-resistance plateau is one flat minimum rather than many noise dips.

    Returns
    -------
    logr : ndarray
        Log signal with NaN gaps filled by linear interpolation along the row.
    valid : ndarray of bool
        Where the input was finite.

    Examples
    --------
    >>> logr, valid = log_signal([[10.0, 1.0, np.nan, 10.0, 100.0]], despike=False)
    >>> np.round(logr, 2).tolist(), valid.tolist()
    ([[1.0, 0.0, 0.5, 1.0, 2.0]], [[True, True, False, True, True]])
    """
    # Signed: contact mixing can push R_xx below zero on a plateau; such points join the
    # floor (a flat minimum) instead of making new minima where |R| crosses zero.
    r = np.asarray(resistance, dtype=float)
    valid = np.isfinite(r)
    # A floor keeps exact zeros (perfect QH minima) finite and flat: five times the absolute
    # noise, so that noise on a zero-resistance plateau makes no extra minima, and at least
    # 1e-8 of the row's upper level (dips lie within fewer decades than that).
    upper = np.nanpercentile(np.where(valid, r, np.nan), 90, axis=1, keepdims=True) \
        if valid.any() else np.ones((r.shape[0], 1))
    upper = np.where(np.isfinite(upper) & (upper > 0), upper, 1.0)
    floor = np.maximum(1e-8 * upper, 5 * _absolute_noise(r))
    logr = np.log10(np.maximum(np.where(valid, r, np.nan), floor))
    columns = np.arange(r.shape[1])
    for i in range(r.shape[0]):
        ok = valid[i]
        if ok.all() or not ok.any():
            continue
        logr[i, ~ok] = np.interp(columns[~ok], columns[ok], logr[i, ok])
    logr[~valid.any(axis=1)] = 0.0
    if despike:
        median = ndimage.median_filter(logr, size=(1, 3), mode="nearest")
        noise = _row_noise(logr)[:, None]
        spike = logr - median > np.maximum(5 * noise, 0.02)  # (0.02 decades: noise-free maps)
        logr = np.where(spike, median, logr)
    return logr, valid


def valley_strength(logr, sigmas=(1.0, 2.0, 3.0)):
    """Multi-scale Hessian valley measure of a log map, scaled to 0 ... 1.

    At each pixel and scale the largest eigenvalue of the scale-normalised
    Hessian is positive in a valley (a dark ridge); the measure is the maximum
    over scales.  Each row is standardised first so that decades of background
    change do not favour one part of the map.

    Examples
    --------
    >>> img = np.ones((20, 30)); img[:, 15] = 0.0
    >>> v = valley_strength(img)
    >>> int(np.argmax(v[10])), float(v[10, 15]) == 1.0
    (15, True)
    """
    from skimage.feature import hessian_matrix, hessian_matrix_eigvals

    img = np.asarray(logr, dtype=float)
    centre = np.median(img, axis=1, keepdims=True)
    spread = np.median(np.abs(img - centre), axis=1, keepdims=True)
    img = (img - centre) / np.where(spread > 0, spread, 1.0)
    best = np.zeros_like(img)
    for sigma in sigmas:
        hrr, hrc, hcc = hessian_matrix(img, sigma=sigma, order="rc", use_gaussian_derivatives=False)
        largest = hessian_matrix_eigvals([hrr, hrc, hcc])[0] * sigma**2
        best = np.maximum(best, largest)
    top = np.percentile(best, 99.5)
    return np.clip(best / top, 0.0, 1.0) if top > 0 else best


def _row_noise(rows):
    """Robust noise of each row: MAD of its second differences, in signal units."""
    rows = np.atleast_2d(rows)
    second = rows[:, 2:] - 2 * rows[:, 1:-1] + rows[:, :-2]
    mad = np.median(np.abs(second - np.median(second, axis=1, keepdims=True)), axis=1)
    return np.maximum(1.4826 * mad / np.sqrt(6.0), 1e-6)


def find_row_minima(logr, valid, gate, field, *, min_prominence=4.0, min_separation=3,
                    valley=None, crowded_separation=None):
    """Sub-pixel minima of every row of a log map.

    Each row's dips are found with :func:`scipy.signal.find_peaks` on the negated
    signal; only dips at least ``min_prominence`` times the row noise deep and
    ``min_separation`` points apart are kept (the resolvability cut: at low field
    the states crowd closer than the point spacing and minima there are aliases).
    A row whose kept minima are, on median, closer than ``crowded_separation``
    points is dropped as unresolved.  The position is refined to sub-pixel
    precision: by the vertex of the parabola through the lowest three points for
    dips narrower than two points, by the midpoint of the dip a quarter of its
    prominence above its bottom for wider (and flat-bottomed) ones; that level is low
    enough that steep, unequal walls (the huge neutrality peak beside nu = 2 in graphene)
    pull the midpoint little.  Dips touching a NaN gap are dropped.

    Parameters
    ----------
    logr, valid : ndarray, shape (rows, gate)
        From :func:`log_signal`.
    gate : ndarray, shape (gate,)
        Increasing gate voltages (V).
    field : ndarray, shape (rows,)
        Field of each row (T); the sign is ignored.
    min_prominence : float
        Detection threshold in units of the row noise.
    min_separation : int
        Smallest distance between minima, in points.
    valley : ndarray, optional
        Valley strength (:func:`valley_strength`) sampled at each minimum.
    crowded_separation : float, optional
        Median spacing (points) below which a row counts as unresolved; default
        ``2 * min_separation``, which keeps the aliases of crowded low-field levels out of
        the fan's origin vote.  A search that only follows single lines through
        rows of deep, evenly crowded minima (moire satellites) can pass ``min_separation``.

    Returns
    -------
    Minima

    Examples
    --------
    >>> v = np.linspace(0, 1, 101)
    >>> row = 1 - 0.9 * np.exp(-((v - 0.503) / 0.04) ** 2)
    >>> m = find_row_minima(np.log10([row]), np.ones((1, 101), bool), v, np.array([5.0]))
    >>> f"{m.gate[0]:.3f}"
    '0.503'
    """
    gate = np.asarray(gate, dtype=float)
    step = float(np.median(np.diff(gate)))
    columns = np.arange(gate.size)
    out = {name: [] for name in ("row", "field", "gate", "depth", "prominence", "width", "valley",
                                 "gate_alternative")}
    noises = _row_noise(logr)
    medians = np.median(logr, axis=1)
    if crowded_separation is None:
        crowded_separation = 2 * min_separation
    for i, row in enumerate(logr):
        if valid[i].sum() < max(10, 2 * min_separation) or not np.isfinite(field[i]) or field[i] == 0:
            continue
        noise = noises[i]
        peaks, props = _signal.find_peaks(-row, prominence=min_prominence * noise,
                                          distance=min_separation)
        if peaks.size == 0:
            continue
        if peaks.size > 2 and np.median(np.diff(peaks)) < crowded_separation:
            continue
        # Dips separated by less than the detection threshold (noise on one flat floor, a
        # clipped plateau) are one dip; a dip's width is measured between the highest
        # points separating it from its neighbouring dips, so that distinct dips at one
        # common floor level keep their own midpoints.
        saddles = np.array([a + int(np.argmax(row[a:b + 1]))
                            for a, b in zip(peaks[:-1], peaks[1:])], int)
        barrier = row[saddles] - np.maximum(row[peaks[:-1]], row[peaks[1:]])
        group = np.r_[0, np.cumsum(barrier >= min_prominence * noise)]
        first = np.r_[0, np.flatnonzero(np.diff(group)) + 1]
        last = np.r_[first[1:] - 1, peaks.size - 1]
        rep = np.array([a + int(np.argmin(row[peaks[a:b + 1]])) for a, b in zip(first, last)])
        bounds = np.r_[0, saddles, row.size - 1]
        left_bases = np.maximum(props["left_bases"][rep], bounds[first])
        right_bases = np.minimum(props["right_bases"][rep], bounds[last + 1])
        peaks = peaks[rep]
        props = {key: value[rep] for key, value in props.items()}
        _, _, left, right = _signal.peak_widths(-row, peaks, rel_height=_LEVEL,
                                                prominence_data=(props["prominences"],
                                                                 left_bases, right_bases))
        narrow = (right - left < 2.0) & (peaks > 0) & (peaks < row.size - 1)
        p = np.clip(peaks, 1, row.size - 2)
        y0, y1, y2 = row[p - 1], row[p], row[p + 1]
        curvature = y0 - 2 * y1 + y2
        with np.errstate(divide="ignore", invalid="ignore"):
            shift = np.where(curvature > 0, 0.5 * (y0 - y2) / curvature, 0.0)
        vertex = peaks + np.clip(shift, -0.5, 0.5)
        midpoint = 0.5 * (left + right)
        pos = np.where(narrow, vertex, midpoint)
        other = np.where(narrow, midpoint, vertex)
        # Drop dips inside or touching a NaN gap (their shape is invented), and dips cut by the edge.
        lo = np.clip(np.floor(left).astype(int) - 1, 0, row.size - 1)
        hi = np.clip(np.ceil(right).astype(int) + 1, 0, row.size - 1)
        bad = np.cumsum(~valid[i])
        gap = (bad[hi] - np.where(lo > 0, bad[lo - 1], 0)) > 0
        edge = (left <= 0.5) | (right >= row.size - 1.5)
        keep = ~gap & ~edge
        if not keep.any():
            continue
        n = int(keep.sum())
        out["row"].append(np.full(n, i))
        out["field"].append(np.full(n, abs(float(field[i]))))
        out["gate"].append(np.interp(pos[keep], columns, gate))
        out["gate_alternative"].append(np.interp(other[keep], columns, gate))
        out["depth"].append(medians[i] - row[peaks[keep]])
        out["prominence"].append(props["prominences"][keep] / noise)
        out["width"].append((right - left)[keep] * abs(step))
        out["valley"].append(valley[i, peaks[keep]] if valley is not None else np.ones(n))
    arrays = {k: (np.concatenate(v) if v else np.zeros(0)) for k, v in out.items()}
    arrays["row"] = arrays["row"].astype(int)
    # Position error ~ width / (prominence / noise), never below a quarter point.
    sigma = np.maximum(arrays["width"] / np.maximum(arrays["prominence"], 1.0), 0.25 * abs(step))
    arrays["weight"] = (0.5 + 0.5 * arrays["valley"]) / sigma**2
    arrays["trace"] = np.full(arrays["row"].size, -1)
    return Minima(**arrays)


def link_traces(minima, tolerance, min_points=3):
    """Link minima of neighbouring rows into ridge traces (in place).

    Rows are visited in order of increasing field; a minimum joins the trace
    whose extrapolated position (last point plus last slope) is nearest, if it
    lies within ``tolerance`` (V) and no closer minimum claims that trace.  A trace
    may skip one row (a spike or a gap).  Traces shorter than ``min_points`` are
    dissolved (trace = -1).

    Returns
    -------
    int
        Number of traces.

    Examples
    --------
    >>> m = Minima(row=np.array([0, 0, 1, 1, 2]), field=np.array([1., 1, 2, 2, 3]),
    ...            gate=np.array([0.1, 0.5, 0.2, 0.5, 0.3]), depth=np.ones(5),
    ...            prominence=np.ones(5), width=np.ones(5), valley=np.ones(5),
    ...            weight=np.ones(5), trace=np.full(5, -1))
    >>> link_traces(m, tolerance=0.15, min_points=2), m.trace.tolist()
    (2, [0, 1, 0, 1, 0])
    """
    order = np.lexsort((minima.gate, minima.field))
    rows_in_order = minima.row[order]
    boundaries = np.flatnonzero(np.diff(rows_in_order)) + 1
    groups = np.split(order, boundaries) if order.size else []
    trace = np.full(len(minima), -1)
    n = len(minima)
    last_gate, last_field = np.zeros(n), np.zeros(n)
    slope, missed = np.zeros(n), np.zeros(n, int)
    alive = np.zeros(0, int)   # traces seen within the last two rows
    count = 0
    for group in groups:
        positions = minima.gate[group]
        b = minima.field[group[0]]
        taken = np.zeros(group.size, bool)
        continued = np.zeros(alive.size, bool)
        if alive.size:
            predicted = last_gate[alive] + slope[alive] * (b - last_field[alive])
            distance = np.abs(predicted[:, None] - positions[None, :])
            pairs = np.argwhere(distance < tolerance)
            pairs = pairs[np.argsort(distance[pairs[:, 0], pairs[:, 1]])]
            for a, k in pairs:
                if continued[a] or taken[k]:
                    continue
                continued[a] = taken[k] = True
                t_id = alive[a]
                if b > last_field[t_id]:
                    slope[t_id] = (positions[k] - last_gate[t_id]) / (b - last_field[t_id])
                last_gate[t_id], last_field[t_id], missed[t_id] = positions[k], b, 0
                trace[group[k]] = t_id
            missed[alive[~continued]] += 1
        new = np.arange(count, count + int((~taken).sum()))
        trace[group[~taken]] = new
        last_gate[new], last_field[new], slope[new], missed[new] = positions[~taken], b, 0.0, 0
        count += new.size
        alive = np.concatenate([alive[missed[alive] <= 2], new])
    labels, counts = np.unique(trace[trace >= 0], return_counts=True)
    good = labels[counts >= min_points]
    remap = np.full(count + 1, -1)
    remap[good] = np.arange(good.size)
    minima.trace = remap[trace]
    return int(good.size)


def trace_table(minima):
    """One entry per ridge trace: its points, weights and field range.

    Returns a dict of arrays indexed by trace number: ``points`` (count),
    ``field_min``/``field_max`` (T), ``gate_first``/``gate_last`` (V, at the lowest and
    highest field), ``weight`` (sum of the point weights) and ``prominence`` (median,
    row-noise units).

    Examples
    --------
    >>> m = Minima(row=np.array([0, 1, 2]), field=np.array([1., 2, 3]),
    ...            gate=np.array([0.1, 0.2, 0.3]), depth=np.ones(3), prominence=np.full(3, 5.0),
    ...            width=np.ones(3), valley=np.ones(3), weight=np.ones(3), trace=np.zeros(3, int))
    >>> t = trace_table(m)
    >>> t["points"].tolist(), t["field_max"].tolist(), t["gate_last"].tolist()
    ([3], [3.0], [0.3])
    """
    labels = minima.trace
    n = int(labels.max()) + 1 if labels.size and labels.max() >= 0 else 0
    table = {"points": np.zeros(n, int), "field_min": np.full(n, np.nan),
             "field_max": np.full(n, np.nan), "gate_first": np.full(n, np.nan),
             "gate_last": np.full(n, np.nan), "weight": np.zeros(n), "prominence": np.zeros(n)}
    for t in range(n):
        pts = np.flatnonzero(labels == t)
        if pts.size == 0:
            continue
        order = pts[np.argsort(minima.field[pts])]
        table["points"][t] = pts.size
        table["field_min"][t], table["field_max"][t] = minima.field[order[[0, -1]]]
        table["gate_first"][t], table["gate_last"][t] = minima.gate[order[[0, -1]]]
        table["weight"][t] = minima.weight[pts].sum()
        table["prominence"][t] = np.median(minima.prominence[pts])
    return table


def _vote_histogram(slopes, votes, bin_width, lo, hi):
    edges_n = int(np.ceil((hi - lo) / bin_width)) + 1
    index = np.clip(((slopes - lo) / bin_width).astype(int), 0, edges_n - 1)
    hist = np.bincount(index, weights=votes, minlength=edges_n)
    # A short binomial kernel (about one bin wide) spreads each vote over its neighbours.
    return np.convolve(hist, [0.25, 0.5, 0.25], mode="same")


def vote_origin(gate, field, votes, candidates, bin_width):
    """Score trial fan origins by how sharply the minima vote for common slopes.

    For each trial zero-density voltage V0 every minimum (V, B) votes, with
    weight ``votes``, for the slope s = (V - V0) / B; the score is the
    inverse participation ratio of the smoothed vote histogram (large when the
    votes pile up on few slopes, as they do at the true origin).

    Examples
    --------
    >>> b = np.tile(np.linspace(2, 10, 30), 3)
    >>> s = np.repeat([0.02, 0.05, 0.08], 30)
    >>> trial = np.linspace(-1, 1, 41)
    >>> scores = vote_origin(0.3 + s * b, b, np.ones(90), trial, 0.002)
    >>> round(float(trial[np.argmax(scores)]), 3)
    0.3
    """
    gate = np.asarray(gate, float)
    field = np.asarray(field, float)
    votes = np.asarray(votes, float)
    scores = np.empty(len(candidates))
    for i, v0 in enumerate(candidates):
        s = (gate - v0) / field
        hist = _vote_histogram(s, votes, bin_width, s.min(), s.max())
        scores[i] = np.sum(hist**2) / max(np.sum(hist) ** 2, 1e-300)
    return scores


def vote_slopes(slopes, votes, bin_width, min_votes):
    """Peaks of the slope-vote histogram: the candidate lines of the fan.

    Returns the slopes (V/T) of histogram peaks holding at least ``min_votes``,
    refined to the weighted mean of the votes within one bin of the peak,
    strongest first.

    Examples
    --------
    >>> s = np.r_[np.full(20, 0.05), np.full(15, -0.03), [0.2]]
    >>> vote_slopes(s, np.ones(36), 0.002, 5).round(3).tolist()
    [0.05, -0.03]
    """
    slopes = np.asarray(slopes, float)
    votes = np.asarray(votes, float)
    if slopes.size == 0:
        return np.zeros(0)
    lo, hi = slopes.min() - 3 * bin_width, slopes.max() + 3 * bin_width
    hist = _vote_histogram(slopes, votes, bin_width, lo, hi)
    peaks, props = _signal.find_peaks(hist, height=0.25 * min_votes, prominence=0.25 * min_votes)
    found = []
    for p in peaks[np.argsort(props["peak_heights"])[::-1]]:
        centre = lo + (p + 0.5) * bin_width
        near = np.abs(slopes - centre) <= 1.5 * bin_width
        if votes[near].sum() >= min_votes:
            found.append(np.average(slopes[near], weights=votes[near]))
    return np.asarray(found)


def filling_profile(logr, gate, field, origin, slopes, rows=None):
    """Mean row-normalised log signal along lines V = origin + s |B| through the origin.

    ``origin`` may be a scalar or one value per row (drift, hysteresis).  Lines
    leaving the gate window in a row skip that row.  A dip of the profile at s is
    a state of the fan even when no single row resolves it.

    Returns
    -------
    profile : ndarray, shape (slopes,)
        Mean standardised signal (row noise units; negative in dips).
    count : ndarray
        Rows that contributed to each slope.

    Examples
    --------
    >>> v = np.linspace(0, 1, 201); b = np.linspace(2, 10, 40)
    >>> img = np.log10(2 - np.exp(-((v[None] - 0.1 - 0.05 * b[:, None]) / 0.01) ** 2))
    >>> prof, n = filling_profile(img, v, b, 0.1, np.array([0.03, 0.05, 0.07]))
    >>> int(np.argmin(prof))
    1
    """
    gate = np.asarray(gate, float)
    b = np.abs(np.asarray(field, float))
    slopes = np.asarray(slopes, float)
    origin = np.broadcast_to(np.asarray(origin, float), b.shape)
    rows = np.arange(b.size) if rows is None else np.asarray(rows)
    total = np.zeros(slopes.size)
    count = np.zeros(slopes.size)
    for i in rows:
        if b[i] == 0:
            continue
        row = logr[i]
        centre = np.median(row)
        spread = np.std(row)
        if not spread > 0:
            continue
        v = origin[i] + slopes * b[i]
        inside = (v >= gate[0]) & (v <= gate[-1])
        total[inside] += (np.interp(v[inside], gate, row) - centre) / spread
        count[inside] += 1
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / count, 0.0), count
