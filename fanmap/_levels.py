"""Landau-level spectra used by the simulator, with broken-symmetry gaps.

A spectrum at field B is a list of levels, each a centre energy (J) and a
weight in units of the flavour density eB/h, sorted by energy, plus the
filling at the bottom of the lowest level (so that densities are counted from
charge neutrality).  The single-particle centres come from :mod:`fanmap.physics`.

Broken-symmetry integer gaps are modelled as splittings of a level into
sub-levels whose weights end at the gap's filling.  Every such gap grows
linearly with field and is fixed by its *onset field* B_on: the gap equals
``ONSET_GAP_RATIO`` times the extended-state width at B_on, which is where a
clear minimum of sigma_xx first appears.  A linear-in-B gap is the behaviour
of exchange-enhanced spin and valley gaps.  (Fractional states are modelled
separately, in :mod:`fanmap._fractional`.)

The zero-field density of states of each model (:meth:`SpectrumModel.smooth_dos`)
is what the Landau levels average to at low field; the simulator uses it to
normalise the scattering rate and to compute B = 0 rows.
"""

from dataclasses import dataclass, field as dc_field

import numpy as np

from . import physics as ph

__all__ = ["SpectrumModel", "ONSET_GAP_RATIO", "bilayer_gap_from_displacement"]

#: Gap (in units of the extended-state width at the onset field) at the onset field.
ONSET_GAP_RATIO = 3.0
#: Interlayer hopping of Bernal bilayer graphene, 0.38 eV (from memory; McCann & Fal'ko 2006).
BILAYER_INTERLAYER_HOPPING = 0.38 * ph.ELEMENTARY_CHARGE
#: Interlayer distance of bilayer graphene, 0.335 nm (common practice).
BILAYER_INTERLAYER_DISTANCE = 0.335e-9
# A spin pair may be split by at most this fraction of the cyclotron energy, and the
# sub-bands of one level may spread over at most _MAX_SPREAD_FRACTION of the distance to
# its neighbours, so that sub-bands never eat the gap to the next level.
_MAX_SPLIT_FRACTION = 0.6
_MAX_SPREAD_FRACTION = 0.35


def bilayer_gap_from_displacement(displacement, screening=2.6):
    """Band gap (J) of Bernal bilayer graphene in a displacement field ``displacement`` (C m^-2).

    Tight-binding form Delta = |u| g1 / sqrt(u^2 + g1^2) with the interlayer
    asymmetry u = e d D / (eps0 eps_s); ``screening`` eps_s ~ 2.6 reproduces
    the measured gap of about 0.1 eV at D/eps0 = 1 V/nm and 0.25 eV at 3 V/nm
    (Zhang et al., Nature 459, 820 (2009), from memory).

    Examples
    --------
    >>> gap = bilayer_gap_from_displacement(1e9 * ph.VACUUM_PERMITTIVITY)
    >>> f"{gap / ph.ELEMENTARY_CHARGE:.2f} eV"
    '0.12 eV'
    """
    asym = (ph.ELEMENTARY_CHARGE * BILAYER_INTERLAYER_DISTANCE * np.abs(displacement)
            / (ph.VACUUM_PERMITTIVITY * screening))
    g1 = BILAYER_INTERLAYER_HOPPING
    return asym * g1 / np.sqrt(asym**2 + g1**2)


@dataclass
class SpectrumModel:
    """Everything the simulator needs to know about a material's levels.

    Energies in J, masses in units of m_e, densities in m^-2, fields in T.
    ``broken_symmetry`` maps integer fillings to onset fields.
    """

    kind: str                                  # "2deg", "monolayer", "bilayer", "moire"
    broadening: float                          # Gamma at 1 T (J), see width()
    zero_field_broadening: float = 0.0         # Gamma_0 (J): band tails at B = 0
    puddle_energy: float = 0.0                 # monolayer: E_F of the puddle density (J)
    extended_fraction: float = 0.5             # extended-state width / Gamma
    effective_mass: float = 0.067
    g_factor: float = 0.0
    fermi_velocity: float = 1.0e6
    broken_symmetry: dict = dc_field(default_factory=dict)
    band_gap: float = 0.0                      # bilayer: gap at neutrality (J), from D
    # moire only
    cell_density: float = 0.0                  # n0
    remote_mass: float = 0.1
    full_filling_gap: float = 0.0              # gap at s = +-4 (J)
    correlated_gap: float = 0.0                # gap at s = +-2 (J); 0 means none
    extra_gaps: dict = dc_field(default_factory=dict)   # filling -> gap (J) at this field

    # --- widths -------------------------------------------------------------
    def width(self, field):
        """Total level width Gamma(B) = sqrt(Gamma_1^2 |B| / 1 T + Gamma_0^2) (J)."""
        return np.sqrt(self.broadening**2 * np.abs(field) + self.zero_field_broadening**2)

    def onset_gap(self, filling, field):
        """Gap (J) of a broken-symmetry state at ``field``; 0 if none."""
        onset = self.broken_symmetry.get(filling)
        if onset is None or onset <= 0:
            return 0.0
        extended_at_onset = self.extended_fraction * self.width(onset)
        return ONSET_GAP_RATIO * extended_at_onset * abs(field) / onset

    # --- zero-field density of states -----------------------------------------
    def _moire_segments(self):
        """Electron-side segments (n_lo, n_hi, g_lower_half, g_upper_half, mass, gap_below, inward).

        ``inward`` says whether the segment's upper edge (a gap) starts a fan of its own
        towards lower density; the two fans then meet half way.  With correlated states
        the fan from neutrality is fourfold up to the correlated gap at s = 2, the fan
        from s = 2 is twofold outwards and meets the fourfold fan from full filling at
        s = 3 (Cao et al., Nature 556, 43 (2018), from memory: fourfold lines from
        neutrality, twofold from half filling pointing away from neutrality).
        """
        n0 = self.cell_density
        m_flat, m_rem = self.effective_mass, self.remote_mass
        big = 1e30
        if self.correlated_gap > 0:
            return [(0.0, 2 * n0, 4, 4, m_flat, 0.0, False),
                    (2 * n0, 4 * n0, 2, 4, m_flat, self.correlated_gap, True),
                    (4 * n0, big, 4, 4, m_rem, self.full_filling_gap, False)]
        return [(0.0, 4 * n0, 4, 4, m_flat, 0.0, True),
                (4 * n0, big, 4, 4, m_rem, self.full_filling_gap, False)]

    def _moire_pieces(self):
        """Electron-side constant-DOS pieces (E_lo, E_hi, dos, n_lo) of the zero-field band."""
        pieces, energy = [], 0.0
        for n_lo, n_hi, g_lo, g_hi, mass, gap, _ in self._moire_segments():
            energy += gap
            half = 0.5 * (n_hi - n_lo)
            for g, n_start in ((g_lo, n_lo), (g_hi, n_lo + half)):
                dos = g * mass * ph.ELECTRON_MASS / (2 * np.pi * ph.HBAR**2)
                top = energy + half / dos
                pieces.append((energy, top, dos, n_start))
                energy = top
        return pieces

    def smooth_dos(self, energy):
        """Zero-field density of states (J^-1 m^-2) at ``energy`` (J), neutrality at E = 0."""
        energy = np.asarray(energy, dtype=float)
        if self.kind == "2deg":
            dos = self.effective_mass * ph.ELECTRON_MASS / (np.pi * ph.HBAR**2)
            return np.where(energy > 0, dos, 0.0)
        if self.kind == "monolayer":
            return 2 * np.abs(energy) / (np.pi * (ph.HBAR * self.fermi_velocity) ** 2)
        if self.kind == "bilayer":
            dos = 2 * self.effective_mass * ph.ELECTRON_MASS / (np.pi * ph.HBAR**2)
            return np.where(np.abs(energy) > self.band_gap / 2, dos, 0.0)
        out = np.zeros_like(energy)
        for e_lo, e_hi, dos, _ in self._moire_pieces():
            inside = (np.abs(energy) >= e_lo) & (np.abs(energy) < e_hi)
            out = np.where(inside, dos, out)
        return out

    def reference_dos(self, density):
        """Zero-field density of states (J^-1 m^-2) at the Fermi energy of ``density``.

        It normalises the scattering rate.  Taken at the zero-field Fermi energy of
        the pixel's density (not at its chemical potential), it is smooth across a
        Landau gap and so does not move the minima.  In monolayer graphene puddles
        smear the vanishing density of states at neutrality over ``puddle_energy``.
        """
        density = np.asarray(density, dtype=float)
        if self.kind == "monolayer":
            fermi = ph.dirac_fermi_energy(density, self.fermi_velocity)
            return self.smooth_dos(np.hypot(fermi, self.puddle_energy))
        if self.kind == "moire":
            out = np.zeros_like(density)
            for e_lo, e_hi, dos, n_lo in self._moire_pieces():
                out = np.where(np.abs(density) >= n_lo, dos, out)
            return out
        return np.full(density.shape, self.smooth_dos(np.inf) if self.kind == "bilayer"
                       else self.smooth_dos(1.0))

    def smooth_density(self, energy):
        """Zero-temperature density (m^-2, from neutrality) with all states below ``energy`` filled."""
        energy = np.asarray(energy, dtype=float)
        if self.kind == "2deg":
            return self.smooth_dos(1.0) * np.clip(energy, 0, None)
        if self.kind == "monolayer":
            return np.sign(energy) * energy**2 / (np.pi * (ph.HBAR * self.fermi_velocity) ** 2)
        if self.kind == "bilayer":
            dos = self.smooth_dos(np.inf)
            return np.sign(energy) * dos * np.clip(np.abs(energy) - self.band_gap / 2, 0, None)
        out = np.zeros_like(energy)
        mag = np.abs(energy)
        for e_lo, e_hi, dos, n_lo in self._moire_pieces():
            part = n_lo + dos * (np.clip(mag, e_lo, e_hi) - e_lo)
            out = np.where(mag >= e_lo, part, out)
        return np.sign(energy) * out

    def gap_densities(self):
        """Densities of the zero-field gaps that carriers are counted from (m^-2).

        Monolayer, bilayer and 2DEG: neutrality (or the band edge); moire:
        neutrality and the band fillings s n0 with a gap.
        """
        if self.kind != "moire":
            return np.array([0.0])
        fillings = [4.0] + ([2.0] if self.correlated_gap > 0 else [])
        s = np.array(sorted([0.0] + fillings + [-f for f in fillings]))
        return s * self.cell_density

    def _fan_origin(self, magnitude):
        """Gap density (m^-2, electron side) whose fan the density ``magnitude`` belongs to."""
        origin = np.zeros_like(magnitude)
        for n_lo, n_hi, *_, inward in self._moire_segments():
            inside = (magnitude >= n_lo) & (magnitude < n_hi)
            own = np.where(inward & (magnitude - n_lo > n_hi - magnitude), n_hi, n_lo)
            origin = np.where(inside, own, origin)
        return origin

    def _hall_transitions(self, flux):
        """(n_a, n_b, count_a, count_b): levels (electron side) where the Hall count passes
        from one fan to the next.  n_a is the last gap of the lower fan, n_b the first of
        the upper one; the level between carries the difference of their Chern numbers."""
        out = []
        for n_lo, n_hi, g_lo, g_hi, _, _, inward in self._moire_segments():
            if n_hi > 1e29:
                continue
            if inward:
                mid = 0.5 * (n_lo + n_hi)
                n_a = n_lo + g_lo * flux * (np.ceil((mid - n_lo) / (g_lo * flux)) - 1)
                n_b = n_hi - g_hi * flux * (np.ceil((n_hi - mid) / (g_hi * flux)) - 1)
                out.append((n_a, n_b, n_a - n_lo, n_b - n_hi))
            else:
                n_a = n_lo + g_lo * flux * np.floor((n_hi - n_lo) / (g_lo * flux))
                out.append((n_a, n_hi, n_a - n_lo, 0.0))
        return out

    def hall_count(self, hall_density, field):
        """Hall carrier count (m^-2) of a Hall density ``hall_density`` at ``field`` (T).

        Counted from the gap whose fan the density belongs to, so every gap has
        sigma_xy = t e^2/h with t its slope dn/d(eB/h) (Streda): t = 0 on a zero-field
        gap (an insulator).  The level where one fan hands over to the next carries the
        difference of the two fans' Chern numbers, so the count passes linearly between
        their gaps.  Outside moire bands the count is the density itself.
        """
        hall_density = np.asarray(hall_density, dtype=float)
        if self.kind != "moire":
            return hall_density
        mag = np.abs(hall_density)
        count = mag - self._fan_origin(mag)
        if abs(field) > 1e-6:
            for n_a, n_b, c_a, c_b in self._hall_transitions(ph.flux_density_per_flavour(field)):
                if n_b > n_a:
                    inside = (mag > n_a) & (mag < n_b)
                    count = np.where(inside, c_a + (c_b - c_a) * (mag - n_a) / (n_b - n_a), count)
        return np.sign(hall_density) * count

    def conducting_carriers(self, density):
        """Density (m^-2) of the carriers that conduct at ``density`` (before puddles).

        Counted from the gap whose fan the density belongs to, as the Hall count, so
        that at low field one band of carriers gives both rho_xx and rho_xy.
        """
        density = np.asarray(density, dtype=float)
        if self.kind != "moire":
            return np.abs(density)
        mag = np.abs(density)
        return mag - self._fan_origin(mag)

    # --- Landau levels ------------------------------------------------------------
    def levels(self, field, density_range):
        """Levels at ``field`` covering ``density_range`` = (n_min, n_max).

        Returns ``(energies, weights, floor_filling)``: sorted centre energies
        (J), weights in units of eB/h, and the filling (from neutrality) at the
        bottom of the lowest level returned.
        """
        flux = ph.flux_density_per_flavour(field)
        reach = max(abs(density_range[0]), abs(density_range[1])) / flux
        if self.kind == "moire":
            energies, weights, nu_lo = self._moire_levels(field, reach)
        else:
            energies, weights, nu_lo = self._plain_levels(field, reach)
        return self._split(energies, weights, nu_lo, field)

    def _plain_levels(self, field, reach):
        if self.kind == "2deg":
            # spin-resolved pairs split by Zeeman plus the exchange gap of the odd filling
            count = int(reach / 2) + 4
            hw = ph.cyclotron_energy(field, self.effective_mass)
            orbital = hw * (np.arange(count) + 0.5)
            split = np.full(count, abs(self.g_factor) * ph.BOHR_MAGNETON * abs(field))
            for nu in self.broken_symmetry:
                if nu % 2 == 1 and 0 < nu < 2 * count:
                    split[(nu - 1) // 2] += self.onset_gap(nu, field)
            split = np.minimum(split, _MAX_SPLIT_FRACTION * hw)
            energies = np.sort(np.concatenate([orbital - split / 2, orbital + split / 2]))
            weights = np.ones(2 * count)
        elif self.kind == "monolayer":
            energies, weights = ph.landau_levels_graphene_monolayer(
                field, int(reach / 4) + 4, self.fermi_velocity)
        else:
            energies, weights = ph.landau_levels_graphene_bilayer(
                field, int(reach / 4) + 5, self.effective_mass)
        neutral = weights[energies < 0].sum() + 0.5 * weights[energies == 0].sum()
        nu_lo = np.cumsum(weights) - weights - neutral
        return energies, weights, nu_lo

    def _moire_levels(self, field, reach):
        """Levels of a moire band: each segment fills from its lower edge, and from its
        upper edge too where that edge starts a fan (see :meth:`_moire_segments`)."""
        flux = ph.flux_density_per_flavour(field)
        energies, weights = [], []
        pieces = self._moire_pieces()
        for k, (n_lo, n_hi, g_lo, g_hi, mass, _, inward) in enumerate(self._moire_segments()):
            e_bottom = pieces[2 * k][0]
            e_top = pieces[2 * k + 1][1]
            share = 0.5 if inward else 1.0
            full = share * (n_hi - n_lo) / flux
            cap = min(full, reach + 8)
            hw = ph.cyclotron_energy(field, mass)
            if k == 0:
                # from neutrality: bilayer-like levels, half of the eightfold zero level on each side
                e, g = ph.landau_levels_graphene_bilayer(field, int(cap / 4) + 3, mass)
                e, g = e[e >= 0], np.where(e[e >= 0] == 0, 4.0, g[e >= 0])
            else:
                count = int(cap / g_lo) + 2
                e, g = e_bottom + hw * (np.arange(count) + 0.5), np.full(count, float(g_lo))
            low = _truncate(g, cap)
            e = e[: low.size]
            if inward:
                count = int(cap / g_hi) + 2
                high = _truncate(np.full(count, float(g_hi)), cap)
                e_high = e_top - hw * (np.arange(high.size) + 0.5)
                if cap == full:
                    # the two cut levels where the fans meet are one level: no gap there
                    merged = low[-1] + high[-1]
                    centre = (low[-1] * e[-1] + high[-1] * e_high[-1]) / merged
                    low, e = np.append(low[:-1], merged), np.append(e[:-1], centre)
                    high, e_high = high[:-1], e_high[:-1]
                energies.append(e_high[::-1]), weights.append(high[::-1])
            energies.append(e), weights.append(low)
        e = np.concatenate(energies)
        g = np.concatenate(weights)
        order = np.argsort(e, kind="stable")
        e, g = e[order], g[order]
        energies = np.concatenate([-e[::-1], e])
        weights = np.concatenate([g[::-1], g])
        nu_lo = np.cumsum(weights) - weights - g.sum()
        return energies, weights, nu_lo

    def _split(self, energies, weights, nu_lo, field):
        """Split levels that contain a broken-symmetry filling into sub-levels."""
        cuts = {}
        # (in a 2DEG the spin gaps are already in the spin-resolved levels)
        integers = [] if self.kind == "2deg" else list(self.broken_symmetry)
        gaps = [(nu, self.onset_gap(nu, field)) for nu in integers
                if nu not in self.extra_gaps]
        gaps += list(self.extra_gaps.items())
        for nu, gap in gaps:
            if gap <= 0:
                continue
            k = np.searchsorted(nu_lo, float(nu), side="right") - 1
            if k < 0 or not (nu_lo[k] < nu < nu_lo[k] + weights[k] - 1e-9):
                continue
            cuts.setdefault(k, {})
            cuts[k][float(nu) - nu_lo[k]] = cuts[k].get(float(nu) - nu_lo[k], 0.0) + gap
        if not cuts:
            return energies, weights, nu_lo[0] if nu_lo.size else 0.0
        out_e, out_w = [energies], [weights]
        keep = np.ones(energies.size, bool)
        for k, level_cuts in cuts.items():
            keep[k] = False
            spacing = np.inf
            if k > 0:
                spacing = min(spacing, energies[k] - energies[k - 1])
            if k + 1 < energies.size:
                spacing = min(spacing, energies[k + 1] - energies[k])
            positions = np.array(sorted(level_cuts))
            gap = np.array([level_cuts[p] for p in positions])
            if gap.sum() > _MAX_SPREAD_FRACTION * spacing:
                gap *= _MAX_SPREAD_FRACTION * spacing / gap.sum()
            edges = np.concatenate([[0.0], positions, [weights[k]]])
            sub_w = np.diff(edges)
            sub_x = np.concatenate([[0.0], np.cumsum(gap)])
            sub_x -= np.sum(sub_w * sub_x) / sub_w.sum()
            out_e.append(energies[k] + sub_x)
            out_w.append(sub_w)
        out_e[0], out_w[0] = energies[keep], weights[keep]
        e, w = np.concatenate(out_e), np.concatenate(out_w)
        order = np.argsort(e, kind="stable")
        return e[order], w[order], nu_lo[0]


def _truncate(weights, cap):
    """Leading part of ``weights`` whose sum is ``cap`` (the last one cut short)."""
    total = np.cumsum(weights)
    count = int(np.searchsorted(total, cap - 1e-12)) + 1
    out = weights[:count].copy()
    out[-1] -= total[min(count, total.size) - 1] - cap
    return out[out > 1e-12]
