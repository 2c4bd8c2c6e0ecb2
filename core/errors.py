"""The exception hierarchy of Longrun.

Every error a user can cause derives from :class:`LongrunError`; the command
line turns any of them into a message on stderr and exit status 2, and the app
into a dialog.  Anything else escaping is a bug.
"""
from __future__ import annotations

__all__ = [
    "LongrunError",
    "ChainFileError",
    "ValidationError",
    "LimitError",
    "OptionError",
]


class LongrunError(Exception):
    """Base class of all errors caused by input (files, options, models)."""


class ChainFileError(LongrunError):
    """A file could not be read as a chain or matrix file.

    Parameters
    ----------
    message : str
        What is wrong, in plain words.
    path : str, optional
        The file concerned, included in ``str(error)``.
    where : str, optional
        The place inside the file (``"line 4"``, ``"/states/2/id"``).
    """

    def __init__(self, message: str, *, path: str | None = None, where: str | None = None):
        self.message = message
        self.path = path
        self.where = where
        parts = [p for p in (path, where) if p]
        prefix = ": ".join(parts)
        super().__init__(f"{prefix}: {message}" if prefix else message)


class ValidationError(LongrunError):
    """A chain breaks one or more rules; ``problems`` lists every one of them.

    Parameters
    ----------
    problems : sequence of core.model.Problem
        All problems found, in file order.
    """

    def __init__(self, problems, *, source: str | None = None):
        self.problems = tuple(problems)
        self.source = source
        n = len(self.problems)
        head = f"{source}: " if source else ""
        lines = [f"{head}the chain is not valid ({n} problem{'s' if n != 1 else ''}):"]
        lines += [f"  - {p.message}" for p in self.problems]
        super().__init__("\n".join(lines))


class LimitError(LongrunError):
    """A request exceeds a resource guard (memory, size, time).

    The message states the limit and how to raise it.
    """


class OptionError(LongrunError):
    """An option or argument has a value that cannot be used."""
