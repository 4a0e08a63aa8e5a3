"""Independent tasks in worker processes, results in order (private; the report draws its figures with it).

:class:`OrderedTasks` runs ``func(task, *args)`` for every task and hands the results back in the tasks' order.
With one worker (``n_jobs=1``, one usable core, or a single task) nothing is started: each task runs in this
process when its result is asked for, so the serial path is the plain loop. With more, a process pool starts at
once (the caller does other work meanwhile) and results are collected in order.

How workers start:

- **fork** on Linux when this process runs no other thread but daemon ones (a forked child inherits a lock held
  by another thread and can hang; daemon threads, such as a progress bar's monitor, are background helpers):
  the workers inherit the tasks, nothing is pickled, and matplotlib's settings are the parent's by
  construction;
- **forkserver** (or spawn where there is none) otherwise, and only when asked for (``n_jobs`` > 1; the
  default is then 1, as a spawned worker imports the program's main module, which a script must guard with
  ``if __name__ == "__main__":``): tasks and their inputs are pickled (so ``func`` and every task must be
  picklable: module-level functions, ``functools.partial`` of them, data frames), and each worker receives the
  parent's matplotlib settings and the entry point's spelling of options (``--overwrite`` on the command line)
  before its first task.

Workers leave when the parent dies, even by SIGKILL, and ignore Ctrl-C (the parent handles it), through
:func:`roikit.extraction._watch_parent`, the same guard as extraction's workers.
"""

from __future__ import annotations

import concurrent.futures as cf
import gc
import multiprocessing as mp
import os
import sys
import threading
import warnings
from typing import Any, Callable, Iterator, Sequence

__all__ = ["OrderedTasks", "usable_cores"]

# fork: what the workers inherit (set before the pool starts, cleared when it closes); key -> (func, tasks, args)
_INHERITED: dict[int, tuple] = {}


def usable_cores() -> int:
    """Cores this process may run on (its CPU affinity where the system tells it, else the CPU count)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def workers(n_tasks: int, n_jobs: int | None) -> int:
    """Worker processes for ``n_tasks`` tasks: ``n_jobs``, at most one per task; None: one per usable core where
    workers can be forked safely (:func:`fork_is_safe`), else 1."""
    if n_jobs is None:
        n_jobs = usable_cores() if fork_is_safe() else 1
    return max(1, min(int(n_jobs), n_tasks))


def fork_is_safe() -> bool:
    """Linux, and no other thread of this process that the interpreter waits for (daemon threads only, such as a
    progress bar's monitor: the same conditions under which extraction's pool forks by default)."""
    if not sys.platform.startswith("linux") or "fork" not in mp.get_all_start_methods():
        return False
    return all(t.daemon for t in threading.enumerate() if t is not threading.current_thread())


def _start_method() -> str:
    if fork_is_safe():
        return "fork"
    return "forkserver" if "forkserver" in mp.get_all_start_methods() else "spawn"


def _matplotlib_settings() -> dict:
    """The parent's matplotlib settings that shape a drawing (not the backend), for spawned workers."""
    if "matplotlib" not in sys.modules:
        return {}
    import matplotlib as mpl

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # deprecated keys
        return {k: v for k, v in mpl.rcParams.items() if not k.startswith("backend") and k != "interactive"}


def _init_worker(parent: int | None, settings: dict, entry: str, command_line: bool) -> None:
    from .._options import _ENTRY
    from .._outputs import _CLI
    from ..extraction import _watch_parent

    _watch_parent(parent)
    _ENTRY.set(entry)  # messages spell options as the entry point does (--overwrite / overwrite=True)
    _CLI.set(command_line)
    if settings:
        import matplotlib as mpl

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            mpl.rcParams.update(settings)


def _run(func: Callable, task: Any, args: tuple) -> Any:
    return func(task, *args)


def _run_inherited(key: int, i: int) -> Any:
    func, tasks, args = _INHERITED[key]
    return func(tasks[i], *args)


class OrderedTasks:
    """``func(task, *args)`` for every task, in up to ``n_jobs`` worker processes; results in task order.

    Use as a context manager around the work done meanwhile; leaving it by an exception stops the workers at
    once (queued tasks are cancelled, running ones terminated).

    Parameters
    ----------
    func : callable
        A module-level function (picklable).
    tasks : sequence
        Picklable tasks.
    args : tuple
        Further arguments, the same for every task.
    n_jobs : int, optional
        Worker processes; None: one per usable core where workers can be forked (Linux), else 1; 1: run every
        task in this process, when its result is asked for. Never more than the number of tasks.
    """

    def __init__(self, func: Callable, tasks: Sequence, args: tuple = (), *, n_jobs: int | None = None):
        self.func, self.tasks, self.args = func, list(tasks), tuple(args)
        self.n_jobs = workers(len(self.tasks), n_jobs)
        self.method = None
        self._pool: cf.ProcessPoolExecutor | None = None
        self._futures: list[cf.Future] = []
        self._key: int | None = None

    @property
    def parallel(self) -> bool:
        return self.n_jobs > 1

    def __enter__(self) -> "OrderedTasks":
        if not self.parallel:
            return self
        from .._options import _ENTRY
        from .._outputs import _CLI

        self.method = _start_method()
        context = mp.get_context(self.method)
        settings = {} if self.method == "fork" else _matplotlib_settings()
        if self.method == "forkserver":
            context.set_forkserver_preload([self.func.__module__])
        if self.method == "fork":
            self._key = id(self)
            _INHERITED[self._key] = (self.func, self.tasks, self.args)
        # a forkserver's workers are its children (it leaves when this process does, and they follow it)
        parent = None if self.method == "forkserver" else os.getpid()
        self._pool = cf.ProcessPoolExecutor(self.n_jobs, mp_context=context, initializer=_init_worker,
                                            initargs=(parent, settings, _ENTRY.get(), _CLI.get()))
        # fork: this process's objects go to the collector's permanent generation while the workers start, so
        # the workers' collections do not touch (and copy) the pages they share with it (about 3% of their time)
        freeze = self.method == "fork" and gc.get_freeze_count() == 0
        if freeze:
            gc.freeze()
        try:
            if self.method == "fork":
                self._futures = [self._pool.submit(_run_inherited, self._key, i) for i in range(len(self.tasks))]
            else:
                self._futures = [self._pool.submit(_run, self.func, t, self.args) for t in self.tasks]
        except BaseException:
            self._stop()
            raise
        finally:
            if freeze:
                gc.unfreeze()
        return self

    def results(self) -> Iterator[Any]:
        """The results, in task order (a worker's exception is raised here, for its task)."""
        if not self.parallel:
            for task in self.tasks:
                yield self.func(task, *self.args)
            return
        for future in self._futures:
            yield future.result()

    def __exit__(self, exc_type, exc, tb) -> None:
        if self._pool is None:
            return
        if exc_type is not None:
            self._stop()
        else:
            self._pool.shutdown(wait=True)
            self._forget()

    def _stop(self) -> None:
        pool, self._pool = self._pool, None
        if pool is not None:
            from ..extraction import stop_pool

            stop_pool(pool)
        self._forget()

    def _forget(self) -> None:
        if self._key is not None:
            _INHERITED.pop(self._key, None)
            self._key = None
