"""The one way an asset is made: a stage's pure `run(...)` wrapped as a partitioned Dagster asset.

A `StageAsset` names the tables a stage writes, the asset tables it reads, how
its small settings object is built from the partition's config, and, for the
few stages that need them, extra inputs read from the store and a step that
publishes files. `stage_asset` turns it into a (multi-)asset whose body loads
the inputs, calls `run`, validates every table with its pandera model
(`pipelines.tables`), writes the run's pictures beside the cycle's report, and
yields the outputs with their metadata, the schema checks and the rule checks
of `pipelines.checks`, each on the asset it judges.
"""

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import dagster as dg

from assets.common import markdown, rule_check, schema_check_spec, table_metadata, validate
from pipelines.checks import checks_of
from pipelines.config import PlanningConfig
from pipelines.errors import ShardsMissing
from pipelines.partitions import cycle_class_partitions, narrow_config, split_key
from pipelines.resources import open_store, previous_cycle, read_table, report_folder
from pipelines.results import StageResult
from pipelines.shards import SHARD_MARK, Shard, shard_of, split_class_key, store_shards
from pipelines.tables import MODELS


@dataclass(frozen=True)
class Partition:
    """One partition's view of the config: narrowed to its cycle and class, and whole; its shard (None: the
    class is not cut, `pipelines.shards`); whether its history comes from the cycle's cut (a Dagster run with
    `scale.cut_inputs`; the stages' own runs in tests read the whole history)."""

    config: PlanningConfig
    full: PlanningConfig
    cycle: str
    product_class: str
    shard: Shard | None = None
    cut_inputs: bool = False  # history lines from the cycle's cut in the store (pipelines.input_cut)

    @classmethod
    def of(cls, context: dg.AssetExecutionContext) -> "Partition":
        full = context.resources.planning.config
        cycle, key = split_key(context.partition_key)
        return cls(narrow_config(full, cycle, key), full, cycle, split_class_key(key)[0], shard_of(full, key),
                   full.scale.cut_inputs)

    def previous(self, table: str):
        """`table` of the class (of a shard: its own rows) as it last completed in its latest cycle before this
        one (its blocking checks passed, published or not yet), and that cycle; (None, None) for the first."""
        store = Path(self.config.store.path)
        before = previous_cycle(store, table, self.cycle, self.product_class)
        if not before:
            return None, None
        found = read_table(store, table, cycle=before, product_class=self.product_class, versions="complete")
        if self.shard is not None and found is not None:
            found = self.shard_rows(found)
        return found, before

    def siblings(self, table: str) -> dict[str, Any]:
        """`table` of every shard of the class in this cycle, as each last wrote it (the latest versions): shard
        (`2of4`) -> frame, in shard order; a ShardsMissing error naming the shards not written yet and the command
        that runs them. A class not cut: its own table under its one shard `0`."""
        store = Path(self.config.store.path)
        written = open_store(store).latest(table, self.cycle, self.product_class)
        wanted = store_shards(self.full, self.product_class)
        missing = [s for s in wanted if s not in written]
        if missing:
            keys = [f"{self.product_class}{SHARD_MARK}{s}" for s in missing]
            raise ShardsMissing(
                f"{table} of class {self.product_class!r}, cycle {self.cycle}: shards {keys} have not written it "
                f"yet, and the class-level step reads every shard's. Run the class's shards up to the backtest "
                f"first: python -m pipelines cycle --cycle {self.cycle} --class {self.product_class} (runs every "
                f"shard to the backtest, then every shard on; in the UI backfill {table} of all its shards first)"
            )
        return {s: read_table(store, table, cycle=self.cycle, product_class=self.product_class, versions="latest",
                              shard=s) for s in wanted}

    @property
    def key(self) -> str:
        """The partition's product-class key: the class, or a shard of it (`spares~2of3`)."""
        return self.product_class if self.shard is None else f"{self.product_class}{SHARD_MARK}{self.shard.name}"

    def shard_rows(self, frame):
        """The rows of this shard (of a class-level table, such as a decision every shard stores: one copy)."""
        if all(c in frame.columns for c in self.shard.by):
            return frame[self.shard.rows(frame)].reset_index(drop=True)
        return frame.drop_duplicates().reset_index(drop=True)


@dataclass(frozen=True)
class Table:
    """A table the stage writes: an asset of the same name."""

    name: str
    description: str
    kinds: frozenset[str] = frozenset({"pandas", "duckdb"})


@dataclass(frozen=True)
class StageAsset:
    tables: tuple[Table, ...]
    run: Callable[..., StageResult]
    settings: Callable[[Partition], Any]
    group: str
    ins: tuple[str, ...] = ()
    deps: tuple[str, ...] = ()
    # extra inputs the IO manager cannot give (e.g. an earlier cycle's table), read from the store
    read: Callable[[Partition], dict[str, Any]] | None = None
    # after the run: files that need the Dagster instance (the cycle's page); returns the result to emit
    publish: Callable[[dg.AssetExecutionContext, Partition, StageResult], StageResult] | None = None
    extra_kinds: frozenset[str] = field(default_factory=frozenset)


# every stage asset made, by its first table: the benchmark runs the same stages through these
SPECS: dict[str, StageAsset] = {}


def graph_order(specs: dict[str, StageAsset] = SPECS) -> list[StageAsset]:
    """The stages in an order where each comes after the stages whose tables it reads (and its deps)."""
    made_by = {t.name: key for key, spec in specs.items() for t in spec.tables}
    order: list[str] = []

    def visit(key: str, path: tuple[str, ...] = ()) -> None:
        if key in order or key in path:
            return
        for name in specs[key].ins + specs[key].deps:
            if name in made_by:
                visit(made_by[name], path + (key,))
        order.append(key)

    for key in specs:
        visit(key)
    return [specs[k] for k in order]


def stage_asset(spec: StageAsset) -> dg.AssetsDefinition:
    """The partitioned asset of a stage; see the module docstring."""
    names = [t.name for t in spec.tables]
    SPECS[names[0]] = spec
    specs = [schema_check_spec(n, MODELS[n]) for n in names]
    specs += [dg.AssetCheckSpec(c.name, asset=c.asset, blocking=c.blocking, description=c.description)
              for n in names for c in checks_of(n)]

    @dg.multi_asset(
        name=names[0],
        group_name=spec.group,
        partitions_def=cycle_class_partitions,
        outs={t.name: dg.AssetOut(kinds=set(t.kinds), description=t.description) for t in spec.tables},
        ins={name: dg.AssetIn(key=name) for name in spec.ins},
        deps=list(spec.deps),
        check_specs=specs,
        required_resource_keys={"planning"},
        can_subset=False,
    )
    def _asset(context: dg.AssetExecutionContext, **inputs):
        part = Partition.of(context)
        frames = {**inputs, **(spec.read(part) if spec.read else {})}
        result = spec.run(**frames, settings=spec.settings(part), log=context.log.info)
        write_files(result.files, report_folder(part.config))
        if spec.publish:
            result = spec.publish(context, part, result)
        yield from emit(spec, result, {"partition_cycle": part.cycle, "partition_class": part.product_class})

    return _asset


def write_files(files: dict[str, bytes], folder: Path) -> dict[str, Path]:
    """Write the run's pictures to the cycle's report folder; file name -> path."""
    if files:
        folder.mkdir(parents=True, exist_ok=True)
    for name, data in files.items():
        (folder / name).write_bytes(data)
    return {name: folder / name for name in files}


def emit(spec: StageAsset, result: StageResult, partition: dict[str, str] | None = None):
    """Outputs (validated) with their metadata, then the schema checks, then the rule checks.

    Every check result carries `partition` (its cycle and class) and its first failing rows; a table read
    from an input file (`result.sources`) names them by file and row, and loses that index before it is stored.
    """
    schema_checks = []
    for table in spec.tables:
        source = result.sources.get(table.name)
        model = MODELS[table.name]
        frame, check = validate(result.outputs[table.name], model, table.name, source=source, partition=partition)
        if table.name in result.sources:
            frame = frame.reset_index(drop=True)
        figures = result.metadata.get(table.name, {})
        yield dg.Output(frame, output_name=table.name, metadata=table_metadata(frame, **figures))
        schema_checks.append(check)
    yield from schema_checks
    catalogue = {c.name: c for t in spec.tables for c in checks_of(t.name)}
    for name, outcome in result.checks.items():
        check = catalogue[name]
        severity = dg.AssetCheckSeverity.ERROR if check.blocking else dg.AssetCheckSeverity.WARN
        figures = {k: markdown(v) if hasattr(v, "columns") else v for k, v in outcome.figures.items()}
        yield rule_check(
            check.asset, name, outcome.rows, what=check.proves, severity=severity, partition=partition, **figures
        )
