"""The scheduling layer: run block tasks locally or on a dask.distributed cluster.

One call, :func:`run_tasks`, runs ``func(job, shared)`` for every job and
hands each result to ``consume`` in the main process as soon as it arrives
(completion order), so a single writer can write finished blocks while
others are computed and memory stays bounded by the number of blocks in
flight, not by the scene. Local runs keep a window of as many tasks in
flight as there are workers on a :mod:`concurrent.futures` pool (jobs start
in their own order, so the writer fills the file front to back); cluster
runs do the same through ``distributed.Client.submit`` and
``distributed.as_completed``.

Where the tasks run (``scheduler``):

``None`` / ``"threads"``
    a pool of threads (the default; numpy and GDAL release the GIL).
    ``workers`` sets the thread count.
``"processes"``
    a pool of worker processes forked from a clean fork server; the shared
    object (the models) is sent once per process. As with any non-fork start method, a script that uses
    it must guard its entry point with ``if __name__ == "__main__":``.
``"synchronous"``
    one task after the other in the calling thread (debugging).
``"tcp://host:port"`` (or a ``distributed.Client``)
    an existing dask.distributed cluster. The source raster must be
    reachable by the workers under the same path (a shared file system or
    a GDAL URL such as ``/vsis3/...``); the output is written by the calling
    process only.
``workers=N`` with no ``scheduler``
    starts a dask.distributed ``LocalCluster`` of N single-threaded worker
    processes on the loopback interface for the run, and closes it after.

Failed tasks are retried ``retries`` times (on a cluster also after a
worker dies); a task that fails for good stops the run with its error.
"""

from __future__ import annotations

import concurrent.futures
import contextlib
import dataclasses
import itertools
import logging
import multiprocessing
import os
import pickle
import uuid
import warnings
from collections.abc import Callable, Iterable
from typing import Any

from threadpoolctl import threadpool_limits

from ..errors import GeosrError, ParameterError, RunError
from . import _quiet_worker
from ._quiet_worker import ignore_sigint

__all__ = ["ProgressCallback", "SchedulerSpec", "resolve_scheduler", "run_tasks", "default_workers"]

#: A progress callback: ``progress(done, total)`` in the calling process.
ProgressCallback = Callable[[int, int], None]

_LOCAL_KINDS = ("threads", "processes", "synchronous")

#: How long joining a running cluster may take before the run gives up.
CONNECT_TIMEOUT = "20s"

#: Objects shared by every task of a local run, by token (worker processes
#: get theirs from the pool initializer).
_SHARED: dict[str, Any] = {}


def default_workers() -> int:
    """Number of local workers: the CPUs this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


@dataclasses.dataclass(frozen=True)
class SchedulerSpec:
    """Where a run's tasks go (see the module docstring).

    Attributes
    ----------
    kind : {"threads", "processes", "synchronous", "local-cluster", "distributed"}
    workers : int or None
        Local threads or processes, or LocalCluster worker processes.
    address : str or None
        Scheduler address of an existing cluster.
    client : distributed.Client or None
        An existing client to use.
    """

    kind: str
    workers: int | None = None
    address: str | None = None
    client: Any = None

    def describe(self) -> str:
        """The scheduler in words, for reports."""
        if self.kind == "distributed":
            return f"dask.distributed cluster at {self.address or 'the given client'}"
        if self.kind == "local-cluster":
            return f"dask.distributed LocalCluster of {self.workers} worker processes"
        return f"local {self.kind} scheduler with {self.workers} workers"


def _check_workers(workers):
    if workers is None:
        return None
    if isinstance(workers, bool) or not isinstance(workers, int):
        raise ParameterError(f"The 'workers' parameter must be a positive integer, got {workers!r}")
    if not 1 <= workers <= 4096:
        raise ParameterError(f"The 'workers' parameter must be from 1 to 4096, got {workers}")
    return workers


def resolve_scheduler(scheduler: str | Any = None, workers: int | None = None) -> SchedulerSpec:
    """Turn the ``scheduler`` and ``workers`` options into a :class:`SchedulerSpec`.

    Parameters
    ----------
    scheduler : None, str or distributed.Client
        ``"threads"``, ``"processes"``, ``"synchronous"``, a scheduler
        address such as ``"tcp://10.0.0.5:8786"``, or a client.
    workers : int, optional

    Returns
    -------
    SchedulerSpec
    """
    workers = _check_workers(workers)
    if scheduler is None:
        if workers is None:
            return SchedulerSpec("threads", default_workers())
        return SchedulerSpec("local-cluster", workers)
    if isinstance(scheduler, str):
        text = scheduler.strip()
        low = text.lower()
        if low in ("sync", "single-threaded"):
            low = "synchronous"
        if low in ("threading",):
            low = "threads"
        if low in ("multiprocessing",):
            low = "processes"
        if low in _LOCAL_KINDS:
            n = 1 if low == "synchronous" else (workers or default_workers())
            return SchedulerSpec(low, n)
        if "://" in text:
            if workers is not None:
                raise ParameterError(
                    "The 'workers' parameter must not be given with a cluster address: the "
                    f"cluster at {text} has its own workers, got workers={workers}"
                )
            return SchedulerSpec("distributed", None, text)
        raise ParameterError(
            "The 'scheduler' parameter must be 'threads', 'processes', 'synchronous' or a "
            f"scheduler address such as 'tcp://host:8786', got {scheduler!r}"
        )
    from distributed import Client

    if isinstance(scheduler, Client):
        if workers is not None:
            raise ParameterError(
                f"The 'workers' parameter must not be given with a client, got workers={workers}"
            )
        return SchedulerSpec("distributed", None, None, scheduler)
    raise ParameterError(
        f"The 'scheduler' parameter must be a string or a distributed.Client, got {type(scheduler).__name__}"
    )


# ------------------------------------------------------------------ local runs
def _process_context(func):
    """Worker processes forked from a clean server that has geosr imported.

    A fork server never inherits the caller's threads (GDAL and BLAS keep
    some), and preloading the modules once saves every worker the seconds
    numpy, scipy, scikit-learn, numba and rasterio take to import. Falls
    back to spawning where there is no fork server.
    """
    try:
        ctx = multiprocessing.get_context("forkserver")
    except ValueError:
        return multiprocessing.get_context("spawn")
    preload = ["geosr.pipeline.magnify", "geosr.core.model"]
    module = getattr(func, "__module__", None)
    if module and module != "__main__" and module not in preload:
        preload.append(module)
    ctx.set_forkserver_preload(preload)
    return ctx


def _install_shared(token, payload):
    """Pool initializer: unpickle the shared object once per worker process.

    The worker also ignores SIGINT: Ctrl-C reaches every process of the
    terminal's group, and only the main process should answer it (it stops
    the pool and prints the one line); a worker would print a traceback.
    """
    ignore_sigint()
    _SHARED[token] = pickle.loads(payload)


def _call(func, job, shared, retries, limit_blas):
    """Run one task, retrying errors that are not geosr's own verdicts."""
    attempt = 0
    while True:
        try:
            if limit_blas:
                with threadpool_limits(limits=1, user_api="blas"):
                    return func(job, shared)
            return func(job, shared)
        except GeosrError:
            raise
        except Exception:
            attempt += 1
            if attempt > retries:
                raise


def _call_local(func, token, job, retries, limit_blas):
    return _call(func, job, _SHARED[token], retries, limit_blas)


def _stream(submit, jobs, window, consume, progress):
    """Keep ``window`` tasks in flight; consume results in the calling thread as they finish.

    A finished task's slot is refilled before its result is consumed, so the
    workers stay busy while the writer writes; at most ``window`` results
    wait for the writer, plus the one being written.
    """
    pending = iter(enumerate(jobs))
    running = {}  # future -> job index

    def fill():
        for i, job in itertools.islice(pending, window - len(running)):
            running[submit(job)] = i

    fill()
    while running:
        finished, _ = concurrent.futures.wait(running, return_when=concurrent.futures.FIRST_COMPLETED)
        for future in sorted(finished, key=running.get):
            del running[future]
            fill()
            consume(future.result())
            if progress is not None:
                progress.update()


def _run_pool(pool, submit, jobs, window, consume, progress):
    try:
        _stream(submit, jobs, window, consume, progress)
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _run_local(spec, func, jobs, shared, consume, retries, progress, label):
    """Local threads or processes through :mod:`concurrent.futures`, or the calling thread."""
    if not jobs:
        return 0
    if spec.kind == "synchronous":
        for job in jobs:
            consume(_call(func, job, shared, retries, False))
            if progress is not None:
                progress.update()
        return len(jobs)
    token = uuid.uuid4().hex
    if spec.kind == "processes":
        payload = pickle.dumps(shared, protocol=pickle.HIGHEST_PROTOCOL)
        pool = concurrent.futures.ProcessPoolExecutor(
            max_workers=spec.workers,
            mp_context=_process_context(func),
            initializer=_install_shared,
            initargs=(token, payload),
        )
        try:
            _run_pool(pool, lambda job: pool.submit(_call_local, func, token, job, retries, True),
                      jobs, spec.workers, consume, progress)
        except concurrent.futures.process.BrokenProcessPool as exc:
            raise RunError(f"A worker process of the local pool died during the run: {exc}") from None
        return len(jobs)
    _SHARED[token] = shared
    try:
        pool = concurrent.futures.ThreadPoolExecutor(max_workers=spec.workers)
        limit = threadpool_limits(limits=1, user_api="blas") if spec.workers > 1 else contextlib.nullcontext()
        with limit:
            _run_pool(pool, lambda job: pool.submit(_call_local, func, token, job, retries, False),
                      jobs, spec.workers, consume, progress)
    finally:
        _SHARED.pop(token, None)
    return len(jobs)


# ------------------------------------------------------------ distributed runs
class _Box:
    """Wraps the shared object so that scatter sends it as one piece."""

    def __init__(self, value):
        self.value = value


def _same(box):
    return box


def _call_distributed(func, job, box, limit_blas=True):
    if limit_blas:
        with threadpool_limits(limits=1, user_api="blas"):
            return func(job, box.value)
    return func(job, box.value)


@contextlib.contextmanager
def _client_for(spec):
    from distributed import Client, LocalCluster

    if spec.client is not None:
        yield spec.client
        return
    if spec.kind == "local-cluster":
        with warnings.catch_warnings():
            # The scheduler's HTTP server moves to a free port when 8787 is taken (a
            # user's own dask cluster); geosr shows no dashboard, so that is no news.
            warnings.filterwarnings("ignore", message=r"Port \d+ is already in use")
            cluster = LocalCluster(
                n_workers=spec.workers,
                threads_per_worker=1,
                processes=True,
                host="127.0.0.1",
                dashboard_address=None,
                silence_logs=logging.CRITICAL,
                preload=[_quiet_worker.__name__],  # workers leave Ctrl-C to this process
            )
        try:
            client = Client(cluster)
            try:
                yield client
            finally:
                client.close()
        finally:
            cluster.close()
        return
    try:
        client = Client(spec.address, timeout=CONNECT_TIMEOUT)
    except (OSError, TimeoutError, ValueError) as exc:
        raise RunError(f"The dask scheduler at {spec.address} must be reachable, got: {exc}") from None
    try:
        yield client
    finally:
        client.close()


def _run_distributed(spec, func, jobs, shared, consume, retries, progress, label):
    from distributed import as_completed

    if not jobs:
        return 0
    token = uuid.uuid4().hex[:12]
    with _client_for(spec) as client:
        if spec.kind == "local-cluster":
            client.wait_for_workers(spec.workers, timeout=120)
        # The shared object travels inside a task rather than by scatter: if
        # the workers holding it die, the scheduler can recompute it from
        # the task instead of cancelling every block that needs it.
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message="Large object", category=UserWarning)
            shared_future = client.submit(_same, _Box(shared), key=f"geosr-shared-{token}",
                                          pure=False, retries=retries)
        try:
            threads = sum(client.nthreads().values())
        except Exception:  # noqa: BLE001 - a best guess is enough
            threads = 2
        limit = max(2, 2 * threads)
        pending = iter(enumerate(jobs))
        futures = set()
        ac = as_completed()

        def submit_next():
            try:
                i, job = next(pending)
            except StopIteration:
                return
            fut = client.submit(_call_distributed, func, job, shared_future,
                                key=f"geosr-{label}-{token}-{i}", retries=retries, pure=False)
            futures.add(fut)
            ac.add(fut)

        for _ in range(limit):
            submit_next()
        done = 0
        try:
            for fut in ac:
                try:
                    result = fut.result()
                except GeosrError:
                    raise
                except Exception as exc:  # noqa: BLE001 - reported as one clear error
                    raise RunError(
                        f"A {label} task failed on the cluster after {retries} retries: "
                        f"{type(exc).__name__}: {exc}"
                    ) from exc
                futures.discard(fut)
                fut.release()
                consume(result)
                done += 1
                if progress is not None:
                    progress.update()
                submit_next()
        finally:
            if futures:
                with contextlib.suppress(Exception):
                    client.cancel(list(futures))
            with contextlib.suppress(Exception):
                client.cancel([shared_future])
    return done


class _Ticker:
    """Counts finished tasks and reports ``(done, total)`` to a progress callback."""

    def __init__(self, progress, total):
        self.progress, self.total, self.done = progress, total, 0
        progress(0, total)

    def update(self):
        self.done += 1
        self.progress(self.done, self.total)


def run_tasks(
    func: Callable[[Any, Any], Any],
    jobs: Iterable[Any],
    shared: Any,
    consume: Callable[[Any], None],
    *,
    scheduler: SchedulerSpec | str | Any = None,
    workers: int | None = None,
    retries: int = 2,
    progress: ProgressCallback | None = None,
    label: str = "block",
) -> int:
    """Run ``func(job, shared)`` for every job; feed results to ``consume``.

    Parameters
    ----------
    func : callable
        A module-level function (it is pickled by reference for worker
        processes) returning a picklable result.
    jobs : sequence
        Picklable job descriptions, one per task.
    shared : object
        Passed to every call (the models); sent once per worker.
    consume : callable
        Called in the calling process with each result, in completion order.
    scheduler, workers
        See :func:`resolve_scheduler`.
    retries : int
        Extra attempts for a failing task.
    progress : callable, optional
        Called in the calling process as ``progress(done, total)``: with
        ``done = 0`` before the first task, then after each result is
        consumed.
    label : str
        Names the tasks (``geosr-<label>-...`` keys on a cluster).

    Returns
    -------
    int
        Number of tasks run.

    Raises
    ------
    GeosrError
        The first task error that is geosr's own (InputError for a damaged
        source, ...), unchanged.
    RunError
        Any other task failure, after the retries.
    """
    if isinstance(retries, bool) or not isinstance(retries, int) or not 0 <= retries <= 100:
        raise ParameterError(f"The 'retries' parameter must be an integer from 0 to 100, got {retries!r}")
    spec = scheduler if isinstance(scheduler, SchedulerSpec) else resolve_scheduler(scheduler, workers)
    jobs = list(jobs)
    ticker = None if progress is None else _Ticker(progress, len(jobs))
    try:
        if spec.kind in _LOCAL_KINDS:
            return _run_local(spec, func, jobs, shared, consume, retries, ticker, label)
        return _run_distributed(spec, func, jobs, shared, consume, retries, ticker, label)
    except (GeosrError, KeyboardInterrupt):
        raise
    except Exception as exc:  # noqa: BLE001 - one clear error for the caller
        raise RunError(f"The {label} run failed: {type(exc).__name__}: {exc}") from exc
