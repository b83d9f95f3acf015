"""The built-in demo system: the blocked alanine dipeptide in vacuum (needs OpenMM, imported on use)."""

from .dipeptide import (
    backbone_dihedral_atoms,
    build_dipeptide,
    dihedral_angles,
    fastest_platform,
    make_simulation,
    minimize,
    write_pdb,
)

__all__ = [
    "build_dipeptide",
    "backbone_dihedral_atoms",
    "dihedral_angles",
    "minimize",
    "make_simulation",
    "fastest_platform",
    "write_pdb",
]
