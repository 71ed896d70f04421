"""Spectral transforms of a grid: a small backend registry.

A :class:`Transform` maps psi on the grid to its coefficients on the
wave-number grid of :class:`~wavesweep.grid.Grid` and back: a complex FFT
along periodic axes (unnormalised forward, 1/N on the way back, as
numpy/scipy do) and the orthonormal DST-I along box axes (its own inverse).
It is made once per run, so backends that plan (pyFFTW) plan once.  With
``members`` it transforms a batch: arrays of shape ``(members, *grid.shape)``,
each member along the grid's axes only.

Backends register by name in :data:`BACKENDS` (:func:`register_backend`),
the one list of them: the job's ``evolve.fft``, ``run --fft`` and
``wavesweep keys evolve`` read it.  ``make_transform(grid, backend=AUTO)``
picks the best available.
"""
from __future__ import annotations

import importlib.util
import os
import pickle
import sys
import threading

import numpy as np
import scipy.fft

from .io.atomic import write_bytes_atomic
from .registry import registrar
from .fftw_rows import PLANNER_LOCK, row_plans
from .sine_transform import OddExtensionSine

__all__ = ["Transform", "ScipyTransform", "PyFFTWTransform", "BACKENDS", "AUTO", "PLAIN", "make_transform",
           "register_backend", "backend_choices", "wisdom_path"]


class Transform:
    """Interface: ``forward(a)`` and ``backward(c)`` may overwrite their input
    and return the result (possibly the same array); ``transform_of(a)``
    leaves ``a`` alone.  ``backward(c, scaled=False)`` skips the 1/N of the
    periodic axes (:attr:`backward_scale`), for callers that fold it into a
    factor they multiply by anyway (it is one more pass over memory)."""

    name = "base"
    summary = ""   # one line for `wavesweep keys evolve`

    def __init__(self, grid, dtype=np.complex128, threads: int | None = None,
                 members: int | None = None):
        self.grid = grid
        self.dtype = np.dtype(dtype)
        self.members = None if members is None else int(members)
        self.shape = tuple(grid.shape) if members is None else (self.members, *grid.shape)
        # threads by the size of one member's transform: a batch of small
        # transforms ran slower on 2 threads (32 x 2048: 15 us per member
        # and step against 10 on one; waking FFTW's threads costs more than
        # a 2048-point transform)
        self.threads = threads or default_threads(grid.size)
        lead = 0 if members is None else 1
        kinds = grid.transform_kinds
        self._fft_axes = tuple(lead + i for i, k in enumerate(kinds) if k == "fft")
        self._dst_axes = tuple(lead + i for i, k in enumerate(kinds) if k == "dst1")

    @property
    def backward_scale(self) -> float:
        """1/N of the inverse FFT (N the points of the periodic axes)."""
        return 1.0 / int(np.prod([self.shape[i] for i in self._fft_axes]))

    def forward(self, a: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def backward(self, c: np.ndarray, scaled: bool = True) -> np.ndarray:
        raise NotImplementedError

    def transform_of(self, a: np.ndarray) -> np.ndarray:
        """The forward transform of ``a`` (in this transform's precision)
        without touching ``a``."""
        return self.forward(np.array(a, dtype=self.dtype, copy=True))

    def in_place(self):
        """``(forward, backward, buffer)`` when the backend transforms one
        buffer in place with argument-free calls (the unscaled inverse), so
        a stepping loop can skip the per-call checks; None otherwise."""
        return None


class ScipyTransform(Transform):
    """scipy.fft with ``workers`` threads; DST-I with ``norm="ortho"``."""

    name = "scipy"
    summary = "scipy.fft: always available, no planning"

    def forward(self, a):
        if self._fft_axes:
            a = scipy.fft.fftn(a, axes=self._fft_axes, overwrite_x=True, workers=self.threads)
        if self._dst_axes:
            a = scipy.fft.dstn(a, type=1, axes=self._dst_axes, norm="ortho",
                               overwrite_x=True, workers=self.threads)
        return a

    def backward(self, c, scaled=True):
        if self._dst_axes:
            c = scipy.fft.idstn(c, type=1, axes=self._dst_axes, norm="ortho",
                                overwrite_x=True, workers=self.threads)
        if self._fft_axes:
            c = scipy.fft.ifftn(c, axes=self._fft_axes, overwrite_x=True, workers=self.threads,
                                norm="backward" if scaled else "forward")
        return c


# name -> Transform class: the one list of FFT backends.
BACKENDS: dict[str, type[Transform]] = {ScipyTransform.name: ScipyTransform}
# Not a backend: the best registered one that loads (make_transform).
AUTO = "auto"
# The backend of methods that transform out of place (Chebyshev, Crank-Nicolson,
# apply_hamiltonian), where planning would not pay: always registered.
PLAIN = ScipyTransform.name


def wisdom_path():
    """Where FFTW wisdom is kept between runs (``$WAVESWEEP_CACHE`` or the
    user cache folder), so a second run of the same grid does not plan again."""
    root = os.environ.get("WAVESWEEP_CACHE") or os.path.join(
        os.environ.get("XDG_CACHE_HOME") or os.path.expanduser("~/.cache"), "wavesweep")
    return os.path.join(root, "fftw-wisdom.pickle")


def _load_wisdom(pyfftw) -> None:
    try:
        with open(wisdom_path(), "rb") as f:
            pyfftw.import_wisdom(pickle.load(f))
    except Exception:   # noqa: BLE001 -- only a cache: a damaged or foreign file means no wisdom, never a failed run
        pass


def _save_wisdom(pyfftw) -> None:
    """Write this process's wisdom, merged with the file's (another worker
    may have planned other grids since this process read it)."""
    path = wisdom_path()
    _load_wisdom(pyfftw)
    try:
        os.makedirs(os.path.dirname(path), exist_ok=True)
        # concurrent workers: each writes its own temporary file; the last complete writer wins
        write_bytes_atomic(path, pickle.dumps(pyfftw.export_wisdom()))
    except OSError:
        pass


# The wisdom file is read once per process (FFTW keeps wisdom in memory for the
# process) and written only after a plan the wisdom did not hold: reading it cost
# ~2 ms and writing it ~11 ms (a 160 KB export) on every transform made, two per run.
_wisdom_read = False


def _plan(pyfftw, buffer, axes, direction, effort, threads):
    """``(plan, learnt)``: an in-place FFTW plan of ``buffer``, from the
    process's wisdom when it holds this transform (FFTW_WISDOM_ONLY: ~40
    us), else measured (``learnt`` True: the wisdom file wants updating)."""
    global _wisdom_read
    with _pyfftw_lock:
        if not _wisdom_read:
            _load_wisdom(pyfftw)
            _wisdom_read = True
    flags = (effort, "FFTW_DESTROY_INPUT")
    with PLANNER_LOCK:   # never beside the row plans of fftw_rows (FFTW's planner is not thread-safe)
        try:
            return pyfftw.FFTW(buffer, buffer, axes=axes, direction=direction,
                               flags=(*flags, "FFTW_WISDOM_ONLY"), threads=threads), False
        except RuntimeError:   # no wisdom for this transform: plan it
            return pyfftw.FFTW(buffer, buffer, axes=axes, direction=direction, flags=flags, threads=threads), True


# pyFFTW is optional: a faster FFT for periodic axes.  It is registered when
# it is installed (a finder look-up, nothing imported) and imported by the
# first PyFFTWTransform: a process that never builds one (check, submit,
# analysis) does not pay for it.
_PYFFTW_INSTALLED = importlib.util.find_spec("pyfftw") is not None
_pyfftw = None   # the pyfftw module, once imported
_pyfftw_lock = threading.Lock()

# pyFFTW's optional dask interface imports this module (and with it dask.array
# and pandas); see _load_pyfftw.
_PYFFTW_SKIPPED = "dask.array.fft"


def _load_pyfftw():
    """The ``pyfftw`` module, imported once, on first use, without its dask
    interface.

    ``pyfftw/__init__.py`` imports ``pyfftw.interfaces``, which imports
    ``dask.array.fft`` whenever dask is installed, to offer FFT wrappers for
    dask arrays.  That is 0.34 of the 0.36 s the package took to import here
    (dask.array brings pandas), for wrappers wavesweep never calls; without
    it pyFFTW costs 7-11 ms once scipy.fft is loaded.  pyFFTW treats that
    interface as optional (it skips it on ImportError), so pyFFTW is imported
    with ``dask.array.fft`` marked missing (``None`` in ``sys.modules``: the
    import system's documented way to make an import fail) and the mark is
    removed straight after.  The package is then whole but for
    ``pyfftw.interfaces.dask_fft``, and ``dask.array.fft`` stays importable
    for any later caller.  Nothing is marked when pyFFTW or dask.array.fft is
    already imported, and should a pyFFTW version need dask.array.fft, the
    plain import is made instead.  The FFTW plans wavesweep makes are the
    same either way, so the transforms are bit-identical.  (Another thread
    importing ``dask.array.fft`` during these milliseconds would get an
    ImportError; wavesweep's threads never import it.)
    """
    global _pyfftw
    with _pyfftw_lock:
        if _pyfftw is None:
            if "pyfftw" in sys.modules or _PYFFTW_SKIPPED in sys.modules:
                _pyfftw = _import_pyfftw()
            else:
                sys.modules[_PYFFTW_SKIPPED] = None
                try:
                    _pyfftw = _import_pyfftw()
                except ImportError:   # this pyFFTW needs dask.array.fft after all
                    _pyfftw = None
                finally:
                    if sys.modules.get(_PYFFTW_SKIPPED, 0) is None:
                        del sys.modules[_PYFFTW_SKIPPED]
                if _pyfftw is None:
                    _pyfftw = _import_pyfftw()
        return _pyfftw


def _import_pyfftw():
    import pyfftw  # lazy: pyFFTW loads with the first PyFFTWTransform (see _load_pyfftw)
    return pyfftw


class PyFFTWTransform(Transform):
    """Planned in-place FFTW transforms of one aligned buffer (pyFFTW).

    ``forward(a)`` works in place when ``a`` is the buffer (the propagator
    keeps psi there, so a step copies nothing); any other input is copied
    into it first.  Plans are made once per transform with FFTW_MEASURE, from
    the process's wisdom when it has the transform (:func:`_plan`); the
    wisdom is cached on disk, read once per process.  Box (DST-I) axes go
    through planned FFTs of their odd extension
    (:class:`~wavesweep.sine_transform.OddExtensionSine`).
    """

    name = "pyfftw"
    summary = "FFTW through pyFFTW (when installed): planned once, in place; box axes by FFTs of their odd extension"

    def __init__(self, grid, dtype=np.complex128, threads=None, members=None, effort="FFTW_MEASURE"):
        super().__init__(grid, dtype, threads, members)
        pyfftw = _load_pyfftw()
        self.effort = effort
        self.buffer = pyfftw.empty_aligned(self.shape, dtype=self.dtype)
        self._fwd = self._bwd = self._sine = None
        learnt = []
        if self._fft_axes:
            self._fwd, new = _plan(pyfftw, self.buffer, self._fft_axes, "FFTW_FORWARD", effort, self.threads)
            self._bwd, new_too = _plan(pyfftw, self.buffer, self._fft_axes, "FFTW_BACKWARD", effort, self.threads)
            learnt += [new, new_too]
        if self._dst_axes:   # box axes: FFTs of the odd extension (sine_transform), planned the same way
            self._sine = OddExtensionSine(pyfftw, self.shape, self.dtype, self._dst_axes, self.threads, effort,
                                          planner=lambda buf, axes: _plan(pyfftw, buf, axes, "FFTW_FORWARD",
                                                                          effort, self.threads))
            learnt.append(self._sine.learnt)
        if any(learnt):   # keep what was learnt for the next process
            with _pyfftw_lock:
                _save_wisdom(pyfftw)

    def row_plans(self):
        """FFTW's own plans of one row of the buffer, for a compiled loop
        (:func:`wavesweep.fftw_rows.row_plans`): a 1D periodic grid, one
        thread, built in the main thread; None otherwise."""
        if self._dst_axes or len(self._fft_axes) != 1 or self.threads != 1:
            return None
        plans = row_plans(self.buffer, self.effort)
        if plans is not None and plans.learnt:   # keep what was learnt for the next process
            plans.learnt = False                 # (the plans are kept: saved once)
            pyfftw = _load_pyfftw()
            with _pyfftw_lock:
                _save_wisdom(pyfftw)
        return plans

    def _into_buffer(self, a):
        if a is not self.buffer:
            np.copyto(self.buffer, a)
        return self.buffer

    def transform_of(self, a):
        return self.forward(a)   # copied into the buffer first: ``a`` is untouched

    def in_place(self):
        if self._dst_axes or self._fwd is None:
            return None
        return self._fwd.execute, self._bwd.execute, self.buffer

    def forward(self, a):
        b = self._into_buffer(a)
        if self._fwd is not None:
            self._fwd.execute()
        if self._sine is not None:
            self._sine(b)
        return b

    def backward(self, c, scaled=True):
        b = self._into_buffer(c)
        if self._sine is not None:   # the orthonormal DST-I is its own inverse
            self._sine(b)
        if self._bwd is not None:
            self._bwd.execute()
            if scaled:
                b *= self.backward_scale
        return b


register_backend = registrar(BACKENDS, "name", "an FFT backend (of jobs, ``run --fft`` and ``wavesweep keys``)")


if _PYFFTW_INSTALLED:
    register_backend(PyFFTWTransform)


def backend_choices() -> tuple[str, ...]:
    """Every name ``evolve.fft`` and ``run --fft`` accept: :data:`AUTO`, then
    the registered backends."""
    return (AUTO, *BACKENDS)


# Below this many grid points a transform is too short for threads to pay:
# start-up and synchronisation cost more than the work (and on a loaded
# machine a spinning thread waits for a core).  Measured order of magnitude.
THREADS_MIN_POINTS = 1 << 16


def default_threads(size: int | None = None) -> int:
    """Threads for one run: at most ``WAVESWEEP_THREADS`` (set per worker by
    the queue) or all cores; one for grids smaller than
    :data:`THREADS_MIN_POINTS`, whatever the cap (two threads on a 4096-point
    grid made a worker 1.8x slower than one)."""
    env = os.environ.get("WAVESWEEP_THREADS")
    cap = max(1, int(env)) if env else (os.cpu_count() or 1)
    if size is not None and size < THREADS_MIN_POINTS:
        return 1
    return cap


def make_transform(grid, backend: str | type[Transform] = AUTO, dtype=np.complex128,
                   threads: int | None = None, members: int | None = None) -> Transform:
    """A transform for ``grid`` (or a batch of ``members`` states on it) from
    a backend name, a class, or :data:`AUTO`."""
    if isinstance(backend, type):
        return backend(grid, dtype, threads, members)
    if backend == AUTO:
        backend = PyFFTWTransform.name if PyFFTWTransform.name in BACKENDS else PLAIN
        if backend == PyFFTWTransform.name:
            try:
                _load_pyfftw()
            except ImportError:   # installed but broken: auto means the best that works
                backend = PLAIN
    try:
        cls = BACKENDS[backend]
    except KeyError:
        raise ValueError(f"fft backend {backend!r} is not available; choose from "
                         f"{', '.join(sorted(BACKENDS))}") from None
    return cls(grid, dtype, threads, members)
