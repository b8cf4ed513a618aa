"""Where the model runs go: this process (statsforecast's own processes) or a Dask cluster.

`engine: local` fits in this process, or, for a model group large enough to
pay for it (`local_jobs`), in chunks on `n_jobs` worker processes of a pool
kept for the process (`map_on_pool`). The pool's workers start from a
forkserver, never by forking this process: a run holds threads (Dagster's
event writers, the progress display) and a fork taken while one of them
holds a lock leaves the child waiting forever (seen here with statsforecast's
own `n_jobs`, whose pool forks: the demo's backtest hung).
`engine: dask` cuts each model group into chunks of `CHUNK_SERIES` series and
runs every chunk as one task on a Dask cluster: the scheduler at
`models.address`, or, without one, a cluster of `models.workers` processes
started on this machine the first time a run needs it and kept for the
process (`cluster_client`; `close_clusters` stops it, as does the process's
end). A task calls the same `pipelines.engines.models.fit_group` that the
local engine calls, with `n_jobs=1`, so the workers need this package
installed at the same version.

Why chunks of our own and not statsforecast's distributed backend (its Fugue
`FugueBackend`, reached by passing a Dask DataFrame to `StatsForecast.forecast`):
that backend declares its output columns float32 (`_get_output_schema`), so its
forecasts differ from the local float64 ones in the 7th significant digit; it
offers `forecast` only, without the fitted model objects the ETS component
string and smoothing parameters are read from; and it applies the models per
series group through a shuffle of the frame. A chunk task returns float64
arrays and the parameters, and each series is fitted alone exactly as the local
engine fits it, so the forecasts are the same numbers to the last bit when the
workers run the same library builds on the same kind of CPU (tests/test_model_engine.py).
"""

from __future__ import annotations

import atexit
import os
import threading
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from pipelines.errors import PlanningError
from pipelines.vocabulary import ModelEngine

# Series per Dask task: about 3 s of non-seasonal AutoETS (12 ms a 156-week series on this machine) against a
# few ms of scheduling, and 40 tasks at 10,000 series, enough for the scheduler to balance two or more workers.
# Measured here, no source.
CHUNK_SERIES = 250

# The local engine starts statsforecast's process pool only for a group of costly models at least this large:
# the pool costs 0.2-0.3 s a call, 20 AutoETS series about 0.25 s (measured on this 2-core machine).
POOL_MIN_SERIES = 200


@dataclass(frozen=True)
class EngineSettings:
    """Config `models`: engine, local processes, the cluster's address or its size."""

    engine: str = ModelEngine.LOCAL
    n_jobs: int = 1
    address: str | None = None
    workers: int = 2

    @classmethod
    def of(cls, config) -> EngineSettings:
        m = config.models
        return cls(engine=m.engine, n_jobs=m.n_jobs, address=m.address, workers=m.workers)

    @property
    def on_cluster(self) -> bool:
        return self.engine == ModelEngine.DASK


def local_jobs(engine: EngineSettings, n_series: int, costly: bool) -> int:
    """Worker processes for a local group of `n_series` series: 1 (this process) unless the pool pays for itself."""
    if not costly or n_series < POOL_MIN_SERIES:
        return 1
    return (os.cpu_count() or 1) if engine.n_jobs == -1 else engine.n_jobs


_CLIENTS: dict[tuple[str | None, int], Any] = {}


def cluster_client(address: str | None, workers: int):
    """A Dask client of the scheduler at `address`, or of a cluster of `workers` processes started here."""
    key = (address, workers)
    client = _CLIENTS.get(key)
    if client is not None and client.status == "running":
        return client
    from distributed import Client, LocalCluster

    try:
        if address:
            client = Client(address, timeout="30s")
        else:
            cluster = LocalCluster(
                n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None,
            )
            client = Client(cluster)
    except OSError as err:
        raise PlanningError(
            f"models.address {address!r}: no Dask scheduler answered ({err}). Start the scheduler "
            f"(dask scheduler) and its workers, correct the address, or remove it to run a cluster on this machine."
        ) from None
    if not _CLIENTS:
        atexit.register(close_clusters)
    _CLIENTS[key] = client
    return client


def close_clusters() -> None:
    """Close every client this process opened and stop the clusters it started (not a scheduler at an address)."""
    for (address, _), client in list(_CLIENTS.items()):
        cluster = None if address else client.cluster
        client.close()
        if cluster is not None:
            cluster.close()
    _CLIENTS.clear()


def chunks(ids, size: int | None = None) -> list:
    """`ids` cut into consecutive pieces of at most `size` (default `CHUNK_SERIES`)."""
    size = size or CHUNK_SERIES
    return [ids[i:i + size] for i in range(0, len(ids), size)]


_POOLS: dict[int, Any] = {}
_POOLS_LOCK = threading.Lock()


def map_on_pool(jobs: int, fit: Callable, frames: list, options: dict, done: Callable[[Any], None]) -> None:
    """Run `fit(frame, **options)` for every frame on a pool of `jobs` processes; `done(result)` as each finishes."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    with _POOLS_LOCK:  # two threads of a run may fit at once (the backtest's share candidates)
        pool = _POOLS.get(jobs)
        if pool is None:
            context = multiprocessing.get_context("forkserver")
            context.set_forkserver_preload(["pipelines.engines.models"])  # workers start with statsforecast imported
            pool = _POOLS[jobs] = ProcessPoolExecutor(jobs, mp_context=context)
            if len(_POOLS) == 1:
                atexit.register(close_pools)
    for future in as_completed([pool.submit(fit, frame, **options) for frame in frames]):
        done(future.result())


def close_pools() -> None:
    """Stop the worker processes of every pool this process started."""
    for pool in _POOLS.values():
        pool.shutdown(cancel_futures=True)
    _POOLS.clear()


def map_on_cluster(
    engine: EngineSettings, fit: Callable, frames: list, options: dict, done: Callable[[Any], None]
) -> None:
    """Run `fit(frame, **options)` for every frame on the cluster; `done(result)` here as each one finishes."""
    from distributed import as_completed

    client = cluster_client(engine.address, engine.workers)
    scattered = client.scatter(frames, hash=False)  # own keys: equal frames of two calls must not share one
    futures = [client.submit(fit, frame, **options, pure=False) for frame in scattered]
    for future in as_completed(futures):
        done(future.result())
    # the frames and results leave the cluster when their futures go out of scope here
