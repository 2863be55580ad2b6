"""Figures of a fit: the fan with its labelled lines, redrawn maps, residuals, gate maps.

Every function takes labelled data (the map contract of :mod:`fanmap._schema`)
and a result dataclass, and returns a :class:`matplotlib.figure.Figure` drawn
with the Agg canvas, without touching pyplot's global state.  Axes are in the
user's units (V, T; densities in 10^12 cm^-2, the trade's usual unit);
quantities inside stay SI.  The visual scheme lives in :mod:`fanmap._style`.

A fitted state is the line V_g = intercept + slope |B| (minima of R_xx do not
depend on the sign of the field).

Examples
--------
>>> import numpy as np, xarray as xr
>>> from fanmap.results import FanResult, State
>>> gate = np.linspace(-5, 5, 41); field = np.linspace(0.5, 4, 15)
>>> rxx = xr.DataArray(np.ones((15, 41)), dims=("field", "gate"),
...                    coords={"field": field, "gate": gate}, attrs={"units": "ohm"})
>>> result = FanResult(1e15, 1e13, 1.6e-4, 0.0, 0.01, 0.0, 4, 1, "material sequence",
...                    states=[State("2", "integer", 0.48, 0.0, 15, 0.5, 4.0, 2.0)])
>>> fig = plot_fan(xr.Dataset({"rxx": rxx}), result)
>>> len(fig.axes)  # the map and its colour bar
2
"""

import math
import warnings
from fractions import Fraction

import numpy as np
from matplotlib.colors import LogNorm, Normalize
from matplotlib.figure import Figure
from matplotlib.image import NonUniformImage
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib import rc_context
from matplotlib.transforms import blended_transform_factory

from . import _schema as S
from . import _style
from .errors import InputError
from .physics import (FLUX_QUANTUM_SINGLE_ELECTRON, VACUUM_PERMITTIVITY, filling_from_density,
                      hall_filling)

__all__ = [
    "state_label", "colour_scale", "plot_fan", "plot_filling_map", "plot_density_map",
    "plot_hall_fillings",
    "plot_residuals", "plot_index_plot", "index_plot_data", "plot_gate_maps", "plot_nd_map",
    "plot_batch_summary", "state_residuals", "value_with_error", "DENSITY_UNIT",
]

#: Densities on figure axes are in units of 10^12 cm^-2 = 10^16 m^-2.
DENSITY_UNIT = 1e16
_DENSITY_LABEL = "density n (10¹² cm⁻²)"
_UNIT_TEXT = {"ohm": "Ω", "Ohm": "Ω", "ohms": "Ω", "V": "V", "T": "T"}


# --- small helpers -------------------------------------------------------------

def _new_figure(width, height, layout="constrained"):
    fig = Figure(figsize=(width, height), layout=layout)
    FigureCanvasAgg(fig)
    return fig


def _map_figure(width, height, top=0.6):
    """A figure with one map axes and its colour bar at fixed places (sizes in inches).

    A fixed layout leaves room above the axes for two rows of line labels and
    is much quicker to draw than a layout engine that measures every text.
    """
    fig = _new_figure(width, height, layout=None)
    left, bottom, right, bar_gap, bar_width = 0.75, 0.55, 1.3, 0.1, 0.13
    ax = fig.add_axes([left / width, bottom / height, (width - left - right) / width,
                       (height - bottom - top) / height])
    cax = fig.add_axes([(width - right + bar_gap) / width, bottom / height, bar_width / width,
                        (height - bottom - top) / height])
    return fig, ax, cax


def _text_minus(text):
    return text.replace("-", "\u2212")


def state_label(state):
    """Text that labels a state on a figure: its filling, p/q, or (t, s) for a satellite.

    Examples
    --------
    >>> from fanmap.results import State
    >>> state_label(State("-6", "integer", 0.0, 0.0, 1, 1.0, 2.0))
    '−6'
    >>> state_label(State("2/3", "fractional", 0.0, 0.0, 1, 1.0, 2.0))
    '2/3'
    >>> state_label(State("1", "satellite", 0.0, 0.0, 1, 1.0, 2.0, band_filling=-4))
    '(1, −4)'
    """
    if state.kind == "satellite":
        band = "?" if state.band_filling is None else str(int(state.band_filling))
        return _text_minus(f"({state.filling}, {band})")
    return _text_minus(str(state.filling))


def _state_nominal_filling(state):
    """Filling factor of a state as a number (from its text; NaN if unreadable)."""
    try:
        return float(Fraction(str(state.filling).strip()))
    except (ValueError, ZeroDivisionError):
        return float(state.filling_value)


def _units_text(attrs):
    units = str(attrs.get("units", "")).strip()
    return _UNIT_TEXT.get(units, units)


def _axis_label(coord, default_name):
    name = coord.attrs.get("long_name", default_name)
    units = _units_text(coord.attrs)
    return f"{name} ({units})" if units else name


def _signal(fan_map, signal=None):
    """The data variable to draw (R_xx by default) as a DataArray on (field, gate)."""
    name = signal or (S.RXX if S.RXX in fan_map.data_vars else None)
    if name is None or name not in fan_map.data_vars:
        raise InputError(
            f"the map has no {signal or S.RXX!r} variable to draw (it has: "
            f"{', '.join(map(str, fan_map.data_vars)) or 'none'}); pass signal=NAME")
    da = fan_map[name]
    if set(da.dims) != {S.FIELD, S.GATE}:
        raise InputError(f"{name!r} has dimensions {da.dims}; a fan map needs "
                         f"({S.FIELD!r}, {S.GATE!r})")
    da = da.transpose(S.FIELD, S.GATE)
    return da.sortby(S.FIELD).sortby(S.GATE)


def _row_medians(values):
    """Median of the positive values of each row (NaN for a row without any), as a column."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)     # rows that are all NaN
        return np.nanmedian(np.where(values > 0, values, np.nan), axis=1, keepdims=True)


def colour_scale(values, scale="auto", *, rows_are_field=True):
    """Choose how to colour a resistance map: ``(array, norm, description)``.

    ``scale`` is ``"linear"``, ``"log"``, ``"row"`` (each row divided by its
    median, then logarithmic: for maps whose background changes by decades
    with field) or ``"auto"``, which picks ``"row"`` when the row medians span
    more than a factor 10, ``"log"`` when the positive values span more than a
    factor 30, and ``"linear"`` otherwise.  Limits are robust percentiles, so
    a huge neutrality peak does not wash out the fan.  Row normalisation is
    only chosen automatically when ``rows_are_field`` (fan maps, one row per
    field value); gate maps get ``"log"`` or ``"linear"``.

    Examples
    --------
    >>> import numpy as np
    >>> rows = np.outer(np.logspace(0, 3, 5), np.linspace(1, 2, 8))
    >>> colour_scale(rows)[2]
    'row'
    >>> colour_scale(np.linspace(1, 2, 40).reshape(5, 8))[2]
    'linear'
    """
    values = np.asarray(values, dtype=float)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        raise InputError("the map has no finite values to draw; check the signal and its NaNs")
    positive = finite[finite > 0]
    mostly_positive = positive.size >= 0.9 * finite.size
    if scale == "auto":
        scale = "linear"
        if mostly_positive and positive.size:
            medians = _row_medians(values)[:, 0]
            medians = medians[np.isfinite(medians) & (medians > 0)]
            lo, hi = np.percentile(positive, [1, 99])
            if rows_are_field and medians.size > 1 and medians.max() / medians.min() > 10:
                scale = "row"
            elif lo > 0 and hi / lo > 30:
                scale = "log"
    if scale not in ("linear", "log", "row"):
        raise InputError(f"unknown colour scale {scale!r}; use auto, linear, log or row")
    if scale == "row":
        values = values / _row_medians(values)
        finite = values[np.isfinite(values) & (values > 0)]
        scale_used = "row"
    else:
        scale_used = scale
    if scale_used in ("log", "row"):
        positive = finite[finite > 0]
        if positive.size == 0:
            raise InputError("a logarithmic colour scale needs positive values; use scale='linear'")
        lo, hi = np.percentile(positive, [0.5, 99.5])
        lo = max(lo, hi * 1e-6)
        # Values at or below zero (noise, or R_xy mixed into R_xx in a minimum) are the
        # deepest minima: draw them at the bottom of the scale rather than as holes.
        values = np.where(np.isfinite(values), np.maximum(values, lo), np.nan)
        return values, LogNorm(vmin=lo, vmax=max(hi, lo * 1.01)), scale_used
    lo, hi = np.percentile(finite, [0.5, 99.5])
    return values, Normalize(vmin=lo, vmax=hi if hi > lo else lo + 1), "linear"


_SUPERSCRIPTS = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def _power_of_ten(value, _position=None):
    """Tick text 10ⁿ in plain Unicode (no mathtext: much quicker to lay out)."""
    if value <= 0:
        return ""
    exponent = math.log10(value)
    if abs(exponent - round(exponent)) > 1e-9:
        return ""
    return "10" + str(int(round(exponent))).translate(_SUPERSCRIPTS)


def _colour_bar(fig, mesh, cax, label, ax=None):
    bar = (fig.colorbar(mesh, cax=cax) if cax is not None
           else fig.colorbar(mesh, ax=ax, pad=0.01, fraction=0.06))
    if isinstance(mesh.norm, LogNorm):
        bar.ax.yaxis.set_major_formatter(FuncFormatter(_power_of_ten))
        bar.ax.yaxis.set_minor_formatter(FuncFormatter(lambda *_: ""))
    bar.set_label(label)
    return bar


def _colour_bar_label(da, scale):
    symbol = {S.RXX: "Rₓₓ", S.RXY: "R_xy"}.get(da.name, str(da.name))
    name = da.attrs.get("long_name", "")
    if scale == "row":
        return f"{symbol} / row median" + (f"  ({name})" if name else "")
    units = _units_text(da.attrs)
    text = f"{name} {symbol}" if name else symbol
    return f"{text} ({units})" if units else text


def _uniform(values):
    steps = np.diff(values)
    return values.size > 1 and np.all(steps > 0) and np.ptp(steps) <= 1e-3 * abs(steps.mean())


def _half_step_edges(values):
    step = (values[-1] - values[0]) / (values.size - 1) if values.size > 1 else 1.0
    first = values[1] - values[0] if values.size > 1 else step
    last = values[-1] - values[-2] if values.size > 1 else step
    return values[0] - first / 2, values[-1] + last / 2


def _image(ax, x, y, values, norm, cmap):
    """Draw ``values`` (rows along y) on centre coordinates ``x``, ``y`` as an image.

    An image is far quicker to draw and much smaller in a PDF than a mesh of
    cells; a non-uniform image keeps irregular field steps in place.  Only
    coordinates that do not increase strictly (repeated fields) need a mesh.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if x.size < 2 or y.size < 2 or not (np.all(np.diff(x) > 0) and np.all(np.diff(y) > 0)):
        return ax.pcolormesh(x, y, values, norm=norm, cmap=cmap, shading="nearest",
                             rasterized=True)
    extent = (*_half_step_edges(x), *_half_step_edges(y))
    if _uniform(x) and _uniform(y):
        # "auto": nearest-neighbour when magnified, anti-aliased when a pixel of the figure
        # covers several of the map's, so that narrow minima are not skipped.
        return ax.imshow(values, origin="lower", extent=extent, aspect="auto",
                         interpolation="auto", norm=norm, cmap=cmap)
    image = NonUniformImage(ax, interpolation="nearest", extent=extent, norm=norm, cmap=cmap)
    image.set_data(x, y, np.ma.masked_invalid(values))
    ax.add_image(image)
    return image


def _state_gate(state, field):
    return state.intercept + state.slope * np.abs(field)


def _draw_state_line(ax, x_fit, y_fit, x_ext, y_ext, style, thin=False):
    """A fitted line: bold over its fitted field range, faint where extended.

    ``thin`` draws both parts as hairlines, for maps where the line sits right on
    the feature it marks (the filling-factor map) and must not hide it.
    """
    kw = {"color": style["color"], "linestyle": style["linestyle"], "solid_capstyle": "round"}
    if thin:
        ax.plot(x_ext, y_ext, linewidth=0.5, alpha=0.5, **kw)
        ax.plot(x_fit, y_fit, linewidth=0.6, alpha=0.9, path_effects=_style.halo(1.2), **kw)
        return
    ax.plot(x_ext, y_ext, linewidth=0.7, alpha=0.55, path_effects=_style.halo(1.8), **kw)
    ax.plot(x_fit, y_fit, linewidth=style["linewidth"], path_effects=_style.halo(), **kw)


def _spread(centres, widths, lo, hi, pad):
    """Label centres as close as possible to ``centres`` (sorted) without overlapping.

    Least squares under minimum spacings: with q_i = p_i - (cumulative spacing)
    the constraint is q non-decreasing, solved by pooling adjacent violators;
    then the run is kept inside [lo, hi] where it fits.
    """
    gaps = np.concatenate([[0.0], (widths[:-1] + widths[1:]) / 2 + pad])
    offset = np.cumsum(gaps)
    target = centres - offset
    blocks = []                                   # [mean, count]
    for value in target:
        blocks.append([value, 1])
        while len(blocks) > 1 and blocks[-2][0] > blocks[-1][0]:
            v2, n2 = blocks.pop()
            v1, n1 = blocks.pop()
            blocks.append([(v1 * n1 + v2 * n2) / (n1 + n2), n1 + n2])
    q = np.concatenate([np.full(n, v) for v, n in blocks])
    q = np.maximum(q, lo + widths[0] / 2)
    q = np.minimum(q, hi - widths[-1] / 2 - offset[-1])
    return q + offset


def _place_top_labels(fig, ax, positions, texts, kinds):
    """Labels above the top edge, spread sideways where they would collide, with leader lines.

    When the labels need more than the axes' width they go on two rows.
    """
    transform = blended_transform_factory(ax.transData, ax.transAxes)
    order = np.argsort(positions)
    renderer = fig.canvas.get_renderer()
    size = _style.FONT_SIZE - 1
    fonts = [{"fontsize": size, "color": "#111111",
              "fontweight": "bold" if kinds[i] == "integer" else "normal",
              "fontstyle": "italic" if kinds[i] == "fractional" else "normal"} for i in order]
    widths = []
    for i, font in zip(order, fonts):            # measure each label once, then draw it
        probe = ax.text(0, 0, texts[i], **font)
        widths.append(probe.get_window_extent(renderer).width)
        probe.remove()
    widths = np.array(widths)
    centres = np.array([ax.transData.transform((positions[i], 0.0))[0] for i in order])
    box = ax.get_window_extent(renderer)
    lo, hi, pad = box.x0 - 8.0, box.x1 + 8.0, 6.0
    rows = 1 if widths.sum() + pad * len(widths) <= hi - lo else 2
    if rows == 2:
        # Make room for the second row: lower the top of the axes (and of the colour bar
        # beside it, which shares its height); x positions are unchanged.
        shrink = 0.28 / fig.get_figheight()
        top_edge = ax.get_position().y1
        for other in fig.axes:
            box = other.get_position()
            if abs(box.y1 - top_edge) < 1e-6:
                other.set_position([box.x0, box.y0, box.width, box.height - shrink])
    placed = np.empty_like(centres)
    for row in range(rows):
        members = np.arange(row, len(centres), rows)
        placed[members] = _spread(centres[members], widths[members], lo, hi, pad)
    points_per_pixel = 72.0 / fig.dpi
    artists = []
    for k, (i, font) in enumerate(zip(order, fonts)):
        lift = 2 + (k % rows) * 1.45 * size
        leader = abs(placed[k] - centres[k]) > 1.0 or k % rows
        extra = {}
        if leader:
            lift += 5
            extra["arrowprops"] = {"arrowstyle": "-", "color": "#888888", "linewidth": 0.5,
                                   "shrinkA": 1, "shrinkB": 0}
        artists.append(ax.annotate(
            texts[i], (positions[i], 1.0), xycoords=transform,
            xytext=((placed[k] - centres[k]) * points_per_pixel, lift),
            textcoords="offset points", ha="center", va="bottom", annotation_clip=False,
            **font, **extra))
    return artists


def _place_side_labels(fig, ax, points, texts, kinds):
    """Labels inside the axes where a line leaves through the left or right edge.

    Labels on one edge are spread vertically so that they do not overlap; a
    label moved away from its line gets a short leader.
    """
    size = _style.FONT_SIZE - 1
    box = ax.get_window_extent(fig.canvas.get_renderer())
    step = 1.25 * size * fig.dpi / 72.0                      # label height in pixels
    points_per_pixel = 72.0 / fig.dpi
    for edge in ("left", "right"):
        mine = [k for k, p in enumerate(points) if p[2] == edge]
        if not mine:
            continue
        mine.sort(key=lambda k: points[k][1])
        centres = np.array([ax.transData.transform((points[k][0], points[k][1]))[1]
                            for k in mine])
        placed = _spread(centres, np.full(len(mine), step), box.y0 + step / 2,
                         box.y1 - step / 2, 0.0)
        inward = 3 if edge == "left" else -3
        for k, centre, spot in zip(mine, centres, placed):
            x, y, _ = points[k]
            style = _style.kind_style(kinds[k])
            moved = abs(spot - centre) > 1.0
            ax.annotate(texts[k], (x, y), xytext=(inward * (4 if moved else 1),
                                                  (spot - centre) * points_per_pixel),
                        textcoords="offset points", ha="left" if edge == "left" else "right",
                        va="center", fontsize=size, color=style["color"],
                        path_effects=_style.halo(2.2), annotation_clip=False,
                        arrowprops={"arrowstyle": "-", "color": style["color"], "linewidth": 0.6,
                                    "shrinkA": 0, "shrinkB": 0} if moved else None)


def _label_lines(fig, ax, curves, texts, kinds):
    """Label each curve (x, y arrays, y increasing) where it leaves the axes."""
    x0, x1 = sorted(ax.get_xlim())
    y0, y1 = ax.get_ylim()
    near_top = y1 - 0.04 * (y1 - y0)     # a line leaving a side this high is labelled on top
    top, side = ([], [], []), ([], [], [])
    for (x, y), text, kind in zip(curves, texts, kinds):
        inside = (x >= x0) & (x <= x1) & (y <= y1)
        if not inside.any():
            continue
        last = np.flatnonzero(inside)[-1]
        if last == len(x) - 1 or y[last] >= near_top:
            top[0].append(x[last])
            top[1].append(text)
            top[2].append(kind)
        else:
            edge = "right" if x[min(last + 1, len(x) - 1)] > x1 else "left"
            side[0].append((x1 if edge == "right" else x0, y[last], edge))
            side[1].append(text)
            side[2].append(kind)
    if top[0]:
        _place_top_labels(fig, ax, np.asarray(top[0]), top[1], top[2])
    if side[0]:
        _place_side_labels(fig, ax, side[0], side[1], side[2])


def _kind_legend(ax, kinds, extra=(), loc="lower right"):
    handles = []
    for kind in dict.fromkeys(kinds):
        style = _style.kind_style(kind)
        handles.append(Line2D([], [], color=style["color"], linestyle=style["linestyle"],
                              linewidth=style["linewidth"], path_effects=_style.halo(),
                              label=style["label"]))
    handles.extend(extra)
    if handles:
        legend = ax.legend(handles=handles, loc=loc, frameon=True, framealpha=0.85,
                           facecolor="#3a3a3a", edgecolor="none", labelcolor="#ffffff")
        legend.set_zorder(5)


def _field_samples(field_lo, field_hi, count=200):
    return np.linspace(field_lo, field_hi, count)


# --- fan map and its redrawn versions ------------------------------------------

def plot_fan(fan_map, result, *, signal=None, scale="auto", show_ridges=False):
    """The fan map with every fitted line overlaid and labelled with its filling factor.

    Lines are solid over the field range where the state was fitted and thin
    where extrapolated to B = 0; each is labelled where it leaves the map
    (fractions as p/q, satellites as (t, s)).  The star marks the fitted
    zero-density point (V0, B = 0) with its standard error.

    Parameters
    ----------
    fan_map : xarray.Dataset
        Fan map (dims ``field``, ``gate``).
    result : FanResult
        The fit to draw.
    signal : str, optional
        Variable to draw (default ``rxx``).
    scale : {"auto", "linear", "log", "row"}
        Colour scale, see :func:`colour_scale`.
    show_ridges : bool
        Also draw the ridge points the fit used.
    """
    da = _signal(fan_map, signal)
    gate, field = da[S.GATE].values, da[S.FIELD].values
    values, norm, used = colour_scale(da.values, scale)
    with rc_context(_style.rc_params()):
        fig, ax, cax = _map_figure(7.0, 5.8, top=0.8)
        mesh = _image(ax, gate, field, values, norm, _style.MAP_COLORMAP)
        _colour_bar(fig, mesh, cax, _colour_bar_label(da, used))
        ax.set_xlabel(_axis_label(da[S.GATE], "gate voltage"))
        ax.set_ylabel(_axis_label(da[S.FIELD], "magnetic field"))
        gate_lo, gate_hi = float(gate.min()), float(gate.max())
        field_lo, field_hi = min(0.0, float(field.min())), float(field.max())
        ax.set_xlim(gate_lo, gate_hi)
        ax.set_ylim(field_lo, field_hi)
        ax.set_facecolor("#e9e9e9")
        if show_ridges and result.ridge_points is not None:
            rp = result.ridge_points
            ax.plot(rp["gate"], rp["field"], **_style.RIDGE_POINT_STYLE)
        curves, texts, kinds = [], [], []
        for state in result.states:
            style = _style.kind_style(state.kind)
            b_ext = _field_samples(max(field_lo, 0.0), field_hi)
            b_fit = _field_samples(state.field_min, state.field_max, 50)
            _draw_state_line(ax, _state_gate(state, b_fit), b_fit, _state_gate(state, b_ext),
                             b_ext, style)
            if field_lo < 0:
                # The same line at negative field: minima of R_xx depend on |B| only.
                _draw_state_line(ax, _state_gate(state, b_fit), -b_fit,
                                 _state_gate(state, b_ext), -b_ext, style)
            curves.append((_state_gate(state, b_ext), b_ext))
            texts.append(state_label(state))
            kinds.append(state.kind)
        _mark_zero_density(ax, result, gate_lo, gate_hi, field_lo)
        _label_lines(fig, ax, curves, texts, kinds)
        zero = Line2D([], [], label="zero density V₀", **_style.ZERO_DENSITY_MARKER)
        _kind_legend(ax, kinds, extra=[zero])
        fig.suptitle(_fan_title(fan_map, result), fontsize=_style.FONT_SIZE + 1)
    return fig


def _fan_title(fan_map, result):
    alpha = result.density_per_volt
    parts = []
    source = result.source or fan_map.attrs.get("source")
    if source:
        parts.append(str(source).rsplit("/", 1)[-1])
    if math.isfinite(alpha):
        parts.append(f"α = ({value_with_error(alpha / 1e14, result.density_per_volt_stderr / 1e14)})"
                     " ×10¹⁰ cm⁻² V⁻¹")
    v0 = result.zero_density_voltage
    if math.isfinite(v0):
        parts.append(f"V₀ = ({value_with_error(v0, result.zero_density_voltage_stderr)}) V")
    if len(parts) == 3 and sum(map(len, parts)) > 64:
        return parts[0] + "\n" + "   ".join(parts[1:])
    return "   ".join(parts)


def value_with_error(value, error):
    """``value ± error`` with the error to two significant digits and the value to match.

    Examples
    --------
    >>> value_with_error(7.562491, 3.0e-5)
    '7.562491 ± 0.000030'
    >>> value_with_error(-1.23456, float("nan"))
    '−1.235'
    """
    if not (math.isfinite(error) and error > 0):
        return _text_minus(f"{value:.4g}")
    decimals = min(max(0, 1 - math.floor(math.log10(error))), 10)
    return _text_minus(f"{value:.{decimals}f} ± {error:.{decimals}f}")


def _mark_zero_density(ax, result, gate_lo, gate_hi, field_lo):
    v0, err = result.zero_density_voltage, result.zero_density_voltage_stderr
    if not math.isfinite(v0):
        return
    if gate_lo <= v0 <= gate_hi:
        ax.errorbar([v0], [max(field_lo, 0.0)], xerr=[err] if math.isfinite(err) else None,
                    ecolor="#ffffff", elinewidth=1.5, capsize=3, zorder=6, clip_on=False,
                    **_style.ZERO_DENSITY_MARKER)
    else:
        edge = gate_hi if v0 > gate_hi else gate_lo
        ax.annotate(_text_minus(f"V0 = {v0:.3g} V →" if v0 > gate_hi else f"← V0 = {v0:.3g} V"),
                    (edge, max(field_lo, 0.0)), xytext=(-4 if v0 > gate_hi else 4, 6),
                    textcoords="offset points", ha="right" if v0 > gate_hi else "left",
                    va="bottom", color="#ffffff", path_effects=_style.halo(2.2), zorder=6)


def _density(gate, result):
    return result.density_per_volt * (np.asarray(gate) - result.zero_density_voltage)


def _require_calibration(result, what):
    if not (math.isfinite(result.density_per_volt) and result.density_per_volt > 0
            and math.isfinite(result.zero_density_voltage)):
        raise InputError(f"the {what} needs a fitted lever arm and zero-density voltage; "
                         "this result has none")


def _resample_in_filling(gate, field, values, result, nu_lo, nu_hi):
    """Each row interpolated (linearly in gate) onto one regular grid of filling factor.

    The grid is fine enough that at the highest field one step in ν spans no more
    than one gate step, so no minimum is skipped; outside the gate window it is NaN.
    """
    gate_step = float(np.median(np.diff(gate))) if gate.size > 1 else 1.0
    # V_g - V0 = nu |B| / (alpha h/e): the gate span of one filling step at the top field.
    volts_per_filling = np.abs(field).max() / (FLUX_QUANTUM_SINGLE_ELECTRON * result.density_per_volt)
    count = int(np.clip((nu_hi - nu_lo) * volts_per_filling / gate_step, 200, 1600))
    nu_grid = np.linspace(nu_lo, nu_hi, count)
    out = np.full((field.size, count), np.nan)
    for k, b in enumerate(field):
        wanted = result.zero_density_voltage + nu_grid * abs(b) / (
            FLUX_QUANTUM_SINGLE_ELECTRON * result.density_per_volt)
        out[k] = np.interp(wanted, gate, values[k], left=np.nan, right=np.nan)
    return nu_grid, out


def plot_filling_map(fan_map, result, *, signal=None, scale="auto", max_filling=None):
    """The map redrawn against filling factor ν = n h/(e B) and field: fan lines become vertical.

    Satellite lines, which do not pass through the fan's origin, stay curves.
    ``max_filling`` limits the ν axis (default: the fitted states plus a margin).
    """
    _require_calibration(result, "filling-factor map")
    da = _signal(fan_map, signal)
    gate, field = da[S.GATE].values, da[S.FIELD].values
    keep = np.abs(field) > 1e-6 * max(np.abs(field).max(), 1e-30)
    if keep.sum() < 2:
        raise InputError("the filling-factor map needs at least two rows at non-zero field")
    values, norm, used = colour_scale(da.values[keep], scale)
    field_kept = field[keep]
    if np.any(field_kept > 0):
        # One branch only: rows at +B and -B would fall on the same place in (nu, |B|).
        values, field_kept = values[field_kept > 0], field_kept[field_kept > 0]
    else:
        field_kept = np.abs(field_kept)
    nu = filling_from_density(_density(gate, result)[None, :], field_kept[:, None])
    fillings = np.array([_state_nominal_filling(s) for s in result.states if s.kind != "satellite"])
    fillings = fillings[np.isfinite(fillings)]
    if max_filling is None:
        span = np.abs(fillings).max() if fillings.size else 12.0
        max_filling = span + max(2.0, 0.12 * span)
    nu_lo = max(-max_filling, float(np.nanmin(nu)))
    nu_hi = min(max_filling, float(np.nanmax(nu)))
    with rc_context(_style.rc_params()):
        fig, ax, cax = _map_figure(7.0, 5.2)
        nu_grid, resampled = _resample_in_filling(gate, field_kept, values, result, nu_lo, nu_hi)
        order = np.argsort(field_kept, kind="stable")
        mesh = _image(ax, nu_grid, field_kept[order], resampled[order], norm,
                      _style.TRANSFORMED_COLORMAP)
        _colour_bar(fig, mesh, cax, _colour_bar_label(da, used))
        ax.set_xlim(nu_lo, nu_hi)
        ax.set_ylim(float(field_kept.min()), float(field_kept.max()))
        ax.set_xlabel("filling factor ν = nh/(eB)")
        ax.set_ylabel(_axis_label(da[S.FIELD], "magnetic field"))
        ax.set_facecolor("#e9e9e9")
        curves, texts, kinds = [], [], []
        b_top = float(field_kept.max())
        gate_lo, gate_hi = float(gate.min()), float(gate.max())
        for state in result.states:
            style = _style.kind_style(state.kind)
            b_fit = _field_samples(max(state.field_min, 1e-3), state.field_max, 50)
            b_ext = _field_samples(max(float(field_kept.min()), 1e-3), b_top, 400)
            # Extend a line only where the map has data (its gate value inside the window).
            v_ext = _state_gate(state, b_ext)
            b_ext = b_ext[(v_ext >= gate_lo) & (v_ext <= gate_hi)]
            nu_fit = filling_from_density(_density(_state_gate(state, b_fit), result), b_fit)
            nu_ext = filling_from_density(_density(_state_gate(state, b_ext), result), b_ext)
            _draw_state_line(ax, nu_fit, b_fit, nu_ext, b_ext, style, thin=True)
            inside = (nu_ext >= nu_lo) & (nu_ext <= nu_hi)
            if inside.any():
                # Every label goes above the top edge: the lines are vertical here.
                curves.append(nu_ext[np.flatnonzero(inside)[-1]])
                texts.append(state_label(state))
                kinds.append(state.kind)
        if curves:
            _place_top_labels(fig, ax, np.asarray(curves), texts, kinds)
        _kind_legend(ax, kinds)
        fig.suptitle("map against filling factor (fitted calibration)",
                     fontsize=_style.FONT_SIZE + 1)
    return fig


def plot_density_map(fan_map, result, *, signal=None, scale="auto"):
    """The map redrawn against carrier density n = α (V_g − V0) and field."""
    _require_calibration(result, "density map")
    da = _signal(fan_map, signal)
    gate, field = da[S.GATE].values, da[S.FIELD].values
    values, norm, used = colour_scale(da.values, scale)
    density = _density(gate, result) / DENSITY_UNIT
    with rc_context(_style.rc_params()):
        fig, ax, cax = _map_figure(7.0, 5.2)
        mesh = _image(ax, density, field, values, norm, _style.TRANSFORMED_COLORMAP)
        _colour_bar(fig, mesh, cax, _colour_bar_label(da, used))
        field_lo, field_hi = min(0.0, float(field.min())), float(field.max())
        ax.set_xlim(float(density.min()), float(density.max()))
        ax.set_ylim(field_lo, field_hi)
        ax.set_xlabel(_DENSITY_LABEL)
        ax.set_ylabel(_axis_label(da[S.FIELD], "magnetic field"))
        ax.set_facecolor("#e9e9e9")
        curves, texts, kinds = [], [], []
        for state in result.states:
            style = _style.kind_style(state.kind)
            b_fit = _field_samples(state.field_min, state.field_max, 50)
            b_ext = _field_samples(max(field_lo, 0.0), field_hi)
            n_fit = _density(_state_gate(state, b_fit), result) / DENSITY_UNIT
            n_ext = _density(_state_gate(state, b_ext), result) / DENSITY_UNIT
            _draw_state_line(ax, n_fit, b_fit, n_ext, b_ext, style)
            curves.append((n_ext, b_ext))
            texts.append(state_label(state))
            kinds.append(state.kind)
        _label_lines(fig, ax, curves, texts, kinds)
        _kind_legend(ax, kinds)
        fig.suptitle("map against density n = α (Vg − V₀)",
                     fontsize=_style.FONT_SIZE + 1)
    return fig


def plot_hall_fillings(fan_map, result, *, fields=None, max_filling=None):
    """Hall filling ν_H = R_K / R_xy against the fitted filling factor, at a few fields.

    On a plateau R_xy = h/(ν e²) (von Klitzing et al., PRL 45, 494 (1980)), so with a
    correct calibration the curves step across the diagonal ν_H = ν at the fitted
    fillings: an independent look at the absolute scale.  ``fields`` (T) default
    to four rows between a third of the top field and the top field.
    """
    _require_calibration(result, "Hall figure")
    if S.RXY not in fan_map.data_vars:
        raise InputError("the map has no R_xy ('rxy') variable; the Hall figure needs it")
    da = _signal(fan_map, S.RXY)
    gate, field = da[S.GATE].values, da[S.FIELD].values
    positive = np.flatnonzero(field > 0) if np.any(field > 0) else np.flatnonzero(field < 0)
    if positive.size == 0:
        raise InputError("the Hall figure needs rows at non-zero field")
    top = np.abs(field[positive]).max()
    wanted = np.asarray(fields if fields is not None else top * np.array([1.0, 0.75, 0.5, 0.33]))
    rows = list(dict.fromkeys(int(positive[np.argmin(np.abs(np.abs(field[positive]) - abs(b)))])
                              for b in wanted))
    fillings = np.array([_state_nominal_filling(st) for st in result.states
                         if st.kind in ("integer", "broken-symmetry")])
    fillings = fillings[np.isfinite(fillings)]
    if max_filling is None:
        # The low fillings, where plateaus are wide enough to see as steps.
        max_filling = min(np.abs(fillings).max() if fillings.size else 12.0, 14.0) + 2.0
    with rc_context(_style.rc_params()):
        fig = _new_figure(6.4, 4.6)
        ax = fig.add_subplot()
        for value in fillings:
            ax.axhline(value, color="#dddddd", linewidth=0.6, zorder=0)
        ax.plot([-max_filling, max_filling], [-max_filling, max_filling], color="#999999",
                linestyle="--", linewidth=0.8, label="ν_H = ν")
        for k, row in enumerate(rows):
            b = float(field[row])
            nu = filling_from_density(_density(gate, result), b)
            with np.errstate(divide="ignore", invalid="ignore"):
                nu_hall = np.sign(b) * hall_filling(da.values[row])
            # Near neutrality R_xy crosses zero and R_K/R_xy means nothing: leave it out.
            nu_hall = np.where((np.abs(nu_hall) <= 1.5 * max_filling) & (np.abs(nu) >= 1.0),
                               nu_hall, np.nan)
            style = _style.SERIES_STYLES[k % len(_style.SERIES_STYLES)]
            ax.plot(nu, nu_hall, color=style["color"], marker=style["marker"], markersize=3.5,
                    markevery=max(1, gate.size // 25), linewidth=1.0, label=f"B = {b:.3g} T")
        ax.set_xlim(-max_filling, max_filling)
        ax.set_ylim(-max_filling, max_filling)
        ax.set_xlabel("filling factor ν from the fit")
        ax.set_ylabel("Hall filling ν_H = R_K / R_xy")
        ax.legend(loc="upper left")
        fig.suptitle("Hall plateaus against the fitted filling factor (grey: fitted states)",
                     fontsize=_style.FONT_SIZE + 1)
    return fig


# --- residuals and the index plot ----------------------------------------------

def state_residuals(result):
    """Residual gate voltage (V) of each state's ridge points from its fitted line.

    Returns a list, one entry per state, of ``(field, residual, weight)``
    arrays (empty arrays for a state with no assigned points).

    Examples
    --------
    >>> import numpy as np
    >>> from fanmap.results import FanResult, State
    >>> r = FanResult(1e15, 0, 0, 0.0, 0, 0, 4, 1, "",
    ...               states=[State("2", "integer", 0.5, 0.0, 2, 1.0, 2.0)])
    >>> r.ridge_points = {"field": np.array([1.0, 2.0]), "gate": np.array([0.51, 0.99]),
    ...                   "state": np.array([0, 0]), "weight": np.ones(2)}
    >>> np.round(state_residuals(r)[0][1], 3).tolist()
    [0.01, -0.01]
    """
    rp = result.ridge_points
    out = []
    if rp is None:
        return [(np.empty(0), np.empty(0), np.empty(0)) for _ in result.states]
    field = np.asarray(rp["field"], dtype=float)
    gate = np.asarray(rp["gate"], dtype=float)
    index = np.asarray(rp["state"], dtype=int)
    weight = np.asarray(rp.get("weight", np.ones_like(field)), dtype=float)
    for i, state in enumerate(result.states):
        mine = index == i
        out.append((field[mine], gate[mine] - _state_gate(state, field[mine]), weight[mine]))
    return out


def plot_residuals(result, *, gate_step=None, max_columns=4):
    """Residuals (mV) of every fitted line's ridge points versus field, one panel per state.

    The grey band is ± half a gate step of the map (``gate_step``, V), the
    resolution of a single trace; points inside it are sub-pixel agreement.
    """
    if result.ridge_points is None:
        raise InputError("the result carries no ridge points, so residuals cannot be drawn; "
                         "fit the map with fanmap.fanfit.fit_fan")
    if not result.states:
        raise InputError("the result has no fitted states to draw residuals for")
    residuals = state_residuals(result)
    count = len(result.states)
    columns = min(max_columns, count)
    rows = math.ceil(count / columns)
    with rc_context(_style.rc_params()):
        width, height = 2.0 * columns + 0.8, 1.6 * rows + 0.9
        fig = _new_figure(width, height, layout=None)
        axes = fig.subplots(rows, columns, sharex=True, sharey=True, squeeze=False)
        fig.subplots_adjust(left=0.65 / width, right=1 - 0.15 / width, bottom=0.5 / height,
                            top=1 - 0.75 / height, wspace=0.12, hspace=0.45)
        finite_fields = np.asarray(result.ridge_points["field"], dtype=float)
        b_max = float(np.nanmax(np.abs(finite_fields))) if finite_fields.size else 1.0
        spread = np.concatenate([np.abs(r[1]) for r in residuals] + [np.zeros(1)]) * 1e3
        y_lim = 1.4 * max(float(np.nanpercentile(spread, 99)), 1e-3)
        for k, ax in enumerate(axes.flat):
            if k >= count:
                ax.set_visible(False)
                continue
            state = result.states[k]
            field, resid, weight = residuals[k]
            style = _style.SERIES_STYLES[k % len(_style.SERIES_STYLES)]
            if gate_step:
                ax.axhspan(-500 * gate_step, 500 * gate_step, color="#ececec", linewidth=0)
            ax.axhline(0.0, color="#888888", linewidth=0.6)
            if resid.size:
                ax.plot(np.abs(field), resid * 1e3, linestyle="none", markersize=3,
                        markeredgewidth=0, alpha=0.8, **style)
                rms = float(np.sqrt(np.average(resid**2, weights=_safe_weights(weight))))
                text = f"rms {rms * 1e3:.2g} mV, {resid.size} pts"
            else:
                text = "no points"
            name = "(t, s)" if state.kind == "satellite" else "ν"
            ax.set_title(f"{name} = {state_label(state)}  ({state.kind})",
                         fontsize=_style.FONT_SIZE - 1)
            ax.text(0.02, 0.04, text, transform=ax.transAxes, fontsize=_style.FONT_SIZE - 2,
                    color="#333333")
            ax.set_xlim(0, b_max * 1.02)
            ax.set_ylim(-y_lim, y_lim)
            if k % columns == 0:
                ax.set_ylabel("residual (mV)")
            if k >= count - columns:
                ax.set_xlabel("|B| (T)")
                ax.xaxis.set_tick_params(labelbottom=True)
        unassigned = int(np.sum(np.asarray(result.ridge_points["state"]) < 0))
        band = (f"; shaded: ± half a gate step ({500 * gate_step:.3g} mV)" if gate_step else "")
        fig.suptitle(f"gate-voltage residuals of each fitted line\n({unassigned} ridge points "
                     f"not assigned to any state{band})", fontsize=_style.FONT_SIZE + 1)
    return fig


def _safe_weights(weight):
    weight = np.where(np.isfinite(weight) & (weight > 0), weight, 0.0)
    return weight if weight.sum() > 0 else np.ones_like(weight)


def _one_index_plot(data):
    if not isinstance(data, dict):
        return None
    x = np.asarray(data.get("inverse_field", []), dtype=float)
    y = np.asarray(data.get("index", []), dtype=float)
    if x.size == 0 or x.size != y.size:
        return None
    return {"inverse_field": x, "index": y, "frequency": data.get("frequency"),
            "gate": data.get("gate"), "intercept": data.get("intercept"),
            "intercept_stderr": data.get("intercept_stderr")}


def index_plot_data(crosschecks):
    """The Landau index plots inside a cross-check dict (a list, empty when there are none).

    Reads ``crosschecks["index_plots"]`` (or the single ``"index_plot"``) as
    written by :func:`fanmap.crosscheck.landau_index_plot`: arrays
    ``inverse_field`` (1/T) and ``index`` (N), the oscillation ``frequency``
    B_F (T), the gate voltage and the offset ``intercept`` = γ with
    ``intercept_stderr``, for N = B_F/B − γ.
    """
    if not crosschecks:
        return []
    plots = crosschecks.get("index_plots") or [crosschecks.get("index_plot")]
    return [p for p in map(_one_index_plot, plots) if p is not None]


def plot_index_plot(result):
    """Landau index N versus 1/B of the oscillation minima, with straight-line fits.

    One series per gate voltage the cross-checks analysed.  Each fit
    N = B_F/B − γ meets the N axis at −γ: γ = ½ for Berry phase π, 0 for 0 or
    2π (standard result; e.g. Zhang et al., Nature 438, 201 (2005)).
    """
    plots = index_plot_data(result.crosschecks)
    if not plots:
        raise InputError("the result has no Landau index-plot data; run the cross-checks")
    x_max = max(float(p["inverse_field"].max()) for p in plots) * 1.05
    with rc_context(_style.rc_params()):
        fig = _new_figure(5.6, 4.0)
        ax = fig.add_subplot()
        for k, data in enumerate(plots[:len(_style.SERIES_STYLES)]):
            style = _style.SERIES_STYLES[k]
            where = (_text_minus(f"{data['gate']:.4g} V") if _is_number(data["gate"])
                     else f"series {k + 1}")
            frequency, gamma = data["frequency"], data["intercept"]
            label = where
            if _is_number(frequency) and _is_number(gamma):
                err = data["intercept_stderr"]
                err_text = f" ± {err:.2g}" if _is_number(err) else ""
                label = _text_minus(f"{where}: B_F = {frequency:.4g} T, γ = {gamma:.3f}{err_text}")
                xs = np.linspace(0, x_max, 50)
                ax.plot(xs, frequency * xs - gamma, color=style["color"], linestyle="--",
                        linewidth=1.0)
            ax.plot(data["inverse_field"], data["index"], linestyle="none", markersize=5,
                    label=label, **style)
        for ref, text in ((-0.5, "γ = ½ (Berry phase π)"), (0.0, "γ = 0 (Berry phase 0 or 2π)")):
            ax.axhline(ref, color="#999999", linewidth=0.6, linestyle=":")
            ax.text(x_max * 0.99, ref, text, ha="right", va="bottom",
                    fontsize=_style.FONT_SIZE - 2, color="#555555")
        ax.set_xlim(0, x_max)
        ax.set_xlabel("1/B (1/T)")
        ax.set_ylabel("Landau index N")
        ax.legend(loc="upper left", title="gate voltage: fit N = B_F/B − γ",
                  title_fontsize=_style.FONT_SIZE - 1)
        fig.suptitle("Landau index plot", fontsize=_style.FONT_SIZE + 1)
    return fig


# --- gate maps -----------------------------------------------------------------

def _gate_signal(gate_map):
    name = S.RXX if S.RXX in gate_map.data_vars else next(iter(gate_map.data_vars), None)
    if name is None:
        raise InputError("the gate map has no data variable to draw")
    da = gate_map[name]
    if set(da.dims) != {S.BOTTOM_GATE, S.TOP_GATE}:
        raise InputError(f"{name!r} has dimensions {da.dims}; a gate map needs "
                         f"({S.BOTTOM_GATE!r}, {S.TOP_GATE!r})")
    return da.transpose(S.BOTTOM_GATE, S.TOP_GATE).sortby(S.BOTTOM_GATE).sortby(S.TOP_GATE)


def _gate_lines(result, top):
    """Bottom-gate voltages of the neutrality (n = 0) and D = 0 lines at top-gate values."""
    ratio = result.top_capacitance / result.bottom_capacitance
    shift = ratio * (top - result.top_offset)
    return result.bottom_offset - shift, result.bottom_offset + shift


def plot_gate_maps(gate_maps, result, *, scale="auto"):
    """Raw dual-gate maps with the ridges found and the fitted n = 0 and D = 0 lines.

    ``gate_maps`` is one gate map or a sequence of them (one panel each, e.g.
    several fields).  Ridge points are read from ``result.ridge_points``
    (dict of ``top_gate``, ``bottom_gate`` arrays, optionally ``map`` index) when present.
    """
    maps = [gate_maps] if hasattr(gate_maps, "data_vars") else list(gate_maps)
    if not maps:
        raise InputError("no gate map to draw")
    ridges = result.ridge_points
    columns = min(len(maps), 3)
    rows = math.ceil(len(maps) / columns)
    with rc_context(_style.rc_params()):
        fig = _new_figure(4.4 * columns + 0.6, 3.9 * rows + 0.5)
        axes = fig.subplots(rows, columns, squeeze=False)
        for k, ax in enumerate(axes.flat):
            if k >= len(maps):
                ax.set_visible(False)
                continue
            da = _gate_signal(maps[k])
            top, bottom = da[S.TOP_GATE].values, da[S.BOTTOM_GATE].values
            values, norm, used = colour_scale(da.values, scale, rows_are_field=False)
            mesh = _image(ax, top, bottom, values, norm, _style.GATE_COLORMAP)
            _colour_bar(fig, mesh, None, _colour_bar_label(da, used), ax=ax)
            if ridges is not None:
                rt = np.asarray(ridges.get("top_gate", []), dtype=float)
                rb = np.asarray(ridges.get("bottom_gate", []), dtype=float)
                which = np.asarray(ridges.get("map", np.zeros(rt.size)), dtype=int)
                mine = which == k if which.size == rt.size else np.ones(rt.size, bool)
                ax.plot(rt[mine], rb[mine], **{**_style.RIDGE_POINT_STYLE, "markersize": 3})
            if np.isfinite([result.top_capacitance, result.bottom_capacitance]).all() and \
                    result.bottom_capacitance > 0:
                t = np.linspace(top.min(), top.max(), 100)
                neutral, balanced = _gate_lines(result, t)
                ink = _style.kind_style("integer")
                ax.plot(t, neutral, color=ink["color"], linewidth=1.3,
                        path_effects=_style.halo(), label="n = 0 (fit)")
                ax.plot(t, balanced, color=_style.kind_style("broken-symmetry")["color"],
                        linestyle=(0, (5, 2)), linewidth=1.2, path_effects=_style.halo(),
                        label="D = 0 (fit)")
                ax.legend(loc="upper right", facecolor="#3a3a3a", edgecolor="none",
                          labelcolor="#ffffff", framealpha=0.85)
            ax.set_xlim(top.min(), top.max())
            ax.set_ylim(bottom.min(), bottom.max())
            ax.set_xlabel(_axis_label(da[S.TOP_GATE], "top gate voltage"))
            ax.set_ylabel(_axis_label(da[S.BOTTOM_GATE], "bottom gate voltage"))
            field = maps[k].coords.get(S.FIELD)
            if field is not None and field.size == 1:
                ax.set_title(f"B = {float(field):.3g} T")
        fig.suptitle("dual-gate map" + ("s" if len(maps) > 1 else ""),
                     fontsize=_style.FONT_SIZE + 1)
    return fig


def _displacement_axis(coord):
    """Displacement values and axis label in V/nm (D/ε0) when the units allow it."""
    units = str(coord.attrs.get("units", "")).replace(" ", "").replace("^", "")
    values = np.asarray(coord.values, dtype=float)
    if units in ("Cm-2", "C/m2", "C/m**2", "Cm**-2"):
        return values / VACUUM_PERMITTIVITY / 1e9, "displacement D/ε₀ (V/nm)"
    if units in ("V/m", "Vm-1"):
        return values / 1e9, "displacement D/ε₀ (V/nm)"
    if units in ("V/nm", "Vnm-1"):
        return values, "displacement D/ε₀ (V/nm)"
    return values, _axis_label(coord, "displacement")


def plot_nd_map(nd_map, result=None, *, scale="auto"):
    """A map on (density, displacement): density in 10^12 cm^-2, D/ε0 in V/nm.

    ``result`` (the GateResult that made the map) adds its capacitance ratio to the title.
    """
    da = nd_map
    if hasattr(nd_map, "data_vars"):
        name = S.RXX if S.RXX in nd_map.data_vars else next(iter(nd_map.data_vars), None)
        if name is None:
            raise InputError("the (n, D) map has no data variable to draw")
        da = nd_map[name]
    if set(da.dims) != {"density", "displacement"}:
        raise InputError(f"the (n, D) map has dimensions {da.dims}; expected "
                         "('displacement', 'density')")
    da = da.transpose("displacement", "density").sortby("density").sortby("displacement")
    density = np.asarray(da["density"].values, dtype=float)
    density_units = str(da["density"].attrs.get("units", "m-2")).replace(" ", "")
    if density_units in ("m-2", "m^-2", "1/m2", "m**-2", ""):
        density = density / DENSITY_UNIT
        density_label = _DENSITY_LABEL
    else:
        density_label = _axis_label(da["density"], "density")
    displacement, displacement_label = _displacement_axis(da["displacement"])
    values, norm, used = colour_scale(da.values, scale, rows_are_field=False)
    with rc_context(_style.rc_params()):
        fig = _new_figure(6.2, 4.8)
        ax = fig.add_subplot()
        mesh = _image(ax, density, displacement, values, norm, _style.GATE_COLORMAP)
        _colour_bar(fig, mesh, None, _colour_bar_label(da, used), ax=ax)
        ax.axvline(0.0, color="#ffffff", linewidth=0.6, linestyle=":")
        ax.axhline(0.0, color="#ffffff", linewidth=0.6, linestyle=":")
        ax.set_xlabel(density_label)
        ax.set_ylabel(displacement_label)
        field = da.coords.get(S.FIELD)
        title = "map on density and displacement"
        if field is not None and field.size == 1:
            title += f" at B = {float(field):.3g} T"
        if result is not None and _is_number(result.capacitance_ratio):
            title += f", C_t/C_b = {result.capacitance_ratio:.4g}"
        fig.suptitle(title + "\n(sign convention of D: see the report)",
                     fontsize=_style.FONT_SIZE + 1)
    return fig


# --- batch ---------------------------------------------------------------------

def _row_label(row, k):
    parts = [str(row[key]) for key in ("device", "cooldown") if row.get(key)]
    for key in ("map", "name", "source", "path"):
        if row.get(key):
            parts.append(str(row[key]).rsplit("/", 1)[-1])
            break
    return " / ".join(parts) if parts else f"map {k + 1}"


def _missing_text(row):
    if str(row.get("map_kind", "")) == S.GATES:
        return "gate map"
    if str(row.get("status", "")).lower() == "failed" or row.get("error"):
        return "failed"
    return "no fit"


def _is_number(value):
    try:
        return math.isfinite(float(value))
    except (TypeError, ValueError):
        return False


def _as_float(value):
    try:
        value = float(value)
    except (TypeError, ValueError):
        return float("nan")
    return value


def plot_batch_summary(rows):
    """Lever arm and zero-density voltage of every map in a batch, with error bars.

    ``rows`` is a list of dicts with ``density_per_volt`` (m^-2 V^-1),
    ``zero_density_voltage`` (V), their ``*_stderr``, and ``device`` /
    ``cooldown`` and ``map`` (or ``name``) for the labels.  Rows without a value
    are listed and marked "failed", "gate map" or "no fit".
    """
    rows = list(rows)
    if not rows:
        raise InputError("the batch table is empty; nothing to summarise")
    labels = [_row_label(r, k) for k, r in enumerate(rows)]
    alpha = np.array([_as_float(r.get("density_per_volt")) for r in rows]) / 1e14
    alpha_err = np.array([_as_float(r.get("density_per_volt_stderr")) for r in rows]) / 1e14
    v0 = np.array([_as_float(r.get("zero_density_voltage")) for r in rows])
    v0_err = np.array([_as_float(r.get("zero_density_voltage_stderr")) for r in rows])
    groups = [str(r.get("device", "")) for r in rows]
    group_index = {g: i for i, g in enumerate(dict.fromkeys(groups))}
    y = np.arange(len(rows))[::-1]
    with rc_context(_style.rc_params()):
        fig = _new_figure(7.4, 1.2 + 0.32 * len(rows))
        axes = fig.subplots(1, 2, sharey=True)
        for ax, values, errors, xlabel in (
                (axes[0], alpha, alpha_err, "lever arm α (10¹⁰ cm⁻² V⁻¹)"),
                (axes[1], v0, v0_err, "zero-density voltage V₀ (V)")):
            for k in range(len(rows)):
                style = _style.SERIES_STYLES[group_index[groups[k]] % len(_style.SERIES_STYLES)]
                if np.isfinite(values[k]):
                    err = errors[k] if np.isfinite(errors[k]) else None
                    ax.errorbar([values[k]], [y[k]], xerr=None if err is None else [err],
                                capsize=2.5, markersize=5, elinewidth=1, linestyle="none",
                                **style)
                else:
                    ax.text(0.5, y[k], _missing_text(rows[k]), transform=ax.get_yaxis_transform(),
                            ha="center", va="center", color="#a33", fontsize=_style.FONT_SIZE - 1)
            ax.set_xlabel(xlabel)
            ax.grid(axis="x", color="#e3e3e3", linewidth=0.6)
            ax.margins(x=0.15)
        axes[0].set_yticks(y, labels)
        axes[0].set_ylim(-0.7, len(rows) - 0.3)
        fig.suptitle("batch summary: calibration per device / cooldown (± 1 standard error)",
                     fontsize=_style.FONT_SIZE + 1)
    return fig
