"""Figures: fitted lines where the physics puts them, every state labelled, readable styles."""

import io

import matplotlib
import numpy as np
import pytest
import xarray as xr
from matplotlib.colors import LogNorm
from matplotlib.text import Text
from scipy import constants

from _fan_data import (ALPHA, V0, synthetic_fan, synthetic_gate_map, synthetic_gate_result,
                        synthetic_result)
from fanmap import _style
from fanmap import figures as F
from fanmap.errors import InputError
from fanmap.results import State

matplotlib.use("Agg")

# h/e and e from CODATA via scipy.constants (exact in the 2019 SI).
H_OVER_E = constants.h / constants.e


def _lines(ax):
    return [line for line in ax.get_lines() if len(line.get_xdata()) > 2]


def _texts(fig):
    out = []
    for ax in fig.axes:
        out.extend(t.get_text() for t in ax.texts)
        out.extend(a.get_text() for a in ax.texts)
    return set(out)


def test_state_labels_use_fractions_and_satellite_pairs():
    assert F.state_label(State("10", "integer", 0, 0, 1, 0, 1)) == "10"
    assert F.state_label(State("-2/3", "fractional", 0, 0, 1, 0, 1)) == "\u22122/3"
    assert F.state_label(State("-1", "satellite", 0, 0, 1, 0, 1, band_filling=4)) == "(\u22121, 4)"


def test_colour_scale_choices():
    rng = np.random.default_rng(1)
    flat = 100 + rng.random((20, 30))
    assert F.colour_scale(flat)[2] == "linear"
    spiky = flat.copy()
    spiky[:, 10:12] = 1e5           # a neutrality peak 1000 times the background
    values, norm, used = F.colour_scale(spiky)
    assert used == "log" and isinstance(norm, LogNorm)
    growing = flat * np.logspace(0, 2, 20)[:, None]
    values, norm, used = F.colour_scale(growing)
    assert used == "row"
    assert np.allclose(np.nanmedian(values, axis=1), 1.0)
    with pytest.raises(InputError, match="unknown colour scale"):
        F.colour_scale(flat, "rainbow")
    with pytest.raises(InputError, match="no finite values"):
        F.colour_scale(np.full((3, 3), np.nan))


def test_fan_lines_follow_the_fit_and_every_state_is_labelled():
    ds, result = synthetic_fan(), synthetic_result()
    fig = F.plot_fan(ds, result)
    ax = fig.axes[0]
    lines = _lines(ax)
    for state in result.states:
        # Some drawn curve must be V = intercept + slope * B for this state.
        assert any(np.allclose(l.get_xdata(), state.intercept + state.slope * l.get_ydata())
                   for l in lines), state.filling
    texts = {t.get_text() for t in ax.texts}
    for state in result.states:
        assert F.state_label(state) in texts
    # The zero-density marker sits at (V0, B = 0).
    stars = [l for l in ax.get_lines() if l.get_marker() == "*" and len(l.get_xdata()) == 1]
    assert stars and stars[0].get_xdata()[0] == pytest.approx(V0)
    assert stars[0].get_ydata()[0] == 0.0
    assert ax.get_xlabel() == "gate voltage (V)" and ax.get_ylabel() == "magnetic field (T)"
    assert "(Ω)" in fig.axes[1].get_ylabel()


def test_labels_at_the_top_edge_do_not_overlap():
    ds, result = synthetic_fan(), synthetic_result()
    fig = F.plot_fan(ds, result)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    ax = fig.axes[0]
    top = ax.get_window_extent(renderer).y1
    # The text's own box (an annotation's full extent also covers its leader line).
    boxes = [Text.get_window_extent(t, renderer) for t in ax.texts if t.get_text()]
    boxes = [b for b in boxes if b.y0 >= top]
    # 7/3, (1, -4), 2 and 3 crowd together at the top: they must be stacked, not overlapping.
    assert len(boxes) >= 8
    for i, a in enumerate(boxes):
        for b in boxes[i + 1:]:
            assert not a.overlaps(b), (a, b)


def test_filling_map_lines_are_vertical_at_their_filling():
    # nu = n h / (e B) (CODATA h and e): a line through the origin with slope
    # nu / (alpha h/e) must be drawn at constant nu in the filling-factor map.
    ds, result = synthetic_fan(), synthetic_result(extra_states=False)
    state = State("6", "integer", 6 / (ALPHA * H_OVER_E), V0, 10, 1.0, 9.0)
    result.states = [state]
    fig = F.plot_filling_map(ds, result)
    curves = _lines(fig.axes[0])
    assert curves
    for line in curves:
        assert np.allclose(line.get_xdata(), 6.0, atol=1e-9)
    assert "6" in {t.get_text() for t in fig.axes[0].texts}


def test_filling_map_image_has_its_minima_at_the_fillings():
    # The synthetic map has R_xx dips at nu = +-2, 6, 10, 14 (nu = n h/(e B), CODATA h, e);
    # redrawn against nu, the field-averaged image must dip there too.
    ds, result = synthetic_fan(), synthetic_result(extra_states=False)
    fig = F.plot_filling_map(ds, result)
    image = fig.axes[0].get_images()[0]
    data = np.ma.filled(image.get_array().astype(float), np.nan)
    x0, x1, _, _ = image.get_extent()
    nu = np.linspace(x0, x1, data.shape[1] + 1)
    nu = (nu[1:] + nu[:-1]) / 2
    profile = np.nanmean(data[data.shape[0] // 2:], axis=0)      # upper half of the field range
    for filling in (-10, -6, 6, 10):
        near = np.abs(nu - filling) < 1.5
        between = np.abs(nu - (filling + 2)) < 0.5               # halfway to the next state
        assert profile[near].min() < 0.5 * np.nanmean(profile[between]), filling


def test_density_map_puts_a_state_at_nu_e_b_over_h():
    ds, result = synthetic_fan(), synthetic_result(extra_states=False)
    result.states = [State("2", "integer", 2 / (ALPHA * H_OVER_E), V0, 10, 1.0, 9.0)]
    fig = F.plot_density_map(ds, result)
    line = _lines(fig.axes[0])[-1]
    field = line.get_ydata()
    # n = nu e B / h, in 10^12 cm^-2 = 10^16 m^-2.
    assert np.allclose(line.get_xdata(), 2 * field / H_OVER_E / 1e16)


def test_hall_fillings_step_at_the_fitted_fillings():
    # R_xy = h/(nu e^2) on a plateau (von Klitzing et al., PRL 45, 494 (1980); R_K from
    # scipy.constants): the Hall filling must read 6 where the fitted filling is near 6.
    ds, result = synthetic_fan(hall=True), synthetic_result(extra_states=False)
    fig = F.plot_hall_fillings(ds, result)
    curves = [l for l in fig.axes[0].get_lines() if l.get_label().startswith("B = ")]
    assert len(curves) == 4
    for line in curves:
        nu, nu_hall = np.asarray(line.get_xdata()), np.asarray(line.get_ydata())
        near_six = np.abs(nu - 6) < 0.5
        assert near_six.any() and np.allclose(nu_hall[near_six], 6.0)
    with pytest.raises(InputError, match="no R_xy"):
        F.plot_hall_fillings(synthetic_fan(n_field=5, n_gate=11), result)


def test_redrawn_maps_need_a_calibration():
    ds, result = synthetic_fan(), synthetic_result()
    result.density_per_volt = float("nan")
    with pytest.raises(InputError, match="lever arm"):
        F.plot_filling_map(ds, result)


def test_residuals_are_gate_minus_line_per_state():
    result = synthetic_result()
    residuals = F.state_residuals(result)
    assert len(residuals) == len(result.states)
    for (field, resid, _), state in zip(residuals, result.states):
        assert field.size == state.points
        assert np.sqrt(np.mean(resid**2)) < 0.01       # the data were drawn with 4 mV noise
    fig = F.plot_residuals(result, gate_step=0.375)
    visible = [ax for ax in fig.axes if ax.get_visible()]
    assert len(visible) == len(result.states)
    assert "5 ridge points not assigned" in fig.get_suptitle()


def test_residual_figure_without_points_is_an_error():
    with pytest.raises(InputError, match="no ridge points"):
        F.plot_residuals(synthetic_result(with_points=False))


def test_index_plot_draws_the_fitted_line():
    fig = F.plot_index_plot(synthetic_result())
    ax = fig.axes[0]
    fit = [l for l in ax.get_lines() if l.get_linestyle() == "--"]
    # N = B_F/B - gamma meets the N axis at -gamma = -1/2 (Berry phase pi; Zhang et al. 2005).
    assert fit and fit[0].get_ydata()[0] == pytest.approx(-0.5)
    points = [l for l in ax.get_lines() if l.get_marker() == "o"][0]
    assert np.allclose(10.0 * points.get_xdata() - 0.5, points.get_ydata())
    result = synthetic_result()
    result.crosschecks = {"hall_density_per_volt": 1.0}
    assert F.index_plot_data(result.crosschecks) == []
    with pytest.raises(InputError, match="index-plot"):
        F.plot_index_plot(result)


def test_kind_styles_differ_without_colour():
    # Greyscale readability: every kind has its own line style and marker.
    styles = [_style.kind_style(k) for k in ("integer", "broken-symmetry", "fractional",
                                             "satellite")]
    assert len({str(s["linestyle"]) for s in styles}) == 4
    assert len({s["marker"] for s in styles}) == 4
    # Colour maps are matplotlib's perceptually uniform ones.
    uniform = {"viridis", "cividis", "magma", "inferno", "plasma"}
    assert {_style.MAP_COLORMAP, _style.TRANSFORMED_COLORMAP, _style.GATE_COLORMAP} <= uniform


def test_figures_save_as_png_and_pdf():
    fig = F.plot_fan(synthetic_fan(n_field=12, n_gate=41), synthetic_result())
    for fmt, magic in (("png", b"\x89PNG"), ("pdf", b"%PDF")):
        buffer = io.BytesIO()
        fig.savefig(buffer, format=fmt)
        assert buffer.getvalue().startswith(magic)


def test_fan_figure_rejects_a_map_without_rxx():
    ds = synthetic_fan(n_field=5, n_gate=11).rename({"rxx": "other"})
    with pytest.raises(InputError, match="no 'rxx'"):
        F.plot_fan(ds, synthetic_result())


def _gate_map(field=0.0):
    return synthetic_gate_map(field)


def _gate_result():
    return synthetic_gate_result()


def test_gate_map_neutrality_line_has_zero_density():
    from fanmap.physics import dual_gate_density

    result = _gate_result()
    fig = F.plot_gate_maps([_gate_map(), _gate_map(1.0)], result)
    ax = fig.axes[0]
    neutral = [l for l in ax.get_lines() if l.get_label() == "n = 0 (fit)"]
    assert neutral
    n = dual_gate_density(neutral[0].get_xdata(), neutral[0].get_ydata(), 1.2e-3, 0.8e-3,
                          0.1, -0.2)
    assert np.allclose(n, 0.0, atol=1e6)
    assert any(ax.get_title() == "B = 1 T" for ax in fig.axes)


def test_nd_map_axes_in_trade_units():
    density = np.linspace(-2e16, 2e16, 21)
    displacement = np.linspace(-0.5, 0.5, 11) * 1e9 * constants.epsilon_0   # C m^-2
    nd = xr.DataArray(np.ones((11, 21)), dims=("displacement", "density"),
                      coords={"density": ("density", density, {"units": "m-2"}),
                              "displacement": ("displacement", displacement, {"units": "C m-2"})},
                      name="rxx", attrs={"units": "ohm"})
    fig = F.plot_nd_map(nd, _gate_result())
    ax = fig.axes[0]
    # D / epsilon0 in V/nm (epsilon0 from scipy.constants): +-0.5 V/nm; n in 10^12 cm^-2: +-2.
    assert ax.get_ylim() == pytest.approx((-0.55, 0.55))  # half-cell margins
    assert ax.get_xlim() == pytest.approx((-2.1, 2.1))   # half-cell margins
    assert "V/nm" in ax.get_ylabel()


def test_batch_summary_has_error_bars_and_marks_failures():
    rows = [{"device": "A", "cooldown": "1", "density_per_volt": 7e14,
             "density_per_volt_stderr": 1e12, "zero_density_voltage": 1.0,
             "zero_density_voltage_stderr": 0.1},
            {"device": "B", "cooldown": "1", "status": "failed", "error": "no fan"}]
    fig = F.plot_batch_summary(rows)
    left, right = fig.axes[:2]
    assert [t.get_text() for t in left.get_yticklabels()] == ["A / 1", "B / 1"]
    assert "failed" in {t.get_text() for t in left.texts}
    caps = [c for c in left.containers]
    assert caps and caps[0].lines[0].get_xdata()[0] == pytest.approx(7.0)   # 10^10 cm^-2 V^-1
    with pytest.raises(InputError, match="empty"):
        F.plot_batch_summary([])
