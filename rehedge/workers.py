"""Where independent pieces of work run: this process, local worker processes (joblib's loky
backend) or the workers of a dask.distributed cluster.

Two uses. The cells of a sweep (rehedge.sweep) are whole runs: :func:`run_each`
runs a function on each item and yields the outcomes as they finish. The
linear agent's fit maps over chunks of training transitions held where they
were collected (:func:`collect_on_workers`, then
``LinearBasisAgent.fit_map``): per decision time each worker turns its chunks
into normal equations, which are summed here and solved, so one agent can
learn from more paths than one worker holds.

Every task runs with BLAS and OpenMP limited to ``threads`` threads (default
1): workers x threads stays within the cores, and a result does not depend on
how many workers there were. On a loaded two-core machine a 2-thread BLAS
call on the fit's small matrices (19 x 19 from 40,000 rows) took 0.45 s
against 1 ms with one thread (measured): the waiting threads, not the
arithmetic, cost the time.

A local worker process ends when the process that started the work dies: loky keeps idle workers
for minutes for reuse, and a sweep killed with cells running left two workers and loky's resource
tracker (about 236 MB each) alive for over six minutes. Each local task starts, once per worker, a
watch on its parent's pid (:func:`watch_parent`) that ends the worker within
``PARENT_POLL_SECONDS`` of the parent's death. A dask cluster's workers are the cluster's, not
ours: a dead client's tasks are released by the scheduler.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import threading
import weakref
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any

from threadpoolctl import threadpool_limits

from agents.dataset import Exploration, Transitions, TransitionStore, load_transitions, save_transitions
from hedge_env.market import PathSet
from hedge_env.problem import HedgingProblem

THREADS_PER_TASK = 1
PARENT_POLL_SECONDS = 0.5
_WATCHED: set[int] = set()  # parents this process already watches


def limited(threads: int, function: Callable, *args) -> Any:
    """``function(*args)`` with BLAS and OpenMP pools limited to ``threads`` threads."""
    with threadpool_limits(limits=threads):
        return function(*args)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except (ProcessLookupError, PermissionError):  # gone, or its pid now another user's process
        return False
    return True


def watch_parent(parent: int, poll: float = PARENT_POLL_SECONDS) -> None:
    """In a worker process (not ``parent`` itself), end this process at once when ``parent`` dies:
    a daemon thread checks every ``poll`` seconds. Idempotent per parent."""
    if parent == os.getpid() or parent in _WATCHED:
        return
    _WATCHED.add(parent)

    def watch() -> None:
        while _alive(parent) and os.getppid() != 1:
            threading.Event().wait(poll)
        os._exit(1)  # no cleanup to run: the parent that wanted the result is gone

    threading.Thread(target=watch, name="rehedge-parent-watch", daemon=True).start()


def _local(parent: int, threads: int, function: Callable, *args) -> Any:
    """A local worker's task: watch the parent, then ``limited(threads, function, *args)``."""
    watch_parent(parent)
    return limited(threads, function, *args)


def connect(scheduler):
    """A dask.distributed Client for ``scheduler`` (an address such as ``tcp://host:8786``, or a
    Client, returned as it is). Needs the ``cluster`` extra (dask[distributed])."""
    try:
        from distributed import Client
    except ImportError:  # pragma: no cover - depends on the installation
        raise RuntimeError("a dask scheduler needs dask.distributed: pip install 'rehedge[cluster]'") from None
    if isinstance(scheduler, Client):
        return scheduler
    try:
        return Client(scheduler, timeout="20s")
    except (OSError, TimeoutError, ValueError) as error:
        raise ConnectionError(f"cannot reach the dask scheduler ({' '.join(str(error).split())})") from None


def run_each(function: Callable, items: Iterable, workers: int = 1, scheduler=None,
             threads: int = THREADS_PER_TASK) -> Iterator[tuple[int, Any, BaseException | None]]:
    """``function(item)`` for every item, serially, on ``workers`` local processes, or on the dask
    cluster at ``scheduler``; yields ``(index, result, error)`` as each finishes (error is the
    exception when the task itself was lost, e.g. a worker that died; a function that reports
    its own failures returns them as results)."""
    items = list(items)
    if scheduler is not None:
        from distributed import as_completed

        client = connect(scheduler)
        own = client is not scheduler
        try:
            futures = {client.submit(limited, threads, function, item, pure=False): index
                       for index, item in enumerate(items)}
            for future in as_completed(futures):
                try:
                    yield futures[future], future.result(), None
                except Exception as error:  # noqa: BLE001 - a lost task is reported, the others go on
                    yield futures[future], None, error
        finally:
            if own:
                client.close()
        return
    if workers <= 1:
        for index, item in enumerate(items):
            yield index, limited(threads, function, item), None
        return
    from joblib import Parallel, delayed, parallel_config

    with parallel_config(backend="loky", inner_max_num_threads=threads):
        tasks = (delayed(_indexed)(index, os.getpid(), threads, function, item) for index, item in enumerate(items))
        for index, result in Parallel(n_jobs=workers, return_as="generator_unordered")(tasks):
            yield index, result, None


def _indexed(index: int, parent: int, threads: int, function: Callable, item) -> tuple[int, Any]:
    return index, _local(parent, threads, function, item)


# ---------------------------------------------------------------------------------------------
# Chunks of training transitions held by workers, and maps over them
# ---------------------------------------------------------------------------------------------


class LocalChunks:
    """Chunks held in this process (a TransitionStore: in memory, then on disk); maps run here."""

    def __init__(self, store: TransitionStore, threads: int = THREADS_PER_TASK):
        self.store, self.threads = store, threads

    def __call__(self, function: Callable, *args) -> list:
        with threadpool_limits(limits=self.threads):
            return [function(chunk, *args) for chunk in self.store]

    def close(self) -> None:
        self.store.close()


class JoblibChunks:
    """Chunks written to files by local worker processes, each map task reading one chunk's file
    (memory-mapped) in a worker: the workers share this machine's disk, not their memory."""

    def __init__(self, folder: Path, files: list[Path], workers: int, threads: int = THREADS_PER_TASK):
        self.folder, self.files, self.workers, self.threads = folder, files, workers, threads
        self._remove = weakref.finalize(self, shutil.rmtree, folder, True)

    def __call__(self, function: Callable, *args) -> list:
        from joblib import Parallel, delayed, parallel_config

        with parallel_config(backend="loky", inner_max_num_threads=self.threads):
            return Parallel(n_jobs=self.workers)(
                delayed(_local)(os.getpid(), self.threads, _on_file, path, function, args) for path in self.files)

    def close(self) -> None:
        self._remove()


def _on_file(path: Path, function: Callable, args: tuple):
    return function(load_transitions(path), *args)


class DaskChunks:
    """Chunks collected on the workers of a dask cluster and kept in their memory (futures);
    each map task runs where its chunk is, and only the results travel."""

    def __init__(self, client, futures: list, threads: int = THREADS_PER_TASK, own_client: bool = False):
        self.client, self.futures, self.threads, self.own_client = client, futures, threads, own_client

    def __call__(self, function: Callable, *args) -> list:
        tasks = [self.client.submit(limited, self.threads, function, future, *args, pure=False)
                 for future in self.futures]
        return self.client.gather(tasks)

    def close(self) -> None:
        for future in self.futures:
            future.release()
        self.futures = []
        if self.own_client:
            self.client.close()


def _collect(problem, paths, exploration, train_seed, chunk_paths, index) -> Transitions:
    from rehedge.training import collect_training_chunk

    return collect_training_chunk(problem, paths, exploration, train_seed, chunk_paths, index)


def _collect_to_file(folder: Path, problem, paths, exploration, train_seed, chunk_paths, index) -> Path:
    chunk = _collect(problem, paths, exploration, train_seed, chunk_paths, index)
    return save_transitions(chunk, Path(folder) / f"chunk{index:06d}")


def collect_on_workers(problem: HedgingProblem, paths: PathSet, exploration: Exploration, train_seed: int,
                       chunk_paths: int, workers: int = 1, scheduler=None, threads: int = THREADS_PER_TASK):
    """Transitions of the training paths ``paths``, ``chunk_paths`` at a time, each chunk collected
    and kept by a worker; returns a map over the chunks (``LocalChunks``, ``JoblibChunks`` or
    ``DaskChunks``, each with ``close()``). The chunks are those of
    rehedge.training.collect_training_chunks, so any of them gives the same fit."""
    count = -(-paths.n_paths // chunk_paths)
    common = (problem, paths, exploration, train_seed, chunk_paths)
    if scheduler is not None:
        client = connect(scheduler)
        futures = [client.submit(limited, threads, _collect, *common, index, pure=False) for index in range(count)]
        return DaskChunks(client, futures, threads, own_client=client is not scheduler)
    if workers <= 1:
        store = TransitionStore()
        with threadpool_limits(limits=threads):
            for index in range(count):
                store.add(_collect(*common, index))
        return LocalChunks(store, threads)
    from joblib import Parallel, delayed, parallel_config

    folder = Path(tempfile.mkdtemp(prefix="rehedge-chunks-"))
    try:
        with parallel_config(backend="loky", inner_max_num_threads=threads):
            files = Parallel(n_jobs=workers)(
                delayed(_local)(os.getpid(), threads, _collect_to_file, folder, *common, index)
                for index in range(count))
    except BaseException:
        shutil.rmtree(folder, ignore_errors=True)
        raise
    return JoblibChunks(folder, files, workers, threads)
