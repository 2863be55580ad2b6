"""Physically modelled Landau fans and dual-gate maps with known answers.

Each row of a fan map is one gate sweep at fixed field.  For that field the
material's Landau levels (from :mod:`fanmap.physics`, split by broken-symmetry
gaps, see :mod:`fanmap._levels`) are broadened with a width
Gamma(B) = Gamma_1 sqrt(B / 1 T) (a Gaussian width growing as sqrt(B) gives the
Dingle-like damping exp(-c / B) of low-field oscillations), smeared exactly by
-df/dE, and the chemical
potential of every pixel is solved from its density (:mod:`fanmap._occupation`).

Transport (per pixel): the scattering rate follows the thermally smeared
density of extended states at mu, S = D_ext(mu) / D_0(n) (Born
approximation; D_0 is the zero-field density of states at the pixel's density), so that

    sigma_xx = e mu_t n_c S / (S^2 + (mu_t B)^2) + sigma_leak,
    sigma_xy = e n_H mu_t (mu_t B) / (S^2 + (mu_t B)^2),

with n_c = sqrt((n - n_gap)^2 + n_res^2) the carriers counted from the
zero-field gap whose fan the density belongs to (puddles n_res keep it finite at
neutrality) and n_H the Hall count, from the same gap, of a narrower extended-state
band.  At low field S -> 1 and this is
the Drude model (rho_xx = 1 / (e n mu_t), rho_xy = B / (e n)), with
Shubnikov-de Haas oscillations rho_xx ~ rho_0 S; in a gap S -> 0 and sigma_xy
= nu e^2/h exactly, so rho_xy sits on h / (nu e^2) and rho_xx -> 0.  R_xx =
rho_xx L / W.  Sign convention: R_xy > 0 for electrons at positive field.
Fractional states of the 2DEG (composite-fermion Landau levels) further scale S
and set n_H inside the lowest two spin levels, see :mod:`fanmap._fractional`.
Moire bands: a flat band of 4 n0 per side, then a gap and a remote band.  With
correlated states the flat band is split at s = +-2: a fourfold fan from neutrality
up to s = 2, a twofold fan outwards from s = 2 meeting a fourfold fan inwards from
s = 4 at s = 3, and a fourfold fan outwards from s = 4 (see :mod:`fanmap._levels`).

Measurement artefacts (noise, drift, hysteresis, mixing, spikes, gaps,
interrupted sweep, irregular field steps, B = 0 row, field signs) are each
switched by an option and all randomness comes from ``seed``.
"""


import numpy as np
import xarray as xr

from . import __version__
from . import _realism
from . import _schema as S
from . import physics as ph
from ._atomic import atomic_path
from ._fractional import composite_fermion_energy, composite_fermion_transport, fraction_sequence
from ._levels import SpectrumModel, bilayer_gap_from_displacement, ONSET_GAP_RATIO
from ._occupation import row_table, evaluate
from .errors import InputError
from .materials import get_material, main_sequence

__all__ = ["PRESETS", "simulate_fan", "simulate_gate_map", "simulate_temperature_series",
           "write_map"]

MEV = 1e-3 * ph.ELEMENTARY_CHARGE

#: Device presets of the simulator (SI).  The numbers describe typical devices:
#: graphene on 285 nm SiO2, hBN-encapsulated bilayer and twisted bilayer with graphite
#: gates, and a gated GaAs heterostructure (common practice, order-of-magnitude values).
PRESETS = {
    "graphene-monolayer": dict(
        gate=(-40.0, 40.0, 500), field_max=14.0, rows=250,
        density_per_volt=float(ph.lever_arm_from_dielectric(285e-9, 3.9)),
        zero_density_voltage=4.0, temperature=1.7, broadening=2.5 * MEV, mobility=1.0,
        residual_density=2e15, fermi_velocity=1.0e6, effective_mass=None, g_factor=0.0,
        leakage_conductance=1e-8,
        broken_symmetry={0: 6.0, 1: 9.0, -1: 9.0, 4: 10.0, -4: 10.0, 3: 12.0, -3: 12.0,
                         5: 12.0, -5: 12.0},
        fractional=False),
    "graphene-bilayer": dict(
        gate=(-6.0, 6.0, 500), field_max=12.0, rows=250,
        density_per_volt=float(ph.lever_arm_from_dielectric(40e-9, 3.4)),
        zero_density_voltage=-0.15, temperature=1.6, broadening=0.5 * MEV, mobility=8.0,
        residual_density=1.5e14, fermi_velocity=1.0e6, effective_mass=0.033, g_factor=0.0,
        leakage_conductance=1e-8,
        broken_symmetry={0: 2.5, 2: 5.0, -2: 5.0, 1: 8.0, -1: 8.0, 3: 8.0, -3: 8.0,
                         6: 10.0, -6: 10.0},
        fractional=False),
    "2deg": dict(
        gate=(-0.60, 0.30, 500), field_max=14.0, rows=250,
        density_per_volt=float(ph.lever_arm_from_dielectric(120e-9, 12.9)),
        zero_density_voltage=-0.75, temperature=0.05, broadening=0.08 * MEV, mobility=150.0,
        residual_density=0.0, fermi_velocity=None, effective_mass=0.067, g_factor=-0.44,
        leakage_conductance=1e-11,
        broken_symmetry={1: 0.4, 3: 0.8, 5: 1.3, 7: 2.0}, fractional=True),
    "moire-graphene": dict(
        gate=(-6.0, 6.0, 500), field_max=8.0, rows=250,
        density_per_volt=float(ph.lever_arm_from_dielectric(30e-9, 3.4)),
        zero_density_voltage=0.05, temperature=1.5, broadening=0.1 * MEV, mobility=2.0,
        residual_density=1.5e14, fermi_velocity=None, effective_mass=0.3, g_factor=0.0,
        leakage_conductance=1e-8, twist_angle_deg=1.1, remote_mass=0.1,
        full_filling_gap=30 * MEV, correlated_gap=1.5 * MEV,
        broken_symmetry={}, fractional=False),
}

_KINDS = {"2deg": "2deg", "graphene-monolayer": "monolayer", "graphene-bilayer": "bilayer",
          "moire-graphene": "moire"}
# Residual density at the s = +-2 gaps relative to the others: correlated insulators are weaker.
_CORRELATED_RESIDUAL_FACTOR = 4.0


def _preset(material):
    get_material(material)  # raises InputError with the list of names
    if material not in PRESETS:
        raise InputError(f"material {material!r} cannot be simulated; choose one of "
                         f"{', '.join(PRESETS)}")
    return PRESETS[material]


def _model(material, p, *, broadening, extended_fraction, effective_mass, g_factor,
           fermi_velocity, broken_symmetry, twist_angle_deg, correlated_states,
           residual_density=0.0):
    kind = _KINDS[material]
    kw = dict(kind=kind, broadening=broadening, extended_fraction=extended_fraction,
              broken_symmetry={int(k): float(v) for k, v in broken_symmetry.items()})
    if effective_mass is not None:
        kw["effective_mass"] = effective_mass
    if g_factor is not None:
        kw["g_factor"] = g_factor
    if fermi_velocity is not None:
        kw["fermi_velocity"] = fermi_velocity
    if kind == "monolayer":
        kw["puddle_energy"] = float(ph.dirac_fermi_energy(residual_density,
                                                          kw.get("fermi_velocity", 1.0e6)))
    if kind == "moire":
        wavelength = ph.moire_wavelength(np.radians(twist_angle_deg))
        kw.update(cell_density=float(ph.moire_cell_density(wavelength)),
                  remote_mass=p["remote_mass"], full_filling_gap=p["full_filling_gap"],
                  correlated_gap=p["correlated_gap"] if correlated_states else 0.0)
    return SpectrumModel(**kw)


def _residuals(model, residual_density):
    """Residual (puddle) density of each zero-field gap of ``model``."""
    gaps = model.gap_densities()
    residual = np.full(gaps.shape, float(residual_density))
    if model.kind == "moire" and model.correlated_gap > 0:
        correlated = np.isclose(np.abs(gaps), 2 * model.cell_density)
        residual[correlated] *= _CORRELATED_RESIDUAL_FACTOR
    return gaps, residual


def _conductivities(density, hall_density, scattering, field, model, *, mobility,
                    residual_density, leakage, mobile=None):
    """sigma_xx, sigma_xy (S) of each pixel (see the module docstring).

    ``mobile`` (m^-2), if given, is the density of band carriers (electrons plus holes)
    to use instead of the distance to the nearest gap.
    """
    gaps, residual = _residuals(model, residual_density)
    # residual (puddle) density interpolated between the two gaps around each pixel
    n_res = np.interp(density, gaps, residual)
    if model.kind == "2deg":
        carriers = np.clip(density, 0, None)
    else:
        band = model.conducting_carriers(density) if mobile is None else mobile
        carriers = np.sqrt(band**2 + n_res**2)
    omega = mobility * abs(field)
    denom = scattering**2 + omega**2
    e = ph.ELEMENTARY_CHARGE
    sxx = e * mobility * carriers * scattering / denom + leakage
    sxy = np.sign(field) * e * model.hall_count(hall_density, field) * mobility * omega / denom
    if model.kind == "2deg":
        sxy = np.where(density > 0, sxy, 0.0)
    return sxx, sxy


def _invert(sxx, sxy):
    det = sxx**2 + sxy**2
    return sxx / det, sxy / det


def _fan_fields(p, field, field_sign, zero_field_row, irregular_field, rng):
    if field is None:
        field = np.linspace(p["field_max"] / p["rows"], p["field_max"], p["rows"])
    field = np.asarray(field, dtype=float)
    if field.ndim != 1 or field.size < 1 or not np.all(np.isfinite(field)):
        raise InputError("field must be a 1-D array of finite values in T")
    field = _realism.irregular_steps(field, rng, float(irregular_field))
    if field_sign == "both":
        field = np.concatenate([-np.abs(field)[::-1], np.abs(field)])
    elif field_sign in (1, -1, "+", "-"):
        field = np.abs(field) * (-1 if field_sign in (-1, "-") else 1)
    else:
        raise InputError(f"field_sign must be 1, -1 or 'both', not {field_sign!r}")
    if zero_field_row:
        field = np.concatenate([[0.0], field])
    return field


def _gate_axis(gate, preset_gate, name="gate"):
    if gate is None:
        gate = np.linspace(*preset_gate)
    gate = np.asarray(gate, dtype=float)
    if gate.ndim != 1 or gate.size < 4 or not np.all(np.isfinite(gate)) \
            or np.any(np.diff(gate) <= 0):
        raise InputError(f"{name} must be a 1-D increasing array of at least 4 finite voltages")
    return gate


def simulate_fan(material="graphene-monolayer", *, gate=None, field=None,
                 density_per_volt=None, zero_density_voltage=None, hall=True, seed=0,
                 temperature=None, broadening=None, broadening_shape="gaussian",
                 extended_fraction=0.5, hall_fraction=0.35, mobility=None,
                 residual_density=None, effective_mass=None, g_factor=None,
                 fermi_velocity=None, broken_symmetry=None, fractional=None,
                 composite_fermion_mass=0.14, composite_fermion_broadening=0.08 * MEV,
                 twist_angle_deg=None, correlated_states=True, quantum_capacitance=False,
                 aspect_ratio=2.0, leakage_conductance=None,
                 noise=0.002, noise_floor=0.5, correlated_noise=0.0, correlation_length=20.0,
                 drift=0.0, hysteresis=0.0, alternate_sweeps=None, contact_mixing=0.0,
                 spikes=0, interrupted=None, nan_gaps=0, irregular_field=0.0,
                 zero_field_row=False, field_sign=1):
    """Simulate a Landau fan R_xx(B, V_g) (and R_xy) with its ground truth.

    Parameters
    ----------
    material : str
        ``"graphene-monolayer"``, ``"graphene-bilayer"``, ``"2deg"`` or ``"moire-graphene"``.
    gate, field : array_like, optional
        Gate voltages (V, increasing) and field of each row (T, acquisition order);
        defaults from :data:`PRESETS`.
    density_per_volt, zero_density_voltage : float, optional
        Lever arm alpha (m^-2 V^-1) and V0 (V) in n = alpha (V_g - V0).
    hall : bool
        Include ``rxy``.
    seed : int
        Seed of every random choice; equal seeds give identical maps.
    temperature : float
        Temperature (K) of the exact Fermi-Dirac smearing.
    broadening : float
        Level width Gamma at 1 T (J); Gamma(B) = broadening sqrt(|B| / 1 T).
    broadening_shape : {"gaussian", "lorentzian"}
        Level shape.  Lorentzian tails fill the gaps and hold part of every level, so
        minima are shallower and sit up to ~0.3 in filling off the integers.
    extended_fraction, hall_fraction : float
        Widths of the extended-state bands (sigma_xx, sigma_xy) relative to Gamma.
    mobility : float
        Transport mobility mu_t (m^2 V^-1 s^-1).
    residual_density : float
        Puddle density (m^-2) that keeps the Drude part finite at neutrality.
    effective_mass, g_factor, fermi_velocity : float
        Band parameters (mass in m_e, velocity in m/s).
    broken_symmetry : dict, optional
        Integer filling -> onset field (T); ``{}`` for none.
    fractional : bool, optional
        2DEG: fractional states of the composite-fermion sequences
        (:mod:`fanmap._fractional`); default on for ``"2deg"``.
    composite_fermion_mass, composite_fermion_broadening : float
        m_CF / m_e per sqrt(B / 1 T), and the composite-fermion level width (J).
    twist_angle_deg : float, optional
        Moire twist angle (degrees).
    correlated_states : bool
        Moire: gaps and satellite fans at s = +-2 as well as +-4.
    quantum_capacitance : bool
        Monolayer: n from the gate including the Dirac quantum-capacitance term.
    aspect_ratio : float
        L / W of the Hall bar: R_xx = rho_xx L / W.
    leakage_conductance : float
        Parallel sheet conductance (S) that bounds R_xx in insulating states.
    noise, noise_floor : float
        White noise: relative, and absolute (ohm).
    correlated_noise, correlation_length : float
        Relative noise correlated along a sweep (AR(1), length in points).
    drift : float
        Change of V0 (V) from the first to the last row, linear in row index.
    hysteresis : float
        Shift of V0 (V) in down sweeps; rows then alternate up/down.
    alternate_sweeps : bool, optional
        Alternate sweep directions (default: when ``hysteresis`` is non-zero).
    contact_mixing : float
        Fraction of R_xy added to R_xx.
    spikes : int
        Number of spike pixels.
    interrupted : float, optional
        Completed fraction of the last sweep; the rest is NaN.
    nan_gaps : int
        Number of short NaN runs.
    irregular_field : float
        Relative jitter of the field steps.
    zero_field_row : bool
        Prepend a B = 0 row.
    field_sign : {1, -1, "both"}
        Field polarity; "both" measures -B_max ... +B_max.

    Returns
    -------
    xarray.Dataset
        Fan map (see :mod:`fanmap._schema`), ground truth in ``truth_*`` attributes (SI):
        ``truth_density_per_volt``, ``truth_zero_density_voltage`` (V0 of the first row),
        ``truth_capacitance_per_area``, ``truth_degeneracy``, ``truth_berry_phase``,
        ``truth_temperature``, ``truth_effective_mass`` / ``truth_fermi_velocity``,
        ``truth_drift``, ``truth_hysteresis``, ``truth_contact_mixing``, ``truth_seed``, ...;
        ``truth_main_fillings``, ``truth_broken_symmetry_fillings`` (integer arrays) and
        ``truth_fractional_fillings`` ("1/3,2/5") are the states *resolved somewhere in the
        map* -- gap at least ``ONSET_GAP_RATIO`` times the extended-state width combined with
        1.8 k_B T, at a density inside the sweep -- and ``truth_*_onset_fields`` the lowest
        field (on about 60 sampled rows) where that holds.  Moire maps add
        ``truth_cell_density``, ``truth_full_filling_density``, ``truth_twist_angle_deg``,
        ``truth_band_fillings`` and ``truth_satellites`` ("t:s,t:s"): every satellite line
        resolved (as above, on every row) over at least ``truth_satellite_min_field_range``
        (1 T) of field inside the gate window; moire ``truth_main_fillings`` follow the
        same rule.  netCDF returns
        one-element lists as scalars (use ``np.atleast_1d``); empty lists are stored as "".

    Examples
    --------
    >>> fan = simulate_fan("graphene-monolayer", gate=np.linspace(-30, 30, 60),
    ...                    field=np.linspace(1, 9, 8), noise=0, noise_floor=0)
    >>> fan.rxx.dims, fan.attrs["map_kind"]
    (('field', 'gate'), 'fan')
    >>> int(fan.attrs["truth_degeneracy"])
    4
    """
    p = _preset(material)
    rng = np.random.default_rng(seed)
    mat = get_material(material)
    gate = _gate_axis(gate, p["gate"])
    field = _fan_fields(p, field, field_sign, zero_field_row, irregular_field, rng)
    alpha = float(p["density_per_volt"] if density_per_volt is None else density_per_volt)
    v0 = float(p["zero_density_voltage"] if zero_density_voltage is None
               else zero_density_voltage)
    if alpha <= 0:
        raise InputError("density_per_volt must be positive (m^-2 V^-1)")
    if quantum_capacitance and material != "graphene-monolayer":
        raise InputError("quantum_capacitance applies to graphene-monolayer only")
    opts = dict(
        temperature=float(p["temperature"] if temperature is None else temperature),
        broadening=float(p["broadening"] if broadening is None else broadening),
        mobility=float(p["mobility"] if mobility is None else mobility),
        residual=float(p["residual_density"] if residual_density is None
                       else residual_density),
        leakage=float(p["leakage_conductance"] if leakage_conductance is None
                      else leakage_conductance),
        composite_fermions=None,
    )
    if fractional is None:
        fractional = p["fractional"]
    if fractional:
        if material != "2deg":
            raise InputError("fractional states are modelled for the 2deg preset only")
        opts["composite_fermions"] = dict(mass_coefficient=float(composite_fermion_mass),
                                          broadening=float(composite_fermion_broadening))
    if opts["temperature"] <= 0 or opts["broadening"] <= 0 or opts["mobility"] <= 0:
        raise InputError("temperature, broadening and mobility must be positive")
    if broadening_shape not in ("gaussian", "lorentzian"):
        raise InputError("broadening_shape must be 'gaussian' or 'lorentzian'")
    if not (0 < hall_fraction <= extended_fraction <= 1):
        raise InputError("need 0 < hall_fraction <= extended_fraction <= 1 (widths of the "
                         "extended-state bands relative to the level width)")
    if aspect_ratio <= 0:
        raise InputError("aspect_ratio (L / W of the Hall bar) must be positive")
    twist = float(p.get("twist_angle_deg", 0.0) if twist_angle_deg is None else twist_angle_deg)
    model = _model(material, p, broadening=opts["broadening"],
                   extended_fraction=extended_fraction,
                   effective_mass=p["effective_mass"] if effective_mass is None
                   else effective_mass,
                   g_factor=p["g_factor"] if g_factor is None else g_factor,
                   fermi_velocity=p["fermi_velocity"] if fermi_velocity is None
                   else fermi_velocity,
                   broken_symmetry=p["broken_symmetry"] if broken_symmetry is None
                   else broken_symmetry,
                   twist_angle_deg=twist, correlated_states=correlated_states,
                   residual_density=opts["residual"])

    rows = field.size
    alternate = bool(hysteresis) if alternate_sweeps is None else bool(alternate_sweeps)
    directions = _realism.sweep_directions(rows, alternate)
    v0_rows = v0 + drift * np.arange(rows) / max(rows - 1, 1) \
        + hysteresis * (directions < 0)
    capacitance = float(ph.capacitance_from_lever_arm(alpha))
    if quantum_capacitance:
        density = ph.density_from_gate_voltage_dirac(
            gate[None, :], capacitance, v0_rows[:, None], model.fermi_velocity)
    else:
        density = alpha * (gate[None, :] - v0_rows[:, None])

    rho_xx = np.empty((rows, gate.size))
    rho_xy = np.empty((rows, gate.size))
    for i, b in enumerate(field):
        rho_xx[i], rho_xy[i] = _row(model, b, density[i], opts, broadening_shape,
                                    hall_fraction)
    rxx = rho_xx * aspect_ratio
    rxy = rho_xy.copy()

    rxx = rxx + contact_mixing * rxy
    noise_kw = dict(relative=noise, floor=noise_floor, correlated=correlated_noise,
                    correlation_length=correlation_length)
    rxx = _realism.add_noise(rxx, directions, rng, **noise_kw)
    rxy = _realism.add_noise(rxy, directions, rng, **noise_kw)
    rxx, _ = _realism.add_spikes(rxx, rng, int(spikes))
    arrays = [rxx, rxy]
    if interrupted is not None:
        if not 0 < interrupted < 1:
            raise InputError("interrupted is the completed fraction of the last sweep, in (0, 1)")
        _realism.interrupt_last_sweep(arrays, directions, float(interrupted))
    _realism.add_nan_gaps(arrays, rng, int(nan_gaps))

    truth = dict(
        material=material, density_per_volt=alpha, zero_density_voltage=v0,
        capacitance_per_area=capacitance, degeneracy=mat.degeneracy,
        berry_phase=mat.berry_phase, temperature=opts["temperature"],
        broadening=opts["broadening"], mobility=opts["mobility"],
        residual_density=opts["residual"], aspect_ratio=aspect_ratio,
        drift=drift, hysteresis=hysteresis, contact_mixing=contact_mixing,
        quantum_capacitance=bool(quantum_capacitance), seed=seed,
        interrupted_fraction=np.nan if interrupted is None else float(interrupted),
    )
    if model.kind in ("2deg", "bilayer", "moire"):
        truth["effective_mass"] = model.effective_mass
    if model.kind == "2deg":
        truth["g_factor"] = model.g_factor
    if model.kind == "monolayer":
        truth["fermi_velocity"] = model.fermi_velocity
    truth.update(_visible_states(model, mat, field, density, opts["temperature"],
                                 opts["composite_fermions"]))
    if model.kind == "moire":
        truth.update(_moire_truth(model, twist, field, density, opts["temperature"]))

    ds = xr.Dataset(
        {S.RXX: ((S.FIELD, S.GATE), rxx, _var_attrs(S.RXX))},
        coords={S.FIELD: (S.FIELD, field, _var_attrs(S.FIELD)),
                S.GATE: (S.GATE, gate, _var_attrs(S.GATE)),
                S.SWEEP_DIRECTION: (S.FIELD, directions, {
                    "units": "1", "long_name": "gate sweep direction (+1 up, -1 down)"})},
    )
    if hall:
        ds[S.RXY] = ((S.FIELD, S.GATE), rxy, _var_attrs(S.RXY))
    ds.attrs.update(_common_attrs(material, S.FAN))
    ds.attrs.update(_truth_attrs(truth))
    return ds


def _row(model, field, density, opts, shape, hall_fraction):
    """rho_xx, rho_xy of one sweep at ``field``."""
    evaluated = np.clip(density, 1e12, None) if model.kind == "2deg" else density
    span = (evaluated.min(), evaluated.max())
    table = row_table(model, field, span, opts["temperature"], shape=shape,
                      hall_fraction=hall_fraction)
    _, hall_density, scattering = evaluate(table, evaluated)
    if abs(field) < 1e-6:
        hall_density = evaluated
    elif opts["composite_fermions"]:
        flux = ph.flux_density_per_flavour(field)
        factor, hall_filling = composite_fermion_transport(
            evaluated / flux, field, opts["temperature"], **opts["composite_fermions"])
        scattering = scattering * factor
        hall_density = np.where(factor != 1, hall_filling * flux, hall_density)
    sxx, sxy = _conductivities(np.where(density > 0, evaluated, density)
                               if model.kind == "2deg" else density,
                               hall_density, scattering, field, model,
                               mobility=opts["mobility"], residual_density=opts["residual"],
                               leakage=opts["leakage"])
    return _invert(sxx, sxy)


# --- ground truth -------------------------------------------------------------------

def _resolved_from(model, field, density, temperature, filling_density, gap_of_field,
                   width_of_field=None):
    """Lowest |B| at which a gap ``gap_of_field(B)`` is resolved at density ``filling_density(B)``.

    Resolved means gap >= ONSET_GAP_RATIO * sqrt(width^2 + (1.8 k_B T)^2), the width being
    the extended-state width unless ``width_of_field`` is given, and the density inside the
    row's sweep window.  Returns NaN if never.
    """
    kt = ph.BOLTZMANN * temperature
    if width_of_field is None:
        def width_of_field(b):
            return model.extended_fraction * model.width(b)
    best = np.nan
    for b, row in zip(field, density):
        if abs(b) < 1e-6:
            continue
        n = filling_density(abs(b))
        if not (row.min() <= n <= row.max()):
            continue
        width = np.hypot(width_of_field(b), 1.8 * kt)
        if gap_of_field(abs(b)) >= ONSET_GAP_RATIO * width:
            best = abs(b) if np.isnan(best) else min(best, abs(b))
    return best


def _visible_states(model, mat, field, density, temperature, composite_fermions):
    out = {}
    sample = field[:: max(1, field.size // 60)]
    dens = density[:: max(1, field.size // 60)]
    span = (density.min(), density.max())
    spectra = {}

    def gap(nu, b):
        """Gap (J) of the full spectrum at filling ``nu`` and field ``b`` (0 if none)."""
        if b not in spectra:
            energies, weights, floor = model.levels(b, span)
            spectra[b] = (floor + np.cumsum(weights), np.diff(energies, append=np.nan))
        edges, steps = spectra[b]
        k = np.searchsorted(edges, nu - 1e-6)
        if k < edges.size and abs(edges[k] - nu) < 1e-6 and np.isfinite(steps[k]):
            return steps[k]
        return 0.0

    main, onsets, moire_cache = [], [], {}
    for nu in main_sequence(mat, 60):
        # moire: as the satellites, a neutrality line counts when resolved over a range of field
        if model.kind == "moire" and _resolved_field_range(
                model, field, density, temperature,
                lambda b, nu=nu: nu * ph.flux_density_per_flavour(b),
                moire_cache) < SATELLITE_MIN_FIELD_RANGE - 1e-9:
            continue
        b_on = _resolved_from(model, sample, dens, temperature,
                              lambda b, nu=nu: nu * ph.flux_density_per_flavour(b),
                              lambda b, nu=nu: gap(nu, b))
        if np.isfinite(b_on):
            main.append(int(nu)), onsets.append(b_on)
    out["main_fillings"] = main
    out["main_onset_fields"] = onsets
    names, fields = [], []
    for nu in sorted(model.broken_symmetry, key=lambda nu: (abs(nu), nu)):
        b_on = _resolved_from(model, sample, dens, temperature,
                              lambda b, nu=nu: nu * ph.flux_density_per_flavour(b),
                              lambda b, nu=nu: gap(nu, b))
        if np.isfinite(b_on):
            names.append(int(nu)), fields.append(b_on)
    out["broken_symmetry_fillings"], out["broken_symmetry_onset_fields"] = names, fields
    names, fields = [], []
    for p, q in (fraction_sequence(4) if composite_fermions else []):
        x = (p % q) / q
        b_on = _resolved_from(
            model, sample, dens, temperature,
            lambda b, p=p, q=q: p / q * ph.flux_density_per_flavour(b),
            lambda b, x=x: composite_fermion_energy(b, x, composite_fermions["mass_coefficient"]),
            lambda b: composite_fermions["broadening"])
        if np.isfinite(b_on):
            names.append(f"{p}/{q}"), fields.append(b_on)
    out["fractional_fillings"], out["fractional_onset_fields"] = ",".join(names), fields
    if composite_fermions:
        out["composite_fermion_mass"] = composite_fermions["mass_coefficient"]
        out["composite_fermion_broadening"] = composite_fermions["broadening"]
    return out


#: A satellite line is in the truth list when it is resolved over at least this much field (T).
SATELLITE_MIN_FIELD_RANGE = 1.0


def _resolved_field_range(model, field, density, temperature, filling_density, cache):
    """Field range (T) over which the spectrum has a resolved gap on the line ``filling_density(B)``.

    A row counts when the line's density is inside the row's sweep and the spectrum
    at that field has a gap exactly there of at least ONSET_GAP_RATIO times the
    extended-state width combined with 1.8 k_B T (as :func:`_resolved_from`); each
    counted row adds the field step around it (half way to its neighbours in |B|).
    """
    kt = ph.BOLTZMANN * temperature
    span = (density.min(), density.max())
    magnitude = np.abs(field)
    order = np.argsort(magnitude, kind="stable")
    steps = np.empty(field.size)
    steps[order] = np.gradient(magnitude[order]) if field.size > 1 else 0.0
    total, seen = 0.0, set()
    for i in order:
        b = magnitude[i]
        if b < 1e-6 or b in seen:
            continue
        n = filling_density(b)
        if not (density[i].min() <= n <= density[i].max()):
            continue
        if b not in cache:
            energies, weights, floor = model.levels(b, span)
            cache[b] = (floor + np.cumsum(weights), np.diff(energies, append=np.nan))
        edges, gaps = cache[b]
        nu = n / ph.flux_density_per_flavour(b)
        k = np.searchsorted(edges, nu - 1e-6)
        if not (k < edges.size and abs(edges[k] - nu) < 1e-6 and np.isfinite(gaps[k])):
            continue
        width = np.hypot(model.extended_fraction * model.width(b), 1.8 * kt)
        if gaps[k] >= ONSET_GAP_RATIO * width:
            seen.add(b)
            total += steps[i]
    return total


def _moire_truth(model, twist, field, density, temperature):
    """Moire ground truth; ``satellites`` lists every line t:s (n = t eB/h + s n0) that is
    resolved over at least SATELLITE_MIN_FIELD_RANGE of field inside the gate window."""
    n0 = model.cell_density
    band = [-4, -2, 2, 4] if model.correlated_gap > 0 else [-4, 4]
    cache, satellites = {}, []
    flux_low = ph.flux_density_per_flavour(max(np.abs(field).max() / 50, 0.2))
    reach = max(abs(density.min()), abs(density.max()))
    for s in band:
        for sign in (1, -1):              # outward (away from neutrality), inward
            t = sign * int(np.sign(s))
            while abs(t) * flux_low <= 2 * reach:
                extent = _resolved_field_range(
                    model, field, density, temperature,
                    lambda b, t=t, s=s: s * n0 + t * ph.flux_density_per_flavour(b), cache)
                if extent >= SATELLITE_MIN_FIELD_RANGE - 1e-9:
                    satellites.append(f"{t}:{s}")
                t += sign * int(np.sign(s))
    return dict(cell_density=n0, full_filling_density=4 * n0, twist_angle_deg=twist,
                moire_wavelength=float(ph.moire_wavelength(np.radians(twist))),
                band_fillings=band, satellites=",".join(satellites),
                satellite_min_field_range=SATELLITE_MIN_FIELD_RANGE,
                full_filling_gap=model.full_filling_gap, correlated_gap=model.correlated_gap)


# --- dataset helpers ------------------------------------------------------------------

def _var_attrs(name):
    attrs = {"units": S.UNITS[name], "long_name": S.LONG_NAMES[name]}
    if name == S.RXY:
        attrs["comment"] = "positive for electrons at positive field"
    if name == S.RXX:
        attrs["comment"] = "four-terminal, rho_xx times L/W"
    return attrs


def _common_attrs(material, kind):
    return {
        S.MAP_KIND: kind, "Conventions": "CF-1.8",
        "title": f"simulated {'Landau fan' if kind == S.FAN else 'dual-gate map'} ({material})",
        "source": f"fanmap {__version__} simulator (synthetic data)",
        "material": material,
    }


def _truth_attrs(truth):
    """``truth_*`` attributes that netCDF can store: numbers, strings, numeric arrays."""
    out = {}
    for key, value in truth.items():
        if value is None:
            continue
        if isinstance(value, (bool, np.bool_)):
            value = int(value)
        elif isinstance(value, (list, tuple, np.ndarray)):
            value = np.asarray(value, dtype=float if any(
                isinstance(v, float) for v in np.ravel(value)) else int)
            if value.size == 0:
                value = ""
        out[S.TRUTH_PREFIX + key] = value
    return out


# --- dual-gate maps -----------------------------------------------------------------

_GATE_PRESETS = {
    "graphene-bilayer": dict(
        top_gate=(-8.0, 8.0, 201), bottom_gate=(-80.0, 80.0, 161),
        top_capacitance=float(ph.parallel_plate_capacitance(25e-9, 3.4)),
        bottom_capacitance=float(1.0 / (285e-9 / (3.9 * ph.VACUUM_PERMITTIVITY)
                                        + 30e-9 / (3.4 * ph.VACUUM_PERMITTIVITY))),
        top_offset=0.12, bottom_offset=-2.0, puddle_energy=8 * MEV),
    "graphene-monolayer": dict(
        top_gate=(-8.0, 8.0, 201), bottom_gate=(-80.0, 80.0, 161),
        top_capacitance=float(ph.parallel_plate_capacitance(25e-9, 3.4)),
        bottom_capacitance=float(1.0 / (285e-9 / (3.9 * ph.VACUUM_PERMITTIVITY)
                                        + 30e-9 / (3.4 * ph.VACUUM_PERMITTIVITY))),
        top_offset=0.12, bottom_offset=-2.0, puddle_energy=8 * MEV),
}


def simulate_gate_map(material="graphene-bilayer", *, top_gate=None, bottom_gate=None,
                      field=0.0, top_capacitance=None, bottom_capacitance=None,
                      top_offset=None, bottom_offset=None, hall=False, seed=0,
                      temperature=None, broadening=None, mobility=None,
                      residual_density=None, puddle_energy=None, band_tail=3.0 * MEV,
                      gap_screening=2.6,
                      broken_symmetry=None, aspect_ratio=2.0, leakage_conductance=None,
                      contact_resistance=0.0, noise=0.002, noise_floor=0.5,
                      correlated_noise=0.0, correlation_length=20.0, spikes=0,
                      nan_gaps=0, interrupted=None, displacement_bins=48):
    """Simulate a dual-gate map R_xx(V_b, V_t) at fixed field.

    n and D follow :func:`fanmap.physics.dual_gate_density` and
    :func:`fanmap.physics.dual_gate_displacement`.  In bilayer graphene the
    displacement field opens a gap at neutrality
    (:func:`fanmap._levels.bilayer_gap_from_displacement`); at B = 0 the
    neutrality resistance grows: the chemical potential enters localised band-tail
    states (Gaussian tails of width ``band_tail``), only carriers beyond the band edges,
    D_0 k_B T ln(1 + exp((|mu| - Delta/2) / k_B T)) per band, conduct, puddle conduction
    falls as exp(-Delta / (2 E_puddle)), and the leakage conductance bounds R.  At finite field the nu = 0 gap is |Delta_spin(B) - Delta(D)|: the
    spin-polarised and layer-polarised states cross at one displacement, where the
    gap closes (Weitz et al., Science 330, 812 (2010), from memory).

    Rows are bottom-gate sweeps of the top gate (dims ``(bottom_gate, top_gate)``).
    ``contact_resistance`` (ohm at |n| = 1e16 m^-2 under the contacts, which only the
    bottom gate reaches) adds R_c 1e16 / sqrt(n_b^2 + n_res^2) to R_xx.  The other
    options are those of :func:`simulate_fan`; capacitances in F m^-2, offsets in V.

    Examples
    --------
    >>> gm = simulate_gate_map(top_gate=np.linspace(-6, 6, 40),
    ...                        bottom_gate=np.linspace(-60, 60, 30), noise=0, noise_floor=0)
    >>> gm.rxx.dims, gm.attrs["map_kind"]
    (('bottom_gate', 'top_gate'), 'gates')
    """
    if material not in _GATE_PRESETS:
        raise InputError(f"gate maps can be simulated for {', '.join(_GATE_PRESETS)}, "
                         f"not {material!r}")
    p, fp = _GATE_PRESETS[material], _preset(material)
    rng = np.random.default_rng(seed)
    top = _gate_axis(top_gate, p["top_gate"], "top_gate")
    bottom = _gate_axis(bottom_gate, p["bottom_gate"], "bottom_gate")
    ct = float(p["top_capacitance"] if top_capacitance is None else top_capacitance)
    cb = float(p["bottom_capacitance"] if bottom_capacitance is None else bottom_capacitance)
    vt0 = float(p["top_offset"] if top_offset is None else top_offset)
    vb0 = float(p["bottom_offset"] if bottom_offset is None else bottom_offset)
    field = float(field)
    temperature = float(fp["temperature"] if temperature is None else temperature)
    broad = float(fp["broadening"] if broadening is None else broadening)
    mobility = float(fp["mobility"] if mobility is None else mobility)
    residual = float(fp["residual_density"] if residual_density is None else residual_density)
    e_puddle = float(p["puddle_energy"] if puddle_energy is None else puddle_energy)
    leakage = float(fp["leakage_conductance"] if leakage_conductance is None
                    else leakage_conductance)
    bs = {int(k): float(v) for k, v in (fp["broken_symmetry"] if broken_symmetry is None
                                        else broken_symmetry).items()}
    vt, vb = np.meshgrid(top, bottom)
    n = ph.dual_gate_density(vt, vb, ct, cb, vt0, vb0)
    d = ph.dual_gate_displacement(vt, vb, ct, cb, vt0, vb0)
    kind = _KINDS[material]
    base = SpectrumModel(kind=kind, broadening=broad, broken_symmetry=bs,
                         effective_mass=fp["effective_mass"] or 0.033,
                         zero_field_broadening=float(band_tail) if field == 0 else 0.0)
    kt = ph.BOLTZMANN * temperature

    def gap_of(disp):
        return float(bilayer_gap_from_displacement(disp, gap_screening)) if kind == "bilayer" \
            else 0.0

    def solve(disp, mask):
        gap = gap_of(disp)
        model = SpectrumModel(**{**base.__dict__, "band_gap": gap if field == 0 else 0.0})
        if field != 0 and kind == "bilayer":
            spin = base.onset_gap(0, field)
            model.extra_gaps = {0: abs(spin - gap)}
        dens = n[mask]
        table = row_table(model, field, (dens.min(), dens.max()), temperature)
        mu, hall_density, scattering = evaluate(table, dens)
        mobile = None
        if field == 0:
            hall_density = dens
            if kind == "bilayer":
                edge = (np.abs(mu) - gap / 2) / kt
                mobile = base.smooth_dos(np.inf) * kt * (
                    np.logaddexp(0, edge) + np.logaddexp(0, -(np.abs(mu) + gap / 2) / kt))
        puddles = residual * np.exp(-gap / (2 * e_puddle))
        return _conductivities(dens, hall_density, scattering, field, model,
                               mobility=mobility, residual_density=puddles, leakage=leakage,
                               mobile=mobile)

    # the spectrum depends on D: solve on D bins and interpolate linearly between them
    edges = np.linspace(d.min(), d.max(), max(int(displacement_bins), 2))
    sxx = np.zeros(n.shape)
    sxy = np.zeros(n.shape)
    position = np.clip(np.interp(d, edges, np.arange(edges.size)), 0, edges.size - 1 - 1e-9)
    lower = np.floor(position).astype(int)
    weight = position - lower
    for k in range(edges.size - 1):
        mask = lower == k
        if not mask.any():
            continue
        for node, w in ((k, 1 - weight[mask]), (k + 1, weight[mask])):
            a, b = solve(edges[node], mask)
            sxx[mask] += w * a
            sxy[mask] += w * b
    rho_xx, rho_xy = _invert(sxx, sxy)
    rxx = rho_xx * aspect_ratio
    n_bottom = cb * (vb - vb0) / ph.ELEMENTARY_CHARGE
    if contact_resistance:
        rxx = rxx + contact_resistance * 1e16 / np.sqrt(n_bottom**2 + residual**2)
    directions = _realism.sweep_directions(bottom.size, False)
    kw = dict(relative=noise, floor=noise_floor, correlated=correlated_noise,
              correlation_length=correlation_length)
    rxx = _realism.add_noise(rxx, directions, rng, **kw)
    rxy = _realism.add_noise(rho_xy, directions, rng, **kw)
    rxx, _ = _realism.add_spikes(rxx, rng, int(spikes))
    arrays = [rxx, rxy]
    if interrupted is not None:
        _realism.interrupt_last_sweep(arrays, directions, float(interrupted))
    _realism.add_nan_gaps(arrays, rng, int(nan_gaps))

    truth = dict(material=material, top_capacitance=ct, bottom_capacitance=cb,
                 top_offset=vt0, bottom_offset=vb0, field=field, temperature=temperature,
                 mobility=mobility, residual_density=residual, puddle_energy=e_puddle,
                 band_tail=float(band_tail),
                 gap_screening=gap_screening, contact_resistance=contact_resistance,
                 degeneracy=get_material(material).degeneracy,
                 berry_phase=get_material(material).berry_phase, seed=seed)
    if kind == "bilayer" and field != 0:
        spin = base.onset_gap(0, field)
        # displacement where Delta(D) equals the spin gap (nu = 0 transition)
        probe = np.linspace(0, 3e9 * ph.VACUUM_PERMITTIVITY, 3001)
        gaps = bilayer_gap_from_displacement(probe, gap_screening)
        truth["transition_displacement"] = float(np.interp(spin, gaps, probe))
    ds = xr.Dataset(
        {S.RXX: ((S.BOTTOM_GATE, S.TOP_GATE), rxx, _var_attrs(S.RXX))},
        coords={S.BOTTOM_GATE: (S.BOTTOM_GATE, bottom, _var_attrs(S.BOTTOM_GATE)),
                S.TOP_GATE: (S.TOP_GATE, top, _var_attrs(S.TOP_GATE)),
                S.FIELD: ((), field, _var_attrs(S.FIELD))},
    )
    if hall:
        ds[S.RXY] = ((S.BOTTOM_GATE, S.TOP_GATE), rxy, _var_attrs(S.RXY))
    ds.attrs.update(_common_attrs(material, S.GATES))
    ds.attrs.update(_truth_attrs(truth))
    return ds


def simulate_temperature_series(material="2deg", temperatures=(0.4, 0.8, 1.2, 1.6, 2.0, 2.5),
                                **options):
    """Fan maps that differ only in temperature (K), for effective-mass checks.

    Every other option (and the seed, hence the noise) is shared; see
    :func:`simulate_fan`.  The Shubnikov-de Haas amplitude then follows the
    Lifshitz-Kosevich factor X / sinh X, X = 2 pi^2 k_B T m* / (hbar e B), as long
    as the oscillations are small (LK is a small-amplitude result).  For the 2DEG
    the level width therefore defaults to 1 meV at 1 T (a shorter quantum lifetime
    than the clean preset), which keeps the relative amplitude below about 0.2 up
    to 1 T; pass ``broadening`` to override.

    Examples
    --------
    >>> maps = simulate_temperature_series("2deg", (0.5, 2.0), gate=np.linspace(-0.5, 0.2, 40),
    ...                                    field=np.linspace(0.2, 1.0, 5))
    >>> [float(m.attrs["truth_temperature"]) for m in maps]
    [0.5, 2.0]
    """
    if len(temperatures) < 2:
        raise InputError("a temperature series needs at least two temperatures")
    if material == "2deg":
        options.setdefault("broadening", 1.0 * MEV)
    return [simulate_fan(material, temperature=float(t), **options) for t in temperatures]


def write_map(ds, path, *, compress=True, single_precision=False):
    """Write a map to netCDF at ``path`` atomically (never a half-written file).

    ``single_precision`` stores the resistances as 32-bit floats (smaller files).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> fan = simulate_fan("2deg", gate=np.linspace(-0.5, 0.2, 20), field=[1.0, 2.0, 3.0])
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     target = pathlib.Path(tmp) / "fan.nc"
    ...     write_map(fan, target)
    ...     xr.open_dataset(target).rxx.shape
    (3, 20)
    """
    encoding = {}
    for name in ds.data_vars:
        enc = {"zlib": bool(compress), "complevel": 4} if compress else {}
        if single_precision:
            enc["dtype"] = "float32"
        encoding[name] = enc
    with atomic_path(path, suffix=".nc") as tmp:
        ds.to_netcdf(tmp, engine="netcdf4", encoding=encoding)
