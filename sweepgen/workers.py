"""One runner for many independent tasks: on this computer's cores, or on a Dask cluster.

:func:`run` calls ``fn(task)`` for every task and returns the results in task
order, whatever order they finish in:

* locally (the default) in a :class:`concurrent.futures.ProcessPoolExecutor` with
  one process per core (``workers`` to choose; ``workers=1``, or a single task,
  runs in this process, without a pool);
* on a Dask cluster with ``cluster="tcp://HOST:PORT"``, the address of its
  scheduler (:class:`distributed.Client`; install ``sweepgen[cluster]``; the
  cluster's workers need sweepgen installed too).

``fn`` must be a top-level function and the tasks picklable. The runner draws
no random numbers: callers that need them give each task its own seed, spawned
from one :class:`numpy.random.SeedSequence`, so that results do not depend on the
number of workers or where a task ran.

``progress(done, total)`` is called in this process after each task finishes.

Ctrl-C (``KeyboardInterrupt``): tasks not started are cancelled, tasks running
are stopped (local processes are terminated; cluster tasks cancelled), and
:class:`Interrupted` is raised. It is a ``KeyboardInterrupt`` (so a command that
does not look further exits as interrupted) and carries ``finished``, the
results of the tasks that had finished, by task index. Local worker processes
ignore Ctrl-C themselves, so that only this process decides what stops.

An exception raised by a task stops the run the same way and is raised here.
"""

from __future__ import annotations

import os
import signal
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

from sweepgen.errors import InputError

__all__ = ["Interrupted", "cores", "run"]


class Interrupted(KeyboardInterrupt):
    """Ctrl-C during :func:`run`: ``finished`` maps the index of each task that finished to its result;
    ``total`` is the number of tasks."""

    def __init__(self, finished: dict, total: int):
        super().__init__(f"interrupted after {len(finished)} of {total} tasks")
        self.finished = finished
        self.total = total


def cores() -> int:
    """The processor cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:                      # not on every platform
        return max(1, os.cpu_count() or 1)


def run(fn, tasks, *, workers: int | None = None, cluster: str | None = None, progress=None) -> list:
    """``[fn(task) for task in tasks]``, spread over processes or a cluster (see the module's text).

    Parameters
    ----------
    fn : callable
        A picklable (top-level) function of one argument.
    tasks : sequence
        Its arguments, picklable.
    workers : int, optional
        Local processes; default one per core (:func:`cores`), never more than the tasks.
    cluster : str, optional
        Address of a Dask scheduler; the tasks run there instead.
    progress : callable, optional
        ``progress(done, total)`` after each task.
    """
    tasks = list(tasks)
    if workers is not None and (isinstance(workers, bool) or int(workers) != workers or workers < 1):
        raise InputError(f"expected a positive whole number of worker processes, got {workers!r}", key="workers")
    if cluster is not None and workers is not None:
        raise InputError("--workers sets local processes and --cluster a cluster's scheduler: give one of them",
                         key="--workers")
    if cluster is not None:
        return _on_cluster(fn, tasks, cluster, progress)
    n = min(cores() if workers is None else int(workers), len(tasks))
    if n <= 1:
        return _in_process(fn, tasks, progress)
    return _in_pool(fn, tasks, n, progress)


def _in_process(fn, tasks, progress) -> list:
    results, total = [], len(tasks)
    try:
        for task in tasks:
            results.append(fn(task))
            if progress is not None:
                progress(len(results), total)
    except KeyboardInterrupt:
        raise Interrupted(dict(enumerate(results)), total) from None
    return results


def _ignore_interrupts() -> None:
    """Worker processes leave Ctrl-C to the process that started them."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _in_pool(fn, tasks, n: int, progress) -> list:
    finished: dict = {}
    pool = ProcessPoolExecutor(max_workers=n, initializer=_ignore_interrupts)
    try:
        index = {pool.submit(fn, task): i for i, task in enumerate(tasks)}
        pending = set(index)
        while pending:
            done, pending = wait(pending, return_when=FIRST_COMPLETED)
            for fut in done:
                finished[index[fut]] = fut.result()      # a task's exception is raised here
                if progress is not None:
                    progress(len(finished), len(tasks))
    except BaseException as exc:
        _stop(pool)
        if isinstance(exc, KeyboardInterrupt):
            raise Interrupted(finished, len(tasks)) from None
        raise
    pool.shutdown(wait=True)
    return [finished[i] for i in range(len(tasks))]


def _stop(pool: ProcessPoolExecutor) -> None:
    """Cancel the tasks not started and terminate the processes running the others.

    The pool's own manager thread reaps the terminated processes too; it is waited for, so that
    no process still counts as running when this returns (a process reaped by that thread reads
    as alive here until the thread has recorded its exit)."""
    processes = list((getattr(pool, "_processes", None) or {}).values())
    manager = getattr(pool, "_executor_manager_thread", None)
    pool.shutdown(wait=False, cancel_futures=True)
    for proc in processes:
        if proc.is_alive():
            proc.terminate()
    if manager is not None:
        manager.join(timeout=10.0)
    for proc in processes:
        proc.join()


def _client(address: str):
    try:
        from distributed import Client
    except ImportError:
        raise InputError("--cluster needs Dask's distributed scheduler: pip install 'sweepgen[cluster]'",
                         key="cluster") from None
    port = address.rpartition(":")[2] if "://" in address and address.count(":") >= 2 else None
    if port is not None and port.isdigit() and not 1 <= int(port) <= 65535:
        raise InputError(f"port {port} in {address!r} is not a TCP port (1 to 65535)", key="cluster")
    try:
        return Client(address, timeout="10s")
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError(f"could not reach a Dask scheduler at {address!r} ({exc})", key="cluster") from None


def _on_cluster(fn, tasks, address: str, progress) -> list:
    from distributed import as_completed

    client = _client(address)
    finished: dict = {}
    futures = []
    try:
        futures = client.map(fn, tasks, pure=False)
        index = {fut.key: i for i, fut in enumerate(futures)}
        for fut in as_completed(futures):
            finished[index[fut.key]] = fut.result()      # a task's exception is raised here
            if progress is not None:
                progress(len(finished), len(tasks))
    except BaseException as exc:
        client.cancel([f for f in futures if not f.done()])
        if isinstance(exc, KeyboardInterrupt):
            raise Interrupted(finished, len(tasks)) from None
        raise
    finally:
        client.close()
    return [finished[i] for i in range(len(tasks))]
