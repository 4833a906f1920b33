"""CLI: help on every command, exit codes, suggestions."""

from __future__ import annotations

import subprocess
import sys

import pytest

from takeup.pipeline.cli import COMMANDS, main
from tests.conftest import write_csv


@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_help_on_every_command(command, capsys):
    with pytest.raises(SystemExit) as e:
        main([command, "--help"])
    assert e.value.code == 0
    out = capsys.readouterr().out
    # every command works on a warehouse except api-server, which starts the local Prefect API
    assert ("--port" if command == "api-server" else "--warehouse") in out


def test_unknown_command_suggests(capsys):
    with pytest.raises(SystemExit) as e:
        main(["ingset"])
    assert e.value.code == 2
    assert "did you mean 'ingest'" in capsys.readouterr().err


def test_bad_choice_suggests(capsys, tmp_path):
    with pytest.raises(SystemExit) as e:
        main(["ingest", "--kind", "outcomes", str(tmp_path / "x.csv")])
    assert e.value.code == 2
    assert "did you mean 'outcome'" in capsys.readouterr().err


def test_ingest_exit_codes(tmp_path, capsys, key_env):
    w = tmp_path / "w.duckdb"
    assert main(["init", "--warehouse", str(w)]) == 0
    good = write_csv(tmp_path / "a.csv", "site_id,participant_id,arm,assigned_on", "S1,p1,control,2026-01-05")
    assert main(["ingest", "--warehouse", str(w), str(good)]) == 0
    out = capsys.readouterr().out
    assert "read 1 = loaded 1 + quarantined 0 + duplicate 0" in out
    bad = write_csv(tmp_path / "b.csv", "site_id,participant_id,arm,assigned_on", "S1,p2,nope,2026-01-05")
    assert main(["ingest", "--warehouse", str(w), str(bad)]) == 1
    out = capsys.readouterr().out
    assert "unknown_arm 1" in out and "b.csv" in out
    assert main(["ingest", "--warehouse", str(tmp_path / "missing.duckdb"), str(good)]) == 2
    assert "does not exist" in capsys.readouterr().err


def test_console_script_runs():
    r = subprocess.run([sys.executable, "-m", "takeup.pipeline.cli", "--help"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0 and "takeup" in r.stdout
