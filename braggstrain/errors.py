"""The one exception family of braggstrain.

Every error raised on bad input names where it came from (a file, a field or
a key) and what was expected, so a user can fix the input without reading the
code.
"""

from __future__ import annotations

import difflib

__all__ = [
    "did_you_mean",
    "BraggStrainError",
    "InputError",
    "FileFormatError",
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


class FileFormatError(InputError):
    """A file is missing, corrupt, of another format or version, or lacks a field.

    The message always names the file and the field.
    """

    def __init__(self, path, field, expected):
        self.path = str(path)
        self.field = field
        self.expected = expected
        super().__init__(f"{self.path}: field '{field}': {expected}")


class ScanFileError(FileFormatError):
    """A scan file (or a prepared scan) is missing, corrupt, or lacks a field,
    or a field is malformed."""


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
def did_you_mean(word, options, n=1):
    """A hint for a misspelt name: " (did you mean 'x'?)", or "" when nothing is close.

    Up to ``n`` of ``options`` closest to ``word`` (difflib's similarity
    ratio of at least 0.5); the one did-you-mean of every message about an
    unknown key, circle, algorithm or material.
    """
    close = difflib.get_close_matches(str(word), [str(o) for o in options], n=n, cutoff=0.5)
    if not close:
        return ""
    names = [f"'{c}'" for c in close]
    text = names[0] if len(names) == 1 else ", ".join(names[:-1]) + " or " + names[-1]
    return f" (did you mean {text}?)"
