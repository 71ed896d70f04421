"""The Hamiltonian of a run: kinetic energy on the transform grid, the static
potential, time-dependent terms and the absorbing rate, all in atomic units.

H(t) = T + V0(r) + sum_i f_i(t) g_i(r) + V_general(r, t) - i W(r)

``V0`` includes the centrifugal term l(l+1)/(2 m r^2) on a radial grid.

The real part of H (absorber excluded), T + V0 plus the time-dependent terms
frozen at a time t if asked, is available as an operator,
:meth:`Hamiltonian.apply_static` (T applied through the grid's transform:
FFT along periodic axes, orthonormal DST-I along box and radial axes), and as
a dense matrix, :meth:`Hamiltonian.static_matrix` (the Fourier-grid
Hamiltonian; Kosloff & Kosloff, J. Comput. Phys. 52, 35 (1983); Marston &
Balint-Kurti, J. Chem. Phys. 91, 3571 (1989)).  Both are real symmetric: the
kinetic energy depends on k only through k^2, so the +k and -k terms of the
FFT combine into cosines.
"""
from __future__ import annotations

import numpy as np
import scipy.fft

__all__ = ["Hamiltonian", "static_potential_of", "split_time_dependent"]


def static_potential_of(grid, mass: float, terms) -> np.ndarray:
    """V0 (hartree): the time-independent terms plus the centrifugal term,
    full grid shape, float64 (the one copy a run keeps)."""
    mesh = grid.mesh()
    v0 = np.zeros(grid.shape)
    for term in terms:
        if not term.time_dependent:
            v0 += term.static(mesh)
    if grid.radial:
        v0 += grid.centrifugal_potential(mass)
    return v0


def split_time_dependent(terms, mesh) -> tuple[list, list]:
    """The time-dependent terms split into ``[(g array on mesh, f), ...]``
    for V = f(t) g(r) (the kick evaluates only the scalar f per step) and the
    general ones, evaluated in full at each time."""
    separable, general = [], []
    for term in terms:
        if not term.time_dependent:
            continue
        sep = term.separable()
        if sep is not None:
            g, f = sep
            separable.append((np.asarray(g(mesh), float), f))
        else:
            general.append(term)
    return separable, general


class Hamiltonian:
    """Parameters: grid, mass (m_e), list of potential terms, absorber rate
    W (hartree, full grid shape, or None), and ``contact`` g N (hartree
    bohr^d) of a condensate's mean-field term g N |psi|^2 (0: linear; see
    :mod:`wavesweep.interaction`).  The operators below are the linear part:
    the mean-field term depends on psi and enters the split-operator kicks
    and the observables."""

    def __init__(self, grid, mass: float, terms, absorber_rate=None, static_potential=None,
                 contact: float = 0.0):
        self.grid = grid
        self.contact = float(contact)
        self.mass = float(mass)
        self.terms = list(terms)
        mesh = grid.mesh()
        # (g array, f callable) pairs, and terms evaluated in full per step
        self.separable, self.general = split_time_dependent(self.terms, mesh)
        if static_potential is None:
            static_potential = static_potential_of(grid, self.mass, self.terms)
        self.static_potential = np.ascontiguousarray(np.broadcast_to(static_potential, grid.shape), dtype=float)
        self.absorber_rate = absorber_rate
        self._mesh = mesh

    @property
    def kinetic(self) -> np.ndarray:
        """T(k) (hartree) on the full transform grid; made when first asked
        for (the split-operator step never needs it in full)."""
        return self.grid.kinetic_energy(self.mass)

    @property
    def time_dependent(self) -> bool:
        return bool(self.separable or self.general)

    def dynamic_potential(self, t: float):
        """V(t) - V0 (hartree), broadcastable to the grid, or None when static."""
        if not self.time_dependent:
            return None
        v = 0.0
        for g, f in self.separable:
            v = v + f(t) * g
        for term in self.general:
            v = v + term.at_time(self._mesh, t)
        return v

    def potential(self, t: float = 0.0) -> np.ndarray:
        """Real potential V(r, t) on the grid (hartree)."""
        dyn = self.dynamic_potential(t)
        return self.static_potential if dyn is None else self.static_potential + dyn

    def real_potential(self, t: float | None = None) -> np.ndarray:
        """V0 (hartree, full grid), plus the time-dependent terms at time ``t``
        (atomic units) when ``t`` is given; the absorber is never included."""
        return self.static_potential if t is None else np.broadcast_to(self.potential(t), self.grid.shape)

    def apply_static(self, psi: np.ndarray, t: float | None = None, workers: int | None = None,
                     potential: np.ndarray | None = None) -> np.ndarray:
        """(T + V) psi in hartree times psi's units, V from :meth:`real_potential`
        (the absorber is never included) or the real array ``potential``
        (hartree, the grid's shape) when given.  ``psi`` as in :meth:`apply_kinetic`."""
        out = self.apply_kinetic(psi, workers=workers)
        out += (self.real_potential(t) if potential is None else potential) * psi
        return out

    def apply_kinetic(self, psi: np.ndarray, factor: np.ndarray | None = None,
                      workers: int | None = None) -> np.ndarray:
        """f(T) psi: psi to the grid's transform space, times ``factor`` (an
        array of the grid's shape in the transform's ordering, a function of
        T such as 1/(T + s); default T itself, hartree), and back.

        ``psi`` has the grid's shape, optionally after leading axes (a block
        of states, each transformed on its own).  The transforms are scipy.fft
        (never the propagator's, whose buffer may hold psi): DST-I along box
        axes; along periodic axes the complex FFT, or for real input a real
        FFT along the last periodic axis (half the work; real output, since
        ``factor`` depends on k only through k^2)."""
        grid = self.grid
        psi = np.asarray(psi)
        factor = self.kinetic if factor is None else factor
        lead = psi.ndim - grid.ndim
        if lead < 0 or psi.shape[lead:] != grid.shape:
            raise ValueError(f"psi has shape {psi.shape}, the grid {grid.shape}")
        kinds = grid.transform_kinds
        dst_axes = tuple(lead + i for i, k in enumerate(kinds) if k == "dst1")
        fft_axes = tuple(lead + i for i, k in enumerate(kinds) if k == "fft")
        c = psi
        if dst_axes:
            c = scipy.fft.dstn(c, type=1, axes=dst_axes, norm="ortho", workers=workers)
        if np.iscomplexobj(psi):
            if fft_axes:
                c = scipy.fft.fftn(c, axes=fft_axes, workers=workers)
            c = c * factor
            if fft_axes:
                c = scipy.fft.ifftn(c, axes=fft_axes, overwrite_x=True, workers=workers)
        elif fft_axes:
            last = fft_axes[-1] - lead
            half = np.take(factor, np.arange(grid.shape[last] // 2 + 1), axis=last)
            c = scipy.fft.rfftn(c, axes=fft_axes, workers=workers)
            c *= half
            c = scipy.fft.irfftn(c, s=[psi.shape[i] for i in fft_axes], axes=fft_axes,
                                 overwrite_x=True, workers=workers)
        else:
            c = c * factor
        if dst_axes:
            c = scipy.fft.idstn(c, type=1, axes=dst_axes, norm="ortho", overwrite_x=True, workers=workers)
        return c

    def static_matrix(self, t: float | None = None, potential: np.ndarray | None = None) -> np.ndarray:
        """The dense real symmetric matrix of :meth:`apply_static` (hartree,
        ``grid.size`` squared, row-major flattening of the grid).

        T is the Kronecker sum of one matrix per axis, each built by applying
        that axis's transform to the identity (periodic: real(F^-1 diag(T) F);
        box: S diag(T) S with S the orthonormal DST-I, S S = 1); V sits on the
        diagonal.  O(size^2) memory: 8 bytes times size^2."""
        grid = self.grid
        h = np.zeros((grid.size, grid.size))
        for i, ax in enumerate(grid.axes):
            n = ax.points
            t_axis = ax.wavenumbers**2 / (2.0 * self.mass)
            if ax.boundary == "periodic":
                k = scipy.fft.ifft(t_axis[:, None] * scipy.fft.fft(np.eye(n), axis=0), axis=0).real
                k = 0.5 * (k + k.T)   # symmetric to rounding; exactly, for eigh
            else:
                s = scipy.fft.dst(np.eye(n), type=1, norm="ortho", axis=0)  # symmetric, S S = 1
                k = (s * t_axis) @ s
            before = int(np.prod(grid.shape[:i]))
            after = int(np.prod(grid.shape[i + 1:]))
            # I_before (x) k (x) I_after, added block by block (no Kronecker temporaries)
            h6 = h.reshape(before, n, after, before, n, after)
            for p in range(before):
                for q in range(after):
                    h6[p, :, q, p, :, q] += k
        v = self.real_potential(t) if potential is None else np.broadcast_to(potential, grid.shape)
        h[np.diag_indices(grid.size)] += v.reshape(-1)
        return h

    def spectral_range(self, t: float = 0.0) -> tuple[float, float]:
        """Bounds (hartree) of the real spectrum of the discretised H: V min/max
        plus 0..T_max (used to scale Chebyshev expansions)."""
        v = self.potential(t)
        return float(v.min()) + float(self.kinetic.min()), float(v.max()) + float(self.kinetic.max())

