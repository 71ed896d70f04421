"""The queue database's identity and damage (issue 13, item 6): ours is
marked, anything else is refused untouched, damage is one line with the
integrity check's verdict and the way to rebuild, and the rebuild (submit
again) takes the result files already in the study folder as done.

Header offsets are those of the SQLite file format (sqlite.org/fileformat.html,
"The Database Header"): user_version at byte 60, application_id at byte 68,
both 4-byte big-endian integers; the page size at byte 16 (2 bytes).
"""
from __future__ import annotations

import copy
import hashlib
import json
import sqlite3
from pathlib import Path

import netCDF4
import pytest

from wavesweep.studies.queue import APPLICATION_ID, SCHEMA_VERSION, Queue
from wavesweep.study import expand_study
from wavesweep.cli import main
from wavesweep.errors import JobError

FREE_1D = {   # as tests/conftest.py FREE_1D
    "title": "free packet",
    "grid": {"x": {"min": -60.0, "max": 60.0, "points": 512}, "boundary": "periodic"},
    "packet": {"kind": "gaussian", "center": -20.0, "width": 2.0, "momentum": 1.0},
    "evolve": {"dt": 0.02, "duration": 4.0, "scheme": "strang"},
    "record": {"every": 0.2, "snapshot_every": 1.0},
}


def study(name, momenta):
    raw = copy.deepcopy(FREE_1D)
    raw["sweep"] = {"packet.momentum": list(momenta)}
    return expand_study(raw, name=name)


def write_result(path, run_id):
    """A stand-in result file: netCDF4 with the run_id attribute (what the
    queue's check_result reads)."""
    with netCDF4.Dataset(path, "w") as ds:
        ds.setncattr("run_id", run_id)


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def header_int(path: Path, offset: int) -> int:
    return int.from_bytes(path.read_bytes()[offset:offset + 4], "big")


def one_line_root_error(info, *pieces):
    text = str(info.value)
    assert info.value.field == "--root" and "\n" not in text, text
    for piece in pieces:
        assert piece in text, text
    return text


def test_a_new_queue_carries_our_mark_in_the_file_header(tmp_path):
    Queue(tmp_path).submit(study("s", [0.5]))
    db = tmp_path / "queue.sqlite"
    raw = sqlite3.connect(db)
    raw.execute("PRAGMA wal_checkpoint(TRUNCATE)")    # the header as written to the main file
    raw.close()
    assert APPLICATION_ID.to_bytes(4, "big") == b"wvsq"
    assert header_int(db, 68) == APPLICATION_ID
    assert header_int(db, 60) == SCHEMA_VERSION


def test_an_unmarked_queue_of_an_earlier_version_is_adopted_and_marked(tmp_path):
    """Earlier versions wrote our tables and user_version 1 but no
    application_id: such a queue keeps its runs and gets the mark."""
    q = Queue(tmp_path)
    st = study("s", [0.5, 1.0])
    q.submit(st)
    q.close()
    raw = sqlite3.connect(tmp_path / "queue.sqlite")
    raw.execute("PRAGMA application_id=0")             # as an earlier version left it
    raw.commit()
    raw.close()
    again = Queue(tmp_path)
    assert again.submit(st) == {"added": 0, "existing": 2, "reused": 0}
    raw = sqlite3.connect(tmp_path / "queue.sqlite")
    assert raw.execute("PRAGMA application_id").fetchone()[0] == APPLICATION_ID
    raw.close()


@pytest.mark.parametrize("kind", ["other-tables", "other-application-id", "ours-plus-one"])
def test_a_foreign_sqlite_file_is_refused_and_never_written(tmp_path, kind):
    db = tmp_path / "queue.sqlite"
    raw = sqlite3.connect(db)
    if kind == "other-tables":
        raw.execute("CREATE TABLE notes (id INTEGER PRIMARY KEY, text TEXT)")
        raw.execute("INSERT INTO notes (text) VALUES ('keep me')")
    elif kind == "other-application-id":
        raw.execute("PRAGMA application_id=1234")
        raw.execute("CREATE TABLE runs (x)")
    else:   # our tables and one more: not a queue we made
        q = Queue(tmp_path / "donor")
        q.close()
        donor = sqlite3.connect(tmp_path / "donor" / "queue.sqlite")
        for (sql,) in donor.execute("SELECT sql FROM sqlite_master WHERE type = 'table'"):
            raw.execute(sql)
        donor.close()
        raw.execute("CREATE TABLE extra (y)")
    raw.commit()
    raw.close()
    before = digest(db)
    with pytest.raises(JobError) as info:
        Queue(tmp_path)
    one_line_root_error(info, str(db), "another program's SQLite database", "left as it is")
    assert digest(db) == before
    assert not (tmp_path / "queue.sqlite-wal").exists() or (tmp_path / "queue.sqlite-wal").stat().st_size == 0
    # the command line: exit 2, one line, nothing written
    for argv in (["status", "--root", str(tmp_path)], ["retry", "--root", str(tmp_path)]):
        assert main(argv) == 2
    assert digest(db) == before


def test_a_file_that_is_not_sqlite_is_refused_untouched(tmp_path, capsys):
    db = tmp_path / "queue.sqlite"
    db.write_bytes(bytes(range(256)) * 40)
    before = digest(db)
    assert main(["status", "--root", str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--root" in err and "not an SQLite database" in err, err
    assert digest(db) == before


def _damaged_queue(tmp_path, runs=400) -> Path:
    """A queue of ``runs`` runs whose middle page is overwritten with bytes
    that are no b-tree page."""
    q = Queue(tmp_path)
    q.submit(study("s", [0.5 + 0.001 * i for i in range(runs)]))
    q.close()
    db = tmp_path / "queue.sqlite"
    raw = sqlite3.connect(db)
    raw.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    raw.close()
    data = bytearray(db.read_bytes())
    page = int.from_bytes(data[16:18], "big")
    middle = (len(data) // page // 2) * page
    data[middle:middle + page] = bytes((37 * i + 11) % 256 for i in range(page))
    db.write_bytes(bytes(data))
    return db


def test_a_damaged_queue_is_one_line_with_the_verdict_and_the_rebuild(tmp_path, capsys):
    db = _damaged_queue(tmp_path)
    with pytest.raises(JobError) as info:
        Queue(tmp_path)
    one_line_root_error(info, str(db), "damaged", "quick_check", "wavesweep submit", "count as done")
    assert main(["status", "--root", str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--root" in err and "damaged" in err, err
    assert "Traceback" not in err and "internal error" not in err


def test_damaged_text_in_a_sound_page_is_damage_too(tmp_path):
    """Bytes overwritten inside a record (the pages stay well-formed, so
    quick_check passes) surface when the record is read: the same one line."""
    q = Queue(tmp_path)
    q.submit(study("s", [0.5]))
    q.close()
    raw = sqlite3.connect(tmp_path / "queue.sqlite")
    raw.execute("UPDATE runs SET params = CAST(X'FF7B7D' AS TEXT)")    # not UTF-8
    raw.commit()
    raw.close()
    with pytest.raises(JobError) as info:
        Queue(tmp_path).status()
    one_line_root_error(info, "damaged", "wavesweep submit")


def test_a_rebuilt_queue_takes_the_results_on_disk_as_done(tmp_path):
    """The documented rebuild: move the damaged queue aside, submit again.
    Runs whose result file is in the study folder are done (not run again);
    the others are queued; study.json keeps an earlier submission's runs."""
    q = Queue(tmp_path)
    first, second = study("s", [0.5, 1.0, 1.5]), study("s", [2.0])
    q.submit(first)
    q.submit(second)
    done = []
    for _ in range(2):
        c = q.claim("w")
        write_result(c["result"], c["run_id"])
        q.complete(c["study"], c["run_id"], "w", 1.0)
        done.append(c["run_id"])
    q.close()
    for suffix in ("", "-wal", "-shm"):
        path = tmp_path / f"queue.sqlite{suffix}"
        if path.exists():
            path.rename(tmp_path / f"damaged.sqlite{suffix}")
    rebuilt = Queue(tmp_path)
    assert rebuilt.submit(first) == {"added": 1, "existing": 2, "reused": 0}
    states = {r["run_id"]: r["state"] for r in rebuilt.runs()}
    assert sorted(rid for rid, s in states.items() if s == "done") == sorted(done)
    assert len(states) == 3 and list(states.values()).count("queued") == 1
    manifest = json.loads((tmp_path / "s" / "study.json").read_text())
    assert {r["run_id"] for r in manifest["runs"]} == {r.run_id for r in first.runs + second.runs}
    # a result file of another run under this run's name is not taken
    other = study("s", [3.0]).runs[0].run_id
    write_result(rebuilt.result_path("s", other), "not-" + other)
    assert rebuilt.submit(study("s", [3.0]))["added"] == 1
