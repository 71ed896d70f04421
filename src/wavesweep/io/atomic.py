"""Atomic file writes: a reader sees the old file or the new one, never a part.

Every file wavesweep replaces while someone may read it (results, checkpoint
copies, a study's manifest and summary, figures, movies, the caches of FFTW
wisdom, CAP tunings and run warnings, a finished run's log) is written the
same way, here:

1. under a temporary name in the same folder (a rename is atomic only within
   one filesystem): ``.NAME.SUFFIX``, or ``.NAME.TOKEN.SUFFIX`` with a random
   token when several writers may write the same file at once;
2. flushed to the disk (``fsync``), so that after a power cut the new name
   never points at a file whose blocks were not written yet;
3. renamed over the old name (``os.replace``; or hard-linked, when an
   existing file must never be replaced), and the folder fsync'ed, so the
   rename itself survives a power cut.

A write that fails at any step removes its temporary file and leaves the old
file as it was.  Where a caller names what it writes (``what=``), a failure
for lack of room becomes :class:`~wavesweep.errors.DiskFull`
(:func:`~wavesweep.io.diskspace.disk_full_from`), with the caller's words.

Use :func:`atomic_output` for a file another library writes by name
(netCDF, matplotlib, ffmpeg), :func:`write_bytes_atomic` and
:func:`write_text_atomic` for bytes and text in hand, and
:func:`temporary_path` with :func:`atomic_rename` for a file whose writing
spans more than one block of code (a result written over a whole run).
"""
from __future__ import annotations

import errno
import os
import secrets
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from .diskspace import disk_full_from

__all__ = ["atomic_output", "atomic_rename", "fsync_folder", "temporary_path", "write_bytes_atomic",
           "write_text_atomic"]

# Random bytes in a shared temporary name: 48 bits, so writers on different
# machines sharing one folder (where pids may collide) never pick the same name.
_TOKEN_BYTES = 6


def _fsync(path) -> None:
    """Flush the file or folder ``path`` to the disk."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def fsync_folder(folder) -> None:
    """fsync a folder (its entries: renames, new and deleted files); a
    filesystem that cannot fsync folders is passed over."""
    try:
        _fsync(folder)
    except OSError:  # some filesystems do not fsync folders
        pass


def temporary_path(path, suffix: str = ".tmp", unique: bool = True) -> Path:
    """The name ``path`` is written under before it is renamed into place:
    hidden, in the same folder, ``.NAME.TOKEN{suffix}`` with a fresh random
    token when ``unique`` (several writers of one file), else
    ``.NAME{suffix}`` (one writer, whose leftovers the next one overwrites
    or finds by name).  A writer that infers the format from the name
    (matplotlib, ffmpeg) is given ``suffix=".part" + path.suffix``."""
    path = Path(path)
    token = f".{secrets.token_hex(_TOKEN_BYTES)}" if unique else ""
    return path.with_name(f".{path.name}{token}{suffix}")


def atomic_rename(tmp, final, replace: bool = True) -> None:
    """fsync ``tmp``, rename it to ``final`` and fsync the folder.

    With ``replace=False`` an existing ``final`` is never replaced: the file
    is hard-linked into place (which fails atomically if the name exists) and
    the temporary name removed; :class:`FileExistsError` if ``final`` exists.
    """
    tmp, final = Path(tmp), Path(final)
    _fsync(tmp)
    if replace:
        os.replace(tmp, final)
    else:
        try:
            os.link(tmp, final)
        except FileExistsError:
            raise FileExistsError(errno.EEXIST, "a finished file is already there", str(final)) from None
        except OSError:  # no hard links on this filesystem: check, then rename
            if final.exists():
                raise FileExistsError(errno.EEXIST, "a finished file is already there", str(final)) from None
            os.replace(tmp, final)
        else:
            os.unlink(tmp)
    fsync_folder(final.parent)


def _remove(path: Path) -> None:
    try:
        path.unlink()
    except OSError:   # never written, or the folder refuses even that: nothing to remove
        pass


@contextmanager
def atomic_output(path, suffix: str = ".tmp", unique: bool = True, replace: bool = True,
                  temporary=None, what: str | None = None, need_bytes: int = 0, **words) -> Iterator[Path]:
    """Write ``path`` atomically: yields the temporary path to write (same
    folder, :func:`temporary_path` with ``suffix`` and ``unique``, or
    ``temporary`` itself); when the block ends normally the file is fsync'ed
    and renamed into place (:func:`atomic_rename`, ``replace`` as there).
    When the block or the rename fails, the temporary file is removed, the
    old ``path`` is left as it was, and the exception goes on; with
    ``what`` (what the file is, for the message), an ``OSError`` that a
    full disk caused becomes :class:`~wavesweep.errors.DiskFull` for a write
    of about ``need_bytes``, worded by ``words`` (``need``, ``basis``,
    ``more_bytes``: as :func:`~wavesweep.io.diskspace.disk_full_from`).

    >>> with atomic_output(folder / "summary.nc", suffix=".part") as tmp:   # doctest: +SKIP
    ...     dataset.to_netcdf(tmp)
    """
    path = Path(path)
    tmp = Path(temporary) if temporary is not None else temporary_path(path, suffix, unique)
    try:
        yield tmp
        atomic_rename(tmp, path, replace=replace)
    except BaseException as e:
        _remove(tmp)
        full = disk_full_from(e, path, int(need_bytes), what=what, **words) \
            if what is not None and isinstance(e, OSError) else None
        if full is not None:
            raise full from e
        raise


def write_bytes_atomic(path, data: bytes, suffix: str = ".tmp", unique: bool = True, **options) -> Path:
    """Write ``data`` to ``path`` atomically (:func:`atomic_output`, whose
    ``options`` it takes); returns ``path``."""
    with atomic_output(path, suffix, unique, **options) as tmp:
        with open(tmp, "wb") as f:
            f.write(data)
    return Path(path)


def write_text_atomic(path, text: str, encoding: str = "utf-8", suffix: str = ".tmp", unique: bool = True,
                      **options) -> Path:
    """Write ``text`` to ``path`` atomically in ``encoding`` (as
    :func:`write_bytes_atomic`); returns ``path``."""
    return write_bytes_atomic(path, text.encode(encoding), suffix, unique, **options)
