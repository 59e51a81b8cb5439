"""The scheduling layer: local and distributed runs, streaming, retries, progress callbacks."""

import os
import threading
import time

import numpy as np
import pytest

from geosr.errors import DestinationError, InputError, ParameterError, RunError
from geosr.parallel.schedule import resolve_scheduler, run_tasks


# Task functions live at module level: worker processes import them by name.
def square(job, shared):
    return job, job * job + shared["offset"]


def pid_task(job, shared):
    return job, os.getpid(), shared["offset"]


def slow_square(job, shared):
    time.sleep(0.01)
    shared["log"].append(("run", job))
    return job, job * job


def flaky(job, shared):
    with shared["lock"]:
        shared["attempts"][job] = shared["attempts"].get(job, 0) + 1
        first = shared["attempts"][job] == 1
    if first:
        raise OSError("transient failure")
    return job


def refuses(job, shared):
    with shared["lock"]:
        shared["attempts"][job] = shared["attempts"].get(job, 0) + 1
    raise InputError("The block must be readable, got damage")


def dies_once(job, shared):
    marker = os.path.join(shared["dir"], "died")
    if job == 3 and not os.path.exists(marker):
        open(marker, "w").close()
        os._exit(1)  # the worker process dies mid-task
    return job, job * 10


def test_resolve_scheduler():
    assert resolve_scheduler().kind == "threads"
    assert resolve_scheduler(workers=3).kind == "local-cluster"
    assert resolve_scheduler("processes", 2).workers == 2
    assert resolve_scheduler("sync").kind == "synchronous"
    spec = resolve_scheduler("tcp://10.0.0.5:8786")
    assert spec.kind == "distributed" and spec.address == "tcp://10.0.0.5:8786"
    with pytest.raises(ParameterError, match="workers"):
        resolve_scheduler("tcp://10.0.0.5:8786", 2)
    for bad in ("gpu", 3):
        with pytest.raises(ParameterError, match="scheduler"):
            resolve_scheduler(bad)
    for bad in (0, -1, 2.5, True):
        with pytest.raises(ParameterError, match="workers"):
            resolve_scheduler(None, bad)


@pytest.mark.parametrize("scheduler", ["threads", "synchronous"])
def test_every_result_consumed_in_the_calling_thread(scheduler):
    seen, threads = {}, set()

    def consume(result):
        threads.add(threading.current_thread())
        seen[result[0]] = result[1]

    calls = []
    n = run_tasks(square, range(20), {"offset": 1}, consume, scheduler=scheduler,
                  progress=lambda done, total: calls.append((done, total, threading.current_thread())))
    assert n == 20
    # (0, total) before the first task, then once per consumed result, in the calling thread.
    assert calls == [(i, 20, threading.current_thread()) for i in range(21)]
    assert seen == {i: i * i + 1 for i in range(20)}
    assert threads == {threading.current_thread()}


def test_results_stream_while_tasks_run():
    shared = {"log": []}
    run_tasks(slow_square, range(6), shared, lambda r: shared["log"].append(("consume", r[0])),
              scheduler="synchronous")
    # One task, then its result written, then the next: nothing piles up.
    log = shared["log"]
    assert len(log) == 12
    for k in range(0, 12, 2):
        assert log[k][0] == "run" and log[k + 1] == ("consume", log[k][1])


def test_memory_bounded_by_workers_in_flight():
    state = {"produced": 0, "consumed": 0, "peak": 0, "lock": threading.Lock()}

    def consume(result):
        state["consumed"] += 1

    def produce(job, shared):
        time.sleep(0.005)
        with state["lock"]:
            state["produced"] += 1
            state["peak"] = max(state["peak"], state["produced"] - state["consumed"])
        return np.zeros(1000)

    run_tasks(_Wrapped(produce), range(40), None, consume, scheduler="threads", workers=2)
    assert state["consumed"] == 40
    assert state["peak"] <= 2 + 1  # at most the tasks in flight are waiting for the writer


class _Wrapped:
    """A picklable-enough callable for the threads scheduler."""

    def __init__(self, fn):
        self.fn = fn

    def __call__(self, job, shared):
        return self.fn(job, shared)


def test_retries_and_errors():
    shared = {"attempts": {}, "lock": threading.Lock()}
    got = []
    run_tasks(flaky, range(5), shared, got.append, scheduler="threads", retries=1)
    assert sorted(got) == list(range(5)) and set(shared["attempts"].values()) == {2}
    shared["attempts"].clear()
    with pytest.raises(RunError, match="transient failure"):
        run_tasks(flaky, range(5), shared, got.append, scheduler="threads", retries=0)
    shared["attempts"].clear()
    with pytest.raises(InputError, match="damage"):
        run_tasks(refuses, range(3), shared, got.append, scheduler="threads", workers=1, retries=3)
    assert set(shared["attempts"].values()) == {1}  # geosr's own verdicts are not retried
    with pytest.raises(ParameterError, match="retries"):
        run_tasks(square, [1], {"offset": 0}, got.append, retries=-1)


def test_consumer_error_stops_the_run():
    def consume(result):
        raise DestinationError("The destination must be writable, got a full disk")

    with pytest.raises(DestinationError, match="full disk"):
        run_tasks(square, range(10), {"offset": 0}, consume, scheduler="threads")


@pytest.mark.slow
def test_processes_scheduler_shares_once_per_worker():
    got = []
    run_tasks(pid_task, range(8), {"offset": 7}, got.append, scheduler="processes", workers=2)
    assert sorted(j for j, _, _ in got) == list(range(8))
    assert {o for _, _, o in got} == {7}
    pids = {p for _, p, _ in got}
    assert os.getpid() not in pids and 1 <= len(pids) <= 2


@pytest.mark.slow
@pytest.mark.cluster
def test_local_cluster_run_and_a_killed_worker(tmp_path):
    got, calls = [], []
    run_tasks(dies_once, range(12), {"dir": str(tmp_path)}, got.append, workers=2, retries=2,
              progress=lambda done, total: calls.append((done, total)))
    assert (tmp_path / "died").exists()  # a worker really died mid-run
    assert sorted(got) == [(i, 10 * i) for i in range(12)]
    assert calls == [(i, 12) for i in range(13)]


@pytest.mark.slow
@pytest.mark.cluster
def test_joining_a_running_scheduler_by_address(monkeypatch):
    from distributed import LocalCluster

    import geosr.parallel.schedule

    with LocalCluster(n_workers=1, threads_per_worker=2, processes=False, protocol="tcp", host="127.0.0.1",
                      dashboard_address=None) as cluster:
        address = cluster.scheduler_address
        assert address.startswith("tcp://127.0.0.1:")
        got, calls = [], []
        n = run_tasks(square, range(9), {"offset": 2}, got.append, scheduler=address,
                      progress=lambda done, total: calls.append((done, total)))
        assert n == 9 and calls == [(i, 9) for i in range(10)]
        assert sorted(got) == [(i, i * i + 2) for i in range(9)]
        # The cluster outlives the run: it was joined, not started.
        assert cluster.scheduler.status.name == "running"
    monkeypatch.setattr(geosr.parallel.schedule, "CONNECT_TIMEOUT", "2s")
    with pytest.raises(RunError, match="reachable"):
        run_tasks(square, [1], {"offset": 0}, got.append, scheduler="tcp://127.0.0.1:9")


# --- round 2: worker processes leave Ctrl-C to the main process
def sigint_disposition(job, shared):
    import signal

    return signal.getsignal(signal.SIGINT) == signal.SIG_IGN


def test_process_pool_workers_ignore_sigint():
    # Ctrl-C sends SIGINT to the whole terminal group: a worker that handled
    # it would print its own traceback beside the main process's one line.
    got = []
    run_tasks(sigint_disposition, range(2), None, got.append, scheduler="processes", workers=2)
    assert got == [True, True]


def test_cluster_preload_ignores_sigint_in_the_main_thread_only():
    import signal
    import threading

    from geosr.parallel import _quiet_worker

    previous = signal.getsignal(signal.SIGINT)
    try:
        seen = []
        thread = threading.Thread(target=lambda: (_quiet_worker.dask_setup(None), seen.append(1)))
        thread.start()
        thread.join()
        assert seen == [1] and signal.getsignal(signal.SIGINT) == previous  # no-op off the main thread
        _quiet_worker.dask_setup(None)
        assert signal.getsignal(signal.SIGINT) == signal.SIG_IGN
    finally:
        signal.signal(signal.SIGINT, previous)


def test_local_cluster_says_nothing_when_the_dashboard_port_is_taken(recwarn):
    # A user's own dask cluster usually holds 8787 (distributed's default HTTP port);
    # geosr shows no dashboard, so the move to another port must not reach the user.
    import socket

    holder = socket.socket()
    try:
        holder.bind(("127.0.0.1", 8787))
    except OSError:
        pass  # already taken: the situation this test is about
    else:
        holder.listen()
    try:
        got = []
        run_tasks(square, range(3), {"offset": 0}, got.append, workers=2)
    finally:
        holder.close()
    assert sorted(got) == [(0, 0), (1, 1), (2, 4)]
    assert not [w for w in recwarn if "already in use" in str(w.message)]
