"""What can be tested here of README's "Larger than one machine": the worked example's files and a shared store.

- `docs/cluster/planning.cluster.yaml`, merged into config/planning.yaml, is a
  valid planning config whose store and inputs lie on the shared mount that
  `docs/cluster/dagster.yaml` gives every run's container.
- `docs/cluster/dagster.yaml` is loaded by Dagster itself (`DagsterInstance.from_config`,
  which validates every key against the classes' own config schemas) with the
  storage swapped for SQLite (no PostgreSQL server here): its run launcher is
  dagster-docker's `DockerRunLauncher` with that mount, and the run queue allows
  one run per partition.
- A store on "shared storage" (a folder given by its absolute path) written by
  this process is read by another process started in another folder, as a run
  on another machine reads it.

Not tested here: a real Docker daemon, Kubernetes or a remote Dask scheduler.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import dagster as dg
import pandas as pd
import pytest
import yaml

from pipelines.config import parse_config
from pipelines.store import open_store

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "docs" / "cluster"


def merged_config():
    base = yaml.safe_load((ROOT / "config" / "planning.yaml").read_text())
    overlay = yaml.safe_load((EXAMPLE / "planning.cluster.yaml").read_text())
    for section, keys in overlay.items():
        base[section] = {**base.get(section, {}), **keys}
    return parse_config(base, EXAMPLE / "planning.cluster.yaml"), overlay


def shared_mounts() -> list[str]:
    instance = yaml.safe_load((EXAMPLE / "dagster.yaml").read_text())
    volumes = instance["run_launcher"]["config"]["container_kwargs"]["volumes"]
    mounts = []
    for volume in volumes:
        host, inside = volume.split(":")[:2]
        assert host == inside, f"{volume}: the shared storage must have the same path inside the container"
        mounts.append(inside)
    return mounts


def test_the_cluster_planning_config_is_valid_and_lies_on_the_shared_mount():
    pytest.importorskip("distributed")  # models.engine: dask is refused without it
    config, overlay = merged_config()
    assert set(overlay) == {"inputs", "store", "models"}
    assert (config.models.engine, config.models.address) == ("dask", overlay["models"]["address"])
    mounts = shared_mounts()
    for path in (config.store.path, Path(config.inputs.folder)):
        assert path.is_absolute(), f"{path}: on a cluster the store and inputs are absolute paths"
        assert any(path.is_relative_to(m) for m in mounts), f"{path} is not on the shared mount {mounts}"


def test_dagster_loads_the_cluster_instance_with_one_container_per_run(tmp_path):
    dagster_docker = pytest.importorskip("dagster_docker")
    data = yaml.safe_load((EXAMPLE / "dagster.yaml").read_text())
    assert data["storage"] == {"postgres": {"postgres_url": {"env": "DAGSTER_POSTGRES_URL"}}}  # as README documents
    data["storage"] = {"sqlite": {"base_dir": str(tmp_path / "storage")}}
    (tmp_path / "dagster.yaml").write_text(yaml.safe_dump(data))
    instance = dg.DagsterInstance.from_config(str(tmp_path))
    try:
        launcher = instance.run_launcher
        assert isinstance(launcher, dagster_docker.DockerRunLauncher)
        assert launcher.networks == ["apportion"]
        assert "/mnt/apportion:/mnt/apportion:rw" in launcher.container_kwargs["volumes"]
        assert "DAGSTER_POSTGRES_URL" in launcher.env_vars
        limits = instance.get_concurrency_config().run_queue_config.tag_concurrency_limits
        assert {"key": "dagster/partition", "value": {"applyLimitPerUniqueValue": True}, "limit": 1} in limits
    finally:
        instance.dispose()


def test_a_bad_key_in_the_launcher_config_is_refused(tmp_path):
    # the load above can fail: Dagster checks the launcher's keys against DockerRunLauncher's schema
    pytest.importorskip("dagster_docker")
    data = yaml.safe_load((EXAMPLE / "dagster.yaml").read_text())
    data["storage"] = {"sqlite": {"base_dir": str(tmp_path / "storage")}}
    data["run_launcher"]["config"]["volumes"] = ["/mnt/apportion:/mnt/apportion"]  # belongs in container_kwargs
    (tmp_path / "dagster.yaml").write_text(yaml.safe_dump(data))
    instance = dg.DagsterInstance.from_config(str(tmp_path))
    try:
        with pytest.raises(dg.DagsterInvalidConfigError, match="volumes"):
            instance.run_launcher  # noqa: B018  (Dagster builds and checks the launcher when it is first asked for)
    finally:
        instance.dispose()


def test_a_store_on_shared_storage_is_read_by_a_process_started_elsewhere(tmp_path):
    shared = tmp_path / "mnt" / "apportion" / "store"
    frame = pd.DataFrame({"product": ["P1", "P2"], "share": [0.25, 0.75]})
    open_store(shared).write("share_tables", "2026-11-30", "fast", frame, run_id="run-on-machine-a")
    elsewhere = tmp_path / "machine-b"
    elsewhere.mkdir()
    code = (
        "import sys; sys.path.insert(0, sys.argv[2]); from pipelines.store import read_table; "
        "t = read_table(sys.argv[1], 'share_tables', cycle='2026-11-30', product_class='fast', versions='latest'); "
        "print(t.to_json(orient='records'))"
    )
    out = subprocess.run([sys.executable, "-c", code, str(shared), str(ROOT)], cwd=elsewhere, capture_output=True,
                         text=True, timeout=120, check=True)
    assert json.loads(out.stdout) == frame.to_dict("records")
