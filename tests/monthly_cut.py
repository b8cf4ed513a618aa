"""A monthly cut of the demo: a few products of each class, their history summed to months, in a folder of its own.

The demo ships weekly files; `config/planning.monthly.yaml` wants months. The
cut keeps the first `per_class` products of each class (small and quick),
sums their history per product x site x customer x month, keeps complete
months only (the demo's last line is dated before November ends), maps the
adjustments and shortages to their month (a price: the month's first; units:
the month's sum) and leaves the pins out (they pin weekly values). The demo's
planted bad history lines (unreadable dates or quantities, blank keys) are
dropped here: the weekly tests hold them; this cut is about the calendar.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import yaml

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "data" / "demo"
KEYS = ["product", "site", "customer"]


def _month(values: pd.Series) -> pd.Series:
    return pd.to_datetime(values, errors="coerce", format="%Y-%m-%d").dt.to_period("M").dt.to_timestamp()


def monthly_cut(out: Path, per_class: int = 2) -> Path:
    """Write the cut to `out`; the folder."""
    out.mkdir(parents=True, exist_ok=True)
    products = pd.read_csv(DEMO / "products.csv", dtype=str, keep_default_na=False)
    products = products.groupby("product_class", sort=False).head(per_class)
    keep = set(products["product"])
    products.to_csv(out / "products.csv", index=False)

    history = pd.read_csv(DEMO / "history.csv", dtype=str, keep_default_na=False)
    history = history[history["product"].isin(keep)].copy()
    last_day = pd.to_datetime(history["period_start"], errors="coerce", format="%Y-%m-%d").max()
    history["month"] = _month(history["period_start"])
    history["quantity"] = pd.to_numeric(history["quantity"], errors="coerce")
    usable = history["month"].notna() & history["quantity"].notna() & (history[KEYS] != "").all(axis=1)
    # complete months only: a month whose last day comes after the last dated line (28 Nov 2026) is left out
    usable &= history["month"] + pd.offsets.MonthEnd(0) <= last_day
    monthly = history[usable].groupby(KEYS + ["month"], as_index=False)["quantity"].sum()
    monthly["period_start"] = monthly["month"].dt.strftime("%Y-%m-%d")
    monthly[KEYS + ["period_start", "quantity"]].to_csv(out / "history.csv", index=False)

    spans = pd.read_csv(DEMO / "customer_spans.csv", dtype=str, keep_default_na=False)
    spans[spans["product"].isin(keep)].to_csv(out / "customer_spans.csv", index=False)

    adjustments = pd.read_csv(DEMO / "adjustments.csv", dtype=str, keep_default_na=False)
    adjustments = adjustments[adjustments["product"].isin(keep)].copy()
    adjustments["period_start"] = _month(adjustments["period_start"]).dt.strftime("%Y-%m-%d")
    adjustments["value"] = pd.to_numeric(adjustments["value"])
    by = ["measure", "product", "site", "period_start"]
    price = adjustments["measure"] == "list_price"
    adjustments = pd.concat(
        [
            adjustments[price].groupby(by, as_index=False)["value"].first(),
            adjustments[~price].groupby(by, as_index=False)["value"].sum(),
        ]
    )
    adjustments.to_csv(out / "adjustments.csv", index=False)

    shortages = pd.read_csv(DEMO / "shortages.csv", dtype=str, keep_default_na=False)
    shortages = shortages[shortages["product"].isin(keep)].copy()
    shortages["period_start"] = _month(shortages["period_start"]).dt.strftime("%Y-%m-%d")
    shortages.drop_duplicates().to_csv(out / "shortages.csv", index=False)
    return out


def monthly_config(tmp: Path, inputs: Path) -> Path:
    """config/planning.monthly.yaml with its folder and store moved under `tmp`; the path."""
    data = yaml.safe_load((ROOT / "config" / "planning.monthly.yaml").read_text())
    data["inputs"]["folder"] = str(inputs)
    data["store"]["path"] = str(tmp / "store")
    path = tmp / "planning.monthly.yaml"
    path.write_text(yaml.safe_dump(data))
    return path
