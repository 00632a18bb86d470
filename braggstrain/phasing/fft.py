"""FFT backend of the phasing loop: planned in-place 3-D transforms.

One :class:`FFTBackend` owns one aligned complex64 work array and transforms
it in place, forward or backward, without allocating anything per call when
pyFFTW is available.  The transforms are *unnormalised* in both directions
(numpy's forward convention, and an inverse that omits the ``1/N``); the
caller folds ``1/N`` into its next element-wise pass, which saves one pass
over the array per iteration.

Reproducibility comes first: pyFFTW plans are made with ``FFTW_ESTIMATE``
by default.  An estimated plan is chosen by FFTW's fixed heuristics, so every
process on the machine (a pool worker, a Dask worker, a resumed run, a fresh
interpreter with no cache) makes the very same plan for the same shape,
thread count and alignment, and rounds every FFT the same way.  That matters
because an iterative phasing run amplifies the last bit of an FFT until the
outcome itself differs.  Before an estimated plan is made, the process's
wisdom is cleared (FFTW would otherwise reuse measured wisdom for an
estimated plan, see the FFTW 3 manual, "Words of Wisdom-Saving Plans") and
restored afterwards.

``effort="FFTW_MEASURE"`` (or PATIENT/EXHAUSTIVE) is the faster option:
FFTW times candidate plans, which differ from process to process, so results
then vary in their last bits between processes.  For those plans the wisdom
is kept: :func:`export_wisdom` / :func:`import_wisdom` carry it to worker
processes (the ensemble does this), :func:`save_wisdom` / :func:`load_wisdom`
keep it in a file, and a cache file is read before the first measured plan
of a process and rewritten (atomically) when planning added to it, so a
later process on the same machine makes the same measured plans.  The file
is ``$BRAGGSTRAIN_FFTW_WISDOM`` if set (an empty value turns the cache off),
else ``$XDG_CACHE_HOME/braggstrain/fftw-wisdom.json`` (``~/.cache`` by
default).  ``benchmarks/phasing.py`` measures what the estimated plans cost.

Without pyFFTW, ``scipy.fft`` with ``workers`` is used; it returns a new
array per transform, which is copied back into the work array.
"""

from __future__ import annotations

import base64
import os
import threading

# Two OpenMP runtimes share the cores in the loop (the one bundled with
# pyFFTW's FFTW and the one behind numba's parallel kernels).  With the default
# active waiting, the idle pool of one spins while the other works; passive
# waiting lets them hand the two cores back and forth.  Only a default: a
# value set by the user wins, and it only acts if set before the runtimes load.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np
import scipy.fft

from braggstrain.errors import InputError
from braggstrain.io.files import read_versioned_json, write_versioned_json

try:  # pyFFTW is a declared dependency, but keep working without it.
    import pyfftw

    HAVE_PYFFTW = True
except ImportError:  # pragma: no cover - exercised only where pyFFTW is absent
    pyfftw = None
    HAVE_PYFFTW = False

__all__ = [
    "FFTBackend",
    "HAVE_PYFFTW",
    "default_threads",
    "export_wisdom",
    "import_wisdom",
    "save_wisdom",
    "load_wisdom",
    "wisdom_cache_path",
    "adopt_wisdom",
    "DEFAULT_EFFORT",
]

_BACKENDS = ("auto", "pyfftw", "scipy")
_EFFORTS = ("FFTW_ESTIMATE", "FFTW_MEASURE", "FFTW_PATIENT", "FFTW_EXHAUSTIVE")
#: Planner effort of the phasing loop unless asked otherwise: reproducible plans.
DEFAULT_EFFORT = "FFTW_ESTIMATE"
_plan_lock = threading.Lock()  # FFTW's planner is not thread safe
_cache = {"loaded": False, "saved": None}


def wisdom_cache_path():
    """Path of the FFTW wisdom cache file, or None when the cache is off."""
    env = os.environ.get("BRAGGSTRAIN_FFTW_WISDOM")
    if env is not None:
        return env or None
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return os.path.join(base, "braggstrain", "fftw-wisdom.json")


def _cache_before_planning():
    """Import the cached wisdom once per process (called with the plan lock held)."""
    if _cache["loaded"]:
        return
    _cache["loaded"] = True
    path = wisdom_cache_path()
    if path is None:
        return
    try:
        load_wisdom(path)
    except (InputError, OSError):
        pass  # an unreadable cache is rebuilt by the next save
    _cache["saved"] = export_wisdom()


def _cache_after_planning():
    """Rewrite the cache if planning added wisdom (called with the plan lock held)."""
    path = wisdom_cache_path()
    if path is None:
        return
    wisdom = export_wisdom()
    if wisdom == _cache["saved"]:
        return
    try:
        save_wisdom(path)
        _cache["saved"] = wisdom
    except OSError:
        pass  # a read-only cache location only costs reproducibility across processes


class _planning:
    """Context for making FFTW plans of one effort (holds the plan lock).

    Measured efforts read the wisdom cache before planning and rewrite it
    after.  The estimated effort plans from a clean slate (no wisdom at all,
    so no measured wisdom can leak into the plan) and restores the wisdom
    afterwards, so measured plans made later still find it.
    """

    def __init__(self, effort):
        self.effort = effort
        self._kept = None

    def __enter__(self):
        _plan_lock.acquire()
        try:
            if self.effort == "FFTW_ESTIMATE":
                self._kept = export_wisdom()
                pyfftw.forget_wisdom()
            else:
                _cache_before_planning()
        except BaseException:
            _plan_lock.release()
            raise
        return self

    def __exit__(self, *exc):
        try:
            if self.effort == "FFTW_ESTIMATE":
                pyfftw.forget_wisdom()
                import_wisdom(self._kept)
            else:
                _cache_after_planning()
        finally:
            _plan_lock.release()
        return False


def default_threads() -> int:
    """Number of cores this process may run on (the default thread count)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def _check_threads(threads):
    if threads is None:
        return default_threads()
    if isinstance(threads, bool) or not isinstance(threads, (int, np.integer)) or threads < 1:
        raise InputError(f"threads: expected a positive integer or None, got {threads!r}")
    return int(threads)


class FFTBackend:
    """In-place forward/backward 3-D FFT of one complex64 work array.

    Parameters
    ----------
    shape : tuple of int
        Shape of the arrays to transform (3-D in the phasing loop, any
        dimension works).
    threads : int, optional
        Threads for the transforms; default all cores of this process.
    backend : {"auto", "pyfftw", "scipy"}
        ``"auto"`` takes pyFFTW when it is installed, else ``scipy.fft``.
    effort : str
        FFTW planner effort, one of ``FFTW_ESTIMATE`` (default: the same
        plan in every process, so reproducible results), ``FFTW_MEASURE``,
        ``FFTW_PATIENT``, ``FFTW_EXHAUSTIVE`` (faster plans, chosen by
        timing, which may differ between processes).

    Attributes
    ----------
    buffer : ndarray of complex64
        The work array; :meth:`forward` and :meth:`backward` transform it in
        place.
    real_buffer, half_buffer : ndarray of float32 / complex64
        Work arrays of the real transforms :meth:`real_forward` and
        :meth:`real_backward` (the shrink-wrap blur), planned on first use.
    name : str
        ``"pyfftw"`` or ``"scipy"``, the backend actually used.
    """

    def __init__(self, shape, threads=None, backend="auto", effort=DEFAULT_EFFORT):
        shape = tuple(int(n) for n in shape)
        if not shape or any(n < 1 for n in shape):
            raise InputError(f"shape: expected positive sizes, got {shape}")
        if backend not in _BACKENDS:
            raise InputError(f"fft backend: expected one of {_BACKENDS}, got {backend!r}")
        if effort not in _EFFORTS:
            raise InputError(f"fft effort: expected one of {_EFFORTS}, got {effort!r}")
        if backend == "pyfftw" and not HAVE_PYFFTW:
            raise InputError("fft backend: 'pyfftw' requested but pyFFTW is not installed")
        self.shape = shape
        self.threads = _check_threads(threads)
        self.size = int(np.prod(shape))
        self.name = "pyfftw" if (backend != "scipy" and HAVE_PYFFTW) else "scipy"
        axes = tuple(range(len(shape)))
        self._axes = axes
        self._effort = effort
        self._real = self._half = None
        if self.name == "pyfftw":
            self.buffer = pyfftw.empty_aligned(shape, dtype=np.complex64)
            flags = (effort, "FFTW_DESTROY_INPUT")
            with _planning(effort):  # planning (MEASURE) scribbles over the buffer
                self._fwd = pyfftw.FFTW(self.buffer, self.buffer, axes=axes,
                                        direction="FFTW_FORWARD", flags=flags,
                                        threads=self.threads)
                self._bwd = pyfftw.FFTW(self.buffer, self.buffer, axes=axes,
                                        direction="FFTW_BACKWARD", flags=flags,
                                        threads=self.threads)
            self.buffer[...] = 0
        else:
            self.buffer = np.zeros(shape, dtype=np.complex64)

    def forward(self):
        """Unnormalised forward transform of :attr:`buffer`, in place."""
        if self.name == "pyfftw":
            self._fwd.execute()
        else:
            self.buffer[...] = scipy.fft.fftn(self.buffer, axes=self._axes,
                                              workers=self.threads, overwrite_x=True)

    def _real_plans(self):
        if self._real is not None:
            return
        n_half = self.shape[:-1] + (self.shape[-1] // 2 + 1,)
        if self.name == "pyfftw":
            real = pyfftw.empty_aligned(self.shape, dtype=np.float32)
            half = pyfftw.empty_aligned(n_half, dtype=np.complex64)
            flags = (self._effort, "FFTW_DESTROY_INPUT")
            with _planning(self._effort):
                self._rfwd = pyfftw.FFTW(real, half, axes=self._axes, direction="FFTW_FORWARD",
                                         flags=flags, threads=self.threads)
                self._rbwd = pyfftw.FFTW(half, real, axes=self._axes, direction="FFTW_BACKWARD",
                                         flags=flags, threads=self.threads)
            real[...] = 0
        else:
            real = np.zeros(self.shape, dtype=np.float32)
            half = np.zeros(n_half, dtype=np.complex64)
        self._real, self._half = real, half

    @property
    def real_buffer(self):
        """Real float32 work array of :attr:`shape` for :meth:`real_forward` (made on first use)."""
        self._real_plans()
        return self._real

    @property
    def half_buffer(self):
        """Complex64 half spectrum, shape (..., n//2 + 1), of :meth:`real_forward`."""
        self._real_plans()
        return self._half

    def real_forward(self):
        """Unnormalised real-to-complex FFT of :attr:`real_buffer` into :attr:`half_buffer`."""
        self._real_plans()
        if self.name == "pyfftw":
            self._rfwd.execute()
        else:
            self._half[...] = scipy.fft.rfftn(self._real, axes=self._axes, workers=self.threads)

    def real_backward(self):
        """Unnormalised complex-to-real FFT of :attr:`half_buffer` into :attr:`real_buffer`.

        The half spectrum is destroyed.
        """
        self._real_plans()
        if self.name == "pyfftw":
            self._rbwd.execute()
        else:
            self._real[...] = scipy.fft.irfftn(self._half, s=self.shape, axes=self._axes,
                                               norm="forward", workers=self.threads)

    def backward(self):
        """Unnormalised backward transform of :attr:`buffer` (no ``1/N``), in place."""
        if self.name == "pyfftw":
            self._bwd.execute()
        else:
            self.buffer[...] = scipy.fft.ifftn(self.buffer, axes=self._axes, norm="forward",
                                               workers=self.threads, overwrite_x=True)

    def __repr__(self):
        return (f"FFTBackend(shape={self.shape}, threads={self.threads}, name={self.name!r}, "
                f"effort={self._effort!r})")


def export_wisdom():
    """FFTW wisdom gathered so far in this process (``None`` without pyFFTW)."""
    if not HAVE_PYFFTW:
        return None
    return pyfftw.export_wisdom()


def import_wisdom(wisdom) -> bool:
    """Merge wisdom from :func:`export_wisdom` into this process's planner.

    Returns ``True`` if any wisdom was imported.
    """
    if not HAVE_PYFFTW or wisdom is None:
        return False
    return any(pyfftw.import_wisdom(tuple(wisdom)))


def adopt_wisdom(wisdom) -> None:
    """Use ``wisdom`` from a parent process instead of this process's cache file.

    The parent read the cache before planning, so its wisdom already holds
    what the file had; importing the file again here could only disagree.
    """
    with _plan_lock:
        import_wisdom(wisdom)
        _cache["loaded"] = True
        _cache["saved"] = export_wisdom()


WISDOM_FORMAT = "braggstrain-fftw-wisdom"
WISDOM_VERSION = 1


def save_wisdom(path) -> None:
    """Write this process's FFTW wisdom to ``path`` atomically (JSON with the version marker)."""
    wisdom = export_wisdom()
    if wisdom is None:
        return
    write_versioned_json(path, WISDOM_FORMAT, WISDOM_VERSION,
                         {"fftw_wisdom": [base64.b64encode(w).decode("ascii") for w in wisdom]})


def load_wisdom(path) -> bool:
    """Import wisdom written by :func:`save_wisdom`; ``False`` if the file is absent."""
    path = os.fspath(path)
    if not os.path.exists(path):
        return False
    doc = read_versioned_json(path, WISDOM_FORMAT, WISDOM_VERSION)
    try:
        wisdom = tuple(base64.b64decode(w) for w in doc["fftw_wisdom"])
    except Exception as exc:
        raise InputError(f"{path}: field 'fftw_wisdom': expected the base64 entries written by "
                         f"save_wisdom ({exc})") from exc
    if len(wisdom) != 3:
        raise InputError(f"{path}: field 'fftw_wisdom': expected three entries, got {len(wisdom)}")
    return import_wisdom(wisdom)
