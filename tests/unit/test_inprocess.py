"""tests/inprocess.py shows what a fresh ``python -m wavesweep`` would show,
so that a CLI test moved in-process keeps every assertion's strength."""
from __future__ import annotations

import logging
import os
import sys
import warnings

from inprocess import run_main


def test_run_main_sees_what_a_process_would_print(tmp_path, monkeypatch):
    """A command that writes to fd 2 directly (as a C library does), prints,
    warns and logs: the status, both streams and the default warning
    filters of a fresh interpreter (Python docs, "Default Warning Filter":
    DeprecationWarning hidden outside __main__) are as a process would have
    them; cwd and environment come back."""
    from wavesweep import cli

    seen = {}

    def noisy(args):
        seen.update(cwd=os.getcwd(), root=os.environ.get("WAVESWEEP_ROOT"),
                    debug=os.environ.get("WAVESWEEP_DEBUG"))
        os.write(2, b"written to fd 2\n")
        print("one line on stdout")
        print("one line on sys.stderr", file=sys.stderr)
        warnings.warn("a runtime warning", RuntimeWarning)
        warnings.warn("a deprecation", DeprecationWarning)
        logging.getLogger("wavesweep.run").warning("a log record")
        return 3

    monkeypatch.setitem(cli._COMMANDS, "status", noisy)
    monkeypatch.setenv("WAVESWEEP_DEBUG", "1")
    cwd_before, env_before = os.getcwd(), dict(os.environ)
    proc = run_main("status", cwd=tmp_path, env={"WAVESWEEP_ROOT": tmp_path / "root", "WAVESWEEP_DEBUG": None})
    assert proc.returncode == 3
    assert proc.stdout == "one line on stdout\n"
    for piece in ("written to fd 2", "one line on sys.stderr", "RuntimeWarning: a runtime warning",
                  "a log record"):
        assert piece in proc.stderr, proc.stderr
    assert "a deprecation" not in proc.stderr
    assert seen == {"cwd": str(tmp_path), "root": str(tmp_path / "root"), "debug": None}
    assert os.getcwd() == cwd_before and dict(os.environ) == env_before


def test_run_main_returns_an_argument_error_as_a_process_would(tmp_path):
    """argparse's exit (SystemExit inside main) becomes the status, with its
    one line on stderr."""
    proc = run_main("frobnicate", cwd=tmp_path)
    assert proc.returncode == 2 and proc.stdout == ""
    assert len(proc.stderr.splitlines()) == 1 and "frobnicate" in proc.stderr
