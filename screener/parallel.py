"""One seam for running independent tasks: serially, in a process pool, or on Dask.

Every randomisation test in the screener draws its replicate seeds up front in the
parent (:func:`spawn_seeds`) and hands one task per replicate to an executor's
:meth:`~Executor.map`.  Because each task carries its own seed and ``map`` keeps the
input order, the results are identical whichever backend runs them.

Backends
--------
``"serial"``
    A plain loop in the calling process (the default; no start-up cost).
``"processes"``
    :class:`concurrent.futures.ProcessPoolExecutor`.  Workers are started with the
    ``"forkserver"`` method where the platform has it (``"spawn"`` otherwise): forking
    a parent that already runs threads (BLAS pools, a Dask client, a GUI) can deadlock
    the child.  Each worker is limited to one BLAS/OpenMP thread, so two workers use two
    cores and do not oversubscribe them.
``"dask"``
    :class:`distributed.Client` connected to ``address``, or to a new
    :class:`distributed.LocalCluster` (processes, one thread per worker) when no
    address is given.  Dask is optional: ``pip install 'screener[dask]'``.

Functions sent to ``"processes"`` or ``"dask"`` must be picklable: module-level
functions, or :func:`functools.partial` of them over picklable arguments.
"""

from __future__ import annotations

import contextlib
import logging
import math
import multiprocessing
import os
from collections.abc import Callable, Iterable
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from screener.errors import InputError

__all__ = ["Executor", "make_executor", "spawn_seeds", "default_n_workers"]

log = logging.getLogger(__name__)

_KINDS = ("serial", "processes", "dask")
_THREAD_ENV_VARS = (
    "OMP_NUM_THREADS",
    "OPENBLAS_NUM_THREADS",
    "MKL_NUM_THREADS",
    "BLIS_NUM_THREADS",
    "VECLIB_MAXIMUM_THREADS",
    "NUMEXPR_NUM_THREADS",
)
# Modules imported once by the fork server, so that each worker starts warm.
#: imported once by the fork server, so every worker starts with them loaded
_PRELOAD = ["numpy", "scipy.stats", "scipy.ndimage", "screener.parallel",
            "screener.models", "screener.evaluation", "screener.overlap"]
# Keeps the threadpoolctl limiter alive in each worker process.
_WORKER_LIMITS = []


def default_n_workers() -> int:
    """Number of CPU cores this process may use (at least 1)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def spawn_seeds(random_state, n: int) -> list[int]:
    """Draw ``n`` independent replicate seeds up front.

    Parameters
    ----------
    random_state : None, int or numpy.random.Generator
        Root of the seeds.  An int gives the same seeds every time; a Generator is
        advanced by one draw; None draws fresh entropy.
    n : int
        Number of seeds.

    Returns
    -------
    list of int
        Seeds in ``[0, 2**63)``, one per replicate, from independent children of a
        :class:`numpy.random.SeedSequence` (so replicate streams do not overlap).

    Examples
    --------
    >>> spawn_seeds(0, 3) == spawn_seeds(0, 3)
    True
    >>> len(set(spawn_seeds(0, 100)))
    100
    """
    n = int(n)
    if n < 0:
        raise ValueError(f"`n` must be non-negative; got {n}.")
    if isinstance(random_state, np.random.Generator):
        entropy = int(random_state.integers(0, 2**63))
    elif random_state is None or isinstance(random_state, (int, np.integer)):
        entropy = None if random_state is None else int(random_state)
    else:
        raise InputError(
            f"random_state must be None, an int or a numpy Generator; got "
            f"{type(random_state).__name__}."
        )
    root = np.random.SeedSequence(entropy)
    return [int(child.generate_state(1, np.uint64)[0] >> 1) for child in root.spawn(n)]


def _limit_worker_threads() -> None:
    """Process-pool initializer: one BLAS/OpenMP thread in this worker (and, as in
    the parent, no huge-page requests where they stall: screener.system)."""
    from screener.system import avoid_hugepage_stalls

    avoid_hugepage_stalls()
    for var in _THREAD_ENV_VARS:
        os.environ[var] = "1"
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl ships with scikit-learn
        return
    _WORKER_LIMITS.append(threadpool_limits(limits=1))


@contextlib.contextmanager
def _single_thread():
    """Limit BLAS/OpenMP pools to one thread for the duration (no-op without
    threadpoolctl)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl ships with scikit-learn
        yield
        return
    with threadpool_limits(limits=1):
        yield


def _run_batch(fn: Callable, batch: list) -> list:
    """Apply ``fn`` to each item of one batch (a Dask task)."""
    return [fn(item) for item in batch]


def _start_method(requested: str | None) -> str:
    methods = multiprocessing.get_all_start_methods()
    if requested is not None:
        if requested not in methods:
            raise InputError(
                f"start method {requested!r} is not available here; choose one of "
                f"{methods}."
            )
        return requested
    return "forkserver" if "forkserver" in methods else "spawn"


class Executor:
    """Order-preserving ``map`` over independent tasks on one backend.

    Use :func:`make_executor` to build one.  An executor is a context manager; leaving
    the ``with`` block (or calling :meth:`close`) shuts its workers down.

    Attributes
    ----------
    kind : str
        ``"serial"``, ``"processes"`` or ``"dask"``.
    n_workers : int
        Number of worker processes (1 for serial).
    """

    def __init__(
        self, kind: str, n_workers: int, *, _pool=None, _client=None, _cluster=None
    ):
        self.kind = kind
        self.n_workers = int(n_workers)
        self._pool = _pool
        self._client = _client
        self._cluster = _cluster
        self._closed = False

    def _chunks(self, n_items: int) -> int:
        # About four chunks per worker: few enough to keep per-task overhead small,
        # enough to balance uneven task times.
        return max(1, math.ceil(n_items / (4 * self.n_workers)))

    def map(self, fn: Callable, iterable: Iterable) -> list:
        """Apply ``fn`` to every item and return the results in input order.

        Parameters
        ----------
        fn : callable
            A picklable function of one argument (for "processes" and "dask").
        iterable : iterable
            Task arguments; consumed in full before work starts.

        Returns
        -------
        list
            ``[fn(item) for item in iterable]``, whichever backend ran it.
        """
        if self._closed:
            raise RuntimeError("this executor has been closed; make a new one.")
        items = list(iterable)
        if not items:
            return []
        if self.kind == "serial":
            # One BLAS/OpenMP thread per task here too, as in the workers: the tasks
            # are small, and multi-threaded BLAS on them is slower and erratic.
            with _single_thread():
                return [fn(item) for item in items]
        size = self._chunks(len(items))
        if self.kind == "processes":
            return list(self._pool.map(fn, items, chunksize=size))
        batches = [items[i : i + size] for i in range(0, len(items), size)]
        futures = [
            self._client.submit(_run_batch, fn, batch, pure=False) for batch in batches
        ]
        out = []
        for part in self._client.gather(futures):
            out.extend(part)
        return out

    def close(self) -> None:
        """Shut the workers down (idempotent)."""
        if self._closed:
            return
        self._closed = True
        if self._pool is not None:
            self._pool.shutdown(wait=True)
        if self._client is not None:
            self._client.close()
        if self._cluster is not None:
            self._cluster.close()

    def __enter__(self) -> Executor:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Executor(kind={self.kind!r}, n_workers={self.n_workers})"


def make_executor(
    kind: str = "serial",
    n_workers: int | None = None,
    address: str | None = None,
    *,
    start_method: str | None = None,
) -> Executor:
    """Build an executor for independent tasks.

    Parameters
    ----------
    kind : {"serial", "processes", "dask"}, default "serial"
        Backend (see the module docstring).
    n_workers : int, optional
        Worker processes; all usable cores when omitted.  Ignored for "serial" and when
        connecting to an existing Dask scheduler (the scheduler's workers are used).
    address : str, optional
        Dask scheduler address, e.g. ``"tcp://10.0.0.5:8786"``.  Only for "dask".
    start_method : str, optional
        Process start method for "processes" (default "forkserver" where available,
        else "spawn").

    Returns
    -------
    Executor

    Raises
    ------
    screener.errors.InputError
        Unknown ``kind``, a bad ``n_workers``, or "dask" without Dask installed.

    Examples
    --------
    >>> with make_executor("serial") as ex:
    ...     ex.map(abs, [-2, 1, -3])
    [2, 1, 3]
    """
    if kind not in _KINDS:
        raise InputError(f"executor kind {kind!r} is unknown; choose one of {_KINDS}.")
    if n_workers is not None and int(n_workers) < 1:
        raise InputError(f"n_workers must be at least 1; got {n_workers}.")
    if address is not None and kind != "dask":
        raise InputError("`address` is only used with kind='dask'.")
    if kind == "serial":
        return Executor("serial", 1)
    n = int(n_workers) if n_workers is not None else default_n_workers()
    if kind == "processes":
        method = _start_method(start_method)
        ctx = multiprocessing.get_context(method)
        if method == "forkserver":
            ctx.set_forkserver_preload(_PRELOAD)
        pool = ProcessPoolExecutor(
            max_workers=n, mp_context=ctx, initializer=_limit_worker_threads
        )
        log.debug("started a %d-worker process pool (%s)", n, method)
        return Executor("processes", n, _pool=pool)
    try:
        from distributed import Client, LocalCluster
    except ImportError as err:
        raise InputError(
            "kind='dask' needs Dask's distributed scheduler; install it with "
            "pip install 'screener[dask]'."
        ) from err
    if address is not None:
        client = Client(address)
        workers = client.scheduler_info().get("workers", {})
        n = max(1, len(workers))
        log.debug("connected to Dask scheduler %s (%d workers)", address, n)
        return Executor("dask", n, _client=client)
    cluster = LocalCluster(
        n_workers=n,
        threads_per_worker=1,
        processes=True,
        dashboard_address=None,
        env={var: "1" for var in _THREAD_ENV_VARS},
    )
    client = Client(cluster)
    log.debug("started a local Dask cluster with %d workers", n)
    return Executor("dask", n, _client=client, _cluster=cluster)
