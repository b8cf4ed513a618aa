"""The project's structure rules, checked on the tree so they cannot rot (DEVELOPERS.md, "Layout").

- no stage module imports another stage (`pipelines/stages/`);
- no import cycle among the project's modules (the graph built from every
  `import` with `ast`, those inside functions too);
- no module over 400 lines (named exemptions: the demo data generator, tests);
- no asset body over 15 lines: a function a Dagster asset decorator wraps, or
  an adapter a `StageAsset` names (`read`, `publish`, `settings`);
- every module path in the tree appears in DEVELOPERS.md's layout table, and
  every path the table names exists.

The limits are the project's own (common practice, no source). Each guard is a
function of a tree's root and is tested on a small synthetic tree in
`tmp_path` that breaks its rule, so a guard that cannot fail is caught.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("pipelines", "assets", "benchmarks")  # where the project's modules live (tests aside)
MAX_MODULE_LINES = 400
LONG_MODULE_EXEMPT = ("pipelines/demo_data.py",)  # the demo data generator: one seeded scenario, read top to bottom
MAX_ASSET_BODY_LINES = 15
ASSET_DECORATORS = {"asset", "multi_asset", "graph_asset", "graph_multi_asset"}
STAGE_ADAPTERS = ("read", "publish", "settings")  # the StageAsset fields that take an asset's own code
LAYOUT_HEADER = "| piece | where |"
PATH_TOKEN = re.compile(r"^[\w./-]+$")


# ---------------------------------------------------------------------------------------------- the modules
def project_modules(root: Path, packages: tuple[str, ...] = PACKAGES) -> dict[str, Path]:
    """Dotted module name -> file, for every .py under `packages` (by default the project's, tests aside)."""
    found = {}
    for package in packages:
        for path in sorted((root / package).rglob("*.py")):
            parts = path.relative_to(root).with_suffix("").parts
            name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
            found[name] = path
    return found


def _imported(node: ast.AST, module: str, is_package: bool) -> list[tuple[str, list[str]]]:
    """(imported module, names taken from it) of one import statement, relative imports resolved."""
    if isinstance(node, ast.Import):
        return [(alias.name, []) for alias in node.names]
    base = module.split(".")
    if node.level:
        keep = len(base) - node.level + (1 if is_package else 0)
        base = base[:keep]
        target = ".".join(base + ([node.module] if node.module else []))
    else:
        target = node.module or ""
    return [(target, [alias.name for alias in node.names])]


def import_graph(root: Path, packages: tuple[str, ...] = PACKAGES) -> dict[str, set[str]]:
    """Module -> the project modules it imports. `from p import m` of a submodule m is an arrow to p.m; a
    name not found from the root is looked up beside the importing file (benchmarks put their folder on sys.path)."""
    modules = project_modules(root, packages)
    graph: dict[str, set[str]] = {name: set() for name in modules}
    for name, path in modules.items():
        is_package = path.name == "__init__.py"
        folder = ".".join(name.split(".")[: None if is_package else -1])
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"), filename=str(path))):
            if not isinstance(node, ast.Import | ast.ImportFrom):
                continue
            for target, names in _imported(node, name, is_package):
                candidates = [target, f"{folder}.{target}"] if folder else [target]
                found = next((c for c in candidates if c in modules), None)
                if found is None:
                    continue
                subs = [f"{found}.{n}" for n in names if f"{found}.{n}" in modules]
                plain = [n for n in names if f"{found}.{n}" not in modules]
                graph[name] |= set(subs)
                if plain or not names:
                    graph[name].add(found)
        graph[name].discard(name)
    return graph


# ---------------------------------------------------------------------------------------------- the guards
def stage_imports(root: Path) -> list[tuple[str, str]]:
    """(stage, stage it imports) for every import of one stage module by another."""
    stage = "pipelines.stages."
    return sorted(
        (a, b) for a, targets in import_graph(root).items() if a.startswith(stage) for b in targets
        if b.startswith(stage)
    )


def import_cycles(root: Path, packages: tuple[str, ...] = (*PACKAGES, "tests")) -> list[list[str]]:
    """Every strongly connected group of two or more modules: each holds a cycle (tests' modules included)."""
    graph = import_graph(root, packages)
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    groups: list[list[str]] = []

    def visit(node: str) -> None:  # Tarjan's strongly connected components, recursive (a few hundred modules)
        index[node] = low[node] = len(index)
        stack.append(node)
        on_stack.add(node)
        for nxt in graph[node]:
            if nxt not in index:
                visit(nxt)
                low[node] = min(low[node], low[nxt])
            elif nxt in on_stack:
                low[node] = min(low[node], index[nxt])
        if low[node] == index[node]:
            group = []
            while True:
                top = stack.pop()
                on_stack.discard(top)
                group.append(top)
                if top == node:
                    break
            if len(group) > 1:
                groups.append(sorted(group))

    for node in sorted(graph):
        if node not in index:
            visit(node)
    return sorted(groups)


def long_modules(root: Path, limit: int = MAX_MODULE_LINES, exempt=LONG_MODULE_EXEMPT) -> list[tuple[str, int]]:
    """(path, lines) of every project module over `limit` lines, the named exemptions aside."""
    out = []
    for path in project_modules(root).values():
        rel = path.relative_to(root).as_posix()
        lines = len(path.read_text(encoding="utf-8").splitlines())
        if lines > limit and rel not in exempt:
            out.append((rel, lines))
    return sorted(out)


def _body_lines(fn: ast.FunctionDef | ast.AsyncFunctionDef) -> int:
    """Lines of a function's body, its docstring aside."""
    body = fn.body
    if body and isinstance(body[0], ast.Expr) and isinstance(getattr(body[0], "value", None), ast.Constant):
        body = body[1:] or body
    return body[-1].end_lineno - body[0].lineno + 1


def _decorator_name(node: ast.expr) -> str:
    node = node.func if isinstance(node, ast.Call) else node
    return node.attr if isinstance(node, ast.Attribute) else getattr(node, "id", "")


def asset_bodies(root: Path) -> list[tuple[str, int]]:
    """('path:function', body lines) of every asset body: a function an asset decorator wraps, and every
    function a StageAsset(...) names as its read, publish or settings adapter."""
    out = []
    for path in project_modules(root).values():
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        functions = {n.name: n for n in ast.walk(tree) if isinstance(n, ast.FunctionDef | ast.AsyncFunctionDef)}
        bodies = [f for f in functions.values() if {_decorator_name(d) for d in f.decorator_list} & ASSET_DECORATORS]
        for call in ast.walk(tree):
            if isinstance(call, ast.Call) and _decorator_name(call) == "StageAsset":
                for kw in call.keywords:
                    if kw.arg in STAGE_ADAPTERS and isinstance(kw.value, ast.Name) and kw.value.id in functions:
                        bodies.append(functions[kw.value.id])
        rel = path.relative_to(root).as_posix()
        out += [(f"{rel}:{f.name}", _body_lines(f)) for f in {id(f): f for f in bodies}.values()]
    return sorted(out)


def long_asset_bodies(root: Path, limit: int = MAX_ASSET_BODY_LINES) -> list[tuple[str, int]]:
    return [(where, n) for where, n in asset_bodies(root) if n > limit]


def layout_paths(root: Path) -> list[str]:
    """The paths DEVELOPERS.md's layout table names in its `where` column: a bare file name is in the folder
    of the path before it in the same cell; `X` in a path stands for any name."""
    lines = (root / "DEVELOPERS.md").read_text(encoding="utf-8").splitlines()
    start = lines.index(LAYOUT_HEADER)
    paths = []
    for line in lines[start + 2 :]:
        if not line.startswith("|"):
            break
        cells = re.split(r"(?<!\\)\|", line)
        folder = ""
        for token in re.findall(r"`([^`]+)`", cells[2] if len(cells) > 2 else ""):
            if not PATH_TOKEN.match(token) or not ("/" in token or token.endswith(".py")):
                continue
            if "/" in token:
                folder = token if token.endswith("/") else token.rsplit("/", 1)[0] + "/"
                paths.append(token)
            elif folder:
                paths.append(folder + token)
    return paths


def _named(path: str, named: list[str]) -> bool:
    for entry in named:
        pattern = "^" + re.escape(entry).replace("X", r"[\w]+") + "$"
        if re.match(pattern, path):
            return True
    return False


def layout_mismatches(root: Path) -> tuple[list[str], list[str]]:
    """(modules the table does not name, paths the table names that do not exist). A package's `__init__.py`
    that defines nothing need not be named."""
    named = layout_paths(root)
    missing = []
    for path in project_modules(root).values():
        rel = path.relative_to(root).as_posix()
        if path.name == "__init__.py":
            tree = ast.parse(path.read_text(encoding="utf-8"))
            if not any(isinstance(n, ast.FunctionDef | ast.ClassDef) for n in tree.body):
                continue
        if not _named(rel, named):
            missing.append(rel)
    absent = [p for p in named if "X" not in p and not (root / p).exists()]
    return sorted(missing), absent


# ---------------------------------------------------------------------------------------------- the tree
def test_no_stage_imports_another_stage():
    assert stage_imports(ROOT) == []


def test_no_import_cycle_among_the_project_modules():
    assert import_cycles(ROOT) == []


def test_the_import_graph_sees_the_project():
    graph = import_graph(ROOT)
    # a handful of arrows known from the code: if these vanish the graph reads nothing and the guards prove nothing
    assert "pipelines.engines.forecast_frames" in graph["pipelines.stages.statistical_forecast"]
    assert "pipelines.store.store" in graph["pipelines.store"]  # a package's own __init__ importing its module
    assert "benchmarks.cycle_inputs" in graph["benchmarks.cycle_scenario"]  # a benchmark's import beside it
    assert "tests.stage_runs" in import_graph(ROOT, ("tests", "pipelines"))["tests.test_check_mutations"]


def test_no_module_over_400_lines():
    assert long_modules(ROOT) == []


def test_no_asset_body_over_15_lines():
    bodies = dict(asset_bodies(ROOT))
    assert "assets/factory.py:_asset" in bodies and "assets/publication.py:publication" in bodies
    assert "assets/cycle_report.py:write_page" in bodies and "assets/share_drift.py:previous_share_table" in bodies
    assert long_asset_bodies(ROOT) == []


def test_the_layout_table_names_every_module_and_only_paths_that_exist():
    missing, absent = layout_mismatches(ROOT)
    assert missing == [], f"modules not in DEVELOPERS.md's layout table: {missing}"
    assert absent == [], f"DEVELOPERS.md's layout table names paths that do not exist: {absent}"


# ---------------------------------------------------------------------------------------------- the guards fail
def _tree(tmp_path: Path, files: dict[str, str], table: list[str] | None = None) -> Path:
    for rel, text in files.items():
        (tmp_path / rel).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / rel).write_text(text)
    rows = table if table is not None else [f"| a module | `{rel}` |" for rel in files if rel.endswith(".py")]
    (tmp_path / "DEVELOPERS.md").write_text("\n".join(["# guide", "", LAYOUT_HEADER, "| --- | --- |", *rows, ""]))
    return tmp_path


def test_the_stage_guard_names_a_stage_that_imports_a_stage(tmp_path):
    root = _tree(
        tmp_path,
        {
            "pipelines/__init__.py": "",
            "pipelines/stages/__init__.py": "",
            "pipelines/stages/a.py": "from pipelines.stages.b import run\n",
            "pipelines/stages/b.py": "from pipelines.engines import shared\n\n\ndef run():\n    return 1\n",
            "pipelines/stages/c.py": "from pipelines.stages import b\n",  # the module through its package
            "pipelines/engines/__init__.py": "",
            "pipelines/engines/shared.py": "X = 1\n",
        },
    )
    assert stage_imports(root) == [
        ("pipelines.stages.a", "pipelines.stages.b"),
        ("pipelines.stages.c", "pipelines.stages.b"),
    ]


def test_the_cycle_guard_names_a_two_module_cycle_and_a_lazy_one(tmp_path):
    root = _tree(
        tmp_path,
        {
            "pipelines/__init__.py": "",
            "pipelines/one.py": "from pipelines.two import f\n",
            "pipelines/two.py": "def f():\n    from pipelines import one\n    return one\n",  # inside a function
            "pipelines/three.py": "from .one import f\n",  # relative, and no cycle
        },
    )
    assert import_cycles(root) == [["pipelines.one", "pipelines.two"]]
    (root / "pipelines/two.py").write_text("def f():\n    return 1\n")
    assert import_cycles(root) == []


def test_the_length_guard_names_a_401_line_module_but_not_400_nor_an_exemption(tmp_path):
    root = _tree(
        tmp_path,
        {
            "pipelines/long.py": "x = 1\n" * 401,
            "pipelines/fits.py": "x = 1\n" * 400,
            "pipelines/demo_data.py": "x = 1\n" * 900,
        },
    )
    assert long_modules(root) == [("pipelines/long.py", 401)]


def test_the_asset_guard_names_a_16_line_body_and_a_long_adapter(tmp_path):
    def fn(name: str, lines: int, decorator: str = "") -> str:
        return f"{decorator}def {name}(context):\n    '''doc'''\n" + "    x = 1\n" * (lines - 1) + "    return x\n\n\n"

    root = _tree(
        tmp_path,
        {
            "assets/big.py": "import dagster as dg\n\n\n" + fn("big", 16, "@dg.asset(name='big')\n")
            + fn("fits", 15, "@dg.multi_asset(outs={})\n"),
            "assets/stage.py": "from assets.factory import StageAsset\n\n\n" + fn("reader", 16) + fn("helper", 30)
            + "spec = StageAsset(tables=(), run=None, settings=lambda p: p, read=reader)\n",
        },
    )
    assert long_asset_bodies(root) == [("assets/big.py:big", 16), ("assets/stage.py:reader", 16)]


def test_the_layout_guard_names_a_missing_row_and_a_path_that_does_not_exist(tmp_path):
    files = {
        "pipelines/__init__.py": "",
        "pipelines/store/__init__.py": "def read():\n    return 1\n",
        "pipelines/store/store.py": "",
        "pipelines/engines/a.py": "",
        "pipelines/engines/b.py": "",
        "pipelines/stages/one.py": "",
        "pipelines/stages/two.py": "",
        "assets/unnamed.py": "",
    }
    table = [
        "| the store | `pipelines/store/` (`store.py` the protocol; `__init__.py` its functions) |",
        "| engines \\| shares | `pipelines/engines/a.py`, `b.py`; `pipelines/engines/gone.py` |",
        "| stage *X* | `pipelines/stages/X.py` |",
    ]
    root = _tree(tmp_path, files, table)
    assert layout_mismatches(root) == (["assets/unnamed.py"], ["pipelines/engines/gone.py"])
    (root / "pipelines/engines/gone.py").write_text("")
    (root / "assets/unnamed.py").unlink()
    assert layout_mismatches(root) == ([], [])


@pytest.mark.parametrize("line", ["| a | `pipelines/x.py` |", "| a | `x.py` alone, no folder before it |"])
def test_the_layout_table_reader_reads_what_a_row_names(tmp_path, line):
    (tmp_path / "DEVELOPERS.md").write_text("\n".join([LAYOUT_HEADER, "| --- | --- |", line, "", "| other | `y.py` |"]))
    assert layout_paths(tmp_path) == (["pipelines/x.py"] if "pipelines" in line else [])
