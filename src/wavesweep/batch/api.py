"""Study operations as library calls (the CLI's submit/work/status/retry/
cancel/collect only parse arguments and call these)."""
from __future__ import annotations

import os
import time
from datetime import datetime, timedelta
from pathlib import Path

from ..errors import JobError

__all__ = ["default_root", "submit", "work", "format_work", "status", "format_status", "parse_until",
           "until_deadline",
           "existing_queue"]


def default_root(root=None) -> Path:
    """ROOT: the argument, else ``$WAVESWEEP_ROOT``, else ``./wavesweep-runs``."""
    return Path(root or os.environ.get("WAVESWEEP_ROOT") or "wavesweep-runs")


def submit(job_path, root=None, study: str | None = None, overrides=(), force: bool = False) -> dict:
    """Validate and judge every run of a job file's study and queue the new
    ones.  Nothing is queued when any run is invalid, or when ``wavesweep
    check`` finds an error at any point unless ``force`` (a JobError);
    ``warnings`` lists the warnings, one line per criterion."""
    from ..check import preflight
    from .queue import Queue
    from .sweep import load_study

    st = load_study(job_path, overrides, name=study)
    warnings = preflight(st.runs, force=force)
    counts = Queue(default_root(root)).submit(st)
    return {"study": st.name, "runs": len(st.runs), **counts, "warnings": warnings}


def parse_until(text: str | None, now: datetime | None = None) -> float | None:
    """``--until``: ``HH:MM`` is the next such time (at 23:00, 07:00 means
    tomorrow morning); an ISO date-time (``2026-12-02T07:00``) is taken as
    written, so it may lie in the past.  Returns epoch seconds."""
    return until_deadline(text, now)[0]


def until_deadline(text: str | None, now: datetime | None = None) -> tuple[float | None, str | None]:
    """``--until`` as ``(epoch seconds, note)``: the note (one line, else
    None) says when ``HH:MM`` has already passed today and so means
    tomorrow, with the date and how long from now."""
    if text is None:
        return None, None
    now = now or datetime.now()
    try:
        hh, mm = text.split(":")
        if len(hh) <= 2 and len(mm) == 2:
            target = now.replace(hour=int(hh), minute=int(mm), second=0, microsecond=0)
            note = None
            if target <= now:
                target += timedelta(days=1)
                left = int((target - now).total_seconds()) // 60
                note = (f"--until {text}: {now:%H:%M} is past {target:%H:%M} today, so it means tomorrow, "
                        f"{target:%Y-%m-%d %H:%M} ({left // 60} h {left % 60:02d} min from now); give a "
                        f"date-time such as {target:%Y-%m-%dT%H:%M} to be explicit")
            return target.timestamp(), note
    except ValueError:
        pass
    try:
        return datetime.fromisoformat(text).timestamp(), None
    except ValueError:
        raise JobError("--until", f"{text!r} is not HH:MM or a date-time like 2026-12-02T07:00") from None


def work(root=None, workers: int = 1, until: str | float | None = None, executor="local", dask: str | None = None,
         **settings) -> dict:
    """Drain the queue at ROOT with an executor (by name or class).

    Returns the executor's summary with what this drain did added:
    ``done``, ``failed`` and ``requeued`` (runs its workers finished,
    failed, or released when stopped, plus the runs of dead workers that
    it requeued or failed at the start), ``studies`` (the studies they
    belong to), ``folders`` (where their results are) and ``root``.
    ``until``: ``--until`` text (:func:`parse_until`) or epoch seconds.
    ``dask``: drain on the Dask cluster at that scheduler address (or
    ``local:N``, a LocalCluster of N worker processes) instead."""
    import socket

    from .executors import EXECUTORS, WorkerSettings
    from .executors.local import LocalExecutor

    if workers < 1:
        raise JobError("--workers", f"must be at least 1, got {workers}")
    if dask is not None and workers != 1:
        raise JobError("--workers", "with --dask the cluster's workers run the study; drop --workers "
                                    "(use --dask local:N for N local worker processes)")
    queue = existing_queue(root)
    deadline = until if until is None or isinstance(until, (int, float)) else parse_until(until)
    cls = EXECUTORS[executor] if isinstance(executor, str) else executor
    # before any worker starts: a read-only root would make each of them crash
    queue.check_writable(sorted({r["study"] for r in queue.runs() if r["state"] == "queued"}))
    since = queue.last_event()
    if dask is not None:
        from .executors.cluster import DaskExecutor
        cls = DaskExecutor
        ex = DaskExecutor(queue.root, address=dask, settings=WorkerSettings(until=deadline, **settings))
    else:
        ex = cls(queue.root, workers=workers, settings=WorkerSettings(until=deadline, **settings))
    out = ex.drain()
    # the local executor names its workers HOST:PID:i after this process
    prefix = f"{socket.gethostname()}:{os.getpid()}:" if issubclass(cls, LocalExecutor) else None
    done = queue.drain_summary(since, worker_prefix=prefix)
    stale = out.get("stale") or {}
    done["requeued"] += int(stale.get("requeued", 0))
    done["failed"] += int(stale.get("failed", 0))
    done["studies"] = sorted(set(done["studies"]) | {r["study"] for r in stale.get("runs", [])})
    done["folders"] = [str(queue.study_dir(s)) for s in done["studies"]]
    return {**out, **done, "root": str(queue.root)}


def format_work(out: dict) -> str:
    """One line: what a drain did and where the results are."""
    counts = f"{out.get('done', 0)} done, {out.get('failed', 0)} failed, {out.get('requeued', 0)} requeued"
    folders = out.get("folders") or []
    if len(folders) == 1:
        where = f"results in {folders[0]}"
    elif folders:
        where = f"results in {len(folders)} study folders under {out.get('root')}"
    else:
        where = f"nothing ran; queue at {out.get('root')}"
    hint = f"`wavesweep status --root {out.get('root')}` lists the runs"
    return f"wavesweep work: {counts} in this drain; {where}; {hint}"


def existing_queue(root=None):
    """The queue at ROOT; a JobError (not a new, empty queue) if there is none."""
    from .queue import DB_NAME, Queue

    root = default_root(root)
    if root.exists() and not root.is_dir():
        raise JobError("--root", f"{str(root)!r} is a file, not a queue folder; give the folder "
                                 "you submitted to (wavesweep submit JOB --root FOLDER)")
    if not (root / DB_NAME).exists():
        raise JobError("--root", f"no queue at {str(root)!r}; submit a study first "
                                 "(wavesweep submit JOB --root ...)")
    return Queue(root)


def status(root=None, verify: bool = True) -> dict:
    return existing_queue(root).status(verify=verify)


def _eta(seconds) -> str:
    if seconds is None:
        return "?"
    seconds = int(seconds)
    return f"{seconds // 3600}h{seconds % 3600 // 60:02d}m" if seconds >= 3600 else f"{seconds // 60}m{seconds % 60:02d}s"


def format_status(st: dict) -> str:
    """Human-readable status: counts per study, then running and failed runs."""
    lines = []
    states = ("queued", "running", "done", "failed", "cancelled")
    lines.append(f"{'study':<24}" + "".join(f"{s:>10}" for s in states))
    for name, counts in sorted(st["studies"].items()):
        lines.append(f"{name:<24}" + "".join(f"{counts.get(s, 0):>10}" for s in states))
    running = [r for r in st["runs"] if r["state"] == "running"]
    if running:
        lines.append("")
        lines.append("running:")
        for r in running:
            step, total = r.get("step") or 0, r.get("total") or 0
            pct = f"{100 * step / total:5.1f}%" if total else "   ?  "
            rate = f"{r['rate']:.0f} steps/s" if r.get("rate") else "? steps/s"
            lines.append(f"  {r['study']}/{r['run_id']}  {pct}  {rate}  eta {_eta(r.get('eta_seconds'))}")
    failed = [r for r in st["runs"] if r["state"] == "failed"]
    if failed:
        lines.append("")
        lines.append("failed:")
        for r in failed:
            lines.append(f"  {r['study']}/{r['run_id']}  {r.get('reason') or ''}")
    return "\n".join(lines)
