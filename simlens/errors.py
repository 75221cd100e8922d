"""Errors that simlens reports to users.

A *user error* (a bad recipe, an unwritable folder, an existing run) is a :class:`SimlensError`:
the command line prints its message alone, without a traceback, and exits with status 2.
Anything else escaping simlens is a bug and keeps its traceback.
"""

from __future__ import annotations


class SimlensError(Exception):
    """A problem the user can fix; the message says what, where and how."""


class RecipeError(SimlensError):
    """A recipe that cannot be used as written.

    Parameters
    ----------
    source:
        Where the recipe came from (a file path, or ``"<recipe>"`` for text).
    key_path:
        Dotted path of the offending key, e.g. ``"lens.mass.q"`` (empty for the whole file).
    problem:
        What is wrong, including the offending value.
    accepted:
        What would be accepted instead (optional).
    """

    def __init__(self, source: str, key_path: str, problem: str, accepted: str = ""):
        self.source = source
        self.key_path = key_path
        self.problem = problem
        self.accepted = accepted
        where = f"{source}: {key_path}" if key_path else source
        message = f"{where}: {problem}"
        if accepted:
            message += f" (accepted: {accepted})"
        super().__init__(message)


class SimlensWarning(UserWarning):
    """Something the user should know that does not stop the command (the command line prints
    the message alone, as ``simlens: warning: ...``)."""
