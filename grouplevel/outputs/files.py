"""Writing files so that a reader never sees half of one, and NIfTI maps side by side."""

from __future__ import annotations

import os
import tempfile
import threading
from collections.abc import Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from contextlib import contextmanager
from pathlib import Path

import nibabel as nib

from grouplevel.machine import available_cores


def atomic_write(path: Path, data: bytes) -> None:
    """Write ``data`` to a temporary file beside ``path`` and rename it into place.

    The rename is atomic on one file system (POSIX ``rename``), so ``path`` holds
    either its old content or all of ``data``.
    """
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".partial", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


#: Threads that save NIfTI maps inside a :func:`parallel_saves` block. gzip (zlib)
#: compression, most of a ``.nii.gz`` save, releases Python's global lock, so maps
#: compress side by side on as many cores; more threads than cores gain nothing.
SAVE_THREADS = 2
#: Saves waiting for a thread at most, per thread: each holds its image's array, so
#: the bound keeps the memory of pending saves to a few maps.
PENDING_PER_THREAD = 2

_saves = threading.local()


class _ParallelSaves:
    """The thread pool of one :func:`parallel_saves` block and its pending saves."""

    def __init__(self, threads: int) -> None:
        self.pool = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="save")
        self.slots = threading.BoundedSemaphore(threads * PENDING_PER_THREAD)
        self.futures: list[Future] = []

    def submit(self, img, path: str) -> None:
        self.slots.acquire()  # wait while too many saves are pending
        try:
            future = self.pool.submit(nib.save, img, path)
        except BaseException:
            self.slots.release()
            raise
        future.add_done_callback(lambda _done: self.slots.release())
        self.futures.append(future)

    def finish(self) -> None:
        """Wait for every save; raise the first failure (in the order submitted)."""
        self.pool.shutdown(wait=True)
        for future in self.futures:
            future.result()


@contextmanager
def parallel_saves(threads: int | None = None) -> Iterator[None]:
    """Within the block, :func:`save_image` saves on ``threads`` threads (default: the
    smaller of :data:`SAVE_THREADS` and the cores this process may use).

    Every save has finished when the block ends, and the first failed save raises
    there; a save never outlives the block, so a folder moved into place after it is
    complete. Outside a block :func:`save_image` saves at once.
    """
    if getattr(_saves, "active", None) is not None:  # nested: the outer block waits
        yield
        return
    active = _ParallelSaves(threads or min(SAVE_THREADS, available_cores()))
    _saves.active = active
    try:
        yield
    except BaseException:
        active.pool.shutdown(wait=True, cancel_futures=True)
        raise
    finally:
        _saves.active = None
    active.finish()


def save_image(img, path: str | Path) -> None:
    """``nibabel.save(img, path)``, on a thread of the enclosing :func:`parallel_saves`
    block when there is one. The image must not change after this call."""
    active = getattr(_saves, "active", None)
    if active is None:
        nib.save(img, str(path))
    else:
        active.submit(img, str(path))
