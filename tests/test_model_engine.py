"""The model runs give the same numbers in this process, in statsforecast's process pool and on a Dask cluster.

Equality is to the last bit (`np.array_equal`), not within a tolerance: every
engine fits each series alone with the same library build on the same CPU, on
the same float64 values, so nothing but the place of the computation changes.
A tolerance would hide a chunk that was given another series' rows or a
result put back on the wrong series. The outside reference is statsforecast
itself, called directly on the same frame (its `StatsForecast.forecast`).

The cluster is a `LocalCluster` of 2 worker processes (`processes=True`, as
`models.engine: dask` starts it without an address), so the tasks, the frames
and the results really cross process boundaries through Dask's serialization.
"""

from __future__ import annotations

import dataclasses
import os

import numpy as np
import pandas as pd
import pytest
from statsforecast import StatsForecast
from statsforecast import models as sfm

from pipelines.engines import model_engine
from pipelines.engines.model_engine import EngineSettings, close_clusters
from pipelines.engines.models import fit_group, run_model_groups
from pipelines.engines.series_grids import series_grid

pytest.importorskip("distributed")

HORIZON = 6
DASK = EngineSettings(engine="dask", workers=2)


@pytest.fixture(scope="module")
def cluster():
    """The engine's own cluster of 2 workers, started once for the module and stopped after it."""
    yield DASK
    close_clusters()


def mixed_grid(n_series: int = 48, periods: int = 60, seed: int = 3):
    """Smooth, trended, intermittent and seasonal series, plus two without demand (seeded)."""
    rng = np.random.default_rng(seed)
    t = np.arange(periods)
    rows = []
    for i in range(n_series):
        kind = i % 4
        if kind == 0:
            y = rng.gamma(4, 5, periods)
        elif kind == 1:
            y = 20 + 0.3 * t + rng.normal(0, 2, periods)
        elif kind == 2:
            y = rng.gamma(2, 8, periods) * (rng.random(periods) < 0.3)
        else:
            y = 30 + 10 * np.sin(2 * np.pi * t / 12) + rng.normal(0, 1, periods)
        rows.append(np.clip(y, 0, None))
    code = np.repeat(np.arange(n_series), periods)
    ordinal = np.tile(t, n_series)
    qty = np.concatenate(rows)
    return series_grid(code, ordinal, qty, n_series + 2, periods)


def models_of(n: int):
    """One model per series in turn, costly and cheap ones, the two series without demand as `zero`."""
    cycle = np.array(["auto_ets", "ses", "croston_sba", "auto_ets", "tsb", "croston_classic", "ets_additive_season",
                      "adida", "imapa", "seasonal_naive", "mstl_ets", "auto_ets"], dtype=object)
    names = np.resize(cycle, n).astype(object)
    names[-2:] = "zero"
    season = np.where(np.isin(names, ["ets_additive_season", "seasonal_naive", "mstl_ets"]), 12, 1)
    return names, season


def assert_same_run(a, b):
    assert np.array_equal(a.forecast, b.forecast)
    assert np.array_equal(a.fitted, b.fitted, equal_nan=True)
    assert np.array_equal(a.sd, b.sd)
    assert a.parameters.tolist() == b.parameters.tolist()
    assert a.label.tolist() == b.label.tolist()


def test_dask_gives_the_local_numbers_to_the_last_bit(cluster, monkeypatch):
    grid = mixed_grid()
    names, season = models_of(grid.n_series)
    local = run_model_groups(grid, names, season, HORIZON, fitted=True, sd=True)
    monkeypatch.setattr(model_engine, "CHUNK_SERIES", 3)  # several chunks per group, spread over both workers
    done = []
    on_dask = run_model_groups(grid, names, season, HORIZON, fitted=True, sd=True, engine=cluster,
                               progress=done.append)
    assert_same_run(local, on_dask)
    assert sum(done) == grid.n_series  # every series counted once, chunk by chunk
    assert np.isfinite(local.forecast).all() and (local.forecast[:-2] != 0).any()
    assert set(local.label[:-2]) >= {"auto_ets(season_length=1)", "croston_sba", "mstl_ets(season_length=12)"}


def test_the_process_pool_gives_the_same_numbers(monkeypatch):
    grid = mixed_grid(n_series=16)
    names = np.full(grid.n_series, "auto_ets", dtype=object)
    names[-2:] = "zero"
    season = np.ones(grid.n_series, dtype=int)
    one = run_model_groups(grid, names, season, HORIZON, fitted=True, sd=True)
    monkeypatch.setattr(model_engine, "POOL_MIN_SERIES", 1)  # the pool even for 14 series
    pool = run_model_groups(grid, names, season, HORIZON, fitted=True, sd=True, engine=EngineSettings(n_jobs=2))
    assert_same_run(one, pool)


def test_a_group_equals_statsforecast_called_directly():
    # outside reference: statsforecast's own forecast of the same frame (AutoETS, naive fallback)
    grid = mixed_grid(n_series=12)
    keep = grid.series < 12
    frame = pd.DataFrame({"unique_id": grid.series[keep], "ds": grid.ordinal[keep], "y": grid.y[keep]})
    direct = StatsForecast(models=[sfm.AutoETS()], freq=1, n_jobs=1, fallback_model=sfm.Naive()).forecast(
        df=frame, h=HORIZON
    )
    ours = fit_group(frame, "auto_ets", 1, HORIZON)
    assert np.array_equal(ours.forecast, direct["AutoETS"].to_numpy(float).reshape(-1, HORIZON))
    assert ours.ids.tolist() == list(range(12))


def test_a_chunk_result_put_on_the_wrong_series_is_seen(cluster, monkeypatch):
    # the equality above can fail: swap two series' values in one chunk's result on its way back
    grid = mixed_grid(n_series=12)
    names = np.full(grid.n_series, "ses", dtype=object)
    names[-2:] = "zero"
    season = np.ones(grid.n_series, dtype=int)
    local = run_model_groups(grid, names, season, HORIZON)
    real_map = model_engine.map_on_cluster

    def swapped(engine, fit, frames, options, done):
        def corrupt(res):
            if res.ids[0] == 0:
                res = dataclasses.replace(res, forecast=res.forecast[::-1].copy())
            done(res)
        real_map(engine, fit, frames, options, corrupt)

    monkeypatch.setattr("pipelines.engines.models.map_on_cluster", swapped)
    monkeypatch.setattr(model_engine, "CHUNK_SERIES", 4)
    on_dask = run_model_groups(grid, names, season, HORIZON, engine=cluster)
    assert not np.array_equal(local.forecast, on_dask.forecast)
    assert np.array_equal(local.forecast[4:], on_dask.forecast[4:])


def test_the_forecast_stage_on_dask_equals_it_on_this_machine(cluster):
    # the demo's consumables partition (AutoETS and Croston groups, group seasonality, top-down, intervals, upper
    # levels) made by the stages' own runs with models local; then the forecast stage's run again on the same
    # inputs with models on the cluster: every table it writes equal to the bit
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).parent))
    from stage_runs import demo_config, run_partition

    from assets.factory import graph_order
    from pipelines.tables import MODELS

    config = demo_config({"consumables": {"seasonality": "group"}}, models={"engine": "local", "n_jobs": 1})
    local = run_partition(config, "2026-11-30", "consumables")
    spec = next(s for s in graph_order() if "statistical_forecast" in [t.name for t in s.tables])
    settings = local.settings[spec.tables[0].name]
    assert settings.models.engine == EngineSettings(n_jobs=1)  # the config's models reached the stage
    on_dask = dataclasses.replace(settings, models=dataclasses.replace(settings.models, engine=cluster))
    result = spec.run(**{name: local.tables[name] for name in spec.ins}, settings=on_dask)
    compared = [t.name for t in spec.tables]
    assert {"parent_forecast", "statistical_forecast", "forecast_models"} <= set(compared)
    for table in compared:
        pd.testing.assert_frame_equal(local.tables[table], MODELS[table].validate(result.outputs[table]),
                                      check_exact=True)
    assert (local.tables["forecast_models"]["model"].str.startswith("auto_ets")).any()


def _parent_pid(frame):
    return os.getppid()


def test_the_pool_workers_are_not_forks_of_this_process():
    # a fork of a process whose other threads hold locks (a Dagster run) can wait forever: the demo's backtest hung
    # on statsforecast's own forking pool; the workers come from a forkserver, so their parent is not this process
    parents = []
    model_engine.map_on_pool(2, _parent_pid, [None, None], {}, parents.append)
    assert len(parents) == 2 and os.getpid() not in parents
