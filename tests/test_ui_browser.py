"""A failed blocking check as whoever watches checks sees it: the Dagster UI in a real browser.

One span of the demo's customer spans is broken on purpose (it ends before it
starts), the asset `customer_spans` (after `products`, whose class map it
reads) is materialized into a temporary Dagster instance, and the Dagster
web server is started over that instance with the project's own
definitions. Headless Chromium (Debian's package, driven by Playwright) then
opens the asset's checks and must find the schema check
failed, with its description and the broken row in its failing-rows sample.
The input is then repaired and materialized again: the check's history, read
through the web server's GraphQL API and in the UI, lists the failed
evaluation and the later passed one, in that order.

The UI is read by its visible text (tab names, "Evaluation result", "Failed",
"[Show Markdown]"), not by CSS classes, so a Dagster release that restyles the
page keeps the test meaningful.
"""

import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from contextlib import contextmanager
from pathlib import Path

import dagster as dg
import pandas as pd
import pytest
import yaml

from assets.common import schema_check_name
from assets.master_data import CUSTOMER_SPANS, PRODUCT_CLASS_MAP, PRODUCTS
from pipelines.config import load_config
from pipelines.definitions import build_definitions
from pipelines.partitions import current_cycle
from pipelines.runner import run_partitions

pytestmark = pytest.mark.browser

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "data" / "demo"
CHROMIUM = Path("/usr/bin/chromium")
# Debian's chromium, never a browser download. Without the background-networking
# flags Chromium opens connections of its own, which a closed network refuses.
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--disable-quic",
]
REQUIRE_BROWSER = "APPORTION_REQUIRE_BROWSER"
SERVER_START_TIMEOUT_S = 120
UI_TIMEOUT_MS = 30_000
CHECK = schema_check_name(CUSTOMER_SPANS)
# customer_spans keeps its class's rows by the product master's class map, so products come first
SELECTION = [PRODUCTS, PRODUCT_CLASS_MAP, CUSTOMER_SPANS]


def _sync_playwright():
    """Playwright's sync API over /usr/bin/chromium; skip (or fail when the browser is required) without them."""
    missing = None
    if not CHROMIUM.exists():
        missing = (
            f"{CHROMIUM} is missing: install Debian's chromium with `apt-get install -y chromium` (or "
            "`make browser-deps`)"
        )
    else:
        try:
            from playwright.sync_api import sync_playwright
        except ImportError:
            missing = "the Python package playwright is missing: `make test` installs it with the test extras"
    if missing:
        if os.environ.get(REQUIRE_BROWSER) == "1":
            pytest.fail(f"{REQUIRE_BROWSER}=1 but {missing}")
        pytest.skip(missing)
    return sync_playwright


# the broken span (row 3 of customer_spans.csv, DRIP-001) is in this class (data/demo/products.csv)
BROKEN_CLASS = "consumables"


def materialize_into_instance(config_path: str, asset_names: list[str]) -> dg.ExecuteInProcessResult:
    """Materialize `asset_names` with the planning config at `config_path` into the instance at $DAGSTER_HOME.

    The one place this module knows how (part of) a cycle is run: the current
    cycle's partition of the broken span's class (consumables), registered in
    the instance first; a blocking check that fails ends the run without raising.
    """
    config = load_config(config_path)
    with dg.DagsterInstance.get() as instance:
        run = run_partitions(
            build_definitions(config_path),
            instance,
            current_cycle(config),
            [BROKEN_CLASS],
            all_classes=list(config.product_classes),
            selection=[dg.AssetKey(name) for name in asset_names],
        )
    return run.results[BROKEN_CLASS]


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _graphql(base_url: str, query: str, variables: dict | None = None) -> dict:
    body = json.dumps({"query": query, "variables": variables or {}}).encode()
    request = urllib.request.Request(f"{base_url}/graphql", data=body, headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(request, timeout=30) as response:
        answer = json.load(response)
    assert "errors" not in answer, answer["errors"]
    return answer["data"]


LOCATIONS = """
{ workspaceOrError { ... on Workspace { locationEntries {
    name loadStatus locationOrLoadError { __typename ... on PythonError { message } } } } } }
"""


def _stop(process: subprocess.Popen) -> None:
    """SIGINT to the server's own pid, then SIGKILL to its process group (its code server) if anything is left."""
    if process.poll() is None:
        process.send_signal(signal.SIGINT)
        try:
            process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            pass
    try:
        os.killpg(process.pid, signal.SIGKILL)  # the group the server leads (start_new_session=True)
    except ProcessLookupError:
        pass
    process.wait(timeout=20)


def _wait_until_loaded(process: subprocess.Popen, base_url: str) -> str | None:
    """Poll the server's workspace until its code location is loaded; None, or what went wrong."""
    deadline = time.monotonic() + SERVER_START_TIMEOUT_S
    status = "not answering"
    while time.monotonic() < deadline:
        if process.poll() is not None:
            return f"exited with code {process.returncode}"
        try:
            entries = _graphql(base_url, LOCATIONS)["workspaceOrError"]["locationEntries"]
        except (urllib.error.URLError, ConnectionError, TimeoutError):
            entries = None
        if entries and all(e["loadStatus"] == "LOADED" for e in entries):
            errors = [
                e["locationOrLoadError"]
                for e in entries
                if e["locationOrLoadError"]["__typename"] != "RepositoryLocation"
            ]
            return f"load error {errors}" if errors else None
        status = f"locations {entries}" if entries is not None else status
        time.sleep(1)
    return f"not loaded within {SERVER_START_TIMEOUT_S} s: {status}"


@contextmanager
def dagster_webserver(home: Path, config_path: str, logs: Path):
    """`dagster-webserver -m pipelines.definitions` on a free 127.0.0.1 port over `home`; yields its base URL."""
    port = _free_port()
    env = {**os.environ, "DAGSTER_HOME": str(home), "APPORTION_CONFIG": config_path}
    stderr_path = logs / "webserver.stderr"
    command = [
        str(Path(sys.executable).parent / "dagster-webserver"),
        "-m", "pipelines.definitions",
        "-d", str(ROOT),
        "-h", "127.0.0.1",
        "-p", str(port),
    ]
    with open(logs / "webserver.stdout", "wb") as out, open(stderr_path, "wb") as err:
        process = subprocess.Popen(command, cwd=ROOT, env=env, stdout=out, stderr=err, start_new_session=True)
    base_url = f"http://127.0.0.1:{port}"
    try:
        problem = _wait_until_loaded(process, base_url)
        assert problem is None, (
            f"the Dagster web server on {base_url} did not load pipelines.definitions ({problem}); "
            f"its stderr:\n{stderr_path.read_text(errors='replace')[-6000:]}"
        )
        yield base_url
    finally:
        _stop(process)


@contextmanager
def checks_page(sync_playwright, base_url: str):
    """Headless Chromium on the asset's checks with the schema check selected; yields the page."""
    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=str(CHROMIUM), headless=True, args=CHROMIUM_ARGS)
        try:
            page = browser.new_page(viewport={"width": 1400, "height": 1000})
            page.set_default_timeout(UI_TIMEOUT_MS)
            # the UI's first visit may open a newsletter prompt over the page: dismiss it whenever it shows
            skip = page.get_by_role("button", name="Skip", exact=True)
            page.add_locator_handler(skip, lambda: skip.click())
            page.goto(f"{base_url}/assets/{CUSTOMER_SPANS}?view=checks")
            page.get_by_title(CHECK, exact=True).click()  # the check in the list of the asset's checks
            yield page
        finally:
            browser.close()


EXECUTIONS = """
query ($check: String!) {
  assetCheckExecutions(assetKey: {path: ["customer_spans"]}, checkName: $check, limit: 10) {
    runId status timestamp
    evaluation { success timestamp metadataEntries { label ... on MarkdownMetadataEntry { mdStr } } }
  }
}
"""


def test_ui_shows_the_failed_schema_check_with_its_rows_then_its_history(tmp_path, monkeypatch):
    sync_playwright = _sync_playwright()
    from playwright.sync_api import expect

    home = tmp_path / "dagster_home"
    home.mkdir()
    (home / "dagster.yaml").write_text("telemetry:\n  enabled: false\n")
    monkeypatch.setenv("DAGSTER_HOME", str(home))

    inputs = tmp_path / "inputs"
    shutil.copytree(DEMO, inputs)
    config = yaml.safe_load((ROOT / "config" / "planning.yaml").read_text())
    config["inputs"]["folder"] = str(inputs)
    config["store"]["path"] = str(tmp_path / "store")
    config_path = tmp_path / "planning.yaml"
    config_path.write_text(yaml.safe_dump(config))

    spans_file = inputs / "customer_spans.csv"
    good_spans = spans_file.read_bytes()
    spans = pd.read_csv(spans_file, dtype=str, keep_default_na=False)
    # break one span on purpose: it ends before it starts (CustomerSpans.span_ordered)
    broken = spans.loc[3].copy()
    broken["active_from"], broken["active_to"] = "2025-06-01", "2025-01-01"
    spans.loc[3] = broken
    spans.to_csv(spans_file, index=False)

    first = materialize_into_instance(str(config_path), SELECTION)
    evaluations = {e.check_name: e for e in first.get_asset_check_evaluations()}
    assert not evaluations[CHECK].passed, "the broken span did not fail the schema check in-process"

    screenshots = []
    with dagster_webserver(home, str(config_path), tmp_path) as base_url:
        with checks_page(sync_playwright, base_url) as page:
            result = page.get_by_text("Evaluation result", exact=True).locator("xpath=..")
            expect(result).to_contain_text("Failed", timeout=UI_TIMEOUT_MS)
            expect(page.get_by_text("Proves that customer_spans matches its pandera model")).to_be_visible()
            screenshots.append(tmp_path / "failed_check.png")
            page.screenshot(path=screenshots[-1], full_page=True)

            page.locator("tr", has_text="failing_rows_sample").get_by_text("[Show Markdown]").click()
            sample = page.get_by_role("dialog").filter(has_text="failing_rows_sample")
            for value in (broken["product"], broken["site"], broken["customer"], "2025-06-01", "2025-01-01"):
                expect(sample).to_contain_text(value, timeout=UI_TIMEOUT_MS)
            screenshots.append(tmp_path / "failing_rows_sample.png")
            page.screenshot(path=screenshots[-1])

        # repair the input; the next evaluation passes (run outside the browser session: Dagster
        # must not start its run inside Playwright's event loop)
        spans_file.write_bytes(good_spans)
        second = materialize_into_instance(str(config_path), SELECTION)
        assert second.success

        history = _graphql(base_url, EXECUTIONS, {"check": CHECK})["assetCheckExecutions"]
        oldest_first = history[::-1]  # the API lists the newest execution first
        assert [e["status"] for e in oldest_first] == ["FAILED", "SUCCEEDED"]
        assert [e["evaluation"]["success"] for e in oldest_first] == [False, True]
        assert [e["runId"] for e in oldest_first] == [first.run_id, second.run_id]
        assert oldest_first[0]["evaluation"]["timestamp"] < oldest_first[1]["evaluation"]["timestamp"]
        failed_metadata = {m["label"]: m.get("mdStr") for m in oldest_first[0]["evaluation"]["metadataEntries"]}
        assert broken["customer"] in failed_metadata["failing_rows_sample"]

        with checks_page(sync_playwright, base_url) as page:
            result = page.get_by_text("Evaluation result", exact=True).locator("xpath=..")
            expect(result).to_contain_text("Passed", timeout=UI_TIMEOUT_MS)
            page.get_by_role("tab", name="Execution history", exact=True).click()
            rows = (
                page.get_by_role("row").filter(has_text="Failed").or_(page.get_by_role("row").filter(has_text="Passed"))
            )
            expect(rows).to_have_count(2, timeout=UI_TIMEOUT_MS)
            # newest first: the passed evaluation above the failed one
            assert "Passed" in rows.nth(0).inner_text() and "Failed" in rows.nth(1).inner_text()
            screenshots.append(tmp_path / "check_history.png")
            page.screenshot(path=screenshots[-1])
    for path in screenshots:
        print(f"screenshot: {path}")
