"""Signal processing of magneto-oscillations in inverse field, for the cross-checks.

Shubnikov-de Haas oscillations are periodic in x = 1/B with frequency B_F
(in tesla).  The helpers here take one R_xx(B) trace, remove its smooth
background, resample it uniformly in x, and find the frequency, the minima
and the amplitude envelope.  Plain functions over NumPy arrays, SI units.
"""

import numpy as np
from scipy import optimize, signal

__all__ = [
    "resolvable_field", "relative_oscillation", "uniform_inverse_field",
    "dominant_frequency", "minima_positions", "envelope", "conductivity_like", "log_clipped",
]


def resolvable_field(frequency, field_step, points_per_period=6.0):
    """Lowest field at which oscillations of ``frequency`` have ``points_per_period`` samples.

    The period in B at field B is B^2 / B_F, so B >= sqrt(points * B_F * dB).
    """
    return float(np.sqrt(points_per_period * frequency * field_step))


def conductivity_like(inverse_field, rxx, rxy=None, geometry_factor=1.0):
    """A signal proportional to sigma_xx, whose minima are symmetric about each gap.

    With the Hall signal, sigma_xx = rho_xx / (rho_xx^2 + rho_xy^2) with
    rho_xx = ``geometry_factor`` R_xx (width/length) and rho_xy = R_xy; without
    it, R_xx (1/B)^2, since in the quantum Hall regime sigma_xx ~ rho_xx / rho_xy^2
    and rho_xy is proportional to B.  The peaks of sigma_xx are symmetric about
    each Landau level while those of rho_xx lean towards lower filling, which
    would pull the minima centres and the oscillation phase (common practice:
    locate minima in the conductivity).
    """
    rxx = np.asarray(rxx, dtype=float)
    if rxy is None:
        return rxx * np.asarray(inverse_field, dtype=float) ** 2
    rho = geometry_factor * rxx
    with np.errstate(invalid="ignore", divide="ignore"):
        return rho / (rho**2 + np.asarray(rxy, dtype=float) ** 2)


def log_clipped(values, floor=1e-3):
    """log of ``values`` clipped at ``floor`` times their maximum (quantum Hall zeros, noise)."""
    values = np.asarray(values, dtype=float)
    top = np.nanmax(values) if values.size else np.nan
    if not top > 0:
        return np.full(values.shape, np.nan)
    return np.log(np.maximum(np.nan_to_num(values, nan=floor * top), floor * top))


def relative_oscillation(inverse_field, values, degree=3):
    """Oscillating part of ``values``: values / background - 1.

    The background is a least-squares polynomial of ``degree`` in 1/B (the
    same smooth trend whatever the oscillation frequency).  Where the
    background is not positive everywhere (an offset or a sign change), the
    plain difference values - background, scaled by the mean magnitude of the
    trace, is returned instead.
    """
    x = np.asarray(inverse_field, dtype=float)
    v = np.asarray(values, dtype=float)
    span = np.ptp(x) or 1.0
    t = (x - x.mean()) / span
    coeff = np.polynomial.polynomial.polyfit(t, v, min(degree, max(x.size - 2, 0)))
    background = np.polynomial.polynomial.polyval(t, coeff)
    if np.all(background > 0):
        return v / background - 1.0
    return (v - background) / (np.mean(np.abs(v)) or 1.0)


def uniform_inverse_field(fields, values, lo, hi, samples=None, max_samples=4096):
    """Resample a trace given at ``fields`` onto a uniform grid in 1/B over [lo, hi] (T).

    The grid step is the smallest step in 1/B of the original samples inside the
    range (no information is thrown away), capped at ``max_samples``, unless
    ``samples`` is given.
    Returns ``(x, v)`` with x ascending.
    """
    fields = np.asarray(fields, dtype=float)
    values = np.asarray(values, dtype=float)
    inside = (fields >= lo) & (fields <= hi) & np.isfinite(values)
    x_data = 1.0 / fields[inside]
    order = np.argsort(x_data)
    x_data, v_data = x_data[order], values[inside][order]
    if samples is None:
        step = np.min(np.diff(x_data)) if x_data.size > 1 else 1.0
        samples = int(min(np.ceil(np.ptp(x_data) / step) + 1, max_samples))
    x = np.linspace(x_data[0], x_data[-1], max(int(samples), 2))
    return x, np.interp(x, x_data, v_data)


def _transform(x, w, frequency):
    """|sum w exp(-2 pi i f x)| at one frequency (the windowed DTFT)."""
    return np.abs(np.sum(w * np.exp(-2j * np.pi * frequency * x)))


def dominant_frequency(x, delta, *, min_cycles=1.5, pad=8, max_frequency=None):
    """Frequency (T) of the strongest oscillation of ``delta`` on a uniform grid ``x`` (1/T).

    A Hann window is applied and the trace is zero-padded ``pad`` times; the
    highest spectral peak above ``min_cycles`` cycles per record is then
    refined by maximising the windowed transform between the neighbouring
    padded bins.  A peak at half the frequency that holds more than a third of
    the main peak's amplitude is taken as the fundamental instead (resolved
    spin or valley splitting doubles the frequency at high field).

    Returns ``(frequency, amplitude, resolution, significance)`` where
    ``amplitude`` is the sinusoid amplitude the peak corresponds to,
    ``resolution`` = 1/record length is the Rayleigh resolution and
    ``significance`` the peak height over the median of the spectrum above
    the lowest searched frequency (a noise-only trace gives a few).
    """
    x = np.asarray(x, dtype=float)
    delta = np.asarray(delta, dtype=float) - np.mean(delta)
    length = x[-1] - x[0]
    if x.size < 8 or length <= 0:
        return float("nan"), float("nan"), float("nan"), 0.0
    window = np.hanning(x.size)
    w = delta * window
    step = x[1] - x[0]
    n_fft = 1 << int(np.ceil(np.log2(x.size * pad)))
    spectrum = np.abs(np.fft.rfft(w, n_fft))
    freqs = np.fft.rfftfreq(n_fft, step)
    low = min_cycles / length
    high = max_frequency if max_frequency is not None else freqs[-1]
    band = (freqs >= low) & (freqs <= high)
    if not band.any():
        return float("nan"), float("nan"), 1.0 / length, 0.0
    peaks, _ = signal.find_peaks(spectrum)
    peaks = peaks[band[peaks]]
    if peaks.size == 0:
        return float("nan"), float("nan"), 1.0 / length, 0.0
    main = peaks[np.argmax(spectrum[peaks])]
    half = peaks[np.abs(freqs[peaks] - freqs[main] / 2) <= 1.5 / length]
    half = half[freqs[half] >= low]
    if half.size and spectrum[half].max() > spectrum[main] / 3:
        main = half[np.argmax(spectrum[half])]
    df = freqs[1] - freqs[0]
    xc = x - x[0]
    best = optimize.minimize_scalar(
        lambda f: -_transform(xc, w, f), bounds=(freqs[main] - df, freqs[main] + df),
        method="bounded", options={"xatol": df * 1e-6})
    amplitude = 2.0 * _transform(xc, w, best.x) / np.sum(window)
    significance = spectrum[main] / (np.median(spectrum[freqs >= low]) or np.finfo(float).tiny)
    return float(best.x), float(amplitude), 1.0 / length, float(significance)


def minima_positions(x, delta, frequency, *, min_prominence=0.0):
    """Centres (in 1/B) of the oscillation minima of ``delta``, a trace on ascending ``x``.

    Minima are found at least half a period apart; each centre is the midpoint
    of the two points where the trace crosses half way between the minimum and
    the neighbouring maximum on that side, by linear interpolation.  This is exact for a sinusoid and for flat-bottomed quantum
    Hall minima alike, where the lowest sample is not the centre.

    Returns ``(centres, depths)``; minima whose half-depth crossing is not
    found on both sides are dropped.
    """
    x = np.asarray(x, dtype=float)
    d = np.asarray(delta, dtype=float)
    step = np.median(np.diff(x))
    distance = max(int(0.5 / (frequency * step)), 1)
    minima, props = signal.find_peaks(-d, distance=distance, prominence=min_prominence)
    maxima, _ = signal.find_peaks(d, distance=distance)
    centres, depths = [], []
    for i in minima:
        left = maxima[maxima < i]
        right = maxima[maxima > i]
        if left.size == 0 or right.size == 0:
            continue
        lo, hi = left[-1], right[0]
        depth = min(d[lo], d[hi]) - d[i]
        if depth <= 0:
            continue
        # Each flank is cut at half its own height, so that neighbouring maxima of
        # different heights (growing amplitude, unequal levels) do not shift the centre.
        level_l = d[i] + 0.5 * (d[lo] - d[i])
        level_r = d[i] + 0.5 * (d[hi] - d[i])
        seg_l = np.flatnonzero(d[lo:i + 1] >= level_l)
        seg_r = np.flatnonzero(d[i:hi + 1] >= level_r)
        if seg_l.size == 0 or seg_r.size == 0:
            continue
        a = lo + seg_l[-1]          # last point above the level left of the minimum
        b = i + seg_r[0]            # first point above the level right of the minimum
        x_left = np.interp(level_l, [d[a + 1], d[a]], [x[a + 1], x[a]])
        x_right = np.interp(level_r, [d[b - 1], d[b]], [x[b - 1], x[b]])
        centres.append(0.5 * (x_left + x_right))
        depths.append(depth)
    return np.asarray(centres), np.asarray(depths)


def envelope(x, delta, frequency, samples_per_period=32):
    """Amplitude of the fundamental of ``delta`` (ascending ``x``) around each x.

    The trace is resampled to exactly ``samples_per_period`` points per period,
    demodulated at ``frequency`` and averaged over one period, which removes
    the mirror term and every harmonic below ``samples_per_period``.  Returns
    ``(x_centres, amplitude)`` for the centres where a whole period fits.
    """
    x = np.asarray(x, dtype=float)
    d = np.asarray(delta, dtype=float)
    step = 1.0 / (frequency * samples_per_period)
    xs = np.arange(x[0], x[-1], step)
    if xs.size <= samples_per_period:
        return np.empty(0), np.empty(0)
    z = np.interp(xs, x, d) * np.exp(-2j * np.pi * frequency * xs)
    kernel = np.full(samples_per_period, 1.0 / samples_per_period)
    averaged = np.convolve(z, kernel, mode="valid")
    centres = xs[: averaged.size] + 0.5 * (samples_per_period - 1) * step
    return centres, 2.0 * np.abs(averaged)

