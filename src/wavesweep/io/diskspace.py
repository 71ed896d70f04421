"""Telling a full disk from other write failures.

A full filesystem or an exhausted quota reaches us in two forms: an
``OSError`` with ``errno`` ENOSPC or EDQUOT (plain file writes, copies,
``np.savez``, SQLite's "database or disk is full"), or an opaque
``RuntimeError("NetCDF: HDF error")`` from netCDF4, whose HDF5 layer does not
pass the errno on.  For the opaque form the folder is asked directly: the
bytes free for this user (``os.statvfs``: ``f_bavail * f_frsize``) against
what the failed write needed, and a probe that reserves that much plus a
margin in a temporary file (``posix_fallocate``; it reports a quota too,
which statvfs does not show) and removes it again.
"""
from __future__ import annotations

import errno
import os
import tempfile
from pathlib import Path

from ..errors import DiskFull

__all__ = ["NO_SPACE", "free_bytes", "is_no_space", "out_of_space", "disk_full_from"]

NO_SPACE = frozenset(e for e in (errno.ENOSPC, getattr(errno, "EDQUOT", None)) if e is not None)
# HDF5 allocates metadata and chunks beyond the data it was handed: a write
# of N bytes can need this much more (our choice, a few HDF5 metadata blocks
# and B-tree nodes with room to spare).
MARGIN_BYTES = 1 << 20
# The probe reserves at most this much: enough to tell "no room" from "some
# other failure" without writing a large file on a filesystem that emulates
# fallocate by writing zeros.
PROBE_MAX_BYTES = 64 << 20


def free_bytes(folder) -> int | None:
    """Bytes this user may still write on the filesystem of ``folder``
    (None if it cannot be asked)."""
    try:
        st = os.statvfs(folder)
    except (OSError, AttributeError):
        return None
    return int(st.f_bavail) * int(st.f_frsize)


def is_no_space(exc: BaseException | None) -> bool:
    """True when ``exc`` or an exception it was raised from is an OSError
    with errno ENOSPC or EDQUOT, or SQLite's SQLITE_FULL."""
    seen = set()
    while exc is not None and id(exc) not in seen:
        seen.add(id(exc))
        if isinstance(exc, DiskFull):
            return True
        if isinstance(exc, OSError) and exc.errno in NO_SPACE:
            return True
        name = getattr(exc, "sqlite_errorname", None)
        if name == "SQLITE_FULL" or (name is None and type(exc).__module__.startswith("sqlite3")
                                     and "disk is full" in str(exc)):
            return True
        exc = exc.__cause__ or exc.__context__
    return False


def _probe(folder: Path, nbytes: int) -> bool:
    """True when ``nbytes`` cannot be reserved in ``folder`` for lack of room."""
    try:
        fd, name = tempfile.mkstemp(prefix=".space-probe.", dir=folder)
    except OSError as e:
        return e.errno in NO_SPACE
    try:
        try:
            os.posix_fallocate(fd, 0, max(1, int(nbytes)))
            return False
        except OSError as e:
            if e.errno in NO_SPACE:
                return True
            if e.errno not in (errno.EOPNOTSUPP, errno.EINVAL, getattr(errno, "ENOTSUP", errno.EOPNOTSUPP)):
                return False
        except AttributeError:   # no posix_fallocate on this platform
            pass
        chunk = b"\0" * (1 << 16)
        left = int(nbytes)
        try:
            while left > 0:
                left -= os.write(fd, chunk[:min(left, len(chunk))])
            os.fsync(fd)
        except OSError as e:
            return e.errno in NO_SPACE
        return False
    finally:
        os.close(fd)
        try:
            os.unlink(name)
        except OSError:
            pass


def out_of_space(exc: BaseException, folder, need_bytes: int = 0) -> bool:
    """Did a write into ``folder`` that needed about ``need_bytes`` fail
    with ``exc`` because there was no room?  Yes for ENOSPC / EDQUOT (or
    SQLITE_FULL) anywhere in the exception's chain; for an opaque failure
    (netCDF4's RuntimeError, an OSError without a telling errno) yes when
    fewer than ``need_bytes`` are free, or when ``need_bytes`` plus
    :data:`MARGIN_BYTES` (at most :data:`PROBE_MAX_BYTES`) cannot be
    reserved there."""
    if is_no_space(exc):
        return True
    if isinstance(exc, OSError) and exc.errno not in (None, errno.EIO):
        return False     # permissions, a missing folder, ...: said as they are
    if not isinstance(exc, (RuntimeError, OSError)):
        return False
    folder = Path(folder)
    free = free_bytes(folder)
    if free is not None and free < need_bytes:
        return True
    return _probe(folder, min(int(need_bytes) + MARGIN_BYTES, PROBE_MAX_BYTES))


def disk_full_from(exc: BaseException, path, need_bytes: int = 0, what: str = "the result",
                   more_bytes: int | None = None, need: str = "the rest of its data is about",
                   basis: str = "from its shapes, before compression") -> DiskFull | None:
    """A :class:`~wavesweep.errors.DiskFull` for ``exc``, a failed write of
    ``path`` that needed about ``need_bytes`` at that moment, if it was a
    full disk (:func:`out_of_space`); None otherwise.  ``more_bytes``: what
    the file still needs in all (what the message states), default
    ``need_bytes``; ``need`` and ``basis`` word it."""
    if isinstance(exc, DiskFull):
        return exc
    path = Path(path)
    if not out_of_space(exc, path.parent, need_bytes):
        return None
    return DiskFull(path, free_bytes(path.parent), need_bytes if more_bytes is None else more_bytes,
                    what=what, need=need, basis=basis)
