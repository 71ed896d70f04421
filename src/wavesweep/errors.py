"""Exceptions that carry enough context for a one-line message.

``JobError`` is bad input: the CLI prints ``"<field>: <message>"`` on one
line and exits with status 2.  ``RunFailed`` is a numerical failure of a run
(NaN, norm blow-up): a result with a reason, so a queue can record it and go
on.
"""
from __future__ import annotations

__all__ = ["JobError", "RunFailed", "RunInterrupted"]


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


class RunFailed(RuntimeError):
    """A run stopped for a numerical reason (``reason`` is one line)."""

    def __init__(self, reason: str, step: int | None = None, time: float | None = None):
        self.reason = reason
        self.step = step
        self.time = time
        super().__init__(reason)


class RunInterrupted(RuntimeError):
    """A run stopped on request (signal, ``--until``) after writing a
    checkpoint; ``checkpoint`` is its path, ``step`` the step it reached."""

    def __init__(self, checkpoint=None, step: int | None = None):
        self.checkpoint = checkpoint
        self.step = step
        super().__init__(f"interrupted at step {step}; checkpoint {checkpoint}")
