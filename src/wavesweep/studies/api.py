"""Study operations as library calls (the CLI's submit/work/status/retry/
cancel/collect only parse arguments and call these)."""
from __future__ import annotations

import os
import socket
from datetime import datetime, timedelta
from pathlib import Path

from ..errors import DiskFull, JobError
from ..io.diskspace import free_bytes
from .executors import CLUSTER_EXECUTOR, DEFAULT_EXECUTOR, WorkerSettings, executor_class
from .executors.local import LocalExecutor
from .layout import StudyLayout
from .queue import RESERVE_BYTES, Queue

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

    from ..check import preflight   # lazy: the jobs' modules only for a submit (work's parent needs none)
    from ..study import load_study
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


def work(root=None, workers: int = 1, until: str | float | None = None, executor=None, dask: str | None = None,
         **settings) -> dict:
    """Drain the queue at ROOT with an executor: a name registered in
    :data:`~.executors.EXECUTORS` (default :data:`~.executors.DEFAULT_EXECUTOR`)
    or an Executor class.

    Returns the executor's summary with what this drain did added:
    ``done``, ``failed`` and ``requeued`` (runs its workers finished,
    failed, or released when stopped or for a full disk, plus the runs of
    dead workers that it requeued or failed), ``disk_full`` (runs released
    for a full disk, their attempts not counted) with ``disk_full_reason``,
    ``shared`` (runs of other studies done with a result computed here),
    ``dead_workers`` (workers of this drain that died, each with the runs it
    held, requeued at once), ``studies`` (the studies they belong to),
    ``folders`` (where their results are), ``root``, and ``ok``: False when
    the drain was cut short by its environment (a full disk, a dead
    worker), which `work` reports with exit status 1.

    A disk with no room for the queue's reserve (:data:`~.queue.RESERVE_BYTES`
    kept in ``ROOT/.disk-reserve``, so that a full disk can still be recorded)
    is a :class:`~wavesweep.errors.DiskFull` before any run is claimed.
    ``until``: ``--until`` text (:func:`parse_until`) or epoch seconds.
    ``dask``: drain with :data:`~.executors.CLUSTER_EXECUTOR` on the Dask
    cluster at that scheduler address (or ``local:N``, a LocalCluster of N
    worker processes)."""

    if workers < 1:
        raise JobError("--workers", f"must be at least 1, got {workers}")
    if dask is not None and workers != 1:
        raise JobError("--workers", "with --dask the cluster's workers run the study; drop --workers "
                                    "(use --dask local:N for N local worker processes)")
    if dask is not None and executor not in (None, CLUSTER_EXECUTOR):
        raise JobError("--executor", f"--dask runs the {CLUSTER_EXECUTOR} executor; drop --executor {executor}")
    if dask is None and executor == CLUSTER_EXECUTOR:
        raise JobError("--dask", f"the {CLUSTER_EXECUTOR} executor needs a scheduler: --dask ADDRESS "
                                 "(or local:N for N local worker processes)")
    name = CLUSTER_EXECUTOR if dask is not None else executor or DEFAULT_EXECUTOR
    cls = executor_class(name) if isinstance(name, str) else name
    queue = existing_queue(root)
    deadline = until if until is None or isinstance(until, (int, float)) else parse_until(until)
    # before any worker starts: a read-only root would make each of them crash
    queue.check_writable(sorted({r["study"] for r in queue.runs() if r["state"] == "queued"}))
    since = queue.last_event()
    if dask is not None:
        ex = cls(queue.root, address=dask, settings=WorkerSettings(until=deadline, **settings))
    else:
        ex = cls(queue.root, workers=workers, settings=WorkerSettings(until=deadline, **settings))
    had_reserve = queue.reserve_path.exists()
    if not queue.keep_reserve():
        raise DiskFull(queue.root, free_bytes(queue.root), RESERVE_BYTES, what="the queue folder",
                       need="the queue needs a reserve of", basis="to record runs' ends when the disk fills")
    try:
        out = ex.drain()
    except JobError:   # bad input found by the executor (a --dask address): ROOT as it was
        if not had_reserve:
            queue.release_reserve()
        raise
    # the local executor names its workers HOST:PID:i after this process
    prefix = f"{socket.gethostname()}:{os.getpid()}:" if issubclass(cls, LocalExecutor) else None
    done = queue.drain_summary(since, worker_prefix=prefix)
    stale = out.get("stale") or {}
    done["requeued"] += int(stale.get("requeued", 0))
    done["failed"] += int(stale.get("failed", 0))
    done["studies"] = sorted(set(done["studies"]) | {r["study"] for r in stale.get("runs", [])})
    done["folders"] = [str(queue.study_dir(s)) for s in done["studies"]]
    dead = out.get("dead_workers") or []
    ok = not (done["disk_full"] or out.get("disk_full_stop") or dead)
    return {**out, **done, "dead_workers": dead, "ok": ok, "root": str(queue.root)}


def format_work(out: dict) -> str:
    """One line: what a drain did, what cut it short, where the results are."""
    said = [f"{out.get('done', 0)} done, {out.get('failed', 0)} failed, {out.get('requeued', 0)} requeued"
            + (f", {out['shared']} shared with other studies" if out.get("shared") else "")
            + " in this drain"]
    dead = out.get("dead_workers") or []
    if dead:
        ways = sorted({d["why"] for d in dead})
        held = sum(len(d.get("runs", [])) for d in dead)
        back = sum(int(d.get("requeued", 0)) for d in dead)
        lost = sum(int(d.get("failed", 0)) for d in dead)
        text = (f"{len(dead)} worker{'s' if len(dead) != 1 else ''} died ({', '.join(ways)}) holding "
                f"{held} run{'s' if held != 1 else ''}: {back} requeued")
        if lost:
            text += f", {lost} failed after too many attempts"
        if any(d.get("unrecorded") for d in dead):
            text += "; the queue could not record it: their runs stay running until the lease lapses"
        said.append(text)
    if out.get("disk_full") or out.get("disk_full_stop"):
        n = out.get("disk_full", 0)
        said.append(f"stopped by a full disk: {n} run{'s' if n != 1 else ''} back in the queue, "
                    "no attempt counted; free space, then work again")
    folders = out.get("folders") or []
    if len(folders) == 1:
        said.append(f"results in {folders[0]}")
    elif folders:
        said.append(f"results in {len(folders)} study folders under {out.get('root')}")
    else:
        said.append(f"nothing ran; queue at {out.get('root')}")
    said.append(f"`wavesweep status --root {out.get('root')}` lists the runs")
    return "wavesweep work: " + "; ".join(said)


def existing_queue(root=None):
    """The queue at ROOT; a JobError (not a new, empty queue) if there is none."""

    root = default_root(root)
    if root.exists() and not root.is_dir():
        raise JobError("--root", f"{str(root)!r} is a file, not a queue folder; give the folder "
                                 "you submitted to (wavesweep submit JOB --root FOLDER)")
    if not StudyLayout(root).queue_db.exists():
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


def _ago(seconds) -> str:
    return "never reported" if seconds is None else f"silent for {_eta(seconds)}"


def format_status(st: dict) -> str:
    """Human-readable status: counts per study, then running runs (those
    whose lease lapsed marked, with what the next `work` does), queued runs
    with a reason (requeued, released, a full disk) and failed runs."""
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
            if r.get("lease_lapsed"):
                lease = r.get("lease_seconds")
                lines.append(f"  {r['study']}/{r['run_id']}  {pct}  LEASE LAPSED: {_ago(r.get('silent_seconds'))}"
                             f" (lease {lease:g} s) on {r.get('worker')}; its worker is gone: the next "
                             "`wavesweep work` requeues it, resuming from its last checkpoint")
                continue
            rate = f"{r['rate']:.0f} steps/s" if r.get("rate") else "? steps/s"
            lines.append(f"  {r['study']}/{r['run_id']}  {pct}  {rate}  eta {_eta(r.get('eta_seconds'))}")
    waiting = [r for r in st["runs"] if r["state"] == "queued" and r.get("reason")]
    if waiting:
        lines.append("")
        lines.append("queued again:")
        for r in waiting:
            lines.append(f"  {r['study']}/{r['run_id']}  {r['reason']}")
    failed = [r for r in st["runs"] if r["state"] == "failed"]
    if failed:
        lines.append("")
        lines.append("failed:")
        for r in failed:
            lines.append(f"  {r['study']}/{r['run_id']}  {r.get('reason') or ''}")
    return "\n".join(lines)
