"""Naming the lines of a fan: degeneracy, Berry phase, absolute scale, kind of every state.

Slopes s (V/T) of lines V = V0 + s |B| through a common origin fix the filling factors
only up to a common factor, nu = k s with k = alpha h / e unknown.  The main sequence
(the lines that survive to the lowest fields) is nu = g (N + gamma): its spacing gives the
unit u = g / k and its offset gamma the Berry phase.  One more fact fixes the scale
(:func:`choose_scale`): R_xy plateaus (``"hall"``), resolved broken-symmetry states spaced
by one (``"broken-symmetry"``), the material preset (``"material"``) or a dielectric prior
(``"dielectric"``); without any of them the answer is a list of candidates (``"ambiguous"``).
"""

from dataclasses import dataclass, field
from fractions import Fraction

import numpy as np

from .materials import get_material
from .physics import FLUX_QUANTUM_SINGLE_ELECTRON

__all__ = ["Naming", "main_sequence_unit", "choose_scale", "classify_fillings",
           "nearest_fraction", "name_lines", "DEGENERACIES"]

#: Denominators tried for fractional states, in order of preference.
_DENOMINATORS = (3, 5, 7, 9, 2, 4, 6, 8)

#: Degeneracies a main sequence may have (spin, valley, layer flavours).
DEGENERACIES = (1, 2, 4, 8)


@dataclass
class Naming:
    """What the slopes say about the states (see :func:`name_lines`)."""

    unit: float                 # u = g / k, slope spacing of the main sequence (V/T)
    offset: float               # gamma in nu = g (N + gamma)
    shift: float                # common slope shift a (V/T), from an origin drift along the field
    main: np.ndarray            # bool per line: used to find the main sequence
    degeneracy: int | None
    berry_phase: int | None
    scale: float                # k = alpha h / e (T/V); nan when ambiguous
    scale_from: str
    fillings: np.ndarray        # assigned filling per line (nan: unexplained); units of g if ambiguous
    labels: list = field(default_factory=list)
    kinds: list = field(default_factory=list)
    distance_sigma: list = field(default_factory=list)
    candidates: list = field(default_factory=list)
    warnings: list = field(default_factory=list)


def _on_grid(values, offset, tolerance):
    """Whether ``values - offset`` are within ``tolerance`` of integers."""
    return np.abs(values - offset - np.round(values - offset)) <= tolerance


def main_sequence_unit(slopes, slope_stderr, onsets, weights=None):
    """Spacing ``u``, offset ``gamma`` and common slope shift ``a`` of the main sequence.

    The main sequence is s = sign * u (N + gamma) + a, taken from the lines with
    ``weights`` above 5 % of the strongest (the caller weighs lines by their strength at
    low field), else from the lines with the lowest onset fields (at least three, and
    every line starting within the lowest fifth of the onset range).  The common shift ``a`` absorbs a drift of the origin that
    follows the field (rows measured in field order); |a| <= u/4, so that gamma = 0 and
    gamma = 1/2 stay distinct.  With lines of one sign only, a cannot be told from gamma
    and is zero.  Trial units come from differences of the slopes and
    from each slope divided by N + gamma; the largest unit that puts at least 80 % of
    the main lines (by weight) on its grid wins.

    Returns
    -------
    unit : float
    gamma : float
    shift : float
        a (V/T).
    main : ndarray of bool
        The lines used.

    Examples
    --------
    Monolayer-graphene-like slopes, 2, 6, 10 and -2, -6 in units of 0.1 V/T:

    >>> s = 0.1 * np.array([2, 6, 10, -2, -6]); err = np.full(5, 1e-4)
    >>> u, g, a, main = main_sequence_unit(s, err, np.ones(5))
    >>> round(u, 6), g, round(a, 6)
    (0.4, 0.5, 0.0)
    """
    s = np.asarray(slopes, float)
    err = np.asarray(slope_stderr, float)
    onsets = np.asarray(onsets, float)
    w = np.ones_like(s) if weights is None else np.asarray(weights, float)
    if weights is not None and (w > 0.05 * w.max()).sum() >= 2:
        main = w > 0.05 * w.max()
    else:
        order = np.argsort(onsets)
        lo, hi = onsets.min(), onsets.max()
        main = onsets <= lo + 0.2 * (hi - lo)
        main[order[:min(3, s.size)]] = True
        w = np.ones_like(s)
    sm, em, wm = s[main], err[main], w[main]
    ambipolar = (sm > 0).any() and (sm < 0).any()
    trials = set()
    for i in range(sm.size):
        for m in range(1, 7):
            for gamma in (0.0, 0.5):
                if m - 1 + gamma > 0:
                    trials.add(abs(sm[i]) / (m - 1 + gamma))
        for j in range(i + 1, sm.size):
            for m in range(1, 7):
                trials.add(abs(sm[i] - sm[j]) / m)
    trials = sorted(t for t in trials if np.isfinite(t) and t > 0)[::-1]
    smallest = 0.02 * np.max(np.abs(sm))
    for u in trials:
        if u < smallest:
            break
        tol = np.maximum(0.1, 3 * em / u)
        best = None
        for gamma in (0.5, 0.0):
            delta = sm / u - np.sign(sm) * gamma
            phase = np.angle(np.sum(wm * np.exp(2j * np.pi * delta))) / (2 * np.pi) \
                if ambipolar else 0.0
            if abs(phase) > 0.25:
                continue
            ok = _on_grid(delta, phase, tol) & (np.abs(sm / u - phase) > 0.25)
            # Two lines cannot be the same Landau level: grid positions must differ.
            position = np.round(delta - phase)[ok] * 2 + np.sign(sm[ok])
            distinct = np.unique(position).size == ok.sum()
            if distinct and wm[ok].sum() >= 0.8 * wm.sum() and ok.sum() >= min(2, sm.size):
                if best is None or abs(phase) < abs(best[1]):
                    best = (gamma, phase)
        if best is not None:
            return (*_refine_unit(s, err, u, best[0], best[1] * u, ambipolar), main)
    return float(np.min(np.abs(sm))), 0.0, 0.0, main


def _refine_unit(s, err, u, gamma, shift, ambipolar):
    """Robust (u, a) of s = u m + a over every line on the grid m = sign (N + gamma).

    Theil-Sen (median of pairwise slopes) rather than least squares, so that one line whose
    minima sit off its filling (a plateau cut by the window edge) does not pull the grid.
    With lines of one sign only, a cannot be told from gamma and stays zero.
    """
    from scipy.stats import theilslopes

    for _ in range(2):
        delta = (s - shift) / u
        m = np.sign(delta) * (np.round(np.abs(delta) - gamma) + gamma)
        ok = (np.abs(delta - m) <= np.maximum(0.1, 3 * err / u)) & (m != 0)
        if ok.sum() < 2 or np.ptp(m[ok]) == 0:
            break
        if ambipolar:
            u, shift = theilslopes(s[ok], m[ok])[:2]
        else:
            u = float(np.median(s[ok] / m[ok]))
    return float(u), gamma, float(shift)


def _lowest_level_only(slopes, err, unit, shift, main):
    """Whether every main line sits at |s - a| = u/2, the lowest level of its sign."""
    relative = np.abs((np.asarray(slopes, float)[main] - shift) / unit)
    tol = np.maximum(0.1, 3 * np.asarray(err, float)[main] / unit)
    return bool(relative.size) and bool(np.all(np.abs(relative - 0.5) <= tol))


def nearest_fraction(value, max_denominator=9):
    """Nearest fraction p/q to ``value`` with q <= ``max_denominator``.

    Examples
    --------
    >>> nearest_fraction(0.664)
    Fraction(2, 3)
    >>> nearest_fraction(-1.41)
    Fraction(-7, 5)
    """
    return Fraction(float(value)).limit_denominator(max_denominator)


def choose_scale(unit, gamma, main_slopes, *, hall_fillings=None, hall_slopes=None, extra_slopes=(),
                 extra_stderr=(), material="auto", lever_arm_prior=None):
    """Decide the absolute scale k = g / u; returns ``(g, scale_from, warnings)``.

    Priority: R_xy plateaus, resolved broken-symmetry states spaced by one, the
    material preset, a dielectric lever-arm prior.  ``g`` is None when none decides.
    Broken-symmetry states decide only when they split the main spacing into quarters or
    finer (a split into halves fits g = 2 fully split as well as g = 4 half split).

    Parameters
    ----------
    unit, gamma : float
        From :func:`main_sequence_unit`.
    main_slopes : ndarray
        Slopes of the main lines (V/T).
    hall_fillings : ndarray, optional
        |nu| = R_K / |R_xy| measured along lines (nan where not measured) ...
    hall_slopes : ndarray, optional
        ... whose slopes (less any common shift) are these.
    extra_slopes, extra_stderr : ndarray
        Slopes of the lines off the main sequence, and their standard errors.
    material : str
        Preset name.
    lever_arm_prior : float, optional
        alpha (m^-2 V^-1) from a dielectric's thickness and permittivity.

    Examples
    --------
    Monolayer slopes plus broken-symmetry states at nu = 1, 3, 4 (u = 0.4 V/T):

    >>> choose_scale(0.4, 0.5, 0.1 * np.array([2, 6]), extra_slopes=0.1 * np.array([1, 3, 4]),
    ...              extra_stderr=np.full(3, 1e-4))
    (4, 'broken-symmetry', [])
    """
    warnings = []
    preset = get_material(material)
    main_slopes = np.abs(np.asarray(main_slopes, float))
    if hall_fillings is not None:
        # Every line sitting on a quantised plateau, nu = R_K / |R_xy| near an integer, gives
        # its own scale k = nu / |s|; g = u k.
        nu = np.asarray(hall_fillings, float)
        slopes_all = np.abs(np.asarray(hall_slopes, float))
        plateau = np.isfinite(nu) & (nu > 0.5) & (np.abs(nu - np.round(nu)) < 0.05)
        if plateau.sum() >= 1:
            estimates = np.round(nu[plateau]) * unit / slopes_all[plateau]
            g = float(np.median(estimates))
            nearest = min(DEGENERACIES, key=lambda d: abs(np.log(g / d)))
            agree = np.abs(estimates / nearest - 1) < 0.05
            if abs(g / nearest - 1) < 0.05 and agree.sum() >= min(2, plateau.sum()):
                if preset.degeneracy is not None and preset.degeneracy != nearest:
                    if preset.flavours:
                        # In a moire band the Hall density restarts at each band filling
                        # (Cao et al., Nature 2018, from memory): R_xy along a neutrality
                        # line that has passed a satellite family counts from that family.
                        warnings.append(f"R_xy plateaus give degeneracy {nearest}, but in a "
                                        "moire map the Hall count restarts at band fillings; "
                                        f"using the preset degeneracy {preset.degeneracy}")
                        return preset.degeneracy, "material", warnings
                    warnings.append(f"R_xy plateaus give degeneracy {nearest}, but material "
                                    f"{material!r} has {preset.degeneracy}; using R_xy")
                return nearest, "hall", warnings
        warnings.append("R_xy is present but shows no consistent quantised plateaus "
                        "along the fan lines; not used for the scale")
    extra = np.asarray(extra_slopes, float)
    extra_err = np.asarray(extra_stderr, float)
    broken = None
    halves = False
    if extra.size >= 2:
        # Largest g whose grid u/g holds at least two off-sequence lines that a coarser grid
        # does not.  A grid of u/2 alone cannot tell a fully split twofold level from a
        # half-split fourfold one, so only a quarter (or finer) grid fixes the scale.
        for g in DEGENERACIES[::-1]:
            tol = np.maximum(0.06, 3 * extra_err * g / unit)
            fine = _on_grid(extra * g / unit, 0.0, tol)
            coarse = (_on_grid(extra * (g // 2) / unit, 0.0, tol) if g > 1
                      else np.zeros_like(fine))
            if (fine & ~coarse).sum() >= 2:
                if g >= 4:
                    broken = g
                else:
                    halves = g == 2
                break
    if broken is not None:
        if preset.degeneracy is not None and preset.degeneracy != broken:
            warnings.append(f"states off the main sequence suggest degeneracy {broken}, but "
                            f"material {material!r} has {preset.degeneracy}; using the preset")
            return preset.degeneracy, "material", warnings
        return broken, "broken-symmetry", warnings
    if halves and preset.degeneracy is None:
        warnings.append("states off the main sequence halve its spacing: a fully split "
                        "twofold level and a half-split fourfold one look alike, so they do "
                        "not fix the scale")
    if preset.degeneracy is not None:
        if preset.offset is not None and abs(preset.offset - gamma) > 0.1:
            warnings.append(f"the main sequence has offset gamma = {gamma:g}, but material "
                            f"{material!r} expects {preset.offset:g}")
        return preset.degeneracy, "material", warnings
    if lever_arm_prior is not None and np.isfinite(lever_arm_prior) and lever_arm_prior > 0:
        g = unit * lever_arm_prior * FLUX_QUANTUM_SINGLE_ELECTRON
        nearest = min(DEGENERACIES, key=lambda d: abs(np.log(g / d)))
        if abs(np.log(g / nearest)) < np.log(1.3):
            return nearest, "dielectric", warnings
        warnings.append(f"the dielectric prior gives degeneracy {g:.2f}, not close to any of "
                        f"{DEGENERACIES}; check thickness and permittivity")
    return None, "ambiguous", warnings


def classify_fillings(measured, stderr, degeneracy, gamma, *, on_main=None, max_denominator=9,
                      significance=5.0, max_fractional=5.0):
    """Name each line from its measured filling nu = k s.

    A line on the main grid g (N + gamma) is ``integer``; another integer is
    ``broken-symmetry``; a line significantly off every integer (by more than
    ``significance`` standard errors and 0.04) is ``fractional`` if it lies on a simple
    fraction p/q: the smallest odd q <= ``max_denominator`` within max(3 sigma, 0.015),
    else the smallest even q within max(sigma, 0.005).  Fractions are looked for only
    below |nu| = ``max_fractional`` (fractional states are a low-filling phenomenon).  Anything else is
    unexplained (kind None).

    Lines flagged in ``on_main`` (already on the main-sequence grid) take the nearest
    main-sequence filling whatever their small offset.

    Returns
    -------
    fillings : ndarray
        Assigned exact filling (nan when unexplained).
    labels, kinds : list of str
    distance_sigma : list of float or None
        For fractional states, |nu - p/q| in standard errors.

    Examples
    --------
    >>> f, labels, kinds, d = classify_fillings(np.array([2.001, 1.0, 0.668]),
    ...                                         np.array([0.002, 0.003, 0.003]), 4, 0.5)
    >>> labels, kinds
    (['2', '1', '2/3'], ['integer', 'broken-symmetry', 'fractional'])
    """
    measured = np.asarray(measured, float)
    stderr = np.asarray(stderr, float)
    fillings = np.full(measured.size, np.nan)
    labels, kinds, distance = [], [], []
    for i, (nu, err) in enumerate(zip(measured, stderr)):
        err = max(err, 1e-4)
        nearest = round(nu)
        if on_main is not None and on_main[i]:
            nearest = np.sign(nu) * degeneracy * (round(abs(nu) / degeneracy - gamma) + gamma)
        if nearest != 0 and ((on_main is not None and on_main[i])
                             or abs(nu - nearest) <= max(3 * err, 0.08)):
            fillings[i] = nearest
            labels.append(str(int(nearest)))
            main_state = abs(abs(nearest) / degeneracy - gamma
                             - round(abs(nearest) / degeneracy - gamma)) < 1e-6
            kinds.append("integer" if main_state else "broken-symmetry")
            distance.append(None)
            continue
        if abs(nu - nearest) > max(significance * err, 0.04) and abs(nu) < max_fractional:
            # The simplest fraction within reach: odd denominators first, even ones only
            # when very close (they are rare and need strong evidence).
            found = None
            for q in _DENOMINATORS:
                if q > max_denominator:
                    continue
                candidate = Fraction(round(nu * q), q)
                tolerance = max(3 * err, 0.015) if q % 2 else max(err, 0.005)
                if candidate.denominator == q and abs(nu - float(candidate)) <= tolerance:
                    found = candidate
                    break
            if found is not None:
                fillings[i] = float(found)
                labels.append(f"{found.numerator}/{found.denominator}")
                kinds.append("fractional")
                distance.append(abs(nu - float(found)) / err)
                continue
        labels.append(f"{nu:.3g}")
        kinds.append(None)
        distance.append(None)
    return fillings, labels, kinds, distance


def name_lines(slopes, slope_stderr, onsets, *, weights=None, hall_fillings=None,
               material="auto", lever_arm_prior=None, ambipolar=None):
    """Degeneracy, Berry phase, scale and the name of every line.

    Parameters
    ----------
    slopes, slope_stderr : ndarray
        Line slopes (V/T) and their standard errors.
    onsets : ndarray
        Lowest field of each line (T).
    weights : ndarray, optional
        Strength of each line (e.g. its number of points).
    hall_fillings : ndarray, optional
        |nu| from R_xy plateaus along each line (nan where not measured).
    material : str
        Preset name or "auto".
    lever_arm_prior : float, optional
        Dielectric prior on alpha (m^-2 V^-1).
    ambipolar : bool, optional
        Whether lines of both signs exist (decides Berry phase 2 pi versus 0 when
        gamma = 0 and the material is "auto"); taken from the slopes if None.

    Returns
    -------
    Naming

    Examples
    --------
    >>> s = 0.1 * np.array([2, 6, 10, -2, -6, 1, 3])
    >>> onsets = np.array([1, 1, 2, 1, 1, 6, 6.0])
    >>> n = name_lines(s, np.full(7, 1e-4), onsets)
    >>> n.degeneracy, n.berry_phase, n.scale_from, n.labels
    (4, 1, 'broken-symmetry', ['2', '6', '10', '-2', '-6', '1', '3'])
    """
    err = np.asarray(slope_stderr, float)
    # A line whose error the fit could not give (singular covariance) counts as 2 % uncertain.
    err = np.where(np.isfinite(err), err, 0.02 * np.abs(np.asarray(slopes, float)))
    unit, gamma, shift, main = main_sequence_unit(slopes, err, onsets, weights)
    preset = get_material(material)
    if preset.offset == 0.0 and gamma == 0.5 and _lowest_level_only(slopes, err, unit, shift,
                                                                     main):
        # Only the lowest level of each sign is in the main sequence: +-u/2 with gamma = 1/2
        # is just as well +-u' with u' = u/2 and gamma = 0; the preset's offset decides.
        unit, gamma = 0.5 * unit, 0.0
    s = np.asarray(slopes, float) - shift
    relative = s / unit
    on_main_grid = _on_grid(np.abs(relative), gamma, np.maximum(0.1, 3 * err / unit))
    # Only lines of the main sequence read the Hall scale: lines off it may be crossings of
    # other families (moire satellites) whose R_xy counts from elsewhere.
    if hall_fillings is not None:
        hall_fillings = np.where(on_main_grid, np.asarray(hall_fillings, float), np.nan)
    g, scale_from, warnings = choose_scale(
        unit, gamma, s, hall_fillings=hall_fillings, hall_slopes=s, extra_slopes=s[~on_main_grid],
        extra_stderr=err[~on_main_grid], material=material, lever_arm_prior=lever_arm_prior)
    if ambipolar is None:
        ambipolar = bool((s[on_main_grid] > 0).any() and (s[on_main_grid] < 0).any())
    if preset.berry_phase is not None and scale_from == "material":
        berry = preset.berry_phase
    elif gamma == 0.5:
        berry = 1
    else:
        # gamma = 0: an ambipolar fourfold/eightfold system (a bilayer's eightfold zero
        # level) has Berry phase 2 pi; a single-carrier parabolic band has 0.
        berry = 2 if ambipolar else 0
    candidates = []
    if g is None:
        for d in DEGENERACIES:
            alpha = d / (unit * FLUX_QUANTUM_SINGLE_ELECTRON)
            candidates.append({"degeneracy": d, "density_per_volt": alpha,
                               "capacitance_per_area": alpha * 1.602176634e-19})
        fillings, labels, kinds, distance = [], [], [], []
        for r, ok in zip(relative, on_main_grid):
            if ok:
                value = np.sign(r) * (round(abs(r) - gamma) + gamma)
                fillings.append(value)
                labels.append(f"{value:g}g")
                kinds.append("integer")
            else:
                fillings.append(np.nan)
                labels.append(f"{r:.3g}g")
                kinds.append(None)
            distance.append(None)
        warnings.append("the absolute scale is ambiguous (no R_xy plateaus, no resolved "
                        "broken-symmetry states, no material preset or dielectric prior): "
                        "fillings are given in units of the unknown degeneracy g; choose a "
                        "candidate with --material or --dielectric-thickness/--permittivity")
        return Naming(unit, gamma, shift, main, None, berry, np.nan, scale_from,
                      np.asarray(fillings),
                      labels, kinds, distance, candidates, warnings)
    scale = g / unit
    fillings, labels, kinds, distance = classify_fillings(scale * s, scale * err, g, gamma,
                                                          on_main=on_main_grid)
    return Naming(unit, gamma, shift, main, g, berry, scale, scale_from, fillings, labels, kinds,
                  distance, candidates, warnings)
