"""Shards: a product class cut into N parts by a stable hash of its parents, each part a partition of its own.

`scale: {shards: N}` (global, or per class under `product_classes`) cuts a
class into N shards. A parent (product x site) is in shard
`1 + blake2b("product|site") mod N` (8-byte digest, big-endian), so every
process on every machine puts it in the same shard (Python's `hash()` of a
string changes per process). A class whose seasonality is `group` by product
is hashed on the product alone, so the sites of a product, whose summed
history gives the group's seasonal index, stay in one shard.

A sharded class's partition key names the shard: `seasonal~2of4` (class
`seasonal`, shard 2 of 4); a class of one shard keeps its plain key
(`seasonal`), so N = 1 changes nothing. The store keeps a shard's tables in
the class's `shard=2of4` folder (`shard=0` for a class not cut), and readers
of the class read every shard.

What a shard computes alone is what is per parent: cleansing, shares, the
split, the forecast and its reconciliation, share drift, and its backtest's
sums. The class-level step: `strategy_choice` of a class of more than one
shard decides from every shard's backtest of the cycle combined
(`pipelines.engines.backtest_combine`: the sums add), so `strategy: auto`
and `seasonality: auto` with the group by product (hashed on the product,
like `group`) are allowed; every shard stores the same class-level row. Its
runs go in two phases (`needs_class_step`; `pipelines.runner`): every shard
up to the backtest, then every shard from `strategy_choice` on. Still
refused with shards > 1 (`check_scale`): an `auto` share window or method
(the share tuning's choice feeds the strategies' scores inside one backtest),
group seasonality over more than a product's sites, levels above the parent
(DEVELOPERS.md, *Shards*).
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipelines.errors import ConfigError
from pipelines.vocabulary import AUTO, GROUP_PRODUCT, Seasonality

SHARD_MARK = "~"
UNSHARDED = "0"  # the store's shard folder of a class not cut (pipelines.store.layout.DEFAULT_SHARD)
PARENT_KEY = ("product", "site")
PRODUCT_KEY = ("product",)


@dataclass(frozen=True)
class Shard:
    """Shard `index` (1..count) of a class, the columns its rows are hashed on, and `alias`: product -> the end of
    its successor chain, hashed in its place, so a predecessor's history at a site lands with its successor's
    (`successor_ends`; the lifecycle moves it there)."""

    index: int
    count: int
    by: tuple[str, ...] = PARENT_KEY
    alias: Mapping[str, str] = field(default_factory=dict, compare=False)

    @property
    def name(self) -> str:
        """The store's shard folder value and the key's suffix: `2of4`."""
        return f"{self.index}of{self.count}"

    def rows(self, frame: pd.DataFrame) -> np.ndarray:
        """(len(frame),) bool: the rows of this shard."""
        return shard_numbers(frame, self.by, self.count, self.alias) == self.index


def stable_shard(text: str, count: int) -> int:
    """1..count: the shard of a key text (blake2b, 8 bytes, big-endian, mod count); the same in every process."""
    digest = hashlib.blake2b(text.encode("utf-8"), digest_size=8).digest()
    return 1 + int.from_bytes(digest, "big") % count


def shard_numbers(
    frame: pd.DataFrame, by: tuple[str, ...], count: int, alias: Mapping[str, str] | None = None
) -> np.ndarray:
    """(len(frame),) int: each row's shard 1..count by the text of its `by` columns joined with '|' (a product
    in `alias` by its alias). Hashes each distinct key once (a blank cell is the empty text)."""
    if count <= 1 or frame.empty:
        return np.ones(len(frame), dtype=np.int64)
    text = frame[list(by)].astype("string").fillna("")
    if alias and "product" in by:
        text["product"] = text["product"].map(lambda p: alias.get(p, p)).astype("string")
    keys = text.iloc[:, 0] if len(by) == 1 else text.iloc[:, 0].str.cat([text[c] for c in by[1:]], sep="|")
    codes, uniques = pd.factorize(keys, use_na_sentinel=False)
    numbers = np.array([stable_shard(str(u), count) for u in uniques], dtype=np.int64)
    return numbers[codes]


def successor_ends(products: pd.DataFrame) -> dict[str, str]:
    """product -> the end of its successor chain (A -> B -> C: A and B to C), for every product naming a successor
    (a chain that loops or names an unknown product ends where it does; the lifecycle stage reports it)."""
    if "successor" not in products.columns:
        return {}
    step = products.dropna(subset=["product"]).drop_duplicates("product").set_index("product")["successor"].dropna()
    step = step[step.astype(str).str.len() > 0].astype(str).to_dict()
    ends = {}
    for product in step:
        seen, end = {product}, step[product]
        while end in step and end not in seen:
            seen.add(end)
            end = step[end]
        ends[product] = end
    return ends


def class_shards(config, name: str) -> int:
    """The number of shards of class `name`: its own `scale.shards`, else the config's, else 1."""
    own = config.product_classes[name].scale
    return (own or config.scale).shards


def hash_columns(pc) -> tuple[str, ...]:
    """The columns a class's rows are hashed on: the product alone for group seasonality by product (also under
    `seasonality: auto`, which may choose it)."""
    if pc.seasonality in (Seasonality.GROUP, AUTO) and pc.seasonal_group == GROUP_PRODUCT:
        return PRODUCT_KEY
    return PARENT_KEY


def needs_class_step(config, name: str) -> bool:
    """Whether class `name` is cut into shards and decides at class level (`strategy: auto`, `seasonality:
    auto`): its strategy_choice reads every shard's backtest, so its shards run in two phases."""
    pc = config.product_classes[name]
    return class_shards(config, name) > 1 and AUTO in (pc.strategy, pc.seasonality)


def partition_classes(config, classes: list[str] | None = None) -> list[str]:
    """The product-class partition keys of `classes` (default: every class), each sharded class as its shards."""
    keys = []
    for name in classes if classes is not None else list(config.product_classes):
        n = class_shards(config, name)
        keys += [name] if n == 1 else [f"{name}{SHARD_MARK}{i}of{n}" for i in range(1, n + 1)]
    return keys


def store_shards(config, name: str) -> list[str]:
    """The store's shard folders of class `name` under `config`: ['0'] for a class not cut, else '1ofN'..'NofN'."""
    return [split_class_key(k)[1] for k in partition_classes(config, [name])]


def split_class_key(key: str) -> tuple[str, str]:
    """(class, store shard) of a product-class partition key: `seasonal~2of4` -> ('seasonal', '2of4')."""
    name, mark, shard = key.rpartition(SHARD_MARK)
    if not mark:
        return key, UNSHARDED
    index, _, count = shard.partition("of")
    if not (index.isdigit() and count.isdigit() and 1 <= int(index) <= int(count)):
        raise ConfigError(f"partition class {key!r}: a shard is written CLASS~IofN, e.g. seasonal~2of4")
    return name, shard


def shard_of(config, key: str) -> Shard | None:
    """The Shard of a partition key under `config` (None for a class not cut); a ConfigError when the key's
    shard count is not the config's (the config's scale changed since the key was registered)."""
    name, shard = split_class_key(key)
    n = class_shards(config, name) if name in config.product_classes else 1
    if shard == UNSHARDED:
        if n > 1:
            raise ConfigError(f"{config.source}: class {name!r} is cut into {n} shards (scale.shards); "
                              f"run its shards {partition_classes(config, [name])}")
        return None
    index, count = (int(x) for x in shard.split("of"))
    if count != n:
        raise ConfigError(f"{config.source}: partition {key!r} is shard {index} of {count}, but class {name!r} "
                          f"has scale.shards {n}; run its shards {partition_classes(config, [name])}")
    return Shard(index, count, hash_columns(config.product_classes[name]))


# what a shard cannot decide alone: the key and why, for check_scale's message
def _needs_whole_class(pc, upper_levels) -> list[str]:
    found = []
    if pc.window == AUTO or pc.method == AUTO:
        found.append("window/method: auto (share tuning over the whole class, inside each backtest)")
    if pc.seasonality in (Seasonality.GROUP, AUTO) and pc.seasonal_group != GROUP_PRODUCT:
        found.append(f"seasonal_group: {pc.seasonal_group} (a group across shards)")
    if upper_levels:
        found.append("hierarchy.upper_levels (levels above the parent sum every shard)")
    return found


def check_scale(config) -> None:
    """Raise a ConfigError naming the class and keys when a class of more than one shard needs the whole class."""
    for name, pc in config.product_classes.items():
        if class_shards(config, name) == 1:
            continue
        found = _needs_whole_class(pc, config.hierarchy.upper_levels)
        if found:
            raise ConfigError(
                f"{config.source}: product class {name!r} is cut into {class_shards(config, name)} shards "
                f"(scale.shards) but needs the whole class for: {'; '.join(found)}. Fix these keys for the class "
                f"or give it scale: {{shards: 1}}."
            )
