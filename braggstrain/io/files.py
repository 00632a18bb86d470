"""Writing and opening the project's files: one atomic writer, one version marker.

Every file braggstrain writes goes through :class:`atomic_path` (or
:func:`write_atomic` for bytes and text): the content is written to a
temporary file beside the target and renamed onto it only when complete, so
an interrupted run never leaves a half-written file that looks complete and
never destroys an earlier result. A full disk becomes one
:class:`~braggstrain.errors.OutputError` naming the file and the space it
needs; :func:`remove_partial_files` clears what a killed process left.

Every file format of the project carries one version marker, the same way:

* HDF5 files: root attributes ``format`` (a name such as
  ``"braggstrain-scan"``) and ``format_version`` (an integer), set by
  :func:`mark_version`;
* JSON files: top-level keys ``format`` and ``format_version``.

Every reader opens its files through :func:`open_versioned` (HDF5) or
:func:`read_versioned_json` (JSON), which check the marker and name the
file and the field when it is missing or foreign. A format older than this
convention is read through a ``legacy`` marker (the results file of layout
version 1 had ``content`` and ``layout_version`` attributes).
"""

from __future__ import annotations

import errno
import json
import os
import re
import shutil
import sys
import tempfile
from pathlib import Path

import numpy as np

from braggstrain.errors import FileFormatError, OutputError

__all__ = ["atomic_path", "write_atomic", "remove_partial_files", "disk_full_message", "is_disk_full",
           "nbytes_of", "PARTIAL_PATTERN", "PARTIAL_DIR_PATTERN", "mark_version", "open_versioned", "file_version",
           "read_versioned_json", "write_versioned_json"]


#: Temporary files of :class:`atomic_path`: ``.<name>.<8 random>.part<suffix>``
#: beside the target (``tempfile.mkstemp``'s random part: 8 of [a-z0-9_]).
PARTIAL_PATTERN = re.compile(r"^\.(?P<target>.+)\.[a-z0-9_]{8}\.part(\.[A-Za-z0-9]+)?$")
#: Work folders of the VTK export (``.<stem>.vtk.<8 random>``, ``tempfile.mkdtemp``).
PARTIAL_DIR_PATTERN = re.compile(r"^\.[A-Za-z0-9_-]+\.vtk\.[a-z0-9_]{8}$")


def is_disk_full(exc):
    """True for an OSError (or an HDF5 error wrapping one) meaning no space left."""
    if isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, getattr(errno, "EDQUOT", -1)):
        return True
    text = str(exc)
    return isinstance(exc, (OSError, RuntimeError)) and ("No space left" in text or "errno = 28" in text
                                                         or "Disk quota exceeded" in text)


def _mb(nbytes):
    return f"{nbytes / 1e6:.1f} MB" if nbytes >= 1e5 else f"{max(nbytes, 1e3) / 1e3:.0f} kB"


def nbytes_of(value):
    """Bytes of every array in a nested structure (dicts, lists, dataclasses):
    about what a file holding it needs before compression (a size hint for
    :class:`atomic_path`)."""
    if isinstance(value, np.ndarray):
        return int(value.nbytes)
    if isinstance(value, dict):
        return sum(nbytes_of(v) for v in value.values())
    if isinstance(value, (list, tuple)):
        return sum(nbytes_of(v) for v in value)
    if hasattr(value, "__dataclass_fields__"):
        return sum(nbytes_of(getattr(value, k)) for k in value.__dataclass_fields__)
    return 0


def disk_full_message(path, needed=None):
    """The one line of a full disk: which file, how much it needs, what is left."""
    path = Path(path)
    try:
        free = shutil.disk_usage(path.parent if path.parent.exists() else ".").free
    except OSError:
        free = None
    need = f"it needs about {_mb(needed)}" if needed else "it needs more space"
    left = f"{_mb(free)} left on {path.parent}" if free is not None else f"space left on {path.parent} unknown"
    return (f"{path}: disk full while writing ({need}, {left}); earlier files are untouched; free some "
            f"space or write elsewhere")


def _release_full_file(tmp):
    """After a full disk: free the partial file's space at once (it is
    removed next, but a library may still hold it open)."""
    try:
        os.truncate(tmp, 0)
    except OSError:
        pass


class atomic_path:
    """Context manager giving a temporary path beside ``path`` that is renamed
    onto ``path`` on success and removed on failure.

    A full disk (ENOSPC, also inside HDF5's own errors) becomes one
    :class:`~braggstrain.errors.OutputError` naming the file, about how much
    it needed (``size_hint`` in bytes, or what was written when it failed) and
    how much is left; the earlier file at ``path`` stays as it was."""

    def __init__(self, path, suffix=None, size_hint=None):
        self.path = Path(path)
        self.suffix = suffix if suffix is not None else self.path.suffix
        self.size_hint = size_hint

    def __enter__(self):
        self.path.parent.mkdir(parents=True, exist_ok=True)
        if self.size_hint:
            try:
                free = shutil.disk_usage(self.path.parent).free
            except OSError:
                free = None
            if free is not None and free < self.size_hint:
                raise OutputError(disk_full_message(self.path, self.size_hint).replace(
                    "disk full while writing", "not enough space to write"))
        try:
            fd, tmp = tempfile.mkstemp(prefix="." + self.path.name + ".", suffix=".part" + self.suffix,
                                       dir=self.path.parent)
        except OSError as e:
            if is_disk_full(e):
                raise OutputError(disk_full_message(self.path, self.size_hint)) from None
            raise
        os.close(fd)
        self.tmp = Path(tmp)
        # HDF5 reports some failed writes only where h5py releases an object,
        # as "unraisable" exceptions: a full disk there must fail the write too
        self._full = []
        self._previous_hooks = sys.unraisablehook, sys.excepthook
        sys.unraisablehook, sys.excepthook = self._unraisable, self._printed
        return self.tmp

    def _unraisable(self, info):
        if is_disk_full(info.exc_value):
            self._full.append(info.exc_value)
        else:
            self._previous_hooks[0](info)

    def _printed(self, exc_type, value, tb):
        # Cython prints the traceback of an error in a release (__dealloc__) this way
        if is_disk_full(value):
            self._full.append(value)
        else:
            self._previous_hooks[1](exc_type, value, tb)

    def __exit__(self, exc_type, exc, tb):
        full = (exc is not None and is_disk_full(exc)) or bool(self._full)
        if full:
            try:
                self._written = self.tmp.stat().st_size
            except OSError:
                self._written = 0
            _release_full_file(self.tmp)
        else:
            # after a full disk the filters stay: a library (HDF5) that could not
            # flush the file retries and reports it at every later release
            sys.unraisablehook, sys.excepthook = self._previous_hooks
        if exc_type is None and not full:
            umask = os.umask(0)
            os.umask(umask)
            try:
                os.chmod(self.tmp, 0o666 & ~umask)
                os.replace(self.tmp, self.path)
            except OSError as e:
                self._remove()
                if is_disk_full(e):
                    raise OutputError(disk_full_message(self.path, self.size_hint)) from None
                raise
            return False
        written = max(self._remove(), getattr(self, "_written", 0))
        if full:
            # what it needs: the writer's estimate, else the file it replaces, else what got written
            need = self.size_hint or (self.path.stat().st_size if self.path.is_file() else 0) or written or None
            err = OutputError(disk_full_message(self.path, need))
            # an HDF5 file that could not be flushed stays open inside the
            # library, which may crash at interpreter exit: the command line
            # then ends the process at once after its message
            err.unclean_exit = "h5py" in sys.modules and isinstance(
                exc if exc is not None else (self._full[0] if self._full else None), (OSError, RuntimeError)) \
                and self.path.suffix in (".h5", ".hdf5", ".nxs")
            raise err from None
        return False

    def _remove(self):
        try:
            size = self.tmp.stat().st_size
            self.tmp.unlink()
            return size
        except FileNotFoundError:
            return 0


def remove_partial_files(folder, recursive=True):
    """Remove the temporary files :class:`atomic_path` leaves when a process
    is killed before it could clean up (``.<name>.<random>.part<suffix>``).

    Only names of that pattern are touched. Returns the removed paths."""
    folder = Path(folder)
    if not folder.is_dir():
        return []
    removed = []
    for p in sorted(folder.rglob(".*") if recursive else folder.glob(".*")):
        try:
            if p.is_file() and PARTIAL_PATTERN.match(p.name):
                p.unlink()
                removed.append(p)
            elif p.is_dir() and PARTIAL_DIR_PATTERN.match(p.name):
                shutil.rmtree(p)
                removed.append(p)
        except FileNotFoundError:
            pass
    return removed


def write_atomic(path, data):
    """Write ``data`` (bytes, or text as UTF-8) to ``path`` atomically; returns the Path."""
    path = Path(path)
    raw = data.encode("utf-8") if isinstance(data, str) else bytes(data)
    with atomic_path(path) as tmp:
        tmp.write_bytes(raw)
    return path


def mark_version(h5file, format_name, version):
    """Set the version marker (root attributes ``format``, ``format_version``) of an open HDF5 file."""
    h5file.attrs["format"] = format_name
    h5file.attrs["format_version"] = int(version)


def _text(v):
    return v.decode() if isinstance(v, bytes) else v


def open_versioned(path, format_name, versions, *, error=FileFormatError, legacy=None):
    """Open an HDF5 file of ours for reading after checking its version marker.

    Parameters
    ----------
    path : str or Path
    format_name : str
        Expected value of the root attribute ``format``.
    versions : int or collection of int
        Accepted values of ``format_version``.
    error : exception class taking (path, field, expected)
        Raised for every problem (e.g. :class:`~braggstrain.errors.ScanFileError`
        for scan files).
    legacy : (attribute, value, version attribute), optional
        A marker from before this convention: a file without ``format``
        whose ``attribute`` equals ``value`` is read, its version taken from
        ``version attribute``.

    Returns
    -------
    h5py.File, open for reading; ``.attrs["format_version"]`` or the legacy
    version attribute says which version was found (use :func:`file_version`).

    Raises
    ------
    error naming the file and the field for a missing or unreadable file,
    another format or a version not accepted.
    """
    import h5py

    accepted = {int(versions)} if isinstance(versions, int) else {int(v) for v in versions}
    path = str(path)
    if not os.path.exists(path):
        raise error(path, "(file)", "file not found")
    try:
        f = h5py.File(path, "r")
    except OSError as e:
        raise error(path, "(file)", f"not a readable HDF5 file ({e})") from None
    try:
        fmt = _text(f.attrs.get("format"))
        ver_field = "@format_version"
        if fmt is None and legacy is not None and _text(f.attrs.get(legacy[0])) == legacy[1]:
            ver, ver_field = f.attrs.get(legacy[2]), f"@{legacy[2]}"
        elif fmt != format_name:
            raise error(path, "@format", f"expected '{format_name}', got {fmt!r}")
        else:
            ver = f.attrs.get("format_version")
        try:
            ok = ver is not None and int(ver) in accepted
        except (TypeError, ValueError):
            ok = False
        if not ok:
            raise error(path, ver_field, f"expected {' or '.join(str(v) for v in sorted(accepted))}, "
                                         f"got {ver!r} (a file of another braggstrain version?)")
    except BaseException:
        f.close()
        raise
    return f


def file_version(f, legacy_attr=None):
    """The version number of a file opened by :func:`open_versioned`."""
    if "format_version" in f.attrs:
        return int(f.attrs["format_version"])
    return int(f.attrs[legacy_attr])


def write_versioned_json(path, format_name, version, doc):
    """Write a JSON document with the version marker first, atomically."""
    body = {"format": format_name, "format_version": int(version)}
    body.update(doc)
    return write_atomic(path, json.dumps(body, indent=1, ensure_ascii=False))


def read_versioned_json(path, format_name, versions, *, error=FileFormatError):
    """Read a JSON document written by :func:`write_versioned_json` after checking its marker."""
    accepted = {int(versions)} if isinstance(versions, int) else {int(v) for v in versions}
    path = str(path)
    if not os.path.exists(path):
        raise error(path, "(file)", "file not found")
    try:
        with open(path, encoding="utf-8") as fh:
            doc = json.load(fh)
    except (OSError, ValueError) as e:
        raise error(path, "(file)", f"not a readable JSON file ({e})") from None
    if not isinstance(doc, dict) or doc.get("format") != format_name:
        got = doc.get("format") if isinstance(doc, dict) else type(doc).__name__
        raise error(path, "format", f"expected '{format_name}', got {got!r}")
    if doc.get("format_version") not in accepted:
        raise error(path, "format_version", f"expected {' or '.join(str(v) for v in sorted(accepted))}, "
                                            f"got {doc.get('format_version')!r}")
    return doc
