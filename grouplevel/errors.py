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
