"""The one error type for mistakes in a user's study, configuration or files.

The command line prints a :class:`UserError` on one line (``error: ...``) and exits
with status 2. Anything else that escapes is an internal bug (exit 1, traceback).
"""

from __future__ import annotations


class UserError(Exception):
    """A problem the user can fix: the message names the file, row or key.

    Parameters
    ----------
    message
        What is wrong and how to fix it, naming the file, row or key.
    problems
        When several independent problems were found at once (``grouplevel check``
        collects them all), each one as its own line; ``message`` then summarises.
    """

    def __init__(self, message: str, problems: list[str] | None = None) -> None:
        super().__init__(message)
        self.problems: list[str] = list(problems or [])

    def __str__(self) -> str:  # one line per problem after the summary
        head = super().__str__()
        if not self.problems:
            return head
        return head + "\n" + "\n".join(f"  - {p}" for p in self.problems)


class ArgumentError(UserError, ValueError):
    """A bad argument to a function of the numerical core, said in the core's own words.

    The core (``model/``, ``inference/``, the maths of ``anatomy/``, ``questions/`` and
    ``planning/``) knows arrays and arguments, not study files: its messages name the
    argument, never a TOML key. It is a :class:`ValueError` for Python callers. It is
    also a :class:`UserError`, so that a bad value that came from the user's data and
    reached the core untranslated still ends on one ``error:`` line at the command line
    instead of a traceback; the shells translate the ones a setting can cause into
    messages naming the key (see ``pipeline.py`` and ``questions/ask.py``).
    """
