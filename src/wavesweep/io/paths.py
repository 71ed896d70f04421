"""Paths given by the user, checked before anything is read or computed.

Every file the tool reads (a job file, a potential or state file a job
names, a result given to an analysis) goes through :func:`input_file`, and
every file it writes (a result folder, a states file, a figure, a movie)
through :func:`output_file` or :func:`output_folder`.  Each refuses with a
one-line :class:`~wavesweep.errors.JobError` naming the argument or job
field:

- an input that is not a regular file: a folder, a FIFO (opening one blocks
  until a writer appears: a job naming a FIFO would hang), a character
  device such as ``/dev/zero`` (endless), a socket;
- an output whose place is taken by a folder or by something that is not a
  regular file, whose parent is a file, whose folder cannot be written
  (probed by creating a file there: permission bits do not tell for root or
  on read-only mounts), whose suffix is not one the writer knows, or that
  already exists when the caller does not allow replacing it.

``os.stat`` never blocks on a FIFO, so these checks cannot hang either.
"""
from __future__ import annotations

import os
import stat
from pathlib import Path

from ..errors import JobError

__all__ = ["input_file", "output_file", "output_folder", "file_kind"]

_KINDS = ((stat.S_ISDIR, "a folder"), (stat.S_ISFIFO, "a FIFO (named pipe)"),
          (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
          (stat.S_ISSOCK, "a socket"))


def file_kind(mode: int) -> str:
    """'a folder', 'a FIFO (named pipe)', ... for a stat mode; 'a file' for a regular file."""
    for test, name in _KINDS:
        if test(mode):
            return name
    return "a file" if stat.S_ISREG(mode) else "not a regular file"


def input_file(path, field: str, what: str = "file") -> Path:
    """``path`` as a Path when it names an existing regular file (symbolic
    links followed); else JobError(field) saying what is there instead.
    ``what`` names the file in the message ("job file", "result file")."""
    path = Path(os.fspath(path))
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        raise JobError(field, f"no such {what} {str(path)!r}") from None
    except NotADirectoryError:
        raise JobError(field, f"no such {what} {str(path)!r} (a part of the path is a file)") from None
    except OSError as e:
        raise JobError(field, f"cannot read {what} {str(path)!r}: {e.strerror or e}") from None
    if not stat.S_ISREG(mode):
        raise JobError(field, f"{str(path)!r} is {file_kind(mode)}, not a regular file; give a {what} on disk")
    return path


def output_folder(path, field: str) -> Path:
    """A folder results will be written into (made if missing): refused when
    a file stands in its place or on its path, or when the folder (or its
    nearest existing parent, where it is still to be made) cannot be
    written.  Nothing is created here."""
    path = Path(os.fspath(path))
    if path.exists():
        if not path.is_dir():
            mode = os.stat(path).st_mode
            raise JobError(field, f"{str(path)!r} is {file_kind(mode)}, not a folder; give a folder for the results")
        _probe(path, field, path)
        return path
    parent = _nearest_existing(path, field, path)
    _probe(parent, field, path)
    return path


def output_file(path, field: str, suffixes=None, overwrite: bool = True,
                flag: str = "--overwrite", make_folders: bool = False, kind: str = "file") -> Path:
    """A file about to be written, checked before the work that makes it:
    no folder or special file in its place, its suffix among ``suffixes``
    (lower case, with the dot; None: any; ``kind`` names the file type in
    the message), an existing file only with ``overwrite`` (else the
    message names ``flag``), and a writable folder (``make_folders``: a
    missing folder is made later, so its nearest existing parent must be
    writable; otherwise the folder must exist)."""
    path = Path(os.fspath(path))
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        mode = None
    except NotADirectoryError:
        mode = None      # a file on the path: said below, with the folder
    except OSError as e:
        raise JobError(field, f"cannot write {str(path)!r}: {e.strerror or e}; choose another path") from None
    if mode is not None:
        if stat.S_ISDIR(mode):
            raise JobError(field, f"{str(path)!r} is a folder; give a file name such as "
                                  f"{str(path / ('out' + (suffixes[0] if suffixes else '')))!r}")
        if not stat.S_ISREG(mode):
            raise JobError(field, f"{str(path)!r} is {file_kind(mode)}, not a regular file; choose another path")
    if suffixes is not None and path.suffix.lower() not in suffixes:
        raise JobError(field, f"unknown {kind} type {path.suffix or '(none)'!r} in {str(path)!r}; "
                              f"use one of {', '.join(suffixes)}")
    if mode is not None:
        if not overwrite:
            raise JobError(field, f"{str(path)!r} already exists; give {flag} to replace it, or another name")
    folder = path.parent if str(path.parent) else Path(".")
    if folder.exists():
        if not folder.is_dir():
            raise JobError(field, f"cannot write {str(path)!r}: {str(folder)!r} is not a folder; choose another path")
        _probe(folder, field, path)
        return path
    if not make_folders:
        raise JobError(field, f"cannot write {str(path)!r}: no folder {str(folder)!r}; make it or choose another path")
    _probe(_nearest_existing(folder, field, path), field, path)
    return path


def _nearest_existing(folder: Path, field: str, target: Path) -> Path:
    parent = folder
    while not parent.exists() and parent != parent.parent:
        parent = parent.parent
    if not parent.is_dir():
        raise JobError(field, f"cannot write {str(target)!r}: {str(parent)!r} is a file, not a folder; "
                              "choose another path")
    return parent


def _probe(folder: Path, field: str, target: Path) -> None:
    """Create and remove a file in ``folder``: the one test that holds for
    root, read-only mounts and ACLs alike."""
    probe = folder / f".wavesweep-probe-{os.getpid()}"
    try:
        fd = os.open(probe, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        return
    except OSError as e:
        raise JobError(field, f"cannot write {str(target)!r}: {e.strerror or e} in {str(folder)!r}; "
                              "choose another path") from None
    os.close(fd)
    try:
        os.unlink(probe)
    except OSError:
        pass
