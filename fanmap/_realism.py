"""Measurement artefacts added to simulated maps.

Each function takes arrays of shape (rows, points) in *storage* order (gate
ascending) plus the sweep direction of every row, so that effects that follow
the acquisition (correlated noise, an interrupted sweep) run the way the
instrument swept.  All randomness comes from the ``rng`` passed in.
"""

import numpy as np
from scipy.signal import lfilter

__all__ = ["sweep_directions", "add_noise", "add_spikes", "interrupt_last_sweep",
           "add_nan_gaps", "irregular_steps"]


def sweep_directions(rows, alternate):
    """+1 (up) for every row, or alternating +1, -1, ... when ``alternate``."""
    directions = np.ones(rows, dtype=np.int8)
    if alternate:
        directions[1::2] = -1
    return directions


def _acquisition(values, directions):
    """View rows in acquisition order (down sweeps reversed); the operation is its own inverse."""
    out = values.copy()
    down = directions < 0
    out[down] = out[down, ::-1]
    return out


def add_noise(values, directions, rng, *, relative=0.0, floor=0.0, correlated=0.0,
              correlation_length=20.0):
    """White noise (``relative`` of the value plus ``floor`` in the value's unit) and noise
    correlated along each sweep (AR(1) with ``correlation_length`` points, ``correlated``
    of the value)."""
    rows, points = values.shape
    white = rng.standard_normal((rows, points))
    floor_noise = rng.standard_normal((rows, points))
    out = values * (1 + relative * white) + floor * floor_noise
    if correlated > 0:
        a = np.exp(-1.0 / max(correlation_length, 1e-9))
        drive = rng.standard_normal((rows, points)) * np.sqrt(1 - a * a)
        start = rng.standard_normal((rows, 1))
        walk, _ = lfilter([1.0], [1.0, -a], drive, axis=1, zi=a * start)
        out = out + values * correlated * _acquisition(walk, directions)
    return out


def add_spikes(values, rng, count, amplitude=5.0):
    """Multiply ``count`` random pixels by (1 + ``amplitude`` * U(0.5, 1.5)); returns (values, mask)."""
    out = values.copy()
    mask = np.zeros(values.shape, bool)
    if count:
        flat = rng.choice(values.size, size=min(count, values.size), replace=False)
        mask.flat[flat] = True
        out[mask] *= 1 + amplitude * rng.uniform(0.5, 1.5, mask.sum())
    return out, mask


def interrupt_last_sweep(arrays, directions, completed):
    """Set the tail (in acquisition order) of the last row to NaN; ``completed`` in (0, 1)."""
    points = arrays[0].shape[1]
    kept = int(round(completed * points))
    for values in arrays:
        if directions[-1] > 0:
            values[-1, kept:] = np.nan
        else:
            values[-1, : points - kept] = np.nan


def add_nan_gaps(arrays, rng, count, longest=6):
    """Blank ``count`` short runs (1 to ``longest`` points) in random rows of every array."""
    rows, points = arrays[0].shape
    for _ in range(count):
        row = rng.integers(rows)
        length = rng.integers(1, longest + 1)
        start = rng.integers(0, max(points - length, 1))
        for values in arrays:
            values[row, start:start + length] = np.nan


def irregular_steps(field, rng, jitter):
    """Field values with the same end points but step sizes varied by +-``jitter`` (fraction)."""
    field = np.asarray(field, dtype=float)
    if jitter <= 0 or field.size < 3:
        return field
    steps = np.diff(field) * (1 + jitter * rng.uniform(-1, 1, field.size - 1))
    return np.concatenate([[field[0]], field[0] + np.cumsum(steps) * (field[-1] - field[0])
                           / steps.sum()])
