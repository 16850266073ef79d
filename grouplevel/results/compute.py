"""Where the heavy work runs: in this process, or spread over a dask.distributed cluster.

Two steps of an analysis dominate its run time, and both split into independent pieces:

* the REML fit: every voxel is fitted on its own, so the voxels can be cut into chunks,
  each chunk fitted anywhere, and the results put back in order
  (:func:`fit_voxel_chunks`; :func:`fit_design` picks the model — one random intercept
  per animal, or the general model with random slopes, sessions and per-group
  variances);
* the permutation test: every permutation of the plan is evaluated on its own, so
  batches of permutations can run anywhere once the arrays they share have been sent
  (:func:`grouplevel.inference.permutation.permutation_test` with ``backend=``).

:func:`open_backend` turns the ``[compute]`` settings into a :class:`Backend` — a context
manager that owns whatever it started. ``"local"`` runs everything here, exactly as
without a backend. ``"dask"`` connects to a running scheduler, or starts a cluster of
worker processes on this machine (loopback only) and shuts it down on exit.

The results do not depend on the backend: chunks are fitted by the same compiled kernel
and the permutation plan is drawn here, from the one seeded generator, before anything
is sent out. The optional packages ``dask`` and ``distributed`` are imported only when
the dask backend is opened.

References
----------
Rocklin M (2015). Dask: parallel computation with blocked algorithms and task
scheduling. Proceedings of the 14th Python in Science Conference, pp. 130-136.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, fields
from typing import Any

import numpy as np

from grouplevel.errors import UserError
from grouplevel.intake.settings import BACKENDS, ComputeSettings
from grouplevel.machine import available_cores
from grouplevel.model.marginal import RandomTerms
from grouplevel.model.reml import MixedFit, _check_inputs, fit_reml

# Seconds to wait for a remote scheduler before giving up (distributed's own default
# connect timeout is 30 s; common practice).
CONNECT_TIMEOUT_S = 30.0
# Tasks per worker for a distributed fit or permutation test: a few per worker keep every
# worker busy when tasks take unequal time, without paying the per-task overhead
# (a few milliseconds) too often (common practice for task schedulers).
TASKS_PER_WORKER = 4
# Smallest voxel chunk sent as one fitting task: below this the transfer and scheduling
# cost more than the fit (our own choice; a chunk of 2048 voxels × 30 runs fits in ~10 ms).
MIN_CHUNK_VOXELS = 2048
# Smallest and largest number of permutations in one task (our own choice: at least the
# batch of the local engine, and small enough that progress is reported often).
MIN_PERMUTATION_BATCH = 16
MAX_PERMUTATION_BATCH = 256


@dataclass(frozen=True, eq=False)
class Backend:
    """An open compute backend (see :func:`open_backend`).

    Attributes
    ----------
    kind
        ``"local"`` or ``"dask"``.
    client
        The ``distributed.Client`` of a dask backend; None for the local one.
    workers
        Number of worker processes (1 for the local backend).
    """

    kind: str
    client: Any = None
    workers: int = 1

    @property
    def distributed(self) -> bool:
        """True when work is sent to worker processes."""
        return self.client is not None

    def permutation_batch(self, n: int) -> int:
        """Permutations per task for a plan of ``n`` permutations."""
        size = math.ceil(n / (TASKS_PER_WORKER * self.workers))
        return int(min(MAX_PERMUTATION_BATCH, max(MIN_PERMUTATION_BATCH, size)))

    def map_batches(
        self,
        func: Callable[[Any, np.ndarray], np.ndarray],
        shared: Any,
        batches: list[np.ndarray],
        progress: Callable[[int], None] | None = None,
    ) -> list[np.ndarray]:
        """``[func(shared, b) for b in batches]``, in the order of ``batches``.

        On a dask backend ``shared`` is sent to every worker once (``broadcast=True``)
        and each batch is one task; ``func`` must be importable by the workers (a module
        level function of an installed package). ``progress(len(b))`` is called as each
        batch finishes, in the order they finish.
        """
        if self.client is None:
            out = []
            for b in batches:
                out.append(func(shared, b))
                if progress is not None:
                    progress(len(b))
            return out
        from distributed import as_completed

        remote = self.client.scatter(shared, broadcast=True, hash=False)
        futures = [self.client.submit(func, remote, b, pure=False) for b in batches]
        position = {f.key: i for i, f in enumerate(futures)}
        out: list[np.ndarray | None] = [None] * len(batches)
        try:
            done = as_completed(futures, with_results=True, loop=self.client.loop)
            for future, result in done:
                i = position[future.key]
                out[i] = result
                if progress is not None:
                    progress(len(batches[i]))
        except BaseException:  # interrupted or failed: stop the tasks still queued
            self.client.cancel(futures)
            raise
        return out


@contextmanager
def open_backend(
    settings: ComputeSettings, *, connect_timeout_s: float = CONNECT_TIMEOUT_S
) -> Iterator[Backend]:
    """Open the backend that ``settings`` (the ``[compute]`` section) asks for.

    Parameters
    ----------
    settings
        ``backend`` ``"local"`` runs everything in this process. ``"dask"`` connects to
        ``scheduler`` (an address such as ``"tcp://scheduler-host:8786"``) or, when
        that is None, starts ``distributed.LocalCluster`` with ``workers``
        single-threaded worker processes (default: this machine's cores), the cluster
        and its HTTP endpoint listening on 127.0.0.1 only.
    connect_timeout_s
        How long to wait for the scheduler.

    Yields
    ------
    Backend
        Closed on exit, together with the cluster it started (a remote scheduler and
        its workers are left running).

    Raises
    ------
    UserError
        For an unknown backend, a worker count below 1, missing optional packages or a
        scheduler that cannot be reached.
    """
    if settings.backend not in BACKENDS:
        raise UserError(
            f"[compute] backend must be one of {', '.join(BACKENDS)}, got "
            f"{settings.backend!r}; set it in the study file's [compute] section."
        )
    if settings.backend == "local":
        yield Backend(kind="local")
        return
    if settings.workers is not None and settings.workers < 1:
        raise UserError(
            f"[compute] workers must be at least 1, got {settings.workers}; leave it out "
            "to use one worker per core."
        )
    try:
        from distributed import Client, LocalCluster
    except ImportError as err:
        raise UserError(
            '[compute] backend = "dask" needs the optional packages dask and distributed: '
            "pip install 'grouplevel[distributed]', or set backend = \"local\"."
        ) from err
    cluster = None
    if settings.scheduler is None:
        cluster = LocalCluster(
            n_workers=settings.workers or available_cores(),
            threads_per_worker=1,
            processes=True,
            host="127.0.0.1",
            # the scheduler's small HTTP server (metrics) listens on loopback, on a free
            # port: nothing of a local cluster is reachable from outside this machine
            dashboard_address="127.0.0.1:0",
        )
        address = cluster.scheduler_address
    else:
        address = settings.scheduler
    try:
        try:
            client = Client(address, timeout=f"{connect_timeout_s}s", set_as_default=False)
        except (OSError, TimeoutError) as err:
            raise UserError(
                f"[compute] scheduler: cannot reach the dask scheduler at {address!r} "
                f"within {connect_timeout_s:g} s ({err}); start it with "
                "'dask scheduler' and its workers with 'dask worker ADDRESS', or leave "
                "scheduler out to start a cluster on this machine."
            ) from err
        try:
            n_workers = len(client.scheduler_info()["workers"])
            yield Backend(kind="dask", client=client, workers=max(1, n_workers))
        finally:
            client.close()
    finally:
        if cluster is not None:
            cluster.close()


def _chunk_bounds(n_voxels: int, n_chunks: int) -> list[tuple[int, int]]:
    edges = np.linspace(0, n_voxels, n_chunks + 1).round().astype(int)
    return [(int(lo), int(hi)) for lo, hi in zip(edges[:-1], edges[1:], strict=True) if hi > lo]


def fit_voxel_chunks(
    backend: Backend,
    y: np.ndarray,
    variance: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    /,
    *,
    n_chunks: int | None = None,
    **fit_kwargs: Any,
) -> MixedFit:
    """:func:`~grouplevel.model.reml.fit_reml` with the voxels spread over a backend.

    Parameters
    ----------
    backend
        From :func:`open_backend`. The local backend makes one ``fit_reml`` call here.
    y, variance, X, animal
        As for ``fit_reml``: ``y`` and ``variance`` are (n_runs, V).
    n_chunks
        Voxel chunks (tasks) for a dask backend; default ``TASKS_PER_WORKER`` per worker,
        with chunks of at least ``MIN_CHUNK_VOXELS`` voxels.
    **fit_kwargs
        Passed to ``fit_reml`` unchanged (``estimate_run_variance``, ``max_iter``, and
        its own ``backend="compiled" | "numpy"``: the arguments before are
        positional-only, so the names do not clash).

    Returns
    -------
    MixedFit
        Identical to one ``fit_reml`` call on all voxels: each voxel is fitted on its
        own, so cutting the voxels into chunks changes no number.

    Notes
    -----
    Each chunk's columns of ``y`` and ``variance`` are sent to one worker; ``X`` and
    ``animal`` are small and go with every task. The concatenated result needs the same
    memory here as a local fit.
    """
    if backend.client is None:
        return fit_reml(y, variance, X, animal, **fit_kwargs)
    # the same checks as fit_reml, here on all voxels, so a mistake is reported once
    # and with whole-study counts rather than from inside one chunk
    y, variance, X, animal = _check_inputs(
        y, variance, X, animal, fit_kwargs.get("estimate_run_variance", True)
    )
    n_vox = y.shape[1]
    if n_chunks is None:
        n_chunks = min(TASKS_PER_WORKER * backend.workers, math.ceil(n_vox / MIN_CHUNK_VOXELS))
    if n_chunks < 1:
        raise UserError(f"fit_voxel_chunks: n_chunks must be at least 1, got {n_chunks}.")
    bounds = _chunk_bounds(n_vox, max(1, min(n_chunks, n_vox)))
    if not bounds:  # no voxels at all: fit_reml returns the empty fit
        return fit_reml(y, variance, X, animal, **fit_kwargs)
    pieces = [(y[:, lo:hi], None if variance is None else variance[:, lo:hi]) for lo, hi in bounds]
    client = backend.client
    remote = client.scatter([p for piece in pieces for p in piece if p is not None], hash=False)
    step = 1 if variance is None else 2
    futures = []
    for i in range(len(pieces)):
        yc = remote[step * i]
        vc = None if variance is None else remote[step * i + 1]
        futures.append(client.submit(fit_reml, yc, vc, X, animal, pure=False, **fit_kwargs))
    try:
        fits = client.gather(futures)
    except BaseException:  # interrupted or failed: stop the tasks still queued
        client.cancel(futures)
        raise
    return _concatenate(fits)


def _concatenate(fits: list[Any]) -> Any:
    """Put the fits of consecutive voxel chunks together, in order.

    Works for either fit type: array fields are joined along the voxels, dict fields
    (the variance components of the general model) key by key, the rest is shared.
    """
    kind = type(fits[0])
    values = {}
    for f in fields(kind):
        first = getattr(fits[0], f.name)
        if isinstance(first, np.ndarray) and first.ndim >= 1:
            values[f.name] = np.concatenate([getattr(fit, f.name) for fit in fits], axis=0)
        elif isinstance(first, dict):
            values[f.name] = {
                k: np.concatenate([getattr(fit, f.name)[k] for fit in fits], axis=0) for k in first
            }
        else:  # settings shared by every chunk (estimate_run_variance, counts)
            values[f.name] = first
    return kind(**values)


def random_terms(design: Any, random: Any) -> RandomTerms:
    """The random terms a design's model is fitted with (``RandomTerms()`` for the
    random-intercept model): what every later use of the fitted model needs to rebuild
    its covariance (:mod:`grouplevel.model.marginal`)."""
    if not random.extended:
        return RandomTerms()
    slopes = design.matrix[:, list(random.slope_columns)] if random.slope_columns else None
    return RandomTerms(
        slopes=slopes,
        slope_names=tuple(design.columns[j] for j in random.slope_columns),
        session=design.session if random.sessions else None,
        animal_group=random.animal_group,
        group_names=tuple(random.group_names) if random.animal_group is not None else (),
    )


def fit_design(
    backend: Backend,
    y: np.ndarray,
    variance: np.ndarray | None,
    design: Any,
    random: Any,
    *,
    estimate_run_variance: bool,
    max_iter: int,
    memory_gb: float | None,
    n_chunks: int | None = None,
) -> Any:
    """Fit one first-level contrast's model with the random effects its design needs.

    Parameters
    ----------
    backend
        From :func:`open_backend`.
    y, variance
        (n_runs, V) effects and first-level variances.
    design
        A :class:`grouplevel.intake.design.Design`.
    random
        Its :class:`grouplevel.intake.design.RandomEffects`. Without random slopes, sessions or
        variance groups the run-within-animal model is fitted by
        :func:`~grouplevel.model.reml.fit_reml` (a :class:`MixedFit`); otherwise the
        general model by :func:`grouplevel.model.mixed.fit_mixed` (a
        ``MixedModelFit``), its voxels spread over the backend in the same way.
    estimate_run_variance, max_iter, memory_gb
        Passed to the fit.
    """
    if not random.extended:
        return fit_voxel_chunks(
            backend,
            y,
            variance,
            design.matrix,
            design.animal,
            n_chunks=n_chunks,
            estimate_run_variance=estimate_run_variance,
            max_iter=max_iter,
            memory_gb=memory_gb,
        )
    from grouplevel.model.mixed import fit_mixed

    terms = random_terms(design, random)
    kwargs = {
        "slopes": terms.slopes,
        "slope_names": terms.slope_names,
        "session": terms.session,
        "animal_group": terms.animal_group,
        "group_names": terms.group_names,
        "estimate_run_variance": estimate_run_variance,
        "max_iter": max_iter,
        "memory_gb": memory_gb,
    }
    if backend.client is None:
        return fit_mixed(y, variance, design.matrix, design.animal, **kwargs)
    n_vox = y.shape[1]
    if n_chunks is None:
        n_chunks = min(TASKS_PER_WORKER * backend.workers, math.ceil(n_vox / MIN_CHUNK_VOXELS))
    bounds = _chunk_bounds(n_vox, max(1, min(max(n_chunks, 1), max(n_vox, 1))))
    if len(bounds) <= 1:
        return fit_mixed(y, variance, design.matrix, design.animal, **kwargs)
    client = backend.client
    futures = [
        client.submit(
            fit_mixed,
            y[:, lo:hi],
            None if variance is None else variance[:, lo:hi],
            design.matrix,
            design.animal,
            pure=False,
            **kwargs,
        )
        for lo, hi in bounds
    ]
    try:
        fits = client.gather(futures)
    except BaseException:  # interrupted or failed: stop the tasks still queued
        client.cancel(futures)
        raise
    return _concatenate(fits)
