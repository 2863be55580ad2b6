"""Cut long-format points (one row per point) into sweeps along a fast axis."""

import numpy as np

from ..errors import InputError


def _significant_steps(values):
    d = np.diff(values)
    mag = np.abs(d[np.isfinite(d)])
    if mag.size == 0 or np.nanmax(mag) == 0:
        return d, 0.0
    big = mag[mag > 1e-3 * mag.max()]
    return d, 0.3 * float(np.median(big))


def count_changes(values):
    """How often ``values`` changes by a significant step (slow axes change rarely)."""
    values = np.asarray(values, dtype=float)
    finite = values[np.isfinite(values)]
    if finite.size < 2:
        return 0
    span = float(finite.max() - finite.min())
    if span == 0:
        return 0
    d = np.abs(np.diff(finite))
    return int(np.count_nonzero(d > 1e-3 * span))


def split_points(fast, slow, breaks=None):
    """Start indices of the sweeps in a long-format table.

    A new sweep starts at a given break (blank line, sweep-index change), where
    the slow axis steps, and where the fast axis turns back (triangle or
    sawtooth sweeps at one slow value).
    """
    fast = np.asarray(fast, dtype=float)
    slow = np.asarray(slow, dtype=float)
    n = fast.size
    starts = {0}
    if breaks is not None:
        breaks = np.asarray(breaks)
        starts.update((np.flatnonzero(breaks[1:] != breaks[:-1]) + 1).tolist())
    d_slow, slow_thr = _significant_steps(slow)
    if slow_thr > 0:
        starts.update((np.flatnonzero(np.abs(np.nan_to_num(d_slow)) > slow_thr) + 1).tolist())
    d_fast, fast_thr = _significant_steps(fast)
    starts = np.asarray(sorted(starts), dtype=int)
    # a sweep also ends where the fast axis turns: the first significant step against the
    # current direction starts a new sweep, whose direction the next step sets
    sig = np.flatnonzero(np.isfinite(d_fast) & (np.abs(d_fast) > fast_thr))
    is_start = np.zeros(n + 1, dtype=bool)
    is_start[starts] = True
    sig = sig[~is_start[sig + 1]]
    segment = np.searchsorted(starts, sig, side="right")
    sign = np.sign(d_fast[sig])
    turn = np.zeros(sig.size, dtype=bool)
    turn[1:] = (sign[1:] != sign[:-1]) & (segment[1:] == segment[:-1])
    # within a run of consecutive turns only every other one starts a sweep
    index = np.arange(sig.size)
    last_calm = np.maximum.accumulate(np.where(~turn, index, -1))
    rank = index - last_calm - 1
    splits = sig[turn & (rank % 2 == 0)] + 1
    return np.unique(np.concatenate([starts, splits]))


def cut_sweeps(fast, slow, signals, breaks=None):
    """List of sweeps: dicts with ``slow`` (median), ``slow_spread``, ``fast``, ``direction``, ``signals``."""
    fast = np.asarray(fast, dtype=float)
    slow = np.asarray(slow, dtype=float)
    starts = split_points(fast, slow, breaks)
    ends = np.append(starts[1:], fast.size)
    sweeps = []
    for a, b in zip(starts, ends):
        f = fast[a:b]
        s = slow[a:b]
        ok = np.isfinite(f)
        if not ok.any() or not np.isfinite(s).any():
            continue
        steps = np.diff(f[ok])
        direction = 1 if np.nansum(steps) >= 0 else -1
        sweeps.append({
            "slow": float(np.nanmedian(s)),
            "slow_spread": float(np.nanmax(s) - np.nanmin(s)),
            "fast": f[ok],
            "direction": direction,
            "signals": {k: np.asarray(v, dtype=float)[a:b][ok] for k, v in signals.items()},
            "first_index": int(a),
        })
    if not sweeps:
        raise InputError("no sweep with finite axis values")
    return sweeps
