"""The pandera models of the backtest's choice tables: per-period losses and the share tuning."""

import pandera.pandas as pa
from pandera.typing import DateTime, Series

from pipelines.schemas import _Strict
from pipelines.vocabulary import AUTO, BENCHMARK, Seasonality, SelectionMetric, ShareMethod, Strategy, values

DECISIONS = ("first", "keep", "switch", "fixed")


class BacktestLosses(_Strict):
    """Leaf-grain loss of each class and strategy in every scored period (origin x step), for the DM-HLN test."""

    product_class: Series[str] = pa.Field(description="product class")
    strategy: Series[str] = pa.Field(
        isin=values(Strategy) + (str(BENCHMARK),), description="strategy, or the seasonal naive benchmark"
    )
    seasonality: Series[str] = pa.Field(
        isin=values(Seasonality), description="the seasonality the class's models ran with (none, own, group)"
    )
    origin: Series[DateTime] = pa.Field(description="backtest origin (first forecast period)")
    step: Series[int] = pa.Field(ge=1, description="periods ahead of the origin, 1..horizon")
    abs_loss: Series[float] = pa.Field(ge=0, description="sum over the class's leaves of |forecast - raw actual|")
    squared_scaled_loss: Series[float] = pa.Field(
        ge=0, description="sum over the class's leaves of volume weight x (forecast - actual)^2 / q2 (RMSSE's scale)"
    )

    class Config:
        unique = ["product_class", "seasonality", "strategy", "origin", "step"]


class ShareTuning(_Strict):
    """Every share window x method candidate's top-down leaf accuracy per class, the best and the choice."""

    product_class: Series[str] = pa.Field(description="product class")
    window: Series[int] = pa.Field(ge=1, description="candidate share window, periods")
    method: Series[str] = pa.Field(isin=values(ShareMethod), description="candidate share method")
    candidate: Series[str] = pa.Field(description="method/window")
    metric: Series[str] = pa.Field(isin=values(SelectionMetric), description="the class's selection metric")
    score: Series[float] = pa.Field(nullable=True, description="the candidate's value of that metric (lower = better)")
    wmape: Series[float] = pa.Field(nullable=True, description="leaf-grain WMAPE of the top-down split")
    rmsse: Series[float] = pa.Field(nullable=True, description="leaf-grain RMSSE (volume-weighted)")
    mase: Series[float] = pa.Field(nullable=True, description="leaf-grain MASE")
    configured: Series[bool] = pa.Field(description="the class's fixed window and method")
    own: Series[bool] = pa.Field(description="keeps what the class fixes (the candidates auto chooses from)")
    best: Series[bool] = pa.Field(description="lowest score (auto: of the own candidates; fixed: of all)")
    chosen: Series[bool] = pa.Field(description="the window and method the cycle's share tables follow")
    configured_window: Series[str] = pa.Field(description="the class's window as configured (a number or auto)")
    configured_method: Series[str] = pa.Field(
        isin=values(ShareMethod) + (AUTO,), description="the class's method as configured"
    )
    gain: Series[float] = pa.Field(
        nullable=True, description="(chosen score - best score) / chosen score; > 0: the best would split better"
    )
    decision: Series[str] = pa.Field(isin=DECISIONS, description="first, keep or switch (auto), fixed")
    reason: Series[str] = pa.Field(description="why (forecast_comparison.Reason, or configured)")
    detail: Series[str] = pa.Field(description="the decision in words")
