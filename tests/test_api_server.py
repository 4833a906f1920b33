"""``takeup api-server``: a local Prefect API started once and reused by orchestrated runs.

* A set but unreachable ``PREFECT_API_URL`` is a usage error naming the variable (exit 2),
  before any work and without a long hang in Prefect's client.
* End to end from the CLI: the server starts on a free port and announces its URL; a
  ``takeup run --orchestrated`` pointed at it completes, and Prefect's own API (the reference)
  reports that flow run COMPLETED on that server; SIGTERM stops the server and its child.
  (About 15-30 s: one server start-up; timing is not asserted, see benchmarks/orchestration.py.)
"""

from __future__ import annotations

import json
import os
import re
import signal
import socket
import subprocess
import sys
import urllib.request
from datetime import date
from pathlib import Path

import pytest

pytest.importorskip("prefect")

from tests.conftest import TEST_KEY  # noqa: E402
from tests.test_flows import small_warehouse  # noqa: E402,F401  (fixture)

TAKEUP = str(Path(sys.executable).with_name("takeup"))


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_unreachable_api_url_is_a_usage_error(warehouse, monkeypatch, capsys):
    from takeup.pipeline.cli import main
    url = f"http://127.0.0.1:{_free_port()}/api"          # nothing listens there
    monkeypatch.setenv("PREFECT_API_URL", url)
    code = main(["run", "--orchestrated", "--warehouse", str(warehouse), "--as-of", "2026-05-31"])
    err = capsys.readouterr().err
    assert code == 2
    assert f"PREFECT_API_URL={url} does not answer" in err and "takeup api-server" in err


def test_port_out_of_range_is_a_usage_error(capsys):
    from takeup.pipeline.cli import main
    assert main(["api-server", "--port", "70000"]) == 2
    assert "--port" in capsys.readouterr().err


def test_orchestrated_run_reuses_a_running_server(small_warehouse, tmp_path):  # noqa: F811
    env = dict(os.environ, TAKEUP_ID_KEY=TEST_KEY, PREFECT_SERVER_ANALYTICS_ENABLED="false", DO_NOT_TRACK="1",
               PREFECT_HOME=str(tmp_path / "prefect-home"))
    env.pop("PREFECT_API_URL", None)
    port = _free_port()
    server = subprocess.Popen([TAKEUP, "api-server", "--port", str(port)], env=env, stdout=subprocess.PIPE,
                              stderr=subprocess.STDOUT, text=True)
    try:
        url = None
        for line in server.stdout:
            if line.startswith("export PREFECT_API_URL="):
                url = line.split("=", 1)[1].strip()
                break
        assert url == f"http://127.0.0.1:{port}/api", url
        done = subprocess.run([TAKEUP, "run", "--orchestrated", "--warehouse", str(small_warehouse),
                               "--as-of", date(2026, 5, 31).isoformat()],
                              env=dict(env, PREFECT_API_URL=url), capture_output=True, text=True, timeout=600)
        assert done.returncode == 0, done.stderr
        m = re.search(r"Prefect flow run ([0-9a-f-]{36}) on (\S+)\)", done.stdout)
        assert m and m.group(2) == url, done.stdout
        with urllib.request.urlopen(f"{url}/flow_runs/{m.group(1)}", timeout=30) as resp:
            run = json.load(resp)
        assert run["state_type"] == "COMPLETED"
    finally:
        server.send_signal(signal.SIGTERM)
        code = server.wait(timeout=60)
    assert code == 0
    from takeup.flows.api_server import api_is_up
    assert not api_is_up(f"http://127.0.0.1:{port}/api", timeout=2)
