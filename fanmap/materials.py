"""Material presets: degeneracy, Berry phase and the main filling sequence.

The main sequence of a material is nu = sign * g (N + gamma) for N = 0, 1, ...
(gamma = 1/2 for Berry phase pi, 0 otherwise), omitting nu = 0 and, in
bilayer graphene, the +-g states on either side of the eightfold zero level
that are absent at low field.

Sources (see ``tests/test_physics.py`` for the checks):
monolayer graphene nu = +-4(N + 1/2), Berry phase pi (Novoselov et al.,
Nature 438, 197 (2005); Zhang et al., Nature 438, 201 (2005)); bilayer
graphene nu = +-4N (N >= 1), eightfold zero level, Berry phase 2 pi
(Novoselov et al., Nature Physics 2, 177 (2006)); spin-degenerate 2DEG
nu = 2N (von Klitzing et al., PRL 45, 494 (1980)).
"""

from dataclasses import dataclass

import numpy as np

from .errors import InputError

__all__ = ["Material", "MATERIALS", "MATERIAL_NAMES", "get_material", "main_sequence"]


@dataclass(frozen=True)
class Material:
    """What a preset says about a device.

    Attributes
    ----------
    name : str
        Preset name as typed on the command line.
    degeneracy : int or None
        Flavour degeneracy g of each main-sequence Landau level (None: unknown).
    berry_phase : int or None
        Berry phase in units of pi (0, 1 or 2; None: unknown).
    offset : float or None
        gamma in nu = g (N + gamma).
    ambipolar : bool or None
        Whether both carrier signs are expected (graphene) or one (2DEG).
    zero_level_degeneracy : int or None
        Degeneracy of the level at neutrality (8 in bilayer graphene).
    flavours : int or None
        Flavour count per moire band (4 in graphene moires), for n_s = flavours * n0.
    """

    name: str
    degeneracy: int | None
    berry_phase: int | None
    offset: float | None
    ambipolar: bool | None
    zero_level_degeneracy: int | None = None
    flavours: int | None = None
    description: str = ""


MATERIALS = {
    "auto": Material("auto", None, None, None, None, description="no assumption"),
    "2deg": Material("2deg", 2, 0, 0.0, False, description="spin-degenerate parabolic 2DEG (GaAs-type)"),
    "graphene-monolayer": Material("graphene-monolayer", 4, 1, 0.5, True, 4,
                                   description="monolayer graphene, nu = +-4(N+1/2)"),
    "graphene-bilayer": Material("graphene-bilayer", 4, 2, 0.0, True, 8,
                                 description="Bernal bilayer graphene, nu = +-4N, eightfold zero level"),
    # Near-magic-angle twisted bilayer: fourfold levels from neutrality, nu = +-4, +-8, ...
    # (Cao et al., Nature 556, 43 (2018), from memory), plus satellite fans at s * n0.
    "moire-graphene": Material("moire-graphene", 4, 2, 0.0, True, 8, flavours=4,
                               description="graphene moire superlattice (twisted or aligned)"),
}

MATERIAL_NAMES = tuple(MATERIALS)


def get_material(name):
    """Return the :class:`Material` preset called ``name``.

    Examples
    --------
    >>> get_material("graphene-monolayer").berry_phase
    1
    """
    try:
        return MATERIALS[name]
    except KeyError:
        raise InputError(
            f"unknown material {name!r}; choose one of {', '.join(MATERIAL_NAMES)}") from None


def main_sequence(material, max_filling=40):
    """Main-sequence filling factors of ``material`` with |nu| <= ``max_filling``.

    Examples
    --------
    >>> main_sequence("graphene-monolayer", 10).tolist()
    [-10, -6, -2, 2, 6, 10]
    >>> main_sequence("graphene-bilayer", 12).tolist()
    [-12, -8, -4, 4, 8, 12]
    >>> main_sequence("2deg", 8).tolist()
    [2, 4, 6, 8]
    """
    mat = material if isinstance(material, Material) else get_material(material)
    if mat.degeneracy is None:
        raise InputError("material 'auto' has no fixed sequence; pass a preset name")
    g, gamma = mat.degeneracy, mat.offset
    first = 0 if gamma else 1
    levels = g * (np.arange(first, max_filling // g + 2) + gamma)
    levels = levels[(levels > 0) & (levels <= max_filling)]
    if mat.ambipolar:
        levels = np.concatenate([-levels[::-1], levels])
    return levels.astype(int)
