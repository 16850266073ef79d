"""Compiled kernels that load numba only when one of them is first called.

``@lazy_njit(...)`` takes the same options as ``numba.njit`` and marks a function of a
kernel module. Nothing is imported or compiled when the module is imported; the first
call of any marked function of a module compiles (or loads from numba's cache) every
marked function of that module at once and puts the compiled functions in the module's
namespace, so kernels that call each other see compiled callees. ``grouplevel check``
therefore runs without numba (about a second of import), and a run pays for it once,
when it first fits.
"""

from __future__ import annotations

import functools
import sys
import threading
from collections.abc import Callable
from typing import Any

_PENDING: dict[str, list[tuple[str, Callable[..., Any], dict[str, Any]]]] = {}
_LOCK = threading.Lock()


def lazy_njit(**options: Any) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    """``numba.njit(**options)``, applied when a kernel of the module is first called."""

    def mark(func: Callable[..., Any]) -> Callable[..., Any]:
        _PENDING.setdefault(func.__module__, []).append((func.__name__, func, options))

        @functools.wraps(func)
        def first_call(*args: Any, **kwargs: Any) -> Any:
            return compile_module(func.__module__)[func.__name__](*args, **kwargs)

        return first_call

    return mark


def compile_module(module_name: str) -> dict[str, Any]:
    """Compile every marked kernel of a module (once); its namespace afterwards."""
    namespace = sys.modules[module_name].__dict__
    with _LOCK:
        pending = _PENDING.pop(module_name, None)
        if pending:
            from numba import njit

            for name, func, options in pending:
                namespace[name] = njit(**options)(func)
    return namespace
