"""Dual-gate maps: both capacitances, the offsets, and the map in (n, D).

A dual-gated device has density and displacement field (this project's
convention, :func:`fanmap.physics.dual_gate_density` and
:func:`fanmap.physics.dual_gate_displacement`)::

    n = (C_t (V_t - V_t0) + C_b (V_b - V_b0)) / e
    D = (C_t (V_t - V_t0) - C_b (V_b - V_b0)) / 2      (D > 0: top gate more positive)

so every density feature lies on a line V_t + q V_b = const, q = C_b / C_t.
:func:`fit_gates` finds those lines (the charge-neutrality ridge at zero field,
the quantum Hall minima at fixed field), fits all maps jointly, names the
degeneracy that turns line spacings into absolute capacitances and locates the
neutral point where the resistance at neutrality is even in D.
:func:`to_density_displacement` and :func:`from_density_displacement` redraw a
map on a regular (n, D) grid and back.  D is given as D/eps0 in V/m.
"""

import warnings

import numpy as np
import xarray as xr
from scipy import interpolate, signal

from . import _gate_ridges as ridges
from . import _schema as S
from . import physics as ph
from ._cautions import CAUTIONS
from ._gate_input import ZERO_FIELD, gate_arrays, map_field
from .errors import InputError, NoFanError
from .materials import get_material, main_sequence
from .results import GateResult

__all__ = ["fit_gates", "to_density_displacement", "from_density_displacement",
           "neutrality_curve", "dielectric_fields", "map_field", "DISPLACEMENT_CONVENTION",
           "DENSITY", "DISPLACEMENT", "HBN_PERMITTIVITY", "FIELD_WARNING"]

DENSITY = "density"
DISPLACEMENT = "displacement"

DISPLACEMENT_CONVENTION = (
    "D = (C_t (V_t - V_t0) - C_b (V_b - V_b0)) / 2 as D/eps0 in V/m, D > 0 when the top gate "
    "is the more positive; n = (C_t (V_t - V_t0) + C_b (V_b - V_b0)) / e, electrons positive")

#: Out-of-plane relative permittivity of hBN used by default (3.0-4.0 in use; common practice, from memory).
HBN_PERMITTIVITY = 3.4
#: Field across a dielectric (V/m) above which a warning says the order of 1 V/nm is near (common practice).
FIELD_WARNING = 0.5e9

_DEGENERACY_CANDIDATES = (1, 2, 4, 8)
_QUANTUM = ph.ELEMENTARY_CHARGE**2 / ph.PLANCK      # e^2/h: s * nu * B * e^2/h is a voltage


# --- per-map ridge finding -------------------------------------------------------

def _traces(arrays, q, step=None):
    """Traces at constant displacement across the constant-density lines (see rotated_grid)."""
    u, w, values = ridges.rotated_grid(arrays["rxx"], arrays["top"], arrays["bottom"], q, step)
    return {"u": u, "w": w, "values": values}


def _points(found, q):
    """(V_t, V_b) of points found at (u, w), and their uncertainty in u (V)."""
    u, w = found["scan"], found["other"]
    return (u + w) / 2, (u - w) / (2 * q), found["scan_stderr"]


def _hwhm(u, p, centre_index, sign):
    """Half width at half depth of the feature at ``centre_index`` of profile p(u)."""
    base = np.median(p)
    height = sign * (p[centre_index] - base)
    half = base + sign * height / 2
    left = centre_index
    while left > 0 and sign * (p[left] - half) > 0:
        left -= 1
    right = centre_index
    while right < p.size - 1 and sign * (p[right] - half) > 0:
        right += 1
    return max(0.5 * (u[right] - u[left]), u[1] - u[0])


def _smooth(p):
    if p.size < 7:
        return p
    return signal.savgol_filter(p, 5, 2)


def _neutrality_ridge(arrays, q, name):
    z = ridges.log_signal(arrays["rxx"])
    u, p, _, noise = ridges.profile(z, arrays["top"], arrays["bottom"], q)
    ps = _smooth(p)
    peak = int(np.argmax(ps))
    noise = max(noise, 1e-12)
    prominence = ps[peak] - np.median(ps)
    if prominence < 6 * noise or peak in (0, ps.size - 1):
        raise NoFanError(
            f"{name}: no charge-neutrality ridge (a maximum along a constant-density line) found "
            "at zero field; check that the map spans neutrality, or give the field with --field-value "
            "if this map was taken in a magnetic field")
    traces = _traces(arrays, q)
    du = u[1] - u[0]
    step = traces["u"][1] - traces["u"][0]
    pix = _hwhm(u, ps, peak, +1) / step
    half_window = int(np.clip(np.rint(3 * pix), 6, traces["u"].size // 4))
    found = ridges.trace_extrema(traces["values"], traces["u"], traces["w"], 0.0, [u[peak]],
                                 half_window, +1, pix, min_contrast=0.02)
    if found["scan"].size < 5:
        raise NoFanError(f"{name}: the neutrality ridge could be followed on only "
                         f"{found['scan'].size} traces; the map is too noisy or the ridge too weak")
    top, bottom, err = _points(found, q)
    return {"mode": "neutrality", "u_lines": np.array([u[peak]]),
            "spacing": np.nan, "profile_step": du,
            "points": {"top": top, "bottom": bottom, "stderr": err,
                       "line": found["line"].astype(int), "trace": found["other"],
                       "strength": found["area"]},
            "line_index": np.array([0]), "neutral_u": u[peak]}


def _vertex(u, p, index):
    """Sub-bin positions of extrema of p at ``index`` (three-point parabola)."""
    index = np.clip(index, 1, p.size - 2)
    left, mid, right = p[index - 1], p[index], p[index + 1]
    curve = left - 2 * mid + right
    with np.errstate(invalid="ignore", divide="ignore"):
        shift = np.where(curve != 0, 0.5 * (left - right) / curve, 0.0)
    return u[index] + np.clip(shift, -0.5, 0.5) * (u[1] - u[0])


def _lattice(positions, weights, smallest):
    """Spacing of the evenly spaced family among ``positions``, their indices and a mask.

    Every trial spacing is scored by the weight of the lines that fall within
    a tenth of a spacing of a lattice anchored on one of the lines (best
    anchor).  Every integer fraction of the true spacing scores as well, so
    the largest spacing that scores nearly as well as the best is the
    fundamental one.  Lines on the lattice (within 0.2 of a spacing) keep their
    index; others (broken symmetry, noise) are masked out.
    """
    positions = np.asarray(positions, float)
    weights = np.asarray(weights, float)
    span = np.ptp(positions)
    if positions.size < 3 or span <= 0:
        return np.nan, np.zeros(positions.size, int), np.zeros(positions.size, bool)

    anchors = positions[np.argsort(weights)[-10:]]   # the strongest lines anchor the lattice

    def scores(trials):
        rel = (positions[None, :, None] - anchors[None, None, :]) / trials[:, None, None]
        off = rel - np.rint(rel)                       # (trial, line, anchor)
        kernel = np.exp(-0.5 * (off / 0.1) ** 2)
        return np.max(np.einsum("j,tja->ta", weights, kernel), axis=1) / weights.sum()

    trials = np.geomspace(smallest, span / 2, 1500)
    score = scores(trials)
    good = np.flatnonzero(score >= 0.8 * score.max())
    spacing = trials[good[-1]]
    near = np.geomspace(spacing * 0.98, spacing * 1.02, 201)
    spacing = near[np.argmax(scores(near))]
    ref = positions[np.argmax(weights)]
    rel = (positions - ref) / spacing
    on_grid = np.abs(rel - np.rint(rel)) < 0.2
    index = np.rint(rel).astype(int)
    if np.unique(index[on_grid]).size >= 2:
        slope, _ = np.polyfit(index[on_grid], positions[on_grid], 1,
                              w=np.sqrt(weights[on_grid]))
        spacing = float(slope)
    # One line per lattice site: the strongest (others are split or spurious minima).
    for site in np.unique(index[on_grid]):
        same = np.flatnonzero(on_grid & (index == site))
        if same.size > 1:
            on_grid[same[same != same[np.argmax(weights[same])]]] = False
    index = index - index[on_grid].min() if on_grid.any() else index
    return float(spacing), index, on_grid


def _quantum_hall_lines(arrays, q, name):
    z = ridges.log_signal(arrays["rxx"])
    u, p, _, noise = ridges.profile(z, arrays["top"], arrays["bottom"], q, fine=True)
    ps = _smooth(p)
    # QH minima are deep: at least a 5 % dip (0.05 in log R) and well above the noise.
    minima, props = signal.find_peaks(-p, prominence=max(6 * noise, 0.05))
    if minima.size:
        # Weak wiggles next to strong lines are not states: a tenth of the strong ones at least.
        strong = np.median(np.sort(props["prominences"])[-5:])
        chosen = props["prominences"] >= 0.1 * strong
        minima, props = minima[chosen], {"prominences": props["prominences"][chosen]}
    if minima.size < 3:
        raise NoFanError(
            f"{name}: fewer than three quantum Hall minima along constant-density lines at "
            f"B = {arrays['field']:g} T; a fixed-field map needs at least three consecutive "
            "filling factors (check the field with --field-value)")
    positions = _vertex(u, p, minima)
    spacing, index, on_grid = _lattice(positions, props["prominences"], 4 * (u[1] - u[0]))
    positions, index = positions[on_grid], index[on_grid]
    if positions.size < 3 or np.unique(index).size < 3:
        raise NoFanError(f"{name}: the quantum Hall minima at B = {arrays['field']:g} T do not "
                         "form an evenly spaced family of constant-density lines")
    slope, intercept = np.polyfit(index, positions, 1)
    spacing = float(slope)
    traces = _traces(arrays, q, spacing / 10)
    step = traces["u"][1] - traces["u"][0]
    half_window = int(np.clip(np.rint(0.4 * spacing / step), 4, traces["u"].size // 4))
    widths = [_hwhm(u, ps, int(np.argmin(np.abs(u - x))), -1) for x in positions]
    pix = float(np.clip(np.median(widths) / step, 0.7, half_window))
    found = ridges.trace_extrema(traces["values"], traces["u"], traces["w"], 0.0, positions,
                                 half_window, -1, pix, min_contrast=0.05)
    top, bottom, err = _points(found, q)
    # A maximum between the lines is the neutral (nu = 0) region of an ambipolar device;
    # its height along D (the points' amplitudes) locates D = 0.
    neutral_u = np.nan
    neutral = None
    top_max = int(np.argmax(ps))
    if positions.min() < u[top_max] < positions.max():
        neutral_u = float(_vertex(u, ps, np.array([top_max]))[0])
        found0 = ridges.trace_extrema(traces["values"], traces["u"], traces["w"], 0.0, [neutral_u],
                                      max(int(0.3 * spacing / step), 3), +1, pix, min_contrast=0.05)
        if found0["scan"].size >= 9:
            t0, b0, e0 = _points(found0, q)
            # At fixed field the nu = 0 peak is wide against the window: its fitted height
            # is steadier than its amplitude above a background.
            neutral = {"top": t0, "bottom": b0, "stderr": e0, "strength": found0["peak"]}
    return {"mode": "quantum-hall", "u_lines": positions,
            "spacing": spacing, "profile_step": u[1] - u[0],
            "points": {"top": top, "bottom": bottom, "stderr": err,
                       "line": found["line"].astype(int), "trace": found["other"]},
            "line_index": index, "neutral_u": neutral_u, "neutral_points": neutral}


# --- naming the fillings ------------------------------------------------------------

def _hall_fillings(arrays, found):
    """Signed integer filling of each line from its R_xy plateau (None where no plateau)."""
    rxy = arrays["rxy"]
    if rxy is None:
        return None
    interp = interpolate.RegularGridInterpolator((arrays["bottom"], arrays["top"]), rxy,
                                                 bounds_error=False, fill_value=np.nan)
    pts = found["points"]
    fillings = []
    for line in range(found["u_lines"].size):
        sel = pts["line"] == line
        values = interp(np.column_stack([pts["bottom"][sel], pts["top"][sel]]))
        values = values[np.isfinite(values)]
        if values.size < 3:
            fillings.append(None)
            continue
        resistance = np.median(values)
        nu = ph.hall_filling(abs(resistance))
        whole = np.rint(nu)
        spread = 1.4826 * np.median(np.abs(values - resistance))
        if whole < 1 or abs(nu - whole) > 0.03 * whole or spread > 0.05 * abs(resistance):
            fillings.append(None)
            continue
        fillings.append(int(np.sign(resistance) * whole))
    return fillings


def _scale_from_hall(fillings, index):
    """(g, a) with nu = g k + a from the lines with Hall plateaus, or None."""
    known = [(k, nu) for k, nu in zip(index, fillings) if nu is not None]
    if len(known) < 2 or len({k for k, _ in known}) < 2:
        return None
    k = np.array([k for k, _ in known])
    nu = np.array([n for _, n in known])
    # R_xy's sign convention varies: choose the one in which nu grows with density.
    if np.corrcoef(k, nu)[0, 1] < 0:
        nu = -nu
    best = None
    for g in (1, 2, 3, 4, 6, 8, 12):
        offsets = nu - g * k
        values, counts = np.unique(offsets, return_counts=True)
        share = counts.max() / offsets.size
        if share >= 0.75 and (best is None or share > best[2]):
            best = (g, int(values[np.argmax(counts)]), share)
    return None if best is None else best[:2]


def _offset_from_neutral(found, neutral_u, g, gamma=None):
    """Offset c (nu = g (k + c)) from the neutral line position; gamma snaps c to Z + gamma."""
    rel = (neutral_u - found["u_lines"][0]) / found["spacing"]  # index of neutrality
    c = -rel
    if gamma is None:
        frac = c - np.floor(c)
        gamma = 0.5 if abs(frac - 0.5) < 0.2 else 0.0
    c = np.rint(c - gamma) + gamma
    return c, gamma


def _name_lines(maps, material, prior_top, u0):
    """Fill each QH map's line fillings; return (degeneracy, scale_from, notes)."""
    mat = get_material(material)
    notes = []
    votes = {}
    qh = [m for m in maps if m["mode"] == "quantum-hall"]
    for m in qh:
        m["hall"] = _hall_fillings(m["arrays"], m)
        hall = _scale_from_hall(m["hall"], m["line_index"]) if m["hall"] else None
        m["scale"] = None
        if hall is not None:
            g, a = hall
            m["scale"] = ("hall", g, a / g)
            votes.setdefault(("hall", g), []).append(m)
    hall_g = {g for (kind, g) in votes if kind == "hall"}
    if len(hall_g) > 1:
        notes.append(f"R_xy plateaus give different degeneracies in different maps ({sorted(hall_g)}); "
                     "using the most common")
    if hall_g:
        g = max(hall_g, key=lambda gg: len(votes[("hall", gg)]))
        scale_from = "hall"
        if mat.degeneracy is not None and mat.degeneracy != g:
            notes.append(f"R_xy plateaus give degeneracy {g}, the {material} preset says "
                         f"{mat.degeneracy}; the plateaus win")
    elif mat.degeneracy is not None:
        g, scale_from = mat.degeneracy, "material"
    else:
        g, scale_from = None, "ambiguous"
        if prior_top is not None:
            g, scale_from = _degeneracy_from_prior(qh, prior_top, notes)
        if g is None and np.isfinite(u0):
            g, scale_from = _degeneracy_from_sequence(qh, u0, notes)
    gamma = mat.offset if scale_from == "material" else None
    for m in qh:
        m["fillings"] = None
        if g is None:
            continue
        if m["scale"] is not None and m["scale"][1] == g:
            c = m["scale"][2]
        else:
            neutral = u0 if np.isfinite(u0) else (m["neutral_u"] if mat.ambipolar is not False else np.nan)
            if not np.isfinite(neutral):
                m["fillings_relative"] = g * m["line_index"]
                continue
            c, _ = _offset_from_neutral(m, neutral, g, gamma)
        m["fillings"] = g * (m["line_index"] + c)
        if scale_from == "material":
            allowed = set(main_sequence(mat, max_filling=int(np.abs(m["fillings"]).max()) + g))
            odd = [f"{v:g}" for v in m["fillings"] if v not in allowed]
            if odd:
                notes.append(f"B = {m['field']:g} T: lines at nu = {', '.join(odd)} are not in the "
                             f"{material} main sequence; check the material or the offsets")
    return g, scale_from, notes


def _degeneracy_from_prior(qh, prior_top, notes):
    """Pick g so that g e^2 B / (h spacing) is nearest the capacitance of the stated dielectric."""
    choices = []
    for m in qh:
        unit = _QUANTUM * abs(m["field"]) / m["spacing"]      # C_t for g = 1
        ratio = np.array([g * unit / prior_top for g in _DEGENERACY_CANDIDATES])
        best = int(np.argmin(np.abs(np.log(ratio))))
        if abs(np.log(ratio[best])) < np.log(1.3):
            choices.append(_DEGENERACY_CANDIDATES[best])
    if choices and len(set(choices)) == 1:
        return choices[0], "dielectric"
    notes.append("the stated dielectric does not single out one degeneracy")
    return None, "ambiguous"


def _degeneracy_from_sequence(qh, u0, notes):
    """Monolayer (half-integer offset) or bilayer (gap of two spacings at neutrality) signature."""
    kinds = set()
    for m in qh:
        rel = (u0 - m["u_lines"][0]) / m["spacing"] - m["line_index"]
        frac = np.abs(rel - np.rint(rel))
        nearest = np.sort(np.abs((m["u_lines"] - u0) / m["spacing"]))
        if np.all(np.abs(frac - 0.5) < 0.15):
            kinds.add("half-integer")
        elif np.all(frac < 0.15) and nearest.size >= 2 and nearest[0] > 1.5:
            kinds.add("eightfold-zero")
        else:
            kinds.add("unknown")
    if kinds == {"half-integer"}:
        notes.append("line offsets are half-integer multiples of the spacing (Berry phase pi): "
                     "taking monolayer graphene's degeneracy 4")
        return 4, "sequence"
    if kinds == {"eightfold-zero"}:
        notes.append("the neutral gap spans two line spacings (eightfold zero level): taking "
                     "bilayer graphene's degeneracy 4")
        return 4, "sequence"
    return None, "ambiguous"


# --- joint fit ---------------------------------------------------------------------

def _design(maps, use_scale):
    """Rows V_t = -q V_b + k (+ k_m) + s * nu * B e^2/h for every point of every map."""
    relative = [i for i, m in enumerate(maps)
                if m["mode"] == "quantum-hall" and use_scale and m.get("fillings") is None]
    absolute = [i for i, m in enumerate(maps) if i not in relative
                and (m["mode"] == "neutrality" or (use_scale and m.get("fillings") is not None))]
    if not use_scale:
        absolute = [i for i, m in enumerate(maps) if m["mode"] == "neutrality"]
    ncol = 1 + (1 if absolute else 0) + (1 if use_scale else 0) + len(relative)
    rows, target, sigma, groups, owner = [], [], [], [], []
    for i, m in enumerate(maps):
        if i not in absolute and i not in relative:
            continue
        pts = m["points"]
        if m["mode"] == "neutrality":
            nu = np.zeros(pts["top"].size)
        elif i in relative:
            nu = m["fillings_relative"][pts["line"]]
        else:
            nu = np.asarray(m["fillings"], float)[pts["line"]]
        x = np.zeros((pts["top"].size, ncol))
        x[:, 0] = -pts["bottom"]
        col = 1
        if absolute:
            if i in absolute:
                x[:, col] = 1.0
            col += 1
        if use_scale:
            x[:, col] = nu * abs(m["field"]) * _QUANTUM
            col += 1
        if i in relative:
            x[:, col + relative.index(i)] = 1.0
        rows.append(x)
        target.append(pts["top"])
        sigma.append(np.maximum(pts["stderr"], 1e-3 * m["profile_step"]))
        if m["mode"] == "neutrality":
            # Blocks of neighbouring traces: their points share slow noise and drift.
            trace = np.searchsorted(np.unique(pts["trace"]), pts["trace"])
            groups.append(i * 100000 + trace // 5)
        else:
            # Whole lines: a line displaced by its background moves all its points.
            groups.append(i * 100000 + 50000 + pts["line"])
        owner.append(np.full(pts["top"].size, i))
    return (np.vstack(rows), np.concatenate(target), np.concatenate(sigma),
            np.concatenate(groups), np.concatenate(owner), bool(absolute), relative)


def _weighted_lstsq(x, y, w):
    sw = np.sqrt(w)
    coef, *_ = np.linalg.lstsq(x * sw[:, None], y * sw, rcond=None)
    return coef


def _joint_fit(maps, use_scale, seed=0, bootstrap=200):
    x, y, sigma, groups, owner, has_k, relative = _design(maps, use_scale)
    keep = np.ones(y.size, bool)
    scale = np.ones(len(maps))
    for _ in range(4):
        w = 1.0 / (sigma * scale[owner]) ** 2
        coef = _weighted_lstsq(x[keep], y[keep], w[keep])
        resid = (y - x @ coef) / sigma
        for i in np.unique(owner):
            sel = (owner == i) & keep
            scale[i] = max(1.4826 * np.median(np.abs(resid[sel])), 1e-6) if sel.any() else 1.0
        keep = np.abs(resid) / scale[owner] < 5.0
    w = 1.0 / (sigma * scale[owner]) ** 2
    xw = x[keep] * np.sqrt(w[keep])[:, None]
    coef = _weighted_lstsq(x[keep], y[keep], w[keep])
    resid = (y[keep] - x[keep] @ coef) * np.sqrt(w[keep])
    dof = max(keep.sum() - x.shape[1], 1)
    cov = np.linalg.pinv(xw.T @ xw) * max(1.0, np.sum(resid**2) / dof)
    # Points of one line (or of neighbouring traces) share errors: a bootstrap over those
    # groups checks the covariance, and the larger of the two is kept.
    rng = np.random.default_rng(seed)
    unique = np.unique(groups[keep])
    pos = np.searchsorted(unique, groups[keep])
    members = np.argsort(pos, kind="stable")
    starts = np.searchsorted(pos[members], np.arange(unique.size))
    ends = np.append(starts[1:], members.size)
    lengths = ends - starts
    samples = []
    for _ in range(bootstrap):
        pick = rng.integers(0, unique.size, unique.size)
        counts = lengths[pick]
        first = np.repeat(starts[pick] - np.cumsum(counts) + counts, counts)
        idx = members[first + np.arange(counts.sum())]
        samples.append(_weighted_lstsq(x[keep][idx], y[keep][idx], w[keep][idx]))
    if bootstrap > 1:
        boot = np.cov(np.array(samples).T)
        cov = np.where(np.diag(boot)[:, None] * np.diag(boot)[None, :]
                       > np.diag(cov)[:, None] * np.diag(cov)[None, :], boot, cov)
    rms = {int(i): float(np.sqrt(np.mean(((y - x @ coef)[keep & (owner == i)]) ** 2)))
           for i in np.unique(owner[keep])}
    used = {int(i): int(np.sum(keep & (owner == i))) for i in np.unique(owner)}
    return {"coef": coef, "cov": cov, "has_k": has_k, "relative": relative,
            "use_scale": use_scale, "rms": rms, "used": used}


# --- neutral point -------------------------------------------------------------------

def _neutral_segment(arrays, q, k, samples=None):
    """Bottom-gate voltages along the n = 0 line V_t = k - q V_b inside the map."""
    top, bottom = arrays["top"], arrays["bottom"]
    lo = max(bottom[0], (k - top[-1]) / q)
    hi = min(bottom[-1], (k - top[0]) / q)
    if not hi > lo:
        return np.empty(0)
    n = samples or int(max(np.sum((bottom >= lo) & (bottom <= hi)),
                           np.sum((top >= k - q * hi) & (top <= k - q * lo)), 2))
    return np.linspace(lo, hi, n)


def _ridge_heights(arrays, q, k, reach=3):
    """Log of the highest measured R near the neutrality line on every trace, and where it is.

    Traces are rows or columns, whichever the line crosses more squarely.  Returns
    ``(bottom-gate voltages, log peak, offset)``: the signed offset (in grid steps) of the
    highest pixel from the fitted line, which sets how far below the true ridge height
    a ridge narrower than the grid step is sampled.
    """
    top, bottom, values = arrays["top"], arrays["bottom"], arrays["rxx"]
    rows = q * (bottom[1] - bottom[0]) / (top[1] - top[0]) <= 1.0
    if rows:
        line = (k - q * bottom - top[0]) / (top[1] - top[0])
        data, where = values, bottom
    else:
        line = ((k - top) / q - bottom[0]) / (bottom[1] - bottom[0])
        data, where = values.T, (k - top) / q
    centre = np.rint(line).astype(int)
    inside = (centre >= reach) & (centre < data.shape[1] - reach)
    idx = centre[inside][:, None] + np.arange(-reach, reach + 1)[None, :]
    block = np.where(np.isfinite(data[np.flatnonzero(inside)[:, None], idx]),
                     data[np.flatnonzero(inside)[:, None], idx], -np.inf)
    best = np.argmax(block, axis=1)
    peak = block[np.arange(best.size), best]
    offset = idx[np.arange(best.size), best] - line[inside]
    good = np.isfinite(peak) & (peak > 0)
    return where[inside][good], np.log(peak[good]), offset[good]


def _sampling_fit(vb, heights, distance, degree=8):
    """How the sampled ridge height falls with the distance of the pixel from the line.

    Least squares of the heights on a smooth curve in V_b (Chebyshev, ``degree``) plus
    a d + b d^2 in the distance d (grid steps); returns the coefficients (a, b) and
    their covariance.  When the sampling phase drifts slowly along the line it is hard
    to tell from the curve, and the covariance says so.
    """
    x = 2 * (vb - vb.min()) / max(np.ptp(vb), 1e-300) - 1
    design = np.column_stack([np.polynomial.chebyshev.chebvander(x, degree), distance,
                              distance**2])
    coef, *_ = np.linalg.lstsq(design, heights, rcond=None)
    resid = heights - design @ coef
    dof = max(heights.size - design.shape[1], 1)
    cov = np.linalg.pinv(design.T @ design) * np.sum(resid**2) / dof
    return coef[-2:], cov[-2:, -2:]


def _zero_field_centre(arrays, q, k):
    """Sampling-corrected ridge heights along the neutral line V_t = k - q V_b.

    Returns ``(vb, curve, heights, sampling)`` (see :func:`_ridge_heights` and
    :func:`_sampling_fit`) or None when the line crosses too few traces.
    """
    vb, raw, offset = _ridge_heights(arrays, q, k)
    if vb.size < 15:
        return None
    heights = (vb, raw, np.abs(offset))
    sampling = _sampling_fit(*heights)
    return (*_corrected_ridge(*heights, sampling[0]), heights, sampling)


def _undersampling_error(arrays, q, k, vb, curve):
    """Error (V) of the centre of a ridge sampled coarsely against its width, from the data.

    The highest pixel of a trace lies up to half a grid step from the ridge, so its value
    is uncertain by about half the drop from it to its neighbour (measured on every trace;
    tiny for a ridge many steps wide, large for one narrower than a step).  Where the
    sampling phase drifts slowly along the line that uncertainty does not average out: it
    is divided by the square root of the number of phase cycles along the line only, then
    turned into volts by the typical slope of the ridge-height curve.  It is an
    estimate of the scale of the error, on the cautious side.
    """
    top, bottom, values = arrays["top"], arrays["bottom"], arrays["rxx"]
    rows = q * (bottom[1] - bottom[0]) / (top[1] - top[0]) <= 1.0
    if rows:
        line = (k - q * bottom - top[0]) / (top[1] - top[0])
        data = values
    else:
        line = ((k - top) / q - bottom[0]) / (bottom[1] - bottom[0])
        data = values.T
    centre = np.rint(line).astype(int)
    inside = (centre >= 1) & (centre < data.shape[1] - 1)
    rows_in = np.flatnonzero(inside)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.log(data)
    mid = z[rows_in, centre[inside]]
    side = np.fmax(z[rows_in, centre[inside] - 1], z[rows_in, centre[inside] + 1])
    drop = mid - side
    drop = drop[np.isfinite(drop) & (drop > 0)]
    if drop.size < 5:
        return 0.0
    phase_steps = np.diff(line[inside])
    cycles = max(float(np.sum(np.abs(phase_steps - np.rint(phase_steps)))), 1.0)
    amplitude = 0.5 * np.median(drop) / np.sqrt(cycles)
    # typical slope: the curve rises over about half the line from its lowest point
    good = np.isfinite(curve)
    if good.sum() < 5:
        return float(np.ptp(vb))
    rise = np.percentile(curve[good], 95) - np.percentile(curve[good], 5)
    slope = rise / (0.5 * np.ptp(vb[good]))
    return float(amplitude / slope) if slope > 0 else float(np.ptp(vb))


def _corrected_ridge(vb, heights, distance, coef, smooth=5):
    """Ridge heights brought to the line (sampling loss ``coef`` removed), lightly smoothed."""
    from scipy.ndimage import median_filter

    corrected = heights - coef[0] * distance - coef[1] * distance**2
    return vb, median_filter(corrected, size=smooth, mode="nearest")


def _sampling_error(vb, heights, distance, coef, cov, centre):
    """Error (V) of the symmetry centre from the sub-pixel sampling of the ridge.

    Measured from the data: the centre moves when the fitted sampling loss is varied
    by its standard errors (along both principal directions of its covariance), and
    half of the change made by the correction itself is kept as a model error.
    """
    raw = ridges.symmetry_centre(vb, _corrected_ridge(vb, heights, distance, (0.0, 0.0))[1])[0]
    shifts = [0.5 * abs(raw - centre)] if np.isfinite(raw) else []
    values, vectors = np.linalg.eigh(cov)
    for value, vector in zip(values, vectors.T):
        for sign in (1, -1):
            trial = coef + sign * np.sqrt(max(value, 0.0)) * vector
            c = ridges.symmetry_centre(*_corrected_ridge(vb, heights, distance, trial))[0]
            if np.isfinite(c):
                shifts.append(abs(c - centre))
    return float(max(shifts)) if shifts else 0.0


def _bottom_only_ridge(maps, q):
    """V_b of a resistance ridge at constant bottom-gate voltage (zero-field maps), or None.

    What the channel's constant-density lines explain is removed first; the
    rest, averaged over the top gate, is a function of V_b alone whose clear
    maximum marks the neutrality of regions gated by the bottom gate only.
    """
    found = []
    for m in maps:
        if m["mode"] != "neutrality":
            continue
        a = m["arrays"]
        z = ridges.log_signal(a["rxx"])
        u, p, _, _ = ridges.profile(z, a["top"], a["bottom"], q)
        channel = np.interp(a["top"][None, :] + q * a["bottom"][:, None], u, p)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            rest = np.nanmedian(z - channel, axis=1)
        if np.sum(np.isfinite(rest)) < 15:
            continue
        rest = np.where(np.isfinite(rest), rest, np.nanmedian(rest))
        noise = 1.4826 * np.median(np.abs(np.diff(rest))) / np.sqrt(2) + 1e-12
        peaks, props = signal.find_peaks(rest, prominence=max(8 * noise, 0.1))
        if peaks.size != 1:
            continue        # none, or several: not one clear ridge
        position = float(_vertex(a["bottom"], rest, peaks)[0])
        found.append((position, abs(a["bottom"][1] - a["bottom"][0]) / 2))
    if not found:
        return None
    values = np.array([f[0] for f in found])
    return float(values.mean()), float(max(f[1] for f in found) / np.sqrt(len(found)))


def _neutral_point(maps, q, k):
    """Bottom-gate voltage of the neutral point where R at neutrality is even in D."""
    estimates = []
    for m in maps:      # zero-field and fixed-field maps alike, each with its own error
        pts = None if m["mode"] == "neutrality" else m.get("neutral_points")
        if m["mode"] == "neutrality":
            # A ridge narrower than the grid step is sampled below its height by an amount
            # set by the pixel's distance from the line: fitted and removed first.
            found = _zero_field_centre(m["arrays"], q, k)
            if found is None:
                continue
            vb, values, heights, sampling = found
        elif pts is not None:
            # Leave out points off the line (a crossing contact feature, say).
            u = pts["top"] + q * pts["bottom"]
            spread = 1.4826 * np.median(np.abs(u - np.median(u))) + 1e-12
            on_line = np.abs(u - np.median(u)) < 4 * spread
            vb, values = pts["bottom"][on_line], np.log(np.abs(pts["strength"][on_line]) + 1e-300)
        else:
            vb = _neutral_segment(m["arrays"], q, k)
            z = ridges.log_signal(m["arrays"]["rxx"])
            values = ridges.sample_along_line(z, m["arrays"]["top"], m["arrays"]["bottom"],
                                              lambda b: k - q * b, vb)
        if vb.size < 9:
            continue
        centre, stderr, dip, at_edge = ridges.symmetry_centre(vb, values)
        lowest = ridges.minimum_location(vb, values)
        m["symmetry"] = {"bottom_gate": centre, "stderr": stderr, "dip": dip,
                         "at_edge": at_edge, "minimum": lowest}
        if lowest is None:
            continue        # no clear minimum of R(D): no displacement-field signature
        if pts is not None:
            # At fixed field the nu = 0 heights form a dip between the two transitions of
            # the nu = 0 state, with plateaus outside that saturate and are sampled unevenly:
            # the middle of the dip's flanks is the steadier estimate.
            flanks = ridges.dip_centre(vb, values)
            if flanks is not None:
                halves = [ridges.dip_centre(vb[j::2], values[j::2]) for j in (0, 1)]
                stderr = flanks[1]
                if all(h is not None for h in halves):
                    stderr = max(stderr, 0.5 * abs(halves[0][0] - halves[1][0]))
                m["symmetry"]["dip_centre"] = flanks[0]
                m["symmetry"]["dip_centre_stderr"] = stderr
                estimates.append((flanks[0], stderr, "symmetry"))
                continue
        symmetric = np.isfinite(centre) and not at_edge and dip < 0.5
        agree = symmetric and abs(centre - lowest[0]) < max(
            3 * np.hypot(stderr, lowest[1]), 0.03 * np.ptp(vb))
        if agree:
            # The two estimates' disagreement is a measure of what the error bar misses.
            stderr = float(np.hypot(stderr, 0.5 * (centre - lowest[0])))
            if m["mode"] == "neutrality":
                sub_pixel = np.hypot(_sampling_error(*heights, *sampling, centre),
                                     _undersampling_error(m["arrays"], q, k, vb, values))
                stderr = float(np.hypot(stderr, sub_pixel))
                m["symmetry"]["sub_pixel_stderr"] = float(sub_pixel)
            # So is the spread between the odd and even traces (other sampling phases, other
            # noise).
            halves = [ridges.symmetry_centre(vb[j::2], values[j::2])[0] for j in (0, 1)]
            if np.all(np.isfinite(halves)):
                stderr = max(stderr, 0.5 * abs(halves[0] - halves[1]))
            m["symmetry"]["halves"] = halves
            estimates.append((centre, stderr, "symmetry"))
        else:
            stderr = lowest[1]
            if m["mode"] == "neutrality":
                stderr = float(np.hypot(stderr, _undersampling_error(m["arrays"], q, k, vb,
                                                                     values)))
            estimates.append((lowest[0], stderr, "minimum"))
    if not estimates:
        return None
    values = np.array([e[0] for e in estimates])
    weights = 1.0 / np.array([e[1] for e in estimates]) ** 2
    centre = np.sum(weights * values) / weights.sum()
    stderr = np.sqrt(1.0 / weights.sum())
    if values.size > 1:
        # estimates that disagree beyond their errors widen the error (Birge ratio)
        chi2 = np.sum(weights * (values - centre) ** 2) / (values.size - 1)
        stderr *= np.sqrt(max(chi2, 1.0))
    how = {e[2] for e in estimates}
    return float(centre), float(stderr), ("symmetry" if how == {"symmetry"} else "minimum")


# --- public API ----------------------------------------------------------------------

def dielectric_fields(top_capacitance, bottom_capacitance, top_offset, bottom_offset,
                      top_range, bottom_range, permittivity=(HBN_PERMITTIVITY, HBN_PERMITTIVITY)):
    """Largest field across each gate dielectric, |V - V0| / d with d = eps0 eps_r / C (V/m).

    Parameters
    ----------
    top_capacitance, bottom_capacitance : float
        Capacitances per area (F m^-2).
    top_offset, bottom_offset : float
        Gate voltages of the neutral point (V).
    top_range, bottom_range : (float, float)
        Gate voltages reached (V).
    permittivity : (float, float)
        Relative permittivities of the top and bottom dielectrics (hBN 3.4 by default).

    Returns
    -------
    dict with ``top_field``, ``bottom_field`` (V/m) and ``top_thickness``,
    ``bottom_thickness`` (m), the thicknesses the capacitances imply.

    Examples
    --------
    30 nm of hBN (eps_r 3.4) at 10 V away from its offset carries 1/3 V/nm:

    >>> c = ph.parallel_plate_capacitance(30e-9, 3.4)
    >>> out = dielectric_fields(c, c, 0.0, 0.0, (-10, 10), (-1, 1))
    >>> f"{out['top_field'] / 1e9:.3f} V/nm"
    '0.333 V/nm'
    """
    out = {}
    for name, c, v0, span, eps in (("top", top_capacitance, top_offset, top_range, permittivity[0]),
                                   ("bottom", bottom_capacitance, bottom_offset, bottom_range,
                                    permittivity[1])):
        thickness = ph.dielectric_thickness(c, eps)
        out[f"{name}_thickness"] = float(thickness)
        out[f"{name}_field"] = float(max(abs(span[0] - v0), abs(span[1] - v0)) / thickness)
    return out


def fit_gates(gate_maps, *, material="auto", field=None, thickness=(None, None),
              permittivity=(HBN_PERMITTIVITY, HBN_PERMITTIVITY), gate_limits=None, seed=0):
    """Calibrate both gates of a dual-gated device from one or more gate maps.

    Parameters
    ----------
    gate_maps : xarray.Dataset or sequence of them
        Gate maps (dims ``bottom_gate``, ``top_gate`` in V; ``rxx``, optionally
        ``rxy``, in ohm).  Zero-field maps give the neutrality ridge; maps at a
        fixed field give quantum Hall lines.  All maps are fitted jointly.
    material : str
        Material preset (see :mod:`fanmap.materials`); names the degeneracy
        when R_xy gives none.
    field : float or sequence of float, optional
        Field of each map (T) when the maps do not carry it.
    thickness : (float or None, float or None)
        Top and bottom dielectric thicknesses (m), a prior that names the
        degeneracy when neither R_xy nor the material does.
    permittivity : (float, float)
        Relative permittivities of the top and bottom dielectrics, for the
        prior and for the field across each dielectric (hBN 3.4 by default).
    gate_limits : ((float, float), (float, float)), optional
        Planned top- and bottom-gate sweep limits (V); a warning is added when
        they would bring a dielectric near 1 V/nm.
    seed : int
        Seed of the bootstrap over lines and blocks of traces.

    Returns
    -------
    GateResult
        Capacitances (F m^-2), ratio C_t/C_b, offsets (V), each with a
        standard error; ``extras`` holds the neutrality curve R(D), the largest
        fields across the dielectrics and per-map details.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> vt, vb = np.linspace(-2, 2, 81), np.linspace(-10, 10, 81)
    >>> n = 0.8 * (vt[None, :] - 0.1) + 0.1 * (vb[:, None] + 0.5)
    >>> rxx = 100 + 5000 / (1 + (n / 0.05) ** 2)
    >>> ds = xr.Dataset({"rxx": (("bottom_gate", "top_gate"), rxx, {"units": "ohm"})},
    ...                 coords={"top_gate": vt, "bottom_gate": vb, "field": 0.0})
    >>> result = fit_gates(ds)
    >>> f"{result.capacitance_ratio:.2f}"
    '8.00'
    """
    if isinstance(gate_maps, xr.Dataset):
        gate_maps = [gate_maps]
    gate_maps = list(gate_maps)
    if not gate_maps:
        raise InputError("no gate maps given")
    fields = list(field) if np.ndim(field) else [field] * len(gate_maps)
    if len(fields) != len(gate_maps):
        raise InputError(f"{len(fields)} fields given for {len(gate_maps)} maps; give one per map")
    get_material(material)  # refuse an unknown preset before any work
    warnings = []
    maps = []
    for i, (ds, b) in enumerate(zip(gate_maps, fields)):
        arrays = gate_arrays(ds, b)
        name = arrays["source"] or f"gate map {i + 1}"
        z = ridges.log_signal(arrays["rxx"])
        q_map, share = ridges.best_ratio(z, arrays["top"], arrays["bottom"])
        maps.append({"arrays": arrays, "name": name, "field": arrays["field"], "q_map": q_map,
                     "share": share})
    zero = [m for m in maps if abs(m["field"]) < ZERO_FIELD]
    q_est = float(np.median([m["q_map"] for m in (zero or maps)]))
    # Two passes: the traces are laid at constant D with the current ratio estimate.
    for final in (False, True):
        fit, degeneracy, scale_from, notes, use_scale, has_qh, prior_top = _analyse(
            maps, q_est, material, thickness, permittivity, seed, 200 if final else 0)
        q_est = float(fit["coef"][0])
    warnings += notes
    coef, cov = fit["coef"], fit["cov"]
    q, var_q = coef[0], cov[0, 0]
    ratio, ratio_err = 1.0 / q, np.sqrt(var_q) / q**2
    c_top = c_top_err = c_bot = c_bot_err = np.nan
    candidates = []
    if use_scale:
        j = 2 if fit["has_k"] else 1
        s, var_s, cov_qs = coef[j], cov[j, j], cov[0, j]
        g_factor = 1.0 if degeneracy is not None else None
        c_top1 = 1.0 / s
        c_top1_err = np.sqrt(var_s) / s**2
        c_bot1 = q / s
        c_bot1_err = abs(c_bot1) * np.sqrt(var_q / q**2 + var_s / s**2 - 2 * cov_qs / (q * s))
        if g_factor is not None:
            c_top, c_top_err, c_bot, c_bot_err = c_top1, c_top1_err, c_bot1, c_bot1_err
        else:
            candidates = [{"degeneracy": g, "top_capacitance": g * c_top1,
                           "bottom_capacitance": g * c_bot1} for g in _DEGENERACY_CANDIDATES]
            warnings.append("degeneracy ambiguous: no R_xy plateaus, no material preset and no "
                            "dielectric prior; capacitances are listed per candidate degeneracy "
                            "(give --material, or the dielectric thicknesses)")
    elif not has_qh:
        scale_from = "none"
        warnings.append("zero-field maps only: the ratio and offsets are measured, the absolute "
                        "capacitances need a map at fixed field")
        if prior_top is not None:
            candidates = [{"degeneracy": None, "top_capacitance": prior_top,
                           "bottom_capacitance": prior_top * q, "from": "dielectric prior"}]
    # Offsets: the neutral line gives C_t V_t0 + C_b V_b0; the symmetry of R(D) places the point.
    top_off = top_off_err = bot_off = bot_off_err = np.nan
    if fit["has_k"]:
        k, var_k, cov_qk = coef[1], cov[1, 1], cov[0, 1]
        centre = _neutral_point(maps, q, k)
        if centre is not None and centre[2] == "minimum":
            warnings.append("the resistance along neutrality is not even in D: D = 0 is taken at "
                            "its minimum (where a layer-polarisation gap closes); check the offsets")
        leads = _bottom_only_ridge(maps, q) if centre is None else None
        if leads is not None:
            centre = (*leads, "leads")
            warnings.append(
                "the resistance along neutrality shows no displacement-field signature; V_b0 is "
                "taken from a ridge at constant bottom-gate voltage (regions such as the leads "
                "that only the bottom gate reaches), which assumes they share the channel's "
                "bottom-gate offset; V_t0 follows from the neutral line")
        if centre is None:
            ref = next(m for m in maps if _neutral_segment(m["arrays"], q, k).size) \
                if any(_neutral_segment(m["arrays"], q, k).size for m in maps) else None
            if ref is None:
                raise NoFanError("the fitted neutrality line lies outside every map; cannot "
                                 "place the offsets")
            seg = _neutral_segment(ref["arrays"], q, k)
            centre = (0.5 * (seg[0] + seg[-1]), (seg[-1] - seg[0]) / np.sqrt(12))
            warnings.append("the resistance along neutrality shows no displacement-field "
                            "symmetry: only C_t V_t0 + C_b V_b0 is measured; the offsets are "
                            "the middle of the neutral line in the map, their errors its length")
            neutral_from = "middle of neutral line"
        else:
            neutral_from = {"symmetry": "symmetry of R(D) at neutrality",
                            "minimum": "minimum of R(D) at neutrality",
                            "leads": "bottom-gate-only ridge"}[centre[2]]
        bot_off, bot_off_err = centre[:2]
        top_off = k - q * bot_off
        top_off_err = np.sqrt(var_k + bot_off**2 * var_q - 2 * bot_off * cov_qk
                              + q**2 * bot_off_err**2)
    else:
        neutral_from = None
        warnings.append("no zero-field map and no absolute filling: the offsets are not measured")
    # Cautions.
    extras = {"neutral_point_from": neutral_from, "displacement_units": "V m-1 (D/eps0)",
              "permittivity": {"top": permittivity[0], "bottom": permittivity[1],
                               "note": "hBN 3.4 by default (common practice, from memory)"}}
    c_t_for_field = c_top if np.isfinite(c_top) else (candidates[0]["top_capacitance"]
                                                     if candidates and degeneracy is None and
                                                     len(candidates) == 1 else np.nan)
    if np.isfinite(c_t_for_field) and np.isfinite(top_off):
        c_b_for_field = c_t_for_field * q
        top_span = (min(m["arrays"]["top"][0] for m in maps), max(m["arrays"]["top"][-1] for m in maps))
        bot_span = (min(m["arrays"]["bottom"][0] for m in maps),
                    max(m["arrays"]["bottom"][-1] for m in maps))
        reached = dielectric_fields(c_t_for_field, c_b_for_field, top_off, bot_off, top_span,
                                    bot_span, permittivity)
        extras["max_dielectric_field"] = {
            "top_V_per_nm": reached["top_field"] / 1e9, "bottom_V_per_nm": reached["bottom_field"] / 1e9,
            "top_thickness_nm": reached["top_thickness"] * 1e9,
            "bottom_thickness_nm": reached["bottom_thickness"] * 1e9}
        for gate in ("top", "bottom"):
            if reached[f"{gate}_field"] >= FIELD_WARNING:
                warnings.append(f"the map reached {reached[gate + '_field'] / 1e9:.2f} V/nm across "
                                f"the {gate} dielectric. {CAUTIONS[3]}")
        if gate_limits is not None:
            planned = dielectric_fields(c_t_for_field, c_b_for_field, top_off, bot_off,
                                        gate_limits[0], gate_limits[1], permittivity)
            extras["planned_dielectric_field"] = {
                "top_V_per_nm": planned["top_field"] / 1e9,
                "bottom_V_per_nm": planned["bottom_field"] / 1e9,
                "top_limits_V": list(gate_limits[0]), "bottom_limits_V": list(gate_limits[1])}
            for gate in ("top", "bottom"):
                if planned[f"{gate}_field"] >= FIELD_WARNING:
                    warnings.append(
                        f"the planned {gate}-gate limits would put {planned[gate + '_field'] / 1e9:.2f} "
                        f"V/nm across the {gate} dielectric, approaching the order of 1 V/nm "
                        f"where gate dielectrics break down. {CAUTIONS[3]}")
    elif gate_limits is not None:
        warnings.append("the planned gate limits cannot be turned into dielectric fields without "
                        "absolute capacitances and offsets. " + CAUTIONS[3])
    result = GateResult(
        top_capacitance=c_top, top_capacitance_stderr=c_top_err,
        bottom_capacitance=c_bot, bottom_capacitance_stderr=c_bot_err,
        capacitance_ratio=ratio, capacitance_ratio_stderr=ratio_err,
        top_offset=top_off, top_offset_stderr=top_off_err,
        bottom_offset=bot_off, bottom_offset_stderr=bot_off_err,
        degeneracy=degeneracy, scale_from=scale_from,
        displacement_convention=DISPLACEMENT_CONVENTION,
        warnings=warnings, extras=extras, material=material,
        source=", ".join(str(m["arrays"]["source"]) for m in maps if m["arrays"]["source"]) or None,
        version=_version())
    extras["scale_candidates"] = candidates
    extras["neutral_density_constant"] = (float(coef[1] / coef[2]) / ph.ELEMENTARY_CHARGE
                                          if fit["has_k"] and use_scale else None)
    extras["maps"] = [_map_details(m, fit, i) for i, m in enumerate(maps)]
    result.ridge_points = _ridge_points(maps)
    if np.isfinite(top_off):
        curve = neutrality_curve(gate_maps[_curve_map(maps)], result,
                                 field=maps[_curve_map(maps)]["field"])
        extras["neutrality_curve"] = {
            "map": _curve_map(maps), "top_gate": curve[S.TOP_GATE].values,
            "bottom_gate": curve[S.BOTTOM_GATE].values,
            "displacement": curve[DISPLACEMENT].values if np.isfinite(c_bot) else None,
            "rxx": curve.values, "units": {"displacement": "V m-1 (D/eps0)", "rxx": "ohm",
                                           "top_gate": "V", "bottom_gate": "V"}}
    _check_consistency(maps, ratio, warnings)
    return result


def _analyse(maps, q, material, thickness, permittivity, seed, bootstrap):
    """Find every map's lines with ratio q, name the fillings and fit all maps jointly."""
    for m in maps:
        if abs(m["field"]) < ZERO_FIELD:
            m.update(_neutrality_ridge(m["arrays"], q, m["name"]))
        else:
            m.update(_quantum_hall_lines(m["arrays"], q, m["name"]))
    # The neutral line from zero-field maps first: it indexes the fixed-field lines.
    u0 = np.nan
    if any(m["mode"] == "neutrality" for m in maps):
        fit0 = _joint_fit(maps, use_scale=False, seed=seed, bootstrap=0)
        q, u0 = float(fit0["coef"][0]), float(fit0["coef"][1])
    prior_top = _prior_top(thickness, permittivity, q)
    degeneracy, scale_from, notes = _name_lines(maps, material, prior_top, u0)
    has_qh = any(m["mode"] == "quantum-hall" for m in maps)
    use_scale = has_qh
    if has_qh and degeneracy is None:
        # Fit with g = 1 so that the candidates are plain multiples.
        for m in maps:
            if m["mode"] == "quantum-hall":
                m["fillings"] = None
                m["fillings_relative"] = m["line_index"].astype(float)
    fit = _joint_fit(maps, use_scale=use_scale, seed=seed, bootstrap=bootstrap)
    return fit, degeneracy, scale_from, notes, use_scale, has_qh, prior_top


def _version():
    from . import __version__
    return __version__


def _prior_top(thickness, permittivity, q):
    top_t, bot_t = thickness if thickness is not None else (None, None)
    if top_t:
        return float(ph.parallel_plate_capacitance(top_t, permittivity[0]))
    if bot_t:
        return float(ph.parallel_plate_capacitance(bot_t, permittivity[1])) / q
    return None


def _curve_map(maps):
    for i, m in enumerate(maps):
        if m["mode"] == "neutrality":
            return i
    return 0


def _map_details(m, fit, i):
    details = {"source": m["arrays"]["source"], "field": m["field"], "mode": m["mode"],
               "capacitance_ratio_alone": 1.0 / m["q_map"], "explained_share": m["share"],
               "points_used": fit["used"].get(i, 0),
               "rms_residual_V": fit["rms"].get(i, np.nan),
               "symmetry": m.get("symmetry")}
    if m["mode"] == "quantum-hall":
        fillings = m.get("fillings")
        hall = m.get("hall") or [None] * m["u_lines"].size
        details["line_spacing_V"] = m["spacing"]
        details["lines"] = [
            {"filling": (f"{fillings[j]:g}" if fillings is not None else None),
             "relative_index": int(m["line_index"][j]),
             "equivalent_top_gate_V": float(m["u_lines"][j]),
             "points": int(np.sum(m["points"]["line"] == j)), "hall_filling": hall[j]}
            for j in range(m["u_lines"].size)]
        details["scale"] = m["scale"][0] if m.get("scale") else None
    return details


def _ridge_points(maps, per_map=400):
    """Points of every ridge for figures, at most ``per_map`` per map (evenly thinned)."""
    out = {"top_gate": [], "bottom_gate": [], "map": [], "filling": []}
    for i, m in enumerate(maps):
        pts = m["points"]
        take = np.unique(np.linspace(0, pts["top"].size - 1, min(per_map, pts["top"].size)).astype(int))
        if m["mode"] == "neutrality":
            nu = np.zeros(take.size)
        elif m.get("fillings") is not None:
            nu = np.asarray(m["fillings"], float)[pts["line"][take]]
        else:
            nu = np.full(take.size, np.nan)
        out["top_gate"].append(pts["top"][take])
        out["bottom_gate"].append(pts["bottom"][take])
        out["map"].append(np.full(take.size, i))
        out["filling"].append(nu)
    return {k: np.concatenate(v) for k, v in out.items()}


def _check_consistency(maps, ratio, warnings):
    alone = np.array([1.0 / m["q_map"] for m in maps])
    if alone.size > 1 and np.ptp(alone) > 0.05 * ratio:
        warnings.append(f"the maps disagree on C_t/C_b by more than 5 % ({', '.join(f'{a:.3g}' for a in alone)}); "
                        "check for drift or a changed contact between maps")


# --- (n, D) coordinates ----------------------------------------------------------------

def _require_calibration(result):
    needed = ("top_capacitance", "bottom_capacitance", "top_offset", "bottom_offset")
    missing = [n for n in needed if not np.isfinite(getattr(result, n))]
    if missing:
        raise InputError(f"the gate calibration lacks {', '.join(missing)}; the (n, D) transform "
                         "needs absolute capacitances and offsets (fit a map at fixed field, or "
                         "give --material)")
    return (result.top_capacitance, result.bottom_capacitance, result.top_offset,
            result.bottom_offset)


def to_density_displacement(gate_map, result, *, shape=None, density=None, displacement=None):
    """Redraw a gate map on a regular (D, n) grid.

    Parameters
    ----------
    gate_map : xarray.Dataset
        Gate map (dims ``bottom_gate``, ``top_gate``).
    result : GateResult
        Calibration from :func:`fit_gates`.
    shape : (int, int), optional
        Grid size (displacement, density); defaults to the map's own size.
    density, displacement : array_like, optional
        Explicit grids: density in m^-2, displacement as D/eps0 in V/m.

    Returns
    -------
    xarray.Dataset
        Dims ``("displacement", "density")``; every variable of the map on the
        gate dims interpolated linearly, NaN outside the measured area; the
        gate voltages of each grid point as variables ``top_gate``,
        ``bottom_gate``; the convention in ``attrs["displacement_convention"]``.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> from fanmap.results import GateResult
    >>> cal = GateResult(1e-3, 0, 1e-4, 0, 10, 0, 0, 0, 0, 0, 4, "material", "")
    >>> ds = xr.Dataset({"rxx": (("bottom_gate", "top_gate"), np.ones((21, 21)))},
    ...                 coords={"top_gate": np.linspace(-1, 1, 21), "bottom_gate": np.linspace(-5, 5, 21)})
    >>> nd = to_density_displacement(ds, cal)
    >>> nd.rxx.dims, nd.density.attrs["units"]
    (('displacement', 'density'), 'm-2')
    """
    c_t, c_b, v_t0, v_b0 = _require_calibration(result)
    ds = gate_map.transpose(S.BOTTOM_GATE, S.TOP_GATE, ...).sortby(S.BOTTOM_GATE).sortby(S.TOP_GATE)
    top = np.asarray(ds[S.TOP_GATE].values, float)
    bottom = np.asarray(ds[S.BOTTOM_GATE].values, float)
    corners_t, corners_b = np.meshgrid(top[[0, -1]], bottom[[0, -1]])
    n_c = ph.dual_gate_density(corners_t, corners_b, c_t, c_b, v_t0, v_b0)
    d_c = ph.dual_gate_displacement(corners_t, corners_b, c_t, c_b, v_t0, v_b0) / ph.VACUUM_PERMITTIVITY
    rows, cols = shape or (bottom.size, top.size)
    n_grid = np.asarray(density, float) if density is not None else np.linspace(n_c.min(), n_c.max(), cols)
    d_grid = (np.asarray(displacement, float) if displacement is not None
              else np.linspace(d_c.min(), d_c.max(), rows))
    nn, dd = np.meshgrid(n_grid, d_grid)
    vt, vb = ph.dual_gate_voltages(nn, dd * ph.VACUUM_PERMITTIVITY, c_t, c_b, v_t0, v_b0)
    points = np.column_stack([vb.ravel(), vt.ravel()])
    out = xr.Dataset(coords={
        DENSITY: (DENSITY, n_grid, {"units": "m-2", "long_name": "carrier density (electrons positive)"}),
        DISPLACEMENT: (DISPLACEMENT, d_grid, {"units": "V m-1",
                                              "long_name": "displacement field D/eps0"})})
    for name, var in ds.data_vars.items():
        if var.dims[:2] != (S.BOTTOM_GATE, S.TOP_GATE) or var.ndim != 2:
            continue
        interp = interpolate.RegularGridInterpolator((bottom, top), np.asarray(var.values, float),
                                                     bounds_error=False, fill_value=np.nan)
        out[name] = ((DISPLACEMENT, DENSITY), interp(points).reshape(nn.shape), dict(var.attrs))
    out[S.TOP_GATE] = ((DISPLACEMENT, DENSITY), vt, {"units": "V", "long_name": S.LONG_NAMES[S.TOP_GATE]})
    out[S.BOTTOM_GATE] = ((DISPLACEMENT, DENSITY), vb,
                          {"units": "V", "long_name": S.LONG_NAMES[S.BOTTOM_GATE]})
    if S.FIELD in ds.coords and ds[S.FIELD].ndim == 0:
        out = out.assign_coords({S.FIELD: ds[S.FIELD]})
    out.attrs.update({
        S.MAP_KIND: "density_displacement", "displacement_convention": DISPLACEMENT_CONVENTION,
        "top_capacitance": c_t, "bottom_capacitance": c_b, "top_offset": v_t0,
        "bottom_offset": v_b0, "capacitance_units": "F m-2", "offset_units": "V",
        "source_top_gate": [top[0], top[-1], top.size],
        "source_bottom_gate": [bottom[0], bottom[-1], bottom.size]})
    if ds.attrs.get("source"):
        out.attrs["source"] = str(ds.attrs["source"])
    return out


def from_density_displacement(nd_map, result=None, *, top_gate=None, bottom_gate=None):
    """Back from (n, D) to gate voltages: the inverse of :func:`to_density_displacement`.

    ``top_gate`` and ``bottom_gate`` (V) default to the grid of the original
    map, recorded in the (n, D) map's attributes; ``result`` defaults to the
    calibration stored there.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> from fanmap.results import GateResult
    >>> cal = GateResult(1e-3, 0, 1e-4, 0, 10, 0, 0, 0, 0, 0, 4, "material", "")
    >>> vt, vb = np.linspace(-1, 1, 21), np.linspace(-5, 5, 21)
    >>> ds = xr.Dataset({"rxx": (("bottom_gate", "top_gate"), vt[None, :] + vb[:, None])},
    ...                 coords={"top_gate": vt, "bottom_gate": vb})
    >>> back = from_density_displacement(to_density_displacement(ds, cal, shape=(81, 81)), cal)
    >>> bool(abs(back.rxx - ds.rxx).isel(top_gate=slice(3, -3), bottom_gate=slice(3, -3)).max() < 1e-6)
    True
    """
    if result is not None:
        c_t, c_b, v_t0, v_b0 = _require_calibration(result)
    else:
        a = nd_map.attrs
        c_t, c_b, v_t0, v_b0 = (a["top_capacitance"], a["bottom_capacitance"], a["top_offset"],
                                a["bottom_offset"])
    if top_gate is None:
        lo, hi, num = nd_map.attrs["source_top_gate"]
        top_gate = np.linspace(lo, hi, int(num))
    if bottom_gate is None:
        lo, hi, num = nd_map.attrs["source_bottom_gate"]
        bottom_gate = np.linspace(lo, hi, int(num))
    top_gate, bottom_gate = np.asarray(top_gate, float), np.asarray(bottom_gate, float)
    vt, vb = np.meshgrid(top_gate, bottom_gate)
    n = ph.dual_gate_density(vt, vb, c_t, c_b, v_t0, v_b0)
    d = ph.dual_gate_displacement(vt, vb, c_t, c_b, v_t0, v_b0) / ph.VACUUM_PERMITTIVITY
    nd = nd_map.sortby(DISPLACEMENT).sortby(DENSITY)
    dens = nd[DENSITY].values
    disp = nd[DISPLACEMENT].values
    out = xr.Dataset(coords={
        S.TOP_GATE: (S.TOP_GATE, top_gate, {"units": "V", "long_name": S.LONG_NAMES[S.TOP_GATE]}),
        S.BOTTOM_GATE: (S.BOTTOM_GATE, bottom_gate,
                        {"units": "V", "long_name": S.LONG_NAMES[S.BOTTOM_GATE]})})
    points = np.column_stack([d.ravel(), n.ravel()])
    for name, var in nd.data_vars.items():
        if name in (S.TOP_GATE, S.BOTTOM_GATE) or var.dims != (DISPLACEMENT, DENSITY):
            continue
        interp = interpolate.RegularGridInterpolator((disp, dens), np.asarray(var.values, float),
                                                     bounds_error=False, fill_value=np.nan)
        out[name] = ((S.BOTTOM_GATE, S.TOP_GATE), interp(points).reshape(vt.shape), dict(var.attrs))
    if S.FIELD in nd.coords:
        out = out.assign_coords({S.FIELD: nd[S.FIELD]})
    out.attrs[S.MAP_KIND] = S.GATES
    return out


def neutrality_curve(gate_map, result, *, field=None, samples=None):
    """Resistance along the neutrality line versus displacement field, R(D) at n = 0.

    In bilayer graphene it grows with |D| as the layer-polarisation gap opens.
    Returns an :class:`xarray.DataArray` of ``rxx`` (ohm) along ``displacement``
    (D/eps0 in V/m; NaN when the capacitances are unknown), with the gate
    voltages of each point as coordinates.
    """
    arrays = gate_arrays(gate_map, field if field is not None else _field_or_zero(gate_map))
    q = 1.0 / result.capacitance_ratio
    k = result.top_offset + q * result.bottom_offset
    vb = _neutral_segment(arrays, q, k, samples)
    if vb.size == 0:
        raise NoFanError("the neutrality line does not cross this map")
    vt = k - q * vb
    values = ridges.sample_along_line(arrays["rxx"], arrays["top"], arrays["bottom"],
                                      lambda b: k - q * b, vb)
    if np.isfinite(result.top_capacitance) and np.isfinite(result.bottom_capacitance):
        d = ph.dual_gate_displacement(vt, vb, result.top_capacitance, result.bottom_capacitance,
                                      result.top_offset, result.bottom_offset) / ph.VACUUM_PERMITTIVITY
    else:
        d = np.full(vb.size, np.nan)
    order = np.argsort(-vb)   # D grows as V_b falls along the neutral line
    return xr.DataArray(
        values[order], dims=(DISPLACEMENT,), name="rxx_neutrality",
        coords={DISPLACEMENT: (DISPLACEMENT, d[order], {"units": "V m-1",
                                                        "long_name": "displacement field D/eps0"}),
                S.TOP_GATE: (DISPLACEMENT, vt[order], {"units": "V"}),
                S.BOTTOM_GATE: (DISPLACEMENT, vb[order], {"units": "V"})},
        attrs={"units": "ohm", "long_name": "longitudinal resistance along n = 0",
               "displacement_convention": DISPLACEMENT_CONVENTION})


def _field_or_zero(gate_map):
    try:
        return map_field(gate_map)
    except InputError:
        return 0.0
