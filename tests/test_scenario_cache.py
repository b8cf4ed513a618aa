"""The cycle benchmark's scenario cache: written once, read back cell for cell, keyed by its parameters."""

import sys
from pathlib import Path

import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

from cycle_scenario import generate  # noqa: E402
from scenario_cache import cached, scenario_key  # noqa: E402


def test_cached_scenario_is_the_generated_one_and_is_read_the_second_time(tmp_path):
    first, read_first = cached(300, 7, 60, 8, tmp_path)
    again, read_again = cached(300, 7, 60, 8, tmp_path)
    fresh = generate(300, 7, 60, None, 8)  # the reference: the generator itself, no cache
    assert (read_first, read_again) == (False, True)
    for name in ("raw", "products", "spans", "shortages", "adjustments", "pins"):
        pd.testing.assert_frame_equal(getattr(again, name), getattr(fresh, name), check_exact=True, obj=name)
    assert again.facts == fresh.facts and again.lines == fresh.lines == len(fresh.raw)
    # another seed or size is another folder, never the cached one
    assert scenario_key(300, 8, 60, 8) != scenario_key(300, 7, 60, 8) != scenario_key(301, 7, 60, 8)
    assert len(list(tmp_path.iterdir())) == 1
