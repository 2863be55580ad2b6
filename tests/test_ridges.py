"""Ridge finding on hand-built rows and maps with exact answers."""

import numpy as np

from fanmap.ridges import (filling_profile, find_row_minima, link_traces, log_signal,
                           valley_strength, vote_origin, vote_slopes)

from _handbuilt_fans import handbuilt_fan


def _row(centres, width=0.02, gate=None):
    gate = np.linspace(0, 1, 201) if gate is None else gate
    r = np.ones_like(gate)
    for c in centres:
        r -= 0.9 * np.exp(-((gate - c) / width) ** 2)
    return gate, r


def test_sub_pixel_minima_of_narrow_and_flat_bottomed_dips():
    gate, r = _row([0.3013, 0.6507])
    flat = (gate > 0.82) & (gate < 0.8805)            # a zero-resistance plateau
    r[flat] = 0.0
    logr, valid = log_signal(r[None, :], despike=False)
    m = find_row_minima(logr, valid, gate, np.array([8.0]))
    assert m.gate.size == 3
    step = gate[1] - gate[0]
    np.testing.assert_allclose(np.sort(m.gate)[:2], [0.3013, 0.6507], atol=0.1 * step)
    assert abs(np.sort(m.gate)[2] - 0.5 * (0.82 + 0.8805)) < 0.6 * step
    assert np.all(m.prominence > 4) and np.all(m.weight > 0)


def test_log_signal_bridges_gaps_removes_spikes_and_keeps_one_point_dips():
    gate, r = _row([0.5])
    r = 1e4 * r
    r[50] *= 100.0      # spike: removed
    r[120] = 1e-3       # one-point dip: kept (a narrow state looks the same in one row)
    r[150:155] = np.nan
    logr, valid = log_signal(r[None, :])
    assert np.isfinite(logr).all() and not valid[0, 150:155].any()
    assert logr[0, 50] < np.log10(2e4)
    m = find_row_minima(logr, valid, gate, np.array([5.0]))
    np.testing.assert_allclose(np.sort(m.gate), [0.5, gate[120]], atol=0.005)


def test_minima_touching_a_nan_gap_are_dropped():
    gate, r = _row([0.3, 0.7])
    r[135:146] = np.nan                    # the dip at 0.7 (column 140) falls in the gap
    logr, valid = log_signal(r[None, :], despike=False)
    m = find_row_minima(logr, valid, gate, np.array([5.0]))
    assert m.gate.size == 1 and abs(m.gate[0] - 0.3) < 0.005


def test_decades_of_background_do_not_hide_minima():
    # Background rising over six decades across the row (log R keeps every dip visible).
    gate, r = _row([0.2, 0.5, 0.8])
    r = r * 10 ** (6 * gate)
    logr, valid = log_signal(r[None, :], despike=False)
    m = find_row_minima(logr, valid, gate, np.array([5.0]))
    np.testing.assert_allclose(np.sort(m.gate), [0.2, 0.5, 0.8], atol=0.01)


def test_valley_strength_peaks_on_dark_lines():
    ds = handbuilt_fan((2, 6), noise=0.0)
    logr, _ = log_signal(ds["rxx"].values)
    v = valley_strength(logr)
    assert v.shape == logr.shape and 0 <= v.min() and v.max() <= 1
    row = logr[-1]
    assert v[-1, np.argmin(row)] > 0.3 > np.median(v)


def test_traces_follow_lines_and_keep_their_field_range():
    ds = handbuilt_fan((2, 6, 10), noise=0.0, field=(2.0, 12.0, 60))
    logr, valid = log_signal(ds["rxx"].values)
    m = find_row_minima(logr, valid, ds["gate"].values, ds["field"].values)
    n = link_traces(m, tolerance=2.5 * 0.4)
    assert n >= 3
    labels, counts = np.unique(m.trace[m.trace >= 0], return_counts=True)
    longest = labels[np.argsort(counts)[-3:]]
    for t in longest:
        pts = m.trace == t
        assert np.ptp(m.field[pts]) > 5.0
        # one trace, one line: its points are straight in (B, V)
        coef = np.polyfit(m.field[pts], m.gate[pts], 1)
        assert np.std(m.gate[pts] - np.polyval(coef, m.field[pts])) < 0.2


def test_origin_vote_finds_origin_outside_the_window():
    ds = handbuilt_fan((2, 4, 6, 8), alpha=3e15, v0=-0.8, gate=(0.0, 1.0, 200),
                       field=(0.5, 10.0, 120), noise=0.0)
    logr, valid = log_signal(ds["rxx"].values)
    m = find_row_minima(logr, valid, ds["gate"].values, ds["field"].values)
    trial = np.linspace(-2.0, 2.0, 401)
    best = trial[np.argmax(vote_origin(m.gate, m.field, m.field, trial, 0.005 / 10))]
    assert abs(best + 0.8) < 0.02
    slopes = vote_slopes((m.gate + 0.8) / m.field, m.field, 0.0005, 5.0)
    k = 3e15 * 4.135667696e-15
    found = np.sort(slopes * k)
    assert np.all([np.min(np.abs(found - nu)) < 0.05 for nu in (4, 6, 8)])


def test_filling_profile_sees_a_state_too_faint_for_rows():
    # A dip at nu = 3 of a tenth of the noise in every row: invisible row by row,
    # clear in the average along its line.
    rng = np.random.default_rng(0)
    ds = handbuilt_fan((2,), noise=0.0)
    gate, field = ds["gate"].values, ds["field"].values
    nu = 7.2e14 * 4.135667696e-15 * (gate[None, :] - 2.0) / field[:, None]
    img = np.log10(1e3 * (1 + 0.02 * rng.standard_normal(nu.shape)
                          - 0.002 * np.exp(-((nu - 3) / 0.15) ** 2)))
    k = 7.2e14 * 4.135667696e-15
    slopes = np.linspace(1.5, 4.5, 61) / k
    prof, count = filling_profile(img, gate, field, 2.0, slopes)
    assert abs(slopes[np.argmin(prof)] * k - 3.0) < 0.1
    assert count.min() > 50


def test_crowded_rows_are_dropped_unless_asked_for():
    # Deep dips five points apart (below twice the smallest separation of three points):
    # the default drops the row as unresolved; crowded_separation=0 keeps every dip.
    gate = np.linspace(0, 1, 201)
    centres = gate[10:191:5] + 0.001
    _, r = _row(centres, width=0.006, gate=gate)
    logr, valid = log_signal(r[None, :], despike=False)
    assert find_row_minima(logr, valid, gate, np.array([1.0])).gate.size == 0
    m = find_row_minima(logr, valid, gate, np.array([1.0]), crowded_separation=0)
    assert m.gate.size == centres.size
    np.testing.assert_allclose(np.sort(m.gate), centres, atol=0.25 * (gate[1] - gate[0]))
