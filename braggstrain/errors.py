"""The one exception family of braggstrain.

Every error raised on bad input names where it came from (a file, a field or
a key) and what was expected, so a user can fix the input without reading the
code.
"""

from __future__ import annotations

__all__ = [
    "BraggStrainError",
    "InputError",
    "ScanFileError",
    "ConfigError",
    "ReflectionError",
    "GeometryError",
    "PhasingError",
    "TensorError",
    "OutputError",
]


class BraggStrainError(Exception):
    """Base class of every error braggstrain raises on purpose."""


class InputError(BraggStrainError, ValueError):
    """An array or argument given to a stage is not what the stage expects."""


class ScanFileError(InputError):
    """A scan file is missing, corrupt, or lacks a field, or a field is malformed.

    The message always names the file and the field.
    """

    def __init__(self, path, field, expected):
        self.path = str(path)
        self.field = field
        self.expected = expected
        super().__init__(f"{self.path}: field '{field}': {expected}")


class ConfigError(InputError):
    """A pipeline file has an unknown key, a wrong type or an invalid value."""


class ReflectionError(InputError):
    """A reflection is forbidden (zero structure factor) or unreachable."""


class GeometryError(BraggStrainError):
    """The diffractometer cannot reach a requested condition."""


class PhasingError(BraggStrainError):
    """Phase retrieval failed or was given data it cannot work on."""


class TensorError(InputError):
    """Reflections cannot determine the strain tensor (too few, coplanar, ...)."""


class OutputError(BraggStrainError):
    """An output cannot be written (the disk is full, the folder cannot hold
    the run). Earlier files are left as they were."""
