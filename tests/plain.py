"""Plain numpy references for the fast paths (no numba, no planned FFTs).

Each follows its formula line by line, the way a textbook states it, so a
fast path that fuses, batches or reorders the work can be compared with it.
"""
from __future__ import annotations

import numpy as np
import scipy.fft


def transform(psi, grid, inverse=False):
    """The grid's spectral transform: FFT on periodic axes (1/N on the way
    back), orthonormal DST-I on box axes (its own inverse)."""
    out = np.array(psi, dtype=complex)
    for i, ax in enumerate(grid.axes):
        if ax.boundary == "periodic":
            out = (scipy.fft.ifft if inverse else scipy.fft.fft)(out, axis=i)
        else:
            out = scipy.fft.dst(out, type=1, axis=i, norm="ortho")
    return out


def strang(setup, psi, nsteps, absorber=None):
    """Strang steps exp(-i V(t_m) dt/2 - W dt/2) exp(-i T dt) exp(-i V(t_m) dt/2 - W dt/2)
    with t_m the middle of the step (Strang, SIAM J. Numer. Anal. 5, 506
    (1968); exponential midpoint rule for V(t)).  Returns (psi, absorbed per
    face): each half kick books |psi|^2 (1 - exp(-W dt)) dV to the faces in
    proportion to their rates."""
    h, grid, dt = setup.hamiltonian, setup.grid, setup.dt
    absorber = setup.absorber if absorber is None else absorber
    w = absorber.rate if absorber.active else np.zeros(grid.shape)
    kin = np.exp(-1j * h.kinetic * dt)
    books = np.zeros(len(absorber.layers))
    psi = np.array(psi, dtype=complex)

    def half_kick(psi, t):
        if absorber.active:
            lost = np.abs(psi) ** 2 * -np.expm1(-w * dt)
            for n, layer in enumerate(absorber.layers):
                share = np.zeros(grid.shape)
                share[layer.slab] = np.broadcast_to(layer.rate, share[layer.slab].shape)
                books[n] += np.sum(lost * np.divide(share, w, out=np.zeros(grid.shape), where=w > 0)) \
                    * grid.cell_volume
        return psi * np.exp(-0.5j * h.potential(t) * dt - 0.5 * w * dt)

    for n in range(nsteps):
        tm = (n + 0.5) * dt
        psi = half_kick(psi, tm)
        psi = transform(kin * transform(psi, grid), grid, inverse=True)
        psi = half_kick(psi, tm)
    return psi, books


def observables(grid, mass, psi, potential, detectors=(), psi0=None):
    """The recorded observables by their definitions: norm, <x>, std x,
    <p> = Im sum conj(psi) dpsi/dx dV / norm (spectral derivative), <H>,
    flux (hbar/m) Im(conj(psi) dpsi/dx) at each detector (spectral
    interpolation, integrated over the other axes), psi and dpsi/dx at a 1D detector,
    and <psi0|psi>."""
    from wavesweep.observables import spectral_derivative
    psi = np.asarray(psi, dtype=complex)
    dv = grid.cell_volume
    dens = np.abs(psi) ** 2
    norm = dens.sum() * dv
    x = grid.coordinate(0)
    xm = np.sum(dens * x) * dv / norm
    out = {"norm": norm, "x_mean": xm, "x_std": np.sqrt(np.sum(dens * (x - xm) ** 2) * dv / norm),
           "p_mean": np.sum(np.conj(psi) * spectral_derivative(psi, grid.axes[0], 0)).imag * dv / norm}
    phi = transform(psi, grid)
    kin = np.sum(grid.kinetic_energy(mass) * np.abs(phi) ** 2) * grid.parseval_factor * dv
    out["energy"] = (kin + np.sum(potential * dens) * dv) / norm
    flux, amp, slope = [], [], []
    for d in detectors:
        value, deriv = grid.axes[d.axis].interpolation_rows(d.position)
        others = [i for i in range(grid.ndim) if i != d.axis]
        weight = np.prod([grid.axes[i].parseval_factor() * grid.axes[i].dx for i in others])
        a = np.tensordot(value, phi, axes=([0], [d.axis]))
        b = np.tensordot(deriv, phi, axes=([0], [d.axis]))
        flux.append(np.sum(np.conj(a) * b).imag * weight / mass)
        amp.append(complex(a) if a.ndim == 0 else complex("nan"))
        slope.append(complex(b) if b.ndim == 0 else complex("nan"))
    out["flux"] = np.array(flux)
    if grid.ndim == 1:
        out["detector_psi"] = np.array(amp)
        out["detector_dpsi"] = np.array(slope)
    if psi0 is not None:
        c = np.vdot(psi0, psi) * dv
        out["autocorrelation_real"], out["autocorrelation_imag"] = c.real, c.imag
    return out
