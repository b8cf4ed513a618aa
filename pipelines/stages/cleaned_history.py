"""Stage 2, `cleaned_history`: raw lines to one clean value per leaf and period.

Rules, in the order they run:

1. **Rejection.** A line is rejected, with the first reason that applies, when
   the reader could not split it (`too_many_fields`, `too_few_fields`,
   `line_too_long`, `control_characters`: its `read_error`), a key is blank
   (`missing_key`), its date does not parse (`bad_date`; a date-time with a
   UTC offset counts for the date as written, `pipelines.engines.plausible`),
   its quantity is not a finite number (`bad_quantity`) or is larger in size
   than `inputs.plausible.max_abs_quantity` (`quantity_out_of_bounds`: a
   typing slip of 1e12 is neither netted to zero nor forecast), its product is
   not in the product master (`unknown_product`), its product x site x
   customer has no customer span (`no_customer_span`), the same keys, date and
   quantity are in an earlier history file (`duplicate_of_other_file`: history
   given twice), it is dated more than `years_before_cycle` before the cycle
   date (`date_before_window`) or `years_after_cycle` or more after it
   (`date_after_window`), it lies in an isolated group at the start of the
   history (`isolated_date`: `plausible.trusted_extent`, so a lone old line
   does not stretch the history), or it falls on or after the cycle date
   (`on_or_after_cycle_date`). With `calendar.cycle_date:
   latest_complete_period` the cycle date is the period after the trusted end
   of the lines left. Raw lines = used lines + rejected lines.
2. **Bucketing.** Each line goes to the period containing its date (ISO week
   from Monday, or calendar month); lines of one leaf and period are summed,
   returns (negative lines) included, so a return nets against the same
   customer's shipments of that period.
3. **Returns rule `net_then_zero`.** A period whose net is negative is set to
   zero; the negative net is a correction row (`negative_net_to_zero`).
4. **Missing periods.** Inside a series' range - from its customer span start
   (or its first line when the span has no start, never before the first
   history period) to its span end (or the period before the cycle date) - a
   period without lines is filled with zero (`filled`).
5. **Shortage flags.** A row of the optional `shortages` input (product, site,
   any day of a period) flags that period on every child (customer series) of
   the product x site that has a value there: column `shortage`. A record on a
   product x site without history, or outside the history, flags nothing; the
   result's `shortage_periods` table lists every record with the children it
   flagged.
6. **Outliers**, per product class: the class's `outliers` block, else
   `cleansing.outliers` (the block replaces the default as a whole). Shortage
   periods are never judged and are left out of every window, so a stock-out is
   neither a low outlier nor the background a spike is judged against. All
   statistics are over a centred window of `window` periods, truncated at the
   ends of the grid and skipping periods without a value.

   - `hampel` (Hampel 1974; scale 1.4826 x MAD as in Leys et al. 2013): a value
     with |x_t - m_t| > k * 1.4826 * MAD_t, where m_t is the window median.
     Where MAD_t = 0 nothing is flagged: an intermittent series whose window is
     mostly zeros has no spread to judge a spike by. Correction rule `hampel_cap`.
   - `tukey` (Tukey 1977, fences): a value above Q3_t + c * IQR_t (or below
     Q1_t - c * IQR_t), c = `fence`, IQR_t = Q3_t - Q1_t. Quartiles by linear
     interpolation between order statistics: Hyndman & Fan (1996) type 7, the
     default of `numpy.percentile` and of pandas' `quantile`. Tukey's own
     hinges can differ slightly from type-7 quartiles in small windows. Where
     IQR_t = 0 nothing is flagged, for the same reason as MAD_t = 0. Correction
     rule `tukey_cap`.
   - `none`: no outlier rule.

   `sides: upper` (default) flags only values above the upper limit: a low week
   of shipments is more often a supply gap than low demand. `sides: both` is the
   symmetric rule as published. A flagged value is replaced by the limit it
   crossed (`replace_with: limit`) or by the window median (`median`), never
   below zero.

   **Seasonal adjustment** (`seasonal_adjust: auto`, the default): for a class
   whose `models.seasonal` is true, a series with at least two full seasons (m =
   52 weeks or 12 months) is judged on x - s, where s is the seasonal component
   of a classical additive decomposition (as in statsmodels'
   `seasonal_decompose`; Kendall & Stuart, Makridakis et al. 1998, ch. 3): trend
   = centred moving average of order m (a 2 x m MA for even m), NaN where its
   window lacks a value; seasonal index = mean of the detrended values x - trend
   at each position of the season, centred to sum 0; s = that index repeated.
   Shortage periods keep their value in the trend but are left out of the
   index. "Two full seasons" means every position of the season has a detrended
   value, which for a series without gaps is exactly 2m periods or more; a
   shorter series is judged unadjusted (`seasonal_adjusted: false` in its
   correction rows). The limits apply to x - s and s is added back to the
   replacement (limit + s_t or median + s_t). The decomposition is not robust:
   a spike adds 1 / (number of seasons) of itself to its position's index.
7. **Shortage handling** (`cleansing.shortages`):

   - `exclude` (default): the values stay as shipped and `shortage` travels on.
     Contract for the later stages: lifecycle_history carries `shortage`, and
     the share tables and the parent baseline leave flagged periods out of their
     sums, so a stock-out does not take a customer's share away.
   - `fill_baseline`: the value of every flagged child period is replaced by
     the child's rolling median of its NON-shortage periods in the class's
     outlier window (after the outlier rule; on x - s with s added back where
     the series is seasonally adjusted), never below zero. A correction row
     `shortage_fill` records the window, the median and how many periods it
     came from. Where the window holds no non-shortage value the period keeps
     its value and its flag.

Every correction is one row of `history_corrections`; where rules chain on one
period (returns then an outlier limit, returns then a shortage fill) each rule
applied is its own row, in order, each `before` the previous row's `after`. So
per series, sum(raw_quantity) + sum(delta of corrections) = sum(quantity).

Rules 2-7 are per series (the shortage flags through a parent x period grid), so
they run on dense float64 leaf x period matrices of one block of leaves at a
time (`pipelines.engines.cleansing_blocks`, `CleaningSettings.block_cells`):
the memory of that part does not grow with the leaves, and the tables are the
same for any block size.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from pipelines.calendar import ordinal_to_start, period_ordinal, span_bounds
from pipelines.checks import CORRECTIONS_EXPLAIN_CHANGES, EVERY_RAW_ROW_ACCOUNTED, REJECTED_ROWS_WITHIN_LIMIT
from pipelines.config import CalendarConfig, PlanningConfig, class_section
from pipelines.config_inputs import PlausibilityConfig
from pipelines.config_sections import CleansingConfig, ProductClassConfig
from pipelines.engines.cleansing import cycle_calendar, line_accounting, reject_lines, sorted_corrections
from pipelines.engines.cleansing_blocks import (
    BLOCK_CELLS,
    Grid,
    class_summary,
    clean_blocks,
    shortage_grid,
    shortage_records,
)
from pipelines.engines.history_proofs import RUNS_UNSEEN, find_unexplained_changes, leaf_runs
from pipelines.engines.proofs import find_unaccounted_lines
from pipelines.engines.report_charts import corrections_chart
from pipelines.keys import LEAF, lookup
from pipelines.results import CheckRows, Log, StageResult, quiet


@dataclass(frozen=True)
class CleaningResult:
    cleaned: pd.DataFrame
    rejected: pd.DataFrame
    corrections: pd.DataFrame
    cycle_date: pd.Timestamp
    # per product class: the outlier rule used and how many series were seasonally adjusted
    outlier_rules: pd.DataFrame = field(default_factory=pd.DataFrame)
    # per shortage record (bucketed to its period): the children it flagged
    shortage_periods: pd.DataFrame = field(default_factory=pd.DataFrame)
    series: int = 0  # leaf series in `cleaned` (each has at least one used line)
    raw_runs: object = RUNS_UNSEEN  # `history_proofs.leaf_runs(raw)`, where the rejection found them on the way


def clean_history(
    raw: pd.DataFrame,
    products: pd.DataFrame,
    spans: pd.DataFrame,
    config: PlanningConfig | CleaningSettings,
    shortages: pd.DataFrame | None = None,
) -> CleaningResult:
    """Apply the rules of this module. Returns cleaned, rejected and corrections tables.

    `shortages` (optional): product, site, period_start (any day of the period).
    """
    if not isinstance(config, CleaningSettings):  # a whole PlanningConfig: what the stage reads of it
        config = CleaningSettings.of(config)
    period = config.calendar.period
    first = config.first_period  # a shard: its class's, so the grid and the fill ranges start where the class's do
    used, rejected, cycle_date = reject_lines(raw, products, spans, config.calendar, config.source, config.plausible,
                                              first)
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])

    # --- the grid: every leaf's fill range (from its customer span start, or its first line), class and parent
    leaves = used.leaves
    first_ords = used.first_ordinals()
    first_ord = first if first is not None else int(first_ords.min()) if len(leaves) else cycle_ord - 1
    t = cycle_ord - first_ord  # periods in the grid: first history period .. cycle - 1
    first_line = first_ords - first_ord  # each leaf's first grid column with a line
    from_ord, to_ord = span_bounds(spans, period)
    pos = lookup(leaves, LEAF, spans)
    span_from, span_to = from_ord[pos] - first_ord, to_ord[pos] - first_ord
    parent, by_parent, records, where = shortage_grid(shortages, leaves, first_ord, t, period)
    product_class = products.drop_duplicates("product").set_index("product")["product_class"]
    grid = Grid(
        t=t,
        start=np.where(np.isnan(span_from), first_line, np.clip(span_from, 0, None)).astype(np.int64),
        end=np.where(np.isnan(span_to), t - 1, np.clip(span_to, -1, t - 1)).astype(np.int64),
        leaf_class=leaves["product"].map(product_class).to_numpy(dtype=object),
        parent=parent,
        short_by_parent=by_parent,
        period_ns=ordinal_to_start(np.arange(t) + first_ord, period).to_numpy(),  # written per kept cell
    )
    blocks = clean_blocks(used, first_ord, grid, config, config.block_cells)
    raw_runs = used.raw_runs
    del used

    # --- long tables
    cells = blocks.cells()
    # the cells come leaf by leaf: each key repeated over its leaf's kept cells (no leaf code per cell)
    columns = {c: np.repeat(leaves[c].to_numpy(), blocks.kept) for c in LEAF}
    for name in ("period_start", "quantity", "raw_quantity", "lines", "filled", "corrected", "shortage"):
        columns[name] = cells.pop(name)
    cleaned = pd.DataFrame(columns, copy=False)  # the arrays themselves, not copied column by column
    del columns
    return CleaningResult(
        cleaned=cleaned,
        rejected=rejected,
        corrections=sorted_corrections(blocks.corrections, leaves, first_ord, period),
        cycle_date=cycle_date,
        outlier_rules=class_summary(grid.leaf_class, config, blocks.seasonal_series),
        shortage_periods=shortage_records(records, where, blocks.flagged),
        series=len(leaves),
        raw_runs=raw_runs,
    )


# ----------------------------------------------------------------- the stage
@dataclass(frozen=True)
class CleaningSettings:
    """What cleansing reads: the calendar, the cleansing rules, each class's outlier rule, the rejection limit,
    the plausible bounds of a history line."""

    calendar: CalendarConfig
    cleansing: CleansingConfig
    product_classes: Mapping[str, ProductClassConfig]
    source: Path = Path("<memory>")
    plausible: PlausibilityConfig = PlausibilityConfig()
    max_rejected_share: float = 0.01
    picture: str = "cleansing.png"  # the corrections chart, written beside the cycle's report
    report_folder: Path = Path("var/reports")
    block_cells: int = BLOCK_CELLS  # leaf x period cells cleaned at a time: bounds the dense matrices' memory
    first_period: int | None = None  # a shard of a class: the class's first trusted period (ordinal)

    @classmethod
    def of(cls, config: PlanningConfig, report_folder: Path = Path("var/reports")) -> CleaningSettings:
        return cls(
            calendar=config.calendar,
            cleansing=config.cleansing,
            product_classes=config.product_classes,
            source=config.source,
            plausible=config.inputs.plausible,
            max_rejected_share=config.monitoring.max_rejected_share,
            picture=f"cleansing_{next(iter(config.product_classes))}.png",
            report_folder=report_folder,
        )

    def product_class(self, name: str) -> ProductClassConfig:
        return class_section(self.product_classes, name, self.source)


def run(
    raw_history: pd.DataFrame,
    products: pd.DataFrame,
    customer_spans: pd.DataFrame,
    shortages: pd.DataFrame | None,
    settings: CleaningSettings,
    log: Log = quiet,
) -> StageResult:
    """cleaned_history, rejected_rows, history_corrections and cycle_calendar, with their checks and figures."""
    result = clean_history(raw_history, products, customer_spans, settings, shortages=shortages)
    cleaned, rejected, corrections = result.cleaned, result.rejected, result.corrections
    counts = line_accounting(len(raw_history), cleaned, rejected)
    log(f"cycle date {result.cycle_date.date()}: {counts}")
    by_rule = corrections.groupby("rule")["delta"].agg(["size", "sum"])
    by_rule = by_rule.rename(columns={"size": "rows", "sum": "quantity_moved"}).reset_index()
    classes = products.drop_duplicates("product").set_index("product")["product_class"]
    by_rule_and_class = (
        corrections.assign(product_class=corrections["product"].map(classes))
        .groupby(["product_class", "rule"])["delta"]
        .agg(rows="size", quantity_moved="sum")
        .reset_index()
    )
    short = result.shortage_periods
    shortage_count = int(cleaned["shortage"].sum())
    png = corrections_chart(by_rule_and_class, list(result.outlier_rules.get("product_class", [])), shortage_count)
    cleaned_figures = {
        "cycle_date": str(result.cycle_date.date()),
        "series": result.series,
        "filled_periods": int(cleaned["filled"].sum()),
        "corrected_periods": int(cleaned["corrected"].sum()),
        "shortage_periods": shortage_count,
        "shortage_records": len(short),
        "shortage_records_without_series": int((short["children"] == 0).sum()) if len(short) else 0,
        "shortage_rule": settings.cleansing.shortages,
        "corrections_by_rule": by_rule,
        "corrections_by_class_and_rule": by_rule_and_class,
        "outlier_rule_by_class": result.outlier_rules,
        "shortages_flagged": short,
        "corrections_picture": settings.report_folder / settings.picture,
        **counts,
    }
    by_reason = rejected.groupby("reason").size().rename("lines").reset_index()
    return StageResult(
        outputs={
            "cleaned_history": cleaned,
            "rejected_rows": rejected,
            "history_corrections": corrections,
            "cycle_calendar": cycle_calendar(cleaned, settings.calendar, result.cycle_date, settings.first_period),
        },
        metadata={
            "cleaned_history": cleaned_figures,
            "rejected_rows": {"by_reason": by_reason},
            "history_corrections": {"by_rule": by_rule},
        },
        checks=history_checks(raw_history, cleaned, rejected, corrections, settings, result.raw_runs),
        files={settings.picture: png},
    )


def history_checks(
    raw_history: pd.DataFrame,
    cleaned: pd.DataFrame,
    rejected: pd.DataFrame,
    corrections: pd.DataFrame,
    settings: CleaningSettings,
    raw_runs=RUNS_UNSEEN,
) -> dict[str, CheckRows]:
    """The checks of cleaned_history and rejected_rows, judged from the stage's tables and the raw lines
    (`raw_runs`: `history_proofs.leaf_runs(raw_history)` where the stage found them)."""
    counts = line_accounting(len(raw_history), cleaned, rejected)
    bad = rejected[rejected["reason"] != "on_or_after_cycle_date"]
    limit = settings.max_rejected_share
    fraction = len(bad) / len(raw_history) if len(raw_history) else 0.0
    runs = leaf_runs(cleaned)  # cleaned_history's runs of one leaf, found once for both proofs
    return {
        EVERY_RAW_ROW_ACCOUNTED: CheckRows(
            find_unaccounted_lines(raw_history, cleaned, rejected, cleaned_runs=runs, raw_runs=raw_runs), counts
        ),
        CORRECTIONS_EXPLAIN_CHANGES: CheckRows(find_unexplained_changes(cleaned, corrections, cleaned_runs=runs)),
        REJECTED_ROWS_WITHIN_LIMIT: CheckRows(
            bad if fraction > limit else bad.iloc[0:0],
            {
                "rejected": f"{len(bad)} of {len(raw_history)} lines ({fraction:.3%}; limit {limit:.3%})",
                "by_reason": bad.groupby("reason").size().rename("lines").reset_index(),
            },
        ),
    }
