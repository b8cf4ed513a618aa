"""Config section `scale`: how many shards a product class is cut into (global, or per class).

A frozen pydantic model that forbids unknown keys, read into
`pipelines.config.PlanningConfig` (`scale`) and each class's section
(`product_classes.<class>.scale`, which replaces the global one for that
class). What a shard is: `pipelines.shards`.
"""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict, Field


class ScaleConfig(BaseModel):
    """`shards`: the parts a class is cut into by a stable hash of its parents, each a partition of its own;
    `cut_inputs`: the history cut once per cycle by class and shard."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    shards: int = Field(1, ge=1, le=4096, description="shards per product class (1: the class is one partition)")
    cut_inputs: bool = Field(
        True,
        description="read the history once per cycle and cut it into one part per class and shard in the store "
        "(pipelines.input_cut); false: every partition reads the whole history (read from the config's own "
        "`scale`, not a class's)",
    )
