"""statsforecast imported without dask.dataframe (pipelines/engines/statsforecast_lib.py).

Each case runs in a fresh interpreter, since what it checks is what a process
imports. The reference for "dask.dataframe would be imported otherwise" is
statsforecast itself: a plain `import statsforecast` in a fresh process.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _fresh(code: str) -> dict:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env, capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


LOADED = (
    "import json, sys; print(json.dumps({'dask_dataframe': 'dask.dataframe' in sys.modules, "
    "'marked': sys.modules.get('dask.dataframe', 0) is None, 'statsforecast': 'statsforecast' in sys.modules}))"
)


def test_plain_statsforecast_imports_dask_dataframe_where_dask_is_installed():
    pytest.importorskip("dask.dataframe")
    seen = _fresh("import statsforecast; " + LOADED)
    assert seen["dask_dataframe"], "the reference: utilsforecast imports dask.dataframe whenever it can"


def test_the_model_engine_imports_statsforecast_without_dask_dataframe_and_leaves_no_mark():
    seen = _fresh("import pipelines.engines.models; " + LOADED)
    assert seen["statsforecast"]
    assert not seen["dask_dataframe"], "dask.dataframe was imported with statsforecast"
    assert not seen["marked"], "the None left in sys.modules would make every later import of dask.dataframe fail"


def test_dask_dataframe_imports_as_usual_afterwards():
    pytest.importorskip("dask.dataframe")
    seen = _fresh(
        "import pipelines.engines.models, dask.dataframe, json; "
        "print(json.dumps({'frame': dask.dataframe.DataFrame.__name__}))"
    )
    assert seen["frame"] == "DataFrame"


def test_an_already_imported_dask_dataframe_is_left_alone():
    pytest.importorskip("dask.dataframe")
    seen = _fresh("import dask.dataframe; import pipelines.engines.models; " + LOADED)
    assert seen["dask_dataframe"] and not seen["marked"]


def test_the_names_are_statsforecasts_own():
    import statsforecast
    from statsforecast import models

    from pipelines.engines.statsforecast_lib import StatsForecast, sfm

    assert StatsForecast is statsforecast.StatsForecast
    assert sfm is models
