"""Split-operator step cost against the FFT floor (see scripts/bench).

For each grid: the median time of a bare forward+inverse transform pair, of
a strang step without recording, of a strang step with the recorded
observables sampled every 10 steps, and of a plain numpy split-operator loop
(numpy.fft, new arrays per operation) -- all measured in one run, reported as
ratios, because the machine is shared and absolute times are noise.
"""
from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

from wavesweep.jobfile import job_from_dict
from wavesweep.simulation import Setup

GRIDS = {
    "1D 4096": {"x": {"min": -200.0, "max": 200.0, "points": 4096}},
    "2D 512^2": {"x": {"min": -50.0, "max": 50.0, "points": 512}, "y": {"min": -50.0, "max": 50.0, "points": 512}},
    "2D 1024^2": {"x": {"min": -50.0, "max": 50.0, "points": 1024}, "y": {"min": -50.0, "max": 50.0, "points": 1024}},
    "3D 128^3": {a: {"min": -20.0, "max": 20.0, "points": 128} for a in "xyz"},
}


def job_for(grid, precision="double"):
    ndim = len(grid)
    return job_from_dict({
        "grid": {**grid, "boundary": "periodic"},
        "potential": [{"kind": "harmonic", "omega": 0.05}],
        "packet": {"center": [-5.0] * ndim, "width": [2.0] * ndim, "momentum": [1.0] + [0.0] * (ndim - 1)},
        "evolve": {"dt": 0.01, "duration": 1.0, "precision": precision},
        "record": {"every": 0.1},
        "detector": [{"name": "a", "x": 5.0}, {"name": "b", "x": -8.0}],
    })


def median_time(fn, repeats, inner):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        for _ in range(inner):
            fn()
        times.append((time.perf_counter() - t0) / inner)
    return statistics.median(times)


def numpy_loop(setup):
    """The textbook loop: numpy.fft and fresh arrays for every operation."""
    v = setup.hamiltonian.static_potential
    half = np.exp(-0.5j * v * setup.dt)
    kin = np.exp(-1j * setup.hamiltonian.kinetic * setup.dt)
    psi = setup.psi0.copy()

    def step():
        nonlocal psi
        psi = half * psi
        psi = np.fft.ifftn(kin * np.fft.fftn(psi))
        psi = half * psi
    return step


def bench(name, grid, repeats, backend):
    setup = Setup(job_for(grid))
    setup.fft_backend = backend
    prop = setup.make_propagator()
    tr = prop.transform
    buf = tr.forward(setup.psi0.astype(setup.dtype))
    buf = tr.backward(buf)
    inner = max(1, int(2e6 / setup.grid.size))

    def pair():
        tr.backward(tr.forward(buf))

    psi = setup.psi0.astype(setup.dtype)
    psi = prop.step(psi, 2)
    holder = {"psi": psi}

    def step10():
        holder["psi"] = prop.step(holder["psi"], 10)

    obs = setup.make_observer()

    def step10_recorded():
        holder["psi"] = prop.step(holder["psi"], 10)
        obs.measure(holder["psi"], setup.hamiltonian.static_potential)

    plain = numpy_loop(setup)
    plain()
    t_pair = median_time(pair, repeats, inner)
    t_step = median_time(step10, repeats, max(1, inner // 10)) / 10
    t_rec = median_time(step10_recorded, repeats, max(1, inner // 10)) / 10
    t_plain = median_time(plain, repeats, inner)
    print(f"{name:<10} {tr.name:<7} {t_step / t_pair:8.2f} {t_rec / t_pair:10.2f} "
          f"{t_plain / t_step:10.2f}   ({tr.threads} thread(s))", flush=True)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--quick", action="store_true", help="1D and 2D 512^2 only, 3 repeats")
    ap.add_argument("--backend", default="auto")
    args = ap.parse_args()
    grids = dict(list(GRIDS.items())[:2]) if args.quick else GRIDS
    repeats = 3 if args.quick else args.repeats
    print("medians over", repeats, "repeats; ratios only (shared machine)")
    print(f"{'grid':<10} {'fft':<7} {'step/pair':>8} {'+record/10':>10} {'numpy/step':>10}")
    for name, grid in grids.items():
        bench(name, grid, repeats, args.backend)


if __name__ == "__main__":
    main()
