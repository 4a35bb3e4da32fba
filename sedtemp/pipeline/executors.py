"""Where chunks run: ``concurrent.futures`` executors, one small strategy object per kind.

``[run] executor`` names one of :data:`EXECUTORS`; each is an
:class:`ExecutorKind` whose :meth:`~ExecutorKind.open` is a context manager
yielding ``(executor, n_workers)``. Registering another kind is one entry
in the mapping, not a branch in a chain of ``if``.

* ``"process"`` (default): :class:`~concurrent.futures.ProcessPoolExecutor`
  with ``[run] workers`` processes (0 = all cores), started by forkserver.
  Each worker ignores Ctrl-C (the main process handles it and shuts the
  pool down, so one line is printed, not one traceback per worker) and
  watches the main process: if it disappears, even by ``kill -9``, the
  worker exits within :data:`PARENT_POLL_S` seconds.
* ``"dask"``: Dask distributed's ``Client.get_executor()``, on the scheduler
  at ``[run] scheduler`` or on a local cluster (extra ``sedtemp[dask]``);
* ``"mpi"``: ``mpi4py.futures.MPIPoolExecutor`` (extra ``sedtemp[mpi]``);
* ``"serial"``: every chunk in this process (debugging, small tables).

No scheduling of our own: the runner submits and waits for futures.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import importlib
import logging
import multiprocessing
import os
import signal
import threading
import time
from collections.abc import Callable, Iterator
from types import ModuleType
from typing import Any

__all__ = [
    "EXECUTORS",
    "PARENT_POLL_S",
    "DaskKind",
    "ExecutorKind",
    "InlineExecutor",
    "MpiKind",
    "ProcessKind",
    "SerialKind",
    "import_optional",
    "n_workers",
    "open_executor",
]

log = logging.getLogger(__name__)

#: How often (s) a worker checks that the main process is still alive.
PARENT_POLL_S = 1.0


class InlineExecutor(cf.Executor):
    """An Executor that runs each task at submission, in this process (``executor = "serial"``)."""

    def submit(self, fn: Callable[..., Any], /, *args: Any, **kwargs: Any) -> cf.Future:
        fut = cf.Future()
        try:
            fut.set_result(fn(*args, **kwargs))
        except BaseException as err:  # noqa: BLE001 - delivered through the future, as a pool would
            fut.set_exception(err)
        return fut


def n_workers(run: dict) -> int:
    """Workers of ``[run]``: ``workers``, or every core for 0."""
    return run["workers"] if run["workers"] > 0 else (os.cpu_count() or 1)


def import_optional(module: str, extra: str) -> ModuleType:
    """Import ``module`` or raise an ImportError naming the extra to install."""
    try:
        return importlib.import_module(module)
    except ImportError as err:
        raise ImportError(f"executor needs {module.split('.', maxsplit=1)[0]}; install it with "
                          f"pip install 'sedtemp[{extra}]'") from err


def _watch_parent(parent_pid: int) -> None:
    while True:
        time.sleep(PARENT_POLL_S)
        try:
            os.kill(parent_pid, 0)
        except ProcessLookupError:  # the main process is gone: nobody will read our results
            os._exit(3)
        except PermissionError:  # pragma: no cover - pid reused by another user's process
            os._exit(3)


def _worker_init(parent_pid: int) -> None:
    """Process-pool worker start-up: ignore Ctrl-C, and exit when the main process disappears."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    threading.Thread(target=_watch_parent, args=(parent_pid,), daemon=True, name="sedtemp-parent").start()


class ExecutorKind:
    """One way of running chunks; subclasses implement :meth:`open`."""

    name = ""
    extra: tuple[str, str] | None = None  # (module, pip extra) needed, checked before fitting

    def check(self) -> None:
        """Raise ImportError (naming the extra) now if the package this kind needs is missing."""
        if self.extra is not None:
            import_optional(*self.extra)

    @contextlib.contextmanager
    def open(self, run: dict) -> Iterator[tuple[cf.Executor, int]]:  # pragma: no cover - abstract
        raise NotImplementedError
        yield


class SerialKind(ExecutorKind):
    name = "serial"

    @contextlib.contextmanager
    def open(self, run: dict) -> Iterator[tuple[cf.Executor, int]]:
        yield InlineExecutor(), 1


class ProcessKind(ExecutorKind):
    name = "process"

    @contextlib.contextmanager
    def open(self, run: dict) -> Iterator[tuple[cf.Executor, int]]:
        n = n_workers(run)
        # forkserver: workers are forked from a clean server process (not from this one,
        # which may hold threads), with sedtemp imported once in the server
        if "forkserver" in multiprocessing.get_all_start_methods():
            ctx = multiprocessing.get_context("forkserver")
            ctx.set_forkserver_preload(["sedtemp.pipeline.stages"])
        else:  # pragma: no cover - Windows
            ctx = multiprocessing.get_context("spawn")
        ex = cf.ProcessPoolExecutor(max_workers=n, mp_context=ctx, initializer=_worker_init,
                                    initargs=(os.getpid(),))
        try:
            yield ex, n
        except BaseException:
            procs = list((getattr(ex, "_processes", None) or {}).values())
            ex.shutdown(wait=False, cancel_futures=True)  # Ctrl-C or a failure: do not wait for queued work
            for proc in procs:
                proc.terminate()  # a running chunk is lost anyway; its part is never half-written
            raise
        else:
            ex.shutdown(wait=True)


class DaskKind(ExecutorKind):
    name = "dask"
    extra = ("distributed", "dask")

    @contextlib.contextmanager
    def open(self, run: dict) -> Iterator[tuple[cf.Executor, int]]:
        distributed = import_optional(*self.extra)
        cluster = None
        if run["scheduler"]:
            client = distributed.Client(run["scheduler"])
        else:
            cluster = distributed.LocalCluster(n_workers=n_workers(run), threads_per_worker=1,
                                               processes=True, dashboard_address=None,
                                               silence_logs=logging.ERROR)
            client = distributed.Client(cluster)
        try:
            n = max(1, len(client.scheduler_info().get("workers", {})))
            yield client.get_executor(), n
        finally:
            client.close()
            if cluster is not None:
                cluster.close()


class MpiKind(ExecutorKind):
    name = "mpi"
    extra = ("mpi4py.futures", "mpi")

    @contextlib.contextmanager
    def open(self, run: dict) -> Iterator[tuple[cf.Executor, int]]:
        futures = import_optional(*self.extra)
        with futures.MPIPoolExecutor() as ex:
            yield ex, n_workers(run)


#: ``[run] executor`` name -> strategy.
EXECUTORS: dict[str, ExecutorKind] = {k.name: k for k in (ProcessKind(), DaskKind(), MpiKind(), SerialKind())}


@contextlib.contextmanager
def open_executor(run: dict) -> Iterator[tuple[cf.Executor, int]]:
    """Context manager yielding ``(executor, n_workers)`` for the ``[run]`` section.

    Raises
    ------
    ImportError
        Dask or mpi4py is not installed (the message names the extra).
    """
    with EXECUTORS[run["executor"]].open(run) as pair:
        yield pair
