"""One pandera model per stage boundary.

Later stages inherit their key columns from earlier ones. Every asset is
validated against its model by a blocking asset check named
`<asset>_matches_schema`; failing rows go into that check's metadata.
"""

from typing import Optional

import numpy as np
import pandas as pd
import pandera.pandas as pa
from pandera.typing import DateTime, Series

from pipelines.text_dtype import Text
from pipelines.unique_keys import ids_match_keys_checked
from pipelines.vocabulary import PERIOD_BASES as PERIOD_BASES_
from pipelines.vocabulary import (
    CorrectionRule,
    Fallback,
    LifecycleAuditRule,
    LifecycleRule,
    Origin,
    PeriodKind,
    ReadError,
    RejectReason,
    ShareMethod,
    ZeroReason,
    values,
)

# the allowed values of each coded column (pipelines.vocabulary)
READ_ERRORS = values(ReadError)
REJECT_REASONS = values(RejectReason)
CORRECTION_RULES = values(CorrectionRule)
ORIGINS = values(Origin)
LIFECYCLE_AUDIT_RULES = values(LifecycleAuditRule)
FALLBACKS = values(Fallback)
SHARE_METHODS = values(ShareMethod)
PERIOD_BASES = values(PERIOD_BASES_)
LIFECYCLE_RULES = values(LifecycleRule)
ZERO_REASONS = values(ZeroReason)


class _Strict(pa.DataFrameModel):
    class Config:
        strict = True
        coerce = True


# ----------------------------------------------------------------- inputs
class RawHistory(_Strict):
    """History lines exactly as read: every cell text, blanks as ''."""

    source_file: Series[Text] = pa.Field(description="input file the line came from")
    source_row: Series[int] = pa.Field(
        ge=1, description="1-based data row within that file: its line number minus the header line"
    )
    product: Series[Text] = pa.Field(description="product code as written")
    site: Series[Text] = pa.Field(description="site code as written")
    customer: Series[Text] = pa.Field(description="customer code as written")
    period_start: Series[Text] = pa.Field(description="ISO date as written")
    quantity: Series[Text] = pa.Field(description="quantity as written; negative is a return")
    # the loader always supplies it; optional so that hand-built frames without malformed lines validate too
    read_error: Optional[Series[Text]] = pa.Field(
        isin=("",) + READ_ERRORS,
        description="'' for a line split into the file's columns; else why it could not be (its cells then hold "
        "the line's first fields, cut short), and cleaned_history rejects it with that reason",
    )

    class Config:
        unique = ["source_file", "source_row"]


class Products(_Strict):
    """Product master: class and active span of each product."""

    product: Series[Text] = pa.Field(unique=True, str_length={"min_value": 1}, description="product code")
    product_class: Series[Text] = pa.Field(str_length={"min_value": 1}, description="class key of the planning config")
    active_from: Series[DateTime] = pa.Field(nullable=True, description="first day sold; blank = always")
    active_to: Series[DateTime] = pa.Field(nullable=True, description="last day sold; blank = open")
    successor: Series[Text] = pa.Field(nullable=True, description="product taking over this one's history")
    product_family: Optional[Series[Text]] = pa.Field(
        nullable=True, description="optional group of products (a level of hierarchy.upper_levels, a seasonal_group)"
    )

    @pa.dataframe_check(description="active_to is not before active_from")
    def span_ordered(cls, df: pd.DataFrame) -> Series[bool]:
        return ~(df["active_to"] < df["active_from"])

    @pa.dataframe_check(description="a product is not its own successor")
    def successor_differs(cls, df: pd.DataFrame) -> Series[bool]:
        return df["successor"].isna() | (df["successor"] != df["product"])


class LeafKeys(_Strict):
    product: Series[Text] = pa.Field(description="product code")
    site: Series[Text] = pa.Field(description="site code")
    customer: Series[Text] = pa.Field(description="customer code")


class CustomerSpans(LeafKeys):
    """Which customer buys which product at which site, and when."""

    active_from: Series[DateTime] = pa.Field(nullable=True, description="first day of the active span")
    active_to: Series[DateTime] = pa.Field(nullable=True, description="last day of the active span; blank = open")
    reference_customer: Series[Text] = pa.Field(
        nullable=True, description="existing customer of the same product and site a new customer takes its share from"
    )
    # the loader always supplies the two optional columns (blank when the file lacks
    # them); required=False lets hand-built frames without them validate too
    scale: Series[float] = pa.Field(
        nullable=True,
        required=False,
        gt=0,
        le=1,
        description="optional: fraction of the reference's share the new customer takes (blank = config "
        "lifecycle.reference_scale); at most 1, the reference cannot give more than it has",
    )
    initial_share: Series[float] = pa.Field(
        nullable=True,
        required=False,
        ge=0,
        lt=1,
        description=(
            "optional: planner-given share of a new customer without reference; the others are scaled by "
            "1 - it"
        ),
    )

    class Config:
        unique = ["product", "site", "customer"]

    @pa.dataframe_check(description="active_to is not before active_from")
    def span_ordered(cls, df: pd.DataFrame) -> Series[bool]:
        return ~(df["active_to"] < df["active_from"])

    @pa.dataframe_check(description="a customer is not its own reference")
    def reference_differs(cls, df: pd.DataFrame) -> Series[bool]:
        return df["reference_customer"].isna() | (df["reference_customer"] != df["customer"])


class Adjustments(_Strict):
    """Parent-grain values a planner entered."""

    measure: Series[Text] = pa.Field(description="measure name")
    product: Series[Text] = pa.Field(description="product code")
    site: Series[Text] = pa.Field(description="site code")
    period_start: Series[DateTime] = pa.Field(description="period start")
    value: Series[float] = pa.Field(description="value at product x site grain")


class Pins(_Strict):
    """Leaf values a planner fixed: the split keeps them and spreads the rest of the parent over the others."""

    product: Series[Text] = pa.Field(str_length={"min_value": 1}, description="product code")
    site: Series[Text] = pa.Field(str_length={"min_value": 1}, description="site code")
    customer: Series[Text] = pa.Field(str_length={"min_value": 1}, description="customer code")
    period_start: Series[DateTime] = pa.Field(description="any day inside the pinned period")
    measure: Series[Text] = pa.Field(str_length={"min_value": 1}, description="measure name (a key of config measures)")
    value: Series[float] = pa.Field(description="the value the leaf keeps")


class Shortages(_Strict):
    """Recorded supply shortages: one row per product x site and period that was short."""

    product: Series[Text] = pa.Field(str_length={"min_value": 1}, description="product code")
    site: Series[Text] = pa.Field(str_length={"min_value": 1}, description="site code")
    period_start: Series[DateTime] = pa.Field(description="any day inside the short period")


# ----------------------------------------------------------------- history
class ParentIds(pa.DataFrameModel):
    """The integer id of the parent, assigned once by the lifecycle stage (`pipelines.keys`)."""

    parent_id: Optional[Series[np.int32]] = pa.Field(
        ge=0, description="integer id of the parent (product x site), the same in every table of the cycle"
    )

    # ignore_na off: pandera would otherwise test every cell of the frame for a row of blanks only, which no row
    # of a table with ids can be (a third of the check's time on the history)
    @pa.dataframe_check(
        ignore_na=False, description="one leaf_id per leaf key and one parent_id per parent key, and the reverse"
    )
    def ids_match_keys(cls, df: pd.DataFrame) -> pd.Series:
        return ids_match_keys_checked(df)


class LeafIds(ParentIds):
    """The integer ids of the leaf and its parent, assigned once by the lifecycle stage (`pipelines.keys`)."""

    leaf_id: Optional[Series[np.int32]] = pa.Field(
        ge=0, description="integer id of the leaf (product x site x customer), the same in every table of the cycle"
    )


class LeafPeriod(LeafKeys):
    period_start: Series[DateTime] = pa.Field(description="start of the calendar period")


class CleanedHistory(LeafPeriod):
    """History bucketed to the calendar, one row per leaf and period."""

    quantity: Series[float] = pa.Field(ge=0, description="cleaned quantity")
    raw_quantity: Series[float] = pa.Field(description="net quantity of the raw lines (0 where filled)")
    lines: Series[int] = pa.Field(ge=0, description="raw lines summed into this period")
    filled: Series[bool] = pa.Field(description="period had no line and was filled with zero")
    corrected: Series[bool] = pa.Field(description="a correction changed this period")
    shortage: Series[bool] = pa.Field(description="a supply shortage is recorded for this product x site and period")

    class Config:
        unique = ["product", "site", "customer", "period_start"]


class CycleCalendar(_Strict):
    """The cycle in one row: its date, calendar and history range."""

    cycle_date: Series[DateTime] = pa.Field(description="first period of the horizon")
    period: Series[Text] = pa.Field(isin=values(PeriodKind), description="period kind")
    horizon: Series[int] = pa.Field(ge=1, description="periods forecast")
    horizon_end: Series[DateTime] = pa.Field(description="start of the last horizon period")
    history_start: Series[DateTime] = pa.Field(nullable=True, description="first period of cleaned history")
    history_periods: Series[int] = pa.Field(ge=0, description="periods from history_start to the cycle date")


class RejectedRows(_Strict):
    """Raw lines that could not be used, each with its reason."""

    source_file: Series[Text] = pa.Field(description="input file")
    source_row: Series[int] = pa.Field(ge=1, description="1-based data row")
    product: Series[Text] = pa.Field(description="as written")
    site: Series[Text] = pa.Field(description="as written")
    customer: Series[Text] = pa.Field(description="as written")
    period_start: Series[Text] = pa.Field(description="as written")
    quantity: Series[Text] = pa.Field(description="as written")
    reason: Series[Text] = pa.Field(isin=REJECT_REASONS, description="why the line was not used")


class HistoryCorrections(LeafPeriod):
    """One row per changed period: the quantity a rule moved."""

    rule: Series[Text] = pa.Field(isin=CORRECTION_RULES, description="rule that changed the value")
    before: Series[float] = pa.Field(description="value before the rule")
    after: Series[float] = pa.Field(description="value after the rule")
    delta: Series[float] = pa.Field(description="after - before")
    parameters: Series[Text] = pa.Field(description="the rule's parameter values")


class LifecycleHistory(LeafPeriod, LeafIds):
    """History inside each active span, remapped to successors."""

    quantity: Series[float] = pa.Field(ge=0, description="quantity in the share basis")
    origin: Series[Text] = pa.Field(isin=ORIGINS, description="own, or successor (mapped from a retired product)")
    source_product: Series[Text] = pa.Field(description="product the history was recorded on")
    source_customer: Series[Text] = pa.Field(description="customer the history was recorded on")
    shortage: Series[bool] = pa.Field(
        description="a supply shortage was recorded for the source product x site x period; "
        "such periods do not count toward shares or the parent baseline"
    )

    class Config:
        unique = ["product", "site", "customer", "period_start", "origin", "source_product"]


class LifecycleAudit(_Strict):
    """What the lifecycle stage moved or left out, per key and rule."""

    product: Series[Text] = pa.Field(description="product code")
    site: Series[Text] = pa.Field(description="site code")
    customer: Series[Text] = pa.Field(description="customer code")
    rule: Series[Text] = pa.Field(isin=LIFECYCLE_AUDIT_RULES, description="lifecycle rule applied")
    periods: Series[int] = pa.Field(ge=0, description="periods affected")
    quantity: Series[float] = pa.Field(description="quantity affected")
    detail: Series[Text] = pa.Field(description="what happened, in words")


# ----------------------------------------------------------------- shares
class ShareTable(LeafKeys, LeafIds):
    """One base share per child for the cycle, with the window, method and lifecycle rule behind it."""

    cycle_date: Series[DateTime] = pa.Field(description="first period of the cycle's horizon")
    product_class: Series[Text] = pa.Field(description="product class")
    share: Series[float] = pa.Field(
        ge=0,
        le=1,
        description="base share: child's fraction of its parent in a period where every child is active "
        "(per-period methods: from their pooled history_share)",
    )
    history_share: Series[float] = pa.Field(
        ge=0,
        le=1,
        description="share from history over the established children, before the new-customer rules; for the "
        "per-period methods (seasonal, children_forecast) the pooled share over the window, which is their summary "
        "here and their fallback in a period without a basis (the per-period basis is the period_basis table)",
    )
    method: Series[Text] = pa.Field(isin=SHARE_METHODS, description="share method of the class")
    window: Series[int] = pa.Field(ge=1, description="configured window, periods")
    window_used: Series[int] = pa.Field(ge=0, description="window that gave volume (0 = even split)")
    window_start: Series[DateTime] = pa.Field(description="first period of the window used")
    fallback: Series[Text] = pa.Field(isin=FALLBACKS, description="fallback taken for this parent")
    child_volume: Series[float] = pa.Field(ge=0, description="child's volume in the window used")
    parent_volume: Series[float] = pa.Field(ge=0, description="parent's volume in the window used")
    lifecycle_rule: Series[Text] = pa.Field(isin=LIFECYCLE_RULES, description="how the share is set over the horizon")
    first_active_period: Series[DateTime] = pa.Field(description="first horizon period the child is active")
    last_active_period: Series[DateTime] = pa.Field(description="last horizon period the child is active")
    own_periods: Series[int] = pa.Field(ge=0, description="distinct periods of the child's own history")
    reference_customer: Series[Text] = pa.Field(nullable=True, description="reference the share was taken from")
    scale: Series[float] = pa.Field(nullable=True, gt=0, le=1, description="fraction of the reference's share taken")
    initial_share: Series[float] = pa.Field(nullable=True, ge=0, lt=1, description="planner-given share used")
    lifecycle_detail: Series[Text] = pa.Field(description="the rule in words, for the planner")

    class Config:
        unique = ["product", "site", "customer"]


class ReinitializedTarget(LeafPeriod, LeafIds):
    """Target measure for the horizon: the period's share x the parent's baseline."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    target: Series[float] = pa.Field(ge=0, description="share x parent_baseline")
    share: Series[float] = pa.Field(
        ge=0, le=1, description="share in this period: base shares of the children active in it, renormalised"
    )
    parent_baseline: Series[float] = pa.Field(ge=0, description="parent's mean per period over the window used")
    zero_reason: Series[Text] = pa.Field(
        nullable=True,
        isin=ZERO_REASONS,
        description="why every share of the parent is 0 in this period (blank = they sum to 1)",
    )
    basis: Optional[Series[Text]] = pa.Field(
        isin=PERIOD_BASES,
        description="what the established children's weights of the parent came from in this period: history_share "
        "(the share table's, every period alike), period_of_year (seasonal), children_forecast (method "
        "children_forecast) or pooled_fallback (a per-period method without a basis in this period: the pooled "
        "history share)",
    )

    class Config:
        unique = ["product", "site", "customer", "period_start"]


class PeriodBasis(LeafPeriod):
    """The per-period weights of the established children of per-period share methods, decided once a cycle."""

    weight: Series[float] = pa.Field(
        ge=0, le=1, description="the child's history share in this period, before the lifecycle rules"
    )
    basis: Series[Text] = pa.Field(
        isin=PERIOD_BASES, description="what the weight came from: period_of_year, children_forecast or pooled_fallback"
    )

    class Config:
        unique = ["product", "site", "customer", "period_start"]


class ProductClassMap(_Strict):
    """The class of every product of the product master file, so the other inputs keep their class's rows."""

    product: Series[Text] = pa.Field(unique=True, description="product code")
    product_class: Series[Text] = pa.Field(description="its product class")
