"""Where the independent pieces of a stage run: in this process, on threads, or on Dask.

Orchestration only. A stage splits its work into *partitions* that do not depend on how the
run executes (spatial partitions of stations, edges or DEM tiles; sources for the corridors),
hands them to an :class:`Executor`, and combines the results in partition order. Because the
partitions and the order of combination are fixed by the data alone, every mode gives
results identical to the bit: ``local`` runs the partitions one after another, ``threads``
on a thread pool, ``dask`` as tasks on a Dask distributed cluster — a scheduler at a given
address, or a local cluster of worker processes listening on the loopback interface only.

Large read-only inputs that every partition needs (a road graph, say) go in as ``shared``:
on Dask they are sent to each worker once (``Client.scatter(broadcast=True)``), not with
every task.

References
----------
Dask Development Team (2016), "Dask: Library for dynamic task scheduling", dask.org
(``distributed.Client``, ``distributed.LocalCluster``).
"""

from __future__ import annotations

import contextlib
import ctypes
import gc
import importlib
import logging
import os
import sys
import threading
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

from pipeline.config import ExecutionConfig
from pipeline.errors import ConfigError

__all__ = [
    "Executor",
    "make_executor",
    "share_one_malloc_arena",
    "fewer_full_collections",
    "ROAD_GRAPH_GC_THRESHOLDS",
]


class Executor:
    """Runs ``fn(item, **shared)`` over items and returns the results in item order.

    Create with :func:`make_executor`; use as a context manager (a Dask cluster started for
    the run is shut down on exit). The cluster starts on :meth:`warm_up` (in the background)
    or on the first :meth:`map` call. While a local cluster starts in the background,
    :meth:`map` runs the partitions in this process, one after another, and hands the
    remaining ones to the cluster as soon as it is up (on two cores a local cluster takes
    seconds to start, longer than the first stages' partitions take here).
    """

    def __init__(self, config: ExecutionConfig, source: Path | None = None):
        self.config = config
        self._where = f"{source}: " if source else ""
        self.mode = config.mode
        self._client = None
        self._cluster = None
        self._pool: ThreadPoolExecutor | None = None
        self._starting: threading.Thread | None = None
        self._start_error: BaseException | None = None
        self._lock = threading.Lock()
        self._forked = False  # workers of the local cluster forked from a ready fork server
        self._pieces = {"in_client": 0, "on_cluster": 0, "forked": 0}

    def warm_up(self) -> None:
        """Start connecting to (or starting) the Dask cluster in the background, so that its
        start-up overlaps the run's first stages; :meth:`map` waits for it. Where stages
        overlap, the process's threads are also set to share one malloc arena
        (:func:`share_one_malloc_arena`)."""
        if self.overlaps_stages:
            share_one_malloc_arena()
        if self.mode != "dask" or self._client is not None or self._starting is not None:
            return
        if not self.config.scheduler:  # first, so that it starts before the stages' threads
            self._forked = _start_fork_server(self._worker_modules())

        def connect() -> None:
            try:
                self._connect()
            except BaseException as exc:  # re-raised by map() in the run's thread
                self._start_error = exc

        self._starting = threading.Thread(target=connect, name="altigrade-dask-start", daemon=True)
        self._starting.start()

    # -------------------------------------------------------------------------------- api
    @property
    def workers(self) -> int:
        """Number of workers the partitions are spread over (1 for ``local``)."""
        if self.mode == "local":
            return 1
        if self.mode == "dask" and self._client is not None:
            return max(1, len(self._client.scheduler_info().get("workers", {})))
        return self.config.workers or os.cpu_count() or 1

    @property
    def overlaps_stages(self) -> bool:
        """Whether independent stages run at the same time: in every mode but ``local`` and
        ``threads`` with ``workers = 1`` (one thread asked for: one thing at a time)."""
        one_thread = self.mode == "threads" and self.config.workers == 1
        return self.mode != "local" and not one_thread

    @property
    def concurrent_stages(self) -> int:
        """How many stages may run at once: one without overlap; two in ``threads`` mode —
        the run has two long independent chains (terrain → fleet, and road graph → edge
        profiles), and more stage threads only contended for the interpreter (measured on the
        state scenario); three in ``dask`` mode, where a stage whose pieces are on the cluster
        holds its thread without using this process's CPU (while the cluster starts, the
        zones and the station sampling both wait for it, and a third slot lets the road graph
        be built meanwhile).
        """
        if not self.overlaps_stages:
            return 1
        return 3 if self.mode == "dask" else 2

    @property
    def threads_per_piece(self) -> int:
        """Threads one partition may use for its own compiled loops (a partition's town
        trees): two where stages overlap in ``threads`` mode, else one (a Dask worker already
        runs one task per thread)."""
        return 2 if self.mode == "threads" and self.overlaps_stages else 1

    def map(
        self, fn: Callable[..., Any], items: Sequence[Any], *, shared: dict[str, Any] | None = None
    ) -> list[Any]:
        """``[fn(item, **shared) for item in items]``, run in this executor's mode."""
        shared = shared or {}
        items = list(items)
        if not items:
            return []
        if self.mode == "local" or len(items) == 1 and self.mode == "threads":
            return [fn(item, **shared) for item in items]
        if self.mode == "threads":
            pool = self._thread_pool()
            return list(pool.map(lambda it: fn(it, **shared), items))
        return self._map_dask(fn, items, shared)

    def close(self) -> None:
        self._wait_for_start(raise_error=False)
        if self._pool is not None:
            self._pool.shutdown(wait=True)
            self._pool = None
        if self._client is not None:
            self._client.close()
            self._client = None
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None

    def __enter__(self) -> Executor:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    @property
    def forks_pieces(self) -> bool:
        """Whether :meth:`start_in_forks` forks: in ``threads`` and ``dask`` mode with stages
        overlapping, on Linux (macOS can fork, but its system frameworks are not safe in a
        forked child, which is why Python spawns there by default).

        In ``dask`` mode the documents are drawn by children of this process too, not on the
        cluster: their inputs are this process's tables, and their results tens of megabytes
        of HTML on the national subset, so a cluster's workers spent longer receiving the one
        and sending back the other than drawing (4.4 s on two workers against 2.9 s drawn
        serially here)."""
        return (
            self.mode in ("threads", "dask")
            and self.overlaps_stages
            and sys.platform.startswith("linux")
        )

    def start_in_forks(self, jobs: Sequence[Callable[[], Any]]) -> _Forks:
        """Start ``job()`` for each job in a child forked from this process now (one child
        per job), for pieces that hold the interpreter lock for most of their time (drawing
        the documents: templates, JSON, charts), so that they run side by side with each
        other and with this process. A child has this process's memory as it is at the call,
        so nothing is pickled on the way in; only the result comes back (by pipe).

        Call it while no other thread of this process is at work (a lock another thread
        holds at the fork stays held in the child): the last stage calls it first thing,
        before it starts its writer thread. In ``dask`` mode the client's event-loop thread
        still runs; the children never touch the client, its sockets or its locks, and they
        end by ``os._exit`` (no exit handlers), so nothing it holds is needed. Only where
        :attr:`forks_pieces` is true.
        """
        forks = _Forks(jobs)
        self._count_pieces(forked=len(jobs))
        return forks

    def describe(self) -> dict[str, Any]:
        """Mode, workers and scheduler, for the run manifest; in ``dask`` mode also how many
        partitions ran on the cluster and how many in this process while it started; where
        pieces may be forked (:attr:`forks_pieces`), how many were."""
        out: dict[str, Any] = {"mode": self.mode, "workers": self.workers}
        if self.forks_pieces:
            out["pieces_in_forked_children"] = self._pieces["forked"]
        if self.mode == "dask":
            out["scheduler"] = self.config.scheduler or "local cluster on 127.0.0.1"
            out["started"] = self._client is not None
            out["partitions_on_cluster"] = self._pieces["on_cluster"]
            out["partitions_in_client_while_starting"] = self._pieces["in_client"]
        return out

    # -------------------------------------------------------------------------- internals
    def _worker_modules(self) -> tuple[str, ...]:
        """What a worker imports when it starts: the stages' partitions, and the map and
        report code only where the documents are drawn on the cluster. Where they are drawn
        by forked children of this process (:attr:`forks_pieces`), the fork server that
        imported folium and matplotlib too took 2.5 s of CPU on the national subset, beside
        the run's first stages, against 1.7 s without them, and its workers were up about a
        second later (measured)."""
        return _WORKER_MODULES + (() if self.forks_pieces else _DOCUMENT_MODULES)

    def _map_dask(self, fn: Callable[..., Any], items: list[Any], shared: dict[str, Any]) -> list:
        """:meth:`map` in ``dask`` mode.

        While the cluster is still starting (worker processes importing the pipeline, for
        seconds), this thread works through the items itself, in order. The moment the
        cluster is up, every item not yet begun goes to it, while the item in hand here is
        finished. Same function, same items, results in item order: the same results.
        """
        results: list[Any] = [None] * len(items)
        claims = _Claims(len(items))
        handed: dict[str, Any] = {}
        if self._cluster_starting():
            helper = threading.Thread(
                target=self._hand_over_when_up,
                args=(fn, items, shared, claims, handed),
                name="altigrade-dask-handover",
                daemon=True,
            )
            helper.start()
            here = 0
            while self._cluster_starting() and (i := claims.one()) is not None:
                results[i] = fn(items[i], **shared)
                here += 1
            helper.join()
            self._count_pieces(in_client=here)
        if "error" in handed:
            raise handed["error"]
        if "futures" not in handed:
            rest = claims.rest()
            if not rest:
                return results
            handed.update(self._submit(self._dask_client(), fn, items, shared, rest))
        try:
            there = self._client.gather(handed["futures"])
        finally:
            for f in handed["to_release"]:
                f.release()
        for i, value in zip(handed["indices"], there, strict=True):
            results[i] = value
        self._count_pieces(on_cluster=len(handed["indices"]))
        return results

    def _hand_over_when_up(self, fn, items, shared, claims: _Claims, handed: dict) -> None:
        """Waits for the cluster to be up, then sends it every item not yet begun here
        (nothing if the items are all begun first or the cluster fails to start)."""
        try:
            while not claims.exhausted():
                starting = self._starting
                if starting is None or not starting.is_alive():
                    break
                starting.join(0.02)
            client = self._client
            if claims.exhausted() or client is None:
                return
            rest = claims.rest()
            if rest:
                handed.update(self._submit(client, fn, items, shared, rest))
        except BaseException as exc:  # re-raised by map() in the stage's thread
            handed["error"] = exc

    @staticmethod
    def _submit(client, fn, items, shared, indices: range) -> dict[str, Any]:
        # one future per shared value (a dict or list given alone would be split up)
        scattered = {
            k: client.scatter([v], broadcast=True, hash=False)[0] for k, v in shared.items()
        }
        # the items go to the cluster as data of their own, not inside the task graph
        item_futures = client.scatter([items[i] for i in indices], hash=False)
        futures = client.map(fn, item_futures, pure=False, **scattered)
        return {
            "indices": indices,
            "futures": futures,
            "to_release": [*futures, *item_futures, *scattered.values()],
        }

    def _thread_pool(self) -> ThreadPoolExecutor:
        if self._pool is None:
            self._pool = ThreadPoolExecutor(
                max_workers=self.config.workers or os.cpu_count() or 1,
                thread_name_prefix="altigrade",
            )
        return self._pool

    def _cluster_starting(self) -> bool:
        """Whether a local cluster is being started in the background and is not up yet.
        (Connecting to a running scheduler takes a moment; a scheduler that does not answer
        must stop the run, not leave it to finish here unnoticed.)"""
        starting = self._starting  # another stage's thread may clear it meanwhile
        return not self.config.scheduler and starting is not None and starting.is_alive()

    def _count_pieces(self, in_client: int = 0, on_cluster: int = 0, forked: int = 0) -> None:
        with self._lock:
            self._pieces["in_client"] += in_client
            self._pieces["on_cluster"] += on_cluster
            self._pieces["forked"] += forked

    def _wait_for_start(self, raise_error: bool = True) -> None:
        starting = self._starting  # several stages' threads may wait at once
        if starting is not None:
            starting.join()
            self._starting = None
        if self._start_error is not None and raise_error:
            err, self._start_error = self._start_error, None
            raise err

    def _dask_client(self):
        self._wait_for_start()
        if self._client is None:
            self._connect()
        return self._client

    def _connect(self) -> None:
        try:
            import dask
            from distributed import Client, LocalCluster
        except ImportError:
            raise ConfigError(
                f"{self._where}execution.mode = 'dask' needs the Dask distributed scheduler: "
                "pip install 'altigrade[scale]' (or dask[distributed])"
            ) from None
        timeout = f"{self.config.connect_timeout_s}s"
        if self.config.scheduler:
            try:
                self._client = Client(self.config.scheduler, timeout=timeout)
            except (OSError, TimeoutError) as exc:
                raise ConfigError(
                    f"{self._where}execution.scheduler: no Dask scheduler answered at "
                    f"{self.config.scheduler!r} within {self.config.connect_timeout_s:g} s "
                    f"({type(exc).__name__})"
                ) from None
            return
        # no statistical profiler in the workers: it takes the GIL every few milliseconds
        settings = {
            "distributed.nanny.pre-spawn-environ": _worker_environ(),
            "distributed.worker.profile.enabled": False,
        }
        if self._forked or _start_fork_server(self._worker_modules()):
            settings["distributed.worker.multiprocessing-method"] = "forkserver"
        with dask.config.set(settings):
            self._cluster = LocalCluster(
                n_workers=self.config.workers or os.cpu_count() or 1,
                threads_per_worker=1,
                processes=True,
                host="127.0.0.1",
                dashboard_address=None,
                silence_logs=logging.ERROR,
                memory_limit=self.config.worker_memory_limit or "auto",
            )
        self._client = Client(self._cluster, timeout=timeout)
        # import the pipeline in every worker now, not inside the first task (and the map
        # and report code where the documents are drawn on the cluster). Workers forked from
        # the fork server have it already; spawned ones and those of a cluster at
        # execution.scheduler import it here (seconds each, measured)
        for module in self._worker_modules():
            self._client.run(importlib.import_module, module)


def _worker_environ() -> dict[str, Any]:
    """The environment Dask sets before it starts a local worker
    (``distributed.nanny.pre-spawn-environ``), less ``MALLOC_TRIM_THRESHOLD_``.

    Dask sets that one to turn off glibc's adaptive mmap threshold, after which every large
    temporary array is mapped and unmapped afresh: the fleet model's vectorised solvers ran
    at half speed in a worker (measured). The thread limits are kept.
    """
    import dask

    return {
        k: v
        for k, v in dask.config.get("distributed.nanny.pre-spawn-environ", {}).items()
        if k != "MALLOC_TRIM_THRESHOLD_"
    }


def _start_fork_server(modules: Sequence[str]) -> bool:
    """Start Python's fork server (``multiprocessing`` start method ``forkserver``) now, with
    Dask's worker and ``modules`` (:meth:`Executor._worker_modules`) imported in it, so that
    each worker of a local cluster is forked from it ready to work, instead of being a fresh
    interpreter that imports all of that again (about two seconds of CPU per worker,
    measured). Returns False where the platform has no fork server (the workers are then
    spawned, Dask's default).

    The server's environment is the one each worker would be spawned with:
    :func:`_worker_environ` (values already in this process's environment kept) and the
    fixed hash seed the Dask nanny sets, so that all workers hash alike. Both are also set in
    this process's environment, as the nanny itself does before it starts a worker.
    """
    import multiprocessing
    from multiprocessing import forkserver

    if "forkserver" not in multiprocessing.get_all_start_methods():
        return False
    env = {k: os.environ.get(k, str(v)) for k, v in _worker_environ().items() if v is not None}
    if env.get("PYTHONHASHSEED") in (None, "0"):
        env["PYTHONHASHSEED"] = _DASK_HASH_SEED
    os.environ.update(env)
    multiprocessing.get_context("forkserver").set_forkserver_preload(
        ["distributed", "distributed.nanny", *modules]
    )
    forkserver.ensure_running()
    return True


#: The hash seed the Dask nanny gives its workers (``distributed.nanny.Nanny``), so that all
#: of them hash alike.
_DASK_HASH_SEED = "6640"


class _Forks:
    """Children forked from this process, one per job (:meth:`Executor.start_in_forks`)."""

    def __init__(self, jobs: Sequence[Callable[[], Any]]):
        import multiprocessing
        import warnings

        ctx = multiprocessing.get_context("fork")
        self._children = []
        # the objects alive now are left out of the children's garbage collections, which
        # would otherwise write to every one of them and so copy the whole heap page by page
        gc.freeze()
        try:
            for job in jobs:
                receive, send = ctx.Pipe(duplex=False)
                child = ctx.Process(target=_forked_job, args=(job, send, os.getpid()), daemon=True)
                with warnings.catch_warnings():
                    # Python 3.12+ warns on every fork of a process with threads; the
                    # caller forks while they are idle (see Executor.start_in_forks)
                    warnings.filterwarnings("ignore", "This process .* is multi-threaded")
                    child.start()
                send.close()
                self._children.append((child, receive))
        except BaseException:
            self.close()
            raise
        finally:
            gc.unfreeze()

    def results(self) -> list[Any]:
        """Each job's result, in job order; the first failed job's error is raised (after
        every child has ended)."""
        out: list[Any] = []
        error: BaseException | None = None
        for child, receive in self._children:
            try:
                kind, value = receive.recv()
            except EOFError:
                child.join()
                kind, value = (
                    "error",
                    RuntimeError(
                        f"a forked process ended without its result (exit code {child.exitcode})"
                    ),
                )
            finally:
                receive.close()
            child.join()
            if kind == "error" and error is None:
                error = value
            out.append(value)
        self._children = []
        if error is not None:
            raise error
        return out

    def close(self) -> None:
        """End every child still running (the run stops on an error elsewhere)."""
        for child, receive in self._children:
            receive.close()
            if child.is_alive():
                child.kill()
            child.join()
        self._children = []


def _forked_job(job: Callable[[], Any], send: Any, parent: int) -> None:
    """A forked child's work: ``job()``, its result or error sent back by ``send``. The child
    dies with the run's process (``PR_SET_PDEATHSIG`` on Linux)."""
    import traceback

    from pipeline.errors import AltigradeError
    from pipeline.layer_writer import _die_with_parent

    if not _die_with_parent(parent):
        return
    # fresh stdout and stderr objects on the same files: the inherited ones may have been
    # locked by another thread at the fork (a progress display writing, say), and a lock
    # held at the fork stays held in the child
    for name, fd in (("stdout", 1), ("stderr", 2)):
        old = getattr(sys, name)
        encoding = getattr(old, "encoding", None) or "utf-8"
        errors = getattr(old, "errors", None) or "backslashreplace"
        with contextlib.suppress(OSError, ValueError):
            fresh = open(os.dup(fd), "w", buffering=1, encoding=encoding, errors=errors)  # noqa: SIM115
            setattr(sys, name, fresh)
    try:
        result: tuple[str, Any] = ("ok", job())
    except BaseException as exc:  # an error the run reports: sent back, raised by the run
        if isinstance(exc, AltigradeError):
            result = ("error", exc)
        else:
            result = ("error", RuntimeError("".join(traceback.format_exception(exc)).strip()))
    try:
        send.send(result)
    except Exception as exc:  # a result or an error that cannot be pickled
        send.send(("error", RuntimeError(f"a forked process could not send its result: {exc}")))
    finally:
        send.close()


class _Claims:
    """Hands out the indices 0 … n-1 in order, each once, to whichever thread asks first."""

    def __init__(self, n: int):
        self._n = n
        self._next = 0
        self._lock = threading.Lock()

    def one(self) -> int | None:
        """The next index, or None when all are handed out."""
        with self._lock:
            if self._next >= self._n:
                return None
            self._next += 1
            return self._next - 1

    def rest(self) -> range:
        """Every index not yet handed out (possibly none)."""
        with self._lock:
            out = range(self._next, self._n)
            self._next = self._n
            return out

    def exhausted(self) -> bool:
        with self._lock:
            return self._next >= self._n


#: Modules every worker imports when it starts: the stages' partitions.
_WORKER_MODULES = ("pipeline.stages", "pipeline.zones")

#: Modules the workers import too where the documents are drawn on the cluster (not in
#: forked children of the client): the map and report code (folium, matplotlib).
_DOCUMENT_MODULES = ("pipeline.maps", "pipeline.webmap", "pipeline.report")

#: mallopt parameter number of glibc's M_ARENA_MAX (malloc.h).
_M_ARENA_MAX = -8


def share_one_malloc_arena() -> bool:
    """Let every thread of this process allocate from one glibc malloc arena.

    By default glibc gives each thread that allocates its own arena; memory a stage frees on
    one thread is then not reused by a stage on another, and each arena grows and shrinks its
    own heap. With two stages overlapping, the state scenario took about 470,000 page faults,
    8–10 s of system time and 2.3–2.5 GB peak RSS; set here, at the start of the run, about
    330,000 faults and 1.8–2.0 GB (``MALLOC_ARENA_MAX=1`` in the environment, before the
    interpreter starts: 280,000 and 1.6 GB, as many faults as the run without threads;
    measured). The large arrays are allocated rarely, so one arena's lock costs nothing
    visible. Returns whether the setting took (False on a C library without ``mallopt``)."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        return bool(ctypes.CDLL("libc.so.6").mallopt(_M_ARENA_MAX, 1))
    except (OSError, AttributeError):  # not glibc
        return False


#: Thresholds of CPython's cyclic garbage collector while a road graph is read and built
#: (its default: 700, 10, 10).
ROAD_GRAPH_GC_THRESHOLDS = (50_000, 20, 100)


@contextlib.contextmanager
def fewer_full_collections():
    """Collect cyclic garbage less often for a while; the thresholds are restored after.

    Shapely geometries are objects the collector tracks, and the road graph alone makes
    several arrays of half a million of them. Each time such an array is made, CPython's rule
    for a full collection (long-lived objects grew by a quarter: CPython's ``gc`` module
    documentation and ``Modules/gcmodule.c``) set off a pass over every tracked object of the
    process, with the interpreter lock held and nothing to collect. Measured on the state
    scenario (``threads``, callbacks on ``gc.callbacks``): 15 full collections of 0.06–0.21 s,
    1.8 s in all, 8 of them while the road graph was built; with these thresholds for the
    whole run none. Used around the road graph only: held for a whole run, the national
    subset's peak RSS rose from 0.93 to 1.05 GB; around the road graph alone it is 0.94 GB.
    (The whole national run's 13.6 GB peak is the same either way: it comes with the corridor
    partitions, not with the collector.)
    """
    old = gc.get_threshold()
    gc.set_threshold(*(max(a, b) for a, b in zip(old, ROAD_GRAPH_GC_THRESHOLDS, strict=True)))
    try:
        yield
    finally:
        gc.set_threshold(*old)


def make_executor(config: ExecutionConfig, source: Path | None = None) -> Executor:
    """The executor of a run's ``[execution]`` table (nothing is started until
    :meth:`Executor.warm_up` or the first :meth:`Executor.map`); ``source`` is the config file
    named in error messages."""
    return Executor(config, source)
