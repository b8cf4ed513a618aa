"""Share tables and the top-down split checked against hierarchicalforecast.

Outside reference: Nixtla hierarchicalforecast 1.5.3 (`hierarchicalforecast.utils.aggregate`,
`hierarchicalforecast.core.HierarchicalReconciliation.reconcile`,
`hierarchicalforecast.methods.MiddleOut` and `hierarchicalforecast.methods.TopDown`).

What the library computes (read from `.venv/lib/python3.11/site-packages/hierarchicalforecast/
methods.py`, `TopDown._get_PW_matrices`), with y_top the in-sample history of the node split
from and y_btm the in-sample history of its bottom series, over all in-sample periods given:

- `proportion_averages`: p_j = nanmean_t(y_{j,t}) / nanmean_t(Y_t)
  (Gross & Sohl 1990, "Disaggregation methods to expedite product line forecasting",
  J. Forecasting 9(3); Hyndman & Athanasopoulos, Forecasting: Principles and Practice,
  3rd ed., section 11.3 "Top-down approaches", "proportions of the historical averages").
  This is our `pooled` method: sum_t y_{j,t} / sum_t Y_t over the same periods.
- `average_proportions`: p_j = nanmean_t(y_{j,t} / Y_t)
  (same sources, "average historical proportions"). A period with Y_t = 0 gives 0/0 = NaN,
  which nanmean skips: this is our `mean_of_ratios` rule of leaving out periods without
  parent volume.

The reconciled bottom forecast is S P y_hat, i.e. leaf_j = p_j x (forecast of the node split from).

`TopDown` splits from ONE root only (the row of S with most bottom series), so on a forest
of many product x site parents it would split everything from one parent's history. For
per-parent shares the tests therefore build Total / product_site / customer and use
`MiddleOut(middle_level="total/ps", ...)`, which runs one TopDown per middle-level node with
y_top = that node's own history. `TopDown` itself is used on a single-parent hierarchy only.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from hierarchicalforecast.core import HierarchicalReconciliation
from hierarchicalforecast.methods import MiddleOut, TopDown
from hierarchicalforecast.utils import aggregate

from pipelines.config import parse_config
from pipelines.engines.shares import compute_shares
from pipelines.keys import LEAF
from pipelines.schemas import LifecycleHistory, ShareTable
from pipelines.stages.reinitialized_target import reinitialize_target
from pipelines.stages.statistical_forecast import forecast_cycle

N_WEEKS = 12
WEEKS = pd.date_range("2026-01-05", periods=N_WEEKS, freq="7D")  # 2026-01-05 is a Monday
CYCLE = WEEKS[-1] + pd.Timedelta(days=7)
HORIZON = 4
HORIZON_STARTS = pd.date_range(CYCLE, periods=HORIZON, freq="7D")
PARENTS = [("P1", "S1", 2), ("P1", "S2", 3), ("P2", "S1", 4)]  # product, site, customers
# our share method -> hierarchicalforecast's top_down_method for the same formula
METHODS = [("pooled", "proportion_averages"), ("mean_of_ratios", "average_proportions")]
TOL = 1e-10


# ------------------------------------------------------------------ test input (invented)
def make_history(seed: int = 7, parents=PARENTS) -> pd.DataFrame:
    """Lifecycle history: every customer of every parent, every week, strictly positive."""
    rng = np.random.default_rng(seed)
    rows = []
    for p, s, n in parents:
        for c in range(n):
            level = rng.uniform(2, 30)
            for w in WEEKS:
                rows.append((p, s, f"C{c + 1}", w, float(level * rng.uniform(0.3, 1.7))))
    h = pd.DataFrame(rows, columns=LEAF + ["period_start", "quantity"])
    h["origin"] = "own"
    h["source_product"] = h["product"]
    h["source_customer"] = h["customer"]
    h["shortage"] = False
    return LifecycleHistory.validate(h)


def children_of(history: pd.DataFrame, product_class: str = "a") -> pd.DataFrame:
    ch = history[LEAF].drop_duplicates().reset_index(drop=True)
    ch["product_class"] = product_class
    return ch


def config(method: str, window: int = N_WEEKS, fallback_windows=()):
    return parse_config(
        {
            "calendar": {"horizon": HORIZON},
            "product_classes": {"a": {"window": window, "method": method, "fallback_windows": list(fallback_windows)}},
        }
    )


# ------------------------------------------------------------------ the reference
def _ps(product: str, site: str) -> str:
    return f"{product}|{site}"


def reference_split(
    history: pd.DataFrame, parent_forecast: pd.DataFrame, top_down_method: str, single_root: bool = False
) -> pd.Series:
    """Leaf forecasts from hierarchicalforecast 1.5.3.

    history: LEAF + period_start + quantity (the in-sample periods to take proportions over).
    parent_forecast: product, site, period_start, forecast (the base forecast of each parent).
    single_root: hierarchy product_site / customer split with `TopDown` (one parent only);
    otherwise Total / product_site / customer split with `MiddleOut` at product_site.
    Returns the reconciled leaf forecast indexed by (product, site, customer, period_start).
    """
    df = history.assign(
        total="Total", ps=[_ps(p, s) for p, s in zip(history["product"], history["site"], strict=False)]
    )
    df = df.rename(columns={"period_start": "ds", "quantity": "y"})
    if single_root:
        spec = [["ps"], ["ps", "customer"]]
        reconciler = TopDown(method=top_down_method)
    else:
        spec = [["total"], ["total", "ps"], ["total", "ps", "customer"]]
        reconciler = MiddleOut(middle_level="total/ps", top_down_method=top_down_method)
    Y_df, S_df, tags = aggregate(df[["total", "ps", "customer", "ds", "y"]], spec)

    fc = parent_forecast.assign(
        ps=[_ps(p, s) for p, s in zip(parent_forecast["product"], parent_forecast["site"], strict=False)]
    )
    fc = fc.set_index(["ps", "period_start"])["forecast"]
    rows = []
    for uid in S_df["unique_id"]:
        parts = uid.split("/")
        depth = len(parts) - (0 if single_root else 1)  # 1 = product_site node, 2 = leaf
        for ds in HORIZON_STARTS:
            if not single_root and depth == 0:  # Total: coherent sum (BottomUp from the middle anyway)
                value = float(fc.xs(ds, level="period_start").sum())
            elif depth == 1:
                value = float(fc.loc[(parts[-1], ds)])
            else:  # base leaf forecasts are ignored by a top-down split; give nonsense
                value = 999.0
            rows.append((uid, ds, value))
    Y_hat_df = pd.DataFrame(rows, columns=["unique_id", "ds", "base"])

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # 0/0 in the library's proportions for a zero parent
        out = HierarchicalReconciliation(reconcilers=[reconciler]).reconcile(
            Y_hat_df=Y_hat_df, Y_df=Y_df, S_df=S_df, tags=tags
        )
    col = [c for c in out.columns if c.startswith("base/")]
    assert len(col) == 1
    out = out[out["unique_id"].str.count("/") == (1 if single_root else 2)]
    parts = out["unique_id"].str.split("/")
    ps = parts.str[-2].str.split("|")
    index = pd.MultiIndex.from_arrays(
        [ps.str[0], ps.str[1], parts.str[-1], pd.DatetimeIndex(out["ds"])], names=LEAF + ["period_start"]
    )
    return pd.Series(out[col[0]].to_numpy(float), index=index).sort_index()


def constant_parent_forecast(value_of) -> pd.DataFrame:
    rows = [(p, s, ds, value_of(p, s, h)) for p, s, _ in PARENTS for h, ds in enumerate(HORIZON_STARTS)]
    return pd.DataFrame(rows, columns=["product", "site", "period_start", "forecast"])


def implied_shares(reference: pd.Series) -> pd.Series:
    """With every parent forecast 1.0 the reconciled leaf forecast is the share itself."""
    first = reference.xs(HORIZON_STARTS[0], level="period_start")
    return first.sort_index()


def our_shares(shares: pd.DataFrame) -> pd.Series:
    return shares.set_index(LEAF)["share"].sort_index()


# ------------------------------------------------------------------ tests
@pytest.mark.parametrize(("method", "td_method"), METHODS)
def test_shares_equal_middle_out_proportions_full_window(method, td_method):
    history = make_history()
    shares = compute_shares(history, children_of(history), config(method), CYCLE)
    ShareTable.validate(shares)
    # reference: hierarchicalforecast 1.5.3 MiddleOut(middle_level="total/ps", top_down_method=td_method)
    ref = reference_split(history, constant_parent_forecast(lambda p, s, h: 1.0), td_method)
    expected = implied_shares(ref)
    got = our_shares(shares)
    assert list(got.index) == list(expected.index)
    np.testing.assert_allclose(got.to_numpy(), expected.to_numpy(), rtol=0, atol=TOL)
    assert (shares["fallback"] == "none").all()
    assert (shares["window_used"] == N_WEEKS).all()
    # the two methods must really differ on this data, else the test could not tell them apart
    other = dict(METHODS)["mean_of_ratios" if method == "pooled" else "pooled"]
    other_ref = implied_shares(reference_split(history, constant_parent_forecast(lambda p, s, h: 1.0), other))
    assert np.abs(other_ref.to_numpy() - got.to_numpy()).max() > 1e-4


@pytest.mark.parametrize(("method", "td_method"), METHODS)
def test_parent_forecast_times_share_equals_middle_out_leaf_forecast(method, td_method):
    history = make_history(seed=11)
    shares = compute_shares(history, children_of(history), config(method), CYCLE)

    def value(p, s, h):  # a different known forecast per parent and period
        return {"P1": 10.0, "P2": 37.5}[p] * {"S1": 1.0, "S2": 2.5}[s] + 3.0 * h

    parent_fc = constant_parent_forecast(value)
    # reference: hierarchicalforecast 1.5.3 MiddleOut(..., top_down_method=td_method), leaf = p_j x parent
    ref = reference_split(history, parent_fc, td_method)
    ours = (
        shares[LEAF + ["share"]]
        .merge(parent_fc, on=["product", "site"])
        .assign(forecast=lambda d: d["forecast"] * d["share"])
        .set_index(LEAF + ["period_start"])["forecast"]
        .sort_index()
    )
    assert list(ours.index) == list(ref.index)
    np.testing.assert_allclose(ours.to_numpy(), ref.to_numpy(), rtol=TOL, atol=TOL)


@pytest.mark.parametrize(("method", "td_method"), METHODS)
def test_forecast_cycle_split_equals_middle_out(method, td_method):
    """The leaf forecasts of `forecast_cycle` are the library's split of our own parent forecasts."""
    history = make_history(seed=3)
    cfg = config(method)
    children = children_of(history)
    shares = compute_shares(history, children, cfg, CYCLE)
    target = reinitialize_target(shares, history, cfg, CYCLE)
    fc = forecast_cycle(history, children, target, cfg, CYCLE)
    assert (fc.parent["forecast"] > 0).all()  # a zero parent forecast would make the check empty
    # reference: hierarchicalforecast 1.5.3 MiddleOut(..., top_down_method=td_method) fed with our parent forecasts
    ref = reference_split(history, fc.parent[["product", "site", "period_start", "forecast"]], td_method)
    ours = fc.leaf.set_index(LEAF + ["period_start"])["forecast"].sort_index()
    assert list(ours.index) == list(ref.index)
    np.testing.assert_allclose(ours.to_numpy(), ref.to_numpy(), rtol=TOL, atol=TOL)
    assert set(fc.leaf["basis"]) == {"reinitialized_target"}


@pytest.mark.parametrize(("method", "td_method"), METHODS)
def test_single_parent_split_equals_top_down(method, td_method):
    """One root (the parent, leaves its customers): here `TopDown` is valid and ties our split to it directly."""
    parents = [("P9", "S1", 4)]
    history = make_history(seed=5, parents=parents)
    cfg = config(method)
    children = children_of(history)
    shares = compute_shares(history, children, cfg, CYCLE)
    target = reinitialize_target(shares, history, cfg, CYCLE)
    fc = forecast_cycle(history, children, target, cfg, CYCLE)
    assert (fc.parent["forecast"] > 0).all()

    # reference: hierarchicalforecast 1.5.3 TopDown(method=td_method) on hierarchy ps / ps-customer
    ref_share = reference_split(
        history,
        pd.DataFrame({"product": "P9", "site": "S1", "period_start": HORIZON_STARTS, "forecast": 1.0}),
        td_method,
        single_root=True,
    )
    expected = implied_shares(ref_share)
    np.testing.assert_allclose(our_shares(shares).to_numpy(), expected.to_numpy(), rtol=0, atol=TOL)

    ref = reference_split(
        history, fc.parent[["product", "site", "period_start", "forecast"]], td_method, single_root=True
    )
    ours = fc.leaf.set_index(LEAF + ["period_start"])["forecast"].sort_index()
    assert list(ours.index) == list(ref.index)
    np.testing.assert_allclose(ours.to_numpy(), ref.to_numpy(), rtol=TOL, atol=TOL)


@pytest.mark.parametrize(("method", "td_method"), METHODS)
def test_zero_volume_parent_library_nan_ours_even_split(method, td_method):
    history = make_history(seed=13)
    zero = (history["product"] == "P2") & (history["site"] == "S1")  # 4 customers, all weeks 0
    history.loc[zero, "quantity"] = 0.0
    shares = compute_shares(history, children_of(history), config(method), CYCLE)
    ShareTable.validate(shares)
    # reference: hierarchicalforecast 1.5.3 MiddleOut(..., top_down_method=td_method):
    # 0/0 proportions, so the zero parent's leaves come back NaN (no answer for a parent without volume)
    ref = implied_shares(reference_split(history, constant_parent_forecast(lambda p, s, h: 1.0), td_method))
    ref_zero = ref.xs(("P2", "S1"), level=["product", "site"])
    assert len(ref_zero) == 4 and not np.isfinite(ref_zero.to_numpy()).any()

    ours = shares.set_index(["product", "site"])
    z = ours.loc[("P2", "S1")]
    assert (z["fallback"] == "even").all()
    assert (z["window_used"] == 0).all()
    np.testing.assert_allclose(z["share"].to_numpy(), 0.25, rtol=0, atol=1e-15)  # 1 / n active children
    assert z["share"].sum() == pytest.approx(1.0, abs=1e-12)

    # the other parents are untouched by the zero one and still equal the library
    others = our_shares(shares)
    keep = ~((others.index.get_level_values("product") == "P2") & (others.index.get_level_values("site") == "S1"))
    np.testing.assert_allclose(others[keep].to_numpy(), ref[keep].to_numpy(), rtol=0, atol=TOL)
    assert np.isfinite(ref[keep].to_numpy()).all()


@pytest.mark.parametrize("window", [1, 5, 8])
@pytest.mark.parametrize(("method", "td_method"), METHODS)
def test_window_shorter_than_history_equals_reference_on_last_w_periods(method, td_method, window):
    history = make_history(seed=17)
    shares = compute_shares(history, children_of(history), config(method, window=window), CYCLE)
    assert (shares["window_used"] == window).all()
    assert (pd.DatetimeIndex(shares["window_start"]) == WEEKS[-window]).all()
    last = history[history["period_start"] >= WEEKS[-window]]
    # reference: hierarchicalforecast 1.5.3 MiddleOut(..., top_down_method=td_method) given only the last w periods
    expected = implied_shares(reference_split(last, constant_parent_forecast(lambda p, s, h: 1.0), td_method))
    np.testing.assert_allclose(our_shares(shares).to_numpy(), expected.to_numpy(), rtol=0, atol=TOL)
    # and a window that is too long would give different shares: the window matters
    full = implied_shares(reference_split(history, constant_parent_forecast(lambda p, s, h: 1.0), td_method))
    assert np.abs(full.to_numpy() - our_shares(shares).to_numpy()).max() > 1e-4


@pytest.mark.parametrize(("method", "td_method"), METHODS)
def test_longer_window_fallback_equals_reference_on_that_window(method, td_method):
    history = make_history(seed=19)
    quiet = (history["product"] == "P1") & (history["site"] == "S2") & (history["period_start"] >= WEEKS[-4])
    history.loc[quiet, "quantity"] = 0.0  # P1/S2 has no volume in the last 4 weeks
    shares = compute_shares(history, children_of(history), config(method, window=4, fallback_windows=[N_WEEKS]), CYCLE)
    is_quiet = (shares["product"] == "P1") & (shares["site"] == "S2")
    assert (shares.loc[is_quiet, "fallback"] == "longer_window").all()
    assert (shares.loc[is_quiet, "window_used"] == N_WEEKS).all()
    assert (shares.loc[~is_quiet, "fallback"] == "none").all()

    one = constant_parent_forecast(lambda p, s, h: 1.0)
    # reference: hierarchicalforecast 1.5.3 MiddleOut(..., top_down_method=td_method), on 12 and on 4 periods
    ref12 = implied_shares(reference_split(history, one, td_method))
    ref4 = implied_shares(reference_split(history[history["period_start"] >= WEEKS[-4]], one, td_method))
    got = our_shares(shares)
    mask = ((got.index.get_level_values("product") == "P1") & (got.index.get_level_values("site") == "S2"))
    np.testing.assert_allclose(got[mask].to_numpy(), ref12[mask].to_numpy(), rtol=0, atol=TOL)
    np.testing.assert_allclose(got[~mask].to_numpy(), ref4[~mask].to_numpy(), rtol=0, atol=TOL)
    assert not np.isfinite(ref4[mask].to_numpy()).any()  # the library has no answer on the short window


@pytest.mark.parametrize(("method", "td_method"), METHODS)
def test_periods_without_parent_volume_inside_the_window(method, td_method):
    """Some weeks have no volume for a parent (and single children are 0 in others).

    hierarchicalforecast's average_proportions takes nanmean of y/Y, so a 0/0 week drops out;
    our mean_of_ratios leaves out weeks with Y_t = 0. pooled is unaffected by the rule.
    """
    history = make_history(seed=23)
    p2 = (history["product"] == "P2") & (history["site"] == "S1")
    history.loc[p2 & history["period_start"].isin(WEEKS[[2, 7]]), "quantity"] = 0.0
    history.loc[p2 & (history["customer"] == "C3") & history["period_start"].isin(WEEKS[[0, 4, 5]]), "quantity"] = 0.0
    history.loc[(history["customer"] == "C1") & (history["period_start"] == WEEKS[-1]), "quantity"] = 0.0
    shares = compute_shares(history, children_of(history), config(method), CYCLE)
    # reference: hierarchicalforecast 1.5.3 MiddleOut(..., top_down_method=td_method)
    expected = implied_shares(reference_split(history, constant_parent_forecast(lambda p, s, h: 1.0), td_method))
    got = our_shares(shares)
    np.testing.assert_allclose(got.to_numpy(), expected.to_numpy(), rtol=0, atol=TOL)
    sums = shares.groupby(["product", "site"])["share"].sum()
    np.testing.assert_allclose(sums.to_numpy(), 1.0, rtol=0, atol=1e-12)


def test_pooled_shares_renormalised_after_a_phase_out_equal_middle_out_on_the_remaining_children():
    """A child that phases out mid-horizon: the others' renormalised pooled shares are the library's
    proportion_averages over a hierarchy without that child.

    pooled: p_j / sum_{k active} p_k = sum_t y_{j,t} / sum_{k active} sum_t y_{k,t}, which is exactly
    proportion_averages with the leaving child left out of the history. (mean_of_ratios has no such
    identity: its proportions are taken against the whole parent, so it has no outside reference here.)
    """
    history = make_history(seed=29)
    cfg = config("pooled")
    children = children_of(history)
    leaving = children["customer"] == "C1"  # one customer of every parent ends after the second horizon period
    children["first_active_period"] = HORIZON_STARTS[0]
    children["last_active_period"] = np.where(leaving, HORIZON_STARTS[1], HORIZON_STARTS[-1])
    shares = compute_shares(history, children, cfg, CYCLE)
    target = reinitialize_target(shares, history, cfg, CYCLE)
    late = target[target["period_start"] == HORIZON_STARTS[2]].set_index(LEAF)["share"].sort_index()
    assert (late.xs("C1", level="customer") == 0).all()
    remaining = history[history["customer"] != "C1"]
    # reference: hierarchicalforecast 1.5.3 MiddleOut(..., top_down_method="proportion_averages") on the history
    # of the remaining children only
    expected = implied_shares(
        reference_split(remaining, constant_parent_forecast(lambda p, s, h: 1.0), "proportion_averages")
    )
    got = late[late.index.get_level_values("customer") != "C1"]
    assert list(got.index) == list(expected.index)
    np.testing.assert_allclose(got.to_numpy(), expected.to_numpy(), rtol=0, atol=TOL)
    # and before the phase-out the shares are still the full-hierarchy ones, which differ
    early = target[target["period_start"] == HORIZON_STARTS[0]].set_index(LEAF)["share"].sort_index()
    full = implied_shares(
        reference_split(history, constant_parent_forecast(lambda p, s, h: 1.0), "proportion_averages")
    )
    np.testing.assert_allclose(early.to_numpy(), full.to_numpy(), rtol=0, atol=TOL)
    assert np.abs(early[got.index].to_numpy() - got.to_numpy()).max() > 1e-3
