"""Heavy dependencies load on first use (issue 14, item 7).

One fresh interpreter (the test process has imported everything already):
``import wavesweep`` must not load numba, netCDF4, pyFFTW, xarray, pandas,
dask or matplotlib; a pyFFTW transform must not bring in dask.array or pandas
(pyFFTW's optional dask interface, skipped by ``wavesweep.fft``); and after it
pyFFTW and dask.array.fft must still work for anyone else.  The numbers
that make these worth it are in the commits and scripts/bench, not here (no
timed tests).
"""
from __future__ import annotations

import importlib.util
import json
import os
import subprocess
import sys

import pytest

PROBE = r"""
import json, sys
HEAVY = ("numba", "netCDF4", "pyfftw", "xarray", "pandas", "dask", "dask.array", "matplotlib")
import wavesweep
seen = {"import": [m for m in HEAVY if m in sys.modules]}
import numpy as np
from wavesweep.fft import make_transform
from wavesweep.grid import Axis, Grid
grid = Grid((Axis("x", -4.0, 4.0, 32),))
t = make_transform(grid, "pyfftw")
a = np.exp(-grid.axes[0].coordinates ** 2).astype(complex)
seen["transform"] = [m for m in ("dask.array", "pandas", "xarray") if m in sys.modules]
seen["dask_marker_left"] = "dask.array.fft" in sys.modules
seen["fft_error"] = float(np.max(np.abs(t.transform_of(a) - np.fft.fft(a))))
import pyfftw.interfaces.numpy_fft
seen["interfaces_error"] = float(np.max(np.abs(pyfftw.interfaces.numpy_fft.fft(a) - np.fft.fft(a))))
if sys.argv[1] == "dask":
    import dask.array.fft
    seen["dask_fft"] = callable(dask.array.fft.fft_wrap)
print(json.dumps(seen))
"""


@pytest.mark.skipif(importlib.util.find_spec("pyfftw") is None, reason="pyFFTW not installed")
def test_heavy_dependencies_load_on_first_use(tmp_path):
    has_dask = importlib.util.find_spec("dask") is not None
    out = subprocess.run([sys.executable, "-c", PROBE, "dask" if has_dask else "-"], capture_output=True,
                         text=True, check=True, cwd=tmp_path,
                         env={**os.environ, "WAVESWEEP_CACHE": str(tmp_path)})
    seen = json.loads(out.stdout.strip().splitlines()[-1])
    assert seen["import"] == []
    assert seen["transform"] == []
    assert not seen["dask_marker_left"]
    # the transform against numpy.fft (unnormalised forward DFT, numpy's own
    # convention); pyFFTW's own interfaces still work after the partial import
    assert seen["fft_error"] < 1e-12
    assert seen["interfaces_error"] < 1e-12
    if has_dask:
        assert seen["dask_fft"]


READER_PROBE = r"""
import json, sys
import wavesweep.analysis.arrivals, wavesweep.analysis.transmission, wavesweep.studies.collect
import wavesweep.viz.summary
print(json.dumps([m for m in ("numba", "pyfftw", "wavesweep.setup", "wavesweep.run", "wavesweep.kernels.split",
                              "wavesweep.analysis.spectra") if m in sys.modules]))
"""


def test_reading_results_loads_no_stepping_code(tmp_path):
    """Analysis and collect read result files (the layers of
    tests/unit/test_layers.py): importing them loads neither the run layer
    nor numba or the FFT libraries, so a process that only reads pays for
    none of it."""
    out = subprocess.run([sys.executable, "-c", READER_PROBE], capture_output=True, text=True, check=True,
                         cwd=tmp_path, env={**os.environ, "WAVESWEEP_CACHE": str(tmp_path)})
    assert json.loads(out.stdout.strip().splitlines()[-1]) == []


PARENT_PROBE = r"""
import json, sys
from wavesweep.cli import _parser
from wavesweep.studies.api import work
from wavesweep.studies.executors.local import LocalExecutor
print(json.dumps([m for m in ("numpy", "scipy", "numba", "netCDF4", "pyfftw", "wavesweep.run", "wavesweep.job",
                              "wavesweep.batched", "wavesweep.check", "wavesweep.study", "wavesweep.io.checkpoint")
                  if m in sys.modules]))
"""


def test_the_process_that_starts_workers_loads_no_run_modules(tmp_path):
    """`wavesweep work`'s parent only starts worker processes (spawned:
    each imports what runs need itself): its imports held up the first
    worker by 0.3 s, so it loads none of the run's modules or numerics."""
    out = subprocess.run([sys.executable, "-c", PARENT_PROBE], capture_output=True, text=True, check=True,
                         cwd=tmp_path, env={**os.environ, "WAVESWEEP_CACHE": str(tmp_path)})
    assert json.loads(out.stdout.strip().splitlines()[-1]) == []
