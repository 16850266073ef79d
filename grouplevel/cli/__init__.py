"""The command line: ``grouplevel check | run | report | plan | example``.

* :mod:`~grouplevel.cli.commands` — argument parsing and the commands (``main``);
* :mod:`~grouplevel.cli.overview` — the text ``grouplevel check`` prints.

``main`` is re-exported here (the console script is ``grouplevel.cli:main``).
"""

from __future__ import annotations

from typing import Any

__all__ = ["main"]


def __getattr__(name: str) -> Any:
    if name in ("main", "EXIT_USER_ERROR"):
        from grouplevel.cli import commands

        return getattr(commands, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
