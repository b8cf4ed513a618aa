"""statsforecast as the model engines import it: without `dask.dataframe`, which nothing here uses.

statsforecast imports utilsforecast, whose `compat` module tries
`from dask.dataframe import DataFrame` only to name that type in its hints
(`except ModuleNotFoundError: pass`). Where dask is installed (the `dask`
model engine needs it) that import builds dask's dataframe and array
modules: about 0.4 s of cpu at every start of the command line, of the
pool's forkserver and of `dagster dev`'s code server, for a type no frame
here ever has (benchmarks/README.md, *One class through the command line:
imports*). The models are fitted on pandas frames only
(`pipelines/engines/models.py`); a Dask cluster gets them in chunks through
`distributed`, never as a dask dataframe (`pipelines/engines/model_engine.py`).

`import_statsforecast` marks `dask.dataframe` absent while statsforecast is
first imported (a `None` in `sys.modules`: Python's documented way to make
an import raise ModuleNotFoundError, docs.python.org/3/reference/import.html#the-module-cache)
and removes the mark at once, so a later `import dask.dataframe` anywhere in
the process works as usual. When dask.dataframe is already imported, or
statsforecast already is, nothing is changed.
"""

from __future__ import annotations

import sys
from types import ModuleType

SKIPPED = "dask.dataframe"


def import_statsforecast() -> tuple[type, ModuleType]:
    """(statsforecast.StatsForecast, statsforecast.models), statsforecast imported without dask.dataframe."""
    mark = SKIPPED not in sys.modules and "statsforecast" not in sys.modules
    if mark:
        sys.modules[SKIPPED] = None  # type: ignore[assignment]  # the import of it raises ModuleNotFoundError
    try:
        from statsforecast import StatsForecast, models
    finally:
        if mark and sys.modules.get(SKIPPED, ModuleType(SKIPPED)) is None:
            del sys.modules[SKIPPED]
    return StatsForecast, models


StatsForecast, sfm = import_statsforecast()
