"""The shared runner (sweepgen.workers): the same results in task order in this process, in a local
process pool and on a real Dask cluster (distributed.LocalCluster); progress; Ctrl-C keeps what finished."""

from __future__ import annotations

import multiprocessing
import os
import signal
import time

import numpy as np
import pytest

from sweepgen import workers
from sweepgen.errors import InputError


def _draw(task):
    """A task with its own random stream: the sum of 1000 normals of a spawned seed."""
    seed, pause = task
    time.sleep(pause)
    return float(np.random.default_rng(seed).standard_normal(1000).sum()), os.getpid()


def _fail(task):
    if task == 2:
        raise ArithmeticError("task 2 fails")
    return task


def _tasks(n=6, pauses=None):
    seeds = np.random.SeedSequence(42).spawn(n)
    # later tasks finish first where they run side by side, so the order of results is tested
    pauses = pauses if pauses is not None else [0.05 * (n - i) for i in range(n)]
    return list(zip(seeds, pauses))


def _expected(tasks):
    """The results computed here directly, one task after another."""
    return [float(np.random.default_rng(s).standard_normal(1000).sum()) for s, _ in tasks]


@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as lc:
        yield lc.scheduler_address


def test_one_worker_runs_in_this_process_in_task_order():
    tasks = _tasks(4, [0.0] * 4)
    out = workers.run(_draw, tasks, workers=1)
    assert [v for v, _ in out] == _expected(tasks)
    assert {pid for _, pid in out} == {os.getpid()}


@pytest.mark.slow
def test_two_processes_give_the_same_results_in_task_order():
    tasks = _tasks()
    out = workers.run(_draw, tasks, workers=2)
    assert [v for v, _ in out] == _expected(tasks)
    pids = {pid for _, pid in out}
    assert os.getpid() not in pids and len(pids) == 2
    assert not multiprocessing.active_children()          # the pool is gone


@pytest.mark.slow
def test_cluster_gives_the_same_results_in_task_order(cluster):
    tasks = _tasks()
    seen = []
    out = workers.run(_draw, tasks, cluster=cluster, progress=lambda d, t: seen.append((d, t)))
    assert [v for v, _ in out] == _expected(tasks)
    assert seen == [(k, 6) for k in range(1, 7)]


def test_progress_counts_every_task_once():
    seen = []
    workers.run(_draw, _tasks(5, [0.0] * 5), workers=2, progress=lambda d, t: seen.append((d, t)))
    assert seen == [(k, 5) for k in range(1, 6)]


@pytest.mark.parametrize("how", [{"workers": 1}, {"workers": 2}])
def test_a_failing_task_raises_its_own_error(how):
    with pytest.raises(ArithmeticError, match="task 2 fails"):
        workers.run(_fail, list(range(5)), **how)
    assert not multiprocessing.active_children()


def test_a_failing_task_on_the_cluster_raises_its_own_error(cluster):
    with pytest.raises(ArithmeticError, match="task 2 fails"):
        workers.run(_fail, list(range(5)), cluster=cluster)


def _interrupt_after_first(done, total):
    if done == 1:
        os.kill(os.getpid(), signal.SIGINT)     # a real Ctrl-C, delivered to this process


@pytest.mark.parametrize("how", [{"workers": 1}, {"workers": 2}])
def test_ctrl_c_cancels_pending_tasks_and_keeps_what_finished(how):
    tasks = _tasks(8, [0.3] * 8)
    with pytest.raises(workers.Interrupted) as info:
        workers.run(_draw, tasks, progress=_interrupt_after_first, **how)
    exc = info.value
    assert isinstance(exc, KeyboardInterrupt) and exc.total == 8
    # the first task, and at most the tasks already running beside it: the pending ones never ran
    assert 1 <= len(exc.finished) <= max(how["workers"], 1) + 1
    expected = _expected(tasks)
    assert all(exc.finished[i][0] == expected[i] for i in exc.finished)
    assert not multiprocessing.active_children()  # no process left behind


def test_ctrl_c_on_the_cluster_keeps_what_finished(cluster):
    tasks = _tasks(8, [0.3] * 8)
    with pytest.raises(workers.Interrupted) as info:
        workers.run(_draw, tasks, cluster=cluster, progress=_interrupt_after_first)
    assert 1 <= len(info.value.finished) < 8


def test_default_is_one_process_per_core_but_never_more_than_tasks():
    assert workers.cores() >= 1
    assert workers.run(_draw, _tasks(1, [0.0]))[0][1] == os.getpid()     # one task: no pool


@pytest.mark.parametrize("bad", [0, -1, 1.5, True])
def test_bad_worker_counts_are_refused_naming_the_option(bad):
    with pytest.raises(InputError) as info:
        workers.run(_draw, _tasks(2), workers=bad)
    assert info.value.key == "workers"               # the API's name; the commands say --workers


def test_workers_and_cluster_together_are_refused():
    with pytest.raises(InputError):
        workers.run(_draw, _tasks(2), workers=2, cluster="tcp://127.0.0.1:1")


def test_a_cluster_address_with_a_port_beyond_65535_is_refused_at_once():
    # refused before connecting, not after Dask's ten seconds of trying
    with pytest.raises(InputError, match="port 99999 in 'tcp://127.0.0.1:99999' is not a TCP port") as info:
        workers.run(_draw, _tasks(2), cluster="tcp://127.0.0.1:99999")
    assert info.value.key == "cluster"


def test_an_unreachable_cluster_is_refused_naming_the_option():
    with pytest.raises(InputError) as info:
        workers.run(_draw, _tasks(2), cluster="no-such-scheme://nowhere")
    assert info.value.key == "cluster"
