"""Parallel fits: one policy for threads and workers, on this machine or a Dask cluster.

Every retraining treeprobe does (noise-floor refits, validation folds,
constraint searches) goes through :func:`run_tasks`, which hands the tasks
to joblib. joblib runs them in local worker processes (``n_jobs``), or on a
Dask cluster when the caller wraps the call in joblib's Dask backend
(``with joblib.parallel_config(backend="dask"): ...``, or :func:`dask_cluster`
with a scheduler address; the command line's ``--scheduler ADDRESS``).

Threads: the libraries train with all cores by default. Inside parallel
workers that multiplies threads by workers, and OpenMP threads that wait for
each other on a busy machine slow every fit down (we measured one XGBoost fit
at 0.18 s with one thread and 10.5 s with two, on 2 cores with other work
running). The rule here: a fit inside parallel workers gets one thread; a fit
that runs alone (``n_jobs=1`` and no parallel backend active) gets every free
core: the cores this process may use, less the one-minute load average that
is not our own (at least one). :func:`threads_per_fit` states it once.

Examples
--------
>>> threads_per_fit(4)
1
>>> run_tasks(abs, [-1, 2, -3], n_jobs=1, label="demo", progress=False)
[1, 2, 3]
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any

from joblib import Parallel, delayed, parallel_config
from joblib.parallel import get_active_backend

from .errors import MissingLibraryError, ParameterError
from .progress import progress_bar

__all__ = ["threads_per_fit", "free_cores", "backend_is_parallel", "run_tasks", "dask_cluster"]


def backend_is_parallel(n_jobs: int) -> bool:
    """True when tasks run outside this process: ``n_jobs != 1``, or a distributed joblib backend is active."""
    if n_jobs != 1:
        return True
    backend, _ = get_active_backend()
    return "Dask" in type(backend).__name__


def free_cores() -> int:
    """Cores this process may use less the load of others (one-minute load average minus our own run), at least 1."""
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    try:
        others = max(os.getloadavg()[0] - 1.0, 0.0)
    except (AttributeError, OSError):
        return cores
    return max(1, min(cores, round(cores - others)))


def threads_per_fit(n_jobs: int) -> int:
    """Threads of one fit: 1 inside parallel workers (never threads x workers), 0 (every free core) for a lone fit.

    0 is resolved by :func:`free_cores` when the fit starts, so a long run follows the load.
    """
    return 1 if backend_is_parallel(n_jobs) else 0


def run_tasks(function: Callable[..., Any], items: Sequence[Any] | Iterable[Any], *, n_jobs: int, label: str,
              progress: bool | None) -> list[Any]:
    """``[function(item) for item in items]`` through joblib, in order, with one progress bar.

    With ``n_jobs == 1`` and no distributed backend active the tasks run in
    this process, one after another. Otherwise joblib runs them in its active
    backend (local processes, or Dask workers under :func:`dask_cluster`); a
    distributed backend uses all its workers when ``n_jobs == 1``.
    """
    items = list(items)
    with progress_bar(len(items), label, enabled=progress) as bar:
        if not backend_is_parallel(n_jobs):
            results = []
            for item in items:
                results.append(function(item))
                bar.update()
            return results
        workers = n_jobs if n_jobs != 1 else -1
        results = []
        for value in Parallel(n_jobs=workers, return_as="generator")(delayed(function)(item) for item in items):
            results.append(value)
            bar.update()
        return results


@contextmanager
def dask_cluster(address: str | None) -> Iterator[Any]:
    """Run the tasks of the enclosed calls on the Dask cluster at ``address`` (None: do nothing).

    Connects a ``distributed.Client`` (timeout 10 s) and activates joblib's
    Dask backend, so every :func:`run_tasks` inside goes to the cluster's
    workers, one thread per fit.

    Raises
    ------
    MissingLibraryError
        ``distributed`` is not installed (``pip install "treeprobe[dask]"``).
    ParameterError
        No scheduler answers at ``address``.
    """
    if address is None:
        yield None
        return
    try:
        from distributed import Client
    except ImportError:
        raise MissingLibraryError('a Dask scheduler needs the distributed package (pip install "dask[distributed]")') from None
    try:
        client = Client(address, timeout=10)
    except (OSError, TimeoutError, ValueError) as exc:
        raise ParameterError(f"no Dask scheduler answered at {address!r} ({exc})") from None
    try:
        with parallel_config(backend="dask"):
            yield client
    finally:
        client.close()
