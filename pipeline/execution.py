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

import logging
import os
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

from pipeline.config import ExecutionConfig
from pipeline.errors import ConfigError

__all__ = ["Executor", "make_executor"]


class Executor:
    """Runs ``fn(item, **shared)`` over items and returns the results in item order.

    Create with :func:`make_executor`; use as a context manager (a Dask cluster started for
    the run is shut down on exit). The cluster is started on the first :meth:`map` call, so a
    run whose stages have nothing to distribute never starts one.
    """

    def __init__(self, config: ExecutionConfig, source: Path | None = None):
        self.config = config
        self._where = f"{source}: " if source else ""
        self.mode = config.mode
        self._client = None
        self._cluster = None
        self._pool: ThreadPoolExecutor | None = None

    # -------------------------------------------------------------------------------- api
    @property
    def workers(self) -> int:
        """Number of workers the partitions are spread over (1 for ``local``)."""
        if self.mode == "local":
            return 1
        if self.mode == "dask" and self._client is not None:
            return max(1, len(self._client.scheduler_info().get("workers", {})))
        return self.config.workers or os.cpu_count() or 1

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
        client = self._dask_client()
        # one future per shared value (a dict or list given alone would be split up)
        scattered = {
            k: client.scatter([v], broadcast=True, hash=False)[0] for k, v in shared.items()
        }
        futures = client.map(fn, items, pure=False, **scattered)
        try:
            return client.gather(futures)
        finally:
            for f in [*futures, *scattered.values()]:
                f.release()

    def close(self) -> None:
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

    def describe(self) -> dict[str, Any]:
        """Mode, workers and scheduler, for the run manifest."""
        out: dict[str, Any] = {"mode": self.mode, "workers": self.workers}
        if self.mode == "dask":
            out["scheduler"] = self.config.scheduler or "local cluster on 127.0.0.1"
            out["started"] = self._client is not None
        return out

    # -------------------------------------------------------------------------- internals
    def _thread_pool(self) -> ThreadPoolExecutor:
        if self._pool is None:
            self._pool = ThreadPoolExecutor(
                max_workers=self.config.workers or os.cpu_count() or 1,
                thread_name_prefix="altigrade",
            )
        return self._pool

    def _dask_client(self):
        if self._client is not None:
            return self._client
        try:
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
            return self._client
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
        return self._client


def make_executor(config: ExecutionConfig, source: Path | None = None) -> Executor:
    """The executor of a run's ``[execution]`` table (nothing is started until used);
    ``source`` is the config file named in error messages."""
    return Executor(config, source)
