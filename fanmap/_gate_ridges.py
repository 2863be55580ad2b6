"""Ridges of dual-gate maps: families of constant-density lines and their points.

Every feature of a dual-gate map that depends on the density alone lies on a
line V_t + q V_b = u with q = C_b / C_t: the charge-neutrality ridge at zero
field, the quantum Hall minima at fixed field.  Everything here works in that
coordinate ``u`` (V, "equivalent top-gate voltage"):

* :func:`best_ratio` finds q as the orientation that makes the map most
  nearly a function of u alone (largest share of variance explained by u);
* :func:`profile` is the map averaged along such lines;
* :func:`trace_extrema` fits each line, trace by trace, with a Lorentzian on a
  linear background (vectorised Levenberg-Marquardt), giving sub-pixel points
  with uncertainties;
* :func:`symmetry_centre` finds the centre of a curve that is even about an
  unknown point (the resistance at neutrality versus displacement field).
"""

import warnings

import numpy as np
from scipy import interpolate, signal

__all__ = ["log_signal", "best_ratio", "profile", "rotated_grid", "trace_extrema",
           "symmetry_centre", "minimum_location", "sample_along_line"]


def log_signal(values):
    """Natural log of |R| with a floor at 1 % of the median (QH minima reach zero)."""
    values = np.abs(np.asarray(values, dtype=float))
    floor = 0.01 * np.nanmedian(values)
    return np.log(values + max(floor, np.finfo(float).tiny))


def _bin_index(z, top, bottom, q, step=None):
    if step is None:
        step = max(abs(top[1] - top[0]), q * abs(bottom[1] - bottom[0]))
    u = top[None, :] + q * bottom[:, None]
    u0 = np.nanmin(u)
    return ((u - u0) / step).astype(np.int64), u0, step


def _explained_share(values, top_px, bottom_px, q, steps):
    """Adjusted share of the variance of ``values`` explained by u = V_t + q V_b (binned)."""
    step = max(steps[0], q * steps[1])
    u = top_px + q * bottom_px
    index = ((u - u.min()) / step).astype(np.int64)
    counts = np.bincount(index)
    sums = np.bincount(index, values)
    used = counts > 0
    means = sums[used] / counts[used]
    total = values.mean()
    between = np.sum(counts[used] * (means - total) ** 2)
    spread = np.sum((values - total) ** 2)
    n, k = values.size, used.sum()
    share = between / spread
    # Adjusted for the number of bins, so that finer binning earns no credit.
    return 1.0 - (1.0 - share) * (n - 1) / max(n - k, 1)


def best_ratio(z, top, bottom, edge_share=0.03, max_pixels=60000):
    """Ratio q = C_b/C_t whose lines V_t + q V_b = const best explain the map ``z``.

    ``z`` has shape (len(bottom), len(top)).  Orientations in which one gate
    contributes less than ``edge_share`` of the range of u are left out: lines
    set by one gate alone (contacts gated only by the bottom gate, regions
    under one gate) are not constant-density lines of the dual-gated channel.
    Returns ``(q, share)``, share being the adjusted fraction of the variance
    of ``z`` explained by u = V_t + q V_b, at the best interior maximum.
    Large maps are scored on a fixed random subset of ``max_pixels`` pixels.
    """
    # Remove what depends on one gate alone (row and column means): a line of
    # constant V_b from the contacts would otherwise win over the channel's ridge.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        z = z - np.nanmean(z, axis=1, keepdims=True)
        z = z - np.nanmean(z, axis=0, keepdims=True)
    finite = np.isfinite(z)
    rows, cols = np.nonzero(finite)
    if rows.size > max_pixels:
        # A fixed random subset keeps every pixel's exact position (no smearing of narrow
        # lines) at a bounded cost.
        pick = np.random.default_rng(0).choice(rows.size, max_pixels, replace=False)
        rows, cols = rows[pick], cols[pick]
    sample = (z[rows, cols], top[cols], bottom[rows],
              (abs(top[1] - top[0]), abs(bottom[1] - bottom[0])))
    spans = np.ptp(top) / np.ptp(bottom)
    low, high = spans * edge_share / (1 - edge_share), spans * (1 - edge_share) / edge_share
    coarse = np.geomspace(low, high, 401)
    shares = np.array([_explained_share(sample[0], sample[1], sample[2], q, sample[3])
                       for q in coarse])
    interior = np.flatnonzero((shares[1:-1] >= shares[:-2]) & (shares[1:-1] >= shares[2:])) + 1
    best = int(interior[np.argmax(shares[interior])]) if interior.size else int(np.argmax(shares))
    lo, hi = coarse[max(best - 2, 0)], coarse[min(best + 2, coarse.size - 1)]
    fine = np.geomspace(lo, hi, 41)
    fine_shares = np.array([_explained_share(sample[0], sample[1], sample[2], q, sample[3])
                            for q in fine])
    best = int(np.argmax(fine_shares))
    return float(fine[best]), float(fine_shares[best])


def profile(z, top, bottom, q, fine=False):
    """Map ``z`` averaged along the lines V_t + q V_b = u: ``(u, mean, count, noise)``.

    ``fine=True`` bins at half the finer pixel step (for narrow, dense lines).
    ``noise`` is the median standard error of a bin's mean.
    """
    finite = np.isfinite(z)
    step = 0.5 * min(top[1] - top[0], q * (bottom[1] - bottom[0])) if fine else None
    index, u0, step = _bin_index(z, top, bottom, q, step)
    counts = np.bincount(index[finite])
    sums = np.bincount(index[finite], z[finite])
    squares = np.bincount(index[finite], z[finite] ** 2)
    with np.errstate(invalid="ignore", divide="ignore"):
        means = sums / counts
        # Standard error of each bin's mean: an upper bound of the noise (the spread
        # along a line includes its dependence on D).
        errors = np.sqrt(np.maximum(squares / counts - means**2, 0.0) / np.maximum(counts - 1, 1))
    centres = u0 + (np.arange(counts.size) + 0.5) * step
    keep = counts >= max(3, 0.2 * np.median(counts[counts > 0]))
    # Trim the sparse ends; fill sparse bins inside (pixel and bin grids beat) so
    # that the profile stays evenly spaced.
    first, last = np.flatnonzero(keep)[[0, -1]]
    centres, means, counts, errors, keep = (a[first:last + 1]
                                            for a in (centres, means, counts, errors, keep))
    means = np.where(keep, means, np.interp(centres, centres[keep], means[keep]))
    return centres, means, counts, float(np.median(errors[keep]))


def rotated_grid(values, top, bottom, q, step=None):
    """Resample a map onto u = V_t + q V_b (along traces) and w = V_t - q V_b (across).

    With q = C_b/C_t, u is proportional to the density and w to the
    displacement field, so a trace at fixed w crosses every constant-density
    line at right angles and at constant D: features whose strength depends on
    D (the bilayer gap) stay symmetric within one trace.  Returns ``(u, w,
    resampled)`` with ``resampled`` of shape (len(w), len(u)), NaN outside the map.
    """
    fine = min(top[1] - top[0], q * (bottom[1] - bottom[0]))
    if step is not None:
        fine = min(fine, step)
    coarse = max(top[1] - top[0], q * (bottom[1] - bottom[0]))
    corners_t, corners_b = np.meshgrid(top[[0, -1]], bottom[[0, -1]])
    u_c, w_c = corners_t + q * corners_b, corners_t - q * corners_b
    u = np.arange(u_c.min(), u_c.max() + fine / 2, fine)
    w = np.arange(w_c.min() + coarse / 2, w_c.max(), coarse)
    uu, ww = np.meshgrid(u, w)
    interp = interpolate.RegularGridInterpolator((bottom, top), values, bounds_error=False,
                                                 fill_value=np.nan)
    resampled = interp(np.column_stack([((uu - ww) / (2 * q)).ravel(), ((uu + ww) / 2).ravel()]))
    return u, w, resampled.reshape(uu.shape)


def _lorentz_batch(t, y, weights, x0, width, sign, iterations=30):
    """Fit y = b0 + b1 t + sign*A/(1 + ((t - x0)/w)^2) to every row of (t, y) at once.

    Returns ``(x0, x0_stderr, amplitude, height, area, ok)``, height being the
    model at x0 (background plus feature), area the sum of the data above the
    fitted background (per sample); rows are independent.
    """
    n = y.shape[0]
    # Each row in units of its own largest value: resistances span decades.
    scale = np.max(np.abs(np.where(weights > 0, y, 0.0)), axis=1, keepdims=True)
    scale = np.where(scale > 0, scale, 1.0)
    y = y / scale
    edge = np.where(weights > 0, y, np.nan)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # windows with NaN ends
        base = np.nanmedian(np.concatenate([edge[:, :2], edge[:, -2:]], axis=1), axis=1)
        base = np.where(np.isfinite(base), base, np.nanmedian(edge, axis=1))
        peak = np.nanmax(sign * edge, axis=1) * sign
    params = np.column_stack([x0, np.log(width), np.maximum(sign * (peak - base), 1e-12),
                              base, np.zeros(n)])

    def model(p):
        s = (t - p[:, 0:1]) / np.exp(p[:, 1:2])
        lor = 1.0 / (1.0 + s * s)
        return p[:, 3:4] + p[:, 4:5] * t + sign * p[:, 2:3] * lor, s, lor

    def jacobian(p, s, lor):
        w = np.exp(p[:, 1:2])
        amp = sign * p[:, 2:3]
        return np.stack([amp * 2 * s * lor**2 / w, amp * 2 * s * s * lor**2, sign * lor,
                         np.ones_like(t), t], axis=-1)

    fit, s, lor = model(params)
    cost = np.sum(weights * (y - fit) ** 2, axis=1)
    damping = np.full(n, 1e-2)
    for _ in range(iterations):
        jac = jacobian(params, s, lor) * np.sqrt(weights)[..., None]
        resid = (y - fit) * np.sqrt(weights)
        jac_t = jac.transpose(0, 2, 1)
        jtj = jac_t @ jac
        grad = (jac_t @ resid[..., None])[..., 0]
        diag = np.diagonal(jtj, axis1=1, axis2=2)
        system = jtj + damping[:, None, None] * (diag[:, :, None] * np.eye(5) + 1e-12 * np.eye(5))
        try:
            step = np.linalg.solve(system, grad[..., None])[..., 0]
        except np.linalg.LinAlgError:  # a degenerate row: fall back to pseudo-inverses
            step = (np.linalg.pinv(system) @ grad[..., None])[..., 0]
        trial = params + step
        trial[:, 1] = np.clip(trial[:, 1], np.log(0.2), np.log(10.0 * t.shape[1]))
        trial_fit, trial_s, trial_lor = model(trial)
        trial_cost = np.sum(weights * (y - trial_fit) ** 2, axis=1)
        better = np.isfinite(trial_cost) & (trial_cost < cost)
        params[better] = trial[better]
        fit[better], s[better], lor[better] = trial_fit[better], trial_s[better], trial_lor[better]
        cost[better] = trial_cost[better]
        damping = np.where(better, damping / 3.0, damping * 4.0)
    jac = jacobian(params, s, lor) * np.sqrt(weights)[..., None]
    jtj = jac.transpose(0, 2, 1) @ jac
    dof = np.maximum(weights.sum(axis=1) - 5, 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        try:
            cov = np.linalg.inv(jtj + 1e-30 * np.eye(5))
            var = cov[:, 0, 0] * cost / dof
        except np.linalg.LinAlgError:
            var = np.full(n, np.nan)
    stderr = np.sqrt(np.abs(var))
    ok = (np.isfinite(params).all(axis=1) & np.isfinite(stderr) & (params[:, 2] > 0)
          & (params[:, 0] > t[:, 0]) & (params[:, 0] < t[:, -1]))
    height = (params[:, 3] + params[:, 4] * params[:, 0] + sign * params[:, 2]) * scale[:, 0]
    # Area of the feature above the fitted background: unlike the amplitude it does not
    # depend on where a feature narrower than the sampling falls between samples.
    area = np.sum(weights * sign * (y - params[:, 3:4] - params[:, 4:5] * t), axis=1) * scale[:, 0]
    return params[:, 0], stderr, params[:, 2] * scale[:, 0], height, area, ok


def trace_extrema(values, scan, other, q_scan, centres, half_window, sign, width,
                  min_contrast=0.0):
    """Sub-pixel extrema of every trace near each line of a family.

    Parameters
    ----------
    values : ndarray, shape (len(other), len(scan))
        Resistance, one trace per row (rows: the other gate).
    scan, other : ndarray
        Gate voltages along a trace and across traces (V), increasing.
    q_scan : float
        Lines are scan + q_scan * other = centre.
    centres : sequence of float
        Line positions (V, in the ``scan`` gate's units).
    half_window : int
        Half width of the fitted window, in pixels.
    sign : {+1, -1}
        +1 for a maximum (neutrality ridge), -1 for a minimum (QH state).
    width : float
        Starting half width of the feature, in pixels.
    min_contrast : float
        Smallest accepted amplitude, as a fraction of the local background.

    Returns
    -------
    dict of arrays: ``line`` (index into centres), ``scan``, ``other``,
    ``scan_stderr`` (V), ``amplitude`` (feature above its background) and
    ``peak`` (fitted value at the extremum), in the units of ``values``, and
    ``area`` (feature above its background integrated along the trace, units x V).
    """
    step = scan[1] - scan[0]
    n_other, n_scan = values.shape
    m = 2 * half_window + 1
    out = {key: [] for key in ("line", "scan", "other", "scan_stderr", "amplitude", "peak",
                               "area")}
    offsets = np.arange(-half_window, half_window + 1)
    for line, centre in enumerate(centres):
        expected = (centre - q_scan * other - scan[0]) / step
        inside = (expected >= half_window) & (expected <= n_scan - 1 - half_window)
        rows = np.flatnonzero(inside)
        if rows.size == 0:
            continue
        # Discrete extremum within the window around the expected position.
        index = np.rint(expected[rows]).astype(int)[:, None] + offsets[None, :]
        window = values[rows[:, None], index]
        finite = np.isfinite(window)
        if not finite.any():
            continue
        filled = np.where(finite, window, -np.inf if sign > 0 else np.inf)
        best = np.argmax(filled, axis=1) if sign > 0 else np.argmin(filled, axis=1)
        centre_index = np.clip(index[:, 0] + best, half_window, n_scan - 1 - half_window)
        index = centre_index[:, None] + offsets[None, :]
        window = values[rows[:, None], index]
        weights = np.isfinite(window).astype(float)
        good_rows = weights.sum(axis=1) >= max(7, 0.6 * m)
        if not good_rows.any():
            continue
        rows, index, window, weights = rows[good_rows], index[good_rows], window[good_rows], weights[good_rows]
        y = np.where(weights > 0, window, 0.0)
        t = np.broadcast_to(offsets.astype(float), y.shape).copy()
        x0, x0_err, amp, height, area, ok = _lorentz_batch(t, y, weights, np.zeros(len(rows)),
                                                np.full(len(rows), max(width, 0.7)), sign)
        base = np.nanmedian(np.abs(window), axis=1)
        ok &= amp > min_contrast * np.maximum(base, 1e-300)
        ok &= x0_err < 0.25 * half_window
        position = scan[0] + (index[:, half_window] + x0) * step
        out["line"].append(np.full(ok.sum(), line))
        out["scan"].append(position[ok])
        out["other"].append(other[rows][ok])
        out["scan_stderr"].append(np.abs(x0_err[ok] * step))
        out["amplitude"].append(amp[ok])
        out["peak"].append(height[ok])
        out["area"].append(area[ok] * step)
    return {key: (np.concatenate(v) if v else np.empty(0)) for key, v in out.items()}


def sample_along_line(values, top, bottom, top_of_bottom, bottoms):
    """Values of the map (shape (len(bottom), len(top))) at (top_of_bottom(V_b), V_b)."""
    interp = interpolate.RegularGridInterpolator((bottom, top), values, bounds_error=False,
                                                 fill_value=np.nan)
    return interp(np.column_stack([bottoms, top_of_bottom(bottoms)]))


def _correlation_length(resid):
    """Integrated autocorrelation length (samples) of a residual sequence, at least 1."""
    r = resid - resid.mean()
    if r.size < 4 or not np.any(r):
        return 1.0
    acf = np.correlate(r, r, mode="full")[r.size - 1:] / np.dot(r, r)
    total = 1.0
    for value in acf[1:r.size // 2]:
        if value <= 0:
            break
        total += 2 * value
    return float(total)


def symmetry_centre(x, y, min_overlap=0.3):
    """Point c about which the curve y(x) is most nearly even, with its standard error.

    Searches the inner part of the range so that at least ``min_overlap`` of the
    range lies on both sides.  Returns ``(c, stderr, dip, at_edge)``: ``dip`` is
    the mismatch between the two sides at c relative to its median over all
    trial centres (well below 1 for a curve with a clear centre, near 1 for a
    flat or noisy one); ``at_edge`` is True when the best centre sits on the
    search boundary (a monotonic curve).  The standard error allows for
    residuals correlated along the curve (integrated autocorrelation).
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    keep = np.isfinite(x) & np.isfinite(y)
    x, y = x[keep], y[keep]
    order = np.argsort(x)
    x, y = x[order], y[order]
    if x.size < 9:
        return np.nan, np.nan, 0.0, True
    # Drop isolated outliers (a crossing feature, a failed fit) against a running median.
    from scipy.ndimage import median_filter
    trend = median_filter(y, size=9, mode="nearest")
    deviation = np.abs(y - trend)
    keep = deviation <= 4 * 1.4826 * np.median(deviation) + 1e-300
    x, y = x[keep], y[keep]
    # Local scatter: pairs from noisy stretches (a narrow ridge at large |D|) count less.
    local = 1.4826 * median_filter(np.abs(y - trend[keep]), size=15, mode="nearest")
    local = np.maximum(local, 0.1 * np.median(local) + 1e-12)
    noise_at = interpolate.interp1d(x, local, bounds_error=False, fill_value=np.nan)
    span = x[-1] - x[0]
    spacing = span / (x.size - 1)
    noise = np.median(np.abs(np.diff(y, 2))) / 0.6745 / np.sqrt(6) + 1e-300
    f = interpolate.interp1d(x, y, bounds_error=False, fill_value=np.nan)
    half_min = 0.5 * min_overlap * span

    def mismatch(c):
        # Mirror no further than a fifth of the range: far from the centre a curve
        # is least symmetric (sampling, a gap that saturates) and least informative.
        reach = min(c - x[0], x[-1] - c, max(0.2 * span, half_min))
        if reach < half_min:
            return np.inf, 0
        d = np.arange(spacing, reach, spacing)
        right, left = f(c + d), f(c - d)
        ok = np.isfinite(right) & np.isfinite(left)
        if ok.sum() < 4:
            return np.inf, 0
        right, left = right[ok], left[ok]
        weight = 1.0 / (noise_at(c + d[ok]) ** 2 + noise_at(c - d[ok]) ** 2)
        centre_value = 0.5 * (right.mean() + left.mean())
        # Normalised: 0 for a mirror image, about 1 for two unrelated (or flat, noisy) sides.
        spread = np.sum(weight * ((right - centre_value) ** 2 + (left - centre_value) ** 2))
        return np.sum(weight * (right - left) ** 2) / max(spread, 1e-300), ok.sum()

    candidates = np.linspace(x[0] + half_min, x[-1] - half_min, 4 * x.size)
    costs = np.array([mismatch(c)[0] for c in candidates])
    best = int(np.argmin(costs))
    # Refine on a fine grid around the coarse best.
    fine = np.linspace(candidates[max(best - 2, 0)], candidates[min(best + 2, candidates.size - 1)], 81)
    fine_costs = np.array([mismatch(c)[0] for c in fine])
    fbest = int(np.argmin(fine_costs))
    centre = float(fine[fbest])
    at_edge = best in (0, candidates.size - 1)
    cost, count = mismatch(centre)
    # Gauss-Newton standard error of c: residuals r(d) = y(c+d) - y(c-d).
    reach = min(centre - x[0], x[-1] - centre, max(0.2 * span, half_min))
    d = np.arange(spacing, reach, spacing)
    slope = np.gradient(signal.savgol_filter(y, min(11, x.size - (1 - x.size % 2)), 2), x)
    fs = interpolate.interp1d(x, slope, bounds_error=False, fill_value=np.nan)
    jac = fs(centre + d) - fs(centre - d)
    resid = f(centre + d) - f(centre - d)
    ok = np.isfinite(jac) & np.isfinite(resid)
    jac, resid = jac[ok], resid[ok]
    dof = max(count - 1, 1)
    mean_square = max(np.mean(resid**2) if resid.size else 0.0, 2 * noise**2)
    stderr = np.sqrt(mean_square / max(np.sum(jac * jac), 1e-300) * count / dof)
    stderr *= np.sqrt(_correlation_length(resid))
    finite_costs = costs[np.isfinite(costs)]
    dip = float(cost / np.median(finite_costs)) if finite_costs.size else 1.0
    return centre, float(stderr), dip, bool(at_edge)


def _finite_sorted(x, y):
    """The finite (x, y) pairs as float arrays, in ascending x."""
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    keep = np.isfinite(x) & np.isfinite(y)
    order = np.argsort(x[keep])
    return x[keep][order], y[keep][order]


def minimum_location(x, y, min_rise=0.2):
    """Position of a clear minimum of y(x) (a log resistance), with its standard error.

    The curve is smoothed with a running median; the minimum counts when y
    rises by at least ``min_rise`` on both sides of it.  A parabola through the
    lowest quarter of the dip (between the minimum and the lower of the two
    rises) gives the position.  Returns ``(x_min, stderr)`` or None.
    """
    from scipy.ndimage import median_filter

    x, y = _finite_sorted(x, y)
    if x.size < 12:
        return None
    smooth = median_filter(y, size=9, mode="nearest")
    low = int(np.argmin(smooth))
    rise = min(smooth[:low + 1].max(), smooth[low:].max()) - smooth[low] if 0 < low < x.size - 1 else 0.0
    if rise < min_rise:
        return None
    sel = smooth <= smooth[low] + 0.25 * rise
    # The contiguous stretch around the minimum only.
    edges = np.flatnonzero(~sel)
    left = edges[edges < low].max() + 1 if np.any(edges < low) else 0
    right = edges[edges > low].min() if np.any(edges > low) else x.size
    xs, ys = x[left:right], y[left:right]
    if xs.size < 5:
        return None
    coef, cov = np.polyfit(xs - x[low], ys, 2, cov=True)
    if coef[0] <= 0:
        return float(x[low]), float(np.ptp(xs) / 2)
    vertex = -coef[1] / (2 * coef[0])
    grad = np.array([coef[1] / (2 * coef[0] ** 2), -1 / (2 * coef[0]), 0.0])
    stderr = float(np.sqrt(max(grad @ cov @ grad, 0.0)))
    if not (xs[0] <= vertex + x[low] <= xs[-1]):
        return float(x[low]), float(np.ptp(xs) / 2)
    return float(vertex + x[low]), max(stderr, float(np.median(np.diff(xs))) / 2)


def dip_centre(x, y, levels=(0.3, 0.5, 0.7), min_rise=0.5):
    """Middle of a dip of y(x) between its two flanks, with its standard error.

    At each fraction of ``levels`` of the dip's depth (from its bottom to the lower of
    the two side maxima) the flanks are crossed once on each side; the centre is the
    mean of the crossings' midpoints.  Only the flanks are used, so a flat bottom or
    side plateaus that differ (saturated, unevenly sampled) do not pull the centre.
    The error combines the crossings' noise (scatter / slope) with the spread of the
    midpoints between levels (a dip that is not even).  Returns ``(centre, stderr)``
    or None when there is no dip deeper than ``min_rise``.

    Examples
    --------
    >>> x = np.linspace(-10, 10, 201)
    >>> c, err = dip_centre(x, np.minimum(np.abs(x - 1.5), 6.0))
    >>> round(c, 2)
    1.5
    """
    from scipy.ndimage import median_filter

    x, y = _finite_sorted(x, y)
    if x.size < 12:
        return None
    smooth = median_filter(y, size=5, mode="nearest")
    low = int(np.argmin(smooth))
    if not 0 < low < x.size - 1:
        return None
    top = min(smooth[:low + 1].max(), smooth[low:].max())
    depth = top - smooth[low]
    if depth < min_rise:
        return None
    scatter = 1.4826 * np.median(np.abs(y - smooth)) + 1e-12
    slope = np.gradient(smooth, x)
    mids, errs = [], []
    for fraction in levels:
        level = smooth[low] + fraction * depth
        left = np.flatnonzero(smooth[:low + 1] >= level)
        right = np.flatnonzero(smooth[low:] >= level)
        if not (left.size and right.size):
            continue
        i, j = left[-1], low + right[0]
        xl = np.interp(level, [smooth[i + 1], smooth[i]], [x[i + 1], x[i]])
        xr = np.interp(level, [smooth[j - 1], smooth[j]], [x[j - 1], x[j]])
        sl = max(abs(slope[i]), abs(slope[i + 1]), 1e-300)
        sr = max(abs(slope[j]), abs(slope[j - 1]), 1e-300)
        mids.append(0.5 * (xl + xr))
        errs.append(0.5 * np.hypot(scatter / sl, scatter / sr))
    if not mids:
        return None
    mids = np.array(mids)
    spread = np.std(mids, ddof=1) if mids.size > 1 else 0.0
    return float(mids.mean()), float(np.hypot(np.mean(errs), spread))
