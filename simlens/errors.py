"""Errors that simlens reports to users.

A *user error* (a bad recipe, an unwritable folder, an existing run) is a :class:`SimlensError`:
the command line prints its message alone, without a traceback, and exits with status 2.  A
:class:`RunError` is a run that started and failed (exit status 1).  Anything else escaping simlens
is a bug: the command line prints one line naming it and exits 1; ``--debug`` shows the traceback.
"""

from __future__ import annotations

from contextlib import contextmanager

__all__ = ["SimlensError", "RecipeError", "RunError", "SimlensWarning", "clip", "reported_as", "OUT_OF_MEMORY"]

OUT_OF_MEMORY = ("out of memory; lower survey.supersampling, survey.cutout_size or output.shard_size, "
                 "or use fewer --workers")


def clip(text: str, limit: int = 80) -> str:
    """``text`` as one printable line of at most ``limit`` characters, for echoing user input in a
    message (a key, a name, a path): control characters are escaped, the middle is cut."""
    text = str(text)
    if not text.isprintable():
        text = text.encode("unicode_escape", "backslashreplace").decode("ascii")
    if len(text) > limit:
        half = (limit - 3) // 2
        text = text[:half] + "..." + text[-half:]
    return text


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
        where = f"{clip(source, 200)}: {clip(key_path)}" if key_path else clip(source, 200)
        message = f"{where}: {problem}"
        if accepted:
            message += f" (accepted: {accepted})"
        super().__init__(message)


class RunError(SimlensError):
    """A run that started and could not finish (a system that cannot be drawn, a full disk); the
    command line exits with status 1 instead of the 2 of an input error."""


class SimlensWarning(UserWarning):
    """Something the user should know that does not stop the command (the command line prints
    the message alone, as ``simlens: warning: ...``)."""


@contextmanager
def reported_as(where: str):
    """Turn an unexpected error inside the block into a :class:`RunError` naming ``where`` (a
    system, a shard, a file); simlens's own errors and OS errors (a full disk, a permission, which
    their callers explain) pass unchanged.  The original stays attached as ``__cause__``."""
    try:
        yield
    except (SimlensError, OSError):
        raise
    except MemoryError as exc:
        raise RunError(f"{where}: {OUT_OF_MEMORY}") from exc
    except Exception as exc:
        raise RunError(f"{where}: {type(exc).__name__}: {clip(exc, 200)} (an error inside simlens: "
                       f"please report it with the recipe; --debug shows the traceback)") from exc
