"""The plain way a fan is analysed by hand, as a baseline for the accuracy benchmark.

Per row of the upper two thirds of the field range: minima of the log signal (a fixed prominence of 0.05 decades); minima of
neighbouring rows closer than three points are joined into tracks; every track of 20
points or more is fitted with a straight line V = a + s B; V0 is the median intercept of
the tracks; the tracks, sorted by slope on each side of V0, are matched in order to the
material's known main sequence (the lowest |nu| first); alpha is the median of
nu / (s h/e).  No drift, hysteresis, resolvability, broken-symmetry or fraction handling.
"""

import numpy as np
from scipy.signal import find_peaks

from fanmap.materials import main_sequence
from fanmap.physics import FLUX_QUANTUM_SINGLE_ELECTRON


def baseline_fit(fan_map, material):
    """(alpha, V0) the plain way; NaN when it finds too little."""
    gate = np.asarray(fan_map["gate"].values, float)
    field = np.abs(np.asarray(fan_map["field"].values, float))
    rxx = np.abs(np.asarray(fan_map["rxx"].transpose("field", "gate").values, float))
    order = np.argsort(field)
    order = order[field[order] >= field.max() / 3]   # the well-resolved upper two thirds
    tracks = []          # each: list of (field, gate)
    open_tracks = []     # indices into tracks with their last column
    for i in order:
        if field[i] == 0 or not np.isfinite(rxx[i]).any():
            continue
        row = np.log10(np.clip(np.nan_to_num(rxx[i], nan=np.nanmax(rxx[i])), 1e-3, None))
        peaks, _ = find_peaks(-row, prominence=0.05)
        still_open = []
        used = set()
        for t, last in open_tracks:
            if peaks.size == 0:
                continue
            k = int(np.argmin(np.abs(peaks - last)))
            if abs(peaks[k] - last) <= 3 and k not in used:
                used.add(k)
                tracks[t].append((field[i], gate[peaks[k]]))
                still_open.append((t, peaks[k]))
        for k, p in enumerate(peaks):
            if k not in used:
                tracks.append([(field[i], gate[p])])
                still_open.append((len(tracks) - 1, p))
        open_tracks = still_open
    lines = []
    for tr in tracks:
        if len(tr) < 20:
            continue
        b, v = np.array(tr).T
        if np.ptp(b) <= 0:
            continue
        s, a = np.polyfit(b, v, 1)
        lines.append((s, a, len(tr)))
    if len(lines) < 2:
        return np.nan, np.nan
    v0 = float(np.median([a for _, a, _ in lines]))
    sequence = main_sequence(material, 60)
    alphas = []
    for sign in (1, -1):
        side = sorted((abs(s) for s, a, _ in lines if np.sign(s) == sign))
        nus = [abs(n) for n in sequence if np.sign(n) == sign]
        nus = sorted(nus)
        for s, nu in zip(side, nus):
            alphas.append(nu / (s * FLUX_QUANTUM_SINGLE_ELECTRON))
    return (float(np.median(alphas)) if alphas else np.nan), v0
