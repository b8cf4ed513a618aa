"""The share methods `children_forecast`, `smoothed` and `seasonal` against outside references.

- `children_forecast` (forecast proportions): Nixtla hierarchicalforecast 1.5.3,
  `hierarchicalforecast.methods.TopDown(method="forecast_proportions")`
  (Athanasopoulos, Ahmed & Hyndman 2009), which splits the root's forecast by
  yhat_j / sum_k yhat_k per horizon period (read from
  `.venv/lib/python3.11/site-packages/hierarchicalforecast/methods.py`,
  `_reconcile_fcst_proportions`). TopDown splits from ONE root (the row of S with
  most bottom series), so each check builds a single-parent hierarchy, S = [1'; I].
- `smoothed`: pandas 2.3.3 `Series.ewm(alpha, adjust=False, ignore_na=True).mean()`
  (y_0 = x_0, y_t = (1 - alpha) y_(t-1) + alpha x_t; with ignore_na a missing x is
  skipped) and statsmodels 0.15.0 `SimpleExpSmoothing` with a fixed smoothing_level
  and the known initial level x_0 (l_t = alpha x_t + (1 - alpha) l_(t-1)). Both equal
  ours when the series is each child's proportion y_{j,t} / Y_t with the periods
  without parent volume missing (ours leaves p unchanged there) and the initial
  value is the first proportion, our documented start.
- `seasonal`: hierarchicalforecast 1.5.3 `TopDown(method="proportion_averages")`
  (Gross & Sohl 1990: p_j = mean_t y_{j,t} / mean_t Y_t) fed, for each horizon week,
  with only the history weeks of the same period of the year, chosen here with
  pandas' own ISO calendar (`Series.dt.isocalendar()`), not with our ordinals.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from hierarchicalforecast.methods import TopDown
from statsmodels.tsa.holtwinters import SimpleExpSmoothing

from pipelines.calendar import period_ordinal
from pipelines.config import parse_config
from pipelines.engines.period_shares import children_forecasts
from pipelines.engines.shares import compute_shares
from pipelines.keys import LEAF
from pipelines.stages.reinitialized_target import reinitialize_target
from pipelines.stages.statistical_forecast import forecast_cycle

TOL = 1e-12


def invented_rows(
    weeks: pd.DatetimeIndex, parents, seed: int, seasonal: bool = False, trend: bool = False
) -> list[tuple]:
    """Invented history rows (product, site, customer, week, quantity): parents [(product, site, customers)],
    every customer every week. seasonal: each customer its own yearly peak; trend: its own weekly
    growth (-4% to +4%).
    """
    rng = np.random.default_rng(seed)
    rows = []
    for p, s, n in parents:
        for c in range(n):
            level, peak, amplitude = rng.uniform(5, 40), rng.uniform(0, 52), rng.uniform(0.3, 0.9)
            growth = rng.uniform(-0.04, 0.04) if trend else 0.0
            for t, w in enumerate(weeks):
                season = 1 + amplitude * np.cos(2 * np.pi * (w.isocalendar().week - peak) / 52) if seasonal else 1.0
                mean = level * season * (1 + growth) ** t * rng.uniform(0.8, 1.2)
                rows.append((p, s, f"C{c + 1}", str(w.date()), float(rng.poisson(mean))))
    return rows


def children_of(history: pd.DataFrame) -> pd.DataFrame:
    return history[LEAF].drop_duplicates().reset_index(drop=True).assign(product_class="a")


def share_matrix(target: pd.DataFrame, column: str = "share") -> pd.DataFrame:
    """customer x period_start of one parent's target."""
    return target.pivot(index="customer", columns="period_start", values=column).sort_index()


def top_down(method: str, root_fc: np.ndarray, leaf_fc: np.ndarray, insample: np.ndarray | None = None) -> np.ndarray:
    """hierarchicalforecast 1.5.3 TopDown on one root and its n leaves; returns the (n, h) leaf forecasts."""
    n = leaf_fc.shape[0]
    S = np.vstack([np.ones((1, n)), np.eye(n)])
    tags = {"parent": np.array([0]), "parent/customer": np.arange(1, n + 1)}
    y_hat = np.vstack([root_fc[None, :], leaf_fc])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = TopDown(method=method).fit_predict(S=S, y_hat=y_hat, tags=tags, y_insample=insample)
    return out["mean"][1:]


# ------------------------------------------------------------------ forecast_proportions
WEEKS = pd.date_range("2025-06-02", periods=40, freq="7D")
CYCLE = WEEKS[-1] + pd.Timedelta(days=7)
HORIZON = 6


def fp_config(grain: str = "top_down") -> object:
    return parse_config(
        {
            "calendar": {"horizon": HORIZON},
            "product_classes": {
                "a": {
                    "window": 26,
                    "method": "children_forecast",
                    "strategy": grain,
                    "models": {
                        "smooth": "auto_ets",
                        "erratic": "ses",
                        "intermittent": "croston_sba",
                        "lumpy": "croston_sba",
                    },
                }
            },
        }
    )


def test_forecast_proportions_equal_top_down_forecast_proportions_on_one_parent(make_history):
    history = make_history(invented_rows(WEEKS, [("P1", "S1", 5)], seed=3, trend=True))
    cfg = fp_config()
    shares = compute_shares(history, children_of(history), cfg, CYCLE)
    target = reinitialize_target(shares, history, cfg, CYCLE)
    ours = share_matrix(target)
    assert set(target["basis"]) == {"children_forecast"}
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([CYCLE]), "week")[0])
    base = children_forecasts(history, shares, cfg, cycle_ord, HORIZON)
    assert (base > 0).all()  # every child forecast, so no zero rule is involved
    # reference: hierarchicalforecast 1.5.3 TopDown(method="forecast_proportions"), root forecast 1 -> leaf = share
    expected = top_down("forecast_proportions", np.ones(HORIZON), base)
    np.testing.assert_allclose(ours.to_numpy(), expected, rtol=0, atol=TOL)
    # the shares really move over the horizon (else a constant share would pass as well)
    assert np.ptp(ours.to_numpy(), axis=1).max() > 1e-4


def test_childrens_base_forecasts_are_the_forecast_stage_own_leaf_forecasts(make_history):
    """The basis comes from the class's models: the same numbers the forecast stage gives bottom-up."""
    history = make_history(invented_rows(WEEKS, [("P1", "S1", 4), ("P2", "S1", 3)], seed=5, trend=True))
    cfg = fp_config(grain="bottom_up")
    children = children_of(history)
    shares = compute_shares(history, children, cfg, CYCLE)
    target = reinitialize_target(shares, history, cfg, CYCLE)
    fc = forecast_cycle(history, children, target, cfg, CYCLE)
    own = fc.leaf.pivot_table(index=LEAF, columns="period_start", values="forecast").sort_index()
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([CYCLE]), "week")[0])
    base = children_forecasts(history, shares.set_index(LEAF).loc[own.index].reset_index(), cfg, cycle_ord, HORIZON)
    np.testing.assert_allclose(base, own.to_numpy(), rtol=0, atol=1e-9)


def test_top_down_split_by_forecast_proportions_target_equals_the_library_on_the_parent_forecast(make_history):
    history = make_history(invented_rows(WEEKS, [("P9", "S1", 4)], seed=7, trend=True))
    cfg = fp_config()
    children = children_of(history)
    shares = compute_shares(history, children, cfg, CYCLE)
    target = reinitialize_target(shares, history, cfg, CYCLE)
    fc = forecast_cycle(history, children, target, cfg, CYCLE)
    parent = fc.parent.sort_values("period_start")["forecast"].to_numpy()
    assert (parent > 0).all()
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([CYCLE]), "week")[0])
    base = children_forecasts(history, shares, cfg, cycle_ord, HORIZON)
    # reference: hierarchicalforecast 1.5.3 TopDown(method="forecast_proportions") with our parent base forecast as root
    expected = top_down("forecast_proportions", parent, base)
    ours = fc.leaf.pivot(index="customer", columns="period_start", values="forecast").sort_index().to_numpy()
    np.testing.assert_allclose(ours, expected, rtol=1e-12, atol=1e-9)


# ------------------------------------------------------------------ smoothed
@pytest.mark.parametrize("alpha", [0.1, 0.3, 0.75])
def test_smoothed_equals_pandas_ewm_and_statsmodels_ses_of_each_childs_proportion(make_history, alpha):
    weeks = pd.date_range("2025-09-01", periods=20, freq="7D")
    history = make_history(invented_rows(weeks, [("P1", "S1", 4), ("P2", "S1", 3)], seed=11))
    # weeks without parent volume: the first (so the start moves to the second week) and two inside
    quiet = history["period_start"].isin(weeks[[0, 6, 13]]) & (history["product"] == "P1")
    history.loc[quiet, "quantity"] = 0.0
    cycle = weeks[-1] + pd.Timedelta(days=7)
    cfg = parse_config({"product_classes": {"a": {"window": 20, "method": "smoothed", "smoothing": alpha}}})
    shares = compute_shares(history, children_of(history), cfg, cycle).set_index(LEAF)["history_share"]

    checked = 0
    for (product, site), part in history.groupby(["product", "site"]):
        volume = part.pivot(index="period_start", columns="customer", values="quantity").sort_index()
        parent = volume.sum(axis=1)
        proportion = volume.div(parent.where(parent > 0), axis=0)  # NaN where the parent has no volume
        for customer in volume.columns:
            x = proportion[customer]
            # reference: pandas 2.3.3 ewm(alpha, adjust=False, ignore_na=True), starting at the first proportion
            ewm = x.ewm(alpha=alpha, adjust=False, ignore_na=True).mean().iloc[-1]
            # reference: statsmodels 0.15.0 SimpleExpSmoothing, fixed alpha, known initial level = first proportion
            valid = x.dropna().to_numpy()
            ses = SimpleExpSmoothing(valid, initialization_method="known", initial_level=valid[0]).fit(
                smoothing_level=alpha, optimized=False
            )
            ours = shares.loc[(product, site, customer)]
            assert ours == pytest.approx(ewm, abs=TOL)
            assert ours == pytest.approx(ses.forecast(1)[0], abs=TOL)
            checked += 1
    assert checked == 7
    # the smoothed shares differ from the pooled ones on this data, so the check can tell them apart
    pooled = compute_shares(
        history, children_of(history), parse_config({"product_classes": {"a": {"window": 20}}}), cycle
    )
    assert np.abs(pooled["history_share"].to_numpy() - shares.sort_index().to_numpy()).max() > 1e-3


# ------------------------------------------------------------------ seasonal
SEASON_WEEKS = pd.date_range("2023-06-05", "2026-12-07", freq="7D")
SEASON_CYCLE = pd.Timestamp("2026-12-14")  # the horizon reaches ISO 2026-W53 (2026-12-28) and 2027
SEASON_HORIZON = 6


def same_period_weeks(history_weeks: pd.Series, horizon_week: pd.Timestamp, years: int, band: int) -> pd.Series:
    """History weeks pooled for `horizon_week`, chosen with pandas' ISO calendar.

    Each week of the year w' within `band` of the horizon week's (week 53 read as 52, wrapping 52 -> 1),
    in the `years` most recent ISO years holding w' before the cycle.
    """
    iso = history_weeks.dt.isocalendar()
    folded = iso["week"].clip(upper=52).astype(int)
    target = min(int(horizon_week.isocalendar().week), 52)
    keep = pd.Series(False, index=history_weeks.index)
    for d in range(-band, band + 1):
        w = (target - 1 + d) % 52 + 1
        match = folded == w
        recent = sorted(iso.loc[match, "year"].unique())[-years:]
        keep |= match & iso["year"].isin(recent)
    return history_weeks[keep]


@pytest.mark.parametrize(("years", "band"), [(2, 0), (3, 0), (2, 1)])
def test_seasonal_equals_proportion_averages_over_the_same_iso_weeks(make_history, years, band):
    history = make_history(invented_rows(SEASON_WEEKS, [("P1", "S1", 4)], seed=13, seasonal=True))
    cfg = parse_config(
        {
            "calendar": {"horizon": SEASON_HORIZON},
            "product_classes": {
                "a": {"window": 52, "method": "seasonal", "seasonal_years": years, "seasonal_band": band}
            },
        }
    )
    shares = compute_shares(history, children_of(history), cfg, SEASON_CYCLE)
    target = reinitialize_target(shares, history, cfg, SEASON_CYCLE)
    assert set(target["basis"]) == {"period_of_year"}
    ours = share_matrix(target)
    volume = history.pivot(index="customer", columns="period_start", values="quantity").sort_index()
    weeks = pd.Series(volume.columns)
    for h, horizon_week in enumerate(ours.columns):
        pooled = same_period_weeks(weeks, horizon_week, years, band)
        assert len(pooled) >= years * (2 * band + 1)  # each week of the year found in every year
        y_btm = volume[pooled.to_list()].to_numpy()
        insample = np.vstack([y_btm.sum(axis=0)[None, :], y_btm])
        # reference: hierarchicalforecast 1.5.3 TopDown(method="proportion_averages") on those weeks only
        expected = top_down("proportion_averages", np.ones(1), np.zeros((len(y_btm), 1)), insample)[:, 0]
        np.testing.assert_allclose(ours.iloc[:, h].to_numpy(), expected, rtol=0, atol=TOL)
    # the seasonal shares differ from period to period and from the pooled share
    assert np.ptp(ours.to_numpy(), axis=1).max() > 1e-3
    pooled_share = shares.set_index("customer")["history_share"].sort_index().to_numpy()
    assert np.abs(ours.to_numpy() - pooled_share[:, None]).max() > 1e-3
