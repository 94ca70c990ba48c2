"""Run independent tasks in local worker processes or on a Dask cluster, with the same results.

A stage splits its work into independent, deterministic tasks (for the
upper limits: chunks of pixel × frequency rows) and hands them to a
:class:`TaskRunner`:

* ``workers=1``: in this process, one after the other;
* ``workers=N`` (default: the CPUs this process may use): N local worker
  processes (started by a fork server, so they never inherit threads of
  the main process); each watches the main process and exits within a
  second of its death, so a ``kill -9`` of cwsearch leaves no orphans;
* ``scheduler="tcp://host:8786"``: the tasks go to an existing
  ``dask.distributed`` cluster.

Results come back in task order whatever the runner's kind and the number
of workers, so a stage that reduces them in that order gets identical numbers
everywhere. A task that fails because its worker died (a killed Dask worker,
``KilledWorker``; a crashed local process) is resubmitted up to ``retries``
times; other errors are raised. ``on_done(weight)`` is called as each task
finishes, for progress bars.

The task function must be importable by the workers (a module-level
function of an installed package) and its argument and result picklable.

Examples
--------
>>> from cwsearch.inference.execution import TaskRunner
>>> with TaskRunner(workers=1) as runner:
...     runner.map(abs, [-1, 2, -3])
[1, 2, 3]
"""

from __future__ import annotations

import multiprocessing
import os
import threading
import time
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool

from ..core.errors import InputError


def available_cpus() -> int:
    """Number of CPUs this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


class TaskRunner:
    """Context manager that maps a function over tasks on the chosen kind of runner.

    Parameters
    ----------
    workers : int or None
        Local worker processes (None: :func:`available_cpus`); 1 runs in
        this process. Ignored when ``scheduler`` is given.
    scheduler : str or None
        Address of a running ``dask.distributed`` scheduler
        (``tcp://host:8786``, or ``inproc://…`` for an in-process test cluster).
    retries : int
        How many times a task whose worker died is resubmitted.
    connect_timeout : float
        Seconds to wait for the Dask scheduler.
    """

    def __init__(self, workers=None, scheduler=None, retries=3, connect_timeout=10.0):
        if workers is not None and int(workers) < 1:
            raise InputError(f"--workers must be at least 1, got {workers}")
        self.workers = available_cpus() if workers is None else int(workers)
        self.scheduler = scheduler
        self.retries = int(retries)
        self.connect_timeout = float(connect_timeout)
        self._pool = None
        self._client = None

    # ------------------------------------------------------------------ lifecycle
    def __enter__(self):
        if self.scheduler:
            self._client = _connect(self.scheduler, self.connect_timeout)
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def close(self):
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
        if self._client is not None:
            self._client.close()
            self._client = None

    @property
    def kind(self) -> str:
        """``"dask"``, ``"processes"`` or ``"serial"``."""
        if self.scheduler:
            return "dask"
        return "processes" if self.workers > 1 else "serial"

    #: the old name of :attr:`kind` ("engine" means the noise weighting everywhere else)
    engine = kind

    def describe(self) -> str:
        """One line naming where the tasks run, for logs and summaries."""
        if self.scheduler:
            n = len(self._client.scheduler_info().get("workers", {})) if self._client is not None else "?"
            return f"Dask scheduler {self.scheduler} ({n} workers)"
        if self.workers > 1:
            return f"{self.workers} local worker processes"
        return "this process (1 worker)"

    # ------------------------------------------------------------------ map
    def map(self, function, tasks, *, weights=None, on_done=None):
        """``[function(t) for t in tasks]`` where this runner runs them, in task order.

        ``weights`` (one number per task, default 1) are passed to
        ``on_done`` as tasks finish.
        """
        tasks = list(tasks)
        weights = [1] * len(tasks) if weights is None else list(weights)
        if not tasks:
            return []
        if self.scheduler:
            return self._map_dask(function, tasks, weights, on_done)
        if self.workers > 1 and len(tasks) > 1:
            return self._map_processes(function, tasks, weights, on_done)
        results = []
        for task, weight in zip(tasks, weights):
            results.append(function(task))
            if on_done is not None:
                on_done(weight)
        return results

    def _new_pool(self):
        method = "forkserver" if "forkserver" in multiprocessing.get_all_start_methods() else "spawn"
        return ProcessPoolExecutor(max_workers=self.workers, mp_context=multiprocessing.get_context(method),
                                   initializer=_watch_parent, initargs=(os.getpid(),))

    def _map_processes(self, function, tasks, weights, on_done):
        results = [None] * len(tasks)
        pending_ids = list(range(len(tasks)))
        attempts = 0
        while pending_ids:
            if self._pool is None:
                self._pool = self._new_pool()
            futures = {self._pool.submit(function, tasks[i]): i for i in pending_ids}
            broken = False
            remaining = set(futures)
            while remaining:
                done, remaining = wait(remaining, return_when=FIRST_COMPLETED)
                for fut in done:
                    i = futures[fut]
                    try:
                        results[i] = fut.result()
                    except BrokenProcessPool:
                        broken = True
                        continue
                    pending_ids.remove(i)
                    if on_done is not None:
                        on_done(weights[i])
            if broken:
                # a worker process died: start a fresh pool and resubmit what did not finish
                self._pool.shutdown(wait=False, cancel_futures=True)
                self._pool = None
                attempts += 1
                if attempts > self.retries:
                    raise RuntimeError(f"local worker processes died {attempts} times; giving up")
        return results

    def _map_dask(self, function, tasks, weights, on_done):
        with self._client.as_current():
            return self._map_dask_current(function, tasks, weights, on_done)

    def _map_dask_current(self, function, tasks, weights, on_done):
        # lazy: a heavy import, loaded only when this runs
        from distributed import as_completed

        client = self._client
        futures = {}
        for i, task in enumerate(tasks):
            futures[client.submit(function, task, pure=False)] = i
        attempts = [0] * len(tasks)
        results = [None] * len(tasks)
        stream = as_completed(list(futures))
        for fut in stream:
            i = futures.pop(fut)
            if fut.status == "finished":
                results[i] = fut.result()
                if on_done is not None:
                    on_done(weights[i])
                continue
            error = fut.exception() if fut.status == "error" else None
            if fut.status == "cancelled" or _worker_died(error):
                attempts[i] += 1
                if attempts[i] > self.retries:
                    raise RuntimeError(f"task {i} lost its Dask worker {attempts[i]} times; giving up") from error
                again = client.submit(function, tasks[i], pure=False)
                futures[again] = i
                stream.add(again)
                continue
            raise error
        return results


#: how often a local worker checks that the process that started it is still there [s]
WATCHDOG_INTERVAL = 0.5


def _watch_parent(parent_pid: int) -> None:
    """Worker-process initializer: a daemon thread ends this worker as soon as the cwsearch process that
    made the pool is gone (``kill -9`` of the main process gives it no chance to stop its workers).

    The worker's own parent is the fork server, which exits when the main process does; the watchdog
    checks both the main process's pid and a change of the worker's parent (reparenting to init),
    so a reused pid cannot keep an orphan alive.
    """
    first_parent = os.getppid()

    def watch():
        while True:
            time.sleep(WATCHDOG_INTERVAL)
            if os.getppid() != first_parent or not _alive(parent_pid):
                os._exit(1)

    threading.Thread(target=watch, name="cwsearch-parent-watchdog", daemon=True).start()


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _worker_died(error) -> bool:
    try:
        # lazy: a heavy import, loaded only when this runs
        from distributed.scheduler import KilledWorker
    except ImportError:  # pragma: no cover
        return False
    return isinstance(error, (KilledWorker, OSError)) or type(error).__name__ in (
        "KilledWorker", "CommClosedError", "FutureCancelledError")


def _connect(address, timeout=10.0):
    """A ``distributed.Client`` for ``address``, or a clear :class:`InputError`."""
    try:
        # lazy: a heavy import, loaded only when this runs
        from distributed import Client
    except ImportError:  # pragma: no cover - dask is a dependency
        raise InputError("--scheduler needs the 'distributed' package (pip install 'dask[distributed]')") from None
    try:
        return Client(address, timeout=f"{timeout}s", set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError(f"cannot reach the Dask scheduler at {address} ({exc})") from None


def run_tasks(function, tasks, *, workers=None, scheduler=None, retries=3, weights=None, on_done=None):
    """One-shot :meth:`TaskRunner.map` (opens and closes the runner)."""
    with TaskRunner(workers=workers, scheduler=scheduler, retries=retries) as runner:
        return runner.map(function, tasks, weights=weights, on_done=on_done)


__all__ = ["TaskRunner", "run_tasks", "available_cpus"]
