"""Split-operator step cost against the FFT floor (see scripts/bench).

For each grid, in double and single precision: a strang step without
recording and with the observables sampled every 10 steps, each against the
bare forward+inverse pair of an identical transform timed before and after
it; a plain numpy split-operator loop (numpy.fft, new arrays per operation)
against the step; the peak memory of a whole run against the bytes of psi;
single against double.  Then a whole in-process run per step against the
pair and a 10-step run's fixed cost, the throughput of a batched study
against its runs one by one, and the start-up of a second process
(``--study``: a 64-run sweep through submit and work against its floor).  Ratios, medians over
rounds: the machine is shared and absolute times are noise (the start-up is
the exception: its target is absolute).
"""
from __future__ import annotations

import argparse
import statistics
import time
from pathlib import Path

import numpy as np

from wavesweep.job import job_from_dict
from wavesweep.setup import Setup

GRIDS = {
    "1D 4096": {"x": {"min": -200.0, "max": 200.0, "points": 4096}},
    "2D 512^2": {"x": {"min": -50.0, "max": 50.0, "points": 512}, "y": {"min": -50.0, "max": 50.0, "points": 512}},
    "2D 1024^2": {"x": {"min": -50.0, "max": 50.0, "points": 1024}, "y": {"min": -50.0, "max": 50.0, "points": 1024}},
    "3D 128^3": {a: {"min": -20.0, "max": 20.0, "points": 128} for a in "xyz"},
}


def job_for(grid, precision="double", duration=1.0, momentum=1.0):
    ndim = len(grid)
    return job_from_dict({
        "grid": {**grid, "boundary": "periodic"},
        "potential": [{"kind": "harmonic", "omega": 0.05}],
        "packet": {"center": [-5.0] * ndim, "width": [2.0] * ndim, "momentum": [momentum] + [0.0] * (ndim - 1)},
        "evolve": {"dt": 0.01, "duration": duration, "precision": precision},
        "record": {"every": 0.1},
        "detector": [{"name": "a", "x": 5.0}, {"name": "b", "x": -8.0}],
    })


def timed(fn, inner):
    t0 = time.perf_counter()
    for _ in range(inner):
        fn()
    return (time.perf_counter() - t0) / inner


def numpy_loop(setup):
    """The textbook loop: numpy.fft and fresh arrays for every operation."""
    v = setup.hamiltonian.static_potential
    half = np.exp(-0.5j * v * setup.dt).astype(setup.dtype)
    kin = np.exp(-1j * setup.hamiltonian.kinetic * setup.dt).astype(setup.dtype)
    psi = setup.psi0.astype(setup.dtype)

    def step():
        nonlocal psi
        psi = half * psi
        psi = np.fft.ifftn(kin * np.fft.fftn(psi))
        psi = half * psi
    return step


_PEAK_RUN = """
import sys, tracemalloc, json
sys.path.insert(0, sys.argv[3])
from bench import GRIDS, job_for
import wavesweep.run, numpy as np
tracemalloc.start()
from wavesweep.run import Simulation
job = job_for(GRIDS[sys.argv[1]], sys.argv[2], duration=0.2)
sim = Simulation(job)
import tempfile
with tempfile.TemporaryDirectory() as tmp:
    sim.run(tmp, progress=False)
print(json.dumps({"peak": tracemalloc.get_traced_memory()[1],
                  "psi": int(np.prod(sim.setup.grid.shape)) * np.dtype(sim.setup.dtype).itemsize}))
"""


def peak_memory(name, precision):
    """Peak of numpy and Python allocations (tracemalloc) of a whole short
    run -- set-up, propagation with recording, the result file -- in a fresh
    process, in units of the bytes of psi."""
    import json
    import os
    import subprocess
    import sys
    out = subprocess.run([sys.executable, "-c", _PEAK_RUN, name, precision, os.path.dirname(__file__)],
                         capture_output=True, text=True, check=True)
    r = json.loads(out.stdout.strip().splitlines()[-1])
    return r["peak"] / r["psi"]


def bench(name, grid, repeats, backend, precision, memory=True):
    """One line: step / pair, recorded step / pair, numpy loop / step and
    peak memory / psi, each ratio the median over ``repeats`` rounds in
    which the pair and the steps are timed one after the other."""
    setup = Setup(job_for(grid, precision))
    setup.fft_backend = backend
    prop = setup.make_propagator()
    tr = prop.transform
    # the floor: an identical transform of its own (psi lives in the
    # propagator's buffer), bare forward + inverse without the 1/N pass;
    # zeros stay zeros (repeated unscaled pairs would overflow)
    from wavesweep.fft import make_transform
    floor = make_transform(setup.grid, tr.name, setup.dtype, tr.threads)
    buf = floor.forward(np.zeros(setup.grid.shape, setup.dtype))
    inner = max(2, int(4e6 / setup.grid.size))

    def pair():
        floor.backward(floor.forward(buf), scaled=False)

    holder = {"psi": prop.step(setup.psi0.astype(setup.dtype), 2)}
    obs = setup.make_observer()

    def step10():
        holder["psi"] = prop.step(holder["psi"], 10)

    def step10_recorded():
        holder["psi"] = prop.step(holder["psi"], 10)
        obs.measure(holder["psi"], setup.hamiltonian.static_potential)

    plain = numpy_loop(setup)
    plain()
    step10_recorded()
    ratios = {"step": [], "rec": [], "plain": []}
    n_pair, n_step = inner, max(1, inner // 10)
    for _ in range(repeats):
        # each step timing between two pair timings: the ratio to their mean
        p1 = timed(pair, n_pair)
        t_step = timed(step10, n_step) / 10
        p2 = timed(pair, n_pair)
        t_rec = timed(step10_recorded, n_step) / 10
        p3 = timed(pair, n_pair)
        ratios["step"].append(2 * t_step / (p1 + p2))
        ratios["rec"].append(2 * t_rec / (p2 + p3))
    for _ in range(repeats):   # the numpy loop churns memory: timed apart
        s1 = timed(step10, n_step) / 10
        t_plain = timed(plain, max(1, inner // 4))
        s2 = timed(step10, n_step) / 10
        ratios["plain"].append(2 * t_plain / (s1 + s2))
    med = {k: statistics.median(v) for k, v in ratios.items()}
    mem = f"{peak_memory(name, precision):8.1f}" if memory else f"{'-':>8}"
    print(f"{name:<10} {precision:<6} {tr.name:<7} {med['step']:8.2f} {med['rec']:10.2f} "
          f"{med['plain']:10.2f} {mem}   ({tr.threads} thread(s), "
          f"{'threaded' if prop._kernels.threaded else 'serial'} kernels)", flush=True)
    return med


def _pair_timer(setup):
    """``pair()``: the bare forward + inverse FFT of the run's backend,
    precision and threads on a transform of its own (zeros: repeated
    unscaled pairs would overflow), and a repeat count of ~4e6 points."""
    from wavesweep.fft import default_threads, make_transform
    floor = make_transform(setup.grid, setup.fft_backend, setup.dtype, default_threads(setup.grid.size))
    buf = floor.forward(np.zeros(setup.grid.shape, setup.dtype))

    def pair():
        floor.backward(floor.forward(buf), scaled=False)
    pair()
    return pair, max(2, int(4e6 / setup.grid.size)), floor


def bench_whole_run(repeats: int):
    """A whole in-process ``Simulation.run`` (set-up, propagation, observables
    every 10 steps, snapshots, the result file) of 1D 4096 points, 2000 steps,
    in a warm process (a run of the same grid made its plans before), per
    step against the bare FFT pair timed before and after it; double and
    single, medians over rounds."""
    import tempfile

    from wavesweep.run import Simulation

    grid = GRIDS["1D 4096"]
    with tempfile.TemporaryDirectory() as tmp:
        line = []
        for precision in ("double", "single"):
            job = job_for(grid, precision, duration=20.0)
            sim = Simulation(job)
            sim.run(tmp, progress=False)                 # warm: plans, kernels, imports
            pair, inner, floor = _pair_timer(sim.setup)
            steps = sim.setup.total_steps
            ratios, per_step = [], []
            for _ in range(repeats):
                p1 = timed(pair, inner)
                t0 = time.perf_counter()
                Simulation(job).run(tmp, progress=False)
                t_run = (time.perf_counter() - t0) / steps
                p2 = timed(pair, inner)
                ratios.append(2 * t_run / (p1 + p2))
                per_step.append(t_run)
            # the marginal cost of a step in a whole run (samples and snapshots included, the run's fixed
            # cost not): the same job 10x longer, the difference of the two runs over the steps added
            long_job = job_for(grid, precision, duration=200.0)
            Simulation(long_job).run(tmp, progress=False)
            slopes = []
            for _ in range(max(1, repeats // 2)):
                p1 = timed(pair, inner)
                t0 = time.perf_counter()
                Simulation(job).run(tmp, progress=False)
                t1 = time.perf_counter()
                Simulation(long_job).run(tmp, progress=False)
                t2 = time.perf_counter()
                p2 = timed(pair, inner)
                slope = ((t2 - t1) - (t1 - t0)) / (9 * steps)
                slopes.append(2 * slope / (p1 + p2))
            # one sample alone: the observer's values (its transform and passes), and with its record
            # (units, health, the buffered write) as the run makes it, per bare pair
            setup = sim.setup
            prop, obs = setup.make_propagator(), setup.make_observer()
            psi = prop.step(prop.load(setup.psi0), 10)
            book = sim.begin(Path(tmp) / "sample-bench.nc")
            values = setup.measure(obs, psi, prop.t)

            def record(values=values, book=book, psi=psi, prop=prop, sim=sim):
                sim.record_sample(book, dict(values), prop.t, prop.absorbed, psi, 10)
            samples, records, bounds = [], [], []
            holder = {"psi": psi}

            def ten_and_a_sample(holder=holder, prop=prop, obs=obs, setup=setup):
                holder["psi"] = prop.step(holder["psi"], 10)
                setup.measure(obs, holder["psi"], prop.t)
            for _ in range(repeats):
                p1 = timed(pair, inner)
                t_sample = timed(lambda: setup.measure(obs, psi, prop.t), 200)
                t_record = timed(record, 200)
                t_bound = timed(ten_and_a_sample, 100) / 10
                p2 = timed(pair, inner)
                samples.append(2 * t_sample / (p1 + p2))
                records.append(2 * t_record / (p1 + p2))
                bounds.append(2 * t_bound / (p1 + p2))
            book.writer.abort()
            line.append(f"{precision} {statistics.median(ratios):.2f}x ({statistics.median(per_step) * 1e6:.1f} us), "
                        f"{statistics.median(slopes):.2f}x a step added, a sample {statistics.median(samples):.2f}x "
                        f"(+ its record {statistics.median(records):.2f}x), steps and samples alone "
                        f"{statistics.median(bounds):.2f}x")
        print(f"whole run, 1D 4096, observables every 10 steps, a snapshot every 20, {steps} steps, in-process "
              f"and warm ({floor.name}, {floor.threads} thread(s)), per step / bare FFT pair: {'; '.join(line)} "
              f"(medians over {repeats} rounds; 'a step added': the run 10x longer, its extra time over its extra "
              "steps, the fixed cost left out, and its frames too: both runs record 101; 'a sample': the "
              "observer's values of one sample per pair, 'its record' the units, health and buffered write of "
              "its values; 'steps and samples alone': 10 steps and a sample per 10 steps, no record, no "
              "run loop: what this design's whole run can approach)", flush=True)


def bench_fixed_cost(repeats: int):
    """What a 10-step 1D 4096 run (two samples, two snapshots, the result
    file) costs beyond its 10 steps in a warm process (one that ran a job
    of the grid before), in milliseconds: an absolute time, because the
    target is one.  Each round runs a job of another packet momentum (what
    a sweep's next run is: nothing of the job's own can be reused); the
    10 steps are timed on their own, medians over rounds."""
    import tempfile

    from wavesweep.run import Simulation

    grid = GRIDS["1D 4096"]
    with tempfile.TemporaryDirectory() as tmp:
        Simulation(job_for(grid, duration=0.1, momentum=0.5)).run(tmp, progress=False)   # the warm worker's first
        runs, steps10 = [], []
        for r in range(repeats):
            job = job_for(grid, duration=0.1, momentum=0.6 + 0.01 * r)
            t0 = time.perf_counter()
            sim = Simulation(job)
            sim.run(tmp, progress=False)
            runs.append(time.perf_counter() - t0)
            prop = sim.setup.make_propagator()
            psi = prop.load(sim.setup.psi0)
            steps10.append(timed(lambda: prop.step(psi, 10), 20))
    run, ten = statistics.median(runs), statistics.median(steps10)
    print(f"fixed cost of a 10-step 1D 4096 run in a warm process: {(run - ten) * 1e3:.1f} ms beyond its 10 steps "
          f"(whole run {run * 1e3:.1f} ms, 10 steps {ten * 1e3:.2f} ms; medians over {repeats} runs; target 20 ms)",
          flush=True)




def bench_study(repeats: int, workers: int = 2):
    """A 64-run 1D sweep (2048 points, 5000 steps each, observables every 25
    steps) through the command line as a user runs it: ``wavesweep submit``
    then ``wavesweep work --workers 2`` on a fresh queue folder, timed from
    the start of ``work`` to its exit (worker start-up, claims, set-ups,
    result files); against the floor rate, every step of every run at the
    cost of a bare FFT pair on one core per worker (the pair of the runs'
    backend, precision and threads, timed in this process before and after).
    Runs per minute, the ratio the median over rounds."""
    import os
    import subprocess
    import sys
    import tempfile
    from pathlib import Path

    import tomli_w

    from wavesweep.setup import Setup

    table = {k: v for k, v in STUDY_JOB.items() if k != "sweep"}
    setup = Setup(job_from_dict(table))
    pair, inner, floor = _pair_timer(setup)
    steps, runs = setup.total_steps, STUDY_JOB["sweep"]["packet.momentum"]["num"]
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(p for p in (os.path.join(os.path.dirname(__file__), "..", "src"),
                                                                      os.environ.get("PYTHONPATH")) if p)}
    rates, ratios, submits, walls, empties = [], [], [], [], []
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        (tmp / "study.toml").write_text(tomli_w.dumps(STUDY_JOB))
        for rep in range(repeats):
            root = tmp / f"root{rep}"
            p1 = statistics.median(timed(pair, inner) for _ in range(5))
            t0 = time.perf_counter()
            subprocess.run([sys.executable, "-m", "wavesweep", "submit", str(tmp / "study.toml"), "--root", str(root)],
                           check=True, capture_output=True, env=env, cwd=tmp)
            t1 = time.perf_counter()
            subprocess.run([sys.executable, "-m", "wavesweep", "work", "--root", str(root), "--workers", str(workers)],
                           check=True, capture_output=True, env=env, cwd=tmp)
            wall = time.perf_counter() - t1
            p2 = statistics.median(timed(pair, inner) for _ in range(5))
            t2 = time.perf_counter()   # the same command again on the drained queue: its fixed start-up
            subprocess.run([sys.executable, "-m", "wavesweep", "work", "--root", str(root),
                            "--workers", str(workers)], check=True, capture_output=True, env=env, cwd=tmp)
            empties.append(time.perf_counter() - t2)
            walls.append(wall)
            done = len(list(root.rglob("*.nc")))
            if done < runs:
                raise RuntimeError(f"the study bench finished {done} of {runs} runs")
            floor_wall = runs * steps * 0.5 * (p1 + p2) / workers
            rates.append(60 * runs / wall)
            ratios.append(floor_wall / wall)
            submits.append(t1 - t0)
    ratio = statistics.median(ratios)
    print(f"study, {runs} runs x 2048 points x {steps} steps (submit, then work --workers {workers}): "
          f"{statistics.median(rates):.0f} runs/min against a floor of {statistics.median(rates) / ratio:.0f} "
          f"({steps} bare FFT pairs a run, {workers} cores; {floor.name}, {floor.threads} thread(s)): "
          f"{ratio:.2f}x the floor rate (target 0.5; median over {repeats}; ratios "
          f"{', '.join(f'{r:.2f}' for r in ratios)}); work took {statistics.median(walls):.2f} s, "
          f"{statistics.median(empties):.2f} s again on the drained queue (its start-up: without it "
          f"{statistics.median(r * w / max(w - e, 1e-9) for r, w, e in zip(ratios, walls, empties)):.2f}x); "
          f"submit {statistics.median(submits):.2f} s apart", flush=True)


BATCH_JOB = {
    "title": "batch bench",
    "grid": {"x": {"min": -150.0, "max": 150.0, "points": 2048}},
    "potential": [{"kind": "barrier", "height": 0.5, "width": 1.0}],
    "packet": {"center": -40.0, "width": 6.0, "momentum": 1.0},
    "absorber": {"kind": "cap", "thickness": 20.0, "strength": 0.02, "power": 2.0},
    "evolve": {"dt": 0.02, "duration": 100.0},
    "record": {"every": 0.5, "snapshot_every": 10.0},
    "detector": [{"name": "beyond", "x": 30.0}, {"name": "before", "x": -60.0}],
}

# --study: 64 of the batch bench's runs as a sweep (5000 steps: the packets reach the detectors and the
# layers, as a study's do; with 300-step runs the 20 ms a run's file and set-up cost was 6x its floor: 0.04x)
STUDY_JOB = {**BATCH_JOB, "title": "study bench",
             "sweep": {"packet.momentum": {"start": 0.7, "stop": 1.5, "num": 64}}}

# the batched study on two coupled surfaces (--surfaces-batch): crossing curves, a
# coupling where they cross, packets on either surface; a CAP of given strength
SURFACES_BATCH_JOB = {
    **{k: v for k, v in BATCH_JOB.items() if k != "potential"},
    "title": "surfaces batch bench",
    "surface": [{"name": "A", "potential": [{"kind": "expression", "expression": "0.02 * tanh(x / 5)"}]},
                {"name": "B", "potential": [{"kind": "expression", "expression": "0.01 - 0.02 * tanh(x / 5)"}]}],
    "coupling": [{"surfaces": ["A", "B"], "potential": [{"kind": "expression", "expression": "0.01 * exp(-x*x / 10)"}]}],
    "packet": {"center": -40.0, "width": 6.0, "momentum": 1.0, "surface": "A"},
    "evolve": {"dt": 0.02, "duration": 50.0},
}

_BATCH_RUN = """
import sys, json, time, copy, tempfile
sys.path.insert(0, sys.argv[1])
from bench import BATCH_JOB, SURFACES_BATCH_JOB
from wavesweep.job import job_from_dict
from wavesweep.run import Simulation
from wavesweep.batched import BatchedRun
runs, mode = int(sys.argv[2]), sys.argv[3]
BATCH_JOB = SURFACES_BATCH_JOB if sys.argv[4] == "coupled" else BATCH_JOB
jobs = []
for i in range(runs):
    t = copy.deepcopy(BATCH_JOB)
    t["packet"]["momentum"] = 0.7 + 0.8 * i / max(runs - 1, 1)
    if "surface" in t:   # members on either surface
        t["packet"]["surface"] = "AB"[i % 2]
    jobs.append(job_from_dict(t))
with tempfile.TemporaryDirectory() as tmp:
    # warm: numba's cache and FFTW wisdom loaded, as in a worker's second run
    Simulation(job_from_dict({**copy.deepcopy(BATCH_JOB), "evolve": {"dt": 0.02, "duration": 1.0}})).run(tmp, progress=False)
    BatchedRun([job_from_dict({**copy.deepcopy(BATCH_JOB), "evolve": {"dt": 0.02, "duration": 1.0}})] * 2).run(
        [tmp + "/w1.nc", tmp + "/w2.nc"])
    t0 = time.perf_counter()
    if mode == "solo":
        for j in jobs:
            Simulation(j).run(tmp, progress=False)
    else:
        BatchedRun(jobs).run([f"{tmp}/{j.name}-{j.run_id}.nc" for j in jobs])
    print(json.dumps({"seconds": time.perf_counter() - t0}))
"""


def bench_batch(runs: int, repeats: int, coupled: bool = False):
    """Throughput of an energy sweep of ``runs`` runs x 2048 points run as
    one batch against the same runs one after the other in one process
    (whole runs: set-up, propagation, recording, result files), each mode
    in a fresh process per round, rounds alternating; ``coupled``: runs on
    two coupled surfaces (SURFACES_BATCH_JOB)."""
    import json
    import os
    import subprocess
    import sys
    ratios = []
    for _ in range(repeats):
        t = {}
        for mode in ("solo", "batch"):
            out = subprocess.run([sys.executable, "-c", _BATCH_RUN, os.path.dirname(__file__), str(runs), mode,
                                  "coupled" if coupled else "single"], capture_output=True, text=True, check=True)
            t[mode] = json.loads(out.stdout.strip().splitlines()[-1])["seconds"]
        ratios.append(t["solo"] / t["batch"])
    job = SURFACES_BATCH_JOB if coupled else BATCH_JOB
    print(f"batched study, {runs} runs x 2048 points{' x 2 coupled surfaces' if coupled else ''} "
          f"({job['evolve']['duration'] / job['evolve']['dt']:.0f}"
          f" steps each): {statistics.median(ratios):.2f}x the throughput of running them one by one "
          f"(median over {repeats} rounds; ratios {', '.join(f'{r:.2f}' for r in ratios)})")


_START = r"""
import sys, time
t0 = float(sys.argv[1])
from wavesweep.job import job_from_dict
from wavesweep.setup import Setup
job = job_from_dict({"grid": {"x": {"min": -60.0, "max": 60.0, "points": 2048}},
    "potential": [{"kind": "barrier", "height": 0.5, "width": 1.0}],
    "packet": {"center": -20.0, "width": 3.0, "momentum": 1.0},
    "absorber": {"kind": "cap", "thickness": 10.0},
    "evolve": {"dt": 0.02, "duration": 1.0}, "record": {"every": 0.1}, "detector": [{"name": "d", "x": 10.0}]})
s = Setup(job)
p, o = s.make_propagator(), s.make_observer()
psi = p.step(p.load(s.psi0), 1)
o.measure(psi, s.hamiltonian.static_potential)
print(time.time() - t0)
"""


def bench_startup(repeats: int):
    """Seconds from a fresh process's start to its first step and sample of
    a job another process ran before (numba's disk cache, FFTW wisdom and
    the CAP tuning cache warm): an absolute time, because the target is one."""
    import subprocess
    import sys
    times = []
    for i in range(repeats + 1):
        out = subprocess.run([sys.executable, "-c", _START, str(time.time())], capture_output=True, text=True,
                             check=True)
        if i:   # the first process fills the caches
            times.append(float(out.stdout.strip().splitlines()[-1]))
    print(f"start-up of a second process to its first step (imports, set-up, cached kernels): median "
          f"{statistics.median(times):.2f} s over {repeats}")


def single_vs_double(grid, repeats, backend):
    """Step time (with recording every 10 steps) of double over single,
    median over rounds that time one after the other."""
    runs = {}
    for precision in ("double", "single"):
        setup = Setup(job_for(grid, precision))
        setup.fft_backend = backend
        prop, obs = setup.make_propagator(), setup.make_observer()
        holder = {"psi": prop.step(setup.psi0.astype(setup.dtype), 2)}

        def rec(prop=prop, obs=obs, holder=holder, setup=setup):
            holder["psi"] = prop.step(holder["psi"], 10)
            obs.measure(holder["psi"], setup.hamiltonian.static_potential)
        rec()
        runs[precision] = rec
    inner = max(1, int(4e5 / int(np.prod([a["points"] for a in grid.values()]))))
    ratios = [timed(runs["double"], inner) / timed(runs["single"], inner) for _ in range(repeats)]
    return statistics.median(ratios)


QUEUE_JOB = {
    "title": "queue bench",
    "grid": {"x": {"min": -80.0, "max": 80.0, "points": 4096}},
    "potential": [{"kind": "harmonic", "omega": 0.05}],
    "packet": {"center": -5.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.005, "duration": 400.0},
    "record": {"every": 2.0},
}


def bench_queue(runs: int, repeats: int):
    """Queue overhead per run (claim + 10 heartbeats + complete, median over
    dummy runs) and the throughput of 2 workers against 1 on CPU-bound runs."""
    import copy
    import tempfile
    from pathlib import Path

    import tomli_w

    from wavesweep.studies.api import work
    from wavesweep.studies.queue import Queue
    from wavesweep.study import expand_study

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        table = copy.deepcopy(QUEUE_JOB)
        table["evolve"]["duration"] = 0.01
        table["record"] = {"every": 0.01}
        table["sweep"] = {"packet.width": {"start": 1.0, "stop": 3.0, "num": 200}}
        q = Queue(tmp / "overhead")
        q.submit(expand_study(table))
        costs = []
        while (c := (time.perf_counter(), q.claim("bench"))) and c[1] is not None:
            t0, claim = c
            for i in range(10):
                q.heartbeat(claim["study"], claim["run_id"], "bench", i, 10, 1.0)
            q.complete(claim["study"], claim["run_id"], "bench", 0.0)
            costs.append(time.perf_counter() - t0)
        print(f"queue overhead per run (claim + 10 heartbeats + complete): median "
              f"{statistics.median(costs) * 1e3:.2f} ms over {len(costs)} runs")
        # Fixed cost of a drain: spawning workers, imports, numba cache load.
        starts = []
        for rep in range(repeats):
            empty = tmp / f"empty{rep}"
            Queue(empty).close()
            t0 = time.perf_counter()
            work(empty, workers=2)
            starts.append(time.perf_counter() - t0)
        print(f"worker start-up (2 workers, empty queue): median {statistics.median(starts):.2f} s")
        walls = {1: [], 2: []}
        for rep in range(repeats):
            for workers in (1, 2):
                table = copy.deepcopy(QUEUE_JOB)
                table["sweep"] = {"packet.momentum": {"start": 0.5, "stop": 1.5, "num": runs}}
                root = tmp / f"w{workers}-{rep}"
                path = tmp / f"study{workers}{rep}.toml"
                path.write_text(tomli_w.dumps(table))
                from wavesweep.studies.api import submit
                submit(path, root)
                t0 = time.perf_counter()
                work(root, workers=workers, checkpoint_seconds=3600.0)
                walls[workers].append(time.perf_counter() - t0)
        one, two = statistics.median(walls[1]), statistics.median(walls[2])
        print(f"throughput, {runs} CPU-bound runs (1D 4096, 80000 steps): 2 workers vs 1 = "
              f"{one / two:.2f}x (medians over {repeats})")


MOVIE_RUNS = {
    "1D 4096": ({"x": {"min": -200.0, "max": 200.0, "points": 4096}}, [-60.0], [3.0], [2.0], 0.02, 200),
    "2D 512^2": ({"x": {"min": -50.0, "max": 50.0, "points": 512}, "y": {"min": -50.0, "max": 50.0, "points": 512}},
                 [-20.0, 0.0], [4.0, 4.0], [1.5, 0.0], 0.02, 500),
}

_PEAK = """
import resource, sys, tracemalloc
from wavesweep.viz.movie import render_movie
import matplotlib.pyplot, netCDF4, imageio_ffmpeg
every = int(sys.argv[3])
tracemalloc.start()
if every:
    render_movie(sys.argv[1], sys.argv[2], every=every)
print(tracemalloc.get_traced_memory()[1], resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
"""


def bench_movie(repeats: int):
    """Frames rendered per second (1D 4096, 2D 512^2, 100 dpi, 960x540),
    and the peak memory of rendering a 500-frame 2D movie against 50 frames
    of the same run (independent of the number of frames when streamed)."""
    import subprocess
    import sys
    import tempfile
    from pathlib import Path

    from wavesweep.run import Simulation
    from wavesweep.viz.movie import MovieOptions, render_frames, render_movie
    from wavesweep.viz.scene import read_scene

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        for name, (grid, x0, w, p0, dt, frames) in MOVIE_RUNS.items():
            job = job_from_dict({
                "title": f"movie bench {name}", "grid": {**grid, "boundary": "periodic"},
                "potential": [{"kind": "gaussian", "height": 0.5, "width": 2.0}],
                "packet": {"kind": "gaussian", "center": x0, "width": w, "momentum": p0},
                "evolve": {"dt": dt, "duration": dt * (frames - 1)},
                "absorber": {"kind": "cap", "thickness": 10.0},
                "record": {"every": dt, "snapshot_every": dt, "final_state": False},
                "detector": [{"name": "d", "x": 10.0}],
            })
            path = Simulation(job).run(tmp, progress=False)
            scene = read_scene(path)
            render, full = [], []
            for rep in range(repeats):
                info = render_frames(scene, MovieOptions(), lambda rgb: None)
                render.append(info["frames"] / info["render_seconds"])
                full.append(render_movie(path, tmp / f"m{rep}.mp4")["frames_per_second"])
            print(f"{name:<10} {scene.n_snapshots} frames: rendered {statistics.median(render):.0f} frames/s, "
                  f"to H.264 incl. set-up and encoding {statistics.median(full):.0f} frames/s "
                  f"(medians over {repeats}, 100 dpi, 960x540)", flush=True)
            if name.startswith("2D"):
                peaks = {}
                for every in (0, 10, 1):
                    out = subprocess.run([sys.executable, "-c", _PEAK, str(path), str(tmp / "peak.mp4"), str(every)],
                                         capture_output=True, text=True, check=True)
                    traced, rss = out.stdout.split()[-2:]
                    peaks[every] = (int(traced) / 2**20, int(rss) / 1024)
                frame_mb = scene.coords["x"].size * scene.coords["y"].size * 8 / 2**20
                print(f"{name:<10} peak memory of rendering (numpy + Python allocations, tracemalloc): "
                      f"{peaks[1][0]:.1f} MiB for {scene.n_snapshots} frames, {peaks[10][0]:.1f} MiB for "
                      f"{len(range(0, scene.n_snapshots, 10))} (one float64 frame: {frame_mb:.1f} MiB); "
                      f"process peak {peaks[1][1]:.0f} / {peaks[10][1]:.0f} MiB, "
                      f"{peaks[0][1]:.0f} MiB after the imports alone")


COLLECT_JOB = {
    "title": "collect bench",
    "potential": [{"kind": "barrier", "height": 2.0, "width": 1.0, "smoothing": 0.5}],
    "packet": {"center": -20.0, "width": 3.0, "momentum": 3.0},
    "absorber": {"kind": "cap", "thickness": 15.0},
    "evolve": {"dt": 0.05, "duration": 10.0}, "record": {"every": 0.05, "snapshot_every": 0.1},
    "detector": [{"name": "before", "x": -8.0}, {"name": "after", "x": 8.0}]}


def bench_collect(repeats: int, small: int = 1024, large: int = 131072, runs: int = 3):
    """What collect pays per run (reading a result: its books, arrival
    statistics and transmission beyond each detector) at ``large`` grid
    points against ``small``, each run with 100 density snapshots, 200
    samples, two detectors and a CAP: the ratio says whether the cost grows
    with the grid (1 when it does not); the milliseconds per run are given
    beside it because the target (50 ms) is absolute."""
    import copy
    import tempfile
    from pathlib import Path

    from wavesweep.job import job_from_dict
    from wavesweep.run import Simulation
    from wavesweep.studies.collect import _read_result

    per_run = {}
    with tempfile.TemporaryDirectory() as tmp:
        for points in (small, large):
            files = []
            for i in range(runs):
                table = copy.deepcopy(COLLECT_JOB)
                table["grid"] = {"x": {"min": -60.0, "max": 60.0, "points": points}}
                table["packet"]["momentum"] += 0.1 * i
                files.append(Simulation(job_from_dict(table)).run(Path(tmp) / str(points), progress=False))
            _read_result(files[0])                          # imports and caches warm
            per_run[points] = [timed(lambda: [_read_result(f) for f in files], 1) / runs for _ in range(repeats)]
    ms = {n: 1e3 * statistics.median(v) for n, v in per_run.items()}
    ratios = [a / b for a, b in zip(per_run[large], per_run[small])]
    print(f"collect per run, {large} vs {small} points (100 snapshots, 2 detectors, CAP): "
          f"{statistics.median(ratios):.2f}x ({ms[large]:.0f} vs {ms[small]:.0f} ms per run; target <= 50 ms "
          f"whatever the grid), median over {repeats}")


def drop_table(height_um: float) -> dict:
    """A Rb-87 ground state of a 100 Hz trap released under gravity onto a
    light sheet ``height_um`` below, on a falling grid sized for the
    cloud's own spreading (12 of its final widths each side, plus the
    CAP), sampled every 10 us (the arrival spread is ~50 us)."""
    import math

    import scipy.constants as sc

    mass_u, omega = 86.909, 2 * math.pi * 100.0
    sigma0 = math.sqrt(sc.hbar / (2 * mass_u * sc.atomic_mass * omega)) * 1e6        # um
    t_fall = math.sqrt(2 * height_um * 1e-6 / sc.g) * 1e3                              # ms
    tau = 2 * mass_u * sc.atomic_mass * (sigma0 * 1e-6) ** 2 / sc.hbar * 1e3           # ms
    sigma = sigma0 * math.sqrt(1 + ((t_fall + 0.5) / tau) ** 2)
    half = 12 * sigma + 8.0
    dx = 0.39                                                                          # um: k_max 8/um
    points = 2 ** math.ceil(math.log2(2 * half / dx)) - 1                              # box: points + 1 = 2^n
    duration = round(t_fall + 0.5, 2)
    return {"title": f"drop-{height_um:g}um", "units": {"length": "um", "time": "ms", "mass": "u"},
            "particle": {"mass": mass_u},
            "grid": {"x": {"min": -half, "max": half, "points": points}, "boundary": "box", "frame": "free_fall"},
            "potential": [{"kind": "gravity"}],
            "packet": {"kind": "ground_state", "potential": [{"kind": "harmonic", "omega": f"{omega} rad/s"}]},
            "evolve": {"dt": 0.01, "duration": duration},
            "record": {"every": 0.01, "snapshot_every": duration},
            "absorber": {"kind": "cap", "thickness": 8.0},
            "detector": [{"name": "sheet", "x": -height_um}]}


def bench_drop(repeats: int):
    """A released cloud's drop to a light sheet 10 um, 1 mm and 10 cm below
    on a falling grid, whole runs (set-up with the imaginary-time ground
    state, the run, the arrival statistics) against the 10 um drop, medians
    over rounds; the 1 mm drop's seconds beside it (its target, <= 30 s on
    2 cores, is absolute)."""
    import tempfile

    from wavesweep.analysis import arrival_times
    from wavesweep.run import Simulation

    heights = (10.0, 1000.0, 100000.0)
    walls = {h: [] for h in heights}
    still = {h: [] for h in heights}
    shape = {}
    with tempfile.TemporaryDirectory() as tmp:
        for r in range(repeats):
            for h in heights:
                table = drop_table(h)
                shape[h] = (table["grid"]["x"]["points"], round(table["evolve"]["duration"] / 0.01))
                t0 = time.perf_counter()
                path = Simulation(job_from_dict(table)).run(f"{tmp}/{r}", progress=False)
                arrival_times(path)
                walls[h].append(time.perf_counter() - t0)
                # the same cloud expanding in place for the same time on the same grid (no fall, no sheet)
                table = {**table, "potential": [], "detector": [],
                         "grid": {k: v for k, v in table["grid"].items() if k != "frame"}}
                t0 = time.perf_counter()
                Simulation(job_from_dict(table)).run(f"{tmp}/{r}-still", progress=False)
                still[h].append(time.perf_counter() - t0)
    base = walls[heights[0]]
    print("drop onto a light sheet (Rb-87, 100 Hz trap ground state, falling grid), whole runs, median over "
          f"{repeats}: against the 10 um drop, and against the same cloud expanding in place for as long "
          "on the same grid (what the fall itself costs):")
    for h in heights:
        ratio = statistics.median([a / b for a, b in zip(walls[h], base)])
        fall = statistics.median([a / b for a, b in zip(walls[h], still[h])])
        points, steps = shape[h]
        print(f"  {h / 1000:8.3f} mm: {ratio:7.2f}x the 10 um drop, {fall:5.2f}x no fall  ({points} points, "
              f"{steps} steps; {statistics.median(walls[h]):.2f} s)")


SURFACES_JOB = {
    "title": "two surfaces bench",
    "grid": {"x": {"min": -200.0, "max": 200.0, "points": 4096}},
    "surface": [{"name": "A", "potential": [{"kind": "expression", "expression": "0.01 * tanh(x)"}]},
                {"name": "B", "potential": [{"kind": "expression", "expression": "-0.01 * tanh(x)"}]}],
    "coupling": [{"surfaces": ["A", "B"], "potential": [{"kind": "expression", "expression": "0.005 * exp(-x*x)"}]}],
    "packet": {"center": -50.0, "width": 3.0, "momentum": 1.0, "surface": "A"},
    "evolve": {"dt": 0.05, "duration": 10.0},
    "record": {"every": 1.0},
}


def bench_surfaces(repeats: int, backend: str = "auto"):
    """A two-surface Strang step (coupled, 4096 points) against one
    single-surface step of the same grid and against the bare FFT pair of
    its own transform (two members, unscaled), and the single step against
    its pair; each round times the three one after the other, medians over
    rounds of the ratios (issue 16's target: coupled / single <= 2.5)."""
    import copy

    from wavesweep.fft import make_transform
    from wavesweep.setup import CoupledSetup
    from wavesweep.surfaces import CoupledSplitOperator

    coupled = CoupledSetup(job_from_dict(copy.deepcopy(SURFACES_JOB)), fft=backend)
    single_table = {k: v for k, v in copy.deepcopy(SURFACES_JOB).items() if k not in ("surface", "coupling")}
    single_table["potential"] = SURFACES_JOB["surface"][0]["potential"]
    single_table["packet"] = {k: v for k, v in SURFACES_JOB["packet"].items() if k != "surface"}
    single = Setup(job_from_dict(single_table), fft=backend)
    # the coupled propagator on a transform of the backend asked for (make_propagator takes the best)
    p2 = CoupledSplitOperator(coupled.hamiltonian, coupled.dt, coupled.weights,
                              transform=make_transform(coupled.grid, backend, np.complex128, members=2))
    p1 = single.make_propagator()
    tr2, tr1 = p2.transform, p1.transform
    floors = {n: make_transform(coupled.grid, tr.name, np.complex128, tr.threads, members=n)
              for n, tr in ((2, tr2), (None, tr1))}
    zeros = {n: f.forward(np.zeros(f.shape, np.complex128)) for n, f in floors.items()}
    holder = {"two": p2.step(p2.load(coupled.psi0), 2), "one": p1.step(p1.load(single.psi0), 2)}

    def pair(n):
        return lambda: floors[n].backward(floors[n].forward(zeros[n]), scaled=False)

    def step(name, prop):
        def run():
            holder[name] = prop.step(holder[name], 10)
        return run

    inner = 50
    ratios = {"two/one": [], "two/pair2": [], "one/pair1": []}
    for _ in range(repeats):
        pair2 = timed(pair(2), 10 * inner)
        two = timed(step("two", p2), inner) / 10
        one = timed(step("one", p1), inner) / 10
        pair1 = timed(pair(None), 10 * inner)
        ratios["two/one"].append(two / one)
        ratios["two/pair2"].append(two / pair2)
        ratios["one/pair1"].append(one / pair1)
    med = {k: statistics.median(v) for k, v in ratios.items()}
    print(f"two coupled surfaces, strang, 4096 points ({tr2.name}, {tr2.threads} thread(s), "
          f"{'threaded' if p2._kernels.threaded else 'serial'} kernels), medians over {repeats} rounds:")
    print(f"  two-surface step / single-surface step: {med['two/one']:5.2f}x  (target <= 2.5)")
    print(f"  two-surface step / its FFT pair (2 members): {med['two/pair2']:5.2f}x;  "
          f"single step / its pair: {med['one/pair1']:5.2f}x")
    return med


def bench_adiabatic(repeats: int):
    """record.adiabatic's cost per sample on the two surfaces of
    SURFACES_JOB (4096 points): the populations from the cached basis (a
    static V) and the local basis itself (what a time-dependent V adds per
    sample), each against one two-surface Strang step; medians over rounds."""
    import copy

    from wavesweep.setup import CoupledSetup
    from wavesweep.surfaces import adiabatic_populations, local_eigenvectors

    s = CoupledSetup(job_from_dict({**copy.deepcopy(SURFACES_JOB), "record": {"every": 1.0, "adiabatic": True}}))
    prop = s.make_propagator()
    holder = {"psi": prop.step(prop.load(s.psi0), 2)}
    basis, v = s.adiabatic_basis(0.0), s.hamiltonian.matrix(None)

    def step():
        holder["psi"] = prop.step(holder["psi"], 10)

    inner = 50
    ratios = {"populations": [], "basis": []}
    for _ in range(repeats):
        one = timed(step, inner) / 10
        ratios["populations"].append(timed(lambda: adiabatic_populations(basis, holder["psi"], 1.0), 10 * inner) / one)
        ratios["basis"].append(timed(lambda: local_eigenvectors(v), inner) / one)
    med = {k: statistics.median(r) for k, r in ratios.items()}
    print(f"record.adiabatic, two surfaces, 4096 points, medians over {repeats} rounds, per sample:")
    print(f"  populations (cached basis, static V) / two-surface step: {med['populations']:5.2f}x")
    print(f"  local basis (made per sample when V depends on time) / two-surface step: {med['basis']:5.2f}x")
    return med


def bench_spectrum(repeats: int):
    """What the surface-flux spectrum adds to a 1D 4096-point run with a
    driving field and two detectors, each against one Strang step; medians
    over rounds.  Per sample it stores psi and dpsi/dx at the detectors (both
    already computed for the flux: only the copy is new) and advances the
    Volkov integrals (wavesweep.volkov) over the sample's steps (fourth-order
    Runge-Kutta on the step: three force evaluations per step)."""
    from wavesweep.observables import Observer
    from wavesweep.volkov import VolkovIntegrals, uniform_force_along

    grid = GRIDS["1D 4096"]
    table = {
        "grid": {**grid, "boundary": "periodic"},
        "particle": {"charge": -1.0},
        "potential": [{"kind": "soft_coulomb", "charge": 1.0, "softening": 1.41},
                      {"kind": "field", "amplitude": 0.05, "omega": 1.0, "envelope": "sin2", "duration": 100.0}],
        "packet": {"center": -5.0, "width": 2.0, "momentum": 1.0},
        "evolve": {"dt": 0.05, "duration": 1.0},
        "record": {"every": 0.05},
        "detector": [{"name": "a", "x": 50.0}, {"name": "b", "x": -50.0}],
    }
    s = Setup(job_from_dict(table))
    prop = s.make_propagator()
    holder = {"psi": prop.step(prop.load(s.psi0), 2)}
    observer = s.make_observer() if hasattr(s, "make_observer") else None
    force = uniform_force_along(s.terms)

    def step():
        holder["psi"] = prop.step(holder["psi"], 10)

    inner = 50
    ratios = {"volkov": [], "observer": []}
    for r in range(repeats):
        one = timed(step, inner) / 10
        vi = VolkovIntegrals(force, s.mass, s.dt)
        clock = {"t": 0.0}

        def advance():   # one step's share: the integrals advanced by dt
            clock["t"] += s.dt
            vi.at(clock["t"])

        ratios["volkov"].append(timed(advance, 10 * inner) / one)
        if observer is not None:
            v = s.hamiltonian.static_potential
            ratios["observer"].append(timed(lambda: observer.measure(holder["psi"], v), inner) / one)
    med = {k: statistics.median(r) for k, r in ratios.items() if r}
    print(f"surface-flux recording, 1D 4096 points, field + 2 detectors, medians over {repeats} rounds:")
    print(f"  Volkov integrals, per step / Strang step: {med['volkov']:6.3f}x")
    if "observer" in med:
        print(f"  a whole sample (moments, energy, detector psi, dpsi, flux) / step: {med['observer']:6.3f}x "
              "(psi and dpsi at the detectors were computed for the flux before; storing dpsi is new)")
def bench_screen(repeats: int, backend: str = "auto"):
    """A resolved screen's cost (issue 17's target: at most 10 % of a step
    at 1024^2): one sample measured with the detector resolved minus the
    same detector plain, and the sample's write (buffered rows, a flush
    every 256), each against one Strang step of the same run; also the
    whole sample (observer and write) with the resolved screen per step
    recorded every 10.  Medians over rounds; each round times the step
    between the others."""
    import copy
    import tempfile
    from pathlib import Path

    from wavesweep.run import Simulation

    grid = GRIDS["2D 1024^2"]
    table = {
        "grid": {**copy.deepcopy(grid), "boundary": "periodic"},
        "potential": [{"kind": "harmonic", "omega": 0.05}],
        "packet": {"center": [-5.0, 0.0], "width": [2.0, 2.0], "momentum": [1.0, 0.0]},
        "evolve": {"dt": 0.01, "duration": 1.0},
        "record": {"every": 0.1, "snapshot_every": 1.0},
        "detector": [{"name": "screen", "x": 5.0}],
    }
    plain_sim = Simulation(job_from_dict(copy.deepcopy(table)))
    lined = copy.deepcopy(table)
    lined["detector"][0]["spectrum"] = True   # a line recording psi and dpsi/dn for its spectrum
    line_sim = Simulation(job_from_dict(lined))
    table["detector"][0]["resolved"] = True
    screen_sim = Simulation(job_from_dict(table))
    for sim in (plain_sim, screen_sim, line_sim):
        sim.setup.fft_backend = backend
    setup = screen_sim.setup
    prop = setup.make_propagator()
    holder = {"psi": prop.step(setup.psi0.astype(setup.dtype), 2)}
    observers = {"plain": plain_sim.setup.make_observer(), "screen": setup.make_observer(),
                 "line": line_sim.setup.make_observer()}
    sims = {"plain": plain_sim, "screen": screen_sim, "line": line_sim}
    v = setup.hamiltonian.static_potential
    absorbed = np.zeros(0)

    def step():
        holder["psi"] = prop.step(holder["psi"], 1)

    with tempfile.TemporaryDirectory() as folder:
        books = {name: sim.begin(Path(folder) / f"{name}.nc") for name, sim in sims.items()}
        values = {name: obs.measure(holder["psi"], v) for name, obs in observers.items()}
        samples = {name: 0 for name in sims}

        def write(name):
            samples[name] += 1
            sims[name].observe(books[name], dict(values[name]), 0.01 * samples[name], absorbed)

        # the work the screen adds to the flux pass: its line (psi and dpsi/dn as transverse
        # coefficients) transformed back and multiplied, timed on its own (a difference of two
        # whole measurements drowns in the noise of a shared machine; printed beside it)
        ny = setup.grid.axes[1].points
        line = np.random.default_rng(1).standard_normal((2, 1, 1, ny)) + 0j
        obs = observers["screen"]
        ratios = {"profile": [], "measure": [], "write": [], "sample": [], "line_measure": [], "line_write": []}
        inner = 5
        for _ in range(repeats):
            one = timed(step, inner)
            m_plain = timed(lambda: observers["plain"].measure(holder["psi"], v), inner)
            m_screen = timed(lambda: obs.measure(holder["psi"], v), inner)
            profile = timed(lambda: obs._screen_profile(*obs._line_values(line[0], line[1], 0)), 100)
            w_plain = timed(lambda: write("plain"), 256)
            w_screen = timed(lambda: write("screen"), 256)
            m_line = timed(lambda: observers["line"].measure(holder["psi"], v), inner)
            w_line = timed(lambda: write("line"), 256)
            ratios["line_measure"].append((m_line - m_plain) / one)
            ratios["line_write"].append((w_line - w_plain) / one)
            one = 0.5 * (one + timed(step, inner))
            ratios["profile"].append(profile / one)
            ratios["measure"].append((m_screen - m_plain) / one)
            ratios["write"].append((w_screen - w_plain) / one)
            ratios["sample"].append((m_screen + w_screen) / one)
        for book in books.values():
            book.writer.abort()
    med = {k: statistics.median(r) for k, r in ratios.items()}
    print(f"resolved screen, 2D 1024^2, strang, double ({prop.transform.name}, {prop.transform.threads} thread(s)), "
          f"medians over {repeats} rounds, against one step:")
    print(f"  the screen's profile (its line transformed back, J along it), per sample:      {med['profile']:6.3f}x")
    print(f"  writing its row (1024 values; a flush every 256 samples), per sample:           {med['write']:6.3f}x")
    print(f"  a whole measurement resolved minus plain (noisy: two large timings), per sample: {med['measure']:6.3f}x")
    print(f"  the whole sample with the screen (all observables and the write), per sample:  {med['sample']:6.3f}x"
          f" (recorded every 10 steps: {med['sample'] / 10:.3f}x per step)")
    print(f"  a spectrum line (spectrum = true): its measurement minus plain (noisy), per sample: "
          f"{med['line_measure']:6.3f}x")
    print(f"  writing its psi and dpsi/dn (4 x 1024 values), per sample:                       "
          f"{med['line_write']:6.3f}x")
    return med


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--quick", action="store_true", help="1D and 2D 512^2 only, 3 repeats")
    ap.add_argument("--backend", default="auto")
    ap.add_argument("--queue", action="store_true", help="queue overhead and worker throughput only")
    ap.add_argument("--movie", action="store_true", help="movie frames per second and peak memory only")
    ap.add_argument("--batch", action="store_true", help="batched-study throughput only")
    ap.add_argument("--collect", action="store_true", help="collect's cost per run against the grid only")
    ap.add_argument("--drop", action="store_true", help="a cloud dropped 10 um, 1 mm, 10 cm on a falling grid only")
    ap.add_argument("--surfaces", action="store_true",
                    help="a two-surface strang step against a single-surface step and its FFT pair only")
    ap.add_argument("--adiabatic", action="store_true",
                    help="record.adiabatic's populations and local basis against a two-surface step only")
    ap.add_argument("--surfaces-batch", action="store_true",
                    help="batched-study throughput on two coupled surfaces only (16 runs x 2048 points)")
    ap.add_argument("--spectrum", action="store_true",
                    help="what recording for the surface-flux spectrum adds to a 1D 4096 step only")
    ap.add_argument("--screen", action="store_true",
                    help="a resolved screen's cost at 1024^2 (measure and write) against a step only")
    ap.add_argument("--whole", action="store_true",
                    help="a whole in-process 1D 4096 run per step against the FFT pair, and a 10-step run's "
                         "fixed cost, only")
    ap.add_argument("--study", action="store_true",
                    help="a 64-run 1D sweep through submit and work --workers 2 against the FFT-pair floor only")
    args = ap.parse_args()
    if args.whole:
        bench_whole_run(3 if args.quick else args.repeats)
        bench_fixed_cost(9 if args.quick else 21)
        return
    if args.study:
        bench_study(1 if args.quick else 3)
        return
    if args.spectrum:
        bench_spectrum(3 if args.quick else args.repeats)
        return
    if args.screen:
        bench_screen(3 if args.quick else args.repeats, args.backend)
        return
    if args.adiabatic:
        bench_adiabatic(3 if args.quick else args.repeats)
        return
    if args.surfaces_batch:
        bench_batch(16, 3 if args.quick else 5, coupled=True)
        return
    if args.surfaces:
        bench_surfaces(3 if args.quick else args.repeats, args.backend)
        return
    if args.drop:
        bench_drop(3)
        return
    if args.collect:
        bench_collect(3 if args.quick else 5)
        return
    if args.movie:
        bench_movie(3)
        return
    if args.batch:
        bench_batch(32, 3)
        return
    if args.queue:
        bench_queue(8, 3 if args.quick else 3)
        return
    grids = dict(list(GRIDS.items())[:2]) if args.quick else GRIDS
    repeats = 3 if args.quick else args.repeats
    print(f"medians over {repeats} rounds (pair and steps timed one after the other); ratios only "
          "(shared machine)")
    print("step/pair: strang step / bare forward+inverse FFT pair of the same backend and grid; "
          "+record/10: with norm, moments, energy and 2 detector fluxes every 10 steps; "
          "numpy/step: plain numpy loop / step; memory: peak of a whole run / bytes of psi")
    print(f"{'grid':<10} {'prec':<6} {'fft':<7} {'step/pair':>8} {'+record/10':>10} {'numpy/step':>10} "
          f"{'memory':>8}")
    steps = {}
    for name, grid in grids.items():
        for precision in ("double", "single"):
            steps[name, precision] = bench(name, grid, repeats, args.backend, precision,
                                           memory=not args.quick)
    for name, grid in grids.items():
        print(f"{name:<10} single precision vs double: {single_vs_double(grid, repeats, args.backend):.2f}x "
              "faster per step (recorded every 10 steps)")
    bench_whole_run(repeats)
    bench_fixed_cost(9 if args.quick else 21)
    bench_batch(32, 1 if args.quick else 3)
    bench_collect(3)
    bench_startup(3)


if __name__ == "__main__":
    from wavesweep.setup import single_threaded_blas
    with single_threaded_blas():   # as a run's loop has it (the steps and samples timed here in-process)
        main()
