"""Levels above the parent in the cycle: MinT over total > product > parent > leaf, their table and its check.

Outside reference: hierarchicalforecast 1.5.3 `MinTrace` (`mint_shrink`, `wls_var`; Wickramasuriya,
Athanasopoulos & Hyndman 2019) over the same tree, fed with base forecasts and in-sample fitted values
that statsforecast's CrostonClassic makes for every node's series outside the project (a node's series is
the weekly sum of its leaves'). The cycle must give the same reconciled parents, leaves and upper nodes,
to 1e-7 relative.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from test_statistical_forecast import CROSTON, CYCLE, H1, H2, MINT_WEEKS, targets

from pipelines.engines.upper_levels import upper_level_checks
from pipelines.errors import ConfigError
from pipelines.schemas_forecast import ParentForecast, StatisticalForecast, UpperLevelForecast
from pipelines.stages.statistical_forecast import forecast_cycle

# product P1 at two sites, P2 at one; every series has demand in its first week
SERIES = {
    ("P1", "S1", "C1"): [10, 12, 9, 11, 10, 13, 9, 10, 12, 11, 10, 9],
    ("P1", "S1", "C2"): [3, 0, 0, 6, 0, 2, 0, 0, 5, 0, 0, 1],
    ("P1", "S2", "C1"): [5, 7, 4, 6, 8, 5, 6, 7, 5, 6, 4, 7],
    ("P1", "S2", "C3"): [2, 2, 0, 9, 1, 0, 0, 8, 2, 0, 1, 0],
    ("P2", "S1", "C1"): [8, 6, 9, 7, 8, 9, 6, 8, 7, 9, 8, 6],
    ("P2", "S1", "C4"): [1, 0, 4, 0, 0, 0, 7, 0, 0, 3, 0, 0],
}
LEVELS = ["product", "total"]


def _reference(method: str):
    """{node: reconciled values over the 2 horizon weeks}: statsforecast base forecasts, hierarchicalforecast MinT."""
    from hierarchicalforecast.methods import MinTrace
    from statsforecast import StatsForecast
    from statsforecast.models import CrostonClassic

    leaves = list(SERIES)
    parents = sorted({(p, s) for p, s, _ in leaves})
    products = sorted({p for p, _ in parents})
    rows = [("total",)] + [("product", p) for p in products] + [("parent", p, s) for p, s in parents]
    rows += [("leaf",) + k for k in leaves]
    s_mat = np.zeros((len(rows), len(leaves)))
    for j, (p, s, c) in enumerate(leaves):
        for i, r in enumerate(rows):
            s_mat[i, j] = r == ("total",) or r == ("product", p) or r == ("parent", p, s) or r == ("leaf", p, s, c)
    y = s_mat @ np.array([SERIES[k] for k in leaves], dtype=float)
    frame = pd.DataFrame({"unique_id": np.repeat(np.arange(len(rows)), 12), "ds": np.tile(MINT_WEEKS, len(rows)),
                          "y": y.ravel()})
    sf = StatsForecast(models=[CrostonClassic()], freq="W-MON")
    base = sf.forecast(df=frame, h=2, fitted=True).sort_values(["unique_id", "ds"])
    fitted = sf.forecast_fitted_values().sort_values(["unique_id", "ds"])
    y_hat = base["CrostonClassic"].to_numpy().reshape(len(rows), 2)
    residuals = np.nan_to_num(y - fitted["CrostonClassic"].to_numpy().reshape(len(rows), 12))
    rec = MinTrace(method=method).fit_predict(
        S=s_mat, y_hat=y_hat, y_insample=residuals, y_hat_insample=np.zeros_like(residuals)
    )["mean"]
    return dict(zip(rows, rec, strict=True)), dict(zip(rows, y_hat, strict=True))


def _cycle(make_history, make_children, make_config, strategy, levels=LEVELS, products=None):
    history = make_history(
        [(p, s, c, str(w.date()), q) for (p, s, c), qs in SERIES.items() for w, q in zip(MINT_WEEKS, qs, strict=True)]
    )
    children = make_children(list(SERIES))
    tg = targets([(p, s, c, h, 1.0) for (p, s, c) in SERIES for h in (H1, H2)])
    config = make_config(
        {"a": {"window": 12, "strategy": strategy, "models": CROSTON}}, calendar={"horizon": 2},
        hierarchy={"upper_levels": levels},
    )
    return forecast_cycle(history, children, tg, config, CYCLE, products=products)


@pytest.mark.parametrize("method", ["mint_shrink", "wls_var"])
def test_mint_over_the_upper_levels_equals_hierarchicalforecast(method, make_history, make_children, make_config):
    res = _cycle(make_history, make_children, make_config, method)
    expected, base = _reference(method)
    assert max(np.abs(expected[k] - base[k]).max() for k in expected) > 0.05  # a real reconciliation
    assert all((v >= 0).all() for v in expected.values()) and res.redistributed.empty
    upper = res.upper.sort_values(["level", "node", "period_start"])
    for key, values in expected.items():
        if key[0] == "total":
            got = upper[upper["level"] == "total"]["strategy_forecast"]
        elif key[0] == "product":
            got = upper[(upper["level"] == "product") & (upper["node"] == key[1])]["strategy_forecast"]
        elif key[0] == "parent":
            rows = res.parent[(res.parent["product"] == key[1]) & (res.parent["site"] == key[2])]
            got = rows.sort_values("period_start")["strategy_forecast"]
        else:
            leaf = res.leaf
            rows = leaf[(leaf["product"] == key[1]) & (leaf["site"] == key[2]) & (leaf["customer"] == key[3])]
            got = rows.sort_values("period_start")["forecast"]
        np.testing.assert_allclose(got.to_numpy(float), values, rtol=1e-7, err_msg=str(key))
        if key[0] in ("total", "product"):  # each node's own base forecast is stored beside it
            node = upper[upper["level"] == key[0]]
            node = node[node["node"] == (key[1] if key[0] == "product" else "a")]
            np.testing.assert_allclose(node["base_forecast"].to_numpy(float), base[key], rtol=1e-7)
    UpperLevelForecast.validate(res.upper)
    ParentForecast.validate(res.parent)
    StatisticalForecast.validate(res.leaf)


def test_a_split_class_stores_its_levels_as_sums_and_the_check_names_a_broken_node(
    make_history, make_children, make_config
):
    res = _cycle(make_history, make_children, make_config, "top_down")
    products = pd.DataFrame({"product": ["P1", "P2"], "product_class": "a"})
    assert upper_level_checks(res.upper, res.parent, products, tuple(LEVELS))["upper_levels_coherent"].rows.empty
    p1 = res.parent[res.parent["product"] == "P1"].groupby("period_start")["forecast"].sum()
    mine = res.upper[(res.upper["level"] == "product") & (res.upper["node"] == "P1")].set_index("period_start")
    np.testing.assert_allclose(mine["forecast"].to_numpy(), p1.to_numpy(), rtol=1e-12)
    assert (res.upper[res.upper["level"] == "total"]["parent_node"] == "").all()
    broken = res.upper.copy()
    row = broken.index[(broken["level"] == "product") & (broken["node"] == "P2")][0]
    broken.loc[row, "forecast"] += 1.0
    failing = upper_level_checks(broken, res.parent, products, tuple(LEVELS))["upper_levels_coherent"].rows
    # P2 no longer equals its parents, and the total no longer equals its products
    assert set(zip(failing["level"], failing["node"], strict=True)) == {("product", "P2"), ("total", "a")}


def test_a_products_column_level_and_one_that_does_not_nest(make_history, make_children, make_config):
    products = pd.DataFrame({"product": ["P1", "P2"], "product_class": "a", "product_family": ["f1", "f1"]})
    res = _cycle(make_history, make_children, make_config, "bottom_up", ["product", "product_family"], products)
    fam = res.upper[res.upper["level"] == "product_family"]
    assert set(fam["node"]) == {"f1"} and set(res.upper[res.upper["level"] == "product"]["parent_node"]) == {"f1"}
    with pytest.raises(ConfigError, match="product_colour.*neither"):
        _cycle(make_history, make_children, make_config, "bottom_up", ["product_colour"], products)
    # two product columns where the second does not group the first: P1 and P2 share family f1 but not line
    crossed = products.assign(product_family=["f1", "f2"], product_line=["l1", "l1"])
    crossed.loc[1, "product_family"] = "f1"
    crossed["product_line"] = ["l1", "l2"]
    with pytest.raises(ConfigError, match="'product_line' does not nest in the level below \\(product_family\\)"):
        _cycle(make_history, make_children, make_config, "bottom_up", ["product_family", "product_line"], crossed)
