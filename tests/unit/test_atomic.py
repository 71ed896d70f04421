"""io/atomic.py, the one home of write-to-temporary / fsync / rename: a
reader sees the old file or the new one, a failed write leaves the old file
byte for byte and no temporary file behind, concurrent writers of one file
never mix their bytes, and a full disk is DiskFull with the caller's words.

Reference: POSIX rename(2) replaces the target atomically within one
filesystem (the guarantee the module builds on); the rest is checked on
the files themselves.
"""
from __future__ import annotations

import errno
import os
import threading
from pathlib import Path

import pytest

from wavesweep.errors import DiskFull
from wavesweep.io import atomic, diskspace
from wavesweep.io.atomic import (atomic_output, atomic_rename, temporary_path, write_bytes_atomic,
                                 write_text_atomic)


def entries(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


def test_a_write_lands_whole_under_its_name_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "study.json"
    assert write_text_atomic(target, '{"runs": []}\n') == target
    assert target.read_text() == '{"runs": []}\n'
    write_bytes_atomic(target, b"second")
    assert target.read_bytes() == b"second"
    assert entries(tmp_path) == ["study.json"]


def test_temporary_names_are_hidden_in_the_same_folder(tmp_path):
    target = tmp_path / "run.nc"
    fixed = temporary_path(target, ".part", unique=False)
    assert fixed == tmp_path / ".run.nc.part"     # the name the recorder's writers and tests know
    one, two = temporary_path(target), temporary_path(target)
    assert one != two and one.parent == two.parent == tmp_path
    assert one.name.startswith(".run.nc.") and one.name.endswith(".tmp")
    assert temporary_path(tmp_path / "fig.png", ".part.png").suffix == ".png"   # the format stays readable


def test_a_failing_write_leaves_the_old_file_byte_identical_and_nothing_else(tmp_path):
    target = tmp_path / "summary.nc"
    target.write_bytes(b"old summary \x00\x01")
    with pytest.raises(ValueError, match="half-way"):
        with atomic_output(target, ".part") as tmp:
            tmp.write_bytes(b"new, but torn")
            raise ValueError("failed half-way")
    assert target.read_bytes() == b"old summary \x00\x01"
    assert entries(tmp_path) == ["summary.nc"]


def test_an_interrupt_is_a_failure_too(tmp_path):
    target = tmp_path / "c.ckpt"
    target.write_bytes(b"generation 1")
    with pytest.raises(KeyboardInterrupt):
        with atomic_output(target, unique=False) as tmp:
            tmp.write_bytes(b"generation 2")
            raise KeyboardInterrupt
    assert target.read_bytes() == b"generation 1" and entries(tmp_path) == ["c.ckpt"]


def test_a_failing_rename_removes_the_temporary(tmp_path):
    target = tmp_path / "taken"
    target.mkdir()                                  # a folder holds the name: rename(2) refuses
    (target / "inside").write_text("kept")
    with pytest.raises(OSError):
        write_text_atomic(target, "text")
    assert entries(tmp_path) == ["taken"] and (target / "inside").read_text() == "kept"


def test_without_replace_an_existing_file_is_never_replaced(tmp_path):
    target = tmp_path / "RUN.nc"
    target.write_bytes(b"finished")
    with pytest.raises(FileExistsError):
        write_bytes_atomic(target, b"another attempt", replace=False)
    assert target.read_bytes() == b"finished" and entries(tmp_path) == ["RUN.nc"]
    fresh = tmp_path / "OTHER.nc"
    write_bytes_atomic(fresh, b"first", replace=False)
    assert fresh.read_bytes() == b"first"


def test_atomic_rename_moves_a_file_written_elsewhere_in_the_code(tmp_path):
    part = tmp_path / ".r.log.part"
    part.write_text("attempt 1\ndone\n")
    atomic_rename(part, tmp_path / "r.log")
    assert entries(tmp_path) == ["r.log"] and (tmp_path / "r.log").read_text() == "attempt 1\ndone\n"


def test_a_full_disk_is_disk_full_with_the_callers_words_and_the_old_file_stays(tmp_path, monkeypatch):
    target = tmp_path / "c.ckpt"
    target.write_bytes(b"previous checkpoint")
    monkeypatch.setattr(diskspace, "free_bytes", lambda folder: 123)
    with pytest.raises(DiskFull) as info:
        with atomic_output(target, what="the checkpoint", need_bytes=4096, need="it needs about",
                           basis="the size of psi") as tmp:
            tmp.write_bytes(b"x")
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(tmp))
    full = info.value
    assert full.reason.startswith("disk full: cannot write the checkpoint ") and "\n" not in full.reason
    assert str(target) in full.reason and full.free_bytes == 123 and full.need_bytes == 4096
    assert target.read_bytes() == b"previous checkpoint" and entries(tmp_path) == ["c.ckpt"]


def test_other_errors_are_not_called_a_full_disk(tmp_path):
    with pytest.raises(PermissionError):
        with atomic_output(tmp_path / "f", what="the file"):
            raise PermissionError(errno.EACCES, "denied")
    assert entries(tmp_path) == []
    with pytest.raises(OSError) as info:         # without `what`: the error as it came
        with atomic_output(tmp_path / "f"):
            raise OSError(errno.ENOSPC, "no room")
    assert not isinstance(info.value, DiskFull)


def test_concurrent_writers_of_one_file_never_mix_their_bytes(tmp_path):
    """Four writers replace one file 40 times each while a reader reads it:
    every read is one writer's whole content (each writer its own
    temporary file), and no temporary file is left."""
    target = tmp_path / "fftw-wisdom.pickle"
    contents = {i: bytes([65 + i]) * (64 * 1024 + i) for i in range(4)}   # 64 KiB: several write(2) calls
    write_bytes_atomic(target, contents[0])
    stop = threading.Event()
    seen, errors = set(), []

    def read():
        while not stop.is_set():
            data = target.read_bytes()
            if data not in contents.values():
                errors.append(len(data))
            seen.add(data[:1])

    def write(i):
        for _ in range(40):
            write_bytes_atomic(target, contents[i])

    reader = threading.Thread(target=read)
    writers = [threading.Thread(target=write, args=(i,)) for i in contents]
    reader.start()
    for w in writers:
        w.start()
    for w in writers:
        w.join()
    stop.set()
    reader.join()
    assert errors == []                          # never a torn or mixed file
    assert target.read_bytes() in contents.values()
    assert entries(tmp_path) == ["fftw-wisdom.pickle"]


def test_the_module_is_the_only_place_that_renames_a_written_file_into_place():
    """One home: no other module of the package renames a file into place
    itself (DEVELOPERS.md: io/atomic.py); fails on the code before it had one."""
    package = Path(atomic.__file__).resolve().parents[1]
    offenders = []
    for path in sorted(package.rglob("*.py")):
        if path.name == "atomic.py":
            continue
        text = path.read_text()
        for needle in ("os.replace(", "os.rename(", "NamedTemporaryFile"):
            if needle in text:
                offenders.append(f"{path.relative_to(package)}: {needle}")
    assert offenders == []
