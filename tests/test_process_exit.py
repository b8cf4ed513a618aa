"""The command line's exit (`pipelines/__main__.py`, `end_process`): the exit code, the output and the `atexit`
handlers as before, with the objects still alive frozen (`gc.freeze`) so the interpreter's last collections skip
them. Each case is a process of its own, as the command is."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _python(args: list[str], tmp_path: Path) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(ROOT), DAGSTER_HOME=str(tmp_path / "dagster_home"))
    return subprocess.run([sys.executable, *args], cwd=ROOT, env=env, capture_output=True, text=True, timeout=600)


def test_end_process_keeps_the_code_the_output_and_the_atexit_handlers_and_freezes_what_is_alive(tmp_path):
    code = (
        "import atexit, gc, sys\n"
        "atexit.register(lambda: sys.stderr.write(f'frozen {gc.get_freeze_count()}\\n'))\n"
        "from pipelines.__main__ import end_process\n"
        "sys.stdout.write('a line not flushed yet')\n"
        "end_process(3)\n"
    )
    out = _python(["-c", code], tmp_path)
    assert out.returncode == 3
    assert out.stdout == "a line not flushed yet"
    frozen = int(re.search(r"frozen (\d+)", out.stderr).group(1))
    assert frozen > 10_000, "the objects of the imported modules were not frozen"


def test_the_command_line_exits_through_it_with_its_own_code(tmp_path):
    # `python -m pipelines` run as the interpreter runs it (runpy, as __main__), an atexit handler reporting the
    # frozen objects: the command's own exit path, not end_process called by hand
    code = (
        "import atexit, gc, runpy, sys\n"
        "atexit.register(lambda: sys.stderr.write(f'frozen {gc.get_freeze_count()}\\n'))\n"
        f"sys.argv = ['pipelines', 'cycle', '--config', {str(tmp_path / 'missing.yaml')!r}]\n"
        "runpy.run_module('pipelines', run_name='__main__', alter_sys=True)\n"
    )
    out = _python(["-c", code], tmp_path)
    assert out.returncode == 2  # EXIT_BAD_INPUT, as before
    assert "planning config not found" in out.stderr
    assert int(re.search(r"frozen (\d+)", out.stderr).group(1)) > 10_000, "the command did not exit through it"


def test_a_parallel_child_exits_with_its_runs_code_and_what_is_alive_frozen(tmp_path):
    # `cycle --parallel K` runs each class in a spawned child (pipelines/runner.py, `_child_main`): its exit code is
    # its run's, what it says goes to stderr, and it leaves as the command does, the objects still alive frozen.
    # The run itself is replaced by one that prints and returns 4 (the parallel runs themselves: tests/test_graph.py).
    code = (
        "import atexit, gc, sys\n"
        "atexit.register(lambda: sys.stderr.write(f'frozen {gc.get_freeze_count()}\\n'))\n"
        "import pipelines.runner as runner\n"
        "runner._run_in_child = lambda *args: print('said by the run', args) or 4\n"
        "runner._child_main('config.yaml', '2026-11-30', 'consumables')\n"
    )
    out = _python(["-c", code], tmp_path)
    assert out.returncode == 4
    assert out.stdout == "" and "said by the run ('config.yaml', '2026-11-30', 'consumables')" in out.stderr
    assert int(re.search(r"frozen (\d+)", out.stderr).group(1)) > 10_000, "the child did not freeze before its exit"
