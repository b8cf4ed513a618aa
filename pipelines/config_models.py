"""The config section `models`: where the statsforecast model runs go (this machine or a Dask cluster).

A frozen pydantic model that forbids unknown keys, read into
`pipelines.config.PlanningConfig` (the per-class model choice stays in
`product_classes.<class>.models`).
"""

from __future__ import annotations

import importlib.util

from pydantic import Field, field_validator, model_validator

from pipelines.config_sections import Frozen
from pipelines.vocabulary import ModelEngine


class ModelsConfig(Frozen):
    """`engine: local` runs statsforecast in this process, `n_jobs` processes per model group;
    `engine: dask` sends the series, in chunks, to the Dask scheduler at `address`, or to a cluster of
    `workers` processes started on this machine when `address` is left out (pipelines/engines/model_engine.py)."""

    engine: ModelEngine = ModelEngine.LOCAL
    n_jobs: int = Field(
        -1,
        ge=-1,
        description="local engine: processes statsforecast uses for a large model group (1 = this process; "
        "-1 = every core)",
    )
    address: str | None = Field(
        None, description="dask engine: the scheduler's address, e.g. tcp://scheduler.example:8786"
    )
    workers: int = Field(
        2, ge=1, le=512, description="dask engine without address: worker processes of the cluster started here"
    )

    @field_validator("n_jobs")
    @classmethod
    def _not_zero(cls, v: int) -> int:
        if v == 0:
            raise ValueError("n_jobs must be 1 or more, or -1 for every core (got 0)")
        return v

    @model_validator(mode="after")
    def _dask_installed(self) -> ModelsConfig:
        if self.engine == ModelEngine.DASK and importlib.util.find_spec("distributed") is None:
            raise ValueError(
                "engine dask needs Dask's distributed scheduler, which is not installed; "
                "install the extra (pip install 'apportion[dask]') or set engine: local"
            )
        if self.engine == ModelEngine.LOCAL and self.address is not None:
            raise ValueError(f"address {self.address!r} is only read with engine: dask; set engine: dask or remove it")
        return self
