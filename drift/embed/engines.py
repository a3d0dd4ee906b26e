"""Where training tasks run: a local process pool, or a Dask cluster.

A task is a small dict (paths and parameters); a task function turns it into a small result dict
and may call ``report(completed, total)`` to show its progress. Both engines call the same
function, so a model trained on a Dask worker is the same as one trained locally.

The engines know nothing about Word2Vec: :mod:`drift.embed.training` builds the tasks and the
function.
"""

from __future__ import annotations

import contextlib
import functools
import logging
import os
import signal
import threading
from collections.abc import Callable, Iterator
from typing import Any, Protocol

from drift.cluster import (
    CONNECT_TIMEOUT_S,
    connect_dask,
    import_distributed,
    main_module_kept_from_workers,
)
from drift.errors import DriftError

#: ``report(completed, total)``: a task's progress in its own steps.
Report = Callable[[int, int], None]
#: A task function: task dict and an optional report callable in, small result dict out.
TaskFunction = Callable[[dict[str, Any], "Report | None"], dict[str, Any]]
#: ``on_event(task_key, completed, total)``: progress of one task, seen by the caller.
EventHandler = Callable[[str, int, int], None]

ENGINES = ("local", "dask")
#: Seconds to wait for a Dask scheduler before giving up (kept short: a typo should fail fast).
#: Topic of the progress events that Dask workers send to the client.
DASK_EVENT_TOPIC = "drift-task-progress"


class Engine(Protocol):
    """Runs task functions and yields their results in the order they finish."""

    description: str

    def run(self, function: TaskFunction, tasks: list[dict[str, Any]]) -> Iterator[dict[str, Any]]:
        ...


def available_cores() -> int:
    """Cores this process may use (its CPU affinity where the system tells it)."""
    if hasattr(os, "sched_getaffinity"):
        return max(1, len(os.sched_getaffinity(0)))
    return max(1, os.cpu_count() or 1)


def plan_workers(n_tasks: int, workers: int) -> tuple[int, int]:
    """Split ``workers`` cores into (processes, threads per model) for ``n_tasks`` tasks.

    One process per task while there are more cores than running tasks would leave cores idle,
    so the spare cores become gensim threads: 8 cores and 2 tasks give 2 processes of 4 threads,
    2 cores and 10 tasks give 2 processes of 1 thread.
    """
    processes = max(1, min(workers, n_tasks))
    threads = max(1, workers // processes)
    return processes, threads


# ---------------------------------------------------------------------------- local engine

_worker_events: Any = None  # the progress queue, set in each pool worker by _init_pool_worker


def _exit_with_parent() -> None:
    """Stop this pool worker as soon as drift's process is gone (even after SIGKILL).

    multiprocessing gives each worker a sentinel of the process that asked for it, which becomes
    readable when that process ends (with spawn and with the fork server alike).
    """
    import multiprocessing
    from multiprocessing.connection import wait

    parent = multiprocessing.parent_process()
    if parent is None or parent.sentinel is None:
        return
    wait([parent.sentinel])
    os._exit(1)


def _init_pool_worker(events: Any) -> None:
    """Set up one pool worker: progress queue, no Ctrl-C tracebacks, exit with the parent."""
    global _worker_events
    _worker_events = events
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent handles Ctrl-C and stops the pool
    threading.Thread(target=_exit_with_parent, daemon=True).start()


def pool_context(preload: tuple[str, ...] = ()) -> Any:
    """The multiprocessing context for pool workers.

    A fork server where the system has one: it imports ``preload`` once and forks each worker
    from that clean state, so workers start in milliseconds with gensim already imported. Spawn
    elsewhere. Never plain fork: this process may hold threads (progress bars) that fork copies
    in a broken state.
    """
    import multiprocessing

    if "forkserver" in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context("forkserver")
        context.set_forkserver_preload(list(preload))
        return context
    return multiprocessing.get_context("spawn")


def _queue_report(key: str) -> Report | None:
    if _worker_events is None:
        return None
    events = _worker_events

    def report(completed: int, total: int) -> None:
        events.put((key, completed, total))

    return report


def _call_in_pool_worker(function: TaskFunction, task: dict[str, Any]) -> dict[str, Any]:
    return function(task, _queue_report(task["key"]))


def _drain_events(events: Any, on_event: EventHandler) -> None:
    """Pass progress events from the pool workers to ``on_event`` until a None arrives."""
    while True:
        item = events.get()
        if item is None:
            return
        on_event(*item)


class LocalEngine:
    """Tasks in ``processes`` worker processes on this machine (in this process when 1)."""

    def __init__(
        self,
        processes: int,
        on_event: EventHandler | None = None,
        preload: tuple[str, ...] = (),
    ) -> None:
        self.processes = max(1, processes)
        self.on_event = on_event
        self.preload = tuple(preload)
        self.description = f"local, {self.processes} process{'es' if self.processes > 1 else ''}"
        self.context = pool_context(self.preload) if self.processes > 1 else None

    def warm_up(self) -> None:
        """Start the fork server now, so that it imports ``preload`` while the caller works."""
        if self.context is not None and self.context.get_start_method() == "forkserver":
            from multiprocessing import forkserver

            forkserver.ensure_running()

    def run(self, function: TaskFunction, tasks: list[dict[str, Any]]) -> Iterator[dict[str, Any]]:
        if not tasks:
            return
        if self.processes == 1:
            yield from self._run_here(function, tasks)
        else:
            yield from self._run_in_pool(function, tasks)

    def _run_here(self, function: TaskFunction, tasks: list[dict[str, Any]]) -> Iterator[dict]:
        for task in tasks:
            report = None
            if self.on_event is not None:
                report = functools.partial(self.on_event, task["key"])
            yield function(task, report)

    def _run_in_pool(self, function: TaskFunction, tasks: list[dict[str, Any]]) -> Iterator[dict]:
        from concurrent.futures import ProcessPoolExecutor, as_completed
        from concurrent.futures.process import BrokenProcessPool

        context = self.context or pool_context(self.preload)
        events = context.Queue() if self.on_event is not None else None
        drain = None
        if events is not None:
            drain = threading.Thread(
                target=_drain_events, args=(events, self.on_event), daemon=True
            )
            drain.start()
        executor = ProcessPoolExecutor(
            max_workers=min(self.processes, len(tasks)),
            mp_context=context,
            initializer=_init_pool_worker,
            initargs=(events,),
        )
        finished = False
        futures = []
        try:
            with main_module_kept_from_workers(function):
                futures = [executor.submit(_call_in_pool_worker, function, task) for task in tasks]
                for future in as_completed(futures):
                    yield future.result()
            finished = True
        except BrokenProcessPool:
            raise DriftError(
                "A training process stopped unexpectedly (out of memory, or killed); finished "
                "models are kept, so rerun the same command to resume (use fewer --workers if "
                "memory is short)."
            ) from None
        finally:
            if not finished:  # an error, Ctrl-C or an abandoned generator: stop running tasks now
                for future in futures:
                    future.cancel()
                for process in list((getattr(executor, "_processes", None) or {}).values()):
                    process.terminate()
            executor.shutdown(wait=True, cancel_futures=True)
            if events is not None and drain is not None:
                events.put(None)
                drain.join(timeout=5)
                events.close()


# ---------------------------------------------------------------------------- dask engine


def _dask_report(key: str) -> Report | None:
    try:
        from distributed import get_worker

        worker = get_worker()
    except (ImportError, ValueError):
        return None

    def report(completed: int, total: int) -> None:
        worker.log_event(DASK_EVENT_TOPIC, {"key": key, "completed": completed, "total": total})

    return report


def _call_on_dask_worker(function: TaskFunction, task: dict[str, Any]) -> dict[str, Any]:
    report = _dask_report(task["key"]) if task.get("report", True) else None
    return function(task, report)


class DaskEngine:
    """Tasks on a Dask cluster: the scheduler at ``address``, or a LocalCluster when None.

    Every worker must see the run folder at the same path (a shared file system) and have drift
    installed. The connection is made when the engine is opened, so an unreachable scheduler
    is reported before anything is written.
    """

    def __init__(
        self,
        address: str | None,
        processes: int,
        on_event: EventHandler | None = None,
        timeout_s: float | None = None,
    ) -> None:
        self.address = address
        self.processes = max(1, processes)
        self.on_event = on_event
        self.timeout_s = CONNECT_TIMEOUT_S if timeout_s is None else timeout_s
        self.client: Any = None
        self.cluster: Any = None
        where = address or f"LocalCluster of {self.processes} worker{'s' * (self.processes > 1)}"
        self.description = f"dask, {where}"

    def open(self) -> DaskEngine:
        distributed = import_distributed()
        if self.address is None:
            with main_module_kept_from_workers(self.open):
                self.cluster = distributed.LocalCluster(
                    n_workers=self.processes,
                    threads_per_worker=1,
                    processes=True,
                    dashboard_address=None,
                    silence_logs=logging.ERROR,
                )
            self.client = distributed.Client(self.cluster)
        else:
            self.client = connect_dask(self.address, self.timeout_s)
        if self.on_event is not None:
            handler = self.on_event

            def on_dask_event(event: tuple[float, dict[str, Any]]) -> None:
                msg = event[1]
                handler(msg["key"], msg["completed"], msg["total"])

            self.client.subscribe_topic(DASK_EVENT_TOPIC, on_dask_event)
        return self

    def close(self) -> None:
        if self.client is not None:
            with contextlib.suppress(Exception):
                self.client.close()
        if self.cluster is not None:
            with contextlib.suppress(Exception):
                self.cluster.close()
        self.client = self.cluster = None

    def run(self, function: TaskFunction, tasks: list[dict[str, Any]]) -> Iterator[dict[str, Any]]:
        if not tasks:
            return
        distributed = import_distributed()
        report = self.on_event is not None
        futures = [
            self.client.submit(
                _call_on_dask_worker,
                function,
                {**task, "report": report},
                key=f"drift-{task['key']}-{os.urandom(4).hex()}",
                pure=False,
            )
            for task in tasks
        ]
        try:
            for future in distributed.as_completed(futures, loop=self.client.loop):
                yield future.result()
        finally:
            self.client.cancel([f for f in futures if not f.done()])


@contextlib.contextmanager
def open_engine(
    kind: str,
    *,
    processes: int,
    scheduler: str | None = None,
    on_event: EventHandler | None = None,
    preload: tuple[str, ...] = (),
) -> Iterator[Engine]:
    """The engine ``kind`` ('local' or 'dask'), ready to run tasks; closed on leaving.

    ``preload``: modules the local pool workers import before their first task.
    """
    if kind == "local":
        engine = LocalEngine(processes, on_event, preload)
        engine.warm_up()
        yield engine
        return
    if kind != "dask":
        raise DriftError(f"Unknown engine '{kind}'; choose one of {', '.join(ENGINES)}.")
    engine = DaskEngine(scheduler, processes, on_event)
    try:
        engine.open()
        yield engine
    finally:
        engine.close()
