"""Exceptions that carry enough context for a one-line message.

``JobError`` is bad input: the CLI prints ``"<field>: <message>"`` on one
line and exits with status 2.  Validation does not stop at the first one: it
gathers every independent error in an :class:`ErrorCollector` and raises them
together as :class:`JobErrors` (a JobError itself, so callers that catch
JobError keep working), and the CLI prints one line each.  ``RunFailed`` is a
numerical failure of a run (NaN, norm blow-up): a result with a reason, so a
queue can record it and go on.  ``DiskFull`` is a run stopped by a full
disk or an exhausted quota: a RunFailed (the command exits 1: the
environment failed, not the input), which a queue does not count against the
run (it goes back to the queue and resumes from its last checkpoint).
"""
from __future__ import annotations

from contextlib import contextmanager

__all__ = ["JobError", "JobErrors", "ErrorCollector", "combine_errors", "RunFailed", "DiskFull",
           "RunInterrupted"]


class JobError(ValueError):
    """Invalid job input; ``field`` is the dotted path of the offending key.

    Parameters
    ----------
    field : str
        Dotted job-file path such as ``"grid.x.points"`` or
        ``"potential.1.expression"``; empty for errors about the whole file.
    message : str
        What is wrong and how to fix it, in one line.
    """

    def __init__(self, field: str, message: str):
        self.field = field
        self.message = message
        super().__init__(f"{field}: {message}" if field else message)

    @property
    def errors(self) -> list["JobError"]:
        """The single errors this one stands for: itself."""
        return [self]

    def lines(self) -> list[str]:
        """One ``"field: message"`` line per error."""
        return [str(e) for e in self.errors]


class JobErrors(JobError):
    """Several independent errors of one job, found in one pass.

    ``errors`` lists them (in the order of the job file where the validator
    knows it); ``field`` and the start of ``message`` are the first one's, so
    code written for a single :class:`JobError` still names a real field, and
    ``str()`` is every error on one line, separated by ``" | "``.  Build it
    with :func:`combine_errors`, which returns the lone error unchanged when
    there is only one.
    """

    def __init__(self, errors):
        self._errors = list(errors)
        first, rest = self._errors[0], self._errors[1:]
        message = " | ".join([first.message, *(str(e) for e in rest)])
        super().__init__(first.field, message)

    @property
    def errors(self) -> list[JobError]:
        return list(self._errors)


def combine_errors(errors) -> JobError | None:
    """One exception for a list of JobErrors: None for none, the error itself
    for one, else :class:`JobErrors`.  Nested JobErrors are flattened and an
    error repeated with the same field and message is kept once."""
    flat, seen = [], set()
    for e in errors:
        for one in e.errors:
            key = (one.field, one.message)
            if key not in seen:
                seen.add(key)
                flat.append(one)
    if not flat:
        return None
    return flat[0] if len(flat) == 1 else JobErrors(flat)


class ErrorCollector:
    """Gathers the JobErrors of independent checks instead of stopping at
    the first::

        found = ErrorCollector()
        with found.check():
            out["grid"] = validate_grid(...)     # on error "grid" stays unset
        found.raise_if_any()

    A check that depends on an earlier one should run only if that one
    passed (test for its result): a consequence of an error is not an error
    of its own.
    """

    def __init__(self):
        self.errors: list[JobError] = []

    def __len__(self) -> int:
        return len(self.errors)

    def add(self, error: JobError) -> None:
        self.errors.extend(error.errors)

    @contextmanager
    def check(self):
        """Run the block; a JobError it raises is recorded and swallowed."""
        try:
            yield self
        except JobError as e:
            self.add(e)

    def raise_if_any(self, order=None) -> None:
        """Raise the errors gathered (sorted by ``order(error)`` if given,
        a stable sort), as one JobError or :class:`JobErrors`."""
        errors = sorted(self.errors, key=order) if order is not None else self.errors
        combined = combine_errors(errors)
        if combined is not None:
            raise combined


class RunFailed(RuntimeError):
    """A run stopped for a numerical reason (``reason`` is one line)."""

    def __init__(self, reason: str, step: int | None = None, time: float | None = None):
        self.reason = reason
        self.step = step
        self.time = time
        super().__init__(reason)


class DiskFull(RunFailed):
    """A write failed because the filesystem (or the user's quota) had no room.

    Parameters
    ----------
    path : the file that could not be written.
    free_bytes : bytes free for this user on that filesystem when the write
        failed (``os.statvfs``: ``f_bavail * f_frsize``), None if unknown.
    need_bytes : bytes the write still needed, as far as the writer knows
        them from the shapes of what it writes (an estimate before
        compression), None if unknown.
    what : what was being written ("the result", "the checkpoint", "the queue").
    need, basis : how the message says ``need_bytes`` and how it was found.

    ``reason`` is one line: ``"disk full: cannot write the result '...':
    12 KiB free there, and the rest of its data is about 1.4 MiB (from its
    shapes, before compression); free space there (or write elsewhere) and
    run again"``.
    """

    def __init__(self, path, free_bytes=None, need_bytes=None, what: str = "the result",
                 need: str = "the rest of its data is about",
                 basis: str = "from its shapes, before compression", step: int | None = None):
        self.path = str(path)
        self.free_bytes = None if free_bytes is None else int(free_bytes)
        self.need_bytes = None if need_bytes is None else int(need_bytes)
        self.what = what
        room = [] if self.free_bytes is None else [f"{human_bytes(self.free_bytes)} free there"]
        if self.need_bytes is not None:
            room.append(f"{need} {human_bytes(self.need_bytes)}" + (f" ({basis})" if basis else ""))
        text = f"disk full: cannot write {what} {self.path!r}"
        if room:
            text += ": " + ", and ".join(room)
        super().__init__(text + "; free space there (or write elsewhere) and run again", step=step)


def human_bytes(n: float) -> str:
    """A size as people read it: 812 B, 12.0 KiB, 1.4 MiB, 3.2 GiB."""
    n = float(n)
    for unit, size in (("TiB", 2**40), ("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if abs(n) >= size:
            return f"{n / size:.3g} {unit}"
    return f"{n:.0f} B"


class RunInterrupted(RuntimeError):
    """A run stopped on request (signal, ``--until``) after writing a
    checkpoint; ``checkpoint`` is its path, ``step`` the step it reached."""

    def __init__(self, checkpoint=None, step: int | None = None):
        self.checkpoint = checkpoint
        self.step = step
        super().__init__(f"interrupted at step {step}; checkpoint {checkpoint}")
