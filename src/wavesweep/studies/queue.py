"""The run queue: one SQLite database, ``ROOT/queue.sqlite``, that is the
single source of truth of what every run of every study is doing.

A run is one resolved job of a study, keyed by ``(study, run_id)``.  Its
state is one of

``queued`` -> ``running`` -> ``done`` | ``failed``;  ``queued`` -> ``cancelled``

and back: a worker that is asked to stop *releases* its run (``queued``), a
worker that stops heart-beating has its run requeued by
:meth:`Queue.requeue_stale` (or failed after ``max_attempts`` deaths),
:meth:`Queue.retry` puts failed, cancelled or done runs back in the queue.

Files of a run live beside the database: ``ROOT/STUDY/RUN_ID.nc`` (result),
``.log`` and ``.ckpt``; ``ROOT/STUDY/study.json`` is the study's manifest,
the union of every submission of that study (every path: :class:`~.layout.StudyLayout`).

Reliability
-----------
* WAL journal, ``synchronous=FULL`` for every state change: a committed
  transition survives a power cut, and WAL never leaves a torn database.
  Heartbeats (progress reports, not state changes) commit with
  ``synchronous=NORMAL``: a power cut may lose the last few, which only
  makes a dead worker look dead a little sooner.
* Every transition is one short ``BEGIN IMMEDIATE`` transaction: the write
  lock is taken before the read, so two workers can never both see the same
  run as queued.  File work (linking reused results, opening result files to
  verify them) happens outside transactions, except the few-hundred-byte
  manifest write of ``submit``, which is serialised with its database
  update on purpose.
* A busy timeout makes concurrent processes wait for the lock instead of
  failing.  Each process (and each thread: executors heart-beat from a
  thread) opens its own connection; a Queue handed to a child process, by
  fork or by pickling, reconnects there.
* The database needs a local filesystem (WAL relies on shared memory
  between the processes of one machine): on a cluster, let the processes
  on the host that owns ROOT talk to the queue.
* A ROOT that cannot be created, opened or written (no permission, a file
  where the folder should be, a read-only filesystem, a file that is not a
  queue) is a :class:`~wavesweep.errors.JobError` on ``--root`` naming the
  path and the fix, never a crash; a refused change leaves the queue as it
  was (the transaction rolls back).

Identity and damage
-------------------
Our database carries ``PRAGMA application_id = 0x77767371`` (the bytes
"wvsq") and ``PRAGMA user_version`` = :data:`SCHEMA_VERSION`.  Every
connection reads them, and the table names, before it writes anything (even
the switch to WAL): a file that is not SQLite, or an SQLite file of another
program (another application_id, or tables other than ours), is refused
with one line and left untouched.  A database with exactly our tables and
no application_id was made by an earlier wavesweep: it is adopted and
marked.  Opening a queue runs ``PRAGMA quick_check`` (0.4 s for 100000
runs); a damaged database, found then or by any later statement, is one
line with the check's first verdict and the way to rebuild: move
``queue.sqlite`` aside and submit each study again -- result files already
in ``ROOT/STUDY/`` are taken as done (:meth:`Queue.submit`), and the
study's ``study.json`` keeps the earlier submissions' runs for ``collect``.

Counters: ``attempts`` is the number of claims since the last retry that did
not end in a release (so, while a run is queued or running, the number of
times a worker died on it, plus the current one); ``executions`` counts
every claim ever, for bookkeeping and tests.
"""
from __future__ import annotations

import errno
import functools
import json
import os
import re
import shutil
import sqlite3
import tempfile
import threading
import time
from contextlib import contextmanager
from datetime import datetime
from pathlib import Path

from ..errors import DiskFull, JobError
from ..io.atomic import atomic_output, write_text_atomic
from ..io.diskspace import NO_SPACE, free_bytes, is_no_space
from .layout import StudyLayout

__all__ = ["Queue", "STATES", "SCHEMA_VERSION", "APPLICATION_ID", "check_result", "REBUILD",
           "DEFAULT_LEASE_SECONDS", "RESERVE_BYTES"]

STATES = ("queued", "running", "done", "failed", "cancelled")
SCHEMA_VERSION = 1
# PRAGMA application_id of our databases: the ASCII bytes "wvsq" (wavesweep
# queue) as a big-endian 32-bit integer, as the SQLite file format asks.
APPLICATION_ID = 0x77767371
REASON_CHARS = 500            # reasons are one line; a traceback belongs in the log
_CHUNK = 500                  # ids per "IN (...)" query, well below SQLite's variable limit
DEFAULT_LEASE_SECONDS = 60.0  # a claim recorded without its lease (older queues) is judged by this
# ROOT/.disk-reserve (StudyLayout.reserve): bytes held back so that a full
# disk can still be recorded in the queue (a commit writes a few 4 KiB pages to
# the WAL; this is room for some hundred of them).  Freed when SQLite reports a
# full disk, made again by the next `work`.
RESERVE_BYTES = 1 << 20
_LEASE_NOTE = re.compile(r"lease ([0-9.]+(?:e[+-]?[0-9]+)?) s")

_SCHEMA = (
    """CREATE TABLE IF NOT EXISTS studies (
        name      TEXT PRIMARY KEY,
        manifest  TEXT NOT NULL,          -- JSON: union of every submission
        submitted REAL NOT NULL,          -- epoch seconds, first submission
        updated   REAL NOT NULL           -- epoch seconds, last submission
    )""",
    f"""CREATE TABLE IF NOT EXISTS runs (
        seq          INTEGER PRIMARY KEY, -- submission order, also the claim order
        study        TEXT NOT NULL REFERENCES studies(name),
        run_id       TEXT NOT NULL,
        state        TEXT NOT NULL CHECK (state IN ({", ".join(f"'{s}'" for s in STATES)})),
        job_toml     TEXT NOT NULL,       -- the complete resolved job
        params       TEXT NOT NULL,       -- JSON: swept key -> value (job units)
        attempts     INTEGER NOT NULL DEFAULT 0,
        executions   INTEGER NOT NULL DEFAULT 0,
        worker       TEXT,                -- who holds (or last held) it
        heartbeat    REAL,                -- epoch seconds of the last report
        step         INTEGER,
        total        INTEGER,
        rate         REAL,                -- steps per second
        submitted    REAL NOT NULL,
        started      REAL,
        finished     REAL,
        wall_seconds REAL,
        reason       TEXT,                -- one line: why failed / requeued / released
        reused_from  TEXT,                -- study whose result this done run shares
        verified     TEXT,                -- stat signature of the result when last verified
        UNIQUE (study, run_id)
    )""",
    "CREATE INDEX IF NOT EXISTS runs_by_state ON runs (state, seq)",
    "CREATE INDEX IF NOT EXISTS runs_by_id ON runs (run_id, state)",
    """CREATE TABLE IF NOT EXISTS events (
        id     INTEGER PRIMARY KEY,
        time   REAL NOT NULL,
        study  TEXT NOT NULL,
        run_id TEXT NOT NULL,
        old    TEXT,                      -- NULL when the run was added
        new    TEXT NOT NULL,
        worker TEXT,
        note   TEXT
    )""",
    "CREATE INDEX IF NOT EXISTS events_by_run ON events (study, run_id)",
)

_RUN_COLUMNS = ("seq", "study", "run_id", "state", "params", "attempts", "executions", "worker",
                "heartbeat", "step", "total", "rate", "submitted", "started", "finished",
                "wall_seconds", "reason", "reused_from")

# connections inherited through fork: closing one in the child could disturb
# the parent's locks and WAL, so they are kept, unused, for the process's life
_INHERITED: list = []


def _one_line(text, limit: int = REASON_CHARS) -> str:
    line = " ".join(str(text).split())
    return line if len(line) <= limit else line[: limit - 3] + "..."


def _stamp(epoch: float | None) -> str:
    if epoch is None:
        return "never"
    return datetime.fromtimestamp(epoch).astimezone().isoformat(timespec="seconds")


def _json_default(obj):
    item = getattr(obj, "item", None)   # numpy scalars
    if callable(item):
        return item()
    raise TypeError(f"sweep value {obj!r} of type {type(obj).__name__} is not JSON-serialisable")


def _dumps(obj) -> str:
    return json.dumps(obj, default=_json_default, sort_keys=True)


def _stat_signature(path: Path) -> str | None:
    try:
        st = os.stat(path)
    except (FileNotFoundError, NotADirectoryError):   # no such file, or its folder is a file
        return None
    # ctime cannot be set by a user: a replaced or rewritten file always differs
    return f"{st.st_size}:{st.st_mtime_ns}:{st.st_ctime_ns}:{st.st_ino}"


def check_result(path, run_id: str) -> str | None:
    """``None`` if ``path`` is a readable result file of run ``run_id``,
    else the reason it is not (``"result file missing"`` or
    ``"result file unreadable: ..."``, one line)."""
    path = Path(path)
    if not path.exists():
        return "result file missing"
    import netCDF4   # lazy: only checking a result's completeness reads netCDF

    try:
        with netCDF4.Dataset(path, "r") as ds:
            got = ds.getncattr("run_id") if "run_id" in ds.ncattrs() else None
    except Exception as e:   # netCDF4 and HDF5 raise OSError, RuntimeError, ...
        return _one_line(f"result file unreadable: {e}")
    if got is None:
        return "result file unreadable: it has no run_id attribute"
    if str(got) != run_id:
        return f"result file unreadable: it holds run {str(got)!r}, not {run_id!r}"
    return None


_ROOT_FIX = "give a folder you can write with --root (or $WAVESWEEP_ROOT), e.g. --root ./wavesweep-runs"


def root_error(root, exc: BaseException, doing: str = "use") -> JobError | None:
    """The one-line ``JobError("--root", ...)`` for a failure to create,
    open or write the queue folder ``root`` that the input is to blame for
    (no permission, a file in the way, a read-only filesystem, a file that
    is not a queue), or None when ``exc`` is something else (a full disk,
    an I/O error, a locked database, a bug): that one propagates as it is."""
    root = str(root)
    if isinstance(exc, sqlite3.Error):
        name = getattr(exc, "sqlite_errorname", "") or ""
        text = str(exc).lower()
        db = str(StudyLayout(root).queue_db)
        if name == "SQLITE_READONLY_DIRECTORY":
            why = (f"the folder {root!r} is read-only (SQLite keeps its journal files beside the queue); "
                   f"make it writable, or copy ROOT to a writable place and give that with --root")
        elif name.startswith("SQLITE_READONLY") or "readonly" in text:
            why = (f"{db!r} is read-only (file permissions or a read-only filesystem); make ROOT and "
                   f"its files writable, or copy ROOT to a writable place and give that with --root")
        elif name.startswith("SQLITE_CANTOPEN") or "unable to open" in text:
            why = (f"cannot open {db!r} (it must be a file, in a folder you can write); "
                   + _ROOT_FIX)
        elif name == "SQLITE_NOTADB" or "not a database" in text:
            why = (f"{db!r} is not a wavesweep queue (not an SQLite database); it was left as it is: move it "
                   "away, or give the folder you submitted to with --root")
        elif _is_damage(exc):
            why = f"{db!r} is damaged ({_one_line(exc)}); {REBUILD}"
        else:   # a full disk, an I/O error, a lock held too long: not the input's fault
            return None
    elif isinstance(exc, OSError):
        filename = os.fsdecode(exc.filename) if exc.filename else root
        it = "it" if filename == root else repr(filename)
        code = exc.errno
        if code in (errno.EEXIST, errno.ENOTDIR):
            why = f"a file is in the way ({it} or a folder above it is not a folder); {_ROOT_FIX}"
        elif code == errno.EROFS:
            why = f"{it} is on a read-only filesystem; {_ROOT_FIX}"
        elif code in (errno.EACCES, errno.EPERM):
            why = f"no permission to write {it}; {_ROOT_FIX}"
        elif code == errno.ENOENT:
            why = f"{it} cannot be created there; {_ROOT_FIX}"
        elif code is None:    # our own OSErrors (journal mode, schema version) carry their fix
            why = str(exc)
        else:   # a full disk, an I/O error: the environment failed (exit 1)
            return None
    else:
        return None
    return JobError("--root", f"cannot {doing} {root!r}: {why}")


def _room_for_the_queue(method):
    """Run a state change again once if the disk was too full to commit it
    and the reserve (:attr:`StudyLayout.reserve`) could be freed for it: that a
    run ended for a full disk must be recorded on that very disk."""
    @functools.wraps(method)
    def again(self, *args, **kwargs):
        try:
            return method(self, *args, **kwargs)
        except DiskFull as e:
            if e.what != "the queue" or not self.release_reserve():
                raise
            return method(self, *args, **kwargs)
    return again


REBUILD = ("to rebuild the queue from the result files, move queue.sqlite aside and submit each study "
           "again (wavesweep submit JOB --root ROOT --study NAME): results already in ROOT/NAME/ count as "
           "done")


def _is_damage(exc: BaseException) -> bool:
    """Whether an SQLite error says the database file is damaged or not a
    database at all (as opposed to locked, read-only, full, ...)."""
    if isinstance(exc, json.JSONDecodeError):   # a JSON column we wrote no longer parses
        return True
    if not isinstance(exc, sqlite3.DatabaseError):
        return False
    name = getattr(exc, "sqlite_errorname", "") or ""
    text = str(exc).lower()
    return (name.startswith("SQLITE_CORRUPT") or name == "SQLITE_NOTADB"
            or "malformed" in text or "not a database" in text
            or "could not decode to utf-8" in text)    # a text column we wrote holds other bytes


@functools.lru_cache(maxsize=1)
def _our_columns() -> dict:
    """Table -> column names, as :data:`_SCHEMA` makes them."""
    mem = sqlite3.connect(":memory:")
    try:
        for statement in _SCHEMA:
            mem.execute(statement)
        return _columns(mem)
    finally:
        mem.close()


def _columns(conn) -> dict:
    tables = [r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table' "
                                         "AND name NOT LIKE 'sqlite_%' ORDER BY name")]
    return {t: tuple(r[1] for r in conn.execute(f'PRAGMA table_info("{t}")')) for t in tables}


def _link_or_copy(src: Path, dst: Path) -> str:
    """Put ``src`` at ``dst`` atomically: a hard link when the filesystem
    allows (no data copied), else a copy; returns "linked" or "copied".
    A later rerun of either run renames a new file into place, so the other
    study's file is never touched by it."""
    dst.parent.mkdir(parents=True, exist_ok=True)
    with atomic_output(dst, ".tmp") as tmp:
        try:
            os.link(src, tmp)
            how = "linked"
        except OSError:
            shutil.copyfile(src, tmp)
            how = "copied"
    return how


def _write_json(path: Path, obj) -> None:
    """Write-then-rename, fsync'ed: a reader sees the old file or the new
    one (a full disk, or study.json a folder: the old file stays)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    write_text_atomic(path, json.dumps(obj, indent=1, default=_json_default) + "\n")


def _read_manifest_file(path: Path) -> dict | None:
    """A study.json as written by :func:`_write_json`, or None when there is
    none or it is not one (it is rewritten from the submission then)."""
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) and isinstance(data.get("runs"), list) else None


def _merge_manifest(old: dict | None, new: dict) -> dict:
    """The union of two submissions of one study: every run of either (the
    newer params win for a run in both), each axis's values in the order they
    were first submitted (grid), or per run (zip)."""
    if old is None:
        return {**new, "submissions": 1}
    runs = {r["run_id"]: dict(r) for r in old.get("runs", [])}
    for r in new["runs"]:
        if r["run_id"] in runs:
            runs[r["run_id"]]["params"] = {**runs[r["run_id"]].get("params", {}), **r["params"]}
        else:
            runs[r["run_id"]] = dict(r)
    merged_runs = list(runs.values())
    mode = new["mode"]
    keys = list(dict.fromkeys([*old.get("axes", {}), *new["axes"]]))
    if mode == "zip":
        axes = {k: [r["params"].get(k) for r in merged_runs] for k in keys}
    else:
        axes = {}
        for k in keys:
            seen = {}
            for v in [*old.get("axes", {}).get(k, []), *new["axes"].get(k, [])]:
                seen.setdefault(_dumps(v), v)
            axes[k] = list(seen.values())
    return {**new, "axes": axes, "runs": merged_runs,
            "submissions": int(old.get("submissions", 1)) + 1}


class Queue:
    """The queue at ``root`` (created with its schema if missing).

    Parameters
    ----------
    root : folder holding ``queue.sqlite`` and one folder per study.
    busy_timeout : seconds a process waits for the database lock before an
        ``sqlite3.OperationalError`` ("database is locked").
    clock : callable returning epoch seconds (tests pass a fake one); every
        time stamp in the database comes from it.
    """

    def __init__(self, root, busy_timeout: float = 60.0, clock=None):
        self.root = Path(root).expanduser().absolute()
        self.layout = StudyLayout(self.root)
        self.path = self.layout.queue_db
        self.busy_timeout = float(busy_timeout)
        self._clock = clock or time.time
        self._local = threading.local()
        try:
            self.root.mkdir(parents=True, exist_ok=True)
            self._ensure_schema()
            self._check_integrity()
        except (OSError, sqlite3.Error) as e:
            problem = root_error(self.root, e, "use the queue folder")
            if problem is None:
                raise
            self.close()
            raise problem from None
        except JobError:
            self.close()
            raise

    # ------------------------------------------------------------ plumbing
    def __getstate__(self):
        return {"root": self.root, "busy_timeout": self.busy_timeout,
                "clock": None if self._clock is time.time else self._clock}

    def __setstate__(self, state):
        self.root = state["root"]
        self.layout = StudyLayout(self.root)
        self.path = self.layout.queue_db
        self.busy_timeout = state["busy_timeout"]
        self._clock = state["clock"] or time.time
        self._local = threading.local()

    def __repr__(self) -> str:
        return f"Queue({str(self.root)!r})"

    def _connect(self) -> sqlite3.Connection:
        try:
            conn = sqlite3.connect(self.path, timeout=self.busy_timeout, isolation_level=None)
        except sqlite3.Error as e:
            raise root_error(self.root, e, "open the queue at") or e from None
        try:   # before anything is written, even the journal mode
            self._identify(conn)
        except BaseException:
            conn.close()
            raise
        # the first switch to WAL takes an exclusive lock; a racing opener waits
        deadline = time.monotonic() + self.busy_timeout
        while True:
            try:
                mode = conn.execute("PRAGMA journal_mode=WAL").fetchone()[0]
                break
            except sqlite3.DatabaseError as e:
                if "locked" not in str(e) or time.monotonic() > deadline:
                    conn.close()
                    problem = root_error(self.root, e, "open the queue at")
                    if problem is None:
                        raise
                    raise problem from None
                time.sleep(0.01)
        if mode.lower() != "wal":
            conn.close()
            raise OSError(f"the queue at {str(self.path)!r} cannot use a WAL journal (got {mode!r}); "
                          "put ROOT on a local filesystem")
        conn.execute("PRAGMA synchronous=FULL")
        conn.execute(f"PRAGMA busy_timeout={int(self.busy_timeout * 1000)}")
        return conn

    def _conn(self) -> sqlite3.Connection:
        loc = self._local
        if getattr(loc, "pid", None) != os.getpid():
            if getattr(loc, "conn", None) is not None:
                _INHERITED.append(loc.conn)
            loc.conn, loc.pid = self._connect(), os.getpid()
        return loc.conn

    def close(self) -> None:
        """Close this thread's connection (another call reopens it)."""
        loc = self._local
        if getattr(loc, "conn", None) is not None and loc.pid == os.getpid():
            loc.conn.close()
        loc.conn, loc.pid = None, None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    @contextmanager
    def _write(self, durable: bool = True):
        """One ``BEGIN IMMEDIATE`` transaction (the write lock before any
        read); ``durable=False`` commits without waiting for the disk."""
        c = self._conn()
        if not durable:
            c.execute("PRAGMA synchronous=NORMAL")
        try:
            c.execute("BEGIN IMMEDIATE")
            try:
                yield c
                c.execute("COMMIT")
            except BaseException:
                if c.in_transaction:
                    c.execute("ROLLBACK")
                raise
        except sqlite3.Error as e:    # a read-only or vanished database: nothing changed
            if is_no_space(e):        # a full disk: said as one, never as a crash
                raise DiskFull(self.path, free_bytes(self.root), what="the queue", need="") from None
            problem = root_error(self.root, e, "write the queue at")
            if problem is None:
                raise
            raise problem from None
        finally:
            if not durable:
                try:
                    c.execute("PRAGMA synchronous=FULL")
                except sqlite3.Error:
                    pass

    @contextmanager
    def _read(self):
        """One read transaction: every SELECT in it sees the same snapshot."""
        c = self._conn()
        c.execute("BEGIN")
        try:
            yield c
        finally:
            if c.in_transaction:
                c.execute("COMMIT")

    def _identify(self, conn) -> None:
        """Refuse, before anything is written, a file that is not our queue:
        not SQLite, another program's application_id, or tables other than
        ours (a JobError on --root; the file is left as it is).  An empty
        database and an unmarked one with exactly our tables (made by an
        earlier wavesweep) pass; :meth:`_ensure_schema` marks them."""
        db = str(self.path)
        try:
            app = conn.execute("PRAGMA application_id").fetchone()[0]
            tables = _columns(conn) if app != APPLICATION_ID else None
        except sqlite3.DatabaseError as e:
            if not _is_damage(e):
                raise
            if "not a database" in str(e).lower() or getattr(e, "sqlite_errorname", "") == "SQLITE_NOTADB":
                raise JobError("--root", f"cannot use the queue folder {str(self.root)!r}: {db!r} is not a "
                                         "wavesweep queue (not an SQLite database); it was left as it is: move "
                                         "it away, or give another folder with --root") from None
            raise self._damaged(conn, e) from None
        if app == APPLICATION_ID or not tables or tables == _our_columns():
            return
        what = f"application_id {app:#x}, " if app else ""
        names = ", ".join(tables)
        raise JobError("--root", f"cannot use the queue folder {str(self.root)!r}: {db!r} is another "
                                 f"program's SQLite database ({what}tables {names}), not a wavesweep queue; "
                                 "it was left as it is: give a folder of its own with --root")

    def _damaged(self, conn, exc: BaseException) -> JobError:
        """The one-line JobError for a damaged database: the first verdict of
        ``PRAGMA quick_check`` (else the error itself) and how to rebuild."""
        try:
            rows = conn.execute("PRAGMA quick_check(1)").fetchall()
            verdict = rows[0][0] if rows else "ok"
        except sqlite3.Error as e:
            verdict = str(e)
        if verdict == "ok":   # sound pages, changed content: say what the read found
            detail = f"{_one_line(exc, 200)}; SQLite quick_check finds its pages sound"
        else:
            detail = f"SQLite quick_check: {_one_line(verdict, 200)}"
        return JobError("--root", f"cannot use the queue folder {str(self.root)!r}: {str(self.path)!r} is "
                                  f"damaged ({detail}); {REBUILD}")

    def _check_integrity(self) -> None:
        """``PRAGMA quick_check`` of the whole database (a damaged page
        anywhere): a JobError with the first verdict and the way to rebuild."""
        c = self._conn()
        try:
            rows = c.execute("PRAGMA quick_check(1)").fetchall()
        except sqlite3.DatabaseError as e:
            if not _is_damage(e):
                raise
            raise self._damaged(c, e) from None
        if rows and rows[0][0] != "ok":
            raise JobError("--root", f"cannot use the queue folder {str(self.root)!r}: {str(self.path)!r} is "
                                     f"damaged (SQLite quick_check: {_one_line(rows[0][0], 200)}); {REBUILD}")

    def _ensure_schema(self) -> None:
        c = self._conn()
        app = c.execute("PRAGMA application_id").fetchone()[0]
        version = c.execute("PRAGMA user_version").fetchone()[0]
        if version == SCHEMA_VERSION and app == APPLICATION_ID:
            return
        if version > SCHEMA_VERSION:
            raise OSError(f"the queue at {str(self.path)!r} has schema version {version}; this "
                          f"wavesweep knows version {SCHEMA_VERSION}: upgrade wavesweep")
        with self._write() as c:
            if (c.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
                    and c.execute("PRAGMA application_id").fetchone()[0] == APPLICATION_ID):
                return       # another process made it while we waited
            for statement in _SCHEMA:    # IF NOT EXISTS: an earlier version's queue keeps its rows
                c.execute(statement)
            c.execute(f"PRAGMA application_id={APPLICATION_ID}")
            c.execute(f"PRAGMA user_version={SCHEMA_VERSION}")

    def check_writable(self, studies=()) -> None:
        """A ``JobError("--root", ...)`` unless this process can change the
        database and create files in ROOT and in the folders of ``studies``
        (as workers must, before they claim anything).  Changes nothing."""
        c = self._conn()
        try:
            c.execute("BEGIN IMMEDIATE")
            try:   # a real write (the same value), undone: read-only files refuse it
                c.execute(f"PRAGMA user_version={SCHEMA_VERSION}")
            finally:
                if c.in_transaction:
                    c.execute("ROLLBACK")
        except sqlite3.Error as e:
            problem = root_error(self.root, e, "write the queue at")
            if problem is None:
                raise
            raise problem from None
        for folder in [self.root, *(self.study_dir(s) for s in dict.fromkeys(studies))]:
            try:
                folder.mkdir(parents=True, exist_ok=True)
                fd, probe = tempfile.mkstemp(prefix=".write-test.", dir=folder)
                os.close(fd)
                os.unlink(probe)
            except OSError as e:
                raise root_error(self.root, e, "write in the queue folder") from None

    # ------------------------------------------------------ disk reserve
    @property
    def reserve_path(self) -> Path:
        return self.layout.reserve

    def keep_reserve(self, nbytes: int = RESERVE_BYTES) -> bool:
        """Make sure ``ROOT/.disk-reserve`` holds ``nbytes`` (allocated, not
        sparse), so that freeing it leaves room for the queue's records when
        the disk fills.  False when there is no room for it: the disk is
        already full (the caller should not start work)."""
        path = self.reserve_path
        try:
            if path.stat().st_size >= nbytes:
                return True
        except OSError:
            pass
        try:
            with atomic_output(path, ".tmp") as tmp:
                fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
                try:
                    try:
                        os.posix_fallocate(fd, 0, nbytes)
                    except OSError as e:
                        if e.errno in NO_SPACE:
                            raise
                        os.ftruncate(fd, 0)      # no fallocate here: write the bytes
                        os.write(fd, b"\0" * nbytes)
                finally:
                    os.close(fd)
        except OSError as e:
            if e.errno in NO_SPACE:
                return False
            raise
        return True

    def release_reserve(self) -> bool:
        """Delete the reserve (True if there was one to free)."""
        try:
            self.reserve_path.unlink()
        except FileNotFoundError:
            return False
        except OSError:
            return False
        return True

    def last_event(self) -> int:
        """The id of the newest event (0 for none): a mark to pass to
        :meth:`drain_summary` later."""
        return int(self._conn().execute("SELECT COALESCE(MAX(id), 0) FROM events").fetchone()[0])

    def drain_summary(self, since: int, worker_prefix: str | None = None) -> dict:
        """What the workers that claimed runs after event ``since`` did with
        them: ``{"done": n, "failed": n, "requeued": n, "disk_full": n,
        "disk_full_reason": str or None, "shared": n, "studies": [...]}``
        (requeued: released when asked to stop or for a full disk;
        disk_full: those released for a full disk, the last one's reason
        beside; shared: runs of other studies that became done with a result
        these workers computed).  ``worker_prefix`` keeps only workers whose
        names start with it (one drain's workers, when several drain the
        queue at once)."""
        mine, args = "", [since]
        if worker_prefix:
            mine, args = " AND substr(worker, 1, ?) = ?", [since, len(worker_prefix), worker_prefix]
        workers = f"worker IN (SELECT worker FROM events WHERE id > ? AND old = 'queued' AND new = 'running'{mine})"
        rows = self._conn().execute(
            "SELECT new, study, note, old FROM events WHERE id > ? AND ((old = 'running' "
            "AND new IN ('done', 'failed', 'queued')) OR (old = 'queued' AND new = 'done')) "
            f"AND {workers} ORDER BY id", (since, *args)).fetchall()
        out = {"done": 0, "failed": 0, "requeued": 0, "disk_full": 0, "disk_full_reason": None,
               "shared": 0, "studies": []}
        for new, study, note, old in rows:
            if old == "queued":
                out["shared"] += 1
            else:
                out["requeued" if new == "queued" else new] += 1
                if new == "queued" and (note or "").startswith("disk full"):
                    out["disk_full"] += 1
                    out["disk_full_reason"] = note
            if study not in out["studies"]:
                out["studies"].append(study)
        out["studies"].sort()
        return out

    def _event(self, c, now, study, run_id, old, new, worker=None, note=None) -> None:
        c.execute("INSERT INTO events (time, study, run_id, old, new, worker, note) "
                  "VALUES (?, ?, ?, ?, ?, ?, ?)", (now, study, run_id, old, new, worker, note))

    # --------------------------------------------------------------- paths
    # (where they are: StudyLayout; here a study's name is checked first)
    def study_dir(self, study: str) -> Path:
        return self.layout.study_dir(StudyLayout.check_study_name(study))

    def result_path(self, study: str, run_id: str) -> Path:
        return self.layout.result(StudyLayout.check_study_name(study), run_id)

    def log_path(self, study: str, run_id: str) -> Path:
        return self.layout.log(StudyLayout.check_study_name(study), run_id)

    def checkpoint_path(self, study: str, run_id: str) -> Path:
        return self.layout.checkpoint(StudyLayout.check_study_name(study), run_id)

    # -------------------------------------------------------------- submit
    def submit(self, study) -> dict:
        """Queue every run of ``study`` (a :class:`~wavesweep.study.Study`)
        not yet in it.  Returns ``{"added", "existing", "reused"}`` counts.

        Idempotent: runs already in the study, whatever their state, are
        left alone (``existing``; a cancelled run comes back with ``retry``).
        A new run whose id is done in another study, with a readable result,
        is not run again: the result is hard-linked (or copied) to
        ``ROOT/STUDY/RUN_ID.nc`` and the run is done (``reused``).
        ``ROOT/STUDY/study.json`` becomes the union of every submission."""
        name = StudyLayout.check_study_name(study.name)
        specs = {}
        for r in study.runs:     # a study built by hand may repeat a run: first wins
            if r.run_id not in specs:
                specs[r.run_id] = (r.job.to_toml(), _dumps(r.params))
        manifest = study.manifest()
        manifest["name"] = name

        c = self._conn()
        known = {row[0] for row in c.execute("SELECT run_id FROM runs WHERE study = ?", (name,))}
        fresh = [rid for rid in specs if rid not in known]
        # a result already in the study folder (a queue rebuilt after damage,
        # see REBUILD): written under a temporary name and renamed, so whole,
        # and it names its run -- the run is done, not computed again
        on_disk = {rid for rid in fresh if check_result(self.result_path(name, rid), rid) is None}
        fresh = [rid for rid in fresh if rid not in on_disk]
        donors: dict[str, list] = {}
        for i in range(0, len(fresh), _CHUNK):
            chunk = fresh[i:i + _CHUNK]
            rows = c.execute(
                f"SELECT run_id, study, wall_seconds FROM runs WHERE state = 'done' AND study != ? "
                f"AND run_id IN ({', '.join('?' * len(chunk))}) ORDER BY finished DESC",
                (name, *chunk))
            for rid, src, wall in rows:
                donors.setdefault(rid, []).append((src, wall))
        try:
            return self._submit(name, specs, manifest, donors, on_disk)
        except OSError as e:   # the study folder or its files cannot be written: nothing queued
            problem = root_error(self.root, e, "write the study folder in")
            if problem is None:
                raise
            raise problem from None

    def _submit(self, name, specs, manifest, donors, on_disk=frozenset()) -> dict:
        made = []        # results linked here by this call: removed again if it fails
        try:
            return self._submit_linked(name, specs, manifest, donors, made, on_disk)
        except BaseException:
            for path in made:
                try:
                    path.unlink()
                except OSError:
                    pass
            raise

    def _submit_linked(self, name, specs, manifest, donors, made, on_disk=frozenset()) -> dict:
        reused = {}
        for rid, candidates in donors.items():
            for src, wall in candidates:
                source = self.result_path(src, rid)
                if check_result(source, rid) is None:
                    dst = self.result_path(name, rid)
                    fresh_file = not dst.exists()
                    how = _link_or_copy(source, dst)
                    if fresh_file:
                        made.append(dst)
                    reused[rid] = (src, wall, how)
                    break

        now = self._clock()
        counts = {"added": 0, "existing": 0, "reused": 0}
        with self._write() as c:
            row = c.execute("SELECT manifest FROM studies WHERE name = ?", (name,)).fetchone()
            # a study new to this database may have a manifest on disk (a
            # rebuilt queue): the earlier submissions' runs stay in it
            old = json.loads(row[0]) if row else _read_manifest_file(self.layout.manifest(name))
            merged = _merge_manifest(old, manifest)
            c.execute("INSERT INTO studies (name, manifest, submitted, updated) VALUES (?, ?, ?, ?) "
                      "ON CONFLICT (name) DO UPDATE SET manifest = excluded.manifest, "
                      "updated = excluded.updated", (name, _dumps(merged), now, now))
            for rid, (job_toml, params) in specs.items():
                if rid in on_disk:
                    cur = c.execute(
                        "INSERT OR IGNORE INTO runs (study, run_id, state, job_toml, params, submitted, "
                        "finished) VALUES (?, ?, 'done', ?, ?, ?, ?)", (name, rid, job_toml, params, now, now))
                    if cur.rowcount == 1:
                        self._event(c, now, name, rid, None, "done",
                                    note="result file already in the study folder")
                    counts["existing"] += 1     # already done: its result is there
                    continue
                if rid in reused:
                    src, wall, how = reused[rid]
                    cur = c.execute(
                        "INSERT OR IGNORE INTO runs (study, run_id, state, job_toml, params, "
                        "submitted, finished, wall_seconds, reused_from) "
                        "VALUES (?, ?, 'done', ?, ?, ?, ?, ?, ?)",
                        (name, rid, job_toml, params, now, now, wall, src))
                    kind, note = "reused", f"result of study {src!r} {how}"
                else:
                    cur = c.execute(
                        "INSERT OR IGNORE INTO runs (study, run_id, state, job_toml, params, submitted) "
                        "VALUES (?, ?, 'queued', ?, ?, ?)", (name, rid, job_toml, params, now))
                    kind, note = "added", None
                if cur.rowcount == 1:
                    counts[kind] += 1
                    self._event(c, now, name, rid, None, "done" if kind == "reused" else "queued",
                                note=note)
                else:
                    counts["existing"] += 1
            # inside the transaction: two submissions of one study cannot
            # interleave their manifests
            _write_json(self.layout.manifest(name), merged)
        return counts

    def manifest(self, study: str) -> dict | None:
        """The study's merged manifest (as in ``study.json``), or None."""
        row = self._conn().execute("SELECT manifest FROM studies WHERE name = ?", (study,)).fetchone()
        return json.loads(row[0]) if row else None

    # ------------------------------------------------------- worker side
    # (no _room_for_the_queue for a claim: the reserve is for recording how runs end; freed for a claim,
    # the claimed run's own file used the room, and its end could not be recorded: it stayed running)
    def claim(self, worker: str, study: str | None = None,
              lease_seconds: float | None = None) -> dict | None:
        """Take the oldest queued run (of ``study``, if given) for ``worker``:
        it becomes running, ``attempts`` and ``executions`` go up by one.
        A run whose run_id is running in another study is not taken: its
        result is shared when that one ends (:meth:`complete`), so one run
        id is computed once.  ``lease_seconds``, the worker's lease, is
        recorded with the claim (for :meth:`status`).
        Returns ``{"study", "run_id", "job_toml", "params", "attempt",
        "execution", "worker", "result", "log", "checkpoint"}`` (absolute
        paths as strings), or None when nothing is queued."""
        now = self._clock()
        where, args = ("AND study = ?", (study,)) if study is not None else ("", ())
        with self._write() as c:
            row = c.execute(
                "UPDATE runs SET state = 'running', attempts = attempts + 1, "
                "executions = executions + 1, worker = ?, heartbeat = ?, started = ?, "
                "rate = NULL, reason = NULL "
                f"WHERE seq = (SELECT seq FROM runs WHERE state = 'queued' {where} AND {_NOT_RUNNING_ELSEWHERE} "
                "ORDER BY seq LIMIT 1) "
                "RETURNING study, run_id, job_toml, params, attempts, executions",
                (worker, now, now, *args)).fetchall()   # to the end: the statement is finished
            if not row:
                return None
            st, rid, job_toml, params, attempts, executions = row[0]
            self._event(c, now, st, rid, "queued", "running", worker, _claim_note(attempts, lease_seconds))
        return {"study": st, "run_id": rid, "job_toml": job_toml, "params": json.loads(params),
                "attempt": attempts, "execution": executions, "worker": worker,
                "result": str(self.result_path(st, rid)), "log": str(self.log_path(st, rid)),
                "checkpoint": str(self.checkpoint_path(st, rid))}

    def claim_batch(self, worker: str, limit: int, group_of, share: int = 1, window: int = 512,
                    study: str | None = None, lease_seconds: float | None = None) -> list[dict]:
        """Claim the oldest queued run and, with it, later queued runs of
        the same study that ``group_of(job_toml)`` -> ``(key, most)`` puts
        in its group (None: never grouped), in submission order: up to
        ``min(limit, most)`` runs in all, and at most
        the ``share``-th part of the group queued (rounded up), so that
        ``share`` workers all get some.  Only the next ``window`` queued
        runs of the study are looked at.  One transaction: two workers never
        claim the same run, and a run id running in another study is left
        queued (as in :meth:`claim`).  Returns claims as :meth:`claim` does,
        the oldest first; empty when nothing is queued."""
        now = self._clock()
        where, args = ("AND study = ?", (study,)) if study is not None else ("", ())
        with self._write() as c:
            head = c.execute(f"SELECT seq, study, job_toml FROM runs WHERE state = 'queued' {where} "
                             f"AND {_NOT_RUNNING_ELSEWHERE} ORDER BY seq LIMIT 1", args).fetchone()
            if head is None:
                return []
            seqs = [head[0]]
            group = group_of(head[2]) if limit > 1 else None
            if group is not None:
                key, most = group
                rows = c.execute("SELECT seq, job_toml FROM runs WHERE state = 'queued' AND study = ? "
                                 f"AND seq > ? AND {_NOT_RUNNING_ELSEWHERE} ORDER BY seq LIMIT ?",
                                 (head[1], head[0], window)).fetchall()
                mates = [seq for seq, text in rows if (group_of(text) or (None,))[0] == key]
                take = min(limit, most, -(-(1 + len(mates)) // max(1, share)))
                seqs += mates[:take - 1]
            out = []
            for seq in seqs:
                st, rid, job_toml, params, attempts, executions = c.execute(
                    "UPDATE runs SET state = 'running', attempts = attempts + 1, "
                    "executions = executions + 1, worker = ?, heartbeat = ?, started = ?, "
                    "rate = NULL, reason = NULL WHERE seq = ? "
                    "RETURNING study, run_id, job_toml, params, attempts, executions",
                    (worker, now, now, seq)).fetchall()[0]
                self._event(c, now, st, rid, "queued", "running", worker,
                            _claim_note(attempts, lease_seconds)
                            + (f", batch of {len(seqs)}" if len(seqs) > 1 else ""))
                out.append({"study": st, "run_id": rid, "job_toml": job_toml, "params": json.loads(params),
                            "attempt": attempts, "execution": executions, "worker": worker,
                            "result": str(self.result_path(st, rid)), "log": str(self.log_path(st, rid)),
                            "checkpoint": str(self.checkpoint_path(st, rid))})
        return out

    @staticmethod
    def _owner(execution):
        """WHERE clause of "this run is running and held by this worker" (and,
        with ``execution``, by this very claim: a worker name reused by a
        later process cannot act for an earlier one's claim)."""
        sql = "study = ? AND run_id = ? AND state = 'running' AND worker = ?"
        return (sql + " AND executions = ?", (execution,)) if execution is not None else (sql, ())

    def heartbeat(self, study, run_id, worker, step=None, total=None, rate=None,
                  execution: int | None = None) -> bool:
        """Report that ``worker`` is alive on the run, with its progress
        (``step`` of ``total`` steps, ``rate`` steps per second; None keeps
        the last value).  False when the run is no longer this worker's
        (requeued, cancelled, finished): the worker should stop it."""
        sql, extra = self._owner(execution)
        # numpy scalars cannot be bound: plain numbers
        step, total = (None if v is None else int(v) for v in (step, total))
        rate = None if rate is None else float(rate)
        now = self._clock()
        with self._write(durable=False) as c:
            cur = c.execute(
                "UPDATE runs SET heartbeat = ?, step = COALESCE(?, step), "
                f"total = COALESCE(?, total), rate = COALESCE(?, rate) WHERE {sql}",
                (now, step, total, rate, study, run_id, worker, *extra))
        return cur.rowcount == 1

    @_room_for_the_queue
    def _finish(self, study, run_id, worker, new, sets, args, note, execution) -> bool:
        sql, extra = self._owner(execution)
        now = self._clock()
        with self._write() as c:
            cur = c.execute(f"UPDATE runs SET state = ?, {sets} WHERE {sql}",
                            (new, *[now if a is _NOW else a for a in args],
                             study, run_id, worker, *extra))
            if cur.rowcount != 1:
                return False
            self._event(c, now, study, run_id, "running", new, worker, note)
        return True

    def complete(self, study, run_id, worker, wall_seconds, execution: int | None = None) -> bool:
        """The worker's run is done (its result file is in place).  False,
        and nothing changes, if the run is no longer this worker's.  The
        same run id queued in other studies becomes done too, sharing this
        result (:meth:`share_result`): it is never computed twice."""
        ok = self._finish(study, run_id, worker, "done",
                          "finished = ?, heartbeat = ?, wall_seconds = ?, rate = NULL, "
                          "step = COALESCE(total, step), reason = NULL, verified = NULL",
                          (_NOW, _NOW, float(wall_seconds)), f"{float(wall_seconds):.3f} s", execution)
        if ok:
            self.share_result(study, run_id, worker)
        return ok

    def share_result(self, study, run_id, worker=None) -> list[str]:
        """Give the done run ``run_id`` of ``study`` to the other studies
        where that run id is queued: its result is hard-linked (or copied)
        to their folders and they become done, ``reused_from`` naming
        ``study``, as :meth:`submit` does for a run already done.  Returns
        the studies served.  A run claimed meanwhile keeps its claim (the
        link is undone unless that worker's own result is already there);
        a failure to link (a full disk) leaves the run queued."""
        c = self._conn()
        twins = c.execute("SELECT seq, study FROM runs WHERE run_id = ? AND study != ? AND state = 'queued' "
                          "ORDER BY seq", (run_id, study)).fetchall()
        if not twins:
            return []
        source = self.result_path(study, run_id)
        if check_result(source, run_id) is not None:
            return []
        row = c.execute("SELECT wall_seconds FROM runs WHERE study = ? AND run_id = ?", (study, run_id)).fetchone()
        wall = row[0] if row else None
        served = []
        for seq, other in twins:
            dst = self.result_path(other, run_id)
            fresh_file = not os.path.lexists(dst)
            try:
                how = _link_or_copy(source, dst) if fresh_file else "kept"
            except OSError:
                continue
            note = f"result of study {study!r} {how}"
            now = self._clock()
            try:
                with self._write() as w:
                    cur = w.execute("UPDATE runs SET state = 'done', finished = ?, wall_seconds = ?, "
                                    "reused_from = ?, reason = NULL, verified = NULL, rate = NULL "
                                    "WHERE seq = ? AND state = 'queued'", (now, wall, study, seq))
                    if cur.rowcount == 1:
                        self._event(w, now, other, run_id, "queued", "done", worker, note)
            except DiskFull:
                cur = None
            if cur is not None and cur.rowcount == 1:
                served.append(other)
            elif fresh_file:
                try:   # claimed meanwhile: its worker writes its own (never over an existing one)
                    if os.path.samefile(dst, source):
                        dst.unlink()
                except OSError:
                    pass
        return served

    def fail(self, study, run_id, worker, reason: str, execution: int | None = None) -> bool:
        """The worker's run failed; ``reason`` is kept as one line."""
        reason = _one_line(reason)
        return self._finish(study, run_id, worker, "failed",
                            "finished = ?, heartbeat = ?, rate = NULL, reason = ?",
                            (_NOW, _NOW, reason), reason, execution)

    def release(self, study, run_id, worker, reason: str, execution: int | None = None) -> bool:
        """The worker was asked to stop (signal, --until) and kept a
        checkpoint: the run goes back to queued, first in line, and this
        attempt does not count towards ``max_attempts``."""
        reason = _one_line(reason)
        return self._finish(study, run_id, worker, "queued",
                            "heartbeat = ?, worker = NULL, rate = NULL, attempts = attempts - 1, "
                            "reason = ?", (_NOW, reason), reason, execution)

    @_room_for_the_queue
    def requeue_stale(self, lease_seconds: float, max_attempts: int = 3) -> dict:
        """Running runs whose last heartbeat is more than ``lease_seconds``
        old lost their worker: each is requeued, or failed with "worker died
        N times (last heartbeat at ...)" once ``attempts >= max_attempts``.
        Returns ``{"requeued": n, "failed": n, "runs": [{"study", "run_id",
        "worker", "state"}]}``."""
        if not lease_seconds >= 0:
            raise ValueError(f"lease_seconds must be >= 0, got {lease_seconds!r}")
        _check_max_attempts(max_attempts)
        now = self._clock()
        with self._write() as c:
            stale = c.execute("SELECT seq, study, run_id, worker, heartbeat, attempts FROM runs "
                              "WHERE state = 'running' AND (heartbeat IS NULL OR heartbeat < ?) "
                              "ORDER BY seq", (now - lease_seconds,)).fetchall()
            return self._requeue_dead(c, now, stale, max_attempts, None)

    @_room_for_the_queue
    def requeue_worker(self, worker: str, why: str, max_attempts: int = 3,
                       count_attempt: bool = True) -> dict:
        """The runs held by ``worker``, a process known to be gone (``why``:
        "was killed by SIGKILL", "exited with status 1"), go back to the queue
        at once, without waiting for their lease; as in
        :meth:`requeue_stale` the death counts as an attempt, and a run is
        failed once ``attempts >= max_attempts``.  With ``count_attempt``
        False (a worker stopped by a full disk before it could record its
        runs) the runs are requeued with the reason "disk full: ...", the
        attempt not counted.  Returns as :meth:`requeue_stale` does."""
        _check_max_attempts(max_attempts)
        now = self._clock()
        with self._write() as c:
            held = c.execute("SELECT seq, study, run_id, worker, heartbeat, attempts FROM runs "
                             "WHERE state = 'running' AND worker = ? ORDER BY seq", (worker,)).fetchall()
            if count_attempt:
                return self._requeue_dead(c, now, held, max_attempts, why)
            out = {"requeued": 0, "failed": 0, "runs": []}
            for seq, st, rid, name, beat, attempts in held:
                reason = f"disk full: worker {name} {why}; requeued, attempt not counted"
                c.execute("UPDATE runs SET state = 'queued', worker = NULL, rate = NULL, "
                          "attempts = attempts - 1, reason = ? WHERE seq = ?", (reason, seq))
                self._event(c, now, st, rid, "running", "queued", name, reason)
                out["requeued"] += 1
                out["runs"].append({"study": st, "run_id": rid, "worker": name, "state": "queued"})
            return out

    def _requeue_dead(self, c, now, rows, max_attempts, why) -> dict:
        out = {"requeued": 0, "failed": 0, "runs": []}
        """Requeue (or fail, after ``max_attempts``) the runs of dead workers;
        ``why`` is how the worker is known to have died, None when it only
        stopped reporting."""
        for seq, st, rid, worker, beat, attempts in rows:
            last = f"last heartbeat at {_stamp(beat)} from {worker}"
            if attempts >= max_attempts:
                new = "failed"
                times = "1 time" if attempts == 1 else f"{attempts} times"
                reason = f"worker died {times} ({last}" + (f", which {why})" if why else ")")
                c.execute("UPDATE runs SET state = 'failed', finished = ?, rate = NULL, "
                          "reason = ? WHERE seq = ?", (now, reason, seq))
            else:
                new = "queued"
                what = f"worker {worker} {why} (last heartbeat at {_stamp(beat)})" if why \
                    else f"worker stopped reporting ({last})"
                reason = f"requeued: {what}; attempt {attempts} of {max_attempts}"
                c.execute("UPDATE runs SET state = 'queued', worker = NULL, rate = NULL, "
                          "reason = ? WHERE seq = ?", (reason, seq))
            self._event(c, now, st, rid, "running", new, worker, reason)
            out["requeued" if new == "queued" else "failed"] += 1
            out["runs"].append({"study": st, "run_id": rid, "worker": worker, "state": new})
        return out

    def blocked(self) -> int:
        """Queued runs that wait because their run id is running in another
        study (they become done when it ends, or claimable if it fails)."""
        return int(self._conn().execute(
            "SELECT COUNT(*) FROM runs WHERE state = 'queued' AND NOT "
            + _NOT_RUNNING_ELSEWHERE).fetchone()[0])

    # -------------------------------------------------------- user side
    def _select(self, c, run_ids, study, states):
        """seq, study, run_id, state, worker of the named runs (all, when
        ``run_ids`` is None) in ``states``; a named id that is not in the
        queue (or not in ``study``) is a JobError, before anything changes."""
        where, args = [f"state IN ({', '.join('?' * len(states))})"], list(states)
        if study is not None:
            where.append("study = ?")
            args.append(study)
        rows = []
        if run_ids is None:
            return c.execute(f"SELECT seq, study, run_id, state, worker FROM runs "
                             f"WHERE {' AND '.join(where)} ORDER BY seq", args).fetchall()
        ids = list(dict.fromkeys(run_ids))
        found = set()
        for i in range(0, len(ids), _CHUNK):
            chunk = ids[i:i + _CHUNK]
            inside = f"run_id IN ({', '.join('?' * len(chunk))})"
            scope = " AND study = ?" if study is not None else ""
            found |= {r[0] for r in c.execute(f"SELECT run_id FROM runs WHERE {inside}{scope}",
                                              (*chunk, *([study] if study is not None else [])))}
            rows += c.execute(f"SELECT seq, study, run_id, state, worker FROM runs "
                              f"WHERE {inside} AND {' AND '.join(where)} ORDER BY seq",
                              (*chunk, *args)).fetchall()
        unknown = [i for i in ids if i not in found]
        if unknown:
            scope = f" in study {study!r}" if study is not None else ""
            raise JobError("run_id", f"{', '.join(map(repr, unknown))} not in the queue at "
                                     f"{str(self.root)!r}{scope}; `wavesweep status` lists the runs")
        return rows

    def retry(self, run_ids=None, study=None) -> int:
        """Put runs back in the queue with a fresh attempt count; returns how
        many.  Without ``run_ids``: every failed run, and every done run
        whose result file is missing.  With ``run_ids``: those runs if
        failed, cancelled or done (a done run is run again)."""
        missing = set()
        if run_ids is None:    # stat outside the transaction
            q = "SELECT seq, study, run_id FROM runs WHERE state = 'done'"
            for seq, st, rid in self._conn().execute(
                    q + (" AND study = ?" if study is not None else ""),
                    (study,) if study is not None else ()):
                if not self.result_path(st, rid).exists():
                    missing.add(seq)
        now = self._clock()
        with self._write() as c:
            if run_ids is None:
                rows = [r for r in self._select(c, None, study, ("failed", "done"))
                        if r[3] == "failed" or r[0] in missing]
            else:
                rows = self._select(c, run_ids, study, ("failed", "cancelled", "done"))
            for seq, st, rid, old, _ in rows:
                c.execute("UPDATE runs SET state = 'queued', attempts = 0, worker = NULL, "
                          "heartbeat = NULL, step = NULL, total = NULL, rate = NULL, started = NULL, "
                          "finished = NULL, wall_seconds = NULL, reason = NULL, reused_from = NULL, "
                          "verified = NULL WHERE seq = ?", (seq,))
                note = "result file missing" if seq in missing else "retry"
                self._event(c, now, st, rid, old, "queued", note=note)
        return len(rows)

    def cancel(self, run_ids=None, study=None) -> int:
        """Cancel queued runs (all, or of ``study``, or the named ones);
        returns how many.  A named running run is cancelled too: its
        worker's next heartbeat returns False and it stops."""
        now = self._clock()
        with self._write() as c:
            states = ("queued",) if run_ids is None else ("queued", "running")
            rows = self._select(c, run_ids, study, states)
            for seq, st, rid, old, worker in rows:
                reason = f"cancelled while running on {worker}" if old == "running" else "cancelled"
                c.execute("UPDATE runs SET state = 'cancelled', rate = NULL, finished = ?, "
                          "reason = ? WHERE seq = ?", (now, reason, seq))
                self._event(c, now, st, rid, old, "cancelled", worker if old == "running" else None)
        return len(rows)

    # ------------------------------------------------------------ reading
    def _leases(self, c) -> dict:
        """The lease each running run was claimed with (from its claim's
        event note; :data:`DEFAULT_LEASE_SECONDS` when the note has none)."""
        rows = c.execute(
            "SELECT e.study, e.run_id, e.note FROM events AS e JOIN "
            "(SELECT ev.study, ev.run_id, MAX(ev.id) AS id FROM events AS ev JOIN runs AS r "
            "ON r.study = ev.study AND r.run_id = ev.run_id AND r.state = 'running' "
            "WHERE ev.new = 'running' GROUP BY ev.study, ev.run_id) AS m ON e.id = m.id").fetchall()
        return {(st, rid): _lease_of(note) for st, rid, note in rows}

    def _as_dict(self, row, now, leases=None) -> dict:
        r = dict(zip(_RUN_COLUMNS, row))
        r.pop("seq")
        r["params"] = json.loads(r["params"])
        eta = None
        r["lease_seconds"] = r["silent_seconds"] = None
        r["lease_lapsed"] = False
        if r["state"] == "running":
            lease = (leases or {}).get((r["study"], r["run_id"]), DEFAULT_LEASE_SECONDS)
            silent = max(0.0, now - r["heartbeat"]) if r["heartbeat"] is not None else None
            r["lease_seconds"], r["silent_seconds"] = lease, silent
            # its worker is gone (or hung): the next `work` requeues it
            r["lease_lapsed"] = silent is None or silent > lease
        if r["state"] == "running" and not r["lease_lapsed"] and r["rate"] and r["rate"] > 0 \
                and r["total"] is not None and r["step"] is not None:
            eta = max(0.0, (r["total"] - r["step"]) / r["rate"] - (r["silent_seconds"] or 0.0))
        r["eta_seconds"] = eta
        r["result"] = str(self.result_path(r["study"], r["run_id"])) if r["state"] == "done" else None
        r["log"] = str(self.log_path(r["study"], r["run_id"]))
        return r

    def runs(self, study=None) -> list[dict]:
        """Every run (of ``study``), in submission order: ``study, run_id,
        state, params, attempts, executions, worker, heartbeat, step, total,
        rate, eta_seconds, submitted, started, finished, wall_seconds,
        reason, reused_from, result`` (path, done runs only), ``log``, and for
        running runs ``lease_seconds`` (the lease it was claimed with),
        ``silent_seconds`` (since its last heartbeat) and ``lease_lapsed``
        (silent longer than its lease: its worker died, and the next `work`
        requeues it).  Times are epoch seconds; ``eta_seconds`` (running
        runs reporting a rate, lease not lapsed) counts from now."""
        q = f"SELECT {', '.join(_RUN_COLUMNS)} FROM runs"
        with self._read() as c:
            rows = c.execute(q + (" WHERE study = ? ORDER BY seq" if study is not None
                                  else " ORDER BY seq"), (study,) if study is not None else ()).fetchall()
            leases = self._leases(c)
        now = self._clock()
        return [self._as_dict(row, now, leases) for row in rows]

    def run(self, study: str, run_id: str) -> dict | None:
        """One run as in :meth:`runs`, with its ``job_toml``; None if unknown."""
        c = self._conn()
        row = c.execute(f"SELECT {', '.join(_RUN_COLUMNS)}, job_toml FROM runs "
                        "WHERE study = ? AND run_id = ?", (study, run_id)).fetchone()
        if row is None:
            return None
        out = self._as_dict(row[:-1], self._clock(), self._leases(c) if row[3] == "running" else None)
        out["job_toml"] = row[-1]
        return out

    def history(self, study: str, run_id: str) -> list[dict]:
        """Every state change of a run, oldest first: ``time, old, new,
        worker, note``."""
        rows = self._conn().execute("SELECT time, old, new, worker, note FROM events "
                                    "WHERE study = ? AND run_id = ? ORDER BY id", (study, run_id))
        return [dict(zip(("time", "old", "new", "worker", "note"), r)) for r in rows]

    def verify(self) -> list[dict]:
        """Check every done run's result file (opening it with netCDF4 and
        comparing its ``run_id`` attribute); one that is missing or not a
        readable result of that run becomes failed with the reason.  A file
        unchanged since its last check is not opened again.  Returns the runs
        that failed: ``[{"study", "run_id", "reason"}]``."""
        rows = self._conn().execute("SELECT seq, study, run_id, verified FROM runs "
                                    "WHERE state = 'done' ORDER BY seq").fetchall()
        bad, good = [], []
        for seq, st, rid, known in rows:
            path = self.result_path(st, rid)
            sig = _stat_signature(path)
            if sig is not None and sig == known:
                continue
            problem = "result file missing" if sig is None else check_result(path, rid)
            (bad if problem else good).append((seq, st, rid, problem or sig))
        if not (bad or good):
            return []
        failed = []
        now = self._clock()
        with self._write() as c:
            for seq, st, rid, reason in bad:
                cur = c.execute("UPDATE runs SET state = 'failed', reason = ?, verified = NULL "
                                "WHERE seq = ? AND state = 'done'", (reason, seq))
                if cur.rowcount == 1:    # a retry in between wins
                    self._event(c, now, st, rid, "done", "failed", note=reason)
                    failed.append({"study": st, "run_id": rid, "reason": reason})
            for seq, _, _, sig in good:
                c.execute("UPDATE runs SET verified = ? WHERE seq = ? AND state = 'done'", (sig, seq))
        return failed

    def status(self, verify: bool = True) -> dict:
        """``{"studies": {NAME: {"queued": n, "running": n, "done": n,
        "failed": n, "cancelled": n}}, "runs": [...]}`` (runs as in
        :meth:`runs`), one consistent snapshot.  With ``verify``, done runs
        whose result file is missing or unreadable become failed first."""
        if verify:
            try:
                self.verify()
            except DiskFull:   # no room to record a verdict: the counts are still worth showing
                pass
        now = self._clock()
        with self._read() as c:
            names = [r[0] for r in c.execute("SELECT name FROM studies ORDER BY submitted, name")]
            rows = c.execute(f"SELECT {', '.join(_RUN_COLUMNS)} FROM runs ORDER BY seq").fetchall()
            leases = self._leases(c)
        runs = [self._as_dict(row, now, leases) for row in rows]
        studies = {name: dict.fromkeys(STATES, 0) for name in names}
        for r in runs:
            studies.setdefault(r["study"], dict.fromkeys(STATES, 0))[r["state"]] += 1
        return {"studies": studies, "runs": runs}


_NOW = object()    # placeholder for "the clock's time" in _finish arguments

# a queued run may be claimed unless its run id is running in another study
# (the outer table is the queued run's; runs_by_id serves the lookup)
_NOT_RUNNING_ELSEWHERE = ("NOT EXISTS (SELECT 1 FROM runs AS twin WHERE twin.run_id = runs.run_id "
                          "AND twin.state = 'running')")


def _claim_note(attempt: int, lease_seconds: float | None) -> str:
    """The claim event's note: the attempt and the worker's lease, which
    :meth:`Queue.status` reads back to judge whether the lease lapsed."""
    note = f"attempt {attempt}"
    if lease_seconds is not None:
        note += f", lease {float(lease_seconds):g} s"
    return note


def _check_max_attempts(max_attempts) -> None:
    if isinstance(max_attempts, bool) or not isinstance(max_attempts, int) or max_attempts < 1:
        raise ValueError(f"max_attempts must be a positive integer, got {max_attempts!r}")


def _lease_of(note) -> float:
    found = _LEASE_NOTE.search(note or "")
    return float(found.group(1)) if found else DEFAULT_LEASE_SECONDS


def _reports_damage(method):
    """``method`` with a damaged database (found by any statement, after
    the check on opening) turned into the one-line JobError of
    :meth:`Queue._damaged` instead of an internal DatabaseError."""
    @functools.wraps(method)
    def wrapper(self, *args, **kwargs):
        try:
            return method(self, *args, **kwargs)
        except (sqlite3.DatabaseError, json.JSONDecodeError) as e:
            if not _is_damage(e):
                raise
            raise self._damaged(self._conn(), e) from None
    return wrapper


# every public call that reads or writes the database (wrapped here, not in
# each body: the transitions keep their own error handling for the rest)
for _name in ("submit", "manifest", "claim", "claim_batch", "heartbeat", "complete", "fail", "release",
              "requeue_stale", "retry", "cancel", "runs", "run", "history", "verify", "status",
              "check_writable", "last_event", "drain_summary", "share_result", "requeue_worker",
              "blocked"):
    setattr(Queue, _name, _reports_damage(getattr(Queue, _name)))
del _name
