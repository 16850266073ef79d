"""Numbers and places in words, as the report and the command line print them.

Small rules kept in one place so that every sentence reads the same: a count with its
noun in the right number ("1 run", "3 runs"), a mean count without a spurious decimal
("3 runs each", "3.3 runs each on average"), a region with its side only when it has
one ("unlabelled", never "unlabelled ()").
"""

from __future__ import annotations

import math


def plural(n: float, noun: str, many: str | None = None) -> str:
    """``noun`` or its plural (``many``, default ``noun + "s"``) for the number ``n``."""
    return noun if n == 1 else (many or noun + "s")


def count(n: float, noun: str, many: str | None = None) -> str:
    """``"1 voxel"``, ``"2 voxels"``, ``"1,024 voxels"`` (a whole float prints as an int)."""
    if isinstance(n, float) and n.is_integer():
        n = int(n)
    return f"{n:,} {plural(n, noun, many)}"


def mean_count(x: float, noun: str, many: str | None = None) -> str:
    """A mean count: ``"3 runs each"`` when whole, ``"3.3 runs each on average"``."""
    if not math.isfinite(x):
        return f"an unknown number of {many or noun + 's'} each"
    if float(x).is_integer():
        return f"{int(x)} {plural(x, noun, many)} each"
    return f"{x:.1f} {many or noun + 's'} each on average"


def place(region: object, hemisphere: object = None) -> str:
    """A region with its side in parentheses when it has one; ``"unlabelled"`` if none."""
    name = str(region).strip() if isinstance(region, str) else ""
    side = str(hemisphere).strip() if isinstance(hemisphere, str) else ""
    if not name:
        return "unlabelled"
    return f"{name} ({side})" if side else name
