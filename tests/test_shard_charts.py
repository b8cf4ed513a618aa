"""A sharded class's charts drawn from each shard reduced on its own are the charts drawn from the whole class.

Reference: the charts themselves (pipelines/engines/report_charts.py) drawn from the class's four tables read
whole, every shard's rows one after another, as the cycle page drew them before (ids dropped: each shard numbers
its own). Compared are the figures' artists, not PNG bytes: every line's x and y, every bar's corners, every
title, legend and caption text, tick label and axes' place, to the last bit.

The fixture: one class in three shards, each numbering its parents and leaves from 0; quantities with cents
(pandas' compensated group sum, not the exact sum of whole numbers) or whole; recorded shortages; parents with
history but no forecast, a parent with a target one period longer than the others, and two parents in
different shards tied on both volumes, so the key decides between them at the edge of the panels drawn.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from pipelines.engines import report_charts
from pipelines.engines.chart_base import figure_png
from pipelines.keys import LEAF_ID, PARENT_ID
from pipelines.shard_charts import PARENT_PANELS, SHARE_PANELS, class_frames, read_class_frames, reduce_shard

CYCLE = pd.Timestamp("2026-02-02")
NAME = "parts"
HISTORY = pd.date_range(CYCLE - pd.Timedelta(weeks=12), periods=13, freq="7D")  # the last at the cycle date: left out
HORIZON = pd.date_range(CYCLE, periods=4, freq="7D")
WHERE = {"product_class": NAME, "cycle_date": CYCLE, "period": "week"}


def shard_tables(seed: int, parents: int, whole: bool, weight: float) -> dict[str, pd.DataFrame]:
    """One shard's lifecycle_history, parent_forecast, reinitialized_target and share_tables; parent and leaf ids
    from 0; the parents' products named by the seed so no parent is in two shards; volumes about `weight` x."""
    rng = np.random.default_rng(seed)
    hist, fc, tgt, shares, leaf = [], [], [], [], 0
    for p in range(parents):
        product, site = f"P{seed}-{p:02d}", f"S{p % 3}"
        customers = int(rng.integers(1, 8))
        scale = float(rng.choice([1.0, 10.0, 200.0])) * weight
        horizon = HORIZON
        if p == parents - 1:  # the shard's smallest parent, not drawn, has the class's last horizon period
            horizon, scale = HORIZON.append(HORIZON[-1:] + pd.Timedelta(weeks=1)), 0.01
        for c in range(customers):
            q = rng.gamma(1.5, scale, len(HISTORY)) * (rng.random(len(HISTORY)) < 0.8)
            q = np.round(q) if whole else np.round(q, 2)
            hist.append(pd.DataFrame({
                "product": product, "site": site, "customer": f"C{c}", "period_start": HISTORY, "quantity": q,
                "shortage": rng.random(len(HISTORY)) < 0.03, LEAF_ID: leaf, PARENT_ID: p,
            }))
            share = rng.dirichlet(np.ones(customers))[c]
            tgt.append(pd.DataFrame({
                "product": product, "site": site, "customer": f"C{c}", "period_start": horizon,
                "target": np.round(share * rng.gamma(2.0, scale, len(horizon)), 3), "share": share,
                LEAF_ID: leaf, PARENT_ID: p,
            }))
            shares.append({"product": product, "site": site, "customer": f"C{c}", "window_used": int(p % 4 != 1),
                           "window_start": HISTORY[p % 5], "share": share, LEAF_ID: leaf, PARENT_ID: p})
            leaf += 1
        if p % 7 != 3:  # every seventh parent has history but no forecast
            f = rng.gamma(2.0, scale * customers, len(HORIZON))
            fc.append(pd.DataFrame({
                "product_class": NAME, "product": product, "site": site, "period_start": HORIZON, "forecast": f,
                "lower_80": f * 0.8, "upper_80": f * 1.2, "lower_95": f * 0.6, "upper_95": f * 1.4,
                "model": "ses", PARENT_ID: p,
            }))
    return {"history": pd.concat(hist, ignore_index=True), "forecast": pd.concat(fc, ignore_index=True),
            "target": pd.concat(tgt, ignore_index=True), "shares": pd.DataFrame(shares)}


def class_shards(whole: bool) -> list[dict[str, pd.DataFrame]]:
    # most of the largest parents in the second shard: the class's panels are not its shards' largest alike
    shards = [shard_tables(seed, parents, whole, weight) for seed, parents, weight in ((11, 9, 1.0), (12, 14, 5.0),
                                                                                      (13, 6, 1.0))]
    # a tie on both volumes across shards at the edge of the share chart's panels: shard 1's parent 0 scaled to
    # just under shard 2's third largest and copied into shard 2 as `P10-tie` (its key first), so the
    # four parents drawn are all shard 2's, the fourth by its key
    one, two = shards[0], shards[1]
    before = two["history"][two["history"]["period_start"] < CYCLE]
    volume = before.groupby(PARENT_ID)["quantity"].sum().drop(0).sort_values(ascending=False)
    mine = one["history"][PARENT_ID] == 0
    now = mine & (one["history"]["period_start"] < CYCLE)
    factor = 0.99 * volume.iloc[2] / one["history"].loc[now, "quantity"].sum()
    one["history"].loc[mine, "quantity"] = np.round(one["history"].loc[mine, "quantity"] * factor, 0 if whole else 2)
    for table in ("history", "target", "forecast", "shares"):
        copy = one[table][one[table][PARENT_ID] == 0].assign(product="P10-tie")
        two[table] = pd.concat([copy, two[table][two[table][PARENT_ID] != 0]], ignore_index=True)
    return shards


def artists(fig) -> dict:
    """Everything the figure draws, read back from its artists after a draw."""
    figure_png(fig)
    out = {"size": tuple(fig.get_size_inches()), "title": fig._suptitle.get_text(),
           "texts": [t.get_text() for t in fig.texts], "axes": []}
    for ax in fig.axes:
        legend = ax.get_legend()
        out["axes"].append({
            "title": ax.get_title(loc="left"), "place": ax.get_position().bounds, "xlim": ax.get_xlim(),
            "ylim": ax.get_ylim(), "legend": [t.get_text() for t in legend.get_texts()] if legend else [],
            "ticks": [t.get_text() for t in ax.get_xticklabels() + ax.get_yticklabels()],
            "patches": [(p.get_label(), p.get_path().vertices.tolist(), p.get_transform().transform(
                p.get_path().vertices).tolist()) for p in ax.patches],
            "lines": [(ln.get_label(), ln.get_xdata(orig=False).tolist(), ln.get_ydata(orig=False).tolist())
                      for ln in ax.get_lines()],
            "collections": [(c.get_label(), [p.vertices.tolist() for p in c.get_paths()],
                             np.asarray(c.get_facecolor()).tolist()) for c in ax.collections],
        })
    return out


def whole_class_figures(shards: list[dict[str, pd.DataFrame]]) -> list[dict]:
    """The reference: the charts of the class's tables read whole, as the cycle page drew them before."""
    tables = {t: pd.concat([s[t] for s in shards], ignore_index=True).drop(columns=[LEAF_ID, PARENT_ID],
                                                                            errors="ignore") for t in shards[0]}
    return [
        artists(report_charts.parent_chart_figure(tables["history"], tables["forecast"], **WHERE)),
        artists(report_charts.share_chart_figure(tables["history"], tables["target"], shares=tables["shares"],
                                                 **WHERE)),
    ]


def reduced_figures(frames) -> list[dict]:
    return [
        artists(report_charts.parent_chart_figure(frames.history_sums, frames.forecast, top_parents=PARENT_PANELS,
                                                  **WHERE)),
        artists(report_charts.share_chart_figure(frames.share_history, frames.target, shares=frames.shares,
                                                 top_parents=SHARE_PANELS, **WHERE)),
    ]


def as_stored(shard: dict[str, pd.DataFrame]) -> dict[str, object]:
    """A shard's tables as `read_shard` gives them: Arrow but the forecast."""
    return {k: v if k == "forecast" else pa.Table.from_pandas(v, preserve_index=False) for k, v in shard.items()}


def assert_same_figures(found: list[dict], expected: list[dict]) -> None:
    for kind, one, other in zip(("parent chart", "share chart"), found, expected, strict=True):
        assert one == other, kind  # exact: floats compared bit for bit (no NaN in the drawn data)


@pytest.mark.parametrize("whole", [False, True], ids=["cents", "whole_numbers"])
def test_the_class_reduced_shard_by_shard_draws_what_the_whole_class_draws(whole):
    shards = class_shards(whole)
    expected = whole_class_figures(shards)
    frames = class_frames([reduce_shard(**as_stored(s), product_class=NAME, cycle_date=CYCLE)
                           for s in shards])
    assert_same_figures(reduced_figures(frames), expected)
    # what was kept: one history row per parent and period drawn, every parent of the share chart ranked, leaf
    # rows of at most SHARE_PANELS parents a shard
    parents = sum(s["target"][PARENT_ID].nunique() for s in shards)
    assert frames.target[["product", "site"]].drop_duplicates().shape[0] == parents
    assert frames.target.groupby(["product", "site"]).size().gt(1).sum() <= SHARE_PANELS * len(shards)
    assert len(frames.history_sums) < sum(len(s["history"]) for s in shards) / 3
    # the four drawn are the second shard's, the tie won by the key; the longest horizon a parent's not drawn
    titles = [ax["title"].split(" x ")[0] for ax in expected[1]["axes"]]
    assert [t[:3] for t in titles[:3]] == ["P12"] * 3 and titles[3] == "P10-tie"
    assert "largest first): P11-00 x S0, " in expected[1]["texts"][1].replace("\n", " ")
    assert frames.target["period_start"].max() not in set(frames.target.query("customer != ''")["period_start"])


def test_a_shard_without_ids_is_reduced_by_its_text_keys():
    shards = class_shards(False)
    expected = whole_class_figures(shards)
    plain = {k: v.drop(columns=[PARENT_ID]) for k, v in shards[2].items()}  # written before the ids
    reduced = [reduce_shard(**as_stored(s), product_class=NAME, cycle_date=CYCLE)
               for s in [*shards[:2], plain]]
    frames = class_frames(reduced)
    assert PARENT_ID not in frames.history_sums.columns
    assert_same_figures(reduced_figures(frames), expected)


def test_the_published_shards_read_one_at_a_time_give_the_whole_class_charts(tmp_path):
    from pipelines.store import open_store

    store, cycle = open_store(tmp_path / "store"), f"{CYCLE:%Y-%m-%d}"
    shards = class_shards(False)
    names = {"history": "lifecycle_history", "forecast": "parent_forecast", "target": "reinitialized_target",
             "shares": "share_tables"}
    recorded: dict[str, dict] = {}
    for i, shard in enumerate(shards):
        for key, table in names.items():
            recorded.setdefault(table, {})[f"{i + 1}of3"] = store.write(table, cycle, NAME, shard[key],
                                                                      shard=f"{i + 1}of3", run_id="r")
    # not published yet: nothing is read
    store.complete_class(cycle, NAME, recorded, run_id="r", classes=[NAME, "other"])
    assert read_class_frames(store.root, cycle, NAME) is None
    store.complete_class(cycle, "other", {}, run_id="r", classes=[NAME, "other"])
    frames = read_class_frames(store.root, cycle, NAME)
    assert_same_figures(reduced_figures(frames), whole_class_figures(shards))
