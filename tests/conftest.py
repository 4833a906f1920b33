"""Shared fixtures: a fresh warehouse per test, and the demo warehouse built once per session."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
os.environ.setdefault("DO_NOT_TRACK", "1")
os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "120")

TEST_KEY = "test-key-not-secret"


@pytest.fixture
def key_env(monkeypatch):
    monkeypatch.setenv("TAKEUP_ID_KEY", TEST_KEY)
    return TEST_KEY


@pytest.fixture
def warehouse(tmp_path, key_env):
    """A new empty warehouse with the default study config."""
    from takeup.pipeline.warehouse import init_warehouse
    path = tmp_path / "w.duckdb"
    init_warehouse(path)
    return path


def write_csv(path: Path, header: str, *rows: str) -> Path:
    path.write_text("\n".join([header, *rows]) + "\n")
    return path


@pytest.fixture(scope="session")
def demo_warehouse(tmp_path_factory):
    """The demo scenario generated and ingested once (read-only use by tests)."""
    from takeup.pipeline.demo import generate_demo
    from takeup.pipeline.ingest.many_files import ingest_paths
    from takeup.pipeline.warehouse import init_warehouse
    from takeup.schemas.config import load_config
    root = tmp_path_factory.mktemp("demo")
    old = os.environ.get("TAKEUP_ID_KEY")
    os.environ["TAKEUP_ID_KEY"] = TEST_KEY
    try:
        manifest = generate_demo(root)
        path = root / "demo.duckdb"
        init_warehouse(path, load_config(manifest.config_path))
        reports = ingest_paths(path, list(manifest.files))
    finally:
        if old is None:
            os.environ.pop("TAKEUP_ID_KEY", None)
        else:
            os.environ["TAKEUP_ID_KEY"] = old
    return {"path": path, "manifest": manifest, "reports": reports}
