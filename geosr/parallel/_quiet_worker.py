"""Preload of geosr's LocalCluster workers: they leave Ctrl-C to the main process.

Ctrl-C in a terminal sends SIGINT to every process of the foreground group,
the workers included. The main process stops the run and closes the
cluster; a worker that also handled the signal would print its own
traceback. dask.distributed imports this module in each worker process
(``preload``) and calls :func:`dask_setup` there, after a restart too.
"""

from __future__ import annotations

import signal
import threading

__all__ = ["dask_setup", "ignore_sigint"]


def ignore_sigint() -> None:
    """Ignore SIGINT in this process (only possible from its main thread)."""
    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGINT, signal.SIG_IGN)


def dask_setup(worker: object) -> None:
    """dask.distributed's preload hook: called in the worker process once it starts."""
    ignore_sigint()
