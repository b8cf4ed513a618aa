"""How the cycle benchmark measures a step: wall time, time inside statsforecast, Python heap peak, RSS.

See benchmarks/cycle.py for each column and why the heap is measured in a traced rerun in a forked child."""

from __future__ import annotations

import gc
import json
import os
import resource
import subprocess
import sys
import threading
import time
import tracemalloc
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import statsforecast
from statsforecast import models as sfm

from pipelines.config import PlanningConfig
from pipelines.engines import models as M

ROOT = Path(__file__).resolve().parents[1]
MB = 1024 * 1024

# =================================================================== measuring
@dataclass
class Step:
    stage: str
    wall_s: float  # untraced run
    sf_s: float | None  # of wall_s, inside StatsForecast.forecast
    py_peak_mb: float | None  # tracemalloc: peak of the step's own allocations
    py_out_mb: float | None  # tracemalloc: what the step allocated and still held at its end (its output)
    rss_mb: float  # process RSS after the step
    rss_peak_mb: float  # process RSS peak during the step (sampled every few ms)
    rss_max_mb: float  # getrusage ru_maxrss after the step (process high-water mark)
    rows_in: int | None
    rows_out: int | None
    note: str = ""
    in_total: bool = True
    traced_wall_s: float | None = None  # wall time of the tracemalloc run


@dataclass
class SfCall:
    model: str
    series: int
    rows: int
    seconds: float


class RssSampler:
    """Background thread keeping the highest RSS seen since `reset()`."""

    def __init__(self, interval: float = 0.01):
        self.interval = interval
        self.peak = 0.0
        self._stop = threading.Event()
        if interval > 0:
            threading.Thread(target=self._loop, daemon=True).start()

    def _loop(self) -> None:
        while not self._stop.wait(self.interval):
            self.peak = max(self.peak, rss_now_mb())

    def reset(self) -> None:
        self.peak = rss_now_mb()

    def read(self) -> float:
        return max(self.peak, rss_now_mb())


@dataclass
class Bench:
    trace: str  # "rerun", "inline" or "off"
    steps: list[Step] = field(default_factory=list)
    sf_calls: list[SfCall] = field(default_factory=list)
    sf_seconds: float = 0.0
    sf_outputs: list | None = None  # recorded StatsForecast.forecast results of the timed run
    sf_replay: list | None = None  # replayed, in call order, in the traced rerun
    sample_ms: float = 10.0
    sampler: RssSampler = field(init=False)

    def __post_init__(self) -> None:
        self.sampler = RssSampler(self.sample_ms / 1000)

    def _traced_rerun(self, fn: Callable[[], Any]) -> tuple[float | None, float | None, float | None]:
        """The step again under tracemalloc, with statsforecast results replayed; (peak MB, out MB, wall s)."""
        self.sf_replay = list(self.sf_outputs) if self.sf_outputs else None
        try:
            res = _rerun_in_child(fn) if hasattr(os, "fork") else _traced(fn)
        finally:
            self.sf_replay = None
        if "error" in res:
            print(f"    (traced rerun failed: {res['error']})", flush=True)
            return None, None, None
        return res["peak"], res["out"], res["wall"]

    def run(
        self,
        stage: str,
        fn: Callable[[], Any],
        rows_in: int | None = None,
        rows_out: Callable[[Any], int] | None = None,
        note: Callable[[Any], str] | None = None,
        in_total: bool = True,
        sf: bool = False,
        trace: bool = True,
    ) -> Any:
        """Run `fn` untraced for its time and RSS, then (trace = rerun) once more under tracemalloc for its heap
        peak.
        """
        gc.collect()
        inline = self.trace == "inline" and tracemalloc.is_tracing()
        start_mem = tracemalloc.get_traced_memory()[0] if inline else 0
        if inline:
            tracemalloc.reset_peak()
        self.sampler.reset()
        sf_before, calls_before = self.sf_seconds, len(self.sf_calls)
        rerun = self.trace == "rerun" and trace
        self.sf_outputs = [] if rerun and sf else None
        t0 = time.perf_counter()
        out = fn()
        wall = time.perf_counter() - t0
        rss_peak = self.sampler.read()
        py_peak = py_out = traced_wall = None
        if inline:
            cur, peak = tracemalloc.get_traced_memory()
            py_peak, py_out = max(0, peak - start_mem) / MB, max(0, cur - start_mem) / MB
        elif rerun:
            py_peak, py_out, traced_wall = self._traced_rerun(fn)
        self.sf_outputs = None
        step = Step(
            stage=stage,
            wall_s=wall,
            sf_s=(self.sf_seconds - sf_before) if sf else None,
            py_peak_mb=py_peak,
            py_out_mb=py_out,
            rss_mb=rss_now_mb(),
            rss_peak_mb=rss_peak,
            rss_max_mb=rss_max_mb(),
            rows_in=rows_in,
            rows_out=rows_out(out) if rows_out else None,
            note=note(out) if note else "",
            in_total=in_total,
            traced_wall_s=traced_wall,
        )
        self.steps.append(step)
        print(format_row(step), flush=True)
        if sf:
            for call in self.sf_calls[calls_before:]:
                print(format_sf(call), flush=True)
        return out


def _traced(fn: Callable[[], Any]) -> dict:
    gc.collect()
    tracemalloc.start()
    t1 = time.perf_counter()
    again = fn()
    wall = time.perf_counter() - t1
    cur, peak = tracemalloc.get_traced_memory()
    del again
    tracemalloc.stop()
    return {"peak": peak / MB, "out": cur / MB, "wall": wall}


def _rerun_in_child(fn: Callable[[], Any]) -> dict:
    """Run `fn` under tracemalloc in a forked child, so the parent's RSS and ru_maxrss stay the cycle's own."""
    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:  # child: inherits every input copy-on-write
        code = 0
        try:
            os.close(r)
            payload = _traced(fn)
        except BaseException as err:  # report, never continue the cycle in the child
            payload, code = {"error": f"{type(err).__name__}: {err}"}, 1
        try:
            os.write(w, json.dumps(payload).encode())
        finally:
            os._exit(code)
    os.close(w)
    chunks = []
    while chunk := os.read(r, 65536):
        chunks.append(chunk)
    os.close(r)
    _, status = os.waitpid(pid, 0)
    if not chunks:
        return {"error": f"traced child ended without a result (wait status {status}; out of memory?)"}
    return json.loads(b"".join(chunks))


def rss_now_mb() -> float:
    try:
        pages = int(Path("/proc/self/statm").read_text().split()[1])
        return pages * resource.getpagesize() / MB
    except OSError:
        return float("nan")


def rss_max_mb() -> float:
    kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # kilobytes on Linux, bytes on macOS
    return kb / MB if sys.platform == "darwin" else kb / 1024


def patch_statsforecast(bench: Bench) -> None:
    """Time every StatsForecast fit / predict / forecast call in this process, and the pool's (`_timed_pool`).

    `make_model` is wrapped only to tag each model with its config name and season for the `sf` lines. In the
    traced rerun each call replays the timed run's result and object state, so statsforecast does not run twice.
    """
    original_make = M.make_model

    def tagged(name, season, *args, **kwargs):
        model = original_make(name, season, *args, **kwargs)
        try:
            model._bench_label = M.model_label(name, int(season))
        except AttributeError:
            pass
        return model

    M.make_model = tagged
    M.map_on_pool = _timed_pool(bench, M.map_on_pool)
    for method in ("fit", "predict", "forecast"):
        setattr(
            statsforecast.StatsForecast,
            method,
            _timed_method(bench, method, getattr(statsforecast.StatsForecast, method)),
        )


def _timed_pool(bench: Bench, original: Callable) -> Callable:
    """A group fitted in chunks on the worker pool (`models.n_jobs`): statsforecast runs in the workers, so the
    pool's wall time (pickling included) counts as statsforecast's; the traced rerun replays the chunks' results."""

    def timed(jobs, fit, frames, options, done):
        if bench.sf_replay:
            for result in bench.sf_replay.pop(0)[1]:
                done(result)
            return
        results = []
        t0 = time.perf_counter()
        original(jobs, fit, frames, options, lambda r: (results.append(r), done(r)))
        seconds = time.perf_counter() - t0
        if bench.sf_outputs is not None:
            bench.sf_outputs.append(("pool", results, None))
        bench.sf_seconds += seconds
        label = f"{M.model_label(options['name'], int(options['season']))} on {jobs} workers"
        bench.sf_calls.append(SfCall(label, sum(len(r.ids) for r in results), sum(map(len, frames)), seconds))

    return timed


def _timed_method(bench: Bench, method: str, original: Callable) -> Callable:
    df_position = {"fit": 0, "forecast": 1}.get(method)

    def timed(self, *args, **kwargs):
        if bench.sf_replay:  # traced rerun: the timed run's result and state, so the heap peak is our code's
            _, out, state = bench.sf_replay.pop(0)
            self.__dict__.update(state)
            return self if method == "fit" else out
        df = kwargs.get("df")
        if df is None and df_position is not None and len(args) > df_position:
            df = args[df_position]
        t0 = time.perf_counter()
        out = original(self, *args, **kwargs)
        seconds = time.perf_counter() - t0
        if bench.sf_outputs is not None:
            bench.sf_outputs.append((method, out, dict(self.__dict__)))
        bench.sf_seconds += seconds
        model = self.models[0]
        label = getattr(model, "_bench_label", None) or f"{type(model).__name__}/{getattr(model, 'season_length', 1)}"
        if df is not None:
            series, rows = int(df["unique_id"].nunique()), len(df)
        else:
            uids = getattr(self, "uids", None)
            series, rows = (len(uids) if uids is not None else 0), 0
        bench.sf_calls.append(SfCall(model=f"{label} {method}", series=series, rows=rows, seconds=seconds))
        return out

    return timed


def warm_up(config: PlanningConfig, horizon: int) -> None:
    """Compile each configured statsforecast model once on a tiny frame (numba JIT), by forecast and by fit/predict."""
    seen = set()
    for pc in config.product_classes.values():
        seasons = (1, 52) if pc.models.seasonal else (1,)
        for name in sorted({pc.models.smooth, pc.models.erratic, pc.models.intermittent, pc.models.lumpy}):
            for s in seasons:
                if (name, s) in seen:
                    continue
                seen.add((name, s))
                t = 2 * 52 + 8
                y = np.random.default_rng(0).poisson(5.0, size=2 * t).astype(float)
                df = pd.DataFrame({"unique_id": np.repeat([0, 1], t), "ds": np.tile(np.arange(t), 2), "y": y})
                sf = statsforecast.StatsForecast(
                    models=[M.make_model(name, s)], freq=1, n_jobs=1, fallback_model=sfm.Naive()
                )
                sf.forecast(df=df, h=horizon)
                sf.fit(df=df)
                sf.predict(h=horizon)


# =================================================================== output
HEADER = (
    f"{'stage':<32} {'wall s':>8} {'sf s':>8} {'py peak':>8} {'py out':>8} {'rss':>7} {'rss pk':>7} {'rss max':>7} "
    f"{'rows in':>11} {'rows out':>11}  note"
)
UNITS = f"{'':<32} {'':>8} {'':>8} {'MB':>8} {'MB':>8} {'MB':>7} {'MB':>7} {'MB':>7}"


def _n(v: int | None) -> str:
    return "" if v is None else f"{v:,}"


def _mb(v: float | None) -> str:
    return "" if v is None else f"{v:.0f}"


def format_row(s: Step) -> str:
    sf = "" if s.sf_s is None else f"{s.sf_s:.2f}"
    return (
        f"{s.stage:<32} {s.wall_s:>8.2f} {sf:>8} {_mb(s.py_peak_mb):>8} {_mb(s.py_out_mb):>8} {s.rss_mb:>7.0f} "
        f"{s.rss_peak_mb:>7.0f} "
        f"{s.rss_max_mb:>7.0f} {_n(s.rows_in):>11} {_n(s.rows_out):>11}  {s.note}"
    )


def format_sf(c: SfCall) -> str:
    label = "    sf " + c.model.replace("(season_length=", "/").replace(")", "")
    label = label if len(label) <= 32 else label[:31] + "~"
    return (
        f"{label:<32} {'':>8} {c.seconds:>8.2f} {'':>8} {'':>8} {'':>7} {'':>7} {'':>7} {c.rows:>11,} {c.series:>11,}  "
        f"series in, {c.seconds / max(c.series, 1) * 1000:.2f} ms per series"
    )


def total_line(steps: list[Step]) -> tuple[str, dict]:
    counted = [s for s in steps if s.in_total]
    wall = sum(s.wall_s for s in counted)
    sf = sum(s.sf_s or 0.0 for s in counted)
    peaks = [s for s in counted if s.py_peak_mb is not None]
    top = max(peaks, key=lambda s: s.py_peak_mb) if peaks else None
    rss_pk = max((s.rss_peak_mb for s in counted), default=0.0)
    rss_max = rss_max_mb()
    slow = max(counted, key=lambda s: s.wall_s) if counted else None
    checking = sum(s.wall_s for s in counted if s.stage.strip().startswith("validate "))
    line = (
        f"{'total':<32} {wall:>8.2f} {sf:>8.2f} {_mb(top.py_peak_mb if top else None):>8} {'':>8} "
        f"{rss_now_mb():>7.0f} {rss_pk:>7.0f} "
        f"{rss_max:>7.0f} {'':>11} {'':>11}  own code {wall - sf:.2f} s (validation {checking:.2f} s) + statsforecast "
        f"{sf:.2f} s; slowest "
        f"{slow.stage.strip() if slow else '-'}"
        + (f"; largest py peak {top.stage.strip()}" if top else "")
    )
    figures = {
        "wall_s": wall,
        "statsforecast_s": sf,
        "own_code_s": wall - sf,
        "validation_s": checking,
        "validation_share_of_own": checking / (wall - sf) if wall > sf else None,
        "py_peak_mb": top.py_peak_mb if top else None,
        "py_peak_stage": top.stage.strip() if top else None,
        "rss_peak_mb": rss_pk,
        "rss_max_mb": rss_max,
        "slowest_stage": slow.stage.strip() if slow else None,
    }
    return line, figures


def load_average() -> dict:
    """The machine's load when a figure was taken (`uptime`'s three numbers) and the time, UTC."""
    one, five, fifteen = os.getloadavg()
    stamp = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    return {"at": stamp, "load_1m": one, "load_5m": five, "load_15m": fifteen, "cpus": os.cpu_count()}


def git_commit() -> str | None:
    try:
        out = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "HEAD"], capture_output=True, text=True, timeout=10)
        return out.stdout.strip() or None
    except (OSError, subprocess.SubprocessError):
        return None


def versions() -> dict:
    """The library versions and commit a figure was measured with."""
    import dagster
    import pandera
    return {"python": sys.version.split()[0], "dagster": dagster.__version__, "pandas": pd.__version__,
            "numpy": np.__version__, "pandera": pandera.__version__, "statsforecast": statsforecast.__version__,
            "commit": git_commit(), "bytes_per_mb": MB}
