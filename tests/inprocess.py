"""The command line called in this process, seen as a fresh process would see it.

``wavesweep.cli.main`` is what ``python -m wavesweep`` runs (``__main__``:
``sys.exit(main())``), so its returned status, what it writes to the file
descriptors 1 and 2 and the files it leaves are those of the real process,
without the interpreter's start (1-4 s per call on a loaded machine).  What
a fresh process would add is reproduced here, so that no assertion on
stdout or stderr becomes weaker in-process:

- output at the descriptor level (C libraries such as HDF5 write to fd 2
  directly), not only ``sys.stdout`` / ``sys.stderr``;
- Python warnings printed with the interpreter's default filters (pytest
  would otherwise record them instead of printing them);
- log records of WARNING and above printed as the logging module's last
  resort prints them when nothing configured logging (pytest's handler
  would otherwise take them);
- the working directory and the environment given, restored afterwards.

The process itself (signals, worker processes, the console script, import
cost, variables read at import) is tested through real processes elsewhere.
"""
from __future__ import annotations

import contextlib
import logging
import os
import subprocess
import sys
import tempfile
import warnings
from pathlib import Path

# The categories a fresh interpreter ignores by default (Python docs,
# "warnings - Default Warning Filter"); everything else is printed.
_IGNORED_BY_DEFAULT = (DeprecationWarning, PendingDeprecationWarning, ImportWarning, ResourceWarning)


@contextlib.contextmanager
def _environment(cwd, env):
    saved_env, saved_cwd = dict(os.environ), os.getcwd()
    try:
        for key, value in env.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = str(value)
        os.chdir(cwd)
        yield
    finally:
        os.chdir(saved_cwd)
        os.environ.clear()
        os.environ.update(saved_env)


@contextlib.contextmanager
def _descriptors_to(out_file, err_file):
    """fds 1 and 2, and sys.stdout/sys.stderr, write to the two files."""
    sys.stdout.flush()
    sys.stderr.flush()
    saved_fds = os.dup(1), os.dup(2)
    saved_sys = sys.stdout, sys.stderr
    os.dup2(out_file.fileno(), 1)
    os.dup2(err_file.fileno(), 2)
    sys.stdout = open(1, "w", encoding="utf-8", closefd=False, buffering=1)
    sys.stderr = open(2, "w", encoding="utf-8", closefd=False, buffering=1)
    try:
        yield
    finally:
        for stream in (sys.stdout, sys.stderr):
            stream.flush()
        sys.stdout, sys.stderr = saved_sys
        os.dup2(saved_fds[0], 1)
        os.dup2(saved_fds[1], 2)
        os.close(saved_fds[0])
        os.close(saved_fds[1])


def run_main(*args, cwd, env=None) -> subprocess.CompletedProcess:
    """``wavesweep ARGS`` run in-process in ``cwd`` with ``env`` (a value of
    None removes the variable); returns what ``subprocess.run(...,
    capture_output=True, text=True)`` would: returncode, stdout, stderr."""
    from wavesweep.cli import main

    argv = [str(a) for a in args]
    with tempfile.TemporaryFile() as out_file, tempfile.TemporaryFile() as err_file:
        with _environment(cwd, env or {}), _descriptors_to(out_file, err_file):
            handler = logging.StreamHandler(sys.stderr)      # as logging.lastResort
            handler.setLevel(logging.WARNING)
            package_log = logging.getLogger("wavesweep")
            package_log.addHandler(handler)
            try:
                with warnings.catch_warnings(record=True) as caught:
                    warnings.resetwarnings()
                    warnings.simplefilter("default")
                    for category in _IGNORED_BY_DEFAULT:
                        warnings.filterwarnings("ignore", category=category)
                    try:
                        code = main(argv)
                    except SystemExit as e:                     # as the interpreter maps it
                        code = e.code if isinstance(e.code, int) else (0 if e.code is None else 1)
                for w in caught:
                    sys.stderr.write(warnings.formatwarning(w.message, w.category, w.filename, w.lineno,
                                                            w.line))
            finally:
                package_log.removeHandler(handler)
        texts = []
        for f in (out_file, err_file):
            f.seek(0)
            texts.append(f.read().decode("utf-8", errors="replace"))
    return subprocess.CompletedProcess(["wavesweep", *argv], code, texts[0], texts[1])


def child_environment(cache: Path) -> dict:
    """The variables a test's CLI call runs with: one thread, tracebacks only
    when asked, the tuning cache in the test's own folder.
    (Thread counts that libraries read at import, NUMBA_NUM_THREADS and
    OMP_NUM_THREADS, are this process's own: scripts/test sets them to 1.)"""
    return {"WAVESWEEP_DEBUG": None, "WAVESWEEP_THREADS": "1", "WAVESWEEP_CACHE": str(cache)}
