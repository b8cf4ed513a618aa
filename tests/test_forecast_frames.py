"""`forecast_frames`: the leaves' basis column and its rows per basis, against pandas' `value_counts` of the column."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipelines.engines.forecast_frames import basis_column

LABELS = np.array(["reinitialized_target", "period_share"], dtype=object)
SOURCES = np.array(["basis", "children_forecast", "leaf_forecast", "reconciled"], dtype=object)


def test_basis_by_hand():
    source = np.array([["basis", "basis"], ["leaf_forecast", "basis"]], dtype=object)
    use_target = np.array([[True, False], [True, True]])
    basis, rows = basis_column(source, use_target, LABELS)
    # split leaves: the target where use_target, else the period's share; the others keep their source
    assert basis.tolist() == [["reinitialized_target", "period_share"], ["leaf_forecast", "reinitialized_target"]]
    assert rows.to_dict("list") == {"basis": ["leaf_forecast", "period_share", "reinitialized_target"], "rows": [1, 1, 2]}


@pytest.mark.parametrize("n_children", [0, 1, 7, 300])
def test_rows_per_basis_are_value_counts_of_the_column(n_children):
    rng = np.random.default_rng(n_children)
    for _ in range(20):
        kinds = SOURCES[: int(rng.integers(1, len(SOURCES) + 1))]
        source = rng.choice(kinds, (n_children, 5)).astype(object)
        use_target = rng.random((n_children, 5)) < rng.random()
        basis, rows = basis_column(source, use_target, LABELS)
        expected = np.where(source == "basis", LABELS[np.where(use_target, 0, 1)], source)
        assert np.array_equal(basis, expected)
        counted = pd.Series(basis.ravel(), name="basis").value_counts().sort_index().rename("rows").reset_index()
        pd.testing.assert_frame_equal(rows, counted, check_exact=True)
