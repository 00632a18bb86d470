"""braggstrain: strain tensor, lattice rotation and dislocations of a
nanocrystal from Bragg coherent diffraction imaging at several reflections.

See docs/design.md for the data flow and conventions (lengths in Å,
reciprocal lengths in Å⁻¹ with 2π included, angles in degrees in files and
radians inside the code), docs/methods.md for the formulas and their
sources, and DEVELOPERS.md for where things live.
"""

from braggstrain.errors import BraggStrainError

__version__ = "0.1.0"
__all__ = ["BraggStrainError", "__version__"]
